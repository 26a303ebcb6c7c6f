//! Simulated meters answering Modbus RTU, several addresses on one pseudo-terminal (the usual
//! RS-485 bench), from the same simulated world as every other simulated meter.
//!
//! The register map is the TM-16's Modbus map, invented for the demonstration and documented
//! in DEVELOPERS.md ("The TM-16 Modbus map"); `test-plans/demo-modbus.yaml` describes it to the
//! `modbus` link. Framing and CRC are `modbus-core`'s, the same crate the link uses, so a fault
//! here is injected on purpose (a CRC made wrong, a busy unit), never by a second codec.

use super::SimMeterHandle;
use super::device::{Faults, PtyDevice, serve_frames};
use crate::link::modbus::{encode, encode_text};
use crate::plan::Quantity;
use crate::plan::modbus_link::{DataType, WordOrder};
use modbus_core::rtu::{self, Header, RequestAdu, ResponseAdu};
use modbus_core::{
    Data, Exception, ExceptionResponse, FunctionCode, Request, RequestPdu, Response, ResponsePdu,
};
use std::io;
use std::time::Duration;

/// The quantities of the map, in register order: input register 2·k holds quantity k as f32,
/// input register 0x0100 + 2·k its counts as i32, holding register 0x2000 + 8·k its gain and
/// 0x2004 + 8·k its offset as f64.
pub const MAP_QUANTITIES: [Quantity; 7] = [
    Quantity::Voltage,
    Quantity::Current,
    Quantity::ActivePower,
    Quantity::ReactivePower,
    Quantity::ApparentPower,
    Quantity::PowerFactor,
    Quantity::Frequency,
];
/// The active energy register: u64, in mWh.
pub const ENERGY_REGISTER: u16 = 0x0010;
pub const MODEL_REGISTER: u16 = 0x1000;
pub const SERIAL_REGISTER: u16 = 0x1008;
pub const FIRMWARE_REGISTER: u16 = 0x1010;

/// The length of the request frame starting `buf`, once its header is there. Function 16
/// (and 15) carries its byte count at the seventh byte of the frame; `modbus-core` 0.2.0's
/// `request_pdu_len` reads the fifth (the quantity's high byte), reported upstream as
/// slowtec/modbus-core issue 12, so those lengths are taken here; the others are the crate's.
fn request_len(buf: &[u8]) -> Result<Option<usize>, ()> {
    match buf.get(1) {
        None => Ok(None),
        Some(0x0F | 0x10) => Ok(buf.get(6).map(|n| 7 + usize::from(*n) + 2)),
        Some(_) => match rtu::request_pdu_len(buf) {
            Ok(pdu) => Ok(pdu.map(|p| p + 3)),
            Err(_) => Err(()),
        },
    }
}

/// One simulated unit on the bus.
pub struct BusUnit {
    pub address: u8,
    pub meter: SimMeterHandle,
    pub faults: Faults,
    requests: u64,
    dead: bool,
}

impl BusUnit {
    pub fn new(address: u8, meter: SimMeterHandle, faults: Faults) -> BusUnit {
        BusUnit {
            address,
            meter,
            faults,
            requests: 0,
            dead: false,
        }
    }
}

/// The units on one simulated bus.
pub struct ModbusBus {
    pub units: Vec<BusUnit>,
}

impl ModbusBus {
    /// How long the addressed unit waits before replying.
    pub fn delay_for(&self, address: u8) -> Duration {
        self.units
            .iter()
            .find(|u| u.address == address)
            .map_or(Duration::ZERO, |u| u.faults.slow)
    }

    /// Takes the first whole request frame off `pending` and answers it: the reply bytes
    /// (none for a frame of another address, a dropped request or a dead unit), with the
    /// address it came for. `None` while no whole frame is there.
    pub fn take(&mut self, pending: &mut Vec<u8>) -> Option<(u8, Vec<u8>)> {
        if pending.len() < 2 {
            return None;
        }
        let len = match request_len(pending) {
            Ok(Some(len)) if pending.len() >= len => len,
            Ok(_) => return None,
            // Not a request a unit here could parse: drop a byte and look again, as a real
            // receiver resynchronises on the next silence.
            Err(()) => {
                pending.remove(0);
                return Some((0, Vec::new()));
            }
        };
        let frame: Vec<u8> = pending.drain(..len).collect();
        // A request with a bad CRC is ignored, as the specification requires.
        let Ok(Some(decoded)) = rtu::extract_frame(&frame, len - 3) else {
            return Some((frame[0], Vec::new()));
        };
        let Ok(request) = Request::try_from(decoded.pdu) else {
            return Some((frame[0], Vec::new()));
        };
        let adu = RequestAdu {
            hdr: Header {
                slave: decoded.slave,
            },
            pdu: RequestPdu(request),
        };
        let address = adu.hdr.slave;
        let Some(unit) = self.units.iter_mut().find(|u| u.address == address) else {
            return Some((address, Vec::new()));
        };
        Some((address, unit.answer(adu.pdu.0)))
    }
}

impl BusUnit {
    fn answer(&mut self, request: Request) -> Vec<u8> {
        self.requests += 1;
        let n = self.requests;
        let every = |k: Option<u64>| k.is_some_and(|k| k > 0 && n.is_multiple_of(k));
        if self.dead || self.faults.die_after.is_some_and(|d| n > d) {
            self.dead = true;
            return Vec::new();
        }
        // A unit that restarts misses the request in hand.
        if self.faults.reboot_after == Some(n) || every(self.faults.drop_every) {
            return Vec::new();
        }
        let mut words_buf = [0u8; 256];
        let exception = |function: FunctionCode, exception: Exception| {
            ResponsePdu(Err(ExceptionResponse {
                function,
                exception,
            }))
        };
        let pdu = if every(self.faults.busy_every) {
            exception(function_of(&request), Exception::ServerDeviceBusy)
        } else {
            match request {
                Request::ReadHoldingRegisters(a, count) => match self.holding(a, count) {
                    Some(words) => ResponsePdu(Ok(Response::ReadHoldingRegisters(
                        Data::from_words(&words, &mut words_buf[..words.len() * 2]).expect("fits"),
                    ))),
                    None => exception(
                        FunctionCode::ReadHoldingRegisters,
                        Exception::IllegalDataAddress,
                    ),
                },
                Request::ReadInputRegisters(a, count) => match self.input(a, count) {
                    Some(words) => ResponsePdu(Ok(Response::ReadInputRegisters(
                        Data::from_words(&words, &mut words_buf[..words.len() * 2]).expect("fits"),
                    ))),
                    None => exception(
                        FunctionCode::ReadInputRegisters,
                        Exception::IllegalDataAddress,
                    ),
                },
                Request::WriteMultipleRegisters(a, data) => {
                    let words: Vec<u16> = (0..data.len()).filter_map(|i| data.get(i)).collect();
                    match self.write(a, &words) {
                        Ok(()) => {
                            ResponsePdu(Ok(Response::WriteMultipleRegisters(a, words.len() as u16)))
                        }
                        Err(e) => exception(FunctionCode::WriteMultipleRegisters, e),
                    }
                }
                other => exception(function_of(&other), Exception::IllegalFunction),
            }
        };
        let mut out = [0u8; rtu::MAX_FRAME_LEN];
        let len = rtu::server::encode_response(
            ResponseAdu {
                hdr: Header {
                    slave: self.address,
                },
                pdu,
            },
            &mut out,
        )
        .expect("a reply fits a frame");
        let mut reply = out[..len].to_vec();
        if every(self.faults.garble_every) {
            // A wrong CRC: the frame arrives whole, its check fails.
            let last = reply.len() - 1;
            reply[last] ^= 0x5A;
        }
        reply
    }

    /// Holding registers `a..a+count`: identity text, calibration constants.
    fn holding(&self, a: u16, count: u16) -> Option<Vec<u16>> {
        let id = self.meter.identity();
        let firmware = self.faults.firmware.clone().unwrap_or(id.firmware);
        let fields: Vec<(u16, Vec<u16>)> = {
            let mut f = vec![
                (MODEL_REGISTER, encode_text(&id.model, 8)),
                (SERIAL_REGISTER, encode_text(&id.serial, 8)),
                (FIRMWARE_REGISTER, encode_text(&firmware, 4)),
            ];
            for (k, q) in MAP_QUANTITIES.iter().enumerate() {
                for (i, kind) in ["gain", "offset"].iter().enumerate() {
                    let v = self.meter.constant(&format!("{kind}_{}", q.name()))?;
                    let reg = 0x2000 + 8 * k as u16 + 4 * i as u16;
                    f.push((reg, encode(DataType::F64, WordOrder::HighFirst, v).ok()?));
                }
            }
            f
        };
        exact(&fields, a, count)
    }

    /// Input registers `a..a+count`: readings and counts.
    fn input(&self, a: u16, count: u16) -> Option<Vec<u16>> {
        let mut fields = Vec::new();
        for (k, q) in MAP_QUANTITIES.iter().enumerate() {
            if a == 2 * k as u16 {
                let v = self.meter.read_value(*q);
                fields.push((a, encode(DataType::F32, WordOrder::HighFirst, v).ok()?));
            }
            if a == 0x0100 + 2 * k as u16 {
                let c = self.meter.read_counts(*q) as f64;
                fields.push((a, encode(DataType::I32, WordOrder::HighFirst, c).ok()?));
            }
        }
        if a == ENERGY_REGISTER {
            let mwh = (self.meter.read_value(Quantity::ActiveEnergy) * 1000.0)
                .round()
                .max(0.0);
            fields.push((a, encode(DataType::U64, WordOrder::HighFirst, mwh).ok()?));
        }
        exact(&fields, a, count)
    }

    fn write(&mut self, a: u16, words: &[u16]) -> Result<(), Exception> {
        let k = a
            .checked_sub(0x2000)
            .map(|o| (o / 8, o % 8))
            .ok_or(Exception::IllegalDataAddress)?;
        let (q, which) = match k {
            (k, 0) if (k as usize) < MAP_QUANTITIES.len() => (MAP_QUANTITIES[k as usize], "gain"),
            (k, 4) if (k as usize) < MAP_QUANTITIES.len() => (MAP_QUANTITIES[k as usize], "offset"),
            _ => return Err(Exception::IllegalDataAddress),
        };
        if words.len() != 4 {
            return Err(Exception::IllegalDataValue);
        }
        if self.faults.ignore_writes {
            return Ok(());
        }
        let bytes: Vec<u8> = words.iter().flat_map(|w| w.to_be_bytes()).collect();
        let v = f64::from_be_bytes(bytes.try_into().expect("8 bytes"));
        self.meter
            .set_constant(&format!("{which}_{}", q.name()), v)
            .map_err(|_| Exception::IllegalDataValue)
    }
}

/// A read must start at a field and take it whole, as the map's units insist.
fn exact(fields: &[(u16, Vec<u16>)], a: u16, count: u16) -> Option<Vec<u16>> {
    fields
        .iter()
        .find(|(reg, words)| *reg == a && words.len() == usize::from(count))
        .map(|(_, w)| w.clone())
}

fn function_of(request: &Request) -> FunctionCode {
    match request {
        Request::ReadHoldingRegisters(..) => FunctionCode::ReadHoldingRegisters,
        Request::ReadInputRegisters(..) => FunctionCode::ReadInputRegisters,
        Request::WriteSingleRegister(..) => FunctionCode::WriteSingleRegister,
        Request::WriteMultipleRegisters(..) => FunctionCode::WriteMultipleRegisters,
        _ => FunctionCode::ReadCoils,
    }
}

/// Serves the bus on a pseudo-terminal until dropped.
pub fn spawn(mut bus: ModbusBus) -> io::Result<PtyDevice> {
    PtyDevice::spawn_serving(move |port, stop, requests| {
        serve_frames(
            port,
            stop,
            requests,
            Duration::from_millis(5),
            true,
            |_, pending| {
                let (address, reply) = bus.take(pending)?;
                let delay = bus.delay_for(address);
                if !reply.is_empty() && !delay.is_zero() {
                    std::thread::sleep(delay);
                }
                Some(reply)
            },
        )
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::link::modbus::request_frame;

    /// The whole request frame is taken, whatever its function: the length of a function 16
    /// request comes from its byte count (Modbus application protocol, Write Multiple
    /// Registers: function, address, quantity, byte count, values; from memory).
    #[test]
    fn request_frames_are_cut_at_their_length() {
        let mut payload = [0u8; 8];
        let data = Data::from_words(&[1, 2, 3, 4], &mut payload).unwrap();
        let write = request_frame(7, Request::WriteMultipleRegisters(0x2008, data));
        assert_eq!(write.len(), 1 + 6 + 8 + 2);
        assert_eq!(request_len(&write), Ok(Some(write.len())));
        assert_eq!(request_len(&write[..6]), Ok(None));
        let read = request_frame(7, Request::ReadInputRegisters(2, 2));
        assert_eq!(request_len(&read), Ok(Some(8)));
        assert_eq!(request_len(&[7, 0x63]), Err(()));
    }
}
