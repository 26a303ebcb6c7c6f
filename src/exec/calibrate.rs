//! Calibrating each unit after the plan's last calibration point: fit the constants, write them
//! back through the link, read them back, and stop a unit whose constants did not take.

use crate::link::DutLink;
use crate::metrology::calibration::{self, Point};
use crate::metrology::fit::Model;
use crate::plan::CalibrationSpec;
use crate::record::{CalibrationRecord, CalibrationStatus, StepRecord, StepStatus};

/// Relative difference below which a constant read back counts as the one written (the
/// shortest round-trip text of an f64 reads back exactly; a device may print fewer digits).
const READBACK_TOLERANCE: f64 = 1e-9;

/// Fits and, where the plan says so, writes back one unit's constants.
pub(super) fn calibrate_unit(
    spec: &CalibrationSpec,
    steps: &[StepRecord],
    link: &mut dyn DutLink,
) -> CalibrationRecord {
    let mut record = CalibrationRecord {
        quantity: spec.quantity,
        channel: spec.channel.clone(),
        result: None,
        before: None,
        written: None,
        read_back: None,
        status: CalibrationStatus::NotDone,
        reason: None,
        limits: Vec::new(),
    };
    let points = match points_of(spec, steps) {
        Ok(p) => p,
        Err(why) => {
            record.reason = Some(why);
            return record;
        }
    };
    let fitted = match calibration::calibrate(&points, spec.model == Model::Quadratic) {
        Ok(c) => c,
        Err(e) => {
            record.reason = Some(format!("the fit failed: {e}"));
            return record;
        }
    };
    let (offset, gain) = (fitted.offset, fitted.gain);
    record.limits = calibration::judge(&fitted, &spec.limits, spec.quantity.unit());
    record.result = Some(fitted);
    let outside: Vec<String> = record
        .limits
        .iter()
        .filter(|l| !l.within)
        .map(ToString::to_string)
        .collect();
    if !outside.is_empty() {
        // Constants that would hide a faulty front end are not written.
        record.status = CalibrationStatus::OutsideLimits;
        record.reason = Some(format!("outside its limits: {}", outside.join("; ")));
        return record;
    }
    let Some((offset_name, gain_name)) = &spec.write else {
        record.status = CalibrationStatus::Fitted;
        return record;
    };
    let ch = spec.channel.as_str();
    record.before = link
        .read_constant(offset_name, ch)
        .ok()
        .zip(link.read_constant(gain_name, ch).ok());
    let written = link
        .write_constant(offset_name, ch, offset)
        .and_then(|_| link.write_constant(gain_name, ch, gain));
    if let Err(e) = written {
        record.reason = Some(format!("writing the constants failed: {e}"));
        return record;
    }
    record.written = Some((offset, gain));
    let read_back = link
        .read_constant(offset_name, ch)
        .and_then(|o| link.read_constant(gain_name, ch).map(|g| (o, g)));
    match read_back {
        Err(e) => record.reason = Some(format!("reading the constants back failed: {e}")),
        Ok((o, g)) => {
            record.read_back = Some((o, g));
            let tolerance = spec.limits.read_back.unwrap_or(READBACK_TOLERANCE);
            if same(o, offset, tolerance) && same(g, gain, tolerance) {
                record.status = CalibrationStatus::Written;
            } else {
                record.status = CalibrationStatus::Mismatch;
                record.reason = Some(format!(
                    "wrote offset {offset} and gain {gain}, read back {o} and {g}"
                ));
            }
        }
    }
    record
}

fn same(a: f64, b: f64, tolerance: f64) -> bool {
    (a - b).abs() <= tolerance * b.abs().max(1.0)
}

/// The (reference, mean counts) points of the unit's calibration steps.
fn points_of(spec: &CalibrationSpec, steps: &[StepRecord]) -> Result<Vec<Point>, String> {
    spec.points
        .iter()
        .map(|id| {
            let step = steps
                .iter()
                .find(|s| &s.id == id)
                .ok_or_else(|| format!("calibration point {id} was not run"))?;
            if step.status != StepStatus::Done {
                return Err(format!("calibration point {id} did not finish"));
            }
            let p = step
                .calibration_point
                .as_ref()
                .ok_or_else(|| format!("calibration point {id} has no counts"))?;
            match (p.reference, p.mean_counts) {
                (Some(reference), Some(counts)) => Ok(Point { reference, counts }),
                _ => Err(format!(
                    "calibration point {id} lacks its counts or reference"
                )),
            }
        })
        .collect()
}
