//! Benchmark of the serial link: transactions per second over pseudo-terminals for 1 and 16
//! positions, and the time of one step for a 16-position batch against one position.
//!
//! Run with `cargo bench --bench serial_link`. It prints figures; it asserts nothing.

use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::bench::sim_device::{Device, Faults, PtyDevice};
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

/// A real-clock simulated bench whose meters sit behind pseudo-terminals.
fn bench(positions: usize, plan: &Plan) -> (Bench, Vec<PtyDevice>) {
    let mut config = SimConfig::new(1, positions);
    config.plant_defect = false;
    let sim = SimBench::with_clock(&config, Arc::new(RealClock::default()));
    let devices: Vec<PtyDevice> = (0..positions)
        .map(|i| PtyDevice::spawn(Device::new(sim.meter(i), Faults::default())).unwrap())
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
    let (mut bench, _devices) = bench(positions, &plan);
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

/// Wall time of a one-step plan (settle 0.3 s, 11 samples 0.1 s apart: 1.3 s scheduled).
fn step_time(positions: usize) -> f64 {
    let text = std::fs::read_to_string("test-plans/demo-serial.yaml").unwrap();
    let cut = text.find("steps:").unwrap();
    let one_step = format!(
        "{}steps:\n  - id: timing\n    load: {{ current: 5 A }}\n    settle: 300 ms\n    samples: 11\n    interval: 100 ms\n    checks:\n      - {{ quantity: current, tolerance: {{ percent: 0.5 % }} }}\n      - {{ quantity: active_power, tolerance: {{ percent: 1 % }} }}\n",
        &text[..cut]
    );
    let plan = Plan::from_text("timing.yaml", &one_step).unwrap();
    let (mut bench, _devices) = bench(positions, &plan);
    let ctx = RunContext {
        run_id: "bench".into(),
        operator: "bench".into(),
        lot: None,
        tool_version: meterproof::VERSION.into(),
        notes: Vec::new(),
    };
    let start = Instant::now();
    let records = exec::run(&plan, &mut bench, &ctx, &mut Silent);
    let elapsed = start.elapsed().as_secs_f64();
    assert!(
        records
            .iter()
            .all(|r| r.steps[0].checks[0].samples.len() == 11)
    );
    elapsed
}

fn main() {
    println!("serial link over pseudo-terminals (request and reply of about 10 bytes each)");
    let one = transactions_per_second(1, 5_000);
    println!("  1 position:   {one:>8.0} transactions/s");
    let sixteen = transactions_per_second(16, 1_000);
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
}
