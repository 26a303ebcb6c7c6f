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
use crate::link::readout::{ACK, ETX, STX, baud_of, bcc};
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
}

impl ReadoutMeter {
    pub fn new(meter: SimMeterHandle, faults: Faults) -> ReadoutMeter {
        ReadoutMeter {
            meter,
            faults,
            requests: 0,
            dead: false,
        }
    }

    /// The identification message, CR LF included.
    fn identification(&self) -> Vec<u8> {
        format!("/TMQ5{}\r\n", self.meter.identity().model).into_bytes()
    }

    /// The data message: STX, the data lines, `!`, ETX and the BCC.
    pub fn message(&self) -> Vec<u8> {
        let id = self.meter.identity();
        let firmware = self.faults.firmware.clone().unwrap_or(id.firmware);
        let mut block = format!(
            "0.0.0({serial})\r\nC.1.0({serial})\r\n0.2.0({firmware})\r\n",
            serial = id.serial
        );
        for (obis, q, unit, factor) in LINES {
            let v = self.meter.read_value(q) * factor;
            if unit.is_empty() {
                block.push_str(&format!("{obis}({v:.6})\r\n"));
            } else {
                block.push_str(&format!("{obis}({v:.6}*{unit})\r\n"));
            }
        }
        block.push_str("!\r\n");
        let mut m = vec![STX];
        m.extend_from_slice(block.as_bytes());
        m.push(ETX);
        let check = bcc(&m[1..]);
        m.push(check);
        m
    }

    /// Answers what `pending` holds once it is a whole request: the sign-on (the
    /// identification) or the acknowledgement (the data message, with the baud rate it is to
    /// be sent at). `None` while incomplete.
    fn take(&mut self, pending: &mut Vec<u8>) -> Option<(Vec<u8>, u32)> {
        let end = pending.windows(2).position(|w| w == b"\r\n")? + 2;
        let request: Vec<u8> = pending.drain(..end).collect();
        if request.first() == Some(&b'/') {
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
            return Some((self.identification(), SIGN_ON_BAUD));
        }
        if request.first() == Some(&ACK) && !self.dead {
            // ACK V Z Y: the data go at the rate Z selects.
            let rate = request
                .get(2)
                .copied()
                .and_then(baud_of)
                .unwrap_or(SIGN_ON_BAUD);
            let mut m = self.message();
            let n = self.requests;
            if self
                .faults
                .garble_every
                .is_some_and(|k| k > 0 && n.is_multiple_of(k))
            {
                // A wrong block check: the message arrives whole, its check fails.
                let last = m.len() - 1;
                m[last] ^= 0x21;
            }
            return Some((m, rate));
        }
        Some((Vec::new(), SIGN_ON_BAUD))
    }
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
