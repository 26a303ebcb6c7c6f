//! Deciding conformity from a measured error, its expanded uncertainty and the tolerance
//! (ILAC-G8:09/2019; JCGM 106:2012).
//!
//! Simple acceptance accepts within the tolerance limit TL (guard band w = 0). Guarded
//! acceptance accepts within the acceptance limit AL = TL − w with w = multiple · U, so that the
//! specific risk of accepting a unit whose true error is outside TL stays small (about 2.3 % at
//! AL for w = U and a normal distribution). Either way, a result within U of TL is called
//! *marginal*: the true error may lie on the other side of the limit.

use super::tolerance::{Evaluation, Sense};
use serde::{Deserialize, Serialize};

/// How a measured error and its uncertainty become a verdict (ILAC-G8:09/2019).
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
#[serde(tag = "rule", rename_all = "snake_case")]
pub enum DecisionRule {
    /// Accept within the tolerance limit (guard band w = 0).
    #[default]
    Simple,
    /// Accept within the tolerance limit less a guard band w = multiple · U.
    Guarded { multiple: f64 },
}

/// Below this test uncertainty ratio (TL / U) a check's uncertainty is worth a warning.
pub const TUR_WARNING_BELOW: f64 = 4.0;

/// A decision and every figure it rests on.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Decision {
    pub rule: DecisionRule,
    pub tolerance_limit: f64,
    pub guard_band: f64,
    pub acceptance_limit: f64,
    /// Expanded uncertainty U of the error, same unit; absent when it could not be estimated.
    pub expanded_uncertainty: Option<f64>,
    /// Test uncertainty ratio TL / U.
    pub tur: Option<f64>,
    pub accepted: bool,
    /// The measured value lies within U of the tolerance limit.
    pub marginal: bool,
    /// The guard band exceeds the tolerance limit: the acceptance limit is below zero and no
    /// result can be accepted (ILAC-G8: the measurement is not fit for the decision).
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub no_acceptance_zone: bool,
    /// The specific risk: the probability that the true error lies beyond the tolerance
    /// limit, given the result and its standard uncertainty ([`specific_risk`]).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub risk: Option<f64>,
}

impl Decision {
    /// Whether the test uncertainty ratio is below the usual 4:1.
    pub fn low_tur(&self) -> bool {
        self.tur.is_some_and(|t| t < TUR_WARNING_BELOW)
    }
}

/// Decides on an evaluated error with expanded uncertainty `u` (same unit as the error).
pub fn decide(e: &Evaluation, u: Option<f64>, rule: DecisionRule) -> Decision {
    let guard_band = match (rule, u) {
        (DecisionRule::Guarded { multiple }, Some(u)) => multiple * u,
        _ => 0.0,
    };
    let tl = e.limit;
    let magnitude = match e.sense {
        Sense::PlusMinus => e.error.abs(),
        Sense::AtMost | Sense::AtLeast => e.error,
    };
    let (acceptance_limit, accepted) = match e.sense {
        // Not clamped at zero: with U beyond the tolerance the limit is negative, and not even
        // an error of exactly zero is accepted.
        Sense::PlusMinus | Sense::AtMost => {
            let al = tl - guard_band;
            (al, al >= 0.0 && magnitude <= al)
        }
        Sense::AtLeast => {
            let al = tl + guard_band;
            (al, magnitude >= al)
        }
    };
    let marginal = u.is_some_and(|u| (magnitude - tl).abs() < u);
    Decision {
        rule,
        tolerance_limit: tl,
        guard_band,
        acceptance_limit,
        expanded_uncertainty: u,
        tur: u.filter(|u| *u > 0.0).map(|u| tl / u),
        accepted,
        marginal,
        no_acceptance_zone: matches!(e.sense, Sense::PlusMinus | Sense::AtMost)
            && tl - guard_band < 0.0,
        risk: None,
    }
}

/// The probability that the true error lies beyond the tolerance limit, for a true error
/// distributed normally around the measured one with standard uncertainty `u` (JCGM 106:2012,
/// the conformance probability's complement; ILAC-G8:09/2019): both tails for ± limits, one
/// for a bound. `None` without an uncertainty.
pub fn specific_risk(e: &Evaluation, u: f64) -> Option<f64> {
    use statrs::distribution::{ContinuousCDF, Normal};
    if !(u > 0.0 && u.is_finite()) {
        return None;
    }
    let n = Normal::new(e.error, u).ok()?;
    Some(match e.sense {
        Sense::PlusMinus => n.sf(e.limit) + n.cdf(-e.limit),
        Sense::AtMost => n.sf(e.limit),
        Sense::AtLeast => n.cdf(e.limit),
    })
}

/// Whether more samples could not change the decision: the error with its expanded uncertainty
/// lies wholly inside the acceptance limit, or wholly beyond the tolerance limit. A result at
/// the acceptance limit itself is not settled.
pub fn settled(e: &Evaluation, d: &Decision) -> bool {
    let Some(u) = d.expanded_uncertainty else {
        return false;
    };
    match e.sense {
        Sense::PlusMinus | Sense::AtMost => {
            let magnitude = match e.sense {
                Sense::PlusMinus => e.error.abs(),
                _ => e.error,
            };
            magnitude + u < d.acceptance_limit || magnitude - u > d.tolerance_limit
        }
        Sense::AtLeast => e.error - u > d.acceptance_limit || e.error + u < d.tolerance_limit,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn error(e: f64, limit: f64) -> Evaluation {
        Evaluation {
            error: e,
            error_unit: "%".into(),
            limit,
            sense: Sense::PlusMinus,
            within: e.abs() <= limit,
        }
    }

    /// JCGM 106:2012's specific risk of a normal result: tolerance ±1.0 %, measured +0.8 %,
    /// U = 0.3 % at k = 2 (u = 0.15 %) gives 1 − Φ(1.333) = 0.0912 from a normal table; at the
    /// acceptance limit of guarded acceptance with w = U (ILAC-G8) it is 1 − Φ(2) = 0.02275.
    #[test]
    fn specific_risk_matches_the_published_formula() {
        let r = specific_risk(&error(0.8, 1.0), 0.15).unwrap();
        assert!((r - 0.0912).abs() < 5e-5, "{r}");
        let at_al = specific_risk(&error(0.7, 1.0), 0.15).unwrap();
        assert!((at_al - 0.02275).abs() < 5e-5, "{at_al}");
        // Symmetric: −0.8 % is as risky as +0.8 %.
        let neg = specific_risk(&error(-0.8, 1.0), 0.15).unwrap();
        assert!((neg - r).abs() < 1e-12);
    }

    /// ILAC-G8:09/2019: with the guard band w = U larger than the tolerance, the acceptance
    /// limit TL − w is negative and no result is accepted, not even an error of exactly zero.
    #[test]
    fn no_result_is_accepted_when_u_exceeds_the_tolerance() {
        let d = decide(
            &error(0.0, 1.0),
            Some(1.2),
            DecisionRule::Guarded { multiple: 1.0 },
        );
        assert!(!d.accepted && d.no_acceptance_zone);
        assert!((d.acceptance_limit + 0.2).abs() < 1e-12);
        // Simple acceptance still accepts within the tolerance.
        let s = decide(&error(0.0, 1.0), Some(1.2), DecisionRule::Simple);
        assert!(s.accepted && !s.no_acceptance_zone);
    }

    /// ILAC-G8:09/2019 guarded acceptance with w = U: tolerance ±1.0 %, U = 0.3 % gives the
    /// acceptance limit 0.7 %; +0.8 % passes simple acceptance but not guarded.
    #[test]
    fn guarded_acceptance_moves_the_limit_in_by_u() {
        let simple = decide(&error(0.8, 1.0), Some(0.3), DecisionRule::Simple);
        assert!(simple.accepted && simple.marginal);
        assert_eq!(simple.acceptance_limit, 1.0);
        let guarded = decide(
            &error(0.8, 1.0),
            Some(0.3),
            DecisionRule::Guarded { multiple: 1.0 },
        );
        assert!(!guarded.accepted);
        assert!((guarded.acceptance_limit - 0.7).abs() < 1e-12);
        assert!((guarded.tur.unwrap() - 1.0 / 0.3).abs() < 1e-12);
        assert!(guarded.low_tur());
    }

    #[test]
    fn clear_results_are_not_marginal() {
        let clear_pass = decide(&error(0.2, 1.0), Some(0.1), DecisionRule::Simple);
        assert!(clear_pass.accepted && !clear_pass.marginal);
        let clear_fail = decide(&error(-1.5, 1.0), Some(0.1), DecisionRule::Simple);
        assert!(!clear_fail.accepted && !clear_fail.marginal);
        let near_fail = decide(&error(1.05, 1.0), Some(0.1), DecisionRule::Simple);
        assert!(!near_fail.accepted && near_fail.marginal);
        // A reading exactly at the acceptance limit is accepted.
        let at_limit = decide(
            &error(0.9, 1.0),
            Some(0.1),
            DecisionRule::Guarded { multiple: 1.0 },
        );
        assert!(at_limit.accepted);
    }

    #[test]
    fn one_sided_limits() {
        let mut creep = error(0.4, 0.5);
        creep.sense = Sense::AtMost;
        assert!(decide(&creep, Some(0.05), DecisionRule::Simple).accepted);
        assert!(!decide(&creep, Some(0.2), DecisionRule::Guarded { multiple: 1.0 }).accepted);
        let mut start = error(2.0, 1.0);
        start.sense = Sense::AtLeast;
        assert!(decide(&start, Some(0.5), DecisionRule::Guarded { multiple: 1.0 }).accepted);
        assert!(!decide(&start, Some(1.5), DecisionRule::Guarded { multiple: 1.0 }).accepted);
    }

    #[test]
    fn a_decision_is_settled_only_clear_of_both_limits() {
        let rule = DecisionRule::Guarded { multiple: 1.0 };
        let clear = error(0.2, 1.0);
        assert!(settled(&clear, &decide(&clear, Some(0.1), rule)));
        let far_out = error(1.5, 1.0);
        assert!(settled(&far_out, &decide(&far_out, Some(0.1), rule)));
        // Exactly at the acceptance limit (0.9 = 1.0 − U): more samples could tip it.
        let at_limit = error(0.9, 1.0);
        assert!(!settled(&at_limit, &decide(&at_limit, Some(0.1), rule)));
        let between = error(1.05, 1.0);
        assert!(!settled(&between, &decide(&between, Some(0.1), rule)));
    }
}
