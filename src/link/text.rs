//! The `text` link: a unit's own line protocol over a serial port, described by the plan
//! (requests, reply patterns, scaling), on a [`LineChannel`].

use super::line::{LineChannel, LineSettings, Wire, open_port};
use super::{DutLink, Identity, LinkError};
use crate::plan::Quantity;
use crate::plan::text_link::TextLinkSpec;
use std::sync::Arc;

/// Opens the port at `path` and returns a link to the unit on it.
pub fn open(path: &str, spec: Arc<TextLinkSpec>) -> Result<Box<dyn DutLink>, LinkError> {
    let port = open_port(path, spec.port)?;
    Ok(Box::new(TextLink::new(spec, port, path)))
}

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
}

impl<W: Wire> TextLink<W> {
    pub fn new(spec: Arc<TextLinkSpec>, wire: W, name: &str) -> TextLink<W> {
        let channel = LineChannel::new(line_settings(&spec), wire, name);
        TextLink { spec, channel }
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

    fn read(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError> {
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

    fn write_constant(&mut self, name: &str, channel: &str, value: f64) -> Result<(), LinkError> {
        self.write_named(name, channel, value)
    }

    fn read_raw(&mut self, quantity: Quantity, channel: &str) -> Result<f64, LinkError> {
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

    fn read_constant(&mut self, name: &str, channel: &str) -> Result<f64, LinkError> {
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

    fn last_answered_in_s(&self) -> Option<f64> {
        self.channel.last_answered_in().map(|d| d.as_secs_f64())
    }

    fn health(&self) -> Option<super::LinkHealth> {
        let s = self.channel.stats;
        Some(super::LinkHealth {
            requests: s.transactions,
            retries: s.retries,
            lines_skipped: s.skipped_lines,
            not_understood: s.not_understood,
            restarts: s.restarts,
        })
    }
}
