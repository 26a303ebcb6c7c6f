//! The `text` link: a unit's own line protocol over a serial port, described by the plan
//! (requests, reply patterns, scaling), on a [`LineChannel`].

use super::line::{LineChannel, LineSettings, Wire, open_port};
use super::{DutLink, Identity, LinkError};
use crate::plan::Quantity;
use crate::plan::text_link::TextLinkSpec;
use std::sync::Arc;

/// Opens the port at `path` and returns a link to the unit on it; a port that is lost later
/// (a unit reseated) is opened again at the same path.
pub fn open(path: &str, spec: Arc<TextLinkSpec>) -> Result<Box<dyn DutLink>, LinkError> {
    let port = open_port(path, spec.port)?;
    let (again, settings) = (path.to_string(), spec.port);
    Ok(Box::new(TextLink::new(spec, port, path).with_reopen(
        Box::new(move || open_port(&again, settings)),
    )))
}

/// Opens a lost port again.
pub type Reopen<W> = Box<dyn FnMut() -> Result<W, LinkError> + Send>;

/// The channel settings a text link asks for.
pub fn line_settings(spec: &TextLinkSpec) -> LineSettings {
    LineSettings {
        send_ending: spec.send_ending,
        receive_ending: spec.receive_ending,
        timeout_s: spec.timeout_s,
        retries: spec.retries,
        pause_s: spec.pause_s,
        echo: spec.echo,
        skip: spec.skip.as_ref().map(|p| p.regex.clone()),
        restart: spec.restart.as_ref().map(|p| p.regex.clone()),
        prompt: spec.prompt.clone(),
    }
}

/// A captured value as a finite number.
fn number(request: &str, text: &str) -> Result<f64, LinkError> {
    text.trim()
        .parse::<f64>()
        .ok()
        .filter(|v| v.is_finite())
        .ok_or_else(|| LinkError::Garbled {
            request: request.to_string(),
            reply: text.to_string(),
            why: "the value is not a finite number".into(),
        })
}

/// A unit reached over a text protocol.
pub struct TextLink<W: Wire> {
    spec: Arc<TextLinkSpec>,
    channel: LineChannel<W>,
    /// How to open the port again when it is lost; none for a link that cannot.
    reopen: Option<Reopen<W>>,
    /// The serial the unit gave when identified: a reopened port must answer with it.
    serial: Option<String>,
    reconnects: u64,
    /// Whether the plan's init sequence has been sent on the port as it is now open.
    initialised: bool,
}

impl<W: Wire> TextLink<W> {
    pub fn new(spec: Arc<TextLinkSpec>, wire: W, name: &str) -> TextLink<W> {
        let channel = LineChannel::new(line_settings(&spec), wire, name);
        TextLink {
            spec,
            channel,
            reopen: None,
            serial: None,
            reconnects: 0,
            initialised: false,
        }
    }

    /// Lets the link open its port again when it is lost.
    pub fn with_reopen(mut self, reopen: Reopen<W>) -> TextLink<W> {
        self.reopen = Some(reopen);
        self
    }

    /// Runs `f`; when the port is lost, opens it again once, makes sure the same unit answers
    /// (its serial), counts the reconnection and runs `f` again.
    fn reconnecting<T>(
        &mut self,
        f: impl Fn(&mut Self) -> Result<T, LinkError>,
    ) -> Result<T, LinkError> {
        let lost = match self.init().and_then(|_| f(self)) {
            Err(LinkError::Disconnected(why)) => why,
            other => return other,
        };
        let Some(reopen) = self.reopen.as_mut() else {
            return Err(LinkError::Disconnected(lost));
        };
        let wire = reopen().map_err(|_| LinkError::Disconnected(lost.clone()))?;
        self.channel.replace_wire(wire);
        self.reconnects += 1;
        self.initialised = false;
        self.init()?;
        if let Some(expected) = self.serial.clone() {
            let now = self.identify_once()?;
            if now.serial != expected {
                return Err(LinkError::Disconnected(format!(
                    "{lost}; opened again, the port answers as unit {} instead of {expected}",
                    now.serial
                )));
            }
        }
        f(self)
    }

    /// Sends the plan's init sequence once per opening of the port.
    fn init(&mut self) -> Result<(), LinkError> {
        if self.initialised {
            return Ok(());
        }
        let spec = self.spec.clone();
        for line in &spec.init {
            match &line.reply {
                None => self.channel.send_only(&line.send)?,
                Some(reply) => {
                    self.channel.transact(&line.send, &reply.regex)?;
                }
            }
        }
        self.initialised = true;
        Ok(())
    }

    fn identify_once(&mut self) -> Result<Identity, LinkError> {
        let spec = self.spec.clone();
        let id = &spec.identity;
        let line = self.channel.transact(&id.request, &id.reply.regex)?;
        let caps = id
            .reply
            .regex
            .captures(&line)
            .ok_or_else(|| LinkError::Garbled {
                request: id.request.clone(),
                reply: line.clone(),
                why: "it does not match the identity pattern".into(),
            })?;
        let group = |name: &str| {
            caps.name(name)
                .map(|m| m.as_str().trim().to_string())
                .unwrap_or_default()
        };
        Ok(Identity {
            model: group("model"),
            serial: group("serial"),
            firmware: group("firmware"),
        })
    }

    /// Counters of transactions, retries and skipped lines.
    pub fn stats(&self) -> super::line::LinkStats {
        self.channel.stats
    }

    fn captured(
        &mut self,
        request: &str,
        pattern: &regex::Regex,
        group: &str,
    ) -> Result<String, LinkError> {
        let line = self.channel.transact(request, pattern)?;
        pattern
            .captures(&line)
            .and_then(|c| c.name(group).map(|m| m.as_str().to_string()))
            .ok_or_else(|| LinkError::Garbled {
                request: request.to_string(),
                reply: line.clone(),
                why: format!("the group {group} is empty"),
            })
    }

    /// Sends a write request (a calibration constant) and waits for its acknowledgement.
    pub fn write_named(&mut self, name: &str, channel: &str, value: f64) -> Result<(), LinkError> {
        let spec = self.spec.clone();
        let write =
            spec.writes
                .iter()
                .find(|w| w.name == name)
                .ok_or_else(|| LinkError::Unsupported {
                    quantity: format!("write {name}"),
                    channel: channel.to_string(),
                })?;
        let request = write
            .request
            .replace("{channel}", channel)
            .replace("{value}", &format!("{value}"));
        self.channel
            .transact(&request, &write.ack.regex)
            .map(|_| ())
    }
}

impl<W: Wire> DutLink for TextLink<W> {
    fn identify(&mut self) -> Result<Identity, LinkError> {
        let id = self.reconnecting(|l| l.identify_once())?;
        self.serial = Some(id.serial.clone());
        Ok(id)
    }

    fn read(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError> {
        self.reconnecting(|l| l.read_once(quantity, channel))
    }

    fn write_constant(&mut self, name: &str, channel: &str, value: f64) -> Result<(), LinkError> {
        self.reconnecting(|l| l.write_named(name, channel, value))
    }

    fn read_raw(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError> {
        self.reconnecting(|l| l.read_raw_once(quantity, channel))
    }

    fn read_constant(&mut self, name: &str, channel: &str) -> Result<f64, LinkError> {
        self.reconnecting(|l| l.read_constant_once(name, channel))
    }

    fn resolution(&self, quantity: Quantity) -> Option<f64> {
        self.spec.request_for(quantity).and_then(|q| q.resolution)
    }

    fn describe(&self) -> String {
        format!(
            "{} (text link, {} baud)",
            self.channel.name(),
            self.spec.port.baud
        )
    }

    fn last_exchange(&self) -> Option<super::Exchange> {
        self.channel.last_exchange()
    }

    fn health(&self) -> Option<super::LinkHealth> {
        let s = self.channel.stats;
        Some(super::LinkHealth {
            requests: s.transactions,
            retries: s.retries,
            lines_skipped: s.skipped_lines,
            not_understood: s.not_understood,
            restarts: s.restarts,
            reconnects: self.reconnects,
            late_replies: s.late_replies,
            ..Default::default()
        })
    }
}

impl<W: Wire> TextLink<W> {
    fn read_once(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError> {
        let spec = self.spec.clone();
        let q = spec
            .request_for(quantity)
            .ok_or_else(|| LinkError::Unsupported {
                quantity: quantity.name().into(),
                channel: channel.into(),
            })?;
        let request = q.request.replace("{channel}", channel);
        let text = self.captured(&request, &q.reply.regex, "value")?;
        let raw: f64 = text.trim().parse().map_err(|_| LinkError::Garbled {
            request: request.clone(),
            reply: text.clone(),
            why: "the value is not a number".into(),
        })?;
        let value = q.convert(raw);
        if !value.is_finite() {
            return Err(LinkError::Garbled {
                request,
                reply: text,
                why: "the value is not finite".into(),
            });
        }
        Ok(value)
    }

    fn read_raw_once(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError> {
        let spec = self.spec.clone();
        let q = spec
            .request_for(quantity)
            .ok_or_else(|| LinkError::Unsupported {
                quantity: quantity.name().into(),
                channel: channel.into(),
            })?;
        // The raw request where there is one; otherwise the reading itself, unconverted.
        let (request, pattern) = match &q.raw {
            Some(raw) => (raw.request.replace("{channel}", channel), &raw.reply.regex),
            None => (q.request.replace("{channel}", channel), &q.reply.regex),
        };
        let text = self.captured(&request, pattern, "value")?;
        number(&request, &text)
    }

    fn read_constant_once(&mut self, name: &str, channel: &str) -> Result<f64, LinkError> {
        let spec = self.spec.clone();
        let readback = spec
            .writes
            .iter()
            .find(|w| w.name == name)
            .and_then(|w| w.readback.as_ref())
            .ok_or_else(|| LinkError::Unsupported {
                quantity: format!("read back {name}"),
                channel: channel.into(),
            })?;
        let request = readback.request.replace("{channel}", channel);
        let text = self.captured(&request, &readback.reply.regex, "value")?;
        number(&request, &text)
    }
}

/// What one line the unit sent was taken for, and for a line not understood, a guess at why:
/// what `try-link` shows an engineer describing a new meter.
#[derive(Debug, Clone, PartialEq)]
pub enum LineRole {
    /// Nothing but the prompt, or an empty line.
    Blank,
    /// The unit's echo of the request.
    Echo,
    /// A line the `skip` or `restart` pattern sets aside.
    Skipped,
    /// The reply: its named groups and what they caught.
    Reply(Vec<(String, String)>),
    /// A line that matches nothing, with a hint where one can be given.
    NotUnderstood(Option<String>),
}

/// Says what `line` is to the link while it waits for `reply` to `request`.
pub fn explain_line(
    spec: &TextLinkSpec,
    request: &str,
    reply: &regex::Regex,
    line: &str,
) -> LineRole {
    let mut line = line;
    if let Some(prompt) = spec.prompt.as_deref().filter(|p| !p.is_empty()) {
        while let Some(rest) = line.strip_prefix(prompt) {
            line = rest;
        }
    }
    if line.trim().is_empty() {
        return LineRole::Blank;
    }
    if spec.echo && line.trim() == request.trim() {
        return LineRole::Echo;
    }
    let sets_aside = |p: &Option<crate::plan::text_link::Pattern>| {
        p.as_ref().is_some_and(|p| p.regex.is_match(line))
    };
    if sets_aside(&spec.skip) || sets_aside(&spec.restart) {
        return LineRole::Skipped;
    }
    if let Some(c) = reply.captures(line) {
        let groups = reply
            .capture_names()
            .flatten()
            .map(|name| {
                let caught = c.name(name).map_or("", |m| m.as_str());
                (name.to_string(), caught.to_string())
            })
            .collect();
        return LineRole::Reply(groups);
    }
    LineRole::NotUnderstood(hint(request, reply, line))
}

/// A guess at why `line` did not match, from the commonest mistakes in describing a console.
fn hint(request: &str, reply: &regex::Regex, line: &str) -> Option<String> {
    let request = request.trim();
    if !request.is_empty() && line.trim() == request {
        return Some("it is the echo of the request: set echo: true".into());
    }
    if !request.is_empty()
        && let Some(before) = line.strip_suffix(request).or_else(|| {
            line.trim_end()
                .strip_suffix(request)
                .filter(|b| !b.is_empty())
        })
        && !before.is_empty()
        && before.len() <= 16
    {
        return Some(format!(
            "it is the echo of the request after {before:?}, a prompt: set prompt: {before:?} and echo: true"
        ));
    }
    if reply.is_match(line.trim()) {
        return Some(
            "it matches once the spaces around it are taken off: allow them in the pattern (\\s*)"
                .into(),
        );
    }
    let unanchored = reply
        .as_str()
        .trim_start_matches('^')
        .trim_end_matches('$')
        .to_string();
    if unanchored != reply.as_str()
        && regex::Regex::new(&unanchored).is_ok_and(|r| r.is_match(line))
    {
        return Some(
            "the pattern matches part of the line, but not from its start to its end (^ … $)"
                .into(),
        );
    }
    if line.starts_with('[') || line.to_ascii_lowercase().contains("log") {
        return Some(
            "it looks like a log line: set it aside with skip, or turn logging off in init".into(),
        );
    }
    None
}

/// Why nothing usable came back, judged from the bytes received: nothing at all, or bytes with
/// no line ending the link waits for.
pub fn explain_silence(spec: &TextLinkSpec, received: &[u8]) -> String {
    if received.is_empty() {
        return format!(
            "nothing came back: check the port and its settings ({} baud), and the line ending the unit waits for (send: {})",
            spec.port.baud,
            spec.send_ending.name()
        );
    }
    let has_lf = received.contains(&b'\n');
    let has_cr = received.contains(&b'\r');
    let ending = spec.receive_ending;
    let ends = match ending {
        crate::plan::text_link::LineEnding::Cr => has_cr,
        _ => has_lf,
    };
    if !ends {
        let seen = match (has_cr, has_lf) {
            (true, true) => "CRLF",
            (true, false) => "CR",
            (false, true) => "LF",
            (false, false) => "no line ending at all",
        };
        return format!(
            "bytes came back, but no line ended with {} (the unit sent {seen}): set line_ending.receive",
            ending.name()
        );
    }
    if let Some(prompt) = spec.prompt.as_deref() {
        let text = String::from_utf8_lossy(received);
        if !text.contains(prompt) {
            return format!("the prompt {prompt:?} never came: is it the unit's prompt?");
        }
    }
    "no line matched the reply pattern".into()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The console demo plan's link: echo, prompt "> ", banner and log lines skipped.
    fn console() -> TextLinkSpec {
        let text = include_str!("../../test-plans/demo-console.yaml");
        match crate::plan::Plan::from_text("demo-console.yaml", text)
            .unwrap()
            .link
        {
            crate::plan::LinkSpec::Text(t) => *t,
            other => panic!("{other:?}"),
        }
    }

    /// The same link knowing nothing of the console.
    fn plain() -> TextLinkSpec {
        TextLinkSpec {
            echo: false,
            prompt: None,
            skip: None,
            restart: None,
            ..console()
        }
    }

    /// Each role a line can have, and the hints for the commonest mistakes in describing a
    /// console (common practice at meter consoles, no published source).
    #[test]
    fn lines_are_told_apart_and_mistakes_hinted() {
        let reply = regex::Regex::new(r"^= (?P<value>\d+)$").unwrap();
        let plain = plain();
        assert_eq!(
            explain_line(&plain, "rd I", &reply, "= 12"),
            LineRole::Reply(vec![("value".into(), "12".into())])
        );
        let hint_of = |s: &TextLinkSpec, line: &str| match explain_line(s, "rd I", &reply, line) {
            LineRole::NotUnderstood(h) => h.unwrap_or_default(),
            other => panic!("{line}: {other:?}"),
        };
        assert!(hint_of(&plain, "rd I").contains("set echo: true"));
        assert!(hint_of(&plain, "> rd I").contains("set prompt: \"> \""));
        assert!(hint_of(&plain, " = 12 ").contains("spaces around it"));
        assert!(hint_of(&plain, "= 12 A").contains("from its start to its end"));
        assert!(hint_of(&plain, "[log] core 31 C").contains("log line"));
        assert_eq!(hint_of(&plain, "err busy"), "");
        let console = console();
        assert_eq!(
            explain_line(&console, "rd I", &reply, "> rd I"),
            LineRole::Echo
        );
        assert_eq!(
            explain_line(&console, "rd I", &reply, "> "),
            LineRole::Blank
        );
        assert_eq!(
            explain_line(&console, "rd I", &reply, "# boot"),
            LineRole::Skipped
        );
        assert_eq!(
            explain_line(&console, "rd I", &reply, "> = 7"),
            LineRole::Reply(vec![("value".into(), "7".into())])
        );
    }

    #[test]
    fn silence_is_explained_from_the_bytes_received() {
        let s = TextLinkSpec {
            receive_ending: crate::plan::text_link::LineEnding::Lf,
            prompt: Some("$ ".into()),
            ..console()
        };
        assert!(explain_silence(&s, b"").contains("send: CR"));
        assert!(explain_silence(&s, b"= 1\r").contains("the unit sent CR"));
        assert!(explain_silence(&s, b"= 1\n").contains("prompt \"$ \" never came"));
        assert!(explain_silence(&s, b"$ = x\n").contains("no line matched"));
    }
}
