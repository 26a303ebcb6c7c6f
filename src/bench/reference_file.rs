//! Reference readings imported from a CSV file: one row per step and quantity, with columns
//! `step`, `quantity`, `value`, `unit` (and optionally `timestamp`, kept as given).
//!
//! The whole file is checked against the plan before any load is applied: unreadable, unknown,
//! duplicate, missing and extra rows are all reported at once, each with its line number.

use super::{BenchError, ReferenceMeter, ReferenceReading, ReferenceRequest};
use crate::plan::units::{self, DecimalSeparator};
use crate::plan::{Plan, Quantity};
use std::collections::BTreeMap;
use std::fmt;
use std::path::Path;

/// Every mistake in a reference file.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub struct ReferenceFileErrors {
    pub file: String,
    /// (line, message); line 0 for what concerns the whole file.
    pub errors: Vec<(usize, String)>,
}

impl fmt::Display for ReferenceFileErrors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, (line, message)) in self.errors.iter().enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            if *line == 0 {
                write!(f, "{}: {message}", self.file)?;
            } else {
                write!(f, "{}:{line}: {message}", self.file)?;
            }
        }
        Ok(())
    }
}

/// One imported reading.
#[derive(Debug, Clone, PartialEq)]
struct Row {
    line: usize,
    value: f64,
    as_given: String,
}

/// Reference readings from a file, by step id and quantity.
#[derive(Debug)]
pub struct FileReference {
    file: String,
    rows: BTreeMap<(String, Quantity), Row>,
}

/// The (step, quantity) pairs a plan needs a reference reading for.
fn needed(plan: &Plan) -> Vec<(String, Quantity)> {
    let mut out: Vec<(String, Quantity)> = Vec::new();
    for step in &plan.steps {
        let mut qs: Vec<Quantity> = step
            .checks
            .iter()
            .filter(|c| c.tolerance.needs_reference())
            .map(|c| c.quantity)
            .collect();
        if let Some(c) = &plan.calibration
            && c.points.contains(&step.id)
        {
            qs.push(c.quantity);
        }
        for q in qs {
            if !out.contains(&(step.id.clone(), q)) {
                out.push((step.id.clone(), q));
            }
        }
    }
    out
}

impl FileReference {
    /// Reads `path` and checks it against `plan`.
    pub fn load(path: &Path, plan: &Plan) -> Result<FileReference, ReferenceFileErrors> {
        let file = path.display().to_string();
        let text = std::fs::read_to_string(path).map_err(|e| ReferenceFileErrors {
            file: file.clone(),
            errors: vec![(0, format!("cannot read it: {e}"))],
        })?;
        FileReference::from_text(&file, &text, plan)
    }

    pub fn from_text(
        file: &str,
        text: &str,
        plan: &Plan,
    ) -> Result<FileReference, ReferenceFileErrors> {
        let mut errors: Vec<(usize, String)> = Vec::new();
        let mut reader = csv::ReaderBuilder::new()
            .trim(csv::Trim::All)
            .flexible(true)
            .from_reader(text.as_bytes());
        let headers = match reader.headers() {
            Ok(h) => h.clone(),
            Err(e) => {
                return Err(ReferenceFileErrors {
                    file: file.into(),
                    errors: vec![(1, format!("no header row: {e}"))],
                });
            }
        };
        let column = |name: &str| headers.iter().position(|h| h.eq_ignore_ascii_case(name));
        let (Some(c_step), Some(c_q), Some(c_value), Some(c_unit)) = (
            column("step"),
            column("quantity"),
            column("value"),
            column("unit"),
        ) else {
            return Err(ReferenceFileErrors {
                file: file.into(),
                errors: vec![(
                    1,
                    "the header must name the columns step, quantity, value and unit".into(),
                )],
            });
        };
        let wanted = needed(plan);
        let mut rows: BTreeMap<(String, Quantity), Row> = BTreeMap::new();
        for record in reader.records() {
            let record = match record {
                Ok(r) => r,
                Err(e) => {
                    let line = e.position().map_or(0, |p| p.line() as usize);
                    errors.push((line, format!("not a CSV row: {e}")));
                    continue;
                }
            };
            let line = record.position().map_or(0, |p| p.line() as usize);
            let field = |i: usize| record.get(i).unwrap_or("").to_string();
            let (step, quantity, value, unit) =
                (field(c_step), field(c_q), field(c_value), field(c_unit));
            if !plan.steps.iter().any(|s| s.id == step) {
                errors.push((line, format!("no step \"{step}\" in plan {}", plan.id)));
                continue;
            }
            let Some(q) = Quantity::from_name(&quantity) else {
                errors.push((line, format!("unknown quantity \"{quantity}\"")));
                continue;
            };
            let as_given = if unit.is_empty() {
                value.clone()
            } else {
                format!("{value} {unit}")
            };
            let parsed =
                match units::parse_with(&as_given, q.dimension(), DecimalSeparator::PointOrComma) {
                    Ok(v) => v,
                    Err(e) => {
                        errors.push((line, format!("{}: {e}", q.name())));
                        continue;
                    }
                };
            if !wanted.contains(&(step.clone(), q)) {
                errors.push((
                    line,
                    format!("step {step} needs no reference {}: an extra row", q.name()),
                ));
                continue;
            }
            let key = (step.clone(), q);
            if let Some(first) = rows.get(&key) {
                errors.push((
                    line,
                    format!(
                        "a second {} for step {step} (the first is on line {})",
                        q.name(),
                        first.line
                    ),
                ));
                continue;
            }
            rows.insert(
                key,
                Row {
                    line,
                    value: parsed,
                    as_given,
                },
            );
        }
        for (step, q) in &wanted {
            if !rows.contains_key(&(step.clone(), *q)) {
                errors.push((0, format!("no {} reading for step {step}", q.name())));
            }
        }
        if errors.is_empty() {
            Ok(FileReference {
                file: file.into(),
                rows,
            })
        } else {
            errors.sort_by_key(|(line, _)| if *line == 0 { usize::MAX } else { *line });
            Err(ReferenceFileErrors {
                file: file.into(),
                errors,
            })
        }
    }
}

impl ReferenceMeter for FileReference {
    fn read(&mut self, request: &ReferenceRequest) -> Result<ReferenceReading, BenchError> {
        let row = self
            .rows
            .get(&(request.step_id.to_string(), request.quantity))
            .ok_or_else(|| {
                BenchError::Reference(format!(
                    "{} has no {} for step {}",
                    self.file,
                    request.quantity.name(),
                    request.step_id
                ))
            })?;
        Ok(ReferenceReading {
            value: row.value,
            source: "file".into(),
            taken_at_s: request.window.1,
            as_given: Some(format!(
                "{} (line {} of {})",
                row.as_given, row.line, self.file
            )),
            entries: Vec::new(),
        })
    }
}
