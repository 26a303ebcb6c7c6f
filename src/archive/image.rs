//! An archive's stored rows, table by table, as one backend hands them to another: what
//! `copy-archive` moves, keeping every value the chain hashes and every number it refers to
//! (run, unit and chain sequence numbers, the order of readings).
//!
//! A backend dumps its rows in chunks (a years-long archive does not fit in memory) and loads
//! chunks into an empty archive of its own kind, in one transaction.

use super::ArchiveError;
use super::chain::ChainRow;

/// How many rows a chunk holds at most.
pub const CHUNK: usize = 5000;

#[derive(Debug, Clone, PartialEq)]
pub struct PlanRow {
    pub sha256: String,
    pub plan_id: String,
    pub revision: String,
    pub file: String,
    pub text: String,
}

/// A run row with its number (SQLite's rowid, PostgreSQL's `seq`).
#[derive(Debug, Clone, PartialEq)]
pub struct RunFull {
    pub seq: i64,
    pub run_id: String,
    pub plan_sha256: String,
    pub lot: Option<String>,
    pub station: String,
    pub operator: String,
    pub bench: String,
    pub tool_version: String,
    pub started_at: String,
    pub finished_at: Option<String>,
    pub state: String,
}

#[derive(Debug, Clone, PartialEq)]
pub struct SeenRow {
    pub seq: i64,
    pub run_id: String,
    pub position: i64,
    pub serial: String,
}

#[derive(Debug, Clone, PartialEq)]
pub struct ReadingFull {
    pub id: i64,
    pub run_id: String,
    pub position: i64,
    pub step_index: i64,
    pub attempt: i64,
    pub quantity: String,
    pub channel: String,
    pub raw: bool,
    pub t_s: f64,
    pub value: f64,
    pub took_s: Option<f64>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct StepFull {
    pub run_id: String,
    pub position: i64,
    pub step_index: i64,
    pub attempt: i64,
    pub status: String,
    pub record: String,
}

#[derive(Debug, Clone, PartialEq)]
pub struct UnitFull {
    pub seq: i64,
    pub run_id: String,
    pub position: i64,
    pub serial: String,
    pub firmware: Option<String>,
    pub status: String,
    pub finished_at: String,
    pub record: String,
    pub record_sha256: String,
    pub prev_sha256: String,
}

/// One chunk of one table's rows, in the order they were written.
#[derive(Debug, Clone, PartialEq)]
pub enum Rows {
    /// Every `meta` entry but the schema version and the time last opened, which belong to
    /// the archive they are in.
    Meta(Vec<(String, String)>),
    Plans(Vec<PlanRow>),
    Runs(Vec<RunFull>),
    Seen(Vec<SeenRow>),
    Readings(Vec<ReadingFull>),
    Steps(Vec<StepFull>),
    Units(Vec<UnitFull>),
    Chain(Vec<ChainRow>),
}

impl Rows {
    pub fn len(&self) -> usize {
        match self {
            Rows::Meta(v) => v.len(),
            Rows::Plans(v) => v.len(),
            Rows::Runs(v) => v.len(),
            Rows::Seen(v) => v.len(),
            Rows::Readings(v) => v.len(),
            Rows::Steps(v) => v.len(),
            Rows::Units(v) => v.len(),
            Rows::Chain(v) => v.len(),
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// Meta keys that describe the archive they are in, not its content: never copied.
pub const OWN_META: [&str; 2] = ["schema_version", "last_opened"];

/// Where a dump sends its chunks.
pub type Sink<'a> = dyn FnMut(Rows) -> Result<(), ArchiveError> + 'a;

/// What a load runs inside its transaction: the source's dump, writing into the sink it is given.
pub type Fill<'a> = dyn FnMut(&mut Sink<'_>) -> Result<(), ArchiveError> + 'a;

/// What was copied, table by table.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Copied {
    pub runs: u64,
    pub units: u64,
    pub readings: u64,
    pub steps: u64,
    pub chain: u64,
}

impl Copied {
    pub fn count(&mut self, rows: &Rows) {
        let n = rows.len() as u64;
        match rows {
            Rows::Runs(_) => self.runs += n,
            Rows::Units(_) => self.units += n,
            Rows::Readings(_) => self.readings += n,
            Rows::Steps(_) => self.steps += n,
            Rows::Chain(_) => self.chain += n,
            _ => {}
        }
    }
}
