//! Settling until stable and sampling until decided.

mod common;
use common::ctx;
use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, Silent};
use meterproof::plan::{Plan, Quantity};

fn adaptive() -> Plan {
    Plan::load(std::path::Path::new("test-plans/demo-adaptive.yaml")).unwrap()
}

fn config(tau_s: f64) -> SimConfig {
    SimConfig {
        plant_defect: false,
        tau_range_s: (tau_s, tau_s),
        ..SimConfig::new(4, 2)
    }
}

/// Runs a plan on two simulated meters that settle with time constant `tau_s`.
fn run_at(plan: &Plan, tau_s: f64) -> Vec<meterproof::record::UnitRecord> {
    exec::run(
        plan,
        &mut SimBench::new(&config(tau_s)).into_bench(),
        &ctx(),
        &mut Silent,
    )
}

#[test]
fn a_unit_that_never_settles_is_waited_for_until_the_maximum_and_says_so() {
    let plan = adaptive();
    // A time constant of 20 s: nothing is stable within the rule's 4 s.
    let records = run_at(&plan, 20.0);
    let step = &records[0].steps[2]; // basic-Ib, settled by the defaults' rule
    assert_eq!(step.settled, Some(false));
    assert!(
        (step.settle_actual_s.unwrap() - 4.0).abs() < 1e-9,
        "{:?}",
        step.settle_actual_s
    );
}

#[test]
fn a_unit_that_settles_at_once_waits_only_the_minimum_and_a_full_window() {
    let plan = adaptive();
    let records = run_at(&plan, 0.001);
    let step = &records[0].steps[2];
    assert_eq!(step.settled, Some(true));
    // Four readings 150 ms apart fill the window at 0.45 s; the rule's minimum is 0.5 s. The
    // readings' own noise (about 0.04 %) spreads a window of four beyond the 0.15 % band now
    // and then, which costs a reading or two of 150 ms, not the 4 s maximum.
    let t = step.settle_actual_s.unwrap();
    assert!((0.5..=0.8).contains(&t), "{t}");
}

#[test]
fn clear_decisions_stop_sampling_at_the_minimum_and_doubtful_ones_take_the_maximum() {
    let plan = adaptive();
    let records = run_at(&plan, 0.2);
    assert_eq!(records.len(), 2, "two simulated meters");
    for r in &records {
        for s in &r.steps {
            let n = s.checks[0].samples.len() as u32;
            match plan.steps.iter().find(|p| p.id == s.id).unwrap().sequential {
                Some(rule) => {
                    assert!((rule.min..=rule.max).contains(&n), "{}: {n}", s.id);
                    // Stopped early only when every decision was clear of its limits.
                    if n < rule.max {
                        for c in &s.checks {
                            let e = c.evaluation.as_ref().unwrap();
                            let d = c.decision.as_ref().unwrap();
                            assert!(
                                meterproof::metrology::decision::settled(e, d),
                                "{} {:?}",
                                s.id,
                                c.quantity
                            );
                        }
                    }
                    assert!(
                        s.sampling_note
                            .as_deref()
                            .unwrap()
                            .contains(&format!("{n} samples"))
                    );
                }
                None => assert_eq!(n, s.samples_planned),
            }
        }
    }
    // The demo's basic-Ib step is far from its limits on a good unit: it stops early.
    assert!(records[0].steps[2].checks[0].samples.len() < 8);
    // A tolerance right at the measured error leaves the decision in doubt: every sample
    // allowed is taken.
    let e = records[0].steps[2].checks[0]
        .evaluation
        .as_ref()
        .unwrap()
        .error
        .abs();
    let text = std::fs::read_to_string("test-plans/demo-adaptive.yaml")
        .unwrap()
        .replace(
            "      - { quantity: voltage, tolerance: { percent: 0.5 % } }",
            &format!("      - {{ quantity: voltage, tolerance: {{ percent: {e} % }} }}"),
        );
    let tight = Plan::from_text("tight.yaml", &text).unwrap();
    let records = run_at(&tight, 0.2);
    assert_eq!(records[0].steps[2].checks[0].samples.len(), 8);
    // Under simple acceptance the acceptance limit is the tolerance itself: a reading at the
    // acceptance limit is in doubt the same way.
    let simple = text.replace(
        "decision: { rule: guarded, guard_band: 1 U }",
        "decision: { rule: simple }",
    );
    assert_ne!(simple, text);
    let simple = Plan::from_text("simple.yaml", &simple).unwrap();
    let records = run_at(&simple, 0.2);
    let voltage = &records[0].steps[2].checks[0];
    let d = voltage.decision.as_ref().unwrap();
    assert_eq!(d.acceptance_limit, d.tolerance_limit);
    assert_eq!(voltage.samples.len(), 8);
}

/// The active energy and active power errors of one unit's step, and their U.
fn energy_and_power(step: &meterproof::record::StepRecord) -> ((f64, f64), (f64, f64)) {
    let of = |q: Quantity| {
        let c = step.checks.iter().find(|c| c.quantity == q).unwrap();
        (
            c.evaluation.as_ref().unwrap().error,
            c.uncertainty.as_ref().unwrap().expanded,
        )
    };
    (of(Quantity::ActiveEnergy), of(Quantity::ActivePower))
}

/// Under a steady load a register integrates the power the meter measures, so its error equals
/// the power reading's (E = P·t; common practice, no published source): whether the register's
/// window was cut short or ran to its maximum, the two agree within their uncertainties.
#[test]
fn an_energy_register_sampled_until_decided_agrees_with_the_power_reading() {
    let plan = adaptive();
    let imax = plan.steps.iter().position(|s| s.id == "max-Imax").unwrap();
    let run = |plan: &Plan| run_at(plan, 0.2);
    let agree = |step: &meterproof::record::StepRecord| {
        let ((e_energy, u_energy), (e_power, u_power)) = energy_and_power(step);
        assert!(
            (e_energy - e_power).abs() <= u_energy.hypot(u_power),
            "energy {e_energy} ± {u_energy} %, power {e_power} ± {u_power} %"
        );
    };
    // Good units far from the class limit: the register's window is cut short.
    let early = run(&plan);
    for r in &early {
        let step = &r.steps[imax];
        let energy = step
            .checks
            .iter()
            .find(|c| c.quantity == Quantity::ActiveEnergy)
            .unwrap();
        assert!(energy.samples.len() < 11, "{:?}", step.sampling_note);
        agree(step);
    }
    // A power tolerance right at the measured error keeps the step sampling to its maximum:
    // the reference, read at the minimum, must then be scaled to the register's whole span.
    let (_, (e_power, _)) = energy_and_power(&early[0].steps[imax]);
    let text = std::fs::read_to_string("test-plans/demo-adaptive.yaml")
        .unwrap()
        .replace(
            "      - { quantity: current, tolerance: { percent: 0.5 % } }\n      - { quantity: active_power, tolerance: { class: true } }\n      - { quantity: active_energy",
            &format!("      - {{ quantity: current, tolerance: {{ percent: 0.5 % }} }}\n      - {{ quantity: active_power, tolerance: {{ percent: {} % }} }}\n      - {{ quantity: active_energy", e_power.abs()),
        );
    let tight = Plan::from_text("tight.yaml", &text).unwrap();
    let full = run(&tight);
    let step = &full[0].steps[imax];
    assert_eq!(step.checks[2].samples.len(), 11, "{:?}", step.sampling_note);
    agree(step);
}

#[test]
fn a_special_test_keeps_the_standards_duration() {
    let text = std::fs::read_to_string("test-plans/type-tests.yaml").unwrap();
    // Defaults that sample until decided do not shorten the no-load test.
    let with_defaults = text.replace(
        "steps:\n",
        "defaults:\n  samples_until_decided: { min: 3, max: 8 }\nsteps:\n",
    );
    let plan = Plan::from_text("d.yaml", &with_defaults).unwrap();
    let creep = &plan.steps[0];
    assert_eq!(creep.sequential, None);
    assert_eq!(creep.samples, 2);
    assert_eq!(
        creep.interval_s,
        Plan::from_text("t.yaml", &text).unwrap().steps[0].interval_s
    );
    let explicit = text.replace(
        "    special: no_load\n",
        "    special: no_load\n    samples_until_decided: { min: 2, max: 4 }\n",
    );
    let e = Plan::from_text("e.yaml", &explicit)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("steps[1].samples_until_decided")
            && e.contains("a special test takes its whole duration from the standard"),
        "{e}"
    );
}

#[test]
fn adaptive_rules_are_checked_in_the_plan() {
    let text = std::fs::read_to_string("test-plans/demo-adaptive.yaml").unwrap();
    let both = text.replace(
        "    settle_until: { stable_within: 2 mA",
        "    settle: 2 s\n    settle_until: { stable_within: 2 mA",
    );
    let e = Plan::from_text("b.yaml", &both).unwrap_err().to_string();
    assert!(e.contains("give settle or settle_until, not both"), "{e}");
    let bad = text.replace(
        "samples_until_decided: { min: 3, max: 8 }",
        "samples_until_decided: { min: 9, max: 8 }",
    );
    let e = Plan::from_text("m.yaml", &bad).unwrap_err().to_string();
    assert!(e.contains("max at least min"), "{e}");
}

/// A reference that answers only after a pause, as an operator typing a reading does.
struct Unhurried(Box<dyn meterproof::bench::ReferenceMeter>);

impl meterproof::bench::ReferenceMeter for Unhurried {
    fn read(
        &mut self,
        request: &meterproof::bench::ReferenceRequest,
    ) -> Result<meterproof::bench::ReferenceReading, meterproof::bench::BenchError> {
        std::thread::sleep(std::time::Duration::from_millis(400));
        self.0.read(request)
    }
}

/// Sampling until decided reads the reference once the minimum is taken; when that takes a
/// while (here 4 intervals), the samples after it keep their spacing instead of being taken
/// back to back to catch up with the schedule. Real clock; the assertion is on spacing, which a
/// loaded machine can only widen.
#[test]
fn samples_after_a_slow_reference_keep_their_spacing() {
    let text = |tolerance: &str| {
        let demo = std::fs::read_to_string("test-plans/demo.yaml").unwrap();
        let cut = demo.find("steps:").unwrap();
        format!(
            "{}steps:\n  - id: paced\n    load: {{ current: 5 A }}\n    settle: 500 ms\n    samples_until_decided: {{ min: 3, max: 6 }}\n    interval: 100 ms\n    checks:\n      - {{ quantity: current, tolerance: {tolerance} }}\n",
            &demo[..cut]
        )
    };
    let run = |plan: &Plan| {
        let config = SimConfig {
            tau_range_s: (0.01, 0.01),
            ..config(0.01)
        };
        let sim = SimBench::with_clock(
            &config,
            std::sync::Arc::new(meterproof::bench::RealClock::default()),
        );
        let (_, reference) = sim.instruments();
        let mut bench = sim.into_bench();
        bench.reference = Box::new(Unhurried(reference));
        exec::run(plan, &mut bench, &ctx(), &mut Silent)
    };
    // A tolerance equal to the unit's error leaves the decision in doubt to the last sample.
    let first = run(&Plan::from_text("p.yaml", &text("{ percent: 0.5 % }")).unwrap());
    let e = first[0].steps[0].checks[0]
        .evaluation
        .as_ref()
        .unwrap()
        .error;
    let doubtful =
        Plan::from_text("d.yaml", &text(&format!("{{ percent: {} % }}", e.abs()))).unwrap();
    let records = run(&doubtful);
    let samples = &records[0].steps[0].checks[0].samples;
    assert_eq!(samples.len(), 6, "{:?}", records[0].steps[0].sampling_note);
    for pair in samples.windows(2) {
        let gap = pair[1].t_s - pair[0].t_s;
        assert!(gap > 0.05, "samples {gap:.3} s apart: {samples:?}");
    }
    // The reference's pause lies between the third and the fourth sample.
    assert!(samples[3].t_s - samples[2].t_s >= 0.4);
}

/// The unit report and its CSV say how long each step settled, whether it was stable, and how
/// many samples it took under which rule.
#[test]
fn reports_show_the_settle_time_and_the_samples_taken() {
    let plan = adaptive();
    let templates = meterproof::report::Templates::load(None).unwrap();
    let settles_slowly = run_at(&plan, 20.0);
    let html = templates.unit_html(&settles_slowly[0], None).unwrap();
    assert!(
        html.contains("not stable within 4.00 s: sampled at the maximum"),
        "{html}"
    );
    // The lot summary counts the steps that did not settle and shares the bench time.
    let unsettled = settles_slowly
        .iter()
        .flat_map(|r| &r.steps)
        .filter(|s| s.settled == Some(false))
        .count();
    assert!(unsettled > 0);
    let lot =
        meterproof::report::summary::LotSummary::of("lot", &settles_slowly, &|_| String::new());
    assert_eq!(lot.unsettled_steps, unsettled);
    assert_eq!(
        lot.bench_time_per_unit_s,
        Some(settles_slowly[0].bench_time_s / 2.0)
    );
    let html = templates.lot_html(&lot).unwrap();
    assert!(
        html.contains(&format!(
            "{unsettled} steps did not settle within the plan's maximum"
        )),
        "{html}"
    );
    let settles = run_at(&plan, 0.2);
    let record = &settles[0];
    let html = templates.unit_html(record, None).unwrap();
    let step = &record.steps[2];
    let shown = format!(
        "settled in {:.2} s (until stable); {}",
        step.settle_actual_s.unwrap(),
        step.sampling_note.as_deref().unwrap()
    );
    assert!(html.contains(&shown), "{shown}\n{html}");
    let csv = meterproof::report::unit_csv(record).unwrap();
    let mut reader = csv::Reader::from_reader(csv.as_slice());
    let headers = reader.headers().unwrap().clone();
    let column = |name: &str| headers.iter().position(|h| h == name).unwrap();
    let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
    let row = rows.iter().find(|r| &r[1] == "basic-Ib").unwrap();
    assert_eq!(
        row[column("settle_s")].parse::<f64>().unwrap(),
        step.settle_actual_s.unwrap()
    );
    assert_eq!(&row[column("settled")], "true");
    assert_eq!(
        row[column("samples")].parse::<usize>().unwrap(),
        step.checks[0].samples.len()
    );
}
