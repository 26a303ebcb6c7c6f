//! Validation of the `text` link kind: port settings, patterns, requests and scaling.

use crate::plan::Quantity;
use crate::plan::document::{Ctx, channel_names};
use crate::plan::raw::{RawTextLink, Text};
use crate::plan::text_link::{
    Exchange, FlowControl, IdentityRequest, InitLine, LineEnding, Parity, Pattern, PortSettings,
    QuantityRequest, TextLinkSpec, WriteRequest,
};
use crate::plan::units::{self, Dimension};

/// Compiles a pattern, and checks that it has the named groups the link needs from it.
fn pattern(ctx: &mut Ctx, path: &str, text: &Text, groups: &[&str]) -> Option<Pattern> {
    if text.0.is_empty() {
        ctx.error(path, "an empty pattern matches every line");
        return None;
    }
    let regex = match regex::RegexBuilder::new(&text.0)
        .size_limit(1 << 20)
        .build()
    {
        Ok(r) => r,
        Err(e) => {
            let detail = e
                .to_string()
                .split_whitespace()
                .collect::<Vec<_>>()
                .join(" ");
            ctx.error(path, format!("the pattern does not compile: {detail}"));
            return None;
        }
    };
    let names: Vec<&str> = regex.capture_names().flatten().collect();
    let missing: Vec<&&str> = groups.iter().filter(|g| !names.contains(g)).collect();
    if !missing.is_empty() {
        let list: Vec<String> = missing.iter().map(|g| format!("(?P<{g}>...)")).collect();
        ctx.error(
            path,
            format!("the pattern needs the named group {}", list.join(" and ")),
        );
        return None;
    }
    Some(Pattern {
        text: text.0.clone(),
        regex,
    })
}

/// A request with `{channel}` and a reply pattern with a `value` group.
fn exchange(
    ctx: &mut Ctx,
    path: &str,
    raw: &crate::plan::raw::RawIdentity,
) -> Option<Option<Exchange>> {
    let request = template(ctx, &format!("{path}.request"), &raw.request, &["channel"]);
    let reply = pattern(ctx, &format!("{path}.reply"), &raw.reply, &["value"]);
    request
        .zip(reply)
        .map(|(request, reply)| Some(Exchange { request, reply }))
}

/// Checks that a request template uses only the placeholders it may.
fn template(ctx: &mut Ctx, path: &str, text: &Text, allowed: &[&str]) -> Option<String> {
    let t = &text.0;
    if t.is_empty() {
        ctx.error(path, "a request must not be empty");
        return None;
    }
    let mut rest = t.as_str();
    while let Some(open) = rest.find('{') {
        let Some(close) = rest[open..].find('}') else {
            ctx.error(path, "a `{` without its `}`");
            return None;
        };
        let name = &rest[open + 1..open + close];
        if !allowed.contains(&name) {
            ctx.error(
                path,
                format!(
                    "unknown placeholder {{{name}}}: a request may use {}",
                    allowed
                        .iter()
                        .map(|a| format!("{{{a}}}"))
                        .collect::<Vec<_>>()
                        .join(", ")
                ),
            );
            return None;
        }
        rest = &rest[open + close + 1..];
    }
    Some(t.clone())
}

pub(super) fn number(ctx: &mut Ctx, path: &str, text: Option<&Text>, default: f64) -> Option<f64> {
    match text {
        None => Some(default),
        Some(t) => match t.0.trim().parse::<f64>() {
            Ok(v) if v.is_finite() => Some(v),
            _ => {
                ctx.error(path, format!("expected a plain number, got \"{}\"", t.0));
                None
            }
        },
    }
}

pub(super) fn choice<T: Copy>(
    ctx: &mut Ctx,
    path: &str,
    text: Option<&Text>,
    default: T,
    options: &[(&str, T)],
) -> Option<T> {
    let Some(t) = text else {
        return Some(default);
    };
    match options.iter().find(|(name, _)| *name == t.0.trim()) {
        Some((_, v)) => Some(*v),
        None => {
            let names: Vec<&str> = options.iter().map(|(n, _)| *n).collect();
            ctx.error(
                path,
                format!("\"{}\" is not one of {}", t.0, names.join(", ")),
            );
            None
        }
    }
}

/// A quantity a link section names, or an error at `path` listing the names it may use.
pub(super) fn link_quantity(ctx: &mut Ctx, path: &str, name: &str) -> Option<Quantity> {
    let q = Quantity::from_name(name);
    if q.is_none() {
        let names: Vec<&str> = Quantity::ALL.iter().map(|q| q.name()).collect();
        ctx.error(
            path,
            format!(
                "unknown quantity \"{name}\", expected one of {}",
                names.join(", ")
            ),
        );
    }
    q
}

/// A link's `timeout` (more than zero, at most 60 s) and `retries` (0 to 20), with the kind's
/// defaults where the plan gives none.
pub(super) fn timing(
    ctx: &mut Ctx,
    timeout: Option<&Text>,
    retries: Option<&Text>,
    defaults: (f64, u32),
) -> (Option<f64>, Option<u32>) {
    let timeout_s = ctx
        .optional_value("link.timeout", timeout, Dimension::Time)
        .map(|v| v.unwrap_or(defaults.0));
    if let Some(t) = timeout_s
        && !(t > 0.0 && t <= 60.0)
    {
        ctx.error(
            "link.timeout",
            "the timeout must be greater than zero and at most 60 s",
        );
    }
    let retries = match retries {
        None => Some(defaults.1),
        Some(t) => match t.0.trim().parse::<u32>() {
            Ok(n) if n <= 20 => Some(n),
            _ => {
                ctx.error(
                    "link.retries",
                    format!("expected a whole number from 0 to 20, got \"{}\"", t.0),
                );
                None
            }
        },
    };
    (timeout_s, retries)
}

/// Port settings under `prefix` (such as `link.port`), with the usual 115200 8N1 defaults.
pub fn port_settings(
    ctx: &mut Ctx,
    prefix: &str,
    raw: &crate::plan::raw::RawPort,
) -> Option<PortSettings> {
    let d = PortSettings::default();
    let baud = match &raw.baud {
        None => Some(d.baud),
        Some(t) => match t.0.trim().parse::<u32>() {
            Ok(b) if b > 0 => Some(b),
            _ => {
                ctx.error(
                    &format!("{prefix}.baud"),
                    format!("\"{}\" is not a baud rate", t.0),
                );
                None
            }
        },
    };
    let data_bits = choice(
        ctx,
        &format!("{prefix}.data_bits"),
        raw.data_bits.as_ref(),
        8u8,
        &[("5", 5), ("6", 6), ("7", 7), ("8", 8)],
    );
    let parity = choice(
        ctx,
        &format!("{prefix}.parity"),
        raw.parity.as_ref(),
        Parity::None,
        &[
            ("none", Parity::None),
            ("odd", Parity::Odd),
            ("even", Parity::Even),
        ],
    );
    let stop_bits = choice(
        ctx,
        &format!("{prefix}.stop_bits"),
        raw.stop_bits.as_ref(),
        1u8,
        &[("1", 1), ("2", 2)],
    );
    let flow_control = choice(
        ctx,
        &format!("{prefix}.flow_control"),
        raw.flow_control.as_ref(),
        FlowControl::None,
        &[
            ("none", FlowControl::None),
            ("software", FlowControl::Software),
            ("hardware", FlowControl::Hardware),
        ],
    );
    Some(PortSettings {
        baud: baud?,
        data_bits: data_bits?,
        parity: parity?,
        stop_bits: stop_bits?,
        flow_control: flow_control?,
    })
}

const ENDINGS: [(&str, LineEnding); 3] = [
    ("CR", LineEnding::Cr),
    ("LF", LineEnding::Lf),
    ("CRLF", LineEnding::CrLf),
];

pub(super) fn text_link(ctx: &mut Ctx, raw: RawTextLink) -> Option<TextLinkSpec> {
    let port = port_settings(ctx, "link.port", &raw.port);
    let send_ending = choice(
        ctx,
        "link.line_ending.send",
        raw.line_ending.send.as_ref(),
        LineEnding::Lf,
        &ENDINGS,
    );
    let receive_ending = choice(
        ctx,
        "link.line_ending.receive",
        raw.line_ending.receive.as_ref(),
        LineEnding::Lf,
        &ENDINGS,
    );
    let (timeout_s, retries) = timing(ctx, raw.timeout.as_ref(), raw.retries.as_ref(), (0.5, 2));
    let pause_s = ctx
        .optional_value("link.pause", raw.pause.as_ref(), Dimension::Time)
        .map(|v| v.unwrap_or(0.0));
    let echo = choice(
        ctx,
        "link.echo",
        raw.echo.as_ref(),
        false,
        &[("true", true), ("false", false)],
    );
    let skip = match &raw.skip {
        None => Some(None),
        Some(t) => pattern(ctx, "link.skip", t, &[]).map(Some),
    };
    let restart = match &raw.restart {
        None => Some(None),
        Some(t) => pattern(ctx, "link.restart", t, &[]).map(Some),
    };
    let prompt = match &raw.prompt {
        None => Some(None),
        Some(t) if t.0.is_empty() => {
            ctx.error(
                "link.prompt",
                "a prompt cannot be empty; leave the key out for none",
            );
            None
        }
        Some(t) => Some(Some(t.0.clone())),
    };
    let init = init_lines(ctx, raw.init.as_deref().unwrap_or_default());
    let channels = channel_names(ctx, raw.channels);
    let identity = {
        let request = template(ctx, "link.identity.request", &raw.identity.request, &[]);
        let reply = pattern(
            ctx,
            "link.identity.reply",
            &raw.identity.reply,
            &["model", "serial", "firmware"],
        );
        request
            .zip(reply)
            .map(|(request, reply)| IdentityRequest { request, reply })
    };
    let mut quantities = Vec::new();
    let mut quantities_ok = true;
    for (name, q) in &raw.quantities {
        let path = format!("link.quantities.{name}");
        let Some(quantity) = link_quantity(ctx, &path, name) else {
            quantities_ok = false;
            continue;
        };
        let request = template(ctx, &format!("{path}.request"), &q.request, &["channel"]);
        let reply = pattern(ctx, &format!("{path}.reply"), &q.reply, &["value"]);
        let offset = number(ctx, &format!("{path}.offset"), q.offset.as_ref(), 0.0);
        let gain = number(ctx, &format!("{path}.gain"), q.gain.as_ref(), 1.0);
        if gain == Some(0.0) {
            ctx.error(
                &format!("{path}.gain"),
                "a gain of zero would divide by zero",
            );
        }
        let raw_exchange = match &q.raw {
            None => Some(None),
            Some(r) => exchange(ctx, &format!("{path}.raw"), r),
        };
        let unit_factor = match &q.unit {
            None => Some(1.0),
            Some(u) => unit_factor(ctx, &format!("{path}.unit"), u, quantity.dimension()),
        };
        let resolution = match &q.resolution {
            Some(t) => ctx
                .value(&format!("{path}.resolution"), t, quantity.dimension())
                .map(Some),
            None => Some(
                q.gain
                    .is_some()
                    .then(|| unit_factor.zip(gain).map(|(f, g)| (f / g).abs()))
                    .flatten(),
            ),
        };
        match (request, reply, offset, gain, unit_factor, raw_exchange) {
            (
                Some(request),
                Some(reply),
                Some(offset),
                Some(gain),
                Some(unit_factor),
                Some(raw),
            ) => quantities.push(QuantityRequest {
                quantity,
                request,
                reply,
                offset,
                gain,
                unit_factor,
                raw,
                resolution: resolution.flatten(),
            }),
            _ => quantities_ok = false,
        }
    }
    let mut writes = Vec::new();
    let mut writes_ok = true;
    for (name, w) in &raw.writes {
        let path = format!("link.writes.{name}");
        let request = template(
            ctx,
            &format!("{path}.request"),
            &w.request,
            &["channel", "value"],
        );
        let ack = pattern(ctx, &format!("{path}.ack"), &w.ack, &[]);
        let readback = match &w.readback {
            None => Some(None),
            Some(r) => exchange(ctx, &format!("{path}.readback"), r),
        };
        match (request, ack, readback) {
            (Some(request), Some(ack), Some(readback)) => writes.push(WriteRequest {
                name: name.clone(),
                request,
                ack,
                readback,
            }),
            _ => writes_ok = false,
        }
    }
    if !(quantities_ok && writes_ok) {
        return None;
    }
    Some(TextLinkSpec {
        port: port?,
        send_ending: send_ending?,
        receive_ending: receive_ending?,
        timeout_s: timeout_s?,
        retries: retries?,
        pause_s: pause_s?,
        echo: echo?,
        skip: skip?,
        restart: restart?,
        prompt: prompt?,
        init: init?,
        channels,
        identity: identity?,
        quantities,
        writes,
    })
}

/// The link's init sequence: each entry a line to send, or `{ send: LINE, reply: PATTERN }`.
fn init_lines(ctx: &mut Ctx, raw: &[serde_yaml::Value]) -> Option<Vec<InitLine>> {
    use serde_yaml::Value;
    let mut lines = Vec::new();
    let mut ok = true;
    let scalar = |v: &Value| match v {
        Value::String(s) => Some(s.clone()),
        Value::Number(n) => Some(n.to_string()),
        Value::Bool(b) => Some(b.to_string()),
        _ => None,
    };
    for (i, entry) in raw.iter().enumerate() {
        let path = format!("link.init[{}]", i + 1);
        if let Some(send) = scalar(entry) {
            lines.push(InitLine { send, reply: None });
            continue;
        }
        let Value::Mapping(map) = entry else {
            ctx.error(
                &path,
                "write a line to send, or { send: LINE, reply: PATTERN }",
            );
            ok = false;
            continue;
        };
        let mut send = None;
        let mut reply = None;
        for (key, value) in map {
            match (key.as_str(), scalar(value)) {
                (Some("send"), Some(v)) => send = Some(v),
                (Some("reply"), Some(v)) => {
                    reply = pattern(ctx, &format!("{path}.reply"), &Text(v), &[]);
                    ok &= reply.is_some();
                }
                (Some(k @ ("send" | "reply")), None) => {
                    ctx.error(&format!("{path}.{k}"), "write it as text");
                    ok = false;
                }
                (k, _) => {
                    ctx.error(
                        &path,
                        format!(
                            "unknown key {}; an init line has send and reply",
                            k.map_or_else(|| format!("{key:?}"), |k| format!("\"{k}\""))
                        ),
                    );
                    ok = false;
                }
            }
        }
        match send {
            Some(send) => lines.push(InitLine { send, reply }),
            None => {
                ctx.error(&path, "an init line needs send: the line to send");
                ok = false;
            }
        }
    }
    ok.then_some(lines)
}

/// The factor from a unit such as "mA" to the base unit of `dim`.
pub(super) fn unit_factor(ctx: &mut Ctx, path: &str, unit: &Text, dim: Dimension) -> Option<f64> {
    match units::parse(&format!("1 {}", unit.0.trim()), dim) {
        Ok(f) => Some(f),
        Err(e) => {
            ctx.error(path, e.to_string());
            None
        }
    }
}
