//! The `text` link kind as a plan describes it: a line protocol over a serial port, described in
//! data (requests, reply patterns, scaling) rather than code.

use super::Quantity;
use serde::{Serialize, Serializer};

/// A compiled regular expression that remembers how it was written.
#[derive(Debug, Clone)]
pub struct Pattern {
    pub text: String,
    pub regex: regex::Regex,
}

impl Serialize for Pattern {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&self.text)
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Parity {
    None,
    Odd,
    Even,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FlowControl {
    None,
    Software,
    Hardware,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum LineEnding {
    #[serde(rename = "CR")]
    Cr,
    #[serde(rename = "LF")]
    Lf,
    #[serde(rename = "CRLF")]
    CrLf,
}

impl LineEnding {
    pub fn bytes(self) -> &'static [u8] {
        match self {
            LineEnding::Cr => b"\r",
            LineEnding::Lf => b"\n",
            LineEnding::CrLf => b"\r\n",
        }
    }

    /// The name a plan writes it by: CR, LF or CRLF.
    pub fn name(self) -> &'static str {
        match self {
            LineEnding::Cr => "CR",
            LineEnding::Lf => "LF",
            LineEnding::CrLf => "CRLF",
        }
    }

    pub fn from_name(name: &str) -> Option<LineEnding> {
        match name {
            "CR" => Some(LineEnding::Cr),
            "LF" => Some(LineEnding::Lf),
            "CRLF" => Some(LineEnding::CrLf),
            _ => None,
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct PortSettings {
    pub baud: u32,
    pub data_bits: u8,
    pub parity: Parity,
    pub stop_bits: u8,
    pub flow_control: FlowControl,
}

impl Default for PortSettings {
    fn default() -> Self {
        PortSettings {
            baud: 115_200,
            data_bits: 8,
            parity: Parity::None,
            stop_bits: 1,
            flow_control: FlowControl::None,
        }
    }
}

/// A line of the link's init sequence, with the reply it waits for (none: sent and left).
#[derive(Debug, Clone, Serialize)]
pub struct InitLine {
    pub send: String,
    pub reply: Option<Pattern>,
}

/// How to ask a unit who it is.
#[derive(Debug, Clone, Serialize)]
pub struct IdentityRequest {
    pub request: String,
    /// Has the named groups `model`, `serial` and `firmware`.
    pub reply: Pattern,
}

/// How to read one quantity.
#[derive(Debug, Clone, Serialize)]
pub struct QuantityRequest {
    pub quantity: Quantity,
    /// The line to send; `{channel}` is replaced by the check's channel.
    pub request: String,
    /// Has the named group `value`.
    pub reply: Pattern,
    /// value = (counts − offset) / gain, in `unit`, then converted to the base unit.
    pub offset: f64,
    pub gain: f64,
    /// The factor from `unit` to the quantity's base unit (1 for the base unit, 1e-3 for mA).
    pub unit_factor: f64,
    /// How to read the raw counts, when `request` gives calibrated values.
    pub raw: Option<Exchange>,
    /// The smallest step of the reading, base units: stated, or one count when the reply is in
    /// counts (a gain is given); otherwise unknown.
    pub resolution: Option<f64>,
}

/// A request and the pattern of its reply (with a `value` group).
#[derive(Debug, Clone, Serialize)]
pub struct Exchange {
    pub request: String,
    pub reply: Pattern,
}

impl QuantityRequest {
    /// Converts a raw reply value to the quantity's base unit.
    pub fn convert(&self, raw: f64) -> f64 {
        (raw - self.offset) / self.gain * self.unit_factor
    }
}

/// A write the plan may send (calibration constants), and its acknowledgement.
#[derive(Debug, Clone, Serialize)]
pub struct WriteRequest {
    pub name: String,
    /// The line to send; `{channel}` and `{value}` are replaced.
    pub request: String,
    pub ack: Pattern,
    pub readback: Option<Exchange>,
}

/// A line protocol over a serial port.
#[derive(Debug, Clone, Serialize)]
pub struct TextLinkSpec {
    pub port: PortSettings,
    pub send_ending: LineEnding,
    pub receive_ending: LineEnding,
    pub timeout_s: f64,
    pub retries: u32,
    /// Quiet time between the end of one transaction and the next request.
    pub pause_s: f64,
    /// Whether the device echoes each request before replying.
    pub echo: bool,
    /// Lines to ignore wherever they appear (boot banners, log lines).
    pub skip: Option<Pattern>,
    /// A line that shows the unit restarted (its boot banner): counted, and readings taken
    /// across it are not used.
    pub restart: Option<Pattern>,
    /// What the unit shows when it is ready for a request (a console's "> "), without a line
    /// ending: each request waits for it, and it is taken off an echo glued to it.
    pub prompt: Option<String>,
    /// Lines sent after the port opens (and opens again), before anything else: a console
    /// put into the mode the link expects.
    pub init: Vec<InitLine>,
    pub channels: Vec<String>,
    pub identity: IdentityRequest,
    pub quantities: Vec<QuantityRequest>,
    pub writes: Vec<WriteRequest>,
}

impl TextLinkSpec {
    pub fn request_for(&self, quantity: Quantity) -> Option<&QuantityRequest> {
        self.quantities.iter().find(|q| q.quantity == quantity)
    }
}
