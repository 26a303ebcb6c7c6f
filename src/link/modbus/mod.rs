//! The `modbus` link: Modbus RTU over a serial line, several units on one bus.
//!
//! Framing and CRC are the `modbus-core` crate's; this module owns the bus (one port, one
//! transaction at a time, the silence between frames), the retries, and the reading of values
//! out of registers as the plan describes them (`plan::modbus_link`). Positions on one bus share
//! a [`SharedBus`]: their transactions are serialised by its lock, taken for one attempt at a
//! time, so a silent unit holds the others up by at most its timeout per attempt. Positions on
//! different buses run in parallel.

mod registers;

pub use registers::{Content, decode, encode, encode_text, identity_text};

use super::line::open_port;
use super::{DutLink, Identity, LinkError, LinkHealth};
use crate::plan::Quantity;
use crate::plan::modbus_link::{IdentityField, ModbusLinkSpec, Register, Table};
use modbus_core::rtu::{self, Header, RequestAdu};
use modbus_core::{Data, Exception, Request, RequestPdu, Response};
use std::io::{Read, Write};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

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
        Ok(Bus::on_port(open_port(path, spec.port)?, path, spec))
    }

    /// The bus on a port already open (a tapped one, for `try-link`).
    pub fn on_port(
        port: Box<dyn serialport::SerialPort>,
        path: &str,
        spec: &ModbusLinkSpec,
    ) -> SharedBus {
        let gap = Duration::from_secs_f64(spec.frame_silence_s().max(spec.turnaround_s));
        Arc::new(Mutex::new(Bus {
            port,
            path: path.to_string(),
            gap,
            quiet_since: Instant::now(),
        }))
    }

    /// Sends one request frame and waits for the reply frame of `address`, up to `timeout`.
    fn exchange(
        &mut self,
        frame: &[u8],
        address: u8,
        timeout: Duration,
    ) -> Result<(Vec<u8>, super::Exchange), Attempt> {
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
                        break Ok((frame, super::Exchange::since(sent)));
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
    last_exchange: Option<super::Exchange>,
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
            last_exchange: None,
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
                    self.last_exchange = Some(took);
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

    fn last_exchange(&self) -> Option<super::Exchange> {
        self.last_exchange
    }

    fn health(&self) -> Option<LinkHealth> {
        Some(self.health)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

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

    proptest::proptest! {
        /// Whatever bytes arrive, finding the end of a reply never panics.
        #[test]
        fn any_bytes_give_a_frame_end_or_wait_or_a_reason(
            bytes in proptest::collection::vec(proptest::prelude::any::<u8>(), 0..40),
        ) {
            let _ = frame_end(&bytes);
        }
    }
}
