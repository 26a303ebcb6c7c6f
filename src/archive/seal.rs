//! The seal: what the archive's chain hashes, the same for every backend.
//!
//! Owns the rules that make a chain entry (each kind's content hash, the link to the entry
//! before, the genesis), what `verify` reports, and the checks that need no database (a unit
//! row's columns against its record, an anchor against the chain). A backend stores the entries
//! and reads its rows back; it never computes a hash any other way, so a record copied from one
//! backend to another keeps its hash and `verify` passes on both sides.
//!
//! May use the record's canonical form and nothing of any backend.

use crate::plan::sha256_hex;
use crate::record::canonical_bytes;
use serde_json::{Value, json};
use std::collections::BTreeMap;

/// The hash the first entry of a chain points back to.
pub const GENESIS: &str = "0000000000000000000000000000000000000000000000000000000000000000";

/// What one entry seals.
#[derive(Debug, Clone, PartialEq)]
pub enum Entry<'a> {
    Run {
        run_id: &'a str,
    },
    Seen {
        run_id: &'a str,
        position: usize,
        serial: &'a str,
    },
    Step {
        run_id: &'a str,
        position: usize,
        step_index: usize,
        attempt: u32,
    },
    Unit {
        run_id: &'a str,
        position: usize,
        unit_seq: i64,
    },
    End {
        run_id: &'a str,
    },
    /// What an archive held before it had the chain (written once, by the migration).
    Legacy,
}

/// The columns of a chain row that say what an entry seals (every backend stores these).
pub struct EntryColumns<'a> {
    pub run_id: &'a str,
    pub position: Option<i64>,
    pub step_index: Option<i64>,
    pub attempt: Option<i64>,
    pub unit_seq: Option<i64>,
}

impl<'a> Entry<'a> {
    pub fn columns(&self) -> EntryColumns<'a> {
        let (run_id, position, step_index, attempt, unit_seq) = match *self {
            Entry::Run { run_id } | Entry::End { run_id } => (run_id, None, None, None, None),
            Entry::Legacy => ("", None, None, None, None),
            Entry::Seen {
                run_id, position, ..
            } => (run_id, Some(position as i64), None, None, None),
            Entry::Step {
                run_id,
                position,
                step_index,
                attempt,
            } => (
                run_id,
                Some(position as i64),
                Some(step_index as i64),
                Some(i64::from(attempt)),
                None,
            ),
            Entry::Unit {
                run_id,
                position,
                unit_seq,
            } => (run_id, Some(position as i64), None, None, Some(unit_seq)),
        };
        EntryColumns {
            run_id,
            position,
            step_index,
            attempt,
            unit_seq,
        }
    }

    pub fn kind(&self) -> &'static str {
        match self {
            Entry::Run { .. } => "run",
            Entry::Seen { .. } => "seen",
            Entry::Step { .. } => "step",
            Entry::Unit { .. } => "unit",
            Entry::End { .. } => "end",
            Entry::Legacy => "legacy",
        }
    }
}

pub fn link(prev: &str, kind: &str, content: &str) -> String {
    sha256_hex(format!("{prev}\n{kind}\n{content}").as_bytes())
}

pub fn hash_of(value: &Value) -> String {
    sha256_hex(&canonical_bytes(value))
}

pub fn seen_content(run_id: &str, position: usize, serial: &str) -> String {
    hash_of(&json!({"run_id": run_id, "position": position, "serial": serial}))
}

/// A step row's content from a record with its samples (what the writer has in memory).
pub fn step_content(status: &str, record: &Value) -> String {
    hash_of(&json!({"status": status, "record": record}))
}

pub fn end_content(run_id: &str, state: &str, finished_at: Option<&str>) -> String {
    hash_of(&json!({"run_id": run_id, "state": state, "finished_at": finished_at}))
}

/// One thing `verify` found wrong, and where.
#[derive(Debug, Clone, PartialEq)]
pub struct Failure {
    /// The entry or row concerned: "unit record 12 (run R, serial S, position 2)".
    pub what: String,
    pub why: String,
}

/// What `verify` checked and found.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Verification {
    /// Chain entries checked.
    pub entries: u64,
    /// Unit records among them (and legacy ones).
    pub unit_records: u64,
    /// Records written before the archive had its chain (schema 1), checked by their own
    /// record chain only.
    pub legacy_records: u64,
    pub failures: Vec<Failure>,
    /// The chain head now, `SEQ:SHA256`.
    pub head: Option<String>,
}

pub fn unit_name(seq: i64, run_id: &str, serial: &str, position: i64) -> String {
    format!("unit record {seq} (run {run_id}, serial {serial}, position {position})")
}

#[derive(Debug, Clone)]
pub struct UnitRow {
    pub run_id: String,
    pub position: i64,
    pub serial: String,
    pub firmware: Option<String>,
    pub status: String,
    pub finished_at: String,
    pub record: String,
    pub sha256: String,
}

/// The first indexed column that says something other than the record it indexes.
pub fn column_disagreement(row: &UnitRow, record: &Value) -> Option<&'static str> {
    let text = |k: &str| record.get(k).and_then(Value::as_str).map(str::to_string);
    let firmware = record
        .get("identity")
        .and_then(|i| i.get("firmware"))
        .and_then(Value::as_str)
        .map(str::to_string);
    let status = record
        .get("verdict")
        .and_then(|v| v.get("status"))
        .and_then(Value::as_str)
        .map(str::to_string);
    if text("run_id").as_deref() != Some(row.run_id.as_str()) {
        Some("run")
    } else if record.get("position").and_then(Value::as_i64) != Some(row.position) {
        Some("position")
    } else if text("serial").as_deref() != Some(row.serial.as_str()) {
        Some("serial")
    } else if firmware != row.firmware {
        Some("firmware")
    } else if status.as_deref() != Some(row.status.as_str()) {
        Some("status")
    } else if text("finished_at").as_deref() != Some(row.finished_at.as_str()) {
        Some("finished_at")
    } else {
        None
    }
}

/// An anchor `SEQ:SHA256` (as a run's folder keeps it) must still be in the chain.
pub fn check_anchor(anchor: &str, by_seq: &BTreeMap<i64, String>, v: &mut Verification) {
    let parsed = anchor
        .trim()
        .split_once(':')
        .and_then(|(s, h)| Some((s.parse::<i64>().ok()?, h.to_string())));
    let Some((seq, hash)) = parsed else {
        v.failures.push(Failure {
            what: format!("the anchor {anchor:?}"),
            why: "it is not of the form SEQUENCE:SHA256".into(),
        });
        return;
    };
    match by_seq.get(&seq) {
        Some(h) if *h == hash => {}
        Some(_) => v.failures.push(Failure {
            what: format!("the anchor {seq}:{hash}"),
            why: format!("chain entry {seq} is no longer the one the anchor sealed: the chain was rewritten from there on"),
        }),
        None => v.failures.push(Failure {
            what: format!("the anchor {seq}:{hash}"),
            why: format!("the chain has no entry {seq} any more: entries up to it were removed"),
        }),
    }
}
