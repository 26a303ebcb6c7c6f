//! Validation of the `iec62056_21` link kind: the sign-on, the identity's sources and each
//! quantity's OBIS code and unit.

use super::link::{choice, link_quantity, port_settings, timing, unit_factor};
use crate::plan::document::{Ctx, channel_names};
use crate::plan::raw::{RawReadoutLink, Text};
use crate::plan::readout_link::{IdentitySource, ObisQuantity, ReadMode, ReadoutLinkSpec};

/// An OBIS code as a data line writes it: `C.D.E` (each a number, or a letter for C such as
/// `C.1.0`), optionally `A-B:` before it and `*F` or `&F` after it.
pub fn is_obis(code: &str) -> bool {
    let rest = match code.split_once(':') {
        Some((ab, rest)) => {
            let Some((a, b)) = ab.split_once('-') else {
                return false;
            };
            if !(is_number(a) && is_number(b)) {
                return false;
            }
            rest
        }
        None => code,
    };
    let cde = rest.split(['*', '&']).next().unwrap_or("");
    let parts: Vec<&str> = cde.split('.').collect();
    parts.len() == 3
        && (is_number(parts[0])
            || parts[0].len() == 1 && parts[0].chars().all(|c| c.is_ascii_uppercase()))
        && parts[1..].iter().all(|p| is_number(p))
}

fn is_number(s: &str) -> bool {
    !s.is_empty() && s.len() <= 3 && s.chars().all(|c| c.is_ascii_digit())
}

fn source(ctx: &mut Ctx, path: &str, text: &Text) -> Option<IdentitySource> {
    let t = text.0.trim();
    if t == "identification" {
        Some(IdentitySource::Identification)
    } else if is_obis(t) {
        Some(IdentitySource::Obis(t.to_string()))
    } else {
        ctx.error(
            path,
            format!("\"{t}\" is neither `identification` nor an OBIS code such as C.1.0"),
        );
        None
    }
}

pub(super) fn readout_link(ctx: &mut Ctx, raw: RawReadoutLink) -> Option<ReadoutLinkSpec> {
    // The sign-on is at 300 baud, 7 data bits, even parity, one stop bit (the standard's
    // character format for mode C).
    let mut settings = raw.port;
    settings.baud.get_or_insert(Text("300".into()));
    settings.data_bits.get_or_insert(Text("7".into()));
    settings.parity.get_or_insert(Text("even".into()));
    let port = port_settings(ctx, "link.port", &settings);
    let device_address = match &raw.device_address {
        None => Some(String::new()),
        Some(t) => {
            let a = t.0.trim();
            if a.len() <= 32
                && a.chars()
                    .all(|c| c.is_ascii_alphanumeric() || c == ' ' || c == '-')
            {
                Some(a.to_string())
            } else {
                ctx.error(
                    "link.device_address",
                    "a device address is at most 32 letters, digits, spaces and hyphens",
                );
                None
            }
        }
    };
    let switch_baud = choice(
        ctx,
        "link.baud_switch",
        raw.baud_switch.as_ref(),
        true,
        &[("true", true), ("false", false)],
    );
    // A readout at 300 baud is slow to start: a longer silence before it is given up.
    let (timeout_s, retries) = timing(ctx, raw.timeout.as_ref(), raw.retries.as_ref(), (2.0, 1));
    let max_bytes = match &raw.max_bytes {
        None => Some(65_536),
        Some(t) => match t.0.trim().parse::<usize>() {
            Ok(n) if (64..=16 << 20).contains(&n) => Some(n),
            _ => {
                ctx.error(
                    "link.max_bytes",
                    format!(
                        "expected a number of bytes from 64 to 16777216, got \"{}\"",
                        t.0
                    ),
                );
                None
            }
        },
    };
    let channels = channel_names(ctx, raw.channels);
    if channels.len() > 1 {
        ctx.error(
            "link.channels",
            "a readout names each value by its OBIS code: give one channel",
        );
    }
    let model = source(ctx, "link.identity.model", &raw.identity.model);
    let serial = source(ctx, "link.identity.serial", &raw.identity.serial);
    let firmware = source(ctx, "link.identity.firmware", &raw.identity.firmware);
    let read = choice(
        ctx,
        "link.read",
        raw.read.as_ref(),
        ReadMode::Readout,
        &[
            ("readout", ReadMode::Readout),
            ("register", ReadMode::Register),
        ],
    );
    let mut quantities = Vec::new();
    let mut ok = true;
    for (name, q) in &raw.quantities {
        let path = format!("link.quantities.{name}");
        let Some(quantity) = link_quantity(ctx, &path, name) else {
            ok = false;
            continue;
        };
        let obis = q.obis.0.trim();
        if !is_obis(obis) {
            ctx.error(
                &format!("{path}.obis"),
                format!("\"{obis}\" is not an OBIS code such as 1.8.0 or 1-0:1.8.0"),
            );
            ok = false;
        }
        let factor = match &q.unit {
            None => Some(1.0),
            Some(u) => unit_factor(ctx, &format!("{path}.unit"), u, quantity.dimension()),
        };
        let resolution = match &q.resolution {
            Some(t) => ctx
                .value(&format!("{path}.resolution"), t, quantity.dimension())
                .map(Some),
            None => Some(None),
        };
        match (factor, resolution) {
            (Some(factor), Some(resolution)) if ok => quantities.push(ObisQuantity {
                quantity,
                obis: obis.to_string(),
                unit: q.unit.as_ref().map(|u| u.0.trim().to_string()),
                factor,
                resolution,
            }),
            _ => ok = false,
        }
    }
    if !ok {
        return None;
    }
    Some(ReadoutLinkSpec {
        port: port?,
        device_address: device_address?,
        switch_baud: switch_baud?,
        timeout_s: timeout_s?,
        retries: retries?,
        max_bytes: max_bytes?,
        channels,
        model: model?,
        serial: serial?,
        firmware: firmware?,
        read: read?,
        quantities,
    })
}

#[cfg(test)]
mod tests {
    use super::is_obis;

    /// OBIS codes as IEC 62056-21 data lines write them (common practice, no published
    /// source for this list; the forms follow IEC 62056-6-1's A-B:C.D.E*F, from memory).
    #[test]
    fn obis_codes_in_their_written_forms() {
        for good in [
            "1.8.0",
            "1-0:1.8.0",
            "C.1.0",
            "0.0.0",
            "1.8.0*01",
            "32.7.0",
            "1-0:21.7.0&02",
        ] {
            assert!(is_obis(good), "{good}");
        }
        for bad in [
            "", "1.8", "1.8.0.0", "x.8.0", "1-0:1.8", "1:1.8.0", "1.8.a", "1234.8.0",
        ] {
            assert!(!is_obis(bad), "{bad}");
        }
    }
}
