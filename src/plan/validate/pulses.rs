//! A step's `pulses`: how the unit's test output is counted, and the sampling window that
//! counting needs. The gate or the count may be chosen from a resolution at the step's nominal
//! power (N = P[kW] · k · t / 3600, rounded up); what the plan asks and cannot get in its time
//! is a warning that `check` shows.

use super::*;
use crate::metrology::pulses::{pulse_interval_s, pulses_for, pulses_in};
use crate::plan::document::MAX_SAMPLES;
use crate::plan::{PulseMethod, PulseSpec};

/// The longest a step counts pulses unless the plan says otherwise.
pub const DEFAULT_AT_MOST_S: f64 = 600.0;

/// A fixed-pulse count is refused when its pulses are due later than this share of `at_most`
/// at the nominal power: a unit reading a little low must still get there.
const FIXED_PULSES_MARGIN: f64 = 1.1;

/// The step's timing as validated so far, which counting pulses may replace.
#[derive(Debug, Clone, Copy)]
pub(super) struct Timing {
    pub samples: Option<u32>,
    pub interval_s: Option<f64>,
}

/// What a step's `pulses` section gives: the spec, and the samples and interval that make the
/// step's window the gate (or long enough for the count).
pub(super) struct Counting {
    pub spec: PulseSpec,
    pub samples: u32,
    pub interval_s: f64,
}

/// Reads `raw.pulses`. `Some(None)`: the step counts no pulses; `None`: a mistake was recorded.
pub(super) fn counting(
    ctx: &mut Ctx,
    path: &str,
    raw: &RawStep,
    (ratings, load): (&Ratings, Option<&Load>),
    special: Option<&SpecialTest>,
    timing: Timing,
    sequential: Option<crate::plan::SequentialRule>,
) -> Option<Option<Counting>> {
    let Some(p) = &raw.pulses else {
        return Some(None);
    };
    let pp = format!("{path}.pulses");
    let Some(k) = ratings.meter_constant else {
        ctx.error(
            &pp,
            "counting the test output needs the meter constant: give ratings.meter_constant (imp/kWh)",
        );
        return None;
    };
    let resolution = match &p.resolution {
        None => None,
        Some(t) => {
            let r = ctx.value(&format!("{pp}.resolution"), t, Dimension::Percent)?;
            if !(r > 0.0 && r < 100.0) {
                ctx.error(
                    &format!("{pp}.resolution"),
                    "a resolution is a percentage above 0 % and below 100 %",
                );
                return None;
            }
            Some(r / 100.0)
        }
    };
    let at_most_s = ctx
        .optional_value(
            &format!("{pp}.at_most"),
            p.at_most.as_ref(),
            Dimension::Time,
        )?
        .unwrap_or(DEFAULT_AT_MOST_S);
    let power = load?.nominal(Quantity::ActivePower, 0.0).abs();
    let samples_given = |ctx: &mut Ctx| {
        if raw.samples.is_some() {
            ctx.error(
                &format!("{path}.samples"),
                "a step that counts pulses takes its window from pulses: leave out samples (interval says how often the counter is read)",
            );
        }
    };
    match p.method.0.trim() {
        "fixed_time" => {
            if p.count.is_some() {
                ctx.error(
                    &format!("{pp}.count"),
                    "fixed_time counts over a gate: give gate (or resolution), not count",
                );
            }
            let (gate_s, warning) = if let Some(special) = special {
                if p.gate.is_some() {
                    ctx.error(
                        &format!("{pp}.gate"),
                        "a special test's duration is its own: leave out gate",
                    );
                }
                let window = f64::from(timing.samples?.saturating_sub(1)) * timing.interval_s?;
                if let SpecialTest::Starting { current, .. } = special {
                    starting_window(ctx, path, k, load?, *current, window)?;
                }
                (window, None)
            } else {
                samples_given(ctx);
                gate(ctx, &pp, p, (k, power), resolution, at_most_s)?
            };
            if gate_s <= 0.0 {
                ctx.error(&format!("{pp}.gate"), "a gate must be longer than zero");
                return None;
            }
            let (samples, interval_s) = if special.is_some() {
                (timing.samples?, timing.interval_s?)
            } else {
                gate_samples(gate_s, raw.interval.is_some(), timing, sequential)
            };
            let expected = pulses_in(k, power, gate_s);
            let warning = warning.or_else(|| coarse(resolution, expected, gate_s, power));
            Some(Some(Counting {
                spec: PulseSpec {
                    method: PulseMethod::FixedTime { gate_s },
                    meter_constant: k,
                    resolution,
                    expected_pulses: expected,
                    warning,
                },
                samples,
                interval_s,
            }))
        }
        "fixed_pulses" => {
            if special.is_some() {
                ctx.error(
                    &format!("{pp}.method"),
                    "a special test counts over its own duration: use method: fixed_time",
                );
                return None;
            }
            if p.gate.is_some() {
                ctx.error(
                    &format!("{pp}.gate"),
                    "fixed_pulses times a count of pulses: give count (or resolution), not gate",
                );
            }
            if raw.samples_until_decided.is_some() {
                ctx.error(
                    &format!("{path}.samples_until_decided"),
                    "fixed_pulses stops once every unit has sent its pulses: leave out samples_until_decided",
                );
            }
            samples_given(ctx);
            if power <= 0.0 {
                ctx.error(
                    &format!("{pp}.method"),
                    "at no load no pulses are due: count over a gate (fixed_time) instead",
                );
                return None;
            }
            let every = pulse_interval_s(k, power);
            let (count, warning) = match (&p.count, resolution) {
                (Some(t), _) => {
                    let count = pulse_count(ctx, &format!("{pp}.count"), t)?;
                    let due = count as f64 * every;
                    if due * FIXED_PULSES_MARGIN > at_most_s {
                        ctx.error(
                            &format!("{pp}.count"),
                            format!(
                                "{count} pulses at {} take {}, and at_most is {}: raise at_most to at least {} or count fewer pulses",
                                units::Display(power, Dimension::ActivePower),
                                units::duration_text(due),
                                units::duration_text(at_most_s),
                                units::duration_text((due * FIXED_PULSES_MARGIN).ceil())
                            ),
                        );
                        return None;
                    }
                    (count, coarse(resolution, count as f64, due, power))
                }
                (None, Some(r)) => {
                    match pulses_for(r, 1, 0.0, at_most_s / FIXED_PULSES_MARGIN, k, power) {
                        Some(plan) => (plan.pulses, None),
                        None => {
                            let fits =
                                (pulses_in(k, power, at_most_s / FIXED_PULSES_MARGIN).floor()
                                    as u64)
                                    .max(1);
                            let wanted = (1.0 / r - 1e-9).ceil();
                            (
                                fits,
                                Some(format!(
                                    "a resolution of {} % needs {wanted} pulses, which at {} take {}, longer than at_most {}: {fits} pulses are counted (one pulse is {} % of them)",
                                    trim(r * 100.0),
                                    units::Display(power, Dimension::ActivePower),
                                    units::duration_text(wanted * every),
                                    units::duration_text(at_most_s),
                                    trim(100.0 / fits as f64)
                                )),
                            )
                        }
                    }
                }
                (None, None) => {
                    ctx.error(&pp, "fixed_pulses needs count (or resolution)");
                    return None;
                }
            };
            let due = count as f64 * every;
            // Read often enough to see the count end soon after its last pulse (the edges are
            // timed by the counter, so how often it is read changes only the dead time), and
            // seldom enough that at_most fits in the most samples a step takes.
            let interval_s = match timing.interval_s {
                Some(i) if raw.interval.is_some() => i,
                _ => (due / 40.0).clamp(0.2, 5.0),
            }
            .max(at_most_s / f64::from(MAX_SAMPLES - 1));
            if interval_s <= 0.0 {
                ctx.error(
                    &format!("{path}.interval"),
                    "the interval must be above zero",
                );
                return None;
            }
            let samples = ((at_most_s / interval_s).ceil() as u32 + 1).clamp(2, MAX_SAMPLES);
            Some(Some(Counting {
                spec: PulseSpec {
                    method: PulseMethod::FixedPulses { count, at_most_s },
                    meter_constant: k,
                    resolution,
                    expected_pulses: count as f64,
                    warning,
                },
                samples,
                interval_s,
            }))
        }
        other => {
            ctx.error(
                &format!("{pp}.method"),
                format!("unknown method \"{other}\": use fixed_time or fixed_pulses"),
            );
            None
        }
    }
}

/// The gate of a fixed-time count: as given, or chosen from the resolution (whole seconds),
/// capped at `at_most` with a warning when the resolution is out of reach.
fn gate(
    ctx: &mut Ctx,
    pp: &str,
    p: &crate::plan::raw::RawPulses,
    (k, power): (f64, f64),
    resolution: Option<f64>,
    at_most_s: f64,
) -> Option<(f64, Option<String>)> {
    match (&p.gate, resolution) {
        (Some(t), _) => Some((ctx.value(&format!("{pp}.gate"), t, Dimension::Time)?, None)),
        (None, Some(r)) => {
            if power <= 0.0 {
                ctx.error(
                    &format!("{pp}.resolution"),
                    "at no load no pulses are due, so no resolution can be reached: give a gate",
                );
                return None;
            }
            Some(match pulses_for(r, 1, 0.0, at_most_s, k, power) {
                Some(plan) => (plan.seconds.ceil().min(at_most_s), None),
                None => {
                    let wanted = (1.0 / r - 1e-9).ceil();
                    let got = pulses_in(k, power, at_most_s);
                    (
                        at_most_s,
                        Some(format!(
                            "a resolution of {} % needs {wanted} pulses, which at {} take {}, longer than at_most {}: the gate is {} and holds about {} pulses (one pulse is {} % of them)",
                            trim(r * 100.0),
                            units::Display(power, Dimension::ActivePower),
                            units::duration_text(wanted * pulse_interval_s(k, power)),
                            units::duration_text(at_most_s),
                            units::duration_text(at_most_s),
                            trim(got),
                            trim(100.0 / got.max(1e-9))
                        )),
                    )
                }
            })
        }
        (None, None) => {
            ctx.error(pp, "fixed_time needs gate (or resolution)");
            None
        }
    }
}

/// The samples and interval that make the sampling window exactly the gate: the counter read
/// every `interval` (a tenth of the gate unless the plan says), or `samples_until_decided.max`
/// readings over the gate.
fn gate_samples(
    gate_s: f64,
    interval_given: bool,
    timing: Timing,
    sequential: Option<crate::plan::SequentialRule>,
) -> (u32, f64) {
    if let Some(rule) = sequential {
        let n = rule.max.max(2);
        return (n, gate_s / f64::from(n - 1));
    }
    let interval = match timing.interval_s {
        Some(i) if interval_given && i > 0.0 => i,
        _ => gate_s / 10.0,
    };
    let gaps = ((gate_s / interval).round() as u32).clamp(1, MAX_SAMPLES - 1);
    (gaps + 1, gate_s / f64::from(gaps))
}

/// A starting test by the test output: the pulses must start and keep coming, at least two
/// counted; so that a unit starting at any phase of its pulses can show two, at least three are
/// due in the window at the starting current (common practice, no published source).
fn starting_window(
    ctx: &mut Ctx,
    path: &str,
    k: f64,
    load: &Load,
    current: f64,
    window_s: f64,
) -> Option<()> {
    let power = load.voltage * current * load.power_factor();
    let due = pulses_in(k, power, window_s);
    if due < 3.0 {
        let every = pulse_interval_s(k, power);
        ctx.error(
            &format!("{path}.samples"),
            format!(
                "at the starting current one pulse is due every {}: a window of {} holds {} pulses, and the test counts at least 2 of 3 due; make samples × interval at least {}",
                units::duration_text(every),
                units::duration_text(window_s),
                trim(due),
                units::duration_text((3.0 * every).ceil())
            ),
        );
        return None;
    }
    Some(())
}

/// The warning for a count coarser than the resolution the plan asked for.
fn coarse(resolution: Option<f64>, pulses: f64, seconds: f64, power: f64) -> Option<String> {
    let r = resolution?;
    (pulses * r < 1.0 - 1e-9).then(|| {
        format!(
            "about {} pulses are due in {} at {}: one pulse is {} % of the count, coarser than the resolution {} % asked for",
            trim(pulses),
            units::duration_text(seconds),
            units::Display(power, Dimension::ActivePower),
            trim(100.0 / pulses.max(1e-9)),
            trim(r * 100.0)
        )
    })
}

fn pulse_count(ctx: &mut Ctx, path: &str, text: &Text) -> Option<u64> {
    match text.0.trim().parse::<u64>() {
        Ok(n) if (1..=1_000_000).contains(&n) => Some(n),
        _ => {
            ctx.error(
                path,
                format!(
                    "expected a whole number of pulses from 1 to 1000000, got \"{}\"",
                    text.0
                ),
            );
            None
        }
    }
}

/// A number with at most three decimals, trailing zeros dropped.
fn trim(x: f64) -> String {
    let t = format!("{x:.3}");
    t.trim_end_matches('0').trim_end_matches('.').to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Timing that makes the window the gate: a 60 s gate read every 6 s is 11 samples; with
    /// a 7 s interval asked for, 9 gaps of 6.667 s.
    #[test]
    fn the_window_is_the_gate() {
        let t = Timing {
            samples: Some(8),
            interval_s: Some(0.5),
        };
        assert_eq!(gate_samples(60.0, false, t, None), (11, 6.0));
        let t7 = Timing {
            samples: Some(8),
            interval_s: Some(7.0),
        };
        let (n, i) = gate_samples(60.0, true, t7, None);
        assert_eq!(n, 10);
        assert!((f64::from(n - 1) * i - 60.0).abs() < 1e-9);
        let rule = crate::plan::SequentialRule { min: 3, max: 13 };
        assert_eq!(gate_samples(60.0, false, t, Some(rule)), (13, 5.0));
    }
}
