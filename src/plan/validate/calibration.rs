//! The plan's `calibration` section: the quantity, the fit, the points, the write-back and
//! the limits the fit is held to.

use super::*;

pub(super) fn calibration(
    ctx: &mut Ctx,
    raw: &crate::plan::raw::RawCalibration,
    steps: &[Step],
    link: &LinkSpec,
) -> Option<crate::plan::CalibrationSpec> {
    use crate::metrology::fit::Model;
    let quantity = Quantity::from_name(raw.quantity.0.trim());
    if quantity.is_none() || quantity.is_some_and(|q| q.is_register()) {
        ctx.error(
            "calibration.quantity",
            format!(
                "\"{}\" cannot be calibrated: give an instantaneous quantity such as current",
                raw.quantity.0
            ),
        );
    }
    let channel = match &raw.channel {
        None => link.channels().first().cloned(),
        Some(t) if link.channels().iter().any(|c| c == t.0.trim()) => Some(t.0.trim().to_string()),
        Some(t) => {
            ctx.error(
                "calibration.channel",
                format!("unknown channel \"{}\"", t.0),
            );
            None
        }
    };
    let model = match raw.fit.as_ref().map(|t| t.0.trim()) {
        None | Some("line") => Some(Model::Line),
        Some("quadratic") => Some(Model::Quadratic),
        Some(other) => {
            ctx.error(
                "calibration.fit",
                format!("unknown fit \"{other}\": use line or quadratic"),
            );
            None
        }
    };
    let mut points = Vec::new();
    for (i, p) in raw.points.iter().enumerate() {
        let id = p.0.trim().to_string();
        if !steps.iter().any(|s| s.id == id) {
            ctx.error(
                &format!("calibration.points[{i}]"),
                format!("no step has the id \"{id}\""),
            );
        } else if points.contains(&id) {
            ctx.error(
                &format!("calibration.points[{i}]"),
                format!("step \"{id}\" is listed twice"),
            );
        } else {
            points.push(id);
        }
    }
    // A line through points at one load has no slope: the gain cannot be found.
    let loads: Vec<f64> = points
        .iter()
        .filter_map(|id| steps.iter().find(|s| &s.id == id))
        .map(|s| s.load.nominal(quantity.unwrap_or(Quantity::Current), 1.0))
        .collect();
    if loads.len() >= 2
        && loads
            .iter()
            .all(|l| (l - loads[0]).abs() <= 1e-12 * l.abs().max(1.0))
    {
        ctx.error(
            "calibration.points",
            "every calibration point is at the same load: a fit needs points at different loads",
        );
    }
    let needed = match model {
        Some(Model::Quadratic) => 4,
        _ => 3,
    };
    if points.len() < needed {
        ctx.error(
            "calibration.points",
            format!(
                "the fit needs at least {needed} points to leave a residual, got {}",
                points.len()
            ),
        );
    }
    let write = raw
        .write
        .as_ref()
        .map(|w| (w.offset.0.trim().to_string(), w.gain.0.trim().to_string()));
    if let Some((offset, gain)) = &write {
        if model == Some(Model::Quadratic) {
            ctx.error(
                "calibration.write",
                "the unit's constants are an offset and a gain: write-back needs fit: line",
            );
        }
        if let Some(writes) = link.writes() {
            for (key, name) in [("offset", offset), ("gain", gain)] {
                match writes.iter().find(|(w, _)| w == name) {
                    None => ctx.error(
                        &format!("calibration.write.{key}"),
                        format!("the link has no write named \"{name}\" (link.writes)"),
                    ),
                    Some((_, false)) => ctx.error(
                        &format!("calibration.write.{key}"),
                        format!("the link's write \"{name}\" has no readback: a written constant must be read back"),
                    ),
                    Some(_) => {}
                }
            }
        }
    }
    let limits = raw
        .limits
        .as_ref()
        .map(|l| calibration_limits(ctx, l, write.is_some()))
        .unwrap_or_default();
    Some(crate::plan::CalibrationSpec {
        quantity: quantity?,
        channel: channel?,
        model: model?,
        points,
        write,
        limits,
    })
}

/// A count or a percentage: "40" (counts) or "2 %" (of the nominal).
pub(super) fn calibration_limits(
    ctx: &mut Ctx,
    raw: &crate::plan::raw::RawCalibrationLimits,
    writes: bool,
) -> crate::metrology::calibration::Limits {
    use crate::metrology::calibration::{Limits, Window};
    let number = |ctx: &mut Ctx, path: &str, text: &Text| -> Option<f64> {
        match text.0.trim().parse::<f64>() {
            Ok(v) if v.is_finite() => Some(v),
            _ => {
                ctx.error(
                    path,
                    format!("expected a number of counts, got \"{}\"", text.0),
                );
                None
            }
        }
    };
    let mut windows = Vec::new();
    for (key, w) in [("gain", &raw.gain), ("offset", &raw.offset)] {
        let Some(w) = w else {
            windows.push(None);
            continue;
        };
        let path = format!("calibration.limits.{key}");
        let nominal = number(ctx, &format!("{path}.nominal"), &w.nominal);
        let within = if w.within.0.trim().ends_with('%') {
            ctx.value(&format!("{path}.within"), &w.within, Dimension::Percent)
                .map(|p| (p / 100.0, true))
        } else {
            number(ctx, &format!("{path}.within"), &w.within).map(|v| (v, false))
        };
        windows.push(match (nominal, within) {
            (Some(nominal), Some((within, relative))) if within > 0.0 => Some(Window {
                nominal,
                within,
                relative,
            }),
            (Some(_), Some(_)) => {
                ctx.error(
                    &format!("{path}.within"),
                    "a window must be wider than zero",
                );
                None
            }
            _ => None,
        });
    }
    let mut percent = |key: &str, text: &Option<Text>| -> Option<f64> {
        let path = format!("calibration.limits.{key}");
        let v = ctx.value(&path, text.as_ref()?, Dimension::Percent)?;
        if v > 0.0 {
            Some(v)
        } else {
            ctx.error(&path, "a limit must be greater than zero");
            None
        }
    };
    let linearity_percent = percent("linearity", &raw.linearity);
    let point_gain_percent = percent("point_gains", &raw.point_gains);
    let read_back = percent("read_back", &raw.read_back).map(|p| p / 100.0);
    if raw.read_back.is_some() && !writes {
        ctx.error(
            "calibration.limits.read_back",
            "nothing is written back (calibration.write), so nothing is read back",
        );
    }
    Limits {
        gain: windows[0],
        offset: windows[1],
        linearity_percent,
        point_gain_percent,
        read_back,
    }
}
