//! Copying in and out of PostgreSQL: every row of every table in chunks, read through portals
//! in one snapshot (`dump`), and chunks loaded into an empty archive in one transaction under
//! the chain's lock (`load`), numbers kept.

use super::*;
use crate::archive::chain::ChainRow;
use crate::archive::image::*;

/// Runs `sql` in `tx` and hands its rows to `sink` in chunks of [`CHUNK`].
fn chunked<T>(
    tx: &mut postgres::Transaction<'_>,
    sql: &str,
    row: impl Fn(&Row) -> T,
    wrap: impl Fn(Vec<T>) -> Rows,
    sink: &mut Sink<'_>,
) -> Result<(), ArchiveError> {
    let portal = tx.bind(sql, &[])?;
    loop {
        let rows = tx.query_portal(&portal, CHUNK as i32)?;
        if rows.is_empty() {
            return Ok(());
        }
        sink(wrap(rows.iter().map(&row).collect()))?;
    }
}

pub(super) fn dump(client: &mut Client, sink: &mut Sink<'_>) -> Result<(), ArchiveError> {
    let mut tx = client
        .build_transaction()
        .isolation_level(postgres::IsolationLevel::RepeatableRead)
        .read_only(true)
        .start()?;
    let own = OWN_META.map(|k| format!("'{k}'")).join(", ");
    chunked(
        &mut tx,
        &format!("SELECT key, value FROM meta WHERE key NOT IN ({own}) ORDER BY key"),
        |r| (r.get(0), r.get(1)),
        Rows::Meta,
        sink,
    )?;
    chunked(
        &mut tx,
        "SELECT sha256, plan_id, revision, file, text FROM plans ORDER BY sha256",
        plan_row,
        Rows::Plans,
        sink,
    )?;
    chunked(
        &mut tx,
        "SELECT seq, run_id, plan_sha256, lot, station, operator, bench, tool_version, started_at,
                finished_at, state FROM runs ORDER BY seq",
        run_full,
        Rows::Runs,
        sink,
    )?;
    chunked(
        &mut tx,
        "SELECT seq, run_id, position, serial FROM run_units ORDER BY seq",
        seen_row,
        Rows::Seen,
        sink,
    )?;
    chunked(
        &mut tx,
        "SELECT id, run_id, position, step_index, attempt, quantity, channel, raw, t_s, value, took_s
         FROM readings ORDER BY id",
        reading_full,
        Rows::Readings,
        sink,
    )?;
    chunked(
        &mut tx,
        "SELECT run_id, position, step_index, attempt, status, record FROM steps
         ORDER BY run_id, position, step_index, attempt",
        step_full,
        Rows::Steps,
        sink,
    )?;
    chunked(
        &mut tx,
        "SELECT seq, run_id, position, serial, firmware, status, finished_at, record, record_sha256,
                prev_sha256 FROM units ORDER BY seq",
        unit_full,
        Rows::Units,
        sink,
    )?;
    chunked(
        &mut tx,
        "SELECT seq, kind, run_id, position, step_index, attempt, unit_seq, content_sha256, sha256,
                prev_sha256 FROM chain ORDER BY seq",
        chain_row,
        Rows::Chain,
        sink,
    )?;
    tx.commit()?;
    Ok(())
}

pub(super) fn is_empty(client: &mut Client) -> Result<bool, ArchiveError> {
    let n: i64 = client
        .query_one(
            "SELECT (SELECT COUNT(*) FROM runs) + (SELECT COUNT(*) FROM units) + (SELECT COUNT(*) FROM chain)",
            &[],
        )?
        .get(0);
    Ok(n == 0)
}

fn insert(tx: &mut postgres::Transaction<'_>, rows: Rows) -> Result<(), ArchiveError> {
    match rows {
        Rows::Meta(v) => {
            let s = tx.prepare(
                "INSERT INTO meta (key, value) VALUES ($1, $2)
                 ON CONFLICT (key) DO UPDATE SET value = excluded.value",
            )?;
            for (k, val) in v {
                tx.execute(&s, &[&k, &val])?;
            }
        }
        Rows::Plans(v) => {
            let s = tx.prepare(
                "INSERT INTO plans (sha256, plan_id, revision, file, text) VALUES ($1, $2, $3, $4, $5)",
            )?;
            for p in v {
                tx.execute(&s, &[&p.sha256, &p.plan_id, &p.revision, &p.file, &p.text])?;
            }
        }
        Rows::Runs(v) => {
            let s = tx.prepare(
                "INSERT INTO runs (seq, run_id, plan_sha256, lot, station, operator, bench, tool_version,
                                   started_at, finished_at, state)
                 VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11)",
            )?;
            for r in v {
                tx.execute(
                    &s,
                    &[
                        &r.seq,
                        &r.run_id,
                        &r.plan_sha256,
                        &r.lot,
                        &r.station,
                        &r.operator,
                        &r.bench,
                        &r.tool_version,
                        &r.started_at,
                        &r.finished_at,
                        &r.state,
                    ],
                )?;
            }
        }
        Rows::Seen(v) => {
            let s = tx.prepare(
                "INSERT INTO run_units (seq, run_id, position, serial) VALUES ($1, $2, $3, $4)",
            )?;
            for r in v {
                tx.execute(&s, &[&r.seq, &r.run_id, &r.position, &r.serial])?;
            }
        }
        Rows::Readings(v) => {
            let s = tx.prepare(
                "INSERT INTO readings (id, run_id, position, step_index, attempt, quantity, channel, raw, t_s, value, took_s)
                 VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11)",
            )?;
            for r in v {
                tx.execute(
                    &s,
                    &[
                        &r.id,
                        &r.run_id,
                        &r.position,
                        &r.step_index,
                        &r.attempt,
                        &r.quantity,
                        &r.channel,
                        &r.raw,
                        &r.t_s,
                        &r.value,
                        &r.took_s,
                    ],
                )?;
            }
        }
        Rows::Steps(v) => {
            let s = tx.prepare(
                "INSERT INTO steps (run_id, position, step_index, attempt, status, record)
                 VALUES ($1, $2, $3, $4, $5, $6)",
            )?;
            for r in v {
                tx.execute(
                    &s,
                    &[
                        &r.run_id,
                        &r.position,
                        &r.step_index,
                        &r.attempt,
                        &r.status,
                        &r.record,
                    ],
                )?;
            }
        }
        Rows::Units(v) => {
            let s = tx.prepare(
                "INSERT INTO units (seq, run_id, position, serial, firmware, status, finished_at, record,
                                    record_sha256, prev_sha256)
                 VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10)",
            )?;
            for u in v {
                tx.execute(
                    &s,
                    &[
                        &u.seq,
                        &u.run_id,
                        &u.position,
                        &u.serial,
                        &u.firmware,
                        &u.status,
                        &u.finished_at,
                        &u.record,
                        &u.record_sha256,
                        &u.prev_sha256,
                    ],
                )?;
            }
        }
        Rows::Chain(v) => {
            let s = tx.prepare(
                "INSERT INTO chain (seq, kind, run_id, position, step_index, attempt, unit_seq,
                                    content_sha256, sha256, prev_sha256)
                 VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10)",
            )?;
            for c in v {
                tx.execute(
                    &s,
                    &[
                        &c.seq,
                        &c.kind,
                        &c.run_id,
                        &c.position,
                        &c.step_index,
                        &c.attempt,
                        &c.unit_seq,
                        &c.content_sha256,
                        &c.sha256,
                        &c.prev_sha256,
                    ],
                )?;
            }
        }
    }
    Ok(())
}

pub(super) fn load(client: &mut Client, fill: &mut Fill<'_>) -> Result<(), ArchiveError> {
    let mut tx = client.transaction()?;
    lock_chain(&mut tx)?;
    fill(&mut |rows| insert(&mut tx, rows))?;
    // The numbering columns that a sequence fills go on after the copied numbers.
    tx.batch_execute(
        "SELECT setval(pg_get_serial_sequence('readings', 'id'), GREATEST((SELECT MAX(id) FROM readings), 1));
         SELECT setval(pg_get_serial_sequence('run_units', 'seq'), GREATEST((SELECT MAX(seq) FROM run_units), 1));",
    )?;
    tx.commit()?;
    Ok(())
}

// ---- Rows as this backend reads them (one mapping per row kind) ----

pub(super) fn chain_row(r: &Row) -> ChainRow {
    ChainRow {
        seq: r.get(0),
        kind: r.get(1),
        run_id: r.get(2),
        position: r.get(3),
        step_index: r.get(4),
        attempt: r.get(5),
        unit_seq: r.get(6),
        content_sha256: r.get(7),
        sha256: r.get(8),
        prev_sha256: r.get(9),
    }
}

pub(super) fn run_full(r: &Row) -> RunFull {
    RunFull {
        seq: r.get(0),
        run_id: r.get(1),
        plan_sha256: r.get(2),
        lot: r.get(3),
        station: r.get(4),
        operator: r.get(5),
        bench: r.get(6),
        tool_version: r.get(7),
        started_at: r.get(8),
        finished_at: r.get(9),
        state: r.get(10),
    }
}

pub(super) fn seen_row(r: &Row) -> SeenRow {
    SeenRow {
        seq: r.get(0),
        run_id: r.get(1),
        position: r.get(2),
        serial: r.get(3),
    }
}

pub(super) fn reading_full(r: &Row) -> ReadingFull {
    ReadingFull {
        id: r.get(0),
        run_id: r.get(1),
        position: r.get(2),
        step_index: r.get(3),
        attempt: r.get(4),
        quantity: r.get(5),
        channel: r.get(6),
        raw: r.get(7),
        t_s: r.get(8),
        value: r.get(9),
        took_s: r.get(10),
    }
}

pub(super) fn step_full(r: &Row) -> StepFull {
    StepFull {
        run_id: r.get(0),
        position: r.get(1),
        step_index: r.get(2),
        attempt: r.get(3),
        status: r.get(4),
        record: r.get(5),
    }
}

pub(super) fn unit_full(r: &Row) -> UnitFull {
    UnitFull {
        seq: r.get(0),
        run_id: r.get(1),
        position: r.get(2),
        serial: r.get(3),
        firmware: r.get(4),
        status: r.get(5),
        finished_at: r.get(6),
        record: r.get(7),
        record_sha256: r.get(8),
        prev_sha256: r.get(9),
    }
}

pub(super) fn plan_row(r: &Row) -> PlanRow {
    PlanRow {
        sha256: r.get(0),
        plan_id: r.get(1),
        revision: r.get(2),
        file: r.get(3),
        text: r.get(4),
    }
}
