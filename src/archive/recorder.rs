//! The archive recording one run as it goes: every reading committed before `reading` returns
//! (readings that arrive together committed together), each step's records in one transaction,
//! the unit records at the end, each sealed in the chain.

use super::*;

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

/// Writes one position's record of one step, without its samples (those are the readings),
/// and seals it, samples and all, in the chain. A step row is never replaced: a step run again
/// has an attempt number of its own.
pub(super) fn insert_step(
    conn: &Connection,
    run_id: &str,
    position: usize,
    step_index: usize,
    record: &StepRecord,
) -> rusqlite::Result<()> {
    let mut r = record.clone();
    for c in &mut r.checks {
        c.samples.clear();
    }
    if let Some(p) = &mut r.calibration_point {
        p.samples.clear();
    }
    let text = serde_json::to_string(&r).expect("a step record serialises");
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
        &chain::Entry::Step {
            run_id,
            position,
            step_index,
            attempt: record.attempt,
        },
        &chain::step_content(status, &full),
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
        self.reading_commits
            .fetch_add(1, std::sync::atomic::Ordering::SeqCst);
        self.pending().committed = upto;
        drop(conn);
        if let Err(e) = result {
            self.archive.note_error("writing a reading", e);
        }
    }

    fn step_finished(&self, step_index: usize, records: &[(usize, &StepRecord)]) {
        let conn = self.archive.conn();
        // One transaction for all positions: one commit (one fsync) per step, not one per unit.
        let result = immediate(&conn).and_then(|tx| {
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
