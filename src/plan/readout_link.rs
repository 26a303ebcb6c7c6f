//! The `iec62056_21` link kind as a plan describes it: the readout of IEC 62056-21 (mode C)
//! through an optical probe or a serial line, every quantity a data line named by its OBIS
//! code.
//!
//! Owns the description only; the sign-on, the baud-rate switch, the data block and its block
//! check are `link::readout`'s.

use super::Quantity;
use super::text_link::PortSettings;
use serde::Serialize;

/// How a quantity is read from the meter.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ReadMode {
    /// The whole data readout (mode C, readout mode), once per sample for every quantity.
    Readout,
    /// One register at a time (mode C, programming mode, read command R1), for meters that
    /// allow it: fresher values and shorter exchanges than a whole readout.
    Register,
}

/// One quantity: its OBIS code and the unit the meter writes.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ObisQuantity {
    pub quantity: Quantity,
    /// As the data line writes it, such as `1.8.0` (or `1-0:1.8.0`).
    pub obis: String,
    /// The unit the data line must carry (`kWh`), and its factor to the base unit.
    pub unit: Option<String>,
    pub factor: f64,
    /// The reading's step, where the plan states it.
    pub resolution: Option<f64>,
}

/// Where an identity field comes from.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum IdentitySource {
    /// The identification message after the manufacturer's three letters and the baud-rate
    /// character (`/XXX5IDENT`): IDENT.
    Identification,
    /// A data line's value, by OBIS code (`C.1.0`, `0.0.0`).
    Obis(String),
}

/// The `iec62056_21` link, validated.
#[derive(Debug, Clone, Serialize)]
pub struct ReadoutLinkSpec {
    /// The sign-on port settings: 300 baud, 7 data bits, even parity unless the plan says.
    pub port: PortSettings,
    /// The device address in the sign-on request (`/?ADDRESS!`), empty for any meter.
    pub device_address: String,
    /// Whether to switch to the baud rate the meter offers (mode C); otherwise stay at the
    /// sign-on rate.
    pub switch_baud: bool,
    pub timeout_s: f64,
    pub retries: u32,
    /// The largest readout accepted, bytes: a meter that never ends its block is cut there.
    pub max_bytes: usize,
    pub channels: Vec<String>,
    pub model: IdentitySource,
    pub serial: IdentitySource,
    pub firmware: IdentitySource,
    pub read: ReadMode,
    pub quantities: Vec<ObisQuantity>,
}

impl ReadoutLinkSpec {
    pub fn obis_for(&self, quantity: Quantity) -> Option<&ObisQuantity> {
        self.quantities.iter().find(|q| q.quantity == quantity)
    }
}
