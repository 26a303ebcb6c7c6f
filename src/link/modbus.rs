//! The `modbus` link: Modbus RTU over a serial line, several units on one bus.
//!
//! Framing and CRC are the `modbus-core` crate's; this module owns the bus (one port, one
//! transaction at a time, the silence between frames), the retries, and the reading of values
//! out of registers as the plan describes them (`plan::modbus_link`). Positions on one bus share
//! a [`SharedBus`]: their transactions are serialised by its lock, taken for one attempt at a
//! time, so a silent unit holds the others up by at most its timeout per attempt. Positions on
//! different buses run in parallel.

use super::line::open_port;
use super::{DutLink, Identity, LinkError, LinkHealth};
use crate::plan::Quantity;
use crate::plan::modbus_link::{
    DataType, IdentityField, ModbusLinkSpec, Register, Table, WordOrder,
};
use modbus_core::rtu::{self, Header, RequestAdu};
use modbus_core::{Data, Exception, Request, RequestPdu, Response};
use std::io::{Read, Write};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

// ---- Values in registers ----

/// What a register holds once read.
#[derive(Debug, Clone, PartialEq)]
pub enum Content {
    Number(f64),
    Text(String),
}

/// The words of a value in significance order (most significant first).
fn significance_order(words: &[u16], order: WordOrder) -> Vec<u16> {
    let mut w = words.to_vec();
    if order == WordOrder::LowFirst {
        w.reverse();
    }
    w
}

/// Reads a value out of its registers, as they came off the wire (lowest address first). The
/// number is in register counts; [`Register::factor`] turns it into base units.
pub fn decode(data_type: DataType, order: WordOrder, words: &[u16]) -> Result<Content, String> {
    if words.len() != usize::from(data_type.words()) {
        return Err(format!(
            "{} registers where a {} takes {}",
            words.len(),
            data_type.name(),
            data_type.words()
        ));
    }
    if let DataType::Ascii { .. } = data_type {
        let bytes: Vec<u8> = words.iter().flat_map(|w| w.to_be_bytes()).collect();
        let text: String = bytes
            .iter()
            .take_while(|b| **b != 0)
            .map(|b| *b as char)
            .collect();
        if text.chars().any(|c| !(' '..='~').contains(&c)) {
            return Err(format!(
                "the text {text:?} holds characters that are not printable ASCII"
            ));
        }
        return Ok(Content::Text(text.trim_end().to_string()));
    }
    let mut bytes = Vec::with_capacity(8);
    for w in significance_order(words, order) {
        bytes.extend_from_slice(&w.to_be_bytes());
    }
    let n = match data_type {
        DataType::U16 => f64::from(u16::from_be_bytes([bytes[0], bytes[1]])),
        DataType::I16 => f64::from(i16::from_be_bytes([bytes[0], bytes[1]])),
        DataType::U32 => f64::from(u32::from_be_bytes(bytes[..4].try_into().expect("4 bytes"))),
        DataType::I32 => f64::from(i32::from_be_bytes(bytes[..4].try_into().expect("4 bytes"))),
        DataType::U64 => u64::from_be_bytes(bytes[..8].try_into().expect("8 bytes")) as f64,
        DataType::F32 => f64::from(f32::from_be_bytes(bytes[..4].try_into().expect("4 bytes"))),
        DataType::F64 => f64::from_be_bytes(bytes[..8].try_into().expect("8 bytes")),
        DataType::Ascii { .. } => unreachable!("handled above"),
    };
    if !n.is_finite() {
        return Err(format!("the {} is not a finite number", data_type.name()));
    }
    Ok(Content::Number(n))
}

/// The registers (lowest address first) that hold `counts` as `data_type`: the inverse of
/// [`decode`]. Integer types take the nearest whole number and refuse one out of their range.
pub fn encode(data_type: DataType, order: WordOrder, counts: f64) -> Result<Vec<u16>, String> {
    if !counts.is_finite() {
        return Err("the value is not a finite number".into());
    }
    let whole = |lo: f64, hi: f64| -> Result<f64, String> {
        let r = counts.round();
        if r < lo || r > hi {
            Err(format!("{counts} does not fit a {}", data_type.name()))
        } else {
            Ok(r)
        }
    };
    let bytes: Vec<u8> = match data_type {
        DataType::U16 => (whole(0.0, 65_535.0)? as u16).to_be_bytes().to_vec(),
        DataType::I16 => (whole(-32_768.0, 32_767.0)? as i16).to_be_bytes().to_vec(),
        DataType::U32 => (whole(0.0, 4_294_967_295.0)? as u32).to_be_bytes().to_vec(),
        DataType::I32 => (whole(-2_147_483_648.0, 2_147_483_647.0)? as i32)
            .to_be_bytes()
            .to_vec(),
        DataType::U64 => (whole(0.0, 1.8e19)? as u64).to_be_bytes().to_vec(),
        DataType::F32 => (counts as f32).to_be_bytes().to_vec(),
        DataType::F64 => counts.to_be_bytes().to_vec(),
        DataType::Ascii { .. } => return Err("a number cannot be written as text".into()),
    };
    let words: Vec<u16> = bytes
        .chunks(2)
        .map(|c| u16::from_be_bytes([c[0], c[1]]))
        .collect();
    Ok(significance_order(&words, order))
}

/// Text into registers, two characters each, padded with NULs (for the simulator).
pub fn encode_text(text: &str, words: u16) -> Vec<u16> {
    let mut bytes: Vec<u8> = text.bytes().take(usize::from(words) * 2).collect();
    bytes.resize(usize::from(words) * 2, 0);
    bytes
        .chunks(2)
        .map(|c| u16::from_be_bytes([c[0], c[1]]))
        .collect()
}

// ---- The bus ----

/// One serial port with units on it.
pub struct Bus {
    port: Box<dyn serialport::SerialPort>,
    path: String,
    /// The silence before a request: the frame gap, or the turnaround where it is longer.
    gap: Duration,
    quiet_since: Instant,
}

/// A bus shared by the positions on it.
pub type SharedBus = Arc<Mutex<Bus>>;

/// Why one attempt of a transaction failed.
#[derive(Debug)]
enum Attempt {
    NoReply,
    /// The CRC the frame carried and the one computed over it.
    Crc(u16, u16),
    Garbled(String),
    Gone(String),
}

impl Bus {
    /// Opens the bus at `path` with the link's settings.
    pub fn open(path: &str, spec: &ModbusLinkSpec) -> Result<SharedBus, LinkError> {
        let port = open_port(path, spec.port)?;
        let gap = Duration::from_secs_f64(spec.frame_silence_s().max(spec.turnaround_s));
        Ok(Arc::new(Mutex::new(Bus {
            port,
            path: path.to_string(),
            gap,
            quiet_since: Instant::now(),
        })))
    }

    /// Sends one request frame and waits for the reply frame of `address`, up to `timeout`.
    fn exchange(
        &mut self,
        frame: &[u8],
        address: u8,
        timeout: Duration,
    ) -> Result<(Vec<u8>, f64), Attempt> {
        let quiet = self.quiet_since.elapsed();
        if quiet < self.gap {
            std::thread::sleep(self.gap - quiet);
        }
        // Bytes left from an earlier, late reply are not this one's.
        let _ = self.port.clear(serialport::ClearBuffer::Input);
        let sent = Instant::now();
        let written = self.port.write_all(frame).and_then(|_| self.port.flush());
        if let Err(e) = written {
            self.quiet_since = Instant::now();
            return Err(Attempt::Gone(e.to_string()));
        }
        let deadline = sent + timeout;
        let mut buf: Vec<u8> = Vec::new();
        let mut chunk = [0u8; 256];
        let result = loop {
            if let Some(end) = frame_end(&buf) {
                match end {
                    Ok(len) => {
                        let frame: Vec<u8> = buf.drain(..len).collect();
                        if frame[0] != address {
                            // A late reply of another unit: not ours, keep listening.
                            continue;
                        }
                        break Ok((frame, sent.elapsed().as_secs_f64()));
                    }
                    Err(why) => break Err(Attempt::Garbled(why)),
                }
            }
            if Instant::now() >= deadline {
                break Err(if buf.is_empty() {
                    Attempt::NoReply
                } else {
                    Attempt::Garbled(format!("an incomplete frame {}", hex(&buf)))
                });
            }
            match self.port.read(&mut chunk) {
                Ok(0) => {}
                Ok(n) => buf.extend_from_slice(&chunk[..n]),
                Err(e) if e.kind() == std::io::ErrorKind::TimedOut => {}
                Err(e) => break Err(Attempt::Gone(e.to_string())),
            }
        };
        self.quiet_since = Instant::now();
        result.and_then(|(frame, took)| match check_crc(&frame) {
            Ok(()) => Ok((frame, took)),
            Err((sent_crc, computed)) => Err(Attempt::Crc(sent_crc, computed)),
        })
    }
}

/// Where the first reply frame in `buf` ends, once it is all there; an error for bytes that
/// cannot start a reply.
fn frame_end(buf: &[u8]) -> Option<Result<usize, String>> {
    match rtu::response_pdu_len(buf) {
        Ok(Some(pdu)) if buf.len() >= pdu + 3 => Some(Ok(pdu + 3)),
        Ok(_) => None,
        Err(_) => Some(Err(format!(
            "function code 0x{:02X} is no reply this link asked for ({})",
            buf[1],
            hex(buf)
        ))),
    }
}

/// The CRC of a whole frame, as carried (high byte first as `modbus-core` reads it) and as
/// computed.
fn check_crc(frame: &[u8]) -> Result<(), (u16, u16)> {
    let (body, crc) = frame.split_at(frame.len() - 2);
    let carried = u16::from_be_bytes([crc[0], crc[1]]);
    let computed = rtu::crc16(body);
    if carried == computed {
        Ok(())
    } else {
        Err((carried, computed))
    }
}

fn hex(bytes: &[u8]) -> String {
    bytes
        .iter()
        .map(|b| format!("{b:02X}"))
        .collect::<Vec<_>>()
        .join(" ")
}

/// Encodes a request frame for `address`.
pub fn request_frame(address: u8, request: Request) -> Vec<u8> {
    let mut buf = [0u8; rtu::MAX_FRAME_LEN];
    let n = rtu::client::encode_request(
        RequestAdu {
            hdr: Header { slave: address },
            pdu: RequestPdu(request),
        },
        &mut buf,
    )
    .expect("a request of at most 125 registers fits a frame");
    buf[..n].to_vec()
}

// ---- The link ----

/// What a transaction answered.
enum Answer {
    Words(Vec<u16>),
    Written,
}

/// One unit on a bus.
pub struct ModbusLink {
    bus: SharedBus,
    address: u8,
    spec: Arc<ModbusLinkSpec>,
    health: LinkHealth,
    last_answered_s: Option<f64>,
    description: String,
}

impl ModbusLink {
    pub fn new(bus: SharedBus, address: u8, spec: Arc<ModbusLinkSpec>) -> ModbusLink {
        let description = {
            let b = bus.lock().unwrap_or_else(|p| p.into_inner());
            format!(
                "{} @ {} address {address} (Modbus RTU)",
                b.path, spec.port.baud
            )
        };
        ModbusLink {
            bus,
            address,
            spec,
            health: LinkHealth::default(),
            last_answered_s: None,
            description,
        }
    }

    /// One transaction with retries: on no reply, a CRC error, a garbled frame or a busy unit
    /// the request is sent again, up to the link's retries; an exception that will not change
    /// (an illegal address, say) is reported at once.
    fn transact(&mut self, what: &str, request: Request) -> Result<Answer, LinkError> {
        let frame = request_frame(self.address, request);
        let timeout = Duration::from_secs_f64(self.spec.timeout_s);
        let function = frame[1];
        let attempts = self.spec.retries + 1;
        let mut last = None;
        for attempt in 1..=attempts {
            self.health.requests += 1;
            if attempt > 1 {
                self.health.retries += 1;
            }
            if attempt > 1 {
                // Off the bus for a moment before trying again, so that the units waiting for
                // it take their turn first (a lock is not a queue): a silent unit holds the
                // others up by one timeout at a time, not by all its attempts.
                std::thread::sleep(Duration::from_millis(2));
            }
            let result = {
                let mut bus = self.bus.lock().unwrap_or_else(|p| p.into_inner());
                bus.exchange(&frame, self.address, timeout)
            };
            let (reply, took) = match result {
                Ok(r) => r,
                Err(Attempt::NoReply) => {
                    last = Some(LinkError::Timeout {
                        request: what.to_string(),
                        timeout_ms: (self.spec.timeout_s * 1000.0).round() as u64,
                        attempts,
                    });
                    continue;
                }
                Err(Attempt::Crc(carried, computed)) => {
                    self.health.crc_errors += 1;
                    last = Some(LinkError::Garbled {
                        request: what.to_string(),
                        reply: String::new(),
                        why: format!(
                            "CRC error: the frame carries 0x{carried:04X}, its bytes give 0x{computed:04X}"
                        ),
                    });
                    continue;
                }
                Err(Attempt::Garbled(why)) => {
                    self.health.not_understood += 1;
                    last = Some(LinkError::Garbled {
                        request: what.to_string(),
                        reply: String::new(),
                        why,
                    });
                    continue;
                }
                Err(Attempt::Gone(why)) => return Err(LinkError::Disconnected(why)),
            };
            match interpret(&reply, function) {
                Ok(answer) => {
                    self.last_answered_s = Some(took);
                    return Ok(answer);
                }
                Err(Interpreted::Exception(code, name)) => {
                    self.health.exceptions += 1;
                    let error = LinkError::Refused {
                        request: what.to_string(),
                        why: format!("exception {code:02} ({name})"),
                    };
                    // Busy or still working on it: worth asking again; anything else is not.
                    if code == Exception::ServerDeviceBusy as u8
                        || code == Exception::Acknowledge as u8
                    {
                        last = Some(error);
                        continue;
                    }
                    return Err(error);
                }
                Err(Interpreted::Garbled(why)) => {
                    self.health.not_understood += 1;
                    last = Some(LinkError::Garbled {
                        request: what.to_string(),
                        reply: hex(&reply),
                        why,
                    });
                }
            }
        }
        Err(last.expect("at least one attempt"))
    }

    fn read_register(
        &mut self,
        what: &str,
        register: &Register,
        offset: u16,
    ) -> Result<Content, LinkError> {
        let address =
            register
                .address
                .checked_add(offset)
                .ok_or_else(|| LinkError::Unsupported {
                    quantity: what.to_string(),
                    channel: "(past register 65535)".into(),
                })?;
        let count = register.data_type.words();
        let request = match register.table {
            Table::Holding => Request::ReadHoldingRegisters(address, count),
            Table::Input => Request::ReadInputRegisters(address, count),
        };
        let label = format!(
            "{what} (address {}, {} register {address}..{})",
            self.address,
            match register.table {
                Table::Holding => "holding",
                Table::Input => "input",
            },
            u32::from(address) + u32::from(count) - 1
        );
        let Answer::Words(words) = self.transact(&label, request)? else {
            return Err(LinkError::Garbled {
                request: label,
                reply: String::new(),
                why: "a write acknowledgement where registers were asked for".into(),
            });
        };
        decode(register.data_type, register.order, &words).map_err(|why| LinkError::Garbled {
            request: label,
            reply: words
                .iter()
                .map(|w| format!("{w:04X}"))
                .collect::<Vec<_>>()
                .join(" "),
            why,
        })
    }

    fn number(&mut self, what: &str, register: &Register, offset: u16) -> Result<f64, LinkError> {
        match self.read_register(what, register, offset)? {
            Content::Number(n) => Ok(n * register.factor),
            Content::Text(t) => Err(LinkError::Garbled {
                request: what.to_string(),
                reply: t,
                why: "text where a number was expected".into(),
            }),
        }
    }

    fn identity_field(&mut self, what: &str, field: &IdentityField) -> Result<String, LinkError> {
        let content = self.read_register(what, &field.register, 0)?;
        Ok(identity_text(&field.format, &content))
    }

    /// The register offset of `channel`.
    fn channel_offset(&self, quantity: &str, channel: &str) -> Result<u16, LinkError> {
        let index = self
            .spec
            .channels
            .iter()
            .position(|c| c == channel)
            .ok_or_else(|| LinkError::Unsupported {
                quantity: quantity.to_string(),
                channel: channel.to_string(),
            })?;
        Ok(self.spec.channel_stride.saturating_mul(index as u16))
    }
}

/// An identity field as the plan's format writes it: `{value}` is the text, or the whole
/// number in decimal.
pub fn identity_text(format: &str, content: &Content) -> String {
    let value = match content {
        Content::Text(t) => t.clone(),
        Content::Number(n) => format!("{}", *n as i64),
    };
    format.replace("{value}", &value)
}

/// Why a reply frame (CRC checked) is not the answer.
enum Interpreted {
    Exception(u8, String),
    Garbled(String),
}

fn interpret(frame: &[u8], function: u8) -> Result<Answer, Interpreted> {
    let adu = rtu::client::decode_response(frame)
        .ok()
        .flatten()
        .ok_or_else(|| Interpreted::Garbled("the frame does not decode".into()))?;
    match adu.pdu.0 {
        Err(e) => Err(Interpreted::Exception(
            e.exception as u8,
            e.exception.to_string(),
        )),
        Ok(Response::ReadHoldingRegisters(data) | Response::ReadInputRegisters(data))
            if function == 0x03 || function == 0x04 =>
        {
            Ok(Answer::Words(
                (0..data.len()).filter_map(|i| data.get(i)).collect(),
            ))
        }
        Ok(Response::WriteSingleRegister(..) | Response::WriteMultipleRegisters(..))
            if function == 0x06 || function == 0x10 =>
        {
            Ok(Answer::Written)
        }
        Ok(other) => Err(Interpreted::Garbled(format!(
            "a reply to another function ({other:?})"
        ))),
    }
}

impl DutLink for ModbusLink {
    fn identify(&mut self) -> Result<Identity, LinkError> {
        let spec = self.spec.clone();
        Ok(Identity {
            model: self.identity_field("the model", &spec.model)?,
            serial: self.identity_field("the serial number", &spec.serial)?,
            firmware: self.identity_field("the firmware version", &spec.firmware)?,
        })
    }

    fn read(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError> {
        let spec = self.spec.clone();
        let Some(q) = spec.register_for(quantity) else {
            return Err(LinkError::Unsupported {
                quantity: quantity.name().to_string(),
                channel: channel.to_string(),
            });
        };
        let offset = self.channel_offset(quantity.name(), channel)?;
        self.number(&format!("read {}", quantity.name()), &q.value, offset)
    }

    fn read_raw(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError> {
        let spec = self.spec.clone();
        let Some(raw) = spec.register_for(quantity).and_then(|q| q.raw.as_ref()) else {
            return Err(LinkError::Unsupported {
                quantity: format!("raw {}", quantity.name()),
                channel: channel.to_string(),
            });
        };
        let offset = self.channel_offset(quantity.name(), channel)?;
        self.number(&format!("read raw {}", quantity.name()), raw, offset)
    }

    fn read_constant(&mut self, name: &str, channel: &str) -> Result<f64, LinkError> {
        let spec = self.spec.clone();
        let Some(w) = spec.writes.iter().find(|w| w.name == name) else {
            return Err(LinkError::Unsupported {
                quantity: format!("read {name}"),
                channel: channel.to_string(),
            });
        };
        let offset = self.channel_offset(name, channel)?;
        self.number(&format!("read back {name}"), &w.register, offset)
    }

    fn write_constant(&mut self, name: &str, channel: &str, value: f64) -> Result<(), LinkError> {
        let spec = self.spec.clone();
        let Some(w) = spec.writes.iter().find(|w| w.name == name) else {
            return Err(LinkError::Unsupported {
                quantity: format!("write {name}"),
                channel: channel.to_string(),
            });
        };
        let offset = self.channel_offset(name, channel)?;
        let address = w.register.address.saturating_add(offset);
        let words = encode(
            w.register.data_type,
            w.register.order,
            value / w.register.factor,
        )
        .map_err(|why| LinkError::Refused {
            request: format!("write {name} = {value}"),
            why,
        })?;
        // Exactly the registers' bytes: the crate writes the whole buffer it is given.
        let mut payload = vec![0u8; words.len() * 2];
        let request = if words.len() == 1 {
            Request::WriteSingleRegister(address, words[0])
        } else {
            let data = Data::from_words(&words, &mut payload).expect("a constant fits a frame");
            Request::WriteMultipleRegisters(address, data)
        };
        match self.transact(
            &format!(
                "write {name} (address {}, holding register {address})",
                self.address
            ),
            request,
        )? {
            Answer::Written => Ok(()),
            Answer::Words(_) => Err(LinkError::Garbled {
                request: format!("write {name}"),
                reply: String::new(),
                why: "registers where a write acknowledgement was expected".into(),
            }),
        }
    }

    fn resolution(&self, quantity: Quantity) -> Option<f64> {
        self.spec.register_for(quantity).and_then(|q| q.resolution)
    }

    fn describe(&self) -> String {
        self.description.clone()
    }

    fn last_answered_in_s(&self) -> Option<f64> {
        self.last_answered_s
    }

    fn health(&self) -> Option<LinkHealth> {
        Some(self.health)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// The request "unit 1, read 10 holding registers from 0": its CRC is sent low byte first,
    /// C5 CD. The frame is the worked example that circulates with the Modbus serial line
    /// specification (from memory; the CRC is the crate's, so this checks that the frame is
    /// laid out as the wire wants it).
    #[test]
    fn a_request_frame_is_laid_out_as_on_the_wire() {
        let frame = request_frame(1, Request::ReadHoldingRegisters(0, 10));
        assert_eq!(frame, [0x01, 0x03, 0x00, 0x00, 0x00, 0x0A, 0xC5, 0xCD]);
        assert!(check_crc(&frame).is_ok());
        let mut bad = frame.clone();
        bad[7] ^= 1;
        assert!(check_crc(&bad).is_err());
    }

    /// IEEE 754 binary32 of 230.0 is 0x43660000 (general IEEE 754 arithmetic: 230 = 1.796875 ·
    /// 2^7, exponent 134 = 0x86); in registers high word first, or low word first.
    #[test]
    fn a_float_is_read_in_either_word_order() {
        let hi = [0x4366, 0x0000];
        assert_eq!(
            decode(DataType::F32, WordOrder::HighFirst, &hi),
            Ok(Content::Number(230.0))
        );
        let lo = [0x0000, 0x4366];
        assert_eq!(
            decode(DataType::F32, WordOrder::LowFirst, &lo),
            Ok(Content::Number(230.0))
        );
        // A u32 of 0x0001_0000 is 65536, whichever word holds the 1.
        assert_eq!(
            decode(DataType::U32, WordOrder::HighFirst, &[1, 0]),
            Ok(Content::Number(65_536.0))
        );
        assert_eq!(
            decode(DataType::U32, WordOrder::LowFirst, &[0, 1]),
            Ok(Content::Number(65_536.0))
        );
        assert_eq!(
            decode(DataType::I16, WordOrder::HighFirst, &[0xFFFE]),
            Ok(Content::Number(-2.0))
        );
    }

    #[test]
    fn a_number_becomes_a_serial_as_the_plan_writes_it() {
        let n = decode(DataType::U32, WordOrder::HighFirst, &[0x0004, 0xEC32]).unwrap();
        assert_eq!(identity_text("TM16-{value}", &n), "TM16-322610");
        let t = Content::Text("2.1.4".into());
        assert_eq!(identity_text("{value}", &t), "2.1.4");
    }

    #[test]
    fn text_registers_and_their_mistakes() {
        let words = encode_text("TM-16", 4);
        assert_eq!(words, [0x544D, 0x2D31, 0x3600, 0x0000]);
        assert_eq!(
            decode(DataType::Ascii { words: 4 }, WordOrder::HighFirst, &words),
            Ok(Content::Text("TM-16".into()))
        );
        let e = decode(
            DataType::Ascii { words: 1 },
            WordOrder::HighFirst,
            &[0x07FF],
        )
        .unwrap_err();
        assert!(e.contains("not printable"), "{e}");
        let e = decode(DataType::F32, WordOrder::HighFirst, &[0x7FC0, 0]).unwrap_err();
        assert!(e.contains("not a finite number"), "{e}");
        let e = decode(DataType::U64, WordOrder::HighFirst, &[0, 0]).unwrap_err();
        assert!(e.contains("2 registers where a u64 takes 4"), "{e}");
        assert!(encode(DataType::U16, WordOrder::HighFirst, 70_000.0).is_err());
    }

    fn any_type() -> impl Strategy<Value = DataType> {
        prop_oneof![
            Just(DataType::U16),
            Just(DataType::I16),
            Just(DataType::U32),
            Just(DataType::I32),
            Just(DataType::U64),
            Just(DataType::F32),
            Just(DataType::F64),
        ]
    }

    proptest! {
        /// Every number a type can hold comes back as written, in both word orders.
        #[test]
        fn numbers_round_trip_through_registers(
            t in any_type(),
            low_first in any::<bool>(),
            x in -1.0e6f64..1.0e6,
        ) {
            let order = if low_first { WordOrder::LowFirst } else { WordOrder::HighFirst };
            let value = match t {
                DataType::U16 => x.abs().round() % 65_536.0,
                DataType::I16 => x.round() % 32_768.0,
                DataType::U32 | DataType::U64 => x.abs().round(),
                DataType::I32 => x.round(),
                DataType::F32 => f64::from(x as f32),
                _ => x,
            };
            let words = encode(t, order, value).unwrap();
            prop_assert_eq!(words.len(), usize::from(t.words()));
            prop_assert_eq!(decode(t, order, &words), Ok(Content::Number(value)));
        }

        /// Whatever a unit sends, reading it never panics: a value or a reason.
        #[test]
        fn any_registers_read_to_a_value_or_a_reason(
            t in any_type(),
            words in proptest::collection::vec(any::<u16>(), 0..6),
        ) {
            let _ = decode(t, WordOrder::HighFirst, &words);
            let _ = frame_end(&words.iter().flat_map(|w| w.to_be_bytes()).collect::<Vec<_>>());
        }
    }
}
