//! A YAML file being read, and its mistakes: each with its file, line, column and path, said
//! in the file's words. Plans and station files are both read through a [`Document`]; each
//! section of the plan (ratings, link, steps, checks, calibration) is validated against it, so
//! the sections depend on this module and never on each other.

use super::locate::{Locations, Position};
use super::raw::Text;
use super::units::{self, Dimension};
use std::collections::HashSet;
use std::fmt;

/// The longest duration a plan or station may give: 12 hours.
pub const MAX_DURATION_S: f64 = 12.0 * 3600.0;
/// The most samples one step may take.
pub const MAX_SAMPLES: u32 = 10_000;

/// One mistake in a plan: where it is and what is wrong.
#[derive(Debug, Clone, PartialEq)]
pub struct PlanError {
    pub file: String,
    pub position: Option<Position>,
    /// Path inside the plan, such as `steps[3].checks[1].tolerance`; empty for the whole file.
    pub path: String,
    pub message: String,
}

impl PlanError {
    pub fn whole_file(file: &str, message: &str) -> PlanError {
        PlanError {
            file: file.to_string(),
            position: None,
            path: String::new(),
            message: message.to_string(),
        }
    }
}

impl fmt::Display for PlanError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.file)?;
        if let Some(p) = self.position {
            write!(f, ":{}:{}", p.line, p.column)?;
        }
        if !self.path.is_empty() {
            write!(f, ": {}", counted_from_one(&self.path))?;
        }
        write!(f, ": {}", self.message)
    }
}

/// A path as people count: `steps[0].checks[1]` is shown `steps[1].checks[2]`, the first step
/// being step 1 as the run's progress and the reports number it.
pub fn counted_from_one(path: &str) -> String {
    let mut out = String::with_capacity(path.len());
    let mut rest = path;
    while let Some(open) = rest.find('[') {
        out.push_str(&rest[..=open]);
        rest = &rest[open + 1..];
        let close = rest.find(']').unwrap_or(rest.len());
        match rest[..close].parse::<usize>() {
            Ok(n) => out.push_str(&(n + 1).to_string()),
            Err(_) => out.push_str(&rest[..close]),
        }
        rest = &rest[close..];
    }
    out.push_str(rest);
    out
}

/// At most this many mistakes are printed; the rest are counted.
pub const MAX_SHOWN_ERRORS: usize = 50;
/// At most this many mistakes are located in the file (a second pass over the text).
const MAX_LOCATED_ERRORS: usize = 1000;

/// serde's words for what it expected, in the plan's terms: "expected struct RawPlan" tells a
/// test engineer nothing.
fn plain_words(message: &str) -> String {
    static TYPES: std::sync::LazyLock<regex::Regex> = std::sync::LazyLock::new(|| {
        regex::Regex::new(
            r"(?:internally tagged )?(struct|enum) Raw\w+|\b(?:u8|u16|u32|u64|u128|usize|i8|i16|i32|i64|i128|isize)\b|\b(?:f32|f64)\b|struct Text|a string or number",
        )
        .expect("a valid pattern")
    });
    TYPES
        .replace_all(message, |c: &regex::Captures| {
            let m = c.get(0).map_or("", |m| m.as_str());
            if m.starts_with("struct Text") || m == "a string or number" {
                "a value (text or a number)".to_string()
            } else if m.contains("enum") {
                "a mapping with a kind".to_string()
            } else if m.contains("struct") {
                "a mapping of keys and values".to_string()
            } else if m.starts_with('f') {
                "a number".to_string()
            } else {
                "a whole number".to_string()
            }
        })
        .into_owned()
}

/// Every mistake found in one plan, in file order.
#[derive(Debug, Clone, thiserror::Error)]
pub struct PlanErrors(pub Vec<PlanError>);

impl PlanErrors {
    pub fn single(e: PlanError) -> PlanErrors {
        PlanErrors(vec![e])
    }

    pub fn io(file: &str, e: &std::io::Error) -> PlanErrors {
        PlanErrors::single(PlanError::whole_file(
            file,
            &format!("cannot read the plan: {e}"),
        ))
    }
}

impl fmt::Display for PlanErrors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, e) in self.0.iter().take(MAX_SHOWN_ERRORS).enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            write!(f, "{e}")?;
        }
        if self.0.len() > MAX_SHOWN_ERRORS {
            write!(
                f,
                "\n... and {} more mistakes (the first {MAX_SHOWN_ERRORS} are shown)",
                self.0.len() - MAX_SHOWN_ERRORS
            )?;
        }
        Ok(())
    }
}

/// A YAML file being read: its positions, and the mistakes found so far. Plans and station files
/// are both read through it, so both report mistakes the same way.
pub struct Document<'a> {
    pub(super) file: &'a str,
    pub(super) text: &'a str,
    /// Mistakes found so far, with whether each points at a key (not its value); positions
    /// are looked up once, at the end, for the paths that need them.
    pub(super) errors: Vec<(PlanError, bool)>,
    /// The bench's ambient temperature (°C), for class tables by temperature band.
    pub(super) ambient_c: Option<f64>,
}

pub(crate) type Ctx<'a> = Document<'a>;

impl<'a> Document<'a> {
    /// Parses `text` as YAML; a syntax error is returned at once, with its position.
    pub fn parse(
        file: &'a str,
        text: &'a str,
    ) -> Result<(serde_yaml::Value, Document<'a>), PlanErrors> {
        let value: serde_yaml::Value = serde_yaml::from_str(text).map_err(|e| {
            PlanErrors::single(PlanError {
                file: file.to_string(),
                position: e.location().map(|l| Position {
                    line: l.line(),
                    column: l.column(),
                }),
                path: String::new(),
                message: format!("not valid YAML: {}", strip_location(&e.to_string())),
            })
        })?;
        Ok((
            value,
            Document {
                file,
                text,
                errors: Vec::new(),
                ambient_c: None,
            },
        ))
    }

    /// Whether no mistake has been found.
    pub fn is_clean(&self) -> bool {
        self.errors.is_empty()
    }

    /// All the mistakes found, in file order.
    /// The mistakes, each with its line and column, in file order; a mistake made once for
    /// many steps (in an inherited default) is said once.
    pub fn into_errors(self) -> PlanErrors {
        let mut seen = HashSet::new();
        let mut errors: Vec<(PlanError, bool)> = self
            .errors
            .into_iter()
            .filter(|(e, _)| seen.insert((e.path.clone(), e.message.clone())))
            .collect();
        let rest = errors.split_off(errors.len().min(MAX_LOCATED_ERRORS));
        let loc = Locations::of_paths(self.text, errors.iter().map(|(e, _)| e.path.as_str()));
        let mut located: Vec<PlanError> = errors
            .into_iter()
            .map(|(mut e, key)| {
                e.position = if key {
                    loc.key(&e.path)
                } else {
                    loc.value(&e.path)
                };
                e
            })
            .collect();
        located.sort_by_key(|e| e.position.map(|p| (p.line, p.column)).unwrap_or((0, 0)));
        located.extend(rest.into_iter().map(|(e, _)| e));
        PlanErrors(located)
    }

    pub fn error(&mut self, path: &str, message: impl Into<String>) {
        self.errors.push((
            PlanError {
                file: self.file.to_string(),
                position: None,
                path: path.to_string(),
                message: message.into(),
            },
            false,
        ));
    }

    /// Records a structural mistake found at `inner` (serde's path) under `prefix`.
    pub fn structure_error(&mut self, prefix: &str, inner: &str, message: &str) {
        let path = join_path(prefix, if inner == "." { "" } else { inner });
        let message = plain_words(message);
        let key = message.starts_with("unknown field");
        self.errors.push((
            PlanError {
                file: self.file.to_string(),
                position: None,
                path,
                message,
            },
            key,
        ));
    }

    /// Deserialises one part of the file, recording a structural mistake under `prefix`.
    pub fn structure<T: serde::de::DeserializeOwned>(
        &mut self,
        prefix: &str,
        value: serde_yaml::Value,
    ) -> Option<T> {
        match serde_path_to_error::deserialize::<_, T>(value) {
            Ok(v) => Some(v),
            Err(e) => {
                let inner = e.path().to_string();
                self.structure_error(prefix, &inner, &e.into_inner().to_string());
                None
            }
        }
    }

    pub fn value(&mut self, path: &str, text: &Text, dim: Dimension) -> Option<f64> {
        match units::parse(&text.0, dim) {
            // Every duration on a bench lies between nothing and a working day: a negative one
            // would panic a sleep, a huge one would hold the bench (and its load) for ever.
            Ok(v) if dim == Dimension::Time && !(0.0..=MAX_DURATION_S).contains(&v) => {
                self.error(
                    path,
                    if v < 0.0 {
                        format!(
                            "\"{}\" is negative: a time must be zero or more",
                            text.0.trim()
                        )
                    } else {
                        format!(
                            "\"{}\" is longer than {} h: check the unit",
                            text.0.trim(),
                            MAX_DURATION_S / 3600.0
                        )
                    },
                );
                None
            }
            Ok(v) => Some(v),
            Err(e) => {
                self.error(path, e.to_string());
                None
            }
        }
    }

    pub fn optional_value(
        &mut self,
        path: &str,
        text: Option<&Text>,
        dim: Dimension,
    ) -> Option<Option<f64>> {
        match text {
            None => Some(None),
            Some(t) => self.value(path, t, dim).map(Some),
        }
    }

    pub fn count(&mut self, path: &str, text: &Text) -> Option<u32> {
        match text.0.trim().parse::<u32>() {
            Ok(n) if (1..=MAX_SAMPLES).contains(&n) => Some(n),
            _ => {
                self.error(
                    path,
                    format!(
                        "expected a whole number of samples from 1 to {MAX_SAMPLES}, got \"{}\"",
                        text.0
                    ),
                );
                None
            }
        }
    }

    pub fn non_empty(&mut self, path: &str, text: &Text) -> Option<String> {
        let t = text.0.trim();
        if t.is_empty() {
            self.error(path, "must not be empty");
            None
        } else {
            Some(t.to_string())
        }
    }
}

fn join_path(prefix: &str, inner: &str) -> String {
    match (prefix.is_empty(), inner.is_empty()) {
        (true, _) => inner.to_string(),
        (false, true) => prefix.to_string(),
        (false, false) if inner.starts_with('[') => format!("{prefix}{inner}"),
        (false, false) => format!("{prefix}.{inner}"),
    }
}

fn strip_location(message: &str) -> String {
    match message.find(" at line ") {
        Some(i) => message[..i].to_string(),
        None => message.to_string(),
    }
}

/// Channel names: given, or the single channel `L`; non-empty and unique.
pub(crate) fn channel_names(ctx: &mut Ctx, channels: Option<Vec<Text>>) -> Vec<String> {
    let channels: Vec<String> = channels
        .unwrap_or_else(|| vec![Text("L".into())])
        .into_iter()
        .map(|t| t.0.trim().to_string())
        .collect();
    let mut seen = HashSet::new();
    for (i, c) in channels.iter().enumerate() {
        if c.is_empty() || !seen.insert(c.clone()) {
            ctx.error(
                &format!("link.channels[{i}]"),
                "channel names must be non-empty and unique",
            );
        }
    }
    if channels.is_empty() {
        ctx.error("link.channels", "at least one channel is needed");
    }
    channels
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn paths_join_like_the_plan_reads() {
        assert_eq!(
            join_path("steps[2]", "checks[0].tolerance"),
            "steps[2].checks[0].tolerance"
        );
        assert_eq!(join_path("steps[2]", ""), "steps[2]");
        assert_eq!(join_path("", "id"), "id");
        assert_eq!(join_path("link", "[0]"), "link[0]");
    }
}
