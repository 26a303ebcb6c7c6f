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

/// A window around a nominal value: |value − nominal| ≤ within (absolute), or
/// ≤ within · |nominal| when `relative`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Window {
    pub nominal: f64,
    pub within: f64,
    pub relative: bool,
}

impl Window {
    /// The largest deviation from nominal the window allows.
    pub fn half_width(&self) -> f64 {
        if self.relative {
            self.within * self.nominal.abs()
        } else {
            self.within
        }
    }
}

/// What a plan holds a unit's calibration to: a front end whose constants fall far from
/// nominal, or whose points do not lie on the fitted curve, has a hardware fault (a wrong
/// shunt, a damaged channel) that constants written to it would only hide.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct Limits {
    /// The fitted gain, counts per base unit.
    pub gain: Option<Window>,
    /// The fitted offset, counts.
    pub offset: Option<Window>,
    /// The largest deviation of a point from the fitted curve, percent of the reading.
    pub linearity_percent: Option<f64>,
    /// The largest spread of the per-point gains around the fitted gain, percent.
    pub point_gain_percent: Option<f64>,
    /// How far a constant read back may differ from the one written, as a fraction (a unit
    /// may print fewer digits than it was sent); exact to 1e-9 when not stated.
    pub read_back: Option<f64>,
}

/// One limit applied to a calibration, and how the fit fared against it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LimitResult {
    /// "gain", "offset", "linearity", "point gains".
    pub what: String,
    /// The value found: the fitted constant, or the largest deviation in percent.
    pub value: f64,
    /// The nominal value, for windows.
    pub nominal: Option<f64>,
    /// The deviation compared with `limit` (|value − nominal|, or the value itself).
    pub deviation: f64,
    pub limit: f64,
    /// "counts per A", "counts", "%".
    pub unit: String,
    pub within: bool,
}

impl std::fmt::Display for LimitResult {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self.nominal {
            Some(n) => write!(
                f,
                "{} {:.6} {} is {:.6} from nominal {} (limit ±{:.6})",
                self.what, self.value, self.unit, self.deviation, n, self.limit
            ),
            None => write!(
                f,
                "{} {:.4} {} (limit {:.4} {})",
                self.what, self.value, self.unit, self.limit, self.unit
            ),
        }
    }
}

/// Holds a fitted calibration to `limits`: one result per limit the plan sets; `unit` is the
/// calibrated quantity's unit ("A"), for the gain's "counts per A".
pub fn judge(c: &Calibration, limits: &Limits, unit: &str) -> Vec<LimitResult> {
    let mut out = Vec::new();
    let mut window = |what: &str, value: f64, w: Window, unit: &str| {
        let deviation = (value - w.nominal).abs();
        let limit = w.half_width();
        out.push(LimitResult {
            what: what.into(),
            value,
            nominal: Some(w.nominal),
            deviation,
            limit,
            unit: unit.into(),
            within: deviation <= limit,
        });
    };
    if let Some(w) = limits.gain {
        window("gain", c.gain, w, &format!("counts per {unit}"));
    }
    if let Some(w) = limits.offset {
        window("offset", c.offset, w, "counts");
    }
    let mut bound = |what: &str, value: f64, limit: f64| {
        out.push(LimitResult {
            what: what.into(),
            value,
            nominal: None,
            deviation: value,
            limit,
            unit: "%".into(),
            within: value <= limit,
        });
    };
    if let Some(limit) = limits.linearity_percent {
        bound("linearity", c.linearity_error_percent, limit);
    }
    if let Some(limit) = limits.point_gain_percent {
        let spread = c
            .point_gains
            .iter()
            .flatten()
            .map(|g| ((g - c.gain) / c.gain * 100.0).abs())
            .fold(0.0, f64::max);
        bound("point gains", spread, limit);
    }
    out
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

    /// The bench front end above held to windows: its fitted gain 1705.1 counts/A is 0.30 %
    /// from a nominal 1700 (within ±0.5 %, outside ±0.2 %); its offset 387.6 is 7.4 counts from
    /// 395; its per-point gains against the fitted offset lie within 0.33 % of the fitted gain
    /// (common practice, no published source; figures recomputed by hand from the points).
    #[test]
    fn a_calibration_held_to_its_limits() {
        let points: Vec<Point> = [(0.0, 395.0), (1.21, 2444.0), (2.41, 4488.0), (3.58, 6500.0)]
            .into_iter()
            .map(|(reference, counts)| Point { reference, counts })
            .collect();
        let c = calibrate(&points, false).unwrap();
        let limits = |gain_within: f64| Limits {
            gain: Some(Window {
                nominal: 1700.0,
                within: gain_within,
                relative: true,
            }),
            offset: Some(Window {
                nominal: 395.0,
                within: 10.0,
                relative: false,
            }),
            linearity_percent: Some(1.0),
            point_gain_percent: Some(0.5),
            read_back: None,
        };
        let r = judge(&c, &limits(0.005), "A");
        let by = |what: &str| r.iter().find(|x| x.what == what).unwrap().clone();
        assert!(by("gain").within);
        assert!(
            (by("gain").deviation - 5.1).abs() < 0.06,
            "{:?}",
            by("gain")
        );
        assert!(by("offset").within && (by("offset").deviation - 7.4).abs() < 0.06);
        assert!(by("linearity").within);
        // (2444 − 387.6)/1.21 = 1699.5, 0.33 % below 1705.1; (4488 − 387.6)/2.41 = 1701.4;
        // (6500 − 387.6)/3.58 = 1707.4: the largest spread is 0.33 %, within 0.5 %.
        assert!(
            (by("point gains").value - 0.33).abs() < 0.01,
            "{:?}",
            by("point gains")
        );
        assert!(by("point gains").within);
        let r = judge(&c, &limits(0.002), "A");
        let gain = r.iter().find(|x| x.what == "gain").unwrap();
        assert!(!gain.within);
        assert!(gain.to_string().contains("from nominal 1700"), "{gain}");
        assert!(judge(&c, &Limits::default(), "A").is_empty());
    }

    /// Ohm's law: a 10 mΩ shunt carrying 1.21 A develops 12.1 mV (common practice, no published
    /// source); 5 A through 10 mΩ gives 50 mV and dissipates I²R = 0.25 W (Ohm's and Joule's laws).
    #[test]
    fn shunt_by_ohms_law() {
        assert!((shunt_voltage(0.010, 1.21) - 0.0121).abs() < 1e-15);
        assert!((shunt_voltage(0.010, 5.0) - 0.050).abs() < 1e-15);
        assert!((shunt_dissipation(0.010, 5.0) - 0.25).abs() < 1e-15);
    }
}
