//! The PostgreSQL backend: one archive shared by several benches (`--archive postgres://...`).
//!
//! The same tables, chain and rules as the SQLite archive (a copy from one to the other keeps
//! every hash). What differs is concurrency: benches on several machines write at once, so
//! every write that seals an entry takes the chain's advisory lock for its transaction (see
//! `chain`), and `verify` reads one snapshot while others write. A commit returns when the
//! server has the transaction on disk (`synchronous_commit`, reported by `durability`).
//!
//! All SQL of this backend lives in this folder: the tables in `schema`, the chain's rows in
//! `chain`, the rest here.

use super::chain::{self as shared, reassemble, status_word, stripped};
use super::seal;
use super::{
    ArchiveError, Backend, HistoryRow, RunFilter, RunRow, RunState, RunSummary, SelectBy,
    Verification,
};
use crate::exec::ReadingKey;
use crate::plan::Plan;
use crate::record::{Sample, StepRecord, UnitRecord};
use postgres::types::ToSql;
use postgres::{Client, GenericClient, NoTls, Row};
use std::cell::RefCell;

mod bulk;
mod chain;
mod connect;
mod image;
mod schema;
mod upload;

use chain::{PgTables, append, append_as, head, lock_chain};
pub use connect::redacted;
pub use schema::PG_SCHEMA_VERSION;

/// A PostgreSQL archive.
pub struct Postgres {
    client: RefCell<Client>,
}

/// Selects, of the records of one run and position, the newest (as in SQLite).
const NEWEST: &str = "u.seq = (SELECT MAX(n.seq) FROM units n WHERE n.run_id = u.run_id AND n.position = u.position)";

const INSERT_READING: &str = "INSERT INTO readings (run_id, position, step_index, attempt, quantity, channel, raw, t_s, value, took_s)
     VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10)";

/// A reading's row: its ten values, in the order of the `readings` columns that both the
/// INSERT of a live reading and the COPY of an import name.
pub(super) struct ReadingValues<'a> {
    run_id: &'a str,
    position: i64,
    step_index: i64,
    attempt: i64,
    quantity: &'static str,
    channel: &'a str,
    raw: bool,
    sample: &'a Sample,
}

impl<'a> ReadingValues<'a> {
    pub(super) fn of(run_id: &'a str, key: &'a ReadingKey, sample: &'a Sample) -> Self {
        ReadingValues {
            run_id,
            position: key.position as i64,
            step_index: key.step_index as i64,
            attempt: i64::from(key.attempt),
            quantity: key.quantity.name(),
            channel: &key.channel,
            raw: key.raw,
            sample,
        }
    }

    pub(super) fn params(&self) -> [&(dyn ToSql + Sync); 10] {
        [
            &self.run_id,
            &self.position,
            &self.step_index,
            &self.attempt,
            &self.quantity,
            &self.channel,
            &self.raw,
            &self.sample.t_s,
            &self.sample.value,
            &self.sample.took_s,
        ]
    }
}

/// Writes readings with one prepared statement.
fn insert_readings<'s>(
    c: &mut impl GenericClient,
    run_id: &str,
    rows: impl IntoIterator<Item = (&'s ReadingKey, &'s Sample)>,
) -> Result<(), ArchiveError> {
    let stmt = c.prepare(INSERT_READING)?;
    for (key, s) in rows {
        c.execute(&stmt, &ReadingValues::of(run_id, key, s).params())?;
    }
    Ok(())
}

/// Inserts a unit record (without samples) and seals it. Under the chain's lock.
fn insert_unit_row(c: &mut impl GenericClient, r: &UnitRecord) -> Result<(), ArchiveError> {
    let hash = crate::record::record_hash(r);
    let text = serde_json::to_string(&stripped(r)).expect("a record serialises");
    let prev = chain::newest(c)?.1;
    let seq: i64 = c
        .query_one("SELECT COALESCE(MAX(seq), 0) + 1 FROM units", &[])?
        .get(0);
    c.execute(
        "INSERT INTO units (seq, run_id, position, serial, firmware, status, finished_at, record, record_sha256, prev_sha256)
         VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10)",
        &[
            &seq,
            &r.run_id,
            &(r.position as i64),
            &r.serial,
            &r.identity.as_ref().map(|i| i.firmware.clone()),
            &format!("{:?}", r.verdict.status).to_lowercase(),
            &r.finished_at,
            &text,
            &hash,
            &prev,
        ],
    )?;
    append(
        c,
        &seal::Entry::Unit {
            run_id: &r.run_id,
            position: r.position,
            unit_seq: seq,
        },
        &hash,
    )
}

fn run_row(r: &Row) -> RunRow {
    RunRow {
        run_id: r.get(0),
        plan_sha256: r.get(1),
        plan_id: r.get(2),
        revision: r.get(3),
        lot: r.get(4),
        station: r.get(5),
        operator: r.get(6),
        bench: r.get(7),
        tool_version: r.get(8),
        started_at: r.get(9),
        finished_at: r.get(10),
        state: r.get(11),
    }
}

impl Postgres {
    /// Connects to the database `url` names and sets it up (or checks its version), proving it
    /// writable before any load is applied.
    pub fn open(url: &str) -> Result<Postgres, ArchiveError> {
        let mut client = connect::connect(url)?;
        schema::set_up(&mut client).map_err(|e| match e {
            e @ ArchiveError::Newer(_) => e,
            e => ArchiveError::Open {
                path: redacted(url),
                why: format!("cannot set up the archive (not writable?): {}", e.said()),
            },
        })?;
        Ok(Postgres {
            client: RefCell::new(client),
        })
    }

    /// Connects for reading only: the session is read-only, nothing is created or changed; a
    /// database without an archive is named as such.
    pub fn open_read_only(url: &str) -> Result<Postgres, ArchiveError> {
        let mut client = connect::connect(url)?;
        client.batch_execute("SET default_transaction_read_only = on")?;
        match schema::stored_version(&mut client)? {
            None => {
                return Err(ArchiveError::NotAnArchive {
                    path: redacted(url),
                    why: "the database has no archive tables".into(),
                });
            }
            Some(v) if v > PG_SCHEMA_VERSION => return Err(ArchiveError::Newer(v)),
            Some(_) => {}
        }
        Ok(Postgres {
            client: RefCell::new(client),
        })
    }

    fn records_where(&self, condition: &str, value: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        let c = &mut *self.client.borrow_mut();
        let texts: Vec<String> = c
            .query(
                &format!(
                    "SELECT u.record FROM units u WHERE {condition}
                     ORDER BY u.finished_at DESC, u.position"
                ),
                &[&value],
            )?
            .iter()
            .map(|r| r.get(0))
            .collect();
        let t = PgTables::new(c);
        texts.iter().map(|text| reassemble(&t, text)).collect()
    }

    /// Runs `f` in a write transaction that holds the chain's lock, and commits.
    fn sealed<T>(
        &self,
        f: impl FnOnce(&mut postgres::Transaction<'_>) -> Result<T, ArchiveError>,
    ) -> Result<T, ArchiveError> {
        let mut client = self.client.borrow_mut();
        let mut tx = client.transaction()?;
        lock_chain(&mut tx)?;
        let out = f(&mut tx)?;
        tx.commit()?;
        Ok(out)
    }
}

impl Backend for Postgres {
    /// The server's commit settings: `synchronous_commit` ("on": a commit returns once the
    /// transaction is flushed to disk) and whether `fsync` is on (1) or off (0).
    fn durability(&self) -> Result<(String, i64), ArchiveError> {
        let c = &mut *self.client.borrow_mut();
        let sync: String = c.query_one("SHOW synchronous_commit", &[])?.get(0);
        let fsync: String = c.query_one("SHOW fsync", &[])?.get(0);
        Ok((sync, i64::from(fsync == "on")))
    }

    fn begin_run(&self, plan: &Plan, run: &RunRow) -> Result<(), ArchiveError> {
        self.sealed(|tx| {
            tx.execute(
                "INSERT INTO plans (sha256, plan_id, revision, file, text) VALUES ($1, $2, $3, $4, $5)
                 ON CONFLICT (sha256) DO NOTHING",
                &[&plan.source.sha256, &plan.id, &plan.revision, &plan.source.file, &plan.source.text],
            )?;
            tx.execute(
                "INSERT INTO runs (seq, run_id, plan_sha256, lot, station, operator, bench, tool_version, started_at, state)
                 VALUES ((SELECT COALESCE(MAX(seq), 0) + 1 FROM runs), $1, $2, $3, $4, $5, $6, $7, $8, 'running')",
                &[
                    &run.run_id,
                    &run.plan_sha256,
                    &run.lot,
                    &run.station,
                    &run.operator,
                    &run.bench,
                    &run.tool_version,
                    &run.started_at,
                ],
            )?;
            let content = shared::run_content(&PgTables::new(&mut *tx), &run.run_id)?
                .expect("the run was just written");
            append(
                tx,
                &seal::Entry::Run {
                    run_id: &run.run_id,
                },
                &content,
            )
        })
    }

    fn note_unit(&self, record: &UnitRecord) -> Result<(), ArchiveError> {
        self.sealed(|tx| {
            let added = tx.execute(
                "INSERT INTO run_units (run_id, position, serial) VALUES ($1, $2, $3)
                 ON CONFLICT DO NOTHING",
                &[&record.run_id, &(record.position as i64), &record.serial],
            )?;
            if added == 1 {
                append(
                    tx,
                    &seal::Entry::Seen {
                        run_id: &record.run_id,
                        position: record.position,
                        serial: &record.serial,
                    },
                    &seal::seen_content(&record.run_id, record.position, &record.serial),
                )?;
            }
            Ok(())
        })
    }

    /// Readings seal nothing themselves (their step's entry covers them), so they take no lock:
    /// the most frequent write waits for no other bench.
    fn add_readings(
        &self,
        run_id: &str,
        rows: &[(ReadingKey, Sample)],
    ) -> Result<(), ArchiveError> {
        let mut client = self.client.borrow_mut();
        let mut tx = client.transaction()?;
        insert_readings(&mut tx, run_id, rows.iter().map(|(k, s)| (k, s)))?;
        tx.commit()?;
        Ok(())
    }

    fn add_steps(
        &self,
        run_id: &str,
        step_index: usize,
        records: &[(usize, &StepRecord)],
    ) -> Result<(), ArchiveError> {
        self.sealed(|tx| {
            for (position, record) in records {
                let status = status_word(record.status);
                tx.execute(
                    "INSERT INTO steps (run_id, position, step_index, attempt, status, record)
                     VALUES ($1, $2, $3, $4, $5, $6)",
                    &[
                        &run_id,
                        &(*position as i64),
                        &(step_index as i64),
                        &i64::from(record.attempt),
                        &status,
                        &shared::stored_step(record),
                    ],
                )?;
                let full = serde_json::to_value(record).expect("a step record serialises");
                append(
                    tx,
                    &seal::Entry::Step {
                        run_id,
                        position: *position,
                        step_index,
                        attempt: record.attempt,
                    },
                    &seal::step_content(status, &full),
                )?;
            }
            Ok(())
        })
    }

    fn append_units(&self, records: &[UnitRecord]) -> Result<(), ArchiveError> {
        self.sealed(|tx| {
            for record in records {
                let newest: Option<String> = tx
                    .query_opt(
                        "SELECT record FROM units WHERE run_id = $1 AND position = $2
                         ORDER BY seq DESC LIMIT 1",
                        &[&record.run_id, &(record.position as i64)],
                    )?
                    .map(|r| r.get(0));
                if !shared::same_as_stored(newest.as_deref(), record) {
                    insert_unit_row(tx, record)?;
                }
            }
            Ok(())
        })
    }

    fn finish_run(
        &self,
        run_id: &str,
        finished_at: &str,
        state: RunState,
    ) -> Result<String, ArchiveError> {
        self.sealed(|tx| {
            tx.execute(
                "UPDATE runs SET state = $3, finished_at = $2 WHERE run_id = $1",
                &[&run_id, &finished_at, &state.word()],
            )?;
            append(
                tx,
                &seal::Entry::End { run_id },
                &seal::end_content(run_id, state.word(), Some(finished_at)),
            )?;
            Ok(head(tx)?.expect("an entry was just appended"))
        })
    }

    /// In bulk (see `bulk`): readings, unit rows and their entries each in one `COPY`.
    fn import_units(&self, records: &[UnitRecord]) -> Result<(), ArchiveError> {
        self.sealed(|tx| bulk::import_units(tx, records))
    }

    fn run(&self, run_id: &str) -> Result<RunRow, ArchiveError> {
        let c = &mut *self.client.borrow_mut();
        c.query_opt(
            "SELECT r.run_id, r.plan_sha256, p.plan_id, p.revision, r.lot, r.station, r.operator,
                    r.bench, r.tool_version, r.started_at, r.finished_at, r.state
             FROM runs r JOIN plans p ON p.sha256 = r.plan_sha256 WHERE r.run_id = $1",
            &[&run_id],
        )?
        .map(|r| run_row(&r))
        .ok_or_else(|| ArchiveError::NotFound(format!("no run {run_id}")))
    }

    fn plan_text(&self, sha256: &str) -> Result<(String, String), ArchiveError> {
        let c = &mut *self.client.borrow_mut();
        c.query_opt("SELECT file, text FROM plans WHERE sha256 = $1", &[&sha256])?
            .map(|r| (r.get(0), r.get(1)))
            .ok_or_else(|| ArchiveError::NotFound(format!("no plan with SHA-256 {sha256}")))
    }

    fn resume_state(&self, run_id: &str) -> Result<crate::exec::Resume, ArchiveError> {
        let run = self.run(run_id)?;
        let c = &mut *self.client.borrow_mut();
        let mut resume = crate::exec::Resume {
            first_started_at: run.started_at,
            ..Default::default()
        };
        for r in c.query(
            "SELECT position, serial FROM run_units WHERE run_id = $1 ORDER BY seq",
            &[&run_id],
        )? {
            resume.serials.insert(r.get::<_, i64>(0) as usize, r.get(1));
        }
        for r in c.query(
            "SELECT DISTINCT position FROM units WHERE run_id = $1",
            &[&run_id],
        )? {
            resume.sealed.insert(r.get::<_, i64>(0) as usize);
        }
        // An attempt cut short left readings but no step record (see the SQLite backend).
        for r in c.query(
            "SELECT position, step_index, MAX(attempt) FROM readings WHERE run_id = $1
             GROUP BY position, step_index",
            &[&run_id],
        )? {
            resume.attempts.insert(
                (r.get::<_, i64>(0) as usize, r.get::<_, i64>(1) as usize),
                r.get::<_, i64>(2) as u32,
            );
        }
        let rows = c
            .query(
                "SELECT position, step_index, attempt, status, record FROM steps WHERE run_id = $1
                 ORDER BY position, step_index, attempt",
                &[&run_id],
            )?
            .iter()
            .map(|r| {
                (
                    r.get::<_, i64>(0) as usize,
                    r.get::<_, i64>(1) as usize,
                    r.get::<_, i64>(2) as u32,
                    r.get(3),
                    r.get(4),
                )
            })
            .collect();
        shared::resume_steps(&PgTables::new(c), run_id, rows, &mut resume)?;
        Ok(resume)
    }

    fn unit_records(&self, run_id: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        self.records_where(&format!("u.run_id = $1 AND {NEWEST}"), run_id)
    }

    fn serial_records(&self, serial: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        self.records_where("u.serial = $1", serial)
    }

    fn select(
        &self,
        key: SelectBy,
        value: &str,
        plan_id: Option<&str>,
    ) -> Result<Vec<UnitRecord>, ArchiveError> {
        let column = match key {
            SelectBy::Run => "u.run_id",
            SelectBy::Lot => "r.lot",
            SelectBy::Firmware => "u.firmware",
        };
        let c = &mut *self.client.borrow_mut();
        let texts: Vec<String> = c
            .query(
                &format!(
                    "SELECT u.record FROM units u JOIN runs r ON r.run_id = u.run_id
                     JOIN plans p ON p.sha256 = r.plan_sha256
                     WHERE {column} = $1 AND ($2::text IS NULL OR p.plan_id = $2) AND {NEWEST}
                     ORDER BY u.seq"
                ),
                &[&value, &plan_id],
            )?
            .iter()
            .map(|r| r.get(0))
            .collect();
        let t = PgTables::new(c);
        texts.iter().map(|text| reassemble(&t, text)).collect()
    }

    fn history(&self, serial: &str) -> Result<Vec<HistoryRow>, ArchiveError> {
        let c = &mut *self.client.borrow_mut();
        Ok(c.query(
            "SELECT u.finished_at, u.run_id, p.plan_id, p.revision, u.firmware, r.station, r.operator,
                    u.status, u.position
             FROM units u JOIN runs r ON r.run_id = u.run_id JOIN plans p ON p.sha256 = r.plan_sha256
             WHERE u.serial = $1 ORDER BY u.finished_at DESC",
            &[&serial],
        )?
        .iter()
        .map(|r| HistoryRow {
            finished_at: r.get(0),
            run_id: r.get(1),
            plan_id: r.get(2),
            revision: r.get(3),
            firmware: r.get(4),
            station: r.get(5),
            operator: r.get(6),
            status: r.get(7),
            position: r.get(8),
        })
        .collect())
    }

    fn runs(&self, filter: &RunFilter) -> Result<Vec<RunSummary>, ArchiveError> {
        let c = &mut *self.client.borrow_mut();
        Ok(c.query(
            &format!(
                "SELECT r.run_id, r.started_at, p.plan_id, p.revision, r.lot, r.station, r.state,
                        COUNT(*) FILTER (WHERE u.status = 'accepted'),
                        COUNT(*) FILTER (WHERE u.status = 'rejected'),
                        COUNT(*) FILTER (WHERE u.status = 'incomplete')
                 FROM runs r JOIN plans p ON p.sha256 = r.plan_sha256
                 LEFT JOIN units u ON u.run_id = r.run_id AND {NEWEST}
                 WHERE ($1::text IS NULL OR r.lot = $1) AND ($2::text IS NULL OR p.plan_id = $2)
                   AND ($3::text IS NULL OR r.started_at >= $3)
                 GROUP BY r.run_id, p.sha256
                 HAVING $4::text IS NULL OR COUNT(*) FILTER (WHERE u.status = $4) > 0
                 ORDER BY r.started_at DESC"
            ),
            &[&filter.lot, &filter.plan, &filter.since, &filter.verdict],
        )?
        .iter()
        .map(|r| RunSummary {
            run_id: r.get(0),
            started_at: r.get(1),
            plan_id: r.get(2),
            revision: r.get(3),
            lot: r.get(4),
            station: r.get(5),
            state: r.get(6),
            accepted: r.get::<_, i64>(7) as u64,
            rejected: r.get::<_, i64>(8) as u64,
            incomplete: r.get::<_, i64>(9) as u64,
        })
        .collect())
    }

    /// Checks the whole archive in one snapshot: benches writing meanwhile are not seen half.
    fn verify(&self, anchor: Option<&str>) -> Result<Verification, ArchiveError> {
        let mut client = self.client.borrow_mut();
        let mut tx = client
            .build_transaction()
            .isolation_level(postgres::IsolationLevel::RepeatableRead)
            .read_only(true)
            .start()?;
        let v = shared::verify(&PgTables::new(&mut tx), anchor)?;
        tx.commit()?;
        Ok(v)
    }

    fn run_anchor(&self, run_id: &str) -> Result<Option<String>, ArchiveError> {
        let c = &mut *self.client.borrow_mut();
        Ok(c.query_opt(
            "SELECT seq, sha256 FROM chain WHERE run_id = $1 AND kind = 'end'
             ORDER BY seq DESC LIMIT 1",
            &[&run_id],
        )?
        .map(|r| format!("{}:{}", r.get::<_, i64>(0), r.get::<_, String>(1))))
    }

    fn chain_head(&self) -> Result<Option<String>, ArchiveError> {
        head(&mut *self.client.borrow_mut())
    }

    fn dump(&self, sink: &mut crate::archive::image::Sink<'_>) -> Result<(), ArchiveError> {
        image::dump(&mut self.client.borrow_mut(), sink)
    }

    fn is_empty(&self) -> Result<bool, ArchiveError> {
        image::is_empty(&mut self.client.borrow_mut())
    }

    fn load(&self, fill: &mut crate::archive::image::Fill<'_>) -> Result<(), ArchiveError> {
        image::load(&mut self.client.borrow_mut(), fill)
    }
}
