//! The operator's flow through the real binary, driven by scripted standard input: typed
//! serials and reference readings (with typos, wrong units, implausible values), skips, aborts,
//! Ctrl-C, and reference readings imported from CSV.

mod common;
use common::{bin, records_in, temp_dir};

use meterproof::plan::{Plan, Quantity};
use meterproof::record::{StepStatus, UnitStatus};
use std::io::Write;
use std::path::Path;
use std::process::{Command, Output, Stdio};

fn demo() -> Plan {
    Plan::load(Path::new("test-plans/demo.yaml")).unwrap()
}

/// The quantities a step asks the operator for, in the order it asks.
fn asked(plan: &Plan, step: usize) -> Vec<Quantity> {
    let mut out = Vec::new();
    for c in &plan.steps[step].checks {
        if c.tolerance.needs_reference() && !out.contains(&c.quantity) {
            out.push(c.quantity);
        }
    }
    out
}

/// The nominal value of a quantity at a step, as an operator would type it.
fn nominal_text(plan: &Plan, step: usize, q: Quantity) -> String {
    let s = &plan.steps[step];
    let v = s.load.nominal(q, s.sampling_window_s());
    format!("{v} {}", q.unit())
}

fn run_with_input(args: &[&str], out: &Path, input: &str) -> Output {
    let mut child = bin()
        .args(args)
        .arg("--out")
        .arg(out)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    child
        .stdin
        .take()
        .unwrap()
        .write_all(input.as_bytes())
        .unwrap();
    child.wait_with_output().unwrap()
}

#[test]
fn a_typed_session_with_mistakes_gets_the_right_verdicts() {
    let plan = demo();
    let dir = temp_dir("typed");
    // Operator, lot, and four serials, one scanned twice by mistake.
    let mut input = String::from("op-17\nLOT-9\nTM-A\nTM-B\nTM-B\nTM-C\nTM-D\n");
    for step in 0..plan.steps.len() {
        input.push('\n'); // the load is set
        for q in asked(&plan, step) {
            let text = nominal_text(&plan, step, q);
            if step == 1 && q == Quantity::Current {
                // A wrong unit, then a decimal comma, then a typo corrected before it counts.
                input.push_str("500 mV\n0,5 A\n0.6 A\n");
                // 0.6 A is 20 % from the nominal 0.5 A: confirmation asked; another value
                // typed instead replaces it, and is itself replaced by the nominal one.
                input.push_str("0.52 A\n");
                input.push_str(&format!("{text}\n\n"));
                continue;
            }
            input.push_str(&format!("{text}\n\n"));
        }
    }
    let o = run_with_input(
        &["run", "test-plans/demo.yaml", "--ask", "--quiet"],
        &dir,
        &input,
    );
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(1), "{stderr}");
    assert!(stderr.contains("TM-B is already in position 2"), "{stderr}");
    assert!(
        stderr.contains("refused: expected a current such as \"5 A\", but \"500 mV\" is a voltage"),
        "{stderr}"
    );
    // The energy window's start is cued, once for the one step with an energy check.
    assert_eq!(
        stderr
            .matches("The energy window starts now: note the reference meter's energy counter.")
            .count(),
        1,
        "{stderr}"
    );
    // The caution once per run, not at every prompt, and no line of it wider than 80 columns.
    assert_eq!(
        stderr.matches("CAUTION: mains voltage").count(),
        1,
        "{stderr}"
    );
    let caution = &stderr[stderr.find("CAUTION").unwrap()..];
    assert!(
        caution.lines().take(2).all(|l| l.chars().count() <= 80),
        "{caution}"
    );
    let rs = records_in(&dir);
    let serials: Vec<&str> = rs.iter().map(|r| r.serial.as_str()).collect();
    assert_eq!(serials, ["TM-A", "TM-B", "TM-C", "TM-D"]);
    // The simulator's defect sits at position 2 with seed 1: only that unit is rejected.
    let statuses: Vec<UnitStatus> = rs.iter().map(|r| r.verdict.status).collect();
    assert_eq!(
        statuses,
        [
            UnitStatus::Accepted,
            UnitStatus::Rejected,
            UnitStatus::Accepted,
            UnitStatus::Accepted
        ]
    );
    assert_eq!(rs[0].operator, "op-17");
    assert_eq!(rs[0].lot.as_deref(), Some("LOT-9"));
    // Every entry is recorded with its time and as typed, refused ones included.
    let reading = &rs[0].steps[1].references[0].reading;
    assert_eq!(reading.source, "operator");
    let typed: Vec<(&str, &str)> = reading
        .entries
        .iter()
        .map(|e| (e.text.as_str(), e.outcome.as_str()))
        .collect();
    assert_eq!(
        typed[0],
        (
            "500 mV",
            "refused: expected a current such as \"5 A\", but \"500 mV\" is a voltage"
        )
    );
    assert_eq!(typed[1], ("0,5 A", "corrected"));
    assert_eq!(typed[2], ("0.6 A", "confirm"));
    assert_eq!(typed[3], ("0.6 A", "corrected"));
    assert_eq!(typed[4], ("0.52 A", "corrected"));
    assert_eq!(typed.last().unwrap().1, "accepted");
    assert_eq!(typed.len(), 6, "{typed:?}");
    assert!(
        reading
            .entries
            .iter()
            .all(|e| chrono::DateTime::parse_from_rfc3339(&e.at).is_ok())
    );
    assert_eq!(reading.value, 0.5);
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn an_implausible_value_confirmed_is_taken() {
    let plan = demo();
    let dir = temp_dir("confirm");
    let mut input = String::from("op\nL\n1\n2\n3\n4\n");
    for step in 0..plan.steps.len() {
        input.push('\n');
        for q in asked(&plan, step) {
            if step == 2 && q == Quantity::Current {
                input.push_str("5.8 A\n5.8 A\n"); // 16 % high, typed again: confirmed
            } else {
                input.push_str(&format!("{}\n\n", nominal_text(&plan, step, q)));
            }
        }
    }
    let o = run_with_input(
        &["run", "test-plans/demo.yaml", "--ask", "--quiet"],
        &dir,
        &input,
    );
    let rs = records_in(&dir);
    let c = &rs[0].steps[2].checks[1];
    assert_eq!(c.quantity, Quantity::Current);
    assert_eq!(c.reference, Some(5.8));
    // A confirmed 5.8 A says the load was not the 5 A the plan asked for: the step is judged
    // for no unit, and none is accepted or rejected on it.
    assert_eq!(o.status.code(), Some(3));
    for r in &rs {
        assert_eq!(r.steps[2].status, StepStatus::Incomplete);
        assert!(
            r.steps[2].reason.as_deref().unwrap().starts_with(
                "load not as planned: the reference reads current 5.8 A, the plan 5 A"
            ),
            "{:?}",
            r.steps[2].reason
        );
        assert_ne!(r.verdict.status, UnitStatus::Accepted);
    }
    // (The planted defect still rejects its unit at another step.)
    assert_eq!(rs[0].verdict.status, UnitStatus::Incomplete);
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn skip_and_abort_go_into_the_records() {
    let plan = demo();
    let dir = temp_dir("abort");
    let mut input = String::from("op\nL\n1\n2\n3\n4\n");
    // Step 1 skipped: a skip without a reason is asked for one.
    input.push_str("skip\nlamp bank fuse blown\n");
    input.push('\n'); // step 2
    for q in asked(&plan, 1) {
        input.push_str(&format!("{}\n\n", nominal_text(&plan, 1, q)));
    }
    // At step 3 an abort is confirmed: first declined (the prompt comes back), then given.
    input.push_str("abort end of shift\n\nabort end of shift\nyes\n");
    let o = run_with_input(
        &["run", "test-plans/demo.yaml", "--ask", "--quiet"],
        &dir,
        &input,
    );
    assert_eq!(o.status.code(), Some(3), "the run did not complete");
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert!(stderr.contains("Why skip? A reason is needed"), "{stderr}");
    assert!(stderr.contains("skipped: the step at"), "{stderr}");
    assert_eq!(
        stderr.matches("Abort the run (end of shift)?").count(),
        2,
        "{stderr}"
    );
    let records = records_in(&dir);
    assert_eq!(records.len(), 4);
    for r in records {
        assert_eq!(r.verdict.status, UnitStatus::Incomplete);
        assert_eq!(r.steps[0].status, StepStatus::NotRun);
        assert_eq!(
            r.steps[0].reason.as_deref(),
            Some("skipped by the operator: lamp bank fuse blown")
        );
        assert_eq!(r.steps[1].status, StepStatus::Done);
        assert!(r.steps[2..].iter().all(|s| s.status == StepStatus::NotRun));
        assert!(
            r.steps[2]
                .reason
                .as_deref()
                .unwrap()
                .contains("end of shift"),
            "{:?}",
            r.steps[2].reason
        );
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn ctrl_c_at_a_prompt_keeps_what_was_taken_and_exits_3() {
    let dir = temp_dir("sigint");
    let mut child = bin()
        .args(["run", "test-plans/demo.yaml", "--ask", "--quiet", "--out"])
        .arg(&dir)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut stdin = child.stdin.take().unwrap();
    // The prompts come on standard error: read it as it comes, to know when the run waits.
    let mut stderr = child.stderr.take().unwrap();
    let (tx, rx) = std::sync::mpsc::channel::<Vec<u8>>();
    let reader = std::thread::spawn(move || {
        let mut buf = [0u8; 4096];
        loop {
            match std::io::Read::read(&mut stderr, &mut buf) {
                Ok(0) | Err(_) => break,
                Ok(n) => {
                    if tx.send(buf[..n].to_vec()).is_err() {
                        break;
                    }
                }
            }
        }
    });
    // Identities and the first (no-load) step, then wait until the second step's prompt is
    // shown (an observable event, not a fixed pause).
    stdin.write_all(b"op\nL\n1\n2\n3\n4\n\n").unwrap();
    stdin.flush().unwrap();
    let mut seen = Vec::new();
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(60);
    while !String::from_utf8_lossy(&seen).contains("Set the load to 500 mA") {
        let left = deadline.saturating_duration_since(std::time::Instant::now());
        match rx.recv_timeout(left) {
            Ok(chunk) => seen.extend(chunk),
            Err(_) => panic!(
                "the second step's prompt never came: {}",
                String::from_utf8_lossy(&seen)
            ),
        }
    }
    let status = Command::new("kill")
        .args(["-INT", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let o = child.wait_with_output().unwrap();
    drop(stdin);
    reader.join().unwrap();
    seen.extend(rx.try_iter().flatten());
    assert_eq!(
        o.status.code(),
        Some(3),
        "{}",
        String::from_utf8_lossy(&seen)
    );
    let records = records_in(&dir);
    assert_eq!(records.len(), 4, "every unit's record kept");
    for r in records {
        assert_eq!(r.verdict.status, UnitStatus::Incomplete);
        assert_eq!(
            r.steps[0].status,
            StepStatus::Done,
            "the no-load step was kept"
        );
        assert!(
            r.steps[1]
                .reason
                .as_deref()
                .unwrap()
                .contains("interrupted"),
            "{:?}",
            r.steps[1].reason
        );
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

/// A reference CSV with the plan's nominal values.
fn reference_csv(plan: &Plan) -> String {
    let mut csv = String::from(
        "# instrument: REF-LAB-4 (invented)\n# accuracy: 0.02 % of reading\nstep,quantity,value,unit\n",
    );
    for (i, s) in plan.steps.iter().enumerate() {
        for q in asked(plan, i) {
            let v = s.load.nominal(q, s.sampling_window_s());
            csv.push_str(&format!("{},{},{v},{}\n", s.id, q.name(), q.unit()));
        }
    }
    csv
}

#[test]
fn a_reference_file_needs_no_typing() {
    let plan = demo();
    let dir = temp_dir("csv");
    let file = dir.join("refs.csv");
    std::fs::write(&file, reference_csv(&plan)).unwrap();
    let o = bin()
        .args(["run", "test-plans/demo.yaml", "--quiet", "--reference"])
        .arg(&file)
        .arg("--out")
        .arg(dir.join("out"))
        .stdin(Stdio::null())
        .output()
        .unwrap();
    assert_eq!(
        o.status.code(),
        Some(1),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let rs = records_in(&dir.join("out"));
    let statuses: Vec<UnitStatus> = rs.iter().map(|r| r.verdict.status).collect();
    assert_eq!(
        statuses,
        [
            UnitStatus::Accepted,
            UnitStatus::Rejected,
            UnitStatus::Accepted,
            UnitStatus::Accepted
        ]
    );
    let reading = &rs[0].steps[1].references[0].reading;
    assert_eq!(reading.source, "file");
    // The file's instrument is the run's reference, in every record.
    assert_eq!(rs[0].station.reference.id, "REF-LAB-4 (invented)");
    assert_eq!(
        rs[0].station.reference.accuracy.as_deref(),
        Some("0.02 % of reading")
    );
    assert!(
        reading.as_given.as_deref().unwrap().contains("line 4 of"),
        "{:?}",
        reading.as_given
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_bad_reference_file_is_refused_before_any_step_with_every_bad_line() {
    let plan = demo();
    let dir = temp_dir("badcsv");
    let good = reference_csv(&plan);
    // Lines 1 and 2 name the instrument; line 3 is the header.
    let mut lines: Vec<String> = good.lines().map(String::from).collect();
    lines[4] = "low-0.1Ib,active_power,115,V".into(); // wrong unit (line 5)
    lines[5] = lines[3].clone(); // a duplicate of line 4 (line 6)
    lines.push("no-such-step,current,5,A".into()); // unknown step
    lines.push("basic-Ib,torque,5,Nm".into()); // unknown quantity
    lines.push("no-load,current,0,A".into()); // an extra row: no-load needs no reference
    lines.push("basic-Ib,current,five,A".into()); // unparsable value
    let file = dir.join("bad.csv");
    std::fs::write(&file, lines.join("\n")).unwrap();
    let o = bin()
        .args(["run", "test-plans/demo.yaml", "--quiet", "--reference"])
        .arg(&file)
        .arg("--out")
        .arg(dir.join("out"))
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    let f = file.display().to_string();
    for expected in [
        format!("{f}:5: active_power: expected an active power"),
        format!("{f}:6: a second current for step low-0.1Ib (the first is on line 4)"),
        format!("{f}:{}: no step \"no-such-step\"", lines.len() - 3),
        format!("{f}:{}: unknown quantity \"torque\"", lines.len() - 2),
        format!(
            "{f}:{}: step no-load needs no reference current",
            lines.len() - 1
        ),
        format!("{f}:{}: current: expected a current", lines.len()),
        format!("{f}: no active_power reading for step low-0.1Ib"),
    ] {
        assert!(err.contains(&expected), "missing «{expected}» in:\n{err}");
    }
    // Nothing ran: no run folder has any record.
    assert!(!dir.join("out").exists() || records_in(&dir.join("out")).is_empty());
    // A file that does not name its instrument and accuracy is refused: its readings could
    // carry no uncertainty.
    let anonymous = dir.join("anonymous.csv");
    std::fs::write(
        &anonymous,
        good.lines().skip(2).collect::<Vec<_>>().join("\n"),
    )
    .unwrap();
    let o = bin()
        .args(["run", "test-plans/demo.yaml", "--quiet", "--reference"])
        .arg(&anonymous)
        .arg("--out")
        .arg(dir.join("out2"))
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("must name the instrument"), "{err}");
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_reference_file_of_a_million_bad_rows_prints_the_first_and_counts_the_rest() {
    let dir = temp_dir("csv-million");
    let file = dir.join("refs.csv");
    let mut csv = String::from(
        "# instrument: REF-LAB-4 (invented)\n# accuracy: 0.02 % of reading\nstep,quantity,value,unit\n",
    );
    for i in 0..1_000_000 {
        csv.push_str(&format!("nowhere-{i},current,1,A\n"));
    }
    std::fs::write(&file, csv).unwrap();
    let o = bin()
        .args(["run", "test-plans/demo.yaml", "--quiet", "--reference"])
        .arg(&file)
        .arg("--out")
        .arg(dir.join("out"))
        .stdin(Stdio::null())
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    let lines: Vec<&str> = err.lines().collect();
    assert!(lines.len() <= 52, "{} lines", lines.len());
    assert!(
        err.contains("more mistakes (the first 50 are shown)"),
        "{}",
        lines.last().unwrap()
    );
    assert!(
        lines[0].contains("refs.csv:4: no step \"nowhere-0\""),
        "{}",
        lines[0]
    );
    std::fs::remove_dir_all(&dir).unwrap();
}
