//! The command line: parses arguments, runs a command, renders its errors once, and picks the
//! exit status.
//!
//! Exit status: 0 every unit accepted (or every plan valid); 1 at least one unit rejected;
//! 2 an invalid plan or invalid arguments; 3 the run could not complete.

mod archive_cmds;
mod explain;

use crate::archive::{Archive, RunRecorder, RunRow, RunState};
use crate::bench::Bench;
use crate::bench::operator::{Console, ManualSource, SharedConsole, TypedReference};
use crate::bench::reference_file::FileReference;
use crate::bench::sim::{SimBench, SimConfig};
use crate::bench::station::{self, Station};
use crate::exec::{self, Event, Reporter, RunContext};
use crate::plan::units::Dimension;
use crate::plan::{Plan, PlanErrors, Tolerance};
use crate::record::{self, UnitRecord, UnitStatus};
use crate::report::{self, Templates};
use clap::{Parser, Subcommand};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Instant;

#[derive(Parser)]
#[command(
    name = "meterproof",
    version,
    about = "Acceptance tests for electricity meters, current monitors and smart plugs"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Validate test plans and print what each will do.
    Check {
        /// Plan files (YAML).
        #[arg(required = true)]
        plans: Vec<PathBuf>,
    },
    /// Run a plan on a bench and write a record and reports per unit.
    Run(RunArgs),
    /// Serve simulated meters, a SCPI source and a SCPI reference on pseudo-terminals.
    SimMeter(SimMeterArgs),
    /// List the serial ports this machine has.
    Ports,
    /// Write the embedded report templates to a folder, for editing (use with --templates).
    Templates {
        /// The folder to write them to.
        #[arg(long)]
        export: PathBuf,
    },
    /// Continue an interrupted run from the archive.
    Resume(archive_cmds::ResumeArgs),
    /// Every run of a unit, newest first.
    History(archive_cmds::HistoryArgs),
    /// Runs, with their counts of accepted, rejected and incomplete units.
    Runs(archive_cmds::RunsArgs),
    /// Write the records of a run or a serial number, with their plan texts, to a folder.
    Export(archive_cmds::ExportArgs),
    /// Check every record in the archive against its hash and the chain.
    Verify(archive_cmds::VerifyArgs),
    /// Compare two sets of runs (before and after a firmware change) check by check.
    Compare(archive_cmds::CompareArgs),
    /// The summary of a lot or a run: yield, rejections by check, error distributions, Cpk.
    Summary(archive_cmds::SummaryArgs),
    /// Render the reports of a run or a serial number again, from the archive.
    Report(archive_cmds::ReportArgs),
    /// Print one check's whole computation from its stored record, to follow by hand.
    Explain(explain::ExplainArgs),
}

#[derive(clap::Args)]
struct SimMeterArgs {
    /// Number of simulated meters.
    #[arg(long, default_value_t = 4)]
    positions: usize,
    /// Seed of the simulation: the same seed gives the same meters.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Bench seconds per real second (20 runs a 40 s plan in 2 s).
    #[arg(long, default_value_t = 1.0)]
    time_scale: f64,
    /// Write the station file that wires the simulated bench here.
    #[arg(long)]
    station: Option<PathBuf>,
    /// A fault to inject, as POSITION:KIND[=VALUE] (drop-every=N, garble-every=N, slow=TIME,
    /// reboot-after=N, firmware=VERSION, die-after=N, echo). May be repeated.
    #[arg(long = "fault", value_name = "POSITION:KIND[=VALUE]")]
    faults: Vec<String>,
    /// Stop serving after this long (default: until killed).
    #[arg(long = "for", value_name = "TIME")]
    duration: Option<String>,
    /// Do not plant the simulator's phase defect on one meter.
    #[arg(long)]
    no_defect: bool,
}

#[derive(clap::Args)]
struct RunArgs {
    /// The plan file (YAML).
    plan: PathBuf,
    /// The bench: `sim` for the built-in simulated bench, or a station file (YAML).
    #[arg(long, default_value = "sim")]
    bench: String,
    /// Folder for records and reports; each run gets a subfolder named by its run id.
    #[arg(long)]
    out: PathBuf,
    /// Seed of the simulated bench: the same seed gives the same readings.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Serial numbers of the units, by position, comma-separated.
    #[arg(long, value_delimiter = ',')]
    serials: Option<Vec<String>>,
    /// Number of positions on the simulated bench.
    #[arg(long)]
    positions: Option<usize>,
    /// Lot (batch) id recorded with every unit.
    #[arg(long)]
    lot: Option<String>,
    /// Operator id recorded with every unit (asked for with --ask; else "unattended").
    #[arg(long)]
    operator: Option<String>,
    /// Ask at the terminal: operator, lot and serial numbers; on the simulated bench also each
    /// load change and each reference reading, as on a bench with a hand-switched load.
    #[arg(long)]
    ask: bool,
    /// Reference readings from a CSV file (columns step, quantity, value, unit), checked against
    /// the plan before any load is applied.
    #[arg(long, value_name = "FILE.csv")]
    reference: Option<PathBuf>,
    /// Folder of templates that replace the embedded ones, file by file.
    #[arg(long)]
    templates: Option<PathBuf>,
    /// Print only the final summary.
    #[arg(long)]
    quiet: bool,
    /// Run although the station's reference is past its calibration due date; the reason is
    /// recorded with every unit.
    #[arg(long, value_name = "REASON")]
    allow_overdue_reference: Option<String>,
    /// The archive database (default: archive.sqlite in the --out folder).
    #[arg(long)]
    archive: Option<PathBuf>,
    /// Also write the run as JUnit XML (a test suite per unit, a test case per check).
    #[arg(long, value_name = "FILE")]
    junit: Option<PathBuf>,
    /// Print the unit records as JSON on standard output instead of the summary table.
    #[arg(long)]
    json: bool,
    /// Where the records go when the output folder cannot take them (a full disk); checked
    /// writable before the first load. Default: meterproof-fallback in the system's temporary
    /// folder.
    #[arg(long, value_name = "DIR")]
    fallback: Option<PathBuf>,
}

/// A failure of a command, rendered once here.
#[derive(Debug, thiserror::Error)]
enum CliError {
    #[error("{0}")]
    Usage(String),
    #[error("{0}")]
    Plan(PlanErrors),
    #[error("{0}")]
    Run(String),
    /// The file given as an archive is something else.
    #[error("{0}")]
    NotArchive(String),
}

impl CliError {
    fn exit_code(&self) -> i32 {
        match self {
            CliError::Usage(_) | CliError::Plan(_) => 2,
            CliError::Run(_) => 3,
            CliError::NotArchive(_) => 1,
        }
    }
}

/// Runs the command line and returns the exit status.
pub fn main() -> i32 {
    let cli = Cli::parse();
    // The first stop signal (Ctrl-C, SIGTERM, SIGHUP) switches the output off at once and asks
    // the run to stop cleanly; a second one switches it off again and quits at once.
    let _ = ctrlc::set_handler(|| {
        let again = INTERRUPT.swap(true, Ordering::SeqCst);
        let off = switch_output_off();
        if again {
            eprintln!("\nquitting at once{}", off_text(&off));
            std::process::exit(130);
        }
        eprintln!(
            "\nstop requested{}; recording what was taken (send the signal again to quit at once)",
            off_text(&off)
        );
    });
    let result = match cli.command {
        Command::Check { plans } => check(&plans),
        Command::Run(args) => run(&args),
        Command::SimMeter(args) => sim_meter(&args),
        Command::Ports => ports(),
        Command::Templates { export } => export_templates(&export),
        Command::Resume(args) => archive_cmds::resume(&args),
        Command::History(args) => archive_cmds::history(&args),
        Command::Runs(args) => archive_cmds::runs(&args),
        Command::Export(args) => archive_cmds::export(&args),
        Command::Verify(args) => archive_cmds::verify(&args),
        Command::Compare(args) => archive_cmds::compare(&args),
        Command::Summary(args) => archive_cmds::summary(&args),
        Command::Report(args) => archive_cmds::report(&args),
        Command::Explain(args) => explain::explain(&args),
    };
    match result {
        Ok(code) => code,
        Err(e) => {
            eprintln!("meterproof: {e}");
            e.exit_code()
        }
    }
}

fn check(paths: &[PathBuf]) -> Result<i32, CliError> {
    let mut invalid = 0;
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    // A plan is checked against the reference of the first station given with it, else against
    // the simulated bench's.
    let station = paths
        .iter()
        .filter(|p| is_station_file(p))
        .find_map(|p| Station::load(p).ok());
    for path in paths {
        let summary = if is_station_file(path) {
            Station::load(path).map(|s| station_summary(&s))
        } else {
            Plan::load(path).map(|p| plan_summary(&p) + &zone_warnings(&p, station.as_ref()))
        };
        match summary {
            Ok(text) => {
                let _ = write!(out, "{text}");
            }
            Err(errors) => {
                invalid += 1;
                eprintln!("{errors}");
            }
        }
    }
    if invalid > 0 {
        return Err(CliError::Usage(format!(
            "{invalid} of {} files invalid",
            paths.len()
        )));
    }
    Ok(0)
}

/// Warnings for the plan's checks whose acceptance zone the reference and the unit's
/// resolution alone leave empty or nearly so.
fn zone_warnings(plan: &Plan, station: Option<&Station>) -> String {
    use crate::exec::preview::{ExpectedReference, narrow_zones};
    let sim_ranges = crate::bench::sim::sim_reference_ranges();
    let reference = match station {
        Some(s) => ExpectedReference {
            name: format!("station {}'s reference {}", s.id, s.reference.info.id),
            accuracy: s
                .reference
                .info
                .accuracy
                .as_deref()
                .and_then(|a| crate::metrology::accuracy::Accuracy::parse(a).ok()),
            ranges: &s.reference.info.ranges,
        },
        None => ExpectedReference {
            name: "the simulated bench's reference (give a station file to check against yours)"
                .into(),
            accuracy: crate::metrology::accuracy::Accuracy::parse(
                crate::bench::sim::SIM_REFERENCE_ACCURACY,
            )
            .ok(),
            ranges: &sim_ranges,
        },
    };
    let zones = narrow_zones(plan, &reference);
    if zones.is_empty() {
        return String::new();
    }
    let mut s = format!("  warning: against {}:\n", reference.name);
    for z in zones {
        s.push_str(&format!("  warning: {z}\n"));
    }
    s
}

/// Whether a YAML file is a station file (its top level names a `station`) rather than a plan.
fn is_station_file(path: &Path) -> bool {
    /// The top-level keys that tell the two apart, read without building the document.
    #[derive(serde::Deserialize)]
    struct Probe {
        station: Option<serde::de::IgnoredAny>,
        steps: Option<serde::de::IgnoredAny>,
    }
    std::fs::read_to_string(path)
        .ok()
        .and_then(|t| serde_yaml::from_str::<Probe>(&t).ok())
        .is_some_and(|p| p.station.is_some() && p.steps.is_none())
}

/// What `check` prints for a valid station file.
fn station_summary(s: &Station) -> String {
    let source = match &s.source {
        station::SourceSpec::Scpi { port, .. } => format!("SCPI source on {}", port.path),
        station::SourceSpec::Manual => "load set by the operator".into(),
    };
    let reading = match &s.reference.read {
        station::ReferenceRead::Scpi { port, .. } => format!("read over SCPI on {}", port.path),
        station::ReferenceRead::Operator => "typed by the operator".into(),
    };
    format!(
        "{}: station {}, {} positions, {source}; reference {} ({reading}){}\n",
        s.file,
        s.id,
        s.positions.len(),
        s.reference.info.id,
        s.reference
            .calibration_due
            .map_or(String::new(), |d| format!(", calibration due {d}"))
    )
}

/// Prints a value as pretty JSON on standard output, for machines (`--json`).
pub(super) fn print_json<T: serde::Serialize>(value: &T) {
    println!(
        "{}",
        serde_json::to_string_pretty(value).expect("records, rows and summaries serialise")
    );
}

/// "40.5 s", or "40.5 s at most (adaptive steps end sooner)" for a plan with adaptive steps.
fn scheduled_text(plan: &Plan) -> String {
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
fn settle_text(step: &crate::plan::Step) -> String {
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
fn samples_text(step: &crate::plan::Step) -> String {
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
        plan.ratings.class,
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
                    if plan.link.channels().len() > 1 {
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
        limits.push(format!("gain {}", window(w, "counts per unit")));
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

fn tolerance_text(t: &Tolerance, dim: Dimension) -> String {
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

fn run(args: &RunArgs) -> Result<i32, CliError> {
    let wall = Instant::now();
    let plan = Plan::load(&args.plan).map_err(CliError::Plan)?;
    let templates =
        Templates::load(args.templates.as_deref()).map_err(|e| CliError::Usage(e.to_string()))?;
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
    let run_dir = args.out.join(&ctx.run_id);
    std::fs::create_dir_all(&run_dir).map_err(|e| {
        CliError::Run(format!(
            "cannot create the output folder {}: {e}",
            run_dir.display()
        ))
    })?;
    let fallback = fallback_dir(args.fallback.as_deref())?;
    let archive_path = args
        .archive
        .clone()
        .unwrap_or_else(|| args.out.join("archive.sqlite"));
    let archive = Archive::open(&archive_path).map_err(|e| CliError::Run(e.to_string()))?;
    let lock = lock_run(&archive_path, &ctx.run_id)?;
    archive
        .begin_run(
            &plan,
            &RunRow {
                run_id: ctx.run_id.clone(),
                plan_sha256: plan.source.sha256.clone(),
                plan_id: plan.id.clone(),
                revision: plan.revision.clone(),
                lot: ctx.lot.clone(),
                station: bench.station.id.clone(),
                operator: ctx.operator.clone(),
                bench: serde_json::to_string(&spec).expect("a bench spec serialises"),
                tool_version: ctx.tool_version.clone(),
                started_at: chrono::Local::now()
                    .to_rfc3339_opts(chrono::SecondsFormat::Millis, false),
                finished_at: None,
                state: "running".into(),
            },
        )
        .map_err(|e| CliError::Run(e.to_string()))?;
    let mut reporter = TerminalReporter::new(args.quiet);
    let recorder = RunRecorder::new(&archive, &ctx.run_id);
    let records = exec::run_with(&plan, &mut bench, &ctx, &mut reporter, &recorder, None);
    // The archive first, so the records and reports carry its anchor; when it failed, the
    // files are what is left of the run, and its error is the last word.
    let archived = finish_run(&archive, &ctx.run_id, &records);
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
    let resume_hint = resume_hint(&ctx.run_id, &archive_path, &args.out, &records);
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
    println!(
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
    if let Some(h) = &resume_hint {
        println!("{h}");
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

/// The fallback folder, made and proven writable now (before any load is applied).
fn fallback_dir(given: Option<&Path>) -> Result<PathBuf, CliError> {
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
fn write_or_keep(
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
            println!(
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
fn resume_hint(run_id: &str, archive: &Path, out: &Path, records: &[UnitRecord]) -> Option<String> {
    let why = exec::stopped_early(records)?;
    Some(format!(
        "The run stopped early ({why}); the source output is off. Continue it with:\n  meterproof resume {run_id} --archive {} --out {}",
        shell_word(&archive.display().to_string()),
        shell_word(&out.display().to_string())
    ))
}

/// A word as a shell reads it back: quoted where it has anything but plain characters.
fn shell_word(text: &str) -> String {
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

/// How a run's bench was made, kept in the archive so that a resume can make it again.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
enum BenchSpec {
    Sim {
        seed: u64,
        positions: usize,
        serials: Option<Vec<String>>,
        /// The operator confirms loads and types references, as at a hand-switched bench.
        #[serde(default)]
        ask: bool,
    },
    Station {
        path: String,
        serials: Option<Vec<String>>,
    },
}

/// Options that shape how a bench is made.
trait BenchOptions {
    fn quiet(&self) -> bool;
    fn allow_overdue_reference(&self) -> Option<&str>;
    /// Whether to ask the operator for what is not given.
    fn ask(&self) -> bool {
        false
    }
}

impl BenchOptions for RunArgs {
    fn quiet(&self) -> bool {
        self.quiet
    }
    fn ask(&self) -> bool {
        self.ask
    }
    fn allow_overdue_reference(&self) -> Option<&str> {
        self.allow_overdue_reference.as_deref()
    }
}

/// The plan with its class limits looked up at the bench's stated ambient temperature, where
/// they depend on it (a plan is checked without a bench; a run always knows its bench).
fn plan_at_bench(plan: Plan, bench: &Bench) -> Result<Plan, CliError> {
    if !plan.class_depends_on_ambient() {
        return Ok(plan);
    }
    let Some(ambient_c) = bench.station.ambient_c else {
        return Err(CliError::Usage(format!(
            "the plan's class limits ({}) depend on the ambient temperature, and station \"{}\" does not state it: add ambient_temperature: \"23 °C\" (as measured at the bench) to the station file",
            plan.ratings.class_table.as_deref().unwrap_or_default(),
            bench.station.id
        )));
    };
    plan.at_ambient(Some(ambient_c)).map_err(CliError::Plan)
}

fn build_bench(
    spec: &BenchSpec,
    plan: &Plan,
    options: &dyn BenchOptions,
) -> Result<(Bench, Vec<String>), CliError> {
    match spec {
        BenchSpec::Sim {
            seed,
            positions,
            serials,
            ask,
        } => {
            let mut config = SimConfig::new(*seed, *positions);
            config.serials = serials.clone();
            let mut bench = SimBench::new(&config).into_bench();
            if *ask {
                // The operator confirms each load; the simulator then really applies it.
                bench
                    .source
                    .wrap(|sim| Box::new(ManualSource::new(console(), Some(sim))));
                bench.reference =
                    Box::new(TypedReference::new(console(), plan.reference_plausibility));
            }
            bench.interrupt = INTERRUPT.clone();
            guard_source(&bench);
            Ok((bench, Vec::new()))
        }
        BenchSpec::Station { path, serials } => {
            station_bench(Path::new(path), plan, serials.clone(), options)
        }
    }
}

/// Ends the run in the archive (`interrupted` when it stopped early, so it can be resumed) and
/// writes nothing else; returns the chain anchor, or says why the archive is not complete.
fn finish_run(archive: &Archive, run_id: &str, records: &[UnitRecord]) -> Result<String, CliError> {
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

/// The number of simulated positions, from --positions or --serials.
fn sim_positions(
    serials: &Option<Vec<String>>,
    positions: Option<usize>,
) -> Result<usize, CliError> {
    let positions = match (serials, positions) {
        (Some(s), Some(n)) if s.len() != n => {
            return Err(CliError::Usage(format!(
                "--positions {n} but {} serial numbers were given",
                s.len()
            )));
        }
        (Some(s), _) => s.len(),
        (None, Some(0)) => return Err(CliError::Usage("--positions must be at least 1".into())),
        (None, Some(n)) => n,
        (None, None) => 4,
    };
    Ok(positions)
}

/// A bench from a station file: its ports, source and reference.
fn station_bench(
    path: &Path,
    plan: &Plan,
    serials: Option<Vec<String>>,
    options: &dyn BenchOptions,
) -> Result<(Bench, Vec<String>), CliError> {
    let station = Station::load(path).map_err(CliError::Plan)?;
    let mut notes = Vec::new();
    if let Some(due) = station.reference.calibration_due {
        let today = chrono::Local::now().date_naive();
        if due < today {
            let id = &station.reference.info.id;
            match options.allow_overdue_reference() {
                Some(reason) => notes.push(format!(
                    "reference {id} was used past its calibration due date {due}: {reason}"
                )),
                None => {
                    return Err(CliError::Usage(format!(
                        "the reference {id} was due for calibration on {due}: the run is refused; \
                         give --allow-overdue-reference \"REASON\" to run anyway (the reason is recorded)"
                    )));
                }
            }
        }
    }
    if let Some(s) = &serials
        && s.len() != station.positions.len()
    {
        return Err(CliError::Usage(format!(
            "the station has {} positions but {} serial numbers were given",
            station.positions.len(),
            s.len()
        )));
    }
    let needs_operator = matches!(station.source, station::SourceSpec::Manual)
        || matches!(station.reference.read, station::ReferenceRead::Operator);
    let serials = match serials {
        None if options.ask() => Some(ask_serials(station.positions.len())?),
        other => other,
    };
    let mut bench = station::build_bench(&station, plan, needs_operator.then(console)).map_err(
        |e| match e {
            station::StationError::NotSerial(_) => CliError::Usage(e.to_string()),
            station::StationError::Instrument { .. } => CliError::Run(e.to_string()),
        },
    )?;
    if let Some(serials) = serials {
        for (p, s) in bench.positions.iter_mut().zip(serials) {
            p.expected_serial = Some(s);
        }
    }
    bench.interrupt = INTERRUPT.clone();
    guard_source(&bench);
    if !options.quiet() {
        eprintln!("{MAINS_CAUTION}");
    }
    Ok((bench, notes))
}

/// Printed before a real bench is driven.
pub const MAINS_CAUTION: &str = "CAUTION: this bench applies mains voltage to the test positions. \
Only qualified people may operate it; keep terminals enclosed, keep the PC isolated from the \
mains side, and de-energise the load before any wiring change. Local electrical codes and \
licensed practice take precedence.";

/// The source of the run in progress, for the signal handler to switch off.
static ACTIVE_SOURCE: Mutex<Option<crate::bench::SourceHandle>> = Mutex::new(None);

/// Registers the bench's source so that a stop signal switches it off straight away.
fn guard_source(bench: &Bench) {
    *ACTIVE_SOURCE.lock().unwrap_or_else(|p| p.into_inner()) = Some(bench.source.clone());
}

/// Switches the registered source off (waiting at most 3 s for a command in progress); `None`
/// when no run holds a source.
fn switch_output_off() -> Option<Result<(), crate::bench::BenchError>> {
    let source = ACTIVE_SOURCE
        .lock()
        .unwrap_or_else(|p| p.into_inner())
        .clone()?;
    Some(source.off_within(std::time::Duration::from_secs(3)))
}

fn off_text(off: &Option<Result<(), crate::bench::BenchError>>) -> String {
    match off {
        None => String::new(),
        Some(Ok(())) => ": the source output is OFF".into(),
        Some(Err(e)) => format!(
            ": THE SOURCE OUTPUT COULD NOT BE SWITCHED OFF ({e}): switch it off at the bench"
        ),
    }
}

/// Set by Ctrl-C: the run stops, keeps every reading taken and ends with status 3.
static INTERRUPT: std::sync::LazyLock<Arc<AtomicBool>> =
    std::sync::LazyLock::new(|| Arc::new(AtomicBool::new(false)));

/// The operator's console, one for the whole process.
fn console() -> SharedConsole {
    static CONSOLE: std::sync::OnceLock<SharedConsole> = std::sync::OnceLock::new();
    CONSOLE
        .get_or_init(|| Arc::new(Mutex::new(Console::stdin(INTERRUPT.clone()))))
        .clone()
}

fn ask(prompt: &str) -> Result<String, CliError> {
    let c = console();
    let c = c.lock().unwrap_or_else(|p| p.into_inner());
    c.ask(prompt)
        .map_err(|e| CliError::Run(format!("no answer to \"{}\": {e}", prompt.trim())))
}

fn ask_non_empty(prompt: &str) -> Result<String, CliError> {
    loop {
        let answer = ask(prompt)?;
        if answer.chars().any(char::is_control) {
            eprintln!(
                "  \"{}\" contains control characters: type it again",
                terminal_safe(&answer)
            );
            continue;
        }
        if !answer.is_empty() {
            return Ok(answer);
        }
    }
}

/// Asks for the serial number of each position (typed or scanned); refuses a serial twice.
fn ask_serials(positions: usize) -> Result<Vec<String>, CliError> {
    let mut serials: Vec<String> = Vec::new();
    while serials.len() < positions {
        let n = serials.len() + 1;
        let s = ask_non_empty(&format!("Scan or type the serial number of position {n}: "))?;
        if let Some(i) = serials.iter().position(|x| *x == s) {
            eprintln!(
                "  {s} is already in position {}: scan the unit in position {n}",
                i + 1
            );
            continue;
        }
        serials.push(s);
    }
    Ok(serials)
}

/// A run's lock: held by the one process working on the run (a run, or a resume), so that a
/// second resume of it cannot write the same readings again. An operating-system file lock, so
/// a killed process releases it. The lock files live in the system's temporary folder, named by
/// the archive's full path and the run, so that no user folder fills with them.
struct RunLock {
    _file: std::fs::File,
    path: PathBuf,
}

fn lock_run(archive: &Path, run_id: &str) -> Result<RunLock, CliError> {
    let full = std::fs::canonicalize(archive).unwrap_or_else(|_| archive.to_path_buf());
    let key = crate::plan::sha256_hex(full.display().to_string().as_bytes());
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
    fn finished(self) {
        let _ = std::fs::remove_file(&self.path);
    }
}

/// Writes a file the user named (a JUnit or HTML report), saying which one failed.
fn write_file(path: &Path, bytes: impl AsRef<[u8]>) -> Result<(), CliError> {
    std::fs::write(path, bytes)
        .map_err(|e| CliError::Run(format!("cannot write {}: {e}", path.display())))
}

/// Serial numbers given on the command line: none empty, none twice.
fn checked_serials(serials: Option<&[String]>) -> Result<Option<Vec<String>>, CliError> {
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

/// A run id that sorts by time and does not repeat: UTC time plus the process id and nanoseconds.
fn new_run_id() -> String {
    let now = chrono::Utc::now();
    format!(
        "{}-{:04x}{:04x}",
        now.format("%Y%m%dT%H%M%SZ"),
        std::process::id() & 0xffff,
        now.timestamp_subsec_nanos() & 0xffff
    )
}

/// `stem`, or `stem.2`, `stem.3`... where files of that name exist already (a resumed run whose
/// first attempt got as far as its reports): nothing is ever overwritten.
fn unused_stem(dir: &Path, stem: &str, ext: &str) -> String {
    let taken = |s: &str| dir.join(format!("{s}.{ext}")).exists();
    if !taken(stem) {
        return stem.to_string();
    }
    (2..)
        .map(|n| format!("{stem}.{n}"))
        .find(|s| !taken(s))
        .expect("some suffix is free")
}

/// The archive's anchor of each run (`SEQ:SHA256`), printed on its reports.
type Anchors = std::collections::BTreeMap<String, String>;

/// Writes a run's anchor into its folder, outside the database: what `verify --anchor` checks
/// the chain against. An earlier anchor of the run (before a resume) is kept beside it.
fn write_anchor(dir: &Path, anchor: &str) -> Result<(), CliError> {
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
fn set_aside_earlier_files(dir: &Path) -> Result<(), CliError> {
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

/// Text from a device, a file or the archive made safe for a terminal: control characters
/// (escape sequences, NUL, newlines) are shown escaped, never sent to the screen.
fn terminal_safe(text: &str) -> String {
    record::escape_controls(text)
}

/// Several lines made safe for a terminal, line by line (the line breaks kept).
fn terminal_safe_lines(text: &str) -> String {
    text.split('\n')
        .map(terminal_safe)
        .collect::<Vec<_>>()
        .join("\n")
}

/// Files written for one unit.
struct Written {
    html: PathBuf,
}

fn write_outputs(
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

fn print_summary(records: &[UnitRecord], written: &Option<Vec<Written>>) {
    println!();
    println!("{:<4} {:<20} {:<14} report", "pos", "serial", "verdict");
    for (i, r) in records.iter().enumerate() {
        let report = match written.as_ref().and_then(|w| w.get(i)) {
            Some(w) => terminal_safe(&w.html.display().to_string()),
            None => "(not written)".to_string(),
        };
        println!(
            "{:<4} {:<20} {} {:<12} {}",
            r.position,
            terminal_safe(&r.serial),
            r.verdict.status.symbol(),
            r.verdict.status.word(),
            report
        );
        for reason in &r.verdict.reasons {
            println!("       {}", terminal_safe(reason));
        }
    }
    let count = |s: UnitStatus| records.iter().filter(|r| r.verdict.status == s).count();
    println!(
        "{} accepted, {} rejected, {} incomplete",
        count(UnitStatus::Accepted),
        count(UnitStatus::Rejected),
        count(UnitStatus::Incomplete)
    );
}

/// 3 when any unit is incomplete (the run did not complete for it), else 1 when any is
/// rejected, else 0.
fn exit_status(records: &[UnitRecord]) -> i32 {
    let any = |s: UnitStatus| records.iter().any(|r| r.verdict.status == s);
    if any(UnitStatus::Incomplete) {
        3
    } else if any(UnitStatus::Rejected) {
        1
    } else {
        0
    }
}

/// Progress on standard error, one line per step.
struct TerminalReporter {
    quiet: bool,
    /// The bar of the step being measured, and the flag that stops its ticker.
    bar: Option<(indicatif::ProgressBar, Arc<AtomicBool>)>,
}

impl TerminalReporter {
    fn new(quiet: bool) -> TerminalReporter {
        TerminalReporter { quiet, bar: None }
    }

    /// A bar with the time left while a step settles and samples; indicatif draws nothing
    /// when standard error is not a terminal.
    fn start_bar(&mut self, step: &crate::plan::Step, real_s: f64) {
        let bar = indicatif::ProgressBar::new((real_s * 1000.0) as u64);
        bar.set_style(
            indicatif::ProgressStyle::with_template("      {prefix} [{bar:30}] {msg}")
                .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar())
                .progress_chars("=> "),
        );
        bar.set_prefix(step.id.clone());
        let stop = Arc::new(AtomicBool::new(false));
        let (b, s) = (bar.clone(), stop.clone());
        std::thread::spawn(move || {
            let start = Instant::now();
            while !s.load(Ordering::SeqCst) {
                let elapsed = start.elapsed().as_secs_f64();
                if elapsed >= real_s {
                    b.finish_and_clear();
                    return;
                }
                b.set_position((elapsed * 1000.0) as u64);
                b.set_message(format!("{:.0} s left", (real_s - elapsed).ceil()));
                std::thread::sleep(std::time::Duration::from_millis(200));
            }
            b.finish_and_clear();
        });
        self.bar = Some((bar, stop));
    }

    fn stop_bar(&mut self) {
        if let Some((bar, stop)) = self.bar.take() {
            stop.store(true, Ordering::SeqCst);
            bar.finish_and_clear();
        }
    }
}

impl Reporter for TerminalReporter {
    fn event(&mut self, event: &Event) {
        if self.quiet {
            return;
        }
        match event {
            Event::RunStarted { plan, positions } => eprintln!(
                "plan {} revision {} ({}), {positions} positions, scheduled bench time {}",
                plan.id,
                plan.revision,
                plan.product.model,
                scheduled_text(plan)
            ),
            Event::UnitIdentified { position, identity } => eprintln!(
                "  position {position}: {} serial {} firmware {}",
                terminal_safe(&identity.model),
                terminal_safe(&identity.serial),
                terminal_safe(&identity.firmware)
            ),
            Event::UnitRefused { position, reason } => {
                eprintln!(
                    "  position {position}: not tested: {}",
                    terminal_safe(reason)
                )
            }
            Event::StepStarted { index, total, step } => eprintln!(
                "[{}/{total}] {}: {}",
                index + 1,
                step.id,
                step.load.describe()
            ),
            Event::Measuring { step, real_s } => {
                if *real_s > 0.5 {
                    self.start_bar(step, *real_s);
                }
            }
            Event::StepFinished { results, .. } => {
                self.stop_bar();
                let marks: Vec<String> = results
                    .iter()
                    .map(|(pos, status, failed)| {
                        let mark = match (status, failed) {
                            (crate::record::StepStatus::Done, 0) => "✔",
                            (crate::record::StepStatus::Done, _) => "✘",
                            _ => "◐",
                        };
                        format!("{pos}{mark}")
                    })
                    .collect();
                eprintln!("      {}", marks.join(" "));
            }
            Event::RecordingFailed { what } => {
                self.stop_bar();
                eprintln!(
                    "ARCHIVE: {what}. Nothing more can be kept: no further load is applied, the output is switched off, and what was taken is written as files (or to the fallback folder)."
                );
            }
            Event::StepSetAside { step, reason } => {
                self.stop_bar();
                eprintln!(
                    "!!! step {} NOT JUDGED for any unit: {}",
                    terminal_safe(&step.id),
                    terminal_safe(reason)
                );
            }
            Event::RunFinished { .. } => {}
        }
    }
}

fn sim_meter(args: &SimMeterArgs) -> Result<i32, CliError> {
    use crate::bench::sim_device::Faults;
    use crate::bench::sim_station::{SimStation, merge_faults, parse_fault};
    if args.positions == 0 {
        return Err(CliError::Usage("--positions must be at least 1".into()));
    }
    if !(args.time_scale > 0.0 && args.time_scale <= 1000.0) {
        return Err(CliError::Usage(
            "--time-scale must be greater than zero and at most 1000".into(),
        ));
    }
    let mut faults = vec![Faults::default(); args.positions];
    for text in &args.faults {
        let (position, f) = parse_fault(text).map_err(|e| CliError::Usage(e.to_string()))?;
        let slot = faults.get_mut(position - 1).ok_or_else(|| {
            CliError::Usage(format!(
                "--fault {text}: there are only {} positions",
                args.positions
            ))
        })?;
        merge_faults(slot, f);
    }
    let duration = match &args.duration {
        None => None,
        Some(t) => Some(
            crate::plan::units::parse(t, Dimension::Time)
                .map_err(|e| CliError::Usage(format!("--for: {e}")))?,
        ),
    };
    let mut config = SimConfig::new(args.seed, args.positions);
    config.plant_defect = !args.no_defect;
    let station = SimStation::serve(&config, args.time_scale, &faults)
        .map_err(|e| CliError::Run(format!("cannot create pseudo-terminals: {e}")))?;
    println!(
        "simulated bench, seed {}, {} meters, time scale {}",
        args.seed, args.positions, args.time_scale
    );
    for (i, (m, serial)) in station.meters.iter().zip(&station.serials).enumerate() {
        println!("  position {}: {}  serial {serial}", i + 1, m.path);
    }
    println!("  source:     {}  (SCPI)", station.source.path);
    println!("  reference:  {}  (SCPI)", station.reference.path);
    if let Some(path) = &args.station {
        let dir = path
            .parent()
            .filter(|d| !d.as_os_str().is_empty())
            .unwrap_or(Path::new("."));
        let name = path
            .file_name()
            .ok_or_else(|| CliError::Usage("--station needs a file name".into()))?
            .to_string_lossy()
            .into_owned();
        let _ = std::fs::remove_file(path);
        record::write_new_file(dir, &name, station.station_yaml().as_bytes())
            .map_err(|e| CliError::Run(e.to_string()))?;
        println!("station file: {}", path.display());
    }
    println!("serving until stopped");
    let _ = std::io::stdout().flush();
    let started = Instant::now();
    loop {
        std::thread::sleep(std::time::Duration::from_millis(100));
        if duration.is_some_and(|d| started.elapsed().as_secs_f64() >= d) {
            return Ok(0);
        }
    }
}

fn export_templates(dir: &Path) -> Result<i32, CliError> {
    std::fs::create_dir_all(dir)
        .map_err(|e| CliError::Run(format!("cannot create {}: {e}", dir.display())))?;
    for (name, text) in report::DEFAULT_TEMPLATES {
        record::write_new_file(dir, name, text.as_bytes())
            .map_err(|e| CliError::Run(format!("{e} (templates already there are kept)")))?;
        println!("{}", dir.join(name).display());
    }
    Ok(0)
}

fn ports() -> Result<i32, CliError> {
    let ports = serialport::available_ports()
        .map_err(|e| CliError::Run(format!("cannot list serial ports: {e}")))?;
    print!("{}", ports_text(&ports));
    Ok(0)
}

/// The serial ports as `ports` lists them: path, kind, and for USB adapters the vendor and
/// product ids, serial number and product name (what tells two adapters of one model apart).
fn ports_text(ports: &[serialport::SerialPortInfo]) -> String {
    if ports.is_empty() {
        return "no serial ports found (pseudo-terminals are never listed)\n".into();
    }
    let mut s = format!(
        "{:<24} {:<10} {:<10} {:<18} product\n",
        "port", "type", "vid:pid", "serial"
    );
    for p in ports {
        let name = terminal_safe(&p.port_name);
        let line = match &p.port_type {
            serialport::SerialPortType::UsbPort(u) => format!(
                "{name:<24} {:<10} {:04x}:{:04x}  {:<18} {}",
                "usb",
                u.vid,
                u.pid,
                terminal_safe(u.serial_number.as_deref().unwrap_or_default()),
                terminal_safe(u.product.as_deref().unwrap_or_default())
            ),
            serialport::SerialPortType::PciPort => format!("{name:<24} {:<10}", "pci"),
            serialport::SerialPortType::BluetoothPort => format!("{name:<24} {:<10}", "bluetooth"),
            serialport::SerialPortType::Unknown => format!("{name:<24} {:<10}", "other"),
        };
        s.push_str(line.trim_end());
        s.push('\n');
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use serialport::{SerialPortInfo, SerialPortType, UsbPortInfo};

    /// Two USB-UART adapters of one model (vendor 0403, product 6001: the ids a common
    /// USB-serial bridge reports; common practice, no published source) are told apart by
    /// their serial numbers; a serial number with a terminal escape in it is shown harmless.
    #[test]
    fn ports_are_listed_with_what_tells_adapters_apart() {
        let usb = |path: &str, serial: &str| SerialPortInfo {
            port_name: path.into(),
            port_type: SerialPortType::UsbPort(UsbPortInfo {
                vid: 0x0403,
                pid: 0x6001,
                serial_number: Some(serial.into()),
                manufacturer: None,
                product: Some("USB-UART bench adapter".into()),
            }),
        };
        let text = ports_text(&[
            usb("/dev/ttyUSB0", "A10K3X"),
            usb("/dev/ttyUSB1", "B2\u{1b}[2J"),
            SerialPortInfo {
                port_name: "/dev/ttyS0".into(),
                port_type: SerialPortType::Unknown,
            },
        ]);
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines.len(), 4, "{text}");
        assert!(lines[1].starts_with("/dev/ttyUSB0") && lines[1].contains("0403:6001"));
        assert!(lines[1].contains("A10K3X") && lines[1].ends_with("USB-UART bench adapter"));
        assert!(!lines[2].contains('\u{1b}'), "{:?}", lines[2]);
        assert!(lines[3].starts_with("/dev/ttyS0") && lines[3].ends_with("other"));
        assert!(ports_text(&[]).starts_with("no serial ports found"));
    }
}
