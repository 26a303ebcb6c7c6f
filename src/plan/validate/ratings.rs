//! The plan's `product` and `ratings` sections, and the class lookup the ratings allow: which
//! table, at which base current, at which ambient temperature.

use super::*;

pub(super) fn product(ctx: &mut Ctx, raw: &RawPlan) -> Option<Product> {
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

pub(super) fn one_line(text: &str) -> String {
    text.split_whitespace().collect::<Vec<_>>().join(" ")
}

pub(super) fn ratings(ctx: &mut Ctx, raw: &RawPlan) -> Option<Ratings> {
    let r = &raw.ratings;
    let nominal_voltage = ctx.value(
        "ratings.nominal_voltage",
        &r.nominal_voltage,
        Dimension::Voltage,
    );
    let max_current = ctx.value("ratings.max_current", &r.max_current, Dimension::Current);
    let frequency = ctx.value("ratings.frequency", &r.frequency, Dimension::Frequency);
    // No class stated is allowed; a check or special test that needs one says so.
    let class = match &r.class {
        Some(t) => ctx.non_empty("ratings.class", t),
        None => Some(String::new()),
    };
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
        if ratings.class.is_empty() {
            ctx.error(
                "ratings.class_table",
                "a class table needs the class it is for: give ratings.class",
            );
        } else if !known.contains(table) {
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
pub(super) fn class_currents(ratings: &Ratings, class: &str) -> Result<classes::Currents, String> {
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
pub(in crate::plan) fn class_depends_on_ambient(ratings: &Ratings) -> bool {
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
pub(super) fn class_limit(
    ratings: &Ratings,
    quantity: Quantity,
    load: &Load,
) -> Result<(f64, String), String> {
    let (class, energy) = match quantity {
        Quantity::ActivePower | Quantity::ActiveEnergy if ratings.class.is_empty() => {
            return Err(
                "class: true takes the limit from the meter's accuracy class: give ratings.class"
                    .into(),
            );
        }
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
