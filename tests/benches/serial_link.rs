//! Benchmark of the serial link: transactions per second over pseudo-terminals for 1 and 16
//! positions, and the time of one step for a 16-position batch against one position.
//!
//! Run with `cargo bench --bench serial_link`. It prints figures; it asserts nothing.

use meterproof::bench::sim::device::{Device, Faults, PtyDevice};
use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::bench::{Bench, RealClock};
use meterproof::exec::{self, RunContext, Silent};
use meterproof::link::{DutLink, text};
use meterproof::plan::{LinkSpec, Plan, Quantity};
use std::sync::Arc;
use std::time::Instant;

fn serial_plan() -> Plan {
    Plan::load(std::path::Path::new("test-plans/demo-serial.yaml")).expect("the serial demo plan")
}

fn spec(plan: &Plan) -> Arc<meterproof::plan::text_link::TextLinkSpec> {
    match &plan.link {
        LinkSpec::Text(t) => Arc::new((**t).clone()),
        _ => panic!("the serial demo has a text link"),
    }
}

/// The bench's meters: seed 1, no planted defect.
fn meters(positions: usize) -> SimConfig {
    SimConfig {
        plant_defect: false,
        ..SimConfig::new(1, positions)
    }
}

/// A real-clock simulated bench whose meters sit behind pseudo-terminals.
fn bench(config: &SimConfig, plan: &Plan, faults: &Faults) -> (Bench, Vec<PtyDevice>) {
    let positions = config.positions;
    let sim = SimBench::with_clock(config, Arc::new(RealClock::default()));
    let devices: Vec<PtyDevice> = (0..positions)
        .map(|i| PtyDevice::spawn(Device::new(sim.meter(i), faults.clone())).unwrap())
        .collect();
    let mut bench = sim.into_bench();
    for (p, d) in bench.positions.iter_mut().zip(&devices) {
        p.link = text::open(&d.path, spec(plan)).unwrap();
    }
    bench.parallel = true;
    (bench, devices)
}

fn transactions_per_second(positions: usize, per_position: usize) -> f64 {
    let plan = serial_plan();
    let (mut bench, _devices) = bench(&meters(positions), &plan, &Faults::default());
    let start = Instant::now();
    std::thread::scope(|s| {
        for p in bench.positions.iter_mut() {
            let link: &mut Box<dyn DutLink> = &mut p.link;
            s.spawn(move || {
                for _ in 0..per_position {
                    link.read(Quantity::Current, "L").expect("a reading");
                }
            });
        }
    });
    (positions * per_position) as f64 / start.elapsed().as_secs_f64()
}

/// The serial demo plan with one step: `timing`, loading 5 A, with the given settle and
/// sampling lines.
fn one_step_plan(settle_and_samples: &str) -> Plan {
    let text = std::fs::read_to_string("test-plans/demo-serial.yaml").unwrap();
    let cut = text.find("steps:").unwrap();
    let one_step = format!(
        "{}steps:\n  - id: timing\n    load: {{ current: 5 A }}\n{settle_and_samples}    checks:\n      - {{ quantity: current, tolerance: {{ percent: 0.5 % }} }}\n      - {{ quantity: active_power, tolerance: {{ percent: 1 % }} }}\n",
        &text[..cut]
    );
    Plan::from_text("timing.yaml", &one_step).unwrap()
}

/// Wall time of a one-step plan (settle 0.3 s, 11 samples 0.1 s apart: 1.3 s scheduled).
fn step_time(positions: usize) -> f64 {
    let plan = one_step_plan("    settle: 300 ms\n    samples: 11\n    interval: 100 ms\n");
    let (elapsed, records) = run_timed(&plan, &meters(positions), true, &Faults::default());
    assert!(
        records
            .iter()
            .all(|r| r.steps[0].checks[0].samples.len() == 11)
    );
    elapsed
}

/// Settling until stable with meters that all settle alike (τ = 0.3 s) and take 20 ms to
/// answer: the step's settle time for `positions`, read together or one after another.
fn settle_time_slow_links(positions: usize, parallel: bool) -> f64 {
    let plan = one_step_plan(
        "    settle_until: { stable_within: 0.3 %, readings: 4, every: 150 ms, at_least: 500 ms, at_most: 4 s }\n    samples: 3\n    interval: 100 ms\n",
    );
    let slow = Faults {
        slow: std::time::Duration::from_millis(20),
        ..Faults::default()
    };
    let alike = SimConfig {
        tau_range_s: (0.3, 0.3),
        ..meters(positions)
    };
    let (_, records) = run_timed(&plan, &alike, parallel, &slow);
    records[0].steps[0].settle_actual_s.expect("a settle time")
}

/// Runs the plan on a fresh bench of pseudo-terminal meters: wall seconds and records.
fn run_timed(
    plan: &Plan,
    config: &SimConfig,
    parallel: bool,
    faults: &Faults,
) -> (f64, Vec<meterproof::record::UnitRecord>) {
    let (mut bench, _devices) = bench(config, plan, faults);
    bench.parallel = parallel;
    let ctx = RunContext {
        run_id: "bench".into(),
        operator: "bench".into(),
        lot: None,
        tool_version: meterproof::VERSION.into(),
        notes: Vec::new(),
    };
    let start = Instant::now();
    let records = exec::run(plan, &mut bench, &ctx, &mut Silent);
    (start.elapsed().as_secs_f64(), records)
}

fn main() {
    run(false);
}

/// The benchmark; `smoke` runs each part once at a small size.
pub fn run(smoke: bool) {
    println!("serial link over pseudo-terminals (request and reply of about 10 bytes each)");
    let one = transactions_per_second(1, if smoke { 200 } else { 5_000 });
    println!("  1 position:   {one:>8.0} transactions/s");
    let sixteen = transactions_per_second(16, if smoke { 20 } else { 1_000 });
    println!(
        "  16 positions: {sixteen:>8.0} transactions/s in all ({:.0} per position)",
        sixteen / 16.0
    );
    let t1 = step_time(1);
    let t16 = step_time(16);
    println!("one step, 1.3 s scheduled, 2 readings per sample, 11 samples:");
    println!("  1 position:   {t1:.3} s");
    println!("  16 positions: {t16:.3} s");
    println!("  ratio 16 / 1: {:.3} (goal: at most 1.05)", t16 / t1);
    let s1 = settle_time_slow_links(1, true);
    let s16 = settle_time_slow_links(16, true);
    println!(
        "settling until stable (a reading every 150 ms), meters alike (τ = 0.3 s) answering after 20 ms:"
    );
    println!("  1 position:                 {s1:.3} s to settle");
    println!("  16 positions, read at once: {s16:.3} s");
    if !smoke {
        let s16_in_turn = settle_time_slow_links(16, false);
        println!("  16 positions, one by one:   {s16_in_turn:.3} s");
    }
}
