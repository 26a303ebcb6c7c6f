//! The `iec62056_21` link: the data readout of IEC 62056-21, mode C, through an optical probe
//! or a serial line.
//!
//! One readout: the sign-on request `/?ADDRESS!` at the sign-on rate, the meter's
//! identification `/XXXZIDENT` (manufacturer, baud-rate character Z, identification), the
//! acknowledgement `ACK 0 Z 0` that selects the data readout at the rate Z offers, the switch
//! to that rate, and the data message `STX block ! CR LF ETX BCC`, whose block check character
//! is the exclusive OR of every byte after STX up to and including ETX. Every quantity of a
//! sample comes from one readout (each data line is taken once; the next read of a quantity
//! already taken starts a new readout).
//!
//! The parser is defensive: a readout is bounded by the plan's `max_bytes`, and a wrong BCC, a
//! missing end of message, bytes before STX, a line that is no data set, or a value with
//! another unit than the plan's is an error that names the line.

use super::line::open_port;
use super::{DutLink, Identity, LinkError, LinkHealth};
use crate::plan::Quantity;
use crate::plan::readout_link::{IdentitySource, ReadMode, ReadoutLinkSpec};
use std::io::{Read, Write};
use std::sync::Arc;
use std::time::{Duration, Instant};

pub const SOH: u8 = 0x01;
pub const STX: u8 = 0x02;
pub const ETX: u8 = 0x03;
pub const ACK: u8 = 0x06;
pub const NAK: u8 = 0x15;

/// A programming-mode command: `SOH C D STX data ETX BCC` (or without `STX data` where
/// `data` is `None`), the BCC over every byte after SOH.
pub fn command(c: u8, d: u8, data: Option<&str>) -> Vec<u8> {
    let mut m = vec![SOH, c, d];
    if let Some(data) = data {
        m.push(STX);
        m.extend_from_slice(data.as_bytes());
    }
    m.push(ETX);
    m.push(bcc(&m[1..]));
    m
}

/// Reads a programming-mode data message `STX data ETX BCC` (the answer to a read command, or
/// the operand after `SOH P0`): the data between the brackets, `OBIS(VALUE*UNIT)`.
pub fn parse_data_message(message: &[u8]) -> Result<String, ReadoutError> {
    let start = message.iter().position(|b| *b == STX).ok_or_else(|| {
        ReadoutError::GarbageBeforeStx(message.len(), String::from_utf8_lossy(message).into_owned())
    })?;
    let etx = message
        .iter()
        .position(|b| *b == ETX)
        .ok_or(ReadoutError::Unterminated(message.len()))?;
    let got = *message
        .get(etx + 1)
        .ok_or(ReadoutError::Unterminated(message.len()))?;
    // After SOH where the message has one, else after STX.
    let from = if message.first() == Some(&SOH) {
        1
    } else {
        start + 1
    };
    let want = bcc(&message[from..=etx]);
    if got != want {
        return Err(ReadoutError::Bcc { got, want });
    }
    Ok(String::from_utf8_lossy(&message[start + 1..etx]).into_owned())
}

/// The block check character: the exclusive OR of `bytes` (those after STX or SOH, up to and
/// including ETX).
pub fn bcc(bytes: &[u8]) -> u8 {
    bytes.iter().fold(0, |a, b| a ^ b)
}

/// The baud rate a mode C baud-rate character stands for.
pub fn baud_of(c: u8) -> Option<u32> {
    match c {
        b'0' => Some(300),
        b'1' => Some(600),
        b'2' => Some(1200),
        b'3' => Some(2400),
        b'4' => Some(4800),
        b'5' => Some(9600),
        b'6' => Some(19_200),
        _ => None,
    }
}

/// One data set of a readout: `OBIS(VALUE*UNIT)`, with the line it stood on (from 1).
#[derive(Debug, Clone, PartialEq)]
pub struct DataSet {
    pub line: usize,
    pub obis: String,
    pub value: String,
    pub unit: Option<String>,
    /// The line as received, for messages.
    pub text: String,
}

/// The meter's identification message, taken apart.
#[derive(Debug, Clone, PartialEq)]
pub struct Identification {
    pub manufacturer: String,
    pub baud_char: u8,
    pub ident: String,
}

/// What is wrong with a readout.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ReadoutError {
    #[error("the identification {0:?} is not `/XXXZ...` (three letters, a baud-rate character)")]
    Identification(String),
    #[error("{0} bytes before STX after the baud switch ({1:?})")]
    GarbageBeforeStx(usize, String),
    #[error("the message stopped after {0} bytes, before its end")]
    Stopped(usize),
    #[error("the readout has no end (no ETX within {0} bytes)")]
    Unterminated(usize),
    #[error("block check character 0x{got:02X}, the block gives 0x{want:02X}")]
    Bcc { got: u8, want: u8 },
    #[error("the data block does not end with the end-of-message line `!`")]
    NoEndOfMessage,
    #[error("line {line} of the readout, {text:?}: {why}")]
    Line {
        line: usize,
        text: String,
        why: String,
    },
}

/// Reads an identification line (without its CR LF).
pub fn parse_identification(line: &str) -> Result<Identification, ReadoutError> {
    let bad = || ReadoutError::Identification(line.to_string());
    let rest = line.strip_prefix('/').ok_or_else(bad)?;
    let bytes = rest.as_bytes();
    if bytes.len() < 4 || !bytes[..3].iter().all(u8::is_ascii_alphabetic) {
        return Err(bad());
    }
    let baud_char = bytes[3];
    baud_of(baud_char).ok_or_else(bad)?;
    let mut ident = &rest[4..];
    // An enhanced-capability sequence `\W` may stand before the identification.
    if let Some(after) = ident.strip_prefix('\\') {
        ident = after.get(1..).unwrap_or("");
    }
    Ok(Identification {
        manufacturer: rest[..3].to_string(),
        baud_char,
        ident: ident.to_string(),
    })
}

/// Reads a whole data message, from STX to the BCC, into its data sets.
pub fn parse_message(message: &[u8]) -> Result<Vec<DataSet>, ReadoutError> {
    let start = message.iter().position(|b| *b == STX);
    match start {
        Some(0) => {}
        Some(n) => {
            return Err(ReadoutError::GarbageBeforeStx(
                n,
                String::from_utf8_lossy(&message[..n.min(32)]).into_owned(),
            ));
        }
        None => {
            return Err(ReadoutError::GarbageBeforeStx(
                message.len(),
                String::from_utf8_lossy(&message[..message.len().min(32)]).into_owned(),
            ));
        }
    }
    let etx = message
        .iter()
        .position(|b| *b == ETX)
        .ok_or(ReadoutError::Unterminated(message.len()))?;
    let got = *message
        .get(etx + 1)
        .ok_or(ReadoutError::Unterminated(message.len()))?;
    let want = bcc(&message[1..=etx]);
    if got != want {
        return Err(ReadoutError::Bcc { got, want });
    }
    let block = String::from_utf8_lossy(&message[1..etx]).into_owned();
    let lines: Vec<&str> = block.split("\r\n").collect();
    // The block ends with "!" CR LF: the split leaves "!" and an empty tail.
    let ends =
        lines.len() >= 2 && lines[lines.len() - 1].is_empty() && lines[lines.len() - 2] == "!";
    if !ends {
        return Err(ReadoutError::NoEndOfMessage);
    }
    let mut out = Vec::new();
    for (i, text) in lines[..lines.len() - 2].iter().enumerate() {
        out.extend(data_sets(i + 1, text)?);
    }
    Ok(out)
}

/// The data sets of one line: `OBIS(VALUE[*UNIT])`, several to a line allowed.
fn data_sets(line: usize, text: &str) -> Result<Vec<DataSet>, ReadoutError> {
    let bad = |why: &str| ReadoutError::Line {
        line,
        text: text.to_string(),
        why: why.to_string(),
    };
    let mut out = Vec::new();
    let mut rest = text;
    while !rest.is_empty() {
        let open = rest
            .find('(')
            .ok_or_else(|| bad("no `(` after the address"))?;
        let close = rest[open..]
            .find(')')
            .map(|c| open + c)
            .ok_or_else(|| bad("a `(` without its `)`"))?;
        let address = rest[..open].trim();
        let inner = &rest[open + 1..close];
        let (value, unit) = match inner.split_once('*') {
            Some((v, u)) => (v, Some(u.to_string())),
            None => (inner, None),
        };
        // A data set may carry more values in further brackets (a time stamp): the first is
        // the register's.
        let mut after = &rest[close + 1..];
        while after.starts_with('(') {
            let c = after
                .find(')')
                .ok_or_else(|| bad("a `(` without its `)`"))?;
            after = &after[c + 1..];
        }
        if address.is_empty() && out.is_empty() {
            return Err(bad("a value with no address"));
        }
        if !address.is_empty() {
            out.push(DataSet {
                line,
                obis: address.to_string(),
                value: value.to_string(),
                unit,
                text: text.to_string(),
            });
        }
        rest = after;
    }
    Ok(out)
}

/// Whether a data line's address is the plan's OBIS code: equal, or equal once the line's
/// `A-B:` medium and channel (or `*F` billing period) that the plan leaves out are left out.
pub fn same_obis(line: &str, plan: &str) -> bool {
    let core = |s: &str| -> String {
        let s = s.split_once(':').map_or(s, |(_, r)| r);
        s.split(['*', '&']).next().unwrap_or("").to_string()
    };
    line == plan || (!plan.contains(':') && !plan.contains('*') && core(line) == core(plan))
}

/// A unit reached by the IEC 62056-21 readout.
pub struct ReadoutLink {
    port: Box<dyn serialport::SerialPort>,
    path: String,
    spec: Arc<ReadoutLinkSpec>,
    /// The newest readout's data sets, and the quantities already taken from it.
    last: Option<(Identification, Vec<DataSet>)>,
    taken: Vec<Quantity>,
    health: LinkHealth,
    /// The exchange the newest reading was taken in: a readout's values stand for the time
    /// from its acknowledgement to the end of its message, a register's for its request.
    last_exchange: Option<super::Exchange>,
    /// In register mode: the identification of the open programming session, if one is open.
    session: Option<Identification>,
}

impl Drop for ReadoutLink {
    /// Ends an open programming session (`SOH B0 ETX BCC`), so the meter does not wait for its
    /// inactivity timeout before it can be read again.
    fn drop(&mut self) {
        if self.session.is_some() {
            let _ = self.port.write_all(&command(b'B', b'0', None));
            let _ = self.port.flush();
        }
    }
}

/// Why one attempt failed.
enum Attempt {
    NoReply,
    /// The meter answered with an error message of its own: asking again will not change it.
    Refused(String),
    Bad(ReadoutError),
    Gone(String),
}

impl ReadoutLink {
    pub fn open(path: &str, spec: Arc<ReadoutLinkSpec>) -> Result<ReadoutLink, LinkError> {
        let port = open_port(path, spec.port)?;
        Ok(ReadoutLink::on_port(port, path, spec))
    }

    /// The link on a port already open (a tapped one, for `try-link`).
    pub fn on_port(
        port: Box<dyn serialport::SerialPort>,
        path: &str,
        spec: Arc<ReadoutLinkSpec>,
    ) -> ReadoutLink {
        ReadoutLink {
            port,
            path: path.to_string(),
            spec,
            last: None,
            taken: Vec::new(),
            health: LinkHealth::default(),
            last_exchange: None,
            session: None,
        }
    }

    /// Reads bytes until `done` says the message is whole, no byte arriving for the timeout
    /// ends it, and more than `max` bytes is an error.
    fn receive(&mut self, max: usize, done: impl Fn(&[u8]) -> bool) -> Result<Vec<u8>, Attempt> {
        let quiet = Duration::from_secs_f64(self.spec.timeout_s);
        let mut buf = Vec::new();
        let mut chunk = [0u8; 512];
        let mut last_byte = Instant::now();
        loop {
            if done(&buf) {
                return Ok(buf);
            }
            if buf.len() > max {
                return Err(Attempt::Bad(ReadoutError::Unterminated(max)));
            }
            if last_byte.elapsed() >= quiet {
                return Err(if buf.is_empty() {
                    Attempt::NoReply
                } else {
                    Attempt::Bad(ReadoutError::Stopped(buf.len()))
                });
            }
            match self.port.read(&mut chunk) {
                Ok(0) => {}
                Ok(n) => {
                    buf.extend_from_slice(&chunk[..n]);
                    last_byte = Instant::now();
                }
                Err(e) if e.kind() == std::io::ErrorKind::TimedOut => {}
                Err(e) => return Err(Attempt::Gone(e.to_string())),
            }
        }
    }

    fn send(&mut self, bytes: &[u8]) -> Result<(), Attempt> {
        self.port
            .write_all(bytes)
            .and_then(|_| self.port.flush())
            .map_err(|e| Attempt::Gone(e.to_string()))
    }

    /// The sign-on: the request at the sign-on rate, the identification, and the
    /// acknowledgement selecting `mode` (`b'0'` data readout, `b'1'` programming) at the rate
    /// the meter offers (or the sign-on rate), switched to. Returns the identification and the
    /// moment of the acknowledgement.
    fn sign_on(&mut self, mode: u8) -> Result<(Identification, Instant), Attempt> {
        let sign_on = self.spec.port.baud;
        self.port
            .set_baud_rate(sign_on)
            .map_err(|e| Attempt::Gone(e.to_string()))?;
        let _ = self.port.clear(serialport::ClearBuffer::Input);
        self.send(format!("/?{}!\r\n", self.spec.device_address).as_bytes())?;
        let line = self.receive(256, |b| b.ends_with(b"\r\n"))?;
        let text = String::from_utf8_lossy(&line[..line.len() - 2]).into_owned();
        let id = parse_identification(&text).map_err(Attempt::Bad)?;
        let (z, rate) = if self.spec.switch_baud {
            (
                id.baud_char,
                baud_of(id.baud_char).expect("checked by the parser"),
            )
        } else {
            (b'0', sign_on)
        };
        self.send(&[ACK, b'0', z, mode, b'\r', b'\n'])?;
        let acknowledged = Instant::now();
        if rate != sign_on {
            self.port
                .set_baud_rate(rate)
                .map_err(|e| Attempt::Gone(e.to_string()))?;
        }
        Ok((id, acknowledged))
    }

    /// A whole message up to its BCC (ETX and one byte more), or a lone NAK.
    fn receive_message(&mut self, max: usize) -> Result<Vec<u8>, Attempt> {
        self.receive(max, |b| {
            b.first() == Some(&NAK)
                || b.iter()
                    .position(|x| *x == ETX)
                    .is_some_and(|e| b.len() > e + 1)
        })
    }

    /// One whole readout.
    fn readout_once(&mut self) -> Result<(Identification, Vec<DataSet>), Attempt> {
        // The meter takes its values once acknowledged: the readings stand for the time from
        // the acknowledgement to the end of the message, not for the sign-on before it.
        let (id, acknowledged) = self.sign_on(b'0')?;
        let max = self.spec.max_bytes;
        let message = self.receive(max, |b| {
            b.iter()
                .position(|x| *x == ETX)
                .is_some_and(|e| b.len() > e + 1)
        })?;
        let sets = parse_message(&message).map_err(Attempt::Bad)?;
        self.last_exchange = Some(super::Exchange::since(acknowledged));
        Ok((id, sets))
    }

    /// A readout, with the link's retries.
    fn readout(&mut self, what: &str) -> Result<(), LinkError> {
        let attempts = self.spec.retries + 1;
        let mut last = None;
        for attempt in 1..=attempts {
            self.health.requests += 1;
            if attempt > 1 {
                self.health.retries += 1;
            }
            match self.readout_once() {
                Ok(r) => {
                    self.last = Some(r);
                    self.taken.clear();
                    return Ok(());
                }
                Err(e) => last = Some(self.failed(e, what)?),
            }
        }
        Err(last.expect("at least one attempt"))
    }

    /// One register read in programming mode (`R1`), signing on first where no session is
    /// open: the data set the meter answers.
    fn register_once(&mut self, obis: &str) -> Result<DataSet, Attempt> {
        if self.session.is_none() {
            let (id, _) = self.sign_on(b'1')?;
            // The meter answers with its operand (`SOH P0 STX (…) ETX BCC`); no password is
            // sent, so only registers readable without one can be read.
            let operand = self.receive_message(256)?;
            parse_data_message(&operand).map_err(Attempt::Bad)?;
            self.session = Some(id);
        }
        let asked = Instant::now();
        self.send(&command(b'R', b'1', Some(&format!("{obis}()"))))?;
        let reply = self.receive_message(1024)?;
        self.last_exchange = Some(super::Exchange::since(asked));
        if reply.first() == Some(&NAK) {
            return Err(Attempt::Bad(ReadoutError::Line {
                line: 1,
                text: format!("{obis}()"),
                why: "the meter refused the request (NAK)".into(),
            }));
        }
        let data = parse_data_message(&reply).map_err(Attempt::Bad)?;
        if data.starts_with('(') {
            return Err(Attempt::Refused(format!(
                "it answered {data} for register {obis}"
            )));
        }
        let sets = data_sets(1, &data).map_err(Attempt::Bad)?;
        sets.into_iter()
            .find(|s| same_obis(&s.obis, obis))
            .ok_or_else(|| {
                Attempt::Bad(ReadoutError::Line {
                    line: 1,
                    text: data.clone(),
                    why: format!("the answer is not register {obis} (an error message?)"),
                })
            })
    }

    /// A register read with the link's retries; a failed attempt closes the session, so the
    /// next signs on afresh.
    fn register(&mut self, obis: &str, what: &str) -> Result<DataSet, LinkError> {
        let attempts = self.spec.retries + 1;
        let mut last = None;
        for attempt in 1..=attempts {
            self.health.requests += 1;
            if attempt > 1 {
                self.health.retries += 1;
            }
            match self.register_once(obis) {
                Ok(set) => return Ok(set),
                Err(e) => {
                    self.session = None;
                    last = Some(self.failed(e, what)?);
                }
            }
        }
        Err(last.expect("at least one attempt"))
    }

    /// What a failed attempt is, counted; `Err` where trying again is no use.
    fn failed(&mut self, e: Attempt, what: &str) -> Result<LinkError, LinkError> {
        match e {
            Attempt::NoReply => Ok(LinkError::Timeout {
                request: what.to_string(),
                timeout_ms: (self.spec.timeout_s * 1000.0).round() as u64,
                attempts: self.spec.retries + 1,
            }),
            Attempt::Bad(e) => {
                if matches!(e, ReadoutError::Bcc { .. }) {
                    self.health.crc_errors += 1;
                } else {
                    self.health.not_understood += 1;
                }
                Ok(LinkError::Garbled {
                    request: what.to_string(),
                    reply: String::new(),
                    why: e.to_string(),
                })
            }
            Attempt::Refused(why) => {
                self.health.exceptions += 1;
                Err(LinkError::Refused {
                    request: what.to_string(),
                    why,
                })
            }
            Attempt::Gone(why) => Err(LinkError::Disconnected(why)),
        }
    }

    fn data_set(&self, obis: &str) -> Option<&DataSet> {
        self.last
            .as_ref()
            .and_then(|(_, sets)| sets.iter().find(|s| same_obis(&s.obis, obis)))
    }

    fn identity_field(&self, what: &str, source: &IdentitySource) -> Result<String, LinkError> {
        match source {
            IdentitySource::Identification => Ok(self
                .last
                .as_ref()
                .map(|(id, _)| id.ident.trim().to_string())
                .unwrap_or_default()),
            IdentitySource::Obis(code) => self
                .data_set(code)
                .map(|s| s.value.trim().to_string())
                .ok_or_else(|| LinkError::Garbled {
                    request: format!("read {what}"),
                    reply: String::new(),
                    why: format!("the readout has no data line {code}"),
                }),
        }
    }
}

impl DutLink for ReadoutLink {
    fn begin_sample(&mut self) {
        self.last = None;
        self.taken.clear();
    }

    fn identify(&mut self) -> Result<Identity, LinkError> {
        let spec = self.spec.clone();
        if spec.read == ReadMode::Register {
            let mut field = |what: &str, source: &IdentitySource| -> Result<String, LinkError> {
                match source {
                    IdentitySource::Obis(code) => self
                        .register(code, &format!("read {what} ({code})"))
                        .map(|s| s.value.trim().to_string()),
                    IdentitySource::Identification => {
                        if self.session.is_none() {
                            // Any register signs on; the identification comes with it.
                            let _ = self.register("0.0.0", &format!("read {what}"));
                        }
                        self.session
                            .as_ref()
                            .map(|id| id.ident.trim().to_string())
                            .ok_or_else(|| LinkError::Timeout {
                                request: format!("read {what}"),
                                timeout_ms: (spec.timeout_s * 1000.0).round() as u64,
                                attempts: spec.retries + 1,
                            })
                    }
                }
            };
            return Ok(Identity {
                model: field("the model", &spec.model)?,
                serial: field("the serial number", &spec.serial)?,
                firmware: field("the firmware version", &spec.firmware)?,
            });
        }
        self.readout("the identity (a readout)")?;
        let identity = Identity {
            model: self.identity_field("the model", &spec.model)?,
            serial: self.identity_field("the serial number", &spec.serial)?,
            firmware: self.identity_field("the firmware version", &spec.firmware)?,
        };
        // Its values were taken before any load: never readings.
        self.begin_sample();
        Ok(identity)
    }

    fn read(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError> {
        let spec = self.spec.clone();
        let Some(q) = spec.obis_for(quantity) else {
            return Err(LinkError::Unsupported {
                quantity: quantity.name().to_string(),
                channel: channel.to_string(),
            });
        };
        let what = format!("read {} ({})", quantity.name(), q.obis);
        let set = if spec.read == ReadMode::Register {
            self.register(&q.obis, &what)?
        } else {
            if self.last.is_none() || self.taken.contains(&quantity) {
                self.readout(&what)?;
            }
            self.taken.push(quantity);
            self.data_set(&q.obis)
                .cloned()
                .ok_or_else(|| LinkError::Garbled {
                    request: what.clone(),
                    reply: String::new(),
                    why: format!("the readout has no data line {}", q.obis),
                })?
        };
        let line_error = |why: String| LinkError::Garbled {
            request: what.clone(),
            reply: set.text.clone(),
            why: format!("line {}: {why}", set.line),
        };
        match (&q.unit, &set.unit) {
            (Some(want), Some(got)) if !want.eq_ignore_ascii_case(got) => {
                return Err(line_error(format!(
                    "the unit is {got}, the plan says {want}"
                )));
            }
            (Some(want), None) => {
                return Err(line_error(format!("no unit, the plan says {want}")));
            }
            _ => {}
        }
        let value: f64 = set
            .value
            .trim()
            .parse()
            .ok()
            .filter(|v: &f64| v.is_finite())
            .ok_or_else(|| line_error(format!("{:?} is not a number", set.value)))?;
        Ok(value * q.factor)
    }

    fn resolution(&self, quantity: Quantity) -> Option<f64> {
        self.spec.obis_for(quantity).and_then(|q| q.resolution)
    }

    fn describe(&self) -> String {
        match self.spec.read {
            ReadMode::Readout => format!("{} (IEC 62056-21 readout)", self.path),
            ReadMode::Register => format!("{} (IEC 62056-21, register by register)", self.path),
        }
    }

    fn last_exchange(&self) -> Option<super::Exchange> {
        // A register read is its own exchange; a readout's values are all of its one.
        self.last_exchange
    }

    fn health(&self) -> Option<LinkHealth> {
        Some(self.health)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The published test vector: SOH P 0 STX ( 1 2 3 4 5 6 7 ) ETX gives BCC 0x50, counted
    /// after SOH (IEC 62056-21 block check; the vector as given in the project's domain notes).
    #[test]
    fn the_block_check_of_the_published_vector() {
        let after_soh = b"P0\x02(1234567)\x03";
        assert_eq!(bcc(after_soh), 0x50);
        // The same message as the link builds it, and read back.
        let m = command(b'P', b'0', Some("(1234567)"));
        assert_eq!(m, b"\x01P0\x02(1234567)\x03\x50");
        assert_eq!(parse_data_message(&m).unwrap(), "(1234567)");
        let mut bad = m.clone();
        bad[4] = b'9';
        assert!(matches!(
            parse_data_message(&bad),
            Err(ReadoutError::Bcc { .. })
        ));
    }

    /// A data block of two lines and the end line gives BCC 0x43 (computed with the published
    /// rule, in the project's domain notes), and reads back as its two data sets.
    #[test]
    fn a_readout_parses_and_its_check_holds() {
        let block = b"1.8.0(000123.456*kWh)\r\n0.0.0(12345678)\r\n!\r\n\x03";
        assert_eq!(bcc(block), 0x43);
        let mut message = vec![STX];
        message.extend_from_slice(block);
        message.push(0x43);
        let sets = parse_message(&message).unwrap();
        assert_eq!(sets.len(), 2);
        assert_eq!(sets[0].obis, "1.8.0");
        assert_eq!(sets[0].value, "000123.456");
        assert_eq!(sets[0].unit.as_deref(), Some("kWh"));
        assert_eq!((sets[1].line, sets[1].unit.clone()), (2, None));
        // One bit off in the check, or in the block.
        let last = message.len() - 1;
        message[last] = 0x42;
        assert_eq!(
            parse_message(&message),
            Err(ReadoutError::Bcc {
                got: 0x42,
                want: 0x43
            })
        );
    }

    fn message(block: &str) -> Vec<u8> {
        let mut m = vec![STX];
        m.extend_from_slice(block.as_bytes());
        m.push(ETX);
        m.push(bcc(&m[1..]));
        m
    }

    #[test]
    fn each_defect_of_a_readout_is_named() {
        assert_eq!(
            parse_message(&message("1.8.0(1*kWh)\r\n")),
            Err(ReadoutError::NoEndOfMessage)
        );
        let mut garbage = b"\xff\xfe".to_vec();
        garbage.extend(message("!\r\n"));
        assert!(matches!(
            parse_message(&garbage),
            Err(ReadoutError::GarbageBeforeStx(2, _))
        ));
        let e = parse_message(&message("1.8.0(1*kWh)\r\n32.7.0 230.1 V\r\n!\r\n")).unwrap_err();
        assert_eq!(
            e.to_string(),
            "line 2 of the readout, \"32.7.0 230.1 V\": no `(` after the address"
        );
        let e = parse_message(&message("1.8.0(1*kWh\r\n!\r\n")).unwrap_err();
        assert!(
            e.to_string().contains("line 1") && e.to_string().contains("without its `)`"),
            "{e}"
        );
        assert!(matches!(
            parse_message(b"\x021.8.0(1)\r\n!\r\n"),
            Err(ReadoutError::Unterminated(_))
        ));
        // Several data sets to a line, and a time stamp after a value.
        let sets =
            parse_message(&message("1.8.0(5*kWh)(2601011200)2.8.0(0*kWh)\r\n!\r\n")).unwrap();
        assert_eq!(
            sets.iter().map(|s| s.obis.as_str()).collect::<Vec<_>>(),
            ["1.8.0", "2.8.0"]
        );
    }

    #[test]
    fn identifications_and_obis_forms() {
        let id = parse_identification("/ABC5\\2TM-16").unwrap();
        assert_eq!(
            (id.manufacturer.as_str(), id.baud_char, id.ident.as_str()),
            ("ABC", b'5', "TM-16")
        );
        assert!(parse_identification("ABC5TM").is_err());
        assert!(parse_identification("/AB5TM").is_err());
        assert!(parse_identification("/ABC9TM").is_err());
        assert!(same_obis("1-0:1.8.0", "1.8.0"));
        assert!(same_obis("1.8.0*01", "1.8.0"));
        assert!(!same_obis("1.8.1", "1.8.0"));
        assert!(!same_obis("1-0:1.8.0", "1-1:1.8.0"));
    }
}
