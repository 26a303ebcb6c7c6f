//! The chain that seals the archive: every row any command reads is covered by one entry.
//!
//! Owns the `chain` table, the content hash of each kind of entry, appending entries and
//! `verify`. It reads the other tables but never writes them; the recorder in `mod.rs` writes a
//! row and its entry in one transaction.
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
use crate::plan::Quantity;
use crate::plan::sha256_hex;
use rusqlite::{Connection, OptionalExtension, params};
use serde_json::{Value, json};
use std::collections::{BTreeMap, BTreeSet};

pub(super) const SCHEMA: &str = "
CREATE TABLE IF NOT EXISTS chain (
    seq INTEGER PRIMARY KEY AUTOINCREMENT, kind TEXT NOT NULL, run_id TEXT NOT NULL,
    position INTEGER, step_index INTEGER, attempt INTEGER, unit_seq INTEGER,
    content_sha256 TEXT NOT NULL, sha256 TEXT NOT NULL, prev_sha256 TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS chain_run ON chain(run_id, kind);
";

/// The newest entry's hash, which the next one links to.
pub(super) fn newest(conn: &Connection) -> rusqlite::Result<(i64, String)> {
    Ok(conn
        .query_row(
            "SELECT seq, sha256 FROM chain ORDER BY seq DESC LIMIT 1",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .optional()?
        .unwrap_or((0, GENESIS.to_string())))
}

/// Appends an entry whose content hash is `content` (computed by the caller from what it just
/// wrote) and moves the chain head. Call inside the transaction that wrote the row.
pub(super) fn append(conn: &Connection, entry: &Entry, content: &str) -> rusqlite::Result<()> {
    let (_, prev) = newest(conn)?;
    let kind = entry.kind();
    let hash = link(&prev, kind, content);
    let (run_id, position, step_index, attempt, unit_seq) = match entry {
        Entry::Run { run_id } | Entry::End { run_id } => (*run_id, None, None, None, None),
        Entry::Legacy => ("", None, None, None, None),
        Entry::Seen {
            run_id, position, ..
        } => (*run_id, Some(*position as i64), None, None, None),
        Entry::Step {
            run_id,
            position,
            step_index,
            attempt,
        } => (
            *run_id,
            Some(*position as i64),
            Some(*step_index as i64),
            Some(i64::from(*attempt)),
            None,
        ),
        Entry::Unit {
            run_id,
            position,
            unit_seq,
        } => (*run_id, Some(*position as i64), None, None, Some(*unit_seq)),
    };
    conn.prepare_cached(
        "INSERT INTO chain (kind, run_id, position, step_index, attempt, unit_seq, content_sha256, sha256, prev_sha256)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
    )?
    .execute(params![
        kind, run_id, position, step_index, attempt, unit_seq, content, hash, prev
    ])?;
    let seq = conn.last_insert_rowid();
    conn.execute(
        "INSERT INTO meta (key, value) VALUES ('chain_head', ?1)
         ON CONFLICT(key) DO UPDATE SET value = excluded.value",
        [format!("{seq}:{hash}")],
    )?;
    Ok(())
}

/// The chain head as `SEQ:SHA256`: the anchor a run's folder and reports keep.
pub(super) fn head(conn: &Connection) -> rusqlite::Result<Option<String>> {
    let (seq, hash) = newest(conn)?;
    Ok((seq > 0).then(|| format!("{seq}:{hash}")))
}

// ---- Content, as written and as recomputed from the tables ----

/// The run row's opening content, with its plan row.
pub(super) fn run_content(conn: &Connection, run_id: &str) -> rusqlite::Result<Option<String>> {
    conn.query_row(
        "SELECT r.run_id, r.plan_sha256, r.lot, r.station, r.operator, r.bench, r.tool_version,
                r.started_at, p.plan_id, p.revision, p.file
         FROM runs r LEFT JOIN plans p ON p.sha256 = r.plan_sha256 WHERE r.run_id = ?1",
        [run_id],
        |r| {
            Ok(json!({
                "run_id": r.get::<_, String>(0)?,
                "plan_sha256": r.get::<_, String>(1)?,
                "lot": r.get::<_, Option<String>>(2)?,
                "station": r.get::<_, String>(3)?,
                "operator": r.get::<_, String>(4)?,
                "bench": r.get::<_, String>(5)?,
                "tool_version": r.get::<_, String>(6)?,
                "started_at": r.get::<_, String>(7)?,
                "plan_id": r.get::<_, Option<String>>(8)?,
                "revision": r.get::<_, Option<String>>(9)?,
                "file": r.get::<_, Option<String>>(10)?,
            }))
        },
    )
    .optional()
    .map(|v| v.map(|v| hash_of(&v)))
}

/// The readings of one attempt, by (quantity, channel, raw), as sample values.
fn readings_of(
    conn: &Connection,
    run_id: &str,
    position: i64,
    step_index: i64,
    attempt: i64,
) -> rusqlite::Result<BTreeMap<(String, String, bool), Vec<Value>>> {
    let mut stmt = conn.prepare_cached(
        "SELECT quantity, channel, raw, t_s, value, took_s FROM readings
         WHERE run_id = ?1 AND position = ?2 AND step_index = ?3 AND attempt = ?4 ORDER BY id",
    )?;
    let mut out: BTreeMap<(String, String, bool), Vec<Value>> = BTreeMap::new();
    let rows = stmt.query_map(params![run_id, position, step_index, attempt], |r| {
        let took: Option<f64> = r.get(5)?;
        let mut sample = json!({"t_s": r.get::<_, f64>(3)?, "value": r.get::<_, f64>(4)?});
        if let Some(t) = took {
            sample["took_s"] = json!(t);
        }
        Ok((
            (r.get::<_, String>(0)?, r.get::<_, String>(1)?, r.get(2)?),
            sample,
        ))
    })?;
    for row in rows {
        let (key, sample) = row?;
        out.entry(key).or_default().push(sample);
    }
    Ok(out)
}

/// Puts a stored step record's samples back, as JSON, from its attempt's readings. Works on
/// the JSON, not the record type, so that the hash of a record stored by an older version does
/// not depend on this version's types.
pub(super) fn fill_step_json(
    conn: &Connection,
    run_id: &str,
    position: i64,
    step_index: i64,
    step: &mut Value,
) -> rusqlite::Result<()> {
    // A step that never ran took no readings: a later attempt of it (after a resume) has the
    // same number as its record here and must not lend it its readings.
    if step.get("status").and_then(Value::as_str) == Some("not_run") {
        return Ok(());
    }
    let attempt = step.get("attempt").and_then(Value::as_i64).unwrap_or(1);
    let readings = readings_of(conn, run_id, position, step_index, attempt)?;
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
pub(super) fn unit_json(conn: &Connection, text: &str) -> Result<Value, ArchiveError> {
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
            fill_step_json(conn, &run_id, position, index as i64, step)?;
        }
    }
    Ok(record)
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

/// Checks the whole archive. `legacy_upto` is the last unit sequence number written before
/// the chain existed (0 for none) and `legacy_runs` the runs opened before it.
pub(super) fn verify(
    conn: &Connection,
    legacy_upto: i64,
    legacy_runs: &BTreeSet<String>,
    anchor: Option<&str>,
) -> Result<Verification, ArchiveError> {
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
        let mut stmt = conn.prepare("SELECT sha256, text FROM plans")?;
        let rows = stmt.query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, String>(1)?)))?;
        for row in rows {
            let (sha, text) = row?;
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
    let mut stmt = conn.prepare(
        "SELECT seq, kind, run_id, position, step_index, attempt, unit_seq, content_sha256, sha256, prev_sha256
         FROM chain ORDER BY seq",
    )?;
    type Row = (
        i64,
        String,
        String,
        Option<i64>,
        Option<i64>,
        Option<i64>,
        Option<i64>,
        String,
        String,
        String,
    );
    let rows: Vec<Row> = stmt
        .query_map([], |r| {
            Ok((
                r.get(0)?,
                r.get(1)?,
                r.get(2)?,
                r.get(3)?,
                r.get(4)?,
                r.get(5)?,
                r.get(6)?,
                r.get(7)?,
                r.get(8)?,
                r.get(9)?,
            ))
        })?
        .collect::<Result<_, _>>()?;
    let mut prev = GENESIS.to_string();
    let mut prev_seq = 0;
    let mut by_seq: BTreeMap<i64, String> = BTreeMap::new();
    let mut legacy_sealed = false;
    for (seq, kind, run_id, position, step_index, attempt, unit_seq, content, hash, stored_prev) in
        rows
    {
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
        by_seq.insert(seq, hash.clone());
        prev = hash;
        prev_seq = seq;
        let now = match kind.as_str() {
            "run" => {
                covered.runs.insert(run_id.clone());
                run_content(conn, &run_id)?
                    .ok_or_else(|| format!("run {run_id}: its row is missing"))
                    .map(|h| (h, format!("run {run_id}")))
            }
            "seen" => {
                let position = position.unwrap_or(0);
                let serials: Vec<String> = conn
                    .prepare_cached(
                        "SELECT serial FROM run_units WHERE run_id = ?1 AND position = ?2",
                    )?
                    .query_map(params![run_id, position], |r| r.get(0))?
                    .collect::<Result<_, _>>()?;
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
                let row: Option<(String, String)> = conn
                    .prepare_cached(
                        "SELECT status, record FROM steps
                         WHERE run_id = ?1 AND position = ?2 AND step_index = ?3 AND attempt = ?4",
                    )?
                    .query_row(params![key.0, key.1, key.2, key.3], |r| {
                        Ok((r.get(0)?, r.get(1)?))
                    })
                    .optional()?;
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
                            fill_step_json(conn, &key.0, key.1, key.2, &mut record)?;
                            Ok((step_content(&status, &record), name))
                        }
                    },
                }
            }
            "unit" => {
                let useq = unit_seq.unwrap_or(0);
                covered.units.insert(useq);
                check_unit_row(conn, useq, &mut v)?
                    .ok_or_else(|| format!("unit record {useq} (run {run_id}): it is missing"))
            }
            "end" => {
                covered.ends.insert(run_id.clone(), content.clone());
                Ok((content.clone(), String::new()))
            }
            "legacy" => {
                legacy_sealed = true;
                legacy_content(conn)?
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
    let stored_head: Option<String> = conn
        .query_row("SELECT value FROM meta WHERE key = 'chain_head'", [], |r| {
            r.get(0)
        })
        .optional()?;
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
    let mut stmt = conn.prepare("SELECT run_id, state, finished_at FROM runs")?;
    let runs: Vec<(String, String, Option<String>)> = stmt
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?
        .collect::<Result<_, _>>()?;
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
    let mut stmt = conn.prepare("SELECT run_id, position, serial FROM run_units")?;
    let seen: Vec<(String, i64, String)> = stmt
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?
        .collect::<Result<_, _>>()?;
    for key in seen {
        if !legacy_runs.contains(&key.0) && !covered.seen.contains(&key) {
            fail(
                &mut v,
                format!("run {} position {}", key.0, key.1),
                &format!("serial {} is not in the chain (added or changed)", key.2),
            );
        }
    }
    let mut stmt = conn.prepare("SELECT run_id, position, step_index, attempt FROM steps")?;
    let steps: Vec<(String, i64, i64, i64)> = stmt
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))?
        .collect::<Result<_, _>>()?;
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
    let mut stmt = conn
        .prepare("SELECT seq, run_id, serial, position FROM units WHERE seq > ?1 ORDER BY seq")?;
    let units: Vec<(i64, String, String, i64)> = stmt
        .query_map([legacy_upto], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
        })?
        .collect::<Result<_, _>>()?;
    for (seq, run_id, serial, position) in units {
        if !covered.units.contains(&seq) {
            fail(
                &mut v,
                unit_name(seq, &run_id, &serial, position),
                "it is not in the chain (added)",
            );
        }
    }
    if !legacy_sealed && legacy_content(conn)?.is_some() {
        fail(
            &mut v,
            "the markers of the records from before the chain".into(),
            "they are not in the chain (added)",
        );
    }
    v.unit_records += covered.units.len() as u64;
    if legacy_upto > 0 {
        verify_legacy(conn, legacy_upto, &mut v)?;
    }
    if let Some(anchor) = anchor {
        check_anchor(anchor, &by_seq, &mut v);
    }
    Ok(v)
}

/// A unit row: its record's content hash, after checking that the columns the queries show
/// agree with the record. `None` when the row is missing.
fn check_unit_row(
    conn: &Connection,
    seq: i64,
    v: &mut Verification,
) -> Result<Option<(String, String)>, ArchiveError> {
    let row: Option<UnitRow> = conn
        .prepare_cached(
            "SELECT run_id, position, serial, firmware, status, finished_at, record, record_sha256
             FROM units WHERE seq = ?1",
        )?
        .query_row([seq], |r| {
            Ok(UnitRow {
                run_id: r.get(0)?,
                position: r.get(1)?,
                serial: r.get(2)?,
                firmware: r.get(3)?,
                status: r.get(4)?,
                finished_at: r.get(5)?,
                record: r.get(6)?,
                sha256: r.get(7)?,
            })
        })
        .optional()?;
    let Some(row) = row else {
        return Ok(None);
    };
    let name = unit_name(seq, &row.run_id, &row.serial, row.position);
    let record = match unit_json(conn, &row.record) {
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
    conn: &Connection,
    legacy_upto: i64,
    v: &mut Verification,
) -> Result<(), ArchiveError> {
    let mut stmt = conn.prepare(
        "SELECT seq, run_id, serial, position, record, record_sha256, prev_sha256, firmware, status, finished_at
         FROM units WHERE seq <= ?1 ORDER BY seq",
    )?;
    let mut rows = stmt.query([legacy_upto])?;
    let mut previous = GENESIS.to_string();
    let mut previous_seq = 0i64;
    while let Some(r) = rows.next()? {
        let row = UnitRow {
            run_id: r.get(1)?,
            position: r.get(3)?,
            serial: r.get(2)?,
            firmware: r.get(7)?,
            status: r.get(8)?,
            finished_at: r.get(9)?,
            record: r.get(4)?,
            sha256: r.get(5)?,
        };
        let seq: i64 = r.get(0)?;
        let prev: String = r.get(6)?;
        v.legacy_records += 1;
        v.unit_records += 1;
        let name = unit_name(seq, &row.run_id, &row.serial, row.position);
        match super::reassemble(conn, &row.record) {
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
    let sealed: Option<String> = conn
        .query_row(
            "SELECT value FROM meta WHERE key = 'legacy_chain_head'",
            [],
            |r| r.get(0),
        )
        .optional()?;
    if sealed.as_deref() != Some(format!("{previous_seq}:{previous}").as_str()) {
        v.failures.push(Failure {
            what: "the records from before the chain".into(),
            why: "the newest of them were removed: they end before their recorded head".into(),
        });
    }
    Ok(())
}

/// The markers of what was written before the chain (kept in `meta`), sealed by the chain's
/// first entry so that moving them cannot hide a newer row.
pub(super) fn legacy_content(conn: &Connection) -> rusqlite::Result<Option<String>> {
    let mut values = Vec::new();
    for key in ["legacy_units_upto", "legacy_runs_upto", "legacy_chain_head"] {
        values.push(
            conn.query_row("SELECT value FROM meta WHERE key = ?1", [key], |r| {
                r.get::<_, String>(0)
            })
            .optional()?,
        );
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

/// Runs the chain does not cover because they were opened before it existed.
pub(super) fn legacy_runs(conn: &Connection) -> rusqlite::Result<BTreeSet<String>> {
    let upto: i64 = conn
        .query_row(
            "SELECT value FROM meta WHERE key = 'legacy_runs_upto'",
            [],
            |r| r.get::<_, String>(0),
        )
        .optional()?
        .and_then(|v| v.parse().ok())
        .unwrap_or(0);
    let mut stmt = conn.prepare("SELECT run_id FROM runs WHERE rowid <= ?1")?;
    let rows = stmt.query_map([upto], |r| r.get(0))?;
    rows.collect()
}
