//! From text to a validated [`Plan`], collecting every mistake with its position.

mod calibration;
mod checks;
pub(super) mod link;
mod modbus;
mod pulses;
pub(super) mod ratings;
mod readout;
mod steps;

use super::document::{Ctx, Document, PlanErrors, channel_names};
use calibration::*;
use checks::*;

use super::raw::{RawCheck, RawLink, RawLoad, RawPlan, RawStep, RawTolerance, StepSlot, Text};
use super::units::{self, Dimension};
use super::{
    BaseCurrent, Check, DecisionRule, LinkSpec, Load, Plan, PlanSource, Product, Quantity, Ratings,
    SpecialTest, Step, Tolerance,
};
use crate::metrology::classes;
use ratings::*;
use std::collections::HashSet;
use steps::*;

/// Validates a whole plan text.
/// Reads and checks a plan; `ambient_c` is the bench's ambient temperature, where known, for
/// class limits that depend on it.
pub fn validate(file: &str, text: &str, ambient_c: Option<f64>) -> Result<Plan, PlanErrors> {
    // Straight from the text when the top level reads: no tree of the whole document is built,
    // so memory stays a small multiple of the text however many steps there are.
    let direct =
        serde_path_to_error::deserialize::<_, RawPlan>(serde_yaml::Deserializer::from_str(text));
    if let Ok(mut raw) = direct {
        let mut ctx = Document {
            file,
            text,
            errors: Vec::new(),
            ambient_c,
        };
        let raw_steps: Vec<Option<RawStep>> = std::mem::take(&mut raw.steps)
            .into_iter()
            .enumerate()
            .map(|(i, slot)| match slot {
                StepSlot::Read(step) => Some(*step),
                StepSlot::Mistake { path, message } => {
                    ctx.structure_error(&format!("steps[{i}]"), &path, &message);
                    None
                }
            })
            .collect();
        return validated(ctx, raw, raw_steps);
    }
    // The top level has a mistake: read it as a tree, to report every mistake with its place.
    let (mut document, mut ctx) = Document::parse(file, text)?;
    ctx.ambient_c = ambient_c;
    // Steps are taken out and read one by one (each dropped once read), so that a plan of many
    // steps is held once, not copied; and read even when the top level failed, so that all
    // their mistakes show.
    let step_values = match document.get_mut("steps") {
        Some(serde_yaml::Value::Sequence(s)) => std::mem::take(s),
        _ => Vec::new(),
    };
    let raw: Option<RawPlan> = ctx.structure("", document);
    let raw_steps: Vec<Option<RawStep>> = step_values
        .into_iter()
        .enumerate()
        .map(|(i, v)| ctx.structure(&format!("steps[{i}]"), v))
        .collect();
    match raw {
        Some(raw) => validated(ctx, raw, raw_steps),
        None => Err(ctx.into_errors()),
    }
}

/// The plan's meaning, once its top level and steps are read.
fn validated(
    mut ctx: Document,
    raw: RawPlan,
    raw_steps: Vec<Option<RawStep>>,
) -> Result<Plan, PlanErrors> {
    let raw_link: Option<RawLink> = ctx.structure("link", raw.link.clone());
    if !ctx.errors.is_empty() {
        return Err(ctx.into_errors());
    }
    let Some(raw_link) = raw_link else {
        return Err(ctx.into_errors());
    };
    let raw_steps: Vec<RawStep> = raw_steps.into_iter().flatten().collect();
    let plan = meaning(&mut ctx, raw, raw_link, raw_steps);
    match plan {
        Some(p) if ctx.errors.is_empty() => Ok(p),
        _ => Err(ctx.into_errors()),
    }
}

/// The defaults a step falls back on.
struct StepDefaults {
    load_within: f64,
    settle_s: f64,
    samples: u32,
    interval_s: f64,
    settle_until: Option<super::raw::RawSettleUntil>,
    samples_until_decided: Option<super::raw::RawSequential>,
}

fn meaning(
    ctx: &mut Ctx,
    raw: RawPlan,
    raw_link: RawLink,
    raw_steps: Vec<RawStep>,
) -> Option<Plan> {
    let id = ctx.non_empty("id", &raw.id);
    let revision = ctx.non_empty("revision", &raw.revision);
    let product = product(ctx, &raw);
    let ratings = ratings(ctx, &raw);
    let link = link(ctx, raw_link);
    let defaults = StepDefaults {
        load_within: load_within(
            ctx,
            "defaults.load_within",
            raw.defaults.load_within.as_ref(),
        )
        .unwrap_or(DEFAULT_LOAD_WITHIN),
        settle_s: ctx
            .optional_value(
                "defaults.settle",
                raw.defaults.settle.as_ref(),
                Dimension::Time,
            )
            .flatten()
            .unwrap_or(0.0),
        samples: raw
            .defaults
            .samples
            .as_ref()
            .map(|t| ctx.count("defaults.samples", t).unwrap_or(1))
            .unwrap_or(1),
        interval_s: ctx
            .optional_value(
                "defaults.interval",
                raw.defaults.interval.as_ref(),
                Dimension::Time,
            )
            .flatten()
            .unwrap_or(1.0),
        settle_until: raw.defaults.settle_until.clone(),
        samples_until_decided: raw.defaults.samples_until_decided.clone(),
    };
    if raw_steps.is_empty() {
        ctx.error("steps", "a plan needs at least one step");
    }
    let decision = decision(ctx, raw.decision.as_ref());
    let (ratings, link) = (ratings?, link?);
    let mut seen_ids = HashSet::new();
    let mut steps = Vec::new();
    for (i, raw_step) in raw_steps.iter().enumerate() {
        let path = format!("steps[{i}]");
        if let Some(step) = step(ctx, &path, raw_step, &ratings, &link, &defaults) {
            if !seen_ids.insert(step.id.clone()) {
                ctx.error(
                    &format!("{path}.id"),
                    format!(
                        "step id \"{}\" is used twice: step ids must be unique",
                        step.id
                    ),
                );
            }
            steps.push(step);
        }
    }
    let calibration = match &raw.calibration {
        None => Some(None),
        Some(c) => calibration(ctx, c, &steps, &link).map(Some),
    };
    let plausibility = ctx
        .optional_value(
            "reference_plausibility",
            raw.reference_plausibility.as_ref(),
            Dimension::Percent,
        )
        .map(|p| p.map_or(0.10, |p| p / 100.0));
    let allowance = ctx
        .optional_value(
            "regression_allowance",
            raw.regression_allowance.as_ref(),
            Dimension::Percent,
        )
        .map(|p| p.map_or(0.2, |p| p / 100.0));
    Some(Plan {
        id: id?,
        revision: revision?,
        golden_units: raw
            .golden_units
            .iter()
            .map(|t| t.0.trim().to_string())
            .collect(),
        regression_allowance: allowance?,
        calibration: calibration?,
        reference_plausibility: plausibility?,
        title: raw.title.map(|t| t.0),
        product: product?,
        ratings,
        link,
        decision: decision?,
        steps,
        source: PlanSource::default(),
    })
}

fn decision(ctx: &mut Ctx, raw: Option<&super::raw::RawDecision>) -> Option<DecisionRule> {
    let Some(raw) = raw else {
        return Some(DecisionRule::Simple);
    };
    match (raw.rule.0.trim(), &raw.guard_band) {
        ("simple", None) => Some(DecisionRule::Simple),
        ("simple", Some(_)) => {
            ctx.error("decision.guard_band", "simple acceptance has no guard band");
            None
        }
        ("guarded", band) => {
            let text = band.as_ref().map_or("1 U", |t| t.0.trim());
            let multiple = text.strip_suffix('U').map(str::trim).map(|n| {
                if n.is_empty() {
                    Some(1.0)
                } else {
                    n.parse::<f64>().ok()
                }
            });
            match multiple.flatten() {
                Some(m) if m > 0.0 && m <= 3.0 => Some(DecisionRule::Guarded { multiple: m }),
                _ => {
                    ctx.error(
                        "decision.guard_band",
                        format!("expected a multiple of the expanded uncertainty from 0 to 3, such as \"1 U\" or \"0.5 U\", got \"{text}\""),
                    );
                    None
                }
            }
        }
        (other, _) => {
            ctx.error(
                "decision.rule",
                format!("unknown decision rule \"{other}\": use simple or guarded"),
            );
            None
        }
    }
}

fn link(ctx: &mut Ctx, raw: RawLink) -> Option<LinkSpec> {
    match raw {
        RawLink::Sim { channels } => {
            let channels = channel_names(ctx, channels);
            Some(LinkSpec::Sim { channels })
        }
        RawLink::Text(raw) => link::text_link(ctx, *raw).map(|t| LinkSpec::Text(Box::new(t))),
        RawLink::Modbus(raw) => {
            modbus::modbus_link(ctx, *raw).map(|m| LinkSpec::Modbus(Box::new(m)))
        }
        RawLink::Readout(raw) => {
            readout::readout_link(ctx, *raw).map(|r| LinkSpec::Readout(Box::new(r)))
        }
    }
}
