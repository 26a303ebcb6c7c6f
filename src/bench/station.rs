//! Station files: how one bench is wired. The plan says what to test; the station says which
//! port each position is on, which source drives the load and which reference says what flowed.
//!
//! Why this length: a station file's every key is read and checked here, each with its path, as
//! the plan's are; the bench built from it is the last function.

use super::counter::{CounterCommands, CounterInfo, ScpiCounter};
use super::operator::{ManualSource, SharedConsole, TypedReference};
use super::scpi::{ScpiReference, ScpiSource, SourceCommands};
use super::{Bench, InstrumentInfo, LoadSource, Position, RealClock, ReferenceMeter, StationInfo};
use crate::link::DutLink;
use crate::link::line::{LineSettings, open_port};
use crate::link::modbus::{Bus, ModbusLink, SharedBus};
use crate::link::readout::ReadoutLink;
use crate::link::{Unreachable, text};
use crate::plan::text_link::{LineEnding, PortSettings};
use crate::plan::units::Dimension;
use crate::plan::{Document, LinkSpec, Plan, PlanErrors, Quantity, RawPort, Text, port_settings};
use serde::Deserialize;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// A validated station file.
#[derive(Debug, Clone)]
pub struct Station {
    pub id: String,
    pub description: String,
    pub file: String,
    /// Bench seconds per real second: 1 for real benches; more for simulated stations run fast.
    pub time_scale: f64,
    /// The bench's stated ambient temperature, °C.
    pub ambient_c: Option<f64>,
    pub positions: Vec<StationPosition>,
    pub source: SourceSpec,
    pub reference: ReferenceSpec,
    /// The counter of the units' test outputs, where the bench has one.
    pub counter: Option<CounterSpec>,
    /// The archive the bench's runs go to when the command line names none: a file (relative
    /// to the station file's folder) or a shared database's address.
    pub archive: Option<String>,
    /// With a shared archive: the station's journal (relative to the station file's folder).
    pub journal: Option<PathBuf>,
}

/// A counter with a line interface and an input per position.
#[derive(Debug, Clone)]
pub struct CounterSpec {
    pub info: CounterInfo,
    pub port: InstrumentPort,
    pub commands: CounterCommands,
    /// (position, input) where they differ; otherwise position n is input n.
    pub inputs: Vec<(usize, u32)>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct StationPosition {
    pub number: usize,
    pub port: String,
    /// The unit's address on a bus (Modbus): positions may share a port only with addresses
    /// of their own.
    pub address: Option<u8>,
}

/// A serial instrument's port and framing.
#[derive(Debug, Clone)]
pub struct InstrumentPort {
    pub path: String,
    pub settings: PortSettings,
    pub line: LineSettings,
}

#[derive(Debug, Clone)]
pub enum SourceSpec {
    Scpi {
        port: Box<InstrumentPort>,
        commands: Box<SourceCommands>,
    },
    /// The operator switches the load by hand, prompted at each step.
    Manual,
}

#[derive(Debug, Clone)]
pub struct ReferenceSpec {
    pub info: InstrumentInfo,
    pub calibration_due: Option<chrono::NaiveDate>,
    pub read: ReferenceRead,
}

#[derive(Debug, Clone)]
pub enum ReferenceRead {
    Scpi {
        port: InstrumentPort,
        queries: Vec<(Quantity, String)>,
    },
    /// The operator reads the reference meter and types each reading.
    Operator,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
struct RawStation {
    station: Text,
    #[serde(default)]
    description: Option<Text>,
    #[serde(default)]
    simulation: Option<RawSimulation>,
    /// The bench's ambient temperature as the station states it: "23 °C".
    #[serde(default)]
    ambient_temperature: Option<Text>,
    positions: Vec<RawStationPosition>,
    source: RawSource,
    reference: RawReference,
    /// The counter of the units' test outputs (pulses), for plans that count them.
    #[serde(default)]
    counter: Option<RawCounter>,
    /// Where the bench's runs are archived: a file, or postgres://USER@HOST/DB.
    #[serde(default)]
    archive: Option<Text>,
    /// With a shared archive: the station's journal file.
    #[serde(default)]
    journal: Option<Text>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
struct RawCounter {
    id: Text,
    #[serde(default)]
    description: Option<Text>,
    /// The time base's accuracy: "5 ppm".
    #[serde(default)]
    timebase: Option<Text>,
    /// How closely it times an edge: "1 µs".
    #[serde(default)]
    edge: Option<Text>,
    /// Position number → counter input, where they differ (YAML keys may be numbers).
    #[serde(default)]
    inputs: BTreeMap<Text, Text>,
    /// The constant of the reference standard's own pulse output, where the counter counts it
    /// beside the units' ("100000 imp/kWh"): a count's reference energy is then N_ref / k_ref.
    #[serde(default)]
    reference_pulses: Option<Text>,
    /// `true` for one measuring input switched from position to position (a scanning
    /// multiplexer): the units are then counted one after another.
    #[serde(default)]
    multiplexer: Option<Text>,
    read: RawCounterRead,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields, tag = "kind", rename_all = "snake_case")]
enum RawCounterRead {
    Scpi(Box<RawScpiCounter>),
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
struct RawScpiCounter {
    port: Text,
    #[serde(default)]
    port_settings: Option<RawPort>,
    #[serde(default)]
    line_ending: Option<Text>,
    #[serde(default)]
    timeout: Option<Text>,
    commands: RawCounterCommands,
}

/// A counter's commands; `{inputs}`, `{input}` and `{pulses}` are filled in.
#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
struct RawCounterCommands {
    totalize: Text,
    count: Text,
    time_pulses: Text,
    pulse_times: Text,
    stop: Text,
    /// The reference standard's pulses latched with `{input}`'s last reading.
    #[serde(default)]
    reference_count: Option<Text>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
struct RawSimulation {
    time_scale: Text,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
struct RawStationPosition {
    position: Text,
    port: Text,
    #[serde(default)]
    address: Option<Text>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields, tag = "kind", rename_all = "snake_case")]
enum RawSource {
    Scpi(Box<RawScpiSource>),
    Manual {},
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
struct RawScpiSource {
    port: Text,
    #[serde(default)]
    port_settings: Option<RawPort>,
    #[serde(default)]
    line_ending: Option<Text>,
    #[serde(default)]
    timeout: Option<Text>,
    commands: RawSourceCommands,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
struct RawSourceCommands {
    #[serde(default)]
    setup: Vec<Text>,
    voltage: Text,
    current: Text,
    phase: Text,
    frequency: Text,
    output_on: Text,
    output_off: Text,
    #[serde(default)]
    sync: Option<Text>,
    /// A query that reads the source's error queue (`SYST:ERR?`): asked after set-up and after
    /// each load; a non-zero error stops the step.
    #[serde(default)]
    error_query: Option<Text>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
struct RawReference {
    id: Text,
    #[serde(default)]
    description: Option<Text>,
    #[serde(default)]
    certificate: Option<Text>,
    #[serde(default)]
    calibration_due: Option<Text>,
    #[serde(default)]
    accuracy: Option<Text>,
    #[serde(default)]
    ranges: BTreeMap<String, Text>,
    read: RawReferenceRead,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields, tag = "kind", rename_all = "snake_case")]
enum RawReferenceRead {
    Scpi(Box<RawScpiRead>),
    Operator {},
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
struct RawScpiRead {
    port: Text,
    #[serde(default)]
    port_settings: Option<RawPort>,
    #[serde(default)]
    line_ending: Option<Text>,
    #[serde(default)]
    timeout: Option<Text>,
    queries: BTreeMap<String, Text>,
}

/// The port fields every serial instrument has.
struct PortFields<'a> {
    port: &'a Text,
    port_settings: Option<&'a RawPort>,
    line_ending: Option<&'a Text>,
    timeout: Option<&'a Text>,
}

impl Station {
    /// Reads and validates the station file at `path`.
    pub fn load(path: &Path) -> Result<Station, PlanErrors> {
        let file = path.display().to_string();
        let text = std::fs::read_to_string(path).map_err(|e| PlanErrors::io(&file, &e))?;
        Station::from_text(&file, &text)
    }

    pub fn from_text(file: &str, text: &str) -> Result<Station, PlanErrors> {
        let (value, mut doc) = Document::parse(file, text)?;
        let raw: Option<RawStation> = doc.structure("", value);
        let station = raw.and_then(|raw| meaning(&mut doc, file, raw));
        match station {
            Some(s) if doc.is_clean() => Ok(s),
            _ => Err(doc.into_errors()),
        }
    }
}

fn meaning(doc: &mut Document, file: &str, raw: RawStation) -> Option<Station> {
    let id = doc.non_empty("station", &raw.station);
    let time_scale = match &raw.simulation {
        None => Some(1.0),
        Some(s) => match s.time_scale.0.trim().parse::<f64>() {
            Ok(v) if v > 0.0 && v <= 1000.0 => Some(v),
            _ => {
                doc.error(
                    "simulation.time_scale",
                    "expected a number greater than zero and at most 1000",
                );
                None
            }
        },
    };
    let ambient_c = match &raw.ambient_temperature {
        None => None,
        Some(t) => match doc.value("ambient_temperature", t, Dimension::Temperature) {
            Some(c) if (-60.0..=100.0).contains(&c) => Some(c),
            Some(c) => {
                doc.error(
                    "ambient_temperature",
                    format!("{c} °C is not a bench's temperature (expected −60 to +100 °C)"),
                );
                None
            }
            None => None,
        },
    };
    let mut positions = Vec::new();
    for (i, p) in raw.positions.iter().enumerate() {
        let path = format!("positions[{i}]");
        let number = match p.position.0.trim().parse::<usize>() {
            Ok(n) if n >= 1 => Some(n),
            _ => {
                doc.error(
                    &format!("{path}.position"),
                    "expected a position number, 1 or more",
                );
                None
            }
        };
        let port = doc.non_empty(&format!("{path}.port"), &p.port);
        let address = match &p.address {
            None => Some(None),
            Some(t) => match t.0.trim().parse::<u8>() {
                Ok(a) if (1..=247).contains(&a) => Some(Some(a)),
                _ => {
                    doc.error(
                        &format!("{path}.address"),
                        format!("\"{}\" is not a unit address (1 to 247)", t.0),
                    );
                    None
                }
            },
        };
        if let (Some(number), Some(port), Some(address)) = (number, port, address) {
            if positions
                .iter()
                .any(|q: &StationPosition| q.number == number)
            {
                doc.error(
                    &format!("{path}.position"),
                    format!("position {number} is listed twice"),
                );
            }
            // One port, one unit; or one bus with a unit address each.
            for q in positions
                .iter()
                .filter(|q: &&StationPosition| q.port == port)
            {
                match (q.address, address) {
                    (Some(a), Some(b)) if a == b => doc.error(
                        &format!("{path}.address"),
                        format!("address {b} on {port} is position {}'s already", q.number),
                    ),
                    (Some(_), Some(_)) => {}
                    _ => doc.error(
                        &format!("{path}.port"),
                        format!(
                            "port {port} is given to two positions: units sharing a bus each need an address"
                        ),
                    ),
                }
            }
            positions.push(StationPosition {
                number,
                port,
                address,
            });
        }
    }
    if raw.positions.is_empty() {
        doc.error("positions", "a station needs at least one position");
    }
    let source = match &raw.source {
        RawSource::Scpi(raw) => {
            let fields = PortFields {
                port: &raw.port,
                port_settings: raw.port_settings.as_ref(),
                line_ending: raw.line_ending.as_ref(),
                timeout: raw.timeout.as_ref(),
            };
            let port = instrument_port(doc, "source", &fields);
            let c = &raw.commands;
            for (name, text, needs_value) in [
                ("voltage", Some(&c.voltage), true),
                ("current", Some(&c.current), true),
                ("phase", Some(&c.phase), true),
                ("frequency", Some(&c.frequency), true),
                ("output_on", Some(&c.output_on), false),
                ("output_off", Some(&c.output_off), false),
                ("sync", c.sync.as_ref(), false),
                ("error_query", c.error_query.as_ref(), false),
            ] {
                if let Some(t) = text {
                    command_template(doc, &format!("source.commands.{name}"), t, needs_value);
                }
            }
            for (i, t) in c.setup.iter().enumerate() {
                command_template(doc, &format!("source.commands.setup[{i}]"), t, false);
            }
            port.map(|port| SourceSpec::Scpi {
                port: Box::new(port),
                commands: Box::new(SourceCommands {
                    setup: c.setup.iter().map(|t| t.0.clone()).collect(),
                    voltage: c.voltage.0.clone(),
                    current: c.current.0.clone(),
                    phase: c.phase.0.clone(),
                    frequency: c.frequency.0.clone(),
                    output_on: c.output_on.0.clone(),
                    output_off: c.output_off.0.clone(),
                    sync: c.sync.as_ref().map(|t| t.0.clone()),
                    error_query: c.error_query.as_ref().map(|t| t.0.clone()),
                }),
            })
        }
        RawSource::Manual {} => Some(SourceSpec::Manual),
    };
    let reference = reference(doc, &raw.reference);
    let counter = match &raw.counter {
        None => Some(None),
        Some(c) => counter(doc, c, &positions).map(Some),
    };
    // One port, one device: a port named twice would have two parts of the bench talk over
    // each other.
    let mut ports: Vec<(String, String)> = positions
        .iter()
        .map(|p| (p.port.clone(), format!("the port of position {}", p.number)))
        .collect();
    if let RawSource::Scpi(s) = &raw.source {
        ports.push((s.port.0.trim().to_string(), "source.port".into()));
    }
    if let RawReferenceRead::Scpi(r) = &raw.reference.read {
        ports.push((r.port.0.trim().to_string(), "reference.read.port".into()));
    }
    if let Some(RawCounterRead::Scpi(c)) = raw.counter.as_ref().map(|c| &c.read) {
        ports.push((c.port.0.trim().to_string(), "counter.read.port".into()));
    }
    // (Positions among themselves are checked above.)
    for i in positions.len()..ports.len() {
        let (port, path) = &ports[i];
        if let Some((_, first)) = ports[..i].iter().find(|(p, _)| p == port) {
            doc.error(path, format!("port {port} is already used by {first}"));
        }
    }
    let beside = |text: &str| {
        let p = Path::new(text);
        match Path::new(file).parent() {
            Some(dir) if p.is_relative() => dir.join(p),
            _ => p.to_path_buf(),
        }
    };
    let archive = raw.archive.as_ref().map(|t| t.0.trim().to_string());
    let shared = archive.as_deref().is_some_and(|a| {
        let a = a.to_ascii_lowercase();
        a.starts_with("postgres://") || a.starts_with("postgresql://")
    });
    let archive = archive.map(|a| {
        if shared {
            a
        } else {
            beside(&a).display().to_string()
        }
    });
    let journal = raw.journal.as_ref().map(|t| beside(t.0.trim()));
    if journal.is_some() && !shared {
        doc.error(
            "journal",
            "a journal keeps a station's runs for a shared archive: give `archive: postgres://...` beside it",
        );
    }
    Some(Station {
        archive,
        journal,
        id: id?,
        description: raw.description.map(|t| t.0).unwrap_or_default(),
        file: file.to_string(),
        time_scale: time_scale?,
        ambient_c,
        positions,
        source: source?,
        reference: reference?,
        counter: counter?,
    })
}

/// The station's `counter`: its identity, specification, inputs and commands.
fn counter(
    doc: &mut Document,
    raw: &RawCounter,
    positions: &[StationPosition],
) -> Option<CounterSpec> {
    let id = doc.non_empty("counter.id", &raw.id);
    let relative = |doc: &mut Document, key: &str, t: Option<&Text>| match t {
        None => Some(None),
        Some(t) => doc
            .value(&format!("counter.{key}"), t, Dimension::Percent)
            .and_then(|v| {
                if (0.0..1.0).contains(&v) {
                    Some(Some(v / 100.0))
                } else {
                    doc.error(
                        &format!("counter.{key}"),
                        "expected a small share: \"5 ppm\"",
                    );
                    None
                }
            }),
    };
    let timebase = relative(doc, "timebase", raw.timebase.as_ref());
    let edge_s = doc.optional_value("counter.edge", raw.edge.as_ref(), Dimension::Time);
    let mut inputs = Vec::new();
    for (position, input) in &raw.inputs {
        let position = position.0.trim();
        let path = format!("counter.inputs.{position}");
        let p = position.parse::<usize>().ok();
        if !p.is_some_and(|p| positions.iter().any(|q| q.number == p)) {
            doc.error(
                &path,
                format!("\"{position}\" is not a position of this station"),
            );
            continue;
        }
        match input.0.trim().parse::<u32>() {
            Ok(i) if i >= 1 => inputs.push((p.unwrap_or_default(), i)),
            _ => doc.error(&path, format!("\"{}\" is not an input number", input.0)),
        }
    }
    let multiplexer = match raw.multiplexer.as_ref().map(|t| t.0.trim()) {
        None | Some("false") => Some(false),
        Some("true") => Some(true),
        Some(other) => {
            doc.error(
                "counter.multiplexer",
                format!("\"{other}\": write true or false"),
            );
            None
        }
    };
    let RawCounterRead::Scpi(scpi) = &raw.read;
    let fields = PortFields {
        port: &scpi.port,
        port_settings: scpi.port_settings.as_ref(),
        line_ending: scpi.line_ending.as_ref(),
        timeout: scpi.timeout.as_ref(),
    };
    let port = instrument_port(doc, "counter.read", &fields);
    let c = &scpi.commands;
    let texts = [
        Some(&c.totalize),
        Some(&c.count),
        Some(&c.time_pulses),
        Some(&c.pulse_times),
        Some(&c.stop),
        c.reference_count.as_ref(),
    ];
    for ((name, allowed), text) in crate::bench::counter::COUNTER_PLACEHOLDERS
        .iter()
        .zip(texts)
    {
        if let Some(text) = text {
            placeholders(doc, &format!("counter.read.commands.{name}"), text, allowed);
        }
    }
    let reference_constant = match &raw.reference_pulses {
        None => None,
        Some(t) => {
            let k =
                t.0.trim()
                    .strip_suffix("imp/kWh")
                    .and_then(|n| n.trim().parse::<f64>().ok())
                    .filter(|k| *k > 0.0 && k.is_finite());
            if k.is_none() {
                doc.error(
                    "counter.reference_pulses",
                    format!(
                        "expected the reference standard's constant such as \"100000 imp/kWh\", got \"{}\"",
                        t.0
                    ),
                );
            }
            k
        }
    };
    match (&raw.reference_pulses, &c.reference_count) {
        (Some(_), None) => doc.error(
            "counter.read.commands",
            "counting the reference standard's pulses needs the query that reads them: reference_count",
        ),
        (None, Some(_)) => doc.error(
            "counter.read.commands.reference_count",
            "the counter reads the reference standard's pulses only where the station gives their constant: counter.reference_pulses",
        ),
        _ => {}
    }
    Some(CounterSpec {
        info: CounterInfo {
            id: id?,
            description: raw
                .description
                .as_ref()
                .map(|t| t.0.clone())
                .unwrap_or_default(),
            timebase: timebase?,
            edge_s: edge_s?,
            reference_constant,
            multiplexer: multiplexer?,
        },
        port: port?,
        commands: CounterCommands {
            totalize: c.totalize.0.trim().to_string(),
            count: c.count.0.trim().to_string(),
            time_pulses: c.time_pulses.0.trim().to_string(),
            pulse_times: c.pulse_times.0.trim().to_string(),
            stop: c.stop.0.trim().to_string(),
            reference_count: c.reference_count.as_ref().map(|t| t.0.trim().to_string()),
        },
        inputs,
    })
}

/// A counter command's placeholders: each one it has must be among `allowed`, and each of
/// `allowed` must be there (a command without its `{input}` would read the wrong input).
fn placeholders(doc: &mut Document, path: &str, text: &Text, allowed: &[&str]) {
    let command = text.0.trim();
    if command.is_empty() {
        doc.error(path, "the command is empty");
        return;
    }
    let mut found = Vec::new();
    let mut rest = command;
    while let Some(start) = rest.find('{') {
        let after = &rest[start + 1..];
        let Some(end) = after.find('}') else {
            doc.error(path, format!("\"{command}\" has a {{ that is never closed"));
            return;
        };
        found.push(after[..end].to_string());
        rest = &after[end + 1..];
    }
    for f in &found {
        if !allowed.contains(&f.as_str()) {
            doc.error(
                path,
                format!(
                    "\"{{{f}}}\" is not filled in here: this command takes {}",
                    if allowed.is_empty() {
                        "no placeholder".to_string()
                    } else {
                        allowed
                            .iter()
                            .map(|a| format!("{{{a}}}"))
                            .collect::<Vec<_>>()
                            .join(" and ")
                    }
                ),
            );
        }
    }
    for a in allowed {
        if !found.iter().any(|f| f == a) {
            doc.error(path, format!("\"{command}\" has no {{{a}}}"));
        }
    }
}

/// A command sent to an instrument: its only placeholder is `{value}` (the number to set),
/// which a set-point command must have and any other command must not.
fn command_template(doc: &mut Document, path: &str, text: &Text, needs_value: bool) {
    let command = text.0.trim();
    if command.is_empty() {
        doc.error(path, "the command is empty");
        return;
    }
    let mut rest = command;
    let mut has_value = false;
    while let Some(start) = rest.find('{') {
        let after = &rest[start + 1..];
        let Some(end) = after.find('}') else {
            doc.error(path, format!("\"{command}\" has a {{ that is never closed"));
            return;
        };
        let name = &after[..end];
        if name != "value" {
            doc.error(
                path,
                format!(
                    "\"{{{name}}}\" is not a placeholder meterproof fills in: the only one is {{value}}"
                ),
            );
        } else if !needs_value {
            doc.error(path, "this command takes no {value}");
        }
        has_value |= name == "value";
        rest = &after[end + 1..];
    }
    if needs_value && !has_value {
        doc.error(
            path,
            format!("\"{command}\" has no {{value}}: the source would never get the set-point"),
        );
    }
}

fn instrument_port(doc: &mut Document, prefix: &str, raw: &PortFields) -> Option<InstrumentPort> {
    let path = doc.non_empty(&format!("{prefix}.port"), raw.port);
    let settings = port_settings(
        doc,
        &format!("{prefix}.port_settings"),
        raw.port_settings.unwrap_or(&RawPort::default()),
    );
    let ending = match raw.line_ending {
        None => Some(LineEnding::Lf),
        Some(t) => LineEnding::from_name(t.0.trim()).or_else(|| {
            doc.error(
                &format!("{prefix}.line_ending"),
                format!("\"{}\" is not one of CR, LF, CRLF", t.0),
            );
            None
        }),
    };
    let timeout_s = doc
        .optional_value(&format!("{prefix}.timeout"), raw.timeout, Dimension::Time)
        .map(|t| t.unwrap_or(2.0))
        .and_then(|t| {
            if t > 0.0 && t <= 60.0 {
                Some(t)
            } else {
                doc.error(
                    &format!("{prefix}.timeout"),
                    "the timeout must be greater than zero and at most 60 s",
                );
                None
            }
        });
    let (ending, timeout_s) = (ending?, timeout_s?);
    Some(InstrumentPort {
        path: path?,
        settings: settings?,
        line: LineSettings {
            send_ending: ending,
            receive_ending: ending,
            timeout_s,
            retries: 1,
            pause_s: 0.0,
            echo: false,
            skip: None,
            restart: None,
            prompt: None,
        },
    })
}

fn reference(doc: &mut Document, raw: &RawReference) -> Option<ReferenceSpec> {
    let id = doc.non_empty("reference.id", &raw.id);
    let due = match &raw.calibration_due {
        None => Some(None),
        Some(t) => match chrono::NaiveDate::parse_from_str(t.0.trim(), "%Y-%m-%d") {
            Ok(d) => Some(Some(d)),
            Err(_) => {
                doc.error(
                    "reference.calibration_due",
                    format!("expected a date as YYYY-MM-DD, got \"{}\"", t.0),
                );
                None
            }
        },
    };
    let read = match &raw.read {
        RawReferenceRead::Scpi(raw) => {
            let fields = PortFields {
                port: &raw.port,
                port_settings: raw.port_settings.as_ref(),
                line_ending: raw.line_ending.as_ref(),
                timeout: raw.timeout.as_ref(),
            };
            let port = instrument_port(doc, "reference.read", &fields);
            let mut list = Vec::new();
            for (name, q) in &raw.queries {
                match Quantity::from_name(name) {
                    Some(quantity) => list.push((quantity, q.0.clone())),
                    None => doc.error(
                        &format!("reference.read.queries.{name}"),
                        format!("unknown quantity \"{name}\""),
                    ),
                }
            }
            port.map(|port| ReferenceRead::Scpi {
                port,
                queries: list,
            })
        }
        RawReferenceRead::Operator {} => Some(ReferenceRead::Operator),
    };
    // The reference's accuracy is a term of every check's budget: it must be stated, or its
    // absence declared in so many words (and then every report says so).
    let accuracy = match raw.accuracy.as_ref().map(|t| t.0.trim()) {
        None => {
            doc.error(
                "reference",
                "state the reference's accuracy (accuracy: \"0.05 % of reading + 0.01 % of range\"), or write accuracy: unknown to run without it (every report will say so)",
            );
            None
        }
        Some(ACCURACY_UNKNOWN) => None,
        Some(text) => crate::metrology::accuracy::Accuracy::parse(text)
            .map_err(|e| doc.error("reference.accuracy", e.to_string()))
            .ok(),
    };
    let mut ranges = BTreeMap::new();
    for (name, text) in &raw.ranges {
        let path = format!("reference.ranges.{name}");
        match Quantity::from_name(name) {
            Some(q) => {
                if let Some(v) = doc.value(&path, text, q.dimension()) {
                    if v > 0.0 && v.is_finite() {
                        ranges.insert(name.clone(), v);
                    } else {
                        doc.error(&path, "a range must be greater than zero");
                    }
                }
            }
            None => doc.error(&path, format!("unknown quantity \"{name}\"")),
        }
    }
    if let Some(a) = accuracy
        && a.range_percent != 0.0
        && let ReferenceRead::Scpi { queries, .. } = read.as_ref()?
    {
        for (q, _) in queries
            .iter()
            .filter(|(q, _)| !ranges.contains_key(q.name()))
        {
            doc.error(
                "reference.ranges",
                format!(
                    "the accuracy has a range term, so the range for {} is needed (reference.ranges.{})",
                    q.name(),
                    q.name()
                ),
            );
        }
    }
    Some(ReferenceSpec {
        info: InstrumentInfo {
            id: id?,
            description: raw
                .description
                .as_ref()
                .map(|t| t.0.clone())
                .unwrap_or_default(),
            certificate: raw.certificate.as_ref().map(|t| t.0.clone()),
            calibration_due: raw.calibration_due.as_ref().map(|t| t.0.trim().to_string()),
            accuracy: raw.accuracy.as_ref().map(|t| t.0.clone()),
            ranges,
        },
        calibration_due: due?,
        read: read?,
    })
}

/// What a station writes when the reference's accuracy is not known.
pub const ACCURACY_UNKNOWN: &str = "unknown";

/// Why a station could not be made into a bench.
/// The JSON Schema of a station file, from the types it is read into.
pub fn station_schema() -> schemars::Schema {
    let mut schema = schemars::schema_for!(RawStation);
    schema.insert("title".into(), "meterproof station".into());
    schema.insert("description".into(), "A meterproof station: the test positions and their ports, the load source and the reference meter. See the README, section Station keys.".into());
    schema
}

#[derive(Debug, thiserror::Error)]
pub enum StationError {
    #[error(
        "the plan's link is `{0}`: a station drives units over serial ports, so the plan needs a `text`, `modbus` or `iec62056_21` link"
    )]
    NotSerial(&'static str),
    #[error(
        "positions {0} share the port {1}: only units on a bus (a `modbus` link) can share a port"
    )]
    SharedPort(String, String),
    #[error("{what}: {why}")]
    Instrument { what: String, why: String },
}

/// Opens the station's instruments and ports for `plan`. A position whose port cannot be opened
/// is kept, with a link that reports why, so its unit is recorded incomplete and the others run.
/// `console` is the operator's, for a manual source or typed reference readings.
pub fn build_bench(
    station: &Station,
    plan: &Plan,
    console: Option<SharedConsole>,
) -> Result<Bench, StationError> {
    let open_links = links(station, &plan.link)?;
    let instrument = |what: &str, port: &InstrumentPort| {
        open_port(&port.path, port.settings).map_err(|e| StationError::Instrument {
            what: what.to_string(),
            why: e.to_string(),
        })
    };
    let need_console = || {
        console.clone().ok_or_else(|| StationError::Instrument {
            what: "operator".into(),
            why: "this station needs an operator at the terminal".into(),
        })
    };
    let (source, source_description): (Box<dyn LoadSource>, String) = match &station.source {
        SourceSpec::Scpi { port, commands } => (
            Box::new(ScpiSource::new(
                instrument("source", port)?,
                port.line.clone(),
                (**commands).clone(),
                &port.path,
            )),
            format!("SCPI source on {}", port.path),
        ),
        SourceSpec::Manual => (
            Box::new(ManualSource::new(need_console()?, None)),
            "load set by the operator".into(),
        ),
    };
    let reference: Box<dyn ReferenceMeter> = match &station.reference.read {
        ReferenceRead::Scpi { port, queries } => Box::new(ScpiReference::new(
            instrument("reference", port)?,
            port.line.clone(),
            queries.clone(),
            &port.path,
        )),
        ReferenceRead::Operator => Box::new(TypedReference::new(
            need_console()?,
            plan.reference_plausibility,
        )),
    };
    let clock: Arc<dyn super::Clock> = Arc::new(RealClock::scaled(station.time_scale));
    let counter = match &station.counter {
        None => None,
        Some(c) => Some(super::counter::CounterHandle::new(Box::new(
            ScpiCounter::new(
                instrument("counter", &c.port)?,
                c.port.line.clone(),
                (c.commands.clone(), c.inputs.clone()),
                clock.clone(),
                &c.port.path,
            ),
        ))),
    };
    let positions = station
        .positions
        .iter()
        .zip(open_links)
        .map(|(p, link)| Position {
            number: p.number,
            link,
            expected_serial: None,
        })
        .collect();
    Ok(Bench {
        station: StationInfo {
            id: station.id.clone(),
            description: station.description.clone(),
            reference: station.reference.info.clone(),
            source: source_description,
            ambient_c: station.ambient_c,
            counter: station.counter.as_ref().map(|c| c.info.clone()),
        },
        clock,
        source: super::SourceHandle::new(source),
        reference,
        counter,
        positions,
        parallel: true,
        interrupt: Default::default(),
        rescan: None,
    })
}

/// Refuses a port given to two positions, for a link with no addresses.
fn no_shared_ports(station: &Station) -> Result<(), StationError> {
    let mut seen: Vec<(&str, usize)> = Vec::new();
    for p in &station.positions {
        if let Some((_, first)) = seen.iter().find(|(port, _)| *port == p.port) {
            return Err(StationError::SharedPort(
                format!("{first} and {}", p.number),
                p.port.clone(),
            ));
        }
        seen.push((&p.port, p.number));
    }
    Ok(())
}

/// Opens each position's link as the plan describes it: a port of its own for a `text` link;
/// for a `modbus` link, one bus per port, shared by the positions on it, each at its address.
fn links(station: &Station, link: &LinkSpec) -> Result<Vec<Box<dyn DutLink>>, StationError> {
    match link {
        LinkSpec::Text(spec) => {
            let spec = Arc::new((**spec).clone());
            no_shared_ports(station)?;
            Ok(station
                .positions
                .iter()
                .map(|p| {
                    text::open(&p.port, spec.clone())
                        .unwrap_or_else(|e| Box::new(Unreachable::new(&p.port, e)))
                })
                .collect())
        }
        LinkSpec::Modbus(spec) => {
            let spec = Arc::new((**spec).clone());
            let mut buses: Vec<(String, Result<SharedBus, crate::link::LinkError>)> = Vec::new();
            let mut out: Vec<Box<dyn DutLink>> = Vec::new();
            for p in &station.positions {
                if !buses.iter().any(|(port, _)| *port == p.port) {
                    buses.push((p.port.clone(), Bus::open(&p.port, &spec)));
                }
                let (_, bus) = buses
                    .iter()
                    .find(|(port, _)| *port == p.port)
                    .expect("just added");
                let address = p.address.unwrap_or(spec.address);
                out.push(match bus {
                    Ok(bus) => Box::new(ModbusLink::new(bus.clone(), address, spec.clone())),
                    Err(e) => Box::new(Unreachable::new(&p.port, e.clone())),
                });
            }
            Ok(out)
        }
        LinkSpec::Readout(spec) => {
            let spec = Arc::new((**spec).clone());
            no_shared_ports(station)?;
            Ok(station
                .positions
                .iter()
                .map(|p| match ReadoutLink::open(&p.port, spec.clone()) {
                    Ok(link) => Box::new(link) as Box<dyn DutLink>,
                    Err(e) => Box::new(Unreachable::new(&p.port, e)),
                })
                .collect())
        }
        other => Err(StationError::NotSerial(other.kind())),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const STATION: &str = "station: EOL-1
positions:
  - { position: 1, port: /dev/ttyUSB0 }
  - { position: 2, port: /dev/ttyUSB1 }
source:
  kind: scpi
  port: /dev/ttyUSB8
  commands: { voltage: 'SOUR:VOLT {value}', current: 'SOUR:CURR {value}', phase: 'SOUR:PHAS {value}', frequency: 'SOUR:FREQ {value}', output_on: OUTP ON, output_off: OUTP OFF, sync: '*OPC?' }
reference:
  id: REF-7
  certificate: C-1
  calibration_due: 2027-03-31
  accuracy: 0.05 % of reading + 0.01 % of range
  ranges: { current: 20 A }
  read:
    kind: scpi
    port: /dev/ttyUSB9
    timeout: 1 s
    queries: { current: 'MEAS:CURR?' }
";

    #[test]
    fn reads_a_station() {
        let s = Station::from_text("s.yaml", STATION).unwrap();
        assert_eq!(s.positions.len(), 2);
        assert_eq!(s.positions[1].port, "/dev/ttyUSB1");
        assert_eq!(
            s.reference.calibration_due,
            chrono::NaiveDate::from_ymd_opt(2027, 3, 31)
        );
        let ReferenceRead::Scpi { port, queries } = &s.reference.read else {
            panic!("an SCPI reference")
        };
        assert_eq!(port.line.timeout_s, 1.0);
        assert_eq!(queries[0], (Quantity::Current, "MEAS:CURR?".to_string()));
    }

    #[test]
    fn station_mistakes_have_positions() {
        let bad = STATION
            .replace("port: /dev/ttyUSB1", "port: /dev/ttyUSB0")
            .replace("calibration_due: 2027-03-31", "calibration_due: March");
        let e = Station::from_text("s.yaml", &bad).unwrap_err().to_string();
        // Shown counted from 1, as the positions are numbered on the bench.
        assert!(e.contains("s.yaml:4:26: positions[2].port"), "{e}");
        assert!(
            e.contains("port /dev/ttyUSB0 is given to two positions"),
            "{e}"
        );
        assert!(
            e.contains("reference.calibration_due: expected a date"),
            "{e}"
        );
        let typo = STATION.replace("certificate:", "certifcate:");
        let e = Station::from_text("s.yaml", &typo).unwrap_err().to_string();
        assert!(e.contains("reference.certifcate: unknown field"), "{e}");
    }
}
