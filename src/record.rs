//! The record of one unit's run: everything measured, and how it was decided.
//!
//! A record is self-contained: it names the plan by id, revision and SHA-256, the station and
//! reference, and carries every raw sample with its time, so that the verdict can be re-derived
//! from it alone. Records are written once and never overwritten.

use crate::bench::{ReferenceReading, StationInfo};
use crate::link::Identity;
use crate::metrology::{Evaluation, Summary};
use crate::plan::{Load, Quantity, Tolerance};
use serde::{Deserialize, Serialize};
use std::fs::{self, File, OpenOptions};
use std::io::{self, Write};
use std::path::{Path, PathBuf};

fn first_attempt() -> u32 {
    1
}

/// Names the layout of a record, so that later versions can still read old ones.
pub const RECORD_FORMAT: &str = "meterproof-unit-record/1";

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct UnitRecord {
    pub format: String,
    pub tool_version: String,
    pub run_id: String,
    /// 1-based bench position.
    pub position: usize,
    pub serial: String,
    /// What the unit said about itself, when it answered.
    pub identity: Option<Identity>,
    pub plan: PlanRef,
    pub lot: Option<String>,
    pub operator: String,
    pub station: StationInfo,
    pub link: String,
    /// Requests, retries, lines not understood and restarts of the unit on its link.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub link_health: Option<crate::link::LinkHealth>,
    /// Wall-clock times, ISO 8601 with offset.
    pub started_at: String,
    pub finished_at: String,
    /// Bench time the run took, seconds (virtual on the simulator).
    pub bench_time_s: f64,
    pub verdict: UnitVerdict,
    /// Remarks that apply to the whole run (an overdue reference accepted, and why).
    #[serde(default)]
    pub notes: Vec<String>,
    /// The unit's calibration, when the plan calibrates.
    #[serde(default)]
    pub calibration: Option<CalibrationRecord>,
    pub steps: Vec<StepRecord>,
}

/// Which plan, exactly.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PlanRef {
    pub id: String,
    pub revision: String,
    pub title: Option<String>,
    pub file: String,
    pub sha256: String,
    pub model: String,
    pub class: String,
    #[serde(default)]
    pub decision: crate::plan::DecisionRule,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum UnitStatus {
    /// Every step done, every check within its limit.
    Accepted,
    /// At least one check outside its limit, or the unit refused before testing (wrong
    /// firmware or model).
    Rejected,
    /// Not every step was done: the unit is neither accepted nor rejected.
    Incomplete,
}

impl UnitStatus {
    pub fn word(self) -> &'static str {
        match self {
            UnitStatus::Accepted => "ACCEPTED",
            UnitStatus::Rejected => "REJECTED",
            UnitStatus::Incomplete => "INCOMPLETE",
        }
    }

    /// A symbol that carries the verdict without colour.
    pub fn symbol(self) -> &'static str {
        match self {
            UnitStatus::Accepted => "✔",
            UnitStatus::Rejected => "✘",
            UnitStatus::Incomplete => "◐",
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct UnitVerdict {
    pub status: UnitStatus,
    /// Why the unit was rejected or is incomplete, one line each.
    pub reasons: Vec<String>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum StepStatus {
    Done,
    /// Started but not finished for this unit (a link fault, a missing reference...).
    Incomplete,
    /// Never started for this unit.
    NotRun,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StepRecord {
    pub id: String,
    pub description: Option<String>,
    pub load: Load,
    pub settle_s: f64,
    pub samples_planned: u32,
    pub interval_s: f64,
    /// Bench time the load was applied, seconds.
    pub started_at_s: Option<f64>,
    pub status: StepStatus,
    pub reason: Option<String>,
    /// With settling until stable: the bench seconds it took, and whether it was reached.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub settle_actual_s: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub settled: Option<bool>,
    /// With sampling until decided: how many samples were taken, under which rule.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sampling_note: Option<String>,
    /// 1 for the first time the step was run for this unit; more after a resume.
    #[serde(default = "first_attempt")]
    pub attempt: u32,
    /// The raw counts taken at a calibration point.
    #[serde(default)]
    pub calibration_point: Option<CalibrationPoint>,
    pub references: Vec<ReferenceRecord>,
    pub checks: Vec<CheckRecord>,
}

/// The front end's counts at one calibration point, and the reference they are set against.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrationPoint {
    pub quantity: Quantity,
    pub channel: String,
    pub samples: Vec<Sample>,
    pub mean_counts: Option<f64>,
    pub reference: Option<f64>,
}

/// A unit's calibration: the fit, and the constants before, written and read back.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrationRecord {
    pub quantity: Quantity,
    pub channel: String,
    pub result: Option<crate::metrology::calibration::Calibration>,
    /// (offset, gain) in the unit before calibration, where it could be read.
    pub before: Option<(f64, f64)>,
    pub written: Option<(f64, f64)>,
    pub read_back: Option<(f64, f64)>,
    pub status: CalibrationStatus,
    pub reason: Option<String>,
    /// The plan's limits on the fit, and how the fit fared against each.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub limits: Vec<crate::metrology::calibration::LimitResult>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CalibrationStatus {
    /// Fitted; the plan writes nothing back.
    Fitted,
    /// Fitted, written and read back equal.
    Written,
    /// Not enough good points to fit, or the link failed while writing.
    NotDone,
    /// The constants read back differ from those written.
    Mismatch,
    /// The fit lies outside the plan's calibration limits: nothing was written.
    OutsideLimits,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReferenceRecord {
    pub quantity: Quantity,
    pub reading: ReferenceReading,
}

/// One raw reading from the unit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Sample {
    /// Bench time, seconds: the middle of the attempt that was answered.
    pub t_s: f64,
    pub value: f64,
    /// How long that attempt took, request sent to reply read, when it took bench time: the
    /// unit took the reading at some moment within it, so `t_s` is known to ± half of this.
    /// Absent on the virtual clock, where a reading takes no time.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub took_s: Option<f64>,
}

impl Sample {
    /// A reading taken at one known instant.
    pub fn at(t_s: f64, value: f64) -> Sample {
        Sample {
            t_s,
            value,
            took_s: None,
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CheckVerdict {
    Pass,
    Fail,
    /// Not enough data to decide.
    NotEvaluated,
}

impl CheckVerdict {
    pub fn word(self) -> &'static str {
        match self {
            CheckVerdict::Pass => "pass",
            CheckVerdict::Fail => "FAIL",
            CheckVerdict::NotEvaluated => "not evaluated",
        }
    }

    pub fn symbol(self) -> &'static str {
        match self {
            CheckVerdict::Pass => "✔",
            CheckVerdict::Fail => "✘",
            CheckVerdict::NotEvaluated => "◐",
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CheckRecord {
    pub quantity: Quantity,
    pub channel: String,
    pub unit: String,
    pub tolerance: Tolerance,
    /// Raw readings; for a register quantity, the register contents.
    pub samples: Vec<Sample>,
    pub summary: Option<Summary>,
    /// The value compared with the reference: the mean, or the register's advance.
    pub measured: Option<f64>,
    pub reference: Option<f64>,
    pub evaluation: Option<Evaluation>,
    /// The uncertainty budget of the error.
    #[serde(default)]
    pub uncertainty: Option<crate::metrology::uncertainty::Budget>,
    /// The decision rule applied, its limits, and the outcome.
    #[serde(default)]
    pub decision: Option<crate::metrology::decision::Decision>,
    pub verdict: CheckVerdict,
    pub note: Option<String>,
    /// A check on the test output: the pulses counted and the time they took.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pulses: Option<PulseCount>,
}

/// What the counter counted for one check on a unit's test output.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PulseCount {
    /// `fixed_time` or `fixed_pulses`.
    pub method: String,
    /// imp/kWh.
    pub meter_constant: f64,
    /// Pulses counted from the first sample to the last (the gate, or the first edge to the
    /// last).
    pub pulses: u64,
    /// Seconds from the first sample to the last.
    pub seconds: f64,
    /// The reference standard's pulses over the same interval, where the counter counted them.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reference_pulses: Option<u64>,
    /// Their constant, imp/kWh.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reference_constant: Option<f64>,
}

/// The canonical form of anything the archive seals: its JSON with object keys sorted, and
/// every zero written as `0.0` (a device that answers `-0.00` gives −0.0, which a database's
/// REAL column gives back as 0.0: the two must hash alike). Numbers keep every digit
/// (serde_json's `float_roundtrip`); strings keep every character, escaped by JSON. Built on
/// `serde_json::Value`, so a field added to a record type later never changes the hash of a
/// record stored before it.
pub fn canonical_bytes(value: &serde_json::Value) -> Vec<u8> {
    serde_json::to_vec(&canonical_value(value.clone())).expect("a JSON value serialises")
}

fn canonical_value(value: serde_json::Value) -> serde_json::Value {
    use serde_json::Value;
    match value {
        Value::Number(n) if n.as_f64() == Some(0.0) && !n.is_i64() && !n.is_u64() => {
            Value::from(0.0)
        }
        Value::Array(items) => Value::Array(items.into_iter().map(canonical_value).collect()),
        // serde_json's map is ordered by key (no `preserve_order`), so objects come out sorted.
        Value::Object(map) => Value::Object(
            map.into_iter()
                .map(|(k, v)| (k, canonical_value(v)))
                .collect(),
        ),
        other => other,
    }
}

/// SHA-256 of a value's canonical form, in hex.
pub fn canonical_sha256<T: Serialize + ?Sized>(value: &T) -> String {
    let value = serde_json::to_value(value).expect("records serialise");
    crate::plan::sha256_hex(&canonical_bytes(&value))
}

/// The hash that seals a unit record (with its samples): printed on its reports and kept in
/// the archive's chain.
pub fn record_hash(record: &UnitRecord) -> String {
    canonical_sha256(record)
}

/// Text with its control characters (escape sequences, NUL, line breaks) written as escapes,
/// so that text from a device, a file or the archive can reach neither a terminal's control
/// nor a file's structure.
pub fn escape_controls(text: &str) -> String {
    if !text.chars().any(char::is_control) {
        return text.to_string();
    }
    text.chars()
        .map(|c| {
            if c.is_control() {
                c.escape_default().to_string()
            } else {
                c.to_string()
            }
        })
        .collect()
}

/// Why a record could not be written.
#[derive(Debug, thiserror::Error)]
pub enum WriteError {
    #[error("cannot write {path}: {source}")]
    Io { path: PathBuf, source: io::Error },
    #[error("cannot serialise the record: {0}")]
    Serialise(#[from] serde_json::Error),
}

impl CheckRecord {
    /// Whether the result lies within its expanded uncertainty of the tolerance limit.
    pub fn marginal(&self) -> bool {
        self.decision.as_ref().is_some_and(|d| d.marginal)
    }

    /// The verdict in words: "pass", "pass, marginal", "FAIL, marginal", "FAIL" or
    /// "not evaluated" ("marginal": within U of the tolerance limit).
    pub fn verdict_words(&self) -> String {
        match (self.verdict, self.marginal()) {
            (CheckVerdict::NotEvaluated, _) | (_, false) => self.verdict.word().to_string(),
            (v, true) => format!("{}, marginal", v.word()),
        }
    }
}

impl UnitRecord {
    /// Whether any check of the record failed.
    pub fn failed_checks(&self) -> impl Iterator<Item = (&StepRecord, &CheckRecord)> {
        self.steps.iter().flat_map(|s| {
            s.checks
                .iter()
                .filter(|c| c.verdict == CheckVerdict::Fail)
                .map(move |c| (s, c))
        })
    }
}

/// Writes `bytes` to `dir/name` so that the file appears whole or not at all, and never replaces
/// an existing file: a temporary file is written and synced, then hard-linked to its name (which
/// fails if the name exists) and the directory synced. Returns the path written.
pub fn write_new_file(dir: &Path, name: &str, bytes: &[u8]) -> Result<PathBuf, WriteError> {
    let io_err = |path: &Path| {
        let path = path.to_path_buf();
        move |source| WriteError::Io { path, source }
    };
    let target = dir.join(name);
    let temp = dir.join(format!(".{name}.{}.tmp", std::process::id()));
    let written = OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(&temp)
        .and_then(|mut f| {
            f.write_all(bytes)?;
            f.sync_all()
        });
    if let Err(e) = written {
        // A full disk leaves no half-written temporary file behind.
        let _ = fs::remove_file(&temp);
        return Err(io_err(&temp)(e));
    }
    let linked = fs::hard_link(&temp, &target);
    let _ = fs::remove_file(&temp);
    linked.map_err(io_err(&target))?;
    if let Ok(d) = File::open(dir) {
        let _ = d.sync_all();
    }
    Ok(target)
}

/// Serialises a record as pretty JSON (stable key order: the struct's).
pub fn to_json(record: &UnitRecord) -> Result<Vec<u8>, WriteError> {
    let mut bytes = serde_json::to_vec_pretty(record)?;
    bytes.push(b'\n');
    Ok(bytes)
}

/// Why a record file could not be read.
#[derive(Debug, thiserror::Error)]
pub enum ReadError {
    #[error("{path}: {source}")]
    Io {
        path: String,
        source: std::io::Error,
    },
    #[error("{path}: not a unit record: {source}")]
    NotARecord {
        path: String,
        source: serde_json::Error,
    },
}

/// Reads a record written by [`to_json`].
pub fn read(path: &Path) -> Result<UnitRecord, ReadError> {
    let shown = || path.display().to_string();
    let text = fs::read_to_string(path).map_err(|source| ReadError::Io {
        path: shown(),
        source,
    })?;
    serde_json::from_str(&text).map_err(|source| ReadError::NotARecord {
        path: shown(),
        source,
    })
}

/// Turns a serial number (data from a device or a person) into a file name that cannot leave its
/// folder: letters, digits, `-` and `_` stay, every other byte becomes `~XX` (hex), a leading
/// `.` is encoded too, and the result is cut to 100 bytes with a hash of the whole kept so that
/// long names stay unique. Names Windows reserves (CON, NUL...) get a `~` prefix.
pub fn safe_file_stem(text: &str) -> String {
    let mut out = String::new();
    for b in text.bytes() {
        if b.is_ascii_alphanumeric() || b == b'-' || b == b'_' {
            out.push(b as char);
        } else {
            out.push_str(&format!("~{b:02X}"));
        }
    }
    if out.is_empty() {
        out.push_str("~empty");
    }
    let reserved = [
        "CON", "PRN", "AUX", "NUL", "COM1", "COM2", "COM3", "LPT1", "LPT2", "LPT3",
    ];
    if reserved.iter().any(|r| r.eq_ignore_ascii_case(&out)) {
        out.insert(0, '~');
    }
    if out.len() > 100 {
        let hash = crate::plan::sha256_hex(text.as_bytes());
        out.truncate(80);
        out.push('~');
        out.push_str(&hash[..16]);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hostile_serials_stay_inside_their_folder() {
        assert_eq!(safe_file_stem("TM16-240010"), "TM16-240010");
        assert_eq!(safe_file_stem("../../x"), "~2E~2E~2F~2E~2E~2Fx");
        assert_eq!(safe_file_stem("CON"), "~CON");
        assert_eq!(safe_file_stem("a\0b"), "a~00b");
        assert_eq!(safe_file_stem(""), "~empty");
        let long = "A".repeat(300);
        let stem = safe_file_stem(&long);
        assert!(stem.len() <= 100);
        assert_ne!(stem, safe_file_stem(&"A".repeat(301)));
    }

    #[test]
    fn an_existing_file_is_never_replaced() {
        let dir = std::env::temp_dir().join(format!("meterproof-rec-{}", std::process::id()));
        fs::create_dir_all(&dir).unwrap();
        let p = write_new_file(&dir, "a.json", b"first").unwrap();
        assert!(write_new_file(&dir, "a.json", b"second").is_err());
        assert_eq!(fs::read(&p).unwrap(), b"first");
        // No temporary file is left behind.
        assert_eq!(fs::read_dir(&dir).unwrap().count(), 1);
        fs::remove_dir_all(&dir).unwrap();
    }
}
