//! Benchmark of bench time: 1,000 simulated units (250 runs of 4 positions) through the demo plan
//! with fixed settle and sample times and through its adaptive variant (settle until stable,
//! sample until decided), with the paired difference of every check kind's errors between the
//! two (a settling bias shows there); then the real-time overhead of the engine over a plan's scheduled
//! time for 1 and 16 positions. Run with `cargo bench --bench bench_time`; it asserts nothing.

use meterproof::archive::{Archive, RunRecorder};
use meterproof::bench::RealClock;
use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, RunContext, Silent};
use meterproof::metrology::decision::settled;
use meterproof::plan::Plan;
use meterproof::record::{CheckRecord, UnitRecord};
use std::sync::Arc;
use std::time::Instant;

fn ctx() -> RunContext {
    RunContext {
        run_id: "bench".into(),
        operator: "bench".into(),
        lot: None,
        tool_version: meterproof::VERSION.into(),
        notes: Vec::new(),
    }
}

fn plan(path: &str) -> Plan {
    Plan::load(std::path::Path::new(path)).unwrap()
}

/// Whether a check's result lies in its decision rule's uncertainty band: its error ± U reaches
/// the acceptance limit or the tolerance limit, so that another measurement may decide
/// otherwise.
fn in_band(c: &CheckRecord) -> bool {
    match (&c.evaluation, &c.decision) {
        (Some(e), Some(d)) => !settled(e, d),
        _ => false,
    }
}

/// The checks whose verdicts differ between two records of one unit, and how many of them lie
/// in the uncertainty band in the first run, in the second, and in both.
fn differing_checks(x: &UnitRecord, y: &UnitRecord) -> [usize; 4] {
    let mut n = [0; 4];
    let pairs = x
        .steps
        .iter()
        .zip(&y.steps)
        .flat_map(|(a, b)| a.checks.iter().zip(&b.checks));
    for (a, b) in pairs.filter(|(a, b)| a.verdict != b.verdict) {
        n[0] += 1;
        n[1] += usize::from(in_band(a));
        n[2] += usize::from(in_band(b));
        n[3] += usize::from(in_band(a) && in_band(b));
    }
    n
}

/// How many checks both records evaluated, and for how many of them the two errors differ by
/// no more than their combined expanded uncertainty.
fn errors_within_u(x: &UnitRecord, y: &UnitRecord) -> (usize, usize) {
    let pairs = x
        .steps
        .iter()
        .zip(&y.steps)
        .flat_map(|(a, b)| a.checks.iter().zip(&b.checks))
        .filter_map(|(a, b)| {
            let ea = a.evaluation.as_ref()?.error;
            let eb = b.evaluation.as_ref()?.error;
            let ua = a.uncertainty.as_ref()?.expanded;
            let ub = b.uncertainty.as_ref()?.expanded;
            Some((ea - eb).abs() <= ua.hypot(ub))
        });
    pairs.fold((0, 0), |(n, k), ok| (n + 1, k + usize::from(ok)))
}

/// Each check kind's paired differences of the errors (adaptive − fixed), unit by unit.
fn add_paired(
    x: &UnitRecord,
    y: &UnitRecord,
    into: &mut std::collections::BTreeMap<String, Vec<f64>>,
) {
    for (a, b) in x.steps.iter().zip(&y.steps) {
        for (ca, cb) in a.checks.iter().zip(&b.checks) {
            if let (Some(ea), Some(eb)) = (&ca.evaluation, &cb.evaluation) {
                into.entry(format!("{} {}", a.id, ca.quantity.name()))
                    .or_default()
                    .push(eb.error - ea.error);
            }
        }
    }
}

/// Adds each step's bench time (from its load change to the next step's, or to the run's end).
fn add_step_times(r: &UnitRecord, into: &mut [f64]) {
    let starts: Vec<f64> = r
        .steps
        .iter()
        .map(|s| s.started_at_s.unwrap_or(0.0))
        .collect();
    for (i, t) in into.iter_mut().enumerate() {
        let end = starts.get(i + 1).copied().unwrap_or(r.bench_time_s);
        *t += end - starts[i];
    }
}

fn main() {
    // MP_BENCH_RUNS sets a smaller count for a quick look; 250 runs of 4 by default.
    let runs: u64 = std::env::var("MP_BENCH_RUNS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(250);
    run(runs, false);
}

/// The benchmark over `runs` runs of four; `smoke` keeps the real-clock part to one position.
pub fn run(runs: u64, smoke: bool) {
    let fixed = plan("test-plans/demo.yaml");
    let adaptive = plan("test-plans/demo-adaptive.yaml");
    let adaptive = match std::env::var("MP_BENCH_ADAPTIVE_PLAN") {
        Ok(path) => plan(&path),
        Err(_) => adaptive,
    };
    let (mut t_fixed, mut t_adaptive) = (0.0, 0.0);
    let (mut agree, mut disagree, mut units) = (0, 0, 0);
    let mut differing = [0; 4];
    let (mut checks_fixed_failed, mut checks_adaptive_failed) = (0, 0);
    let (mut checks_compared, mut checks_within_u) = (0, 0);
    let steps = fixed.steps.len();
    let (mut step_fixed, mut step_adaptive) = (vec![0.0; steps], vec![0.0; steps]);
    let mut paired: std::collections::BTreeMap<String, Vec<f64>> = Default::default();
    for seed in 1..=runs {
        let config = SimConfig::new(seed, 4);
        let a = exec::run(
            &fixed,
            &mut SimBench::new(&config).into_bench(),
            &ctx(),
            &mut Silent,
        );
        let b = exec::run(
            &adaptive,
            &mut SimBench::new(&config).into_bench(),
            &ctx(),
            &mut Silent,
        );
        t_fixed += a[0].bench_time_s;
        t_adaptive += b[0].bench_time_s;
        add_step_times(&a[0], &mut step_fixed);
        add_step_times(&b[0], &mut step_adaptive);
        for (x, y) in a.iter().zip(&b) {
            units += 1;
            add_paired(x, y, &mut paired);
            checks_fixed_failed += x.failed_checks().count();
            checks_adaptive_failed += y.failed_checks().count();
            let (compared, within) = errors_within_u(x, y);
            checks_compared += compared;
            checks_within_u += within;
            if x.verdict.status == y.verdict.status {
                agree += 1;
            } else {
                disagree += 1;
            }
            for (total, n) in differing.iter_mut().zip(differing_checks(x, y)) {
                *total += n;
            }
        }
    }
    let per_fixed = t_fixed / (runs * 4) as f64;
    let per_adaptive = t_adaptive / (runs * 4) as f64;
    println!("bench time per unit, {units} simulated units in runs of 4 positions:");
    println!("  fixed settle and sample times:  {per_fixed:.2} s");
    println!("  settle until stable, sample until decided: {per_adaptive:.2} s");
    println!(
        "  ratio {:.3}: {:.1} % less bench time (goal: at least 40 %)",
        per_adaptive / per_fixed,
        (1.0 - per_adaptive / per_fixed) * 100.0
    );
    println!("  verdicts agree for {agree} of {units} units; {disagree} disagree");
    println!(
        "  checks whose verdicts differ: {}; in the decision rule's uncertainty band (error ± U reaches a limit) in the fixed run {}, in the adaptive run {}, in both {}",
        differing[0], differing[1], differing[2], differing[3]
    );
    println!("  failed checks: {checks_fixed_failed} fixed, {checks_adaptive_failed} adaptive");
    println!(
        "  errors of the same check agree within their combined U (√(U₁² + U₂²)) for {checks_within_u} of {checks_compared} checks ({:.1} %; at least 95 % expected at k = 2)",
        100.0 * checks_within_u as f64 / checks_compared as f64
    );
    // Paired t of the errors per check kind (Student, n − 1 degrees of freedom): a settling
    // bias of the adaptive plan shows as a mean difference many standard errors from zero.
    println!(
        "  paired difference of the errors, adaptive − fixed, per check (mean ± standard error, t; |t| > 3.3 is significant at 0.1 %):"
    );
    let mut significant = 0;
    for (kind, d) in &paired {
        let n = d.len() as f64;
        if n < 3.0 {
            continue;
        }
        let mean = d.iter().sum::<f64>() / n;
        let sd = (d.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
        let se = sd / n.sqrt();
        let t = if se > 0.0 { mean / se } else { 0.0 };
        let flag = if t.abs() > 3.3 {
            significant += 1;
            "  SIGNIFICANT"
        } else {
            ""
        };
        println!("    {kind:<32} {mean:+.5} ± {se:.5} (n {n}), t {t:+.2}{flag}");
    }
    println!(
        "  check kinds with a significant paired difference: {significant} of {}",
        paired.len()
    );
    println!("  bench time per run of 4, step by step (fixed / adaptive):");
    for (i, step) in fixed.steps.iter().enumerate() {
        println!(
            "    {:<12} {:>6.2} s / {:>6.2} s",
            step.id,
            step_fixed[i] / runs as f64,
            step_adaptive[i] / runs as f64
        );
    }

    println!("real-time overhead over the scheduled time (simulator on a real clock):");
    let text = std::fs::read_to_string("test-plans/demo.yaml").unwrap();
    let cut = text.find("steps:").unwrap();
    let mut quick = format!("{}steps:\n", &text[..cut]);
    for (i, current) in ["1 A", "5 A", "10 A"].iter().enumerate() {
        quick.push_str(&format!(
            "  - id: s{i}\n    load: {{ current: {current} }}\n    settle: 500 ms\n    samples: 6\n    interval: 100 ms\n    checks:\n      - {{ quantity: current, tolerance: {{ percent: 0.5 % }} }}\n      - {{ quantity: active_power, tolerance: {{ class: true }} }}\n"
        ));
    }
    let quick = Plan::from_text("quick.yaml", &quick).unwrap();
    let scheduled = quick.scheduled_s();
    let steps = quick.steps.len() as f64;
    let allowed = scheduled * 1.01 + 0.020 * steps;
    let dir = std::env::temp_dir().join(format!("meterproof-bench-time-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let (positions_tried, archive_tried): (&[usize], &[bool]) = if smoke {
        (&[1], &[true])
    } else {
        (&[1, 16], &[false, true])
    };
    for &positions in positions_tried {
        for &archived in archive_tried {
            let mut config = SimConfig::new(7, positions);
            config.plant_defect = false;
            let mut bench =
                SimBench::with_clock(&config, Arc::new(RealClock::default())).into_bench();
            bench.parallel = true;
            let archive =
                Archive::open(&dir.join(format!("a{positions}-{archived}.sqlite"))).unwrap();
            let recorder = RunRecorder::new(&archive, &format!("rt{positions}"));
            let recorder: &dyn exec::Recorder = if archived {
                &recorder
            } else {
                &exec::NoRecorder
            };
            let start = Instant::now();
            exec::run_with(&quick, &mut bench, &ctx(), &mut Silent, recorder, None);
            let wall = start.elapsed().as_secs_f64();
            println!(
                "  {positions:>2} positions, archive {}: {wall:.3} s for {scheduled:.3} s scheduled: overhead {:.1} ms per step (allowed {:.1} ms per step)",
                if archived { "on " } else { "off" },
                (wall - scheduled) * 1000.0 / steps,
                (allowed - scheduled) * 1000.0 / steps
            );
        }
    }
    if !smoke {
        adaptive_overhead(&quick_adaptive(&text[..cut]), &dir);
    }
    std::fs::remove_dir_all(&dir).unwrap();
    pulse_method((runs / 5).max(2));
}

/// The pulse-method demo plan: bench time per step and the expanded uncertainty each way of
/// counting reaches, and the gate read until decided instead of to its end.
fn pulse_method(runs: u64) {
    let text = std::fs::read_to_string("test-plans/demo-pulses.yaml").unwrap();
    let fixed = Plan::from_text("demo-pulses.yaml", &text).unwrap();
    let until = text.replace(
        "pulses: { method: fixed_time, resolution: 0.25 % }",
        "pulses: { method: fixed_time, resolution: 0.25 % }\n    samples_until_decided: { min: 3, max: 11 }",
    );
    let until = Plan::from_text("demo-pulses-until.yaml", &until).unwrap();
    println!("pulse method (test-plans/demo-pulses.yaml), {runs} runs of 4 positions:");
    for (name, plan) in [("as written", &fixed), ("gate until decided", &until)] {
        let steps = plan.steps.len();
        let (mut time, mut u, mut agree) = (vec![0.0; steps], vec![0.0; steps], 0);
        let mut units = vec![String::new(); steps];
        let mut n = 0;
        for seed in 1..=runs {
            let records = exec::run(
                plan,
                &mut SimBench::new(&SimConfig::new(seed, 4)).into_bench(),
                &ctx(),
                &mut Silent,
            );
            add_step_times(&records[0], &mut time);
            for r in &records {
                n += 1;
                for (i, s) in r.steps.iter().enumerate() {
                    if let Some(b) = s.checks[0].uncertainty.as_ref() {
                        u[i] += b.expanded;
                    }
                    if let Some(e) = s.checks[0].evaluation.as_ref() {
                        units[i] = e.error_unit.clone();
                    }
                }
                // The register-free reading of the same unit: its power error at count-Ib.
                let count = &r.steps[1].checks;
                if let (Some(e), Some(p)) = (&count[0].evaluation, &count[1].evaluation) {
                    let (ue, up) = (
                        count[0].uncertainty.as_ref().map_or(0.0, |b| b.expanded),
                        count[1].uncertainty.as_ref().map_or(0.0, |b| b.expanded),
                    );
                    if (e.error - p.error).abs() <= ue.hypot(up) {
                        agree += 1;
                    }
                }
            }
        }
        println!("  {name}:");
        for (i, step) in plan.steps.iter().enumerate() {
            println!(
                "    {:<12} {:>7.1} s a run, U of the count's error {:.3} {}",
                step.id,
                time[i] / runs as f64,
                u[i] / n as f64,
                units[i]
            );
        }
        println!(
            "    count-Ib: the timed count's error and the power readings' agree within their combined U for {agree} of {n} units"
        );
    }
}

/// Three steps that settle until stable and sample until decided, 100 ms apart.
fn quick_adaptive(head: &str) -> Plan {
    let mut text = format!("{head}steps:\n");
    for (i, current) in ["1 A", "5 A", "10 A"].iter().enumerate() {
        text.push_str(&format!(
            "  - id: s{i}\n    load: {{ current: {current} }}\n    settle_until: {{ stable_within: 0.3 %, readings: 4, every: 100 ms, at_least: 300 ms, at_most: 3 s }}\n    samples_until_decided: {{ min: 3, max: 8 }}\n    interval: 100 ms\n    checks:\n      - {{ quantity: current, tolerance: {{ percent: 0.5 % }} }}\n      - {{ quantity: active_power, tolerance: {{ class: true }} }}\n"
        ));
    }
    Plan::from_text("quick-adaptive.yaml", &text).unwrap()
}

/// The time an adaptive run spends beyond what its rules chose: each step's settle time as
/// recorded plus (samples taken − 1) intervals, against the run's wall time.
fn adaptive_overhead(plan: &Plan, dir: &std::path::Path) {
    println!(
        "real-time overhead of adaptive steps over the settle and sampling times they chose (archive on):"
    );
    for positions in [1usize, 16] {
        let mut config = SimConfig::new(7, positions);
        config.plant_defect = false;
        let mut bench = SimBench::with_clock(&config, Arc::new(RealClock::default())).into_bench();
        bench.parallel = true;
        let archive = Archive::open(&dir.join(format!("adaptive{positions}.sqlite"))).unwrap();
        let recorder = RunRecorder::new(&archive, &format!("ad{positions}"));
        let start = Instant::now();
        let records = exec::run_with(plan, &mut bench, &ctx(), &mut Silent, &recorder, None);
        let wall = start.elapsed().as_secs_f64();
        let chosen: f64 = (0..plan.steps.len())
            .map(|i| {
                let settle = records[0].steps[i].settle_actual_s.unwrap_or(0.0);
                let taken = records
                    .iter()
                    .map(|r| r.steps[i].checks[0].samples.len())
                    .max()
                    .unwrap_or(0);
                settle + taken.saturating_sub(1) as f64 * plan.steps[i].interval_s
            })
            .sum();
        let steps = plan.steps.len() as f64;
        println!(
            "  {positions:>2} positions: {wall:.3} s for {chosen:.3} s chosen by the rules: overhead {:.1} ms per step (allowed {:.1} ms per step)",
            (wall - chosen) * 1000.0 / steps,
            (chosen * 0.01 / steps + 0.020) * 1000.0
        );
    }
}
