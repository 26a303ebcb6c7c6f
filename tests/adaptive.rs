//! Settling until stable and sampling until decided.

mod common;
use common::ctx;
use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, Silent};
use meterproof::plan::Plan;

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

#[test]
fn a_unit_that_never_settles_is_waited_for_until_the_maximum_and_says_so() {
    let plan = adaptive();
    // A time constant of 20 s: nothing is stable within the rule's 4 s.
    let records = exec::run(
        &plan,
        &mut SimBench::new(&config(20.0)).into_bench(),
        &ctx(),
        &mut Silent,
    );
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
    let records = exec::run(
        &plan,
        &mut SimBench::new(&config(0.001)).into_bench(),
        &ctx(),
        &mut Silent,
    );
    let step = &records[0].steps[2];
    assert_eq!(step.settled, Some(true));
    // Four readings 150 ms apart fill the window at 0.45 s; the rule's minimum is 0.5 s.
    let t = step.settle_actual_s.unwrap();
    assert!((0.5..=0.61).contains(&t), "{t}");
}

#[test]
fn clear_decisions_stop_sampling_at_the_minimum_and_doubtful_ones_take_the_maximum() {
    let plan = adaptive();
    let records = exec::run(
        &plan,
        &mut SimBench::new(&config(0.2)).into_bench(),
        &ctx(),
        &mut Silent,
    );
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
    let records = exec::run(
        &tight,
        &mut SimBench::new(&config(0.2)).into_bench(),
        &ctx(),
        &mut Silent,
    );
    assert_eq!(records[0].steps[2].checks[0].samples.len(), 8);
}

#[test]
fn adaptive_rules_are_checked_in_the_plan() {
    let text = std::fs::read_to_string("test-plans/demo-adaptive.yaml").unwrap();
    let energy = text.replace(
        "    samples: 11\n    interval: 1 s\n",
        "    samples_until_decided: { min: 3, max: 11 }\n    interval: 1 s\n",
    );
    let e = Plan::from_text("e.yaml", &energy).unwrap_err().to_string();
    assert!(
        e.contains("an energy register needs its whole window"),
        "{e}"
    );
    let both = text.replace(
        "    settle: 2 s\n",
        "    settle: 2 s\n    settle_until: { stable_within: 1 %, at_most: 3 s }\n",
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
