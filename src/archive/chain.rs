//! The chain that seals the archive, as every backend reads it: every row any command reads is
//! covered by one entry.
//!
//! Owns how a stored record is put back together (its samples from the readings) and `verify`,
//! written once over [`Tables`], the few reads a backend answers in its own SQL. A backend
//! appends the entries (in the transaction that wrote the row, with its own locking) and never
//! computes a hash any other way than `seal` does.
//!
//! An entry stores the hash of its content and the hash of itself chained to the entry before
//! it: `sha256(prev + "\n" + kind + "\n" + content)`. The content of each kind is recomputed by
//! `verify` from the tables as they are now, in the canonical form of `record::canonical_bytes`:
//!
//! | kind | covers |
//! | --- | --- |
//! | `run` | the run row as it was opened (lot, station, operator, bench, plan...) and its plan row |
//! | `seen` | a `run_units` row: which serial stood in which position (what a resume expects) |
//! | `step` | a `steps` row: its status, its record and every reading of its attempt |
//! | `unit` | a `units` row: the record with its samples (the columns must agree with it) |
//! | `end` | how the run ended (state and time); the newest one must match the run row |
//!
//! So an edit of any column that a command shows changes a content hash; a deleted row leaves
//! an entry without content; an added row has no entry; a deleted entry breaks the links. What
//! the chain cannot see is a rewrite of its own newest part, hashes and all: the chain head
//! written into each run's folder and onto its reports (the anchor) is kept outside the
//! database for that, and `verify --anchor` checks the chain still holds it.
//!
//! Why one file of this length: what is sealed and what `verify` recomputes must come from the
//! same functions (each kind's content, the reassembled unit record), side by side where a
//! change to one is seen beside the other. Split, they could drift apart without a test noticing
//! at once.

use crate::archive::ArchiveError;
use crate::archive::seal::*;
use crate::exec::{ReadingKey, Resume};
use crate::plan::Quantity;
use crate::plan::sha256_hex;
use crate::record::{Sample, StepRecord, StepStatus, UnitRecord};
use serde_json::{Value, json};
use std::collections::{BTreeMap, BTreeSet, HashMap};

/// One chain entry as stored.
#[derive(Debug, Clone, PartialEq)]
pub struct ChainRow {
    pub seq: i64,
    pub kind: String,
    pub run_id: String,
    pub position: Option<i64>,
    pub step_index: Option<i64>,
    pub attempt: Option<i64>,
    pub unit_seq: Option<i64>,
    pub content_sha256: String,
    pub sha256: String,
    pub prev_sha256: String,
}

/// One stored reading, as the reassembly needs it (in the order written).
#[derive(Debug, Clone, PartialEq)]
pub struct ReadingRow {
    pub quantity: String,
    pub channel: String,
    pub raw: bool,
    pub t_s: f64,
    pub value: f64,
    pub took_s: Option<f64>,
}

/// A run row as it was opened, with its plan row (absent where the plan row is missing).
#[derive(Debug, Clone, PartialEq)]
pub struct RunOpening {
    pub run_id: String,
    pub plan_sha256: String,
    pub lot: Option<String>,
    pub station: String,
    pub operator: String,
    pub bench: String,
    pub tool_version: String,
    pub started_at: String,
    pub plan_id: Option<String>,
    pub revision: Option<String>,
    pub file: Option<String>,
}

/// A unit row written before the chain existed, with the link of the records' own chain.
pub struct LegacyUnit {
    pub seq: i64,
    pub row: UnitRow,
    pub prev_sha256: String,
}

/// The reads the chain needs of a backend's tables, each one query in the backend's own SQL.
pub trait Tables {
    fn meta(&self, key: &str) -> Result<Option<String>, ArchiveError>;
    /// Every plan row: (sha256, text).
    fn plans(&self) -> Result<Vec<(String, String)>, ArchiveError>;
    /// Up to `limit` chain entries after sequence number `seq`, in order: the chain is read a
    /// page at a time, never whole (years of entries would not fit in memory).
    fn chain_after(&self, seq: i64, limit: i64) -> Result<Vec<ChainRow>, ArchiveError>;
    fn run_opening(&self, run_id: &str) -> Result<Option<RunOpening>, ArchiveError>;
    /// The serials recorded for a run's position.
    fn serials_at(&self, run_id: &str, position: i64) -> Result<Vec<String>, ArchiveError>;
    /// A step row's status and record text.
    fn step_row(
        &self,
        run_id: &str,
        position: i64,
        step_index: i64,
        attempt: i64,
    ) -> Result<Option<(String, String)>, ArchiveError>;
    /// The readings of one attempt, in the order written.
    fn readings(
        &self,
        run_id: &str,
        position: i64,
        step_index: i64,
        attempt: i64,
    ) -> Result<Vec<ReadingRow>, ArchiveError>;
    fn unit_row(&self, seq: i64) -> Result<Option<UnitRow>, ArchiveError>;
    /// Every run: (run_id, state, finished_at).
    fn run_states(&self) -> Result<Vec<(String, String, Option<String>)>, ArchiveError>;
    /// Every run_units row: (run_id, position, serial).
    fn all_seen(&self) -> Result<Vec<(String, i64, String)>, ArchiveError>;
    /// Every step row's key: (run_id, position, step_index, attempt).
    fn all_steps(&self) -> Result<Vec<(String, i64, i64, i64)>, ArchiveError>;
    /// Unit rows after a sequence number: (seq, run_id, serial, position).
    fn units_after(&self, seq: i64) -> Result<Vec<(i64, String, String, i64)>, ArchiveError>;
    /// Unit rows up to a sequence number (those from before the chain), in order.
    fn legacy_units(&self, upto: i64) -> Result<Vec<LegacyUnit>, ArchiveError>;
    /// Runs opened before the chain existed (none in an archive created with it).
    fn legacy_runs(&self) -> Result<BTreeSet<String>, ArchiveError>;
    /// A run's serials, step rows, readings and unit rows at once (four queries), for
    /// `verify`, which otherwise asks for them entry by entry.
    fn run_rows(&self, run_id: &str) -> Result<RunRows, ArchiveError>;
    /// Whether each query is a round trip to a server (PostgreSQL), so that `verify` does
    /// better reading a run's rows at once; an embedded database (SQLite) answers a small
    /// query faster than the rows can be gathered and kept.
    fn round_trips(&self) -> bool {
        false
    }
}

/// The step of a run's position an attempt belongs to: (position, step_index, attempt).
pub type AttemptKey = (i64, i64, i64);

/// Everything of one run that the chain's entries point at, as the backend read it.
#[derive(Debug, Default)]
pub struct RunRows {
    /// (position, serial) of every run_units row.
    pub seen: Vec<(i64, String)>,
    /// Every step row: its status and record text.
    pub steps: Vec<(AttemptKey, (String, String))>,
    /// Every reading, in the order written.
    pub readings: Vec<(AttemptKey, ReadingRow)>,
    /// Every unit row, with its sequence number.
    pub units: Vec<(i64, UnitRow)>,
}

/// A run's rows, found by key.
#[derive(Default)]
struct RunIndex {
    /// How many readings it holds.
    size: usize,
    seen: BTreeMap<i64, Vec<String>>,
    steps: HashMap<AttemptKey, (String, String)>,
    readings: HashMap<AttemptKey, Vec<ReadingRow>>,
    units: HashMap<i64, UnitRow>,
}

impl From<RunRows> for RunIndex {
    fn from(rows: RunRows) -> RunIndex {
        let mut index = RunIndex {
            size: rows.readings.len(),
            ..RunIndex::default()
        };
        for (position, serial) in rows.seen {
            index.seen.entry(position).or_default().push(serial);
        }
        index.steps.extend(rows.steps);
        for (key, reading) in rows.readings {
            index.readings.entry(key).or_default().push(reading);
        }
        index.units.extend(rows.units);
        index
    }
}

/// How many runs `ByRun` keeps: entries of runs written at the same time (several benches on
/// one archive) interleave in the chain, so the run an entry asks for is seldom the newest.
const RUNS_KEPT: usize = 16;

/// How many readings `ByRun` keeps at most, besides the run being read: a few runs of a bench
/// (16 positions, a few thousand readings each), never a handful of runs of a thousand units
/// (16 of those took 400 MB, 2 of them 120 MB).
const READINGS_KEPT: usize = 50_000;

/// The tables as `verify` reads them: a run's rows all at once, the first time one of its
/// entries asks, kept while the next few runs are read. The same rows as asking entry by
/// entry, in a handful of queries a run instead of a few an entry (each a round trip on
/// PostgreSQL). Everything else is asked of the backend as it comes.
struct ByRun<'a> {
    inner: &'a dyn Tables,
    keeping: usize,
    kept: std::cell::RefCell<std::collections::VecDeque<(String, std::rc::Rc<RunIndex>)>>,
}

impl<'a> ByRun<'a> {
    /// Keeping the rows of up to `keeping` runs.
    fn new(inner: &'a dyn Tables, keeping: usize) -> ByRun<'a> {
        ByRun {
            inner,
            keeping: keeping.max(1),
            kept: Default::default(),
        }
    }

    fn run(&self, run_id: &str) -> Result<std::rc::Rc<RunIndex>, ArchiveError> {
        let mut kept = self.kept.borrow_mut();
        if let Some((_, index)) = kept.iter().find(|(id, _)| id == run_id) {
            return Ok(index.clone());
        }
        let index = std::rc::Rc::new(RunIndex::from(self.inner.run_rows(run_id)?));
        let mut held: usize = kept.iter().map(|(_, r)| r.size).sum();
        while !kept.is_empty() && (kept.len() >= self.keeping || held > READINGS_KEPT) {
            if let Some((_, gone)) = kept.pop_front() {
                held -= gone.size;
            }
        }
        kept.push_back((run_id.to_string(), index.clone()));
        Ok(index)
    }
}

impl Tables for ByRun<'_> {
    fn meta(&self, key: &str) -> Result<Option<String>, ArchiveError> {
        self.inner.meta(key)
    }
    fn plans(&self) -> Result<Vec<(String, String)>, ArchiveError> {
        self.inner.plans()
    }
    fn chain_after(&self, seq: i64, limit: i64) -> Result<Vec<ChainRow>, ArchiveError> {
        self.inner.chain_after(seq, limit)
    }
    fn run_opening(&self, run_id: &str) -> Result<Option<RunOpening>, ArchiveError> {
        self.inner.run_opening(run_id)
    }
    fn serials_at(&self, run_id: &str, position: i64) -> Result<Vec<String>, ArchiveError> {
        Ok(self
            .run(run_id)?
            .seen
            .get(&position)
            .cloned()
            .unwrap_or_default())
    }
    fn step_row(
        &self,
        run_id: &str,
        position: i64,
        step_index: i64,
        attempt: i64,
    ) -> Result<Option<(String, String)>, ArchiveError> {
        let key = (position, step_index, attempt);
        Ok(self.run(run_id)?.steps.get(&key).cloned())
    }
    fn readings(
        &self,
        run_id: &str,
        position: i64,
        step_index: i64,
        attempt: i64,
    ) -> Result<Vec<ReadingRow>, ArchiveError> {
        let key = (position, step_index, attempt);
        Ok(self
            .run(run_id)?
            .readings
            .get(&key)
            .cloned()
            .unwrap_or_default())
    }
    fn unit_row(&self, seq: i64) -> Result<Option<UnitRow>, ArchiveError> {
        let kept = self.kept.borrow();
        match kept.iter().rev().find_map(|(_, r)| r.units.get(&seq)) {
            Some(row) => Ok(Some(row.clone())),
            None => self.inner.unit_row(seq),
        }
    }
    fn run_states(&self) -> Result<Vec<(String, String, Option<String>)>, ArchiveError> {
        self.inner.run_states()
    }
    fn all_seen(&self) -> Result<Vec<(String, i64, String)>, ArchiveError> {
        self.inner.all_seen()
    }
    fn all_steps(&self) -> Result<Vec<(String, i64, i64, i64)>, ArchiveError> {
        self.inner.all_steps()
    }
    fn units_after(&self, seq: i64) -> Result<Vec<(i64, String, String, i64)>, ArchiveError> {
        self.inner.units_after(seq)
    }
    fn legacy_units(&self, upto: i64) -> Result<Vec<LegacyUnit>, ArchiveError> {
        self.inner.legacy_units(upto)
    }
    fn legacy_runs(&self) -> Result<BTreeSet<String>, ArchiveError> {
        self.inner.legacy_runs()
    }
    fn run_rows(&self, run_id: &str) -> Result<RunRows, ArchiveError> {
        self.inner.run_rows(run_id)
    }
    fn round_trips(&self) -> bool {
        self.inner.round_trips()
    }
}

// ---- The stored forms: what a backend writes ----

/// How a step's status is stored.
pub fn status_word(s: StepStatus) -> &'static str {
    match s {
        StepStatus::Done => "done",
        StepStatus::Incomplete => "incomplete",
        StepStatus::NotRun => "not_run",
    }
}

/// The record without its samples, which the archive keeps as readings.
pub fn stripped(record: &UnitRecord) -> UnitRecord {
    let mut r = record.clone();
    for s in &mut r.steps {
        strip_step(s);
    }
    r
}

fn strip_step(s: &mut StepRecord) {
    for c in &mut s.checks {
        c.samples.clear();
    }
    if let Some(p) = &mut s.calibration_point {
        p.samples.clear();
    }
}

/// A step record's stored text: without its samples (those are the readings).
pub fn stored_step(record: &StepRecord) -> String {
    let mut r = record.clone();
    strip_step(&mut r);
    serde_json::to_string(&r).expect("a step record serialises")
}

/// Every sample of a finished record as a reading to store, with its key (checks sharing a
/// reading share its rows).
pub fn readings_of_record(r: &UnitRecord) -> Vec<(ReadingKey, &Sample)> {
    let mut out = Vec::new();
    for (index, step) in r.steps.iter().enumerate() {
        let series = step
            .checks
            .iter()
            .map(|c| (c.quantity, &c.channel, false, &c.samples))
            .chain(
                step.calibration_point
                    .iter()
                    .map(|p| (p.quantity, &p.channel, true, &p.samples)),
            );
        let mut seen = Vec::new();
        for (quantity, channel, raw, samples) in series {
            if seen.contains(&(quantity, channel, raw)) {
                continue;
            }
            seen.push((quantity, channel, raw));
            for s in samples {
                let key = ReadingKey {
                    position: r.position,
                    step_index: index,
                    attempt: step.attempt,
                    quantity,
                    channel: channel.clone(),
                    raw,
                };
                out.push((key, s));
            }
        }
    }
    out
}

/// Whether a record says nothing new about its position beyond the newest stored one (a
/// resumed run's unit that had finished before the interruption): it is not stored twice.
pub fn same_as_stored(newest_text: Option<&str>, record: &UnitRecord) -> bool {
    newest_text
        .and_then(|t| serde_json::from_str::<UnitRecord>(t).ok())
        .is_some_and(|old| old.serial == record.serial && old.steps == stripped(record).steps)
}

/// Adds a run's stored step rows (position, step index, attempt, status, record text, in that
/// order) to what a resume needs: the highest attempt of each step and the records of the
/// steps done, with their samples put back.
pub fn resume_steps(
    t: &dyn Tables,
    run_id: &str,
    rows: Vec<(usize, usize, u32, String, String)>,
    resume: &mut Resume,
) -> Result<(), ArchiveError> {
    for (position, index, attempt, status, text) in rows {
        let entry = resume.attempts.entry((position, index)).or_insert(0);
        *entry = (*entry).max(attempt);
        if status == "done" {
            let corrupt = |e: serde_json::Error| ArchiveError::Corrupt(e.to_string());
            let mut json: Value = serde_json::from_str(&text).map_err(corrupt)?;
            fill_step_json(t, run_id, position as i64, index as i64, &mut json)?;
            let record: StepRecord = serde_json::from_value(json).map_err(corrupt)?;
            resume
                .done
                .entry(position)
                .or_default()
                .insert(index, record);
        }
    }
    Ok(())
}

// ---- Content, as written and as recomputed from the tables ----

/// The run row's opening content, with its plan row.
pub fn run_content(t: &dyn Tables, run_id: &str) -> Result<Option<String>, ArchiveError> {
    Ok(t.run_opening(run_id)?.map(|r| {
        hash_of(&json!({
            "run_id": r.run_id,
            "plan_sha256": r.plan_sha256,
            "lot": r.lot,
            "station": r.station,
            "operator": r.operator,
            "bench": r.bench,
            "tool_version": r.tool_version,
            "started_at": r.started_at,
            "plan_id": r.plan_id,
            "revision": r.revision,
            "file": r.file,
        }))
    }))
}

/// Samples as JSON values, by (quantity, channel, raw).
type SeriesOf = BTreeMap<(String, String, bool), Vec<Value>>;

/// The readings of one attempt, by (quantity, channel, raw), as sample values.
fn readings_of(
    t: &dyn Tables,
    run_id: &str,
    position: i64,
    step_index: i64,
    attempt: i64,
) -> Result<SeriesOf, ArchiveError> {
    let mut out = SeriesOf::new();
    for r in t.readings(run_id, position, step_index, attempt)? {
        let mut sample = json!({"t_s": r.t_s, "value": r.value});
        if let Some(took) = r.took_s {
            sample["took_s"] = json!(took);
        }
        out.entry((r.quantity, r.channel, r.raw))
            .or_default()
            .push(sample);
    }
    Ok(out)
}

/// Puts a stored step record's samples back, as JSON, from its attempt's readings. Works on
/// the JSON, not the record type, so that the hash of a record stored by an older version does
/// not depend on this version's types.
pub fn fill_step_json(
    t: &dyn Tables,
    run_id: &str,
    position: i64,
    step_index: i64,
    step: &mut Value,
) -> Result<(), ArchiveError> {
    // A step that never ran took no readings: a later attempt of it (after a resume) has the
    // same number as its record here and must not lend it its readings.
    if step.get("status").and_then(Value::as_str) == Some("not_run") {
        return Ok(());
    }
    let attempt = step.get("attempt").and_then(Value::as_i64).unwrap_or(1);
    let readings = readings_of(t, run_id, position, step_index, attempt)?;
    let key = |series: &Value, raw: bool| {
        let quantity: Option<Quantity> = series
            .get("quantity")
            .and_then(|q| serde_json::from_value(q.clone()).ok());
        let channel = series.get("channel").and_then(Value::as_str).unwrap_or("");
        quantity.map(|q| (q.name().to_string(), channel.to_string(), raw))
    };
    if let Some(checks) = step.get_mut("checks").and_then(Value::as_array_mut) {
        for c in checks {
            let samples = key(c, false)
                .and_then(|k| readings.get(&k).cloned())
                .unwrap_or_default();
            c["samples"] = Value::Array(samples);
        }
    }
    if let Some(p) = step.get_mut("calibration_point").filter(|p| p.is_object()) {
        let samples = key(p, true)
            .and_then(|k| readings.get(&k).cloned())
            .unwrap_or_default();
        p["samples"] = Value::Array(samples);
    }
    Ok(())
}

/// A stored unit record (text without samples) with its samples put back, as JSON.
pub fn unit_json(t: &dyn Tables, text: &str) -> Result<Value, ArchiveError> {
    let mut record: Value =
        serde_json::from_str(text).map_err(|e| ArchiveError::Corrupt(e.to_string()))?;
    let run_id = record
        .get("run_id")
        .and_then(Value::as_str)
        .unwrap_or_default()
        .to_string();
    let position = record.get("position").and_then(Value::as_i64).unwrap_or(0);
    if let Some(steps) = record.get_mut("steps").and_then(Value::as_array_mut) {
        for (index, step) in steps.iter_mut().enumerate() {
            fill_step_json(t, &run_id, position, index as i64, step)?;
        }
    }
    Ok(record)
}

/// A stored (stripped) unit record with its samples put back from the readings: the same
/// reassembly `verify` hashes (`unit_json`), read into the record type.
pub fn reassemble(t: &dyn Tables, text: &str) -> Result<UnitRecord, ArchiveError> {
    serde_json::from_value(unit_json(t, text)?).map_err(|e| ArchiveError::Corrupt(e.to_string()))
}

/// The markers of what was written before the chain (kept in `meta`), sealed by the chain's
/// first entry so that moving them cannot hide a newer row.
pub fn legacy_content(t: &dyn Tables) -> Result<Option<String>, ArchiveError> {
    let mut values = Vec::new();
    for key in ["legacy_units_upto", "legacy_runs_upto", "legacy_chain_head"] {
        values.push(t.meta(key)?);
    }
    if values.iter().all(Option::is_none) {
        return Ok(None);
    }
    Ok(Some(hash_of(&json!({
        "legacy_units_upto": values[0],
        "legacy_runs_upto": values[1],
        "legacy_chain_head": values[2],
    }))))
}

// ---- Verification ----

/// Rows of the run, unit and step tables that the chain must cover, with what to call them.
#[derive(Default)]
struct Covered {
    runs: BTreeSet<String>,
    seen: BTreeSet<(String, i64, String)>,
    steps: BTreeSet<(String, i64, i64, i64)>,
    units: BTreeSet<i64>,
    /// The newest `end` entry of each run: (state, finished_at) content hash.
    ends: BTreeMap<String, String>,
}

/// Checks the whole archive, and the chain against `anchor` (`SEQ:SHA256`, as a run's folder
/// keeps it) where one is given. Records written before the archive had its chain (an SQLite
/// archive of schema 1, marked by its migration) are checked by their own record chain.
pub fn verify(t: &dyn Tables, anchor: Option<&str>) -> Result<Verification, ArchiveError> {
    if t.round_trips() {
        verify_with(&ByRun::new(t, RUNS_KEPT), anchor, CHAIN_PAGE)
    } else {
        verify_with(t, anchor, CHAIN_PAGE)
    }
}

/// `verify` over tables as given, reading the chain `page` entries at a time.
fn verify_with(
    t: &dyn Tables,
    anchor: Option<&str>,
    page: i64,
) -> Result<Verification, ArchiveError> {
    let legacy_upto: i64 = t
        .meta("legacy_units_upto")?
        .and_then(|v| v.parse().ok())
        .unwrap_or(0);
    let legacy_runs = t.legacy_runs()?;
    let mut v = Verification::default();
    let mut covered = Covered::default();
    let fail = |v: &mut Verification, what: String, why: &str| {
        v.failures.push(Failure {
            what,
            why: why.to_string(),
        })
    };
    // Every plan text against its name.
    {
        for (sha, text) in t.plans()? {
            if sha256_hex(text.as_bytes()) != sha {
                fail(
                    &mut v,
                    format!("plan {sha}"),
                    "its stored text no longer has this SHA-256",
                );
            }
        }
    }
    // The chain, entry by entry.
    let mut prev = GENESIS.to_string();
    let mut prev_seq = 0;
    // Only the entry an anchor names is kept (years of hashes would not fit in memory).
    let anchor_seq = anchor.and_then(|a| a.trim().split_once(':')?.0.parse::<i64>().ok());
    let mut by_seq: BTreeMap<i64, String> = BTreeMap::new();
    let mut legacy_sealed = false;
    for row in Entries::new(t, page) {
        let ChainRow {
            seq,
            kind,
            run_id,
            position,
            step_index,
            attempt,
            unit_seq,
            content_sha256: content,
            sha256: hash,
            prev_sha256: stored_prev,
        } = row?;
        v.entries += 1;
        let what = format!("chain entry {seq} ({kind}, run {run_id})");
        if stored_prev != prev {
            fail(
                &mut v,
                what.clone(),
                &format!(
                    "the entry before it (sequence {prev_seq}) is missing, reordered or changed"
                ),
            );
        }
        if link(&stored_prev, &kind, &content) != hash {
            fail(
                &mut v,
                what.clone(),
                "its own hash does not match its content",
            );
        }
        if anchor_seq == Some(seq) {
            by_seq.insert(seq, hash.clone());
        }
        prev = hash;
        prev_seq = seq;
        let now = match kind.as_str() {
            "run" => {
                covered.runs.insert(run_id.clone());
                run_content(t, &run_id)?
                    .ok_or_else(|| format!("run {run_id}: its row is missing"))
                    .map(|h| (h, format!("run {run_id}")))
            }
            "seen" => {
                let position = position.unwrap_or(0);
                let serials = t.serials_at(&run_id, position)?;
                // One of the serials of that position must be the one sealed.
                let found = serials
                    .iter()
                    .find(|s| seen_content(&run_id, position as usize, s) == content);
                match found {
                    Some(s) => {
                        covered.seen.insert((run_id.clone(), position, s.clone()));
                        Ok((content.clone(), String::new()))
                    }
                    None => Err(format!(
                        "run {run_id} position {position}: the serial it was given is missing or changed"
                    )),
                }
            }
            "step" => {
                let key = (
                    run_id.clone(),
                    position.unwrap_or(0),
                    step_index.unwrap_or(0),
                    attempt.unwrap_or(0),
                );
                covered.steps.insert(key.clone());
                let row = t.step_row(&key.0, key.1, key.2, key.3)?;
                let name = format!(
                    "step {} of position {} (run {run_id}, attempt {})",
                    key.2 + 1,
                    key.1,
                    key.3
                );
                match row {
                    None => Err(format!("{name}: its record is missing")),
                    Some((status, text)) => match serde_json::from_str::<Value>(&text) {
                        Err(e) => Err(format!("{name}: its record cannot be read: {e}")),
                        Ok(mut record) => {
                            fill_step_json(t, &key.0, key.1, key.2, &mut record)?;
                            Ok((step_content(&status, &record), name))
                        }
                    },
                }
            }
            "unit" => {
                let useq = unit_seq.unwrap_or(0);
                covered.units.insert(useq);
                check_unit_row(t, useq, &mut v)?
                    .ok_or_else(|| format!("unit record {useq} (run {run_id}): it is missing"))
            }
            "end" => {
                covered.ends.insert(run_id.clone(), content.clone());
                Ok((content.clone(), String::new()))
            }
            "legacy" => {
                legacy_sealed = true;
                legacy_content(t)?
                    .ok_or_else(|| {
                        "the markers of the records from before the chain are missing".to_string()
                    })
                    .map(|h| {
                        (
                            h,
                            "the markers of the records from before the chain".to_string(),
                        )
                    })
            }
            other => Err(format!("an entry of unknown kind \"{other}\"")),
        };
        match now {
            Err(why) => fail(&mut v, what, &why),
            Ok((h, name)) if h != content => fail(
                &mut v,
                if name.is_empty() { what } else { name },
                "its content no longer matches the hash the chain sealed",
            ),
            Ok(_) => {}
        }
    }
    v.head = (prev_seq > 0).then(|| format!("{prev_seq}:{prev}"));
    let stored_head = t.meta("chain_head")?;
    if stored_head != v.head {
        let now = v.head.clone();
        fail(
            &mut v,
            "the chain head".into(),
            &format!(
                "the newest entries were removed: the chain ends at {} but its head was recorded as {}",
                now.as_deref().unwrap_or("nothing"),
                stored_head.as_deref().unwrap_or("nothing")
            ),
        );
    }
    // Rows the chain does not cover.
    let runs = t.run_states()?;
    for (run_id, state, finished_at) in &runs {
        if legacy_runs.contains(run_id) {
            continue;
        }
        if !covered.runs.contains(run_id) {
            fail(
                &mut v,
                format!("run {run_id}"),
                "its row is not in the chain (added or rewritten)",
            );
        }
        let now = end_content(run_id, state, finished_at.as_deref());
        match covered.ends.get(run_id) {
            Some(sealed) if *sealed != now => fail(
                &mut v,
                format!("run {run_id}"),
                "its state or end time differs from how it was sealed",
            ),
            None if state != "running" || finished_at.is_some() => fail(
                &mut v,
                format!("run {run_id}"),
                "it says it ended, but no end was sealed",
            ),
            _ => {}
        }
    }
    let seen = t.all_seen()?;
    for key in seen {
        if !legacy_runs.contains(&key.0) && !covered.seen.contains(&key) {
            fail(
                &mut v,
                format!("run {} position {}", key.0, key.1),
                &format!("serial {} is not in the chain (added or changed)", key.2),
            );
        }
    }
    let steps = t.all_steps()?;
    for key in steps {
        if !legacy_runs.contains(&key.0) && !covered.steps.contains(&key) {
            fail(
                &mut v,
                format!(
                    "step {} of position {} (run {}, attempt {})",
                    key.2 + 1,
                    key.1,
                    key.0,
                    key.3
                ),
                "its record is not in the chain (added)",
            );
        }
    }
    let units = t.units_after(legacy_upto)?;
    for (seq, run_id, serial, position) in units {
        if !covered.units.contains(&seq) {
            fail(
                &mut v,
                unit_name(seq, &run_id, &serial, position),
                "it is not in the chain (added)",
            );
        }
    }
    if !legacy_sealed && legacy_content(t)?.is_some() {
        fail(
            &mut v,
            "the markers of the records from before the chain".into(),
            "they are not in the chain (added)",
        );
    }
    v.unit_records += covered.units.len() as u64;
    if legacy_upto > 0 {
        verify_legacy(t, legacy_upto, &mut v)?;
    }
    if let Some(anchor) = anchor {
        check_anchor(anchor, &by_seq, &mut v);
    }
    Ok(v)
}

/// How many chain entries are read at a time.
const CHAIN_PAGE: i64 = 10_000;

/// The chain's entries in order, read a page at a time.
struct Entries<'a> {
    t: &'a dyn Tables,
    size: i64,
    page: std::vec::IntoIter<ChainRow>,
    after: i64,
    more: bool,
}

impl<'a> Entries<'a> {
    fn new(t: &'a dyn Tables, size: i64) -> Entries<'a> {
        Entries {
            t,
            size,
            page: Vec::new().into_iter(),
            after: i64::MIN,
            more: true,
        }
    }
}

impl Iterator for Entries<'_> {
    type Item = Result<ChainRow, ArchiveError>;

    fn next(&mut self) -> Option<Self::Item> {
        if let Some(row) = self.page.next() {
            self.after = row.seq;
            return Some(Ok(row));
        }
        if !self.more {
            return None;
        }
        match self.t.chain_after(self.after, self.size) {
            Err(e) => {
                self.more = false;
                Some(Err(e))
            }
            Ok(page) => {
                self.more = page.len() as i64 == self.size;
                self.page = page.into_iter();
                let row = self.page.next()?;
                self.after = row.seq;
                Some(Ok(row))
            }
        }
    }
}

/// A unit row: its record's content hash, after checking that the columns the queries show
/// agree with the record. `None` when the row is missing.
fn check_unit_row(
    t: &dyn Tables,
    seq: i64,
    v: &mut Verification,
) -> Result<Option<(String, String)>, ArchiveError> {
    let row = t.unit_row(seq)?;
    let Some(row) = row else {
        return Ok(None);
    };
    let name = unit_name(seq, &row.run_id, &row.serial, row.position);
    let record = match unit_json(t, &row.record) {
        Ok(r) => r,
        Err(e) => {
            v.failures.push(Failure {
                what: name.clone(),
                why: format!("it cannot be read: {e}"),
            });
            return Ok(Some((String::new(), name)));
        }
    };
    let disagree = column_disagreement(&row, &record);
    if let Some(column) = disagree {
        v.failures.push(Failure {
            what: name.clone(),
            why: format!("its {column} column differs from its sealed record"),
        });
    }
    let content = hash_of(&record);
    if content != row.sha256 {
        v.failures.push(Failure {
            what: name.clone(),
            why: "its content (record or readings) no longer matches its hash".into(),
        });
    }
    Ok(Some((content, name)))
}

/// Records from before the chain: each record's hash over its struct-ordered JSON, and the
/// records' own chain through `prev_sha256`.
fn verify_legacy(
    t: &dyn Tables,
    legacy_upto: i64,
    v: &mut Verification,
) -> Result<(), ArchiveError> {
    let mut previous = GENESIS.to_string();
    let mut previous_seq = 0i64;
    for LegacyUnit {
        seq,
        row,
        prev_sha256: prev,
    } in t.legacy_units(legacy_upto)?
    {
        v.legacy_records += 1;
        v.unit_records += 1;
        let name = unit_name(seq, &row.run_id, &row.serial, row.position);
        match reassemble(t, &row.record) {
            Ok(record) => {
                let bytes = serde_json::to_vec(&record).expect("a record serialises");
                if sha256_hex(&bytes) != row.sha256 {
                    v.failures.push(Failure {
                        what: name.clone(),
                        why: "its content (record or readings) no longer matches its hash".into(),
                    });
                }
                let json = serde_json::to_value(&record).expect("a record serialises");
                if let Some(column) = column_disagreement(&row, &json) {
                    v.failures.push(Failure {
                        what: name.clone(),
                        why: format!("its {column} column differs from its sealed record"),
                    });
                }
            }
            Err(e) => v.failures.push(Failure {
                what: name.clone(),
                why: format!("it cannot be read: {e}"),
            }),
        }
        if prev != previous {
            v.failures.push(Failure {
                what: name,
                why: format!(
                    "the record before it (sequence {previous_seq}) is missing, reordered or changed"
                ),
            });
        }
        previous = row.sha256;
        previous_seq = seq;
    }
    let sealed = t.meta("legacy_chain_head")?;
    if sealed.as_deref() != Some(format!("{previous_seq}:{previous}").as_str()) {
        v.failures.push(Failure {
            what: "the records from before the chain".into(),
            why: "the newest of them were removed: they end before their recorded head".into(),
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::archive::{Archive, RunRow, RunState};
    use crate::bench::sim::{SimBench, SimConfig};
    use crate::exec::{self, RunContext, Silent};
    use crate::plan::Plan;

    /// An SQLite archive of `runs` runs of the demo plan on the simulated bench (four units
    /// each), written as `run` writes them.
    fn archive_of(dir: &std::path::Path, runs: usize) -> std::path::PathBuf {
        let path = dir.join("a.sqlite");
        let archive = Archive::open(&path).unwrap();
        let plan = Plan::load(std::path::Path::new("test-plans/demo.yaml")).unwrap();
        for n in 0..runs {
            let run_id = format!("RUN-{n}");
            let ctx = RunContext {
                run_id: run_id.clone(),
                operator: "test".into(),
                lot: Some("L1".into()),
                tool_version: crate::VERSION.into(),
                notes: Vec::new(),
            };
            let row = RunRow {
                run_id: run_id.clone(),
                plan_sha256: plan.source.sha256.clone(),
                plan_id: plan.id.clone(),
                revision: plan.revision.clone(),
                lot: ctx.lot.clone(),
                station: "sim".into(),
                operator: "test".into(),
                bench: "{}".into(),
                tool_version: crate::VERSION.into(),
                started_at: "2026-12-01T00:00:00+00:00".into(),
                finished_at: None,
                state: "running".into(),
            };
            archive.begin_run(&plan, &row).unwrap();
            let mut bench = SimBench::new(&SimConfig::new(n as u64 + 1, 4)).into_bench();
            let records = exec::run(&plan, &mut bench, &ctx, &mut Silent);
            archive.import_units(&records).unwrap();
            archive
                .finish_run(&run_id, "2026-12-01T00:10:00+00:00", RunState::Finished)
                .unwrap();
        }
        path
    }

    /// `verify` reads a run's rows at once and the chain a page at a time; asking the tables
    /// entry by entry, a page of one entry at a time, must find exactly the same, on an intact
    /// archive and after each kind of change, also when fewer runs are kept than the archive
    /// has (runs read again after being let go) and the pages end mid-run.
    #[test]
    fn reading_by_run_finds_what_reading_entry_by_entry_finds() {
        let dir = std::env::temp_dir().join(format!("meterproof-by-run-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        let path = archive_of(&dir, 5);
        let conn = rusqlite::Connection::open(&path).unwrap();
        let both = |conn: &rusqlite::Connection| {
            let head = conn.meta("chain_head").unwrap();
            let one_by_one = verify_with(conn, head.as_deref(), 1).unwrap();
            for (keeping, page) in [(RUNS_KEPT, CHAIN_PAGE), (2, 7)] {
                let by_run = verify_with(&ByRun::new(conn, keeping), head.as_deref(), page);
                assert_eq!(
                    by_run.unwrap(),
                    one_by_one,
                    "keeping {keeping}, page {page}"
                );
            }
            one_by_one
        };
        let intact = both(&conn);
        assert!(intact.failures.is_empty(), "{:?}", intact.failures);
        assert_eq!(intact.unit_records, 4 * 5);
        for change in [
            "UPDATE readings SET value = value * 1.001 WHERE id = 77",
            "DELETE FROM readings WHERE id = 1500",
            "UPDATE steps SET status = 'incomplete' WHERE run_id = 'RUN-3' AND position = 2 AND step_index = 1",
            "UPDATE units SET serial = 'X-1' WHERE run_id = 'RUN-4' AND position = 4",
            "UPDATE run_units SET serial = 'X-2' WHERE run_id = 'RUN-0' AND position = 1",
            "INSERT INTO readings (run_id, position, step_index, attempt, quantity, channel, raw, t_s, value)
             VALUES ('RUN-2', 1, 0, 1, 'current', 'L', 0, 1.0, 5.0)",
        ] {
            conn.execute(change, []).unwrap();
            let found = both(&conn);
            assert!(!found.failures.is_empty(), "{change}: nothing found");
        }
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
