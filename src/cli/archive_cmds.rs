//! The archive's commands: resume an interrupted run, query, export and verify.
//!
//! Why one file of this length: eight small commands that share the archive's opening, its
//! errors' rendering and the selectors (`run=`, `lot=`, a serial); each command is one
//! function of its own.

use super::{
    BenchOptions, BenchSpec, CliError, TerminalReporter, build_bench, counted, exit_status,
    finish_run, fitted, plan_at_bench, print_json, print_summary, verdict_mark, wrapped,
    write_file, write_outputs,
};
use crate::archive::{Archive, Location, RunFilter, RunRecorder};
use crate::exec::{self, RunContext};
use crate::plan::Plan;
use crate::record;
use crate::record::UnitStatus;
use crate::report::Templates;
use std::path::{Path, PathBuf};

#[derive(clap::Args)]
pub(super) struct ResumeArgs {
    /// The run id to continue.
    run: String,
    /// The archive database the run is in (with --journal: the shared archive it goes to).
    #[arg(long)]
    archive: crate::archive::Location,
    /// The station's journal the run is kept in, with a shared --archive.
    #[arg(long, value_name = "FILE")]
    journal: Option<PathBuf>,
    /// Folder for records and reports (the run's subfolder is reused).
    #[arg(long)]
    out: PathBuf,
    /// Folder of templates that replace the embedded ones.
    #[arg(long)]
    templates: Option<PathBuf>,
    /// The paper printed reports are laid out for.
    #[arg(long, value_enum, default_value_t = crate::report::Paper::A4)]
    paper: crate::report::Paper,
    #[arg(long)]
    quiet: bool,
    /// As for `run`.
    #[arg(long, value_name = "REASON")]
    allow_overdue_reference: Option<String>,
    /// As for `run`.
    #[arg(long)]
    unattended: bool,
    /// As for `run`.
    #[arg(long, value_name = "DIR")]
    fallback: Option<PathBuf>,
}

impl BenchOptions for ResumeArgs {
    fn quiet(&self) -> bool {
        self.quiet
    }
    fn allow_overdue_reference(&self) -> Option<&str> {
        self.allow_overdue_reference.as_deref()
    }
    fn unattended(&self) -> bool {
        self.unattended
    }
}

/// Opens an archive to write to (resume).
fn open(location: &Location) -> Result<Archive, CliError> {
    if let Location::Sqlite(path) = location
        && !path.exists()
    {
        return Err(CliError::Usage(format!("no archive at {}", path.display())));
    }
    Archive::open_at(location).map_err(|e| CliError::Run(e.to_string()))
}

/// Opens an archive to read from: never changes it, works where it is read-only.
pub(super) fn open_to_read(location: &Location) -> Result<Archive, CliError> {
    Archive::open_read_only_at(location).map_err(|e| match e {
        crate::archive::ArchiveError::NotFound(what) => CliError::Usage(what),
        crate::archive::ArchiveError::NotAnArchive { .. } => CliError::NotArchive(e.to_string()),
        other => CliError::Run(other.to_string()),
    })
}

/// The anchors of the runs `records` come from, for their reports.
fn anchors_of(
    archive: &Archive,
    records: &[crate::record::UnitRecord],
) -> Result<super::Anchors, CliError> {
    let mut anchors = super::Anchors::new();
    for r in records {
        if !anchors.contains_key(&r.run_id)
            && let Some(a) = archive.run_anchor(&r.run_id).map_err(db)?
        {
            anchors.insert(r.run_id.clone(), a);
        }
    }
    Ok(anchors)
}

fn db(e: crate::archive::ArchiveError) -> CliError {
    match e {
        crate::archive::ArchiveError::NotFound(what) => CliError::Usage(what),
        other => CliError::Run(other.to_string()),
    }
}

/// Continues an interrupted run: each unit from the first step it did not finish.
pub(super) fn resume(args: &ResumeArgs) -> Result<i32, CliError> {
    if let Some(j) = &args.journal
        && !j.exists()
    {
        return Err(CliError::Usage(format!("no journal at {}", j.display())));
    }
    let keeping = super::journal::keeping(
        Some(&args.archive),
        args.journal.as_deref(),
        args.archive.clone(),
    )?;
    let archive = open(&keeping.at)?;
    let lock = super::lock_run(&keeping.at, &args.run)?;
    let run = archive.run(&args.run).map_err(db)?;
    if run.state != "running" && run.state != "interrupted" {
        return Err(CliError::Usage(format!(
            "run {} finished at {}: there is nothing to resume",
            run.run_id,
            run.finished_at.unwrap_or_default()
        )));
    }
    let (file, text) = archive.plan_text(&run.plan_sha256).map_err(db)?;
    let plan = Plan::from_text(&file, &text).map_err(CliError::Plan)?;
    let spec: BenchSpec = serde_json::from_str(&run.bench)
        .map_err(|e| CliError::Run(format!("the archived bench cannot be read: {e}")))?;
    let templates = Templates::load(args.templates.as_deref())
        .map_err(|e| CliError::Usage(e.to_string()))?
        .with_paper(args.paper);
    let (mut bench, mut notes) = build_bench(&spec, &plan, args)?;
    let plan = plan_at_bench(plan, &bench)?;
    let state = archive.resume_state(&run.run_id).map_err(db)?;
    notes.insert(0, format!("plan as archived (SHA-256 {})", run.plan_sha256));
    let ctx = RunContext {
        run_id: run.run_id.clone(),
        operator: run.operator.clone(),
        lot: run.lot.clone(),
        tool_version: crate::VERSION.to_string(),
        notes,
    };
    let run_dir = args.out.join(&run.run_id);
    std::fs::create_dir_all(&run_dir)
        .map_err(|e| CliError::Run(format!("cannot create {}: {e}", run_dir.display())))?;
    let fallback = super::fallback_dir(args.fallback.as_deref())?;
    let recorder = RunRecorder::new(&archive, &run.run_id);
    let mut reporter = TerminalReporter::new(args.quiet);
    let records = exec::run_with(
        &plan,
        &mut bench,
        &ctx,
        &mut reporter,
        &recorder,
        Some(&state),
    );
    let archived = finish_run(&archive, &run.run_id, &records);
    if let Some((journal, url)) = &keeping.journal {
        super::journal::send(journal, url);
    }
    // What the folder held from before the interruption is kept, set aside, so the final
    // reports carry their plain names.
    super::set_aside_earlier_files(&run_dir)?;
    let hint = super::resume_hint(
        &run.run_id,
        &super::resume_archive_args(Some(&args.archive), args.journal.as_deref(), &keeping.at),
        &args.out,
        &records,
    );
    if hint.is_none() && archived.is_ok() {
        lock.finished();
    }
    let anchor = match archived {
        Err(e) => {
            // The archive failed: the engine's records, as files, are what is left of the run.
            let (written, _) = super::write_or_keep(
                &run_dir,
                &records,
                &templates,
                &super::Anchors::new(),
                &fallback,
                &run.run_id,
            );
            print_summary(&records, &written);
            return Err(e);
        }
        Ok(a) => a,
    };
    // Units that had finished before the interruption keep the record the archive has.
    let mut records = archive.unit_records(&run.run_id).map_err(db)?;
    records.sort_by_key(|r| r.position);
    let anchors = super::Anchors::from([(run.run_id.clone(), anchor)]);
    let (written, not_written) = super::write_or_keep(
        &run_dir,
        &records,
        &templates,
        &anchors,
        &fallback,
        &run.run_id,
    );
    print_summary(&records, &written);
    if let Some(h) = hint {
        out!("{h}");
    }
    if let Some(e) = not_written {
        return Err(e);
    }
    Ok(exit_status(&records))
}

#[derive(clap::Args)]
pub(super) struct HistoryArgs {
    serial: String,
    #[arg(long)]
    archive: crate::archive::Location,
    /// Print JSON for machines.
    #[arg(long)]
    json: bool,
}

pub(super) fn history(args: &HistoryArgs) -> Result<i32, CliError> {
    let archive = open_to_read(&args.archive)?;
    let rows = archive.history(&args.serial).map_err(db)?;
    if args.json {
        print_json(&rows);
        return Ok(0);
    }
    if rows.is_empty() {
        out!("no runs of serial {}", args.serial);
        return Ok(0);
    }
    // 80 columns: station and operator are in --json.
    out!(
        "{:<16} {:>3} {:<25} {:<12} {:<8} verdict",
        "finished",
        "pos",
        "run",
        "plan",
        "firmware"
    );
    for r in rows {
        let status = match r.status.as_str() {
            "accepted" => Some(UnitStatus::Accepted),
            "rejected" => Some(UnitStatus::Rejected),
            "incomplete" => Some(UnitStatus::Incomplete),
            _ => None,
        };
        out!(
            "{:<16} {:>3} {:<25} {:<12} {:<8} {}",
            minutes(&r.finished_at),
            r.position,
            fitted(&super::terminal_safe(&r.run_id), 25),
            fitted(
                &super::terminal_safe(&format!("{} {}", r.plan_id, r.revision)),
                12
            ),
            fitted(&super::terminal_safe(&r.firmware.unwrap_or_default()), 8),
            status.map_or_else(|| r.status.to_uppercase(), |s| verdict_mark(s, 0, false)),
        );
    }
    Ok(0)
}

/// A stored time to the minute, as `YYYY-MM-DD HH:MM`.
fn minutes(at: &str) -> String {
    super::terminal_safe(at)
        .chars()
        .take(16)
        .collect::<String>()
        .replacen('T', " ", 1)
}

#[derive(clap::Args)]
pub(super) struct RunsArgs {
    #[arg(long)]
    archive: crate::archive::Location,
    #[arg(long)]
    lot: Option<String>,
    /// Plan id.
    #[arg(long)]
    plan: Option<String>,
    /// Runs started on or after this date (YYYY-MM-DD) or time.
    #[arg(long)]
    since: Option<String>,
    /// Runs with at least one unit of this verdict: accepted, rejected or incomplete.
    #[arg(long)]
    verdict: Option<String>,
    #[arg(long)]
    json: bool,
}

pub(super) fn runs(args: &RunsArgs) -> Result<i32, CliError> {
    if let Some(v) = &args.verdict
        && !["accepted", "rejected", "incomplete"].contains(&v.as_str())
    {
        return Err(CliError::Usage(format!(
            "--verdict {v}: use accepted, rejected or incomplete"
        )));
    }
    if let Some(s) = &args.since
        && chrono::NaiveDate::parse_from_str(&s[..s.len().min(10)], "%Y-%m-%d").is_err()
    {
        return Err(CliError::Usage(format!(
            "--since {s}: expected a date as YYYY-MM-DD"
        )));
    }
    let archive = open_to_read(&args.archive)?;
    let filter = RunFilter {
        lot: args.lot.clone(),
        plan: args.plan.clone(),
        since: args.since.clone(),
        verdict: args.verdict.clone(),
    };
    let rows = archive.runs(&filter).map_err(db)?;
    if args.json {
        print_json(&rows);
        return Ok(0);
    }
    // 80 columns: the run id says when it started; --json has every column.
    out!(
        "{:<25} {:<12} {:<10} {:<11} {:>5} {:>5} {:>5}",
        "run",
        "plan",
        "lot",
        "state",
        "acc",
        "rej",
        "inc"
    );
    let (mut accepted, mut rejected, mut incomplete) = (0, 0, 0);
    let count = rows.len();
    for r in rows {
        out!(
            "{:<25} {:<12} {:<10} {:<11} {:>5} {:>5} {:>5}",
            fitted(&super::terminal_safe(&r.run_id), 25),
            fitted(
                &super::terminal_safe(&format!("{} {}", r.plan_id, r.revision)),
                12
            ),
            fitted(&super::terminal_safe(&r.lot.unwrap_or_default()), 10),
            fitted(&super::terminal_safe(&r.state), 11),
            r.accepted,
            r.rejected,
            r.incomplete
        );
        accepted += r.accepted;
        rejected += r.rejected;
        incomplete += r.incomplete;
    }
    let units = accepted + rejected + incomplete;
    // Yield over the unit records listed: a unit tested again counts once a run.
    let yield_text = if units == 0 {
        String::new()
    } else {
        format!("; yield {:.1} %", accepted as f64 / units as f64 * 100.0)
    };
    out!(
        "{}",
        wrapped(
            &format!(
                "{}, {}: {accepted} accepted, {rejected} rejected, {incomplete} incomplete{yield_text}",
                counted(count, "run"),
                counted(units as usize, "unit record")
            ),
            0
        )
    );
    Ok(0)
}

#[derive(clap::Args)]
pub(super) struct ExportArgs {
    /// A run id or a serial number.
    what: String,
    #[arg(long)]
    archive: crate::archive::Location,
    /// Folder to write the records and plan texts into.
    #[arg(long)]
    to: PathBuf,
}

/// The records of a run id, or else of a serial number.
fn records_of(archive: &Archive, what: &str) -> Result<Vec<crate::record::UnitRecord>, CliError> {
    let by_run = archive.unit_records(what).map_err(db)?;
    let records = if by_run.is_empty() {
        archive.serial_records(what).map_err(db)?
    } else {
        by_run
    };
    if records.is_empty() {
        return Err(CliError::Usage(format!(
            "no run and no serial number \"{what}\" in the archive"
        )));
    }
    Ok(records)
}

pub(super) fn export(args: &ExportArgs) -> Result<i32, CliError> {
    let archive = open_to_read(&args.archive)?;
    let records = records_of(&archive, &args.what)?;
    std::fs::create_dir_all(&args.to)
        .map_err(|e| CliError::Run(format!("cannot create {}: {e}", args.to.display())))?;
    let mut plans = Vec::new();
    for r in &records {
        let name = format!(
            "{}-{}-p{}.json",
            record::safe_file_stem(&r.run_id),
            record::safe_file_stem(&r.serial),
            r.position
        );
        let json = record::to_json(r).map_err(|e| CliError::Run(e.to_string()))?;
        record::write_new_file(&args.to, &name, &json).map_err(|e| CliError::Run(e.to_string()))?;
        if !plans.contains(&r.plan.sha256) {
            let (_, text) = archive.plan_text(&r.plan.sha256).map_err(db)?;
            record::write_new_file(
                &args.to,
                &format!("plan-{}.yaml", r.plan.sha256),
                text.as_bytes(),
            )
            .map_err(|e| CliError::Run(e.to_string()))?;
            plans.push(r.plan.sha256.clone());
        }
    }
    out!(
        "{} records and {} plan texts written to {}",
        records.len(),
        plans.len(),
        args.to.display()
    );
    Ok(0)
}

#[derive(clap::Args)]
pub(super) struct CopyArchiveArgs {
    /// The archive to copy (read only; left as it is).
    #[arg(long)]
    from: Location,
    /// The archive to copy into: a new SQLite file, or an empty PostgreSQL database.
    #[arg(long)]
    to: Location,
}

/// Copies a whole archive into a new one and verifies both: the same chain head, every record
/// checked on each side. Exit 1 if either side fails its verification.
pub(super) fn copy_archive(args: &CopyArchiveArgs) -> Result<i32, CliError> {
    if args.from == args.to {
        return Err(CliError::Usage(format!(
            "--from and --to are the same archive ({})",
            args.from
        )));
    }
    let source = open_to_read(&args.from)?;
    let target = Archive::open_at(&args.to).map_err(|e| CliError::Run(e.to_string()))?;
    let copied = source
        .copy_into(&target, &args.to.to_string())
        .map_err(|e| match e {
            e @ crate::archive::ArchiveError::NotEmpty(_) => CliError::Usage(e.to_string()),
            e => CliError::Run(format!("the copy was not made (nothing was written): {e}")),
        })?;
    out!(
        "copied {} runs, {} unit records, {} readings, {} step records and {} chain entries from {} to {}",
        copied.runs,
        copied.units,
        copied.readings,
        copied.steps,
        copied.chain,
        args.from,
        args.to
    );
    let mut failed = 0;
    let mut heads = Vec::new();
    for (name, archive) in [(&args.from, &source), (&args.to, &target)] {
        let v = archive.verify(None).map_err(db)?;
        for f in &v.failures {
            out!(
                "{name}: {}: {}",
                super::terminal_safe(&f.what),
                super::terminal_safe(&f.why)
            );
        }
        out!(
            "{name}: {} chain entries and {} unit records checked, {} failed",
            v.entries,
            v.unit_records,
            v.failures.len()
        );
        failed += v.failures.len();
        heads.push(v.head);
    }
    if heads[0] == heads[1] {
        out!(
            "chain head {} on both",
            heads[0].as_deref().unwrap_or("(empty)")
        );
    } else {
        out!(
            "the chain heads differ: {} and {}",
            heads[0].as_deref().unwrap_or("(empty)"),
            heads[1].as_deref().unwrap_or("(empty)")
        );
        failed += 1;
    }
    Ok(if failed == 0 { 0 } else { 1 })
}

#[derive(clap::Args)]
pub(super) struct VerifyArgs {
    #[arg(long)]
    archive: crate::archive::Location,
    /// An anchor the chain must still hold: `SEQ:SHA256` as printed on a report, or the
    /// `chain-anchor.txt` file of a run's folder. Finds records removed from the end of the
    /// chain with the chain rewritten to match, which the archive alone cannot show.
    #[arg(long, value_name = "ANCHOR|FILE")]
    anchor: Option<String>,
}

/// Checks every sealed row against the chain, and the chain against an anchor; exit 1 if
/// anything fails. Opens the archive read-only.
pub(super) fn verify(args: &VerifyArgs) -> Result<i32, CliError> {
    let anchor = match &args.anchor {
        None => None,
        Some(a) if Path::new(a).is_file() => Some(
            std::fs::read_to_string(a)
                .map_err(|e| CliError::Usage(format!("--anchor {a}: {e}")))?
                .trim()
                .to_string(),
        ),
        Some(a) => Some(a.trim().to_string()),
    };
    let archive = open_to_read(&args.archive)?;
    let v = archive.verify(anchor.as_deref()).map_err(db)?;
    for f in &v.failures {
        out!(
            "{}: {}",
            super::terminal_safe(&f.what),
            super::terminal_safe(&f.why)
        );
    }
    if v.legacy_records > 0 {
        out!(
            "{} unit records from before the chain (schema 1) were checked by their own record chain; their run rows are not covered",
            v.legacy_records
        );
    }
    if let Some(h) = &v.head {
        out!("chain head {h}");
    }
    if let Some(a) = &anchor
        && v.failures.iter().all(|f| !f.what.starts_with("the anchor"))
    {
        out!("anchor {a} is in the chain");
    }
    out!(
        "{} chain entries and {} unit records checked, {} failed",
        v.entries,
        v.unit_records,
        v.failures.len()
    );
    Ok(if v.failures.is_empty() { 0 } else { 1 })
}

#[derive(clap::Args)]
pub(super) struct CompareArgs {
    #[arg(long)]
    archive: crate::archive::Location,
    /// The baseline: run=ID, lot=L or firmware=VERSION.
    #[arg(long)]
    baseline: String,
    /// The candidate, selected the same way.
    #[arg(long)]
    candidate: String,
    /// Only records of this plan id.
    #[arg(long)]
    plan: Option<String>,
    /// The shift allowed, as a percentage of each check's tolerance limit (default: the plan's
    /// regression_allowance, else 20 %).
    #[arg(long)]
    allowance: Option<String>,
    #[arg(long)]
    json: bool,
    /// Write the comparison as JUnit XML for a CI gate.
    #[arg(long, value_name = "FILE")]
    junit: Option<PathBuf>,
    /// Write the comparison as an HTML report, with both sides' error curves.
    #[arg(long, value_name = "FILE")]
    html: Option<PathBuf>,
    #[arg(long)]
    templates: Option<PathBuf>,
    /// The paper printed reports are laid out for.
    #[arg(long, value_enum, default_value_t = crate::report::Paper::A4)]
    paper: crate::report::Paper,
}

fn selector(text: &str) -> Result<(&str, &str), CliError> {
    text.split_once('=')
        .filter(|(k, v)| !k.is_empty() && !v.is_empty())
        .ok_or_else(|| {
            CliError::Usage(format!(
                "\"{text}\": select as run=ID, lot=L or firmware=VERSION"
            ))
        })
}

/// Compares two sets of runs check by check; exit 1 when a check moved beyond its allowance or
/// a unit newly fails.
pub(super) fn compare(args: &CompareArgs) -> Result<i32, CliError> {
    use crate::plan::units::{Dimension, parse};
    // A file the comparison is to be written to must have somewhere to go, before any work.
    for (flag, path) in [("--html", &args.html), ("--junit", &args.junit)] {
        if let Some(parent) = path
            .as_deref()
            .and_then(Path::parent)
            .filter(|p| !p.as_os_str().is_empty() && !p.is_dir())
        {
            return Err(CliError::Usage(format!(
                "{flag}: the folder {} does not exist",
                parent.display()
            )));
        }
    }
    let archive = open_to_read(&args.archive)?;
    let (bk, bv) = selector(&args.baseline)?;
    let (ck, cv) = selector(&args.candidate)?;
    let baseline = archive.select(bk, bv, args.plan.as_deref()).map_err(db)?;
    let candidate = archive.select(ck, cv, args.plan.as_deref()).map_err(db)?;
    for (side, records) in [("baseline", &baseline), ("candidate", &candidate)] {
        if records.is_empty() {
            return Err(CliError::Usage(format!(
                "the {side} selects no unit records"
            )));
        }
    }
    // The plan (as archived) gives the golden units and the default allowance.
    let (_, text) = archive.plan_text(&candidate[0].plan.sha256).map_err(db)?;
    let plan = Plan::from_text(&candidate[0].plan.file, &text).map_err(CliError::Plan)?;
    let allowance = match &args.allowance {
        Some(t) => {
            parse(t, Dimension::Percent)
                .map_err(|e| CliError::Usage(format!("--allowance: {e}")))?
                / 100.0
        }
        None => plan.regression_allowance,
    };
    let result = crate::regression::compare(&baseline, &candidate, allowance, &plan.golden_units);
    if result.checks.is_empty() {
        return Err(CliError::Usage(
            "no check was evaluated on both sides (were the units refused before testing, a firmware the plan does not accept?): nothing to compare".into(),
        ));
    }
    for g in &result.missing_golden {
        eprintln!("warning: golden unit {g} is missing from the baseline or the candidate");
    }
    if let Some(path) = &args.junit {
        let xml = crate::regression::junit(
            &result,
            &format!("{} against {}", args.candidate, args.baseline),
        );
        write_file(path, xml)?;
    }
    if let Some(path) = &args.html {
        let templates = Templates::load(args.templates.as_deref())
            .map(|t| t.with_paper(args.paper))
            .map_err(|e| CliError::Usage(e.to_string()))?;
        let title = format!("{} against {}", args.candidate, args.baseline);
        let html = templates
            .compare_html(&title, &result, allowance)
            .map_err(|e| CliError::Run(e.to_string()))?;
        write_file(path, html)?;
    }
    if args.json {
        print_json(&result);
    } else {
        // The method of the checks that could be tested (a check with identical readings on
        // both sides, or too few units, has none).
        let methods: std::collections::BTreeSet<String> = result
            .checks
            .iter()
            .filter(|c| c.test.is_some())
            .map(|c| c.method())
            .collect();
        let method = match methods.len() {
            0 => "no check could be tested".to_string(),
            1 => methods.into_iter().next().unwrap_or_default(),
            _ => "methods by check (--json)".into(),
        };
        let head = format!(
            "{} against {}: {} checks ({method}), allowance {} % of each limit",
            args.candidate,
            args.baseline,
            result.checks.len(),
            allowance * 100.0
        );
        out!("{}", wrapped(&head, 0));
        out!("{}", wrapped(&result.headline(), 0));
        // 80 columns: a verdict that does not fit beside its numbers goes on the next line.
        out!(
            "{:<11} {:<14} {:>8} {:>9} {:>6} {:>7} {:>4} {:>6} verdict",
            "step",
            "quantity",
            "baseline",
            "candidate",
            "shift",
            "allowed",
            "unit",
            "p"
        );
        for c in &result.checks {
            let row = format!(
                "{:<11} {:<14} {:>8.3} {:>9.3} {:>+6.3} {:>7.3} {:>4} {:>6}",
                fitted(&c.step, 11),
                c.quantity.name(),
                c.baseline_mean,
                c.candidate_mean,
                c.shift,
                c.allowance,
                fitted(&c.error_unit, 4),
                c.p_text()
            );
            let words = c.movement.words();
            if row.chars().count() + 1 + words.chars().count() <= super::terminal::WIDTH {
                out!("{row} {words}");
            } else {
                out!("{row}");
                out!("{}", wrapped(words, 6));
            }
        }
        // The units behind a verdict that names units.
        for c in &result.checks {
            for (what, units) in [
                ("newly failing", &c.newly_failing),
                ("newly passing", &c.newly_passing),
            ] {
                if !units.is_empty() {
                    let line = format!("{} {what}: {}", c.name(), units.join(", "));
                    out!("{}", wrapped(&line, 0));
                }
            }
        }
    }
    Ok(if result.gates() { 1 } else { 0 })
}

#[derive(clap::Args)]
pub(super) struct SummaryArgs {
    #[arg(long)]
    archive: crate::archive::Location,
    /// The lot to summarise.
    #[arg(long, conflicts_with = "run")]
    lot: Option<String>,
    /// Or one run.
    #[arg(long)]
    run: Option<String>,
    /// The folder the summary is written to; unit reports not already there (under RUN/) are
    /// rendered there from the archive, so that every link works.
    #[arg(long)]
    out: PathBuf,
    #[arg(long)]
    templates: Option<PathBuf>,
    /// The paper printed reports are laid out for.
    #[arg(long, value_enum, default_value_t = crate::report::Paper::A4)]
    paper: crate::report::Paper,
    /// Also write the units' checks as JUnit XML.
    #[arg(long, value_name = "FILE")]
    junit: Option<PathBuf>,
    #[arg(long)]
    json: bool,
}

/// The lot summary, as HTML and CSV beside the runs' folders.
pub(super) fn summary(args: &SummaryArgs) -> Result<i32, CliError> {
    use crate::report::summary::LotSummary;
    let archive = open_to_read(&args.archive)?;
    let (key, value) = match (&args.lot, &args.run) {
        (Some(l), None) => ("lot", l.as_str()),
        (None, Some(r)) => ("run", r.as_str()),
        _ => return Err(CliError::Usage("give --lot L or --run ID".into())),
    };
    let mut records = archive.select(key, value, None).map_err(db)?;
    if records.is_empty() {
        return Err(CliError::Usage(format!(
            "no unit records with {key} {value}"
        )));
    }
    records.sort_by_key(|r| (r.run_id.clone(), r.position));
    let report_name = |r: &crate::record::UnitRecord| {
        format!(
            "{}/{}-p{}.html",
            r.run_id,
            record::safe_file_stem(&r.serial),
            r.position
        )
    };
    let mut summary = LotSummary::of(&format!("{key} {value}"), &records, &report_name);
    summary.made_at =
        Some(chrono::Local::now().to_rfc3339_opts(chrono::SecondsFormat::Secs, false));
    let templates = Templates::load(args.templates.as_deref())
        .map_err(|e| CliError::Usage(e.to_string()))?
        .with_paper(args.paper);
    // Every unit line links to its report: a report not beside the summary (the summary
    // written elsewhere than the runs' --out, or runs from another bench) is rendered there
    // from the archive, as `report` would.
    let missing: Vec<crate::record::UnitRecord> = records
        .iter()
        .filter(|r| !args.out.join(report_name(r)).exists())
        .cloned()
        .collect();
    if !missing.is_empty() {
        let anchors = anchors_of(&archive, &missing)?;
        for r in &missing {
            let dir = args.out.join(&r.run_id);
            std::fs::create_dir_all(&dir)
                .map_err(|e| CliError::Run(format!("cannot create {}: {e}", dir.display())))?;
            write_outputs(&dir, std::slice::from_ref(r), &templates, &anchors)?;
        }
        if !args.json {
            out!(
                "{} not beside the summary: rendered from the archive",
                counted(missing.len(), "unit report")
            );
        }
    }
    let html = templates
        .lot_html(&summary)
        .map_err(|e| CliError::Run(e.to_string()))?;
    let csv = summary.csv().map_err(|e| CliError::Run(e.to_string()))?;
    std::fs::create_dir_all(&args.out)
        .map_err(|e| CliError::Run(format!("cannot create {}: {e}", args.out.display())))?;
    let stem = super::unused_stem(
        &args.out,
        &format!("summary-{key}-{}", record::safe_file_stem(value)),
        "html",
    );
    let html_path = record::write_new_file(&args.out, &format!("{stem}.html"), html.as_bytes())
        .map_err(|e| CliError::Run(e.to_string()))?;
    record::write_new_file(&args.out, &format!("{stem}.csv"), &csv)
        .map_err(|e| CliError::Run(e.to_string()))?;
    if let Some(path) = &args.junit {
        write_file(path, crate::report::run_junit(&records))?;
    }
    if args.json {
        print_json(&summary);
    } else {
        let retests = if summary.retests > 0 {
            format!(
                "; {} of {} units retested ({} tests), each counted by its last test",
                summary.units_retested, summary.units, summary.tests
            )
        } else {
            String::new()
        };
        let text = format!(
            "{}: yield {:.1} % ({} of {} units accepted, {} rejected, {} incomplete), first-pass yield {:.1} %{retests}; {}",
            summary.title,
            summary.yield_percent,
            summary.accepted,
            summary.units,
            summary.rejected,
            summary.incomplete,
            summary.first_pass_yield_percent,
            html_path.display()
        );
        out!("{}", wrapped(&text, 0));
    }
    Ok(0)
}

#[derive(clap::Args)]
pub(super) struct ReportArgs {
    /// A run id or a serial number.
    what: String,
    #[arg(long)]
    archive: crate::archive::Location,
    /// Folder to write the reports into.
    #[arg(long)]
    out: PathBuf,
    #[arg(long)]
    templates: Option<PathBuf>,
    /// The paper printed reports are laid out for.
    #[arg(long, value_enum, default_value_t = crate::report::Paper::A4)]
    paper: crate::report::Paper,
    /// Also write the records' checks as JUnit XML.
    #[arg(long, value_name = "FILE")]
    junit: Option<PathBuf>,
}

/// Renders the reports of a run or a serial number again, from the archive.
pub(super) fn report(args: &ReportArgs) -> Result<i32, CliError> {
    let archive = open_to_read(&args.archive)?;
    let records = records_of(&archive, &args.what)?;
    let templates = Templates::load(args.templates.as_deref())
        .map_err(|e| CliError::Usage(e.to_string()))?
        .with_paper(args.paper);
    std::fs::create_dir_all(&args.out)
        .map_err(|e| CliError::Run(format!("cannot create {}: {e}", args.out.display())))?;
    let anchors = anchors_of(&archive, &records)?;
    let written = Some(write_outputs(&args.out, &records, &templates, &anchors)?);
    if let Some(path) = &args.junit {
        write_file(path, crate::report::run_junit(&records))?;
    }
    print_summary(&records, &written);
    Ok(0)
}
