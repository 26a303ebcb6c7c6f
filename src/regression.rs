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
}

impl Comparison {
    pub fn gates(&self) -> bool {
        self.checks.iter().any(|c| c.movement.gates())
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
