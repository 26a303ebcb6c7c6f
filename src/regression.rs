//! Regression checks after a firmware change: did the candidate firmware move the meters?
//!
//! For each check (step × quantity × channel) the errors of the baseline's units are set against
//! the candidate's: paired by serial number when both sides tested the same units (the golden
//! units), otherwise by Welch's t-test; and an equivalence test (two one-sided tests) against the
//! allowed shift. Each check gets one of our verdicts, [`Movement`].

use crate::metrology::compare::{self, Shift};
use crate::plan::Quantity;
use crate::record::{CheckVerdict, UnitRecord};
use serde::Serialize;
use std::collections::BTreeMap;

/// The significance level of the tests (two-sided for the shift, each one-sided test of TOST).
pub const ALPHA: f64 = 0.05;

/// What a firmware change did to one check.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Movement {
    /// No significant shift, and the shift is shown to lie within the allowance.
    Unchanged,
    /// No significant shift, but too little data to show it lies within the allowance.
    NotShownWithinAllowance,
    /// A significant shift, shown to lie within the allowance: reported, not hidden.
    MovedWithinAllowance,
    /// A significant shift that is not shown to lie within the allowance.
    MovedBeyondAllowance,
    /// A unit that passed on the baseline fails on the candidate.
    NewlyFailing,
    /// A unit that failed on the baseline passes on the candidate.
    NewlyPassing,
}

impl Movement {
    pub fn words(self) -> &'static str {
        match self {
            Movement::Unchanged => "unchanged",
            Movement::NotShownWithinAllowance => "no significant shift, not shown within allowance",
            Movement::MovedWithinAllowance => "moved, within allowance",
            Movement::MovedBeyondAllowance => "MOVED BEYOND ALLOWANCE",
            Movement::NewlyFailing => "NEWLY FAILING",
            Movement::NewlyPassing => "newly passing",
        }
    }

    /// Whether this movement should stop a release.
    pub fn gates(self) -> bool {
        matches!(
            self,
            Movement::MovedBeyondAllowance | Movement::NewlyFailing
        )
    }

    /// Sort order for reports: what moved first.
    fn rank(self) -> u8 {
        match self {
            Movement::NewlyFailing => 0,
            Movement::MovedBeyondAllowance => 1,
            Movement::NewlyPassing => 2,
            Movement::MovedWithinAllowance => 3,
            Movement::NotShownWithinAllowance => 4,
            Movement::Unchanged => 5,
        }
    }
}

/// One check compared.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CheckComparison {
    pub step: String,
    pub quantity: Quantity,
    pub channel: String,
    pub error_unit: String,
    pub tolerance_limit: f64,
    /// The allowed shift, in the error's unit.
    pub allowance: f64,
    pub baseline_mean: f64,
    pub candidate_mean: f64,
    pub baseline_units: usize,
    pub candidate_units: usize,
    pub shift: f64,
    /// The test, where the data allow one.
    pub test: Option<Shift>,
    /// p-value of the equivalence test against ±allowance.
    pub equivalence_p: Option<f64>,
    pub newly_failing: Vec<String>,
    pub newly_passing: Vec<String>,
    pub movement: Movement,
}

/// The whole comparison.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Comparison {
    pub checks: Vec<CheckComparison>,
    /// Serials tested on both sides.
    pub paired_units: Vec<String>,
    /// Golden units missing from the baseline or the candidate.
    pub missing_golden: Vec<String>,
    /// What each side is: its plans, runs, firmware and time span.
    pub baseline: Side,
    pub candidate: Side,
    /// The steps in the order the records took them (the plan's load order).
    pub step_order: Vec<String>,
}

/// One side of a comparison, as the page names it.
#[derive(Debug, Clone, PartialEq, Default, Serialize)]
pub struct Side {
    /// "TM16-EOL rev A".
    pub plans: Vec<String>,
    pub runs: Vec<String>,
    pub firmware: Vec<String>,
    pub units: usize,
    /// The first and last start time of its records.
    pub from: String,
    pub to: String,
}

impl Side {
    pub fn of(records: &[UnitRecord]) -> Side {
        let mut side = Side {
            units: records.len(),
            ..Side::default()
        };
        for r in records {
            let plan = format!("{} rev {}", r.plan.id, r.plan.revision);
            if !side.plans.contains(&plan) {
                side.plans.push(plan);
            }
            if !side.runs.contains(&r.run_id) {
                side.runs.push(r.run_id.clone());
            }
            if let Some(f) = r.identity.as_ref().map(|i| i.firmware.clone())
                && !side.firmware.contains(&f)
            {
                side.firmware.push(f);
            }
        }
        let mut times: Vec<&str> = records.iter().map(|r| r.started_at.as_str()).collect();
        times.sort_unstable();
        side.from = times.first().map_or(String::new(), |t| t.to_string());
        side.to = times.last().map_or(String::new(), |t| t.to_string());
        side
    }
}

impl Comparison {
    pub fn gates(&self) -> bool {
        self.checks.iter().any(|c| c.movement.gates())
    }

    /// One line that says what the comparison showed, and no more: a failing headline names
    /// the checks that gate (up to five) and how many; where checks were not shown within their
    /// allowance, it does not claim that nothing moved.
    pub fn headline(&self) -> String {
        let named = |cs: &[&CheckComparison]| {
            let mut names: Vec<String> = cs.iter().take(5).map(|c| c.name()).collect();
            if cs.len() > 5 {
                names.push(format!("and {} more", cs.len() - 5));
            }
            names.join(", ")
        };
        let gating: Vec<&CheckComparison> =
            self.checks.iter().filter(|c| c.movement.gates()).collect();
        if !gating.is_empty() {
            return format!(
                "✘ {} of {} check{} moved beyond the allowance or newly fail: {}",
                gating.len(),
                self.checks.len(),
                if self.checks.len() == 1 { "" } else { "s" },
                named(&gating)
            );
        }
        let open: Vec<&CheckComparison> = self
            .checks
            .iter()
            .filter(|c| c.movement == Movement::NotShownWithinAllowance)
            .collect();
        if !open.is_empty() {
            return format!(
                "◐ no check moved significantly, but {} of {} {} not shown to lie within the allowance (too little data or too much spread): {}",
                open.len(),
                self.checks.len(),
                if open.len() == 1 { "is" } else { "are" },
                named(&open)
            );
        }
        let moved = self
            .checks
            .iter()
            .filter(|c| c.movement == Movement::MovedWithinAllowance)
            .count();
        format!(
            "✔ every one of {} checks shown within its allowance{}",
            self.checks.len(),
            if moved > 0 {
                format!(" ({moved} moved significantly, within it)")
            } else {
                String::new()
            }
        )
    }
}

impl CheckComparison {
    /// "basic-Ib current L".
    pub fn name(&self) -> String {
        format!("{} {} {}", self.step, self.quantity.name(), self.channel)
    }

    /// How the sides were compared, with the sample sizes: "paired, 16 units" or
    /// "Welch, 16 vs 16"; "no test" where the data allow none.
    pub fn method(&self) -> String {
        match &self.test {
            Some(t) if t.paired => format!("paired, {} units", (t.dof + 1.0).round() as u64),
            Some(_) => format!("Welch, {} vs {}", self.baseline_units, self.candidate_units),
            None => format!(
                "no test, {} vs {} units",
                self.baseline_units, self.candidate_units
            ),
        }
    }

    /// The shift's p-value to two significant figures, "< 0.001" below that, "–" without a
    /// test or spread.
    pub fn p_text(&self) -> String {
        match self.test.map(|t| t.p) {
            Some(p) if p.is_finite() && p < 0.001 => "<0.001".into(),
            Some(p) if p.is_finite() => {
                let digits = (1 - p.log10().floor() as i32).max(2) as usize;
                format!("{p:.digits$}")
            }
            _ => "—".into(),
        }
    }
}

type Key = (String, Quantity, String);

/// One unit's result for one check.
#[derive(Debug, Clone)]
struct UnitResult {
    error: f64,
    verdict: CheckVerdict,
    unit: String,
    limit: f64,
}

/// Results by serial number.
type ByUnit = BTreeMap<String, UnitResult>;

/// Per check, the result of each serial (its newest record).
fn errors_by_check(records: &[UnitRecord]) -> BTreeMap<Key, ByUnit> {
    let mut newest: BTreeMap<&str, &UnitRecord> = BTreeMap::new();
    for r in records {
        let keep = newest
            .get(r.serial.as_str())
            .is_none_or(|old| old.finished_at < r.finished_at);
        if keep {
            newest.insert(&r.serial, r);
        }
    }
    let mut out: BTreeMap<Key, ByUnit> = BTreeMap::new();
    for (serial, r) in newest {
        for s in &r.steps {
            for c in &s.checks {
                if let (Some(e), Some(d)) = (&c.evaluation, &c.decision) {
                    out.entry((s.id.clone(), c.quantity, c.channel.clone()))
                        .or_default()
                        .insert(
                            serial.to_string(),
                            UnitResult {
                                error: e.error,
                                verdict: c.verdict,
                                unit: e.error_unit.clone(),
                                limit: d.tolerance_limit,
                            },
                        );
                }
            }
        }
    }
    out
}

/// Compares `candidate` with `baseline`; `allowance` is the allowed shift as a fraction of each
/// check's tolerance limit.
pub fn compare(
    baseline: &[UnitRecord],
    candidate: &[UnitRecord],
    allowance: f64,
    golden: &[String],
) -> Comparison {
    let base = errors_by_check(baseline);
    let cand = errors_by_check(candidate);
    let mut checks = Vec::new();
    let mut paired_units: Vec<String> = Vec::new();
    for (key, b) in &base {
        let Some(c) = cand.get(key) else { continue };
        let common: Vec<&String> = b.keys().filter(|s| c.contains_key(*s)).collect();
        for s in &common {
            if !paired_units.contains(s) {
                paired_units.push((*s).clone());
            }
        }
        let first = b.values().next().expect("a unit").clone();
        let (unit, limit) = (first.unit, first.limit);
        let eps = allowance * limit;
        let b_errors: Vec<f64> = b.values().map(|v| v.error).collect();
        let c_errors: Vec<f64> = c.values().map(|v| v.error).collect();
        let mean = |x: &[f64]| x.iter().sum::<f64>() / x.len() as f64;
        let (test, shift) = if common.len() >= 2 {
            let d: Vec<f64> = common.iter().map(|s| c[*s].error - b[*s].error).collect();
            (compare::paired(&d), mean(&d))
        } else {
            (
                compare::welch(&b_errors, &c_errors),
                mean(&c_errors) - mean(&b_errors),
            )
        };
        let equivalence_p = test.as_ref().map(|t| compare::equivalence_p(t, eps));
        let newly = |from: &ByUnit, to: &ByUnit| {
            common
                .iter()
                .filter(|s| {
                    from[**s].verdict == CheckVerdict::Pass && to[**s].verdict == CheckVerdict::Fail
                })
                .map(|s| (*s).clone())
                .collect::<Vec<String>>()
        };
        let mut newly_failing = newly(b, c);
        let mut newly_passing = newly(c, b);
        if common.is_empty() {
            // Unpaired: a side with no failure against one with some.
            let fails = |m: &ByUnit| {
                m.iter()
                    .filter(|(_, v)| v.verdict == CheckVerdict::Fail)
                    .map(|(s, _)| s.clone())
                    .collect::<Vec<_>>()
            };
            let (fb, fc) = (fails(b), fails(c));
            if fb.is_empty() {
                newly_failing = fc;
            } else if fc.is_empty() {
                newly_passing = fb;
            }
        }
        let movement = if !newly_failing.is_empty() {
            Movement::NewlyFailing
        } else if !newly_passing.is_empty() {
            Movement::NewlyPassing
        } else {
            match (&test, equivalence_p) {
                (Some(t), Some(eq)) => match (t.p < ALPHA, eq < ALPHA) {
                    (true, true) => Movement::MovedWithinAllowance,
                    (true, false) => Movement::MovedBeyondAllowance,
                    (false, true) => Movement::Unchanged,
                    (false, false) => Movement::NotShownWithinAllowance,
                },
                // No spread at all (identical readings): the shift is known exactly.
                _ if shift == 0.0 => Movement::Unchanged,
                _ if shift.abs() <= eps => Movement::MovedWithinAllowance,
                _ => Movement::MovedBeyondAllowance,
            }
        };
        checks.push(CheckComparison {
            step: key.0.clone(),
            quantity: key.1,
            channel: key.2.clone(),
            error_unit: unit,
            tolerance_limit: limit,
            allowance: eps,
            baseline_mean: mean(&b_errors),
            candidate_mean: mean(&c_errors),
            baseline_units: b.len(),
            candidate_units: c.len(),
            shift,
            test,
            equivalence_p,
            newly_failing,
            newly_passing,
            movement,
        });
    }
    checks.sort_by_key(|c| c.movement.rank());
    let serials = |rs: &[UnitRecord]| rs.iter().map(|r| r.serial.clone()).collect::<Vec<_>>();
    let (sb, sc) = (serials(baseline), serials(candidate));
    let missing_golden = golden
        .iter()
        .filter(|g| !sb.contains(g) || !sc.contains(g))
        .cloned()
        .collect();
    paired_units.sort();
    Comparison {
        checks,
        paired_units,
        missing_golden,
        baseline: Side::of(baseline),
        candidate: Side::of(candidate),
        step_order: baseline
            .iter()
            .chain(candidate)
            .flat_map(|r| r.steps.iter().map(|s| s.id.clone()))
            .fold(Vec::new(), |mut order, id| {
                if !order.contains(&id) {
                    order.push(id);
                }
                order
            }),
    }
}

/// The comparison as JUnit XML: one test case per check, failing where the change should stop
/// a release.
pub fn junit(c: &Comparison, name: &str) -> String {
    use quick_junit::{NonSuccessKind, Report, TestCase, TestCaseStatus, TestSuite};
    let mut report = Report::new("meterproof compare");
    let mut suite = TestSuite::new(name);
    for check in &c.checks {
        let case_name = format!("{} {} {}", check.step, check.quantity.name(), check.channel);
        let status = if check.movement.gates() {
            let mut s = TestCaseStatus::non_success(NonSuccessKind::Failure);
            s.set_message(format!(
                "{}: shift {:+.4} {} (allowance ±{:.4})",
                check.movement.words(),
                check.shift,
                check.error_unit,
                check.allowance
            ));
            s
        } else {
            TestCaseStatus::success()
        };
        suite.add_test_case(TestCase::new(case_name, status));
    }
    report.add_test_suite(suite);
    report.to_string().unwrap_or_default()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn check(step: &str, movement: Movement, test: Option<Shift>) -> CheckComparison {
        CheckComparison {
            step: step.into(),
            quantity: Quantity::Current,
            channel: "L".into(),
            error_unit: "%".into(),
            tolerance_limit: 0.5,
            allowance: 0.1,
            baseline_mean: 0.0,
            candidate_mean: 0.0,
            baseline_units: 16,
            candidate_units: 12,
            shift: 0.0,
            test,
            equivalence_p: None,
            newly_failing: Vec::new(),
            newly_passing: Vec::new(),
            movement,
        }
    }

    fn shift(p: f64, paired: bool, dof: f64) -> Option<Shift> {
        Some(Shift {
            shift: 0.0,
            std_error: 0.01,
            dof,
            t: 0.0,
            p,
            paired,
        })
    }

    /// The headline says what was shown: never "nothing moved" when a check was inconclusive,
    /// and a failing headline names its checks and counts them.
    #[test]
    fn the_headline_claims_no_more_than_was_shown() {
        let all_shown = Comparison {
            checks: vec![
                check("a", Movement::Unchanged, shift(0.4, true, 7.0)),
                check("b", Movement::MovedWithinAllowance, shift(0.01, true, 7.0)),
            ],
            paired_units: Vec::new(),
            missing_golden: Vec::new(),
            baseline: Side::default(),
            candidate: Side::default(),
            step_order: Vec::new(),
        };
        assert_eq!(
            all_shown.headline(),
            "✔ every one of 2 checks shown within its allowance (1 moved significantly, within it)"
        );
        let mut open = all_shown.clone();
        open.checks[0].movement = Movement::NotShownWithinAllowance;
        let h = open.headline();
        assert!(
            h.starts_with("◐ no check moved significantly, but 1 of 2 is not shown"),
            "{h}"
        );
        assert!(h.ends_with("a current L"), "{h}");
        let mut gating = open.clone();
        for (i, m) in [Movement::NewlyFailing, Movement::MovedBeyondAllowance]
            .into_iter()
            .enumerate()
        {
            gating.checks[i].movement = m;
        }
        assert_eq!(
            gating.headline(),
            "✘ 2 of 2 checks moved beyond the allowance or newly fail: a current L, b current L"
        );
    }

    /// The method with its sample sizes, and p-values to two significant figures (common
    /// practice in reporting tests, no published source).
    #[test]
    fn methods_and_p_values_read_as_people_write_them() {
        assert_eq!(
            check("a", Movement::Unchanged, shift(0.5, true, 15.0)).method(),
            "paired, 16 units"
        );
        assert_eq!(
            check("a", Movement::Unchanged, shift(0.5, false, 20.3)).method(),
            "Welch, 16 vs 12"
        );
        assert_eq!(
            check("a", Movement::Unchanged, None).method(),
            "no test, 16 vs 12 units"
        );
        let p = |v: f64| check("a", Movement::Unchanged, shift(v, true, 3.0)).p_text();
        assert_eq!(p(0.254), "0.25");
        assert_eq!(p(0.0372), "0.037");
        assert_eq!(p(0.00512), "0.0051");
        assert_eq!(p(5.7e-8), "<0.001");
        assert_eq!(p(f64::NAN), "—");
    }
}
