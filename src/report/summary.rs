//! The lot summary: yield, rejections by check, and each check's error distribution across the
//! lot with its capability against the limits.

use crate::metrology::Summary;
use crate::metrology::capability;
use crate::metrology::tolerance::Sense;
use crate::record::{CheckVerdict, UnitRecord, UnitStatus};
use serde::Serialize;
use std::collections::BTreeMap;
use std::fmt::Write;

/// One check across the lot.
#[derive(Debug, Clone, Serialize)]
pub struct CheckStats {
    pub step: String,
    pub quantity: String,
    pub channel: String,
    pub error_unit: String,
    pub tolerance_limit: f64,
    pub units: usize,
    pub failed: usize,
    pub mean: f64,
    pub std_dev: Option<f64>,
    /// Which side(s) the limit bounds: "two-sided", "upper" or "lower".
    pub sides: &'static str,
    /// Cp, for two-sided checks.
    pub cp: Option<f64>,
    /// Cpk two-sided, or CPU / CPL for an upper / lower bound.
    pub cpk: Option<f64>,
    /// Whether Cpk is below the usual 1.33.
    pub cpk_low: bool,
    /// The limit differs from unit to unit (a limit with an absolute term, at readings that
    /// differ): capability is then computed on each error as a share of its own limit.
    pub limit_varies: bool,
    /// The process's own spread once the measurement's share is taken out,
    /// σ₀ = √(s² − u_m²), in the unit the indices use; absent with fewer than two units.
    pub process_sd: Option<f64>,
    /// Global risks of the plan's decision rule for this lot's spread (JCGM 106:2012, 9.5):
    /// the share of units expected non-conforming yet accepted (consumer's) and conforming yet
    /// rejected (producer's).
    pub global_risk: Option<crate::metrology::risk::GlobalRisk>,
    /// Inline SVG histogram, marked safe when rendered.
    #[serde(skip)]
    pub histogram: String,
    #[serde(skip)]
    errors: Vec<f64>,
    /// Each unit's tolerance limit, beside its error.
    #[serde(skip)]
    limits: Vec<f64>,
    #[serde(skip)]
    sense: crate::metrology::tolerance::Sense,
    /// Each unit's standard uncertainty of the error and acceptance limit, where decided.
    #[serde(skip)]
    uncertainties: Vec<f64>,
    #[serde(skip)]
    acceptance: Vec<f64>,
}

/// The lot's process spread and the global risks of its decision rule, from the values the
/// indices use (errors, or shares of each unit's limit) against `limit`. Every unit must carry
/// an uncertainty and a decision; the measurement's standard uncertainty is their root mean
/// square and the acceptance limit their mean.
fn lot_risk(
    c: &CheckStats,
    values: &[f64],
    limit: f64,
) -> (Option<f64>, Option<crate::metrology::risk::GlobalRisk>) {
    use crate::metrology::risk::{Interval, global_risk, process_sd};
    let Some(Summary {
        mean,
        std_dev: Some(sd),
        ..
    }) = Summary::of(values)
    else {
        return (None, None);
    };
    if c.uncertainties.len() != values.len() || values.is_empty() {
        return (None, None);
    }
    let n = c.uncertainties.len() as f64;
    let scale = if c.limit_varies { 1.0 } else { limit };
    let u_m = (c.uncertainties.iter().map(|u| u * u).sum::<f64>() / n).sqrt() * scale;
    let al = c.acceptance.iter().sum::<f64>() / n * scale;
    let sigma = process_sd(sd, u_m);
    let (tolerance, acceptance) = match c.sense {
        Sense::PlusMinus => (Interval::symmetric(limit), Interval::symmetric(al)),
        Sense::AtMost => (
            Interval {
                lower: None,
                upper: Some(limit),
            },
            Interval {
                lower: None,
                upper: Some(al),
            },
        ),
        Sense::AtLeast => (
            Interval {
                lower: Some(limit),
                upper: None,
            },
            Interval {
                lower: Some(al),
                upper: None,
            },
        ),
    };
    (
        Some(sigma),
        global_risk(mean, sigma, u_m, tolerance, acceptance),
    )
}

/// One unit's line in the summary.
#[derive(Debug, Clone, Serialize)]
pub struct UnitLine {
    pub serial: String,
    pub position: usize,
    pub run_id: String,
    pub status: UnitStatus,
    pub word: &'static str,
    pub symbol: &'static str,
    pub report: String,
    pub reasons: Vec<String>,
    /// A rejection every failing check of which lies within its expanded uncertainty of its
    /// limit ("FAIL, marginal"): told apart from a clear failure.
    pub marginal: bool,
    /// When the unit was tested (the record's start).
    pub started_at: String,
}

/// A lot's summary. A unit tested more than once counts once, by its last test: the counts,
/// the yield, the rejections and the error statistics are of distinct units; the earlier tests
/// are listed apart as retests.
#[derive(Debug, Clone, Serialize)]
pub struct LotSummary {
    pub title: String,
    /// Distinct units (serial numbers).
    pub units: usize,
    /// Unit records: tests, retests included.
    pub tests: usize,
    /// Tests beyond each unit's first.
    pub retests: usize,
    /// Units tested more than once.
    pub units_retested: usize,
    /// Units by their last test.
    pub accepted: usize,
    pub rejected: usize,
    /// Of the rejected, those whose every failing check was marginal.
    pub rejected_marginal: usize,
    pub incomplete: usize,
    /// Final yield: units accepted at their last test / units, percent.
    pub yield_percent: f64,
    /// First-pass yield: units accepted at their first test / units, percent.
    pub first_pass_yield_percent: f64,
    /// (check, units failing it), most frequent first.
    pub rejections: Vec<(String, usize)>,
    pub checks: Vec<CheckStats>,
    /// Each unit by its last test: rejected first, then incomplete, then accepted.
    pub unit_lines: Vec<UnitLine>,
    /// Tests a later test of the same unit superseded, oldest first.
    pub earlier_tests: Vec<UnitLine>,
    /// Bench time per unit: each run's bench time shared among its units, averaged.
    pub bench_time_per_unit_s: Option<f64>,
    /// Steps that settled until stable ran out of time on (a unit, a fixture or a load that is
    /// slower than the plan expects), over all units.
    pub unsettled_steps: usize,
    /// Each calibration limit across the lot.
    pub calibration: Vec<CalibrationStats>,
    pub context: Context,
    /// When the summary was made (set by whoever writes it), ISO 8601.
    pub made_at: Option<String>,
}

/// What a lot summary stands on: the plans, the time span, the runs, firmware and stations
/// its units were tested with, and when it was made.
#[derive(Debug, Clone, Serialize)]
pub struct Context {
    /// "ID revision R (sha256 first 12)", each plan once.
    pub plans: Vec<String>,
    /// The first test's start and the last test's end, as recorded.
    pub from: String,
    pub to: String,
    /// (run id, units tested, accepted), in time order.
    pub runs: Vec<(String, usize, usize)>,
    /// (firmware, units at their last test).
    pub firmware: Vec<(String, usize)>,
    pub stations: Vec<String>,
    /// (position, units whose last test was there, accepted).
    pub positions: Vec<(usize, usize, usize)>,
}

/// One calibration limit across the lot: the fitted values and how many units fell outside.
#[derive(Debug, Clone, Serialize)]
pub struct CalibrationStats {
    /// "current gain".
    pub what: String,
    pub unit: String,
    pub units: usize,
    pub outside: usize,
    pub mean: f64,
    pub std_dev: Option<f64>,
    pub min: f64,
    pub max: f64,
    /// "2240 ± 67.2", "≤ 0.5".
    pub limit: String,
}

/// The lot's calibration limits, in the order the records give them.
fn calibration_stats(records: &[UnitRecord]) -> Vec<CalibrationStats> {
    let mut by: Vec<(String, String, String, Vec<f64>, usize)> = Vec::new();
    for r in records {
        let Some(cal) = &r.calibration else { continue };
        for l in &cal.limits {
            let what = format!("{} {}", cal.quantity.name(), l.what);
            let limit = match l.nominal {
                Some(n) => format!("{n} ± {}", l.limit),
                None => format!("≤ {}", l.limit),
            };
            let i = match by.iter().position(|b| b.0 == what) {
                Some(i) => i,
                None => {
                    by.push((what, l.unit.clone(), limit, Vec::new(), 0));
                    by.len() - 1
                }
            };
            by[i].3.push(l.value);
            by[i].4 += usize::from(!l.within);
        }
    }
    by.into_iter()
        .filter_map(|(what, unit, limit, values, outside)| {
            let s = Summary::of(&values)?;
            Some(CalibrationStats {
                what,
                unit,
                units: values.len(),
                outside,
                mean: s.mean,
                std_dev: s.std_dev,
                min: values.iter().copied().fold(f64::INFINITY, f64::min),
                max: values.iter().copied().fold(f64::NEG_INFINITY, f64::max),
                limit,
            })
        })
        .collect()
}

/// Each unit's last and first test, and the tests a later one superseded (oldest first), by
/// serial number. Tests are ordered by their start (ISO 8601 with offset, so compared as
/// instants), then run and position.
fn by_unit(records: &[UnitRecord]) -> (Vec<UnitRecord>, Vec<UnitRecord>, Vec<UnitRecord>) {
    let instant = |r: &UnitRecord| {
        chrono::DateTime::parse_from_rfc3339(&r.started_at)
            .map(|t| t.timestamp_micros())
            .unwrap_or(i64::MIN)
    };
    let mut ordered: Vec<&UnitRecord> = records.iter().collect();
    ordered.sort_by(|a, b| {
        (instant(a), &a.run_id, a.position).cmp(&(instant(b), &b.run_id, b.position))
    });
    let mut last: BTreeMap<&str, &UnitRecord> = BTreeMap::new();
    let mut first: BTreeMap<&str, &UnitRecord> = BTreeMap::new();
    for r in &ordered {
        last.insert(&r.serial, r);
        first.entry(&r.serial).or_insert(r);
    }
    let earlier = ordered
        .iter()
        .filter(|r| !std::ptr::eq(**r, last[r.serial.as_str()]))
        .map(|r| (*r).clone())
        .collect();
    (
        last.values().map(|r| (*r).clone()).collect(),
        first.values().map(|r| (*r).clone()).collect(),
        earlier,
    )
}

/// The lot's context from all its tests (`all`) and each unit's last (`finals`).
fn context(all: &[UnitRecord], finals: &[UnitRecord]) -> Context {
    let accepted = |r: &UnitRecord| r.verdict.status == UnitStatus::Accepted;
    let mut plans: Vec<String> = Vec::new();
    let mut stations: Vec<String> = Vec::new();
    let mut runs: Vec<(String, String, usize, usize)> = Vec::new();
    for r in all {
        let plan = format!(
            "{} revision {} ({})",
            r.plan.id,
            r.plan.revision,
            &r.plan.sha256[..r.plan.sha256.len().min(12)]
        );
        if !plans.contains(&plan) {
            plans.push(plan);
        }
        if !stations.contains(&r.station.id) {
            stations.push(r.station.id.clone());
        }
        match runs.iter_mut().find(|(id, ..)| *id == r.run_id) {
            Some((_, start, n, ok)) => {
                *n += 1;
                *ok += accepted(r) as usize;
                if r.started_at < *start {
                    *start = r.started_at.clone();
                }
            }
            None => runs.push((
                r.run_id.clone(),
                r.started_at.clone(),
                1,
                accepted(r) as usize,
            )),
        }
    }
    runs.sort_by(|a, b| a.1.cmp(&b.1));
    let mut firmware: BTreeMap<String, usize> = BTreeMap::new();
    let mut positions: BTreeMap<usize, (usize, usize)> = BTreeMap::new();
    for r in finals {
        let fw = r
            .identity
            .as_ref()
            .map_or_else(|| "(not identified)".to_string(), |i| i.firmware.clone());
        *firmware.entry(fw).or_default() += 1;
        let p = positions.entry(r.position).or_default();
        p.0 += 1;
        p.1 += accepted(r) as usize;
    }
    // Times as instants (records may carry different offsets), shown to the minute.
    let instant = |t: &str| chrono::DateTime::parse_from_rfc3339(t).ok();
    let shown = |t: Option<chrono::DateTime<chrono::FixedOffset>>| {
        t.map_or_else(String::new, |t| {
            t.format("%Y-%m-%d %H:%M (UTC%:z)").to_string()
        })
    };
    Context {
        plans,
        from: shown(all.iter().filter_map(|r| instant(&r.started_at)).min()),
        to: shown(all.iter().filter_map(|r| instant(&r.finished_at)).max()),
        runs: runs.into_iter().map(|(id, _, n, ok)| (id, n, ok)).collect(),
        firmware: firmware.into_iter().collect(),
        stations,
        positions: positions
            .into_iter()
            .map(|(p, (n, ok))| (p, n, ok))
            .collect(),
    }
}

/// Whether a rejected unit failed only marginally: every failing check within its expanded
/// uncertainty of its tolerance limit, and no other reason (a calibration out of limits).
fn marginal_rejection(r: &UnitRecord) -> bool {
    if r.verdict.status != UnitStatus::Rejected {
        return false;
    }
    let failing: Vec<_> = r
        .steps
        .iter()
        .flat_map(|s| &s.checks)
        .filter(|c| c.verdict == CheckVerdict::Fail)
        .collect();
    let calibration_rejected = r.calibration.as_ref().is_some_and(|c| {
        c.status != crate::record::CalibrationStatus::Written
            && c.status != crate::record::CalibrationStatus::Fitted
    });
    !failing.is_empty() && !calibration_rejected && failing.iter().all(|c| c.marginal())
}

/// The mean bench time per unit: a run's bench time is shared by the units it tested together.
fn bench_time_per_unit(records: &[UnitRecord]) -> Option<f64> {
    let mut units_per_run: BTreeMap<&str, usize> = BTreeMap::new();
    for r in records {
        *units_per_run.entry(r.run_id.as_str()).or_default() += 1;
    }
    let shares: Vec<f64> = records
        .iter()
        .map(|r| r.bench_time_s / units_per_run[r.run_id.as_str()] as f64)
        .collect();
    (!shares.is_empty()).then(|| shares.iter().sum::<f64>() / shares.len() as f64)
}

impl LotSummary {
    /// Summarises `records`; `report_name` gives each unit's report file name.
    pub fn of(
        title: &str,
        records: &[UnitRecord],
        report_name: &dyn Fn(&UnitRecord) -> String,
    ) -> LotSummary {
        let all = records;
        let (finals, firsts, earlier) = by_unit(all);
        let records: &[UnitRecord] = &finals;
        let count = |s: UnitStatus| records.iter().filter(|r| r.verdict.status == s).count();
        let mut by_check: BTreeMap<(String, String, String), CheckStats> = BTreeMap::new();
        for r in records {
            for s in &r.steps {
                for c in &s.checks {
                    let Some(e) = &c.evaluation else { continue };
                    let key = (
                        s.id.clone(),
                        c.quantity.name().to_string(),
                        c.channel.clone(),
                    );
                    let entry = by_check.entry(key).or_insert_with(|| CheckStats {
                        step: s.id.clone(),
                        quantity: c.quantity.name().into(),
                        channel: c.channel.clone(),
                        error_unit: e.error_unit.clone(),
                        tolerance_limit: e.limit,
                        units: 0,
                        failed: 0,
                        mean: 0.0,
                        std_dev: None,
                        sides: match e.sense {
                            Sense::PlusMinus => "two-sided",
                            Sense::AtMost => "upper",
                            Sense::AtLeast => "lower",
                        },
                        cp: None,
                        cpk: None,
                        cpk_low: false,
                        limit_varies: false,
                        process_sd: None,
                        global_risk: None,
                        histogram: String::new(),
                        errors: Vec::new(),
                        limits: Vec::new(),
                        sense: e.sense,
                        uncertainties: Vec::new(),
                        acceptance: Vec::new(),
                    });
                    if let (Some(b), Some(d)) = (&c.uncertainty, &c.decision) {
                        let share = if e.limit != 0.0 { 1.0 / e.limit } else { 0.0 };
                        // Kept as shares of the unit's own limit, like the errors below when
                        // the limit varies.
                        entry.uncertainties.push(b.combined * share);
                        entry.acceptance.push(d.acceptance_limit * share);
                    }
                    entry.units += 1;
                    entry.errors.push(e.error);
                    entry.limits.push(e.limit);
                    entry.tolerance_limit = entry.tolerance_limit.min(e.limit);
                    if c.verdict == CheckVerdict::Fail {
                        entry.failed += 1;
                    }
                }
            }
        }
        let mut checks: Vec<CheckStats> = by_check
            .into_values()
            .map(|mut c| {
                if let Some(s) = Summary::of(&c.errors) {
                    c.mean = s.mean;
                    c.std_dev = s.std_dev;
                }
                let (lo, hi) = c
                    .limits
                    .iter()
                    .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), l| {
                        (lo.min(*l), hi.max(*l))
                    });
                c.limit_varies = hi - lo > 1e-9 * hi.abs().max(1e-12);
                // With a limit that varies by unit, each error counts as a share of its own
                // limit (the limits become ±1); otherwise the errors as they are.
                let (values, limit): (Vec<f64>, f64) = if c.limit_varies {
                    let shares = c
                        .errors
                        .iter()
                        .zip(&c.limits)
                        .map(|(e, l)| if *l != 0.0 { e / l } else { 0.0 })
                        .collect();
                    (shares, 1.0)
                } else {
                    (c.errors.clone(), c.tolerance_limit)
                };
                if let Some(Summary {
                    mean,
                    std_dev: Some(sd),
                    ..
                }) = Summary::of(&values)
                {
                    match c.sense {
                        Sense::PlusMinus => {
                            c.cp = capability::cp(-limit, limit, sd);
                            c.cpk = capability::cpk(-limit, limit, mean, sd);
                        }
                        Sense::AtMost => c.cpk = capability::cpu(limit, mean, sd),
                        Sense::AtLeast => c.cpk = capability::cpl(limit, mean, sd),
                    }
                }
                c.cpk_low = c.cpk.is_some_and(|k| k < capability::CPK_WARNING_BELOW);
                (c.process_sd, c.global_risk) = lot_risk(&c, &values, limit);
                // The acceptance limit drawn is the units' mean, in the error's unit.
                let acceptance = (!c.acceptance.is_empty() && !c.limit_varies).then(|| {
                    c.acceptance.iter().sum::<f64>() / c.acceptance.len() as f64 * c.tolerance_limit
                });
                c.histogram = histogram(
                    &c.errors,
                    c.tolerance_limit,
                    &c.error_unit,
                    c.sense,
                    acceptance,
                );
                c
            })
            .collect();
        // In plan order: steps as the plan runs them, checks as each step lists them.
        let mut order: Vec<(String, String, String)> = Vec::new();
        for r in records {
            for s in &r.steps {
                for c in &s.checks {
                    let key = (
                        s.id.clone(),
                        c.quantity.name().to_string(),
                        c.channel.clone(),
                    );
                    if !order.contains(&key) {
                        order.push(key);
                    }
                }
            }
        }
        let place = |c: &CheckStats| {
            order
                .iter()
                .position(|(st, q, ch)| *st == c.step && *q == c.quantity && *ch == c.channel)
                .unwrap_or(usize::MAX)
        };
        checks.sort_by_key(|c| place(c));
        let mut rejections: Vec<(String, usize)> = checks
            .iter()
            .filter(|c| c.failed > 0)
            .map(|c| (format!("{} {} {}", c.step, c.quantity, c.channel), c.failed))
            .collect();
        let calibration = calibration_stats(records);
        rejections.extend(
            calibration
                .iter()
                .filter(|c| c.outside > 0)
                .map(|c| (format!("calibration {}", c.what), c.outside)),
        );
        rejections.sort_by(|a, b| b.1.cmp(&a.1).then(a.0.cmp(&b.0)));
        let line = |r: &UnitRecord| UnitLine {
            serial: r.serial.clone(),
            position: r.position,
            run_id: r.run_id.clone(),
            status: r.verdict.status,
            word: r.verdict.status.word(),
            symbol: r.verdict.status.symbol(),
            report: report_name(r),
            reasons: r.verdict.reasons.clone(),
            marginal: marginal_rejection(r),
            started_at: r.started_at.clone(),
        };
        let mut unit_lines: Vec<UnitLine> = records.iter().map(line).collect();
        let rank = |s: UnitStatus| match s {
            UnitStatus::Rejected => 0,
            UnitStatus::Incomplete => 1,
            UnitStatus::Accepted => 2,
        };
        unit_lines.sort_by(|a, b| (rank(a.status), &a.serial).cmp(&(rank(b.status), &b.serial)));
        let units = records.len();
        let percent = |n: usize| {
            if units == 0 {
                0.0
            } else {
                n as f64 / units as f64 * 100.0
            }
        };
        let first_pass = firsts
            .iter()
            .filter(|r| r.verdict.status == UnitStatus::Accepted)
            .count();
        LotSummary {
            title: title.into(),
            units,
            tests: all.len(),
            retests: all.len() - units,
            units_retested: earlier
                .iter()
                .map(|r| r.serial.as_str())
                .collect::<std::collections::BTreeSet<_>>()
                .len(),
            accepted: count(UnitStatus::Accepted),
            rejected: count(UnitStatus::Rejected),
            rejected_marginal: unit_lines.iter().filter(|l| l.marginal).count(),
            incomplete: count(UnitStatus::Incomplete),
            yield_percent: percent(count(UnitStatus::Accepted)),
            first_pass_yield_percent: percent(first_pass),
            earlier_tests: earlier.iter().map(line).collect(),
            context: context(all, records),
            made_at: None,
            rejections,
            checks,
            unit_lines,
            bench_time_per_unit_s: bench_time_per_unit(all),
            unsettled_steps: records
                .iter()
                .flat_map(|r| &r.steps)
                .filter(|s| s.settled == Some(false))
                .count(),
            calibration,
        }
    }

    /// One row per check, for spreadsheets.
    pub fn csv(&self) -> Result<Vec<u8>, csv::Error> {
        let mut w = csv::Writer::from_writer(Vec::new());
        w.write_record([
            "step",
            "quantity",
            "channel",
            "units",
            "failed",
            "mean_error",
            "std_dev",
            "error_unit",
            "tolerance_limit",
            "limit_varies",
            "sides",
            "cp",
            "cpk",
            "process_sd",
            "global_consumer_risk",
            "global_producer_risk",
        ])?;
        let opt = |v: Option<f64>| v.map_or(String::new(), |x| format!("{x}"));
        for c in &self.checks {
            w.write_record([
                super::spreadsheet_safe(&c.step),
                c.quantity.clone(),
                super::spreadsheet_safe(&c.channel),
                c.units.to_string(),
                c.failed.to_string(),
                format!("{}", c.mean),
                opt(c.std_dev),
                c.error_unit.clone(),
                format!("{}", c.tolerance_limit),
                c.limit_varies.to_string(),
                c.sides.to_string(),
                opt(c.cp),
                opt(c.cpk),
                opt(c.process_sd),
                opt(c.global_risk.map(|r| r.consumer)),
                opt(c.global_risk.map(|r| r.producer)),
            ])?;
        }
        w.flush()?;
        w.into_inner().map_err(|e| csv::Error::from(e.into_error()))
    }
}

/// The lot's errors of one check as a histogram: the tolerance limits drawn dashed and
/// labelled with their values at the axis, the acceptance limits (where the rule guards) dotted,
/// a one-sided check drawn with its one limit, the count on each bar.
fn histogram(
    errors: &[f64],
    limit: f64,
    unit: &str,
    sense: Sense,
    acceptance: Option<f64>,
) -> String {
    const W: f64 = 320.0;
    const H: f64 = 130.0;
    const BINS: usize = 20;
    let (lo_e, hi_e) = errors
        .iter()
        .fold((0.0f64, 0.0f64), |(lo, hi), e| (lo.min(*e), hi.max(*e)));
    let (low, high) = match sense {
        Sense::PlusMinus => {
            let m = limit.max(lo_e.abs()).max(hi_e.abs()).max(f64::MIN_POSITIVE) * 1.15;
            (-m, m)
        }
        Sense::AtMost => (lo_e.min(0.0) - 0.15 * limit.abs(), limit.max(hi_e) * 1.15),
        Sense::AtLeast => (limit.min(lo_e) * 1.15, hi_e.max(0.0) + 0.15 * limit.abs()),
    };
    let (low, high) = if high - low > 0.0 {
        (low, high)
    } else {
        (low - 1.0, high + 1.0)
    };
    let mut counts = [0usize; BINS];
    for e in errors {
        let i = ((e - low) / (high - low) * BINS as f64).floor();
        counts[(i.max(0.0) as usize).min(BINS - 1)] += 1;
    }
    let max = counts.iter().copied().max().unwrap_or(1).max(1) as f64;
    let top = 12.0;
    let plot_h = H - 30.0 - top;
    let bar_w = W / BINS as f64;
    let x_of = |v: f64| (v - low) / (high - low) * W;
    let mut svg = format!(
        r##"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 -4 {W} {H}" width="{W}" height="{H}" role="img" aria-label="Distribution of the error" font-family="sans-serif" font-size="10">"##
    );
    for (i, c) in counts.iter().enumerate() {
        if *c == 0 {
            continue;
        }
        let h = *c as f64 / max * plot_h;
        let x = i as f64 * bar_w;
        let _ = write!(
            svg,
            r##"<rect x="{x:.1}" y="{:.1}" width="{bar_w:.1}" height="{h:.1}" fill="#777" stroke="#000" stroke-width="0.5"/><text x="{:.1}" y="{:.1}" text-anchor="middle">{c}</text>"##,
            top + plot_h - h,
            x + bar_w / 2.0,
            top + plot_h - h - 2.0
        );
    }
    let signed = |v: f64| {
        let text = format!("{:.3}", v.abs());
        if v < 0.0 {
            format!("\u{2212}{text}")
        } else {
            format!("+{text}")
        }
    };
    let sides: &[f64] = match sense {
        Sense::PlusMinus => &[-1.0, 1.0],
        Sense::AtMost => &[1.0],
        Sense::AtLeast => &[1.0],
    };
    let y_axis = top + plot_h;
    let _ = write!(
        svg,
        r##"<line x1="0" x2="{W}" y1="{y_axis:.1}" y2="{y_axis:.1}" stroke="#000" stroke-width="0.5"/>"##
    );
    for sign in sides {
        let v = sign * limit;
        let x = x_of(v);
        let anchor = if x < W * 0.15 {
            "start"
        } else if x > W * 0.85 {
            "end"
        } else {
            "middle"
        };
        let _ = write!(
            svg,
            r##"<line x1="{x:.1}" x2="{x:.1}" y1="{top:.1}" y2="{y_axis:.1}" stroke="#000" stroke-width="1.5" stroke-dasharray="6 3"/><text x="{x:.1}" y="{:.1}" text-anchor="{anchor}">{} {unit}</text>"##,
            y_axis + 12.0,
            signed(v)
        );
        if let Some(a) = acceptance.filter(|a| (a - limit).abs() > 1e-12 * limit.abs().max(1e-12)) {
            let xa = x_of(sign * a);
            let _ = write!(
                svg,
                r##"<line x1="{xa:.1}" x2="{xa:.1}" y1="{top:.1}" y2="{y_axis:.1}" stroke="#000" stroke-width="1" stroke-dasharray="2 2"/>"##
            );
        }
    }
    let x0 = x_of(0.0);
    if (0.0..=W).contains(&x0) {
        let _ = write!(
            svg,
            r##"<text x="{x0:.1}" y="{:.1}" text-anchor="middle">0</text>"##,
            y_axis + 24.0
        );
    }
    svg.push_str("</svg>");
    svg
}
