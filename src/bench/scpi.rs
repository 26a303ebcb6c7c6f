//! Instruments that speak SCPI over a serial port: a programmable source and a reference meter.
//! Their command strings come from the station file, so any instrument with a line interface
//! can be described without code.

use super::{BenchError, LoadSource, ReferenceMeter, ReferenceReading, ReferenceRequest};
use crate::link::LinkError;
use crate::link::line::{LineChannel, LineSettings, Wire};
use crate::plan::{Load, Quantity};
use regex::Regex;
use std::sync::LazyLock;

/// A reply that is one number, as SCPI instruments send them ("4.98765E+00").
static NUMBER: LazyLock<Regex> = LazyLock::new(|| {
    Regex::new(r"^\s*[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*$").expect("a valid pattern")
});
/// The reply to an error query: `-113,"Undefined header"`, `0,"No error"`.
static ERROR_REPLY: LazyLock<Regex> =
    LazyLock::new(|| Regex::new(r"^\s*([-+]?\d+)\s*(,.*)?$").expect("a valid pattern"));
/// The reply to `*OPC?` and similar: 1.
static ONE: LazyLock<Regex> =
    LazyLock::new(|| Regex::new(r"^\s*\+?1\s*$").expect("a valid pattern"));

/// The commands that set a programmable source; `{value}` is replaced by the number.
#[derive(Debug, Clone, PartialEq)]
pub struct SourceCommands {
    pub setup: Vec<String>,
    pub voltage: String,
    pub current: String,
    pub phase: String,
    pub frequency: String,
    pub output_on: String,
    pub output_off: String,
    /// A query answered with 1 once the previous commands are done (`*OPC?`).
    pub sync: Option<String>,
    /// A query that reads the error queue (`SYST:ERR?`), answered `CODE,"text"`, 0 for none.
    pub error_query: Option<String>,
}

/// A programmable source on a line channel.
pub struct ScpiSource<W: Wire> {
    channel: LineChannel<W>,
    commands: SourceCommands,
    output_on: bool,
    set_up: bool,
}

fn source_error(e: LinkError) -> BenchError {
    BenchError::Source(e.to_string())
}

impl<W: Wire> ScpiSource<W> {
    pub fn new(wire: W, settings: LineSettings, commands: SourceCommands, name: &str) -> Self {
        ScpiSource {
            channel: LineChannel::new(settings, wire, name),
            commands,
            output_on: false,
            set_up: false,
        }
    }

    fn send(&mut self, command: &str) -> Result<(), BenchError> {
        self.channel.send_only(command).map_err(source_error)
    }

    fn sync(&mut self) -> Result<(), BenchError> {
        if let Some(q) = self.commands.sync.clone() {
            self.channel.transact(&q, &ONE).map_err(source_error)?;
        }
        Ok(())
    }

    /// Reads the error queue, where the station gave a query for it: a command the source did
    /// not take (a typo in the station file, a value out of its range) stops the step here.
    fn check_errors(&mut self, after: &str) -> Result<(), BenchError> {
        let Some(q) = self.commands.error_query.clone() else {
            return Ok(());
        };
        let line = self
            .channel
            .transact(&q, &ERROR_REPLY)
            .map_err(source_error)?;
        let code = ERROR_REPLY
            .captures(&line)
            .and_then(|c| c.get(1))
            .and_then(|m| m.as_str().parse::<i64>().ok())
            .unwrap_or(0);
        if code == 0 {
            return Ok(());
        }
        Err(BenchError::Source(format!(
            "the source reports an error after {after}: {}",
            line.trim()
        )))
    }
}

impl<W: Wire> LoadSource for ScpiSource<W> {
    fn describe(&self) -> String {
        format!("SCPI source on {}", self.channel.name())
    }

    fn apply(&mut self, load: &Load) -> Result<(), BenchError> {
        if !self.set_up {
            for c in self.commands.setup.clone() {
                self.send(&c)?;
            }
            self.sync()?;
            self.check_errors("its set-up commands")?;
            self.set_up = true;
        }
        let c = self.commands.clone();
        self.send(&c.voltage.replace("{value}", &format!("{}", load.voltage)))?;
        self.send(&c.current.replace("{value}", &format!("{}", load.current)))?;
        self.send(&c.phase.replace("{value}", &format!("{}", load.phase_deg)))?;
        self.send(
            &c.frequency
                .replace("{value}", &format!("{}", load.frequency)),
        )?;
        if !self.output_on {
            self.send(&c.output_on)?;
            self.output_on = true;
        }
        self.sync()?;
        self.check_errors(&format!("the load {}", load.describe()))
    }

    fn off(&mut self) -> Result<(), BenchError> {
        let off = self.commands.output_off.clone();
        self.send(&off)?;
        self.output_on = false;
        self.sync()
    }
}

/// A reference meter read with one query per quantity. Energy, when it has no query of its own,
/// is the active-power reading times the sampling window.
pub struct ScpiReference<W: Wire> {
    channel: LineChannel<W>,
    queries: Vec<(Quantity, String)>,
    /// The power read at the start of the current energy window: (bench time s, watts).
    window_start: Option<(f64, f64)>,
}

impl<W: Wire> ScpiReference<W> {
    pub fn new(
        wire: W,
        settings: LineSettings,
        queries: Vec<(Quantity, String)>,
        name: &str,
    ) -> Self {
        ScpiReference {
            channel: LineChannel::new(settings, wire, name),
            queries,
            window_start: None,
        }
    }

    fn query(&mut self, quantity: Quantity) -> Result<f64, BenchError> {
        let q = self
            .queries
            .iter()
            .find(|(k, _)| *k == quantity)
            .map(|(_, q)| q.clone())
            .ok_or_else(|| {
                BenchError::Reference(format!("the station has no query for {}", quantity.name()))
            })?;
        let line = self
            .channel
            .transact(&q, &NUMBER)
            .map_err(|e| BenchError::Reference(e.to_string()))?;
        line.trim()
            .parse::<f64>()
            .map_err(|_| BenchError::Reference(format!("reply to {q} is not a number: {line:?}")))
    }
}

impl<W: Wire> ScpiReference<W> {
    /// Whether an energy is inferred from power (the station gives no energy query).
    fn infers_energy(&self) -> bool {
        !self
            .queries
            .iter()
            .any(|(k, _)| *k == Quantity::ActiveEnergy)
    }
}

impl<W: Wire> ReferenceMeter for ScpiReference<W> {
    fn load_quantities(&self) -> Vec<Quantity> {
        super::LOAD_QUANTITIES
            .into_iter()
            .filter(|q| self.queries.iter().any(|(k, _)| k == q))
            .collect()
    }

    fn window_starts(&mut self, at_s: f64) -> Result<(), BenchError> {
        self.window_start = if self.infers_energy() {
            Some((at_s, self.query(Quantity::ActivePower)?))
        } else {
            None
        };
        Ok(())
    }

    fn read(&mut self, request: &ReferenceRequest) -> Result<ReferenceReading, BenchError> {
        let mut power_readings = Vec::new();
        let value = if request.quantity == Quantity::ActiveEnergy && self.infers_energy() {
            // No energy counter: the energy is inferred from the power at the window's two
            // ends (the trapezoid), and the budget holds the drift between them.
            let (t0, t1) = request.window;
            let end = self.query(Quantity::ActivePower)?;
            let start = self
                .window_start
                .filter(|(t, _)| (t - t0).abs() <= 0.5 * (t1 - t0).max(1e-9));
            if let Some(s) = start {
                power_readings.push(s);
            }
            power_readings.push((t1, end));
            let mean = start.map_or(end, |(_, p)| (p + end) / 2.0);
            mean * (t1 - t0) / 3600.0
        } else {
            self.query(request.quantity)?
        };
        Ok(ReferenceReading {
            power_readings,
            window_s: None,
            value,
            source: "instrument".into(),
            taken_at_s: request.window.1,
            as_given: None,
            entries: Vec::new(),
        })
    }
}
