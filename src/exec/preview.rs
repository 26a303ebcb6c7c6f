//! What a plan's checks can be expected to decide, before any load: the part of each check's
//! expanded uncertainty known from the plan and the bench alone.
//!
//! A run's U also holds the unit's repeatability, which only the samples tell; so what is
//! computed here is a floor: U ≥ 2 · √(u_ref² + u_res² + u_rep²) with the reference's accuracy
//! at the step's nominal reading (rectangular, GUM 4.3.7), the unit's resolution (GUM F.2.2.1)
//! and a declared repeatability, and k ≥ 2. Under a guarded rule (ILAC-G8:09/2019) the
//! acceptance limit is TL − w·U; when w times the floor reaches TL, no result can be accepted.

use crate::metrology::accuracy::Accuracy;
use crate::plan::{DecisionRule, Plan, Tolerance};
use std::collections::BTreeMap;

/// The reference a plan would be run against.
pub struct ExpectedReference<'a> {
    /// "the station's reference SIM-REF-1", for messages.
    pub name: String,
    pub accuracy: Option<Accuracy>,
    pub ranges: &'a BTreeMap<String, f64>,
}

/// A check whose acceptance zone is empty or nearly so, before any sample is taken.
#[derive(Debug, Clone, PartialEq)]
pub struct NarrowZone {
    pub step: String,
    pub quantity: String,
    /// The floor of U, percent of the nominal reading.
    pub floor_percent: f64,
    pub limit_percent: f64,
    pub guard_multiple: f64,
    /// The floor alone leaves no acceptance zone (not just likely).
    pub certain: bool,
}

impl std::fmt::Display for NarrowZone {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "step {} {}: U is at least {:.3} % before the unit's own spread, against ±{} % with a guard band of {} U: {}",
            self.step,
            self.quantity,
            self.floor_percent,
            self.limit_percent,
            self.guard_multiple,
            if self.certain {
                "no acceptance zone (U exceeds the tolerance): every unit will be rejected"
            } else {
                "the acceptance zone is likely empty once the unit's repeatability is added"
            }
        )
    }
}

/// Share of the tolerance a guard band's floor may take before `check` warns.
pub const LIKELY_EMPTY_FROM: f64 = 0.7;

/// The guarded checks whose acceptance zone the floor of U leaves empty or nearly so.
pub fn narrow_zones(plan: &Plan, reference: &ExpectedReference) -> Vec<NarrowZone> {
    let DecisionRule::Guarded { multiple } = plan.decision else {
        return Vec::new();
    };
    let mut out = Vec::new();
    for step in &plan.steps {
        for check in &step.checks {
            let limit = match check.tolerance {
                Tolerance::PercentOfReading { percent } | Tolerance::Class { percent, .. } => {
                    percent
                }
                _ => continue,
            };
            let window = step.sampling_window_s().max(step.interval_s);
            let nominal = step.load.nominal(check.quantity, window);
            if nominal == 0.0 || !nominal.is_finite() {
                continue;
            }
            let mut variance = 0.0;
            if let Some(acc) = reference.accuracy {
                let range = reference.ranges.get(check.quantity.name()).copied();
                if let Ok(a) = acc.half_width(nominal, range) {
                    variance += (a / nominal.abs() * 100.0 / 3f64.sqrt()).powi(2);
                }
            }
            if let Some(d) = plan.link.resolution(check.quantity) {
                let readings = if check.quantity.is_register() {
                    2.0
                } else {
                    1.0
                };
                variance += readings * (d / nominal.abs() * 100.0 / 12f64.sqrt()).powi(2);
            }
            if let Some(r) = &step.repeatability {
                variance += (r.relative * 100.0).powi(2);
            }
            let floor = 2.0 * variance.sqrt();
            if multiple * floor >= LIKELY_EMPTY_FROM * limit {
                out.push(NarrowZone {
                    step: step.id.clone(),
                    quantity: check.quantity.name().to_string(),
                    floor_percent: floor,
                    limit_percent: limit,
                    guard_multiple: multiple,
                    certain: multiple * floor >= limit,
                });
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn plan(tolerance: &str) -> Plan {
        let text = std::fs::read_to_string("test-plans/demo.yaml")
            .unwrap()
            .replace(
                "      - { quantity: voltage, tolerance: { percent: 0.5 % } }",
                &format!("      - {{ quantity: voltage, tolerance: {tolerance} }}"),
            );
        Plan::from_text("demo.yaml", &text).unwrap()
    }

    /// A reference of ±0.5 % of reading gives u = 0.5/√3 = 0.289 % and a floor of U = 0.577 %
    /// (GUM 4.3.7, k = 2); with w = 1 U (ILAC-G8) a ±0.5 % tolerance has no acceptance zone, a
    /// ±0.8 % one a likely empty one (0.577 ≥ 0.7 · 0.8), a ±2 % one is fine.
    #[test]
    fn the_floor_of_u_against_the_tolerance() {
        let ranges = BTreeMap::new();
        let reference = ExpectedReference {
            name: "test".into(),
            accuracy: Some(Accuracy::parse("0.5 % of reading").unwrap()),
            ranges: &ranges,
        };
        let voltage = |zones: Vec<NarrowZone>| {
            zones
                .into_iter()
                .find(|z| z.step == "basic-Ib" && z.quantity == "voltage")
        };
        let z = voltage(narrow_zones(&plan("{ percent: 0.5 % }"), &reference)).unwrap();
        assert!((z.floor_percent - 2.0 * 0.5 / 3f64.sqrt()).abs() < 1e-9);
        assert!(z.certain);
        assert!(z.to_string().contains("no acceptance zone"), "{z}");
        let z = voltage(narrow_zones(&plan("{ percent: 0.8 % }"), &reference)).unwrap();
        assert!(!z.certain);
        assert!(voltage(narrow_zones(&plan("{ percent: 2 % }"), &reference)).is_none());
    }
}
