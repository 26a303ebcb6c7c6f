//! The archive: the system of record, what every command that takes `--archive` reads and
//! writes.
//!
//! Every reading is committed as it is taken, each step's record as it finishes, and each unit's
//! record when the run ends, so a crash, a power cut or `kill -9` loses at most the reading in
//! flight and an interrupted run can be resumed. Each unit record carries the SHA-256 of its
//! canonical JSON (with samples), and every row a command reads is sealed in a chain (see
//! `seal`), so an edited, deleted or reordered record, or a changed reading, is found by
//! [`Archive::verify`].
//!
//! This module owns what the archive does, the same for every backend: the rows it hands out,
//! its errors, the recorder that groups readings into commits. What is stored where is a
//! [`Backend`]'s business; SQLite (`sqlite`) is the embedded default. Nothing here writes SQL.
//! May use exec (for the recorder and resume types), record and plan; nothing above it.

use crate::exec::Resume;
use crate::plan::Plan;
use crate::record::UnitRecord;
use std::path::Path;
use std::sync::Mutex;

mod backend;
mod chain;
pub mod image;
pub mod journal;
mod pg;
mod recorder;
pub mod seal;
mod sqlite;

pub use backend::Backend;
pub use pg::{PG_SCHEMA_VERSION, Postgres};
pub use recorder::RunRecorder;
pub use seal::{Failure, GENESIS, Verification};
pub use sqlite::{SCHEMA_VERSION, Sqlite};

#[derive(Debug, thiserror::Error)]
pub enum ArchiveError {
    #[error("archive {path}: {why}")]
    Open { path: String, why: String },
    #[error("archive: {0}")]
    Sql(#[from] rusqlite::Error),
    #[error("archive: {}", postgres_message(.0))]
    Postgres(#[from] postgres::Error),
    #[error("archive: a stored record does not parse: {0}")]
    Corrupt(String),
    #[error("archive: {0}")]
    NotFound(String),
    #[error(
        "archive: written by a newer meterproof (schema version {0}; this one knows up to {SCHEMA_VERSION}): use that version"
    )]
    Newer(i64),
    #[error(
        "archive {0} already holds records: copy into a new, empty archive (copying into one with records would have to merge two chains)"
    )]
    NotEmpty(String),
    #[error("{path} is not a meterproof archive: {why}")]
    NotAnArchive { path: String, why: String },
}

/// What the PostgreSQL server said, rather than the client's summary of it ("db error"), or
/// the client's error with its cause ("error connecting to server: Connection refused").
fn postgres_message(e: &postgres::Error) -> String {
    match e.as_db_error() {
        Some(db) => format!("{} ({})", db.message(), db.code().code()),
        None => match std::error::Error::source(e) {
            Some(cause) => format!("{e}: {cause}"),
            None => e.to_string(),
        },
    }
}

impl ArchiveError {
    /// The storage's own words, without the "archive:" this error's display puts first.
    pub fn said(&self) -> String {
        match self {
            ArchiveError::Sql(inner) => inner.to_string(),
            ArchiveError::Postgres(inner) => postgres_message(inner),
            other => other.to_string(),
        }
    }
}

/// Where an archive is: an SQLite file, or a PostgreSQL database named by a libpq-style URL.
#[derive(Debug, Clone, PartialEq)]
pub enum Location {
    Sqlite(std::path::PathBuf),
    Postgres(String),
}

impl Location {
    /// `postgres://...` or `postgresql://...` is a database; anything else a file path.
    pub fn parse(text: &str) -> Location {
        let lower = text.to_ascii_lowercase();
        if lower.starts_with("postgres://") || lower.starts_with("postgresql://") {
            Location::Postgres(text.to_string())
        } else {
            Location::Sqlite(std::path::PathBuf::from(text))
        }
    }
}

impl std::str::FromStr for Location {
    type Err = std::convert::Infallible;
    fn from_str(text: &str) -> Result<Location, Self::Err> {
        Ok(Location::parse(text))
    }
}

impl std::fmt::Display for Location {
    /// The location as it may be shown: a database's password is never printed.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Location::Sqlite(p) => write!(f, "{}", p.display()),
            Location::Postgres(url) => f.write_str(&pg::redacted(url)),
        }
    }
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
    /// The position the unit stood in.
    pub position: i64,
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

/// The archive: one backend behind it, and the first write that failed during a run.
pub struct Archive {
    backend: Mutex<Box<dyn Backend>>,
    first_error: Mutex<Option<String>>,
}

/// How a run ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RunState {
    Finished,
    /// Stopped by a signal or the operator; `resume` continues it.
    Interrupted,
}

impl RunState {
    pub fn word(self) -> &'static str {
        match self {
            RunState::Finished => "finished",
            RunState::Interrupted => "interrupted",
        }
    }
}

impl Archive {
    /// An archive over the given backend.
    pub fn with(backend: Box<dyn Backend>) -> Archive {
        Archive {
            backend: Mutex::new(backend),
            first_error: Mutex::new(None),
        }
    }

    /// Opens (or creates) the SQLite archive at `path` and proves it writable, so that a
    /// read-only file or a full disk is found before any load is applied.
    pub fn open(path: &Path) -> Result<Archive, ArchiveError> {
        Ok(Archive::with(Box::new(Sqlite::open(path)?)))
    }

    /// Opens (or creates) the archive at `location`, proving it writable.
    pub fn open_at(location: &Location) -> Result<Archive, ArchiveError> {
        match location {
            Location::Sqlite(path) => Archive::open(path),
            Location::Postgres(url) => Ok(Archive::with(Box::new(Postgres::open(url)?))),
        }
    }

    /// Opens the archive at `location` for reading only.
    pub fn open_read_only_at(location: &Location) -> Result<Archive, ArchiveError> {
        match location {
            Location::Sqlite(path) => Archive::open_read_only(path),
            Location::Postgres(url) => Ok(Archive::with(Box::new(Postgres::open_read_only(url)?))),
        }
    }

    /// Copies every row of this archive into `target`, which must hold nothing yet (`shown`
    /// names it in the refusal), in one transaction on the target: every hash, sequence number
    /// and reading order is kept, so `verify` gives the same chain head on both sides.
    pub fn copy_into(&self, target: &Archive, shown: &str) -> Result<image::Copied, ArchiveError> {
        let source = self.backend();
        let to = target.backend();
        if !to.is_empty()? {
            return Err(ArchiveError::NotEmpty(shown.to_string()));
        }
        let mut copied = image::Copied::default();
        to.load(&mut |sink| {
            source.dump(&mut |rows| {
                copied.count(&rows);
                sink(rows)
            })
        })?;
        Ok(copied)
    }

    /// Opens an existing SQLite archive for reading only: never creates, migrates or changes
    /// anything, and works on a file or folder that is read-only.
    pub fn open_read_only(path: &Path) -> Result<Archive, ArchiveError> {
        Ok(Archive::with(Box::new(Sqlite::open_read_only(path)?)))
    }

    /// The backend, for one operation (operations on one archive are serialised).
    fn backend(&self) -> std::sync::MutexGuard<'_, Box<dyn Backend>> {
        self.backend.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// The first write that failed during a run, if one did.
    pub fn failure(&self) -> Option<String> {
        self.first_error
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .clone()
    }

    /// Keeps the first failed write, as the storage said it (the operator's message already
    /// says it is the archive's).
    fn note_error(&self, what: &str, e: ArchiveError) {
        let said = e.said();
        let mut slot = self.first_error.lock().unwrap_or_else(|p| p.into_inner());
        if slot.is_none() {
            *slot = Some(format!("{what}: {said}"));
        }
    }

    /// The anchor of a run: its newest sealed end, `SEQ:SHA256`.
    pub fn run_anchor(&self, run_id: &str) -> Result<Option<String>, ArchiveError> {
        self.backend().run_anchor(run_id)
    }

    /// The chain head now, `SEQ:SHA256`: what a run's folder and reports keep as its anchor.
    pub fn chain_head(&self) -> Result<Option<String>, ArchiveError> {
        self.backend().chain_head()
    }

    /// The storage's durability settings as the backend reports them (SQLite: the journal
    /// mode, "wal", and the synchronous level, 2 for FULL: an fsync at every commit).
    pub fn durability(&self) -> Result<(String, i64), ArchiveError> {
        self.backend().durability()
    }

    /// Stores the plan text (once per SHA-256) and the run, in state "running", and seals the
    /// run's opening in the chain.
    pub fn begin_run(&self, plan: &Plan, run: &RunRow) -> Result<(), ArchiveError> {
        self.backend().begin_run(plan, run)
    }

    /// Ends a run: `finished`, or `interrupted` (stopped by a signal or the operator, to be
    /// resumed); the end is sealed in the chain. Returns the chain head after it: the anchor.
    pub fn finish_run(
        &self,
        run_id: &str,
        finished_at: &str,
        state: RunState,
    ) -> Result<String, ArchiveError> {
        self.backend().finish_run(run_id, finished_at, state)
    }

    /// A run's row.
    pub fn run(&self, run_id: &str) -> Result<RunRow, ArchiveError> {
        self.backend().run(run_id)
    }

    /// The plan text stored under `sha256`, with the file name it came from.
    pub fn plan_text(&self, sha256: &str) -> Result<(String, String), ArchiveError> {
        self.backend().plan_text(sha256)
    }

    /// What an interrupted run had finished.
    pub fn resume_state(&self, run_id: &str) -> Result<Resume, ArchiveError> {
        self.backend().resume_state(run_id)
    }

    /// Unit records of a run, whole (with samples), by position: the newest of each position
    /// (a resumed run's, not the interrupted one's).
    pub fn unit_records(&self, run_id: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        self.backend().unit_records(run_id)
    }

    /// Every unit record of a serial number, newest first.
    pub fn serial_records(&self, serial: &str) -> Result<Vec<UnitRecord>, ArchiveError> {
        self.backend().serial_records(serial)
    }

    /// Unit records selected by `key=value` (`run`, `lot` or `firmware`), optionally of one plan.
    pub fn select(
        &self,
        key: &str,
        value: &str,
        plan_id: Option<&str>,
    ) -> Result<Vec<UnitRecord>, ArchiveError> {
        let key = match key {
            "run" => SelectBy::Run,
            "lot" => SelectBy::Lot,
            "firmware" => SelectBy::Firmware,
            other => {
                return Err(ArchiveError::NotFound(format!(
                    "cannot select by \"{other}\": use run, lot or firmware"
                )));
            }
        };
        self.backend().select(key, value, plan_id)
    }

    /// Every run of a unit, newest first.
    pub fn history(&self, serial: &str) -> Result<Vec<HistoryRow>, ArchiveError> {
        self.backend().history(serial)
    }

    /// Runs with their counts of accepted, rejected and incomplete units, newest first.
    pub fn runs(&self, filter: &RunFilter) -> Result<Vec<RunSummary>, ArchiveError> {
        self.backend().runs(filter)
    }

    /// Checks the whole archive against its chain, and the chain against `anchor`
    /// (`SEQ:SHA256`, as a run's folder keeps it) where one is given.
    pub fn verify(&self, anchor: Option<&str>) -> Result<Verification, ArchiveError> {
        self.backend().verify(anchor)
    }

    /// Appends unit records, sealing each in the chain, in one transaction (one commit for a
    /// whole run). A record that says nothing new about its position (a resumed run's unit
    /// that had finished before the interruption) is not stored twice.
    pub fn append_units(&self, records: &[UnitRecord]) -> Result<(), ArchiveError> {
        self.backend().append_units(records)
    }

    /// Stores finished unit records whole, readings and chain, in one transaction: the path
    /// for imports and for generating large archives.
    pub fn import_units(&self, records: &[UnitRecord]) -> Result<(), ArchiveError> {
        self.backend().import_units(records)
    }

    /// Records which unit is in which position, once it has identified itself, sealed in the
    /// chain (a resume checks the unit against it).
    pub fn note_unit(&self, record: &UnitRecord) -> Result<(), ArchiveError> {
        self.backend().note_unit(record)
    }
}

/// What `select` selects unit records by.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SelectBy {
    Run,
    Lot,
    Firmware,
}
