//! From text to a validated [`Plan`], collecting every mistake with its position.

use super::document::{Ctx, Document, PlanErrors, channel_names};
use super::raw::{RawCheck, RawLink, RawLoad, RawPlan, RawStep, RawTolerance, StepSlot, Text};
use super::units::{self, Dimension};
use super::{
    BaseCurrent, Check, DecisionRule, LinkSpec, Load, Plan, PlanSource, Product, Quantity, Ratings,
    SpecialTest, Step, Tolerance,
};
use crate::metrology::classes;
use std::collections::HashSet;

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

fn calibration(
    ctx: &mut Ctx,
    raw: &super::raw::RawCalibration,
    steps: &[Step],
    link: &LinkSpec,
) -> Option<super::CalibrationSpec> {
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
        if let LinkSpec::Text(t) = link {
            for (key, name) in [("offset", offset), ("gain", gain)] {
                match t.writes.iter().find(|w| &w.name == name) {
                    None => ctx.error(
                        &format!("calibration.write.{key}"),
                        format!("the link has no write named \"{name}\" (link.writes)"),
                    ),
                    Some(w) if w.readback.is_none() => ctx.error(
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
    Some(super::CalibrationSpec {
        quantity: quantity?,
        channel: channel?,
        model: model?,
        points,
        write,
        limits,
    })
}

/// A count or a percentage: "40" (counts) or "2 %" (of the nominal).
fn calibration_limits(
    ctx: &mut Ctx,
    raw: &super::raw::RawCalibrationLimits,
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

fn product(ctx: &mut Ctx, raw: &RawPlan) -> Option<Product> {
    let model = ctx.non_empty("product.model", &raw.product.model);
    let pattern = raw.product.firmware.0.clone();
    let firmware = match regex::Regex::new(&pattern) {
        Ok(r) => Some(r),
        Err(e) => {
            ctx.error(
                "product.firmware",
                format!(
                    "the firmware pattern does not compile: {}",
                    one_line(&e.to_string())
                ),
            );
            None
        }
    };
    Some(Product {
        maker: raw.product.maker.as_ref().map(|t| t.0.clone()),
        model: model?,
        firmware_pattern: pattern,
        firmware: firmware?,
    })
}

fn one_line(text: &str) -> String {
    text.split_whitespace().collect::<Vec<_>>().join(" ")
}

fn ratings(ctx: &mut Ctx, raw: &RawPlan) -> Option<Ratings> {
    let r = &raw.ratings;
    let nominal_voltage = ctx.value(
        "ratings.nominal_voltage",
        &r.nominal_voltage,
        Dimension::Voltage,
    );
    let max_current = ctx.value("ratings.max_current", &r.max_current, Dimension::Current);
    let frequency = ctx.value("ratings.frequency", &r.frequency, Dimension::Frequency);
    let class = ctx.non_empty("ratings.class", &r.class);
    let base = match (&r.basic_current, &r.reference_current) {
        (Some(t), None) => ctx
            .value("ratings.basic_current", t, Dimension::Current)
            .map(|v| (v, BaseCurrent::Basic)),
        (None, Some(t)) => ctx
            .value("ratings.reference_current", t, Dimension::Current)
            .map(|v| (v, BaseCurrent::Reference)),
        (Some(_), Some(_)) => {
            ctx.error(
                "ratings.reference_current",
                "give basic_current (Ib) or reference_current (In), not both",
            );
            None
        }
        (None, None) => {
            ctx.error(
                "ratings",
                "missing basic_current (Ib) or reference_current (In)",
            );
            None
        }
    };
    let (nominal_voltage, max_current, frequency, class, (base_current, base_kind)) =
        (nominal_voltage?, max_current?, frequency?, class?, base?);
    for (path, v) in [
        ("ratings.nominal_voltage", nominal_voltage),
        ("ratings.max_current", max_current),
        ("ratings.frequency", frequency),
        ("ratings.basic_current", base_current),
    ] {
        if v <= 0.0 {
            ctx.error(path, "must be greater than zero");
        }
    }
    if base_current > max_current {
        ctx.error(
            "ratings.max_current",
            "the maximum current is below the basic/reference current",
        );
    }
    let transitional_current = ctx
        .optional_value(
            "ratings.transitional_current",
            r.transitional_current.as_ref(),
            Dimension::Current,
        )
        .flatten();
    let minimum_current = ctx
        .optional_value(
            "ratings.minimum_current",
            r.minimum_current.as_ref(),
            Dimension::Current,
        )
        .flatten();
    let shunt = ctx
        .optional_value("ratings.shunt", r.shunt.as_ref(), Dimension::Resistance)
        .flatten();
    let meter_constant = r.meter_constant.as_ref().and_then(|t| {
        let number = t.0.trim().strip_suffix("imp/kWh").map(str::trim);
        match number.and_then(|n| n.parse::<f64>().ok()) {
            Some(k) if k > 0.0 => Some(k),
            _ => {
                ctx.error(
                    "ratings.meter_constant",
                    format!(
                        "expected a meter constant such as \"1000 imp/kWh\", got \"{}\"",
                        t.0
                    ),
                );
                None
            }
        }
    });
    let elements = match &r.elements {
        None => 1,
        Some(t) => match t.0.trim().parse::<u32>() {
            Ok(m @ 1..=3) => m,
            _ => {
                ctx.error(
                    "ratings.elements",
                    "a meter has 1, 2 or 3 measuring elements",
                );
                1
            }
        },
    };
    let ratings = Ratings {
        nominal_voltage,
        base_current,
        base_current_kind: base_kind,
        max_current,
        frequency,
        class,
        reactive_class: r.reactive_class.as_ref().map(|t| t.0.trim().to_string()),
        class_table: r.class_table.as_ref().map(|t| t.0.trim().to_string()),
        ambient_c: ctx.ambient_c,
        transitional_current,
        minimum_current,
        meter_constant,
        elements,
        shunt,
    };
    if let (Some(table), Ok(currents)) = (
        &ratings.class_table,
        class_currents(&ratings, &ratings.class),
    ) {
        let known = classes::standards_for(&ratings.class, classes::Energy::Active, currents.base);
        if !known.contains(table) {
            ctx.error(
                "ratings.class_table",
                format!(
                    "class {} has no table from \"{table}\"; write one of: {}",
                    ratings.class,
                    known.join(", ")
                ),
            );
        }
    }
    Some(ratings)
}

/// The temperature a plan read without a bench shows temperature-banded class limits at: the
/// usual reference temperature of meter tests (IEC 62052-11, EN 50470-1: 23 °C; from memory).
pub const REFERENCE_AMBIENT_C: f64 = 23.0;

/// The currents a class lookup needs, for the ratings' kind of class.
fn class_currents(ratings: &Ratings, class: &str) -> Result<classes::Currents, String> {
    if ["A", "B", "C"].contains(&class) {
        let itr = ratings.transitional_current.ok_or_else(|| {
            format!("class {class} (EN 50470-3) needs ratings.transitional_current (Itr)")
        })?;
        return Ok(classes::Currents {
            base: classes::Base::Itr,
            base_a: itr,
            max_a: ratings.max_current,
            min_a: ratings.minimum_current,
        });
    }
    Ok(classes::Currents {
        base: match ratings.base_current_kind {
            BaseCurrent::Basic => classes::Base::Ib,
            BaseCurrent::Reference => classes::Base::In,
        },
        base_a: ratings.base_current,
        max_a: ratings.max_current,
        min_a: ratings.minimum_current,
    })
}

/// Whether the ratings' active-energy class limits depend on the bench's ambient temperature.
pub(super) fn class_depends_on_ambient(ratings: &Ratings) -> bool {
    let (Some(standard), Ok(currents)) = (
        ratings.class_table.as_deref(),
        class_currents(ratings, &ratings.class),
    ) else {
        return false;
    };
    classes::depends_on_ambient(
        &ratings.class,
        classes::Energy::Active,
        currents.base,
        standard,
    )
}

/// The class limit for `quantity` at `load`.
fn class_limit(
    ratings: &Ratings,
    quantity: Quantity,
    load: &Load,
) -> Result<(f64, String), String> {
    let (class, energy) = match quantity {
        Quantity::ActivePower | Quantity::ActiveEnergy => {
            (ratings.class.clone(), classes::Energy::Active)
        }
        Quantity::ReactivePower => (
            ratings
                .reactive_class
                .clone()
                .ok_or("a class limit for reactive power needs ratings.reactive_class")?,
            classes::Energy::Reactive,
        ),
        q => {
            return Err(format!(
                "accuracy classes set limits for active and reactive power and energy, not for {}",
                q.name()
            ));
        }
    };
    let currents = class_currents(ratings, &class)?;
    let standard = match energy {
        classes::Energy::Active => ratings.class_table.as_deref(),
        classes::Energy::Reactive => None,
    };
    let by_band =
        standard.is_some_and(|s| classes::depends_on_ambient(&class, energy, currents.base, s));
    // A plan read with no bench (`check`) is shown at the reference temperature; a run reads
    // the plan again at its bench's stated temperature.
    let (ambient_c, assumed) = match ratings.ambient_c {
        None if by_band => (Some(REFERENCE_AMBIENT_C), true),
        a => (a, false),
    };
    let choice = classes::TableChoice {
        standard,
        ambient_c,
    };
    classes::limit(&class, energy, &currents, load.current, load.phase_deg, &choice)
        .map(|l| {
            let basis = if assumed {
                format!(
                    "{} (shown at {REFERENCE_AMBIENT_C} °C; a run takes its bench's ambient temperature)",
                    l.basis
                )
            } else {
                l.basis
            };
            (l.percent, basis)
        })
        .map_err(|e| e.to_string())
}

fn link(ctx: &mut Ctx, raw: RawLink) -> Option<LinkSpec> {
    match raw {
        RawLink::Sim { channels } => {
            let channels = channel_names(ctx, channels);
            Some(LinkSpec::Sim { channels })
        }
        RawLink::Text(raw) => {
            super::validate_link::text_link(ctx, *raw).map(|t| LinkSpec::Text(Box::new(t)))
        }
    }
}

/// How far the reference may read from the step's nominal load before the step is refused as
/// "load not as planned" (a source that never got its set-point, a lamp that blew).
pub const DEFAULT_LOAD_WITHIN: f64 = 0.05;

/// A `load_within` band: a percentage above 0 and at most 50 %.
fn load_within(ctx: &mut Ctx, path: &str, text: Option<&Text>) -> Option<f64> {
    let p = ctx.optional_value(path, text, Dimension::Percent)??;
    if p > 0.0 && p <= 50.0 {
        Some(p / 100.0)
    } else {
        ctx.error(path, "expected a percentage above 0 % and at most 50 %");
        None
    }
}

fn step(
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
                Some(super::SequentialRule { min, max })
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
                    Some(super::Repeatability {
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
    match &special {
        Some(SpecialTest::NoLoad { allowance_wh, .. }) => checks.push(Check {
            quantity: Quantity::ActiveEnergy,
            channel: link.channels().first().cloned().unwrap_or_default(),
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
            checks.push(Check {
                quantity: Quantity::ActiveEnergy,
                channel: link.channels().first().cloned().unwrap_or_default(),
                tolerance: Tolerance::AtLeast {
                    bound: 0.5 * expected_wh,
                },
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
    })
}

fn settle_rule(
    ctx: &mut Ctx,
    path: &str,
    raw: &super::raw::RawSettleUntil,
    checks: &[Check],
) -> Option<super::SettleRule> {
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
                super::units::duration_text(every_s),
                super::units::duration_text(needed_s)
            ),
        );
        return None;
    }
    Some(super::SettleRule {
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
fn special_test(
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

fn load(ctx: &mut Ctx, path: &str, raw: &RawLoad, ratings: &Ratings) -> Option<Load> {
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

const HELP: &str = "write a power factor as \"1\", \"0.5 inductive\" or \"0.8 capacitive\"";

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

fn check(
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
    let channel = match &raw.channel {
        None => channels.first().cloned(),
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
    if !link.reads(quantity) {
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

fn tolerance(
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
