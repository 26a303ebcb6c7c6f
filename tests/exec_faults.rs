//! The step engine under link faults: an unfinished unit is never accepted, and no reading
//! already taken is lost.

mod common;
use common::ctx;

use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, Silent};
use meterproof::link::{DutLink, Identity, LinkError};
use meterproof::plan::{Plan, Quantity};
use meterproof::record::{StepStatus, UnitStatus};

/// Passes reads through to the wrapped link until `fail_after` reads, then fails every read.
struct Flaky {
    inner: Box<dyn DutLink>,
    reads: usize,
    fail_after: usize,
}

impl DutLink for Flaky {
    fn identify(&mut self) -> Result<Identity, LinkError> {
        self.inner.identify()
    }
    fn read(&mut self, q: Quantity, ch: &str) -> Result<f64, LinkError> {
        self.reads += 1;
        if self.reads > self.fail_after {
            return Err(LinkError::Timeout {
                request: format!("read {}", q.name()),
                timeout_ms: 200,
                attempts: 3,
            });
        }
        self.inner.read(q, ch)
    }
    fn describe(&self) -> String {
        "flaky".into()
    }
}

fn demo() -> Plan {
    Plan::from_text("demo.yaml", include_str!("../test-plans/demo.yaml")).unwrap()
}

#[test]
fn a_link_that_dies_mid_step_leaves_the_unit_incomplete_with_its_readings() {
    let plan = demo();
    let mut config = SimConfig::new(1, 3);
    config.plant_defect = false;
    let mut bench = SimBench::new(&config).into_bench();
    // No-load step: 5 samples × 2 quantities = 10 reads; step 2 reads 2 per sample.
    // Failing after 13 reads dies in sample 2 of step 2 (its 2nd quantity).
    let inner = std::mem::replace(&mut bench.positions[1].link, Box::new(Silent2));
    bench.positions[1].link = Box::new(Flaky {
        inner,
        reads: 0,
        fail_after: 13,
    });
    let records = exec::run(&plan, &mut bench, &ctx(), &mut Silent);
    let broken = &records[1];
    assert_eq!(broken.verdict.status, UnitStatus::Incomplete);
    assert_eq!(broken.steps[0].status, StepStatus::Done);
    let step = &broken.steps[1];
    assert_eq!(step.status, StepStatus::Incomplete);
    assert!(
        step.reason.as_deref().unwrap().contains("sample 2 of 8"),
        "{:?}",
        step.reason
    );
    // Readings taken before the fault are kept: 2 currents and 1 power.
    assert_eq!(step.checks[0].samples.len(), 2);
    assert_eq!(step.checks[1].samples.len(), 1);
    assert!(
        step.checks[0].evaluation.is_none(),
        "a partial series is not decided on"
    );
    // The later steps were attempted and failed too, each with its reason.
    assert!(
        broken.steps[2..]
            .iter()
            .all(|s| s.status == StepStatus::Incomplete)
    );
    assert!(
        broken
            .verdict
            .reasons
            .iter()
            .any(|r| r.starts_with("step low-0.1Ib"))
    );
    // The other positions were not held up.
    for r in [&records[0], &records[2]] {
        assert_eq!(r.verdict.status, UnitStatus::Accepted, "{:?}", r.verdict);
    }
}

#[test]
fn a_unit_that_cannot_be_identified_is_not_tested() {
    let plan = demo();
    let mut bench = SimBench::new(&SimConfig::new(1, 2)).into_bench();
    bench.positions[0].link = Box::new(Silent2);
    let records = exec::run(&plan, &mut bench, &ctx(), &mut Silent);
    assert_eq!(records[0].verdict.status, UnitStatus::Incomplete);
    assert!(records[0].steps.is_empty());
    assert!(records[0].verdict.reasons[0].contains("could not identify"));
    assert_eq!(records[0].serial, "position-1-unidentified");
}

#[test]
fn a_serial_that_differs_from_the_one_given_stops_the_unit() {
    let plan = demo();
    let mut bench = SimBench::new(&SimConfig::new(1, 2)).into_bench();
    bench.positions[0].expected_serial = Some("SCANNED-1".into());
    let records = exec::run(&plan, &mut bench, &ctx(), &mut Silent);
    assert_eq!(records[0].verdict.status, UnitStatus::Incomplete);
    assert!(records[0].verdict.reasons[0].contains("was given serial SCANNED-1"));
}

/// A link that never answers.
struct Silent2;

impl DutLink for Silent2 {
    fn identify(&mut self) -> Result<Identity, LinkError> {
        Err(LinkError::Disconnected("port vanished".into()))
    }
    fn read(&mut self, _: Quantity, _: &str) -> Result<f64, LinkError> {
        Err(LinkError::Disconnected("port vanished".into()))
    }
    fn describe(&self) -> String {
        "silent".into()
    }
}
