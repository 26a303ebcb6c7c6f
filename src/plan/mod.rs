//! Test plans: what to test on one product, independent of any bench.
//!
//! A plan is read in three passes: YAML syntax (serde_yaml), structure (the `raw` types, with
//! unknown keys refused), and meaning (`validate`: units, ranges, cross-references). Every
//! mistake found is reported with its file, line, column and path inside the plan.

mod document;
mod locate;
pub mod modbus_link;
mod raw;
pub mod readout_link;
pub mod text_link;
pub mod units;
mod validate;

pub use locate::Position;
pub use raw::{RawPort, Text, plan_schema};
// The trade's concepts belong to metrology; the plan reads text into them.
pub use crate::metrology::decision::DecisionRule;
pub use crate::metrology::tolerance::Tolerance;
pub use document::{Document, MAX_SHOWN_ERRORS, PlanError, PlanErrors, counted_from_one};
pub use validate::link::port_settings;
pub use validate::ratings::REFERENCE_AMBIENT_C;

use serde::Serialize;
use sha2::{Digest, Sha256};
use std::path::Path;
use units::Dimension;

/// A validated test plan.
#[derive(Debug, Clone, Serialize)]
pub struct Plan {
    pub id: String,
    pub revision: String,
    pub title: Option<String>,
    pub product: Product,
    pub ratings: Ratings,
    pub link: LinkSpec,
    pub decision: DecisionRule,
    pub calibration: Option<CalibrationSpec>,
    /// Serial numbers of the golden units kept for regression checks.
    pub golden_units: Vec<String>,
    /// The shift a regression check allows, as a fraction of each check's tolerance limit.
    pub regression_allowance: f64,
    /// A typed reference reading further than this fraction from the step's nominal value
    /// must be confirmed (default 0.10).
    pub reference_plausibility: f64,
    pub steps: Vec<Step>,
    #[serde(skip)]
    pub source: PlanSource,
}

/// Calibration of one quantity's front end from some of the plan's steps, with optional
/// write-back of the constants; the steps after the last point verify the result.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CalibrationSpec {
    pub quantity: Quantity,
    pub channel: String,
    pub model: crate::metrology::fit::Model,
    /// Ids of the steps whose raw counts and reference readings are the calibration points.
    pub points: Vec<String>,
    /// Names of the link's writes for the offset and the gain.
    pub write: Option<(String, String)>,
    /// What the fit and the read-back are held to; a unit outside them is rejected.
    pub limits: crate::metrology::calibration::Limits,
}

impl CalibrationSpec {
    /// Index of the last calibration point among `steps`: the constants are fitted after it.
    pub fn last_point(&self, steps: &[Step]) -> Option<usize> {
        steps.iter().rposition(|s| self.points.contains(&s.id))
    }
}

/// The file a plan was read from, kept so that a record names exactly what it was tested against.
#[derive(Debug, Clone, Default)]
pub struct PlanSource {
    pub file: String,
    pub text: String,
    /// SHA-256 of the file's bytes, lower-case hex.
    pub sha256: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct Product {
    pub maker: Option<String>,
    pub model: String,
    /// The pattern the firmware version read from each unit must match.
    pub firmware_pattern: String,
    #[serde(skip)]
    pub firmware: regex::Regex,
}

/// The meter's ratings, in base units.
#[derive(Debug, Clone, Serialize)]
pub struct Ratings {
    pub nominal_voltage: f64,
    /// Ib (basic) or In (reference/rated) current, whichever the plan gives.
    pub base_current: f64,
    pub base_current_kind: BaseCurrent,
    pub max_current: f64,
    pub frequency: f64,
    pub class: String,
    /// Class for reactive energy, if the meter has one.
    pub reactive_class: Option<String>,
    /// The standard whose table gives the class limits ("Directive 2014/32/EU"); the class's
    /// table of reference conditions when none.
    pub class_table: Option<String>,
    /// The bench's ambient temperature (°C) the class limits were looked up at, when known.
    pub ambient_c: Option<f64>,
    /// Itr and Imin (EN 50470-3 classes).
    pub transitional_current: Option<f64>,
    pub minimum_current: Option<f64>,
    /// Meter constant k, impulses per kWh.
    pub meter_constant: Option<f64>,
    /// Number of measuring elements m.
    pub elements: u32,
    /// Current-sense shunt, ohms.
    pub shunt: Option<f64>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum BaseCurrent {
    /// Ib, direct-connected meters.
    Basic,
    /// In or Iref.
    Reference,
}

/// How the units under test are reached.
#[derive(Debug, Clone, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum LinkSpec {
    /// The built-in simulated meter.
    Sim { channels: Vec<String> },
    /// A line protocol over a serial port.
    Text(Box<text_link::TextLinkSpec>),
    /// Modbus RTU over a serial line.
    Modbus(Box<modbus_link::ModbusLinkSpec>),
    /// The IEC 62056-21 readout.
    #[serde(rename = "iec62056_21")]
    Readout(Box<readout_link::ReadoutLinkSpec>),
}

impl LinkSpec {
    pub fn channels(&self) -> &[String] {
        match self {
            LinkSpec::Sim { channels } => channels,
            LinkSpec::Text(t) => &t.channels,
            LinkSpec::Modbus(m) => &m.channels,
            LinkSpec::Readout(r) => &r.channels,
        }
    }

    /// The smallest step of the unit's reading of `quantity`, where the plan says it.
    pub fn resolution(&self, quantity: Quantity) -> Option<f64> {
        match self {
            LinkSpec::Sim { .. } => None,
            LinkSpec::Text(t) => t.request_for(quantity).and_then(|q| q.resolution),
            LinkSpec::Modbus(m) => m.register_for(quantity).and_then(|q| q.resolution),
            LinkSpec::Readout(r) => r.obis_for(quantity).and_then(|q| q.resolution),
        }
    }

    /// The constants the link can write, each with whether it can be read back; `None` where
    /// the link takes any (the simulator).
    pub fn writes(&self) -> Option<Vec<(&str, bool)>> {
        match self {
            LinkSpec::Sim { .. } => None,
            LinkSpec::Text(t) => Some(
                t.writes
                    .iter()
                    .map(|w| (w.name.as_str(), w.readback.is_some()))
                    .collect(),
            ),
            LinkSpec::Modbus(m) => Some(m.writes.iter().map(|w| (w.name.as_str(), true)).collect()),
            // Reading only: the programming mode that writes is not used.
            LinkSpec::Readout(_) => Some(Vec::new()),
        }
    }

    /// Whether the link can read `quantity` at all.
    pub fn reads(&self, quantity: Quantity) -> bool {
        match self {
            LinkSpec::Sim { .. } => true,
            LinkSpec::Text(t) => t.request_for(quantity).is_some(),
            LinkSpec::Modbus(m) => m.register_for(quantity).is_some(),
            LinkSpec::Readout(r) => r.obis_for(quantity).is_some(),
        }
    }

    pub fn kind(&self) -> &'static str {
        match self {
            LinkSpec::Sim { .. } => "sim",
            LinkSpec::Text(_) => "text",
            LinkSpec::Modbus(_) => "modbus",
            LinkSpec::Readout(_) => "iec62056_21",
        }
    }
}

/// One load point and what is checked at it.
#[derive(Debug, Clone, Serialize)]
pub struct Step {
    pub id: String,
    pub description: Option<String>,
    pub load: Load,
    /// How far (a fraction) the reference may read from the nominal load: beyond it the step
    /// is not evaluated, whatever the units read ("load not as planned").
    pub load_within: f64,
    /// A repeatability declared for the step (a step of one sample has no spread of its own).
    pub repeatability: Option<Repeatability>,
    /// Seconds to wait after applying the load before the first sample.
    pub settle_s: f64,
    pub samples: u32,
    /// Seconds between samples.
    pub interval_s: f64,
    pub checks: Vec<Check>,
    /// A test whose load, duration and limit the plan derives from the class tables.
    pub special: Option<SpecialTest>,
    /// Settle until stable instead of for a fixed time (then `settle_s` is the most it waits).
    pub settle_until: Option<SettleRule>,
    /// Sample until decided instead of a fixed count (then `samples` is the most it takes).
    pub sequential: Option<SequentialRule>,
    /// Counting the unit's test output, for the checks on channel [`TEST_OUTPUT`].
    pub pulses: Option<PulseSpec>,
}

/// The channel name of a check read from the unit's test output (its pulses, counted by the
/// station's counter) rather than over its link.
pub const TEST_OUTPUT: &str = "test_output";

/// How a step counts the unit's test output. The counting runs over the step's sampling
/// window: the counter is read at every sample, as a register would be.
#[derive(Debug, Clone, PartialEq, Serialize, serde::Deserialize)]
pub struct PulseSpec {
    pub method: PulseMethod,
    /// The meter constant k the pulses are counted at, imp/kWh.
    pub meter_constant: f64,
    /// The resolution the plan asked for (one pulse as a fraction of the count).
    pub resolution: Option<f64>,
    /// Pulses due over the count at the step's nominal power.
    pub expected_pulses: f64,
    /// What the plan asks that the step cannot give (a resolution out of reach in its time).
    pub warning: Option<String>,
}

/// The two ways of counting a test output.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, serde::Deserialize)]
#[serde(tag = "method", rename_all = "snake_case")]
pub enum PulseMethod {
    /// Pulses counted over a gate of the sampling window's length; ±1 pulse of quantisation.
    FixedTime { gate_s: f64 },
    /// The time of `count` pulses, from one pulse edge to another, timed by the counter; the
    /// step samples until every unit has sent them, at most its `samples`.
    FixedPulses { count: u64, at_most_s: f64 },
}

impl PulseSpec {
    /// Energy per pulse, Wh.
    pub fn pulse_wh(&self) -> f64 {
        1000.0 / self.meter_constant
    }

    pub fn method_name(&self) -> &'static str {
        match self.method {
            PulseMethod::FixedTime { .. } => "fixed_time",
            PulseMethod::FixedPulses { .. } => "fixed_pulses",
        }
    }
}

/// The relative standard deviation of one reading, known from earlier data, and its source.
#[derive(Debug, Clone, PartialEq, Serialize, serde::Deserialize)]
pub struct Repeatability {
    /// A fraction of the reading.
    pub relative: f64,
    pub from: String,
}

/// "Settle until stable": every `every_s`, each position's `quantity` is read; the step goes on
/// once the last `readings` readings of every position lie within `band`, after at least
/// `min_s`; after `max_s` it goes on anyway and the record says it did not settle.
#[derive(Debug, Clone, PartialEq, Serialize, serde::Deserialize)]
pub struct SettleRule {
    pub quantity: Quantity,
    pub channel: String,
    /// Spread allowed: a fraction of the readings' mean (relative) or an absolute value.
    pub band: f64,
    pub relative: bool,
    pub readings: u32,
    pub every_s: f64,
    pub min_s: f64,
    pub max_s: f64,
}

/// "Sample until decided": after `min` samples, stop as soon as no decision of the step can
/// change (see DEVELOPERS.md), at the latest after `max`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, serde::Deserialize)]
pub struct SequentialRule {
    pub min: u32,
    pub max: u32,
}

/// The special tests of the standards, with the figures derived for them.
#[derive(Debug, Clone, PartialEq, Serialize, serde::Deserialize)]
#[serde(tag = "test", rename_all = "snake_case")]
pub enum SpecialTest {
    /// No-load (creep): no current, the register may advance by at most one pulse over the
    /// duration the standard's formula gives.
    NoLoad {
        minutes: f64,
        allowance_wh: f64,
        basis: String,
    },
    /// Starting: at the class's starting current the register must advance.
    Starting { current: f64, basis: String },
}

impl Step {
    /// Bench time this step is scheduled to take: settling, then the sampling window.
    pub fn scheduled_s(&self) -> f64 {
        // Timing a number of pulses takes as long as they come at the nominal power, not the
        // most it may.
        let window = match self.pulses.as_ref().map(|p| (p.method, p.meter_constant)) {
            Some((PulseMethod::FixedPulses { count, .. }, k)) => {
                let power = self.load.nominal(Quantity::ActivePower, 0.0).abs();
                count as f64 * crate::metrology::pulses::pulse_interval_s(k, power)
            }
            _ => self.sampling_window_s(),
        };
        self.settle_s + window
    }

    /// Whether the step times a number of pulses (and so samples until every unit has sent
    /// them, not for a fixed count).
    pub fn times_pulses(&self) -> bool {
        matches!(
            self.pulses.as_ref().map(|p| p.method),
            Some(PulseMethod::FixedPulses { .. })
        )
    }

    /// From the first sample to the last.
    pub fn sampling_window_s(&self) -> f64 {
        f64::from(self.samples.saturating_sub(1)) * self.interval_s
    }
}

/// The load applied to every position at once (current circuits in series, voltage circuits in
/// parallel, as a bench is wired).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, serde::Deserialize)]
pub struct Load {
    pub voltage: f64,
    pub current: f64,
    /// Angle by which the current lags the voltage, in degrees: positive inductive, negative
    /// capacitive.
    pub phase_deg: f64,
    pub frequency: f64,
}

impl Load {
    pub fn power_factor(&self) -> f64 {
        self.phase_deg.to_radians().cos()
    }

    /// The value an ideal meter would read for `quantity` at this load, over `window_s` for
    /// energies. Used for plausibility and for validation of relative tolerances.
    pub fn nominal(&self, quantity: Quantity, window_s: f64) -> f64 {
        let s = self.voltage * self.current;
        let phi = self.phase_deg.to_radians();
        match quantity {
            Quantity::Current => self.current,
            Quantity::Voltage => self.voltage,
            Quantity::ActivePower => s * phi.cos(),
            Quantity::ReactivePower => s * phi.sin(),
            Quantity::ApparentPower => s,
            Quantity::PowerFactor => phi.cos(),
            Quantity::Frequency => self.frequency,
            Quantity::ActiveEnergy => s * phi.cos() * window_s / 3600.0,
        }
    }

    /// "5 A at power factor 0.5 inductive, 230 V, 50 Hz": what an operator is asked to set.
    pub fn describe(&self) -> String {
        let pf = self.power_factor();
        let pf_text = if self.phase_deg.abs() < 1e-9 {
            "power factor 1".to_string()
        } else {
            let side = if self.phase_deg > 0.0 {
                "inductive"
            } else {
                "capacitive"
            };
            format!("power factor {} {side}", trim_number(pf, 3))
        };
        format!(
            "{} at {pf_text}, {}, {}",
            units::Display(self.current, Dimension::Current),
            units::Display(self.voltage, Dimension::Voltage),
            units::Display(self.frequency, Dimension::Frequency)
        )
    }
}

fn trim_number(x: f64, decimals: usize) -> String {
    let text = format!("{x:.decimals$}");
    text.trim_end_matches('0').trim_end_matches('.').to_string()
}

/// A quantity read from a unit under test.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, serde::Deserialize,
)]
#[serde(rename_all = "snake_case")]
pub enum Quantity {
    Current,
    Voltage,
    ActivePower,
    ReactivePower,
    ApparentPower,
    PowerFactor,
    Frequency,
    /// The advance of the active-energy register over the sampling window.
    ActiveEnergy,
}

impl Quantity {
    pub const ALL: [Quantity; 8] = [
        Quantity::Current,
        Quantity::Voltage,
        Quantity::ActivePower,
        Quantity::ReactivePower,
        Quantity::ApparentPower,
        Quantity::PowerFactor,
        Quantity::Frequency,
        Quantity::ActiveEnergy,
    ];

    /// The name used in plans, records and reports.
    pub fn name(self) -> &'static str {
        match self {
            Quantity::Current => "current",
            Quantity::Voltage => "voltage",
            Quantity::ActivePower => "active_power",
            Quantity::ReactivePower => "reactive_power",
            Quantity::ApparentPower => "apparent_power",
            Quantity::PowerFactor => "power_factor",
            Quantity::Frequency => "frequency",
            Quantity::ActiveEnergy => "active_energy",
        }
    }

    pub fn from_name(name: &str) -> Option<Quantity> {
        Quantity::ALL.into_iter().find(|q| q.name() == name)
    }

    pub fn dimension(self) -> Dimension {
        match self {
            Quantity::Current => Dimension::Current,
            Quantity::Voltage => Dimension::Voltage,
            Quantity::ActivePower => Dimension::ActivePower,
            Quantity::ReactivePower => Dimension::ReactivePower,
            Quantity::ApparentPower => Dimension::ApparentPower,
            Quantity::PowerFactor => Dimension::Ratio,
            Quantity::Frequency => Dimension::Frequency,
            Quantity::ActiveEnergy => Dimension::ActiveEnergy,
        }
    }

    pub fn unit(self) -> &'static str {
        self.dimension().unit()
    }

    /// Whether the quantity is read as a register difference over the window, not sampled
    /// (the energy register, or the count of the test output's pulses).
    pub fn is_register(self) -> bool {
        self == Quantity::ActiveEnergy
    }
}

/// One comparison of a unit's reading with the reference.
#[derive(Debug, Clone, Serialize)]
pub struct Check {
    pub quantity: Quantity,
    pub channel: String,
    pub tolerance: Tolerance,
}

impl Check {
    /// Whether the check counts the unit's test output instead of reading its link.
    pub fn counts_pulses(&self) -> bool {
        self.channel == TEST_OUTPUT
    }
}

impl Plan {
    /// Reads and validates the plan file at `path`.
    pub fn load(path: &Path) -> Result<Plan, PlanErrors> {
        let file = path.display().to_string();
        let bytes = std::fs::read(path).map_err(|e| PlanErrors::io(&file, &e))?;
        let text = String::from_utf8(bytes).map_err(|_| {
            PlanErrors::single(PlanError::whole_file(&file, "the file is not UTF-8 text"))
        })?;
        Plan::from_text(&file, &text)
    }

    /// Validates a plan given as text; `file` names it in error messages.
    pub fn from_text(file: &str, text: &str) -> Result<Plan, PlanErrors> {
        Plan::from_text_at(file, text, None)
    }

    /// As [`Plan::from_text`], looking class limits up at the bench's ambient temperature.
    pub fn from_text_at(
        file: &str,
        text: &str,
        ambient_c: Option<f64>,
    ) -> Result<Plan, PlanErrors> {
        let mut plan = validate::validate(file, text, ambient_c)?;
        plan.source = PlanSource {
            file: file.to_string(),
            text: text.to_string(),
            sha256: sha256_hex(text.as_bytes()),
        };
        Ok(plan)
    }

    /// The same plan with its class limits looked up at the bench's ambient temperature.
    pub fn at_ambient(&self, ambient_c: Option<f64>) -> Result<Plan, PlanErrors> {
        Plan::from_text_at(&self.source.file, &self.source.text, ambient_c)
    }

    /// Whether the plan's class limits depend on the bench's ambient temperature.
    pub fn class_depends_on_ambient(&self) -> bool {
        validate::ratings::class_depends_on_ambient(&self.ratings)
    }

    /// What the plan asks that its steps cannot give, step by step (`check` shows them).
    pub fn warnings(&self) -> Vec<(String, String)> {
        self.steps
            .iter()
            .filter_map(|s| {
                let w = s.pulses.as_ref()?.warning.clone()?;
                Some((s.id.clone(), w))
            })
            .collect()
    }

    pub fn check_count(&self) -> usize {
        self.steps.iter().map(|s| s.checks.len()).sum()
    }

    /// Bench time the plan is scheduled to take, in seconds, with fixed settle and sample times.
    pub fn scheduled_s(&self) -> f64 {
        self.steps.iter().map(Step::scheduled_s).sum()
    }
}

pub fn sha256_hex(bytes: &[u8]) -> String {
    let digest = Sha256::digest(bytes);
    digest.iter().map(|b| format!("{b:02x}")).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Power triangle: P = V·I·cos φ, Q = V·I·sin φ (any circuit-theory handbook).
    #[test]
    fn nominal_values_follow_the_power_triangle() {
        let load = Load {
            voltage: 230.0,
            current: 5.0,
            phase_deg: 60.0,
            frequency: 50.0,
        };
        assert!((load.nominal(Quantity::ActivePower, 0.0) - 575.0).abs() < 1e-9);
        assert!((load.nominal(Quantity::ReactivePower, 0.0) - 995.929_214).abs() < 1e-5);
        assert!((load.nominal(Quantity::ApparentPower, 0.0) - 1150.0).abs() < 1e-9);
        // 575 W for one hour is 575 Wh.
        assert!((load.nominal(Quantity::ActiveEnergy, 3600.0) - 575.0).abs() < 1e-9);
        assert_eq!(
            load.describe(),
            "5 A at power factor 0.5 inductive, 230 V, 50 Hz"
        );
    }

    /// SHA-256 of "abc", FIPS 180-2 Appendix B.1.
    #[test]
    fn plan_hash_is_sha256() {
        assert_eq!(
            sha256_hex(b"abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }
}
