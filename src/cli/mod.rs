//! The command line: parses arguments, runs a command, renders its errors once, and picks the
//! exit status. One module per command or family (`run`, `check`, `archive_cmds`, `explain`,
//! `tools`), the terminal front end in `terminal`; this module keeps the arguments, the errors,
//! the stop-signal handler and the operator's console, which every command shares. Nothing
//! below `cli` prints.
//!
//! Exit status: 0 every unit accepted (or every plan valid); 1 at least one unit rejected;
//! 2 an invalid plan or invalid arguments; 3 the run could not complete.

/// Prints a line on standard output. A reader that went away (`meterproof runs | head`) ends
/// nothing: what is left to say is dropped quietly, and a run goes on with its load and its
/// archive. Any other failure to write is said once on standard error.
macro_rules! out {
    () => {
        $crate::cli::write_out(format_args!("\n"))
    };
    ($($arg:tt)*) => {
        $crate::cli::write_out(format_args!("{}\n", format_args!($($arg)*)))
    };
}

/// As [`out!`], without the line ending.
macro_rules! out_part {
    ($($arg:tt)*) => {
        $crate::cli::write_out(format_args!($($arg)*))
    };
}

mod archive_cmds;
mod bench_choice;
mod check;
mod editor;
mod explain;
mod journal;
mod run;
mod serve;
mod terminal;
mod tools;
mod try_link;

use bench_choice::{BenchOptions, BenchSpec, build_bench, plan_at_bench, sim_positions};
use check::check;
use run::{
    fallback_dir, finish_run, lock_run, resume_archive_args, resume_hint, run,
    set_aside_earlier_files, write_or_keep, write_outputs,
};
use terminal::{
    TerminalReporter, Written, exit_status, fitted, print_summary, terminal_safe,
    terminal_safe_lines, verdict_mark, wrapped,
};
use tools::{export_templates, ports, sim_meter};

use crate::archive::{Archive, Location, RunRecorder, RunRow, RunState};
use crate::bench::Bench;
use crate::bench::operator::{Console, ConsoleRescan, ManualSource, SharedConsole, TypedReference};
use crate::bench::reference_file::FileReference;
use crate::bench::sim::{SimBench, SimConfig};
use crate::bench::station::{self, Station};
use crate::exec::{self, Event, Reporter, RunContext};
use crate::plan::units::Dimension;
use crate::plan::{Plan, PlanErrors};
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
    /// Try a plan's link on one unit, with no load: the raw exchange of the init, identity and
    /// every quantity's request, what each reply pattern caught, and why a line did not match.
    TryLink(try_link::TryLinkArgs),
    /// List the serial ports this machine has.
    Ports,
    /// Print the JSON Schema of plan or station files, for an editor's YAML language server.
    Schema(editor::SchemaArgs),
    /// Print a shell completion script (bash, zsh, fish, elvish, powershell).
    Completions(editor::CompletionsArgs),
    /// Print the man page, or write a page per command to a folder.
    Man(editor::ManArgs),
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
    /// Copy a whole archive into a new one (SQLite to PostgreSQL or back), every hash kept.
    CopyArchive(archive_cmds::CopyArchiveArgs),
    /// Upload a station's journal to the shared archive (what waits since it was out of reach).
    Upload(journal::UploadArgs),
    /// Compare two sets of runs (before and after a firmware change) check by check.
    Compare(archive_cmds::CompareArgs),
    /// The summary of a lot or a run: yield, rejections by check, error distributions, Cpk.
    Summary(archive_cmds::SummaryArgs),
    /// Render the reports of a run or a serial number again, from the archive.
    Report(archive_cmds::ReportArgs),
    /// Print one check's whole computation from its stored record, to follow by hand.
    Explain(explain::ExplainArgs),
    /// Serve the station screen to a browser: scan, start and watch runs, and look units up in
    /// the archive.
    Serve(serve::ServeArgs),
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
    /// What the meters speak: text (a port each), modbus (RTU, several on a bus) or
    /// iec62056_21 (the optical readout, a port each).
    #[arg(long, default_value = "text", value_parser = ["text", "modbus", "iec62056_21"])]
    protocol: String,
    /// With --protocol modbus: how many buses (ports) the meters are spread over, in position
    /// order; each meter's address is its position number.
    #[arg(long, default_value_t = 1)]
    buses: usize,
    /// A fault to inject, as POSITION:KIND[=VALUE] (drop-every=N, garble-every=N, slow=TIME,
    /// reboot-after=N, firmware=VERSION (the version reported, nothing else), die-after=N,
    /// echo, ignore-writes, console; on Modbus also busy-every=N and bad-crc-every=N). May be
    /// repeated.
    #[arg(long = "fault", value_name = "POSITION:KIND[=VALUE]")]
    faults: Vec<String>,
    /// Stop serving after this long (default: until killed).
    #[arg(long = "for", value_name = "TIME")]
    duration: Option<String>,
    /// Do not plant the simulator's phase defect on one meter.
    #[arg(long)]
    no_defect: bool,
    /// A firmware change for every meter, to rehearse a regression comparison:
    /// VERSION[,current=±X%[@AMPS]][,voltage=±X%][,phase=±Xdeg][,noise=X%]. (A fault
    /// P:firmware=VERSION changes only the version one meter reports.)
    #[arg(long, value_name = "SPEC")]
    firmware: Option<String>,
    /// Every text meter behaves as an interactive console: characters echoed, CRLF line
    /// endings, a "> " prompt, log lines until `log off` (the fault P:console for one meter).
    #[arg(long)]
    console: bool,
    /// The counter also counts the reference standard's own pulse output, at this constant
    /// (imp/kWh): counts of the test output are then set against the standard's pulses.
    #[arg(long, value_name = "IMP_PER_KWH")]
    reference_pulses: Option<f64>,
    /// A fault of the served counter: garble-every=N (every Nth reply is noise) or die-after=N
    /// (no reply after N requests).
    #[arg(long, value_name = "KIND=N")]
    counter_fault: Option<String>,
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
    /// A firmware change for the simulated bench's meters, to rehearse a regression
    /// comparison: VERSION[,current=±X%[@AMPS]][,voltage=±X%][,phase=±Xdeg][,noise=X%].
    #[arg(long, value_name = "SPEC")]
    sim_firmware: Option<String>,
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
    /// The paper printed reports are laid out for.
    #[arg(long, value_enum, default_value_t = crate::report::Paper::A4)]
    paper: crate::report::Paper,
    /// Print only the final summary.
    #[arg(long)]
    quiet: bool,
    /// Run although the station's reference is past its calibration due date; the reason is
    /// recorded with every unit.
    #[arg(long, value_name = "REASON")]
    allow_overdue_reference: Option<String>,
    /// Energise a station's programmable source without the operator confirming that the bench
    /// is closed: only for a bench whose interlocks make it safe with nobody watching.
    #[arg(long)]
    unattended: bool,
    /// The archive database (default: archive.sqlite in the --out folder), or a shared one
    /// (postgres://USER@HOST/DB).
    #[arg(long)]
    archive: Option<crate::archive::Location>,
    /// With a shared --archive: the station's journal, where the run is kept as it goes and
    /// uploaded from (before and after each run), so that a network that goes away never stops
    /// the bench.
    #[arg(long, value_name = "FILE")]
    journal: Option<PathBuf>,
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
        Command::TryLink(args) => try_link::try_link(&args),
        Command::Ports => ports(),
        Command::Schema(args) => editor::schema(&args),
        Command::Completions(args) => editor::completions(&args),
        Command::Man(args) => editor::man(&args),
        Command::Templates { export } => export_templates(&export),
        Command::Resume(args) => archive_cmds::resume(&args),
        Command::History(args) => archive_cmds::history(&args),
        Command::Runs(args) => archive_cmds::runs(&args),
        Command::Export(args) => archive_cmds::export(&args),
        Command::Verify(args) => archive_cmds::verify(&args),
        Command::CopyArchive(args) => archive_cmds::copy_archive(&args),
        Command::Upload(args) => journal::upload(&args),
        Command::Compare(args) => archive_cmds::compare(&args),
        Command::Summary(args) => archive_cmds::summary(&args),
        Command::Report(args) => archive_cmds::report(&args),
        Command::Explain(args) => explain::explain(&args),
        Command::Serve(args) => serve::serve(&args),
    };
    match result {
        Ok(code) => code,
        Err(e) => {
            eprintln!("meterproof: {e}");
            e.exit_code()
        }
    }
}

/// Writes to standard output for [`out!`]: a closed pipe silences the rest of the output, any
/// other write failure is reported once.
pub(crate) fn write_out(args: std::fmt::Arguments) {
    use std::io::Write;
    use std::sync::atomic::{AtomicBool, Ordering};
    static SILENT: AtomicBool = AtomicBool::new(false);
    if SILENT.load(Ordering::Relaxed) {
        return;
    }
    let mut stdout = std::io::stdout().lock();
    if let Err(e) = stdout.write_fmt(args).and_then(|_| stdout.flush()) {
        SILENT.store(true, Ordering::Relaxed);
        if e.kind() != std::io::ErrorKind::BrokenPipe {
            eprintln!(
                "meterproof: writing to standard output failed ({e}); nothing more is printed there"
            );
        }
    }
}

/// Prints a value as pretty JSON on standard output, for machines (`--json`).
/// "1 position", "4 positions".
pub(super) fn counted(n: usize, thing: &str) -> String {
    if n == 1 {
        format!("1 {thing}")
    } else {
        format!("{n} {thing}s")
    }
}

pub(super) fn print_json<T: serde::Serialize>(value: &T) {
    out!(
        "{}",
        serde_json::to_string_pretty(value).expect("records, rows and summaries serialise")
    );
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
        .get_or_init(|| {
            let mut c = Console::stdin(INTERRUPT.clone());
            c.set_screen(terminal::bar_slot());
            Arc::new(Mutex::new(c))
        })
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

/// Writes a file the user named (a JUnit or HTML report), saying which one failed.
fn write_file(path: &Path, bytes: impl AsRef<[u8]>) -> Result<(), CliError> {
    std::fs::write(path, bytes)
        .map_err(|e| CliError::Run(format!("cannot write {}: {e}", path.display())))
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
