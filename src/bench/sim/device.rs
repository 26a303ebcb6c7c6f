//! A simulated meter on a pseudo-terminal, speaking the TM-16 text protocol (an invented
//! protocol, documented in DEVELOPERS.md), with faults to inject on request.
//!
//! The device answers from the same simulated world as the built-in bench, so a plan run through
//! real serial ports and the `text` link reads the same counts as one run on the `sim` link.

use super::SimMeterHandle;
use crate::plan::Quantity;
use std::io::{self, Read, Write};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::thread::JoinHandle;
use std::time::Duration;

/// Faults a simulated meter can be told to commit.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Faults {
    /// Ignore every Nth request (no reply at all).
    pub drop_every: Option<u64>,
    /// Corrupt the reply to every Nth request.
    pub garble_every: Option<u64>,
    /// Wait this long before each reply.
    pub slow: Duration,
    /// After this many requests, print a boot banner and forget the request in hand, as a
    /// meter that reset would.
    pub reboot_after: Option<u64>,
    /// Report this firmware version instead of the real one.
    pub firmware: Option<String>,
    /// After this many requests, stop answering for good (a unit that hung or lost power).
    pub die_after: Option<u64>,
    /// Echo every request before replying.
    pub echo: bool,
    /// Acknowledge constant writes without storing them (a firmware bug, or write protection).
    pub ignore_writes: bool,
    /// Answer every Nth request "busy" (a protocol with exception replies: Modbus 06).
    pub busy_every: Option<u64>,
    /// Behave as an interactive console: echo each character as it arrives, end lines with
    /// CRLF, show a "> " prompt (no line ending) when ready, and print a log line every third
    /// request until told `log off`.
    pub console: bool,
}

/// The prompt the simulated console shows.
pub const CONSOLE_PROMPT: &str = "> ";

/// The protocol's quantity codes.
pub fn quantity_code(q: Quantity) -> &'static str {
    match q {
        Quantity::Current => "I",
        Quantity::Voltage => "U",
        Quantity::ActivePower => "P",
        Quantity::ReactivePower => "Q",
        Quantity::ApparentPower => "S",
        Quantity::PowerFactor => "PF",
        Quantity::Frequency => "F",
        Quantity::ActiveEnergy => "E",
    }
}

fn quantity_from_code(code: &str) -> Option<Quantity> {
    Quantity::ALL
        .into_iter()
        .find(|q| quantity_code(*q) == code)
}

const BANNER: &[&str] = &["# TM-16 boot 0.9", "# metering core ready"];

/// A device that answers request lines: a simulated meter or instrument.
pub trait LineDevice: Send + 'static {
    /// Lines printed when the device starts.
    fn banner(&self) -> Vec<String> {
        Vec::new()
    }
    /// Answers one request line; the lines to send back, in order.
    fn handle(&mut self, request: &str) -> Vec<String>;
    /// How long the device takes before each reply.
    fn reply_delay(&self) -> Duration {
        Duration::ZERO
    }
    /// Whether the device behaves as an interactive console (see [`Faults::console`]).
    fn console(&self) -> bool {
        false
    }
}

/// The protocol logic, apart from any port: one request line in, reply lines out.
pub struct Device {
    meter: SimMeterHandle,
    faults: Faults,
    requests: u64,
    dead: bool,
    /// A console prints log lines until told `log off`.
    logging: bool,
}

impl Device {
    pub fn new(meter: SimMeterHandle, faults: Faults) -> Device {
        Device {
            logging: faults.console,
            meter,
            faults,
            requests: 0,
            dead: false,
        }
    }

    fn boot_lines() -> Vec<String> {
        BANNER.iter().map(|s| s.to_string()).collect()
    }
}

impl LineDevice for Device {
    fn banner(&self) -> Vec<String> {
        Device::boot_lines()
    }

    fn reply_delay(&self) -> Duration {
        self.faults.slow
    }

    fn console(&self) -> bool {
        self.faults.console
    }

    fn handle(&mut self, request: &str) -> Vec<String> {
        self.requests += 1;
        let n = self.requests;
        let every = |k: Option<u64>| k.is_some_and(|k| k > 0 && n.is_multiple_of(k));
        if self.dead || self.faults.die_after.is_some_and(|d| n > d) {
            self.dead = true;
            return Vec::new();
        }
        let mut out = Vec::new();
        if self.faults.echo {
            out.push(request.to_string());
        }
        if self.faults.console {
            match request.trim() {
                "log off" => {
                    self.logging = false;
                    return vec!["logging stopped".into()];
                }
                "log on" => {
                    self.logging = true;
                    return vec!["logging started".into()];
                }
                _ => {}
            }
            if self.logging && n.is_multiple_of(3) {
                out.push(format!("[log] uptime {} s, core 31.5 C", 40 + n));
            }
        }
        if self.faults.reboot_after == Some(n) {
            out.extend(Device::boot_lines());
            return out;
        }
        if every(self.faults.drop_every) {
            return out;
        }
        let mut reply = self.answer(request.trim());
        if every(self.faults.garble_every) {
            reply = garble(&reply);
        }
        out.push(reply);
        out
    }
}

impl Device {
    fn answer(&mut self, request: &str) -> String {
        let words: Vec<&str> = request.split_whitespace().collect();
        match words.as_slice() {
            ["who"] => {
                let id = self.meter.identity();
                let firmware = self.faults.firmware.clone().unwrap_or(id.firmware);
                format!("model={};serial={};fw={firmware}", id.model, id.serial)
            }
            ["rd", code, channel] => match quantity_from_code(code) {
                Some(q) => format!("= {code} {channel} {}", self.meter.read_counts(q)),
                None => format!("err unknown quantity {code}"),
            },
            ["rv", code, channel] => match quantity_from_code(code) {
                Some(q) => format!("= rv {code} {channel} {:.6}", self.meter.read_value(q)),
                None => format!("err unknown quantity {code}"),
            },
            [cmd @ ("ro" | "rg"), code, channel] => {
                let kind = if *cmd == "ro" { "offset" } else { "gain" };
                match quantity_from_code(code)
                    .and_then(|q| self.meter.constant(&format!("{kind}_{}", q.name())))
                {
                    Some(v) => format!("= {cmd} {code} {channel} {v}"),
                    None => format!("err unknown quantity {code}"),
                }
            }
            ["wo" | "wg", _, _, _] if self.faults.ignore_writes => "ok".into(),
            [cmd @ ("wo" | "wg"), code, _channel, value] => {
                let kind = if *cmd == "wo" { "offset" } else { "gain" };
                match (quantity_from_code(code), value.parse::<f64>()) {
                    (Some(q), Ok(v)) => {
                        match self.meter.set_constant(&format!("{kind}_{}", q.name()), v) {
                            Ok(()) => "ok".into(),
                            Err(e) => format!("err {e}"),
                        }
                    }
                    _ => "err bad constant".into(),
                }
            }
            [] => "err empty request".into(),
            _ => "err unknown command".into(),
        }
    }
}

/// Replaces characters of a reply by bytes a noisy line might deliver.
fn garble(reply: &str) -> String {
    reply
        .chars()
        .enumerate()
        .map(|(i, c)| if i % 3 == 1 { '\u{fffd}' } else { c })
        .collect()
}

/// A simulated meter serving on a pseudo-terminal until dropped.
pub struct PtyDevice {
    /// The path a client opens, as it would a real port.
    pub path: String,
    stop: Arc<AtomicBool>,
    thread: Option<JoinHandle<()>>,
    /// Held open so the pseudo-terminal stays usable between client opens.
    _slave: serialport::TTYPort,
    pub requests: Arc<AtomicU64>,
}

impl PtyDevice {
    /// Creates a pseudo-terminal pair and serves `device` on its master side.
    pub fn spawn(mut device: impl LineDevice) -> io::Result<PtyDevice> {
        PtyDevice::spawn_serving(move |port, stop, requests| {
            serve(port, &mut device, stop, requests)
        })
    }

    /// Creates a pseudo-terminal pair and runs `serve` on its master side until told to stop:
    /// for devices that are not line-based.
    pub fn spawn_serving(
        serve: impl FnOnce(serialport::TTYPort, &AtomicBool, &AtomicU64) + Send + 'static,
    ) -> io::Result<PtyDevice> {
        let (master, slave) = serialport::TTYPort::pair().map_err(io::Error::other)?;
        let path = serialport::SerialPort::name(&slave)
            .ok_or_else(|| io::Error::other("the pseudo-terminal has no name"))?;
        let stop = Arc::new(AtomicBool::new(false));
        let requests = Arc::new(AtomicU64::new(0));
        let thread = {
            let stop = stop.clone();
            let requests = requests.clone();
            std::thread::Builder::new()
                .name(format!("sim-device {path}"))
                .spawn(move || serve(master, &stop, &requests))?
        };
        Ok(PtyDevice {
            path,
            stop,
            thread: Some(thread),
            _slave: slave,
            requests,
        })
    }
}

/// Serves a device that answers whole requests of bytes (frames, not lines) until told to
/// stop: `answer` takes one whole request off the bytes received (`None` while there is none)
/// and gives the bytes to send back, none for no reply. With `frames_end_in_silence`, bytes
/// left when the line falls silent are dropped, as an RTU receiver drops a partial frame.
pub fn serve_frames(
    mut port: serialport::TTYPort,
    stop: &AtomicBool,
    requests: &AtomicU64,
    silence: Duration,
    frames_end_in_silence: bool,
    mut answer: impl FnMut(&serialport::TTYPort, &mut Vec<u8>) -> Option<Vec<u8>>,
) {
    let _ = serialport::SerialPort::set_timeout(&mut port, silence);
    let mut pending: Vec<u8> = Vec::new();
    let mut buf = [0u8; 256];
    while !stop.load(Ordering::SeqCst) {
        match port.read(&mut buf) {
            Ok(0) => std::thread::sleep(Duration::from_millis(1)),
            Ok(n) => pending.extend_from_slice(&buf[..n]),
            Err(e) if e.kind() == io::ErrorKind::TimedOut => {
                if frames_end_in_silence {
                    pending.clear();
                }
            }
            // No client has the port open right now: wait for one.
            Err(_) => std::thread::sleep(Duration::from_millis(5)),
        }
        while let Some(reply) = answer(&port, &mut pending) {
            requests.fetch_add(1, Ordering::Relaxed);
            if !reply.is_empty() {
                let _ = port.write_all(&reply);
                let _ = port.flush();
            }
        }
    }
}

impl Drop for PtyDevice {
    fn drop(&mut self) {
        self.stop.store(true, Ordering::SeqCst);
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

fn serve(
    mut port: serialport::TTYPort,
    device: &mut impl LineDevice,
    stop: &AtomicBool,
    requests: &AtomicU64,
) {
    let _ = serialport::SerialPort::set_timeout(&mut port, Duration::from_millis(20));
    let console = device.console();
    let send = |port: &mut serialport::TTYPort, lines: &[String]| {
        let mut bytes = Vec::new();
        for l in lines {
            bytes.extend_from_slice(l.as_bytes());
            bytes.extend_from_slice(if console { b"\r\n" } else { b"\n" });
        }
        if console {
            bytes.extend_from_slice(CONSOLE_PROMPT.as_bytes());
        }
        let _ = port.write_all(&bytes);
        let _ = port.flush();
    };
    send(&mut port, &device.banner());
    let mut pending: Vec<u8> = Vec::new();
    let mut buf = [0u8; 256];
    while !stop.load(Ordering::SeqCst) {
        match port.read(&mut buf) {
            Ok(0) => std::thread::sleep(Duration::from_millis(2)),
            Ok(n) => {
                if console {
                    // Each character echoed as it arrives, a line's end as CRLF.
                    let echo: Vec<u8> = buf[..n]
                        .iter()
                        .flat_map(|&b| match b {
                            b'\r' | b'\n' => b"\r\n".to_vec(),
                            b => vec![b],
                        })
                        .collect();
                    let _ = port.write_all(&echo);
                }
                pending.extend_from_slice(&buf[..n])
            }
            Err(e) if e.kind() == io::ErrorKind::TimedOut => {}
            // No client has the port open right now: wait for one.
            Err(_) => std::thread::sleep(Duration::from_millis(5)),
        }
        while let Some(end) = pending.iter().position(|&b| b == b'\n' || b == b'\r') {
            let line: Vec<u8> = pending.drain(..=end).collect();
            let text = String::from_utf8_lossy(&line[..line.len() - 1]).into_owned();
            if text.trim().is_empty() {
                if console {
                    // Enter on an empty line: the prompt again.
                    send(&mut port, &[]);
                }
                continue;
            }
            requests.fetch_add(1, Ordering::Relaxed);
            let reply = device.handle(&text);
            let delay = device.reply_delay();
            if !delay.is_zero() {
                std::thread::sleep(delay);
            }
            send(&mut port, &reply);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bench::sim::{SimBench, SimConfig};

    fn device(faults: Faults) -> Device {
        let sim = SimBench::new(&SimConfig::new(1, 1));
        Device::new(sim.meter(0), faults)
    }

    #[test]
    fn answers_who_and_reads() {
        let mut d = device(Faults::default());
        let who = d.handle("who");
        assert!(who[0].starts_with("model=TM-16;serial=TM16-"), "{who:?}");
        let rd = d.handle("rd I L");
        assert!(rd[0].starts_with("= I L "), "{rd:?}");
        assert_eq!(d.handle("fly"), vec!["err unknown command"]);
    }

    #[test]
    fn injects_the_faults_it_is_told_to() {
        let mut d = device(Faults {
            drop_every: Some(2),
            ..Faults::default()
        });
        assert_eq!(d.handle("who").len(), 1);
        assert!(d.handle("who").is_empty());
        let mut d = device(Faults {
            reboot_after: Some(1),
            echo: true,
            ..Faults::default()
        });
        assert_eq!(d.handle("who"), vec!["who", BANNER[0], BANNER[1]]);
        let mut d = device(Faults {
            die_after: Some(1),
            ..Faults::default()
        });
        assert_eq!(d.handle("who").len(), 1);
        assert!(d.handle("who").is_empty());
        assert!(d.handle("who").is_empty());
        let mut d = device(Faults {
            firmware: Some("9.9.9".into()),
            ..Faults::default()
        });
        assert!(d.handle("who")[0].ends_with("fw=9.9.9"));
    }
}
