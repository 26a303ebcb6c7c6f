//! The `modbus` link kind as a plan describes it: Modbus RTU over a serial line (RS-485 or
//! RS-232), with every quantity a register described in data (address, data type, word order,
//! scale and unit) rather than code.
//!
//! Owns the description only; framing, CRC and the bus live in `link::modbus`.

use super::Quantity;
use super::text_link::PortSettings;
use serde::Serialize;

/// Which register table a read goes to: function 03 or 04.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Table {
    /// Holding registers, read with function 03 (and written with 06 or 16).
    Holding,
    /// Input registers, read with function 04.
    Input,
}

/// How a value is laid out in its registers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum DataType {
    U16,
    I16,
    U32,
    I32,
    U64,
    F32,
    F64,
    /// Text, two characters a register, first character in the high byte; trailing NULs and
    /// spaces are not part of it.
    Ascii {
        words: u16,
    },
}

impl DataType {
    /// How many 16-bit registers the value takes.
    pub fn words(self) -> u16 {
        match self {
            DataType::U16 | DataType::I16 => 1,
            DataType::U32 | DataType::I32 | DataType::F32 => 2,
            DataType::U64 | DataType::F64 => 4,
            DataType::Ascii { words } => words,
        }
    }

    /// Whether the type holds whole numbers (its resolution is one count).
    pub fn is_integer(self) -> bool {
        matches!(
            self,
            DataType::U16 | DataType::I16 | DataType::U32 | DataType::I32 | DataType::U64
        )
    }

    pub fn name(self) -> &'static str {
        match self {
            DataType::U16 => "u16",
            DataType::I16 => "i16",
            DataType::U32 => "u32",
            DataType::I32 => "i32",
            DataType::U64 => "u64",
            DataType::F32 => "f32",
            DataType::F64 => "f64",
            DataType::Ascii { .. } => "ascii",
        }
    }
}

/// The order of the registers of a value wider than one register. Within a register the high
/// byte always comes first (Modbus is big-endian); meters differ in the order of the words.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum WordOrder {
    /// The most significant register at the lowest address.
    HighFirst,
    /// The least significant register at the lowest address.
    LowFirst,
}

/// One value in the unit's registers.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Register {
    pub table: Table,
    /// The first register's address as sent on the wire (0 to 65535).
    pub address: u16,
    pub data_type: DataType,
    pub order: WordOrder,
    /// What one count of the register is in the quantity's base unit: the plan's scale times
    /// its unit (a `u64` of 0.001 kWh is 1 Wh a count).
    pub factor: f64,
}

/// An identity field: a text register, or a number written into a text (`TM16-{value}`).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct IdentityField {
    pub register: Register,
    /// `{value}` stands for the number (or the text).
    pub format: String,
}

/// How a quantity is read.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct QuantityRegister {
    pub quantity: Quantity,
    pub value: Register,
    /// The front end's counts, for calibration.
    pub raw: Option<Register>,
    /// The reading's step in base units: stated by the plan, else one count of an integer
    /// register.
    pub resolution: Option<f64>,
}

/// A constant the unit takes (a calibration gain or offset), in holding registers; read back
/// from the same registers.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RegisterWrite {
    pub name: String,
    pub register: Register,
}

/// The `modbus` link, validated.
#[derive(Debug, Clone, Serialize)]
pub struct ModbusLinkSpec {
    pub port: PortSettings,
    /// The unit address (1 to 247) when the station gives a position none.
    pub address: u8,
    pub timeout_s: f64,
    /// Attempts after the first, on no reply, a CRC error or a busy unit.
    pub retries: u32,
    /// A pause on the bus after each reply before the next request (some units need it
    /// to turn their RS-485 driver round); at least the 3.5 characters' silence that ends a
    /// frame.
    pub turnaround_s: f64,
    pub channels: Vec<String>,
    /// Registers between one channel's values and the next channel's.
    pub channel_stride: u16,
    pub model: IdentityField,
    pub serial: IdentityField,
    pub firmware: IdentityField,
    pub quantities: Vec<QuantityRegister>,
    pub writes: Vec<RegisterWrite>,
}

impl ModbusLinkSpec {
    pub fn register_for(&self, quantity: Quantity) -> Option<&QuantityRegister> {
        self.quantities.iter().find(|q| q.quantity == quantity)
    }

    /// The silence that ends a frame: 3.5 characters of 11 bits (start, 8 data, parity or a
    /// second stop, stop), or 1.75 ms above 19200 baud, as the Modbus serial line
    /// specification fixes it.
    pub fn frame_silence_s(&self) -> f64 {
        if self.port.baud > 19_200 {
            0.001_75
        } else {
            3.5 * 11.0 / f64::from(self.port.baud)
        }
    }
}
