//! The archive view: one search box that finds a serial number, a lot or a run; a unit's
//! history; its reports rendered from the archive (the same HTML `meterproof report` writes);
//! lot and run summaries; and the check of the archive's seals. Nothing from the page names a
//! file: every answer is read from the archive.

use super::super::*;
use crate::archive::{HistoryRow, RunFilter, RunSummary};
use crate::report::summary::LotSummary;
use serde::Serialize;

/// The address of a unit's report in the archive view.
pub(super) fn report_link(run_id: &str, position: usize) -> String {
    format!(
        "/archive/report/{}/{position}",
        percent_encode_segment(run_id)
    )
}

/// A path segment with everything but plain characters percent-encoded.
pub(super) fn percent_encode_segment(text: &str) -> String {
    let mut out = String::new();
    for b in text.bytes() {
        if b.is_ascii_alphanumeric() || b"-_.~".contains(&b) {
            out.push(b as char);
        } else {
            out.push_str(&format!("%{b:02X}"));
        }
    }
    out
}

/// What the archive view shows for one search.
#[derive(Debug, Default, Serialize)]
pub(super) struct Found {
    pub(super) query: String,
    pub(super) serial: Vec<HistoryLine>,
    pub(super) lot: Vec<RunLine>,
    pub(super) run: Option<RunShown>,
    /// The newest runs, when nothing was searched for.
    pub(super) recent: Vec<RunLine>,
}

#[derive(Debug, Serialize)]
pub(super) struct HistoryLine {
    #[serde(flatten)]
    row: HistoryRow,
    mark: String,
    report: String,
}

#[derive(Debug, Serialize)]
pub(super) struct RunLine {
    #[serde(flatten)]
    row: RunSummary,
    link: String,
}

#[derive(Debug, Serialize)]
pub(super) struct RunShown {
    run_id: String,
    plan: String,
    station: String,
    operator: String,
    lot: Option<String>,
    started_at: String,
    finished_at: Option<String>,
    state: String,
    units: Vec<UnitLine>,
    summary: String,
}

#[derive(Debug, Serialize)]
pub(super) struct UnitLine {
    position: usize,
    status: UnitStatus,
    serial: String,
    mark: String,
    reasons: Vec<String>,
    report: String,
    history: String,
}

/// A status word of the archive (`accepted`...) as its symbol and word.
fn mark(status: &str) -> String {
    match serde_json::from_value::<UnitStatus>(serde_json::Value::String(status.to_string())) {
        Ok(s) => format!("{} {}", s.symbol(), s.word()),
        Err(_) => status.to_uppercase(),
    }
}

fn run_line(row: RunSummary) -> RunLine {
    RunLine {
        link: format!("/archive?q={}", percent_encode_segment(&row.run_id)),
        row,
    }
}

fn db(e: crate::archive::ArchiveError) -> CliError {
    CliError::Run(e.to_string())
}

/// Everything the archive knows under `query`: a serial's history, a lot's runs, a run's units
/// (each that matches), or the newest runs when `query` is empty.
pub(super) fn search(archive: &Archive, query: &str) -> Result<Found, CliError> {
    let query = query.trim();
    let mut found = Found {
        query: query.to_string(),
        ..Found::default()
    };
    if query.is_empty() {
        let mut runs = archive.runs(&RunFilter::default()).map_err(db)?;
        runs.sort_by(|a, b| b.started_at.cmp(&a.started_at));
        found.recent = runs.into_iter().take(20).map(run_line).collect();
        return Ok(found);
    }
    found.serial = archive
        .history(query)
        .map_err(db)?
        .into_iter()
        .map(|row| HistoryLine {
            mark: mark(&row.status),
            report: report_link(&row.run_id, row.position.max(0) as usize),
            row,
        })
        .collect();
    found.lot = archive
        .runs(&RunFilter {
            lot: Some(query.to_string()),
            ..RunFilter::default()
        })
        .map_err(db)?
        .into_iter()
        .map(run_line)
        .collect();
    if let Ok(run) = archive.run(query) {
        let units = archive.unit_records(query).map_err(db)?;
        found.run = Some(RunShown {
            plan: format!("{} rev {}", run.plan_id, run.revision),
            station: run.station,
            operator: run.operator,
            lot: run.lot,
            started_at: run.started_at,
            finished_at: run.finished_at,
            state: run.state,
            summary: format!("/archive/summary/run/{}", percent_encode_segment(query)),
            units: units
                .iter()
                .map(|r| UnitLine {
                    position: r.position,
                    status: r.verdict.status,
                    serial: r.serial.clone(),
                    mark: format!("{} {}", r.verdict.status.symbol(), r.verdict.status.word()),
                    reasons: r.verdict.reasons.clone(),
                    report: report_link(&r.run_id, r.position),
                    history: format!("/archive?q={}", percent_encode_segment(&r.serial)),
                })
                .collect(),
            run_id: run.run_id,
        });
    }
    Ok(found)
}

/// A unit's report, rendered from its record in the archive, sealed with its run's anchor.
pub(super) fn unit_report(
    archive: &Archive,
    templates: &Templates,
    run_id: &str,
    position: usize,
) -> Result<Option<String>, CliError> {
    let records = archive.unit_records(run_id).map_err(db)?;
    let Some(record) = records.iter().find(|r| r.position == position) else {
        return Ok(None);
    };
    let anchor = archive.run_anchor(run_id).map_err(db)?;
    templates
        .unit_html(record, anchor.as_deref())
        .map(Some)
        .map_err(|e| CliError::Run(e.to_string()))
}

/// The summary of a lot or a run (`by` is `lot` or `run`), its unit lines linking to the
/// reports in the archive view.
pub(super) fn summary(
    archive: &Archive,
    templates: &Templates,
    by: &str,
    value: &str,
) -> Result<Option<String>, CliError> {
    if by != "lot" && by != "run" {
        return Ok(None);
    }
    let mut records = archive.select(by, value, None).map_err(db)?;
    if records.is_empty() {
        return Ok(None);
    }
    records.sort_by_key(|r| (r.run_id.clone(), r.position));
    let link = |r: &UnitRecord| report_link(&r.run_id, r.position);
    let mut summary = LotSummary::of(&format!("{by} {value}"), &records, &link);
    summary.made_at =
        Some(chrono::Local::now().to_rfc3339_opts(chrono::SecondsFormat::Secs, false));
    templates
        .lot_html(&summary)
        .map(Some)
        .map_err(|e| CliError::Run(e.to_string()))
}

/// The check of the archive's seals, as `meterproof verify` reports it.
#[derive(Debug, Serialize)]
pub(super) struct Seals {
    entries: u64,
    unit_records: u64,
    legacy_records: u64,
    head: Option<String>,
    failures: Vec<(String, String)>,
    ok: bool,
}

pub(super) fn seals(archive: &Archive) -> Result<Seals, CliError> {
    let v = archive.verify(None).map_err(db)?;
    Ok(Seals {
        entries: v.entries,
        unit_records: v.unit_records,
        legacy_records: v.legacy_records,
        head: v.head,
        ok: v.failures.is_empty(),
        failures: v.failures.into_iter().map(|f| (f.what, f.why)).collect(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A run id or serial with anything but plain characters cannot leave its path segment
    /// (RFC 3986, section 2.1: percent-encoding).
    #[test]
    fn a_segment_is_percent_encoded() {
        assert_eq!(
            percent_encode_segment("20261203T0101Z-ab"),
            "20261203T0101Z-ab"
        );
        assert_eq!(percent_encode_segment("a/b c?d"), "a%2Fb%20c%3Fd");
        assert_eq!(percent_encode_segment("é"), "%C3%A9");
        assert_eq!(report_link("../x", 2), "/archive/report/..%2Fx/2");
    }
}
