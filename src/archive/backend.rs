//! What an archive backend does: the operations behind [`super::Archive`], each one atomic.
//!
//! A backend stores rows and reads them back; the rules of what is sealed and how (`seal`), the
//! grouping of readings into commits (`RunRecorder`) and the parsing of selectors live above it
//! and are the same for every backend. A backend keeps its SQL (or whatever it speaks) in its
//! own module and is tested by the same archive tests as every other.
//!
//! Every write must be durable when it returns (a reading committed is a reading kept), and
//! every write appends its chain entry in the same transaction as its row.

use super::image::{Fill, Sink};
use super::{
    ArchiveError, HistoryRow, RunFilter, RunRow, RunState, RunSummary, SelectBy, Verification,
};
use crate::exec::{ReadingKey, Resume};
use crate::plan::Plan;
use crate::record::{Sample, StepRecord, UnitRecord};

/// The operations of an archive backend. Calls on one archive are serialised by
/// [`super::Archive`]; a backend shared by several processes handles their concurrency itself.
pub trait Backend: Send {
    /// How durable a commit is, as the storage reports it.
    fn durability(&self) -> Result<(String, i64), ArchiveError>;

    // ---- Writing a run, as it goes ----

    /// Stores the plan text (once per SHA-256) and the run in state "running"; seals it.
    fn begin_run(&self, plan: &Plan, run: &RunRow) -> Result<(), ArchiveError>;
    /// Notes which serial stands in which position; seals it (once per run and position).
    fn note_unit(&self, record: &UnitRecord) -> Result<(), ArchiveError>;
    /// Commits readings, all in one transaction.
    fn add_readings(&self, run_id: &str, rows: &[(ReadingKey, Sample)])
    -> Result<(), ArchiveError>;
    /// Commits one step's records of several positions (without their samples, which are the
    /// readings), each sealed with its samples, in one transaction.
    fn add_steps(
        &self,
        run_id: &str,
        step_index: usize,
        records: &[(usize, &StepRecord)],
    ) -> Result<(), ArchiveError>;
    /// Appends unit records, each sealed; a record identical to its position's newest is not
    /// stored twice.
    fn append_units(&self, records: &[UnitRecord]) -> Result<(), ArchiveError>;
    /// Ends a run; seals the end and returns the chain head after it.
    fn finish_run(
        &self,
        run_id: &str,
        finished_at: &str,
        state: RunState,
    ) -> Result<String, ArchiveError>;
    /// Stores finished records whole (readings, record, seal) in one transaction.
    fn import_units(&self, records: &[UnitRecord]) -> Result<(), ArchiveError>;

    // ---- Reading ----

    fn run(&self, run_id: &str) -> Result<RunRow, ArchiveError>;
    fn plan_text(&self, sha256: &str) -> Result<(String, String), ArchiveError>;
    /// What an interrupted run had finished: serials seen, positions sealed, steps done with
    /// their records, the highest attempt of every step that took readings.
    fn resume_state(&self, run_id: &str) -> Result<Resume, ArchiveError>;
    /// The newest record of each position of a run, whole, by position.
    fn unit_records(&self, run_id: &str) -> Result<Vec<UnitRecord>, ArchiveError>;
    /// Every record of a serial, newest first.
    fn serial_records(&self, serial: &str) -> Result<Vec<UnitRecord>, ArchiveError>;
    /// The newest record of each position of the runs that match, in the order written.
    fn select(
        &self,
        key: SelectBy,
        value: &str,
        plan_id: Option<&str>,
    ) -> Result<Vec<UnitRecord>, ArchiveError>;
    fn history(&self, serial: &str) -> Result<Vec<HistoryRow>, ArchiveError>;
    fn runs(&self, filter: &RunFilter) -> Result<Vec<RunSummary>, ArchiveError>;

    // ---- The chain ----

    fn verify(&self, anchor: Option<&str>) -> Result<Verification, ArchiveError>;
    fn run_anchor(&self, run_id: &str) -> Result<Option<String>, ArchiveError>;
    fn chain_head(&self) -> Result<Option<String>, ArchiveError>;

    // ---- Copying between archives (`image`) ----

    /// Hands every stored row to `sink`, table by table (meta, plans, runs, units seen,
    /// readings, steps, unit records, chain), in chunks, in the order written, from one
    /// consistent view.
    fn dump(&self, sink: &mut Sink<'_>) -> Result<(), ArchiveError>;
    /// Whether the archive holds nothing yet: no run, no unit record, no chain entry.
    fn is_empty(&self) -> Result<bool, ArchiveError>;
    /// Loads the rows `fill` hands over into this (empty) archive, in one transaction, keeping
    /// their numbers.
    fn load(&self, fill: &mut Fill<'_>) -> Result<(), ArchiveError>;
}
