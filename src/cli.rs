//! The command line: parses arguments, runs a command, renders its errors once, and picks the
//! exit status.
//!
//! Exit status: 0 every unit accepted (or every plan valid); 1 at least one unit rejected;
//! 2 an invalid plan or invalid arguments; 3 the run could not complete.

use crate::bench::sim::{SimBench, SimConfig};
use crate::exec::{self, Event, Reporter, RunContext};
use crate::plan::units::Dimension;
use crate::plan::{Plan, PlanErrors, Tolerance};
use crate::record::{self, UnitRecord, UnitStatus};
use crate::report::{self, Templates};
use clap::{Parser, Subcommand};
use std::io::Write;
use std::path::{Path, PathBuf};
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
}

#[derive(clap::Args)]
struct RunArgs {
    /// The plan file (YAML).
    plan: PathBuf,
    /// The bench: `sim` for the built-in simulated bench.
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
    /// Operator id recorded with every unit.
    #[arg(long, default_value = "unattended")]
    operator: String,
    /// Folder of templates that replace the embedded ones, file by file.
    #[arg(long)]
    templates: Option<PathBuf>,
    /// Print only the final summary.
    #[arg(long)]
    quiet: bool,
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
}

impl CliError {
    fn exit_code(&self) -> i32 {
        match self {
            CliError::Usage(_) | CliError::Plan(_) => 2,
            CliError::Run(_) => 3,
        }
    }
}

/// Runs the command line and returns the exit status.
pub fn main() -> i32 {
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Check { plans } => check(&plans),
        Command::Run(args) => run(&args),
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
    for path in paths {
        match Plan::load(path) {
            Ok(plan) => {
                let _ = write!(out, "{}", plan_summary(&plan));
            }
            Err(errors) => {
                invalid += 1;
                eprintln!("{errors}");
            }
        }
    }
    if invalid > 0 {
        return Err(CliError::Usage(format!(
            "{invalid} of {} plans invalid",
            paths.len()
        )));
    }
    Ok(0)
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
        report::duration_text(plan.scheduled_s())
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
            "  {:<14} {}; settle {}, {} × {}: {}\n",
            step.id,
            step.load.describe(),
            report::duration_text(step.settle_s),
            step.samples,
            report::duration_text(step.interval_s),
            if checks.is_empty() {
                "no checks".to_string()
            } else {
                checks.join("; ")
            }
        ));
    }
    s
}

fn tolerance_text(t: &Tolerance, dim: Dimension) -> String {
    let v = |x: f64| report::number(x, dim);
    match *t {
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
    }
}

fn run(args: &RunArgs) -> Result<i32, CliError> {
    let wall = Instant::now();
    let plan = Plan::load(&args.plan).map_err(CliError::Plan)?;
    let templates =
        Templates::load(args.templates.as_deref()).map_err(|e| CliError::Usage(e.to_string()))?;
    let serials = checked_serials(args.serials.as_deref())?;
    if args.bench != "sim" {
        return Err(CliError::Usage(format!(
            "unknown bench \"{}\": only the built-in simulated bench `sim` exists so far",
            args.bench
        )));
    }
    let positions = match (&serials, args.positions) {
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
    let mut config = SimConfig::new(args.seed, positions);
    config.serials = serials;
    let mut bench = SimBench::new(&config).into_bench();
    let ctx = RunContext {
        run_id: new_run_id(),
        operator: args.operator.clone(),
        lot: args.lot.clone(),
        tool_version: crate::VERSION.to_string(),
    };
    // The output folder must be writable before any load is applied, not after the run.
    let run_dir = args.out.join(&ctx.run_id);
    std::fs::create_dir_all(&run_dir).map_err(|e| {
        CliError::Run(format!(
            "cannot create the output folder {}: {e}",
            run_dir.display()
        ))
    })?;
    let mut reporter = TerminalReporter { quiet: args.quiet };
    let records = exec::run(&plan, &mut bench, &ctx, &mut reporter);
    let written = write_outputs(&run_dir, &records, &templates)?;
    print_summary(&records, &written);
    println!(
        "bench time {} ({}), wall time {:.2} s; records and reports in {}",
        report::duration_text(records.first().map_or(0.0, |r| r.bench_time_s)),
        if bench.clock.is_virtual() {
            "simulated"
        } else {
            "real"
        },
        wall.elapsed().as_secs_f64(),
        run_dir.display()
    );
    Ok(exit_status(&records))
}

/// Serial numbers given on the command line: none empty, none twice.
fn checked_serials(serials: Option<&[String]>) -> Result<Option<Vec<String>>, CliError> {
    let Some(serials) = serials else {
        return Ok(None);
    };
    let mut seen = std::collections::HashSet::new();
    for s in serials {
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

/// Files written for one unit.
struct Written {
    html: PathBuf,
}

fn write_outputs(
    dir: &Path,
    records: &[UnitRecord],
    templates: &Templates,
) -> Result<Vec<Written>, CliError> {
    let mut written = Vec::new();
    let run_err = |e: &dyn std::fmt::Display| CliError::Run(e.to_string());
    for r in records {
        let stem = format!("{}-p{}", record::safe_file_stem(&r.serial), r.position);
        // The record first: it is what the reports are made from and what must not be lost.
        let json = record::to_json(r).map_err(|e| run_err(&e))?;
        record::write_new_file(dir, &format!("{stem}.json"), &json).map_err(|e| run_err(&e))?;
        let html = templates.unit_html(r).map_err(|e| run_err(&e))?;
        let html_path = record::write_new_file(dir, &format!("{stem}.html"), html.as_bytes())
            .map_err(|e| run_err(&e))?;
        let csv = report::unit_csv(r).map_err(|e| run_err(&e))?;
        record::write_new_file(dir, &format!("{stem}.csv"), &csv).map_err(|e| run_err(&e))?;
        written.push(Written { html: html_path });
    }
    Ok(written)
}

fn print_summary(records: &[UnitRecord], written: &[Written]) {
    println!();
    println!("{:<4} {:<20} {:<14} report", "pos", "serial", "verdict");
    for (r, w) in records.iter().zip(written) {
        println!(
            "{:<4} {:<20} {} {:<12} {}",
            r.position,
            r.serial,
            r.verdict.status.symbol(),
            r.verdict.status.word(),
            w.html.display()
        );
        for reason in &r.verdict.reasons {
            println!("       {reason}");
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
                report::duration_text(plan.scheduled_s())
            ),
            Event::UnitIdentified { position, identity } => eprintln!(
                "  position {position}: {} serial {} firmware {}",
                identity.model, identity.serial, identity.firmware
            ),
            Event::UnitRefused { position, reason } => {
                eprintln!("  position {position}: not tested: {reason}")
            }
            Event::StepStarted { index, total, step } => eprintln!(
                "[{}/{total}] {}: {}",
                index + 1,
                step.id,
                step.load.describe()
            ),
            Event::StepFinished { results, .. } => {
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
            Event::RunFinished { .. } => {}
        }
    }
}
