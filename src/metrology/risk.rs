//! Global risks of a decision rule over a production process (JCGM 106:2012, 9.5).
//!
//! A unit's specific risk ([`super::decision::specific_risk`]) says how likely *this* result
//! is wrong. For a lot the question is how often the rule itself goes wrong: the **global
//! consumer's risk** is the probability that a unit picked from the process is non-conforming
//! and accepted; the **producer's risk**, that it conforms and is rejected. With the process's
//! true errors distributed as g₀(η) and a measurement that reads η + ε, ε ~ N(0, u_m²):
//!
//! ```text
//! R_C = ∫ outside tolerance  g₀(η) · P(accept | η) dη
//! R_P = ∫ inside tolerance   g₀(η) · (1 − P(accept | η)) dη
//! P(accept | η) = Φ((A_U − η)/u_m) − Φ((A_L − η)/u_m)
//! ```
//!
//! g₀ is taken normal, with the lot's mean and the process standard deviation σ₀ that the lot's
//! spread leaves once the measurement's share is taken out: s² = σ₀² + u_m² (JCGM 106, 9.5.2,
//! the observed spread being the convolution of process and measurement).

use gauss_quad::legendre::GaussLegendre;
use serde::Serialize;
use statrs::distribution::{ContinuousCDF, Normal};
use std::sync::LazyLock;

/// Limits on the true or the measured error; `None` is unbounded on that side.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Interval {
    pub lower: Option<f64>,
    pub upper: Option<f64>,
}

impl Interval {
    /// ±limit.
    pub fn symmetric(limit: f64) -> Interval {
        Interval {
            lower: Some(-limit),
            upper: Some(limit),
        }
    }

    fn contains(&self, x: f64) -> bool {
        self.lower.is_none_or(|l| x >= l) && self.upper.is_none_or(|u| x <= u)
    }
}

/// The two global risks of a rule, as probabilities (0–1).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct GlobalRisk {
    /// Non-conforming and accepted.
    pub consumer: f64,
    /// Conforming and rejected.
    pub producer: f64,
}

/// Gauss–Legendre rule used on each panel: degree 20 integrates the smooth integrands here to
/// far below the figures' shown digits once panels are narrower than the narrower spread.
static RULE: LazyLock<GaussLegendre> =
    LazyLock::new(|| GaussLegendre::new(20.try_into().expect("20 is not zero")));

/// Integrates `f` over [a, b] in panels no wider than `width`.
fn integrate(a: f64, b: f64, width: f64, f: &impl Fn(f64) -> f64) -> f64 {
    if b <= a {
        return 0.0;
    }
    let panels = ((b - a) / width).ceil().clamp(1.0, 20_000.0) as usize;
    let h = (b - a) / panels as f64;
    (0..panels)
        .map(|i| {
            let lo = a + i as f64 * h;
            RULE.integrate(lo, lo + h, f)
        })
        .sum()
}

/// The global risks of accepting within `acceptance` a process of true errors
/// N(`mean`, `process_sd`²) held to `tolerance`, measured with standard uncertainty
/// `measurement_u` (JCGM 106:2012, 9.5.2). `None` when a spread is negative or not finite.
pub fn global_risk(
    mean: f64,
    process_sd: f64,
    measurement_u: f64,
    tolerance: Interval,
    acceptance: Interval,
) -> Option<GlobalRisk> {
    let fit = |x: f64| x.is_finite() && x >= 0.0;
    if !(fit(process_sd) && fit(measurement_u) && mean.is_finite()) {
        return None;
    }
    let accept = |eta: f64| -> f64 {
        if measurement_u == 0.0 {
            return if acceptance.contains(eta) { 1.0 } else { 0.0 };
        }
        let n = Normal::new(eta, measurement_u).expect("a positive spread");
        let upper = acceptance.upper.map_or(1.0, |a| n.cdf(a));
        let lower = acceptance.lower.map_or(0.0, |a| n.cdf(a));
        (upper - lower).max(0.0)
    };
    // A process with no spread: every unit's true error is the mean.
    if process_sd == 0.0 {
        let p = accept(mean);
        return Some(if tolerance.contains(mean) {
            GlobalRisk {
                consumer: 0.0,
                producer: 1.0 - p,
            }
        } else {
            GlobalRisk {
                consumer: p,
                producer: 0.0,
            }
        });
    }
    let process = Normal::new(mean, process_sd).expect("a positive spread");
    let density = |eta: f64| statrs::distribution::Continuous::pdf(&process, eta);
    // Far enough out that the process density is below 1e-30 of its peak.
    let (from, to) = (mean - 12.0 * process_sd, mean + 12.0 * process_sd);
    let width = if measurement_u > 0.0 {
        process_sd.min(measurement_u) / 2.0
    } else {
        process_sd / 2.0
    };
    // Breakpoints where an integrand has a kink or a step: the tolerance and acceptance limits.
    let mut cuts: Vec<f64> = [
        tolerance.lower,
        tolerance.upper,
        acceptance.lower,
        acceptance.upper,
    ]
    .into_iter()
    .flatten()
    .filter(|x| *x > from && *x < to)
    .collect();
    cuts.extend([from, to]);
    cuts.sort_by(f64::total_cmp);
    cuts.dedup();
    let mut consumer = 0.0;
    let mut producer = 0.0;
    for w in cuts.windows(2) {
        let (a, b) = (w[0], w[1]);
        let inside = tolerance.contains((a + b) / 2.0);
        if inside {
            producer += integrate(a, b, width, &|eta| density(eta) * (1.0 - accept(eta)));
        } else {
            consumer += integrate(a, b, width, &|eta| density(eta) * accept(eta));
        }
    }
    Some(GlobalRisk {
        consumer: consumer.clamp(0.0, 1.0),
        producer: producer.clamp(0.0, 1.0),
    })
}

/// The process standard deviation σ₀ that a lot's observed spread `s` leaves once the
/// measurement's standard uncertainty `u_m` is taken out (s² = σ₀² + u_m²); zero when the
/// measurement alone accounts for the spread.
pub fn process_sd(observed_sd: f64, measurement_u: f64) -> f64 {
    (observed_sd * observed_sd - measurement_u * measurement_u)
        .max(0.0)
        .sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{RngExt, SeedableRng};
    use rand_distr::StandardNormal;

    /// Published in the guard-banding literature (D. Deaver, NCSL workshop paper on guard-banding,
    /// as tabulated in an open metrology toolkit's tests), and recomputed here by quadrature: process
    /// σ 4, measurement σ 1, limits ±8, simple acceptance → false accept 0.008, false reject
    /// 0.015.
    #[test]
    fn deaver_normal_process_and_measurement() {
        let r = global_risk(
            0.0,
            4.0,
            1.0,
            Interval::symmetric(8.0),
            Interval::symmetric(8.0),
        )
        .unwrap();
        assert!((r.consumer - 0.008).abs() < 0.0005, "{r:?}");
        assert!((r.producer - 0.015).abs() < 0.0005, "{r:?}");
        // A guard band trades one risk for the other (JCGM 106:2012, 9.5.3): accepting within
        // ±7 lowers the consumer's risk and raises the producer's.
        let g = global_risk(
            0.0,
            4.0,
            1.0,
            Interval::symmetric(8.0),
            Interval::symmetric(7.0),
        )
        .unwrap();
        assert!(
            g.consumer < r.consumer / 3.0 && g.producer > r.producer * 2.0,
            "{g:?}"
        );
    }

    /// An independent method on the same model: a Monte Carlo draw of process and measurement
    /// (general-purpose random generators), which the quadrature must match within the draw's
    /// standard error, for an off-centre process and a one-sided bound.
    #[test]
    fn quadrature_matches_a_monte_carlo_draw() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(106);
        let cases = [
            (
                1.5,
                3.0,
                1.2,
                Interval::symmetric(6.0),
                Interval::symmetric(5.0),
            ),
            (
                0.2,
                0.3,
                0.1,
                Interval {
                    lower: None,
                    upper: Some(0.5),
                },
                Interval {
                    lower: None,
                    upper: Some(0.4),
                },
            ),
        ];
        for (mean, sp, um, tol, acc) in cases {
            let r = global_risk(mean, sp, um, tol, acc).unwrap();
            let n = 400_000;
            let (mut fa, mut fr) = (0usize, 0usize);
            for _ in 0..n {
                let z1: f64 = rng.sample(StandardNormal);
                let z2: f64 = rng.sample(StandardNormal);
                let eta = mean + sp * z1;
                let y = eta + um * z2;
                match (tol.contains(eta), acc.contains(y)) {
                    (false, true) => fa += 1,
                    (true, false) => fr += 1,
                    _ => {}
                }
            }
            for (p, count) in [(r.consumer, fa), (r.producer, fr)] {
                let q = count as f64 / n as f64;
                let se = (q * (1.0 - q) / n as f64).sqrt().max(1e-6);
                assert!((p - q).abs() < 4.0 * se, "{p} vs {q} ± {se}");
            }
        }
    }

    #[test]
    fn degenerate_spreads() {
        // A process with no spread centred inside, measured perfectly: no risk either way.
        let r = global_risk(
            0.0,
            0.0,
            0.0,
            Interval::symmetric(1.0),
            Interval::symmetric(1.0),
        )
        .unwrap();
        assert_eq!((r.consumer, r.producer), (0.0, 0.0));
        // All units at +0.9 against ±1 accepted within ±0.8, measured with u 0.1: rejected
        // unless the reading falls below 0.8, so the producer's risk is Φ((0.9 − 0.8)/0.1).
        let r = global_risk(
            0.9,
            0.0,
            0.1,
            Interval::symmetric(1.0),
            Interval::symmetric(0.8),
        )
        .unwrap();
        assert!((r.producer - 0.841_344_746).abs() < 1e-6, "{r:?}");
        assert!(
            global_risk(
                0.0,
                -1.0,
                0.1,
                Interval::symmetric(1.0),
                Interval::symmetric(1.0)
            )
            .is_none()
        );
        // Observed spread and measurement: s² = σ₀² + u² (3-4-5).
        assert!((process_sd(5.0, 3.0) - 4.0).abs() < 1e-12);
        assert_eq!(process_sd(1.0, 2.0), 0.0);
    }
}
