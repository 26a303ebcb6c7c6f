//! Who is in each position: every unit identified (model, serial, firmware against the plan),
//! identities that cannot be trusted refused (control characters, a serial reported twice), and
//! on a resume the unit that left a position while the run was interrupted given its own record.

use super::*;

/// Phase one: every position identified (model, serial, firmware), units sharing a serial
/// refused, and on a resume a unit found where the interrupted run had another taken for a
/// new unit (tested from the first step; the one it replaced keeps its own record, returned
/// beside).
pub(super) fn identify_all(
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
    rescan_mismatches(plan, bench, &mut units);
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
pub(super) fn announce_units(units: &[Unit], reporter: &mut dyn Reporter, recorder: &dyn Recorder) {
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

/// Reads a position's identity and decides whether the unit may be tested.
pub(super) fn identify(
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
pub(super) fn hostile_identity(id: &Identity) -> Option<(Identity, String)> {
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
pub(super) fn refuse_shared_serials(units: &mut [Unit]) {
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
pub(super) fn replaced_record(
    new: &UnitRecord,
    old_serial: &str,
    resume: &Resume,
    plan: &Plan,
) -> UnitRecord {
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

/// A unit whose serial is not the one scanned for its position may be scanned again, up to
/// three times, before any load: a scan that now matches lets it take part (the first scan is
/// kept in its notes), anything else leaves it out as before.
fn rescan_mismatches(plan: &Plan, bench: &mut Bench, units: &mut [Unit]) {
    let Some(rescan) = bench.rescan.as_mut() else {
        return;
    };
    for (unit, position) in units.iter_mut().zip(bench.positions.iter_mut()) {
        let (Some(identity), Some(scanned)) =
            (&unit.record.identity, position.expected_serial.clone())
        else {
            continue;
        };
        if unit.active || identity.serial == scanned {
            continue;
        }
        let mut last = scanned.clone();
        for _ in 0..3 {
            let Some(again) = rescan.rescan(position.number, &last, &identity.serial) else {
                break;
            };
            if again == identity.serial {
                position.expected_serial = Some(again);
                match refusal_reason(plan, position, identity) {
                    None => {
                        unit.active = true;
                        unit.record.verdict.reasons.clear();
                    }
                    Some((status, reason)) => {
                        unit.record.verdict.status = status;
                        unit.record.verdict.reasons = vec![reason];
                    }
                }
                unit.record.notes.push(format!(
                    "serial scanned again before the first load: first scanned as {scanned}"
                ));
                break;
            }
            last = again;
        }
    }
}

/// Why a unit that answered must not be tested, if it must not.
pub(super) fn refusal_reason(
    plan: &Plan,
    position: &Position,
    id: &Identity,
) -> Option<(UnitStatus, String)> {
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
