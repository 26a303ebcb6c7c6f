//! The bench a run or a resume works on, as the command line chose it: the built-in simulator
//! (its positions, seed and serials) or a station file (its instruments and ports opened, the
//! operator's console where the station needs one), and the plan's class limits at the bench's
//! ambient temperature. `run` and `resume` build it the same way.

use super::*;
use crate::bench::sim::FirmwareChange;

/// How a run's bench was made, kept in the archive so that a resume can make it again.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub(super) enum BenchSpec {
    Sim {
        seed: u64,
        positions: usize,
        serials: Option<Vec<String>>,
        /// The operator confirms loads and types references, as at a hand-switched bench.
        #[serde(default)]
        ask: bool,
        /// A simulated firmware change (`--sim-firmware`), as written.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        firmware: Option<String>,
        /// Bench seconds per real second, for a run watched as it goes (the station screen);
        /// none: the virtual clock, as fast as the computer goes.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        pace: Option<f64>,
    },
    Station {
        path: String,
        serials: Option<Vec<String>>,
    },
}

/// Options that shape how a bench is made.
pub(super) trait BenchOptions {
    fn quiet(&self) -> bool;
    fn allow_overdue_reference(&self) -> Option<&str>;
    /// Whether to ask the operator for what is not given.
    fn ask(&self) -> bool {
        false
    }
    /// Whether a programmable source may be energised without the operator confirming that
    /// the bench is closed.
    fn unattended(&self) -> bool;
    /// Where the operator is asked and told things: the terminal's console, unless a front end
    /// of its own (the station screen) has one.
    fn console(&self) -> SharedConsole {
        console()
    }
    /// What stops the run (the stop signal, unless a front end has a stop of its own).
    fn interrupt(&self) -> Arc<AtomicBool> {
        INTERRUPT.clone()
    }
    /// Whether the serials come from this front end's own scanning: a unit that reports
    /// another serial than the one scanned for its position may then be scanned again.
    fn scans_here(&self) -> bool {
        false
    }
    /// Says the mains caution before anything is energised.
    fn caution(&self) {
        eprintln!("{}", wrapped(MAINS_CAUTION, 0));
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
    fn unattended(&self) -> bool {
        self.unattended
    }
}

/// The plan with its class limits looked up at the bench's stated ambient temperature, where
/// they depend on it (a plan is checked without a bench; a run always knows its bench).
pub(super) fn plan_at_bench(plan: Plan, bench: &Bench) -> Result<Plan, CliError> {
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

pub(super) fn build_bench(
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
            firmware,
            pace,
        } => {
            let mut config = SimConfig::new(*seed, *positions);
            config.serials = serials.clone();
            if let Some(text) = firmware {
                config.firmware = FirmwareChange::parse(text)
                    .map_err(|e| CliError::Usage(format!("--sim-firmware: {e}")))?;
            }
            let sim = match pace {
                Some(scale) => {
                    SimBench::with_clock(&config, Arc::new(crate::bench::RealClock::scaled(*scale)))
                }
                None => SimBench::new(&config),
            };
            let mut bench = sim.into_bench();
            if *ask {
                // The operator confirms each load; the simulator then really applies it.
                let console = options.console();
                bench
                    .source
                    .wrap(|sim| Box::new(ManualSource::new(console.clone(), Some(sim))));
                bench.reference =
                    Box::new(TypedReference::new(console, plan.reference_plausibility));
            }
            bench.interrupt = options.interrupt();
            guard_source(&bench);
            Ok((bench, Vec::new()))
        }
        BenchSpec::Station { path, serials } => {
            station_bench(Path::new(path), plan, serials.clone(), options)
        }
    }
}

/// The number of simulated positions, from --positions or --serials.
pub(super) fn sim_positions(
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
pub(super) fn station_bench(
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
            "the station has {} but {} were given",
            counted(station.positions.len(), "position"),
            counted(s.len(), "serial number")
        )));
    }
    let needs_operator = matches!(station.source, station::SourceSpec::Manual)
        || matches!(station.reference.read, station::ReferenceRead::Operator);
    let (serials, scanned_here) = match serials {
        None if options.ask() => (Some(ask_serials(station.positions.len())?), true),
        other => (other, false),
    };
    let mut bench = station::build_bench(&station, plan, needs_operator.then(|| options.console()))
        .map_err(|e| match e {
            station::StationError::NotSerial(_) | station::StationError::SharedPort(..) => {
                CliError::Usage(e.to_string())
            }
            station::StationError::Instrument { .. } => CliError::Run(e.to_string()),
        })?;
    if let Some(serials) = serials {
        for (p, s) in bench.positions.iter_mut().zip(serials) {
            p.expected_serial = Some(s);
        }
    }
    // Serials scanned at this console may be scanned again when a unit reports another.
    if scanned_here || options.scans_here() {
        bench.rescan = Some(Box::new(ConsoleRescan(options.console())));
    }
    bench.interrupt = options.interrupt();
    guard_source(&bench);
    // The caution once per run, before anything is energised; the bench-closed question
    // below follows it.
    if !options.quiet() {
        options.caution();
    }
    // A programmable source puts mains on the positions by itself: before its first load the
    // operator confirms that the bench is closed, unless the bench is declared unattended.
    if matches!(station.source, station::SourceSpec::Scpi { .. }) {
        if options.unattended() {
            notes.push("run unattended: the bench-closed confirmation was not asked".into());
        } else {
            if options.quiet() {
                options.caution();
            }
            // No answer (the input ended) is no confirmation.
            let console = options.console();
            let answer = crate::bench::operator::lock(&console)
                .ask_for(
                    crate::bench::operator::Ask::Confirm,
                    "The source will put mains voltage on the positions. Is the bench closed, with nobody touching a position? Type yes to energise: ",
                )
                .unwrap_or_default();
            if !answer.eq_ignore_ascii_case("yes") {
                return Err(CliError::Usage(
                    "the bench was not confirmed closed: nothing was energised (give --unattended only for a bench interlocked to run with nobody watching)".into(),
                ));
            }
        }
    }
    Ok((bench, notes))
}
