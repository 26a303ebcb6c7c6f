//! Copying in and out of SQLite: every row of every table in chunks (`dump`), and loading such
//! chunks into an empty archive in one transaction (`load`), numbers kept (runs by rowid,
//! readings by id, units and chain entries by sequence number).

use super::*;
use crate::archive::chain::ChainRow;
use crate::archive::image::*;

/// Runs `sql` and hands its rows to `sink` in chunks of [`CHUNK`], each row made by `row`.
fn chunked<T>(
    conn: &Connection,
    sql: &str,
    row: impl Fn(&rusqlite::Row<'_>) -> rusqlite::Result<T>,
    wrap: impl Fn(Vec<T>) -> Rows,
    sink: &mut Sink<'_>,
) -> Result<(), ArchiveError> {
    let mut stmt = conn.prepare(sql)?;
    let mut rows = stmt.query([])?;
    let mut chunk = Vec::new();
    while let Some(r) = rows.next()? {
        chunk.push(row(r)?);
        if chunk.len() == CHUNK {
            sink(wrap(std::mem::take(&mut chunk)))?;
        }
    }
    if !chunk.is_empty() {
        sink(wrap(chunk))?;
    }
    Ok(())
}

pub(super) fn dump(conn: &Connection, sink: &mut Sink<'_>) -> Result<(), ArchiveError> {
    // One read transaction: one view of the file, whatever a bench writes meanwhile.
    let tx = conn.unchecked_transaction()?;
    chunked(
        &tx,
        &format!(
            "SELECT key, value FROM meta WHERE key NOT IN ('{}') ORDER BY key",
            OWN_META.join("', '")
        ),
        |r| Ok((r.get(0)?, r.get(1)?)),
        Rows::Meta,
        sink,
    )?;
    chunked(
        &tx,
        "SELECT sha256, plan_id, revision, file, text FROM plans ORDER BY rowid",
        plan_row,
        Rows::Plans,
        sink,
    )?;
    chunked(
        &tx,
        "SELECT rowid, run_id, plan_sha256, lot, station, operator, bench, tool_version, started_at,
                finished_at, state FROM runs ORDER BY rowid",
        run_full,
        Rows::Runs,
        sink,
    )?;
    chunked(
        &tx,
        "SELECT rowid, run_id, position, serial FROM run_units ORDER BY rowid",
        seen_row,
        Rows::Seen,
        sink,
    )?;
    chunked(
        &tx,
        "SELECT id, run_id, position, step_index, attempt, quantity, channel, raw, t_s, value, took_s
         FROM readings ORDER BY id",
        reading_full,
        Rows::Readings,
        sink,
    )?;
    chunked(
        &tx,
        "SELECT run_id, position, step_index, attempt, status, record FROM steps ORDER BY rowid",
        step_full,
        Rows::Steps,
        sink,
    )?;
    chunked(
        &tx,
        "SELECT seq, run_id, position, serial, firmware, status, finished_at, record, record_sha256,
                prev_sha256 FROM units ORDER BY seq",
        unit_full,
        Rows::Units,
        sink,
    )?;
    chunked(
        &tx,
        "SELECT seq, kind, run_id, position, step_index, attempt, unit_seq, content_sha256, sha256,
                prev_sha256 FROM chain ORDER BY seq",
        chain_row,
        Rows::Chain,
        sink,
    )?;
    tx.finish()?;
    Ok(())
}

/// Whether the archive holds no run, unit record or chain entry.
pub(super) fn is_empty(conn: &Connection) -> Result<bool, ArchiveError> {
    let n: i64 = conn.query_row(
        "SELECT (SELECT COUNT(*) FROM runs) + (SELECT COUNT(*) FROM units) + (SELECT COUNT(*) FROM chain)",
        [],
        |r| r.get(0),
    )?;
    Ok(n == 0)
}

fn insert(tx: &Connection, rows: Rows) -> Result<(), ArchiveError> {
    match rows {
        Rows::Meta(v) => {
            let mut s = tx.prepare_cached(
                "INSERT INTO meta (key, value) VALUES (?1, ?2)
                 ON CONFLICT(key) DO UPDATE SET value = excluded.value",
            )?;
            for (k, val) in v {
                s.execute(params![k, val])?;
            }
        }
        Rows::Plans(v) => {
            let mut s = tx.prepare_cached(
                "INSERT INTO plans (sha256, plan_id, revision, file, text) VALUES (?1, ?2, ?3, ?4, ?5)",
            )?;
            for p in v {
                s.execute(params![p.sha256, p.plan_id, p.revision, p.file, p.text])?;
            }
        }
        Rows::Runs(v) => {
            let mut s = tx.prepare_cached(
                "INSERT INTO runs (rowid, run_id, plan_sha256, lot, station, operator, bench, tool_version,
                                   started_at, finished_at, state)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
            )?;
            for r in v {
                s.execute(params![
                    r.seq,
                    r.run_id,
                    r.plan_sha256,
                    r.lot,
                    r.station,
                    r.operator,
                    r.bench,
                    r.tool_version,
                    r.started_at,
                    r.finished_at,
                    r.state
                ])?;
            }
        }
        Rows::Seen(v) => {
            let mut s = tx.prepare_cached(
                "INSERT INTO run_units (rowid, run_id, position, serial) VALUES (?1, ?2, ?3, ?4)",
            )?;
            for r in v {
                s.execute(params![r.seq, r.run_id, r.position, r.serial])?;
            }
        }
        Rows::Readings(v) => {
            let mut s = tx.prepare_cached(
                "INSERT INTO readings (id, run_id, position, step_index, attempt, quantity, channel, raw, t_s, value, took_s)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
            )?;
            for r in v {
                s.execute(params![
                    r.id,
                    r.run_id,
                    r.position,
                    r.step_index,
                    r.attempt,
                    r.quantity,
                    r.channel,
                    r.raw,
                    r.t_s,
                    r.value,
                    r.took_s
                ])?;
            }
        }
        Rows::Steps(v) => {
            let mut s = tx.prepare_cached(
                "INSERT INTO steps (run_id, position, step_index, attempt, status, record)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
            )?;
            for r in v {
                s.execute(params![
                    r.run_id,
                    r.position,
                    r.step_index,
                    r.attempt,
                    r.status,
                    r.record
                ])?;
            }
        }
        Rows::Units(v) => {
            let mut s = tx.prepare_cached(
                "INSERT INTO units (seq, run_id, position, serial, firmware, status, finished_at, record,
                                    record_sha256, prev_sha256)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)",
            )?;
            for u in v {
                s.execute(params![
                    u.seq,
                    u.run_id,
                    u.position,
                    u.serial,
                    u.firmware,
                    u.status,
                    u.finished_at,
                    u.record,
                    u.record_sha256,
                    u.prev_sha256
                ])?;
            }
        }
        Rows::Chain(v) => {
            let mut s = tx.prepare_cached(
                "INSERT INTO chain (seq, kind, run_id, position, step_index, attempt, unit_seq,
                                    content_sha256, sha256, prev_sha256)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)",
            )?;
            for c in v {
                s.execute(params![
                    c.seq,
                    c.kind,
                    c.run_id,
                    c.position,
                    c.step_index,
                    c.attempt,
                    c.unit_seq,
                    c.content_sha256,
                    c.sha256,
                    c.prev_sha256
                ])?;
            }
        }
    }
    Ok(())
}

pub(super) fn load(conn: &Connection, fill: &mut Fill<'_>) -> Result<(), ArchiveError> {
    let tx = immediate(conn)?;
    fill(&mut |rows| insert(&tx, rows))?;
    tx.commit()?;
    Ok(())
}

/// The rows of a journal beyond `marks`, for an upload: the chain entries after the mark, the
/// plan, run, seen, step and unit rows they seal (runs as they are now), and the readings after
/// the mark, in the order a shared archive inserts them.
pub(super) fn dump_since(
    conn: &Connection,
    marks: &crate::archive::journal::Marks,
    sink: &mut Sink<'_>,
) -> Result<(), ArchiveError> {
    let tx = conn.unchecked_transaction()?;
    let mut entries = Vec::new();
    chunked(
        &tx,
        &format!(
            "SELECT seq, kind, run_id, position, step_index, attempt, unit_seq, content_sha256, sha256,
                    prev_sha256 FROM chain WHERE seq > {} ORDER BY seq",
            marks.chain_upto
        ),
        chain_row,
        Rows::Chain,
        &mut |rows| {
            if let Rows::Chain(v) = rows {
                entries.extend(v);
            }
            Ok(())
        },
    )?;
    let runs: std::collections::BTreeSet<&str> = entries
        .iter()
        .map(|e| e.run_id.as_str())
        .filter(|r| !r.is_empty())
        .collect();
    for run in &runs {
        let p = tx
            .query_row(
                "SELECT p.sha256, p.plan_id, p.revision, p.file, p.text
                 FROM plans p JOIN runs r ON r.plan_sha256 = p.sha256 WHERE r.run_id = ?1",
                [run],
                plan_row,
            )
            .optional()?;
        sink(Rows::Plans(p.into_iter().collect()))?;
    }
    let mut run_rows = Vec::new();
    let mut seen = Vec::new();
    for run in &runs {
        run_rows.extend(
            tx.query_row(
                "SELECT rowid, run_id, plan_sha256, lot, station, operator, bench, tool_version,
                        started_at, finished_at, state FROM runs WHERE run_id = ?1",
                [run],
                run_full,
            )
            .optional()?,
        );
        let mut stmt = tx.prepare(
            "SELECT rowid, run_id, position, serial FROM run_units WHERE run_id = ?1 ORDER BY rowid",
        )?;
        for row in stmt.query_map([run], seen_row)? {
            seen.push(row?);
        }
    }
    sink(Rows::Runs(run_rows))?;
    sink(Rows::Seen(seen))?;
    chunked(
        &tx,
        &format!(
            "SELECT id, run_id, position, step_index, attempt, quantity, channel, raw, t_s, value, took_s
             FROM readings WHERE id > {} ORDER BY id",
            marks.readings_upto
        ),
        reading_full,
        Rows::Readings,
        sink,
    )?;
    let mut steps = Vec::new();
    let mut units = Vec::new();
    for e in &entries {
        match e.kind.as_str() {
            "step" => steps.extend(
                tx.query_row(
                    "SELECT run_id, position, step_index, attempt, status, record FROM steps
                     WHERE run_id = ?1 AND position = ?2 AND step_index = ?3 AND attempt = ?4",
                    params![e.run_id, e.position, e.step_index, e.attempt],
                    step_full,
                )
                .optional()?,
            ),
            "unit" => units.extend(
                tx.query_row(
                    "SELECT seq, run_id, position, serial, firmware, status, finished_at, record,
                            record_sha256, prev_sha256 FROM units WHERE seq = ?1",
                    [e.unit_seq],
                    unit_full,
                )
                .optional()?,
            ),
            _ => {}
        }
    }
    sink(Rows::Steps(steps))?;
    sink(Rows::Units(units))?;
    sink(Rows::Chain(entries))?;
    tx.finish()?;
    Ok(())
}

/// What waits beyond `marks`: the runs with chain entries after it, and the readings.
pub(super) fn waiting_since(
    conn: &Connection,
    marks: &crate::archive::journal::Marks,
) -> Result<crate::archive::journal::Waiting, ArchiveError> {
    let (runs, readings): (i64, i64) = conn.query_row(
        "SELECT (SELECT COUNT(DISTINCT run_id) FROM chain WHERE seq > ?1 AND run_id != ''),
                (SELECT COUNT(*) FROM readings WHERE id > ?2)",
        params![marks.chain_upto, marks.readings_upto],
        |r| Ok((r.get(0)?, r.get(1)?)),
    )?;
    Ok(crate::archive::journal::Waiting {
        runs: runs as u64,
        readings: readings as u64,
    })
}

// ---- Rows as this backend reads them (one mapping per row kind) ----

pub(super) fn chain_row(r: &rusqlite::Row<'_>) -> rusqlite::Result<ChainRow> {
    Ok(ChainRow {
        seq: r.get(0)?,
        kind: r.get(1)?,
        run_id: r.get(2)?,
        position: r.get(3)?,
        step_index: r.get(4)?,
        attempt: r.get(5)?,
        unit_seq: r.get(6)?,
        content_sha256: r.get(7)?,
        sha256: r.get(8)?,
        prev_sha256: r.get(9)?,
    })
}

pub(super) fn run_full(r: &rusqlite::Row<'_>) -> rusqlite::Result<RunFull> {
    Ok(RunFull {
        seq: r.get(0)?,
        run_id: r.get(1)?,
        plan_sha256: r.get(2)?,
        lot: r.get(3)?,
        station: r.get(4)?,
        operator: r.get(5)?,
        bench: r.get(6)?,
        tool_version: r.get(7)?,
        started_at: r.get(8)?,
        finished_at: r.get(9)?,
        state: r.get(10)?,
    })
}

pub(super) fn seen_row(r: &rusqlite::Row<'_>) -> rusqlite::Result<SeenRow> {
    Ok(SeenRow {
        seq: r.get(0)?,
        run_id: r.get(1)?,
        position: r.get(2)?,
        serial: r.get(3)?,
    })
}

pub(super) fn reading_full(r: &rusqlite::Row<'_>) -> rusqlite::Result<ReadingFull> {
    Ok(ReadingFull {
        id: r.get(0)?,
        run_id: r.get(1)?,
        position: r.get(2)?,
        step_index: r.get(3)?,
        attempt: r.get(4)?,
        quantity: r.get(5)?,
        channel: r.get(6)?,
        raw: r.get(7)?,
        t_s: r.get(8)?,
        value: r.get(9)?,
        took_s: r.get(10)?,
    })
}

pub(super) fn step_full(r: &rusqlite::Row<'_>) -> rusqlite::Result<StepFull> {
    Ok(StepFull {
        run_id: r.get(0)?,
        position: r.get(1)?,
        step_index: r.get(2)?,
        attempt: r.get(3)?,
        status: r.get(4)?,
        record: r.get(5)?,
    })
}

pub(super) fn unit_full(r: &rusqlite::Row<'_>) -> rusqlite::Result<UnitFull> {
    Ok(UnitFull {
        seq: r.get(0)?,
        run_id: r.get(1)?,
        position: r.get(2)?,
        serial: r.get(3)?,
        firmware: r.get(4)?,
        status: r.get(5)?,
        finished_at: r.get(6)?,
        record: r.get(7)?,
        record_sha256: r.get(8)?,
        prev_sha256: r.get(9)?,
    })
}

pub(super) fn plan_row(r: &rusqlite::Row<'_>) -> rusqlite::Result<PlanRow> {
    Ok(PlanRow {
        sha256: r.get(0)?,
        plan_id: r.get(1)?,
        revision: r.get(2)?,
        file: r.get(3)?,
        text: r.get(4)?,
    })
}
