//! Benchmark of the archive, on SQLite and (where `MP_POSTGRES_URL` names a server) on
//! PostgreSQL, printed side by side: an archive of many unit runs (1,000,000 by default; set
//! METERPROOF_BENCH_UNITS to change it), each with 100 readings, in lots of 1,000 units. Prints
//! ingest time, size per unit run, `history` of one serial, `runs --lot` for one lot, `verify`
//! throughput, and the commit latency of a live reading with 8 benches of 16 positions writing
//! at once. Run with `cargo bench --bench archive`; it asserts nothing. METERPROOF_BENCH_NO_VERIFY
//! leaves `verify` out (its rate does not depend on the archive's size).

use meterproof::archive::{Archive, Location, RunFilter, RunRecorder, RunRow};
use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, RunContext, Silent};
use meterproof::exec::{ReadingKey, Recorder};
use meterproof::plan::Plan;
use meterproof::plan::Quantity;
use meterproof::record::Sample;
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

/// A field of /proc/self/status, in MB (Linux; `None` elsewhere).
fn status_mb(field: &str) -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with(field))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1024.0)
}

fn resident_mb() -> Option<f64> {
    status_mb("VmRSS:")
}

fn peak_mb() -> Option<f64> {
    status_mb("VmHWM:")
}

/// Sets the peak resident size back to the present one (Linux: `5` to clear_refs).
fn reset_peak() -> bool {
    std::fs::write("/proc/self/clear_refs", "5").is_ok()
}

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

/// What one backend measured.
#[derive(Default)]
struct Figures {
    ingest_s: f64,
    bytes_per_unit: f64,
    history_ms: f64,
    lot_ms: f64,
    verify_per_s: f64,
    verify_mb: f64,
    live_median_ms: f64,
    live_p99_ms: f64,
}

/// A fresh PostgreSQL database on the server `MP_POSTGRES_URL` names.
fn fresh_postgres(server: &str) -> String {
    let db = format!("mp_bench_{}", std::process::id());
    let mut c = postgres::Client::connect(server, postgres::NoTls).unwrap();
    c.batch_execute(&format!("DROP DATABASE IF EXISTS {db}"))
        .unwrap();
    c.batch_execute(&format!("CREATE DATABASE {db}")).unwrap();
    let base = server.rsplit_once('/').unwrap().0;
    format!("{base}/{db}")
}

fn drop_postgres(server: &str, url: &str) {
    let db = url.rsplit('/').next().unwrap();
    let mut c = postgres::Client::connect(server, postgres::NoTls).unwrap();
    let _ = c.batch_execute(&format!("DROP DATABASE IF EXISTS {db} WITH (FORCE)"));
}

/// The storage an archive takes: its files, or its database.
fn bytes_of(location: &Location) -> u64 {
    match location {
        Location::Sqlite(path) => std::fs::read_dir(path.parent().unwrap())
            .unwrap()
            .map(|e| e.unwrap().metadata().unwrap().len())
            .sum(),
        Location::Postgres(url) => {
            let mut c = postgres::Client::connect(url, postgres::NoTls).unwrap();
            c.query_one("SELECT pg_database_size(current_database())", &[])
                .unwrap()
                .get::<_, i64>(0) as u64
        }
    }
}

/// The benchmark over an archive of `units` unit runs (the smoke test runs a small one), on
/// every backend at hand.
pub fn run(units: usize) {
    let dir = std::env::temp_dir().join(format!("meterproof-bench-archive-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let mut results = Vec::new();
    let sqlite = Location::Sqlite(dir.join("archive.sqlite"));
    results.push(("SQLite", run_on(units, &sqlite)));
    std::fs::remove_dir_all(&dir).unwrap();
    match std::env::var("MP_POSTGRES_URL") {
        Ok(server) if !server.is_empty() => {
            let url = fresh_postgres(&server);
            results.push((
                "PostgreSQL",
                run_on(units, &Location::Postgres(url.clone())),
            ));
            drop_postgres(&server, &url);
        }
        _ => println!("PostgreSQL NOT MEASURED: MP_POSTGRES_URL names no server"),
    }
    println!("\n{units} unit runs of 100 readings, lots of {LOT}:");
    print!("{:<44}", "");
    for (name, _) in &results {
        print!("{name:>14}");
    }
    println!();
    type Row = (&'static str, fn(&Figures) -> f64, usize);
    let rows: [Row; 8] = [
        ("ingest, s", |f| f.ingest_s, 1),
        ("bytes per unit run", |f| f.bytes_per_unit, 0),
        (
            "history of one serial, median ms (goal < 20)",
            |f| f.history_ms,
            3,
        ),
        (
            "runs --lot of 1,000 units, median ms (< 200)",
            |f| f.lot_ms,
            3,
        ),
        ("verify, unit records per s", |f| f.verify_per_s, 0),
        ("verify, peak memory MB", |f| f.verify_mb, 0),
        (
            "live reading, 8 benches × 16: median ms",
            |f| f.live_median_ms,
            3,
        ),
        (
            "live reading, 8 benches × 16: 99th pct. ms",
            |f| f.live_p99_ms,
            3,
        ),
    ];
    for (label, value, decimals) in rows {
        print!("{label:<44}");
        for (_, f) in &results {
            match value(f) {
                v if v.is_nan() => print!("{:>14}", "not run"),
                v => print!("{:>14.*}", decimals, v),
            }
        }
        println!();
    }
}

/// The commit latency of a live reading: 8 benches (an archive connection each) of 16
/// positions (a thread each) hand over a reading every 20 ms, as sampling does; each call
/// returns once its reading is committed.
fn live_latency(location: &Location, plan: &Plan) -> (f64, f64) {
    let latencies = std::sync::Mutex::new(Vec::new());
    std::thread::scope(|s| {
        for bench in 0..8 {
            let latencies = &latencies;
            s.spawn(move || {
                let archive = Archive::open_at(location).unwrap();
                let run_id = format!("LIVE-{bench}");
                let mut row = live_row(plan, &run_id);
                row.station = format!("bench-{bench}");
                archive.begin_run(plan, &row).unwrap();
                let recorder = RunRecorder::new(&archive, &run_id);
                std::thread::scope(|s| {
                    for position in 1..=16 {
                        let recorder = &recorder;
                        s.spawn(move || {
                            let mut mine = Vec::new();
                            for i in 0..50 {
                                let key = ReadingKey {
                                    position,
                                    step_index: 0,
                                    attempt: 1,
                                    quantity: Quantity::Current,
                                    channel: "L".into(),
                                    raw: false,
                                };
                                let t = Instant::now();
                                recorder.reading(
                                    &key,
                                    Sample {
                                        t_s: i as f64 * 0.02,
                                        value: 5.0,
                                        took_s: None,
                                    },
                                );
                                mine.push(t.elapsed().as_secs_f64() * 1e3);
                                std::thread::sleep(std::time::Duration::from_millis(20));
                            }
                            latencies.lock().unwrap().extend(mine);
                        });
                    }
                });
                assert_eq!(archive.failure(), None);
            });
        }
    });
    let mut v = latencies.into_inner().unwrap();
    v.sort_by(|a, b| a.partial_cmp(b).unwrap());
    (v[v.len() / 2], v[v.len() * 99 / 100])
}

fn live_row(plan: &Plan, run_id: &str) -> RunRow {
    RunRow {
        run_id: run_id.into(),
        plan_sha256: plan.source.sha256.clone(),
        plan_id: plan.id.clone(),
        revision: plan.revision.clone(),
        lot: None,
        station: "sim".into(),
        operator: "bench".into(),
        bench: "{}".into(),
        tool_version: meterproof::VERSION.into(),
        started_at: "2026-12-01T00:00:00+00:00".into(),
        finished_at: None,
        state: "running".into(),
    }
}

/// The benchmark on one backend.
fn run_on(units: usize, location: &Location) -> Figures {
    let mut figures = Figures::default();
    let lots = units.div_ceil(LOT);
    let archive = Archive::open_at(location).unwrap();
    let empty = bytes_of(location);
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
    println!("archive benchmark on {location}: {units} unit runs of 100 readings, lots of {LOT}");
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
    let bytes = bytes_of(location).saturating_sub(empty);
    figures.ingest_s = ingest;
    figures.bytes_per_unit = bytes as f64 / units as f64;
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
    let archive = Archive::open_at(location).unwrap();
    let mut times = Vec::new();
    for k in 0..200 {
        let serial = format!("S{:08}", (k * 7919) % distinct_serials);
        let t = Instant::now();
        let rows = archive.history(&serial).unwrap();
        times.push(t.elapsed().as_secs_f64() * 1e3);
        assert!(!rows.is_empty());
    }
    figures.history_ms = median(times);
    println!(
        "history of one serial: median {:.3} ms (goal under 20 ms)",
        figures.history_ms
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
    figures.lot_ms = median(times);
    println!(
        "runs --lot for a lot of {LOT} units: median {:.3} ms (goal under 200 ms)",
        figures.lot_ms
    );
    // `verify` reads every record back; at a million it takes tens of minutes on PostgreSQL,
    // so METERPROOF_BENCH_NO_VERIFY leaves it out (its rate is measured on a smaller archive).
    if std::env::var_os("METERPROOF_BENCH_NO_VERIFY").is_some() {
        println!("verify: not run (METERPROOF_BENCH_NO_VERIFY)");
        figures.verify_per_s = f64::NAN;
        figures.verify_mb = f64::NAN;
    } else {
        let before = resident_mb();
        let peak_reset = reset_peak();
        let t = Instant::now();
        let verification = archive.verify(None).unwrap();
        let v = t.elapsed().as_secs_f64();
        let checked = verification.unit_records;
        // Its peak memory over what the process held before it.
        let grew = match (peak_reset, before, peak_mb()) {
            (true, Some(before), Some(peak)) => peak - before,
            _ => f64::NAN,
        };
        println!(
            "verify: {checked} unit records ({} chain entries) in {v:.1} s ({:.0} records/s), {} failed, peak memory {grew:.0} MB over the {:.0} MB held before",
            verification.entries,
            checked as f64 / v,
            verification.failures.len(),
            before.unwrap_or(f64::NAN)
        );
        figures.verify_per_s = checked as f64 / v;
        figures.verify_mb = grew;
    }
    drop(archive);
    let (median, p99) = live_latency(location, &plan);
    println!(
        "live reading with 8 benches of 16 positions: median {median:.3} ms, 99th percentile {p99:.3} ms"
    );
    figures.live_median_ms = median;
    figures.live_p99_ms = p99;
    figures
}
