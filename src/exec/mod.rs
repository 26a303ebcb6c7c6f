//! The step engine: applies each load, waits, samples every position, takes the reference and
//! decides.
//!
//! The engine knows nothing of terminals or files: it tells a [`Reporter`] what happens, as
//! events, and hands back one [`UnitRecord`] per position. A fault on one position's link marks
//! that unit's step incomplete and keeps every reading already taken; the other positions carry
//! on.

mod calibrate;
mod decide;
pub mod preview;

pub use decide::failure_text;
mod sampling;
mod settle;
pub mod trust;

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
        let outcome = run_step(step, &ctx_step, bench, &mut units, &judge);
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

/// Phase one: every position identified (model, serial, firmware), units sharing a serial
/// refused, and on a resume a unit found where the interrupted run had another taken for a
/// new unit (tested from the first step; the one it replaced keeps its own record, returned
/// beside).
fn identify_all(
    plan: &Plan,
    bench: &mut Bench,
    ctx: &RunContext,
    started_at: &str,
    resume: Option<&Resume>,
) -> (Vec<Unit>, Vec<UnitRecord>) {
    let mut units: Vec<Unit> = bench
        .positions
        .iter_mut()
        .map(|p| identify(plan, p, ctx, &bench.station, started_at))
        .collect();
    refuse_shared_serials(&mut units);
    let mut replaced: Vec<UnitRecord> = Vec::new();
    if let Some(r) = resume {
        for u in units.iter_mut().filter(|u| u.active) {
            let position = u.record.position;
            match r.serials.get(&position) {
                Some(old) if *old != u.record.serial => {
                    u.fresh = true;
                    u.record.notes.push(format!(
                        "this unit replaced {old} in position {position} while the run was interrupted; {old} keeps its own record"
                    ));
                    if !r.sealed.contains(&position) {
                        replaced.push(replaced_record(&u.record, old, r, plan));
                    }
                }
                _ => {}
            }
        }
    }
    (units, replaced)
}

/// Tells the recorder and the front end which units are under test and which were refused.
fn announce_units(units: &[Unit], reporter: &mut dyn Reporter, recorder: &dyn Recorder) {
    for u in units {
        recorder.unit_started(&u.record);
        match (&u.record.identity, u.active) {
            (Some(identity), true) => reporter.event(&Event::UnitIdentified {
                position: u.record.position,
                identity,
            }),
            _ => reporter.event(&Event::UnitRefused {
                position: u.record.position,
                reason: u.record.verdict.reasons.first().map_or("", String::as_str),
            }),
        }
    }
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

/// Reads a position's identity and decides whether the unit may be tested.
fn identify(
    plan: &Plan,
    position: &mut Position,
    ctx: &RunContext,
    station: &crate::bench::StationInfo,
    started_at: &str,
) -> Unit {
    let identity = position.link.identify();
    let (identity, refusal) = match identity {
        Ok(id) => match hostile_identity(&id) {
            Some((safe, reason)) => (Some(safe), Some((UnitStatus::Incomplete, reason))),
            None => {
                let refusal = refusal_reason(plan, position, &id);
                (Some(id), refusal)
            }
        },
        Err(e) => (
            None,
            Some((
                UnitStatus::Incomplete,
                format!("could not identify the unit: {e}"),
            )),
        ),
    };
    let serial = identity
        .as_ref()
        .map(|i| i.serial.clone())
        .or_else(|| position.expected_serial.clone())
        .unwrap_or_else(|| format!("position-{}-unidentified", position.number));
    let (status, reasons, active) = match refusal {
        Some((status, reason)) => (status, vec![reason], false),
        None => (UnitStatus::Incomplete, Vec::new(), true),
    };
    Unit {
        repeated: Vec::new(),
        fresh: false,
        record: UnitRecord {
            format: RECORD_FORMAT.into(),
            tool_version: ctx.tool_version.clone(),
            run_id: ctx.run_id.clone(),
            position: position.number,
            serial,
            identity,
            plan: PlanRef {
                id: plan.id.clone(),
                revision: plan.revision.clone(),
                title: plan.title.clone(),
                file: plan.source.file.clone(),
                sha256: plan.source.sha256.clone(),
                model: plan.product.model.clone(),
                class: plan.ratings.class.clone(),
                decision: plan.decision,
            },
            lot: ctx.lot.clone(),
            operator: ctx.operator.clone(),
            station: station.clone(),
            link: position.link.describe(),
            link_health: None,
            started_at: started_at.to_string(),
            finished_at: String::new(),
            bench_time_s: 0.0,
            verdict: UnitVerdict { status, reasons },
            notes: ctx.notes.clone(),
            calibration: None,
            steps: Vec::new(),
        },
        active,
    }
}

/// An identity with control characters (escape sequences, NUL, line breaks) in it: such text
/// would reach terminals, reports and file names. Returns the identity with those characters
/// escaped (what the record keeps) and the reason the unit is refused.
fn hostile_identity(id: &Identity) -> Option<(Identity, String)> {
    let bad = |t: &str| t.chars().any(char::is_control);
    if !(bad(&id.model) || bad(&id.serial) || bad(&id.firmware)) {
        return None;
    }
    let escape = crate::record::escape_controls;
    let safe = Identity {
        model: escape(&id.model),
        serial: escape(&id.serial),
        firmware: escape(&id.firmware),
    };
    let reason = format!(
        "the unit's identity contains control characters (model \"{}\", serial \"{}\", firmware \"{}\"): refused; check its programming",
        safe.model, safe.serial, safe.firmware
    );
    Some((safe, reason))
}

/// Two positions that report one serial are both stopped before any load: one of them is
/// wrongly programmed (or both), and their records would be mistaken for each other's.
fn refuse_shared_serials(units: &mut [Unit]) {
    let serials: Vec<Option<String>> = units
        .iter()
        .map(|u| {
            u.active
                .then(|| u.record.identity.as_ref().map(|i| i.serial.clone()))
                .flatten()
        })
        .collect();
    for (i, u) in units.iter_mut().enumerate() {
        let Some(serial) = &serials[i] else { continue };
        let others: Vec<String> = serials
            .iter()
            .enumerate()
            .filter(|(j, s)| *j != i && s.as_ref() == Some(serial))
            .map(|(j, _)| (j + 1).to_string())
            .collect();
        if !others.is_empty() {
            u.active = false;
            u.record.verdict = UnitVerdict {
                status: UnitStatus::Incomplete,
                reasons: vec![format!(
                    "serial {serial} is reported by position{} {} too: two units cannot share a serial, so neither was tested; check their programming",
                    if others.len() > 1 { "s" } else { "" },
                    others.join(", ")
                )],
            };
        }
    }
}

/// The record of a unit that was taken out of its position while the run was interrupted,
/// made from the steps it had finished (it has no sealed record of its own).
fn replaced_record(new: &UnitRecord, old_serial: &str, resume: &Resume, plan: &Plan) -> UnitRecord {
    let mut r = new.clone();
    r.serial = old_serial.to_string();
    r.identity = None;
    r.notes = vec![format!(
        "this unit was taken out of position {} while the run was interrupted, before it finished; unit {} took its place",
        new.position, new.serial
    )];
    let done = resume.done.get(&new.position);
    r.steps = plan
        .steps
        .iter()
        .enumerate()
        .map(|(i, step)| {
            done.and_then(|d| d.get(&i)).cloned().unwrap_or_else(|| {
                not_run(
                    step,
                    "not run: the unit was replaced during the interruption",
                )
            })
        })
        .collect();
    let mut verdict = decide::unit_verdict(&r.steps);
    if verdict.status == UnitStatus::Accepted && plan.calibration.is_some() {
        verdict.status = UnitStatus::Incomplete;
        verdict
            .reasons
            .push("its calibration was not recorded before it was replaced".into());
    }
    r.verdict = verdict;
    r
}

/// Why a unit that answered must not be tested, if it must not.
fn refusal_reason(plan: &Plan, position: &Position, id: &Identity) -> Option<(UnitStatus, String)> {
    if let Some(expected) = &position.expected_serial
        && expected != &id.serial
    {
        return Some((
            UnitStatus::Incomplete,
            format!(
                "position {} was given serial {expected}, but the unit reports {}: check the unit is in the right position",
                position.number, id.serial
            ),
        ));
    }
    if id.model != plan.product.model {
        return Some((
            UnitStatus::Rejected,
            format!(
                "the unit reports model {}, but the plan tests {}",
                id.model, plan.product.model
            ),
        ));
    }
    if !plan.product.firmware.is_match(&id.firmware) {
        return Some((
            UnitStatus::Rejected,
            format!(
                "firmware {} does not match the plan's pattern {}",
                id.firmware, plan.product.firmware_pattern
            ),
        ));
    }
    None
}

fn not_run(step: &Step, reason: &str) -> StepRecord {
    let mut record = empty_step(step, None);
    record.status = StepStatus::NotRun;
    record.reason = Some(reason.to_string());
    record
}

fn empty_step(step: &Step, started_at_s: Option<f64>) -> StepRecord {
    StepRecord {
        id: step.id.clone(),
        description: step.description.clone(),
        load: step.load,
        settle_s: step.settle_s,
        samples_planned: step.samples,
        interval_s: step.interval_s,
        started_at_s,
        status: StepStatus::Done,
        reason: None,
        settle_actual_s: None,
        settled: None,
        sampling_note: None,
        attempt: 1,
        calibration_point: None,
        references: Vec::new(),
        checks: step
            .checks
            .iter()
            .map(|c| CheckRecord {
                quantity: c.quantity,
                channel: c.channel.clone(),
                unit: c.quantity.unit().to_string(),
                tolerance: c.tolerance.clone(),
                samples: Vec::new(),
                summary: None,
                measured: None,
                reference: None,
                evaluation: None,
                uncertainty: None,
                decision: None,
                verdict: CheckVerdict::NotEvaluated,
                note: None,
            })
            .collect(),
    }
}

/// The distinct readings a step takes from each unit: its checks' (quantity, channel) pairs in
/// check order, then the raw counts of a calibration point.
fn readings_of(step: &Step, calibration: Option<&CalibrationSpec>) -> Vec<sampling::Wanted> {
    let mut out: Vec<sampling::Wanted> = Vec::new();
    for c in &step.checks {
        let w = sampling::Wanted {
            quantity: c.quantity,
            channel: c.channel.clone(),
            raw: false,
        };
        if !out.contains(&w) {
            out.push(w);
        }
    }
    if let Some(cal) = calibration.filter(|c| c.points.contains(&step.id)) {
        out.push(sampling::Wanted {
            quantity: cal.quantity,
            channel: cal.channel.clone(),
            raw: true,
        });
    }
    out
}

/// Samples every active unit, takes the reference readings and evaluates the checks.
fn run_step(
    step: &Step,
    sc: &StepContext,
    bench: &mut Bench,
    units: &mut [Unit],
    judge: &decide::Judge,
) -> StepOutcome {
    let attempt_of = |position: usize| {
        sc.attempts
            .and_then(|a| a.get(&(position, sc.index)))
            .copied()
            .unwrap_or(0)
            + 1
    };
    let calibration = judge.calibration.filter(|c| c.points.contains(&step.id));
    let wanted = readings_of(step, calibration);
    let numbers: Vec<usize> = bench.positions.iter().map(|p| p.number).collect();
    let resolutions: Vec<Vec<Option<f64>>> = bench
        .positions
        .iter()
        .zip(units.iter())
        .map(|(p, u)| {
            step.checks
                .iter()
                .map(|c| {
                    calibrated_resolution(
                        p.link.resolution(c.quantity),
                        u.record.calibration.as_ref(),
                        c,
                    )
                })
                .collect()
        })
        .collect();
    let blank = empty_step(step, None);
    let slots: Vec<sampling::Slot> = bench
        .positions
        .iter_mut()
        .zip(sc.to_run)
        .map(|(p, run)| run.then_some(&mut p.link))
        .collect();
    let on_reading = |slot: usize, w: usize, sample: Sample| {
        let want = &wanted[w];
        let key = ReadingKey {
            position: numbers[slot],
            step_index: sc.index,
            attempt: attempt_of(numbers[slot]),
            quantity: want.quantity,
            channel: want.channel.clone(),
            raw: want.raw,
        };
        sc.recorder.reading(&key, sample);
    };
    // An energy the reference infers from power stands on its power at both ends of the window.
    let energy_window = step
        .checks
        .iter()
        .any(|c| c.quantity.is_register() && c.tolerance.needs_reference());
    let start_problem = if energy_window {
        bench
            .reference
            .window_starts(bench.clock.now_s())
            .err()
            .map(|e| e.to_string())
    } else {
        None
    };
    let interrupt = bench.interrupt.clone();
    let sampler = sampling::Sampler {
        step,
        wanted: &wanted,
        clock: bench.clock.as_ref(),
        on_reading: &on_reading,
        interrupt: &interrupt,
    };
    // Sampling until decided reads the references once the minimum is taken (over the window so
    // far, which a register's reference is then scaled from), and stops as soon as no decision
    // of any unit can change any more.
    let mut early_references: Option<(References, (f64, f64))> = None;
    let reference = &mut bench.reference;
    let mut stop_rule = |n: u32, all: &[sampling::Series], window: (f64, f64)| -> bool {
        let Some(rule) = step.sequential else {
            return false;
        };
        if n < rule.min {
            return false;
        }
        // An instrument is read over the window sampled so far each time; a person once, at
        // the minimum (a register's reference is then scaled to the span, with a budget term).
        if reference.reads_again_freely() {
            early_references = Some((
                take_references(step, calibration, reference.as_mut(), window),
                window,
            ));
        }
        let (refs, reference_window) = early_references.get_or_insert_with(|| {
            (
                take_references(step, calibration, reference.as_mut(), window),
                window,
            )
        });
        let partial = decide::Partial {
            step,
            blank: &blank,
            wanted: &wanted,
            references: refs,
            reference_window: *reference_window,
            resolutions: &resolutions,
        };
        partial.all_settled(all, n, judge)
    };
    let stop: Option<sampling::StopRule> = if step.sequential.is_some() {
        Some(&mut stop_rule)
    } else {
        None
    };
    let (mut series, window) = sampling::sample_step(sampler, slots, bench.parallel, stop);
    // A step sampled until decided is evaluated on the samples it took.
    let mut evaluated_step = step.clone();
    if step.sequential.is_some() {
        evaluated_step.samples = series
            .iter()
            .map(|s| s.samples.first().map_or(0, Vec::len))
            .max()
            .unwrap_or(0) as u32;
    }
    let restarted = restarted_during(bench, sc);
    // A stop signal after the last sample: the output is already off, so no reference may be
    // read for this step and none of its samples decide anything.
    let stopped = bench.interrupt.load(std::sync::atomic::Ordering::SeqCst);
    if stopped {
        for (s, run) in series.iter_mut().zip(sc.to_run) {
            if *run && s.fault.is_none() {
                s.fault = Some(format!("{STOPPED} before the reference was read"));
            }
        }
    }
    let (references, reference_window) = match early_references.take() {
        // Sampled on past the early references: an instrument (or a file) is read again over
        // the window finally sampled, rather than scaling a register's reference up to it.
        Some((_, early)) if early != window && bench.reference.reads_again_freely() => (
            take_references(step, calibration, bench.reference.as_mut(), window),
            window,
        ),
        Some(taken) => taken,
        None if stopped => (Vec::new(), window),
        None => (
            take_references(step, calibration, bench.reference.as_mut(), window),
            window,
        ),
    };
    // The load as the reference saw it, before anybody is judged on it.
    let (load_references, load_problem) = if stopped {
        (Vec::new(), None)
    } else {
        trust::confirm_load(
            step,
            bench.reference.as_mut(),
            &references,
            reference_window,
            sc.base_current,
        )
    };
    let taken = Taken {
        wanted: &wanted,
        evaluated_step: &evaluated_step,
        references: &references,
        reference_window,
        load_references: &load_references,
        load_problem: load_problem.as_deref(),
        resolutions: &resolutions,
        calibration,
        start_problem: start_problem.as_deref(),
    };
    for (u, unit) in units.iter_mut().enumerate() {
        if !sc.to_run[u] {
            continue;
        }
        let attempt = attempt_of(unit.record.position);
        let record = unit_step_record(
            step,
            sc,
            &taken,
            (u, attempt),
            &mut series[u],
            restarted[u].as_deref(),
            judge,
        );
        unit.record.steps.push(record);
    }
    let set_aside = load_problem
        .clone()
        .or_else(|| suspect_reference(units, sc));
    // One write for the whole step: a single commit for all positions.
    let finished: Vec<(usize, &StepRecord)> = units
        .iter()
        .zip(sc.to_run)
        .filter(|(_, run)| **run)
        .filter_map(|(u, _)| Some((u.record.position, u.record.steps.last()?)))
        .collect();
    sc.recorder.step_finished(sc.index, &finished);
    StepOutcome {
        stop: stop_reason(&references, bench),
        set_aside,
    }
}

/// What a step took beyond each unit's own series: the readings wanted, the references and
/// the window they stand for, the load as the reference saw it, each unit's resolutions.
struct Taken<'a> {
    wanted: &'a [sampling::Wanted],
    /// The step as evaluated (a step sampled until decided, with the samples it took).
    evaluated_step: &'a Step,
    references: &'a References,
    reference_window: (f64, f64),
    load_references: &'a [ReferenceRecord],
    load_problem: Option<&'a str>,
    resolutions: &'a [Vec<Option<f64>>],
    calibration: Option<&'a CalibrationSpec>,
    start_problem: Option<&'a str>,
}

/// One unit's record of a step: its samples, every check evaluated, a calibration point's
/// counts, and the step set aside where the load or the unit's restart says so.
fn unit_step_record(
    step: &Step,
    sc: &StepContext,
    taken: &Taken,
    (u, attempt): (usize, u32),
    series: &mut sampling::Series,
    restarted: Option<&str>,
    judge: &decide::Judge,
) -> StepRecord {
    let Taken {
        wanted,
        evaluated_step,
        references,
        reference_window,
        load_references,
        load_problem,
        resolutions,
        calibration,
        start_problem,
    } = *taken;
    let mut record = empty_step(step, Some(sc.started_at_s));
    record.attempt = attempt;
    if let Some(s) = sc.settle {
        record.settle_actual_s = Some(s.actual_s);
        record.settled = Some(s.settled);
    }
    if let Some(why) = start_problem {
        record.sampling_note = Some(format!(
            "the reference's power at the window's start could not be read ({why})"
        ));
    }
    if let Some(rule) = step.sequential {
        let n = series.samples.first().map_or(0, |s| s.len());
        record.sampling_note = Some(format!(
            "sampled until decided: {n} samples (at least {}, at most {})",
            rule.min, rule.max
        ));
    }
    record.references = references
        .iter()
        .filter_map(|(q, r)| {
            r.as_ref().ok().map(|reading| ReferenceRecord {
                quantity: *q,
                reading: reading.clone(),
            })
        })
        .collect();
    for (i, (check, check_record)) in step.checks.iter().zip(record.checks.iter_mut()).enumerate() {
        let w = wanted
            .iter()
            .position(|w| !w.raw && w.quantity == check.quantity && w.channel == check.channel)
            .expect("every check's reading is wanted");
        check_record.samples = series.samples.get(w).cloned().unwrap_or_default();
        let reference = references
            .iter()
            .find(|(q, _)| *q == check.quantity)
            .map(|(_, r)| r.clone());
        let input = decide::CheckInputs {
            check,
            step: evaluated_step,
            reference,
            window: reference_window,
            resolution: resolutions[u][i],
        };
        decide::evaluate_check(input, check_record, judge);
    }
    if let Some(cal) = calibration {
        let w = wanted
            .iter()
            .position(|w| w.raw)
            .expect("a raw reading is wanted");
        let samples = series.samples.get(w).cloned().unwrap_or_default();
        let counts: Vec<f64> = samples.iter().map(|s| s.value).collect();
        record.calibration_point = Some(CalibrationPoint {
            quantity: cal.quantity,
            channel: cal.channel.clone(),
            mean_counts: (counts.len() == step.samples as usize)
                .then(|| crate::metrology::Summary::of(&counts).map(|s| s.mean))
                .flatten(),
            samples,
            reference: references
                .iter()
                .find(|(q, _)| *q == cal.quantity)
                .and_then(|(_, r)| r.as_ref().ok().map(|r| r.value)),
        });
    }
    let missing_reference: Vec<String> = references
        .iter()
        .filter_map(|(q, r)| r.as_ref().err().map(|e| format!("{}: {e}", q.name())))
        .collect();
    record.references.extend(load_references.iter().cloned());
    if let Some(fault) = series.fault.take() {
        record.status = StepStatus::Incomplete;
        record.reason = Some(fault);
    } else if !missing_reference.is_empty() {
        record.status = StepStatus::Incomplete;
        record.reason = Some(format!(
            "no reference reading for {}",
            missing_reference.join("; ")
        ));
    }
    if let Some(problem) = load_problem {
        trust::set_aside(&mut record, problem);
    } else if let Some(why) = restarted {
        trust::set_aside(&mut record, why);
    }
    record
}

/// A unit that restarted while under this load: what it read before may be from another life
/// (registers reset, constants reloaded), so none of this step's readings count.
fn restarted_during(bench: &Bench, sc: &StepContext) -> Vec<Option<String>> {
    restarts(bench)
        .into_iter()
        .enumerate()
        .map(|(u, now)| {
            let before = sc.restarts_before.get(u).copied().unwrap_or(0);
            (sc.to_run[u] && now > before).then(|| {
                format!(
                    "the unit restarted during the step ({} restart line{} seen): its readings of this step are not used",
                    now - before,
                    if now - before > 1 { "s" } else { "" }
                )
            })
        })
        .collect()
}

/// Every unit failing by the same error points at the reference, not the units: the step is
/// set aside for all of them.
fn suspect_reference(units: &mut [Unit], sc: &StepContext) -> Option<String> {
    let done: Vec<&StepRecord> = units
        .iter()
        .zip(sc.to_run)
        .filter(|(_, run)| **run)
        .filter_map(|(u, _)| u.record.steps.last())
        .filter(|r| r.status == StepStatus::Done)
        .collect();
    let reason = trust::suspect_reference(&done)?;
    for (u, _) in units.iter_mut().zip(sc.to_run).filter(|(_, run)| **run) {
        if let Some(r) = u.record.steps.last_mut()
            && r.status == StepStatus::Done
        {
            trust::set_aside(r, &reason);
        }
    }
    Some(reason)
}

/// An operator who aborted at a reference prompt, or a stop signal, ends the run here.
fn stop_reason(references: &References, bench: &Bench) -> Option<String> {
    let aborted = references.iter().find_map(|(_, r)| {
        r.as_ref()
            .err()
            .filter(|e| e.starts_with("aborted"))
            .cloned()
    });
    aborted.or_else(|| {
        bench
            .interrupt
            .load(std::sync::atomic::Ordering::SeqCst)
            .then(|| STOPPED.to_string())
    })
}

type ReferenceResult = Result<crate::bench::ReferenceReading, String>;
/// A step's reference readings, one per quantity.
type References = Vec<(Quantity, ReferenceResult)>;

/// One reference reading per quantity the step checks against a reference.
fn take_references(
    step: &Step,
    calibration: Option<&CalibrationSpec>,
    reference: &mut dyn crate::bench::ReferenceMeter,
    window: (f64, f64),
) -> References {
    let mut quantities: Vec<Quantity> = step
        .checks
        .iter()
        .filter(|c| c.tolerance.needs_reference())
        .map(|c| c.quantity)
        .collect();
    quantities.extend(calibration.map(|c| c.quantity));
    let mut out: Vec<(Quantity, ReferenceResult)> = Vec::new();
    for quantity in quantities {
        if out.iter().any(|(q, _)| *q == quantity) {
            continue;
        }
        let request = ReferenceRequest {
            step_id: &step.id,
            quantity,
            load: &step.load,
            window,
        };
        let reading = reference
            .read(&request)
            .map(|mut r| {
                r.window_s = Some(window);
                r
            })
            .map_err(|e| e.to_string());
        out.push((quantity, reading));
    }
    out
}
