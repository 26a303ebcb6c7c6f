//! The chain's rows in PostgreSQL: appending an entry under the chain's lock, and the reads
//! `archive::chain` verifies and reassembles records with.
//!
//! One chain for the whole database, however many benches write to it: every transaction that
//! appends an entry first takes a transaction-scoped advisory lock, so the entries of all
//! writers form one total order and each links to the one committed before it. Readings, which
//! are most of the traffic, append no entry and take no lock.

use super::*;
use crate::archive::chain::{ChainRow, LegacyUnit, ReadingRow, RunOpening, RunRows, Tables};
use crate::archive::seal::*;
use std::cell::RefCell;
use std::collections::BTreeSet;

/// The advisory lock's key: "mpch" in ASCII, a number no other program is likely to pick.
const CHAIN_LOCK: i64 = 0x6d70_6368;

/// Takes the chain's lock until the transaction ends (commit or rollback).
pub(super) fn lock_chain(tx: &mut impl GenericClient) -> Result<(), ArchiveError> {
    tx.execute("SELECT pg_advisory_xact_lock($1)", &[&CHAIN_LOCK])?;
    Ok(())
}

/// The newest entry: its sequence number and hash, which the next one links to.
pub(super) fn newest(c: &mut impl GenericClient) -> Result<(i64, String), ArchiveError> {
    Ok(c.query_opt(
        "SELECT seq, sha256 FROM chain ORDER BY seq DESC LIMIT 1",
        &[],
    )?
    .map(|r| (r.get(0), r.get(1)))
    .unwrap_or((0, GENESIS.to_string())))
}

/// Appends an entry whose content hash is `content` and moves the chain head. Call inside the
/// transaction that wrote the row, after [`lock_chain`].
pub(super) fn append(
    c: &mut impl GenericClient,
    entry: &Entry,
    content: &str,
) -> Result<(), ArchiveError> {
    append_as(c, entry.kind(), &entry.columns(), content)
}

/// Appends an entry of `kind` with these columns: what [`append`] does, and what an upload does
/// with an entry first sealed in a station's journal (same kind, columns and content).
pub(super) fn append_as(
    c: &mut impl GenericClient,
    kind: &str,
    e: &EntryColumns<'_>,
    content: &str,
) -> Result<(), ArchiveError> {
    let (seq, prev) = newest(c)?;
    let seq = seq + 1;
    let hash = link(&prev, kind, content);
    c.execute(
        "INSERT INTO chain (seq, kind, run_id, position, step_index, attempt, unit_seq, content_sha256, sha256, prev_sha256)
         VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10)",
        &[
            &seq,
            &kind,
            &e.run_id,
            &e.position,
            &e.step_index,
            &e.attempt,
            &e.unit_seq,
            &content,
            &hash,
            &prev,
        ],
    )?;
    c.execute(
        "INSERT INTO meta (key, value) VALUES ('chain_head', $1)
         ON CONFLICT (key) DO UPDATE SET value = excluded.value",
        &[&format!("{seq}:{hash}")],
    )?;
    Ok(())
}

/// The chain head as `SEQ:SHA256`.
pub(super) fn head(c: &mut impl GenericClient) -> Result<Option<String>, ArchiveError> {
    let (seq, hash) = newest(c)?;
    Ok((seq > 0).then(|| format!("{seq}:{hash}")))
}

/// A client or transaction, lent to the shared chain code (which reads through `&self`).
pub(super) struct PgTables<'a, C: GenericClient>(pub RefCell<&'a mut C>);

impl<'a, C: GenericClient> PgTables<'a, C> {
    pub fn new(c: &'a mut C) -> Self {
        PgTables(RefCell::new(c))
    }

    fn query(&self, sql: &str, params: &[&(dyn ToSql + Sync)]) -> Result<Vec<Row>, ArchiveError> {
        Ok(self.0.borrow_mut().query(sql, params)?)
    }

    fn query_opt(
        &self,
        sql: &str,
        params: &[&(dyn ToSql + Sync)],
    ) -> Result<Option<Row>, ArchiveError> {
        Ok(self.0.borrow_mut().query_opt(sql, params)?)
    }
}

const UNIT_COLUMNS: &str =
    "run_id, position, serial, firmware, status, finished_at, record, record_sha256";

fn unit_row(r: &Row, at: usize) -> UnitRow {
    UnitRow {
        run_id: r.get(at),
        position: r.get(at + 1),
        serial: r.get(at + 2),
        firmware: r.get(at + 3),
        status: r.get(at + 4),
        finished_at: r.get(at + 5),
        record: r.get(at + 6),
        sha256: r.get(at + 7),
    }
}

impl<C: GenericClient> Tables for PgTables<'_, C> {
    fn meta(&self, key: &str) -> Result<Option<String>, ArchiveError> {
        Ok(self
            .query_opt("SELECT value FROM meta WHERE key = $1", &[&key])?
            .map(|r| r.get(0)))
    }

    fn plans(&self) -> Result<Vec<(String, String)>, ArchiveError> {
        let rows = self.query("SELECT sha256, text FROM plans", &[])?;
        Ok(rows.iter().map(|r| (r.get(0), r.get(1))).collect())
    }

    fn chain_after(&self, seq: i64, limit: i64) -> Result<Vec<ChainRow>, ArchiveError> {
        let rows = self.query(
            "SELECT seq, kind, run_id, position, step_index, attempt, unit_seq, content_sha256, sha256, prev_sha256
             FROM chain WHERE seq > $1 ORDER BY seq LIMIT $2",
            &[&seq, &limit],
        )?;
        Ok(rows.iter().map(super::image::chain_row).collect())
    }

    fn run_opening(&self, run_id: &str) -> Result<Option<RunOpening>, ArchiveError> {
        Ok(self
            .query_opt(
                "SELECT r.run_id, r.plan_sha256, r.lot, r.station, r.operator, r.bench, r.tool_version,
                        r.started_at, p.plan_id, p.revision, p.file
                 FROM runs r LEFT JOIN plans p ON p.sha256 = r.plan_sha256 WHERE r.run_id = $1",
                &[&run_id],
            )?
            .map(|r| RunOpening {
                run_id: r.get(0),
                plan_sha256: r.get(1),
                lot: r.get(2),
                station: r.get(3),
                operator: r.get(4),
                bench: r.get(5),
                tool_version: r.get(6),
                started_at: r.get(7),
                plan_id: r.get(8),
                revision: r.get(9),
                file: r.get(10),
            }))
    }

    fn serials_at(&self, run_id: &str, position: i64) -> Result<Vec<String>, ArchiveError> {
        let rows = self.query(
            "SELECT serial FROM run_units WHERE run_id = $1 AND position = $2",
            &[&run_id, &position],
        )?;
        Ok(rows.iter().map(|r| r.get(0)).collect())
    }

    fn step_row(
        &self,
        run_id: &str,
        position: i64,
        step_index: i64,
        attempt: i64,
    ) -> Result<Option<(String, String)>, ArchiveError> {
        Ok(self
            .query_opt(
                "SELECT status, record FROM steps
                 WHERE run_id = $1 AND position = $2 AND step_index = $3 AND attempt = $4",
                &[&run_id, &position, &step_index, &attempt],
            )?
            .map(|r| (r.get(0), r.get(1))))
    }

    fn readings(
        &self,
        run_id: &str,
        position: i64,
        step_index: i64,
        attempt: i64,
    ) -> Result<Vec<ReadingRow>, ArchiveError> {
        let rows = self.query(
            "SELECT quantity, channel, raw, t_s, value, took_s FROM readings
             WHERE run_id = $1 AND position = $2 AND step_index = $3 AND attempt = $4 ORDER BY id",
            &[&run_id, &position, &step_index, &attempt],
        )?;
        Ok(rows
            .iter()
            .map(|r| ReadingRow {
                quantity: r.get(0),
                channel: r.get(1),
                raw: r.get(2),
                t_s: r.get(3),
                value: r.get(4),
                took_s: r.get(5),
            })
            .collect())
    }

    fn unit_row(&self, seq: i64) -> Result<Option<UnitRow>, ArchiveError> {
        Ok(self
            .query_opt(
                &format!("SELECT {UNIT_COLUMNS} FROM units WHERE seq = $1"),
                &[&seq],
            )?
            .map(|r| unit_row(&r, 0)))
    }

    fn run_states(&self) -> Result<Vec<(String, String, Option<String>)>, ArchiveError> {
        let rows = self.query("SELECT run_id, state, finished_at FROM runs", &[])?;
        Ok(rows
            .iter()
            .map(|r| (r.get(0), r.get(1), r.get(2)))
            .collect())
    }

    fn all_seen(&self) -> Result<Vec<(String, i64, String)>, ArchiveError> {
        let rows = self.query("SELECT run_id, position, serial FROM run_units", &[])?;
        Ok(rows
            .iter()
            .map(|r| (r.get(0), r.get(1), r.get(2)))
            .collect())
    }

    fn all_steps(&self) -> Result<Vec<(String, i64, i64, i64)>, ArchiveError> {
        let rows = self.query(
            "SELECT run_id, position, step_index, attempt FROM steps",
            &[],
        )?;
        Ok(rows
            .iter()
            .map(|r| (r.get(0), r.get(1), r.get(2), r.get(3)))
            .collect())
    }

    fn units_after(&self, seq: i64) -> Result<Vec<(i64, String, String, i64)>, ArchiveError> {
        let rows = self.query(
            "SELECT seq, run_id, serial, position FROM units WHERE seq > $1 ORDER BY seq",
            &[&seq],
        )?;
        Ok(rows
            .iter()
            .map(|r| (r.get(0), r.get(1), r.get(2), r.get(3)))
            .collect())
    }

    fn legacy_units(&self, upto: i64) -> Result<Vec<LegacyUnit>, ArchiveError> {
        let rows = self.query(
            &format!(
                "SELECT seq, prev_sha256, {UNIT_COLUMNS} FROM units WHERE seq <= $1 ORDER BY seq"
            ),
            &[&upto],
        )?;
        Ok(rows
            .iter()
            .map(|r| LegacyUnit {
                seq: r.get(0),
                prev_sha256: r.get(1),
                row: unit_row(r, 2),
            })
            .collect())
    }

    /// Runs copied from an SQLite archive that was written before the chain keep their SQLite
    /// numbers in `runs.seq`, and the migration's marker says up to which.
    fn legacy_runs(&self) -> Result<BTreeSet<String>, ArchiveError> {
        let upto: i64 = self
            .meta("legacy_runs_upto")?
            .and_then(|v| v.parse().ok())
            .unwrap_or(0);
        let rows = self.query("SELECT run_id FROM runs WHERE seq <= $1", &[&upto])?;
        Ok(rows.iter().map(|r| r.get(0)).collect())
    }

    fn round_trips(&self) -> bool {
        true
    }

    fn run_rows(&self, run_id: &str) -> Result<RunRows, ArchiveError> {
        let seen = self
            .query(
                "SELECT position, serial FROM run_units WHERE run_id = $1",
                &[&run_id],
            )?
            .iter()
            .map(|r| (r.get(0), r.get(1)))
            .collect();
        let steps = self
            .query(
                "SELECT position, step_index, attempt, status, record FROM steps WHERE run_id = $1",
                &[&run_id],
            )?
            .iter()
            .map(|r| ((r.get(0), r.get(1), r.get(2)), (r.get(3), r.get(4))))
            .collect();
        let readings = self
            .query(
                "SELECT position, step_index, attempt, quantity, channel, raw, t_s, value, took_s
                 FROM readings WHERE run_id = $1 ORDER BY id",
                &[&run_id],
            )?
            .iter()
            .map(|r| {
                (
                    (r.get(0), r.get(1), r.get(2)),
                    ReadingRow {
                        quantity: r.get(3),
                        channel: r.get(4),
                        raw: r.get(5),
                        t_s: r.get(6),
                        value: r.get(7),
                        took_s: r.get(8),
                    },
                )
            })
            .collect();
        let units = self
            .query(
                &format!("SELECT seq, {UNIT_COLUMNS} FROM units WHERE run_id = $1"),
                &[&run_id],
            )?
            .iter()
            .map(|r| (r.get(0), unit_row(r, 1)))
            .collect();
        Ok(RunRows {
            seen,
            steps,
            readings,
            units,
        })
    }
}
