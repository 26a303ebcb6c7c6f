//! An inline SVG plot of a unit's percentage errors against the load points, with the tolerance
//! envelope, the acceptance limit and the expanded uncertainty as error bars. Series differ by
//! marker shape and line pattern, not by colour alone, so the plot reads in greyscale.

use crate::record::UnitRecord;
use std::fmt::Write;

const WIDTH: f64 = 640.0;
const HEIGHT: f64 = 300.0;
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
    pub unit: String,
    pub aria: String,
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

/// The plot, or `None` when the unit has no percentage errors to show.
pub fn error_plot(record: &UnitRecord) -> Option<String> {
    let steps: Vec<&crate::record::StepRecord> = record.steps.iter().collect();
    if steps.is_empty() {
        return None;
    }
    // The envelope is the tightest percentage tolerance of each step.
    let mut limits: Vec<Option<(f64, f64)>> = vec![None; steps.len()];
    let mut series: Vec<Series> = SERIES
        .iter()
        .map(|(q, m)| Series {
            name: q.to_string(),
            marker: m,
            points: Vec::new(),
        })
        .collect();
    for (x, s) in steps.iter().enumerate() {
        for c in &s.checks {
            let (Some(e), Some(d)) = (&c.evaluation, &c.decision) else {
                continue;
            };
            if e.error_unit != "%" {
                continue;
            }
            let u = d.expanded_uncertainty.unwrap_or(0.0);
            limits[x] = Some(match limits[x] {
                Some((tl, al)) => (tl.min(d.tolerance_limit), al.min(d.acceptance_limit)),
                None => (d.tolerance_limit, d.acceptance_limit),
            });
            if let Some(entry) = series.iter_mut().find(|s| s.name == c.quantity.name()) {
                entry.points.push(Point {
                    x,
                    error: e.error,
                    u,
                });
            }
        }
    }
    draw(&Chart {
        labels: steps.iter().map(|s| s.id.clone()).collect(),
        limits: limits
            .into_iter()
            .map(|l| l.map(|(tl, al)| (tl, Some(al))))
            .collect(),
        series,
        unit: "%".into(),
        aria: "Error against load point, with tolerance and acceptance limits".into(),
    })
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
    if extent == 0.0 {
        return None;
    }
    let extent = extent * 1.15;
    let plot_w = WIDTH - LEFT - RIGHT;
    let plot_h = HEIGHT - TOP - BOTTOM;
    let n = chart.labels.len().max(1) as f64;
    let unit = &chart.unit;
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
    // Zero line and y ticks.
    for tick in [-1.0, -0.5, 0.0, 0.5, 1.0] {
        let v = tick * extent / 1.15;
        let y = ypos(v);
        let _ = write!(
            svg,
            r##"<line x1="{LEFT}" x2="{:.1}" y1="{y:.1}" y2="{y:.1}" stroke="#ddd"/><text x="{:.1}" y="{:.1}" text-anchor="end">{v:+.2} {unit}</text>"##,
            LEFT + plot_w,
            LEFT - 4.0,
            y + 4.0
        );
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
    let _ = write!(
        svg,
        r##"<text x="{:.1}" y="{:.1}">bars: ±U</text>"##,
        lx - 6.0,
        ly + 4.0
    );
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
