//! A whole acceptance run on the built-in simulated bench, through the real binary, with its
//! records and reports read back.

mod common;
use common::{bin, temp_dir};

use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::record::{self, CheckVerdict, UnitRecord, UnitStatus};
use std::path::{Path, PathBuf};

/// Runs the demo plan and returns (exit code, run folder, records by position).
fn run_demo(out: &Path, extra: &[&str]) -> (i32, PathBuf, Vec<UnitRecord>) {
    let status = bin()
        .args([
            "run",
            "test-plans/demo.yaml",
            "--bench",
            "sim",
            "--quiet",
            "--out",
        ])
        .arg(out)
        .args(extra)
        .output()
        .unwrap();
    let code = status.status.code().unwrap();
    let run_dir = std::fs::read_dir(out)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_dir())
        .max()
        .expect("a run folder");
    let mut records: Vec<UnitRecord> = std::fs::read_dir(&run_dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "json"))
        .map(|p| record::read(&p).unwrap())
        .collect();
    records.sort_by_key(|r| r.position);
    (code, run_dir, records)
}

#[test]
fn the_demo_rejects_exactly_the_unit_the_simulator_spoiled() {
    let out = temp_dir("demo");
    let (code, run_dir, records) = run_demo(&out, &[]);
    assert_eq!(code, 1, "exit status 1: a unit was rejected");
    assert_eq!(records.len(), 4);
    // The simulator, built as the CLI builds it, says which unit carries the defect.
    let sim = SimBench::new(&SimConfig::new(1, 4));
    let defect = &sim.defects()[0];
    for r in &records {
        let failed: Vec<(String, &str)> = r
            .failed_checks()
            .map(|(s, c)| (s.id.clone(), c.quantity.name()))
            .collect();
        if r.position == defect.position {
            assert_eq!(r.serial, defect.serial);
            assert_eq!(r.verdict.status, UnitStatus::Rejected);
            // A phase error shows only where the power factor is not 1 (P = V·I·cos φ).
            assert_eq!(failed, vec![("basic-pf0.5".to_string(), "active_power")]);
        } else {
            assert_eq!(r.verdict.status, UnitStatus::Accepted, "{:?}", r.verdict);
            assert!(failed.is_empty());
        }
        // Every check of every step was decided on the full sample series.
        for s in &r.steps {
            for c in &s.checks {
                assert_ne!(c.verdict, CheckVerdict::NotEvaluated);
                assert_eq!(c.samples.len(), s.samples_planned as usize);
            }
        }
        assert_eq!(
            r.plan.sha256,
            meterproof::plan::sha256_hex(&std::fs::read("test-plans/demo.yaml").unwrap())
        );
        assert!(chrono::DateTime::parse_from_rfc3339(&r.started_at).is_ok());
        assert!(chrono::DateTime::parse_from_rfc3339(&r.finished_at).is_ok());
    }
    // One record, one HTML and one CSV report per serial number.
    for r in &records {
        let stem = format!("{}-p{}", record::safe_file_stem(&r.serial), r.position);
        let html = std::fs::read_to_string(run_dir.join(format!("{stem}.html"))).unwrap();
        let word = r.verdict.status.word();
        let symbol = r.verdict.status.symbol();
        assert!(
            html.contains(&format!("{symbol} {word}")),
            "verdict as word and symbol"
        );
        assert!(html.contains(&r.serial));
        let csv = std::fs::read_to_string(run_dir.join(format!("{stem}.csv"))).unwrap();
        let mut reader = csv::Reader::from_reader(csv.as_bytes());
        let rows: Vec<csv::StringRecord> = reader.records().map(|x| x.unwrap()).collect();
        assert_eq!(rows.len(), 13, "one row per check");
        let verdict_column = reader
            .headers()
            .unwrap()
            .iter()
            .position(|h| h == "verdict")
            .unwrap();
        let fails = rows
            .iter()
            .filter(|row| &row[verdict_column] == "fail")
            .count();
        assert_eq!(fails, r.failed_checks().count());
    }
    std::fs::remove_dir_all(&out).unwrap();
}

/// Everything but the wall-clock fields.
fn without_wall_clock(mut r: UnitRecord) -> UnitRecord {
    r.started_at.clear();
    r.finished_at.clear();
    r.run_id.clear();
    r
}

#[test]
fn the_same_seed_gives_the_same_records() {
    let out = temp_dir("seed");
    let (_, _, a) = run_demo(&out.join("a"), &["--seed", "42"]);
    let (_, _, b) = run_demo(&out.join("b"), &["--seed", "42"]);
    let (_, _, c) = run_demo(&out.join("c"), &["--seed", "43"]);
    let a: Vec<_> = a.into_iter().map(without_wall_clock).collect();
    let b: Vec<_> = b.into_iter().map(without_wall_clock).collect();
    let c: Vec<_> = c.into_iter().map(without_wall_clock).collect();
    assert_eq!(a, b);
    assert_ne!(a, c);
    // Bit for bit: the JSON bytes agree too.
    assert_eq!(
        record::to_json(&a[0]).unwrap(),
        record::to_json(&b[0]).unwrap()
    );
    std::fs::remove_dir_all(&out).unwrap();
}

#[test]
fn device_text_is_escaped_in_html_and_defused_in_csv() {
    let out = temp_dir("escape");
    let (_, run_dir, records) = run_demo(
        &out,
        &[
            "--serials",
            "<script>alert(1)</script>,=HYPERLINK(\"x\"),../../etc,ok-1",
            "--seed",
            "9",
        ],
    );
    assert_eq!(records[0].serial, "<script>alert(1)</script>");
    let names: Vec<String> = std::fs::read_dir(&run_dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    assert!(
        names
            .iter()
            .all(|n| !n.contains('/') && !n.starts_with('.')),
        "{names:?}"
    );
    // Four units' record, HTML and CSV, and the run's chain anchor.
    assert_eq!(names.len(), 13);
    assert!(names.contains(&"chain-anchor.txt".to_string()), "{names:?}");
    let stem = format!("{}-p1", record::safe_file_stem(&records[0].serial));
    let html = std::fs::read_to_string(run_dir.join(format!("{stem}.html"))).unwrap();
    assert!(!html.contains("<script>"));
    assert!(html.contains("&lt;script&gt;"));
    let stem = format!("{}-p2", record::safe_file_stem(&records[1].serial));
    let csv = std::fs::read_to_string(run_dir.join(format!("{stem}.csv"))).unwrap();
    let mut reader = csv::Reader::from_reader(csv.as_bytes());
    let first = reader.records().next().unwrap().unwrap();
    assert_eq!(&first[0], "'=HYPERLINK(\"x\")");
    std::fs::remove_dir_all(&out).unwrap();
}

#[test]
fn a_firmware_outside_the_plan_is_rejected_before_any_step() {
    let out = temp_dir("firmware");
    let plan = out.join("plan.yaml");
    let text = std::fs::read_to_string("test-plans/demo.yaml")
        .unwrap()
        .replace(r"'^2\.1\.\d+$'", r"'^2\.2\.\d+$'");
    std::fs::write(&plan, text).unwrap();
    let output = bin()
        .args(["run", "--quiet", "--out"])
        .arg(out.join("o"))
        .arg(&plan)
        .output()
        .unwrap();
    assert_eq!(output.status.code(), Some(1));
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert!(
        stdout.contains("firmware 2.1.4 does not match the plan's pattern"),
        "{stdout}"
    );
    std::fs::remove_dir_all(&out).unwrap();
}

#[test]
fn bad_arguments_exit_with_status_2() {
    let out = temp_dir("args");
    for args in [
        vec!["run", "test-plans/demo.yaml", "--serials", "A,A"],
        vec![
            "run",
            "test-plans/demo.yaml",
            "--serials",
            "A,B",
            "--positions",
            "3",
        ],
        vec!["run", "test-plans/demo.yaml", "--bench", "nowhere.yaml"],
        vec!["run", "no-such-plan.yaml"],
        vec!["check", "no-such-plan.yaml"],
    ] {
        let output = bin().args(&args).arg("--out").arg(&out).output().unwrap();
        let output = if args[0] == "check" {
            bin().args(&args).output().unwrap()
        } else {
            output
        };
        assert_eq!(
            output.status.code(),
            Some(2),
            "{args:?}: {}",
            String::from_utf8_lossy(&output.stderr)
        );
        assert!(!output.stderr.is_empty());
    }
    std::fs::remove_dir_all(&out).unwrap();
}

#[test]
fn check_accepts_every_shipped_plan() {
    let plans: Vec<PathBuf> = std::fs::read_dir("test-plans")
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "yaml"))
        .collect();
    assert!(!plans.is_empty());
    let output = bin().arg("check").args(&plans).output().unwrap();
    assert_eq!(
        output.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    // Lines are wrapped at 80 columns: read the text with its breaks as spaces.
    let stdout = String::from_utf8_lossy(&output.stdout)
        .split_whitespace()
        .collect::<Vec<_>>()
        .join(" ");
    assert!(
        stdout.contains("5 steps, 13 checks, scheduled bench time 40.5 s"),
        "{stdout}"
    );
    // Each class limit is printed with its source (standard, class, range, and that it is from
    // memory), under the step it applies to.
    assert!(
        stdout.contains("class limit: IEC 62053-21:2003 class 1, 0.1 Ib ≤ I ≤ Imax at PF 1 (from memory; verify against the current edition)"),
        "{stdout}"
    );
    assert!(
        stdout
            .contains("class limit: IEC 62053-21:2003 class 1, 0.2 Ib ≤ I ≤ Imax at PF 0.5i/0.8c"),
        "{stdout}"
    );
    // The adaptive plan's rules are shown as rules, and its time as an upper bound.
    for shown in [
        "scheduled bench time 40.5 s at most",
        "settle until current stable within 2 mA (500 ms to 2.0 s), 3 to 5 × 500 ms until decided",
        "settle until current stable within 0.15 % (500 ms to 4.0 s), 3 to 11 × 1.0 s until decided",
    ] {
        assert!(stdout.contains(shown), "{shown}\n{stdout}");
    }
}

/// What the commands print fits 80 columns (the run's table, `check` of every shipped plan,
/// `history`, `runs`, `compare`), and carries no colour codes when it is not a terminal or NO_COLOR is
/// set; forced colour marks the verdict words, which read the same without it.
#[test]
fn terminal_output_fits_80_columns_and_colour_is_never_alone() {
    let dir = temp_dir("columns");
    let out = dir.join("out");
    let run = |env: &[(&str, &str)]| {
        let mut c = bin();
        c.args([
            "run",
            "test-plans/demo.yaml",
            "--quiet",
            "--lot",
            "LOT-80",
            "--out",
        ])
        .arg(&out);
        c.env_remove("NO_COLOR");
        for (k, v) in env {
            c.env(k, v);
        }
        c.output().unwrap()
    };
    let plain = run(&[]);
    let archive = out.join("archive.sqlite");
    let coloured = run(&[("CLICOLOR_FORCE", "1")]);
    let no_colour = run(&[("CLICOLOR_FORCE", "1"), ("NO_COLOR", "1")]);
    let text = |o: &std::process::Output| String::from_utf8_lossy(&o.stdout).into_owned();
    let mut outputs = vec![text(&plain)];
    for args in [
        vec!["history", "TM16-322611", "--archive"],
        vec!["runs", "--archive"],
    ] {
        let o = bin().args(&args).arg(&archive).output().unwrap();
        outputs.push(text(&o));
    }
    let runs = bin()
        .args(["runs", "--json", "--archive"])
        .arg(&archive)
        .output()
        .unwrap();
    let runs: serde_json::Value = serde_json::from_slice(&runs.stdout).unwrap();
    let first = format!("run={}", runs[0]["run_id"].as_str().unwrap());
    let o = bin()
        .args([
            "compare",
            "--baseline",
            "lot=LOT-80",
            "--candidate",
            &first,
            "--archive",
        ])
        .arg(&archive)
        .output()
        .unwrap();
    assert!(
        text(&o).contains("verdict"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    outputs.push(text(&o));
    let plans: Vec<String> = std::fs::read_dir("test-plans")
        .unwrap()
        .map(|e| e.unwrap().path().display().to_string())
        .filter(|p| p.ends_with(".yaml"))
        .collect();
    let o = bin().arg("check").args(&plans).output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    // Words are never broken at their hyphens: the station's due date stays whole.
    let joined = text(&o).split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(
        joined.contains("calibration due 2027-06-30"),
        "{}",
        text(&o)
    );
    outputs.push(text(&o));
    for output in &outputs {
        for line in output.lines() {
            assert!(
                line.chars().count() <= 80,
                "{} columns: {line}",
                line.chars().count()
            );
        }
        assert!(
            !output.contains('\u{1b}'),
            "colour codes in piped output: {output}"
        );
    }
    assert!(outputs[2].contains("yield 75.0 %"), "{}", outputs[2]);
    assert!(
        outputs[1].lines().nth(1).unwrap().contains(" 2 "),
        "the position: {}",
        outputs[1]
    );
    // Forced colour: the verdict words are coloured, and still there as words and symbols.
    let c = text(&coloured);
    assert!(c.contains("\u{1b}[31m\u{1b}[1m✘ REJECTED"), "{c}");
    assert!(c.contains("\u{1b}[32m✔ ACCEPTED"), "{c}");
    let n = text(&no_colour);
    assert!(
        !n.contains('\u{1b}'),
        "NO_COLOR wins over CLICOLOR_FORCE: {n:?}"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

/// On a real clock, units read one after another (links that cannot be read at once, as on a
/// shared bus) are read in rounds: every unit's readings spread over the step's window as the
/// plan's interval says, not the first unit's over the window and every other unit's back to
/// back after it, outside the span the reference covers. (The plan's `samples` and `interval`
/// as written; our rule.)
#[test]
fn units_read_one_after_another_are_each_sampled_over_the_window() {
    use meterproof::bench::RealClock;
    let plan = meterproof::plan::Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    // 40 bench seconds per real second: the demo's 40 s in about one.
    let mut bench = SimBench::with_clock(
        &SimConfig::new(1, 3),
        std::sync::Arc::new(RealClock::scaled(40.0)),
    )
    .into_bench();
    assert!(!bench.parallel, "the simulated bench reads unit after unit");
    let records = meterproof::exec::run(
        &plan,
        &mut bench,
        &common::ctx(),
        &mut meterproof::exec::Silent,
    );
    for r in &records {
        for step in r.steps.iter().filter(|s| s.samples_planned > 1) {
            let expected = f64::from(step.samples_planned - 1) * step.interval_s;
            for check in &step.checks {
                let (Some(first), Some(last)) = (check.samples.first(), check.samples.last())
                else {
                    panic!("position {}: no samples at {}", r.position, step.id);
                };
                let span = last.t_s - first.t_s;
                assert!(
                    span > 0.8 * expected && span < 1.5 * expected,
                    "position {}, step {}, {}: readings over {span:.3} s, the plan's window {expected} s",
                    r.position,
                    step.id,
                    check.quantity.name()
                );
            }
        }
    }
}
