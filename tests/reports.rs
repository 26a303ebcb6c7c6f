//! Reports through the binary: the error plot, templates overridden and exported, template
//! errors, JUnit output, and byte-for-byte reproducible rendering.

mod common;
use common::{bin, records_in, temp_dir};
use std::path::Path;

fn count_xml(xml: &str, names: &[&str]) -> Vec<usize> {
    let mut reader = quick_xml::Reader::from_str(xml);
    let mut counts = vec![0; names.len()];
    loop {
        match reader.read_event().expect("well-formed XML") {
            quick_xml::events::Event::Start(e) | quick_xml::events::Event::Empty(e) => {
                let name = e.name().as_ref().to_string();
                if let Some(i) = names.iter().position(|n| *n == name) {
                    counts[i] += 1;
                }
            }
            quick_xml::events::Event::Eof => break,
            _ => {}
        }
    }
    counts
}

#[test]
fn the_unit_report_has_a_well_formed_plot_and_the_run_a_junit_file() {
    let dir = temp_dir("reports");
    let junit = dir.join("run.xml");
    let o = bin()
        .args(["run", "test-plans/demo.yaml", "--quiet", "--out"])
        .arg(dir.join("out"))
        .arg("--junit")
        .arg(&junit)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(1));
    let records = records_in(&dir.join("out"));
    let run_dir = std::fs::read_dir(dir.join("out"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.is_dir())
        .unwrap();
    // (Figures keep their units with no-break spaces.)
    let html = std::fs::read_to_string(run_dir.join(format!("{}-p2.html", records[1].serial)))
        .unwrap()
        .replace('\u{a0}', " ");
    // One minus sign: no figure in a cell starts with a hyphen-minus.
    assert!(
        !regex::Regex::new(r">-[0-9]").unwrap().is_match(&html),
        "a hyphen-minus before a figure"
    );
    assert!(
        html.contains("\u{2212}"),
        "negative figures are there to check"
    );
    // Each check shows its own coverage factor and its specific risk.
    assert!(html.contains("<th>U (coverage factor k)</th>"), "{html}");
    assert!(html.contains("(k = 2."), "a k for every U");
    assert!(html.contains("<th>Risk beyond the tolerance</th>"));
    // The record's hash and the run's anchor tie the paper to `verify`.
    assert!(html.contains(&meterproof::record::record_hash(&records[1])));
    assert!(html.contains("meterproof verify --anchor"));
    // One plot per quantity with percentage errors, each parsing as XML with its envelopes.
    let mut rest = html.as_str();
    let mut panels = 0;
    while let Some(start) = rest.find("<svg") {
        let end = rest[start..].find("</svg>").unwrap() + start + "</svg>".len();
        let counts = count_xml(&rest[start..end], &["svg", "path", "line"]);
        assert_eq!(counts[0], 1);
        assert!(counts[1] >= 4, "two tolerance and two acceptance envelopes");
        panels += 1;
        rest = &rest[end..];
    }
    assert_eq!(panels, 4, "current, active power, voltage, energy");
    // The planted defect's failing point is ringed and labelled, not only coloured.
    assert!(html.contains(">FAIL</text>"));
    // On paper as in the record: each tolerance as the plan wrote it beside its value at the
    // point, each class limit's source, where each reference came from, the TUR notes.
    assert!(html.contains("±(1 % + 5 mA): ± 2.000 %"), "{html}");
    assert!(
        html.contains("class limit ±1 % from IEC 62053-21:2003 class 1"),
        "{html}"
    );
    assert!(html.contains("read from the instrument"));
    assert!(html.contains("test uncertainty ratio"), "{html}");
    // A bound is shown as the largest magnitude read, never as a signed "error"; a negative
    // rms mean (a unit below its zero offset) is shown as reported and said so.
    assert!(html.contains("largest |reading| "), "{html}");
    let no_load_current = records[1].steps[0]
        .checks
        .iter()
        .find(|c| c.quantity.name() == "current")
        .unwrap();
    // Seed 1's position 2 reads a little below zero at no load (its simulated offset).
    assert!(no_load_current.measured.unwrap() < 0.0);
    assert!(
        html.contains("the unit reported a negative rms value"),
        "{html}"
    );
    let mut typed = records[1].clone();
    for step in &mut typed.steps {
        for r in &mut step.references {
            r.reading.source = "operator".into();
        }
    }
    let templates = meterproof::report::Templates::load(None).unwrap();
    let typed_html = templates.unit_html(&typed, None).unwrap();
    assert!(typed_html.contains("typed by the operator"));
    assert!(!typed_html.contains("read from the instrument"));
    // Each panel draws its quantity against its own limits, from the record: at basic-Ib the
    // current's envelope is its ±0.5 %, the active power's its ±1 % (class 1), never the
    // tighter of the two for both.
    for (quantity, chart) in meterproof::report::plot::error_charts(&records[1]) {
        for (label, limit) in chart.labels.iter().zip(&chart.limits) {
            let step = records[1].steps.iter().find(|s| &s.id == label).unwrap();
            let own = step
                .checks
                .iter()
                .filter(|c| c.quantity.name() == quantity)
                .filter_map(|c| c.decision.as_ref().map(|d| d.tolerance_limit))
                .fold(f64::INFINITY, f64::min);
            assert_eq!(limit.unwrap().0, own, "{quantity} at {label}");
        }
        // Only the steps where the quantity was evaluated: no empty load points.
        assert!(chart.labels.iter().all(|l| l != "no-load"), "{quantity}");
    }
    assert!(
        html.contains("Tested by") && html.contains("Reviewed by"),
        "an approval block"
    );
    assert!(html.contains("@media print"));
    // No external assets or scripts: the file opens offline.
    assert!(!html.contains("<script") && !html.contains("<link") && !html.contains("src="));
    // JUnit: a suite per unit, a case per check, a failure per failed check.
    let xml = std::fs::read_to_string(&junit).unwrap();
    let counts = count_xml(&xml, &["testsuite", "testcase", "failure"]);
    let checks: usize = records
        .iter()
        .map(|r| r.steps.iter().map(|s| s.checks.len()).sum::<usize>())
        .sum();
    let failed: usize = records.iter().map(|r| r.failed_checks().count()).sum();
    assert_eq!(counts, vec![records.len(), checks, failed]);
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn templates_are_exported_overridden_and_their_errors_named() {
    let dir = temp_dir("templates");
    let export = dir.join("t");
    let o = bin()
        .args(["templates", "--export"])
        .arg(&export)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(0));
    let exported = std::fs::read_to_string(export.join("unit-report.html")).unwrap();
    assert_eq!(exported, meterproof::report::DEFAULT_TEMPLATES[0].1);
    // An edited template is used.
    std::fs::write(
        export.join("unit-report.html"),
        exported.replace("<h1>Acceptance record:", "<h1>Hall B acceptance record:"),
    )
    .unwrap();
    let run = |templates: &std::path::Path, out: &str| {
        bin()
            .args(["run", "test-plans/demo.yaml", "--quiet", "--templates"])
            .arg(templates)
            .arg("--out")
            .arg(dir.join(out))
            .output()
            .unwrap()
    };
    assert_eq!(run(&export, "a").status.code(), Some(1));
    let run_dir = std::fs::read_dir(dir.join("a"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.is_dir())
        .unwrap();
    let any_html = std::fs::read_dir(&run_dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.extension().is_some_and(|x| x == "html"))
        .unwrap();
    assert!(
        std::fs::read_to_string(any_html)
            .unwrap()
            .contains("Hall B acceptance record:")
    );
    // A misspelt variable is an error that names the template and its line.
    let broken = dir.join("broken");
    std::fs::create_dir_all(&broken).unwrap();
    std::fs::write(
        broken.join("unit-report.html"),
        "<p>\n{{ record.serail }}</p>\n",
    )
    .unwrap();
    let o = run(&broken, "b");
    assert_ne!(o.status.code(), Some(0));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("template unit-report.html") && err.contains("line 2"),
        "{err}"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The CSV a run wrote is the CSV rendered from its record in another process: nothing in it
/// depends on the process (no hash-map order, no clock). (The HTML is checked the same way,
/// against `report` from the archive, in the test above.)
#[test]
fn the_csv_written_by_a_run_is_rendered_again_from_its_record() {
    let dir = temp_dir("bytes");
    bin()
        .args([
            "run",
            "test-plans/demo.yaml",
            "--quiet",
            "--lot",
            "LOT-CSV",
            "--out",
        ])
        .arg(&dir)
        .output()
        .unwrap();
    let records = records_in(&dir);
    assert_eq!(records.len(), 4);
    let run_dir = dir.join(&records[0].run_id);
    for r in &records {
        let written =
            std::fs::read(run_dir.join(format!("{}-p{}.csv", r.serial, r.position))).unwrap();
        assert_eq!(meterproof::report::unit_csv(r).unwrap(), written);
        // Every row carries where it came from: run, plan and its hash, lot, firmware, station.
        let mut reader = csv::Reader::from_reader(written.as_slice());
        let headers = reader.headers().unwrap().clone();
        let col = |name: &str| headers.iter().position(|h| h == name).unwrap();
        let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
        assert_eq!(rows.len(), 13);
        for row in &rows {
            assert_eq!(&row[col("run_id")], r.run_id);
            assert_eq!(&row[col("position")], r.position.to_string());
            assert_eq!(&row[col("plan_id")], r.plan.id);
            assert_eq!(&row[col("plan_sha256")], r.plan.sha256);
            assert_eq!(&row[col("lot")], "LOT-CSV");
            assert_eq!(&row[col("firmware")], r.identity.as_ref().unwrap().firmware);
            assert_eq!(&row[col("station")], r.station.id);
            assert_eq!(&row[col("tested_at")], r.started_at);
        }
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

/// `summary --lot LOT --json` over the runs in `dir` (and their archive), written there.
fn lot_summary_json(
    dir: &std::path::Path,
    lot: &str,
    extra: &[&std::ffi::OsStr],
) -> serde_json::Value {
    let o = bin()
        .args(["summary", "--lot", lot, "--json", "--out"])
        .arg(dir)
        .arg("--archive")
        .arg(dir.join("archive.sqlite"))
        .args(extra)
        .output()
        .unwrap();
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    serde_json::from_slice(&o.stdout).unwrap()
}

#[test]
fn the_lot_summary_counts_the_yield_and_the_rejections() {
    let dir = temp_dir("summary");
    for seed in ["1", "2"] {
        let o = bin()
            .args([
                "run",
                "test-plans/demo.yaml",
                "--quiet",
                "--lot",
                "LOT-S",
                "--positions",
                "5",
                "--seed",
                seed,
                "--out",
            ])
            .arg(&dir)
            .output()
            .unwrap();
        assert_eq!(o.status.code(), Some(1));
    }
    let junit = dir.join("lot.xml");
    let s = lot_summary_json(&dir, "LOT-S", &["--junit".as_ref(), junit.as_os_str()]);
    let records = records_in(&dir);
    let accepted = records
        .iter()
        .filter(|r| r.verdict.status == meterproof::record::UnitStatus::Accepted)
        .count();
    assert_eq!(s["units"], 10);
    assert_eq!(s["accepted"].as_u64().unwrap() as usize, accepted);
    assert!((s["yield_percent"].as_f64().unwrap() - accepted as f64 * 10.0).abs() < 1e-9);
    // The planted phase defect (one per run) is the most frequent rejection.
    assert_eq!(s["rejections"][0][0], "basic-pf0.5 active_power L");
    assert!(s["rejections"][0][1].as_u64().unwrap() >= 2);
    let html = std::fs::read_to_string(dir.join("summary-lot-LOT-S.html")).unwrap();
    assert_eq!(html.matches("<svg").count(), 13, "a histogram per check");
    // Every unit links to its report, which exists.
    for r in &records {
        let link = format!("{}/{}-p{}.html", r.run_id, r.serial, r.position);
        // The template escapes "/" in attributes; a browser reads it back as "/".
        assert!(html.contains(&link.replace('/', "&#x2f;")), "{link}");
        assert!(dir.join(&link).exists());
    }
    let csv = std::fs::read_to_string(dir.join("summary-lot-LOT-S.csv")).unwrap();
    assert_eq!(csv.lines().count(), 14);
    // Cpk of the lot's current errors at Ib against ±0.5 %, recomputed from the records:
    // Cpk = min(USL − μ, μ − LSL) / 3s (NIST/SEMATECH e-Handbook 6.1.6, from memory).
    let errors: Vec<f64> = records
        .iter()
        .flat_map(|r| &r.steps)
        .filter(|st| st.id == "basic-Ib")
        .flat_map(|st| &st.checks)
        .filter(|c| c.quantity.name() == "current")
        .map(|c| c.evaluation.as_ref().unwrap().error)
        .collect();
    assert_eq!(errors.len(), 10);
    let n = errors.len() as f64;
    let mean = errors.iter().sum::<f64>() / n;
    let sd = (errors.iter().map(|e| (e - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    let cpk = (0.5 - mean).min(mean + 0.5) / (3.0 * sd);
    let row = s["checks"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["step"] == "basic-Ib" && c["quantity"] == "current")
        .unwrap();
    assert!(
        (row["cpk"].as_f64().unwrap() - cpk).abs() < 1e-9 * cpk.abs(),
        "{row}"
    );
    // --junit: one test case per unit and check, a failure for each failed check.
    let xml = std::fs::read_to_string(&junit).unwrap();
    well_formed(&xml).unwrap();
    let failed: usize = records.iter().map(|r| r.failed_checks().count()).sum();
    assert!(failed >= 2);
    assert_eq!(xml.matches("<failure").count(), failed, "{xml}");
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Parses a whole document as XML: every element closed, every attribute quoted.
fn well_formed(doc: &str) -> Result<(), String> {
    let mut reader = quick_xml::Reader::from_str(doc);
    reader.config_mut().check_end_names = true;
    let mut depth: i64 = 0;
    loop {
        match reader.read_event().map_err(|e| e.to_string())? {
            quick_xml::events::Event::Start(_) => depth += 1,
            quick_xml::events::Event::End(_) => depth -= 1,
            quick_xml::events::Event::Eof => break,
            _ => {}
        }
    }
    if depth == 0 {
        Ok(())
    } else {
        Err(format!("{depth} elements left open"))
    }
}

#[test]
fn reports_are_well_formed_and_can_be_rendered_again_from_the_archive() {
    let dir = temp_dir("rerender");
    let o = bin()
        .args([
            "run",
            "test-plans/calibrate.yaml",
            "--quiet",
            "--json",
            "--lot",
            "L1",
            "--out",
        ])
        .arg(&dir)
        .output()
        .unwrap();
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let printed: Vec<meterproof::record::UnitRecord> = serde_json::from_slice(&o.stdout).unwrap();
    let written = records_in(&dir);
    assert_eq!(printed, written, "--json prints the records as written");
    // Every unit report and the lot summary parse as XML documents.
    let run_dir = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.is_dir())
        .unwrap();
    for f in std::fs::read_dir(&run_dir)
        .unwrap()
        .map(|e| e.unwrap().path())
    {
        if f.extension().is_some_and(|x| x == "html") {
            let html = std::fs::read_to_string(&f).unwrap();
            well_formed(&html).unwrap_or_else(|e| panic!("{}: {e}", f.display()));
        }
    }
    let archive = dir.join("archive.sqlite");
    let o = bin()
        .args(["summary", "--lot", "L1", "--out"])
        .arg(&dir)
        .arg("--archive")
        .arg(&archive)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(0));
    well_formed(&std::fs::read_to_string(dir.join("summary-lot-L1.html")).unwrap()).unwrap();
    // Rendered again from the archive, a report is the same bytes as the first time.
    let again = dir.join("again");
    let o = bin()
        .args(["report", &written[0].run_id, "--out"])
        .arg(&again)
        .arg("--archive")
        .arg(&archive)
        .output()
        .unwrap();
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let name = format!("{}-p1.html", written[0].serial);
    assert_eq!(
        std::fs::read(run_dir.join(&name)).unwrap(),
        std::fs::read(again.join(&name)).unwrap()
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The records of four simulated units (no planted defect) for each seed, through `plan`.
fn lot_of(plan: &str, seeds: std::ops::RangeInclusive<u64>) -> Vec<meterproof::record::UnitRecord> {
    let plan = meterproof::plan::Plan::load(&Path::new("test-plans").join(plan)).unwrap();
    let mut records = Vec::new();
    for seed in seeds {
        let mut config = meterproof::bench::sim::SimConfig::new(seed, 4);
        config.plant_defect = false;
        let mut bench = meterproof::bench::sim::SimBench::new(&config).into_bench();
        records.extend(meterproof::exec::run(
            &plan,
            &mut bench,
            &common::ctx(),
            &mut meterproof::exec::Silent,
        ));
    }
    records
}

/// Capability by the side a limit bounds: a lower bound (the starting test's register advance)
/// gives CPL = (mean − bound) / 3s, positive when the lot lies above it; a limit with an
/// absolute term varies by unit and is handled as a share of each unit's own limit. Checked
/// against the handbook formulas on the lot's own figures (NIST/SEMATECH e-Handbook 6.1.6, from
/// memory).
#[test]
fn lot_capability_follows_the_side_of_each_limit() {
    use meterproof::report::summary::LotSummary;
    let records = lot_of("type-tests.yaml", 1..=3);
    let s = LotSummary::of("lot", &records, &|_| String::new());
    let lower = s
        .checks
        .iter()
        .find(|c| c.sides == "lower")
        .expect("the starting test's lower bound");
    let advances: Vec<f64> = records
        .iter()
        .flat_map(|r| &r.steps)
        .filter(|st| st.id == lower.step)
        .flat_map(|st| &st.checks)
        .filter_map(|c| c.evaluation.as_ref().map(|e| e.error))
        .collect();
    let n = advances.len() as f64;
    let mean = advances.iter().sum::<f64>() / n;
    let sd = (advances.iter().map(|a| (a - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    assert!(
        mean > lower.tolerance_limit,
        "the lot registers above the bound"
    );
    let expected = (mean - lower.tolerance_limit) / (3.0 * sd);
    assert!(lower.cpk.unwrap() > 0.0);
    assert!((lower.cpk.unwrap() - expected).abs() < 1e-9 * expected.abs());
    assert_eq!(lower.cp, None, "no Cp for a one-sided limit");
}

#[test]
fn a_limit_that_varies_by_unit_is_said_and_handled() {
    use meterproof::report::summary::LotSummary;
    // Three runs: each has its own reference readings, so the limits differ between them.
    let records = lot_of("demo.yaml", 4..=6);
    let s = LotSummary::of("lot", &records, &|_| String::new());
    // low-0.1Ib current: ±(1 % + 5 mA), the absolute term a different share at each reading.
    let varying = s
        .checks
        .iter()
        .find(|c| c.step == "low-0.1Ib" && c.quantity == "current")
        .unwrap();
    assert!(varying.limit_varies);
    let shares: Vec<f64> = records
        .iter()
        .flat_map(|r| &r.steps)
        .filter(|st| st.id == "low-0.1Ib")
        .flat_map(|st| &st.checks)
        .filter(|c| c.quantity.name() == "current")
        .filter_map(|c| c.evaluation.as_ref().map(|e| e.error / e.limit))
        .collect();
    let n = shares.len() as f64;
    let mean = shares.iter().sum::<f64>() / n;
    let sd = (shares.iter().map(|a| (a - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    // Cp = (USL − LSL) / 6σ and Cpk = min(USL − μ, μ − LSL) / 3σ against ±1 (NIST/SEMATECH
    // e-Handbook 6.1.6, from memory).
    assert!((varying.cp.unwrap() - 2.0 / (6.0 * sd)).abs() < 1e-9);
    assert!((varying.cpk.unwrap() - (1.0 - mean.abs()) / (3.0 * sd)).abs() < 1e-9);
}

/// The lot's global risks (JCGM 106:2012, 9.5) are those of a normal process with the lot's
/// mean and its own spread σ₀ = √(s² − u²), measured with the units' RMS standard uncertainty,
/// against the tolerance and the units' mean acceptance limit: recomputed here from the records
/// (the integral itself is checked against Deaver's published figures in metrology::risk).
#[test]
fn the_lot_summary_gives_the_rule_s_global_risks() {
    use meterproof::metrology::risk::{Interval, global_risk};
    use meterproof::report::summary::LotSummary;
    let records = lot_of("demo.yaml", 7..=12);
    let s = LotSummary::of("lot", &records, &|_| String::new());
    let c = s
        .checks
        .iter()
        .find(|c| c.step == "basic-Ib" && c.quantity == "active_power")
        .unwrap();
    assert!(!c.limit_varies);
    let checks: Vec<_> = records
        .iter()
        .flat_map(|r| &r.steps)
        .filter(|st| st.id == "basic-Ib")
        .flat_map(|st| &st.checks)
        .filter(|k| k.quantity.name() == "active_power")
        .collect();
    let errors: Vec<f64> = checks
        .iter()
        .map(|k| k.evaluation.as_ref().unwrap().error)
        .collect();
    let n = errors.len() as f64;
    let mean = errors.iter().sum::<f64>() / n;
    let sd = (errors.iter().map(|a| (a - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    let u = (checks
        .iter()
        .map(|k| k.uncertainty.as_ref().unwrap().combined.powi(2))
        .sum::<f64>()
        / n)
        .sqrt();
    let al = checks
        .iter()
        .map(|k| k.decision.as_ref().unwrap().acceptance_limit)
        .sum::<f64>()
        / n;
    let sigma = (sd * sd - u * u).max(0.0).sqrt();
    assert!((c.process_sd.unwrap() - sigma).abs() < 1e-12);
    let expected = global_risk(
        mean,
        sigma,
        u,
        Interval::symmetric(c.tolerance_limit),
        Interval::symmetric(al),
    )
    .unwrap();
    let got = c.global_risk.unwrap();
    let close = |a: f64, b: f64| (a - b).abs() <= 1e-9 * b.abs().max(1e-300);
    assert!(
        close(got.consumer, expected.consumer),
        "{got:?} {expected:?}"
    );
    assert!(
        close(got.producer, expected.producer),
        "{got:?} {expected:?}"
    );
    assert!(got.consumer < 0.01 && got.producer < 0.5, "{got:?}");
    // And in the spreadsheet.
    let csv = String::from_utf8(s.csv().unwrap()).unwrap();
    assert!(
        csv.lines()
            .next()
            .unwrap()
            .ends_with("global_consumer_risk,global_producer_risk")
    );
}

/// A unit tested again counts once in the lot summary, by its last test: a lot of four units
/// and a second run retesting one of them with a new unit beside it is five units in six tests,
/// with the final and first-pass yields recomputed here from the records (yield as the share
/// of units accepted: common practice, no published source).
#[test]
fn retests_are_not_new_units() {
    let dir = temp_dir("summary-retests");
    let run = |extra: &[&str]| {
        let o = bin()
            .args([
                "run",
                "test-plans/demo.yaml",
                "--quiet",
                "--lot",
                "LOT-R",
                "--out",
            ])
            .arg(&dir)
            .args(extra)
            .output()
            .unwrap();
        assert!(matches!(o.status.code(), Some(0 | 1)));
    };
    run(&["--positions", "4", "--seed", "1"]);
    let first = records_in(&dir);
    let rejected = first
        .iter()
        .find(|r| r.verdict.status == meterproof::record::UnitStatus::Rejected)
        .expect("the planted defect rejects one unit")
        .serial
        .clone();
    run(&["--seed", "2", "--serials", &format!("NEW-1,{rejected}")]);
    let records = records_in(&dir);
    assert_eq!(records.len(), 6);
    let s = lot_summary_json(&dir, "LOT-R", &[]);
    assert_eq!(s["units"], 5);
    assert_eq!(s["tests"], 6);
    assert_eq!(s["retests"], 1);
    assert_eq!(s["units_retested"], 1);
    // Recomputed: each serial's first and last test by start time.
    let mut by_serial: std::collections::BTreeMap<&str, Vec<&meterproof::record::UnitRecord>> =
        Default::default();
    for r in &records {
        by_serial.entry(&r.serial).or_default().push(r);
    }
    let accepted = |r: &&meterproof::record::UnitRecord| {
        r.verdict.status == meterproof::record::UnitStatus::Accepted
    };
    let (mut last_ok, mut first_ok) = (0, 0);
    for tests in by_serial.values_mut() {
        tests.sort_by_key(|r| r.started_at.clone());
        last_ok += accepted(tests.last().unwrap()) as usize;
        first_ok += accepted(&tests[0]) as usize;
    }
    assert_eq!(s["accepted"].as_u64().unwrap() as usize, last_ok);
    // A rejection is marginal when every failing check is within U of its limit.
    let marginal = by_serial
        .values()
        .map(|t| *t.last().unwrap())
        .filter(|r| r.verdict.status == meterproof::record::UnitStatus::Rejected)
        .filter(|r| {
            r.steps
                .iter()
                .flat_map(|st| &st.checks)
                .filter(|c| c.verdict == meterproof::record::CheckVerdict::Fail)
                .all(|c| c.marginal())
        })
        .count();
    assert_eq!(s["rejected_marginal"].as_u64().unwrap() as usize, marginal);
    assert!((s["yield_percent"].as_f64().unwrap() - last_ok as f64 * 20.0).abs() < 1e-9);
    assert!(
        (s["first_pass_yield_percent"].as_f64().unwrap() - first_ok as f64 * 20.0).abs() < 1e-9
    );
    // Every check's statistics are of five units, not six.
    for c in s["checks"].as_array().unwrap() {
        assert!(c["units"].as_u64().unwrap() <= 5, "{c}");
    }
    // The unit list: one line per unit, rejected first; the earlier test listed apart.
    let lines = s["unit_lines"].as_array().unwrap();
    assert_eq!(lines.len(), 5);
    let ranks: Vec<u8> = lines
        .iter()
        .map(|l| match l["status"].as_str().unwrap() {
            "rejected" => 0,
            "incomplete" => 1,
            _ => 2,
        })
        .collect();
    assert!(ranks.windows(2).all(|w| w[0] <= w[1]), "{ranks:?}");
    let earlier = s["earlier_tests"].as_array().unwrap();
    assert_eq!(earlier.len(), 1);
    assert_eq!(earlier[0]["serial"], rejected.as_str());
    // The context: one plan, two runs with their own counts, firmware of five units, yield
    // by position of the units' last tests; the checks in the plan's order.
    let ctx = &s["context"];
    assert_eq!(ctx["plans"].as_array().unwrap().len(), 1);
    assert!(
        ctx["plans"][0]
            .as_str()
            .unwrap()
            .starts_with("TM16-EOL revision A (")
    );
    let runs = ctx["runs"].as_array().unwrap();
    assert_eq!(runs.len(), 2);
    for run in runs {
        let id = run[0].as_str().unwrap();
        let tested: Vec<_> = records.iter().filter(|r| r.run_id == id).collect();
        assert_eq!(run[1].as_u64().unwrap() as usize, tested.len());
        assert_eq!(
            run[2].as_u64().unwrap() as usize,
            tested.iter().filter(|r| accepted(r)).count()
        );
    }
    assert_eq!(runs[0][1], 4, "the first run first");
    let firmware: u64 = ctx["firmware"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f[1].as_u64().unwrap())
        .sum();
    assert_eq!(firmware, 5);
    let by_position: u64 = ctx["positions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p[1].as_u64().unwrap())
        .sum();
    assert_eq!(by_position, 5);
    assert_eq!(s["checks"][0]["step"], "no-load", "plan order");
    // Histograms: a one-sided check draws its one limit, a two-sided one both, each labelled
    // with its value; every bar carries its count, and the counts add up to the units.
    assert_eq!(s["checks"][0]["sides"], "upper");
    let html = std::fs::read_to_string(dir.join("summary-lot-LOT-R.html")).unwrap();
    let histogram_of = |row: &str| {
        let at = html.find(row).unwrap_or_else(|| panic!("{row}"));
        let start = at + html[at..].find("<svg").unwrap();
        let end = start + html[start..].find("</svg>").unwrap();
        html[start..end].to_string()
    };
    let dashed = |h: &str| h.matches("stroke-dasharray=\"6 3\"").count();
    let no_load = histogram_of("no-load<br/><span class=\"muted\">active_power L");
    assert_eq!(dashed(&no_load), 1, "{no_load}");
    assert!(no_load.contains(">+0.500 W</text>"), "{no_load}");
    let two_sided = histogram_of("basic-Ib<br/><span class=\"muted\">current L");
    assert_eq!(dashed(&two_sided), 2);
    assert!(
        two_sided.contains(">\u{2212}0.500 %</text>") && two_sided.contains(">+0.500 %</text>")
    );
    // The bars' counts: the numbers drawn above the bars (the "0" below the axis is the
    // origin's label).
    let bar_counts: usize = two_sided
        .split("<rect ")
        .skip(1)
        .filter_map(|bar| {
            let text = bar.split("text-anchor=\"middle\">").nth(1)?;
            text.split('<').next()?.parse::<usize>().ok()
        })
        .sum();
    assert_eq!(bar_counts, 5, "{two_sided}");
    assert_eq!(s["checks"][12]["step"], "basic-pf0.5", "plan order");
    assert!(html.contains("1 retest of 1 unit"), "{html}");
    assert!(html.contains("Yield by position and by run"), "{html}");
    assert!(html.contains("Earlier tests"), "{html}");
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The lot summary written to another folder than the runs': every unit's link still opens
/// its report, rendered there from the archive.
#[test]
fn the_summary_links_work_wherever_it_is_written() {
    let dir = temp_dir("summary-elsewhere");
    let o = bin()
        .args([
            "run",
            "test-plans/demo.yaml",
            "--quiet",
            "--lot",
            "LOT-E",
            "--out",
        ])
        .arg(dir.join("runs"))
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(1));
    let elsewhere = dir.join("for-the-quality-manager");
    let o = bin()
        .args(["summary", "--lot", "LOT-E", "--out"])
        .arg(&elsewhere)
        .arg("--archive")
        .arg(dir.join("runs").join("archive.sqlite"))
        .output()
        .unwrap();
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(String::from_utf8_lossy(&o.stdout).contains("4 unit reports not beside the summary"));
    let html = std::fs::read_to_string(elsewhere.join("summary-lot-LOT-E.html")).unwrap();
    let mut links = 0;
    for piece in html.split("<a href=\"").skip(1) {
        let link = piece[..piece.find('"').unwrap()].replace("&#x2f;", "/");
        assert!(elsewhere.join(&link).exists(), "{link}");
        links += 1;
    }
    assert_eq!(links, 4);
    std::fs::remove_dir_all(&dir).unwrap();
}
