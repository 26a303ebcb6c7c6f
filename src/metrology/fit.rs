//! Least-squares fits for calibration: a line (offset and gain), a quadratic, or a gain alone.
//!
//! Solved by Householder QR on column-scaled design matrices (nalgebra), never by normal
//! equations: calibration points span a wide range (x up to 3·10⁶ in NIST's Pontius set), and
//! forming XᵀX squares the condition number and loses the digits the certified values need.

use nalgebra::{DMatrix, DVector};
use serde::{Deserialize, Serialize};

/// Which polynomial is fitted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Model {
    /// y = b0 + b1·x
    Line,
    /// y = b0 + b1·x + b2·x²
    Quadratic,
    /// y = b1·x (no intercept)
    Proportional,
}

impl Model {
    fn columns(self, x: f64) -> Vec<f64> {
        match self {
            Model::Line => vec![1.0, x],
            Model::Quadratic => vec![1.0, x, x * x],
            Model::Proportional => vec![x],
        }
    }

    fn has_intercept(self) -> bool {
        self != Model::Proportional
    }

    /// The fitted value at `x`.
    pub fn eval(self, coefficients: &[f64], x: f64) -> f64 {
        self.columns(x)
            .iter()
            .zip(coefficients)
            .map(|(c, b)| c * b)
            .sum()
    }
}

/// A fitted model with its statistics.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Fit {
    pub model: Model,
    /// b0, b1 (, b2); for `Proportional` only b1.
    pub coefficients: Vec<f64>,
    /// Standard errors of the coefficients.
    pub std_errors: Vec<f64>,
    /// sqrt(SSE / (n − p)).
    pub residual_sd: f64,
    /// y − fitted, point by point.
    pub residuals: Vec<f64>,
    /// 1 − SSE/SST, centred (uncentred without an intercept, as NIST does).
    pub r_squared: f64,
    pub dof: usize,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FitError {
    #[error(
        "{points} points cannot determine {parameters} parameters with a residual: give at least {needed}"
    )]
    TooFewPoints {
        points: usize,
        parameters: usize,
        needed: usize,
    },
    #[error("x and y have different lengths")]
    Mismatch,
    #[error("the points do not determine the model (all x equal?)")]
    Singular,
}

/// Fits `model` to the points (x, y).
pub fn fit(model: Model, x: &[f64], y: &[f64]) -> Result<Fit, FitError> {
    if x.len() != y.len() {
        return Err(FitError::Mismatch);
    }
    let n = x.len();
    let p = model.columns(0.0).len();
    if n <= p {
        return Err(FitError::TooFewPoints {
            points: n,
            parameters: p,
            needed: p + 1,
        });
    }
    let mut design = DMatrix::<f64>::zeros(n, p);
    for (i, &xi) in x.iter().enumerate() {
        for (j, c) in model.columns(xi).into_iter().enumerate() {
            design[(i, j)] = c;
        }
    }
    // Scale every column to unit norm: QR is then insensitive to the columns' magnitudes.
    let scales: Vec<f64> = (0..p).map(|j| design.column(j).norm()).collect();
    if scales.contains(&0.0) {
        return Err(FitError::Singular);
    }
    for (j, s) in scales.iter().enumerate() {
        design.column_mut(j).scale_mut(1.0 / s);
    }
    let observations = DVector::from_column_slice(y);
    let qr = design.clone().qr();
    let r = qr.r();
    // Columns have unit norm, so a tiny diagonal entry of R means a column the others explain.
    if (0..p).any(|j| r[(j, j)].abs() < 1e-12) {
        return Err(FitError::Singular);
    }
    let qty = qr.q().transpose() * &observations;
    let scaled = r.solve_upper_triangular(&qty).ok_or(FitError::Singular)?;
    let r_inv = r
        .clone()
        .try_inverse()
        .filter(|m| m.iter().all(|v| v.is_finite()))
        .ok_or(FitError::Singular)?;
    let coefficients: Vec<f64> = (0..p).map(|j| scaled[j] / scales[j]).collect();
    let residuals: Vec<f64> = x
        .iter()
        .zip(y)
        .map(|(&xi, &yi)| yi - model.eval(&coefficients, xi))
        .collect();
    let sse: f64 = residuals.iter().map(|r| r * r).sum();
    let dof = n - p;
    let residual_sd = (sse / dof as f64).sqrt();
    // cov(b) = σ² (XᵀX)⁻¹ = σ² R⁻¹ R⁻ᵀ, unscaled column by column.
    let cov = &r_inv * r_inv.transpose();
    let std_errors = (0..p)
        .map(|j| residual_sd * cov[(j, j)].sqrt() / scales[j])
        .collect();
    let total: f64 = if model.has_intercept() {
        let mean = y.iter().sum::<f64>() / n as f64;
        y.iter().map(|v| (v - mean).powi(2)).sum()
    } else {
        y.iter().map(|v| v * v).sum()
    };
    Ok(Fit {
        model,
        coefficients,
        std_errors,
        residual_sd,
        residuals,
        r_squared: 1.0 - sse / total,
        dof,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// (x, y) pairs of a NIST StRD regression file: "y x" columns from line 61.
    fn strd(text: &str) -> (Vec<f64>, Vec<f64>) {
        let mut x = Vec::new();
        let mut y = Vec::new();
        for line in text.lines().skip(60) {
            let cols: Vec<f64> = line
                .split_whitespace()
                .filter_map(|c| c.parse().ok())
                .collect();
            if cols.len() == 2 {
                y.push(cols[0]);
                x.push(cols[1]);
            }
        }
        (x, y)
    }

    /// Significant digits of agreement (NIST's log relative error).
    fn lre(computed: f64, certified: f64) -> f64 {
        if computed == certified {
            return 15.0;
        }
        -((computed - certified).abs() / certified.abs()).log10()
    }

    fn agree(what: &str, computed: f64, certified: f64) {
        let digits = lre(computed, certified);
        assert!(
            digits >= 9.0,
            "{what}: {computed} vs {certified} ({digits:.1} digits)"
        );
    }

    /// NIST StRD Norris (linear, lower difficulty), certified values in the file's header.
    #[test]
    fn nist_norris() {
        let (x, y) = strd(include_str!("../../tests/data/nist-strd/Norris.dat"));
        assert_eq!(x.len(), 36);
        let f = fit(Model::Line, &x, &y).unwrap();
        agree("B0", f.coefficients[0], -0.262323073774029);
        agree("B1", f.coefficients[1], 1.00211681802045);
        agree("sd(B0)", f.std_errors[0], 0.232818234301152);
        agree("sd(B1)", f.std_errors[1], 0.429796848199937E-03);
        agree("residual sd", f.residual_sd, 0.884796396144373);
        agree("R²", f.r_squared, 0.999993745883712);
    }

    /// NIST StRD Pontius (quadratic, load-cell calibration, x up to 3·10⁶).
    #[test]
    fn nist_pontius() {
        let (x, y) = strd(include_str!("../../tests/data/nist-strd/Pontius.dat"));
        assert_eq!(x.len(), 40);
        let f = fit(Model::Quadratic, &x, &y).unwrap();
        agree("B0", f.coefficients[0], 0.673565789473684E-03);
        agree("B1", f.coefficients[1], 0.732059160401003E-06);
        agree("B2", f.coefficients[2], -0.316081871345029E-14);
        agree("sd(B0)", f.std_errors[0], 0.107938612033077E-03);
        agree("sd(B1)", f.std_errors[1], 0.157817399981659E-09);
        agree("sd(B2)", f.std_errors[2], 0.486652849992036E-16);
        agree("residual sd", f.residual_sd, 0.205177424076185E-03);
    }

    /// NIST StRD NoInt1 (y = B1·x, no intercept).
    #[test]
    fn nist_noint1() {
        let (x, y) = strd(include_str!("../../tests/data/nist-strd/NoInt1.dat"));
        let f = fit(Model::Proportional, &x, &y).unwrap();
        agree("B1", f.coefficients[0], 2.07438016528926);
        agree("sd(B1)", f.std_errors[0], 0.165289256198347E-01);
        agree("residual sd", f.residual_sd, 3.56753034006338);
        agree("R²", f.r_squared, 0.999365492298663);
    }

    #[test]
    fn refuses_what_cannot_be_fitted() {
        assert!(matches!(
            fit(Model::Line, &[1.0, 2.0], &[1.0, 2.0]),
            Err(FitError::TooFewPoints { .. })
        ));
        assert!(fit(Model::Line, &[1.0, 1.0, 1.0], &[1.0, 2.0, 3.0]).is_err());
        assert_eq!(fit(Model::Line, &[1.0], &[]), Err(FitError::Mismatch));
    }
}
