//! From a check's samples and reference to its verdict, and from the steps to the unit's.

use crate::bench::ReferenceReading;
use crate::metrology::{Summary, evaluate};
use crate::plan::{Check, Step};
use crate::record::{CheckRecord, CheckVerdict, StepRecord, StepStatus, UnitStatus, UnitVerdict};

/// Fills in the statistics, error and verdict of one check.
pub(super) fn evaluate_check(
    check: &Check,
    record: &mut CheckRecord,
    step: &Step,
    reference: Option<Result<ReferenceReading, String>>,
    window: (f64, f64),
) {
    let values: Vec<f64> = record.samples.iter().map(|s| s.value).collect();
    // The spread of a register's contents says nothing; its advance is the measurement.
    record.summary = if check.quantity.is_register() {
        None
    } else {
        Summary::of(&values)
    };
    record.measured = if check.quantity.is_register() {
        // The register's advance over the window: all of its samples must be there.
        (values.len() == step.samples as usize && values.len() >= 2)
            .then(|| values[values.len() - 1] - values[0])
    } else {
        // A partial series is kept in the record but not decided on.
        (values.len() == step.samples as usize)
            .then(|| record.summary.map(|s| s.mean))
            .flatten()
    };
    let Some(measured) = record.measured else {
        record.note = Some(format!(
            "{} of {} samples taken: not evaluated",
            values.len(),
            step.samples
        ));
        return;
    };
    let reference_value = match reference {
        None => None,
        Some(Ok(r)) if check.quantity.is_register() => {
            Some(r.value * register_share(&record.samples, window))
        }
        Some(Ok(r)) => Some(r.value),
        Some(Err(e)) => {
            record.note = Some(format!("no reference: {e}"));
            return;
        }
    };
    record.reference = reference_value;
    match evaluate(
        &check.tolerance,
        measured,
        reference_value,
        check.quantity.unit(),
    ) {
        Ok(e) => {
            record.verdict = if e.within {
                CheckVerdict::Pass
            } else {
                CheckVerdict::Fail
            };
            record.evaluation = Some(e);
        }
        Err(e) => record.note = Some(e.to_string()),
    }
}

/// The share of the reference's window that a unit's register readings span. The reference
/// energy is for the whole window; a unit whose first or last reading came late (a retry) saw
/// less of it. The load is steady after settling, so energy scales with time.
fn register_share(samples: &[crate::record::Sample], window: (f64, f64)) -> f64 {
    let span = window.1 - window.0;
    match (samples.first(), samples.last()) {
        (Some(a), Some(b)) if span > 0.0 => (b.t_s - a.t_s) / span,
        _ => 1.0,
    }
}

/// The unit's verdict from its steps: any failed check rejects it; otherwise any step not done
/// (or check not evaluated) leaves it incomplete; only a unit with every step done and every
/// check within its limit is accepted.
pub(super) fn unit_verdict(steps: &[StepRecord]) -> UnitVerdict {
    let mut reasons = Vec::new();
    let mut failed = false;
    let mut unfinished = false;
    for step in steps {
        if step.status != StepStatus::Done {
            unfinished = true;
            reasons.push(format!(
                "step {}: {}",
                step.id,
                step.reason.as_deref().unwrap_or("not done")
            ));
        }
        for c in &step.checks {
            match c.verdict {
                CheckVerdict::Fail => {
                    failed = true;
                    if let Some(e) = &c.evaluation {
                        reasons.push(format!(
                            "step {}: {} on {} is {:+.4} {}, outside ±{:.4} {}",
                            step.id,
                            c.quantity.name(),
                            c.channel,
                            e.error,
                            e.error_unit,
                            e.limit,
                            e.error_unit
                        ));
                    }
                }
                CheckVerdict::NotEvaluated if step.status == StepStatus::Done => {
                    unfinished = true;
                    reasons.push(format!(
                        "step {}: {} on {} not evaluated: {}",
                        step.id,
                        c.quantity.name(),
                        c.channel,
                        c.note.as_deref().unwrap_or("no data")
                    ));
                }
                _ => {}
            }
        }
    }
    let status = if failed {
        UnitStatus::Rejected
    } else if unfinished || steps.is_empty() {
        UnitStatus::Incomplete
    } else {
        UnitStatus::Accepted
    };
    UnitVerdict { status, reasons }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::record::Sample;

    #[test]
    fn a_register_read_late_covers_less_of_the_window() {
        let s = |t_s| Sample { t_s, value: 0.0 };
        assert_eq!(register_share(&[s(1.0), s(6.0)], (0.0, 10.0)), 0.5);
        assert_eq!(register_share(&[s(0.0), s(10.0)], (0.0, 10.0)), 1.0);
        assert_eq!(register_share(&[], (0.0, 10.0)), 1.0);
    }
}
