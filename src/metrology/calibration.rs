//! Calibration of a counts-based front end: counts = offset + gain · value (+ a quadratic term),
//! fitted by least squares to the reference readings at several load points.

use super::fit::{self, Fit, FitError, Model};
use serde::{Deserialize, Serialize};

/// One calibration point: what the reference said and what the front end counted.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Point {
    pub reference: f64,
    pub counts: f64,
}

/// The constants found, with the statistics a reviewer needs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Calibration {
    pub points: Vec<Point>,
    pub fit: Fit,
    /// Counts at zero.
    pub offset: f64,
    /// Counts per unit.
    pub gain: f64,
    /// Counts per unit², for a quadratic fit.
    pub quadratic: Option<f64>,
    /// (counts − offset) / reference at each non-zero point: the gain each point alone implies.
    pub point_gains: Vec<Option<f64>>,
    /// The largest deviation from the fitted curve, as a percentage of the reading, over the
    /// non-zero points.
    pub linearity_error_percent: f64,
}

/// Fits `points` with a line (`quadratic` false) or a quadratic.
pub fn calibrate(points: &[Point], quadratic: bool) -> Result<Calibration, FitError> {
    let x: Vec<f64> = points.iter().map(|p| p.reference).collect();
    let y: Vec<f64> = points.iter().map(|p| p.counts).collect();
    let model = if quadratic {
        Model::Quadratic
    } else {
        Model::Line
    };
    let fit = fit::fit(model, &x, &y)?;
    let offset = fit.coefficients[0];
    let gain = fit.coefficients[1];
    let point_gains = points
        .iter()
        .map(|p| (p.reference != 0.0).then(|| (p.counts - offset) / p.reference))
        .collect();
    let linearity_error_percent = points
        .iter()
        .zip(&fit.residuals)
        .filter(|(p, _)| p.reference != 0.0)
        .map(|(p, r)| (r / gain / p.reference * 100.0).abs())
        .fold(0.0, f64::max);
    Ok(Calibration {
        points: points.to_vec(),
        offset,
        gain,
        quadratic: quadratic.then(|| fit.coefficients[2]),
        fit,
        point_gains,
        linearity_error_percent,
    })
}

/// The voltage across a current-sense shunt, V = I · R (Ohm's law).
pub fn shunt_voltage(resistance: f64, current: f64) -> f64 {
    resistance * current
}

/// The power a shunt dissipates, P = I² · R.
pub fn shunt_dissipation(resistance: f64, current: f64) -> f64 {
    current * current * resistance
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A bench measurement of a counts-based front end (common practice, no published source):
    /// 395 counts at no load, 2444, 4488 and 6500 counts at 1.21 A, 2.41 A and 3.58 A rms.
    /// Per-point gains about 1693, 1698 and 1705 counts/A; the least-squares line through the
    /// four points has an offset of about 387.6 counts, a gain of about 1705.1 counts/A and
    /// residuals within ±9 counts.
    #[test]
    fn counts_calibration_of_a_bench_front_end() {
        let points: Vec<Point> = [(0.0, 395.0), (1.21, 2444.0), (2.41, 4488.0), (3.58, 6500.0)]
            .into_iter()
            .map(|(reference, counts)| Point { reference, counts })
            .collect();
        // Per-point gains against the no-load offset, as a technician works them out.
        let per_point: Vec<f64> = points[1..]
            .iter()
            .map(|p| (p.counts - 395.0) / p.reference)
            .collect();
        for (got, want) in per_point.iter().zip([1693.0, 1698.0, 1705.0]) {
            assert!((got - want).abs() < 1.0, "{got} vs {want}");
        }
        let c = calibrate(&points, false).unwrap();
        assert!((c.offset - 387.6).abs() < 0.05, "offset {}", c.offset);
        assert!((c.gain - 1705.1).abs() < 0.05, "gain {}", c.gain);
        assert!(
            c.fit.residuals.iter().all(|r| r.abs() <= 9.0),
            "{:?}",
            c.fit.residuals
        );
        assert!(
            c.fit.residuals.iter().any(|r| r.abs() > 5.0),
            "the points are not on a line"
        );
        assert!(c.linearity_error_percent > 0.0 && c.linearity_error_percent < 0.5);
    }

    /// Ohm's law: a 10 mΩ shunt carrying 1.21 A develops 12.1 mV (common practice, no published
    /// source); 5 A through 10 mΩ gives 50 mV and dissipates 0.25 W (domain notes §2).
    #[test]
    fn shunt_by_ohms_law() {
        assert!((shunt_voltage(0.010, 1.21) - 0.0121).abs() < 1e-15);
        assert!((shunt_voltage(0.010, 5.0) - 0.050).abs() < 1e-15);
        assert!((shunt_dissipation(0.010, 5.0) - 0.25).abs() < 1e-15);
    }
}
