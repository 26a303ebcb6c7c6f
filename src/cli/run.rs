//! `meterproof run`: a plan on a bench, from the checks before any load (plan, templates,
//! serials, reference file, output folder, archive, fallback, run lock) through the engine to the
//! records, reports and archive rows written, with a record that cannot be written kept
//! elsewhere rather than lost. The bench comes from the command line's choice (the simulator or
//! a station file), built in `bench_choice` the same way for `resume`.

use super::*;

pub(super) fn run(args: &RunArgs) -> Result<i32, CliError> {
    let wall = Instant::now();
    let plan = Plan::load(&args.plan).map_err(CliError::Plan)?;
    let templates = Templates::load(args.templates.as_deref())
        .map_err(|e| CliError::Usage(e.to_string()))?
        .with_paper(args.paper);
    let mut serials = checked_serials(args.serials.as_deref())?;
    // The reference file is checked against the plan before anything else happens.
    let file_reference = match &args.reference {
        Some(path) => {
            Some(FileReference::load(path, &plan).map_err(|e| CliError::Usage(e.to_string()))?)
        }
        None => None,
    };
    for (what, text) in [("--operator", &args.operator), ("--lot", &args.lot)] {
        if let Some(t) = text
            && t.chars().any(char::is_control)
        {
            return Err(CliError::Usage(format!(
                "{what}: \"{}\" contains control characters",
                terminal_safe(t)
            )));
        }
    }
    let operator = match (&args.operator, args.ask) {
        (Some(o), _) => o.clone(),
        (None, true) => ask_non_empty("Operator id: ")?,
        (None, false) => "unattended".into(),
    };
    let lot = match (&args.lot, args.ask) {
        (Some(l), _) => Some(l.clone()),
        (None, true) => Some(ask_non_empty("Lot id: ")?),
        (None, false) => None,
    };
    if args.sim_firmware.is_some() && args.bench != "sim" {
        return Err(CliError::Usage(
            "--sim-firmware is for the simulated bench (--bench sim); a station's meters have their own firmware".into(),
        ));
    }
    let spec = if args.bench == "sim" {
        let positions = sim_positions(&serials, args.positions)?;
        if serials.is_none() && args.ask {
            serials = Some(ask_serials(positions)?);
        }
        BenchSpec::Sim {
            seed: args.seed,
            positions,
            serials,
            ask: args.ask,
            firmware: args.sim_firmware.clone(),
            pace: None,
        }
    } else {
        BenchSpec::Station {
            path: std::fs::canonicalize(&args.bench)
                .unwrap_or_else(|_| PathBuf::from(&args.bench))
                .display()
                .to_string(),
            serials,
        }
    };
    let (mut bench, notes) = build_bench(&spec, &plan, args)?;
    let plan = plan_at_bench(plan, &bench)?;
    if let Some(mut r) = file_reference {
        let now = chrono::Local::now().fixed_offset();
        r.anchor(now - chrono::Duration::microseconds((bench.clock.now_s() * 1e6) as i64));
        // The file's instrument is the reference of this run: its accuracy goes into every
        // budget, and its name into every record.
        bench.station.reference = r.instrument().clone();
        bench.reference = Box::new(r);
    }
    let ctx = RunContext {
        run_id: new_run_id(),
        operator,
        lot,
        tool_version: crate::VERSION.to_string(),
        notes,
    };
    // The output folder and the archive must be writable before any load is applied.
    let run_dir = run_folder(&args.out, &ctx.run_id)?;
    let fallback = fallback_dir(args.fallback.as_deref())?;
    // The command line's archive, else the station file's, else the file beside the reports.
    let (archive_given, journal_given) = match (&args.archive, &spec) {
        (None, BenchSpec::Station { path, .. }) if args.journal.is_none() => {
            let station =
                crate::bench::station::Station::load(Path::new(path)).map_err(CliError::Plan)?;
            (
                station.archive.map(|a| Location::parse(&a)),
                station.journal,
            )
        }
        _ => (args.archive.clone(), args.journal.clone()),
    };
    let keeping = super::journal::keeping(
        archive_given.as_ref(),
        journal_given.as_deref(),
        Location::Sqlite(args.out.join("archive.sqlite")),
    )?;
    let archive_path = keeping.at.clone();
    let archive = Archive::open_at(&archive_path).map_err(|e| CliError::Run(e.to_string()))?;
    if let Some((journal, url)) = &keeping.journal {
        // What an earlier run left in the journal goes first (said, never in the way).
        super::journal::send(journal, url);
    }
    let lock = lock_run(&archive_path, &ctx.run_id)?;
    begin_in_archive(&archive, &plan, &ctx, &bench, &spec)?;
    let mut reporter = TerminalReporter::new(args.quiet);
    let recorder = RunRecorder::new(&archive, &ctx.run_id);
    let records = exec::run_with(&plan, &mut bench, &ctx, &mut reporter, &recorder, None);
    // The archive first, so the records and reports carry its anchor; when it failed, the
    // files are what is left of the run, and its error is the last word.
    let archived = finish_run(&archive, &ctx.run_id, &records);
    if let Some((journal, url)) = &keeping.journal {
        super::journal::send(journal, url);
    }
    let mut anchors = Anchors::new();
    if let Ok(anchor) = &archived {
        anchors.insert(ctx.run_id.clone(), anchor.clone());
    }
    let (written, not_written) = write_or_keep(
        &run_dir,
        &records,
        &templates,
        &anchors,
        &fallback,
        &ctx.run_id,
    );
    if let Some(path) = &args.junit {
        write_file(path, report::run_junit(&records))?;
    }
    let resume_hint = resume_hint(
        &ctx.run_id,
        &resume_archive_args(
            archive_given.as_ref(),
            journal_given.as_deref(),
            &archive_path,
        ),
        &args.out,
        &records,
    );
    if resume_hint.is_none() && archived.is_ok() {
        lock.finished();
    }
    if args.json {
        print_json(&records);
        if let Some(h) = &resume_hint {
            eprintln!("{h}");
        }
        return match (archived, not_written) {
            (_, Some(e)) | (Err(e), None) => Err(e),
            (Ok(_), None) => Ok(exit_status(&records)),
        };
    }
    print_summary(&records, &written);
    let last = format!(
        "bench time {} ({}), wall time {:.2} s; records and reports {}",
        report::duration_text(records.first().map_or(0.0, |r| r.bench_time_s)),
        if bench.clock.is_virtual() {
            "simulated".to_string()
        } else if bench.clock.scale() != 1.0 {
            format!("real clock run {}× fast", bench.clock.scale())
        } else {
            "real clock".to_string()
        },
        wall.elapsed().as_secs_f64(),
        if written.is_some() {
            format!("in {}", run_dir.display())
        } else {
            "NOT written (see above for where the records are)".to_string()
        }
    );
    out!("{}", super::wrapped(&last, 0));
    if let Some(h) = &resume_hint {
        out!("{h}");
    }
    // Where the records are is the last word when they are not where they should be.
    match (archived, not_written) {
        (Err(a), Some(e)) => {
            eprintln!("meterproof: {a}");
            Err(e)
        }
        (Err(a), None) => Err(a),
        (Ok(_), Some(e)) => Err(e),
        (Ok(_), None) => Ok(exit_status(&records)),
    }
}

/// The run's own folder in `out`, made now (before any load is applied).
pub(super) fn run_folder(out: &Path, run_id: &str) -> Result<PathBuf, CliError> {
    let run_dir = out.join(run_id);
    std::fs::create_dir_all(&run_dir).map_err(|e| {
        CliError::Run(format!(
            "cannot create the output folder {}: {e}",
            run_dir.display()
        ))
    })?;
    Ok(run_dir)
}

/// Enters a run in the archive, before any load: its plan, bench, operator and lot, `running`.
pub(super) fn begin_in_archive(
    archive: &Archive,
    plan: &Plan,
    ctx: &RunContext,
    bench: &Bench,
    spec: &BenchSpec,
) -> Result<(), CliError> {
    archive
        .begin_run(
            plan,
            &RunRow {
                run_id: ctx.run_id.clone(),
                plan_sha256: plan.source.sha256.clone(),
                plan_id: plan.id.clone(),
                revision: plan.revision.clone(),
                lot: ctx.lot.clone(),
                station: bench.station.id.clone(),
                operator: ctx.operator.clone(),
                bench: serde_json::to_string(spec).expect("a bench spec serialises"),
                tool_version: ctx.tool_version.clone(),
                started_at: chrono::Local::now()
                    .to_rfc3339_opts(chrono::SecondsFormat::Millis, false),
                finished_at: None,
                state: "running".into(),
            },
        )
        .map_err(|e| CliError::Run(e.to_string()))
}

/// The fallback folder, made and proven writable now (before any load is applied).
pub(super) fn fallback_dir(given: Option<&Path>) -> Result<PathBuf, CliError> {
    let dir = given
        .map(Path::to_path_buf)
        .unwrap_or_else(|| std::env::temp_dir().join("meterproof-fallback"));
    let probe = dir.join(format!(".probe-{}", std::process::id()));
    std::fs::create_dir_all(&dir)
        .and_then(|_| std::fs::write(&probe, b"probe"))
        .and_then(|_| std::fs::remove_file(&probe))
        .map_err(|e| {
            CliError::Run(format!(
                "the fallback folder {} is not writable ({e}): give --fallback a folder that is",
                dir.display()
            ))
        })?;
    Ok(dir)
}

/// Writes the run's anchor, records and reports; when the output folder cannot take them (a
/// full disk), keeps the records in the fallback folder, or, failing that too, prints them as
/// JSON on standard output: what was measured is never lost. Returns what was written, and
/// the error to end the run with when the outputs could not be written.
pub(super) fn write_or_keep(
    run_dir: &Path,
    records: &[UnitRecord],
    templates: &Templates,
    anchors: &Anchors,
    fallback: &Path,
    run_id: &str,
) -> (Option<Vec<Written>>, Option<CliError>) {
    let written = anchors
        .get(run_id)
        .map_or(Ok(()), |a| write_anchor(run_dir, a))
        .and_then(|_| write_outputs(run_dir, records, templates, anchors));
    let e = match written {
        Ok(w) => return (Some(w), None),
        Err(e) => e,
    };
    eprintln!("OUTPUT: {e}");
    let dir = fallback.join(run_id);
    let kept = std::fs::create_dir_all(&dir)
        .map_err(|e| e.to_string())
        .and_then(|_| {
            for r in records {
                let json = record::to_json(r).map_err(|e| e.to_string())?;
                let name = format!("{}-p{}.json", record::safe_file_stem(&r.serial), r.position);
                if !dir.join(&name).exists() {
                    record::write_new_file(&dir, &name, &json).map_err(|e| e.to_string())?;
                }
            }
            Ok(())
        });
    let whereto = match kept {
        Ok(()) => format!("the unit records are kept in {}", dir.display()),
        Err(why) => {
            eprintln!(
                "FALLBACK: {} cannot take them either ({why})",
                dir.display()
            );
            out!(
                "{}",
                serde_json::to_string(records).expect("records serialise")
            );
            "the unit records are printed above as JSON: save them".to_string()
        }
    };
    eprintln!("OUTPUT: {whereto}");
    (
        None,
        Some(CliError::Run(format!(
            "the records and reports could not be written to {} ({e}); {whereto}",
            run_dir.display()
        ))),
    )
}

/// For a run stopped early: that the output is off, and the command that continues it.
pub(super) fn resume_hint(
    run_id: &str,
    archive_args: &str,
    out: &Path,
    records: &[UnitRecord],
) -> Option<String> {
    let why = exec::stopped_early(records)?;
    Some(format!(
        "The run stopped early ({why}); the source output is off. Continue it with:\n  meterproof resume {run_id} {archive_args} --out {}",
        shell_word(&out.display().to_string())
    ))
}

/// The archive options of a resume command line: `--archive A`, or with a journal `--journal
/// J --archive URL` (the address without its password).
pub(super) fn resume_archive_args(
    archive: Option<&Location>,
    journal: Option<&Path>,
    at: &Location,
) -> String {
    match (archive, journal) {
        (Some(shared), Some(j)) => format!(
            "--journal {} --archive {}",
            shell_word(&j.display().to_string()),
            shell_word(&shared.to_string())
        ),
        _ => format!("--archive {}", shell_word(&at.to_string())),
    }
}

/// A word as a shell reads it back: quoted where it has anything but plain characters.
pub(super) fn shell_word(text: &str) -> String {
    if !text.is_empty()
        && text
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./:=@+,".contains(c))
    {
        text.to_string()
    } else {
        format!("'{}'", text.replace('\'', "'\\''"))
    }
}

/// Ends the run in the archive (`interrupted` when it stopped early, so it can be resumed) and
/// writes nothing else; returns the chain anchor, or says why the archive is not complete.
pub(super) fn finish_run(
    archive: &Archive,
    run_id: &str,
    records: &[UnitRecord],
) -> Result<String, CliError> {
    let finished_at = records
        .first()
        .map(|r| r.finished_at.clone())
        .unwrap_or_default();
    let state = if exec::stopped_early(records).is_some() {
        RunState::Interrupted
    } else {
        RunState::Finished
    };
    let anchor = archive
        .finish_run(run_id, &finished_at, state)
        .map_err(|e| CliError::Run(e.to_string()))?;
    if let Some(e) = archive.failure() {
        return Err(CliError::Run(format!(
            "the archive did not take every reading ({e}); the records are still written as files"
        )));
    }
    Ok(anchor)
}

/// A run's lock: held by the one process working on the run (a run, or a resume), so that a
/// second resume of it cannot write the same readings again. An operating-system file lock, so
/// a killed process releases it. The lock files live in the system's temporary folder, named by
/// the archive's full path and the run, so that no user folder fills with them.
pub(super) struct RunLock {
    _file: std::fs::File,
    path: PathBuf,
}

pub(super) fn lock_run(archive: &Location, run_id: &str) -> Result<RunLock, CliError> {
    let name = match archive {
        Location::Sqlite(path) => std::fs::canonicalize(path)
            .unwrap_or_else(|_| path.clone())
            .display()
            .to_string(),
        // A database is named by its address without the password; this lock holds on this
        // machine only (two benches never share a run id: it carries the station).
        Location::Postgres(_) => archive.to_string(),
    };
    let key = crate::plan::sha256_hex(name.as_bytes());
    let dir = std::env::temp_dir().join("meterproof-run-locks");
    std::fs::create_dir_all(&dir)
        .map_err(|e| CliError::Run(format!("cannot create {}: {e}", dir.display())))?;
    let path = dir.join(format!(
        "{}-{}.lock",
        &key[..16],
        record::safe_file_stem(run_id)
    ));
    let file = std::fs::OpenOptions::new()
        .create(true)
        .truncate(false)
        .write(true)
        .read(true)
        .open(&path)
        .map_err(|e| CliError::Run(format!("cannot open {}: {e}", path.display())))?;
    match file.try_lock() {
        Ok(()) => {
            let _ = file.set_len(0);
            let _ = (&file).write_all(format!("{}\n", std::process::id()).as_bytes());
            Ok(RunLock { _file: file, path })
        }
        Err(std::fs::TryLockError::WouldBlock) => {
            let holder = std::fs::read_to_string(&path).unwrap_or_default();
            Err(CliError::Usage(format!(
                "run {run_id} is being worked on by another meterproof (process {}): wait for it to end; two processes must never run one run",
                holder.trim()
            )))
        }
        Err(std::fs::TryLockError::Error(e)) => Err(CliError::Run(format!(
            "cannot lock {}: {e}",
            path.display()
        ))),
    }
}

impl RunLock {
    /// A finished run is never resumed again: its lock file can go (a process that opened it
    /// meanwhile finds the run finished).
    pub(super) fn finished(self) {
        let _ = std::fs::remove_file(&self.path);
    }
}

/// Serial numbers given on the command line: none empty, none twice.
pub(super) fn checked_serials(serials: Option<&[String]>) -> Result<Option<Vec<String>>, CliError> {
    let Some(serials) = serials else {
        return Ok(None);
    };
    let mut seen = std::collections::HashSet::new();
    for s in serials {
        if s.chars().any(char::is_control) {
            return Err(CliError::Usage(format!(
                "--serials: \"{}\" contains control characters",
                terminal_safe(s)
            )));
        }
        if s.trim().is_empty() {
            return Err(CliError::Usage(
                "--serials contains an empty serial number".into(),
            ));
        }
        if !seen.insert(s.trim()) {
            return Err(CliError::Usage(format!(
                "serial number {} is given twice in --serials",
                s.trim()
            )));
        }
    }
    Ok(Some(serials.iter().map(|s| s.trim().to_string()).collect()))
}

/// A run id that sorts by time and does not repeat: UTC time plus 32 random bits, so that
/// benches on several machines sharing one archive do not meet (the archive refuses a run id it
/// has, before any load, should two ever do).
pub(super) fn new_run_id() -> String {
    let now = chrono::Utc::now();
    format!(
        "{}-{:08x}",
        now.format("%Y%m%dT%H%M%SZ"),
        rand::random::<u32>()
    )
}

/// Writes a run's anchor into its folder, outside the database: what `verify --anchor` checks
/// the chain against. An earlier anchor of the run (before a resume) is kept beside it.
pub(super) fn write_anchor(dir: &Path, anchor: &str) -> Result<(), CliError> {
    let name = unused_stem(dir, "chain-anchor", "txt");
    record::write_new_file(
        dir,
        &format!("{name}.txt"),
        format!("{anchor}\n").as_bytes(),
    )
    .map_err(|e| CliError::Run(e.to_string()))?;
    Ok(())
}

/// Moves every file a run's folder holds into `earlier-N/` (N the first free number), so that a
/// resumed run's final reports take the plain names and nothing is overwritten or lost; stale
/// temporary files of a killed write are removed.
pub(super) fn set_aside_earlier_files(dir: &Path) -> Result<(), CliError> {
    let err = |e: std::io::Error| CliError::Run(format!("cannot tidy {}: {e}", dir.display()));
    let files: Vec<PathBuf> = std::fs::read_dir(dir)
        .map_err(err)?
        .filter_map(Result::ok)
        .map(|e| e.path())
        .filter(|p| p.is_file())
        .collect();
    let (temps, files): (Vec<PathBuf>, Vec<PathBuf>) = files.into_iter().partition(|p| {
        p.file_name()
            .and_then(|n| n.to_str())
            .is_some_and(|n| n.starts_with('.') && n.ends_with(".tmp"))
    });
    for t in temps {
        let _ = std::fs::remove_file(t);
    }
    if files.is_empty() {
        return Ok(());
    }
    let aside = (1..)
        .map(|n| dir.join(format!("earlier-{n}")))
        .find(|d| !d.exists())
        .expect("some number is free");
    std::fs::create_dir(&aside).map_err(err)?;
    for f in files {
        let name = f.file_name().expect("a file has a name").to_owned();
        std::fs::rename(&f, aside.join(name)).map_err(err)?;
    }
    Ok(())
}

pub(super) fn write_outputs(
    dir: &Path,
    records: &[UnitRecord],
    templates: &Templates,
    anchors: &Anchors,
) -> Result<Vec<Written>, CliError> {
    let mut written = Vec::new();
    let run_err = |e: &dyn std::fmt::Display| CliError::Run(e.to_string());
    for r in records {
        let stem = unused_stem(
            dir,
            &format!("{}-p{}", record::safe_file_stem(&r.serial), r.position),
            "json",
        );
        // The record first: it is what the reports are made from and what must not be lost.
        let json = record::to_json(r).map_err(|e| run_err(&e))?;
        record::write_new_file(dir, &format!("{stem}.json"), &json).map_err(|e| run_err(&e))?;
        let anchor = anchors.get(&r.run_id).map(String::as_str);
        let html = templates.unit_html(r, anchor).map_err(|e| run_err(&e))?;
        let html_path = record::write_new_file(dir, &format!("{stem}.html"), html.as_bytes())
            .map_err(|e| run_err(&e))?;
        let csv = report::unit_csv(r).map_err(|e| run_err(&e))?;
        record::write_new_file(dir, &format!("{stem}.csv"), &csv).map_err(|e| run_err(&e))?;
        written.push(Written { html: html_path });
    }
    Ok(written)
}
