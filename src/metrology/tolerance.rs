//! Errors against the reference and their comparison with a plan's tolerance.
//!
//! Percentage error e = (E_meter − E_ref) / E_ref × 100, positive when the meter reads high
//! (IEC 62053-21:2003, 3.5; the same definition in IEC 62052-11 and EN 50470-1).

use serde::{Deserialize, Serialize};

/// How far a reading may be from the reference.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Tolerance {
    /// ± percent of the reference value.
    PercentOfReading { percent: f64 },
    /// ± (percent of the reference value + an absolute term in the quantity's unit).
    PercentPlusAbsolute { percent: f64, absolute: f64 },
    /// ± (percent of the reference value + percent of a range).
    PercentPlusRange {
        percent: f64,
        range_percent: f64,
        range: f64,
    },
    /// ± an absolute band around the reference, in the quantity's unit.
    Band { half_width: f64 },
    /// The magnitude of the reading is at most this, in the quantity's unit (no-load steps).
    AtMost { bound: f64 },
    /// ± the accuracy class's limit at this step's load, looked up in the class tables.
    Class { percent: f64, basis: String },
    /// The magnitude of the reading is at least this (a register that must advance).
    AtLeast { bound: f64 },
}

impl Tolerance {
    /// Whether the limit is relative to the reference, so that a zero reference is meaningless.
    pub fn is_relative(&self) -> bool {
        matches!(
            self,
            Tolerance::PercentOfReading { .. }
                | Tolerance::PercentPlusAbsolute { .. }
                | Tolerance::PercentPlusRange { .. }
                | Tolerance::Class { .. }
        )
    }

    pub fn needs_reference(&self) -> bool {
        !self.is_bound()
    }

    /// A bound on the reading itself (at most, at least), not on its error.
    pub fn is_bound(&self) -> bool {
        matches!(self, Tolerance::AtMost { .. } | Tolerance::AtLeast { .. })
    }
}

/// The error of a reading, in the form its tolerance is stated in, and the limit it is held to.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Evaluation {
    /// The measured error: in percent for relative tolerances, in the quantity's unit for bands,
    /// the reading's magnitude for upper bounds.
    pub error: f64,
    /// `"%"` or the quantity's unit.
    pub error_unit: String,
    /// The tolerance limit, same unit as `error`: a half-width (±limit), an upper bound or a
    /// lower bound, as `sense` says.
    pub limit: f64,
    pub sense: Sense,
    /// Whether the error lies within the tolerance limit (the limit itself included).
    pub within: bool,
}

/// Which side of its limit an error must lie on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Sense {
    /// |error| ≤ limit.
    PlusMinus,
    /// |reading| ≤ limit.
    AtMost,
    /// |reading| ≥ limit.
    AtLeast,
}

/// Why an error could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EvaluationError {
    #[error("the reference reading is zero, so a percent-of-reading error is undefined")]
    ZeroReference,
    #[error("this tolerance needs a reference reading, and there is none")]
    NoReference,
}

/// Percentage error of `measured` against `reference`.
pub fn percent_error(measured: f64, reference: f64) -> Result<f64, EvaluationError> {
    if reference == 0.0 {
        return Err(EvaluationError::ZeroReference);
    }
    Ok((measured - reference) / reference * 100.0)
}

/// Compares `measured` with `reference` under `tolerance`; `unit` is the quantity's unit.
pub fn evaluate(
    tolerance: &Tolerance,
    measured: f64,
    reference: Option<f64>,
    unit: &str,
) -> Result<Evaluation, EvaluationError> {
    let relative = |limit_for: &dyn Fn(f64) -> f64| -> Result<Evaluation, EvaluationError> {
        let r = reference.ok_or(EvaluationError::NoReference)?;
        let error = percent_error(measured, r)?;
        let limit = limit_for(r);
        Ok(Evaluation {
            error,
            error_unit: "%".into(),
            limit,
            sense: Sense::PlusMinus,
            within: error.abs() <= limit,
        })
    };
    match tolerance.clone() {
        Tolerance::PercentOfReading { percent } => relative(&|_| percent),
        // An absolute term a is a percentage 100·a/|ref| of this reading.
        Tolerance::PercentPlusAbsolute { percent, absolute } => {
            relative(&|r| percent + absolute / r.abs() * 100.0)
        }
        Tolerance::PercentPlusRange {
            percent,
            range_percent,
            range,
        } => relative(&|r| percent + range_percent * range / r.abs()),
        Tolerance::Band { half_width } => {
            let r = reference.ok_or(EvaluationError::NoReference)?;
            let error = measured - r;
            Ok(Evaluation {
                error,
                error_unit: unit.into(),
                limit: half_width,
                sense: Sense::PlusMinus,
                within: error.abs() <= half_width,
            })
        }
        // A no-load reading of −0.4 W is as far from nothing as +0.4 W.
        Tolerance::AtMost { bound } => Ok(Evaluation {
            error: measured.abs(),
            error_unit: unit.into(),
            limit: bound,
            sense: Sense::AtMost,
            within: measured.abs() <= bound,
        }),
        // Signed: a register that must advance fails when it runs backwards, however far.
        Tolerance::AtLeast { bound } => Ok(Evaluation {
            error: measured,
            error_unit: unit.into(),
            limit: bound,
            sense: Sense::AtLeast,
            within: measured >= bound,
        }),
        Tolerance::Class { percent, .. } => relative(&|_| percent),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Check value computed from the published percentage-error and pulse formulas
    /// (IEC 62053-21 3.5; E = N / k): k = 3200 imp/kWh, N = 640 pulses, E_ref = 0.195 kWh
    /// → E_meter = 0.2 kWh, e = +2.564 %.
    #[test]
    fn percentage_error_of_a_pulse_count() {
        let measured_kwh = 640.0 / 3200.0;
        let e = percent_error(measured_kwh, 0.195).unwrap();
        assert!((e - 2.564).abs() < 0.0005, "{e}");
    }

    /// IEC 62053-21:2003, 3.5 (from memory): the error is positive when the meter reads more than
    /// the reference; a zero reference has no percentage error.
    #[test]
    fn sign_says_whether_the_meter_reads_high() {
        assert!(percent_error(101.0, 100.0).unwrap() > 0.0);
        assert!(percent_error(99.0, 100.0).unwrap() < 0.0);
        assert_eq!(percent_error(1.0, 0.0), Err(EvaluationError::ZeroReference));
    }

    /// Class 1 at PF 1 between 0.1 Ib and Imax: ±1.0 % (IEC 62053-21:2003 Table 6, from memory).
    #[test]
    fn percent_of_reading_includes_its_limit() {
        let tol = Tolerance::PercentOfReading { percent: 1.0 };
        let at_limit = evaluate(&tol, 5.05, Some(5.0), "A").unwrap();
        assert!((at_limit.error - 1.0).abs() < 1e-9);
        let outside = evaluate(&tol, 5.0501, Some(5.0), "A").unwrap();
        assert!(!outside.within);
        let inside = evaluate(&tol, 4.96, Some(5.0), "A").unwrap();
        assert!(inside.within && (inside.error + 0.8).abs() < 1e-9);
    }

    /// An instrument specification "±(0.05 % of reading + 0.01 % of range)" (the usual form of
    /// a reference meter's data sheet; common practice, no published source): at 5 A on a 10 A
    /// range the half-width is 0.0025 + 0.001 = 0.0035 A, i.e. 0.07 % of the reading.
    #[test]
    fn percent_plus_range_adds_the_range_term() {
        let tol = Tolerance::PercentPlusRange {
            percent: 0.05,
            range_percent: 0.01,
            range: 10.0,
        };
        let e = evaluate(&tol, 5.0035, Some(5.0), "A").unwrap();
        assert!((e.limit - 0.07).abs() < 1e-12);
        assert!((e.error - 0.07).abs() < 1e-9);
        assert!(!evaluate(&tol, 5.0036, Some(5.0), "A").unwrap().within);
    }

    /// ±(1 % + 5 mA) at 0.5 A: the 5 mA term is 1 % of that reading, so the limit is 2 %.
    #[test]
    fn percent_plus_absolute_scales_with_the_reading() {
        let tol = Tolerance::PercentPlusAbsolute {
            percent: 1.0,
            absolute: 0.005,
        };
        let e = evaluate(&tol, 0.509, Some(0.5), "A").unwrap();
        assert!((e.limit - 2.0).abs() < 1e-12);
        assert!(e.within);
    }

    /// Absolute bands in the quantity's own unit (a frequency within ±0.05 Hz; common practice, no
    /// published source): 50.04 Hz against 50 Hz is 0.04 Hz, inside.
    #[test]
    fn band_and_upper_bound_are_in_the_quantity_unit() {
        let band = evaluate(
            &Tolerance::Band { half_width: 0.05 },
            50.04,
            Some(50.0),
            "Hz",
        )
        .unwrap();
        assert_eq!(band.error_unit, "Hz");
        assert!(band.within && (band.error - 0.04).abs() < 1e-9);
        let creep = evaluate(&Tolerance::AtMost { bound: 0.5 }, -0.6, None, "W").unwrap();
        assert!(!creep.within);
        assert!((creep.error - 0.6).abs() < 1e-12);
    }

    /// A register that must advance by at least a bound (a starting test) fails when it runs
    /// backwards by more than the bound: the comparison is signed (common practice, no
    /// published source: a starting test asks the register to start registering).
    #[test]
    fn a_lower_bound_is_signed() {
        let back = evaluate(&Tolerance::AtLeast { bound: 0.02 }, -0.05, None, "Wh").unwrap();
        assert!(!back.within && back.error < 0.0);
        let forward = evaluate(&Tolerance::AtLeast { bound: 0.02 }, 0.05, None, "Wh").unwrap();
        assert!(forward.within);
    }
}
