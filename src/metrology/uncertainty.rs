//! Uncertainty budgets after the GUM (JCGM 100:2008).
//!
//! A budget lists its components as standard uncertainties already multiplied by their
//! sensitivity coefficients (so in the unit of the result), with their degrees of freedom;
//! combines them as the root sum of squares (uncorrelated inputs, GUM 5.1.2); takes the effective
//! degrees of freedom by Welch–Satterthwaite (GUM G.4.1) and the coverage factor from Student's t
//! for a coverage probability of 95.45 % (GUM G.3.2, Table G.2), which is k = 2 for large ν.

use serde::{Deserialize, Serialize};
use statrs::distribution::{ContinuousCDF, StudentsT};

/// The coverage probability whose normal quantile is exactly 2: 2Φ(2) − 1.
pub const P_95_45: f64 = 0.954_499_736_103_642;

/// How a component was evaluated.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum Evaluation {
    /// By statistics of repeated observations.
    A,
    /// By other means: a specification, a certificate, a resolution.
    B,
}

/// One line of a budget.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Component {
    pub name: String,
    pub evaluation: Evaluation,
    /// Standard uncertainty times its sensitivity coefficient, in the unit of the result.
    pub u: f64,
    /// Degrees of freedom; absent means infinite (a Type B estimate taken as exact).
    pub dof: Option<f64>,
    /// How the figure was obtained ("s/√n, n = 8", "a/√3, a = ...").
    pub basis: String,
}

/// A combined and expanded uncertainty with everything needed to redo the sum.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Budget {
    pub components: Vec<Component>,
    pub combined: f64,
    /// Effective degrees of freedom; absent means infinite.
    pub dof_eff: Option<f64>,
    pub coverage_probability: f64,
    pub k: f64,
    pub expanded: f64,
    /// What the budget leaves out, and why.
    #[serde(default)]
    pub notes: Vec<String>,
}

/// Type A: the standard uncertainty of the mean of n readings, s/√n, with n − 1 degrees of
/// freedom (GUM 4.2.3).
pub fn type_a(name: &str, s: f64, n: usize, sensitivity: f64) -> Component {
    Component {
        name: name.into(),
        evaluation: Evaluation::A,
        u: (sensitivity * s / (n as f64).sqrt()).abs(),
        dof: Some(n.saturating_sub(1) as f64),
        basis: format!("s/√n with s = {s:.6e}, n = {n}"),
    }
}

/// Type B, rectangular distribution of half-width a: u = a/√3 (GUM 4.3.7).
pub fn rectangular(name: &str, half_width: f64, sensitivity: f64, basis: &str) -> Component {
    Component {
        name: name.into(),
        evaluation: Evaluation::B,
        u: (sensitivity * half_width / 3f64.sqrt()).abs(),
        dof: None,
        basis: format!("a/√3 with a = {half_width:.6e} ({basis})"),
    }
}

/// Type B, resolution δ of a digital indication: u = δ/√12 (GUM F.2.2.1).
pub fn resolution(name: &str, step: f64, sensitivity: f64) -> Component {
    Component {
        name: name.into(),
        evaluation: Evaluation::B,
        u: (sensitivity * step / 12f64.sqrt()).abs(),
        dof: None,
        basis: format!("δ/√12 with δ = {step:.6e}"),
    }
}

/// Welch–Satterthwaite: ν_eff = u_c⁴ / Σ (uᵢ⁴ / νᵢ); components with infinite ν add nothing.
/// `None` when every component has infinite degrees of freedom.
pub fn effective_dof(components: &[Component], combined: f64) -> Option<f64> {
    let denominator: f64 = components
        .iter()
        .filter_map(|c| {
            c.dof.map(|nu| {
                if nu > 0.0 {
                    c.u.powi(4) / nu
                } else {
                    f64::INFINITY
                }
            })
        })
        .sum();
    if denominator == 0.0 {
        None
    } else if denominator.is_infinite() {
        Some(0.0)
    } else {
        Some(combined.powi(4) / denominator)
    }
}

/// The coverage factor for `dof` degrees of freedom at probability `p`: the two-sided quantile
/// of Student's t, or of the normal distribution for infinite ν. Fractional ν are used as they
/// are (the t distribution is defined for them), not rounded down.
pub fn coverage_factor(dof: Option<f64>, p: f64) -> f64 {
    let q = 0.5 * (1.0 + p);
    match dof {
        // The inverse of the incomplete beta function loses its digits as ν grows (k = 1.97
        // at ν = 7·10⁶, below the normal quantile it must exceed): from ν = 100 on, the
        // quantile is the asymptotic expansion around the normal quantile, exact there to
        // about 10⁻¹⁰ and better as ν grows.
        Some(nu) if nu >= LARGE_DOF => t_quantile_large_dof(nu, normal_quantile(q)),
        Some(nu) if nu > 0.0 => StudentsT::new(0.0, 1.0, nu)
            .map(|t| t.inverse_cdf(q))
            .unwrap_or(f64::INFINITY),
        Some(_) => f64::INFINITY,
        None => normal_quantile(q),
    }
}

/// From this many degrees of freedom on, Student's quantile comes from its expansion.
const LARGE_DOF: f64 = 100.0;

/// Student's t quantile for large ν from the normal quantile `z`: the Cornish–Fisher
/// expansion in 1/ν (Abramowitz and Stegun, Handbook of Mathematical Functions, 26.7.5; the
/// coefficients from memory, checked against 40-digit values in the tests).
fn t_quantile_large_dof(nu: f64, z: f64) -> f64 {
    let z2 = z * z;
    let g1 = z * (z2 + 1.0) / 4.0;
    let g2 = z * ((5.0 * z2 + 16.0) * z2 + 3.0) / 96.0;
    let g3 = z * (((3.0 * z2 + 19.0) * z2 + 17.0) * z2 - 15.0) / 384.0;
    let g4 = z * ((((79.0 * z2 + 776.0) * z2 + 1482.0) * z2 - 1920.0) * z2 - 945.0) / 92160.0;
    z + (g1 + (g2 + (g3 + g4 / nu) / nu) / nu) / nu
}

fn normal_quantile(q: f64) -> f64 {
    statrs::distribution::Normal::standard().inverse_cdf(q)
}

impl Budget {
    /// Combines `components` and expands at 95.45 %.
    pub fn of(components: Vec<Component>) -> Budget {
        let combined = components.iter().map(|c| c.u * c.u).sum::<f64>().sqrt();
        let dof_eff = effective_dof(&components, combined);
        let k = coverage_factor(dof_eff, P_95_45);
        Budget {
            components,
            combined,
            dof_eff,
            coverage_probability: P_95_45,
            k,
            expanded: k * combined,
            notes: Vec::new(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// GUM (JCGM 100:2008) H.2.4, second approach, on the observations of Table H.2: R, X and Z
    /// computed for each of the five sets (R = V/I·cos θ, X = V/I·sin θ, Z = V/I), then averaged,
    /// with the Type A standard uncertainty s/√n of each mean. Table H.4 gives R = 127.732 Ω,
    /// X = 219.847 Ω, Z = 254.260 Ω, u(R) = 0.071 Ω, u(X) = 0.295 Ω, u(Z) = 0.236 Ω.
    #[test]
    fn gum_h2_resistance_reactance_impedance_by_the_second_approach() {
        let rows: Vec<(f64, f64, f64)> = include_str!("../../tests/data/gum/H2-VItheta.csv")
            .lines()
            .filter(|l| !l.starts_with('#') && !l.starts_with('V'))
            .map(|l| {
                let v: Vec<f64> = l.split(',').map(|x| x.parse().unwrap()).collect();
                (v[0], v[1] / 1000.0, v[2])
            })
            .collect();
        assert_eq!(rows.len(), 5);
        let of = |f: &dyn Fn(f64, f64, f64) -> f64| -> (f64, f64) {
            let values: Vec<f64> = rows.iter().map(|(v, i, t)| f(*v, *i, *t)).collect();
            let s = crate::metrology::Summary::of(&values).unwrap();
            let c = type_a("mean", s.std_dev.unwrap(), s.count, 1.0);
            assert_eq!(c.dof, Some(4.0));
            (s.mean, c.u)
        };
        let (r, ur) = of(&|v, i, t| v / i * t.cos());
        let (x, ux) = of(&|v, i, t| v / i * t.sin());
        let (z, uz) = of(&|v, i, _| v / i);
        for (got, want, digits) in [
            (r, 127.732, 0.0005),
            (x, 219.847, 0.0005),
            (z, 254.260, 0.0005),
            (ur, 0.071, 0.0005),
            (ux, 0.295, 0.0005),
            (uz, 0.236, 0.0005),
        ] {
            assert!((got - want).abs() <= digits, "{got} vs {want}");
        }
    }

    /// GUM (JCGM 100:2008) Table G.2, p = 95.45 %; quantiles of Student's t at
    /// one-sided 0.977249868 computed at 40 digits with an arbitrary-precision library: t(1) = 13.96773, t(2) = 4.5265367, t(5) = 2.6486494,
    /// t(10) = 2.2836782, t(20) = 2.1330255, t(50) = 2.0512482; ν = ∞ gives 2.
    #[test]
    fn coverage_factors_match_gum_table_g2() {
        let exact = [
            (1.0, 13.96773),
            (2.0, 4.5265367),
            (5.0, 2.6486494),
            (10.0, 2.2836782),
            (20.0, 2.1330255),
            (50.0, 2.0512482),
        ];
        for (nu, t) in exact {
            let k = coverage_factor(Some(nu), P_95_45);
            assert!((k - t).abs() < 2e-5, "ν = {nu}: {k} vs {t}");
        }
        // The table's two-decimal figures: ν = 3: 3.31, 4: 2.87.
        assert!((coverage_factor(Some(3.0), P_95_45) - 3.31).abs() < 0.005);
        assert!((coverage_factor(Some(4.0), P_95_45) - 2.87).abs() < 0.005);
        assert!((coverage_factor(None, P_95_45) - 2.0).abs() < 1e-9);
    }

    /// k at p = 95.45 % to ten digits for every ν, against values computed at 40 digits with
    /// an arbitrary-precision library (GUM Table G.2 gives the small-ν ones to 2–3 decimals).
    #[test]
    fn coverage_factors_keep_their_digits_for_every_dof() {
        let exact = [
            (1.0, 13.9677301992),
            (2.0, 4.5265366874),
            (3.0, 3.3068221750),
            (10.0, 2.2836782025),
            (100.0, 2.0253091279),
            (1e4, 2.0002500306),
            (1e6, 2.0000025000),
            (1e9, 2.0000000025),
        ];
        for (nu, t) in exact {
            let k = coverage_factor(Some(nu), P_95_45);
            assert!((k - t).abs() < 2e-9 * t, "ν = {nu}: {k:.10} vs {t}");
        }
        // Never below the normal quantile, never rising with ν.
        let mut last = f64::INFINITY;
        for e in 0..=120 {
            let nu = 10f64.powf(f64::from(e) / 10.0);
            let k = coverage_factor(Some(nu), P_95_45);
            assert!(k >= 2.0 && k <= last, "ν = {nu}: k = {k}, before {last}");
            last = k;
        }
    }

    /// Student's t at 95 % (GUM Table G.2): t(10) = 2.2281389, t(19) = 2.0930241.
    #[test]
    fn coverage_factors_at_95_percent() {
        assert!((coverage_factor(Some(10.0), 0.95) - 2.2281389).abs() < 1e-6);
        assert!((coverage_factor(Some(19.0), 0.95) - 2.0930241).abs() < 1e-6);
    }

    /// GUM G.4.1 example: relative standard uncertainties 0.25 %, 0.57 %, 0.82 % with ν = 9, 4,
    /// 14 give u_c = 1.0295 % and ν_eff = 18.9987 (GUM G.4.1; ν_eff to four decimals recomputed
    /// from the example's own figures).
    #[test]
    fn welch_satterthwaite_matches_gum_g41() {
        let c = |u: f64, nu: f64| Component {
            name: "x".into(),
            evaluation: Evaluation::A,
            u,
            dof: Some(nu),
            basis: String::new(),
        };
        let b = Budget::of(vec![c(0.25, 9.0), c(0.57, 4.0), c(0.82, 14.0)]);
        assert!((b.combined - 1.0295).abs() < 5e-5, "{}", b.combined);
        assert!(
            (b.dof_eff.unwrap() - 18.9987).abs() < 5e-4,
            "{:?}",
            b.dof_eff
        );
        // U95 = t95(19)·u_c ≈ 2.15 % (GUM rounds to 2.2 %).
        let u95 = coverage_factor(b.dof_eff, 0.95) * b.combined;
        assert!((u95 - 2.15).abs() < 0.01, "{u95}");
    }

    #[test]
    fn type_b_shapes() {
        // a/√3 and δ/√12 (GUM 4.3.7 and F.2.2.1).
        assert!((rectangular("r", 3f64.sqrt(), 1.0, "").u - 1.0).abs() < 1e-12);
        assert!((resolution("d", 12f64.sqrt(), 1.0).u - 1.0).abs() < 1e-12);
        let only_b = Budget::of(vec![rectangular("r", 0.3, 1.0, "")]);
        assert_eq!(only_b.dof_eff, None);
        assert!((only_b.k - 2.0).abs() < 1e-9);
    }
}
