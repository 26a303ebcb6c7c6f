//! Benchmark of the archive: an archive of many unit runs (1,000,000 by default; set
//! METERPROOF_BENCH_UNITS to change it), each with 100 readings, in lots of 1,000 units.
//! Prints ingest time, size per unit run, `history` of one serial, `runs --lot` for one lot and
//! `verify` throughput. Run with `cargo bench --bench archive`; it asserts nothing.

use meterproof::archive::{Archive, RunFilter, RunRow};
use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, RunContext, Silent};
use meterproof::plan::Plan;
use meterproof::record::UnitRecord;
use std::time::Instant;

const LOT: usize = 1_000;

/// One step, two quantities, 50 samples each: 100 readings a unit.
const PLAN: &str = "id: BENCH
revision: A
product: { model: TM-16, firmware: '^2' }
ratings: { nominal_voltage: 230 V, basic_current: 5 A, max_current: 16 A, frequency: 50 Hz, class: '1' }
link: { kind: sim }
steps:
  - id: point
    load: { current: 5 A }
    settle: 2 s
    samples: 50
    interval: 100 ms
    checks:
      - { quantity: current, tolerance: { percent: 0.5 % } }
      - { quantity: active_power, tolerance: { class: true } }
";

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(|a, b| a.partial_cmp(b).unwrap());
    v[v.len() / 2]
}

fn main() {
    let units: usize = std::env::var("METERPROOF_BENCH_UNITS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(1_000_000);
    run(units);
}

/// The benchmark over an archive of `units` unit runs (the smoke test runs a small one).
pub fn run(units: usize) {
    let lots = units.div_ceil(LOT);
    let dir = std::env::temp_dir().join(format!("meterproof-bench-archive-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("archive.sqlite");
    let archive = Archive::open(&path).unwrap();
    let plan = Plan::from_text("bench.yaml", PLAN).unwrap();
    let ctx = RunContext {
        run_id: "template".into(),
        operator: "bench".into(),
        lot: None,
        tool_version: meterproof::VERSION.into(),
        notes: Vec::new(),
    };
    let template: UnitRecord = exec::run(
        &plan,
        &mut SimBench::new(&SimConfig::new(1, 1)).into_bench(),
        &ctx,
        &mut Silent,
    )
    .remove(0);
    // About a tenth of the serials come back for a retest in a later lot.
    let distinct_serials = (units as f64 * 0.9) as usize;
    println!("archive benchmark: {units} unit runs of 100 readings, lots of {LOT}");
    let start = Instant::now();
    for lot in 0..lots {
        let run_id = format!("R{lot:07}");
        archive
            .begin_run(
                &plan,
                &RunRow {
                    run_id: run_id.clone(),
                    plan_sha256: plan.source.sha256.clone(),
                    plan_id: plan.id.clone(),
                    revision: plan.revision.clone(),
                    lot: Some(format!("LOT-{lot:06}")),
                    station: "sim".into(),
                    operator: "bench".into(),
                    bench: "{}".into(),
                    tool_version: meterproof::VERSION.into(),
                    started_at: format!("2026-{:02}-01T00:00:00+00:00", 1 + lot % 12),
                    finished_at: None,
                    state: "running".into(),
                },
            )
            .unwrap();
        let records: Vec<UnitRecord> = (0..LOT.min(units - lot * LOT))
            .map(|i| {
                let mut r = template.clone();
                r.run_id = run_id.clone();
                r.position = i + 1;
                r.serial = format!("S{:08}", (lot * LOT + i) % distinct_serials);
                r.finished_at = format!(
                    "2026-{:02}-01T00:{:02}:{:02}+00:00",
                    1 + lot % 12,
                    (lot / 60) % 60,
                    lot % 60
                );
                r
            })
            .collect();
        archive.import_units(&records).unwrap();
        archive
            .finish_run(
                &run_id,
                "2026-12-01T00:00:00+00:00",
                meterproof::archive::RunState::Finished,
            )
            .unwrap();
        if (lot + 1) % 100 == 0 {
            eprintln!(
                "  {} units in {:.0} s",
                (lot + 1) * LOT,
                start.elapsed().as_secs_f64()
            );
        }
    }
    let ingest = start.elapsed().as_secs_f64();
    drop(archive);
    let bytes: u64 = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().metadata().unwrap().len())
        .sum();
    println!(
        "ingest: {ingest:.1} s ({:.0} unit runs/s, {:.0} readings/s)",
        units as f64 / ingest,
        units as f64 * 100.0 / ingest
    );
    println!(
        "size: {:.1} MB, {:.0} bytes per unit run",
        bytes as f64 / 1e6,
        bytes as f64 / units as f64
    );
    let archive = Archive::open(&path).unwrap();
    let mut times = Vec::new();
    for k in 0..200 {
        let serial = format!("S{:08}", (k * 7919) % distinct_serials);
        let t = Instant::now();
        let rows = archive.history(&serial).unwrap();
        times.push(t.elapsed().as_secs_f64() * 1e3);
        assert!(!rows.is_empty());
    }
    println!(
        "history of one serial: median {:.3} ms (goal under 20 ms)",
        median(times)
    );
    let mut times = Vec::new();
    for k in 0..50 {
        let filter = RunFilter {
            lot: Some(format!("LOT-{:06}", (k * 37) % lots)),
            ..RunFilter::default()
        };
        let t = Instant::now();
        let rows = archive.runs(&filter).unwrap();
        times.push(t.elapsed().as_secs_f64() * 1e3);
        assert_eq!(rows.len(), 1);
    }
    println!(
        "runs --lot for a lot of {LOT} units: median {:.3} ms (goal under 200 ms)",
        median(times)
    );
    let t = Instant::now();
    let verification = archive.verify(None).unwrap();
    let v = t.elapsed().as_secs_f64();
    let checked = verification.unit_records;
    println!(
        "verify: {checked} unit records ({} chain entries) in {v:.1} s ({:.0} records/s), {} failed",
        verification.entries,
        checked as f64 / v,
        verification.failures.len()
    );
    drop(archive);
    std::fs::remove_dir_all(&dir).unwrap();
}
