//! Accuracy-class limits, looked up from the data file `classes.yaml` shipped with the code.
//!
//! The tables are data, not code: each carries the standard, edition and table it restates and
//! whether its numbers were read in the published text or are from memory.
//!
//! Why this length: more than a third of the file is the tests of every table's cells against
//! the published (or remembered) values.

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
    /// Ambient temperature ranges (°C, inclusive) the table holds for; empty for a table of
    /// reference conditions.
    #[serde(default)]
    ambient: Vec<[f64; 2]>,
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
    #[error("class {class} has no table from \"{standard}\"; its tables come from: {known}")]
    UnknownStandard {
        class: String,
        standard: String,
        known: String,
    },
    #[error(
        "the {standard} limits for class {class} depend on the ambient temperature: the bench must state it (ambient_temperature in the station file)"
    )]
    NeedsAmbient { class: String, standard: String },
    #[error(
        "{standard} gives class {class} no limits at an ambient temperature of {ambient_c} °C; its bands cover {bands}"
    )]
    OutsideAmbient {
        class: String,
        standard: String,
        ambient_c: f64,
        bands: String,
    },
}

/// Which of a class's tables applies: a named standard (or the class's table of reference
/// conditions when none is named), and the bench's ambient temperature for tables by band.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct TableChoice<'a> {
    pub standard: Option<&'a str>,
    pub ambient_c: Option<f64>,
}

/// The standards whose tables give limits for `class` (first the default one).
pub fn standards_for(class: &str, energy: Energy, base: Base) -> Vec<String> {
    let mut out: Vec<String> = Vec::new();
    for t in &DATA.tables {
        if t.energy == energy
            && t.base == base
            && t.classes.iter().any(|c| c == class)
            && !out.contains(&t.standard)
        {
            out.push(t.standard.clone());
        }
    }
    out
}

/// Whether the limits of `class` from `standard` depend on the ambient temperature.
pub fn depends_on_ambient(class: &str, energy: Energy, base: Base, standard: &str) -> bool {
    DATA.tables.iter().any(|t| {
        t.energy == energy
            && t.base == base
            && t.standard == standard
            && t.classes.iter().any(|c| c == class)
            && !t.ambient.is_empty()
    })
}

fn band_text(bands: &[[f64; 2]]) -> String {
    bands
        .iter()
        .map(|[lo, hi]| format!("{lo:+} to {hi:+} °C"))
        .collect::<Vec<_>>()
        .join(" or ")
}

/// The table of `class` that `choice` selects.
fn table_for(
    class: &str,
    energy: Energy,
    base: Base,
    choice: &TableChoice,
) -> Result<&'static Table, ClassError> {
    let of_class: Vec<&'static Table> = DATA
        .tables
        .iter()
        .filter(|t| t.energy == energy && t.base == base && t.classes.iter().any(|c| c == class))
        .collect();
    if of_class.is_empty() {
        return Err(ClassError::Unknown {
            class: class.into(),
            energy: energy_name(energy),
            base,
            known: known_classes(energy, base).join(", "),
        });
    }
    let standard = match choice.standard {
        Some(s) => s.to_string(),
        // The default is the class's table of reference conditions, else its first table.
        None => of_class
            .iter()
            .find(|t| t.ambient.is_empty())
            .unwrap_or(&of_class[0])
            .standard
            .clone(),
    };
    let of_standard: Vec<&'static Table> = of_class
        .iter()
        .copied()
        .filter(|t| t.standard == standard)
        .collect();
    if of_standard.is_empty() {
        return Err(ClassError::UnknownStandard {
            class: class.into(),
            standard,
            known: standards_for(class, energy, base).join(", "),
        });
    }
    if let Some(t) = of_standard.iter().find(|t| t.ambient.is_empty()) {
        return Ok(t);
    }
    let ambient_c = choice.ambient_c.ok_or_else(|| ClassError::NeedsAmbient {
        class: class.into(),
        standard: standard.clone(),
    })?;
    of_standard
        .iter()
        .find(|t| {
            t.ambient
                .iter()
                .any(|[lo, hi]| ambient_c >= *lo && ambient_c <= *hi)
        })
        .copied()
        .ok_or_else(|| ClassError::OutsideAmbient {
            class: class.into(),
            standard,
            ambient_c,
            bands: of_standard
                .iter()
                .map(|t| band_text(&t.ambient))
                .collect::<Vec<_>>()
                .join("; "),
        })
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
        (Energy::Active, "0.5i..0.8c") => {
            (-(0.8f64.acos().to_degrees()) - TOL..=60.0 + TOL).contains(&phase_deg)
        }
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

/// "IEC 62053-21:2003", or the name alone where it carries its year ("Directive 2014/32/EU").
fn standard_text(table: &Table) -> String {
    if table.standard.contains(&table.edition) {
        table.standard.clone()
    } else {
        format!("{}:{}", table.standard, table.edition)
    }
}

/// The class names known for an energy and base.
pub fn known_classes(energy: Energy, base: Base) -> Vec<String> {
    DATA.tables
        .iter()
        .filter(|t| t.energy == energy && t.base == base)
        .flat_map(|t| t.classes.clone())
        .fold(Vec::new(), |mut known, c| {
            if !known.contains(&c) {
                known.push(c);
            }
            known
        })
}

/// The limit for `class` at a load of `current_a` amperes and `phase_deg`.
pub fn limit(
    class: &str,
    energy: Energy,
    currents: &Currents,
    current_a: f64,
    phase_deg: f64,
    choice: &TableChoice,
) -> Result<ClassLimit, ClassError> {
    let table = table_for(class, energy, currents.base, choice)?;
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
                    "{} class {class}, {}{provenance}; {}",
                    standard_text(table),
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

    /// IEC 62053-21:2003 limits (from memory, as the data file says; verify against the current
    /// edition).
    #[test]
    fn iec_62053_21_class_1_and_2() {
        let c = ib(5.0, 60.0);
        let at = |class: &str, i: f64, phi: f64| {
            limit(class, Energy::Active, &c, i, phi, &TableChoice::default())
                .unwrap()
                .percent
        };
        assert_eq!(at("1", 0.25, 0.0), 1.5); // 0.05 Ib
        assert_eq!(at("1", 0.5, 0.0), 1.0); // 0.1 Ib
        assert_eq!(at("1", 60.0, 0.0), 1.0); // Imax, inclusive
        assert_eq!(at("2", 0.3, 0.0), 2.5);
        assert_eq!(at("2", 5.0, 0.0), 2.0);
        assert_eq!(at("1", 0.5, 60.0), 1.5); // 0.1 Ib at 0.5 inductive
        assert_eq!(at("1", 1.0, 60.0), 1.0); // 0.2 Ib
        assert_eq!(at("2", 5.0, -36.87), 2.0); // 0.8 capacitive
        let basis = limit("1", Energy::Active, &c, 5.0, 0.0, &TableChoice::default())
            .unwrap()
            .basis;
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
            limit(class, Energy::Active, &c, i, phi, &TableChoice::default())
                .unwrap()
                .percent
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
            limit(class, Energy::Reactive, &c, i, phi, &TableChoice::default())
                .unwrap()
                .percent
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
        let at = |class: &str, i: f64| {
            limit(class, Energy::Active, &c, i, 0.0, &TableChoice::default())
                .unwrap()
                .percent
        };
        assert_eq!(at("A", 0.3), 2.5);
        assert_eq!(at("B", 0.3), 1.5);
        assert_eq!(at("C", 0.3), 1.0);
        assert_eq!(at("A", 5.0), 2.0);
        assert_eq!(at("B", 5.0), 1.0);
        assert_eq!(at("C", 40.0), 0.5);
        assert!(
            limit("B", Energy::Active, &c, 0.1, 0.0, &TableChoice::default()).is_err(),
            "below Imin"
        );
        assert!(
            limit("B", Energy::Active, &c, 5.0, 60.0, &TableChoice::default()).is_err(),
            "PF 0.5 is not in the table"
        );
    }

    /// Directive 2014/32/EU, Annex V (MI-003), Table 2 (published, Official Journal of the EU L 96,
    /// 29.3.2014): classes A, B, C by current range and ambient temperature band.
    #[test]
    fn directive_2014_32_annex_v_by_temperature_band() {
        let c = Currents {
            base: Base::Itr,
            base_a: 0.5,
            max_a: 40.0,
            min_a: Some(0.25),
        };
        let at = |class: &str, i: f64, phi: f64, t: f64| {
            let choice = TableChoice {
                standard: Some("Directive 2014/32/EU"),
                ambient_c: Some(t),
            };
            limit(class, Energy::Active, &c, i, phi, &choice)
                .unwrap()
                .percent
        };
        // Imin <= I < Itr, the four bands, classes A / B / C.
        for (t, a, b, cc) in [
            (23.0, 3.5, 2.0, 1.0),
            (35.0, 5.0, 2.5, 1.3),
            (-5.0, 5.0, 2.5, 1.3),
            (45.0, 7.0, 3.5, 1.7),
            (-15.0, 7.0, 3.5, 1.7),
            (60.0, 9.0, 4.0, 2.0),
            (-30.0, 9.0, 4.0, 2.0),
        ] {
            assert_eq!(at("A", 0.3, 0.0, t), a, "A at {t} °C");
            assert_eq!(at("B", 0.3, 0.0, t), b, "B at {t} °C");
            assert_eq!(at("C", 0.3, 0.0, t), cc, "C at {t} °C");
        }
        // Itr <= I <= Imax.
        for (t, a, b, cc) in [
            (23.0, 3.5, 2.0, 0.7),
            (35.0, 4.5, 2.5, 1.0),
            (50.0, 7.0, 3.5, 1.3),
            (65.0, 9.0, 4.0, 1.5),
        ] {
            assert_eq!(at("A", 40.0, 0.0, t), a, "A at {t} °C");
            assert_eq!(at("B", 5.0, 0.0, t), b, "B at {t} °C");
            assert_eq!(at("C", 0.5, 0.0, t), cc, "C at {t} °C");
        }
        // The limits hold across the rated power-factor range, 0.5 inductive to 0.8 capacitive.
        assert_eq!(at("B", 5.0, 60.0, 23.0), 2.0);
        assert_eq!(at("B", 5.0, -36.87, 23.0), 2.0);
        assert_eq!(at("B", 5.0, 25.84, 23.0), 2.0); // PF 0.9 inductive
        // A shared edge takes the better band; +30 °C is still the reference band.
        assert_eq!(at("C", 5.0, 0.0, 30.0), 0.7);
        assert_eq!(at("C", 5.0, 0.0, 5.0), 0.7);
        let choice = TableChoice {
            standard: Some("Directive 2014/32/EU"),
            ambient_c: Some(23.0),
        };
        let basis = limit("B", Energy::Active, &c, 5.0, 0.0, &choice)
            .unwrap()
            .basis;
        assert!(
            basis.starts_with("Directive 2014/32/EU class B, 1 Itr ≤ I ≤ Imax"),
            "{basis}"
        );
        assert!(
            basis.contains("Annex V (MI-003), Table 2, ambient +5 to +30 °C"),
            "{basis}"
        );
        assert!(!basis.contains("memory"), "{basis}");
        // Beyond the bands, at PF 0.5 capacitive, with no ambient, or from a standard the class
        // has no table in: refused, saying why.
        let e = limit(
            "B",
            Energy::Active,
            &c,
            5.0,
            0.0,
            &TableChoice {
                ambient_c: Some(75.0),
                ..choice
            },
        )
        .unwrap_err()
        .to_string();
        assert!(e.contains("+55 to +70 °C") && e.contains("75 °C"), "{e}");
        assert!(limit("B", Energy::Active, &c, 5.0, -60.0, &choice).is_err());
        let e = limit(
            "B",
            Energy::Active,
            &c,
            5.0,
            0.0,
            &TableChoice {
                ambient_c: None,
                ..choice
            },
        )
        .unwrap_err()
        .to_string();
        assert!(e.contains("ambient_temperature"), "{e}");
        let e = limit("1", Energy::Active, &ib(5.0, 60.0), 5.0, 0.0, &choice)
            .unwrap_err()
            .to_string();
        assert!(e.contains("IEC 62053-21"), "{e}");
        // With no standard named, A/B/C keep their reference-conditions table (EN 50470-3).
        assert!(!depends_on_ambient(
            "B",
            Energy::Active,
            Base::Itr,
            "EN 50470-3"
        ));
        assert!(depends_on_ambient(
            "B",
            Energy::Active,
            Base::Itr,
            "Directive 2014/32/EU"
        ));
        assert_eq!(
            standards_for("B", Energy::Active, Base::Itr),
            ["EN 50470-3", "Directive 2014/32/EU"]
        );
    }

    #[test]
    fn outside_the_table_says_where_the_rows_are() {
        let c = ib(5.0, 60.0);
        let e = limit("1", Energy::Active, &c, 0.1, 0.0, &TableChoice::default())
            .unwrap_err()
            .to_string();
        assert!(e.contains("0.05 Ib ≤ I < 0.1 Ib at PF 1"), "{e}");
        assert!(
            limit("1", Energy::Active, &c, 5.0, 45.0, &TableChoice::default()).is_err(),
            "PF 0.707 is not in the table"
        );
        let e = limit(
            "0.2 S",
            Energy::Active,
            &c,
            5.0,
            0.0,
            &TableChoice::default(),
        )
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
