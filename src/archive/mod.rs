//! The archive: the system of record, an SQLite database (WAL, `synchronous=FULL`).
//!
//! Every reading is committed as it is taken, each step's record as it finishes, and each unit's
//! record when the run ends, so a crash, a power cut or `kill -9` loses at most the reading in
//! flight and an interrupted run can be resumed. `synchronous=FULL` costs an fsync per commit
//! (about half a millisecond here), which is small next to the hundreds of milliseconds between
//! samples; `NORMAL` would survive a crash of the process but not of the machine.
//!
//! Unit records are stored without their samples (those are the `readings` rows) and put back
//! together on the way out. Each carries the SHA-256 of its canonical JSON (with samples) and the
//! hash of the unit record before it: a chain, so an edited, deleted or reordered record, or a
//! changed reading, is found by [`Archive::verify`]. The plan text of every run is stored once,
//! by its SHA-256.
//!
//! The public methods are the archive's whole interface; a shared server database would
//! implement the same operations.

use crate::exec::{ReadingKey, Recorder};
use crate::plan::{Plan, Quantity};
use crate::record::{Sample, StepRecord, StepStatus, UnitRecord};
use rusqlite::{Connection, OptionalExtension, params};
use std::collections::BTreeMap;
use std::path::Path;
use std::sync::Mutex;

const SCHEMA: &str = "
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS plans (
    sha256 TEXT PRIMARY KEY, plan_id TEXT NOT NULL, revision TEXT NOT NULL,
    file TEXT NOT NULL, text TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    run_id TEXT PRIMARY KEY, plan_sha256 TEXT NOT NULL REFERENCES plans(sha256),
    lot TEXT, station TEXT NOT NULL, operator TEXT NOT NULL, bench TEXT NOT NULL,
    tool_version TEXT NOT NULL, started_at TEXT NOT NULL, finished_at TEXT,
    state TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS runs_lot ON runs(lot);
CREATE INDEX IF NOT EXISTS runs_started ON runs(started_at);
CREATE TABLE IF NOT EXISTS run_units (
    run_id TEXT NOT NULL, position INTEGER NOT NULL, serial TEXT NOT NULL,
    PRIMARY KEY (run_id, position));
CREATE TABLE IF NOT EXISTS readings (
    id INTEGER PRIMARY KEY, run_id TEXT NOT NULL, position INTEGER NOT NULL,
    step_index INTEGER NOT NULL, attempt INTEGER NOT NULL, quantity TEXT NOT NULL,
    channel TEXT NOT NULL, raw INTEGER NOT NULL, t_s REAL NOT NULL, value REAL NOT NULL,
    took_s REAL);
CREATE INDEX IF NOT EXISTS readings_unit ON readings(run_id, position, step_index, attempt);
CREATE TABLE IF NOT EXISTS steps (
    run_id TEXT NOT NULL, position INTEGER NOT NULL, step_index INTEGER NOT NULL,
    attempt INTEGER NOT NULL, status TEXT NOT NULL, record TEXT NOT NULL,
    PRIMARY KEY (run_id, position, step_index, attempt));
CREATE TABLE IF NOT EXISTS units (
    seq INTEGER PRIMARY KEY AUTOINCREMENT, run_id TEXT NOT NULL, position INTEGER NOT NULL,
    serial TEXT NOT NULL, firmware TEXT, status TEXT NOT NULL, finished_at TEXT NOT NULL,
    record TEXT NOT NULL, record_sha256 TEXT NOT NULL, prev_sha256 TEXT NOT NULL,
    UNIQUE (run_id, position));
CREATE INDEX IF NOT EXISTS units_serial ON units(serial, finished_at);
";

fn set_up(conn: &Connection) -> rusqlite::Result<()> {
    conn.pragma_update(None, "journal_mode", "WAL")?;
    conn.pragma_update(None, "synchronous", "FULL")?;
    conn.pragma_update(None, "foreign_keys", "ON")?;
    conn.execute_batch(SCHEMA)?;
    add_reading_durations(conn)?;
    // Proves the file writable now, not at the end of the run.
    conn.execute(
        "INSERT INTO meta (key, value) VALUES ('last_opened', ?1)
         ON CONFLICT(key) DO UPDATE SET value = excluded.value",
        [chrono::Utc::now().to_rfc3339()],
    )?;
    Ok(())
}

/// Archives written before readings kept their transaction's duration get the column, empty
/// for their old rows (their records' hashes stay valid: an absent duration is not serialised).
fn add_reading_durations(conn: &Connection) -> rusqlite::Result<()> {
    let has = conn
        .prepare("SELECT 1 FROM pragma_table_info('readings') WHERE name = 'took_s'")?
        .exists([])?;
    if !has {
        conn.execute_batch("ALTER TABLE readings ADD COLUMN took_s REAL")?;
    }
    Ok(())
}

fn is_busy(e: &rusqlite::Error) -> bool {
    matches!(
        e.sqlite_error_code(),
        Some(rusqlite::ErrorCode::DatabaseBusy | rusqlite::ErrorCode::DatabaseLocked)
    )
}

/// The hash the first record of a chain points back to.
pub const GENESIS: &str = "0000000000000000000000000000000000000000000000000000000000000000";

#[derive(Debug, thiserror::Error)]
pub enum ArchiveError {
    #[error("archive {path}: {why}")]
    Open { path: String, why: String },
    #[error("archive: {0}")]
    Sql(#[from] rusqlite::Error),
    #[error("archive: a stored record does not parse: {0}")]
    Corrupt(String),
    #[error("archive: {0}")]
    NotFound(String),
}

/// A run as the archive keeps it.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct RunRow {
    pub run_id: String,
    pub plan_sha256: String,
    pub plan_id: String,
    pub revision: String,
    pub lot: Option<String>,
    pub station: String,
    pub operator: String,
    /// How to rebuild the bench for a resume (JSON).
    pub bench: String,
    pub tool_version: String,
    pub started_at: String,
    pub finished_at: Option<String>,
    /// "running" until the run ends, then "finished".
    pub state: String,
}

/// One line of a unit's history.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct HistoryRow {
    pub finished_at: String,
    pub run_id: String,
    pub plan_id: String,
    pub revision: String,
    pub firmware: Option<String>,
    pub station: String,
    pub operator: String,
    pub status: String,
}

/// One line of the runs listing.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct RunSummary {
    pub run_id: String,
    pub started_at: String,
    pub plan_id: String,
    pub revision: String,
    pub lot: Option<String>,
    pub station: String,
    pub state: String,
    pub accepted: u64,
    pub rejected: u64,
    pub incomplete: u64,
}

/// Filters of the runs listing.
#[derive(Debug, Clone, Default)]
pub struct RunFilter {
    pub lot: Option<String>,
    pub plan: Option<String>,
    /// ISO 8601 date or time; runs started at or after it.
    pub since: Option<String>,
    /// Runs with at least one unit of this status.
    pub verdict: Option<String>,
}

/// A record that failed verification, and why.
#[derive(Debug, Clone, PartialEq)]
pub struct Failure {
    pub seq: i64,
    pub run_id: String,
    pub serial: String,
    pub why: String,
}

/// The archive database.
pub struct Archive {
    conn: Mutex<Connection>,
    first_error: Mutex<Option<String>>,
}

fn status_word(s: StepStatus) -> &'static str {
    match s {
        StepStatus::Done => "done",
        StepStatus::Incomplete => "incomplete",
        StepStatus::NotRun => "not_run",
    }
}

/// The unit record's canonical serialisation: its JSON, fields in declaration order, maps sorted.
pub fn canonical_hash(record: &UnitRecord) -> String {
    let bytes = serde_json::to_vec(record).expect("a record serialises");
    crate::plan::sha256_hex(&bytes)
}

/// The record without its samples, which the archive keeps as readings.
fn stripped(record: &UnitRecord) -> UnitRecord {
    let mut r = record.clone();
    for s in &mut r.steps {
        for c in &mut s.checks {
            c.samples.clear();
        }
        if let Some(p) = &mut s.calibration_point {
            p.samples.clear();
        }
    }
    r
}

impl Archive {
    /// Opens (or creates) the archive at `path` and proves it writable, so that a read-only file
    /// or a full disk is found before any load is applied.
    pub fn open(path: &Path) -> Result<Archive, ArchiveError> {
        let open_err = |why: String| ArchiveError::Open {
            path: path.display().to_string(),
            why,
        };
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
                Err(e) => {
                    return Err(open_err(format!(
                        "cannot set up the archive (not writable?): {e}"
                    )));
                }
            }
        }
        Ok(Archive {
            conn: Mutex::new(conn),
            first_error: Mutex::new(None),
        })
    }

    fn conn(&self) -> std::sync::MutexGuard<'_, Connection> {
        self.conn.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// The first write that failed during a run, if one did.
    pub fn failure(&self) -> Option<String> {
        self.first_error
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .clone()
    }

    fn note_error(&self, what: &str, e: impl std::fmt::Display) {
        let mut slot = self.first_error.lock().unwrap_or_else(|p| p.into_inner());
        if slot.is_none() {
            *slot = Some(format!("{what}: {e}"));
        }
    }

    /// Stores the plan text (once per SHA-256) and the run, in state "running".
    pub fn begin_run(&self, plan: &Plan, run: &RunRow) -> Result<(), ArchiveError> {
        let conn = self.conn();
        conn.execute(
            "INSERT OR IGNORE INTO plans (sha256, plan_id, revision, file, text) VALUES (?1, ?2, ?3, ?4, ?5)",
            params![plan.source.sha256, plan.id, plan.revision, plan.source.file, plan.source.text],
        )?;
        conn.execute(
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
        Ok(())
    }

    /// Marks a run finished.
    pub fn finish_run(&self, run_id: &str, finished_at: &str) -> Result<(), ArchiveError> {
        self.conn().execute(
            "UPDATE runs SET state = 'finished', finished_at = ?2 WHERE run_id = ?1",
            params![run_id, finished_at],
        )?;
        Ok(())
    }

    /// A run's row.
    pub fn run(&self, run_id: &str) -> Result<RunRow, ArchiveError> {
        self.conn()
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
    pub fn plan_text(&self, sha256: &str) -> Result<(String, String), ArchiveError> {
        self.conn()
            .query_row(
                "SELECT file, text FROM plans WHERE sha256 = ?1",
                [sha256],
                |row| Ok((row.get(0)?, row.get(1)?)),
            )
            .optional()?
            .ok_or_else(|| ArchiveError::NotFound(format!("no plan with SHA-256 {sha256}")))
    }

    /// What an interrupted run had finished.
    pub fn resume_state(&self, run_id: &str) -> Result<crate::exec::Resume, ArchiveError> {
        let run = self.run(run_id)?;
        let conn = self.conn();
        let mut resume = crate::exec::Resume {
            first_started_at: run.started_at,
            ..Default::default()
        };
        let mut stmt = conn.prepare("SELECT position, serial FROM run_units WHERE run_id = ?1")?;
        for row in stmt.query_map([run_id], |r| Ok((r.get::<_, i64>(0)?, r.get(1)?)))? {
            let (p, serial) = row?;
            resume.serials.insert(p as usize, serial);
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
        for row in rows {
            let (position, index, attempt, status, text) = row?;
            let entry = resume.attempts.entry((position, index)).or_insert(0);
            *entry = (*entry).max(attempt);
            if status == "done" {
                let mut record: StepRecord = serde_json::from_str(&text)
                    .map_err(|e| ArchiveError::Corrupt(e.to_string()))?;
                fill_step_samples(&conn, run_id, position, index, &mut record)?;
                resume
                    .done
                    .entry(position)
                    .or_default()
                    .insert(index, record);
            }
        }
        Ok(resume)
    }

    /// Unit records of a run, whole (with samples), by position.
    pub fn unit_records(&self, run_id: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        self.records_where("u.run_id = ?1", run_id)
    }

    /// Every unit record of a serial number, newest first.
    pub fn serial_records(&self, serial: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        self.records_where("u.serial = ?1", serial)
    }

    /// Unit records selected by `key=value` (`run`, `lot` or `firmware`), optionally of one plan.
    pub fn select(
        &self,
        key: &str,
        value: &str,
        plan_id: Option<&str>,
    ) -> Result<Vec<UnitRecord>, ArchiveError> {
        let column = match key {
            "run" => "u.run_id",
            "lot" => "r.lot",
            "firmware" => "u.firmware",
            other => {
                return Err(ArchiveError::NotFound(format!(
                    "cannot select by \"{other}\": use run, lot or firmware"
                )));
            }
        };
        let conn = self.conn();
        let mut stmt = conn.prepare(&format!(
            "SELECT u.record FROM units u JOIN runs r ON r.run_id = u.run_id
             JOIN plans p ON p.sha256 = r.plan_sha256
             WHERE {column} = ?1 AND (?2 IS NULL OR p.plan_id = ?2) ORDER BY u.seq"
        ))?;
        let texts: Vec<String> = stmt
            .query_map(params![value, plan_id], |r| r.get(0))?
            .collect::<Result<_, _>>()?;
        texts.iter().map(|t| reassemble(&conn, t)).collect()
    }

    fn records_where(&self, condition: &str, value: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        let conn = self.conn();
        let mut stmt = conn.prepare(&format!(
            "SELECT u.record FROM units u WHERE {condition} ORDER BY u.finished_at DESC, u.position"
        ))?;
        let texts: Vec<String> = stmt
            .query_map([value], |r| r.get(0))?
            .collect::<Result<_, _>>()?;
        texts.iter().map(|t| reassemble(&conn, t)).collect()
    }

    /// Every run of a unit, newest first.
    pub fn history(&self, serial: &str) -> Result<Vec<HistoryRow>, ArchiveError> {
        let conn = self.conn();
        let mut stmt = conn.prepare(
            "SELECT u.finished_at, u.run_id, p.plan_id, p.revision, u.firmware, r.station, r.operator, u.status
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
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Runs with their counts of accepted, rejected and incomplete units, newest first.
    pub fn runs(&self, filter: &RunFilter) -> Result<Vec<RunSummary>, ArchiveError> {
        let conn = self.conn();
        let mut stmt = conn.prepare(
            "SELECT r.run_id, r.started_at, p.plan_id, p.revision, r.lot, r.station, r.state,
                    COALESCE(SUM(u.status = 'accepted'), 0), COALESCE(SUM(u.status = 'rejected'), 0),
                    COALESCE(SUM(u.status = 'incomplete'), 0)
             FROM runs r JOIN plans p ON p.sha256 = r.plan_sha256
             LEFT JOIN units u ON u.run_id = r.run_id
             WHERE (?1 IS NULL OR r.lot = ?1) AND (?2 IS NULL OR p.plan_id = ?2)
               AND (?3 IS NULL OR r.started_at >= ?3)
             GROUP BY r.run_id
             HAVING ?4 IS NULL OR SUM(u.status = ?4) > 0
             ORDER BY r.started_at DESC",
        )?;
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

    /// Checks every unit record's hash and the chain between them. Returns the records checked
    /// and those that fail.
    pub fn verify(&self) -> Result<(u64, Vec<Failure>), ArchiveError> {
        let conn = self.conn();
        let mut stmt = conn.prepare(
            "SELECT seq, run_id, serial, record, record_sha256, prev_sha256 FROM units ORDER BY seq",
        )?;
        let mut rows = stmt.query([])?;
        let mut failures = Vec::new();
        let mut checked = 0;
        let mut previous_hash = GENESIS.to_string();
        let mut previous_seq = 0i64;
        while let Some(row) = rows.next()? {
            let seq: i64 = row.get(0)?;
            let run_id: String = row.get(1)?;
            let serial: String = row.get(2)?;
            let text: String = row.get(3)?;
            let stored: String = row.get(4)?;
            let prev: String = row.get(5)?;
            checked += 1;
            let fail = |why: String| Failure {
                seq,
                run_id: run_id.clone(),
                serial: serial.clone(),
                why,
            };
            match reassemble(&conn, &text) {
                Ok(record) => {
                    if canonical_hash(&record) != stored {
                        failures.push(fail(
                            "its content (record or readings) no longer matches its hash".into(),
                        ));
                    }
                    if record.serial != serial || record.run_id != run_id {
                        failures.push(fail("its serial or run differs from the record's".into()));
                    }
                }
                Err(e) => failures.push(fail(format!("it cannot be read: {e}"))),
            }
            if prev != previous_hash {
                failures.push(fail(format!(
                    "the record before it (sequence {previous_seq}) is missing, reordered or changed"
                )));
            }
            previous_hash = stored;
            previous_seq = seq;
        }
        let head: Option<String> = conn
            .query_row("SELECT value FROM meta WHERE key = 'chain_head'", [], |r| {
                r.get(0)
            })
            .optional()?;
        let expected_head = format!("{previous_seq}:{previous_hash}");
        if checked > 0 && head.as_deref() != Some(expected_head.as_str()) {
            failures.push(Failure {
                seq: previous_seq,
                run_id: String::new(),
                serial: String::new(),
                why: "the newest records were removed: the chain ends before its recorded head"
                    .into(),
            });
        }
        Ok((checked, failures))
    }

    /// Appends unit records to the chain, in one transaction with the chain head (one commit
    /// for a whole run). A record already in the archive (a resumed run's finished unit) is
    /// left as it is.
    pub fn append_units(&self, records: &[UnitRecord]) -> Result<(), ArchiveError> {
        let mut conn = self.conn();
        let tx = conn.transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)?;
        let mut new = Vec::new();
        for record in records {
            let exists: bool = tx.query_row(
                "SELECT COUNT(*) > 0 FROM units WHERE run_id = ?1 AND position = ?2",
                params![record.run_id, record.position as i64],
                |r| r.get(0),
            )?;
            if !exists {
                new.push(record);
            }
        }
        chain_units(&tx, new)?;
        tx.commit()?;
        Ok(())
    }

    /// Stores finished unit records whole, readings and chain, in one transaction: the path
    /// for imports and for generating large archives, where a transaction per reading would only
    /// measure the disk's fsync.
    pub fn import_units(&self, records: &[UnitRecord]) -> Result<(), ArchiveError> {
        let mut conn = self.conn();
        let tx = conn.transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)?;
        for r in records {
            insert_readings_of(&tx, r)?;
        }
        chain_units(&tx, records)?;
        tx.commit()?;
        Ok(())
    }

    /// Records which unit is in which position, once it has identified itself.
    pub fn note_unit(&self, record: &UnitRecord) -> Result<(), ArchiveError> {
        self.conn().execute(
            "INSERT OR IGNORE INTO run_units (run_id, position, serial) VALUES (?1, ?2, ?3)",
            params![record.run_id, record.position as i64, record.serial],
        )?;
        Ok(())
    }
}

/// Appends unit records (without samples) to the chain, in order, and moves the chain head.
fn chain_units<'r>(
    conn: &Connection,
    records: impl IntoIterator<Item = &'r UnitRecord>,
) -> rusqlite::Result<()> {
    let mut prev = newest_hash(conn)?;
    let mut head = None;
    for r in records {
        let (seq, hash) = insert_unit_row(conn, r, &prev)?;
        head = Some((seq, hash.clone()));
        prev = hash;
    }
    if let Some((seq, hash)) = head {
        set_chain_head(conn, seq, &hash)?;
    }
    Ok(())
}

/// Writes every sample of a finished record as reading rows (checks sharing a reading share
/// its rows).
fn insert_readings_of(conn: &Connection, r: &UnitRecord) -> rusqlite::Result<()> {
    let mut reading = conn.prepare_cached(INSERT_READING)?;
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
        for (q, ch, raw, samples) in series {
            if seen.contains(&(q, ch, raw)) {
                continue;
            }
            seen.push((q, ch, raw));
            for s in samples {
                reading.execute(params![
                    r.run_id,
                    r.position as i64,
                    index as i64,
                    step.attempt as i64,
                    q.name(),
                    ch,
                    raw,
                    s.t_s,
                    s.value,
                    s.took_s
                ])?;
            }
        }
    }
    Ok(())
}

/// The hash of the newest unit record, which the next one chains to (the genesis value in an
/// empty archive).
fn newest_hash(conn: &Connection) -> rusqlite::Result<String> {
    Ok(conn
        .query_row(
            "SELECT record_sha256 FROM units ORDER BY seq DESC LIMIT 1",
            [],
            |r| r.get(0),
        )
        .optional()?
        .unwrap_or_else(|| GENESIS.to_string()))
}

/// Inserts a unit record (without samples) after `prev` in the chain; returns its sequence
/// number and hash.
fn insert_unit_row(
    conn: &Connection,
    r: &UnitRecord,
    prev: &str,
) -> rusqlite::Result<(i64, String)> {
    let hash = canonical_hash(r);
    let text = serde_json::to_string(&stripped(r)).expect("a record serialises");
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
    Ok((conn.last_insert_rowid(), hash))
}

/// Records the newest record of the chain, so that removing it is noticed.
fn set_chain_head(conn: &Connection, seq: i64, hash: &str) -> rusqlite::Result<()> {
    conn.execute(
        "INSERT INTO meta (key, value) VALUES ('chain_head', ?1)
         ON CONFLICT(key) DO UPDATE SET value = excluded.value",
        [format!("{seq}:{hash}")],
    )?;
    Ok(())
}

const INSERT_READING: &str = "INSERT INTO readings (run_id, position, step_index, attempt, quantity, channel, raw, t_s, value, took_s)
     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)";

/// A stored (stripped) unit record with its samples put back from the readings.
fn reassemble(conn: &Connection, text: &str) -> Result<UnitRecord, ArchiveError> {
    let mut record: UnitRecord =
        serde_json::from_str(text).map_err(|e| ArchiveError::Corrupt(e.to_string()))?;
    let run_id = record.run_id.clone();
    let position = record.position;
    for (index, step) in record.steps.iter_mut().enumerate() {
        fill_step_samples(conn, &run_id, position, index, step)?;
    }
    Ok(record)
}

/// Puts a step record's samples back from the readings of its attempt.
fn fill_step_samples(
    conn: &Connection,
    run_id: &str,
    position: usize,
    index: usize,
    step: &mut StepRecord,
) -> Result<(), ArchiveError> {
    let mut stmt = conn.prepare_cached(
        "SELECT quantity, channel, raw, t_s, value, took_s FROM readings
         WHERE run_id = ?1 AND position = ?2 AND step_index = ?3 AND attempt = ?4 ORDER BY id",
    )?;
    let mut by_key: BTreeMap<(String, String, bool), Vec<Sample>> = BTreeMap::new();
    let rows = stmt.query_map(
        params![run_id, position as i64, index as i64, step.attempt as i64],
        |r| {
            Ok((
                r.get::<_, String>(0)?,
                r.get::<_, String>(1)?,
                r.get::<_, bool>(2)?,
                Sample {
                    t_s: r.get(3)?,
                    value: r.get(4)?,
                    took_s: r.get(5)?,
                },
            ))
        },
    )?;
    for row in rows {
        let (q, ch, raw, s) = row?;
        by_key.entry((q, ch, raw)).or_default().push(s);
    }
    let take = |q: Quantity, ch: &str, raw: bool| {
        by_key
            .get(&(q.name().to_string(), ch.to_string(), raw))
            .cloned()
            .unwrap_or_default()
    };
    for c in &mut step.checks {
        c.samples = take(c.quantity, &c.channel, false);
    }
    if let Some(p) = &mut step.calibration_point {
        p.samples = take(p.quantity, &p.channel, true);
    }
    Ok(())
}

/// The archive, recording one run.
///
/// Readings are committed before `reading` returns, as they are taken; readings that arrive
/// from several positions at once while a commit is in flight are committed together, in one
/// transaction, by whichever of their threads gets the connection first (group commit). Sixteen
/// positions sampled together then cost two fsyncs a round, not sixteen.
pub struct RunRecorder<'a> {
    archive: &'a Archive,
    run_id: String,
    pending: Mutex<PendingReadings>,
}

/// Readings handed over but not yet committed, and how far the commits have got.
#[derive(Default)]
struct PendingReadings {
    rows: Vec<(ReadingKey, Sample)>,
    /// Readings handed over so far, and readings committed so far (a reading's ticket is its
    /// place in that count).
    handed: u64,
    committed: u64,
}

impl<'a> RunRecorder<'a> {
    pub fn new(archive: &'a Archive, run_id: &str) -> RunRecorder<'a> {
        RunRecorder {
            archive,
            run_id: run_id.to_string(),
            pending: Mutex::new(PendingReadings::default()),
        }
    }

    fn pending(&self) -> std::sync::MutexGuard<'_, PendingReadings> {
        self.pending.lock().unwrap_or_else(|p| p.into_inner())
    }
}

/// Writes one position's record of one step, without its samples (those are the readings).
fn insert_step(
    conn: &Connection,
    run_id: &str,
    position: usize,
    step_index: usize,
    record: &StepRecord,
) -> rusqlite::Result<usize> {
    let mut r = record.clone();
    for c in &mut r.checks {
        c.samples.clear();
    }
    if let Some(p) = &mut r.calibration_point {
        p.samples.clear();
    }
    let text = serde_json::to_string(&r).expect("a step record serialises");
    conn.execute(
        "INSERT OR REPLACE INTO steps (run_id, position, step_index, attempt, status, record)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
        params![
            run_id,
            position as i64,
            step_index as i64,
            record.attempt as i64,
            status_word(record.status),
            text
        ],
    )
}

impl Recorder for RunRecorder<'_> {
    fn reading(&self, key: &ReadingKey, sample: Sample) {
        let ticket = {
            let mut p = self.pending();
            p.rows.push((key.clone(), sample));
            p.handed += 1;
            p.handed
        };
        let conn = self.archive.conn();
        let (rows, upto) = {
            let mut p = self.pending();
            if p.committed >= ticket {
                // Committed by the thread that held the connection meanwhile.
                return;
            }
            (std::mem::take(&mut p.rows), p.handed)
        };
        let result = conn.unchecked_transaction().and_then(|tx| {
            {
                let mut stmt = tx.prepare_cached(INSERT_READING)?;
                for (key, sample) in &rows {
                    stmt.execute(params![
                        &self.run_id,
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
            tx.commit()
        });
        self.pending().committed = upto;
        drop(conn);
        if let Err(e) = result {
            self.archive.note_error("writing a reading", e);
        }
    }

    fn step_finished(&self, step_index: usize, records: &[(usize, &StepRecord)]) {
        let conn = self.archive.conn();
        // One transaction for all positions: one commit (one fsync) per step, not one per unit.
        let result = conn.unchecked_transaction().and_then(|tx| {
            for (position, record) in records {
                insert_step(&tx, &self.run_id, *position, step_index, record)?;
            }
            tx.commit()
        });
        drop(conn);
        if let Err(e) = result {
            self.archive.note_error("writing a step record", e);
        }
    }

    fn unit_started(&self, record: &UnitRecord) {
        if let Err(e) = self.archive.note_unit(record) {
            self.archive.note_error("writing a unit's identity", e);
        }
    }

    fn units_finished(&self, records: &[UnitRecord]) {
        if let Err(e) = self.archive.append_units(records) {
            self.archive.note_error("writing the unit records", e);
        }
    }

    fn failure(&self) -> Option<String> {
        self.archive.failure()
    }
}
