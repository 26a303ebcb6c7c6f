//! The step engine: applies each load, waits, samples every position, takes the reference and
//! decides.
//!
//! The engine knows nothing of terminals or files: it tells a [`Reporter`] what happens, as
//! events, and hands back one [`UnitRecord`] per position. A fault on one position's link marks
//! that unit's step incomplete and keeps every reading already taken; the other positions carry
//! on.
//!
//! Why one file of this length: it holds the run's phases in the order they happen (identify,
//! announce, each step's load, settling and sampling, the final records), each a short function,
//! so the whole run reads top to bottom in one place; what each phase does at length lives in
//! the submodules.

mod calibrate;
mod decide;
mod identify;
pub mod preview;

pub use decide::failure_text;
mod sampling;
mod settle;
mod step;
pub mod trust;

use identify::{announce_units, identify_all};
use step::{not_run, run_step};

use crate::bench::{Bench, Position, ReferenceRequest};
use crate::link::Identity;
use crate::plan::CalibrationSpec;
use crate::plan::{Plan, Quantity, Step};
use crate::record::{
    CalibrationPoint, CheckRecord, CheckVerdict, PlanRef, RECORD_FORMAT, ReferenceRecord, Sample,
    StepRecord, StepStatus, UnitRecord, UnitStatus, UnitVerdict,
};
use std::collections::BTreeMap;

/// Who runs what, for the records.
#[derive(Debug, Clone)]
pub struct RunContext {
    pub run_id: String,
    pub operator: String,
    pub lot: Option<String>,
    pub tool_version: String,
    /// Remarks recorded with every unit of the run.
    pub notes: Vec<String>,
}

/// What the engine tells its reporter, in order.
#[derive(Debug)]
pub enum Event<'a> {
    RunStarted {
        plan: &'a Plan,
        positions: usize,
    },
    UnitIdentified {
        position: usize,
        identity: &'a Identity,
    },
    UnitRefused {
        position: usize,
        reason: &'a str,
    },
    StepStarted {
        index: usize,
        total: usize,
        step: &'a Step,
    },
    /// The load is applied: settling and sampling take `real_s` seconds of real time (zero on
    /// the virtual clock).
    Measuring {
        step: &'a Step,
        real_s: f64,
    },
    StepFinished {
        index: usize,
        step: &'a Step,
        /// (position, status, failed checks) for each unit tested at this step.
        results: Vec<(usize, StepStatus, usize)>,
    },
    /// The recorder could not keep something (the archive's disk is full, say): said once, as
    /// soon as it is seen after a step. No further load is applied (what would be measured
    /// could not be kept); the records taken so far are returned whole, for the files.
    RecordingFailed {
        what: &'a str,
    },
    /// A step's results were set aside for every unit: the load was not the plan's, or the
    /// reference looks wrong. Said loudly; the units are INCOMPLETE for the step.
    StepSetAside {
        step: &'a Step,
        reason: &'a str,
    },
    RunFinished {
        records: &'a [UnitRecord],
        bench_time_s: f64,
    },
}

/// Receives the engine's events: the terminal, a progress bar, a test.
pub trait Reporter {
    fn event(&mut self, event: &Event);
}

/// A reporter that ignores everything.
pub struct Silent;

impl Reporter for Silent {
    fn event(&mut self, _: &Event) {}
}

/// Where the engine puts each reading and record as soon as it exists: the archive, which
/// commits them so that a crash loses at most the reading in flight. Implementations keep their
/// own first error; the engine carries on (the records are also returned and exported).
pub trait Recorder: Sync {
    fn reading(&self, key: &ReadingKey, sample: Sample);
    /// Every position's record of one step, (position, record), when the step ends.
    fn step_finished(&self, step_index: usize, records: &[(usize, &StepRecord)]);
    /// A unit has identified itself (or failed to) and its testing begins.
    fn unit_started(&self, _record: &UnitRecord) {}
    /// Every unit's finished record, once the run ends.
    fn units_finished(&self, records: &[UnitRecord]);
    /// The first thing the recorder failed to keep, if anything.
    fn failure(&self) -> Option<String> {
        None
    }
}

/// Which reading a sample is.
#[derive(Debug, Clone, PartialEq)]
pub struct ReadingKey {
    pub position: usize,
    pub step_index: usize,
    pub attempt: u32,
    pub quantity: Quantity,
    pub channel: String,
    pub raw: bool,
}

/// A recorder that keeps nothing.
pub struct NoRecorder;

impl Recorder for NoRecorder {
    fn reading(&self, _: &ReadingKey, _: Sample) {}
    fn step_finished(&self, _: usize, _: &[(usize, &StepRecord)]) {}
    fn units_finished(&self, _: &[UnitRecord]) {}
}

/// What an interrupted run had finished, to continue from it.
#[derive(Debug, Clone, Default)]
pub struct Resume {
    /// The serial each position's unit had, to make sure the same unit is still there.
    pub serials: BTreeMap<usize, String>,
    /// Steps a position finished, by step index.
    pub done: BTreeMap<usize, BTreeMap<usize, StepRecord>>,
    /// How many attempts each (position, step index) has had so far.
    pub attempts: BTreeMap<(usize, usize), u32>,
    /// When the run was started first.
    pub first_started_at: String,
    /// Positions whose unit already has a sealed record of the interrupted run.
    pub sealed: std::collections::BTreeSet<usize>,
}

/// One position's state during the run.
struct Unit {
    record: UnitRecord,
    /// Whether the unit is still being tested (not refused at identification).
    active: bool,
    /// Steps run again after a resume.
    repeated: Vec<String>,
    /// On a resume, a different unit from the one the interrupted run had: nothing is kept.
    fresh: bool,
}

/// What `run_step` needs to know about the step beyond the plan.
#[derive(Clone, Copy)]
struct StepContext<'a> {
    /// How an adaptive settling went; `None` for a fixed settle time.
    settle: Option<settle::SettleOutcome>,
    index: usize,
    started_at_s: f64,
    /// Which units to sample at this step (the others are refused or kept from before).
    to_run: &'a [bool],
    attempts: Option<&'a BTreeMap<(usize, usize), u32>>,
    recorder: &'a dyn Recorder,
    /// The meter's base current (Ib or In): "no current" is judged against a share of it.
    base_current: f64,
    /// Each position's restarts seen before the load was applied.
    restarts_before: &'a [u64],
}

/// Each position's restarts seen so far (0 where the link does not count them).
fn restarts(bench: &Bench) -> Vec<u64> {
    bench
        .positions
        .iter()
        .map(|p| p.link.health().map_or(0, |h| h.restarts))
        .collect()
}

/// How a step ended, beyond its records.
#[derive(Default)]
struct StepOutcome {
    /// Why the run must stop (the operator aborted, a stop signal).
    stop: Option<String>,
    /// Why the step was set aside for every unit.
    set_aside: Option<String>,
}

/// A step counting pulses through a scanning multiplexer (one measuring input switched from
/// position to position): each unit is counted in turn under the same load, its own window,
/// references and record; a stop before a unit's turn leaves its step not run.
fn count_in_turn(
    step: &Step,
    sc: &StepContext,
    bench: &mut Bench,
    units: &mut [Unit],
    judge: &decide::Judge,
) -> StepOutcome {
    let mut outcome = StepOutcome::default();
    for turn in 0..sc.to_run.len() {
        if !sc.to_run[turn] {
            continue;
        }
        if let Some(reason) = &outcome.stop {
            units[turn]
                .record
                .steps
                .push(not_run(step, &format!("not run: {reason}")));
            continue;
        }
        let only: Vec<bool> = (0..sc.to_run.len()).map(|u| u == turn).collect();
        let one = StepContext {
            to_run: &only,
            ..*sc
        };
        let o = run_step(step, &one, bench, units, judge);
        outcome.set_aside = o.set_aside.or(outcome.set_aside);
        outcome.stop = o.stop;
    }
    outcome
}

/// Runs `plan` on `bench` and returns one record per position.
pub fn run(
    plan: &Plan,
    bench: &mut Bench,
    ctx: &RunContext,
    reporter: &mut dyn Reporter,
) -> Vec<UnitRecord> {
    run_with(plan, bench, ctx, reporter, &NoRecorder, None)
}

/// Runs `plan` on `bench`, handing every reading and record to `recorder` as it is taken, and
/// continuing from `resume` where an interrupted run left off: a step a unit finished is kept,
/// every other step is run again from its load and settling.
pub fn run_with(
    plan: &Plan,
    bench: &mut Bench,
    ctx: &RunContext,
    reporter: &mut dyn Reporter,
    recorder: &dyn Recorder,
    resume: Option<&Resume>,
) -> Vec<UnitRecord> {
    let resumed_at = resume.map(|_| now_iso());
    let started_at = resume.map_or_else(now_iso, |r| r.first_started_at.clone());
    // From here on the output is owned by a guard: whatever ends the run (its end, an error, a
    // panic in any sampling thread) switches the output off before the bench is left.
    let output = OutputGuard::new(bench.source.clone());
    let t_start = bench.clock.now_s();
    reporter.event(&Event::RunStarted {
        plan,
        positions: bench.positions.len(),
    });
    let (mut units, replaced) = identify_all(plan, bench, ctx, &started_at, resume);
    announce_units(&units, reporter, recorder);
    let ranges = bench.station.reference.ranges.clone();
    let judge = decide::Judge {
        rule: plan.decision,
        accuracy: bench
            .station
            .reference
            .accuracy
            .as_deref()
            .and_then(|a| crate::metrology::accuracy::Accuracy::parse(a).ok()),
        ranges: &ranges,
        calibration: plan.calibration.as_ref(),
        counter: bench.station.counter.clone(),
    };
    let mut source_failure: Option<String> = None;
    let mut recording_failure_said = false;
    for (index, step) in plan.steps.iter().enumerate() {
        if let Some(reason) = &source_failure {
            for u in units.iter_mut().filter(|u| u.active) {
                u.record
                    .steps
                    .push(not_run(step, &format!("not run: {reason}")));
            }
            continue;
        }
        let kept = kept_steps(&units, resume, index);
        let to_run: Vec<bool> = units
            .iter()
            .zip(&kept)
            .map(|(u, k)| u.active && k.is_none())
            .collect();
        for (u, k) in units.iter_mut().zip(&kept) {
            if let (true, Some(k)) = (u.active, k) {
                u.record.steps.push(k.clone());
            }
        }
        if !to_run.iter().any(|r| *r) {
            if let Some(cal) = &plan.calibration
                && cal.last_point(&plan.steps) == Some(index)
            {
                calibrate_units(cal, bench, &mut units);
            }
            continue;
        }
        for (u, run) in units.iter_mut().zip(&to_run) {
            if *run && resume.is_some() {
                u.repeated.push(step.id.clone());
            }
        }
        reporter.event(&Event::StepStarted {
            index,
            total: plan.steps.len(),
            step,
        });
        if bench.interrupt.load(std::sync::atomic::Ordering::SeqCst) {
            let reason = STOPPED.to_string();
            for (u, run) in units.iter_mut().zip(&to_run) {
                if *run {
                    u.record
                        .steps
                        .push(not_run(step, &format!("not run: {reason}")));
                }
            }
            source_failure = Some(reason);
            continue;
        }
        // No load for a count that nothing can take.
        if step.pulses.is_some() && bench.counter.is_none() {
            for (u, run) in units.iter_mut().zip(&to_run) {
                if *run {
                    u.record.steps.push(not_run(
                        step,
                        "not run: the step counts the units' test outputs and the station has no counter (add counter: to the station file)",
                    ));
                }
            }
            continue;
        }
        let restarts_before = restarts(bench);
        match apply_load(step, bench, &mut units, &to_run) {
            Applied::Yes => {}
            Applied::Skipped => continue,
            Applied::Failed(reason) => {
                source_failure = Some(reason);
                continue;
            }
        }
        let started_at_s = bench.clock.now_s();
        reporter.event(&Event::Measuring {
            step,
            real_s: if bench.clock.is_virtual() {
                0.0
            } else {
                step.scheduled_s() / bench.clock.scale()
            },
        });
        let settle = settle_step(step, bench, &to_run);
        let ctx_step = StepContext {
            settle,
            index,
            started_at_s,
            to_run: &to_run,
            attempts: resume.map(|r| &r.attempts),
            recorder,
            base_current: plan.ratings.base_current,
            restarts_before: &restarts_before,
        };
        let multiplexed = step.pulses.is_some()
            && bench
                .station
                .counter
                .as_ref()
                .is_some_and(|c| c.multiplexer);
        let outcome = if multiplexed {
            count_in_turn(step, &ctx_step, bench, &mut units, &judge)
        } else {
            run_step(step, &ctx_step, bench, &mut units, &judge)
        };
        if let Some(reason) = &outcome.set_aside {
            reporter.event(&Event::StepSetAside { step, reason });
        }
        if let Some(reason) = outcome.stop {
            source_failure = Some(reason);
        }
        if let Some(cal) = &plan.calibration
            && cal.last_point(&plan.steps) == Some(index)
        {
            calibrate_units(cal, bench, &mut units);
        }
        reporter.event(&Event::StepFinished {
            index,
            step,
            results: units
                .iter()
                .filter(|u| u.active)
                .filter_map(|u| {
                    let s = u.record.steps.last()?;
                    let failed = s
                        .checks
                        .iter()
                        .filter(|c| c.verdict == CheckVerdict::Fail)
                        .count();
                    Some((u.record.position, s.status, failed))
                })
                .collect(),
        });
        if !recording_failure_said && let Some(what) = recorder.failure() {
            recording_failure_said = true;
            reporter.event(&Event::RecordingFailed { what: &what });
            source_failure = Some(format!("{NOT_KEPT}: {what}"));
        }
    }
    // Leave the bench safe whatever happened; a failure to switch off is worth a line too.
    let off_failure = output.finish().err().map(|e| e.to_string());
    let bench_time_s = bench.clock.now_s() - t_start;
    let finished_at = now_iso();
    let health: Vec<Option<crate::link::LinkHealth>> =
        bench.positions.iter().map(|p| p.link.health()).collect();
    let ending = Ending {
        finished_at: &finished_at,
        bench_time_s,
        off_failure: off_failure.as_deref(),
        resumed_at: resumed_at.as_deref(),
    };
    let mut records = final_records(units, health, &ending);
    let replaced: Vec<UnitRecord> = replaced
        .into_iter()
        .map(|mut r| {
            r.finished_at = finished_at.clone();
            r.bench_time_s = bench_time_s;
            r
        })
        .collect();
    keep(&mut records, &replaced, recorder);
    records.extend(replaced);
    reporter.event(&Event::RunFinished {
        records: &records,
        bench_time_s,
    });
    records
}

/// The steps an interrupted run finished, kept as they were (none for a unit new to its
/// position).
fn kept_steps(units: &[Unit], resume: Option<&Resume>, index: usize) -> Vec<Option<StepRecord>> {
    units
        .iter()
        .map(|u| {
            resume
                .filter(|_| !u.fresh)
                .and_then(|r| r.done.get(&u.record.position))
                .and_then(|d| d.get(&index))
                .cloned()
        })
        .collect()
}

/// What became of a step's load.
enum Applied {
    Yes,
    /// The operator skipped the step (with a reason, in the units' records).
    Skipped,
    /// The source failed or the operator aborted: no further load is applied.
    Failed(String),
}

/// Applies the step's load; a skipped step or a failed source leaves every unit a step record
/// saying why.
fn apply_load(step: &Step, bench: &mut Bench, units: &mut [Unit], to_run: &[bool]) -> Applied {
    let Err(e) = bench.source.apply(&step.load) else {
        return Applied::Yes;
    };
    let reason = e.to_string();
    if let crate::bench::BenchError::Skipped(_) = e {
        for (u, run) in units.iter_mut().zip(to_run) {
            if *run {
                u.record.steps.push(not_run(step, &reason));
            }
        }
        return Applied::Skipped;
    }
    for u in units.iter_mut().filter(|u| u.active) {
        u.record.steps.push(not_run(step, &reason));
    }
    Applied::Failed(reason)
}

/// Waits for the load to settle: a fixed time, or until every position's readings are stable.
fn settle_step(step: &Step, bench: &mut Bench, to_run: &[bool]) -> Option<settle::SettleOutcome> {
    match &step.settle_until {
        Some(rule) => Some(settle::settle_until(
            rule,
            bench.clock.as_ref(),
            &mut bench.positions,
            to_run,
            bench.parallel,
            &bench.interrupt,
        )),
        None => {
            bench.clock.sleep_s(step.settle_s);
            None
        }
    }
}

/// How the run ended, for every record.
struct Ending<'a> {
    finished_at: &'a str,
    bench_time_s: f64,
    /// The output could not be switched off at the end.
    off_failure: Option<&'a str>,
    /// When a resumed run took up again.
    resumed_at: Option<&'a str>,
}

/// The last phase: each unit's verdict from its steps (a calibration not done leaves it
/// incomplete), with the link's health, the run's end and a resume's note.
fn final_records(
    units: Vec<Unit>,
    health: Vec<Option<crate::link::LinkHealth>>,
    ending: &Ending,
) -> Vec<UnitRecord> {
    units
        .into_iter()
        .zip(health)
        .map(|(mut u, health)| {
            u.record.link_health = health;
            u.record.finished_at = ending.finished_at.to_string();
            u.record.bench_time_s = ending.bench_time_s;
            if u.active {
                u.record.verdict = decide::unit_verdict(&u.record.steps);
                if let Some(c) = &u.record.calibration
                    && c.status == crate::record::CalibrationStatus::NotDone
                {
                    if u.record.verdict.status == UnitStatus::Accepted {
                        u.record.verdict.status = UnitStatus::Incomplete;
                    }
                    u.record.verdict.reasons.push(format!(
                        "calibration not done: {}",
                        c.reason.as_deref().unwrap_or("no reason given")
                    ));
                }
            }
            if let Some(e) = ending.off_failure {
                u.record.verdict.reasons.push(format!("after the run: {e}"));
            }
            if let Some(at) = ending.resumed_at {
                u.record.notes.push(format!(
                    "resumed at {at} after an interruption; steps run again: {}",
                    if u.repeated.is_empty() {
                        "none".to_string()
                    } else {
                        u.repeated.join(", ")
                    }
                ));
            }
            u.record
        })
        .collect()
}

/// Hands the records to the recorder (the units that left first: the newest record of a
/// position is the one that counts), and never shows accepted a unit whose record the archive
/// could not keep.
fn keep(records: &mut Vec<UnitRecord>, replaced: &[UnitRecord], recorder: &dyn Recorder) {
    if !replaced.is_empty() {
        recorder.units_finished(replaced);
    }
    // A unit whose record the archive could not keep is never shown accepted.
    let keep_failed = |records: &mut Vec<UnitRecord>, what: &str| {
        for r in records.iter_mut() {
            if r.verdict.status == UnitStatus::Accepted {
                r.verdict.status = UnitStatus::Incomplete;
                r.verdict
                    .reasons
                    .push(format!("{NOT_KEPT}: {what}; test the unit again"));
            }
        }
    };
    if let Some(what) = recorder.failure() {
        keep_failed(records, &what);
    }
    recorder.units_finished(records);
    if let Some(what) = recorder.failure() {
        keep_failed(records, &what);
    }
}

/// Owns the source's output for the length of a run: switches it off when dropped, so that an
/// early return or a panic (unwinding through the engine) never leaves the load on.
struct OutputGuard {
    source: crate::bench::SourceHandle,
    armed: bool,
}

impl OutputGuard {
    fn new(source: crate::bench::SourceHandle) -> OutputGuard {
        OutputGuard {
            source,
            armed: true,
        }
    }

    /// The run's ordinary end: switches off and says whether that worked.
    fn finish(mut self) -> Result<(), crate::bench::BenchError> {
        self.armed = false;
        self.source.off()
    }
}

impl Drop for OutputGuard {
    fn drop(&mut self) {
        if self.armed {
            let _ = self.source.off();
        }
    }
}

/// Why the run stopped before its end (a stop signal, or the operator's abort), if it did: such
/// a run can be resumed. Read from the records, where the engine wrote it.
pub fn stopped_early(records: &[UnitRecord]) -> Option<String> {
    records
        .iter()
        .flat_map(|r| &r.steps)
        .filter_map(|s| s.reason.as_deref())
        .map(|r| r.strip_prefix("not run: ").unwrap_or(r))
        .find(|r| r.starts_with(STOPPED) || r.starts_with("aborted"))
        .map(str::to_string)
}

/// The reason given when the archive cannot keep what is measured.
pub const NOT_KEPT: &str = "the archive could not keep the records";

/// The reason given to steps a stop signal cut short or kept from running.
pub const STOPPED: &str = "interrupted (stop signal)";

fn now_iso() -> String {
    chrono::Local::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, false)
}

/// The resolution of a reading after the unit's constants were written: a calibrated
/// quantity is whole counts of the front end divided by the gain written to the unit, so one
/// count is 1/gain; it replaces the resolution the link states for the nominal front end (a
/// finer display resolution, as a firmware printing six decimals, is then below one count).
fn calibrated_resolution(
    stated: Option<f64>,
    calibration: Option<&crate::record::CalibrationRecord>,
    check: &crate::plan::Check,
) -> Option<f64> {
    let written_gain = calibration
        .filter(|c| c.quantity == check.quantity && c.channel == check.channel)
        .filter(|c| c.status == crate::record::CalibrationStatus::Written)
        .and_then(|c| c.written)
        .map(|(_, gain)| gain)
        .filter(|g| *g != 0.0 && g.is_finite());
    match written_gain {
        None => stated,
        Some(g) => Some(1.0 / g.abs()),
    }
}

/// Calibrates every unit still under test; a unit whose constants did not take is tested no
/// further.
fn calibrate_units(cal: &CalibrationSpec, bench: &mut Bench, units: &mut [Unit]) {
    for (unit, position) in units.iter_mut().zip(bench.positions.iter_mut()) {
        if !unit.active {
            continue;
        }
        let record = calibrate::calibrate_unit(cal, &unit.record.steps, position.link.as_mut());
        if matches!(
            record.status,
            crate::record::CalibrationStatus::Mismatch
                | crate::record::CalibrationStatus::OutsideLimits
        ) {
            unit.active = false;
            unit.record.verdict = UnitVerdict {
                status: UnitStatus::Rejected,
                reasons: vec![format!(
                    "calibration: {}: the unit was not tested further",
                    record
                        .reason
                        .as_deref()
                        .unwrap_or("the constants did not take")
                )],
            };
        }
        // A unit that could not be calibrated is not verified with constants nobody fitted:
        // whatever its verification steps showed would say nothing of the product. It is
        // INCOMPLETE (or REJECTED where a check before calibration already failed).
        if record.status == crate::record::CalibrationStatus::NotDone && unit.active {
            unit.active = false;
            let mut verdict = decide::unit_verdict(&unit.record.steps);
            if verdict.status == UnitStatus::Accepted {
                verdict.status = UnitStatus::Incomplete;
            }
            verdict.reasons.push(format!(
                "calibration not done: {}: the unit was not tested further",
                record.reason.as_deref().unwrap_or("no reason given")
            ));
            unit.record.verdict = verdict;
        }
        unit.record.calibration = Some(record);
    }
}
