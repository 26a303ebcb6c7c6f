//! A simulated meter answering the IEC 62056-21 readout (mode C) on a pseudo-terminal, from the
//! same simulated world as every other simulated meter.
//!
//! Its identification is `/TMQ5TM-16` (TMQ: an invented manufacturer's letters; 5: it offers
//! 9600 baud) and its readout the data lines of DEVELOPERS.md, "The TM-16 readout"; the plan
//! `test-plans/demo-readout.yaml` describes it. The baud switch has no effect
//! on the bytes of a pseudo-terminal, but its settings show it: the meter answers the sign-on
//! only at 300 baud and sends its data at the rate it offered, and a reader at another rate
//! gets noise, as on a real line.

use super::SimMeterHandle;
use super::device::{Faults, PtyDevice, serve_frames};
use crate::link::readout::{ACK, ETX, NAK, SOH, STX, baud_of, bcc};
use crate::plan::Quantity;
use std::io;
use std::time::Duration;

/// The data lines of the readout: OBIS code, quantity, unit and the factor from the base unit.
pub const LINES: [(&str, Quantity, &str, f64); 8] = [
    ("32.7.0", Quantity::Voltage, "V", 1.0),
    ("31.7.0", Quantity::Current, "A", 1.0),
    ("21.7.0", Quantity::ActivePower, "kW", 0.001),
    ("23.7.0", Quantity::ReactivePower, "kvar", 0.001),
    ("29.7.0", Quantity::ApparentPower, "kVA", 0.001),
    ("33.7.0", Quantity::PowerFactor, "", 1.0),
    ("14.7.0", Quantity::Frequency, "Hz", 1.0),
    ("1.8.0", Quantity::ActiveEnergy, "kWh", 0.001),
];

/// The meter's side of the protocol, apart from any port.
pub struct ReadoutMeter {
    meter: SimMeterHandle,
    faults: Faults,
    requests: u64,
    dead: bool,
    /// The rate of an open programming session, where one is open.
    programming: Option<u32>,
}

impl ReadoutMeter {
    pub fn new(meter: SimMeterHandle, faults: Faults) -> ReadoutMeter {
        ReadoutMeter {
            meter,
            faults,
            requests: 0,
            dead: false,
            programming: None,
        }
    }

    /// The identification message, CR LF included.
    fn identification(&self) -> Vec<u8> {
        format!("/TMQ5{}\r\n", self.meter.identity().model).into_bytes()
    }

    /// The data sets, `OBIS(VALUE*UNIT)`, in readout order.
    fn data_sets(&self) -> Vec<String> {
        let id = self.meter.identity();
        let firmware = self.faults.firmware.clone().unwrap_or(id.firmware);
        let mut sets = vec![
            format!("0.0.0({})", id.serial),
            format!("C.1.0({})", id.serial),
            format!("0.2.0({firmware})"),
        ];
        for (obis, q, unit, factor) in LINES {
            let v = self.meter.read_value(q) * factor;
            sets.push(if unit.is_empty() {
                format!("{obis}({v:.6})")
            } else {
                format!("{obis}({v:.6}*{unit})")
            });
        }
        sets
    }

    /// The data message: STX, the data lines, `!`, ETX and the BCC.
    pub fn message(&self) -> Vec<u8> {
        let mut block: String = self
            .data_sets()
            .iter()
            .map(|l| format!("{l}\r\n"))
            .collect();
        block.push_str("!\r\n");
        framed(&block)
    }

    /// Whether this request's reply gets a wrong block check.
    fn garbles(&self) -> bool {
        let n = self.requests;
        self.faults
            .garble_every
            .is_some_and(|k| k > 0 && n.is_multiple_of(k))
    }

    /// A programming-mode command `SOH C D [STX data] ETX BCC`: a read (`R1`) answered with
    /// its register, the break (`B0`) closing the session; a bad BCC answered NAK.
    fn command(&mut self, request: &[u8]) -> Vec<u8> {
        let etx = request.len() - 2;
        if bcc(&request[1..=etx]) != request[etx + 1] {
            return vec![NAK];
        }
        match (request.get(1), request.get(2)) {
            (Some(b'B'), Some(b'0')) => {
                self.programming = None;
                Vec::new()
            }
            (Some(b'R'), Some(b'1')) if request.get(3) == Some(&STX) => {
                self.requests += 1;
                let asked = String::from_utf8_lossy(&request[4..etx]).into_owned();
                let address = asked.trim_end_matches("()");
                let answer = self
                    .data_sets()
                    .into_iter()
                    .find(|set| set.split('(').next() == Some(address))
                    .unwrap_or_else(|| "(ERROR)".into());
                let mut m = framed(&answer);
                if self.garbles() {
                    let last = m.len() - 1;
                    m[last] ^= 0x21;
                }
                m
            }
            _ => vec![NAK],
        }
    }

    /// Answers what `pending` holds once it is a whole request: the sign-on (the
    /// identification) or the acknowledgement (the data message, with the baud rate it is to
    /// be sent at). `None` while incomplete.
    fn take(&mut self, pending: &mut Vec<u8>) -> Option<(Vec<u8>, u32)> {
        if pending.first() == Some(&SOH) {
            // A command ends one byte after its ETX.
            let end = pending.iter().position(|b| *b == ETX)? + 2;
            if pending.len() < end {
                return None;
            }
            let request: Vec<u8> = pending.drain(..end).collect();
            let rate = self.programming.unwrap_or(SIGN_ON_BAUD);
            if self.dead || self.programming.is_none() {
                return Some((Vec::new(), rate));
            }
            return Some((self.command(&request), rate));
        }
        let end = pending.windows(2).position(|w| w == b"\r\n")? + 2;
        let request: Vec<u8> = pending.drain(..end).collect();
        if request.first() == Some(&b'/') {
            // A sign-on ends any session.
            self.programming = None;
            self.requests += 1;
            let n = self.requests;
            let every = |k: Option<u64>| k.is_some_and(|k| k > 0 && n.is_multiple_of(k));
            if self.dead || self.faults.die_after.is_some_and(|d| n > d) {
                self.dead = true;
                return Some((Vec::new(), SIGN_ON_BAUD));
            }
            if every(self.faults.drop_every) || self.faults.reboot_after == Some(n) {
                return Some((Vec::new(), SIGN_ON_BAUD));
            }
            // `/?!` for whichever meter is there, `/?ADDRESS!` for this one only: its device
            // address is its serial number.
            let asked = String::from_utf8_lossy(&request).into_owned();
            let address = asked
                .trim_end()
                .strip_prefix("/?")
                .and_then(|a| a.strip_suffix('!'))
                .unwrap_or("");
            if !address.is_empty() && address != self.meter.identity().serial {
                return Some((Vec::new(), SIGN_ON_BAUD));
            }
            return Some((self.identification(), SIGN_ON_BAUD));
        }
        if request.first() == Some(&ACK) && !self.dead {
            // ACK V Z Y: the data go at the rate Z selects.
            let rate = request
                .get(2)
                .copied()
                .and_then(baud_of)
                .unwrap_or(SIGN_ON_BAUD);
            // ACK V Z 1: programming mode, the operand (the serial) first.
            if request.get(3) == Some(&b'1') {
                self.programming = Some(rate);
                let operand =
                    command_message(b'P', b'0', &format!("({})", self.meter.identity().serial));
                return Some((operand, rate));
            }
            self.programming = None;
            let mut m = self.message();
            if self.garbles() {
                // A wrong block check: the message arrives whole, its check fails.
                let last = m.len() - 1;
                m[last] ^= 0x21;
            }
            return Some((m, rate));
        }
        Some((Vec::new(), SIGN_ON_BAUD))
    }
}

/// `STX text ETX BCC`.
fn framed(text: &str) -> Vec<u8> {
    let mut m = vec![STX];
    m.extend_from_slice(text.as_bytes());
    m.push(ETX);
    let check = bcc(&m[1..]);
    m.push(check);
    m
}

/// `SOH C D STX text ETX BCC`, the check over every byte after SOH.
fn command_message(c: u8, d: u8, text: &str) -> Vec<u8> {
    crate::link::readout::command(c, d, Some(text))
}

/// Serves the meter on a pseudo-terminal until dropped.
pub fn spawn(mut meter: ReadoutMeter) -> io::Result<PtyDevice> {
    PtyDevice::spawn_serving(move |port, stop, requests| {
        serve_frames(
            port,
            stop,
            requests,
            Duration::from_millis(10),
            false,
            |port, pending| {
                let (reply, rate) = meter.take(pending)?;
                if reply.is_empty() {
                    return Some(reply);
                }
                if !meter.faults.slow.is_zero() {
                    std::thread::sleep(meter.faults.slow);
                }
                // A pseudo-terminal carries bytes at any rate, but its settings show the rate the
                // other side set: a reader at another rate than the meter sends at would receive
                // noise on a real line, and receives noise here.
                Some(if line_at(port, rate) {
                    reply
                } else {
                    vec![0x7F, 0x00, 0x7F, 0x78, 0x00]
                })
            },
        )
    })
}

/// The sign-on rate of mode C.
const SIGN_ON_BAUD: u32 = 300;

/// Whether the other side has its line at `rate`, allowing it a moment to switch (a meter
/// waits its reaction time before answering).
fn line_at(port: &serialport::TTYPort, rate: u32) -> bool {
    for _ in 0..100 {
        if serialport::SerialPort::baud_rate(port).is_ok_and(|b| b == rate) {
            return true;
        }
        std::thread::sleep(Duration::from_millis(2));
    }
    false
}
