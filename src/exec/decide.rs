//! From a check's samples and reference to its verdict, and from the steps to the unit's.

use crate::bench::ReferenceReading;
use crate::metrology::accuracy::Accuracy;
use crate::metrology::decision::{TUR_WARNING_BELOW, decide};
use crate::metrology::uncertainty::{self, Budget};
use crate::metrology::{Summary, evaluate};
use crate::plan::units::duration_text;
use crate::plan::{Check, DecisionRule, PulseMethod, PulseSpec, Quantity, Step};
use crate::record::{
    CheckRecord, CheckVerdict, PulseCount, StepRecord, StepStatus, UnitStatus, UnitVerdict,
};
use std::collections::BTreeMap;

/// What every check of a run is judged with.
pub(super) struct Judge<'a> {
    pub rule: DecisionRule,
    /// The reference instrument's accuracy specification, when the station states one.
    pub accuracy: Option<Accuracy>,
    pub ranges: &'a BTreeMap<String, f64>,
    pub calibration: Option<&'a crate::plan::CalibrationSpec>,
    /// The counter of the test outputs: its time base and edge timing enter the budget.
    pub counter: Option<crate::bench::counter::CounterInfo>,
}

/// What one check is evaluated from.
pub(super) struct CheckInputs<'a> {
    pub check: &'a Check,
    pub step: &'a Step,
    pub reference: Option<Result<ReferenceReading, String>>,
    /// Bench times of the window the reference was read over (with sampling until decided, the
    /// window up to the minimum count: a register's advance is set against it scaled by time).
    pub window: (f64, f64),
    /// The unit's resolution for the quantity, where the link knows it.
    pub resolution: Option<f64>,
    /// A count of the test output set against the reference standard's own pulses over the
    /// same interval: (its pulses, its constant imp/kWh).
    pub counted_reference: Option<(u64, f64)>,
}

/// Fills in the statistics, error, uncertainty, decision and verdict of one check.
pub(super) fn evaluate_check(input: CheckInputs, record: &mut CheckRecord, judge: &Judge) {
    let CheckInputs {
        check,
        step,
        mut reference,
        mut window,
        resolution,
        counted_reference,
    } = input;
    let values: Vec<f64> = record.samples.iter().map(|s| s.value).collect();
    // The spread of a register's contents says nothing; its advance is the measurement.
    record.summary = if check.quantity.is_register() {
        None
    } else {
        Summary::of(&values)
    };
    let pulses = check
        .counts_pulses()
        .then_some(step.pulses.as_ref())
        .flatten();
    record.pulses = pulses.and_then(|spec| pulse_count(spec, &record.samples));
    // Pulses from the reference standard: its energy over exactly the unit's interval is
    // N_ref / k_ref (the error then follows from the ratio of the two counts).
    if let (Some((n, k)), Some(p), Some(first), Some(last)) = (
        counted_reference,
        record.pulses.as_mut(),
        record.samples.first(),
        record.samples.last(),
    ) {
        p.reference_pulses = Some(n);
        p.reference_constant = Some(k);
        window = (first.t_s, last.t_s);
        reference = Some(Ok(ReferenceReading {
            value: n as f64 * 1000.0 / k,
            source: "reference pulses".into(),
            taken_at_s: last.t_s,
            as_given: Some(format!("{n} pulses at {k} imp/kWh")),
            entries: Vec::new(),
            window_s: Some(window),
            power_readings: Vec::new(),
        }));
    }
    if let Some(spec) = pulses
        && let PulseMethod::FixedPulses { count, at_most_s } = spec.method
    {
        let got = record.pulses.as_ref().map_or(0, |p| p.pulses);
        if got < count {
            record.note = Some(if record.samples.is_empty() {
                format!(
                    "no pulse came from the test output within {}: not evaluated",
                    duration_text(at_most_s)
                )
            } else {
                format!(
                    "{got} of {count} pulses came within {}: not evaluated",
                    duration_text(at_most_s)
                )
            });
            return;
        }
    }
    record.measured = if let Some(spec) = pulses {
        // Whole pulses times the energy of one, from the first sample to the last (the edge
        // that completed a count); over a gate every sample must be there.
        let complete = match spec.method {
            PulseMethod::FixedPulses { .. } => values.len() >= 2,
            PulseMethod::FixedTime { .. } => values.len() == step.samples as usize,
        };
        record
            .pulses
            .as_ref()
            .filter(|_| complete)
            .map(|p| p.pulses as f64 * spec.pulse_wh())
    } else if check.quantity.is_register() {
        // The register's advance over the window: all of its samples must be there.
        (values.len() == step.samples as usize && values.len() >= 2)
            .then(|| values[values.len() - 1] - values[0])
    } else {
        // A partial series is kept in the record but not decided on.
        (values.len() == step.samples as usize)
            .then(|| record.summary.map(|s| s.mean))
            .flatten()
    };
    let Some(measured) = record.measured else {
        record.note = Some(format!(
            "{} of {} samples taken: not evaluated",
            values.len(),
            step.samples
        ));
        return;
    };
    let share = register_share(&record.samples, window);
    let reference_value = match &reference {
        None => None,
        Some(Ok(r)) if check.quantity.is_register() => Some(r.value * share),
        Some(Ok(r)) => Some(r.value),
        Some(Err(e)) => {
            record.note = Some(format!("no reference: {e}"));
            return;
        }
    };
    record.reference = reference_value;
    // An upper bound on a reading (a no-load step) holds for every reading, not for the mean:
    // readings swinging ±0.6 W around zero have a mean near zero and still break a 0.5 W bound.
    let compared = match (&check.tolerance, check.quantity.is_register()) {
        (crate::plan::Tolerance::AtMost { .. }, false) => {
            let worst = values.iter().fold(0.0f64, |w, v| w.max(v.abs()));
            record.note = Some(format!(
                "the bound holds for every reading: the largest in magnitude is {}",
                crate::plan::units::Display(worst, check.quantity.dimension())
            ));
            worst
        }
        _ => measured,
    };
    let evaluation = match evaluate(
        &check.tolerance,
        compared,
        reference_value,
        check.quantity.unit(),
    ) {
        Ok(e) => e,
        Err(e) => {
            record.note = Some(e.to_string());
            return;
        }
    };
    let span_s = (window.1 - window.0) * share;
    let power_readings = match reference {
        Some(Ok(r)) => r.power_readings.clone(),
        _ => Vec::new(),
    };
    let known = Known {
        resolution,
        pulses,
        repeatability: step.repeatability.as_ref(),
        power_readings: &power_readings,
        share,
        load_within: step.load_within,
    };
    let budget = budget(
        check,
        record,
        measured,
        reference_value,
        known,
        judge,
        span_s,
    );
    let mut decision = decide(&evaluation, Some(budget.expanded), judge.rule);
    decision.risk = crate::metrology::decision::specific_risk(&evaluation, budget.combined);
    record.verdict = if decision.accepted {
        CheckVerdict::Pass
    } else {
        CheckVerdict::Fail
    };
    if decision.low_tur() {
        let earlier = record
            .note
            .take()
            .map_or(String::new(), |n| format!("{n}; "));
        record.note = Some(format!(
            "{earlier}test uncertainty ratio {:.1}:1 is below {}:1",
            decision.tur.unwrap_or(0.0),
            TUR_WARNING_BELOW
        ));
    }
    record.evaluation = Some(evaluation);
    record.uncertainty = Some(budget);
    record.decision = Some(decision);
}

/// A step's samples so far, to decide whether sampling may stop.
pub(super) struct Partial<'a> {
    pub step: &'a Step,
    /// The step's empty check records, to fill in.
    pub blank: &'a StepRecord,
    pub wanted: &'a [super::sampling::Wanted],
    pub references: &'a [(Quantity, Result<ReferenceReading, String>)],
    /// Bench times of the window the references were read over.
    pub reference_window: (f64, f64),
    /// Each position's resolution for each check.
    pub resolutions: &'a [Vec<Option<f64>>],
}

impl Partial<'_> {
    /// Whether, after `n` samples, no decision of any unit still sampling can change: each
    /// check's error with its expanded uncertainty lies wholly inside the acceptance limit or
    /// wholly beyond the tolerance limit. A unit whose series has stopped (a fault) does not
    /// hold the others back.
    pub(super) fn all_settled(
        &self,
        series: &[super::sampling::Series],
        n: u32,
        judge: &Judge,
    ) -> bool {
        let mut step_so_far = self.step.clone();
        step_so_far.samples = n;
        for (u, s) in series.iter().enumerate() {
            if s.samples.is_empty() || s.fault.is_some() {
                continue;
            }
            for (i, check) in self.step.checks.iter().enumerate() {
                let Some(w) = self.wanted.iter().position(|w| {
                    !w.raw && w.quantity == check.quantity && w.channel == check.channel
                }) else {
                    return false;
                };
                let mut record = self.blank.checks[i].clone();
                record.samples = s.samples[w].clone();
                let reference = self
                    .references
                    .iter()
                    .find(|(q, _)| *q == check.quantity)
                    .map(|(_, r)| r.clone());
                let input = CheckInputs {
                    check,
                    step: &step_so_far,
                    reference,
                    window: self.reference_window,
                    resolution: self.resolutions.get(u).and_then(|r| r[i]),
                    // Until decided, the instrument's reading over the window so far stands in.
                    counted_reference: None,
                };
                evaluate_check(input, &mut record, judge);
                match (&record.evaluation, &record.decision) {
                    (Some(e), Some(d)) if crate::metrology::decision::settled(e, d) => {}
                    _ => return false,
                }
            }
        }
        true
    }
}

/// The uncertainty budget of a check's error, in the error's unit (GUM): the spread of the
/// unit's readings (Type A), its resolution and the reference's accuracy (Type B, rectangular).
/// What is known of the unit's readings beyond the samples: its resolution (from the link) and
/// a repeatability declared by the plan.
struct Known<'a> {
    resolution: Option<f64>,
    /// How the test output was counted, for a check on it.
    pulses: Option<&'a PulseSpec>,
    repeatability: Option<&'a crate::plan::Repeatability>,
    /// The reference's power readings an energy was inferred from (bench time s, W).
    power_readings: &'a [(f64, f64)],
    /// The unit's register span over the reference's window (above 1: extrapolated).
    share: f64,
    /// How far the load may be from nominal (the bound it was confirmed to), a fraction.
    load_within: f64,
}

fn budget(
    check: &Check,
    record: &CheckRecord,
    measured: f64,
    reference: Option<f64>,
    known: Known,
    judge: &Judge,
    span_s: f64,
) -> Budget {
    let Known {
        resolution,
        pulses,
        repeatability: declared,
        power_readings,
        share,
        load_within,
    } = known;
    let relative = check.tolerance.is_relative();
    // Sensitivities of the error to the unit's value and to the reference.
    let (c_unit, c_ref) = match reference {
        Some(r) if relative => (100.0 / r, -100.0 * measured / (r * r)),
        Some(_) => (1.0, -1.0),
        None => (1.0, 0.0),
    };
    let mut components = Vec::new();
    let mut notes = Vec::new();
    match (record.summary, declared) {
        (Some(s), _) if s.std_dev.is_some() => components.push(uncertainty::type_a(
            "repeatability of the unit's readings",
            s.std_dev.unwrap_or(0.0),
            s.count,
            c_unit,
        )),
        // One reading: the spread of one reading known from earlier data (Type B, GUM 4.3.1),
        // for the mean of the readings taken.
        (summary, Some(r)) if !check.quantity.is_register() => {
            let n = summary.map_or(1, |s| s.count).max(1);
            components.push(uncertainty::Component {
                name: "repeatability of one reading, declared".into(),
                evaluation: uncertainty::Evaluation::B,
                u: (r.relative * measured.abs() / (n as f64).sqrt() * c_unit).abs(),
                dof: None,
                basis: format!("{} % of the reading, from {}", r.relative * 100.0, r.from),
            })
        }
        _ => {}
    }
    // A bound on a count of pulses (no-load: at most one; starting: at least two) is a bound
    // on whole pulses, compared as counted.
    let counted_bound = pulses.is_some() && check.tolerance.is_bound();
    if counted_bound {
        notes.push("the bound is on whole pulses, compared as counted".into());
    }
    match (resolution, pulses) {
        (_, Some(_)) if counted_bound => {}
        (_, Some(spec)) => pulse_terms(
            &mut components,
            &mut notes,
            spec,
            (record, reference),
            (c_unit, c_ref),
            judge.counter.as_ref(),
        ),
        // A register's advance is the difference of two quantised readings: δ·√2 / √12.
        (Some(d), None) if check.quantity.is_register() => {
            components.push(uncertainty::resolution(
                "resolution of the unit's register (two readings)",
                d * 2f64.sqrt(),
                c_unit,
            ))
        }
        (Some(d), None) => components.push(uncertainty::resolution(
            "resolution of the unit's reading",
            d,
            c_unit,
        )),
        (None, None) => {
            notes.push("the link does not state the unit's resolution: not included".into())
        }
    }
    if check.quantity.is_register()
        && !counted_bound
        && let Some(a) = register_timing_half_width(&record.samples, measured)
    {
        let (name, basis) = if pulses.is_some() {
            (
                "timing of the gate's opening and closing",
                "half of each counter reading's transaction time, at the window's mean power",
            )
        } else {
            (
                "timing of the register's two readings",
                "half of each reading's transaction time, at the window's mean power",
            )
        };
        components.push(uncertainty::rectangular(name, a, c_unit, basis));
    }
    if let Some(r) = reference {
        match reference_half_width(check, r, judge, span_s) {
            Ok((a, basis)) => components.push(uncertainty::rectangular(
                "accuracy of the reference instrument",
                a,
                c_ref,
                &basis,
            )),
            Err(why) => notes.push(format!("reference accuracy not included: {why}")),
        }
        if check.quantity.is_register() {
            energy_terms(
                &mut components,
                &mut notes,
                r,
                c_ref,
                (power_readings, span_s),
                (share, load_within),
            );
        }
    }
    let mut b = Budget::of(components);
    b.notes = notes;
    b
}

/// The half-width of the reference's error at `reading`, from its specification.
fn reference_half_width(
    check: &Check,
    reading: f64,
    judge: &Judge,
    span_s: f64,
) -> Result<(f64, String), crate::metrology::accuracy::AccuracyError> {
    let accuracy = judge
        .accuracy
        .ok_or(crate::metrology::accuracy::AccuracyError::NotStated)?;
    if check.quantity.is_register() {
        // Energy from the reference's power reading over the window.
        let hours = span_s / 3600.0;
        let power = if hours > 0.0 { reading / hours } else { 0.0 };
        let range = judge.ranges.get(Quantity::ActivePower.name()).copied();
        let a = accuracy.half_width(power, range)? * hours;
        return Ok((a, format!("power specification times {span_s:.3} s")));
    }
    let range = judge.ranges.get(check.quantity.name()).copied();
    let a = accuracy.half_width(reading, range)?;
    Ok((
        a,
        format!(
            "{} % of reading + {} % of range {}",
            accuracy.reading_percent,
            accuracy.range_percent,
            range.map_or("-".into(), |r| r.to_string())
        ),
    ))
}

/// What a reference energy does not measure directly. Inferred from power at the window's two
/// ends (trapezoid), the unknown path between them is a rectangular term of half-width
/// |P₁ − P₀| / 2 · t (a monotone drift keeps the energy between P₀·t and P₁·t). Extrapolated
/// from a shorter window (share s > 1), the energy of the extra (s − 1)/s of the span may differ
/// from the window's mean power by up to the step's load bound: half-width
/// (s − 1)/s · |E| · load_within.
fn energy_terms(
    components: &mut Vec<uncertainty::Component>,
    notes: &mut Vec<String>,
    reference: f64,
    c_ref: f64,
    (power_readings, span_s): (&[(f64, f64)], f64),
    (share, load_within): (f64, f64),
) {
    match power_readings {
        [(_, p0), (_, p1)] => components.push(uncertainty::rectangular(
            "load drift over the window (energy inferred from power at its two ends)",
            (p1 - p0).abs() / 2.0 * span_s / 3600.0,
            c_ref,
            &format!("|{p1:.6} W − {p0:.6} W| / 2 × {span_s:.3} s"),
        )),
        [(_, p)] => notes.push(format!(
            "the reference energy stands on one power reading ({p:.6} W at the window's end): the load's drift over the window is not in the budget"
        )),
        _ => {}
    }
    if share > 1.0 + 1e-9 {
        let a = (share - 1.0) / share * reference.abs() * load_within;
        components.push(uncertainty::rectangular(
            "extrapolation beyond the reference's window",
            a,
            c_ref,
            &format!(
                "the last {:.1} % of the span taken at the window's mean power, within the step's load bound {} %",
                (share - 1.0) / share * 100.0,
                load_within * 100.0
            ),
        ));
    }
}

/// The budget's terms of a count of pulses (GUM 4.3.7, rectangular). Over a gate: the count
/// is off by up to one pulse, the gate opening and closing at any phase of the pulses (a = 1/k,
/// on the unit's side). Timing a number of pulses, edge to edge: no quantisation, but the
/// counter's time base (±a of the interval) and the timing of the two edges (±δ each) scale
/// the reference energy set against the count.
fn pulse_terms(
    components: &mut Vec<uncertainty::Component>,
    notes: &mut Vec<String>,
    spec: &PulseSpec,
    (record, reference): (&CheckRecord, Option<f64>),
    (c_unit, c_ref): (f64, f64),
    counter: Option<&crate::bench::counter::CounterInfo>,
) {
    let pulse = spec.pulse_wh();
    // Against the reference standard's own count over the same interval: its ±1 pulse, and no
    // time base or edge timing (both counts share the interval, so they cancel).
    let counted = record
        .pulses
        .as_ref()
        .and_then(|p| p.reference_constant.zip(p.reference_pulses));
    if let Some((k_ref, _)) = counted {
        components.push(uncertainty::rectangular(
            "quantisation of the reference's count (±1 pulse)",
            1000.0 / k_ref,
            c_ref,
            &format!(
                "the reference standard's pulses counted over the unit's interval: ±1 pulse of {} Wh",
                trim_number(1000.0 / k_ref)
            ),
        ));
    }
    match spec.method {
        PulseMethod::FixedTime { .. } => components.push(uncertainty::rectangular(
            "quantisation of the count (±1 pulse)",
            pulse,
            c_unit,
            &format!(
                "a gate opening and closing at any phase of the pulses: ±1 pulse of {} Wh",
                trim_number(pulse)
            ),
        )),
        PulseMethod::FixedPulses { .. } if counted.is_some() => {}
        PulseMethod::FixedPulses { .. } => {
            let Some(r) = reference else { return };
            let span = record.pulses.as_ref().map_or(0.0, |p| p.seconds);
            match counter.and_then(|c| c.timebase) {
                Some(a) => components.push(uncertainty::rectangular(
                    "the counter's time base",
                    r.abs() * a,
                    c_ref,
                    &format!("±{} ppm of the timed interval", trim_number(a * 1e6)),
                )),
                None => notes.push(
                    "the counter's time base is not stated: not included (station key counter.timebase)"
                        .into(),
                ),
            }
            match counter.and_then(|c| c.edge_s) {
                Some(d) if span > 0.0 => components.push(uncertainty::rectangular(
                    "timing of the first and last pulse edge",
                    r.abs() * 2f64.sqrt() * d / span,
                    c_ref,
                    &format!(
                        "±{} µs at each of two edges over {span:.3} s",
                        trim_number(d * 1e6)
                    ),
                )),
                Some(_) => {}
                None => notes.push(
                    "how closely the counter times an edge is not stated: not included (station key counter.edge)"
                        .into(),
                ),
            }
        }
    }
}

fn trim_number(x: f64) -> String {
    let t = format!("{x:.6}");
    t.trim_end_matches('0').trim_end_matches('.').to_string()
}

/// The count a check's samples stand for: pulses and seconds from the first to the last.
fn pulse_count(spec: &PulseSpec, samples: &[crate::record::Sample]) -> Option<PulseCount> {
    let (first, last) = (samples.first()?, samples.last()?);
    Some(PulseCount {
        method: spec.method_name().to_string(),
        meter_constant: spec.meter_constant,
        pulses: ((last.value - first.value) / spec.pulse_wh())
            .round()
            .max(0.0) as u64,
        seconds: last.t_s - first.t_s,
        reference_pulses: None,
        reference_constant: None,
    })
}

/// "error −3.661 % (U = 0.072 %) is outside the acceptance limit ±0.928 % (tolerance ±1.000 %,
/// guard band 1 U)": the figures at the precision of the reports' tables.
pub fn failure_text(c: &CheckRecord) -> String {
    use crate::metrology::tolerance::Sense;
    let (Some(e), Some(d)) = (&c.evaluation, &c.decision) else {
        return "failed".into();
    };
    // The precision of the reports' tables: three decimals of a percentage, four of a unit.
    let with_unit = |x: f64| {
        if e.error_unit == "%" {
            format!("{x:.3} %")
        } else {
            format!("{x:.4} {}", e.error_unit)
        }
    };
    let (what, bound, value) = match e.sense {
        Sense::PlusMinus => {
            let sign = if e.error < 0.0 { "−" } else { "+" };
            ("error", "±", format!("{sign}{}", with_unit(e.error.abs())))
        }
        Sense::AtMost => ("reading", "≤ ", with_unit(e.error)),
        Sense::AtLeast => ("reading", "≥ ", with_unit(e.error)),
    };
    let u = d
        .expanded_uncertainty
        .map_or(String::new(), |u| format!(" (U = {})", with_unit(u)));
    let guard = match d.rule {
        DecisionRule::Simple => String::new(),
        DecisionRule::Guarded { multiple } => format!(", guard band {multiple} U"),
    };
    if d.no_acceptance_zone {
        return format!(
            "no acceptance zone: the guard band{} exceeds the tolerance {bound}{}, so no result can be accepted; {what} {value}",
            d.expanded_uncertainty
                .map_or(String::new(), |u| format!(" (U = {})", with_unit(u))),
            with_unit(d.tolerance_limit)
        );
    }
    format!(
        "{what} {value}{u} is outside the acceptance limit {bound}{} (tolerance {bound}{}{guard})",
        with_unit(d.acceptance_limit),
        with_unit(d.tolerance_limit)
    )
}

/// The half-width of a register advance's error from not knowing exactly when its two ends were
/// read: each reading lies somewhere within its transaction (± half of it), which at the
/// window's mean power is ± advance · (half the transaction time) / span. The two ends are
/// independent, so their half-widths add in quadrature. `None` when the readings took no time.
fn register_timing_half_width(samples: &[crate::record::Sample], advance: f64) -> Option<f64> {
    let (first, last) = (samples.first()?, samples.last()?);
    let span = last.t_s - first.t_s;
    let half = |s: &crate::record::Sample| s.took_s.unwrap_or(0.0) / 2.0;
    let a = half(first).hypot(half(last));
    (span > 0.0 && a > 0.0).then(|| advance.abs() * a / span)
}

/// The share of the reference's window that a unit's register readings span. The reference
/// energy is for the whole window; a unit whose first or last reading came late (a retry) saw
/// less of it. The load is steady after settling, so energy scales with time.
fn register_share(samples: &[crate::record::Sample], window: (f64, f64)) -> f64 {
    let span = window.1 - window.0;
    match (samples.first(), samples.last()) {
        (Some(a), Some(b)) if span > 0.0 => (b.t_s - a.t_s) / span,
        _ => 1.0,
    }
}

/// The unit's verdict from its steps: any failed check rejects it; otherwise any step not done
/// (or check not evaluated) leaves it incomplete; only a unit with every step done and every
/// check within its limit is accepted.
pub(super) fn unit_verdict(steps: &[StepRecord]) -> UnitVerdict {
    let mut reasons = Vec::new();
    let mut failed = false;
    let mut unfinished = false;
    for step in steps {
        if step.status != StepStatus::Done {
            unfinished = true;
            reasons.push(format!(
                "step {}: {}",
                step.id,
                step.reason.as_deref().unwrap_or("not done")
            ));
        }
        for c in &step.checks {
            match c.verdict {
                CheckVerdict::Fail => {
                    failed = true;
                    reasons.push(format!(
                        "step {}: {} on {}: {}",
                        step.id,
                        c.quantity.name(),
                        c.channel,
                        failure_text(c)
                    ));
                }
                CheckVerdict::NotEvaluated if step.status == StepStatus::Done => {
                    unfinished = true;
                    reasons.push(format!(
                        "step {}: {} on {} not evaluated: {}",
                        step.id,
                        c.quantity.name(),
                        c.channel,
                        c.note.as_deref().unwrap_or("no data")
                    ));
                }
                _ => {}
            }
        }
    }
    let status = if failed {
        UnitStatus::Rejected
    } else if unfinished || steps.is_empty() {
        UnitStatus::Incomplete
    } else {
        UnitStatus::Accepted
    };
    UnitVerdict { status, reasons }
}

#[cfg(test)]
mod tests {
    /// The energy terms by hand: power 1000 W then 1010 W over 36 s gives a = 5 W · 0.01 h =
    /// 0.05 Wh; a register span 1.25 times the reference's window, at 10 Wh and a 5 % load
    /// bound, gives a = 0.2 · 10 · 0.05 = 0.1 Wh (GUM 4.3.7 rectangular, u = a/√3).
    #[test]
    fn energy_inferred_or_extrapolated_enters_the_budget() {
        let (mut components, mut notes) = (Vec::new(), Vec::new());
        energy_terms(
            &mut components,
            &mut notes,
            10.0,
            1.0,
            (&[(0.0, 1000.0), (36.0, 1010.0)], 36.0),
            (1.25, 0.05),
        );
        assert_eq!(components.len(), 2);
        assert!((components[0].u - 0.05 / 3f64.sqrt()).abs() < 1e-12);
        assert!((components[1].u - 0.1 / 3f64.sqrt()).abs() < 1e-12);
        assert!(notes.is_empty());
        let (mut components, mut notes) = (Vec::new(), Vec::new());
        energy_terms(
            &mut components,
            &mut notes,
            10.0,
            1.0,
            (&[(36.0, 1010.0)], 36.0),
            (1.0, 0.05),
        );
        assert!(components.is_empty());
        assert!(notes[0].contains("one power reading"), "{notes:?}");
    }

    use super::*;
    use crate::record::Sample;

    /// 10 Wh over 10 s with each end read in a 40 ms transaction: each end is known to ±20 ms,
    /// ±0.02 Wh at 1 Wh/s, and the two together to ±0.02·√2 Wh.
    #[test]
    fn the_timing_of_a_registers_readings_is_an_uncertainty() {
        let read = |t_s, value| Sample {
            t_s,
            value,
            took_s: Some(0.040),
        };
        let a = register_timing_half_width(&[read(0.0, 0.0), read(10.0, 10.0)], 10.0).unwrap();
        assert!((a - 0.02 * 2f64.sqrt()).abs() < 1e-12, "{a}");
        let instant = [Sample::at(0.0, 0.0), Sample::at(10.0, 10.0)];
        assert_eq!(register_timing_half_width(&instant, 10.0), None);
    }

    /// Under a steady load energy is proportional to time (E = P·t): readings 5 s apart in a 10 s
    /// window cover half of its energy.
    #[test]
    fn a_register_read_late_covers_less_of_the_window() {
        let s = |t_s| Sample::at(t_s, 0.0);
        assert_eq!(register_share(&[s(1.0), s(6.0)], (0.0, 10.0)), 0.5);
        assert_eq!(register_share(&[s(0.0), s(10.0)], (0.0, 10.0)), 1.0);
        assert_eq!(register_share(&[], (0.0, 10.0)), 1.0);
    }
}
