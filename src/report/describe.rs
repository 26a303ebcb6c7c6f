//! A plan and a station described in words, as `check` prints them: the steps with their loads,
//! settling and sampling, the checks with their tolerances, each class limit with its source,
//! the special tests, the calibration and its limits, the decision rule. A renderer like the
//! others in `report/`, fed the validated plan.

use crate::plan::units::Dimension;
use crate::plan::{Plan, Tolerance};
use crate::report;

/// "40.5 s", or "40.5 s at most (adaptive steps end sooner)" for a plan with adaptive steps.
pub fn scheduled_text(plan: &Plan) -> String {
    let adaptive = plan
        .steps
        .iter()
        .any(|s| s.settle_until.is_some() || s.sequential.is_some());
    format!(
        "{}{}",
        report::duration_text(plan.scheduled_s()),
        if adaptive {
            " at most (adaptive steps end sooner)"
        } else {
            ""
        }
    )
}

/// "settle 4 s", or "settle until current stable within 0.3 % (0.5 s to 4 s)".
pub fn settle_text(step: &crate::plan::Step) -> String {
    let Some(rule) = &step.settle_until else {
        return format!("settle {}", report::duration_text(step.settle_s));
    };
    let band = if rule.relative {
        format!("{} %", rule.band * 100.0)
    } else {
        crate::plan::units::Display(rule.band, rule.quantity.dimension()).to_string()
    };
    format!(
        "settle until {} stable within {band} ({} to {})",
        rule.quantity.name(),
        report::duration_text(rule.min_s),
        report::duration_text(rule.max_s)
    )
}

/// "8 × 0.5 s", or "3 to 8 × 0.5 s until decided".
pub fn samples_text(step: &crate::plan::Step) -> String {
    let interval = report::duration_text(step.interval_s);
    match step.sequential {
        Some(rule) => format!("{} to {} × {interval} until decided", rule.min, rule.max),
        None => format!("{} × {interval}", step.samples),
    }
}

/// What `check` prints for a valid plan: one line for the plan, one per step.
pub fn plan_summary(plan: &Plan) -> String {
    let mut s = format!(
        "{}: plan {} revision {} for {}, class {}: {} steps, {} checks, scheduled bench time {}\n",
        plan.source.file,
        plan.id,
        plan.revision,
        plan.product.model,
        if plan.ratings.class.is_empty() {
            "none stated"
        } else {
            &plan.ratings.class
        },
        plan.steps.len(),
        plan.check_count(),
        scheduled_text(plan)
    );
    for step in &plan.steps {
        let checks: Vec<String> = step
            .checks
            .iter()
            .map(|c| {
                format!(
                    "{}{} {}",
                    c.quantity.name(),
                    if plan.link.channels().len() > 1 || c.counts_pulses() {
                        format!("[{}]", c.channel)
                    } else {
                        String::new()
                    },
                    tolerance_text(&c.tolerance, c.quantity.dimension())
                )
            })
            .collect();
        s.push_str(&format!(
            "  {:<14} {}; {}, {}: {}\n",
            step.id,
            step.load.describe(),
            settle_text(step),
            samples_text(step),
            if checks.is_empty() {
                "no checks".to_string()
            } else {
                checks.join("; ")
            }
        ));
        let mut bases: Vec<&str> = Vec::new();
        for c in &step.checks {
            if let Tolerance::Class { basis, .. } = &c.tolerance
                && !bases.contains(&basis.as_str())
            {
                bases.push(basis);
            }
        }
        for b in bases {
            s.push_str(&format!("  {:<14} class limit: {b}\n", ""));
        }
        if let Some(p) = &step.pulses {
            s.push_str(&format!("  {:<14} {}\n", "", pulses_text(step, p)));
        }
        match &step.special {
            Some(crate::plan::SpecialTest::NoLoad {
                minutes,
                allowance_wh,
                basis,
            }) => s.push_str(&format!(
                "  {:<14} no-load test: {minutes:.2} min, register advance at most {} (one pulse); {basis}\n",
                "",
                report::number(*allowance_wh, Dimension::ActiveEnergy)
            )),
            Some(crate::plan::SpecialTest::Starting { current, basis }) => s.push_str(&format!(
                "  {:<14} starting test at {}; {basis}\n",
                "",
                report::number(*current, Dimension::Current)
            )),
            None => {}
        }
    }
    if let Some(cal) = &plan.calibration {
        s.push_str(&calibration_text(cal));
    }
    s.push_str(&format!(
        "  decision rule: {}\n",
        report::decision_text(plan.decision)
    ));
    s
}

/// "test output: counted over a gate of 6 min 32 s, about 400.7 pulses due at 3.68 kW".
fn pulses_text(step: &crate::plan::Step, p: &crate::plan::PulseSpec) -> String {
    use crate::plan::PulseMethod;
    let power = step.load.nominal(crate::plan::Quantity::ActivePower, 0.0);
    let at = report::number(power, Dimension::ActivePower);
    let k = format!("{} imp/kWh", p.meter_constant);
    match p.method {
        PulseMethod::FixedTime { gate_s } => format!(
            "test output at {k}: pulses counted over a gate of {}, about {:.1} due at {at} (±1 pulse is {})",
            crate::plan::units::duration_text(gate_s),
            p.expected_pulses,
            if p.expected_pulses > 0.0 {
                format!("{:.2} %", 100.0 / p.expected_pulses)
            } else {
                "all of it".into()
            }
        ),
        PulseMethod::FixedPulses { count, at_most_s } => format!(
            "test output at {k}: the time of {count} pulses, {} at {at}, at most {}",
            crate::plan::units::duration_text(
                count as f64 * crate::metrology::pulses::pulse_interval_s(p.meter_constant, power)
            ),
            crate::plan::units::duration_text(at_most_s)
        ),
    }
}

/// The plan's calibration and what it is held to, for `check`.
fn calibration_text(cal: &crate::plan::CalibrationSpec) -> String {
    let mut s = format!(
        "  calibration: {} on {}, {} fit through {}; {}\n",
        cal.quantity.name(),
        cal.channel,
        format!("{:?}", cal.model).to_lowercase(),
        cal.points.join(", "),
        match &cal.write {
            Some((o, g)) => format!("written to the unit as {o} and {g}, and read back"),
            None => "fitted only, nothing written".into(),
        }
    );
    let l = &cal.limits;
    let window = |w: &crate::metrology::calibration::Window, unit: &str| {
        if w.relative {
            format!("{} {unit} ± {} %", w.nominal, w.within * 100.0)
        } else {
            format!("{} {unit} ± {}", w.nominal, w.within)
        }
    };
    let mut limits = Vec::new();
    if let Some(w) = &l.gain {
        limits.push(format!(
            "gain {}",
            window(w, &format!("counts per {}", cal.quantity.unit()))
        ));
    }
    if let Some(w) = &l.offset {
        limits.push(format!("offset {}", window(w, "counts")));
    }
    if let Some(p) = l.linearity_percent {
        limits.push(format!("linearity ≤ {p} % of reading"));
    }
    if let Some(p) = l.point_gain_percent {
        limits.push(format!("points' gains within {p} % of the fit"));
    }
    if let Some(f) = l.read_back {
        limits.push(format!("read back within {} %", f * 100.0));
    }
    s.push_str(&format!(
        "  calibration limits: {} (a unit outside them is rejected and nothing is written)\n",
        if limits.is_empty() {
            "none".to_string()
        } else {
            limits.join("; ")
        }
    ));
    s
}

pub fn tolerance_text(t: &Tolerance, dim: Dimension) -> String {
    let v = |x: f64| report::number(x, dim);
    match t.clone() {
        Tolerance::PercentOfReading { percent } => format!("±{percent} %"),
        Tolerance::PercentPlusAbsolute { percent, absolute } => {
            format!("±({percent} % + {})", v(absolute))
        }
        Tolerance::PercentPlusRange {
            percent,
            range_percent,
            range,
        } => format!("±({percent} % + {range_percent} % of {})", v(range)),
        Tolerance::Band { half_width } => format!("±{}", v(half_width)),
        Tolerance::AtMost { bound } => format!("≤ {}", v(bound)),
        Tolerance::AtLeast { bound } => format!("≥ {}", v(bound)),
        Tolerance::Class { percent, .. } => format!("±{percent} % (class)"),
    }
}
