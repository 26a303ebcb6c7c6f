//! One check's whole computation, from its stored inputs, as text an auditor can follow by
//! hand: the readings, the reference, the error, each budget term with its basis, ν, k, U, the
//! limits, the rule and the risk. Every figure is printed with all its digits, as stored, so
//! that the arithmetic can be redone.

use crate::metrology::tolerance::Sense;
use crate::plan::DecisionRule;
use crate::record::{CheckRecord, StepRecord, UnitRecord};
use std::fmt::Write;

/// The step or check asked for is not in the record.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ExplainError {
    #[error("no step \"{step}\" in the record of {serial} (steps: {steps})")]
    NoStep {
        step: String,
        serial: String,
        steps: String,
    },
    #[error("step {step} checks no {quantity} (it checks: {checks})")]
    NoCheck {
        step: String,
        quantity: String,
        checks: String,
    },
}

/// The computation of the check of `quantity` (and `channel`, where several) at step `step`
/// (its id, or its number counted from 1) of `record`.
pub fn explain(
    record: &UnitRecord,
    step: &str,
    quantity: &str,
    channel: Option<&str>,
) -> Result<String, ExplainError> {
    let (index, s) = record
        .steps
        .iter()
        .enumerate()
        .find(|(i, s)| s.id == step || step.parse::<usize>().ok() == Some(i + 1))
        .ok_or_else(|| ExplainError::NoStep {
            step: step.to_string(),
            serial: record.serial.clone(),
            steps: record
                .steps
                .iter()
                .map(|s| s.id.as_str())
                .collect::<Vec<_>>()
                .join(", "),
        })?;
    let c = s
        .checks
        .iter()
        .find(|c| c.quantity.name() == quantity && channel.is_none_or(|ch| c.channel == ch))
        .ok_or_else(|| ExplainError::NoCheck {
            step: s.id.clone(),
            quantity: format!(
                "{quantity}{}",
                channel.map_or(String::new(), |ch| format!(" on channel {ch}"))
            ),
            checks: s
                .checks
                .iter()
                .map(|c| format!("{} on {}", c.quantity.name(), c.channel))
                .collect::<Vec<_>>()
                .join(", "),
        })?;
    let mut out = String::new();
    let w = &mut out;
    let _ = writeln!(
        w,
        "Unit {} (position {}), run {}, plan {} revision {} (SHA-256 {})",
        record.serial,
        record.position,
        record.run_id,
        record.plan.id,
        record.plan.revision,
        record.plan.sha256
    );
    let _ = writeln!(
        w,
        "Step {} ({}), attempt {}: {}; status {:?}{}",
        index + 1,
        s.id,
        s.attempt,
        s.load.describe(),
        s.status,
        s.reason
            .as_deref()
            .map_or(String::new(), |r| format!(" ({r})"))
    );
    let _ = writeln!(
        w,
        "Check: {} on channel {}, unit {}",
        c.quantity.name(),
        c.channel,
        c.unit
    );
    readings(w, c);
    reference(w, s, c);
    computation(w, c);
    let _ = writeln!(w, "Verdict: {} {}", c.verdict.symbol(), c.verdict.word());
    if let Some(n) = &c.note {
        let _ = writeln!(w, "Note: {n}");
    }
    Ok(out)
}

fn readings(w: &mut String, c: &CheckRecord) {
    let _ = writeln!(w, "\n1. The unit's readings ({}):", c.samples.len());
    for (i, x) in c.samples.iter().enumerate() {
        let _ = writeln!(
            w,
            "   {:>3}. t = {} s  value = {}{}",
            i + 1,
            x.t_s,
            x.value,
            x.took_s
                .map_or(String::new(), |t| format!("  (answered within {t} s)"))
        );
    }
    if let Some(p) = &c.pulses {
        let how = if p.method == "fixed_pulses" {
            "timed by the counter from the first pulse edge to the last"
        } else {
            "counted over the gate from the first reading to the last"
        };
        let _ = writeln!(
            w,
            "   pulses of the test output: {} at {} imp/kWh, {how}, {} s; energy E = N / k = {} × {} Wh",
            p.pulses,
            p.meter_constant,
            p.seconds,
            p.pulses,
            1000.0 / p.meter_constant
        );
    } else if c.quantity.is_register() {
        if let (Some(a), Some(b)) = (c.samples.first(), c.samples.last()) {
            let _ = writeln!(
                w,
                "   advance of the register = last − first = {} − {} = {}",
                b.value,
                a.value,
                b.value - a.value
            );
        }
    } else if let Some(s) = &c.summary {
        let _ = writeln!(
            w,
            "   mean = Σ values / n = {} (n = {}); s = √(Σ (value − mean)² / (n − 1)) = {}",
            s.mean,
            s.count,
            s.std_dev
                .map_or("— (one reading)".into(), |x| x.to_string())
        );
    }
    if let Some(m) = c.measured {
        let _ = writeln!(w, "   measured value compared: {m}");
    }
}

fn reference(w: &mut String, s: &StepRecord, c: &CheckRecord) {
    let _ = writeln!(w, "\n2. The reference:");
    if let Some(p) = c.pulses.as_ref()
        && let (Some(n), Some(k)) = (p.reference_pulses, p.reference_constant)
    {
        let _ = writeln!(
            w,
            "   the reference standard's pulses over the same interval: {n} at {k} imp/kWh, E_ref = N_ref / k_ref = {} Wh",
            c.reference.map_or("—".to_string(), |r| r.to_string())
        );
        return;
    }
    match s.references.iter().find(|r| r.quantity == c.quantity) {
        Some(r) => {
            let _ = writeln!(
                w,
                "   {} from the {} at bench time {} s{}",
                r.reading.value,
                r.reading.source,
                r.reading.taken_at_s,
                r.reading
                    .as_given
                    .as_deref()
                    .map_or(String::new(), |g| format!(", given as \"{g}\""))
            );
            if let Some((t0, t1)) = r.reading.window_s {
                let _ = writeln!(
                    w,
                    "   for the sampling window from bench time {t0} s to {t1} s ({} s)",
                    t1 - t0
                );
            }
        }
        None => {
            let _ = writeln!(w, "   none read for this quantity");
        }
    }
    if let Some(r) = c.reference
        && c.quantity.is_register()
    {
        let span = if c.pulses.is_some() {
            "the counted pulses cover"
        } else {
            "the register's readings cover"
        };
        let _ = writeln!(w, "   reference energy over the span {span}: {r}");
    }
}

fn computation(w: &mut String, c: &CheckRecord) {
    let _ = writeln!(w, "\n3. The error:");
    match (&c.evaluation, c.measured, c.reference) {
        (Some(e), Some(m), Some(r)) if e.error_unit == "%" => {
            let _ = writeln!(
                w,
                "   e = (measured − reference) / reference × 100 = ({m} − {r}) / {r} × 100 = {} %",
                e.error
            );
        }
        (Some(e), Some(m), Some(r)) => {
            let _ = writeln!(
                w,
                "   e = measured − reference = {m} − {r} = {} {}",
                e.error, e.error_unit
            );
        }
        (Some(e), _, None) => {
            let _ = writeln!(
                w,
                "   a bound on the reading itself: compared value {} {}",
                e.error, e.error_unit
            );
        }
        _ => {
            let _ = writeln!(w, "   not evaluated");
            return;
        }
    }
    if let Some(b) = &c.uncertainty {
        let _ = writeln!(
            w,
            "\n4. The uncertainty budget (GUM): each term is a standard uncertainty times its sensitivity, in the error's unit"
        );
        for x in &b.components {
            let _ = writeln!(
                w,
                "   Type {:?}  u = {}  ν = {}  {}: {}",
                x.evaluation,
                x.u,
                x.dof.map_or("∞".into(), |d| d.to_string()),
                x.name,
                x.basis
            );
        }
        for n in &b.notes {
            let _ = writeln!(w, "   note: {n}");
        }
        let _ = writeln!(w, "   u_c = √(Σ u²) = {}", b.combined);
        let _ = writeln!(
            w,
            "   ν_eff = u_c⁴ / Σ (u⁴ / ν) (Welch–Satterthwaite) = {}",
            b.dof_eff.map_or("∞".into(), |d| d.to_string())
        );
        let _ = writeln!(
            w,
            "   k = Student's t at {} % for ν_eff = {}",
            b.coverage_probability * 100.0,
            b.k
        );
        let _ = writeln!(w, "   U = k · u_c = {}", b.expanded);
    }
    if let (Some(e), Some(d)) = (&c.evaluation, &c.decision) {
        let _ = writeln!(w, "\n5. The decision (ILAC-G8):");
        let side = match e.sense {
            Sense::PlusMinus => "±",
            Sense::AtMost => "≤",
            Sense::AtLeast => "≥",
        };
        let _ = writeln!(
            w,
            "   tolerance limit TL = {side} {} {}{}",
            d.tolerance_limit,
            e.error_unit,
            match &c.tolerance {
                crate::plan::Tolerance::Class { basis, .. } => format!(" ({basis})"),
                _ => String::new(),
            }
        );
        match d.rule {
            DecisionRule::Simple => {
                let _ = writeln!(w, "   rule: simple acceptance, acceptance limit = TL");
            }
            DecisionRule::Guarded { multiple } => {
                let _ = writeln!(
                    w,
                    "   rule: guarded acceptance, guard band w = {multiple} · U = {}; acceptance limit AL = TL {} w = {}",
                    d.guard_band,
                    if e.sense == Sense::AtLeast {
                        "+"
                    } else {
                        "−"
                    },
                    d.acceptance_limit
                );
            }
        }
        if d.no_acceptance_zone {
            let _ = writeln!(
                w,
                "   no acceptance zone: the guard band exceeds the tolerance, so no result can be accepted"
            );
        }
        let _ = writeln!(
            w,
            "   accepted: {} (the compared value {} the acceptance limit)",
            d.accepted,
            if d.accepted {
                "lies within"
            } else {
                "lies beyond"
            }
        );
        if let Some(t) = d.tur {
            let _ = writeln!(w, "   test uncertainty ratio TL / U = {t}");
        }
        if let Some(r) = d.risk {
            let _ = writeln!(
                w,
                "   specific risk (JCGM 106): P(true error beyond TL | result, u_c) = {r}"
            );
        }
    }
}
