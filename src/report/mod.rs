//! Acceptance reports rendered from records: HTML through minijinja templates, CSV through the
//! csv crate (a template cannot quote CSV reliably).
//!
//! Templates live in templates/ for users to edit; the binary embeds the same files, so reports
//! render from any folder. A template given with `--templates DIR` replaces the embedded one of
//! the same name. HTML templates are autoescaped (by their `.html` name) and undefined variables
//! are errors, so a misspelt name in an edited template fails loudly instead of printing nothing.
//!
//! Why one file of this length: the text forms of numbers, limits, decisions and risks that
//! the HTML, the CSV and JUnit all print sit beside the renderers that use them, so a report
//! and its CSV can never word the same figure two ways.

pub mod describe;
pub mod explain;
pub mod plot;
pub mod summary;

use crate::plan::units::{self, Dimension};
use crate::record::{CheckRecord, StepRecord, StepStatus, UnitRecord};
use minijinja::{Environment, UndefinedBehavior};
use serde::Serialize;
use std::path::{Path, PathBuf};

/// The embedded default templates, by file name.
pub const DEFAULT_TEMPLATES: &[(&str, &str)] = &[
    (
        "unit-report.html",
        include_str!("../../templates/unit-report.html"),
    ),
    (
        "lot-summary.html",
        include_str!("../../templates/lot-summary.html"),
    ),
    ("compare.html", include_str!("../../templates/compare.html")),
    // The look the three documents share, included by each.
    ("style.css", include_str!("../../templates/style.css")),
];

#[derive(Debug, thiserror::Error)]
pub enum ReportError {
    #[error("template {name}: {message}")]
    Template { name: String, message: String },
    #[error("cannot read template {path}: {source}")]
    ReadTemplate {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("CSV: {0}")]
    Csv(#[from] csv::Error),
}

fn template_error(name: &str, e: &minijinja::Error) -> ReportError {
    let mut message = e.to_string();
    if let Some(line) = e.line()
        && !message.contains("line")
    {
        message.push_str(&format!(" (line {line})"));
    }
    ReportError::Template {
        name: name.to_string(),
        message,
    }
}

/// One minus sign in every document: a hyphen-minus before a figure becomes U+2212, as the
/// plots and the reasons write it.
pub fn minus_sign(text: &str) -> String {
    static NEGATIVE: std::sync::LazyLock<regex::Regex> = std::sync::LazyLock::new(|| {
        regex::Regex::new(r"(^|[\s(±\u{a0}])-(\d|\.\d)").expect("a valid pattern")
    });
    NEGATIVE.replace_all(text, "${1}\u{2212}${2}").into_owned()
}

/// The paper a report is printed on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, clap::ValueEnum)]
pub enum Paper {
    #[default]
    A4,
    Letter,
}

impl Paper {
    /// The CSS `@page` size.
    fn css(self) -> &'static str {
        match self {
            Paper::A4 => "A4",
            Paper::Letter => "letter",
        }
    }
}

/// A CSS string literal of `text`, safe inside a `<style>` element: quotes and backslashes
/// escaped, and `<` written as an escape so that no text can close the element.
pub fn css_string(text: &str) -> String {
    let mut out = String::from("\"");
    for c in text.chars() {
        match c {
            '"' | '\\' => {
                out.push('\\');
                out.push(c);
            }
            '<' => out.push_str("\\3C "),
            '\n' | '\r' => out.push(' '),
            c if c.is_control() => {}
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

/// The templates reports are rendered with.
pub struct Templates {
    env: Environment<'static>,
    paper: Paper,
}

impl Templates {
    /// The same templates, printing on `paper`.
    pub fn with_paper(mut self, paper: Paper) -> Templates {
        self.paper = paper;
        self
    }

    /// What every printed page carries: its size, and the running header.
    fn page(&self, header: &str) -> minijinja::Value {
        minijinja::context! {
            size => self.paper.css(),
            header => minijinja::Value::from_safe_string(css_string(header)),
        }
    }
}

impl Templates {
    /// The embedded defaults, each replaced by a file of the same name in `dir` if one exists.
    pub fn load(dir: Option<&Path>) -> Result<Templates, ReportError> {
        let mut env = Environment::new();
        env.set_undefined_behavior(UndefinedBehavior::Strict);
        // `x|minus` writes a figure with the one minus sign (U+2212) all documents use.
        env.add_filter("minus", |v: minijinja::Value| minus_sign(&v.to_string()));
        for (name, text) in DEFAULT_TEMPLATES {
            let source = match dir.map(|d| d.join(name)).filter(|p| p.exists()) {
                Some(path) => std::fs::read_to_string(&path)
                    .map_err(|source| ReportError::ReadTemplate { path, source })?,
                None => (*text).to_string(),
            };
            env.add_template_owned(*name, source)
                .map_err(|e| template_error(name, &e))?;
        }
        Ok(Templates {
            env,
            paper: Paper::default(),
        })
    }

    /// Renders the HTML acceptance report of one unit. `anchor` is the archive's chain head
    /// after the run (`SEQ:SHA256`), printed with the record's own hash so that paper ties to
    /// `meterproof verify --anchor`.
    pub fn unit_html(
        &self,
        record: &UnitRecord,
        anchor: Option<&str>,
    ) -> Result<String, ReportError> {
        let name = "unit-report.html";
        let template = self
            .env
            .get_template(name)
            .map_err(|e| template_error(name, &e))?;
        let record_sha256 = crate::record::record_hash(record);
        let header = format!(
            "{} {} · plan {} rev {} · record {}…",
            record.plan.model,
            record.serial,
            record.plan.id,
            record.plan.revision,
            record_sha256.get(..16).unwrap_or(&record_sha256)
        );
        template
            .render(minijinja::context! {
                record => minijinja::value::Serde(record),
                view => minijinja::value::Serde(UnitView::of(record)),
                seal => minijinja::context! {
                    record_sha256 => record_sha256,
                    anchor => anchor,
                },
                page => self.page(&header),
            })
            .map_err(|e| template_error(name, &e))
    }
}

impl Templates {
    /// Renders the HTML summary of a lot.
    pub fn lot_html(&self, s: &summary::LotSummary) -> Result<String, ReportError> {
        let name = "lot-summary.html";
        let template = self
            .env
            .get_template(name)
            .map_err(|e| template_error(name, &e))?;
        let checks: Vec<minijinja::Value> = s
            .checks
            .iter()
            .map(|c| {
                minijinja::context! {
                    stats => minijinja::value::Serde(c),
                    histogram => minijinja::Value::from_safe_string(c.histogram.clone()),
                }
            })
            .collect();
        template
            .render(minijinja::context! {
                summary => minijinja::value::Serde(s),
                checks => checks,
                page => self.page(&format!("Lot summary · {}", s.title)),
            })
            .map_err(|e| template_error(name, &e))
    }
}

impl Templates {
    /// Renders the HTML report of a comparison between two firmware versions.
    pub fn compare_html(
        &self,
        title: &str,
        result: &crate::regression::Comparison,
        allowance: f64,
    ) -> Result<String, ReportError> {
        let name = "compare.html";
        let template = self
            .env
            .get_template(name)
            .map_err(|e| template_error(name, &e))?;
        let plots: Vec<minijinja::Value> = comparison_plots(result)
            .into_iter()
            .map(|(quantity, svg)| {
                minijinja::context! {
                    quantity => quantity,
                    svg => minijinja::Value::from_safe_string(svg),
                }
            })
            .collect();
        let words: Vec<&str> = result.checks.iter().map(|c| c.movement.words()).collect();
        let methods: Vec<String> = result.checks.iter().map(|c| c.method()).collect();
        let p_texts: Vec<String> = result.checks.iter().map(|c| c.p_text()).collect();
        template
            .render(minijinja::context! {
                title => title,
                result => minijinja::value::Serde(result),
                gates => result.gates(),
                allowance_percent => allowance * 100.0,
                plots => plots,
                words => words,
                methods => methods,
                p_texts => p_texts,
                headline => result.headline(),
                page => self.page(&format!("Comparison · {title}")),
            })
            .map_err(|e| template_error(name, &e))
    }
}

/// One plot per quantity with percentage errors: both sides' mean errors at each step, the
/// candidate's bars ±2 standard errors of the shift, and the tolerance drawn.
fn comparison_plots(result: &crate::regression::Comparison) -> Vec<(String, String)> {
    let mut quantities: Vec<crate::plan::Quantity> = Vec::new();
    for c in &result.checks {
        if c.error_unit == "%" && !quantities.contains(&c.quantity) {
            quantities.push(c.quantity);
        }
    }
    quantities
        .into_iter()
        .filter_map(|q| {
            let checks: Vec<&crate::regression::CheckComparison> = result
                .checks
                .iter()
                .filter(|c| c.quantity == q && c.error_unit == "%")
                .collect();
            // In load order: the plan's order of steps.
            let mut labels: Vec<String> = checks.iter().map(|c| c.step.clone()).collect();
            labels.sort_by_key(|l| {
                result
                    .step_order
                    .iter()
                    .position(|s| s == l)
                    .unwrap_or(usize::MAX)
            });
            labels.dedup();
            let at = |c: &crate::regression::CheckComparison| {
                labels.iter().position(|l| *l == c.step).unwrap_or(0)
            };
            let chart = plot::Chart {
                limits: labels
                    .iter()
                    .map(|l| {
                        checks
                            .iter()
                            .find(|c| &c.step == l)
                            .map(|c| (c.tolerance_limit, None))
                    })
                    .collect(),
                series: vec![
                    plot::Series {
                        name: "baseline".into(),
                        marker: "circle",
                        points: checks
                            .iter()
                            .map(|c| plot::Point {
                                x: at(c),
                                error: c.baseline_mean,
                                u: 0.0,
                                failed: false,
                            })
                            .collect(),
                    },
                    plot::Series {
                        name: "candidate".into(),
                        marker: "square",
                        points: checks
                            .iter()
                            .map(|c| plot::Point {
                                x: at(c),
                                error: c.candidate_mean,
                                u: c.test.map_or(0.0, |t| 2.0 * t.std_error),
                                failed: false,
                            })
                            .collect(),
                    },
                ],
                labels: labels.clone(),
                y_title: format!("mean error of {}, %", q.name()),
                aria: format!("Mean error of {} on both sides", q.name()),
                bands: labels
                    .iter()
                    .map(|l| {
                        checks
                            .iter()
                            .find(|c| &c.step == l)
                            .map(|c| (c.baseline_mean - c.allowance, c.baseline_mean + c.allowance))
                    })
                    .collect(),
                band_name: "allowance around the baseline".into(),
                bars: "±2 SE of the shift (candidate)".into(),
            };
            plot::draw(&chart).map(|svg| (q.name().to_string(), svg))
        })
        .collect()
}

/// Preformatted values for the unit report, so templates stay simple.
#[derive(Serialize)]
struct UnitView {
    verdict_word: &'static str,
    verdict_symbol: &'static str,
    bench_time: String,
    decision: String,
    /// The error plot as inline SVG, marked safe (it is built here, with its text escaped).
    plots: Vec<minijinja::Value>,
    steps: Vec<StepView>,
}

/// "guarded acceptance, guard band w = 1 U (ILAC-G8)".
pub fn decision_text(rule: crate::plan::DecisionRule) -> String {
    match rule {
        crate::plan::DecisionRule::Simple => "simple acceptance (ILAC-G8: guard band 0)".into(),
        crate::plan::DecisionRule::Guarded { multiple } => {
            format!("guarded acceptance (ILAC-G8: guard band w = {multiple} U)")
        }
    }
}

#[derive(Serialize)]
struct StepView {
    id: String,
    description: Option<String>,
    load: String,
    status: &'static str,
    reason: Option<String>,
    /// How long it settled and how many samples it took, in words.
    timing: String,
    /// Settling until stable ran out of time: the samples may hold the tail of the settling.
    unsettled: bool,
    checks: Vec<CheckView>,
    /// What the table's cells cannot hold: each class limit's source, the checks' notes (a low
    /// test uncertainty ratio, a bound held reading by reading).
    notes: Vec<String>,
}

#[derive(Serialize)]
struct CheckView {
    quantity: &'static str,
    channel: String,
    reference: String,
    measured: String,
    std_dev: String,
    samples: usize,
    error: String,
    limit: String,
    uncertainty: String,
    /// The probability that the true error lies beyond the tolerance.
    risk: String,
    acceptance_limit: String,
    /// The tolerance as the plan wrote it ("±(1 % + 5 mA)").
    tolerance: String,
    /// Where the reference value came from: the instrument, typed by the operator, a file.
    reference_source: String,
    tur: String,
    verdict_word: String,
    verdict_symbol: &'static str,
    verdict_class: &'static str,
}

impl UnitView {
    fn of(record: &UnitRecord) -> UnitView {
        UnitView {
            verdict_word: record.verdict.status.word(),
            verdict_symbol: record.verdict.status.symbol(),
            bench_time: duration_text(record.bench_time_s),
            decision: decision_text(record.plan.decision),
            plots: plot::error_plots(record)
                .into_iter()
                .map(|(quantity, svg)| {
                    minijinja::context! { quantity, svg => minijinja::Value::from_safe_string(svg) }
                })
                .collect(),
            steps: record.steps.iter().map(StepView::of).collect(),
        }
    }
}

impl StepView {
    fn of(step: &StepRecord) -> StepView {
        StepView {
            id: step.id.clone(),
            description: step.description.clone(),
            load: step.load.describe(),
            status: step_status_word(step.status),
            reason: step.reason.clone(),
            timing: timing_text(step),
            unsettled: step.settled == Some(false),
            checks: step.checks.iter().map(|c| CheckView::of(c, step)).collect(),
            notes: step
                .checks
                .iter()
                .flat_map(|c| {
                    let class = match &c.tolerance {
                        crate::plan::Tolerance::Class { percent, basis } => Some(format!(
                            "{} on {}: class limit ±{percent} % from {basis}",
                            c.quantity.name(),
                            c.channel
                        )),
                        _ => None,
                    };
                    let note = c
                        .note
                        .as_ref()
                        .map(|n| format!("{} on {}: {n}", c.quantity.name(), c.channel));
                    // An rms value cannot be negative: a unit reporting one below its zero
                    // offset is shown as it reported it, and said so.
                    let rms = matches!(
                        c.quantity,
                        crate::plan::Quantity::Current
                            | crate::plan::Quantity::Voltage
                            | crate::plan::Quantity::ApparentPower
                    );
                    let how = if matches!(c.tolerance, crate::plan::Tolerance::AtMost { .. }) {
                        "compared with its bound by magnitude"
                    } else {
                        "compared as reported"
                    };
                    let negative = c.measured.filter(|m| rms && *m < 0.0).map(|m| {
                        format!(
                            "{} on {}: the unit reported a negative rms value (mean {}), below its zero offset; shown as reported, {how}",
                            c.quantity.name(),
                            c.channel,
                            number(m, c.quantity.dimension())
                        )
                    });
                    let counted = c.pulses.as_ref().map(|p| {
                        let how = if p.method == "fixed_pulses" {
                            "timed from the first edge to the last"
                        } else {
                            "counted over a gate"
                        };
                        let against = match (p.reference_pulses, p.reference_constant) {
                            (Some(n), Some(k)) => format!(
                                "; against the reference standard's {n} pulses at {k} imp/kWh over the same interval"
                            ),
                            _ => String::new(),
                        };
                        format!(
                            "{} on {}: {} pulses at {} imp/kWh, {how}, {:.3} s{against}",
                            c.quantity.name(),
                            c.channel,
                            p.pulses,
                            p.meter_constant,
                            p.seconds
                        )
                    });
                    class.into_iter().chain(counted).chain(note).chain(negative)
                })
                .collect(),
        }
    }
}

/// "settled in 1.35 s (until stable); sampled until decided: 3 samples (at least 3, at most 8)",
/// or "settle 4.0 s; 8 samples 0.5 s apart".
pub fn timing_text(step: &StepRecord) -> String {
    let settle = match (step.settle_actual_s, step.settled) {
        (Some(t), Some(false)) => format!("not stable within {t:.2} s: sampled at the maximum"),
        (Some(t), _) => format!("settled in {t:.2} s (until stable)"),
        (None, _) => format!("settle {}", duration_text(step.settle_s)),
    };
    let sampling = step.sampling_note.clone().unwrap_or_else(|| {
        format!(
            "{} samples {} apart",
            step.samples_planned,
            duration_text(step.interval_s)
        )
    });
    format!("{settle}; {sampling}")
}

pub fn step_status_word(status: StepStatus) -> &'static str {
    match status {
        StepStatus::Done => "done",
        StepStatus::Incomplete => "incomplete",
        StepStatus::NotRun => "not run",
    }
}

impl CheckView {
    fn of(c: &CheckRecord, step: &StepRecord) -> CheckView {
        let dim = c.quantity.dimension();
        let value = |v: Option<f64>| v.map_or("—".to_string(), |x| number(x, dim));
        let reference_source = step
            .references
            .iter()
            .find(|r| r.quantity == c.quantity)
            .map_or("—", |r| match r.reading.source.as_str() {
                "operator" => "typed by the operator",
                "file" => "imported from a file",
                "instrument" => "read from the instrument",
                other => other,
            })
            .to_string();
        // A count set against the reference standard's own pulses has that for its reference.
        let reference_source = match c.pulses.as_ref().and_then(|p| p.reference_pulses) {
            Some(_) => "counted from the reference standard's pulses".to_string(),
            None => reference_source,
        };
        let mut view = CheckView {
            tolerance: describe::tolerance_text(&c.tolerance, dim),
            reference_source,
            quantity: c.quantity.name(),
            channel: c.channel.clone(),
            reference: value(c.reference),
            measured: value(c.measured),
            std_dev: value(c.summary.and_then(|s| s.std_dev)),
            samples: c.samples.len(),
            error: match (&c.evaluation, &c.tolerance) {
                // A bound is compared with the reading itself: the largest magnitude, unsigned.
                (Some(e), crate::plan::Tolerance::AtMost { .. }) if !c.quantity.is_register() => {
                    format!("largest |reading| {}", number(e.error.abs(), dim))
                }
                (Some(e), _) => error_text(e),
                (None, _) => "—".into(),
            },
            limit: c.evaluation.as_ref().map_or("—".into(), limit_text),
            uncertainty: match (&c.evaluation, &c.decision) {
                (Some(e), Some(d)) => {
                    d.expanded_uncertainty
                        .map_or("—".into(), |u| match &c.uncertainty {
                            // A count compared with a bound on whole pulses has no term.
                            Some(b) if b.components.is_empty() && u == 0.0 => {
                                "none (compared as counted)".into()
                            }
                            Some(b) => {
                                format!("{} (k = {:.2})", magnitude_text(u, &e.error_unit), b.k)
                            }
                            None => magnitude_text(u, &e.error_unit),
                        })
                }
                _ => "—".into(),
            },
            risk: c
                .decision
                .as_ref()
                .and_then(|d| d.risk)
                .map_or("—".into(), risk_text),
            acceptance_limit: match (&c.evaluation, &c.decision) {
                (Some(e), Some(d)) => limit_text(&crate::metrology::Evaluation {
                    limit: d.acceptance_limit,
                    ..e.clone()
                }),
                _ => "—".into(),
            },
            tur: c
                .decision
                .as_ref()
                .and_then(|d| d.tur)
                .map_or("—".into(), |t| format!("{t:.1}")),
            verdict_word: c.verdict_words(),
            verdict_symbol: c.verdict.symbol(),
            verdict_class: match c.verdict {
                crate::record::CheckVerdict::Pass => "pass",
                crate::record::CheckVerdict::Fail => "fail",
                crate::record::CheckVerdict::NotEvaluated => "not-evaluated",
            },
        };
        view.keep_units();
        view
    }
}

impl CheckView {
    /// A value never wraps away from its unit: the figures' spaces are no-break spaces (a
    /// bracket after a figure may still start a new line).
    fn keep_units(&mut self) {
        let keep = |s: &mut String| {
            *s = minus_sign(&s.replace(' ', "\u{a0}").replace("\u{a0}(", " ("));
        };
        for field in [
            &mut self.reference,
            &mut self.measured,
            &mut self.std_dev,
            &mut self.error,
            &mut self.limit,
            &mut self.uncertainty,
            &mut self.acceptance_limit,
        ] {
            keep(field);
        }
    }
}

/// A measured value with its unit and a sensible number of digits.
pub fn number(x: f64, dim: Dimension) -> String {
    if dim == Dimension::Ratio {
        return format!("{x:.4}");
    }
    format!("{}", units::Display(x, dim))
}

fn error_text(e: &crate::metrology::Evaluation) -> String {
    if e.error_unit == "%" {
        format!("{:+.3} %", e.error)
    } else {
        format!("{:+.4} {}", e.error, e.error_unit)
    }
}

fn magnitude_text(x: f64, unit: &str) -> String {
    // One zero: −0 (a product of nothing) is printed as 0.
    let x = if x == 0.0 { 0.0 } else { x };
    if unit == "%" {
        format!("{x:.3} %")
    } else {
        format!("{x:.4} {unit}")
    }
}

fn limit_text(e: &crate::metrology::Evaluation) -> String {
    match e.sense {
        crate::metrology::tolerance::Sense::AtMost => format!("≤ {:.4} {}", e.limit, e.error_unit),
        crate::metrology::tolerance::Sense::AtLeast => format!("≥ {:.4} {}", e.limit, e.error_unit),
        _ if e.error_unit == "%" => format!("± {:.3} %", e.limit),
        _ => format!("± {:.4} {}", e.limit, e.error_unit),
    }
}

/// "1 min 12 s", "45.0 s".
/// A probability as people read risks: "9.1 %", "0.02 %", "< 0.001 %".
pub fn risk_text(p: f64) -> String {
    let percent = p * 100.0;
    if percent < 0.001 {
        "< 0.001 %".into()
    } else if percent < 1.0 {
        format!("{percent:.3} %")
    } else {
        format!("{percent:.1} %")
    }
}

pub use crate::plan::units::duration_text;

/// A run's records as JUnit XML: one test suite per unit, one test case per check; a failed
/// check is a failure with its error and limit, a check not evaluated (or a step not done) an
/// error, so that a CI system shows an acceptance run like any test run.
pub fn run_junit(records: &[UnitRecord]) -> String {
    use quick_junit::{NonSuccessKind, Report, TestCase, TestCaseStatus, TestSuite};
    let mut report = Report::new("meterproof");
    for r in records {
        let mut suite = TestSuite::new(format!("{} position {}", r.serial, r.position));
        for s in &r.steps {
            for c in &s.checks {
                let name = format!("{} {} {}", s.id, c.quantity.name(), c.channel);
                let status = match c.verdict {
                    crate::record::CheckVerdict::Pass => TestCaseStatus::success(),
                    crate::record::CheckVerdict::Fail => {
                        let mut st = TestCaseStatus::non_success(NonSuccessKind::Failure);
                        st.set_message(crate::exec::failure_text(c));
                        st
                    }
                    crate::record::CheckVerdict::NotEvaluated => {
                        let mut st = TestCaseStatus::non_success(NonSuccessKind::Error);
                        st.set_message(
                            c.note
                                .clone()
                                .or_else(|| s.reason.clone())
                                .unwrap_or_else(|| "not evaluated".into()),
                        );
                        st
                    }
                };
                suite.add_test_case(TestCase::new(name, status));
            }
        }
        report.add_test_suite(suite);
    }
    report.to_string().unwrap_or_default()
}

/// Makes a text cell safe for spreadsheets: a cell that starts with `=`, `+`, `-`, `@`, a tab or
/// a carriage return would be taken for a formula, so it gets a leading apostrophe (the OWASP
/// "CSV injection" advice).
pub fn spreadsheet_safe(text: &str) -> String {
    match text.chars().next() {
        Some('=' | '+' | '-' | '@' | '\t' | '\r') => format!("'{text}"),
        _ => text.to_string(),
    }
}

/// The CSV report of one unit: one row per check.
pub fn unit_csv(record: &UnitRecord) -> Result<Vec<u8>, ReportError> {
    let mut w = csv::Writer::from_writer(Vec::new());
    w.write_record([
        "serial",
        "step",
        "load",
        "quantity",
        "channel",
        "unit",
        "reference",
        "dut_mean",
        "std_dev",
        "samples",
        "error",
        "error_unit",
        "limit",
        "expanded_uncertainty",
        "coverage_factor",
        "specific_risk",
        "acceptance_limit",
        "tur",
        "verdict",
        "marginal",
        "settle_s",
        "settled",
        // Where the row came from, on every row, so that rows pasted together from many units
        // keep their context.
        "run_id",
        "position",
        "plan_id",
        "plan_revision",
        "plan_sha256",
        "lot",
        "firmware",
        "station",
        "reference",
        "tested_at",
    ])?;
    let plain = |v: Option<f64>| v.map_or(String::new(), |x| format!("{x}"));
    let context = [
        spreadsheet_safe(&record.run_id),
        record.position.to_string(),
        spreadsheet_safe(&record.plan.id),
        spreadsheet_safe(&record.plan.revision),
        record.plan.sha256.clone(),
        spreadsheet_safe(record.lot.as_deref().unwrap_or_default()),
        spreadsheet_safe(record.identity.as_ref().map_or("", |i| i.firmware.as_str())),
        spreadsheet_safe(&record.station.id),
        spreadsheet_safe(&record.station.reference.id),
        record.started_at.clone(),
    ];
    for step in &record.steps {
        for c in &step.checks {
            w.write_record(
                [
                    spreadsheet_safe(&record.serial),
                    spreadsheet_safe(&step.id),
                    step.load.describe(),
                    c.quantity.name().to_string(),
                    spreadsheet_safe(&c.channel),
                    c.unit.clone(),
                    plain(c.reference),
                    plain(c.measured),
                    plain(c.summary.and_then(|s| s.std_dev)),
                    c.samples.len().to_string(),
                    plain(c.evaluation.as_ref().map(|e| e.error)),
                    c.evaluation
                        .as_ref()
                        .map_or(String::new(), |e| e.error_unit.clone()),
                    plain(c.evaluation.as_ref().map(|e| e.limit)),
                    plain(c.decision.as_ref().and_then(|d| d.expanded_uncertainty)),
                    plain(c.uncertainty.as_ref().map(|b| b.k)),
                    plain(c.decision.as_ref().and_then(|d| d.risk)),
                    plain(c.decision.as_ref().map(|d| d.acceptance_limit)),
                    plain(c.decision.as_ref().and_then(|d| d.tur)),
                    c.verdict.word().to_lowercase().replace(' ', "_"),
                    c.marginal().to_string(),
                    plain(step.settle_actual_s.or(Some(step.settle_s))),
                    step.settled.map_or(String::new(), |b| b.to_string()),
                ]
                .into_iter()
                .chain(context.iter().cloned()),
            )?;
        }
    }
    // The calibration's limits, one row each, in the same columns: the fitted value against
    // its nominal (or the largest deviation against its bound).
    if let Some(cal) = &record.calibration {
        for l in &cal.limits {
            w.write_record(
                [
                    spreadsheet_safe(&record.serial),
                    "calibration".to_string(),
                    String::new(),
                    format!("{} {}", cal.quantity.name(), l.what),
                    spreadsheet_safe(&cal.channel),
                    l.unit.clone(),
                    plain(l.nominal),
                    format!("{}", l.value),
                    String::new(),
                    cal.result
                        .as_ref()
                        .map_or(0, |r| r.points.len())
                        .to_string(),
                    format!("{}", l.deviation),
                    l.unit.clone(),
                    format!("{}", l.limit),
                    String::new(),
                    String::new(),
                    String::new(),
                    String::new(),
                    String::new(),
                    if l.within { "pass" } else { "fail" }.to_string(),
                    String::new(),
                    String::new(),
                    String::new(),
                ]
                .into_iter()
                .chain(context.iter().cloned()),
            )?;
        }
    }
    w.flush().map_err(csv::Error::from)?;
    w.into_inner()
        .map_err(|e| ReportError::Csv(csv::Error::from(e.into_error())))
}

#[cfg(test)]
mod tests {
    /// One minus sign: figures get U+2212; hyphens inside serials, dates and ids stay.
    #[test]
    fn negative_figures_get_the_minus_sign() {
        assert_eq!(super::minus_sign("-892.8571 µA"), "\u{2212}892.8571 µA");
        assert_eq!(super::minus_sign("±(1 % + -5 mA)"), "±(1 % + \u{2212}5 mA)");
        assert_eq!(super::minus_sign("-.5 %"), "\u{2212}.5 %");
        for kept in ["TM16-322611", "2026-12-02", "low-0.1Ib", "max-Imax"] {
            assert_eq!(super::minus_sign(kept), kept);
        }
    }

    use super::*;

    #[test]
    fn formula_like_text_is_neutralised() {
        assert_eq!(spreadsheet_safe("=1+2"), "'=1+2");
        assert_eq!(spreadsheet_safe("@SUM(A1)"), "'@SUM(A1)");
        assert_eq!(spreadsheet_safe("-2+3"), "'-2+3");
        assert_eq!(spreadsheet_safe("TM16-1"), "TM16-1");
    }

    #[test]
    fn durations_read_like_a_clock() {
        assert_eq!(duration_text(45.0), "45.0 s");
        assert_eq!(duration_text(72.0), "1 min 12 s");
        assert_eq!(duration_text(3720.0), "1 h 2 min");
        // As written: 250 ms is not "0.2 s", 2.25 s not "2.2 s"; 119.7 s is 2 min, not
        // "1 min 60 s".
        assert_eq!(duration_text(0.25), "250 ms");
        assert_eq!(duration_text(0.15), "150 ms");
        assert_eq!(duration_text(2.25), "2.25 s");
        assert_eq!(duration_text(4.0), "4.0 s");
        assert_eq!(duration_text(119.7), "2 min 0 s");
        assert_eq!(duration_text(3599.9), "1 h 0 min");
    }
}
