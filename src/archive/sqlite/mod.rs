//! The SQLite backend: the embedded default, one file (WAL, `synchronous=FULL`).
//!
//! Every reading is committed as it is taken, each step's record as it finishes, and each unit's
//! record when the run ends, so a crash, a power cut or `kill -9` loses at most the reading in
//! flight and an interrupted run can be resumed. `synchronous=FULL` costs an fsync per commit
//! (about half a millisecond here), which is small next to the hundreds of milliseconds between
//! samples; `NORMAL` would survive a crash of the process but not of the machine.
//!
//! Unit records are stored without their samples (those are the `readings` rows) and put back
//! together on the way out; the plan text of every run is stored once, by its SHA-256. All SQL
//! of this backend lives in this folder: the tables and migrations in `schema`, the chain's
//! rows and `verify` in `chain`, the rest here.
//!
//! Why one file of this length: the queries and the resume state read the same tables with the
//! same rule for a position's newest record (`NEWEST`); they stay side by side so that rule is
//! written once.

use super::chain as shared;
use super::chain::{reassemble, status_word, stripped};
use super::seal;
use super::{
    ArchiveError, Backend, HistoryRow, RunFilter, RunRow, RunState, RunSummary, SelectBy,
    Verification,
};
use crate::exec::ReadingKey;
use crate::plan::Plan;
use crate::record::{Sample, StepRecord, UnitRecord};
use rusqlite::{Connection, OptionalExtension, params};
use std::path::Path;

mod chain;
mod image;
mod schema;

pub use schema::SCHEMA_VERSION;
use schema::*;

/// An SQLite archive file.
pub struct Sqlite {
    conn: Connection,
}

fn is_busy(e: &ArchiveError) -> bool {
    let ArchiveError::Sql(e) = e else {
        return false;
    };
    matches!(
        e.sqlite_error_code(),
        Some(rusqlite::ErrorCode::DatabaseBusy | rusqlite::ErrorCode::DatabaseLocked)
    )
}

/// Selects, of the records of one run and position, the newest: an interrupted run's record
/// stays in the archive (and in the unit's history), its resumption's record counts.
const NEWEST: &str = "u.seq = (SELECT MAX(n.seq) FROM units n WHERE n.run_id = u.run_id AND n.position = u.position)";

/// Refuses a file that exists but is no SQLite database (an empty file is one only when it is
/// to be created).
fn refuse_other_files(path: &Path, reading: bool) -> Result<(), ArchiveError> {
    let not_archive = |why: &str| ArchiveError::NotAnArchive {
        path: path.display().to_string(),
        why: why.to_string(),
    };
    if path.is_dir() {
        return Err(not_archive("it is a folder"));
    }
    let mut header = [0u8; 16];
    let read = std::fs::File::open(path)
        .and_then(|mut f| std::io::Read::read(&mut f, &mut header))
        .map_err(|e| ArchiveError::Open {
            path: path.display().to_string(),
            why: e.to_string(),
        })?;
    if read == 0 {
        return if reading {
            Err(not_archive("the file is empty"))
        } else {
            Ok(())
        };
    }
    if read < 16 || &header != b"SQLite format 3\0" {
        return Err(not_archive("it is not an SQLite database"));
    }
    Ok(())
}

/// A write transaction that takes the write lock at once: every write appends to the chain,
/// which reads the newest entry first, so a deferred transaction could find it moved.
fn immediate(conn: &Connection) -> rusqlite::Result<rusqlite::Transaction<'_>> {
    rusqlite::Transaction::new_unchecked(conn, rusqlite::TransactionBehavior::Immediate)
}

/// Writes every sample of a finished record as reading rows (checks sharing a reading share
/// its rows).
fn insert_readings_of(conn: &Connection, r: &UnitRecord) -> rusqlite::Result<()> {
    let mut reading = conn.prepare_cached(INSERT_READING)?;
    for (key, s) in shared::readings_of_record(r) {
        reading.execute(params![
            r.run_id,
            r.position as i64,
            key.step_index as i64,
            key.attempt as i64,
            key.quantity.name(),
            key.channel,
            key.raw,
            s.t_s,
            s.value,
            s.took_s
        ])?;
    }
    Ok(())
}

/// Inserts a unit record (without samples) and seals it in the chain.
fn insert_unit_row(conn: &Connection, r: &UnitRecord) -> rusqlite::Result<()> {
    let hash = crate::record::record_hash(r);
    let text = serde_json::to_string(&stripped(r)).expect("a record serialises");
    // Kept filled for the schema-1 column; the chain entry below is what links the record.
    let prev = chain::newest(conn)?.1;
    conn.prepare_cached(
        "INSERT INTO units (run_id, position, serial, firmware, status, finished_at, record, record_sha256, prev_sha256)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
    )?
    .execute(params![
        r.run_id,
        r.position as i64,
        r.serial,
        r.identity.as_ref().map(|i| i.firmware.clone()),
        format!("{:?}", r.verdict.status).to_lowercase(),
        r.finished_at,
        text,
        hash,
        prev
    ])?;
    let unit_seq = conn.last_insert_rowid();
    chain::append(
        conn,
        &seal::Entry::Unit {
            run_id: &r.run_id,
            position: r.position,
            unit_seq,
        },
        &hash,
    )
}

const INSERT_READING: &str = "INSERT INTO readings (run_id, position, step_index, attempt, quantity, channel, raw, t_s, value, took_s)
     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)";

/// Writes one position's record of one step, without its samples (those are the readings),
/// and seals it, samples and all, in the chain. A step row is never replaced: a step run again
/// has an attempt number of its own.
fn insert_step(
    conn: &Connection,
    run_id: &str,
    position: usize,
    step_index: usize,
    record: &StepRecord,
) -> rusqlite::Result<()> {
    let text = shared::stored_step(record);
    let status = status_word(record.status);
    conn.execute(
        "INSERT INTO steps (run_id, position, step_index, attempt, status, record)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
        params![
            run_id,
            position as i64,
            step_index as i64,
            record.attempt as i64,
            status,
            text
        ],
    )?;
    let full = serde_json::to_value(record).expect("a step record serialises");
    chain::append(
        conn,
        &seal::Entry::Step {
            run_id,
            position,
            step_index,
            attempt: record.attempt,
        },
        &seal::step_content(status, &full),
    )
}

impl Sqlite {
    /// Opens (or creates) the archive at `path` and proves it writable, so that a read-only file
    /// or a full disk is found before any load is applied.
    pub fn open(path: &Path) -> Result<Sqlite, ArchiveError> {
        let open_err = |why: String| ArchiveError::Open {
            path: path.display().to_string(),
            why,
        };
        if path.exists() {
            refuse_other_files(path, false)?;
        }
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir).map_err(|e| open_err(e.to_string()))?;
        }
        let conn = Connection::open(path).map_err(|e| open_err(e.to_string()))?;
        conn.busy_timeout(std::time::Duration::from_secs(30))
            .map_err(|e| open_err(e.to_string()))?;
        // Switching to WAL and creating the schema take the database's exclusive lock, which a
        // second process opening the same new file at the same moment may hold: retry briefly.
        let mut attempt = 0;
        loop {
            match set_up(&conn) {
                Ok(()) => break,
                Err(e) if is_busy(&e) && attempt < 200 => {
                    attempt += 1;
                    std::thread::sleep(std::time::Duration::from_millis(50));
                }
                Err(e @ ArchiveError::Newer(_)) => return Err(e),
                Err(e) => {
                    return Err(open_err(format!(
                        "cannot set up the archive (not writable?): {e}"
                    )));
                }
            }
        }
        Ok(Sqlite { conn })
    }

    /// Opens an existing archive for reading only: never creates, migrates or changes
    /// anything, and works on a file or folder that is read-only. A file that is not an
    /// archive is named as such.
    pub fn open_read_only(path: &Path) -> Result<Sqlite, ArchiveError> {
        let open_err = |why: String| ArchiveError::Open {
            path: path.display().to_string(),
            why,
        };
        if !path.exists() {
            return Err(ArchiveError::NotFound(format!(
                "no archive at {}",
                path.display()
            )));
        }
        refuse_other_files(path, true)?;
        let flags = rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY
            | rusqlite::OpenFlags::SQLITE_OPEN_URI
            | rusqlite::OpenFlags::SQLITE_OPEN_NO_MUTEX;
        let plain = Connection::open_with_flags(path, flags).and_then(|c| {
            // Reading a WAL database needs its shared-memory file; where the folder is
            // read-only and none exists, SQLite cannot make one.
            c.query_row("SELECT COUNT(*) FROM sqlite_master", [], |r| {
                r.get::<_, i64>(0)
            })?;
            Ok(c)
        });
        let conn = match plain {
            Ok(c) => c,
            Err(_) => {
                // Nobody can be writing to a file in a read-only folder: read it as it is.
                let uri = format!(
                    "file:{}?immutable=1",
                    path.display()
                        .to_string()
                        .replace('?', "%3f")
                        .replace('#', "%23")
                );
                Connection::open_with_flags(uri, flags).map_err(|e| open_err(e.to_string()))?
            }
        };
        conn.busy_timeout(std::time::Duration::from_secs(30))
            .map_err(|e| open_err(e.to_string()))?;
        let not_archive = |why: &str| ArchiveError::NotAnArchive {
            path: path.display().to_string(),
            why: why.to_string(),
        };
        match stored_version(&conn) {
            Err(e) => return Err(not_archive(&e.to_string())),
            Ok(Some(v)) if v > SCHEMA_VERSION => return Err(ArchiveError::Newer(v)),
            Ok(_) => {}
        }
        for table in ["meta", "runs", "units", "readings", "plans"] {
            if !has_table(&conn, table).map_err(|e| not_archive(&e.to_string()))? {
                return Err(not_archive(&format!("it has no {table} table")));
            }
        }
        // An archive from before readings kept their duration is read as it is: a temporary
        // view (in the connection's own memory, never the file) shows the column empty.
        let has_durations = conn
            .prepare("SELECT 1 FROM pragma_table_info('readings') WHERE name = 'took_s'")?
            .exists([])?;
        if !has_durations {
            conn.execute_batch(
                "CREATE TEMP VIEW readings AS SELECT *, NULL AS took_s FROM main.readings",
            )?;
        }
        Ok(Sqlite { conn })
    }

    /// A `meta` value (what the archive notes about itself, outside the chain).
    pub(crate) fn meta_value(&self, key: &str) -> Result<Option<String>, ArchiveError> {
        shared::Tables::meta(&self.conn, key)
    }

    pub(crate) fn set_meta(&self, key: &str, value: &str) -> Result<(), ArchiveError> {
        self.conn.execute(
            "INSERT INTO meta (key, value) VALUES (?1, ?2)
             ON CONFLICT(key) DO UPDATE SET value = excluded.value",
            params![key, value],
        )?;
        Ok(())
    }

    /// A journal's rows beyond `marks`, for an upload (see `archive::journal`).
    pub(crate) fn dump_since(
        &self,
        marks: &crate::archive::journal::Marks,
        sink: &mut crate::archive::image::Sink<'_>,
    ) -> Result<(), ArchiveError> {
        image::dump_since(&self.conn, marks, sink)
    }

    pub(crate) fn waiting_since(
        &self,
        marks: &crate::archive::journal::Marks,
    ) -> Result<crate::archive::journal::Waiting, ArchiveError> {
        image::waiting_since(&self.conn, marks)
    }

    fn records_where(&self, condition: &str, value: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        let conn = &self.conn;
        let mut stmt = conn.prepare(&format!(
            "SELECT u.record FROM units u WHERE {condition} ORDER BY u.finished_at DESC, u.position"
        ))?;
        let texts: Vec<String> = stmt
            .query_map([value], |r| r.get(0))?
            .collect::<Result<_, _>>()?;
        texts.iter().map(|t| reassemble(conn, t)).collect()
    }
}

impl Backend for Sqlite {
    fn add_readings(
        &self,
        run_id: &str,
        rows: &[(ReadingKey, Sample)],
    ) -> Result<(), ArchiveError> {
        let tx = self.conn.unchecked_transaction()?;
        {
            let mut stmt = tx.prepare_cached(INSERT_READING)?;
            for (key, sample) in rows {
                stmt.execute(params![
                    run_id,
                    key.position as i64,
                    key.step_index as i64,
                    key.attempt as i64,
                    key.quantity.name(),
                    key.channel,
                    key.raw,
                    sample.t_s,
                    sample.value,
                    sample.took_s
                ])?;
            }
        }
        tx.commit()?;
        Ok(())
    }

    fn add_steps(
        &self,
        run_id: &str,
        step_index: usize,
        records: &[(usize, &StepRecord)],
    ) -> Result<(), ArchiveError> {
        // One transaction for all positions: one commit (one fsync) per step, not one per unit.
        let tx = immediate(&self.conn)?;
        for (position, record) in records {
            insert_step(&tx, run_id, *position, step_index, record)?;
        }
        tx.commit()?;
        Ok(())
    }

    /// The anchor of a run: its newest sealed end, `SEQ:SHA256`.
    fn run_anchor(&self, run_id: &str) -> Result<Option<String>, ArchiveError> {
        Ok(self
            .conn
            .query_row(
                "SELECT seq, sha256 FROM chain WHERE run_id = ?1 AND kind = 'end' ORDER BY seq DESC LIMIT 1",
                [run_id],
                |r| Ok(format!("{}:{}", r.get::<_, i64>(0)?, r.get::<_, String>(1)?)),
            )
            .optional()?)
    }

    /// The chain head now, `SEQ:SHA256`: what a run's folder and reports keep as its anchor.
    fn chain_head(&self) -> Result<Option<String>, ArchiveError> {
        Ok(chain::head(&self.conn)?)
    }

    /// The connection's durability settings as SQLite reports them: the journal mode ("wal")
    /// and the synchronous level (2 is FULL: an fsync at every commit).
    fn durability(&self) -> Result<(String, i64), ArchiveError> {
        let conn = &self.conn;
        let mode: String = conn.pragma_query_value(None, "journal_mode", |r| r.get(0))?;
        let sync: i64 = conn.pragma_query_value(None, "synchronous", |r| r.get(0))?;
        Ok((mode, sync))
    }

    /// Stores the plan text (once per SHA-256) and the run, in state "running", and seals the
    /// run's opening in the chain.
    fn begin_run(&self, plan: &Plan, run: &RunRow) -> Result<(), ArchiveError> {
        let conn = &self.conn;
        let tx = immediate(conn)?;
        tx.execute(
            "INSERT OR IGNORE INTO plans (sha256, plan_id, revision, file, text) VALUES (?1, ?2, ?3, ?4, ?5)",
            params![plan.source.sha256, plan.id, plan.revision, plan.source.file, plan.source.text],
        )?;
        tx.execute(
            "INSERT INTO runs (run_id, plan_sha256, lot, station, operator, bench, tool_version, started_at, state)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, 'running')",
            params![
                run.run_id,
                run.plan_sha256,
                run.lot,
                run.station,
                run.operator,
                run.bench,
                run.tool_version,
                run.started_at
            ],
        )?;
        let content = shared::run_content(&*tx, &run.run_id)?.expect("the run was just written");
        chain::append(
            &tx,
            &seal::Entry::Run {
                run_id: &run.run_id,
            },
            &content,
        )?;
        tx.commit()?;
        Ok(())
    }

    /// Ends a run: `finished`, or `interrupted` (stopped by a signal or the operator, to be
    /// resumed); the end is sealed in the chain. Returns the chain head after it: the anchor.
    fn finish_run(
        &self,
        run_id: &str,
        finished_at: &str,
        state: RunState,
    ) -> Result<String, ArchiveError> {
        let conn = &self.conn;
        let tx = immediate(conn)?;
        tx.execute(
            "UPDATE runs SET state = ?3, finished_at = ?2 WHERE run_id = ?1",
            params![run_id, finished_at, state.word()],
        )?;
        chain::append(
            &tx,
            &seal::Entry::End { run_id },
            &seal::end_content(run_id, state.word(), Some(finished_at)),
        )?;
        let head = chain::head(&tx)?.expect("an entry was just appended");
        tx.commit()?;
        Ok(head)
    }

    /// A run's row.
    fn run(&self, run_id: &str) -> Result<RunRow, ArchiveError> {
        self.conn
            .query_row(
                "SELECT r.run_id, r.plan_sha256, p.plan_id, p.revision, r.lot, r.station, r.operator,
                        r.bench, r.tool_version, r.started_at, r.finished_at, r.state
                 FROM runs r JOIN plans p ON p.sha256 = r.plan_sha256 WHERE r.run_id = ?1",
                [run_id],
                |row| {
                    Ok(RunRow {
                        run_id: row.get(0)?,
                        plan_sha256: row.get(1)?,
                        plan_id: row.get(2)?,
                        revision: row.get(3)?,
                        lot: row.get(4)?,
                        station: row.get(5)?,
                        operator: row.get(6)?,
                        bench: row.get(7)?,
                        tool_version: row.get(8)?,
                        started_at: row.get(9)?,
                        finished_at: row.get(10)?,
                        state: row.get(11)?,
                    })
                },
            )
            .optional()?
            .ok_or_else(|| ArchiveError::NotFound(format!("no run {run_id}")))
    }

    /// The plan text stored under `sha256`, with the file name it came from.
    fn plan_text(&self, sha256: &str) -> Result<(String, String), ArchiveError> {
        self.conn
            .query_row(
                "SELECT file, text FROM plans WHERE sha256 = ?1",
                [sha256],
                |row| Ok((row.get(0)?, row.get(1)?)),
            )
            .optional()?
            .ok_or_else(|| ArchiveError::NotFound(format!("no plan with SHA-256 {sha256}")))
    }

    /// What an interrupted run had finished.
    fn resume_state(&self, run_id: &str) -> Result<crate::exec::Resume, ArchiveError> {
        let run = self.run(run_id)?;
        let conn = &self.conn;
        let mut resume = crate::exec::Resume {
            first_started_at: run.started_at,
            ..Default::default()
        };
        // The newest unit seen in each position (a unit swapped in at an earlier resume).
        let mut stmt = conn
            .prepare("SELECT position, serial FROM run_units WHERE run_id = ?1 ORDER BY rowid")?;
        for row in stmt.query_map([run_id], |r| Ok((r.get::<_, i64>(0)?, r.get(1)?)))? {
            let (p, serial) = row?;
            resume.serials.insert(p as usize, serial);
        }
        let mut stmt = conn.prepare("SELECT DISTINCT position FROM units WHERE run_id = ?1")?;
        for row in stmt.query_map([run_id], |r| r.get::<_, i64>(0))? {
            resume.sealed.insert(row? as usize);
        }
        // An attempt that was cut short left readings but no step record: the next attempt of
        // that step must have a number of its own, or their readings would mix.
        let mut stmt = conn.prepare(
            "SELECT position, step_index, MAX(attempt) FROM readings WHERE run_id = ?1
             GROUP BY position, step_index",
        )?;
        let rows = stmt.query_map([run_id], |r| {
            Ok((
                r.get::<_, i64>(0)? as usize,
                r.get::<_, i64>(1)? as usize,
                r.get::<_, i64>(2)? as u32,
            ))
        })?;
        for row in rows {
            let (position, index, attempt) = row?;
            resume.attempts.insert((position, index), attempt);
        }
        let mut stmt = conn.prepare(
            "SELECT position, step_index, attempt, status, record FROM steps WHERE run_id = ?1
             ORDER BY position, step_index, attempt",
        )?;
        let rows = stmt.query_map([run_id], |r| {
            Ok((
                r.get::<_, i64>(0)? as usize,
                r.get::<_, i64>(1)? as usize,
                r.get::<_, i64>(2)? as u32,
                r.get::<_, String>(3)?,
                r.get::<_, String>(4)?,
            ))
        })?;
        let rows = rows.collect::<Result<_, _>>()?;
        shared::resume_steps(conn, run_id, rows, &mut resume)?;
        Ok(resume)
    }

    /// Unit records of a run, whole (with samples), by position: the newest of each position
    /// (a resumed run's, not the interrupted one's).
    fn unit_records(&self, run_id: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        self.records_where(&format!("u.run_id = ?1 AND {NEWEST}"), run_id)
    }

    /// Every unit record of a serial number, newest first.
    fn serial_records(&self, serial: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        self.records_where("u.serial = ?1", serial)
    }

    /// Unit records selected by `key=value` (`run`, `lot` or `firmware`), optionally of one plan.
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
        let conn = &self.conn;
        let mut stmt = conn.prepare(&format!(
            "SELECT u.record FROM units u JOIN runs r ON r.run_id = u.run_id
             JOIN plans p ON p.sha256 = r.plan_sha256
             WHERE {column} = ?1 AND (?2 IS NULL OR p.plan_id = ?2) AND {NEWEST} ORDER BY u.seq"
        ))?;
        let texts: Vec<String> = stmt
            .query_map(params![value, plan_id], |r| r.get(0))?
            .collect::<Result<_, _>>()?;
        texts.iter().map(|t| reassemble(conn, t)).collect()
    }

    /// Every run of a unit, newest first.
    fn history(&self, serial: &str) -> Result<Vec<HistoryRow>, ArchiveError> {
        let conn = &self.conn;
        let mut stmt = conn.prepare(
            "SELECT u.finished_at, u.run_id, p.plan_id, p.revision, u.firmware, r.station, r.operator, u.status,
                    u.position
             FROM units u JOIN runs r ON r.run_id = u.run_id JOIN plans p ON p.sha256 = r.plan_sha256
             WHERE u.serial = ?1 ORDER BY u.finished_at DESC",
        )?;
        let rows = stmt.query_map([serial], |r| {
            Ok(HistoryRow {
                finished_at: r.get(0)?,
                run_id: r.get(1)?,
                plan_id: r.get(2)?,
                revision: r.get(3)?,
                firmware: r.get(4)?,
                station: r.get(5)?,
                operator: r.get(6)?,
                status: r.get(7)?,
                position: r.get(8)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Runs with their counts of accepted, rejected and incomplete units, newest first.
    fn runs(&self, filter: &RunFilter) -> Result<Vec<RunSummary>, ArchiveError> {
        let conn = &self.conn;
        let mut stmt = conn.prepare(&format!(
            "SELECT r.run_id, r.started_at, p.plan_id, p.revision, r.lot, r.station, r.state,
                    COALESCE(SUM(u.status = 'accepted'), 0), COALESCE(SUM(u.status = 'rejected'), 0),
                    COALESCE(SUM(u.status = 'incomplete'), 0)
             FROM runs r JOIN plans p ON p.sha256 = r.plan_sha256
             LEFT JOIN units u ON u.run_id = r.run_id AND {NEWEST}
             WHERE (?1 IS NULL OR r.lot = ?1) AND (?2 IS NULL OR p.plan_id = ?2)
               AND (?3 IS NULL OR r.started_at >= ?3)
             GROUP BY r.run_id
             HAVING ?4 IS NULL OR SUM(u.status = ?4) > 0
             ORDER BY r.started_at DESC"
        ))?;
        let rows = stmt.query_map(
            params![filter.lot, filter.plan, filter.since, filter.verdict],
            |r| {
                Ok(RunSummary {
                    run_id: r.get(0)?,
                    started_at: r.get(1)?,
                    plan_id: r.get(2)?,
                    revision: r.get(3)?,
                    lot: r.get(4)?,
                    station: r.get(5)?,
                    state: r.get(6)?,
                    accepted: r.get::<_, i64>(7)? as u64,
                    rejected: r.get::<_, i64>(8)? as u64,
                    incomplete: r.get::<_, i64>(9)? as u64,
                })
            },
        )?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Checks the whole archive against its chain (see the `chain` module for what that
    /// covers), and the chain against `anchor` (`SEQ:SHA256`, as a run's folder keeps it)
    /// where one is given.
    fn verify(&self, anchor: Option<&str>) -> Result<Verification, ArchiveError> {
        let conn = &self.conn;
        if !has_table(conn, "chain")? {
            // A version-1 archive opened read-only: it has only its records' own chain.
            return Err(ArchiveError::Open {
                path: String::new(),
                why: "this archive was written by an earlier meterproof (schema 1): open it \
                      once for writing (any run or resume with --archive) to bring it up to date"
                    .into(),
            });
        }
        // One read transaction: one snapshot of the archive, so that benches writing
        // meanwhile are not seen half (a row newer than the chain read would look added).
        let tx = conn.unchecked_transaction()?;
        let v = shared::verify(&*tx, anchor)?;
        tx.commit()?;
        Ok(v)
    }

    /// Appends unit records, sealing each in the chain, in one transaction (one commit for a
    /// whole run). A record that says nothing new about its position (a resumed run's unit
    /// that had finished before the interruption) is not stored twice.
    fn append_units(&self, records: &[UnitRecord]) -> Result<(), ArchiveError> {
        let conn = &self.conn;
        let tx = immediate(conn)?;
        for record in records {
            let newest: Option<String> = tx
                .query_row(
                    "SELECT record FROM units WHERE run_id = ?1 AND position = ?2 ORDER BY seq DESC LIMIT 1",
                    params![record.run_id, record.position as i64],
                    |r| r.get(0),
                )
                .optional()?;
            let same = shared::same_as_stored(newest.as_deref(), record);
            if !same {
                insert_unit_row(&tx, record)?;
            }
        }
        tx.commit()?;
        Ok(())
    }

    /// Stores finished unit records whole, readings and chain, in one transaction: the path
    /// for imports and for generating large archives, where a transaction per reading would only
    /// measure the disk's fsync.
    fn import_units(&self, records: &[UnitRecord]) -> Result<(), ArchiveError> {
        let conn = &self.conn;
        let tx = immediate(conn)?;
        for r in records {
            insert_readings_of(&tx, r)?;
            insert_unit_row(&tx, r)?;
        }
        tx.commit()?;
        Ok(())
    }

    fn dump(&self, sink: &mut crate::archive::image::Sink<'_>) -> Result<(), ArchiveError> {
        image::dump(&self.conn, sink)
    }

    fn is_empty(&self) -> Result<bool, ArchiveError> {
        image::is_empty(&self.conn)
    }

    fn load(&self, fill: &mut crate::archive::image::Fill<'_>) -> Result<(), ArchiveError> {
        image::load(&self.conn, fill)
    }

    /// Records which unit is in which position, once it has identified itself, sealed in the
    /// chain (a resume checks the unit against it).
    fn note_unit(&self, record: &UnitRecord) -> Result<(), ArchiveError> {
        let conn = &self.conn;
        let tx = immediate(conn)?;
        let added = tx.execute(
            "INSERT OR IGNORE INTO run_units (run_id, position, serial) VALUES (?1, ?2, ?3)",
            params![record.run_id, record.position as i64, record.serial],
        )?;
        if added == 1 {
            chain::append(
                &tx,
                &seal::Entry::Seen {
                    run_id: &record.run_id,
                    position: record.position,
                    serial: &record.serial,
                },
                &seal::seen_content(&record.run_id, record.position, &record.serial),
            )?;
        }
        tx.commit()?;
        Ok(())
    }
}
