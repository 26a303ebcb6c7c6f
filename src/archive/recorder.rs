//! The archive recording one run as it goes: every reading committed before `reading` returns
//! (readings that arrive together committed together), each step's records in one transaction,
//! the unit records at the end, each sealed in the chain.

use super::Archive;
use crate::exec::{ReadingKey, Recorder};
use crate::record::{Sample, StepRecord, UnitRecord};
use std::sync::Mutex;

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
    /// Transactions that committed readings, to show the grouping.
    reading_commits: std::sync::atomic::AtomicU64,
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
            reading_commits: Default::default(),
        }
    }

    /// How many transactions have committed readings so far (fewer than the readings when
    /// readings arrived together).
    pub fn reading_commits(&self) -> u64 {
        self.reading_commits
            .load(std::sync::atomic::Ordering::SeqCst)
    }

    fn pending(&self) -> std::sync::MutexGuard<'_, PendingReadings> {
        self.pending.lock().unwrap_or_else(|p| p.into_inner())
    }
}

impl Recorder for RunRecorder<'_> {
    fn reading(&self, key: &ReadingKey, sample: Sample) {
        let ticket = {
            let mut p = self.pending();
            p.rows.push((key.clone(), sample));
            p.handed += 1;
            p.handed
        };
        let backend = self.archive.backend();
        let (rows, upto) = {
            let mut p = self.pending();
            if p.committed >= ticket {
                // Committed by the thread that held the backend meanwhile.
                return;
            }
            (std::mem::take(&mut p.rows), p.handed)
        };
        let result = backend.add_readings(&self.run_id, &rows);
        self.reading_commits
            .fetch_add(1, std::sync::atomic::Ordering::SeqCst);
        self.pending().committed = upto;
        drop(backend);
        if let Err(e) = result {
            self.archive.note_error("writing a reading", e);
        }
    }

    fn step_finished(&self, step_index: usize, records: &[(usize, &StepRecord)]) {
        let result = self
            .archive
            .backend()
            .add_steps(&self.run_id, step_index, records);
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
