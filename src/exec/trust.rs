//! Whether a step's results may be trusted at all, before any unit is judged on them: the load
//! must be the one the plan asked for, and the reference must not be the odd one out.
//!
//! A source that never got its set-point (a typo in a station command, a blown lamp) makes
//! every unit read what really flowed, and the reference agrees with them: without this check
//! they would be accepted at a load never applied. A reference read on the wrong range, or
//! typed ten times too large, makes every unit fail by the same amount: without the second
//! check a whole batch would be rejected for the reference's fault. Either way the step is
//! INCOMPLETE for every unit, with the reason, and no check of it counts.

use crate::bench::{LOAD_QUANTITIES, ReferenceMeter, ReferenceRequest};
use crate::plan::units::Display;
use crate::plan::{Quantity, Step};
use crate::record::{CheckVerdict, ReferenceRecord, StepRecord, StepStatus};

use super::step::References;

/// How far the load is from the plan's, where the reference shows it: the readings used (those
/// read only for this are returned, to be recorded) and the first quantity beyond
/// `step.load_within`, as the reason to give.
pub(super) fn confirm_load(
    step: &Step,
    reference: &mut dyn ReferenceMeter,
    references: &References,
    window: (f64, f64),
    base_current: f64,
) -> (Vec<ReferenceRecord>, Option<String>) {
    let mut extra = Vec::new();
    let mut problem = None;
    let own = reference.load_quantities();
    let current_nominal = step.load.current;
    for q in LOAD_QUANTITIES {
        // Power factor says nothing while no current flows.
        if q == Quantity::PowerFactor && current_nominal == 0.0 {
            continue;
        }
        let taken = references
            .iter()
            .find(|(k, _)| *k == q)
            .and_then(|(_, r)| r.as_ref().ok())
            .map(|r| r.value);
        let value = match taken {
            Some(v) => v,
            None if own.contains(&q) => {
                let request = ReferenceRequest {
                    step_id: &step.id,
                    quantity: q,
                    load: &step.load,
                    window,
                };
                match reference.read_load(&request) {
                    Ok(r) => {
                        let v = r.value;
                        extra.push(ReferenceRecord {
                            quantity: q,
                            reading: r,
                        });
                        v
                    }
                    Err(e) => {
                        problem.get_or_insert(format!(
                            "load not confirmed: the reference could not read the {}: {e}",
                            q.name().replace('_', " ")
                        ));
                        continue;
                    }
                }
            }
            None => continue,
        };
        let nominal = step.load.nominal(q, window.1 - window.0);
        if problem.is_none()
            && let Some(text) = off_plan(q, value, nominal, step.load_within, base_current)
        {
            problem = Some(text);
        }
    }
    (extra, problem)
}

/// "load not as planned: ..." when `value` is further from `nominal` than `within` allows.
fn off_plan(
    q: Quantity,
    value: f64,
    nominal: f64,
    within: f64,
    base_current: f64,
) -> Option<String> {
    let dim = q.dimension();
    let ok = match q {
        // A power factor is compared in its own terms: 5 % is ±0.05.
        Quantity::PowerFactor => (value - nominal).abs() <= within,
        // No current asked for: it must stay below that share of the meter's base current.
        Quantity::Current if nominal == 0.0 => value.abs() <= within * base_current,
        _ => nominal != 0.0 && ((value - nominal) / nominal).abs() <= within,
    };
    (!ok).then(|| {
        format!(
            "load not as planned: the reference reads {} {}, the plan {} (allowed ±{} %)",
            q.name().replace('_', " "),
            Display(value, dim),
            Display(nominal, dim),
            within * 100.0
        )
    })
}

/// Marks a step record as not to be judged: incomplete, with the reason, every check not
/// evaluated (its figures stay in the record for whoever investigates).
pub(super) fn set_aside(record: &mut StepRecord, reason: &str) {
    record.status = StepStatus::Incomplete;
    record.reason = Some(reason.to_string());
    for c in &mut record.checks {
        if c.verdict != CheckVerdict::NotEvaluated {
            c.verdict = CheckVerdict::NotEvaluated;
            c.note = Some(format!("not counted: {reason}"));
        }
    }
}

/// The fewest positions from which a common error is taken for the reference's.
pub const SUSPECT_REFERENCE_MIN_UNITS: usize = 3;

/// Whether every position fails one check by about the same amount (all beyond the limit, on
/// the same side, spread within a quarter of the mean error), from at least
/// [`SUSPECT_REFERENCE_MIN_UNITS`] positions: more likely the reference than the units.
/// Returns the reason to give.
pub(super) fn suspect_reference(records: &[&StepRecord]) -> Option<String> {
    if records.len() < SUSPECT_REFERENCE_MIN_UNITS {
        return None;
    }
    let checks = records.first()?.checks.len();
    for i in 0..checks {
        let errors: Vec<(f64, String)> = records
            .iter()
            .filter_map(|r| r.checks.get(i))
            .filter(|c| c.verdict == CheckVerdict::Fail && c.reference.is_some())
            .filter_map(|c| {
                c.evaluation.as_ref().map(|e| {
                    (
                        e.error,
                        format!("{} ({})", c.quantity.name().replace('_', " "), e.error_unit),
                    )
                })
            })
            .collect();
        if errors.len() != records.len() {
            continue;
        }
        let mean = errors.iter().map(|(e, _)| e).sum::<f64>() / errors.len() as f64;
        let same_side = errors.iter().all(|(e, _)| e.signum() == mean.signum());
        let (lo, hi) = errors
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), (e, _)| {
                (lo.min(*e), hi.max(*e))
            });
        if same_side && mean != 0.0 && hi - lo <= 0.25 * mean.abs() {
            return Some(format!(
                "suspected reference fault: every position fails {} by about the same error, {mean:+.3} (from {lo:+.3} to {hi:+.3}); check the reference's range, wiring and entry before the units; no unit was judged on this step",
                errors[0].1
            ));
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    // The bands here are the plan's own arithmetic (a share of the nominal): common practice, no
    // published source.
    #[test]
    fn a_load_off_its_set_point_is_named_with_both_figures() {
        // The case seen on a bench: a station command never set 16 A, and 5 A flowed.
        let text = off_plan(Quantity::Current, 4.998, 16.0, 0.05, 5.0).unwrap();
        assert!(text.contains("4.998 A") && text.contains("16 A"), "{text}");
        assert!(off_plan(Quantity::Current, 15.3, 16.0, 0.05, 5.0).is_none());
        // 5 % of 16 A is 0.8 A: 15.21 A is inside, 15.19 A beyond it.
        assert!(off_plan(Quantity::Current, 15.21, 16.0, 0.05, 5.0).is_none());
        assert!(off_plan(Quantity::Current, 15.19, 16.0, 0.05, 5.0).is_some());
    }

    /// A no-load step allows 5 % of Ib (0.25 A at Ib 5 A) and a power factor is held to 0.05
    /// absolute: the plan's own bounds (common practice, no published source).
    #[test]
    fn no_load_must_be_no_load_and_power_factor_is_compared_absolutely() {
        assert!(off_plan(Quantity::Current, 0.2, 0.0, 0.05, 5.0).is_none());
        assert!(off_plan(Quantity::Current, 0.3, 0.0, 0.05, 5.0).is_some());
        assert!(off_plan(Quantity::PowerFactor, 0.54, 0.5, 0.05, 5.0).is_none());
        assert!(off_plan(Quantity::PowerFactor, 1.0, 0.5, 0.05, 5.0).is_some());
    }
}
