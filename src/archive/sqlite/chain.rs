//! The chain's rows in SQLite: the `chain` table, appending an entry in the writer's
//! transaction, and the reads `archive::chain` verifies and reassembles records with.
//!
//! Appending reads the newest entry first; every writer takes SQLite's write lock at the start
//! of its transaction (`BEGIN IMMEDIATE`), so two processes cannot both link to the same entry.

use crate::archive::ArchiveError;
use crate::archive::chain::{ChainRow, LegacyUnit, ReadingRow, RunOpening, RunRows, Tables};
use crate::archive::seal::*;
use rusqlite::{Connection, OptionalExtension, params};
use std::collections::BTreeSet;

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
    let c = entry.columns();
    conn.prepare_cached(
        "INSERT INTO chain (kind, run_id, position, step_index, attempt, unit_seq, content_sha256, sha256, prev_sha256)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
    )?
    .execute(params![
        kind,
        c.run_id,
        c.position,
        c.step_index,
        c.attempt,
        c.unit_seq,
        content,
        hash,
        prev
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

fn unit_row(r: &rusqlite::Row<'_>, at: usize) -> rusqlite::Result<UnitRow> {
    Ok(UnitRow {
        run_id: r.get(at)?,
        position: r.get(at + 1)?,
        serial: r.get(at + 2)?,
        firmware: r.get(at + 3)?,
        status: r.get(at + 4)?,
        finished_at: r.get(at + 5)?,
        record: r.get(at + 6)?,
        sha256: r.get(at + 7)?,
    })
}

const UNIT_COLUMNS: &str =
    "run_id, position, serial, firmware, status, finished_at, record, record_sha256";

impl Tables for Connection {
    fn meta(&self, key: &str) -> Result<Option<String>, ArchiveError> {
        Ok(self
            .query_row("SELECT value FROM meta WHERE key = ?1", [key], |r| r.get(0))
            .optional()?)
    }

    fn plans(&self) -> Result<Vec<(String, String)>, ArchiveError> {
        let mut stmt = self.prepare("SELECT sha256, text FROM plans")?;
        let rows = stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    fn chain_after(&self, seq: i64, limit: i64) -> Result<Vec<ChainRow>, ArchiveError> {
        let mut stmt = self.prepare_cached(
            "SELECT seq, kind, run_id, position, step_index, attempt, unit_seq, content_sha256, sha256, prev_sha256
             FROM chain WHERE seq > ?1 ORDER BY seq LIMIT ?2",
        )?;
        let rows = stmt.query_map([seq, limit], super::image::chain_row)?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    fn run_opening(&self, run_id: &str) -> Result<Option<RunOpening>, ArchiveError> {
        Ok(self
            .query_row(
                "SELECT r.run_id, r.plan_sha256, r.lot, r.station, r.operator, r.bench, r.tool_version,
                        r.started_at, p.plan_id, p.revision, p.file
                 FROM runs r LEFT JOIN plans p ON p.sha256 = r.plan_sha256 WHERE r.run_id = ?1",
                [run_id],
                |r| {
                    Ok(RunOpening {
                        run_id: r.get(0)?,
                        plan_sha256: r.get(1)?,
                        lot: r.get(2)?,
                        station: r.get(3)?,
                        operator: r.get(4)?,
                        bench: r.get(5)?,
                        tool_version: r.get(6)?,
                        started_at: r.get(7)?,
                        plan_id: r.get(8)?,
                        revision: r.get(9)?,
                        file: r.get(10)?,
                    })
                },
            )
            .optional()?)
    }

    fn serials_at(&self, run_id: &str, position: i64) -> Result<Vec<String>, ArchiveError> {
        let mut stmt = self
            .prepare_cached("SELECT serial FROM run_units WHERE run_id = ?1 AND position = ?2")?;
        let rows = stmt.query_map(params![run_id, position], |r| r.get(0))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    fn step_row(
        &self,
        run_id: &str,
        position: i64,
        step_index: i64,
        attempt: i64,
    ) -> Result<Option<(String, String)>, ArchiveError> {
        Ok(self
            .prepare_cached(
                "SELECT status, record FROM steps
                 WHERE run_id = ?1 AND position = ?2 AND step_index = ?3 AND attempt = ?4",
            )?
            .query_row(params![run_id, position, step_index, attempt], |r| {
                Ok((r.get(0)?, r.get(1)?))
            })
            .optional()?)
    }

    fn readings(
        &self,
        run_id: &str,
        position: i64,
        step_index: i64,
        attempt: i64,
    ) -> Result<Vec<ReadingRow>, ArchiveError> {
        let mut stmt = self.prepare_cached(
            "SELECT quantity, channel, raw, t_s, value, took_s FROM readings
             WHERE run_id = ?1 AND position = ?2 AND step_index = ?3 AND attempt = ?4 ORDER BY id",
        )?;
        let rows = stmt.query_map(params![run_id, position, step_index, attempt], |r| {
            Ok(ReadingRow {
                quantity: r.get(0)?,
                channel: r.get(1)?,
                raw: r.get(2)?,
                t_s: r.get(3)?,
                value: r.get(4)?,
                took_s: r.get(5)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    fn unit_row(&self, seq: i64) -> Result<Option<UnitRow>, ArchiveError> {
        Ok(self
            .prepare_cached(&format!("SELECT {UNIT_COLUMNS} FROM units WHERE seq = ?1"))?
            .query_row([seq], |r| unit_row(r, 0))
            .optional()?)
    }

    fn run_states(&self) -> Result<Vec<(String, String, Option<String>)>, ArchiveError> {
        let mut stmt = self.prepare("SELECT run_id, state, finished_at FROM runs")?;
        let rows = stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    fn all_seen(&self) -> Result<Vec<(String, i64, String)>, ArchiveError> {
        let mut stmt = self.prepare("SELECT run_id, position, serial FROM run_units")?;
        let rows = stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    fn all_steps(&self) -> Result<Vec<(String, i64, i64, i64)>, ArchiveError> {
        let mut stmt = self.prepare("SELECT run_id, position, step_index, attempt FROM steps")?;
        let rows = stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    fn units_after(&self, seq: i64) -> Result<Vec<(i64, String, String, i64)>, ArchiveError> {
        let mut stmt = self.prepare(
            "SELECT seq, run_id, serial, position FROM units WHERE seq > ?1 ORDER BY seq",
        )?;
        let rows = stmt.query_map([seq], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    fn legacy_units(&self, upto: i64) -> Result<Vec<LegacyUnit>, ArchiveError> {
        let mut stmt = self.prepare(&format!(
            "SELECT seq, prev_sha256, {UNIT_COLUMNS} FROM units WHERE seq <= ?1 ORDER BY seq"
        ))?;
        let rows = stmt.query_map([upto], |r| {
            Ok(LegacyUnit {
                seq: r.get(0)?,
                prev_sha256: r.get(1)?,
                row: unit_row(r, 2)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Runs are numbered by SQLite's rowid; the migration to the chain noted the last one.
    fn legacy_runs(&self) -> Result<BTreeSet<String>, ArchiveError> {
        let upto: i64 = self
            .meta("legacy_runs_upto")?
            .and_then(|v| v.parse().ok())
            .unwrap_or(0);
        let mut stmt = self.prepare("SELECT run_id FROM runs WHERE rowid <= ?1")?;
        let rows = stmt.query_map([upto], |r| r.get(0))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    fn run_rows(&self, run_id: &str) -> Result<RunRows, ArchiveError> {
        let seen = self
            .prepare_cached("SELECT position, serial FROM run_units WHERE run_id = ?1")?
            .query_map([run_id], |r| Ok((r.get(0)?, r.get(1)?)))?
            .collect::<Result<_, _>>()?;
        let steps = self
            .prepare_cached(
                "SELECT position, step_index, attempt, status, record FROM steps WHERE run_id = ?1",
            )?
            .query_map([run_id], |r| {
                Ok(((r.get(0)?, r.get(1)?, r.get(2)?), (r.get(3)?, r.get(4)?)))
            })?
            .collect::<Result<_, _>>()?;
        let readings = self
            .prepare_cached(
                "SELECT position, step_index, attempt, quantity, channel, raw, t_s, value, took_s
                 FROM readings WHERE run_id = ?1 ORDER BY id",
            )?
            .query_map([run_id], |r| {
                Ok((
                    (r.get(0)?, r.get(1)?, r.get(2)?),
                    ReadingRow {
                        quantity: r.get(3)?,
                        channel: r.get(4)?,
                        raw: r.get(5)?,
                        t_s: r.get(6)?,
                        value: r.get(7)?,
                        took_s: r.get(8)?,
                    },
                ))
            })?
            .collect::<Result<_, _>>()?;
        let units = self
            .prepare_cached(&format!(
                "SELECT seq, {UNIT_COLUMNS} FROM units WHERE run_id = ?1"
            ))?
            .query_map([run_id], |r| Ok((r.get(0)?, unit_row(r, 1)?)))?
            .collect::<Result<_, _>>()?;
        Ok(RunRows {
            seen,
            steps,
            readings,
            units,
        })
    }
}
