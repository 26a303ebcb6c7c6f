//! A reference instrument's accuracy specification, as data sheets state it:
//! "±(0.05 % of reading + 0.01 % of range)". Taken as the half-width of a rectangular
//! distribution (GUM 4.3.7) when it enters an uncertainty budget.

use serde::{Deserialize, Serialize};

/// Why an accuracy specification cannot be read or applied.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum AccuracyError {
    #[error("{0}")]
    Unreadable(String),
    #[error("the specification has a range term but no range is given")]
    NoRange,
    #[error("the station states no accuracy for the reference")]
    NotStated,
}

#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Accuracy {
    pub reading_percent: f64,
    pub range_percent: f64,
}

impl Accuracy {
    /// Reads "0.05 % of reading + 0.01 % of range", "±(0.05 % of reading + 0.01 % of range)" or
    /// "0.1 % of reading".
    pub fn parse(text: &str) -> Result<Accuracy, AccuracyError> {
        let help = "write an accuracy as \"0.05 % of reading + 0.01 % of range\"";
        let bad = |why: String| AccuracyError::Unreadable(why);
        let cleaned: String = text
            .chars()
            .filter(|c| !matches!(c, '±' | '(' | ')'))
            .collect();
        let mut acc = Accuracy {
            reading_percent: 0.0,
            range_percent: 0.0,
        };
        let mut seen_any = false;
        for term in cleaned.split('+') {
            let term = term.trim();
            if term.is_empty() {
                continue;
            }
            let (number, rest) = term
                .split_once('%')
                .ok_or_else(|| bad(format!("\"{term}\" has no %: {help}")))?;
            let value: f64 = number
                .trim()
                .parse()
                .map_err(|_| bad(format!("\"{}\" is not a number: {help}", number.trim())))?;
            match rest.trim() {
                "of reading" | "of rdg" => acc.reading_percent += value,
                "of range" | "of rng" | "of full scale" | "of fs" => acc.range_percent += value,
                other => return Err(bad(format!("\"{other}\": {help}"))),
            }
            seen_any = true;
        }
        if !seen_any {
            return Err(bad(help.to_string()));
        }
        Ok(acc)
    }

    /// The half-width at `reading` on a `range` (needed only when the range term is not zero).
    pub fn half_width(&self, reading: f64, range: Option<f64>) -> Result<f64, AccuracyError> {
        let range_term = if self.range_percent == 0.0 {
            0.0
        } else {
            let range = range.ok_or(AccuracyError::NoRange)?;
            self.range_percent / 100.0 * range
        };
        Ok(self.reading_percent / 100.0 * reading.abs() + range_term)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// "±(0.05 % of reading + 0.01 % of range)" is a rectangular half-width
    /// a = 0.0005 · reading + 0.0001 · range (the usual data-sheet form, taken as a
    /// rectangular half-width per GUM 4.3.7; common practice, no published source): at 5 A on a 10 A range, a = 3.5 mA.
    #[test]
    fn reads_a_data_sheet_specification() {
        let a = Accuracy::parse("±(0.05 % of reading + 0.01 % of range)").unwrap();
        assert_eq!(a.reading_percent, 0.05);
        assert_eq!(a.range_percent, 0.01);
        assert!((a.half_width(5.0, Some(10.0)).unwrap() - 0.0035).abs() < 1e-15);
        assert!(a.half_width(5.0, None).is_err());
        let r = Accuracy::parse("0.1 % of reading").unwrap();
        assert!((r.half_width(230.0, None).unwrap() - 0.23).abs() < 1e-12);
        assert!(Accuracy::parse("0.1 % of nothing").is_err());
        assert!(Accuracy::parse("fine").is_err());
    }
}
