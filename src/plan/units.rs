//! Values written as people write them: `"230 V"`, `"250 mA"`, `"0.5 s"`, `"1.2 kW"`.
//!
//! A value is a number, optional white space and a unit symbol. SI prefixes (p, n, µ/u, m, k, M,
//! G) are accepted on the units that take them. Every value is converted to the trade's base unit
//! for its dimension: volts, amperes, watts, vars, volt-amperes, watt-hours, hertz, seconds,
//! degrees, percent and ohms. Energy stays in watt-hours (not joules) because that is the unit
//! meters and reports speak.

use serde::Serialize;
use std::fmt;

/// The physical dimension of a value.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Dimension {
    Voltage,
    Current,
    ActivePower,
    ReactivePower,
    ApparentPower,
    ActiveEnergy,
    ReactiveEnergy,
    Frequency,
    Time,
    Angle,
    Percent,
    Ratio,
    Resistance,
    Temperature,
}

impl Dimension {
    /// The symbol of the base unit values of this dimension are stored in.
    pub fn unit(self) -> &'static str {
        match self {
            Dimension::Voltage => "V",
            Dimension::Current => "A",
            Dimension::ActivePower => "W",
            Dimension::ReactivePower => "var",
            Dimension::ApparentPower => "VA",
            Dimension::ActiveEnergy => "Wh",
            Dimension::ReactiveEnergy => "varh",
            Dimension::Frequency => "Hz",
            Dimension::Time => "s",
            Dimension::Angle => "°",
            Dimension::Percent => "%",
            Dimension::Ratio => "",
            Dimension::Resistance => "Ω",
            Dimension::Temperature => "°C",
        }
    }

    /// "a voltage", "a current": for error messages.
    pub fn describe(self) -> &'static str {
        match self {
            Dimension::Voltage => "a voltage",
            Dimension::Current => "a current",
            Dimension::ActivePower => "an active power",
            Dimension::ReactivePower => "a reactive power",
            Dimension::ApparentPower => "an apparent power",
            Dimension::ActiveEnergy => "an active energy",
            Dimension::ReactiveEnergy => "a reactive energy",
            Dimension::Frequency => "a frequency",
            Dimension::Time => "a time",
            Dimension::Angle => "an angle",
            Dimension::Percent => "a percentage",
            Dimension::Ratio => "a plain number",
            Dimension::Resistance => "a resistance",
            Dimension::Temperature => "a temperature",
        }
    }

    /// A value as a user would write it, for error messages.
    pub fn example(self) -> &'static str {
        match self {
            Dimension::Voltage => "230 V",
            Dimension::Current => "5 A",
            Dimension::ActivePower => "1.2 kW",
            Dimension::ReactivePower => "500 var",
            Dimension::ApparentPower => "1.15 kVA",
            Dimension::ActiveEnergy => "1 kWh",
            Dimension::ReactiveEnergy => "1 kvarh",
            Dimension::Frequency => "50 Hz",
            Dimension::Time => "2 s",
            Dimension::Angle => "60 deg",
            Dimension::Percent => "0.5 %",
            Dimension::Ratio => "0.5",
            Dimension::Resistance => "10 mΩ",
            Dimension::Temperature => "23 °C",
        }
    }
}

/// Why a written value could not be read.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum UnitError {
    #[error("expected {} such as \"{}\", but \"{text}\" does not start with a number", .expected.describe(), .expected.example())]
    NoNumber { text: String, expected: Dimension },
    #[error("\"{unit}\" in \"{text}\" is not a unit meterproof knows (expected {} such as \"{}\")", .expected.describe(), .expected.example())]
    UnknownUnit {
        text: String,
        unit: String,
        expected: Dimension,
    },
    #[error("expected {} such as \"{}\", but \"{text}\" is {}", .expected.describe(), .expected.example(), .found.describe())]
    WrongDimension {
        text: String,
        expected: Dimension,
        found: Dimension,
    },
    #[error("\"{text}\" has no unit: write it with one, such as \"{}\"", .expected.example())]
    MissingUnit { text: String, expected: Dimension },
    #[error("\"{text}\" is not a finite number")]
    NotFinite { text: String },
}

/// How strictly to read the decimal separator.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum DecimalSeparator {
    /// Only `.`: plans and files, where a comma could be a list separator.
    #[default]
    Point,
    /// `.`, or a single `,` when no `.` is present ("4,98 A"): typed readings.
    PointOrComma,
}

/// Parses `text` as a value of dimension `expected`, returned in the base unit.
pub fn parse(text: &str, expected: Dimension) -> Result<f64, UnitError> {
    parse_with(text, expected, DecimalSeparator::Point)
}

/// As [`parse`], choosing how a decimal comma is treated.
pub fn parse_with(
    text: &str,
    expected: Dimension,
    sep: DecimalSeparator,
) -> Result<f64, UnitError> {
    let trimmed = text.trim();
    let (number, unit) = split_number(trimmed, sep).ok_or_else(|| UnitError::NoNumber {
        text: trimmed.to_string(),
        expected,
    })?;
    if !number.is_finite() {
        return Err(UnitError::NotFinite {
            text: trimmed.to_string(),
        });
    }
    if unit.is_empty() {
        return match expected {
            Dimension::Ratio => Ok(number),
            _ => Err(UnitError::MissingUnit {
                text: trimmed.to_string(),
                expected,
            }),
        };
    }
    let (dimension, factor) = lookup_unit(unit).ok_or_else(|| UnitError::UnknownUnit {
        text: trimmed.to_string(),
        unit: unit.to_string(),
        expected,
    })?;
    if dimension != expected {
        return Err(UnitError::WrongDimension {
            text: trimmed.to_string(),
            expected,
            found: dimension,
        });
    }
    Ok(number * factor)
}

/// Splits a leading decimal number from the rest of the text.
fn split_number(text: &str, sep: DecimalSeparator) -> Option<(f64, &str)> {
    let bytes = text.as_bytes();
    let mut end = 0;
    if end < bytes.len() && (bytes[end] == b'+' || bytes[end] == b'-') {
        end += 1;
    }
    let digits_start = end;
    let mut separators = 0;
    while end < bytes.len() {
        let b = bytes[end];
        if b.is_ascii_digit() {
            end += 1;
        } else if (b == b'.' || (b == b',' && sep == DecimalSeparator::PointOrComma))
            && separators == 0
        {
            separators += 1;
            end += 1;
        } else {
            break;
        }
    }
    if !bytes[digits_start..end].iter().any(u8::is_ascii_digit) {
        return None;
    }
    // An exponent only when digits follow it, so that "5 e" is not taken for one.
    if end < bytes.len() && (bytes[end] == b'e' || bytes[end] == b'E') {
        let mut exp_end = end + 1;
        if exp_end < bytes.len() && (bytes[exp_end] == b'+' || bytes[exp_end] == b'-') {
            exp_end += 1;
        }
        let exp_digits = exp_end;
        while exp_end < bytes.len() && bytes[exp_end].is_ascii_digit() {
            exp_end += 1;
        }
        if exp_end > exp_digits {
            end = exp_end;
        }
    }
    let number_text = text[..end].replace(',', ".");
    let number = number_text.parse::<f64>().ok()?;
    Some((number, text[end..].trim()))
}

/// Units that take no prefix, with their dimension and factor to the base unit.
const PLAIN_UNITS: &[(&str, Dimension, f64)] = &[
    ("%", Dimension::Percent, 1.0),
    ("ppm", Dimension::Percent, 1e-4),
    ("°", Dimension::Angle, 1.0),
    ("deg", Dimension::Angle, 1.0),
    ("rad", Dimension::Angle, 180.0 / std::f64::consts::PI),
    ("min", Dimension::Time, 60.0),
    ("h", Dimension::Time, 3600.0),
    ("ohm", Dimension::Resistance, 1.0),
    ("°C", Dimension::Temperature, 1.0),
    ("degC", Dimension::Temperature, 1.0),
];

/// Units that take an SI prefix.
const PREFIXABLE_UNITS: &[(&str, Dimension)] = &[
    ("V", Dimension::Voltage),
    ("A", Dimension::Current),
    ("W", Dimension::ActivePower),
    ("var", Dimension::ReactivePower),
    ("VAr", Dimension::ReactivePower),
    ("VA", Dimension::ApparentPower),
    ("Wh", Dimension::ActiveEnergy),
    ("varh", Dimension::ReactiveEnergy),
    ("Hz", Dimension::Frequency),
    ("s", Dimension::Time),
    ("Ω", Dimension::Resistance),
];

/// SI prefixes (SI Brochure, 9th edition, Table 7), both spellings of micro.
const PREFIXES: &[(&str, f64)] = &[
    ("p", 1e-12),
    ("n", 1e-9),
    ("µ", 1e-6),
    ("μ", 1e-6),
    ("u", 1e-6),
    ("m", 1e-3),
    ("k", 1e3),
    ("M", 1e6),
    ("G", 1e9),
];

fn lookup_unit(unit: &str) -> Option<(Dimension, f64)> {
    if let Some(&(_, dim, factor)) = PLAIN_UNITS.iter().find(|(sym, _, _)| *sym == unit) {
        return Some((dim, factor));
    }
    if let Some(&(_, dim)) = PREFIXABLE_UNITS.iter().find(|(sym, _)| *sym == unit) {
        return Some((dim, 1.0));
    }
    PREFIXES.iter().find_map(|(prefix, factor)| {
        let base = unit.strip_prefix(prefix)?;
        PREFIXABLE_UNITS
            .iter()
            .find(|(sym, _)| *sym == base)
            .map(|&(_, dim)| (dim, *factor))
    })
}

/// A duration as people read it: "45.0 s", "1 min 12 s", "1 h 2 min".
pub fn duration_text(seconds: f64) -> String {
    // Up to `decimals` decimals, without trailing zeros: 2.25, 150, 12.5.
    let trimmed = |x: f64, decimals: usize| {
        let t = format!("{x:.decimals$}");
        if t.contains('.') {
            t.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            t
        }
    };
    if seconds > 0.0 && seconds < 1.0 {
        return format!("{} ms", trimmed(seconds * 1000.0, 3));
    }
    if seconds < 59.95 {
        // Tenths as before ("4.0 s"), unless that would hide digits the plan wrote (2.25 s).
        return if ((seconds * 10.0).round() - seconds * 10.0).abs() < 1e-9 {
            format!("{seconds:.1} s")
        } else {
            format!("{} s", trimmed(seconds, 3))
        };
    }
    let whole = seconds.round() as u64;
    if whole < 3600 {
        format!("{} min {} s", whole / 60, whole % 60)
    } else {
        let minutes = (seconds / 60.0).round() as u64;
        format!("{} h {} min", minutes / 60, minutes % 60)
    }
}

/// Writes a value in its base unit with a sensible number of digits, for summaries.
pub struct Display(pub f64, pub Dimension);

impl fmt::Display for Display {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let Display(value, dim) = *self;
        let unit = dim.unit();
        let prefixable = PREFIXABLE_UNITS.iter().any(|(sym, _)| *sym == unit);
        let magnitude = value.abs();
        let (scaled, prefix) = if !prefixable || magnitude == 0.0 {
            (value, "")
        } else if magnitude < 1e-3 {
            (value * 1e6, "µ")
        } else if magnitude < 1.0 {
            (value * 1e3, "m")
        } else if magnitude >= 1e6 {
            (value / 1e6, "M")
        } else if magnitude >= 1e4 && dim != Dimension::Voltage {
            (value / 1e3, "k")
        } else {
            (value, "")
        };
        let text = format!("{scaled:.4}");
        let text = text.trim_end_matches('0').trim_end_matches('.');
        if unit.is_empty() {
            write!(f, "{text}")
        } else {
            write!(f, "{text} {prefix}{unit}")
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() <= 1e-12 * b.abs().max(1.0)
    }

    /// Values and their SI units as the SI Brochure (BIPM, 9th edition 2019) writes them: a number,
    /// a space (or none), a unit symbol with its prefix.
    #[test]
    fn reads_values_as_people_write_them() {
        assert!(close(parse("230 V", Dimension::Voltage).unwrap(), 230.0));
        assert!(close(parse("5 A", Dimension::Current).unwrap(), 5.0));
        assert!(close(parse("250 mA", Dimension::Current).unwrap(), 0.25));
        assert!(close(parse("250mA", Dimension::Current).unwrap(), 0.25));
        assert!(close(parse("0.5 s", Dimension::Time).unwrap(), 0.5));
        assert!(close(parse("200 ms", Dimension::Time).unwrap(), 0.2));
        assert!(close(parse("2 min", Dimension::Time).unwrap(), 120.0));
        assert!(close(parse("0.5 %", Dimension::Percent).unwrap(), 0.5));
        assert!(close(
            parse("1.2 kW", Dimension::ActivePower).unwrap(),
            1200.0
        ));
        assert!(close(
            parse("1 kWh", Dimension::ActiveEnergy).unwrap(),
            1000.0
        ));
        assert!(close(
            parse("-3.5e-1 A", Dimension::Current).unwrap(),
            -0.35
        ));
        assert!(close(parse("0.5", Dimension::Ratio).unwrap(), 0.5));
    }

    /// SI prefixes, SI Brochure (BIPM, 9th edition 2019), Table 7.
    #[test]
    fn si_prefixes_follow_the_si_brochure() {
        assert!(close(parse("1 pA", Dimension::Current).unwrap(), 1e-12));
        assert!(close(parse("1 nA", Dimension::Current).unwrap(), 1e-9));
        assert!(close(parse("1 µA", Dimension::Current).unwrap(), 1e-6));
        assert!(close(parse("1 uA", Dimension::Current).unwrap(), 1e-6));
        assert!(close(parse("1 kV", Dimension::Voltage).unwrap(), 1e3));
        assert!(close(parse("1 MW", Dimension::ActivePower).unwrap(), 1e6));
        assert!(close(parse("1 GWh", Dimension::ActiveEnergy).unwrap(), 1e9));
        assert!(close(parse("10 mΩ", Dimension::Resistance).unwrap(), 0.01));
    }

    /// Dimensions per the SI Brochure (BIPM, 9th edition 2019), Table 4 (V, A are not
    /// interchangeable); the message is ours.
    #[test]
    fn a_value_of_the_wrong_dimension_says_what_was_expected() {
        let err = parse("5 V", Dimension::Current).unwrap_err();
        assert_eq!(
            err.to_string(),
            "expected a current such as \"5 A\", but \"5 V\" is a voltage"
        );
    }

    /// A quantity value is a number and a unit (SI Brochure, 9th edition, 5.4.3): no unit, or an
    /// unknown one, is refused.
    #[test]
    fn a_missing_or_unknown_unit_is_refused() {
        assert!(matches!(
            parse("230", Dimension::Voltage),
            Err(UnitError::MissingUnit { .. })
        ));
        assert!(matches!(
            parse("5 amps", Dimension::Current),
            Err(UnitError::UnknownUnit { .. })
        ));
        assert!(matches!(
            parse("volts", Dimension::Voltage),
            Err(UnitError::NoNumber { .. })
        ));
        assert!(matches!(
            parse("", Dimension::Voltage),
            Err(UnitError::NoNumber { .. })
        ));
        // "m" alone is a prefix, not a unit.
        assert!(parse("5 m", Dimension::Current).is_err());
        // "1e999" overflows to infinity.
        assert!(matches!(
            parse("1e999 A", Dimension::Current),
            Err(UnitError::NotFinite { .. })
        ));
    }

    /// The decimal marker may be a point or a comma (SI Brochure, 9th edition, 5.4.4); plans take
    /// only the point, typed readings also the comma.
    #[test]
    fn a_decimal_comma_is_read_only_where_allowed() {
        assert!(parse("4,98 A", Dimension::Current).is_err());
        let v = parse_with("4,98 A", Dimension::Current, DecimalSeparator::PointOrComma).unwrap();
        assert!(close(v, 4.98));
        // Two separators are never a number.
        assert!(
            parse_with(
                "4,9.8 A",
                Dimension::Current,
                DecimalSeparator::PointOrComma
            )
            .is_err()
        );
    }

    /// Prefixes chosen so that the number lies between 1 and 1000 where it can (SI Brochure,
    /// 9th edition, 3: prefixes; the choice is common practice, no published source).
    #[test]
    fn displays_values_with_a_prefix_that_fits() {
        assert_eq!(Display(0.25, Dimension::Current).to_string(), "250 mA");
        assert_eq!(Display(230.0, Dimension::Voltage).to_string(), "230 V");
        assert_eq!(
            Display(12_000.0, Dimension::ActivePower).to_string(),
            "12 kW"
        );
        assert_eq!(Display(0.5, Dimension::Percent).to_string(), "0.5 %");
    }
}
