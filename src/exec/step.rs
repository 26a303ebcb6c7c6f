//! One step under load, for every position at once: the readings wanted, the samples taken
//! (until decided, where the plan says so), the references read over the window, the load
//! confirmed, each unit's checks evaluated and its step record written, and the step set aside
//! where the load, a restart or the reference cannot be trusted.

use super::*;
use crate::bench::counter::CounterMode;

pub(super) fn not_run(step: &Step, reason: &str) -> StepRecord {
    let mut record = empty_step(step, None);
    record.status = StepStatus::NotRun;
    record.reason = Some(reason.to_string());
    record
}

pub(super) fn empty_step(step: &Step, started_at_s: Option<f64>) -> StepRecord {
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
                pulses: None,
            })
            .collect(),
    }
}

/// The distinct readings a step takes from each unit: its checks' (quantity, channel) pairs in
/// check order, then the raw counts of a calibration point.
pub(super) fn readings_of(
    step: &Step,
    calibration: Option<&CalibrationSpec>,
) -> Vec<sampling::Wanted> {
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
    // The counter's readings last: the link's come first, and the first series counts the
    // samples a step that stopped early took.
    out.sort_by_key(|w| w.channel == crate::plan::TEST_OUTPUT);
    if let Some(cal) = calibration.filter(|c| c.points.contains(&step.id)) {
        out.push(sampling::Wanted {
            quantity: cal.quantity,
            channel: cal.channel.clone(),
            raw: true,
        });
    }
    out
}

/// Samples every active unit, takes the reference readings and evaluates the checks: the
/// phases of a step under load, each a function below.
pub(super) fn run_step(
    step: &Step,
    sc: &StepContext,
    bench: &mut Bench,
    units: &mut [Unit],
    judge: &decide::Judge,
) -> StepOutcome {
    let calibration = judge.calibration.filter(|c| c.points.contains(&step.id));
    let wanted = readings_of(step, calibration);
    let resolutions = resolutions_of(step, bench, units);
    let start_problem = open_energy_window(step, bench);
    let counter_problem = start_counter(step, sc, bench);
    let plan = SamplePlan {
        step,
        calibration,
        wanted: &wanted,
        resolutions: &resolutions,
        judge,
    };
    let Sampled {
        mut series,
        window,
        early,
    } = sample(&plan, sc, bench);
    if let Some(counter) = bench.counter.as_ref().filter(|_| step.pulses.is_some()) {
        // Nothing taken depends on it: a counter that does not stop is stopped again at the
        // next start.
        let _ = counter.stop();
    }
    if let Some(problem) = counter_problem {
        for (s, run) in series.iter_mut().zip(sc.to_run) {
            if *run && s.fault.is_none() {
                s.fault = Some(format!("counting the test output: {problem}"));
            }
        }
    }
    let evaluated_step = as_sampled(step, &series);
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
    let (references, reference_window) = final_references(&plan, bench, early, window, stopped);
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
        let attempt = attempt_of(sc, unit.record.position);
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
    commit_step(sc, units);
    StepOutcome {
        stop: stop_reason(&references, bench),
        set_aside,
    }
}

/// The attempt number a position's records of this step get: one past the highest that left
/// readings or a record before (after a resume), else 1.
fn attempt_of(sc: &StepContext, position: usize) -> u32 {
    sc.attempts
        .and_then(|a| a.get(&(position, sc.index)))
        .copied()
        .unwrap_or(0)
        + 1
}

/// Each position's resolution of each check's reading (after calibration, where the unit was
/// calibrated), for the budget.
fn resolutions_of(step: &Step, bench: &Bench, units: &[Unit]) -> Vec<Vec<Option<f64>>> {
    bench
        .positions
        .iter()
        .zip(units.iter())
        .map(|(p, u)| {
            step.checks
                .iter()
                .map(|c| {
                    // A count of pulses has its own quantisation, not the link's resolution.
                    if c.counts_pulses() {
                        return None;
                    }
                    calibrated_resolution(
                        p.link.resolution(c.quantity),
                        u.record.calibration.as_ref(),
                        c,
                    )
                })
                .collect()
        })
        .collect()
}

/// Opens the reference's energy window where a check compares an energy register with a
/// reference that infers energy from power (it stands on its power at both ends of the
/// window). What went wrong, if anything.
fn open_energy_window(step: &Step, bench: &mut Bench) -> Option<String> {
    let energy_window = step
        .checks
        .iter()
        .any(|c| c.quantity.is_register() && c.tolerance.needs_reference());
    if !energy_window {
        return None;
    }
    bench
        .reference
        .window_starts(bench.clock.now_s())
        .err()
        .map(|e| e.to_string())
}

/// Starts the counter on every position sampled at a step that counts the test output, just
/// before the first sample: totalizing for a gate, or timing the plan's number of pulses. What
/// went wrong, if anything.
fn start_counter(step: &Step, sc: &StepContext, bench: &mut Bench) -> Option<String> {
    let spec = step.pulses.as_ref()?;
    let Some(counter) = bench.counter.as_ref() else {
        return Some("the station has no counter for the units' test outputs".into());
    };
    let positions: Vec<usize> = bench
        .positions
        .iter()
        .zip(sc.to_run)
        .filter(|(_, run)| **run)
        .map(|(p, _)| p.number)
        .collect();
    let mode = match spec.method {
        crate::plan::PulseMethod::FixedTime { .. } => CounterMode::Totalize,
        crate::plan::PulseMethod::FixedPulses { count, .. } => {
            CounterMode::TimePulses { pulses: count }
        }
    };
    counter.start(&positions, mode).err().map(|e| e.to_string())
}

/// What a step samples and how it is judged, for the sampling and reference phases.
struct SamplePlan<'a> {
    step: &'a Step,
    calibration: Option<&'a CalibrationSpec>,
    wanted: &'a [sampling::Wanted],
    resolutions: &'a [Vec<Option<f64>>],
    judge: &'a decide::Judge<'a>,
}

/// What sampling gave: each position's series, the window sampled, and the references read
/// early (by a step sampled until decided) with the window they stand for.
struct Sampled {
    series: Vec<sampling::Series>,
    window: (f64, f64),
    early: Option<(References, (f64, f64))>,
}

/// Samples every active position, handing each reading to the recorder as it is taken. A step
/// sampled until decided reads the references once the minimum is taken (over the window so
/// far, which a register's reference is then scaled from), and stops as soon as no decision of
/// any unit can change any more.
fn sample(plan: &SamplePlan, sc: &StepContext, bench: &mut Bench) -> Sampled {
    let step = plan.step;
    let numbers: Vec<usize> = bench.positions.iter().map(|p| p.number).collect();
    let blank = empty_step(step, None);
    let slots: Vec<sampling::Slot> = bench
        .positions
        .iter_mut()
        .zip(sc.to_run)
        .map(|(p, run)| run.then_some(&mut p.link))
        .collect();
    let on_reading = |slot: usize, w: usize, sample: Sample| {
        let want = &plan.wanted[w];
        let key = ReadingKey {
            position: numbers[slot],
            step_index: sc.index,
            attempt: attempt_of(sc, numbers[slot]),
            quantity: want.quantity,
            channel: want.channel.clone(),
            raw: want.raw,
        };
        sc.recorder.reading(&key, sample);
    };
    let interrupt = bench.interrupt.clone();
    let sampler = sampling::Sampler {
        step,
        wanted: plan.wanted,
        clock: bench.clock.as_ref(),
        on_reading: &on_reading,
        interrupt: &interrupt,
        counter: bench.counter.as_ref(),
        numbers: &numbers,
    };
    // Timing a number of pulses ends once every unit has sent them.
    let counting = step.times_pulses();
    let mut early: Option<(References, (f64, f64))> = None;
    let reference = &mut bench.reference;
    let mut stop_rule = |n: u32, all: &[sampling::Series], window: (f64, f64)| -> bool {
        if counting {
            return all.iter().all(|s| {
                s.samples.is_empty()
                    || s.fault.is_some()
                    || sampling::count_complete(step, plan.wanted, s)
            });
        }
        let Some(rule) = step.sequential else {
            return false;
        };
        if n < rule.min {
            return false;
        }
        // An instrument is read over the window sampled so far each time; a person once, at
        // the minimum (a register's reference is then scaled to the span, with a budget term).
        if early.is_none() || reference.reads_again_freely() {
            early = Some((
                take_references(step, plan.calibration, reference.as_mut(), window),
                window,
            ));
        }
        let (refs, reference_window) = early.as_ref().expect("just taken");
        let partial = decide::Partial {
            step,
            blank: &blank,
            wanted: plan.wanted,
            references: refs,
            reference_window: *reference_window,
            resolutions: plan.resolutions,
        };
        partial.all_settled(all, n, plan.judge)
    };
    let stop: Option<sampling::StopRule> = if step.sequential.is_some() || counting {
        Some(&mut stop_rule)
    } else {
        None
    };
    let (series, window) = sampling::sample_step(sampler, slots, bench.parallel, stop);
    Sampled {
        series,
        window,
        early,
    }
}

/// The step as it was sampled: a step sampled until decided is evaluated on the samples it
/// took.
fn as_sampled(step: &Step, series: &[sampling::Series]) -> Step {
    let mut evaluated = step.clone();
    if step.sequential.is_some() || step.times_pulses() {
        evaluated.samples = series
            .iter()
            .map(|s| s.samples.first().map_or(0, Vec::len))
            .max()
            .unwrap_or(0) as u32;
    }
    evaluated
}

/// The references the step is judged against, and the window they stand for.
fn final_references(
    plan: &SamplePlan,
    bench: &mut Bench,
    early: Option<(References, (f64, f64))>,
    window: (f64, f64),
    stopped: bool,
) -> (References, (f64, f64)) {
    let read = |bench: &mut Bench| {
        take_references(
            plan.step,
            plan.calibration,
            bench.reference.as_mut(),
            window,
        )
    };
    match early {
        // Sampled on past the early references: an instrument (or a file) is read again over
        // the window finally sampled, rather than scaling a register's reference up to it.
        Some((_, at)) if at != window && bench.reference.reads_again_freely() => {
            (read(bench), window)
        }
        Some(taken) => taken,
        None if stopped => (Vec::new(), window),
        None => (read(bench), window),
    }
}

/// One write for the whole step: a single commit for all positions.
fn commit_step(sc: &StepContext, units: &[Unit]) {
    let finished: Vec<(usize, &StepRecord)> = units
        .iter()
        .zip(sc.to_run)
        .filter(|(_, run)| **run)
        .filter_map(|(u, _)| Some((u.record.position, u.record.steps.last()?)))
        .collect();
    sc.recorder.step_finished(sc.index, &finished);
}

/// What a step took beyond each unit's own series: the readings wanted, the references and
/// the window they stand for, the load as the reference saw it, each unit's resolutions.
pub(super) struct Taken<'a> {
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
pub(super) fn unit_step_record(
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
    if let Some(crate::plan::PulseMethod::FixedPulses { count, .. }) =
        step.pulses.as_ref().map(|p| p.method)
    {
        record.sampling_note = Some(format!(
            "timed {count} pulses: {} readings {} apart, until every unit had sent them (at most {})",
            evaluated_step.samples,
            crate::plan::units::duration_text(step.interval_s),
            step.samples
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
        // The reference standard's own pulses over the same interval, where the counter
        // counted them with every sample.
        let counts = series.reference_counts.get(w).filter(|c| {
            check.counts_pulses() && !c.is_empty() && c.len() == check_record.samples.len()
        });
        let counted_reference = counts
            .zip(judge.counter.as_ref().and_then(|c| c.reference_constant))
            .and_then(|(c, k)| Some((c.last()? - c.first()?, k)));
        let input = decide::CheckInputs {
            check,
            step: evaluated_step,
            reference,
            window: reference_window,
            resolution: resolutions[u][i],
            counted_reference,
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
pub(super) fn restarted_during(bench: &Bench, sc: &StepContext) -> Vec<Option<String>> {
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
pub(super) fn suspect_reference(units: &mut [Unit], sc: &StepContext) -> Option<String> {
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
pub(super) fn stop_reason(references: &References, bench: &Bench) -> Option<String> {
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

pub(super) type ReferenceResult = Result<crate::bench::ReferenceReading, String>;

/// A step's reference readings, one per quantity.
pub(super) type References = Vec<(Quantity, ReferenceResult)>;

/// One reference reading per quantity the step checks against a reference.
pub(super) fn take_references(
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
