//! Regression checks after a simulated firmware change, through the archive and the binary.

mod common;
use common::{bin, ctx, temp_dir};
use meterproof::archive::Archive;
use meterproof::bench::sim::{FirmwareChange, SimBench, SimConfig};
use meterproof::exec::{self, Silent};
use meterproof::plan::Plan;
use meterproof::record::UnitRecord;
use meterproof::regression::{Movement, compare};

/// The demo plan, accepting every 2.x firmware (a plan for the firmware team's golden units).
fn plan_for_any_2x() -> Plan {
    let text = std::fs::read_to_string("test-plans/demo.yaml")
        .unwrap()
        .replace(r"'^2\.1\.\d+$'", r"'^2\.\d+\.\d+$'");
    Plan::from_text("demo.yaml", &text).unwrap()
}

fn golden(firmware: FirmwareChange, noise_stream_offset: u64) -> SimConfig {
    SimConfig {
        plant_defect: false,
        serials: Some((1..=8).map(|i| format!("GOLD-{i}")).collect()),
        firmware,
        noise_stream_offset,
        ..SimConfig::new(1, 8)
    }
}

fn run(plan: &Plan, config: &SimConfig, run_id: &str) -> Vec<UnitRecord> {
    let mut c = ctx();
    c.run_id = run_id.into();
    exec::run(
        plan,
        &mut SimBench::new(config).into_bench(),
        &c,
        &mut Silent,
    )
}

fn gain_step() -> FirmwareChange {
    // A new filter that reads 0.3 % high on the range above 10 A.
    FirmwareChange {
        version: Some("2.2.0".into()),
        gain_step_above: Some((10.0, 0.003)),
        extra_noise: 0.0,
        ..FirmwareChange::default()
    }
}

fn more_noise() -> FirmwareChange {
    // A faster sampling rate: twice the noise, no bias.
    FirmwareChange {
        version: Some("2.2.1".into()),
        gain_step_above: None,
        extra_noise: 0.0005,
        ..FirmwareChange::default()
    }
}

#[test]
fn a_gain_step_is_flagged_on_exactly_the_checks_it_touches() {
    let plan = plan_for_any_2x();
    let base = run(&plan, &golden(FirmwareChange::default(), 0), "base");
    let cand = run(&plan, &golden(gain_step(), 1), "cand");
    let result = compare(&base, &cand, 0.2, &[]);
    assert_eq!(result.paired_units.len(), 8);
    let gating: Vec<(String, &str)> = result
        .checks
        .iter()
        .filter(|c| c.movement.gates())
        .map(|c| (c.step.clone(), c.quantity.name()))
        .collect();
    // Only the 16 A step lies above 10 A: its current, power and energy moved by 0.3 %.
    let mut expected = vec![
        ("max-Imax".to_string(), "current"),
        ("max-Imax".to_string(), "active_power"),
        ("max-Imax".to_string(), "active_energy"),
    ];
    let mut got = gating.clone();
    got.sort();
    expected.sort();
    assert_eq!(got, expected);
    for c in result.checks.iter().filter(|c| c.movement.gates()) {
        // A unit near its limit may now fail outright; the others moved beyond the allowance.
        assert!(
            matches!(
                c.movement,
                Movement::MovedBeyondAllowance | Movement::NewlyFailing
            ),
            "{:?}",
            c.movement
        );
        assert!(
            (c.shift - 0.3).abs() < 0.05,
            "{} {}: {}",
            c.step,
            c.quantity.name(),
            c.shift
        );
        assert!(c.test.unwrap().paired);
    }
    assert!(result.gates());
}

#[test]
fn more_noise_within_the_allowance_is_not_flagged() {
    let plan = plan_for_any_2x();
    let base = run(&plan, &golden(FirmwareChange::default(), 0), "base");
    let cand = run(&plan, &golden(more_noise(), 2), "cand");
    let result = compare(&base, &cand, 0.2, &[]);
    assert!(
        !result.gates(),
        "{:?}",
        result
            .checks
            .iter()
            .map(|c| (&c.step, c.quantity, c.movement))
            .collect::<Vec<_>>()
    );
    assert!(
        result
            .checks
            .iter()
            .filter(|c| c.movement == Movement::Unchanged)
            .count()
            >= 10
    );
}

fn archive_run(archive: &Archive, plan: &Plan, records: &[UnitRecord], run_id: &str) {
    archive
        .begin_run(plan, &common::run_row(plan, run_id, None))
        .unwrap();
    archive.import_units(records).unwrap();
    archive
        .finish_run(
            run_id,
            "2026-12-01T00:01:00+00:00",
            meterproof::archive::RunState::Finished,
        )
        .unwrap();
}

#[test]
fn the_release_gate_fails_for_a_real_regression_and_passes_for_none() {
    let dir = temp_dir("compare");
    let path = dir.join("archive.sqlite");
    let text = std::fs::read_to_string("test-plans/demo.yaml")
        .unwrap()
        .replace(r"'^2\.1\.\d+$'", r"'^2\.\d+\.\d+$'");
    // The plan names its golden units, one of which is not on the bench.
    let text = text.replace(
        "decision: { rule: guarded",
        "golden_units: [GOLD-1, GOLD-2, GOLD-9]\ndecision: { rule: guarded",
    );
    let plan = Plan::from_text("demo.yaml", &text).unwrap();
    let archive = Archive::open(&path).unwrap();
    archive_run(
        &archive,
        &plan,
        &run(&plan, &golden(FirmwareChange::default(), 0), "R-base"),
        "R-base",
    );
    archive_run(
        &archive,
        &plan,
        &run(&plan, &golden(gain_step(), 1), "R-step"),
        "R-step",
    );
    archive_run(
        &archive,
        &plan,
        &run(&plan, &golden(more_noise(), 2), "R-noise"),
        "R-noise",
    );
    drop(archive);
    let gate = |candidate: &str, junit: &std::path::Path| {
        bin()
            .args([
                "compare",
                "--baseline",
                "firmware=2.1.4",
                "--candidate",
                candidate,
                "--archive",
            ])
            .arg(&path)
            .arg("--junit")
            .arg(junit)
            .output()
            .unwrap()
    };
    let step_xml = dir.join("step.xml");
    let o = gate("firmware=2.2.0", &step_xml);
    // The HTML report: both error curves per quantity, the limits drawn, the gate stated.
    let html_path = dir.join("compare.html");
    let h = bin()
        .args([
            "compare",
            "--baseline",
            "firmware=2.1.4",
            "--candidate",
            "firmware=2.2.0",
            "--archive",
        ])
        .arg(&path)
        .arg("--html")
        .arg(&html_path)
        .output()
        .unwrap();
    assert_eq!(h.status.code(), Some(1));
    let html = std::fs::read_to_string(&html_path).unwrap();
    // Each side named on the page: plan, runs, firmware, when.
    for side in ["Baseline", "Candidate"] {
        assert!(
            html.contains(&format!(
                "<td class=\"text\">{side}</td><td class=\"text\">TM16-EOL rev A</td>"
            )),
            "{side}: {html}"
        );
    }
    assert!(html.contains("R-base") && html.contains("2.2.0"), "{html}");
    // The plots: the allowance drawn as a band around the baseline, the bars said for what they
    // are, the load points in the plan's order (demo.yaml: low-0.1Ib, basic-Ib, max-Imax).
    assert!(html.contains("allowance around the baseline"), "{html}");
    assert!(html.contains("bars: ±2 SE of the shift (candidate)"));
    let first_plot = &html[html.find("<svg").unwrap()..];
    let first_plot = &first_plot[..first_plot.find("</svg>").unwrap()];
    let at = |label: &str| {
        first_plot
            .find(&format!(">{label}</text>"))
            .unwrap_or_else(|| panic!("{label}: {first_plot}"))
    };
    assert!(at("low-0.1Ib") < at("basic-Ib") && at("basic-Ib") < at("max-Imax"));
    // Into a folder that is not there: said before any work, as a usage error.
    let missing = bin()
        .args([
            "compare",
            "--baseline",
            "firmware=2.1.4",
            "--candidate",
            "firmware=2.2.0",
            "--archive",
        ])
        .arg(&path)
        .arg("--html")
        .arg(dir.join("no-such-folder").join("compare.html"))
        .output()
        .unwrap();
    assert_eq!(missing.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&missing.stderr).contains("--html: the folder"),
        "{}",
        String::from_utf8_lossy(&missing.stderr)
    );
    // The headline names what gates, and how many of how many.
    assert!(
        html.contains("✘ 3 of 13 checks moved beyond the allowance or newly fail: max-Imax"),
        "{html}"
    );
    // Each check says how its sides were compared, with the sample sizes.
    assert!(html.contains("paired, 8 units"));
    assert_eq!(
        html.matches("<svg").count(),
        4,
        "current, voltage, active power, energy"
    );
    assert!(html.contains(">baseline<") && html.contains(">candidate<"));
    let mut reader = quick_xml::Reader::from_str(&html);
    while !matches!(
        reader.read_event().expect("the report parses as XML"),
        quick_xml::events::Event::Eof
    ) {}
    assert_eq!(
        o.status.code(),
        Some(1),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let stdout = String::from_utf8_lossy(&o.stdout);
    // What moved comes first. The table's rows start after its header; a verdict too long to
    // sit beside its numbers continues on an indented line (80 columns).
    let mut rows: Vec<String> = Vec::new();
    for line in stdout
        .lines()
        .skip_while(|l| !l.starts_with("step "))
        .skip(1)
    {
        match rows.last_mut() {
            Some(row) if line.starts_with("      ") => row.push_str(line),
            _ => rows.push(line.to_string()),
        }
    }
    for row in rows.iter().take(3) {
        assert!(
            row.contains("MOVED BEYOND ALLOWANCE") || row.contains("NEWLY FAILING"),
            "moved checks first:\n{stdout}"
        );
    }
    assert!(String::from_utf8_lossy(&o.stderr).contains("golden unit GOLD-9 is missing"));
    let noise_xml = dir.join("noise.xml");
    assert_eq!(gate("firmware=2.2.1", &noise_xml).status.code(), Some(0));
    // A standard XML parser reads the JUnit files: 13 test cases each, 3 failures and none.
    let count = |path: &std::path::Path| {
        let xml = std::fs::read_to_string(path).unwrap();
        let mut reader = quick_xml::Reader::from_str(&xml);
        let (mut cases, mut failures) = (0, 0);
        loop {
            match reader.read_event().unwrap() {
                quick_xml::events::Event::Start(e) | quick_xml::events::Event::Empty(e) => {
                    match e.name().as_ref() {
                        "testcase" => cases += 1,
                        "failure" => failures += 1,
                        _ => {}
                    }
                }
                quick_xml::events::Event::Eof => break,
                _ => {}
            }
        }
        (cases, failures)
    };
    assert_eq!(count(&step_xml), (13, 3));
    assert_eq!(count(&noise_xml), (13, 0));
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn bad_selectors_and_allowances_are_refused() {
    let dir = temp_dir("compare-args");
    let path = dir.join("archive.sqlite");
    let plan = plan_for_any_2x();
    let archive = Archive::open(&path).unwrap();
    archive_run(
        &archive,
        &plan,
        &run(&plan, &golden(FirmwareChange::default(), 0), "R-base"),
        "R-base",
    );
    drop(archive);
    let compare = |args: &[&str]| {
        let o = bin()
            .arg("compare")
            .args(args)
            .arg("--archive")
            .arg(&path)
            .output()
            .unwrap();
        (
            o.status.code(),
            String::from_utf8_lossy(&o.stderr).into_owned(),
        )
    };
    let (code, err) = compare(&["--baseline", "firmware", "--candidate", "run=R-base"]);
    assert_eq!(code, Some(2));
    assert!(
        err.contains("select as run=ID, lot=L or firmware=VERSION"),
        "{err}"
    );
    let (code, err) = compare(&["--baseline", "colour=red", "--candidate", "run=R-base"]);
    assert_eq!(code, Some(2));
    assert!(err.contains("cannot select by \"colour\""), "{err}");
    let (code, err) = compare(&["--baseline", "firmware=9.9", "--candidate", "run=R-base"]);
    assert_eq!(code, Some(2));
    assert!(
        err.contains("the baseline selects no unit records"),
        "{err}"
    );
    let (code, err) = compare(&[
        "--baseline",
        "run=R-base",
        "--candidate",
        "run=R-base",
        "--allowance",
        "20 V",
    ]);
    assert_eq!(code, Some(2));
    assert!(err.contains("--allowance: expected a percentage"), "{err}");
    // Other archive and simulator flags.
    let o = bin()
        .args(["runs", "--since", "yesterday", "--archive"])
        .arg(&path)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("--since yesterday: expected a date"));
    let o = bin()
        .args([
            "sim-meter",
            "--positions",
            "2",
            "--fault",
            "3:echo",
            "--for",
            "1 s",
        ])
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("there are only 2 positions"));
    let o = bin()
        .args(["history", "X", "--archive"])
        .arg(dir.join("none.sqlite"))
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("no archive at"));
    std::fs::remove_dir_all(&dir).unwrap();
}

fn by_check<'a>(
    c: &'a meterproof::regression::Comparison,
    step: &str,
    quantity: &str,
) -> &'a meterproof::regression::CheckComparison {
    c.checks
        .iter()
        .find(|x| x.step == step && x.quantity.name() == quantity)
        .unwrap()
}

/// Each of the comparison's verdicts, from a firmware change made to produce it (the meters are
/// the same simulated ones; only the firmware differs). The significance and equivalence tests
/// themselves are checked against NIST's reference datasets in metrology::compare.
#[test]
fn every_movement_verdict_is_reached() {
    let plan = plan_for_any_2x();
    let base = run(&plan, &golden(FirmwareChange::default(), 0), "R-base");
    let step_of = |size: f64, version: &str| FirmwareChange {
        version: Some(version.into()),
        gain_step_above: Some((10.0, size)),
        extra_noise: 0.0,
        ..FirmwareChange::default()
    };
    // A 0.05 % step above 10 A on the same eight units, allowed 50 % of the 0.5 % limit:
    // a significant shift, shown within ±0.25 %: "moved, within allowance".
    let small = run(&plan, &golden(step_of(0.0005, "2.2.2"), 1), "R-small");
    let c = compare(&base, &small, 0.5, &[]);
    let imax = by_check(&c, "max-Imax", "current");
    assert!(imax.test.as_ref().unwrap().paired);
    assert_eq!(imax.movement, Movement::MovedWithinAllowance, "{imax:?}");
    assert_eq!(imax.movement.words(), "moved, within allowance");
    assert!(!c.gates());
    // A baseline whose units fail at Imax (a 0.8 % step), a candidate without it: "newly
    // passing", which does not stop a release.
    let bad = run(&plan, &golden(step_of(0.008, "2.2.3"), 2), "R-bad");
    let c = compare(&bad, &base, 0.2, &[]);
    let imax = by_check(&c, "max-Imax", "current");
    assert_eq!(imax.movement, Movement::NewlyPassing, "{imax:?}");
    assert_eq!(imax.newly_passing.len(), 8);
    assert_eq!(imax.movement.words(), "newly passing");
    assert!(!imax.movement.gates());
}

/// Units not tested on both sides (a lot against another lot) are compared with Welch's test
/// (unpaired); too few units and too tight an allowance leave a check "not shown within
/// allowance" rather than "unchanged".
#[test]
fn unpaired_units_take_welch_s_test() {
    let plan = plan_for_any_2x();
    let lot = |first: usize, n: usize, seed: u64| SimConfig {
        plant_defect: false,
        serials: Some((first..first + n).map(|i| format!("UNIT-{i}")).collect()),
        ..SimConfig::new(seed, n)
    };
    let a = run(&plan, &lot(1, 3, 11), "R-a");
    let b = run(&plan, &lot(101, 3, 12), "R-b");
    let c = compare(&a, &b, 0.01, &[]);
    assert!(c.paired_units.is_empty());
    assert!(!c.checks.is_empty());
    for check in &c.checks {
        if let Some(t) = &check.test {
            assert!(!t.paired, "{check:?}");
        }
    }
    let ib = by_check(&c, "basic-Ib", "current");
    assert_eq!(ib.movement, Movement::NotShownWithinAllowance, "{ib:?}");
    assert_eq!(
        ib.movement.words(),
        "no significant shift, not shown within allowance"
    );
}

/// `compare` through the binary: lots selected by `lot=`, records narrowed by `--plan`, and the
/// comparison as JSON.
#[test]
fn compare_selects_lots_and_plans_and_speaks_json() {
    let dir = temp_dir("compare-lots");
    let archive = dir.join("archive.sqlite");
    for (lot, seed) in [("L-1", "1"), ("L-2", "2")] {
        let o = bin()
            .args([
                "run",
                "test-plans/demo.yaml",
                "--quiet",
                "--lot",
                lot,
                "--seed",
                seed,
            ])
            .arg("--out")
            .arg(dir.join("out"))
            .arg("--archive")
            .arg(&archive)
            .output()
            .unwrap();
        assert_eq!(o.status.code(), Some(1));
    }
    let compare = |plan: &str| {
        bin()
            .args([
                "compare",
                "--baseline",
                "lot=L-1",
                "--candidate",
                "lot=L-2",
                "--plan",
                plan,
                "--json",
                "--archive",
            ])
            .arg(&archive)
            .output()
            .unwrap()
    };
    let o = compare("TM16-EOL");
    let json: serde_json::Value = serde_json::from_slice(&o.stdout)
        .unwrap_or_else(|e| panic!("{e}: {}", String::from_utf8_lossy(&o.stderr)));
    let checks = json["checks"].as_array().unwrap();
    assert_eq!(checks.len(), 13, "every evaluated check of the demo plan");
    for c in checks {
        assert_eq!(c["baseline_units"], 4);
        assert_eq!(c["candidate_units"], 4);
    }
    // Another plan's records: none selected, and it says which side.
    let o = compare("NO-SUCH-PLAN");
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("the baseline selects no unit records"));
    std::fs::remove_dir_all(&dir).unwrap();
}

/// `run --sim-firmware` changes what the simulated meters measure, not only the version they
/// report: the same four meters tested before and after a firmware whose phase compensation
/// moved by +0.3° and whose current gain moved by +0.2 % at and above 10 A. Expected shifts by
/// hand: at power factor 0.5 (60°), P = U·I·cos φ (IEC 60050-131-11-42, active power of a
/// sinusoidal circuit) moves by cos 60.3° / cos 60° − 1 = −0.908 %; at unity by
/// cos 0.3° − 1 = −0.0014 %; the current at Imax by +0.2 %, below 10 A not at all.
#[test]
fn a_simulated_firmware_change_moves_the_errors_it_should() {
    let dir = temp_dir("sim-firmware");
    let archive = dir.join("a.sqlite");
    let run_with = |extra: &[&str]| {
        let o = bin()
            .args(["run", "test-plans/demo.yaml", "--quiet", "--serials"])
            .arg("G1,G2,G3,G4")
            .arg("--out")
            .arg(dir.join("out"))
            .arg("--archive")
            .arg(&archive)
            .args(extra)
            .output()
            .unwrap();
        assert!(
            matches!(o.status.code(), Some(0 | 1)),
            "{}",
            String::from_utf8_lossy(&o.stderr)
        );
    };
    run_with(&[]);
    run_with(&["--sim-firmware", "2.1.5,phase=+0.3deg,current=+0.2%@10A"]);
    let o = bin()
        .args(["compare", "--baseline", "firmware=2.1.4"])
        .args(["--candidate", "firmware=2.1.5", "--json", "--archive"])
        .arg(&archive)
        .output()
        .unwrap();
    let json: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let shift = |step: &str, quantity: &str| {
        json["checks"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["step"] == step && c["quantity"] == quantity)
            .unwrap_or_else(|| panic!("{step} {quantity}"))["shift"]
            .as_f64()
            .unwrap()
    };
    let at_half = (60.3f64.to_radians().cos() / 60f64.to_radians().cos() - 1.0) * 100.0;
    let at_unity = (0.3f64.to_radians().cos() - 1.0) * 100.0;
    // The meters' noise differs between the runs only through timing: a few thousandths of %.
    assert!((shift("basic-pf0.5", "active_power") - at_half).abs() < 0.01);
    assert!((shift("basic-Ib", "active_power") - at_unity).abs() < 0.01);
    assert!((shift("max-Imax", "current") - 0.2).abs() < 0.01);
    assert!(shift("basic-Ib", "current").abs() < 0.01);
    // The terminal names the units that newly fail, as the JSON lists them.
    let pf = json["checks"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["step"] == "basic-pf0.5" && c["quantity"] == "active_power")
        .unwrap();
    let newly: Vec<&str> = pf["newly_failing"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    assert!(!newly.is_empty(), "{pf}");
    let o = bin()
        .args(["compare", "--baseline", "firmware=2.1.4"])
        .args(["--candidate", "firmware=2.1.5", "--archive"])
        .arg(&archive)
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&o.stdout);
    let joined = text.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(
        joined.contains(&format!(
            "basic-pf0.5 active_power L newly failing: {}",
            newly.join(", ")
        )),
        "{text}"
    );
    assert!(joined.contains("(paired, 4 units)"), "{text}");
    // A description the simulator cannot read is refused before anything runs.
    let bad = bin()
        .args(["run", "test-plans/demo.yaml", "--quiet", "--sim-firmware"])
        .arg("2.2,gain=1%")
        .arg("--out")
        .arg(dir.join("bad"))
        .output()
        .unwrap();
    assert_eq!(bad.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&bad.stderr).contains("no key \"gain\""));
    let bad = bin()
        .args(["sim-meter", "--firmware", "2.2,phase=9rad", "--for", "1 s"])
        .output()
        .unwrap();
    assert_eq!(bad.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&bad.stderr).contains("not an angle"));
    std::fs::remove_dir_all(&dir).unwrap();
}
