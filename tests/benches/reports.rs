//! Benchmark of report rendering: 1,000 unit reports (HTML and CSV) and a 1,000-unit lot
//! summary, with the process's peak memory. Run with `cargo bench --bench reports`.

use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, RunContext, Silent};
use meterproof::plan::Plan;
use meterproof::report::summary::LotSummary;
use meterproof::report::{Templates, unit_csv};
use std::time::Instant;

/// Peak resident memory of this process, from /proc (Linux), in MB.
fn peak_mb() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1024.0)
}

fn main() {
    run(1000);
}

/// The benchmark with `units` unit reports and a lot summary of them.
pub fn run(units: usize) {
    let plan = Plan::load(std::path::Path::new("test-plans/demo.yaml")).unwrap();
    let ctx = RunContext {
        run_id: "bench".into(),
        operator: "bench".into(),
        lot: Some("LOT-BENCH".into()),
        tool_version: meterproof::VERSION.into(),
        notes: Vec::new(),
    };
    let records = exec::run(
        &plan,
        &mut SimBench::new(&SimConfig::new(1, units)).into_bench(),
        &ctx,
        &mut Silent,
    );
    let templates = Templates::load(None).unwrap();
    let start = Instant::now();
    let mut bytes = 0usize;
    for r in &records {
        bytes += templates.unit_html(r, None).unwrap().len();
        bytes += unit_csv(r).unwrap().len();
    }
    let t = start.elapsed().as_secs_f64();
    println!(
        "1,000 unit reports (HTML and CSV): {t:.2} s, {:.0} reports/s, {:.1} MB written",
        records.len() as f64 / t,
        bytes as f64 / 1e6
    );
    let start = Instant::now();
    let summary = LotSummary::of("lot LOT-BENCH", &records, &|r| format!("{}.html", r.serial));
    let html = templates.lot_html(&summary).unwrap();
    let csv = summary.csv().unwrap();
    println!(
        "lot summary of 1,000 units: {:.3} s ({} kB HTML, {} B CSV)",
        start.elapsed().as_secs_f64(),
        html.len() / 1000,
        csv.len()
    );
    if let Some(mb) = peak_mb() {
        println!("peak memory of the whole benchmark (records included): {mb:.0} MB");
    }
}
