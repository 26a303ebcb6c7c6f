//! Class limits, uncertainty and decision rules through whole simulated runs.

mod common;
use common::ctx;

use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, Silent};
use meterproof::plan::{Plan, SpecialTest};
use meterproof::record::{CheckVerdict, UnitRecord, UnitStatus};

fn run(plan: &Plan, config: &SimConfig) -> Vec<UnitRecord> {
    exec::run(
        plan,
        &mut SimBench::new(config).into_bench(),
        &ctx(),
        &mut Silent,
    )
}

fn demo_text() -> String {
    std::fs::read_to_string("test-plans/demo.yaml").unwrap()
}

#[test]
fn every_check_carries_its_budget_and_decision() {
    let plan = Plan::from_text("demo.yaml", &demo_text()).unwrap();
    let records = run(&plan, &SimConfig::new(1, 4));
    assert_eq!(records.len(), 4);
    for r in &records {
        for c in r.steps.iter().flat_map(|s| &s.checks) {
            let b = c.uncertainty.as_ref().expect("a budget");
            let d = c.decision.as_ref().expect("a decision");
            // An auditor can redo the sum: the components' root sum of squares is u_c, and
            // U = k·u_c (GUM 5.1.2, 6.2.1).
            let rss = b.components.iter().map(|x| x.u * x.u).sum::<f64>().sqrt();
            assert!((rss - b.combined).abs() <= 1e-12 * b.combined.max(1e-300));
            assert!((b.k * b.combined - b.expanded).abs() <= 1e-12 * b.expanded.max(1e-300));
            assert_eq!(d.expanded_uncertainty, Some(b.expanded));
            // Guarded acceptance with w = 1 U (the demo's rule).
            assert!((d.acceptance_limit - (d.tolerance_limit - b.expanded)).abs() < 1e-12);
            assert_eq!(c.verdict == CheckVerdict::Pass, d.accepted);
            // The specific risk is a probability, and an accepted result under guarded
            // acceptance with w = U carries at most about 1 − Φ(k) ≤ 2.3 % of it (ILAC-G8;
            // normal table), a little more for a two-sided limit's second tail.
            let risk = d.risk.expect("a specific risk");
            // The reference of the step carries the window it stands for, to redo the figure.
            if c.reference.is_some() {
                let step = r
                    .steps
                    .iter()
                    .find(|s| s.checks.iter().any(|x| std::ptr::eq(x, c)))
                    .unwrap();
                let reading = &step
                    .references
                    .iter()
                    .find(|x| x.quantity == c.quantity)
                    .expect("the check's reference")
                    .reading;
                let (t0, t1) = reading.window_s.expect("its window");
                assert!(t1 >= t0 && t0 >= step.started_at_s.unwrap());
            }
            assert!((0.0..=1.0).contains(&risk));
            if d.accepted {
                assert!(risk < 0.0235, "{risk} for {:?}", c.evaluation);
            }
        }
    }
}

/// One check of the demo, made to lie between the acceptance limit and the tolerance limit:
/// simple acceptance passes it (marginally); guarded acceptance with w = U rejects it.
#[test]
fn the_decision_rule_decides_a_result_between_the_limits() {
    let plan = Plan::from_text("demo.yaml", &demo_text()).unwrap();
    let config = SimConfig {
        plant_defect: false,
        ..SimConfig::new(1, 1)
    };
    let first = run(&plan, &config);
    let check = &first[0].steps[2].checks[1]; // basic-Ib, current, ±0.5 %
    assert_eq!(check.quantity.name(), "current");
    let error = check.evaluation.as_ref().unwrap().error.abs();
    let u = check
        .decision
        .as_ref()
        .unwrap()
        .expanded_uncertainty
        .unwrap();
    // A tolerance half a U above the measured error: inside TL, outside TL − U.
    let tolerance = error + 0.5 * u;
    let text = demo_text().replace(
        "      - { quantity: current, tolerance: { percent: 0.5 % } }\n      - { quantity: active_power, tolerance: { class: true } }\n      - { quantity: frequency",
        &format!("      - {{ quantity: current, tolerance: {{ percent: {tolerance} % }} }}\n      - {{ quantity: active_power, tolerance: {{ class: true }} }}\n      - {{ quantity: frequency"),
    );
    assert_ne!(text, demo_text(), "the basic-Ib current check was found");
    let guarded = Plan::from_text("g.yaml", &text).unwrap();
    let simple = Plan::from_text(
        "s.yaml",
        &text.replace("rule: guarded, guard_band: 1 U", "rule: simple"),
    )
    .unwrap();
    let g = &run(&guarded, &config)[0].steps[2].checks[1];
    let s = &run(&simple, &config)[0].steps[2].checks[1];
    // The same readings either way.
    assert_eq!(g.samples, s.samples);
    assert_eq!(s.verdict, CheckVerdict::Pass);
    assert_eq!(s.verdict_words(), "pass, marginal");
    assert_eq!(g.verdict, CheckVerdict::Fail);
    assert_eq!(g.verdict_words(), "FAIL, marginal");
}

#[test]
fn no_load_and_starting_tests_follow_the_class_tables() {
    let plan = Plan::load(std::path::Path::new("test-plans/type-tests.yaml")).unwrap();
    // IEC 62053-21 class 1: Δt ≥ 600·10⁶ / (k·m·Un·Imax) min (constant from memory) with
    // k = 1000, m = 1, Un = 230 V, Imax = 16 A: 163.04 min; starting current 0.004 Ib = 20 mA.
    let Some(SpecialTest::NoLoad {
        minutes,
        allowance_wh,
        ..
    }) = &plan.steps[0].special
    else {
        panic!("a no-load step")
    };
    assert!((minutes - 163.043).abs() < 0.001);
    assert_eq!(*allowance_wh, 1.0);
    assert!(
        (plan.steps[0].load.voltage - 264.5).abs() < 1e-9,
        "115 % of 230 V"
    );
    assert!((plan.steps[1].load.current - 0.020).abs() < 1e-12);
    // The starting test's threshold (our rule): the register must advance by at least half
    // the energy 20 mA at 230 V delivers over the 10 min window, 0.5 · 230 · 0.020 · 600 / 3600
    // = 0.3833 Wh.
    let starting = &plan.steps[1].checks[0];
    assert_eq!(starting.quantity, meterproof::plan::Quantity::ActiveEnergy);
    match starting.tolerance {
        meterproof::plan::Tolerance::AtLeast { bound } => {
            assert!(
                (bound - 0.5 * 230.0 * 0.020 * 600.0 / 3600.0).abs() < 1e-12,
                "{bound}"
            )
        }
        ref t => panic!("{t:?}"),
    }

    let good = run(&plan, &SimConfig::new(3, 2));
    assert!(
        good.iter()
            .all(|r| r.verdict.status == UnitStatus::Accepted),
        "{:?}",
        good[0].verdict
    );

    // Meters whose firmware lets the register creep at no load fail the no-load test only.
    let creeping = run(
        &plan,
        &SimConfig {
            creep_fault: true,
            ..SimConfig::new(3, 2)
        },
    );
    for r in &creeping {
        let failed: Vec<&str> = r.failed_checks().map(|(s, _)| s.id.as_str()).collect();
        assert_eq!(failed, ["creep"], "{:?}", r.verdict);
    }
}

/// On a real clock every reading knows how long its transaction took, and an energy register's
/// budget carries the timing of its two ends: ± half of each transaction, at the window's mean
/// power, in quadrature (GUM 4.3.7, rectangular).
#[test]
fn a_registers_budget_carries_the_timing_of_its_readings() {
    let text = demo_text();
    let cut = text.find("steps:").unwrap();
    let plan = Plan::from_text(
        "energy.yaml",
        &format!(
            "{}steps:\n  - id: energy\n    load: {{ current: 16 A }}\n    settle: 1 s\n    samples: 3\n    interval: 1 s\n    checks:\n      - {{ quantity: active_energy, tolerance: {{ class: true }} }}\n",
            &text[..cut]
        ),
    )
    .unwrap();
    let config = SimConfig {
        plant_defect: false,
        ..SimConfig::new(3, 1)
    };
    let clock = std::sync::Arc::new(meterproof::bench::RealClock::scaled(50.0));
    let records = exec::run(
        &plan,
        &mut SimBench::with_clock(&config, clock).into_bench(),
        &ctx(),
        &mut Silent,
    );
    let check = &records[0].steps[0].checks[0];
    let (first, last) = (check.samples[0], check.samples[2]);
    assert!(first.took_s.is_some_and(|t| t > 0.0), "{first:?}");
    let budget = check.uncertainty.as_ref().unwrap();
    let timing = budget
        .components
        .iter()
        .find(|c| c.name == "timing of the register's two readings")
        .expect("a timing component");
    let a = (first.took_s.unwrap() / 2.0).hypot(last.took_s.unwrap() / 2.0);
    let advance = last.value - first.value;
    let reference = check.reference.unwrap();
    // In percent of the reference: 100 / reference × advance × a / span, over √3.
    let expected = 100.0 / reference * advance * a / (last.t_s - first.t_s) / 3f64.sqrt();
    assert!(
        (timing.u - expected).abs() <= 1e-9 * expected.max(1e-12),
        "{} against {expected}",
        timing.u
    );
}

/// Reads ±0.6 W in turn at no load (a meter whose power swings around zero), else passes
/// through.
struct Swinging {
    inner: Box<dyn meterproof::link::DutLink>,
    reads: usize,
}

impl meterproof::link::DutLink for Swinging {
    fn identify(&mut self) -> Result<meterproof::link::Identity, meterproof::link::LinkError> {
        self.inner.identify()
    }
    fn read(
        &mut self,
        q: meterproof::plan::Quantity,
        ch: &str,
    ) -> Result<f64, meterproof::link::LinkError> {
        let v = self.inner.read(q, ch)?;
        if q == meterproof::plan::Quantity::ActivePower && v.abs() < 1.0 {
            self.reads += 1;
            return Ok(if self.reads.is_multiple_of(2) {
                0.6
            } else {
                -0.6
            });
        }
        Ok(v)
    }
    fn describe(&self) -> String {
        "swinging".into()
    }
}

/// An upper bound holds for every reading: readings of ±0.6 W have a mean near zero and still
/// break a 0.5 W no-load bound (the bound as the plan states it; common practice, no published
/// source for applying it reading by reading).
#[test]
fn a_no_load_bound_holds_for_every_reading_not_the_mean() {
    let plan = Plan::from_text("demo.yaml", &demo_text()).unwrap();
    let mut config = SimConfig::new(1, 1);
    config.plant_defect = false;
    let mut bench = SimBench::new(&config).into_bench();
    let inner = std::mem::replace(
        &mut bench.positions[0].link,
        Box::new(meterproof::link::Unreachable::new(
            "x",
            meterproof::link::LinkError::Disconnected("x".into()),
        )),
    );
    bench.positions[0].link = Box::new(Swinging { inner, reads: 0 });
    let r = exec::run(&plan, &mut bench, &ctx(), &mut Silent).remove(0);
    let no_load = &r.steps[0];
    let power = no_load
        .checks
        .iter()
        .find(|c| c.quantity == meterproof::plan::Quantity::ActivePower)
        .unwrap();
    assert!(
        power.measured.unwrap().abs() < 0.5,
        "the mean alone would pass"
    );
    assert_eq!(power.verdict, CheckVerdict::Fail);
    assert!(
        power
            .note
            .as_deref()
            .unwrap()
            .contains("the largest in magnitude is 600 mW"),
        "{:?}",
        power.note
    );
    assert_eq!(r.verdict.status, UnitStatus::Rejected);
}

/// A step of one sample with a repeatability declared from earlier data: the declared spread
/// enters the budget as a Type B term (GUM 4.3.1) with its source, so U is not understated.
#[test]
fn a_declared_repeatability_enters_the_budget_of_a_single_sample() {
    let text = demo_text().replace(
        "    load: { current: 5 A }\n    checks:",
        "    load: { current: 5 A }\n    samples: 1\n    repeatability: { relative: 0.1 %, from: golden-unit study GU-12 }\n    checks:",
    );
    let plan = Plan::from_text("one.yaml", &text).unwrap();
    let records = run(&plan, &SimConfig::new(1, 1));
    let step = records[0]
        .steps
        .iter()
        .find(|s| s.id == "basic-Ib")
        .unwrap();
    let c = step
        .checks
        .iter()
        .find(|c| c.quantity.name() == "current")
        .unwrap();
    assert_eq!(c.samples.len(), 1);
    let b = c.uncertainty.as_ref().unwrap();
    let declared = b
        .components
        .iter()
        .find(|x| x.name == "repeatability of one reading, declared")
        .expect("the declared term");
    assert!(declared.basis.contains("GU-12"), "{}", declared.basis);
    // 0.1 % of the reading, as a percentage error: 0.1 (in %, times 100/r · r).
    assert!((declared.u - 0.1 * c.measured.unwrap() / c.reference.unwrap()).abs() < 1e-9);
    assert!(b.expanded >= 2.0 * declared.u);
}
