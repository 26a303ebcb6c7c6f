//! Benchmark of the serial link: transactions per second over pseudo-terminals for 1 and 16
//! positions, and the time of one step for a 16-position batch against one position; and the
//! same for Modbus RTU, 16 units on one bus and on 4 buses of 4, at 9600 and 115200 baud, with
//! the wire time the bytes would take on a real line printed beside (a pseudo-terminal has no
//! baud rate; the link still keeps the silence between frames that the rate asks for).
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
    let ctx = bench_context();
    let start = Instant::now();
    let records = exec::run(plan, &mut bench, &ctx, &mut Silent);
    (start.elapsed().as_secs_f64(), records)
}

// ---- Modbus RTU ----

/// The Modbus demo plan at `baud`, with `steps` in place of its own where given.
fn modbus_plan(baud: u32, steps: Option<&str>) -> Plan {
    let text = std::fs::read_to_string("test-plans/demo-modbus.yaml")
        .unwrap()
        .replace("baud: 19200", &format!("baud: {baud}"));
    let text = match steps {
        Some(steps) => {
            let cut = text.find("steps:").unwrap();
            format!("{}{steps}", &text[..cut])
        }
        None => text,
    };
    Plan::from_text("modbus.yaml", &text).unwrap()
}

/// A real-clock bench of `positions` meters on `buses` simulated Modbus buses.
fn modbus_bench(positions: usize, buses: usize, plan: &Plan) -> (Bench, Vec<PtyDevice>) {
    use meterproof::bench::sim::modbus_device::{self, BusUnit, ModbusBus};
    use meterproof::link::modbus::{Bus, ModbusLink};
    let LinkSpec::Modbus(spec) = &plan.link else {
        panic!("the Modbus demo has a modbus link")
    };
    let spec = Arc::new((**spec).clone());
    let sim = SimBench::with_clock(&meters(positions), Arc::new(RealClock::default()));
    let per_bus = positions.div_ceil(buses);
    let mut devices = Vec::new();
    let mut links: Vec<Box<dyn DutLink>> = Vec::new();
    for b in 0..buses {
        let range = b * per_bus..((b + 1) * per_bus).min(positions);
        let units = range
            .clone()
            .map(|i| BusUnit::new((i + 1) as u8, sim.meter(i), Faults::default()))
            .collect();
        let device = modbus_device::spawn(ModbusBus { units }).unwrap();
        let bus = Bus::open(&device.path, &spec).unwrap();
        for i in range {
            links.push(Box::new(ModbusLink::new(
                bus.clone(),
                (i + 1) as u8,
                spec.clone(),
            )));
        }
        devices.push(device);
    }
    let mut bench = sim.into_bench();
    for (p, link) in bench.positions.iter_mut().zip(links) {
        p.link = link;
    }
    bench.parallel = true;
    (bench, devices)
}

/// Reads of one f32 register by every position at once: transactions a second in all.
fn modbus_transactions_per_second(buses: usize, baud: u32, per_position: usize) -> f64 {
    let plan = modbus_plan(baud, None);
    let (mut bench, _devices) = modbus_bench(16, buses, &plan);
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
    (16 * per_position) as f64 / start.elapsed().as_secs_f64()
}

/// Wall time of one step (settle 0.3 s, 11 samples 0.1 s apart, two readings a sample) for
/// 16 positions on `buses` buses.
fn modbus_step_time(buses: usize, baud: u32) -> f64 {
    let plan = modbus_plan(
        baud,
        Some(
            "steps:\n  - id: timing\n    load: { current: 5 A }\n    settle: 300 ms\n    samples: 11\n    interval: 100 ms\n    checks:\n      - { quantity: current, tolerance: { percent: 0.5 % } }\n      - { quantity: active_power, tolerance: { percent: 1 % } }\n",
        ),
    );
    let (mut bench, _devices) = modbus_bench(16, buses, &plan);
    let ctx = bench_context();
    let start = Instant::now();
    let records = exec::run(&plan, &mut bench, &ctx, &mut Silent);
    let elapsed = start.elapsed().as_secs_f64();
    let short = records
        .iter()
        .filter(|r| r.steps[0].checks[0].samples.len() < 11)
        .count();
    if short > 0 {
        println!("    ({short} positions took fewer than 11 samples: the bus could not keep up)");
    }
    elapsed
}

/// Modbus figures for 16 positions: one bus and four buses, at two baud rates.
fn modbus_figures(smoke: bool) {
    // A read of one f32: request 8 bytes, reply 9 (address, function, count, 4 data, CRC).
    let bytes = 8.0 + 9.0;
    println!("Modbus RTU, 16 positions, reading one f32 register (17 bytes a transaction):");
    for baud in [9600u32, 115_200] {
        let wire_ms = bytes * 10.0 / f64::from(baud) * 1000.0;
        let spec = modbus_plan(baud, None);
        let LinkSpec::Modbus(m) = &spec.link else {
            unreachable!()
        };
        let gap_ms = m.frame_silence_s() * 1000.0;
        println!(
            "  {baud} baud: wire time {wire_ms:.2} ms a transaction (bytes × 10 / baud) and {gap_ms:.2} ms of silence between frames: at most {:.0} transactions/s a bus on a real line",
            1000.0 / (wire_ms + gap_ms)
        );
        for buses in [1usize, 4] {
            let tps = modbus_transactions_per_second(buses, baud, if smoke { 5 } else { 200 });
            let step = if smoke {
                None
            } else {
                Some(modbus_step_time(buses, baud))
            };
            println!(
                "    {buses} bus{} of {}: {tps:>6.0} transactions/s in all{}",
                if buses == 1 { "" } else { "es" },
                16 / buses,
                step.map(|s| format!(", one step (1.3 s scheduled) {s:.3} s"))
                    .unwrap_or_default()
            );
        }
    }
}

/// The run context of a benchmark run.
fn bench_context() -> RunContext {
    RunContext {
        run_id: "bench".into(),
        operator: "bench".into(),
        lot: None,
        tool_version: meterproof::VERSION.into(),
        notes: Vec::new(),
    }
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
    modbus_figures(smoke);
}
