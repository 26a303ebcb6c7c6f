//! The real binary on a station of simulated meters and instruments served by
//! `meterproof sim-meter` on pseudo-terminals: serial links, SCPI source and reference, faults.

mod common;
use common::{Served, bin, serve_at, temp_dir};

use meterproof::record::{self, StepStatus, UnitRecord, UnitStatus};
use std::path::Path;
use std::process::Stdio;

/// Starts `sim-meter` at 10 times real time: at 25, with the twelve tests of this file
/// sharing two cores, a late thread could move an energy window's end by enough to fail an
/// energy check (seen in CI).
fn serve(dir: &Path, extra: &[&str]) -> Served {
    serve_at(dir, "10", extra)
}

/// Runs `plan` (its energy window stretched, `common::stretched`) on the station.
fn run(plan: &str, station: &Path, out: &Path, extra: &[&str]) -> (i32, String, Vec<UnitRecord>) {
    let plan = common::stretched(plan, out.parent().unwrap());
    let output = bin()
        .arg("run")
        .arg(&plan)
        .args(["--quiet", "--unattended", "--bench"])
        .arg(station)
        .arg("--out")
        .arg(out)
        .args(extra)
        .output()
        .unwrap();
    let code = output.status.code().unwrap();
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&output.stdout),
        String::from_utf8_lossy(&output.stderr)
    );
    let mut records = Vec::new();
    if let Ok(dirs) = std::fs::read_dir(out) {
        for d in dirs.map(|d| d.unwrap().path()).filter(|p| p.is_dir()) {
            for f in std::fs::read_dir(d).unwrap() {
                let p = f.unwrap().path();
                if p.extension().is_some_and(|x| x == "json") {
                    records.push(record::read(&p).unwrap());
                }
            }
        }
    }
    records.sort_by_key(|r| r.position);
    (code, text, records)
}

#[test]
fn a_station_run_gives_the_builtin_verdicts() {
    let dir = temp_dir("plain");
    let served = serve(&dir, &[]);
    let (code, text, records) = run(
        "test-plans/demo-serial.yaml",
        &served.station,
        &dir.join("out"),
        &[],
    );
    assert_eq!(code, 1, "{text}");
    let statuses: Vec<UnitStatus> = records.iter().map(|r| r.verdict.status).collect();
    // The built-in sim with seed 1 and 4 positions plants its defect at position 2.
    assert_eq!(
        statuses,
        [
            UnitStatus::Accepted,
            UnitStatus::Rejected,
            UnitStatus::Accepted,
            UnitStatus::Accepted
        ]
    );
    let failed: Vec<String> = records[1]
        .failed_checks()
        .map(|(s, c)| format!("{} {}", s.id, c.quantity.name()))
        .collect();
    assert_eq!(failed, ["basic-pf0.5 active_power"]);
    // The reference's traceability goes into every record.
    let r = &records[0].station.reference;
    assert_eq!(r.id, "SIM-REF-1");
    assert_eq!(r.certificate.as_deref(), Some("SIM-0001"));
    assert_eq!(r.calibration_due.as_deref(), Some("2099-12-31"));
    assert!(records[0].link.contains("/dev/pts/"));
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_dead_unit_and_an_unplugged_port_leave_those_units_incomplete() {
    let dir = temp_dir("faults");
    let served = serve(
        &dir,
        &[
            "--fault",
            "3:die-after=40",
            "--fault",
            "1:drop-every=9",
            "--fault",
            "4:reboot-after=20",
        ],
    );
    // Position 2's port is unplugged.
    let text = std::fs::read_to_string(&served.station).unwrap();
    let pos2 = text
        .lines()
        .find(|l| l.contains("position: 2"))
        .unwrap()
        .to_string();
    let station = dir.join("unplugged.yaml");
    std::fs::write(
        &station,
        text.replace(
            &pos2,
            "  - { position: 2, port: /dev/meterproof-unplugged }",
        ),
    )
    .unwrap();
    let (code, out, records) = run(
        "test-plans/demo-serial.yaml",
        &station,
        &dir.join("out"),
        &[],
    );
    assert_eq!(code, 3, "the run did not complete for every unit: {out}");
    assert_eq!(records.len(), 4);
    assert_eq!(
        records[0].verdict.status,
        UnitStatus::Accepted,
        "{:?}",
        records[0].verdict
    );
    // Position 4 restarted once: the step it restarted in does not count, so it is not
    // accepted, and its record says why and how often.
    let rebooted = &records[3];
    assert_eq!(rebooted.verdict.status, UnitStatus::Incomplete);
    assert!(
        rebooted.verdict.reasons[0].contains("the unit restarted during the step"),
        "{:?}",
        rebooted.verdict
    );
    assert_eq!(rebooted.link_health.unwrap().restarts, 1);
    let unplugged = &records[1];
    assert_eq!(unplugged.verdict.status, UnitStatus::Incomplete);
    assert!(
        unplugged.verdict.reasons[0].contains("cannot open /dev/meterproof-unplugged"),
        "{:?}",
        unplugged.verdict
    );
    let dead = &records[2];
    assert_eq!(dead.verdict.status, UnitStatus::Incomplete);
    let kept: usize = dead
        .steps
        .iter()
        .flat_map(|s| &s.checks)
        .map(|c| c.samples.len())
        .sum();
    // 40 answered requests: the identity, then 39 readings.
    assert_eq!(kept, 39);
    assert!(
        dead.steps
            .iter()
            .any(|s| s.status == StepStatus::Incomplete)
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn an_overdue_reference_is_refused_unless_a_reason_is_given() {
    let dir = temp_dir("overdue");
    let served = serve(&dir, &[]);
    let text = std::fs::read_to_string(&served.station).unwrap();
    let station = dir.join("overdue.yaml");
    std::fs::write(
        &station,
        text.replace("calibration_due: 2099-12-31", "calibration_due: 2020-01-31"),
    )
    .unwrap();
    let (code, out, records) = run(
        "test-plans/demo-serial.yaml",
        &station,
        &dir.join("refused"),
        &[],
    );
    assert_eq!(code, 2);
    assert!(
        out.contains("was due for calibration on 2020-01-31"),
        "{out}"
    );
    assert!(records.is_empty(), "nothing is run");
    let (code, _, records) = run(
        "test-plans/demo-serial.yaml",
        &station,
        &dir.join("allowed"),
        &[
            "--allow-overdue-reference",
            "recalibration booked; checked against REF-2 today",
        ],
    );
    assert_eq!(code, 1);
    assert_eq!(records.len(), 4);
    for r in &records {
        assert!(
            r.notes
                .iter()
                .any(|n| n
                    .contains("past its calibration due date 2020-01-31: recalibration booked")),
            "{:?}",
            r.notes
        );
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_missing_source_stops_the_run_before_any_step() {
    let dir = temp_dir("nosource");
    let served = serve(&dir, &[]);
    let text = std::fs::read_to_string(&served.station).unwrap();
    let source_line = text
        .lines()
        .skip_while(|l| !l.starts_with("source:"))
        .nth(2)
        .unwrap()
        .to_string();
    assert!(
        source_line.trim_start().starts_with("port:"),
        "{source_line}"
    );
    let station = dir.join("nosource.yaml");
    std::fs::write(
        &station,
        text.replace(&source_line, "  port: /dev/meterproof-no-source"),
    )
    .unwrap();
    let (code, out, records) = run(
        "test-plans/demo-serial.yaml",
        &station,
        &dir.join("out"),
        &[],
    );
    assert_eq!(code, 3, "{out}");
    assert!(
        out.contains("source: cannot open /dev/meterproof-no-source"),
        "{out}"
    );
    assert!(records.is_empty());
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_sim_plan_on_a_station_is_refused() {
    let dir = temp_dir("simplan");
    let served = serve(&dir, &[]);
    let (code, out, _) = run(
        "test-plans/demo.yaml",
        &served.station,
        &dir.join("out"),
        &[],
    );
    assert_eq!(code, 2);
    assert!(
        out.contains("the plan needs a `text`, `modbus` or `iec62056_21` link"),
        "{out}"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn ports_lists_without_libudev() {
    let output = bin().arg("ports").output().unwrap();
    assert_eq!(output.status.code(), Some(0));
    assert!(!output.stdout.is_empty());
}

#[test]
fn the_example_station_file_is_valid() {
    let s = meterproof::bench::station::Station::load(Path::new("test-plans/station-example.yaml"))
        .unwrap();
    assert_eq!(s.positions.len(), 4);
    assert_eq!(
        s.ambient_c,
        Some(23.0),
        "the example states its ambient temperature"
    );
}

#[test]
fn a_station_with_typed_references_gets_the_builtin_verdicts() {
    use std::io::Write;
    let dir = temp_dir("typed");
    // Slow enough that link latency is a small part of the energy window.
    let served = serve_at(&dir, "5", &[]);
    let station = common::typed_station(&dir, &served.station);
    // Without the energy check (on a loaded machine late samples would also stretch the window
    // past the scheduled one a script would type for).
    let plan_file = common::plan_without_energy(&dir);
    let plan = meterproof::plan::Plan::load(&plan_file).unwrap();
    // The operator types what the reference meter shows: the simulated source's real output.
    let input: String = common::typed_readings(&plan)
        .iter()
        .map(|v| format!("{v}\n\n"))
        .collect();
    let mut child = bin()
        .arg("run")
        .arg(&plan_file)
        .args(["--quiet", "--unattended", "--bench"])
        .arg(&station)
        .arg("--out")
        .arg(dir.join("out"))
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
    let o = child.wait_with_output().unwrap();
    assert_eq!(
        o.status.code(),
        Some(1),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let records = common::records_in(&dir.join("out"));
    let statuses: Vec<UnitStatus> = records.iter().map(|r| r.verdict.status).collect();
    assert_eq!(
        statuses,
        [
            UnitStatus::Accepted,
            UnitStatus::Rejected,
            UnitStatus::Accepted,
            UnitStatus::Accepted
        ],
        "{:?}",
        records
            .iter()
            .map(|r| &r.verdict.reasons)
            .collect::<Vec<_>>()
    );
    assert_eq!(records[0].steps[1].references[0].reading.source, "operator");
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The reference's accuracy is a term of every budget: a station must state it, or say in so
/// many words that it is unknown, and then every report says so on its first page.
#[test]
fn a_reference_accuracy_is_stated_or_declared_unknown() {
    let dir = temp_dir("accuracy");
    let text = std::fs::read_to_string("test-plans/station-example.yaml").unwrap();
    let line = text
        .lines()
        .find(|l| l.trim_start().starts_with("accuracy:"))
        .unwrap()
        .to_string();
    let without = dir.join("without.yaml");
    std::fs::write(&without, text.replace(&format!("{line}\n"), "")).unwrap();
    let o = bin().arg("check").arg(&without).output().unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(err.contains("state the reference's accuracy"), "{err}");
    let unknown = dir.join("unknown.yaml");
    std::fs::write(&unknown, text.replace(&line, "  accuracy: unknown")).unwrap();
    let o = bin().arg("check").arg(&unknown).output().unwrap();
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    // A run on a served station whose accuracy is unknown: the reports say so.
    let served = serve(&dir, &[]);
    let station = std::fs::read_to_string(&served.station).unwrap();
    let acc = station
        .lines()
        .find(|l| l.trim_start().starts_with("accuracy:"))
        .unwrap()
        .to_string();
    let unknown_station = dir.join("served-unknown.yaml");
    std::fs::write(
        &unknown_station,
        station.replace(&acc, "  accuracy: unknown"),
    )
    .unwrap();
    let (_, out, records) = run(
        "test-plans/demo-serial.yaml",
        &unknown_station,
        &dir.join("out"),
        &[],
    );
    assert_eq!(records.len(), 4, "{out}");
    let run_dir = std::fs::read_dir(dir.join("out"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.is_dir())
        .unwrap();
    let html =
        std::fs::read_to_string(run_dir.join(format!("{}-p1.html", records[0].serial))).unwrap();
    assert!(
        html.contains("The reference&#x27;s accuracy is not stated")
            || html.contains("The reference's accuracy is not stated"),
        "{html}"
    );
    // No reference term in any budget, and the record says why.
    let c = &records[0].steps[2].checks[0];
    let b = c.uncertainty.as_ref().unwrap();
    assert!(
        b.components
            .iter()
            .all(|x| x.name != "accuracy of the reference instrument")
    );
    drop(served);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Directive 2014/32/EU, Annex V (MI-003), Table 2 [published]: class B's maximum permissible
/// error from Itr to Imax is 2 % at +5…+30 °C and 2.5 % at −10…+5 or +30…+40 °C. The run takes
/// the band of the station's stated ambient temperature; a station that states none is refused
/// before any load.
#[test]
fn the_directive_class_limits_follow_the_bench_temperature() {
    let dir = temp_dir("ambient");
    let plan = std::fs::read_to_string("test-plans/demo-serial.yaml")
        .unwrap()
        .replace(
            "  class: \"1\"          # IEC 62053-21 class 1: active power and energy limits come from the class table",
            "  class: B\n  class_table: Directive 2014/32/EU\n  transitional_current: 0.5 A\n  minimum_current: 0.25 A",
        );
    assert!(plan.contains("class_table"));
    let plan_path = dir.join("class-b.yaml");
    std::fs::write(&plan_path, &plan).unwrap();
    // `check`, with no bench, shows the reference band and says so.
    let out = bin().arg("check").arg(&plan_path).output().unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{text}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(text.contains("±2 % (class)"), "{text}");
    let served = serve(&dir, &[]);
    let station = std::fs::read_to_string(&served.station).unwrap();
    // No stated temperature: refused, saying what to add, and no unit is tested.
    let (code, text, records) = run(
        plan_path.to_str().unwrap(),
        &served.station,
        &dir.join("none"),
        &[],
    );
    assert_eq!(code, 2, "{text}");
    assert!(text.contains("ambient_temperature"), "{text}");
    assert!(records.is_empty());
    // At 35 °C every class check is held to 2.5 %, with the band named as its source.
    let warm = dir.join("warm.yaml");
    std::fs::write(&warm, format!("ambient_temperature: 35 °C\n{station}")).unwrap();
    let (_, text, records) = run(plan_path.to_str().unwrap(), &warm, &dir.join("warm"), &[]);
    assert_eq!(records.len(), 4, "{text}");
    assert_eq!(records[0].station.ambient_c, Some(35.0));
    let class_checks: Vec<_> = records[0]
        .steps
        .iter()
        .flat_map(|s| &s.checks)
        .filter(|c| matches!(c.tolerance, meterproof::plan::Tolerance::Class { .. }))
        .collect();
    assert!(class_checks.len() >= 4);
    for c in class_checks {
        let e = c.evaluation.as_ref().expect("every class check evaluated");
        let basis = match &c.tolerance {
            meterproof::plan::Tolerance::Class { basis, .. } => basis.clone(),
            t => panic!("{t:?}"),
        };
        assert_eq!(e.limit, 2.5, "{basis}");
        assert!(basis.contains("+30 to +40 °C"), "{basis}");
    }
    drop(served);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// An SCPI reference with no energy counter: the reference energy is inferred from its power at
/// the window's two ends (the trapezoid, E = (P₀ + P₁)/2 · t), both readings are kept in the
/// record, and the drift between them enters the budget as a rectangular term of half-width
/// |P₁ − P₀|/2 · t (GUM 4.3.7), so the figure can be redone from the record.
#[test]
fn an_energy_inferred_from_power_keeps_both_ends_and_their_drift() {
    let dir = temp_dir("energy");
    let served = serve(&dir, &[]);
    let (_, text, records) = run(
        "test-plans/demo-serial.yaml",
        &served.station,
        &dir.join("out"),
        &[],
    );
    assert_eq!(records.len(), 4, "{text}");
    for r in &records {
        let step = r.steps.iter().find(|s| s.id == "max-Imax").unwrap();
        let energy = step
            .references
            .iter()
            .find(|x| x.quantity.name() == "active_energy")
            .unwrap();
        let reading = &energy.reading;
        let (t0, t1) = reading.window_s.unwrap();
        assert_eq!(reading.power_readings.len(), 2, "{reading:?}");
        let [(_, p0), (_, p1)] = [reading.power_readings[0], reading.power_readings[1]];
        let expected = (p0 + p1) / 2.0 * (t1 - t0) / 3600.0;
        assert!(
            (reading.value - expected).abs() <= 1e-12 * expected,
            "{reading:?}"
        );
        let check = step
            .checks
            .iter()
            .find(|c| c.quantity.name() == "active_energy")
            .unwrap();
        let budget = check.uncertainty.as_ref().unwrap();
        let drift = budget
            .components
            .iter()
            .find(|c| c.name.starts_with("load drift over the window"))
            .expect("a drift term");
        // u = a/√3 with a = |P₁ − P₀|/2 · span (h), times the sensitivity 100·E_unit/E_ref².
        let share = {
            let s = &check.samples;
            (s[s.len() - 1].t_s - s[0].t_s) / (t1 - t0)
        };
        let span_h = (t1 - t0) * share / 3600.0;
        let e_ref = check.reference.unwrap();
        let c = 100.0 * check.measured.unwrap() / (e_ref * e_ref);
        let u = (p1 - p0).abs() / 2.0 * span_h / 3f64.sqrt() * c;
        assert!(
            (drift.u - u).abs() <= 1e-9 * u.max(1e-12),
            "{} vs {u}",
            drift.u
        );
    }
    drop(served);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// A serial mistyped at the scan is not fatal: before the first load the operator is asked to
/// scan that unit again; a scan that matches lets it take part (the first scan kept in its
/// notes), Enter leaves it out as before.
#[test]
fn a_mistyped_serial_may_be_scanned_again_before_the_first_load() {
    use std::io::Write;
    let dir = temp_dir("rescan");
    let served = serve(&dir, &[]);
    // The first step alone: what matters here happens before it.
    let text = std::fs::read_to_string("test-plans/demo-serial.yaml").unwrap();
    let cut = text.find("  - id: low-0.1Ib").unwrap();
    let plan = dir.join("first-step.yaml");
    std::fs::write(&plan, &text[..cut]).unwrap();
    let scan = |answer: &str, out: &str| {
        let mut child = common::bin()
            .args([
                "run",
                plan.to_str().unwrap(),
                "--ask",
                "--unattended",
                "--bench",
            ])
            .arg(&served.station)
            .arg("--out")
            .arg(dir.join(out))
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        let input =
            format!("op-3\nLOT-5\nTM16-322610\nTM16-32261l\nTM16-322612\nTM16-322613\n{answer}\n");
        child
            .stdin
            .take()
            .unwrap()
            .write_all(input.as_bytes())
            .unwrap();
        let o = child.wait_with_output().unwrap();
        let stderr = String::from_utf8_lossy(&o.stderr).into_owned();
        let mut records = common::records_in(&dir.join(out));
        records.sort_by_key(|r| r.position);
        (stderr, records)
    };
    let (stderr, records) = scan("TM16-322611", "again");
    assert!(
        stderr.contains("Position 2: TM16-32261l was scanned, but the unit there reports TM16-322611. Scan it again"),
        "{stderr}"
    );
    // Tested like the others.
    assert_eq!(records[1].verdict.status, UnitStatus::Accepted, "{stderr}");
    assert_eq!(records[1].steps.len(), 1);
    assert!(
        records[1]
            .notes
            .iter()
            .any(|n| n.contains("first scanned as TM16-32261l")),
        "{:?}",
        records[1].notes
    );
    // Enter: the unit sits out, with the reason it always had.
    let (stderr, records) = scan("", "out");
    assert_eq!(
        records[1].verdict.status,
        UnitStatus::Incomplete,
        "{stderr}"
    );
    assert!(
        records[1].verdict.reasons[0]
            .contains("was given serial TM16-32261l, but the unit reports TM16-322611"),
        "{:?}",
        records[1].verdict
    );
    assert_eq!(records[0].verdict.status, UnitStatus::Accepted, "{stderr}");
    std::fs::remove_dir_all(&dir).unwrap();
}
