//! Inline SVG plots of a unit's percentage errors against the load points: one panel per
//! quantity, each drawn against its own tolerance and acceptance limits at each point (a
//! quantity is never drawn against another's tighter envelope), with the expanded uncertainty
//! as error bars. Series differ by marker shape and line pattern, and a failing point is ringed
//! and labelled, not coloured: the plots read in greyscale.

use crate::record::UnitRecord;
use std::fmt::Write;

const WIDTH: f64 = 640.0;
const HEIGHT: f64 = 240.0;
const LEFT: f64 = 60.0;
const RIGHT: f64 = 150.0;
const TOP: f64 = 20.0;
const BOTTOM: f64 = 60.0;

/// (quantity, marker) for the quantities plotted, in legend order.
const SERIES: &[(&str, &str)] = &[
    ("active_power", "circle"),
    ("current", "square"),
    ("voltage", "triangle"),
    ("reactive_power", "diamond"),
    ("active_energy", "cross"),
];

/// One plotted value: at load point `x`, `error` with bars of ±`u`.
pub struct Point {
    pub x: usize,
    pub error: f64,
    pub u: f64,
    /// The check failed: the point is ringed and labelled.
    pub failed: bool,
}

/// A series of points drawn with one marker.
pub struct Series {
    pub name: String,
    /// circle, square, triangle, diamond or cross.
    pub marker: &'static str,
    pub points: Vec<Point>,
}

/// What a plot shows: labelled load points, an envelope per point (the tolerance, and the
/// acceptance limit where there is one), and the series.
pub struct Chart {
    pub labels: Vec<String>,
    pub limits: Vec<Option<(f64, Option<f64>)>>,
    pub series: Vec<Series>,
    /// The vertical axis's title, with its unit ("error of active_power, %").
    pub y_title: String,
    pub aria: String,
    /// A band to shade at each load point (low, high), and what it is ("allowance around the
    /// baseline"); none on a unit's plot.
    pub bands: Vec<Option<(f64, f64)>>,
    pub band_name: String,
    /// What the bars are ("±U", "±2 SE of the shift").
    pub bars: String,
}

fn marker(shape: &str, x: f64, y: f64) -> String {
    match shape {
        "circle" => format!(r##"<circle cx="{x:.1}" cy="{y:.1}" r="4" fill="#000"/>"##),
        "square" => format!(
            r##"<rect x="{:.1}" y="{:.1}" width="8" height="8" fill="none" stroke="#000" stroke-width="1.5"/>"##,
            x - 4.0,
            y - 4.0
        ),
        "triangle" => format!(
            r##"<polygon points="{:.1},{:.1} {:.1},{:.1} {:.1},{:.1}" fill="#555"/>"##,
            x,
            y - 5.0,
            x - 5.0,
            y + 4.0,
            x + 5.0,
            y + 4.0
        ),
        "diamond" => format!(
            r##"<polygon points="{x:.1},{:.1} {:.1},{y:.1} {x:.1},{:.1} {:.1},{y:.1}" fill="none" stroke="#000"/>"##,
            y - 5.0,
            x + 5.0,
            y + 5.0,
            x - 5.0
        ),
        _ => format!(
            r##"<path d="M{:.1},{:.1} L{:.1},{:.1} M{:.1},{:.1} L{:.1},{:.1}" stroke="#000" stroke-width="1.5"/>"##,
            x - 4.0,
            y - 4.0,
            x + 4.0,
            y + 4.0,
            x - 4.0,
            y + 4.0,
            x + 4.0,
            y - 4.0
        ),
    }
}

/// The unit's error plots, one per quantity with percentage errors, in the order the
/// quantities first appear; each panel has only the load points (steps, in run order) where
/// that quantity was evaluated. Empty when there is nothing to plot.
pub fn error_plots(record: &UnitRecord) -> Vec<(String, String)> {
    error_charts(record)
        .into_iter()
        .filter_map(|(q, chart)| draw(&chart).map(|svg| (q, svg)))
        .collect()
}

/// The charts [`error_plots`] draws, by quantity.
pub fn error_charts(record: &UnitRecord) -> Vec<(String, Chart)> {
    let mut quantities: Vec<crate::plan::Quantity> = Vec::new();
    for s in &record.steps {
        for c in &s.checks {
            let plotted =
                c.evaluation.as_ref().is_some_and(|e| e.error_unit == "%") && c.decision.is_some();
            if plotted && !quantities.contains(&c.quantity) {
                quantities.push(c.quantity);
            }
        }
    }
    quantities
        .into_iter()
        .map(|q| {
            let mut labels = Vec::new();
            let mut limits = Vec::new();
            let mut points = Vec::new();
            for s in &record.steps {
                // The quantity's checks at this step (one per channel).
                let checks: Vec<_> = s
                    .checks
                    .iter()
                    .filter(|c| c.quantity == q)
                    .filter_map(|c| match (&c.evaluation, &c.decision) {
                        (Some(e), Some(d)) if e.error_unit == "%" => Some((c, e, d)),
                        _ => None,
                    })
                    .collect();
                if checks.is_empty() {
                    continue;
                }
                let x = labels.len();
                labels.push(s.id.clone());
                let (tl, al) = checks
                    .iter()
                    .fold((f64::INFINITY, f64::INFINITY), |(tl, al), (_, _, d)| {
                        (tl.min(d.tolerance_limit), al.min(d.acceptance_limit))
                    });
                limits.push(Some((tl, Some(al))));
                for (c, e, d) in checks {
                    points.push(Point {
                        x,
                        error: e.error,
                        u: d.expanded_uncertainty.unwrap_or(0.0),
                        failed: c.verdict == crate::record::CheckVerdict::Fail,
                    });
                }
            }
            let (name, marker) = SERIES
                .iter()
                .find(|(n, _)| *n == q.name())
                .copied()
                .unwrap_or((q.name(), "circle"));
            let chart = Chart {
                labels,
                limits,
                series: vec![Series {
                    name: name.to_string(),
                    marker,
                    points,
                }],
                y_title: format!("error of {}, %", q.name()),
                aria: format!(
                    "Error of {} against load point, with its tolerance and acceptance limits",
                    q.name()
                ),
                bands: Vec::new(),
                band_name: String::new(),
                bars: "±U".into(),
            };
            (q.name().to_string(), chart)
        })
        .collect()
}

/// A round step for axis ticks: 1, 2, 2.5 or 5 times a power of ten, giving about `count`
/// steps over `span`.
pub fn round_step(span: f64, count: f64) -> f64 {
    let raw = (span / count).abs();
    if raw == 0.0 || !raw.is_finite() {
        return 1.0;
    }
    let power = 10f64.powf(raw.log10().floor());
    let scaled = raw / power;
    let nice = if scaled <= 1.0 {
        1.0
    } else if scaled <= 2.0 {
        2.0
    } else if scaled <= 2.5 {
        2.5
    } else if scaled <= 5.0 {
        5.0
    } else {
        10.0
    };
    nice * power
}

/// A tick value as text with as many decimals as its step has, one minus sign (U+2212).
fn tick_text(v: f64, step: f64) -> String {
    let step_text = format!("{step:.6}");
    let decimals = step_text
        .trim_end_matches('0')
        .split_once('.')
        .map_or(0, |(_, d)| d.len());
    let text = format!("{:.*}", decimals, v.abs());
    if v < -step * 1e-9 {
        format!("\u{2212}{text}")
    } else if v > step * 1e-9 {
        format!("+{text}")
    } else {
        text
    }
}

/// Draws a chart as inline SVG; `None` when it has nothing to show.
pub fn draw(chart: &Chart) -> Option<String> {
    let mut extent: f64 = 0.0;
    for s in &chart.series {
        for p in &s.points {
            extent = extent.max(p.error.abs() + p.u);
        }
    }
    for (tl, _) in chart.limits.iter().flatten() {
        extent = extent.max(*tl);
    }
    for (lo, hi) in chart.bands.iter().flatten() {
        extent = extent.max(lo.abs()).max(hi.abs());
    }
    if extent == 0.0 {
        return None;
    }
    let extent = extent * 1.15;
    let plot_w = WIDTH - LEFT - RIGHT;
    let plot_h = HEIGHT - TOP - BOTTOM;
    let n = chart.labels.len().max(1) as f64;
    let xpos = |x: usize| LEFT + plot_w * (x as f64 + 0.5) / n;
    let ypos = |e: f64| TOP + plot_h * (1.0 - (e + extent) / (2.0 * extent));
    let mut svg = String::new();
    let _ = write!(
        svg,
        r##"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {WIDTH} {HEIGHT}" width="{WIDTH}" height="{HEIGHT}" role="img" aria-label="{}" font-family="sans-serif" font-size="11">"##,
        escape(&chart.aria)
    );
    let _ = write!(
        svg,
        r##"<rect x="{LEFT}" y="{TOP}" width="{plot_w}" height="{plot_h}" fill="none" stroke="#888"/>"##
    );
    // Round ticks across the range, the zero line among them.
    let step = round_step(2.0 * extent, 4.0);
    let mut k = -(extent / step).floor();
    while k * step <= extent + 1e-12 {
        let v = k * step;
        let y = ypos(v);
        let _ = write!(
            svg,
            r##"<line x1="{LEFT}" x2="{:.1}" y1="{y:.1}" y2="{y:.1}" stroke="{}"/><text x="{:.1}" y="{:.1}" text-anchor="end">{}</text>"##,
            LEFT + plot_w,
            if k == 0.0 { "#999" } else { "#ddd" },
            LEFT - 4.0,
            y + 4.0,
            tick_text(v, step)
        );
        k += 1.0;
    }
    // Axis titles, with the unit.
    let _ = write!(
        svg,
        r##"<text x="12" y="{:.1}" text-anchor="middle" transform="rotate(-90 12 {:.1})">{}</text><text x="{:.1}" y="{:.1}" text-anchor="middle">load point</text>"##,
        TOP + plot_h / 2.0,
        TOP + plot_h / 2.0,
        escape(&chart.y_title),
        LEFT + plot_w / 2.0,
        HEIGHT - 4.0
    );
    // Bands (the allowance around the baseline), light grey behind everything else.
    for (x, band) in chart.bands.iter().enumerate() {
        if let Some((lo, hi)) = band {
            let (x0, w) = (xpos(x) - plot_w / n / 2.0 + 4.0, plot_w / n - 8.0);
            let (y0, y1) = (ypos(*hi), ypos(*lo));
            let _ = write!(
                svg,
                r##"<rect x="{x0:.1}" y="{y0:.1}" width="{w:.1}" height="{:.1}" fill="#e4e4e4" stroke="#999" stroke-width="0.5"/>"##,
                (y1 - y0).max(0.5)
            );
        }
    }
    // Envelopes: tolerance dashed, acceptance dotted, as steps across each load point.
    for (sign, pattern, pick) in [
        (1.0, "6 3", 0),
        (-1.0, "6 3", 0),
        (1.0, "2 2", 1),
        (-1.0, "2 2", 1),
    ] {
        let mut d = String::new();
        for (x, l) in chart.limits.iter().enumerate() {
            if let Some((tl, al)) = l {
                let v = if pick == 0 {
                    *tl
                } else if let Some(al) = al {
                    *al
                } else {
                    continue;
                };
                let (x0, x1) = (xpos(x) - plot_w / n / 2.0, xpos(x) + plot_w / n / 2.0);
                let y = ypos(sign * v);
                let _ = write!(d, "M{x0:.1},{y:.1} L{x1:.1},{y:.1} ");
            }
        }
        let _ = write!(
            svg,
            r##"<path d="{d}" stroke="#000" stroke-dasharray="{pattern}" fill="none"/>"##
        );
    }
    for (k, s) in chart.series.iter().enumerate() {
        for p in &s.points {
            let (x, y) = (xpos(p.x) + offset(k), ypos(p.error));
            let _ = write!(
                svg,
                r##"<line x1="{x:.1}" x2="{x:.1}" y1="{:.1}" y2="{:.1}" stroke="#000"/>"##,
                ypos(p.error + p.u),
                ypos(p.error - p.u)
            );
            svg.push_str(&marker(s.marker, x, y));
            if p.failed {
                let _ = write!(
                    svg,
                    r##"<circle cx="{x:.1}" cy="{y:.1}" r="9" fill="none" stroke="#000" stroke-width="2"/><text x="{:.1}" y="{:.1}" font-weight="bold">FAIL</text>"##,
                    x + 11.0,
                    y - 6.0
                );
            }
        }
    }
    for (x, label) in chart.labels.iter().enumerate() {
        let _ = write!(
            svg,
            r##"<text x="{:.1}" y="{:.1}" text-anchor="end" transform="rotate(-30 {:.1} {:.1})">{}</text>"##,
            xpos(x),
            TOP + plot_h + 14.0,
            xpos(x),
            TOP + plot_h + 14.0,
            escape(label)
        );
    }
    // Legend.
    let mut ly = TOP + 10.0;
    let lx = WIDTH - RIGHT + 14.0;
    for s in &chart.series {
        if s.points.is_empty() {
            continue;
        }
        svg.push_str(&marker(s.marker, lx, ly));
        let _ = write!(
            svg,
            r##"<text x="{:.1}" y="{:.1}">{}</text>"##,
            lx + 10.0,
            ly + 4.0,
            escape(&s.name)
        );
        ly += 18.0;
    }
    let has_acceptance = chart.limits.iter().flatten().any(|(_, al)| al.is_some());
    for (label, pattern) in [("tolerance", "6 3"), ("acceptance limit", "2 2")] {
        if label == "acceptance limit" && !has_acceptance {
            continue;
        }
        let _ = write!(
            svg,
            r##"<line x1="{:.1}" x2="{:.1}" y1="{ly:.1}" y2="{ly:.1}" stroke="#000" stroke-dasharray="{pattern}"/><text x="{:.1}" y="{:.1}">{label}</text>"##,
            lx - 6.0,
            lx + 6.0,
            lx + 10.0,
            ly + 4.0
        );
        ly += 18.0;
    }
    if chart.bands.iter().any(Option::is_some) {
        let _ = write!(
            svg,
            r##"<rect x="{:.1}" y="{:.1}" width="12" height="8" fill="#e4e4e4" stroke="#999" stroke-width="0.5"/><text x="{:.1}" y="{:.1}">{}</text>"##,
            lx - 6.0,
            ly - 4.0,
            lx + 10.0,
            ly + 4.0,
            escape(&chart.band_name)
        );
        ly += 18.0;
    }
    let _ = write!(
        svg,
        r##"<text x="{:.1}" y="{:.1}">bars: {}</text>"##,
        lx - 6.0,
        ly + 4.0,
        escape(&chart.bars)
    );
    if chart
        .series
        .iter()
        .flat_map(|s| &s.points)
        .any(|p| p.failed)
    {
        ly += 18.0;
        let _ = write!(
            svg,
            r##"<circle cx="{lx:.1}" cy="{ly:.1}" r="7" fill="none" stroke="#000" stroke-width="2"/><text x="{:.1}" y="{:.1}">failed</text>"##,
            lx + 10.0,
            ly + 4.0
        );
    }
    svg.push_str("</svg>");
    Some(svg)
}

/// Series side by side at a load point, so their bars do not hide each other.
fn offset(series: usize) -> f64 {
    (series as f64 - 2.0) * 6.0
}

fn escape(text: &str) -> String {
    text.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Axis steps are 1, 2, 2.5 or 5 times a power of ten (common practice for chart axes, no
    /// published source); tick labels carry the step's decimals and a true minus sign.
    #[test]
    fn ticks_are_round() {
        assert_eq!(round_step(4.6, 4.0), 2.0);
        assert_eq!(round_step(1.0, 4.0), 0.25);
        assert_eq!(round_step(0.3, 4.0), 0.1);
        assert_eq!(round_step(7.0, 4.0), 2.0);
        assert_eq!(round_step(9.0, 4.0), 2.5);
        assert_eq!(round_step(0.0, 4.0), 1.0);
        assert_eq!(tick_text(-0.5, 0.25), "\u{2212}0.50");
        assert_eq!(tick_text(2.0, 2.0), "+2");
        assert_eq!(tick_text(0.0, 0.1), "0.0");
    }
}
