//! Links to the units under test: one trait, one implementation per kind of wire protocol.
//!
//! The executor only ever talks to a [`DutLink`]; whether the other end is the built-in
//! simulator or a meter on a serial port is the link's business. A link reports every failure as
//! a [`LinkError`] that says what was asked and what went wrong, never by panicking.

pub mod line;
pub mod modbus;
pub mod readout;
pub mod tap;
pub mod text;

use crate::plan::Quantity;
use serde::{Deserialize, Serialize};

/// What a unit says about itself.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Identity {
    pub model: String,
    pub serial: String,
    pub firmware: String,
}

/// How the link to a unit fared over a run, for its record: a unit that needed many retries
/// or restarted is worth a look even when it passed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
pub struct LinkHealth {
    pub requests: u64,
    /// Requests sent again after no reply or a reply not understood.
    pub retries: u64,
    /// Lines ignored: echo, log lines, boot banners.
    pub lines_skipped: u64,
    /// Lines that matched no reply pattern.
    pub not_understood: u64,
    /// Times the unit's restart line was seen.
    pub restarts: u64,
    /// Times the port was lost and opened again (a unit reseated, a cable pulled).
    #[serde(default)]
    pub reconnects: u64,
    /// Exception replies (a refused or busy request), on links that have them.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub exceptions: u64,
    /// Frames whose checksum did not match (CRC, BCC), on links that check one.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub crc_errors: u64,
    /// Replies that came after their request's timeout, set aside.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub late_replies: u64,
}

fn is_zero(n: &u64) -> bool {
    *n == 0
}

/// A failure on the link to one unit.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum LinkError {
    #[error("no reply to {request} within {timeout_ms} ms (after {attempts} attempts)")]
    Timeout {
        request: String,
        timeout_ms: u64,
        attempts: u32,
    },
    #[error(
        "no reply to {request} within {timeout_ms} ms (after {attempts} attempts), and replies arriving after their timeout ({late}): the unit answers more slowly than the link's timeout allows"
    )]
    TooSlow {
        request: String,
        timeout_ms: u64,
        attempts: u32,
        late: u64,
    },
    #[error(
        "no prompt {prompt:?} within {timeout_ms} ms (an empty line sent to wake the unit brought none either)"
    )]
    NoPrompt { prompt: String, timeout_ms: u64 },
    #[error("reply to {request} not understood: {reply:?} ({why})")]
    Garbled {
        request: String,
        reply: String,
        why: String,
    },
    #[error("the unit refused {request}: {why}")]
    Refused { request: String, why: String },
    #[error("the link is gone: {0}")]
    Disconnected(String),
    #[error("the unit cannot do {quantity} on channel {channel}")]
    Unsupported { quantity: String, channel: String },
    #[error("cannot open {port}: {why}")]
    Open { port: String, why: String },
}

/// The connection to one unit under test.
pub trait DutLink: Send {
    /// Reads the unit's model, serial number and firmware version.
    fn identify(&mut self) -> Result<Identity, LinkError>;

    /// Reads one quantity on one channel, in the quantity's base unit. For register quantities
    /// (energy) this is the register's current content.
    fn read(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError>;

    /// A new sample starts: the readings that follow must be taken now. A link that reads
    /// several quantities in one exchange (a whole readout) keeps that exchange only within
    /// one sample, and forgets it here, so no reading of an earlier sample, step or load is
    /// ever handed out again.
    fn begin_sample(&mut self) {}

    /// Reads one quantity as the front end counts it, before any conversion (for calibration).
    fn read_raw(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError> {
        Err(LinkError::Unsupported {
            quantity: format!("raw {}", quantity.name()),
            channel: channel.to_string(),
        })
    }

    /// Reads back a named constant.
    fn read_constant(&mut self, name: &str, channel: &str) -> Result<f64, LinkError> {
        Err(LinkError::Unsupported {
            quantity: format!("read {name}"),
            channel: channel.to_string(),
        })
    }

    /// Writes a named constant (a calibration gain or offset) and waits for its acknowledgement.
    fn write_constant(&mut self, name: &str, channel: &str, _value: f64) -> Result<(), LinkError> {
        Err(LinkError::Unsupported {
            quantity: format!("write {name}"),
            channel: channel.to_string(),
        })
    }

    /// The smallest step of the unit's reading of `quantity`, base units, where known.
    fn resolution(&self, _quantity: Quantity) -> Option<f64> {
        None
    }

    /// A short description for records: "sim position 3", "/dev/ttyUSB0 @ 115200".
    fn describe(&self) -> String;

    /// The exchange the last reading handed out was taken in, where the link knows it: the
    /// unit took that reading between its two moments. After a retry it is the attempt that
    /// was answered, much shorter than the whole call; for a link that hands out readings of
    /// an earlier exchange of the same sample (a whole readout), that exchange.
    fn last_exchange(&self) -> Option<Exchange> {
        None
    }

    /// How the link has fared so far, where the link counts it.
    fn health(&self) -> Option<LinkHealth> {
        None
    }
}

/// The real moments of one request and its reply: sent, and the reply read whole.
///
/// Kept as instants, not as a duration measured back from "now": a sampling thread that is
/// descheduled after the reply came (a loaded machine) would otherwise stamp the reading later
/// than the unit took it, by as long as it waited, and no uncertainty term would cover that.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Exchange {
    pub sent: std::time::Instant,
    pub answered: std::time::Instant,
}

impl Exchange {
    /// From `sent` to now.
    pub fn since(sent: std::time::Instant) -> Exchange {
        Exchange {
            sent,
            answered: std::time::Instant::now(),
        }
    }

    pub fn took(&self) -> std::time::Duration {
        self.answered.saturating_duration_since(self.sent)
    }
}

/// A position whose link could not be opened: every call reports why, so the unit is recorded
/// incomplete with the reason while the other positions run.
pub struct Unreachable {
    port: String,
    error: LinkError,
}

impl Unreachable {
    pub fn new(port: &str, error: LinkError) -> Unreachable {
        Unreachable {
            port: port.to_string(),
            error,
        }
    }
}

impl DutLink for Unreachable {
    fn identify(&mut self) -> Result<Identity, LinkError> {
        Err(self.error.clone())
    }
    fn read(&mut self, _: Quantity, _: &str) -> Result<f64, LinkError> {
        Err(self.error.clone())
    }
    fn describe(&self) -> String {
        format!("{} (not opened)", self.port)
    }
}
