//! Reference readings imported from a CSV file, with columns `step`, `quantity`, `value`, `unit`
//! and optionally `timestamp` (ISO 8601 with offset). A row that names its step is that step's
//! reading; a row with a timestamp and no step (a reference meter's log) belongs to the step
//! whose sampling window contains its time, and the rows within a window are averaged.
//!
//! The whole file is checked against the plan before any load is applied: unreadable, unknown,
//! duplicate and extra rows are all reported at once, each with its line number, and so is every
//! reading the plan needs that no row names (unless a timestamped log covers that quantity,
//! which can only be matched once the windows are known).

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
        let shown = crate::plan::MAX_SHOWN_ERRORS;
        for (i, (line, message)) in self.errors.iter().take(shown).enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            if *line == 0 {
                write!(f, "{}: {message}", self.file)?;
            } else {
                write!(f, "{}:{line}: {message}", self.file)?;
            }
        }
        if self.errors.len() > shown {
            write!(
                f,
                "\n... and {} more mistakes (the first {shown} are shown)",
                self.errors.len() - shown
            )?;
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
    /// The instrument the readings came from, as the file's head names it.
    instrument: super::InstrumentInfo,
    rows: BTreeMap<(String, Quantity), Row>,
    /// Timestamped rows without a step: (time, quantity, row).
    logged: Vec<(chrono::DateTime<chrono::FixedOffset>, Quantity, Row)>,
    /// Wall-clock time at bench time zero, to place the sampling windows.
    origin: Option<chrono::DateTime<chrono::FixedOffset>>,
}

/// The instrument a file's readings came from, from its head: `# instrument: ID` and
/// `# accuracy: SPEC` (or `unknown`), with `# range QUANTITY: VALUE` for an accuracy with a
/// range term and `# certificate:` / `# calibration_due:` where known. Readings whose
/// instrument and accuracy nobody can name cannot carry an uncertainty: the file is refused.
fn instrument_of(
    file: &str,
    text: &str,
    errors: &mut Vec<(usize, String)>,
) -> super::InstrumentInfo {
    let mut info = super::InstrumentInfo {
        id: String::new(),
        description: format!("reference readings imported from {file}"),
        certificate: None,
        calibration_due: None,
        accuracy: None,
        ranges: BTreeMap::new(),
    };
    for (i, line) in text.lines().enumerate() {
        let Some(rest) = line.trim().strip_prefix('#') else {
            continue;
        };
        let Some((key, value)) = rest.split_once(':') else {
            continue;
        };
        let (key, value) = (key.trim().to_lowercase(), value.trim().to_string());
        match key.as_str() {
            "instrument" => info.id = value,
            "accuracy" => {
                if value != crate::bench::station::ACCURACY_UNKNOWN
                    && let Err(e) = crate::metrology::accuracy::Accuracy::parse(&value)
                {
                    errors.push((i + 1, format!("accuracy: {e}")));
                }
                info.accuracy = Some(value);
            }
            "certificate" => info.certificate = Some(value),
            "calibration_due" => info.calibration_due = Some(value),
            k if k.starts_with("range ") => {
                let name = k["range ".len()..].trim();
                match Quantity::from_name(name) {
                    Some(q) => match crate::plan::units::parse(&value, q.dimension()) {
                        Ok(v) if v > 0.0 => {
                            info.ranges.insert(q.name().to_string(), v);
                        }
                        _ => errors
                            .push((i + 1, format!("range {name}: \"{value}\" is not a range"))),
                    },
                    None => errors.push((i + 1, format!("unknown quantity \"{name}\""))),
                }
            }
            _ => {}
        }
    }
    if info.id.is_empty() || info.accuracy.is_none() {
        errors.push((
            1,
            "the file must name the instrument its readings came from and its accuracy, in lines before the header: \"# instrument: ID\" and \"# accuracy: 0.05 % of reading + 0.01 % of range\" (or \"# accuracy: unknown\")".into(),
        ));
    }
    info
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
    /// The instrument the readings came from.
    pub fn instrument(&self) -> &super::InstrumentInfo {
        &self.instrument
    }

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
        let instrument = instrument_of(file, text, &mut errors);
        let mut reader = csv::ReaderBuilder::new()
            .trim(csv::Trim::All)
            .flexible(true)
            .comment(Some(b'#'))
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
        let c_time = column("timestamp");
        let wanted = needed(plan);
        let mut rows: BTreeMap<(String, Quantity), Row> = BTreeMap::new();
        let mut logged = Vec::new();
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
            let time = c_time.map(field).filter(|t| !t.is_empty());
            let timestamp = match &time {
                None => None,
                Some(t) => match chrono::DateTime::parse_from_rfc3339(t) {
                    Ok(ts) => Some(ts),
                    Err(_) => {
                        errors.push((
                            line,
                            format!("\"{t}\" is not a time as 2026-12-01T14:03:20+01:00"),
                        ));
                        continue;
                    }
                },
            };
            if let (true, Some(ts)) = (step.is_empty(), timestamp) {
                let Some(q) = Quantity::from_name(&quantity) else {
                    errors.push((line, format!("unknown quantity \"{quantity}\"")));
                    continue;
                };
                let as_given = format!("{value} {unit}").trim().to_string();
                match units::parse_with(&as_given, q.dimension(), DecimalSeparator::PointOrComma) {
                    Ok(v) => logged.push((
                        ts,
                        q,
                        Row {
                            line,
                            value: v,
                            as_given,
                        },
                    )),
                    Err(e) => errors.push((line, format!("{}: {e}", q.name()))),
                }
                continue;
            }
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
            let logged_quantity = logged.iter().any(|(_, lq, _)| lq == q);
            if !rows.contains_key(&(step.clone(), *q)) && !logged_quantity {
                errors.push((0, format!("no {} reading for step {step}", q.name())));
            }
        }
        if errors.is_empty() {
            Ok(FileReference {
                file: file.into(),
                instrument,
                rows,
                logged,
                origin: None,
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

impl FileReference {
    /// Places bench time zero on the wall clock, so timestamped rows can be matched to windows.
    pub fn anchor(&mut self, wall_at_bench_zero: chrono::DateTime<chrono::FixedOffset>) {
        self.origin = Some(wall_at_bench_zero);
    }

    /// The mean of the logged rows of `quantity` within the window, if any fall in it.
    fn logged_reading(&self, request: &ReferenceRequest) -> Option<ReferenceReading> {
        let origin = self.origin?;
        let at = |s: f64| origin + chrono::Duration::microseconds((s * 1e6) as i64);
        let (from, to) = (at(request.window.0), at(request.window.1));
        let rows: Vec<&Row> = self
            .logged
            .iter()
            .filter(|(t, q, _)| *q == request.quantity && *t >= from && *t <= to)
            .map(|(_, _, r)| r)
            .collect();
        if rows.is_empty() {
            return None;
        }
        let value = rows.iter().map(|r| r.value).sum::<f64>() / rows.len() as f64;
        let lines: Vec<String> = rows.iter().map(|r| r.line.to_string()).collect();
        Some(ReferenceReading {
            power_readings: Vec::new(),
            window_s: None,
            value,
            source: "file".into(),
            taken_at_s: request.window.1,
            as_given: Some(format!(
                "mean of {} logged rows (lines {}) of {}",
                rows.len(),
                lines.join(", "),
                self.file
            )),
            entries: Vec::new(),
        })
    }
}

impl ReferenceMeter for FileReference {
    /// A file is read again for any window without asking anybody.
    fn reads_again_freely(&self) -> bool {
        true
    }

    fn read(&mut self, request: &ReferenceRequest) -> Result<ReferenceReading, BenchError> {
        if !self
            .rows
            .contains_key(&(request.step_id.to_string(), request.quantity))
            && let Some(r) = self.logged_reading(request)
        {
            return Ok(r);
        }
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
            power_readings: Vec::new(),
            window_s: None,
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::plan::Load;

    fn plan() -> Plan {
        Plan::from_text("demo.yaml", include_str!("../../test-plans/demo.yaml")).unwrap()
    }

    fn request<'a>(
        step: &'a str,
        q: Quantity,
        load: &'a Load,
        window: (f64, f64),
    ) -> ReferenceRequest<'a> {
        ReferenceRequest {
            step_id: step,
            quantity: q,
            load,
            window,
        }
    }

    /// A reference meter's log (timestamp, no step) is matched to the sampling windows.
    #[test]
    fn logged_rows_are_averaged_over_the_window_they_fall_in() {
        let mut csv = String::from(
            "# instrument: LOG-1 (invented)\n# accuracy: 0.05 % of reading\nstep,quantity,value,unit,timestamp\n",
        );
        for (s, q, v, u) in [
            ("low-0.1Ib", "active_power", "115.0", "W"),
            ("basic-Ib", "voltage", "230.1", "V"),
            ("basic-Ib", "active_power", "1150", "W"),
            ("basic-Ib", "frequency", "50", "Hz"),
            ("max-Imax", "active_power", "3680", "W"),
            ("max-Imax", "active_energy", "10.22", "Wh"),
            ("basic-pf0.5", "active_power", "575", "W"),
        ] {
            csv.push_str(&format!("{s},{q},{v},{u},\n"));
        }
        // Current, logged once a second from 12:00:00 on.
        for (i, v) in ["0.5", "0.502", "0.504", "5.01", "5.03", "16.0"]
            .iter()
            .enumerate()
        {
            csv.push_str(&format!(",current,{v},A,2026-12-01T12:00:0{i}+00:00\n"));
        }
        let mut r = FileReference::from_text("log.csv", &csv, &plan()).unwrap();
        r.anchor(chrono::DateTime::parse_from_rfc3339("2026-12-01T12:00:00+00:00").unwrap());
        let load = plan().steps[1].load;
        // A window from 0.5 s to 2.5 s holds the rows at 1 s and 2 s: their mean.
        let got = r
            .read(&request("low-0.1Ib", Quantity::Current, &load, (0.5, 2.5)))
            .unwrap();
        assert!((got.value - 0.503).abs() < 1e-12, "{}", got.value);
        assert!(got.as_given.unwrap().contains("mean of 2 logged rows"));
        // A row naming its step wins over the log.
        let p = r
            .read(&request(
                "low-0.1Ib",
                Quantity::ActivePower,
                &load,
                (0.5, 2.5),
            ))
            .unwrap();
        assert_eq!(p.value, 115.0);
        // No logged row in the window: no reading.
        assert!(
            r.read(&request("basic-Ib", Quantity::Current, &load, (10.0, 12.0)))
                .is_err()
        );
    }

    #[test]
    fn a_bad_timestamp_is_refused_with_its_line() {
        let csv = "step,quantity,value,unit,timestamp\n,current,0.5,A,yesterday\n";
        let e = FileReference::from_text("log.csv", csv, &plan())
            .unwrap_err()
            .to_string();
        assert!(e.contains("log.csv:2: \"yesterday\" is not a time"), "{e}");
    }
}
