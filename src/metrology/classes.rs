//! Accuracy-class limits, looked up from the data file `classes.yaml` shipped with the code.
//!
//! The tables are data, not code: each carries the standard, edition and table it restates and
//! whether its numbers were read in the published text or are from memory.

use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::sync::LazyLock;

/// The class tables shipped with meterproof.
pub const CLASS_DATA: &str = include_str!("classes.yaml");

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Energy {
    Active,
    Reactive,
}

/// The current a table's ranges are multiples of.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum Base {
    /// Basic current, direct-connected meters.
    Ib,
    /// Rated current, transformer-operated meters.
    In,
    /// Transitional current (EN 50470-3).
    Itr,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct Data {
    tables: Vec<Table>,
    special: Vec<Special>,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct Table {
    standard: String,
    edition: String,
    table: String,
    provenance: String,
    energy: Energy,
    base: Base,
    classes: Vec<String>,
    rows: Vec<Row>,
}

/// A range bound: a multiple of the base current, or the meter's Imin / Imax.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Bound {
    Times(f64),
    Min,
    Max,
}

impl<'de> Deserialize<'de> for Bound {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Bound, D::Error> {
        #[derive(Deserialize)]
        #[serde(untagged)]
        enum B {
            N(f64),
            S(String),
        }
        match B::deserialize(d)? {
            B::N(x) => Ok(Bound::Times(x)),
            B::S(s) if s == "max" => Ok(Bound::Max),
            B::S(s) if s == "min" => Ok(Bound::Min),
            B::S(s) => Err(serde::de::Error::custom(format!("bad bound {s}"))),
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct Row {
    from: Bound,
    to: Bound,
    pf: Vec<String>,
    limits: BTreeMap<String, f64>,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct Special {
    standard: String,
    edition: String,
    class: String,
    base: Base,
    starting: f64,
    starting_provenance: String,
    #[serde(default)]
    creep_constant: Option<f64>,
    #[serde(default)]
    creep_provenance: Option<String>,
}

static DATA: LazyLock<Data> = LazyLock::new(|| {
    serde_yaml::from_str(CLASS_DATA).expect("the shipped class tables parse (tested)")
});

/// The meter's currents a class lookup needs.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Currents {
    pub base: Base,
    /// The base current's value, amperes.
    pub base_a: f64,
    pub max_a: f64,
    pub min_a: Option<f64>,
}

/// A limit found, with where it comes from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClassLimit {
    pub percent: f64,
    /// "IEC 62053-21:2003 class 1, 0.1 Ib ≤ I ≤ Imax, PF 1 (from memory)"
    pub basis: String,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ClassError {
    #[error("no {energy} class \"{class}\" with ranges in {base:?} is known; known: {known}")]
    Unknown {
        class: String,
        energy: &'static str,
        base: Base,
        known: String,
    },
    #[error(
        "class {class} has no limit at {current_text} and {pf_text}: the table's rows are {rows}"
    )]
    OutsideTable {
        class: String,
        current_text: String,
        pf_text: String,
        rows: String,
    },
    #[error("class {class} tables need the meter's {what}")]
    MissingRating { class: String, what: &'static str },
}

fn energy_name(e: Energy) -> &'static str {
    match e {
        Energy::Active => "active",
        Energy::Reactive => "reactive",
    }
}

/// Whether the phase angle (degrees, positive inductive) meets a table's power-factor condition.
fn pf_matches(condition: &str, energy: Energy, phase_deg: f64) -> bool {
    const TOL: f64 = 0.5;
    let near = |target: f64| (phase_deg - target).abs() <= TOL;
    match (energy, condition) {
        (Energy::Active, "1") => near(0.0),
        (Energy::Active, "0.5i") => near(60.0),
        (Energy::Active, "0.8c") => near(-(0.8f64.acos().to_degrees())),
        (Energy::Reactive, "1") => near(90.0) || near(-90.0),
        (Energy::Reactive, "0.5i") => near(30.0),
        (Energy::Reactive, "0.5c") => near(-30.0),
        _ => false,
    }
}

fn bound_a(b: Bound, c: &Currents) -> Option<f64> {
    match b {
        Bound::Times(x) => Some(x * c.base_a),
        Bound::Max => Some(c.max_a),
        Bound::Min => c.min_a,
    }
}

fn bound_text(b: Bound, base: Base) -> String {
    match b {
        Bound::Times(x) => format!("{x} {base:?}"),
        Bound::Max => "Imax".into(),
        Bound::Min => "Imin".into(),
    }
}

fn row_text(row: &Row, base: Base) -> String {
    let upper = if row.to == Bound::Max { "≤" } else { "<" };
    format!(
        "{} ≤ I {upper} {} at PF {}",
        bound_text(row.from, base),
        bound_text(row.to, base),
        row.pf.join("/")
    )
}

/// The class names known for an energy and base.
pub fn known_classes(energy: Energy, base: Base) -> Vec<String> {
    DATA.tables
        .iter()
        .filter(|t| t.energy == energy && t.base == base)
        .flat_map(|t| t.classes.clone())
        .collect()
}

/// The limit for `class` at a load of `current_a` amperes and `phase_deg`.
pub fn limit(
    class: &str,
    energy: Energy,
    currents: &Currents,
    current_a: f64,
    phase_deg: f64,
) -> Result<ClassLimit, ClassError> {
    let table = DATA
        .tables
        .iter()
        .find(|t| {
            t.energy == energy && t.base == currents.base && t.classes.iter().any(|c| c == class)
        })
        .ok_or_else(|| ClassError::Unknown {
            class: class.into(),
            energy: energy_name(energy),
            base: currents.base,
            known: known_classes(energy, currents.base).join(", "),
        })?;
    let eps = 1e-9 * currents.max_a;
    for row in &table.rows {
        let lo = bound_a(row.from, currents).ok_or_else(|| ClassError::MissingRating {
            class: class.into(),
            what: "minimum current (ratings.minimum_current)",
        })?;
        let hi = bound_a(row.to, currents).ok_or_else(|| ClassError::MissingRating {
            class: class.into(),
            what: "minimum current (ratings.minimum_current)",
        })?;
        let in_range = current_a >= lo - eps
            && (current_a < hi - eps || (row.to == Bound::Max && current_a <= hi + eps));
        if in_range && row.pf.iter().any(|p| pf_matches(p, energy, phase_deg)) {
            let provenance = if table.provenance == "memory" {
                " (from memory; verify against the current edition)"
            } else {
                ""
            };
            return Ok(ClassLimit {
                percent: row.limits[class],
                basis: format!(
                    "{}:{} class {class}, {}{provenance}; {}",
                    table.standard,
                    table.edition,
                    row_text(row, table.base),
                    table.table
                ),
            });
        }
    }
    Err(ClassError::OutsideTable {
        class: class.into(),
        current_text: format!(
            "{} A ({:.4} {:?})",
            current_a,
            current_a / currents.base_a,
            currents.base
        ),
        pf_text: format!("a phase angle of {phase_deg:.2}°"),
        rows: table
            .rows
            .iter()
            .map(|r| row_text(r, table.base))
            .collect::<Vec<_>>()
            .join("; "),
    })
}

/// Starting current and no-load constant of a class, with their sources.
#[derive(Debug, Clone, PartialEq)]
pub struct SpecialValues {
    pub starting_fraction: f64,
    pub creep_constant: Option<f64>,
    pub basis: String,
}

/// The starting-current fraction and creep constant of `class` (ranges in `base`).
pub fn special(class: &str, base: Base) -> Option<SpecialValues> {
    DATA.special
        .iter()
        .find(|s| s.class == class && s.base == base)
        .map(|s| SpecialValues {
            starting_fraction: s.starting,
            creep_constant: s.creep_constant,
            basis: format!(
                "{}:{} class {} (starting current {}; no-load constant {})",
                s.standard,
                s.edition,
                s.class,
                s.starting_provenance,
                s.creep_provenance.as_deref().unwrap_or("none")
            ),
        })
}

/// The no-load (creep) test duration in minutes: Δt ≥ C·10⁶ / (k · m · Un · Imax), with k the
/// meter constant (imp/kWh), m the number of measuring elements, Un volts and Imax amperes
/// (IEC 62053-21 and -22, no-load condition; the constant C per class is from memory).
pub fn creep_minutes(constant: f64, meter_constant: f64, elements: u32, un: f64, imax: f64) -> f64 {
    constant * 1e6 / (meter_constant * f64::from(elements) * un * imax)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ib(base_a: f64, max_a: f64) -> Currents {
        Currents {
            base: Base::Ib,
            base_a,
            max_a,
            min_a: None,
        }
    }

    /// IEC 62053-21:2003 limits (from memory, as the data file says), domain notes §3.
    #[test]
    fn iec_62053_21_class_1_and_2() {
        let c = ib(5.0, 60.0);
        let at = |class: &str, i: f64, phi: f64| {
            limit(class, Energy::Active, &c, i, phi).unwrap().percent
        };
        assert_eq!(at("1", 0.25, 0.0), 1.5); // 0.05 Ib
        assert_eq!(at("1", 0.5, 0.0), 1.0); // 0.1 Ib
        assert_eq!(at("1", 60.0, 0.0), 1.0); // Imax, inclusive
        assert_eq!(at("2", 0.3, 0.0), 2.5);
        assert_eq!(at("2", 5.0, 0.0), 2.0);
        assert_eq!(at("1", 0.5, 60.0), 1.5); // 0.1 Ib at 0.5 inductive
        assert_eq!(at("1", 1.0, 60.0), 1.0); // 0.2 Ib
        assert_eq!(at("2", 5.0, -36.87), 2.0); // 0.8 capacitive
        let basis = limit("1", Energy::Active, &c, 5.0, 0.0).unwrap().basis;
        assert!(
            basis.starts_with("IEC 62053-21:2003 class 1, 0.1 Ib ≤ I ≤ Imax at PF 1"),
            "{basis}"
        );
        assert!(basis.contains("from memory"));
    }

    /// IEC 62053-22:2003 classes 0.2 S and 0.5 S (from memory).
    #[test]
    fn iec_62053_22_classes_s() {
        let c = Currents {
            base: Base::In,
            base_a: 5.0,
            max_a: 6.0,
            min_a: None,
        };
        let at = |class: &str, i: f64, phi: f64| {
            limit(class, Energy::Active, &c, i, phi).unwrap().percent
        };
        assert_eq!(at("0.2 S", 0.05, 0.0), 0.4); // 0.01 In
        assert_eq!(at("0.2 S", 5.0, 0.0), 0.2);
        assert_eq!(at("0.5 S", 0.1, 60.0), 1.0); // 0.02 In at 0.5 ind
        assert_eq!(at("0.5 S", 5.0, 60.0), 0.6);
        assert_eq!(at("0.2 S", 5.0, -36.87), 0.3);
    }

    /// IEC 62053-23:2003 reactive classes 2 and 3 (from memory), sin φ conditions.
    #[test]
    fn iec_62053_23_reactive() {
        let c = ib(5.0, 60.0);
        let at = |class: &str, i: f64, phi: f64| {
            limit(class, Energy::Reactive, &c, i, phi).unwrap().percent
        };
        assert_eq!(at("2", 0.3, 90.0), 2.5);
        assert_eq!(at("3", 5.0, 90.0), 3.0);
        assert_eq!(at("2", 0.6, 30.0), 2.5);
        assert_eq!(at("3", 5.0, 30.0), 3.0);
    }

    /// EN 50470-3 classes A, B, C at reference conditions and PF 1 (from memory).
    #[test]
    fn en_50470_3_classes() {
        let c = Currents {
            base: Base::Itr,
            base_a: 0.5,
            max_a: 40.0,
            min_a: Some(0.25),
        };
        let at = |class: &str, i: f64| limit(class, Energy::Active, &c, i, 0.0).unwrap().percent;
        assert_eq!(at("A", 0.3), 2.5);
        assert_eq!(at("B", 0.3), 1.5);
        assert_eq!(at("C", 0.3), 1.0);
        assert_eq!(at("A", 5.0), 2.0);
        assert_eq!(at("B", 5.0), 1.0);
        assert_eq!(at("C", 40.0), 0.5);
        assert!(
            limit("B", Energy::Active, &c, 0.1, 0.0).is_err(),
            "below Imin"
        );
        assert!(
            limit("B", Energy::Active, &c, 5.0, 60.0).is_err(),
            "PF 0.5 is not in the table"
        );
    }

    #[test]
    fn outside_the_table_says_where_the_rows_are() {
        let c = ib(5.0, 60.0);
        let e = limit("1", Energy::Active, &c, 0.1, 0.0)
            .unwrap_err()
            .to_string();
        assert!(e.contains("0.05 Ib ≤ I < 0.1 Ib at PF 1"), "{e}");
        assert!(
            limit("1", Energy::Active, &c, 5.0, 45.0).is_err(),
            "PF 0.707 is not in the table"
        );
        let e = limit("0.2 S", Energy::Active, &c, 5.0, 0.0)
            .unwrap_err()
            .to_string();
        assert!(e.contains("known: 1, 2"), "{e}");
    }

    /// Domain notes §3: class 1, k = 1000, m = 1, Un = 230 V, Imax = 60 A → Δt ≥ 43.48 min.
    #[test]
    fn creep_test_duration() {
        let s = special("1", Base::Ib).unwrap();
        let minutes = creep_minutes(s.creep_constant.unwrap(), 1000.0, 1, 230.0, 60.0);
        assert!((minutes - 43.478).abs() < 0.001, "{minutes}");
        // Starting current 0.004 Ib for class 1, 0.005 Ib for class 2, 0.001 In for the S classes
        // (IEC 62053-21/-22:2003, via a published excerpt).
        assert_eq!(s.starting_fraction, 0.004);
        assert_eq!(special("2", Base::Ib).unwrap().starting_fraction, 0.005);
        assert_eq!(special("0.5 S", Base::In).unwrap().starting_fraction, 0.001);
    }
}
