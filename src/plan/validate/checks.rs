//! A step's `checks`: the quantity, the channel and the tolerance in each of its forms.

use super::*;

pub(super) fn check(
    ctx: &mut Ctx,
    path: &str,
    raw: &RawCheck,
    (load, ratings): (Option<&Load>, &Ratings),
    link: &LinkSpec,
    window_s: f64,
) -> Option<Check> {
    let quantity = match Quantity::from_name(raw.quantity.0.trim()) {
        Some(q) => Some(q),
        None => {
            let names: Vec<&str> = Quantity::ALL.iter().map(|q| q.name()).collect();
            ctx.error(
                &format!("{path}.quantity"),
                format!(
                    "unknown quantity \"{}\", expected one of {}",
                    raw.quantity.0,
                    names.join(", ")
                ),
            );
            None
        }
    };
    let channels = link.channels();
    let test_output = raw
        .channel
        .as_ref()
        .is_some_and(|t| t.0.trim() == crate::plan::TEST_OUTPUT);
    let channel = match &raw.channel {
        None => channels.first().cloned(),
        Some(_) if test_output => Some(crate::plan::TEST_OUTPUT.to_string()),
        Some(t) if channels.iter().any(|c| *c == t.0.trim()) => Some(t.0.trim().to_string()),
        Some(t) => {
            ctx.error(
                &format!("{path}.channel"),
                format!(
                    "unknown channel \"{}\": the link has {}",
                    t.0,
                    channels.join(", ")
                ),
            );
            None
        }
    };
    let quantity = quantity?;
    if test_output && quantity != Quantity::ActiveEnergy {
        ctx.error(
            &format!("{path}.channel"),
            format!(
                "the test output gives pulses of active energy: {} cannot be read from it",
                quantity.name()
            ),
        );
    } else if !test_output && !link.reads(quantity) {
        ctx.error(
            &format!("{path}.quantity"),
            format!(
                "the link has no request for {}: add it under link.quantities",
                quantity.name()
            ),
        );
    }
    let tolerance = tolerance(
        ctx,
        &format!("{path}.tolerance"),
        &raw.tolerance,
        quantity,
        ratings,
        load,
    )?;
    if let Some(load) = load
        && tolerance.is_relative()
        && load.nominal(quantity, window_s).abs() < 1e-12
    {
        ctx.error(
            &format!("{path}.tolerance"),
            format!(
                "a percent-of-reading tolerance needs a non-zero reference, but {} is zero at this step's load ({}); use within or at_most",
                quantity.name(),
                load.describe()
            ),
        );
    }
    if quantity.is_register() && window_s <= 0.0 {
        ctx.error(
            &format!("{path}.quantity"),
            "an energy check needs a sampling window: give the step at least 2 samples and an interval",
        );
    }
    Some(Check {
        quantity,
        channel: channel?,
        tolerance,
    })
}

pub(super) fn tolerance(
    ctx: &mut Ctx,
    path: &str,
    raw: &RawTolerance,
    quantity: Quantity,
    ratings: &Ratings,
    load: Option<&Load>,
) -> Option<Tolerance> {
    let dim = quantity.dimension();
    let p = |k: &str| format!("{path}.{k}");
    let given = [
        raw.percent.is_some(),
        raw.plus.is_some(),
        raw.plus_of_range.is_some(),
        raw.range.is_some(),
        raw.within.is_some(),
        raw.at_most.is_some(),
        raw.class.is_some(),
    ];
    let tol = match given {
        [true, false, false, false, false, false, false] => {
            let percent = ctx.value(&p("percent"), raw.percent.as_ref()?, Dimension::Percent)?;
            Tolerance::PercentOfReading { percent }
        }
        [true, true, false, false, false, false, false] => {
            let percent = ctx.value(&p("percent"), raw.percent.as_ref()?, Dimension::Percent);
            let absolute = ctx.value(&p("plus"), raw.plus.as_ref()?, dim);
            Tolerance::PercentPlusAbsolute {
                percent: percent?,
                absolute: absolute?,
            }
        }
        [true, false, true, true, false, false, false] => {
            let percent = ctx.value(&p("percent"), raw.percent.as_ref()?, Dimension::Percent);
            let range_percent = ctx.value(
                &p("plus_of_range"),
                raw.plus_of_range.as_ref()?,
                Dimension::Percent,
            );
            let range = ctx.value(&p("range"), raw.range.as_ref()?, dim);
            Tolerance::PercentPlusRange {
                percent: percent?,
                range_percent: range_percent?,
                range: range?,
            }
        }
        [false, false, false, false, true, false, false] => Tolerance::Band {
            half_width: ctx.value(&p("within"), raw.within.as_ref()?, dim)?,
        },
        [false, false, false, false, false, true, false] => Tolerance::AtMost {
            bound: ctx.value(&p("at_most"), raw.at_most.as_ref()?, dim)?,
        },
        [false, false, false, false, false, false, true] => {
            if raw.class.as_ref().map(|t| t.0.trim()) != Some("true") {
                ctx.error(
                    &p("class"),
                    "write class: true to take the limit from the class tables",
                );
                return None;
            }
            let load = load?;
            match class_limit(ratings, quantity, load) {
                Ok((percent, basis)) => Tolerance::Class { percent, basis },
                Err(message) => {
                    ctx.error(&p("class"), message);
                    return None;
                }
            }
        }
        _ => {
            ctx.error(
                path,
                "a tolerance is one of: {percent}, {percent, plus}, {percent, plus_of_range, range}, {within}, {at_most} or {class: true}",
            );
            return None;
        }
    };
    let negative = match tol.clone() {
        Tolerance::PercentOfReading { percent } => percent < 0.0,
        Tolerance::PercentPlusAbsolute { percent, absolute } => percent < 0.0 || absolute < 0.0,
        Tolerance::PercentPlusRange {
            percent,
            range_percent,
            range,
        } => percent < 0.0 || range_percent < 0.0 || range <= 0.0,
        Tolerance::Band { half_width } => half_width < 0.0,
        Tolerance::AtMost { bound } | Tolerance::AtLeast { bound } => bound < 0.0,
        Tolerance::Class { percent, .. } => percent < 0.0,
    };
    if negative {
        ctx.error(path, "tolerance terms cannot be negative");
        return None;
    }
    let zero = match tol.clone() {
        Tolerance::PercentOfReading { percent } | Tolerance::Class { percent, .. } => {
            percent == 0.0
        }
        Tolerance::PercentPlusAbsolute { percent, absolute } => percent == 0.0 && absolute == 0.0,
        Tolerance::PercentPlusRange {
            percent,
            range_percent,
            ..
        } => percent == 0.0 && range_percent == 0.0,
        Tolerance::Band { half_width } => half_width == 0.0,
        Tolerance::AtMost { .. } | Tolerance::AtLeast { .. } => false,
    };
    if zero {
        ctx.error(
            path,
            "a tolerance of zero can never be met by a measurement, which always has an uncertainty",
        );
        return None;
    }
    Some(tol)
}
