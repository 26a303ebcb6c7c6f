//! The plan's `steps`: each step's load, settling, sampling, special test and checks, with the
//! defaults it inherits.

use super::*;

/// How far the reference may read from the step's nominal load before the step is refused as
/// "load not as planned" (a source that never got its set-point, a lamp that blew).
pub const DEFAULT_LOAD_WITHIN: f64 = 0.05;

/// A `load_within` band: a percentage above 0 and at most 50 %.
pub(super) fn load_within(ctx: &mut Ctx, path: &str, text: Option<&Text>) -> Option<f64> {
    let p = ctx.optional_value(path, text, Dimension::Percent)??;
    if p > 0.0 && p <= 50.0 {
        Some(p / 100.0)
    } else {
        ctx.error(path, "expected a percentage above 0 % and at most 50 %");
        None
    }
}

pub(super) fn step(
    ctx: &mut Ctx,
    path: &str,
    raw: &RawStep,
    ratings: &Ratings,
    link: &LinkSpec,
    defaults: &StepDefaults,
) -> Option<Step> {
    let id = ctx.non_empty(&format!("{path}.id"), &raw.id);
    let special = special_test(ctx, path, raw, ratings);
    let mut load = load(ctx, &format!("{path}.load"), &raw.load, ratings);
    if let (Some(Some(SpecialTest::Starting { current, .. })), Some(l)) = (&special, load.as_mut())
    {
        l.current = *current;
    }
    let load_within = match &raw.load_within {
        None => Some(defaults.load_within),
        t => load_within(ctx, &format!("{path}.load_within"), t.as_ref()),
    };
    let settle_s = ctx
        .optional_value(
            &format!("{path}.settle"),
            raw.settle.as_ref(),
            Dimension::Time,
        )
        .map(|v| v.unwrap_or(defaults.settle_s));
    let mut samples = match &raw.samples {
        Some(t) => ctx.count(&format!("{path}.samples"), t),
        None => Some(defaults.samples),
    };
    let mut interval_s = ctx
        .optional_value(
            &format!("{path}.interval"),
            raw.interval.as_ref(),
            Dimension::Time,
        )
        .map(|v| v.unwrap_or(defaults.interval_s));
    if let Some(Some(SpecialTest::NoLoad { minutes, .. })) = &special {
        // The register is read at the start and the end of the standard's duration.
        if raw.samples.is_some() || raw.interval.is_some() {
            ctx.error(
                &format!("{path}.special"),
                "a no-load test takes its duration from the standard: leave out samples and interval",
            );
        }
        samples = Some(2);
        interval_s = Some(minutes * 60.0);
    }
    if let Some(s) = settle_s
        && s < 0.0
    {
        ctx.error(
            &format!("{path}.settle"),
            "a settle time cannot be negative",
        );
    }
    if let (Some(i), Some(n)) = (interval_s, samples)
        && n > 1
        && i <= 0.0
    {
        ctx.error(
            &format!("{path}.interval"),
            "the sample interval must be greater than zero when a step takes several samples",
        );
    }
    // Adaptive rules: the step's own, else the defaults' unless the step fixes its own time/count.
    let settle_raw = raw.settle_until.clone().or_else(|| {
        raw.settle
            .is_none()
            .then(|| defaults.settle_until.clone())
            .flatten()
    });
    if raw.settle_until.is_some() && raw.settle.is_some() {
        ctx.error(
            &format!("{path}.settle_until"),
            "give settle or settle_until, not both",
        );
    }
    // A special test's duration is the standard's: it never stops early, whatever the defaults.
    let is_special = matches!(special, Some(Some(_)));
    let sequential_raw = raw.samples_until_decided.clone().or_else(|| {
        (raw.samples.is_none() && !is_special)
            .then(|| defaults.samples_until_decided.clone())
            .flatten()
    });
    if raw.samples_until_decided.is_some() && is_special {
        ctx.error(
            &format!("{path}.samples_until_decided"),
            "a special test takes its whole duration from the standard: it cannot stop early",
        );
    }
    if raw.samples_until_decided.is_some() && raw.samples.is_some() {
        ctx.error(
            &format!("{path}.samples_until_decided"),
            "give samples or samples_until_decided, not both",
        );
    }
    let sequential = sequential_raw.as_ref().and_then(|r| {
        let p = if raw.samples_until_decided.is_some() {
            format!("{path}.samples_until_decided")
        } else {
            "defaults.samples_until_decided".to_string()
        };
        let min = ctx.count(&format!("{p}.min"), &r.min);
        let max = ctx.count(&format!("{p}.max"), &r.max);
        match (min, max) {
            (Some(min), Some(max)) if min >= 2 && max >= min => {
                Some(crate::plan::SequentialRule { min, max })
            }
            (Some(_), Some(_)) => {
                ctx.error(&p, "min must be at least 2 and max at least min");
                None
            }
            _ => None,
        }
    });
    if let Some(rule) = sequential {
        samples = Some(rule.max);
    }
    // Counting the test output sets the window: the gate, or long enough for the count.
    let counting = pulses::counting(
        ctx,
        path,
        raw,
        (ratings, load.as_ref()),
        special.as_ref().and_then(|s| s.as_ref()),
        pulses::Timing {
            samples,
            interval_s,
        },
        sequential,
    );
    let mut sequential = sequential;
    if raw.pulses.is_some() && counting.is_none() {
        // A mistake in the pulses section is said there once: the checks are read against a
        // stand-in window rather than refused again for having none.
        samples = Some(2);
        interval_s = Some(1.0);
    }
    if let Some(Some(c)) = &counting {
        samples = Some(c.samples);
        interval_s = Some(c.interval_s);
        if matches!(c.spec.method, crate::plan::PulseMethod::FixedPulses { .. }) {
            sequential = None;
        }
    }
    // One reading has no spread of its own: its repeatability must come from earlier data.
    let repeatability = match &raw.repeatability {
        None => Some(None),
        Some(r) => {
            let p = format!("{path}.repeatability");
            let relative = ctx.value(&format!("{p}.relative"), &r.relative, Dimension::Percent);
            let from = ctx.non_empty(&format!("{p}.from"), &r.from);
            match relative {
                Some(v) if v <= 0.0 => {
                    ctx.error(
                        &format!("{p}.relative"),
                        "a repeatability must be above 0 %",
                    );
                    None
                }
                Some(v) => from.map(|from| {
                    Some(crate::plan::Repeatability {
                        relative: v / 100.0,
                        from,
                    })
                }),
                None => None,
            }
        }
    };
    let measures_spread = raw
        .checks
        .iter()
        .any(|c| Quantity::from_name(c.quantity.0.trim()).is_some_and(|q| !q.is_register()));
    if samples == Some(1) && raw.repeatability.is_none() && measures_spread {
        ctx.error(
            &if raw.samples.is_some() {
                format!("{path}.samples")
            } else {
                "defaults.samples".to_string()
            },
            "one sample has no spread of its own, so the uncertainty would leave out the unit's repeatability: take at least 2, or declare it as repeatability: { relative: 0.05 %, from: \"where it was measured\" }",
        );
    }
    let window_s = match (samples, interval_s) {
        (Some(n), Some(i)) => f64::from(n.saturating_sub(1)) * i,
        _ => 0.0,
    };
    let checks: Vec<Option<Check>> = raw
        .checks
        .iter()
        .enumerate()
        .map(|(i, c)| {
            check(
                ctx,
                &format!("{path}.checks[{i}]"),
                c,
                (load.as_ref(), ratings),
                link,
                window_s,
            )
        })
        .collect();
    let mut checks: Vec<Check> = checks.into_iter().collect::<Option<_>>()?;
    // A rule inherited from the defaults is checked where it is written.
    let settle_path = if raw.settle_until.is_some() {
        format!("{path}.settle_until")
    } else {
        "defaults.settle_until".to_string()
    };
    let settle_until = match &settle_raw {
        None => None,
        Some(r) => settle_rule(ctx, &settle_path, r, &checks),
    };
    let settle_s = match (&settle_until, settle_s) {
        (Some(rule), _) => Some(rule.max_s),
        (None, s) => s,
    };
    let special = special?;
    let counting = counting?;
    // A special test is read from the test output when the step counts pulses.
    let special_channel = if counting.is_some() {
        crate::plan::TEST_OUTPUT.to_string()
    } else {
        link.channels().first().cloned().unwrap_or_default()
    };
    let counts_pulses = checks.iter().any(Check::counts_pulses);
    if let Some(i) = checks.iter().position(Check::counts_pulses)
        && counting.is_none()
    {
        ctx.error(
            &format!("{path}.checks[{i}].channel"),
            "a check on the test output needs the step to count pulses: add pulses: { method: fixed_time, gate: 60 s } (or method: fixed_pulses, count: 25)",
        );
    }
    if counting.is_some() && !counts_pulses && special.is_none() {
        ctx.error(
            &format!("{path}.pulses"),
            "the step counts pulses but no check reads them: add { quantity: active_energy, channel: test_output, tolerance: ... }",
        );
    }
    match &special {
        Some(SpecialTest::NoLoad { allowance_wh, .. }) => checks.push(Check {
            quantity: Quantity::ActiveEnergy,
            channel: special_channel.clone(),
            tolerance: Tolerance::AtMost {
                bound: *allowance_wh,
            },
        }),
        Some(SpecialTest::Starting { current, .. }) => {
            let load = load.as_ref()?;
            let expected_wh = load.voltage * current * window_s / 3600.0;
            if window_s <= 0.0 {
                ctx.error(
                    &format!("{path}.samples"),
                    "a starting test needs a window: at least 2 samples and an interval",
                );
            }
            // Counted at the test output, the pulses must start and keep coming: at least two
            // in the window (common practice, no published source); the window holds three.
            let bound = match &counting {
                Some(c) => 2.0 * c.spec.pulse_wh(),
                None => 0.5 * expected_wh,
            };
            checks.push(Check {
                quantity: Quantity::ActiveEnergy,
                channel: special_channel,
                tolerance: Tolerance::AtLeast { bound },
            });
        }
        None => {}
    }
    Some(Step {
        id: id?,
        description: raw.description.as_ref().map(|t| t.0.clone()),
        load: load?,
        load_within: load_within?,
        repeatability: repeatability?,
        settle_s: settle_s?,
        samples: samples?,
        interval_s: interval_s?,
        checks,
        special,
        settle_until,
        sequential,
        pulses: counting.map(|c| c.spec),
    })
}

pub(super) fn settle_rule(
    ctx: &mut Ctx,
    path: &str,
    raw: &crate::plan::raw::RawSettleUntil,
    checks: &[Check],
) -> Option<crate::plan::SettleRule> {
    let watched = match &raw.quantity {
        Some(t) => match Quantity::from_name(t.0.trim()) {
            Some(q) => checks
                .iter()
                .find(|c| c.quantity == q)
                .map(|c| (q, c.channel.clone())),
            None => {
                ctx.error(
                    &format!("{path}.quantity"),
                    format!("unknown quantity \"{}\"", t.0),
                );
                return None;
            }
        },
        // The current is what a load change moves most and slowest; watch it by default.
        None => checks
            .iter()
            .find(|c| c.quantity == Quantity::Current)
            .or_else(|| checks.iter().find(|c| !c.quantity.is_register()))
            .map(|c| (Quantity::Current, c.channel.clone())),
    };
    let Some((quantity, channel)) = watched else {
        ctx.error(
            path,
            "settling until stable needs a quantity the step checks (not an energy register) to watch",
        );
        return None;
    };
    let band_text = raw.stable_within.0.trim();
    let (band, relative) = if band_text.ends_with('%') {
        (
            ctx.value(
                &format!("{path}.stable_within"),
                &raw.stable_within,
                Dimension::Percent,
            )? / 100.0,
            true,
        )
    } else {
        (
            ctx.value(
                &format!("{path}.stable_within"),
                &raw.stable_within,
                quantity.dimension(),
            )?,
            false,
        )
    };
    let readings = match &raw.readings {
        None => Some(5),
        Some(t) => ctx.count(&format!("{path}.readings"), t),
    }?;
    let every_s = ctx
        .optional_value(
            &format!("{path}.every"),
            raw.every.as_ref(),
            Dimension::Time,
        )?
        .unwrap_or(0.1);
    let min_s = ctx
        .optional_value(
            &format!("{path}.at_least"),
            raw.at_least.as_ref(),
            Dimension::Time,
        )?
        .unwrap_or(0.0);
    let max_s = ctx.value(&format!("{path}.at_most"), &raw.at_most, Dimension::Time)?;
    if readings < 2 || every_s <= 0.0 || max_s < min_s || band <= 0.0 {
        ctx.error(
            path,
            "settle_until needs readings ≥ 2, every > 0, a band > 0 and at_most ≥ at_least",
        );
        return None;
    }
    // The readings that show it stable must fit in the longest wait, or it never can be.
    let needed_s = f64::from(readings - 1) * every_s;
    if needed_s > max_s {
        ctx.error(
            &format!("{path}.at_most"),
            format!(
                "{readings} readings {} apart take {}, longer than at_most: the step could never settle",
                crate::plan::units::duration_text(every_s),
                crate::plan::units::duration_text(needed_s)
            ),
        );
        return None;
    }
    Some(crate::plan::SettleRule {
        quantity,
        channel,
        band,
        relative,
        readings,
        every_s,
        min_s,
        max_s,
    })
}

/// The special test a step asks for, with its figures derived from the class tables.
/// `Some(None)`: no special test; `None`: a mistake was recorded.
pub(super) fn special_test(
    ctx: &mut Ctx,
    path: &str,
    raw: &RawStep,
    ratings: &Ratings,
) -> Option<Option<SpecialTest>> {
    let Some(kind) = &raw.special else {
        return Some(None);
    };
    let spath = format!("{path}.special");
    let fail = |ctx: &mut Ctx, message: String| {
        ctx.error(&spath, message);
        None
    };
    if ratings.class.is_empty() {
        return fail(
            ctx,
            "a special test takes its figures from the meter's accuracy class: give ratings.class"
                .into(),
        );
    }
    let currents = match class_currents(ratings, &ratings.class) {
        Ok(c) => c,
        Err(e) => return fail(ctx, e),
    };
    let Some(values) = classes::special(&ratings.class, currents.base) else {
        return fail(
            ctx,
            format!(
                "the class tables have no starting or no-load figures for class {}",
                ratings.class
            ),
        );
    };
    match kind.0.trim() {
        "no_load" => {
            let (Some(k), Some(c)) = (ratings.meter_constant, values.creep_constant) else {
                return fail(
                    ctx,
                    "a no-load test needs ratings.meter_constant and a class with a no-load constant".into(),
                );
            };
            let minutes = classes::creep_minutes(
                c,
                k,
                ratings.elements,
                ratings.nominal_voltage,
                ratings.max_current,
            );
            Some(Some(SpecialTest::NoLoad {
                minutes,
                allowance_wh: 1000.0 / k,
                basis: values.basis,
            }))
        }
        "starting" => Some(Some(SpecialTest::Starting {
            current: values.starting_fraction * currents.base_a,
            basis: values.basis,
        })),
        other => fail(
            ctx,
            format!("unknown special test \"{other}\": use no_load or starting"),
        ),
    }
}

pub(super) fn load(ctx: &mut Ctx, path: &str, raw: &RawLoad, ratings: &Ratings) -> Option<Load> {
    // A voltage may be given as a percentage of the nominal one ("115 %" for the no-load test).
    let voltage = match &raw.voltage {
        Some(t) if t.0.trim().ends_with('%') => ctx
            .value(&format!("{path}.voltage"), t, Dimension::Percent)
            .map(|p| p / 100.0 * ratings.nominal_voltage),
        other => ctx
            .optional_value(
                &format!("{path}.voltage"),
                other.as_ref(),
                Dimension::Voltage,
            )
            .map(|v| v.unwrap_or(ratings.nominal_voltage)),
    };
    let current = ctx.value(&format!("{path}.current"), &raw.current, Dimension::Current);
    let frequency = ctx
        .optional_value(
            &format!("{path}.frequency"),
            raw.frequency.as_ref(),
            Dimension::Frequency,
        )
        .map(|v| v.unwrap_or(ratings.frequency));
    let phase_deg = match (&raw.power_factor, &raw.phase) {
        (Some(_), Some(_)) => {
            ctx.error(
                &format!("{path}.phase"),
                "give power_factor or phase, not both",
            );
            None
        }
        (Some(pf), None) => match parse_power_factor(&pf.0) {
            Ok(phase) => Some(phase),
            Err(message) => {
                ctx.error(&format!("{path}.power_factor"), message.to_string());
                None
            }
        },
        (None, Some(angle)) => ctx
            .value(&format!("{path}.phase"), angle, Dimension::Angle)
            .and_then(|a| {
                if (-90.0..=90.0).contains(&a) {
                    Some(a)
                } else {
                    ctx.error(
                        &format!("{path}.phase"),
                        "a phase angle must lie between -90° (capacitive) and 90° (inductive)",
                    );
                    None
                }
            }),
        (None, None) => Some(0.0),
    };
    let (voltage, current, frequency, phase_deg) = (voltage?, current?, frequency?, phase_deg?);
    if voltage <= 0.0 {
        ctx.error(
            &format!("{path}.voltage"),
            "the test voltage must be greater than zero",
        );
    }
    if frequency <= 0.0 {
        ctx.error(
            &format!("{path}.frequency"),
            "the frequency must be greater than zero",
        );
    }
    if current < 0.0 {
        ctx.error(
            &format!("{path}.current"),
            "a load current cannot be negative",
        );
    } else if current > ratings.max_current * (1.0 + 1e-9) {
        ctx.error(
            &format!("{path}.current"),
            format!(
                "{} exceeds the plan's max_current of {}",
                units::Display(current, Dimension::Current),
                units::Display(ratings.max_current, Dimension::Current)
            ),
        );
    }
    Some(Load {
        voltage,
        current,
        phase_deg,
        frequency,
    })
}

/// Why a power factor cannot be read.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PowerFactorError {
    #[error("\"{0}\" is not a power factor: {HELP}")]
    NotANumber(String),
    #[error("a power factor lies in (0, 1], got {0}: {HELP}")]
    OutOfRange(f64),
    #[error("\"{0}\" does not say inductive or capacitive: {HELP}")]
    NoSide(String),
    #[error("\"{0}\" is neither inductive nor capacitive: {HELP}")]
    UnknownSide(String),
}

pub(super) const HELP: &str =
    "write a power factor as \"1\", \"0.5 inductive\" or \"0.8 capacitive\"";

/// Reads "1", "0.5 inductive" (or "ind", "lagging"), "0.8 capacitive" (or "cap", "leading")
/// into the phase angle in degrees, positive when the current lags.
pub(crate) fn parse_power_factor(text: &str) -> Result<f64, PowerFactorError> {
    let mut parts = text.split_whitespace();
    let number = parts.next().unwrap_or("");
    let side = parts.next();
    if parts.next().is_some() {
        return Err(PowerFactorError::NotANumber(text.to_string()));
    }
    let pf: f64 = number
        .parse()
        .map_err(|_| PowerFactorError::NotANumber(text.to_string()))?;
    if !(pf > 0.0 && pf <= 1.0) {
        return Err(PowerFactorError::OutOfRange(pf));
    }
    let angle = pf.acos().to_degrees();
    let sign = match side {
        None if pf == 1.0 => 1.0,
        None => return Err(PowerFactorError::NoSide(text.to_string())),
        Some("ind" | "inductive" | "lag" | "lagging") => 1.0,
        Some("cap" | "capacitive" | "lead" | "leading") => -1.0,
        Some(other) => return Err(PowerFactorError::UnknownSide(other.to_string())),
    };
    Ok(sign * angle)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn power_factor_words() {
        assert_eq!(parse_power_factor("1").unwrap(), 0.0);
        assert!((parse_power_factor("0.5 inductive").unwrap() - 60.0).abs() < 1e-9);
        assert!((parse_power_factor("0.5 ind").unwrap() - 60.0).abs() < 1e-9);
        // 0.8 capacitive: current leads by arccos 0.8 = 36.87° (the definition of power factor,
        // cos φ; IEC 60050-131, from memory).
        assert!((parse_power_factor("0.8 capacitive").unwrap() + 36.869_897_6).abs() < 1e-6);
        assert!(parse_power_factor("0.5").is_err());
        assert!(parse_power_factor("1.2").is_err());
        assert!(parse_power_factor("0.5 sideways").is_err());
    }
}
