//! A line-oriented request/reply channel over a byte stream: the transport under the `text`
//! link and the SCPI instruments.
//!
//! Where the device shows a prompt (a console's "> ", with no line ending), each request waits
//! for it first: the prompt is taken off the front of whatever follows it (an echo glued to
//! it), and a console that shows none within the timeout is woken by an empty line once.
//!
//! Each transaction sends one line and waits, up to the channel's timeout, for a line that
//! matches the reply pattern. On the way it ignores the device's echo of the request (when told
//! it echoes), lines matching the `skip` pattern (boot banners, log lines) and empty lines, and
//! keeps listening past a line that matches nothing (a late reply to an earlier request). No
//! matching line before the deadline is retried as many times as allowed, with stale input
//! discarded first; then the transaction fails with a [`LinkError`] that names the request and,
//! for a garbled reply, the text received. No byte sequence makes it panic: input is decoded
//! lossily and lines are cut at [`MAX_LINE`] bytes.

use super::LinkError;
use crate::plan::text_link::{FlowControl, LineEnding, Parity, PortSettings};
use std::io::{self, Read, Write};
use std::time::{Duration, Instant};

/// The longest line kept; a longer run of bytes without a line ending is noise.
pub const MAX_LINE: usize = 4096;

/// The byte stream under a link: a serial port, or anything that behaves like one in tests.
pub trait Wire: Read + Write + Send {
    /// Throws away input received but not yet read.
    fn discard_input(&mut self) -> io::Result<()>;
    /// How long one `read` may wait for the first byte.
    fn set_read_timeout(&mut self, timeout: Duration) -> io::Result<()>;
}

impl Wire for Box<dyn serialport::SerialPort> {
    fn discard_input(&mut self) -> io::Result<()> {
        self.clear(serialport::ClearBuffer::Input)
            .map_err(io::Error::other)
    }
    fn set_read_timeout(&mut self, timeout: Duration) -> io::Result<()> {
        self.set_timeout(timeout).map_err(io::Error::other)
    }
}

/// Opens the serial port at `path` with the link's settings.
pub fn open_port(
    path: &str,
    p: PortSettings,
) -> Result<Box<dyn serialport::SerialPort>, LinkError> {
    serialport::new(path, p.baud)
        .data_bits(match p.data_bits {
            5 => serialport::DataBits::Five,
            6 => serialport::DataBits::Six,
            7 => serialport::DataBits::Seven,
            _ => serialport::DataBits::Eight,
        })
        .parity(match p.parity {
            Parity::None => serialport::Parity::None,
            Parity::Odd => serialport::Parity::Odd,
            Parity::Even => serialport::Parity::Even,
        })
        .stop_bits(match p.stop_bits {
            2 => serialport::StopBits::Two,
            _ => serialport::StopBits::One,
        })
        .flow_control(match p.flow_control {
            FlowControl::None => serialport::FlowControl::None,
            FlowControl::Software => serialport::FlowControl::Software,
            FlowControl::Hardware => serialport::FlowControl::Hardware,
        })
        .timeout(Duration::from_millis(20))
        .open()
        .map_err(|e| LinkError::Open {
            port: path.to_string(),
            why: e.to_string(),
        })
}

/// How a channel frames and times its transactions.
#[derive(Debug, Clone)]
pub struct LineSettings {
    pub send_ending: LineEnding,
    pub receive_ending: LineEnding,
    pub timeout_s: f64,
    pub retries: u32,
    /// Quiet time between the end of one transaction and the next request.
    pub pause_s: f64,
    /// Whether the device echoes each request before replying.
    pub echo: bool,
    /// Lines to ignore wherever they appear.
    pub skip: Option<regex::Regex>,
    /// A line that shows the device restarted: counted (and ignored).
    pub restart: Option<regex::Regex>,
    /// The text the device shows when it is ready for a request, without a line ending.
    pub prompt: Option<String>,
}

/// What happened on a channel so far.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
pub struct LinkStats {
    pub transactions: u64,
    pub retries: u64,
    pub skipped_lines: u64,
    /// Lines that matched no reply pattern (garbled).
    pub not_understood: u64,
    /// Replies that came after their request's timeout (recognised by the reply pattern of a
    /// request that had timed out), set aside.
    pub late_replies: u64,
    /// Restart lines seen: the device restarted this many times.
    pub restarts: u64,
}

/// A request/reply line channel over a [`Wire`].
pub struct LineChannel<W: Wire> {
    settings: LineSettings,
    wire: W,
    name: String,
    pending: Vec<u8>,
    last_transaction_end: Option<Instant>,
    /// From sending the request that was answered to its reply, for the last transaction that
    /// succeeded: the unit answered that request, so it took its reading within this time.
    last_exchange: Option<super::Exchange>,
    /// Whether the device has answered anything yet.
    answered_once: bool,
    /// Replies still owed to attempts that timed out: the reply pattern, until when a line
    /// matching it is taken as that late reply.
    owed: Vec<(regex::Regex, Instant)>,
    /// Whether the device's prompt has come since the last request was sent.
    prompt_seen: bool,
    pub stats: LinkStats,
}

/// What the channel read next.
enum Next {
    Line(String),
    /// The device's prompt (only when waiting for it).
    Prompt,
    /// The deadline passed.
    Deadline,
}

impl<W: Wire> LineChannel<W> {
    /// Puts a new byte stream under the channel (a port opened again), forgetting any half
    /// line of the old one.
    pub fn replace_wire(&mut self, wire: W) {
        self.wire = wire;
        self.pending.clear();
        self.last_transaction_end = None;
        self.prompt_seen = false;
    }

    pub fn new(settings: LineSettings, wire: W, name: &str) -> LineChannel<W> {
        LineChannel {
            settings,
            wire,
            name: name.to_string(),
            pending: Vec::new(),
            last_transaction_end: None,
            last_exchange: None,
            answered_once: false,
            owed: Vec::new(),
            prompt_seen: false,
            stats: LinkStats::default(),
        }
    }

    pub fn name(&self) -> &str {
        &self.name
    }

    /// The attempt that got the last successful reply, request sent to reply read. A reply
    /// later than the timeout counts as lost (the timeout is set above the unit's reply time),
    /// so the reply matched is taken to answer the attempt it came in.
    pub fn last_exchange(&self) -> Option<super::Exchange> {
        self.last_exchange
    }

    /// Sends a line that has no reply.
    pub fn send_only(&mut self, request: &str) -> Result<(), LinkError> {
        self.wait_out_pause();
        self.wait_for_prompt()?;
        self.send(request)?;
        self.last_transaction_end = Some(Instant::now());
        Ok(())
    }

    /// Sends `request` and returns the first line that matches `reply`.
    ///
    /// A reply that comes after its attempt's timeout is still on its way when the next
    /// request goes out. Each attempt that timed out leaves a reply owed; a line that matches
    /// no reply pattern of this request but the pattern of an owed one is that late reply, set
    /// aside and counted as late, never read as an answer to something else nor reported as
    /// not understood. (Within a retry of the same request a late reply cannot be told from the
    /// retry's own: it answers the same question and is taken.)
    pub fn transact(&mut self, request: &str, reply: &regex::Regex) -> Result<String, LinkError> {
        let attempts = 1 + self.settings.retries;
        let mut last_garbled: Option<String> = None;
        let mut late = 0u64;
        self.stats.transactions += 1;
        for attempt in 1..=attempts {
            if attempt > 1 {
                self.stats.retries += 1;
            }
            self.wait_out_pause();
            if self.settings.prompt.is_some() {
                // Whatever came before the prompt was read while waiting for it; discarding
                // input now would throw the prompt away.
                self.wait_for_prompt()?;
            } else {
                self.discard_stale()?;
            }
            let sent = Instant::now();
            self.send(request)?;
            let timeout = Duration::from_secs_f64(self.settings.timeout_s);
            let deadline = sent + timeout;
            while let Next::Line(line) = self.next(deadline, false)? {
                if self.is_noise(request, &line) {
                    continue;
                }
                if reply.is_match(&line) {
                    let now = Instant::now();
                    self.last_transaction_end = Some(now);
                    self.last_exchange = Some(super::Exchange {
                        sent,
                        answered: now,
                    });
                    self.answered_once = true;
                    return Ok(line);
                }
                if self.is_late(&line) {
                    self.stats.late_replies += 1;
                    late += 1;
                    continue;
                }
                // Keep listening until the deadline: the reply may still come.
                self.stats.not_understood += 1;
                last_garbled = Some(line);
            }
            // This attempt's reply, if it ever comes, comes late. It is looked out for while
            // a unit could plausibly still send it.
            self.owed
                .push((reply.clone(), Instant::now() + timeout * 20));
        }
        self.last_transaction_end = Some(Instant::now());
        self.last_exchange = None;
        let timeout_ms = (self.settings.timeout_s * 1000.0).round() as u64;
        Err(match last_garbled {
            Some(line) => LinkError::Garbled {
                request: request.to_string(),
                reply: line,
                why: "it does not match the reply pattern".into(),
            },
            None if late > 0 => LinkError::TooSlow {
                request: request.to_string(),
                timeout_ms,
                attempts,
                late,
            },
            None => LinkError::Timeout {
                request: request.to_string(),
                timeout_ms,
                attempts,
            },
        })
    }

    /// Waits until the device shows its prompt (when it has one): lines before it are
    /// unsolicited (log lines, late replies) and counted as skipped or late. A device that
    /// shows no prompt within the timeout is sent an empty line, as a person at a console
    /// presses Enter, and waited for once more.
    fn wait_for_prompt(&mut self) -> Result<(), LinkError> {
        let Some(prompt) = self.settings.prompt.clone() else {
            return Ok(());
        };
        let timeout = Duration::from_secs_f64(self.settings.timeout_s);
        for attempt in 0..2 {
            if attempt == 1 {
                self.send("")?;
            }
            let deadline = Instant::now() + timeout;
            loop {
                if self.prompt_seen {
                    return Ok(());
                }
                match self.next(deadline, true)? {
                    Next::Prompt => return Ok(()),
                    Next::Deadline => break,
                    Next::Line(line) => {
                        if self.is_noise("", &line) {
                            continue;
                        }
                        if self.is_late(&line) {
                            self.stats.late_replies += 1;
                        } else {
                            self.stats.skipped_lines += 1;
                        }
                    }
                }
            }
        }
        Err(LinkError::NoPrompt {
            prompt,
            timeout_ms: (self.settings.timeout_s * 1000.0).round() as u64,
        })
    }

    /// Takes the prompt off the front of the input, as often as it is there.
    fn take_prompt(&mut self) -> bool {
        let Some(prompt) = self.settings.prompt.as_deref() else {
            return false;
        };
        let prompt = prompt.as_bytes();
        let mut taken = false;
        while !prompt.is_empty() && self.pending.starts_with(prompt) {
            self.pending.drain(..prompt.len());
            taken = true;
        }
        if taken {
            self.prompt_seen = true;
        }
        taken
    }

    /// Whether `line` is a reply owed to an attempt that timed out (and takes it off the
    /// owed list).
    fn is_late(&mut self, line: &str) -> bool {
        let now = Instant::now();
        self.owed.retain(|(_, until)| *until > now);
        match self.owed.iter().position(|(r, _)| r.is_match(line)) {
            Some(i) => {
                self.owed.remove(i);
                true
            }
            None => false,
        }
    }

    fn is_noise(&mut self, request: &str, line: &str) -> bool {
        if self.is_restart(line) {
            self.stats.skipped_lines += 1;
            return true;
        }
        let noise = line.trim().is_empty()
            || (self.settings.echo && line.trim() == request.trim())
            || self
                .settings
                .skip
                .as_ref()
                .is_some_and(|s| s.is_match(line));
        if noise {
            self.stats.skipped_lines += 1;
        }
        noise
    }

    fn wait_out_pause(&self) {
        if let Some(end) = self.last_transaction_end {
            let pause = Duration::from_secs_f64(self.settings.pause_s);
            let since = end.elapsed();
            if since < pause {
                std::thread::sleep(pause - since);
            }
        }
    }

    /// Counts a restart line.
    fn is_restart(&mut self, line: &str) -> bool {
        let restart = self
            .settings
            .restart
            .as_ref()
            .is_some_and(|r| r.is_match(line));
        // The banner of the power-up before the first answer is no restart.
        if restart && self.answered_once {
            self.stats.restarts += 1;
        }
        restart
    }

    fn discard_stale(&mut self) -> Result<(), LinkError> {
        // A device that restarted between two requests printed its banner into input about to
        // be thrown away: where restarts are watched for, that input is read first.
        if self.settings.restart.is_some() {
            let mut buf = [0u8; 512];
            let _ = self.wire.set_read_timeout(Duration::from_millis(0));
            for _ in 0..64 {
                match self.wire.read(&mut buf) {
                    Ok(n) if n > 0 => self.pending.extend_from_slice(&buf[..n]),
                    _ => break,
                }
            }
            self.pending.push(b'\n');
            while let Some(line) = take_line(&mut self.pending, LineEnding::Lf) {
                self.is_restart(&line);
            }
        }
        self.pending.clear();
        self.wire
            .discard_input()
            .map_err(|e| LinkError::Disconnected(format!("{}: {e}", self.name)))
    }

    fn send(&mut self, request: &str) -> Result<(), LinkError> {
        self.prompt_seen = false;
        let mut bytes = request.as_bytes().to_vec();
        bytes.extend_from_slice(self.settings.send_ending.bytes());
        self.wire
            .write_all(&bytes)
            .and_then(|_| self.wire.flush())
            .map_err(|e| LinkError::Disconnected(format!("{}: writing: {e}", self.name)))
    }

    /// The next complete line, the prompt (when `to_prompt`: it is otherwise taken off
    /// silently), or the deadline passing.
    fn next(&mut self, deadline: Instant, to_prompt: bool) -> Result<Next, LinkError> {
        let mut buf = [0u8; 512];
        loop {
            if self.take_prompt() && to_prompt {
                return Ok(Next::Prompt);
            }
            if let Some(line) = take_line(&mut self.pending, self.settings.receive_ending) {
                return Ok(Next::Line(line));
            }
            let now = Instant::now();
            if now >= deadline {
                return Ok(Next::Deadline);
            }
            let wait = (deadline - now).min(Duration::from_millis(50));
            let _ = self
                .wire
                .set_read_timeout(wait.max(Duration::from_millis(1)));
            match self.wire.read(&mut buf) {
                Ok(0) => {
                    return Err(LinkError::Disconnected(format!(
                        "{}: the port closed",
                        self.name
                    )));
                }
                Ok(n) => self.pending.extend_from_slice(&buf[..n]),
                Err(e)
                    if matches!(
                        e.kind(),
                        io::ErrorKind::TimedOut
                            | io::ErrorKind::WouldBlock
                            | io::ErrorKind::Interrupted
                    ) => {}
                Err(e) => {
                    return Err(LinkError::Disconnected(format!(
                        "{}: reading: {e}",
                        self.name
                    )));
                }
            }
        }
    }
}

/// Takes one line ending in `ending` off the front of `pending`. A CR before an LF ending (and an
/// LF after a CR ending) is dropped, so that a device that sends CRLF still reads under either.
/// A run of more than [`MAX_LINE`] bytes without an ending comes out as one line, cut.
fn take_line(pending: &mut Vec<u8>, ending: LineEnding) -> Option<String> {
    let terminator = match ending {
        LineEnding::Cr => b'\r',
        LineEnding::Lf | LineEnding::CrLf => b'\n',
    };
    let end = match pending.iter().position(|&b| b == terminator) {
        Some(i) => i,
        None if pending.len() > MAX_LINE => {
            let line: Vec<u8> = pending.drain(..).take(MAX_LINE).collect();
            return Some(String::from_utf8_lossy(&line).into_owned());
        }
        None => return None,
    };
    let mut line: Vec<u8> = pending.drain(..=end).collect();
    line.pop();
    if line.last() == Some(&b'\r') {
        line.pop();
    }
    if ending == LineEnding::Cr && line.first() == Some(&b'\n') {
        line.remove(0);
    }
    line.truncate(MAX_LINE);
    Some(String::from_utf8_lossy(&line).into_owned())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lines_split_under_each_ending() {
        let mut p = b"a\r\nb\nc".to_vec();
        assert_eq!(take_line(&mut p, LineEnding::Lf).as_deref(), Some("a"));
        assert_eq!(take_line(&mut p, LineEnding::Lf).as_deref(), Some("b"));
        assert_eq!(take_line(&mut p, LineEnding::Lf), None);
        assert_eq!(p, b"c");
        let mut p = b"x\r\ny\r".to_vec();
        assert_eq!(take_line(&mut p, LineEnding::Cr).as_deref(), Some("x"));
        assert_eq!(take_line(&mut p, LineEnding::Cr).as_deref(), Some("y"));
        let mut p = b"z\r\n".to_vec();
        assert_eq!(take_line(&mut p, LineEnding::CrLf).as_deref(), Some("z"));
    }

    #[test]
    fn noise_without_an_ending_is_cut_not_hoarded() {
        let mut p = vec![0xffu8; MAX_LINE + 10];
        let line = take_line(&mut p, LineEnding::Lf).unwrap();
        assert!(line.chars().count() <= MAX_LINE);
        assert!(p.is_empty());
    }

    #[test]
    fn invalid_utf8_is_decoded_lossily() {
        let mut p = b"= I L \xff\xfe12\n".to_vec();
        let line = take_line(&mut p, LineEnding::Lf).unwrap();
        assert!(line.contains('\u{fffd}'));
    }
}
