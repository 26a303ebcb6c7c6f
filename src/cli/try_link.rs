//! `meterproof try-link`: a plan's link tried on one unit, with no load applied. It sends the
//! init sequence, the identity request and each quantity's request as a run would, shows the
//! raw exchange under each, what each reply pattern caught and the value it makes, and, for a
//! line no pattern matched, a guess at why. Enter tries again with the plan read anew, so an
//! engineer can edit the link section and look again in one sitting.

use super::*;
use crate::link::tap::{Direction, Recorder, TappedPort, Transcript};
use crate::link::text::{LineRole, TextLink, explain_line, explain_silence};
use crate::link::{DutLink, line::open_port};
use crate::plan::text_link::TextLinkSpec;
use crate::plan::{LinkSpec, Quantity};
use std::io::BufRead;
use std::sync::Arc;

#[derive(clap::Args)]
pub(super) struct TryLinkArgs {
    /// The plan whose link section is tried.
    plan: PathBuf,
    /// The serial port the unit is on.
    #[arg(long, conflicts_with = "bench", required_unless_present = "bench")]
    port: Option<String>,
    /// A station file: the unit at --position on it.
    #[arg(long, requires = "position")]
    bench: Option<PathBuf>,
    /// With --bench: the position of the unit.
    #[arg(long)]
    position: Option<usize>,
    /// On a Modbus bus: the unit's address (default: the station's, else the plan's).
    #[arg(long)]
    address: Option<u8>,
    /// The channel to read (default: the plan's first).
    #[arg(long)]
    channel: Option<String>,
}

pub(super) fn try_link(args: &TryLinkArgs) -> Result<i32, CliError> {
    out!("try-link talks to the unit only: it applies no load and switches no source.");
    let stdin = std::io::stdin();
    let mut lines = stdin.lock().lines();
    loop {
        let plan = Plan::load(&args.plan).map_err(CliError::Plan)?;
        let (port, address) = port_of(args, &plan)?;
        let answered = try_once(&plan, &port, address, args.channel.as_deref())?;
        out!("Enter: try again with the plan read anew · a line: send it as it is · q: quit");
        let Some(Ok(line)) = lines.next() else {
            return Ok(if answered { 0 } else { 1 });
        };
        match line.trim_end_matches(['\r', '\n']) {
            "q" | "quit" => return Ok(if answered { 0 } else { 1 }),
            "" => continue,
            raw => send_raw(&plan, &port, raw)?,
        }
    }
}

/// The unit's port (and Modbus address): given, or its position's on the station.
fn port_of(args: &TryLinkArgs, plan: &Plan) -> Result<(String, u8), CliError> {
    let plan_address = match &plan.link {
        LinkSpec::Modbus(m) => m.address,
        _ => 1,
    };
    if let Some(port) = &args.port {
        return Ok((port.clone(), args.address.unwrap_or(plan_address)));
    }
    let bench = args
        .bench
        .as_ref()
        .expect("clap requires --port or --bench");
    let station = Station::load(bench).map_err(CliError::Plan)?;
    let n = args.position.unwrap_or(1);
    let p = station
        .positions
        .iter()
        .find(|p| p.number == n)
        .ok_or_else(|| {
            CliError::Usage(format!(
                "station {} has no position {n} (it has {})",
                station.id,
                counted(station.positions.len(), "position")
            ))
        })?;
    Ok((
        p.port.clone(),
        args.address.or(p.address).unwrap_or(plan_address),
    ))
}

/// One pass: init, identity, every quantity. Whether everything was answered.
fn try_once(plan: &Plan, port: &str, address: u8, channel: Option<&str>) -> Result<bool, CliError> {
    let settings = match &plan.link {
        LinkSpec::Text(t) => t.port,
        LinkSpec::Modbus(m) => m.port,
        LinkSpec::Readout(r) => r.port,
        LinkSpec::Sim { .. } => {
            return Err(CliError::Usage(
                "the plan's link is the built-in simulator: there is no unit to try".into(),
            ));
        }
    };
    let channel = channel
        .map(str::to_string)
        .or_else(|| plan.link.channels().first().cloned())
        .unwrap_or_else(|| "L".into());
    let recorder = Recorder::default();
    let raw = open_port(port, settings).map_err(|e| CliError::Run(e.to_string()))?;
    let tapped: Box<dyn serialport::SerialPort> = Box::new(TappedPort::new(raw, recorder.clone()));
    let mut link: Box<dyn DutLink> = match &plan.link {
        LinkSpec::Text(spec) => Box::new(TextLink::new(Arc::new((**spec).clone()), tapped, port)),
        LinkSpec::Modbus(spec) => {
            let bus = crate::link::modbus::Bus::on_port(tapped, port, spec);
            Box::new(crate::link::modbus::ModbusLink::new(
                bus,
                address,
                Arc::new((**spec).clone()),
            ))
        }
        LinkSpec::Readout(spec) => Box::new(crate::link::readout::ReadoutLink::on_port(
            tapped,
            port,
            Arc::new((**spec).clone()),
        )),
        LinkSpec::Sim { .. } => unreachable!("refused above"),
    };
    out!("{}: {}", plan.link.kind(), link.describe());
    let mut answered = true;
    out!("identity");
    let id = link.identify();
    let mut carry = String::new();
    let mut not_understood = show(&plan.link, &recorder.take(), &channel, &mut carry);
    match id {
        Ok(id) => out!(
            "  ✔ model {}, serial {}, firmware {}",
            terminal_safe(&id.model),
            terminal_safe(&id.serial),
            terminal_safe(&id.firmware)
        ),
        Err(e) => {
            answered = false;
            out!("  ✘ {}", terminal_safe(&e.to_string()));
        }
    }
    for quantity in Quantity::ALL.into_iter().filter(|q| plan.link.reads(*q)) {
        out!("{} on {channel}", quantity.name());
        let value = link.read(quantity, &channel);
        let transcript = recorder.take();
        not_understood += show(&plan.link, &transcript, &channel, &mut carry);
        match value {
            Ok(v) => out!(
                "  ✔ {} = {}{}",
                quantity.name(),
                shown(v),
                scaled(&plan.link, quantity)
            ),
            Err(e) => {
                answered = false;
                out!("  ✘ {}", terminal_safe(&e.to_string()));
                if let LinkSpec::Text(spec) = &plan.link {
                    let received: Vec<u8> = transcript
                        .iter()
                        .filter(|(d, _)| *d == Direction::Received)
                        .flat_map(|(_, b)| b.clone())
                        .collect();
                    out!("    {}", explain_silence(spec, &received));
                }
            }
        }
    }
    drop(link);
    // What came after the last request (a prompt) is shown too.
    not_understood += show(&plan.link, &recorder.take(), &channel, &mut carry);
    show_rest(&plan.link, &mut carry);
    let verdict = match (answered, not_understood) {
        (true, 0) => "every request answered, every line understood".to_string(),
        (true, n) => format!(
            "every request answered, but {} not understood: the link works, slowly and with \
             lines counted against the unit; see the ✘ lines above",
            counted(n, "line")
        ),
        (false, _) => "some requests failed: see the ✘ lines above".to_string(),
    };
    for line in textwrap::wrap(&verdict, terminal::wrap_options(terminal::WIDTH)) {
        out!("{line}");
    }
    Ok(answered && not_understood == 0)
}

/// A value with its unit, in the quantity's base unit, to six significant figures.
fn shown(v: f64) -> String {
    format!("{}", (v * 1e6).round() / 1e6)
}

/// How a text reply's number becomes the value: "(counts − offset) / gain".
fn scaled(link: &LinkSpec, quantity: Quantity) -> String {
    let LinkSpec::Text(spec) = link else {
        return match quantity.unit() {
            "" => String::new(),
            unit => format!(" {unit}"),
        };
    };
    let Some(q) = spec.request_for(quantity) else {
        return String::new();
    };
    let mut how = String::from("value");
    if q.offset != 0.0 {
        how = format!("({how} − {})", q.offset);
    }
    if q.gain != 1.0 {
        how = format!("{how} / {}", q.gain);
    }
    if q.unit_factor != 1.0 {
        how = format!("{how} × {}", q.unit_factor);
    }
    let unit = quantity.unit();
    match (how.as_str(), unit) {
        ("value", "") => String::new(),
        ("value", unit) => format!(" {unit}"),
        (_, "") => format!(" ({how})"),
        (_, unit) => format!(" {unit} ({how})"),
    }
}

/// The raw exchange: for a text link line by line with what each line was taken for; for a
/// framed link (Modbus, the readout) the bytes.
///
/// A line's start (a prompt, the first characters of an echo) can come before a request is
/// sent and its end after: `carry` keeps a line's start from one exchange to the next.
fn show(link: &LinkSpec, transcript: &Transcript, channel: &str, carry: &mut String) -> usize {
    match link {
        LinkSpec::Text(spec) => show_text(spec, transcript, channel, carry),
        _ => {
            for (direction, bytes) in transcript {
                let arrow = if *direction == Direction::Sent {
                    "→"
                } else {
                    "←"
                };
                if matches!(link, LinkSpec::Modbus(_)) {
                    let hex: Vec<String> = bytes.iter().map(|b| format!("{b:02x}")).collect();
                    for piece in textwrap::wrap(&hex.join(" "), 70) {
                        out!("  {arrow} {piece}");
                    }
                } else {
                    // The readout's data lines, one to a line.
                    for piece in String::from_utf8_lossy(bytes).split_inclusive('\n') {
                        out!("  {arrow} {}", terminal_safe(&format!("{piece:?}")));
                    }
                }
            }
            0
        }
    }
}

fn show_text(
    spec: &TextLinkSpec,
    transcript: &Transcript,
    channel: &str,
    carry: &mut String,
) -> usize {
    let never = regex::Regex::new(r"[^\s\S]").expect("a valid pattern");
    let ending = spec.receive_ending;
    let split = if ending == crate::plan::text_link::LineEnding::Cr {
        '\r'
    } else {
        '\n'
    };
    let mut request = String::new();
    let mut not_understood = 0;
    for (direction, bytes) in transcript {
        let text = String::from_utf8_lossy(bytes);
        if *direction == Direction::Sent {
            out!("  → {}", terminal_safe(&format!("{text:?}")));
            request = text.trim_end_matches(['\r', '\n']).to_string();
            continue;
        }
        carry.push_str(&text);
        let pattern = pattern_for(spec, &request, channel).unwrap_or(&never);
        let mut pieces: Vec<String> = carry.split(split).map(str::to_string).collect();
        *carry = pieces.pop().unwrap_or_default();
        for piece in pieces {
            let line = piece.trim_end_matches('\r').trim_start_matches('\n');
            let role = match explain_line(spec, &request, pattern, line) {
                LineRole::Blank => String::new(),
                LineRole::Echo => "echo (skipped)".into(),
                LineRole::Skipped => "skipped".into(),
                LineRole::Reply(groups) if groups.is_empty() => "✔ reply".into(),
                LineRole::Reply(groups) => format!(
                    "✔ reply: {}",
                    groups
                        .iter()
                        .map(|(n, v)| format!("{n} {v:?}"))
                        .collect::<Vec<_>>()
                        .join(", ")
                ),
                // Input waiting before the first request is thrown away by the link.
                LineRole::NotUnderstood(_) if request.is_empty() => {
                    "before any request (thrown away)".into()
                }
                LineRole::NotUnderstood(hint) => {
                    not_understood += 1;
                    match hint {
                        Some(h) => format!("✘ not understood: {h}"),
                        None => format!("✘ not understood: does not match {}", pattern.as_str()),
                    }
                }
            };
            let quoted = terminal_safe(&format!("{line:?}"));
            if role.is_empty() {
                out!("  ← {quoted}");
            } else if quoted.chars().count() + role.chars().count() < 72 {
                out!("  ← {quoted}  {role}");
            } else {
                out!("  ← {quoted}");
                for piece in textwrap::wrap(&role, terminal::wrap_options(72)) {
                    out!("      {piece}");
                }
            }
        }
        // The prompt, as the link takes it: at a line's start, whole.
        if let Some(prompt) = spec.prompt.as_deref().filter(|p| !p.is_empty())
            && carry.starts_with(prompt)
        {
            while let Some(rest) = carry.strip_prefix(prompt) {
                *carry = rest.to_string();
            }
            out!("  ← {}  the prompt", terminal_safe(&format!("{prompt:?}")));
        }
    }
    not_understood
}

/// Bytes received after the last line ending, shown when nothing more will come.
fn show_rest(link: &LinkSpec, carry: &mut String) {
    if let LinkSpec::Text(spec) = link
        && !carry.is_empty()
    {
        out!(
            "  ← {}  no line ending ({}) after it",
            terminal_safe(&format!("{carry:?}")),
            spec.receive_ending.name()
        );
    }
    carry.clear();
}

/// The reply pattern the link waits for after sending `request`.
fn pattern_for<'a>(
    spec: &'a TextLinkSpec,
    request: &str,
    channel: &str,
) -> Option<&'a regex::Regex> {
    if let Some(init) = spec.init.iter().find(|i| i.send == request) {
        return init.reply.as_ref().map(|p| &p.regex);
    }
    if spec.identity.request == request {
        return Some(&spec.identity.reply.regex);
    }
    spec.quantities.iter().find_map(|q| {
        if q.request.replace("{channel}", channel) == request {
            Some(&q.reply.regex)
        } else {
            q.raw
                .as_ref()
                .filter(|r| r.request.replace("{channel}", channel) == request)
                .map(|r| &r.reply.regex)
        }
    })
}

/// Sends a line typed by the engineer as it is (with the link's line ending) and shows what
/// comes back within a second.
fn send_raw(plan: &Plan, port: &str, line: &str) -> Result<(), CliError> {
    use std::io::{Read, Write};
    let LinkSpec::Text(spec) = &plan.link else {
        out!("a line can be sent as it is only on a text link");
        return Ok(());
    };
    let mut p = open_port(port, spec.port).map_err(|e| CliError::Run(e.to_string()))?;
    let mut bytes = line.as_bytes().to_vec();
    bytes.extend_from_slice(spec.send_ending.bytes());
    out!(
        "  → {}",
        terminal_safe(&format!("{:?}", String::from_utf8_lossy(&bytes)))
    );
    p.write_all(&bytes)
        .and_then(|_| p.flush())
        .map_err(|e| CliError::Run(format!("{port}: {e}")))?;
    let until = Instant::now() + std::time::Duration::from_secs(1);
    let mut got = Vec::new();
    let mut buf = [0u8; 512];
    while Instant::now() < until {
        if let Ok(n) = p.read(&mut buf) {
            got.extend_from_slice(&buf[..n]);
        }
    }
    for l in String::from_utf8_lossy(&got).split_inclusive('\n') {
        out!("  ← {}", terminal_safe(&format!("{l:?}")));
    }
    if got.is_empty() {
        out!("  (nothing within 1 s)");
    }
    Ok(())
}
