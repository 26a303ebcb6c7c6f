//! The plan file as written: structure only, every value still text.
//!
//! Keeping values as text here means a unit mistake does not stop deserialisation; all of them
//! are collected by the validation pass, with their paths. `deny_unknown_fields` everywhere:
//! a misspelt key must never be silently ignored.

use serde::{Deserialize, Deserializer};
use std::fmt;

/// A scalar kept as its text: YAML `2`, `2.5`, `true` and `"2 s"` all arrive as strings, so
/// that the validator, not serde, says what is wrong with them.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord)]
pub struct Text(pub String);

impl<'de> Deserialize<'de> for Text {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        struct TextVisitor;
        impl serde::de::Visitor<'_> for TextVisitor {
            type Value = Text;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a value such as \"5 A\" or a plain number")
            }
            fn visit_str<E: serde::de::Error>(self, v: &str) -> Result<Text, E> {
                Ok(Text(v.to_string()))
            }
            fn visit_bool<E: serde::de::Error>(self, v: bool) -> Result<Text, E> {
                Ok(Text(v.to_string()))
            }
            fn visit_i64<E: serde::de::Error>(self, v: i64) -> Result<Text, E> {
                Ok(Text(v.to_string()))
            }
            fn visit_u64<E: serde::de::Error>(self, v: u64) -> Result<Text, E> {
                Ok(Text(v.to_string()))
            }
            fn visit_f64<E: serde::de::Error>(self, v: f64) -> Result<Text, E> {
                Ok(Text(v.to_string()))
            }
        }
        deserializer.deserialize_any(TextVisitor)
    }
}

impl schemars::JsonSchema for Text {
    fn schema_name() -> std::borrow::Cow<'static, str> {
        "Value".into()
    }
    fn inline_schema() -> bool {
        true
    }
    fn json_schema(_: &mut schemars::SchemaGenerator) -> schemars::Schema {
        schemars::json_schema!({
            "type": ["string", "number", "boolean"],
            "description": "A value, with its unit where it has one (\"5 A\", \"250 ms\", \"0.5 %\")"
        })
    }
}

impl schemars::JsonSchema for StepSlot {
    fn schema_name() -> std::borrow::Cow<'static, str> {
        RawStep::schema_name()
    }
    fn json_schema(generator: &mut schemars::SchemaGenerator) -> schemars::Schema {
        RawStep::json_schema(generator)
    }
}

/// An init line as the JSON Schema describes it (the plan reads it from YAML by hand, to say
/// what is wrong with one in the plan's words).
#[derive(schemars::JsonSchema)]
#[serde(untagged)]
#[allow(dead_code)]
enum InitLineSchema {
    /// A line sent, with no reply waited for.
    Line(String),
    /// A line sent and the reply waited for.
    Exchange(InitExchangeSchema),
}

#[derive(schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct InitExchangeSchema {
    send: String,
    /// The pattern of the reply waited for.
    reply: Option<String>,
}

/// The top level of a plan. Each step is deserialised on its own ([`StepSlot`]) so that a
/// mistake in one does not hide the mistakes in the others.
#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawPlan {
    pub id: Text,
    pub revision: Text,
    #[serde(default)]
    pub title: Option<Text>,
    pub product: RawProduct,
    pub ratings: RawRatings,
    #[schemars(with = "RawLink")]
    pub link: serde_yaml::Value,
    #[serde(default)]
    pub defaults: RawDefaults,
    #[serde(default)]
    pub decision: Option<RawDecision>,
    #[serde(default)]
    pub calibration: Option<RawCalibration>,
    #[serde(default)]
    pub reference_plausibility: Option<Text>,
    #[serde(default)]
    pub golden_units: Vec<Text>,
    #[serde(default)]
    pub regression_allowance: Option<Text>,
    pub steps: Vec<StepSlot>,
}

/// One step as read: from a YAML value of its own, dropped as soon as it is read, so that a
/// plan of many steps is never held as a whole tree, and a mistake in one step is kept (with
/// its path inside the step) instead of ending the reading of the others.
#[derive(Debug)]
pub enum StepSlot {
    Read(Box<RawStep>),
    Mistake { path: String, message: String },
}

impl<'de> Deserialize<'de> for StepSlot {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let value = serde_yaml::Value::deserialize(d)?;
        Ok(
            match serde_path_to_error::deserialize::<_, RawStep>(value) {
                Ok(step) => StepSlot::Read(Box::new(step)),
                Err(e) => StepSlot::Mistake {
                    path: e.path().to_string(),
                    message: e.into_inner().to_string(),
                },
            },
        )
    }
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawCalibration {
    pub quantity: Text,
    #[serde(default)]
    pub channel: Option<Text>,
    #[serde(default)]
    pub fit: Option<Text>,
    pub points: Vec<Text>,
    #[serde(default)]
    pub write: Option<RawCalibrationWrite>,
    #[serde(default)]
    pub limits: Option<RawCalibrationLimits>,
}

/// What a unit's calibration is held to.
#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawCalibrationLimits {
    #[serde(default)]
    pub gain: Option<RawWindow>,
    #[serde(default)]
    pub offset: Option<RawWindow>,
    #[serde(default)]
    pub linearity: Option<Text>,
    #[serde(default)]
    pub point_gains: Option<Text>,
    #[serde(default)]
    pub read_back: Option<Text>,
}

/// `{ nominal: 2240, within: 2 % }` or `{ nominal: 128, within: 40 }` (counts).
#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawWindow {
    pub nominal: Text,
    pub within: Text,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawCalibrationWrite {
    pub offset: Text,
    pub gain: Text,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawDecision {
    pub rule: Text,
    #[serde(default)]
    pub guard_band: Option<Text>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawProduct {
    #[serde(default)]
    pub maker: Option<Text>,
    pub model: Text,
    pub firmware: Text,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawRatings {
    pub nominal_voltage: Text,
    #[serde(default)]
    pub basic_current: Option<Text>,
    #[serde(default)]
    pub reference_current: Option<Text>,
    pub max_current: Text,
    pub frequency: Text,
    /// The accuracy class; needed only where a check or special test takes the class's figures.
    #[serde(default)]
    pub class: Option<Text>,
    #[serde(default)]
    pub reactive_class: Option<Text>,
    /// The standard whose table gives the class limits, where a class has more than one.
    #[serde(default)]
    pub class_table: Option<Text>,
    #[serde(default)]
    pub transitional_current: Option<Text>,
    #[serde(default)]
    pub minimum_current: Option<Text>,
    #[serde(default)]
    pub meter_constant: Option<Text>,
    #[serde(default)]
    pub elements: Option<Text>,
    #[serde(default)]
    pub shunt: Option<Text>,
}

#[derive(Debug, Default, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawDefaults {
    /// How far the reference may read from the step's nominal load: "5 %".
    #[serde(default)]
    pub load_within: Option<Text>,
    #[serde(default)]
    pub settle: Option<Text>,
    #[serde(default)]
    pub samples: Option<Text>,
    #[serde(default)]
    pub interval: Option<Text>,
    #[serde(default)]
    pub settle_until: Option<RawSettleUntil>,
    #[serde(default)]
    pub samples_until_decided: Option<RawSequential>,
}

/// A repeatability declared from earlier data: a relative standard deviation of one reading,
/// and where it comes from.
#[derive(Debug, Clone, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawRepeatability {
    pub relative: Text,
    pub from: Text,
}

/// Settle until every position's readings are stable.
#[derive(Debug, Clone, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawSettleUntil {
    /// "0.05 %" of the readings' mean, or an absolute band in the quantity's unit.
    pub stable_within: Text,
    /// How many consecutive readings must lie within the band.
    #[serde(default)]
    pub readings: Option<Text>,
    #[serde(default)]
    pub every: Option<Text>,
    #[serde(default)]
    pub at_least: Option<Text>,
    pub at_most: Text,
    #[serde(default)]
    pub quantity: Option<Text>,
}

/// Take samples until every decision is settled.
#[derive(Debug, Clone, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawSequential {
    pub min: Text,
    pub max: Text,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields, tag = "kind", rename_all = "snake_case")]
pub enum RawLink {
    /// The built-in simulated meter.
    Sim {
        #[serde(default)]
        channels: Option<Vec<Text>>,
    },
    /// A line protocol over a serial port.
    Text(Box<RawTextLink>),
    /// Modbus RTU over a serial line.
    Modbus(Box<RawModbusLink>),
    /// The IEC 62056-21 readout (mode C), optical or serial.
    #[serde(rename = "iec62056_21")]
    Readout(Box<RawReadoutLink>),
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawReadoutLink {
    #[serde(default)]
    pub port: RawPort,
    #[serde(default)]
    pub device_address: Option<Text>,
    #[serde(default)]
    pub baud_switch: Option<Text>,
    #[serde(default)]
    pub timeout: Option<Text>,
    #[serde(default)]
    pub retries: Option<Text>,
    #[serde(default)]
    pub max_bytes: Option<Text>,
    #[serde(default)]
    pub channels: Option<Vec<Text>>,
    pub identity: RawReadoutIdentity,
    #[serde(default)]
    pub read: Option<Text>,
    pub quantities: std::collections::BTreeMap<String, RawObis>,
}

/// Each field `identification` or an OBIS code.
#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawReadoutIdentity {
    pub model: Text,
    pub serial: Text,
    pub firmware: Text,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawObis {
    pub obis: Text,
    #[serde(default)]
    pub unit: Option<Text>,
    #[serde(default)]
    pub resolution: Option<Text>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawModbusLink {
    #[serde(default)]
    pub port: RawPort,
    #[serde(default)]
    pub address: Option<Text>,
    /// The register table quantities are read from unless a register says otherwise.
    #[serde(default)]
    pub function: Option<Text>,
    #[serde(default)]
    pub word_order: Option<Text>,
    #[serde(default)]
    pub timeout: Option<Text>,
    #[serde(default)]
    pub retries: Option<Text>,
    #[serde(default)]
    pub turnaround: Option<Text>,
    #[serde(default)]
    pub channels: Option<Vec<Text>>,
    #[serde(default)]
    pub channel_stride: Option<Text>,
    pub identity: RawModbusIdentity,
    pub quantities: std::collections::BTreeMap<String, RawRegister>,
    #[serde(default)]
    pub writes: std::collections::BTreeMap<String, RawRegister>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawModbusIdentity {
    pub model: RawRegister,
    pub serial: RawRegister,
    pub firmware: RawRegister,
}

/// A value in a unit's registers, as a plan writes it.
#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawRegister {
    pub register: Text,
    #[serde(rename = "type")]
    pub data_type: Text,
    /// Registers of an `ascii` value.
    #[serde(default)]
    pub words: Option<Text>,
    #[serde(default)]
    pub function: Option<Text>,
    #[serde(default)]
    pub word_order: Option<Text>,
    #[serde(default)]
    pub scale: Option<Text>,
    #[serde(default)]
    pub unit: Option<Text>,
    #[serde(default)]
    pub resolution: Option<Text>,
    /// An identity field's text, `{value}` standing for the register's content.
    #[serde(default)]
    pub format: Option<Text>,
    /// The front end's counts, for calibration.
    #[serde(default)]
    pub raw: Option<Box<RawRegister>>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawTextLink {
    #[serde(default)]
    pub port: RawPort,
    #[serde(default)]
    pub line_ending: RawLineEnding,
    #[serde(default)]
    pub timeout: Option<Text>,
    #[serde(default)]
    pub retries: Option<Text>,
    #[serde(default)]
    pub pause: Option<Text>,
    #[serde(default)]
    pub echo: Option<Text>,
    #[serde(default)]
    pub skip: Option<Text>,
    /// A line the unit prints only when it starts (its boot banner): seeing it means the unit
    /// restarted.
    #[serde(default)]
    pub restart: Option<Text>,
    /// What the unit shows when ready for a request, without a line ending ("> ").
    #[serde(default)]
    pub prompt: Option<Text>,
    /// Lines sent after the port opens: each a line, or `{ send: LINE, reply: PATTERN }`.
    #[serde(default)]
    #[schemars(with = "Option<Vec<InitLineSchema>>")]
    pub init: Option<Vec<serde_yaml::Value>>,
    #[serde(default)]
    pub channels: Option<Vec<Text>>,
    pub identity: RawIdentity,
    pub quantities: std::collections::BTreeMap<String, RawQuantityRequest>,
    #[serde(default)]
    pub writes: std::collections::BTreeMap<String, RawWrite>,
}

#[derive(Debug, Default, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawPort {
    #[serde(default)]
    pub baud: Option<Text>,
    #[serde(default)]
    pub data_bits: Option<Text>,
    #[serde(default)]
    pub parity: Option<Text>,
    #[serde(default)]
    pub stop_bits: Option<Text>,
    #[serde(default)]
    pub flow_control: Option<Text>,
}

#[derive(Debug, Default, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawLineEnding {
    #[serde(default)]
    pub send: Option<Text>,
    #[serde(default)]
    pub receive: Option<Text>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawIdentity {
    pub request: Text,
    pub reply: Text,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawQuantityRequest {
    pub request: Text,
    pub reply: Text,
    /// How to read the front end's counts, when `request` gives calibrated values.
    #[serde(default)]
    pub raw: Option<RawIdentity>,
    /// The smallest step of the reading, when the reply is not in counts.
    #[serde(default)]
    pub resolution: Option<Text>,
    #[serde(default)]
    pub offset: Option<Text>,
    #[serde(default)]
    pub gain: Option<Text>,
    #[serde(default)]
    pub unit: Option<Text>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawWrite {
    pub request: Text,
    pub ack: Text,
    /// How to read the constant back; its reply has a `value` group.
    #[serde(default)]
    pub readback: Option<RawIdentity>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawStep {
    pub id: Text,
    #[serde(default)]
    pub description: Option<Text>,
    #[serde(default)]
    pub special: Option<Text>,
    pub load: RawLoad,
    #[serde(default)]
    pub load_within: Option<Text>,
    /// The spread of one reading, known from earlier data, for steps that take one sample.
    #[serde(default)]
    pub repeatability: Option<RawRepeatability>,
    #[serde(default)]
    pub settle: Option<Text>,
    #[serde(default)]
    pub samples: Option<Text>,
    #[serde(default)]
    pub interval: Option<Text>,
    #[serde(default)]
    pub settle_until: Option<RawSettleUntil>,
    #[serde(default)]
    pub samples_until_decided: Option<RawSequential>,
    /// Counting the unit's test output (its pulses at the meter constant) for the checks on
    /// channel `test_output`.
    #[serde(default)]
    pub pulses: Option<RawPulses>,
    #[serde(default)]
    pub checks: Vec<RawCheck>,
}

/// How a step counts the test output: over a fixed time (`gate`), or timing a fixed number of
/// pulses (`count`); either may be chosen from a `resolution` (one pulse as a share of the
/// count) at the step's nominal power.
#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawPulses {
    /// `fixed_time` or `fixed_pulses`.
    pub method: Text,
    /// fixed_time: how long the pulses are counted ("60 s").
    #[serde(default)]
    pub gate: Option<Text>,
    /// fixed_pulses: how many pulses are timed.
    #[serde(default)]
    pub count: Option<Text>,
    /// One pulse as a share of the count ("0.2 %"): the gate or count is chosen to reach it.
    #[serde(default)]
    pub resolution: Option<Text>,
    /// The longest the counting may take ("10 min", the default).
    #[serde(default)]
    pub at_most: Option<Text>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawLoad {
    #[serde(default)]
    pub voltage: Option<Text>,
    pub current: Text,
    #[serde(default)]
    pub power_factor: Option<Text>,
    #[serde(default)]
    pub phase: Option<Text>,
    #[serde(default)]
    pub frequency: Option<Text>,
}

#[derive(Debug, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawCheck {
    pub quantity: Text,
    #[serde(default)]
    pub channel: Option<Text>,
    pub tolerance: RawTolerance,
}

/// Every tolerance key; the validator checks that they form exactly one kind.
#[derive(Debug, Default, Deserialize, schemars::JsonSchema)]
#[serde(deny_unknown_fields)]
pub struct RawTolerance {
    #[serde(default)]
    pub percent: Option<Text>,
    #[serde(default)]
    pub plus: Option<Text>,
    #[serde(default)]
    pub plus_of_range: Option<Text>,
    #[serde(default)]
    pub range: Option<Text>,
    #[serde(default)]
    pub within: Option<Text>,
    #[serde(default)]
    pub at_most: Option<Text>,
    #[serde(default)]
    pub class: Option<Text>,
}

/// The JSON Schema of a plan file, from the types the plan is read into: a YAML language server
/// given it completes keys and flags a misspelt one as it is typed.
pub fn plan_schema() -> schemars::Schema {
    let mut schema = schemars::schema_for!(RawPlan);
    schema.insert("title".into(), "meterproof test plan".into());
    schema.insert("description".into(), "A meterproof test plan: the product, its ratings, how to reach the unit (link), and the steps with their loads and checks. See the README, section Plan keys.".into());
    schema
}
