//! Validation of the `modbus` link kind: the unit address, the bus timing, and every register
//! (address, table, data type, word order, scale and unit), each mistake with its path.

use super::link::{choice, link_quantity, number, port_settings, timing, unit_factor};
use crate::plan::document::{Ctx, channel_names};
use crate::plan::modbus_link::{
    DataType, IdentityField, ModbusLinkSpec, QuantityRegister, Register, RegisterWrite, Table,
    WordOrder,
};
use crate::plan::raw::{RawModbusLink, RawRegister, Text};
use crate::plan::units::Dimension;
use std::collections::BTreeMap;

const TABLES: [(&str, Table); 4] = [
    ("holding", Table::Holding),
    ("input", Table::Input),
    ("3", Table::Holding),
    ("4", Table::Input),
];

const ORDERS: [(&str, WordOrder); 2] = [
    ("high_first", WordOrder::HighFirst),
    ("low_first", WordOrder::LowFirst),
];

/// A whole number within `range`, written in decimal or as `0x…`.
fn whole(
    ctx: &mut Ctx,
    path: &str,
    text: &Text,
    range: std::ops::RangeInclusive<u64>,
) -> Option<u64> {
    let t = text.0.trim();
    let parsed = match t.strip_prefix("0x").or_else(|| t.strip_prefix("0X")) {
        Some(hex) => u64::from_str_radix(hex, 16).ok(),
        None => t.parse::<u64>().ok(),
    };
    match parsed {
        Some(n) if range.contains(&n) => Some(n),
        _ => {
            ctx.error(
                path,
                format!(
                    "expected a whole number from {} to {} (decimal or 0x…), got \"{}\"",
                    range.start(),
                    range.end(),
                    text.0
                ),
            );
            None
        }
    }
}

/// The link's defaults that a register may override.
struct Defaults {
    table: Table,
    order: WordOrder,
}

/// What a register is for: the keys it may have differ.
#[derive(Clone, Copy, PartialEq)]
enum Use {
    Identity,
    Quantity(Dimension),
    Raw,
    Write,
}

fn register(
    ctx: &mut Ctx,
    path: &str,
    raw: &RawRegister,
    d: &Defaults,
    usage: Use,
) -> Option<Register> {
    let mut ok = true;
    let address = whole(ctx, &format!("{path}.register"), &raw.register, 0..=65_535);
    let data_type = match raw.data_type.0.trim() {
        "u16" => Some(DataType::U16),
        "i16" => Some(DataType::I16),
        "u32" => Some(DataType::U32),
        "i32" => Some(DataType::I32),
        "u64" => Some(DataType::U64),
        "f32" => Some(DataType::F32),
        "f64" => Some(DataType::F64),
        "ascii" => match &raw.words {
            Some(w) => whole(ctx, &format!("{path}.words"), w, 1..=125)
                .map(|w| DataType::Ascii { words: w as u16 }),
            None => {
                ctx.error(
                    &format!("{path}.words"),
                    "an ascii value needs its number of registers (words)",
                );
                None
            }
        },
        other => {
            ctx.error(
                &format!("{path}.type"),
                format!("\"{other}\" is not one of u16, i16, u32, i32, u64, f32, f64, ascii"),
            );
            None
        }
    };
    if raw.words.is_some() && !matches!(data_type, Some(DataType::Ascii { .. }) | None) {
        ctx.error(
            &format!("{path}.words"),
            "only an ascii value has words; the other types have their own size",
        );
        ok = false;
    }
    if matches!(data_type, Some(DataType::Ascii { .. })) && !matches!(usage, Use::Identity) {
        ctx.error(
            &format!("{path}.type"),
            "a text (ascii) register can only be an identity field",
        );
        ok = false;
    }
    let table = choice(
        ctx,
        &format!("{path}.function"),
        raw.function.as_ref(),
        d.table,
        &TABLES,
    );
    if usage == Use::Write && table == Some(Table::Input) {
        ctx.error(
            &format!("{path}.function"),
            "input registers cannot be written: a constant lives in holding registers",
        );
        ok = false;
    }
    let order = choice(
        ctx,
        &format!("{path}.word_order"),
        raw.word_order.as_ref(),
        d.order,
        &ORDERS,
    );
    let scale = number(ctx, &format!("{path}.scale"), raw.scale.as_ref(), 1.0);
    if scale == Some(0.0) {
        ctx.error(
            &format!("{path}.scale"),
            "a scale of zero would read every value as zero",
        );
        ok = false;
    }
    let unit = match (&raw.unit, usage) {
        (None, _) => Some(1.0),
        (Some(u), Use::Quantity(dim)) => unit_factor(ctx, &format!("{path}.unit"), u, dim),
        (Some(_), _) => {
            ctx.error(
                &format!("{path}.unit"),
                "only a quantity's register has a unit",
            );
            None
        }
    };
    if raw.scale.is_some() && matches!(usage, Use::Identity) {
        ctx.error(&format!("{path}.scale"), "an identity field is not scaled");
        ok = false;
    }
    if raw.format.is_some() && usage != Use::Identity {
        ctx.error(
            &format!("{path}.format"),
            "only an identity field has a format",
        );
        ok = false;
    }
    if raw.raw.is_some() && !matches!(usage, Use::Quantity(_)) {
        ctx.error(&format!("{path}.raw"), "only a quantity has raw counts");
        ok = false;
    }
    if raw.resolution.is_some() && !matches!(usage, Use::Quantity(_)) {
        ctx.error(
            &format!("{path}.resolution"),
            "only a quantity has a resolution",
        );
        ok = false;
    }
    let (address, data_type) = (address?, data_type?);
    if u32::from(address as u16) + u32::from(data_type.words()) > 65_536 {
        ctx.error(
            &format!("{path}.register"),
            "the value runs past the last register (65535)",
        );
        ok = false;
    }
    if !ok {
        return None;
    }
    Some(Register {
        table: table?,
        address: address as u16,
        data_type,
        order: order?,
        factor: scale? * unit?,
    })
}

fn identity_field(
    ctx: &mut Ctx,
    path: &str,
    raw: &RawRegister,
    d: &Defaults,
) -> Option<IdentityField> {
    let d = Defaults {
        table: Table::Holding,
        order: d.order,
    };
    let register = register(ctx, path, raw, &d, Use::Identity);
    let format = match &raw.format {
        None => Some("{value}".to_string()),
        Some(f)
            if f.0.matches("{value}").count() == 1
                && f.0
                    .replace("{value}", "")
                    .chars()
                    .all(|c| c != '{' && c != '}') =>
        {
            Some(f.0.clone())
        }
        Some(f) => {
            ctx.error(
                &format!("{path}.format"),
                format!(
                    "\"{}\" must hold {{value}} once and no other placeholder",
                    f.0
                ),
            );
            None
        }
    };
    if let Some(r) = &register
        && matches!(r.data_type, DataType::F32 | DataType::F64)
    {
        ctx.error(
            &format!("{path}.type"),
            "an identity field is text or a whole number, not a float",
        );
        return None;
    }
    Some(IdentityField {
        register: register?,
        format: format?,
    })
}

pub(super) fn modbus_link(ctx: &mut Ctx, raw: RawModbusLink) -> Option<ModbusLinkSpec> {
    let mut settings = raw.port;
    // Modbus RTU's default framing is 8 data bits, even parity (the serial line specification).
    if settings.parity.is_none() {
        settings.parity = Some(Text("even".into()));
    }
    if settings.baud.is_none() {
        settings.baud = Some(Text("19200".into()));
    }
    let port = port_settings(ctx, "link.port", &settings);
    let address = match &raw.address {
        None => Some(1),
        Some(t) => whole(ctx, "link.address", t, 1..=247).map(|a| a as u8),
    };
    let table = choice(
        ctx,
        "link.function",
        raw.function.as_ref(),
        Table::Holding,
        &TABLES,
    );
    let order = choice(
        ctx,
        "link.word_order",
        raw.word_order.as_ref(),
        WordOrder::HighFirst,
        &ORDERS,
    );
    let (timeout_s, retries) = timing(ctx, raw.timeout.as_ref(), raw.retries.as_ref(), (0.5, 2));
    let turnaround_s = ctx
        .optional_value("link.turnaround", raw.turnaround.as_ref(), Dimension::Time)
        .map(|v| v.unwrap_or(0.0));
    if let Some(t) = turnaround_s
        && !(0.0..=10.0).contains(&t)
    {
        ctx.error("link.turnaround", "the turnaround must be from 0 to 10 s");
    }
    let channels = channel_names(ctx, raw.channels);
    let channel_stride = match &raw.channel_stride {
        None => Some(0),
        Some(t) => whole(ctx, "link.channel_stride", t, 0..=65_535).map(|n| n as u16),
    };
    if channels.len() > 1 && channel_stride == Some(0) {
        ctx.error(
            "link.channel_stride",
            "with more than one channel, say how many registers lie between one channel's values and the next's",
        );
    }
    // A wrong default is reported once; the registers are still checked against a stand-in.
    let defaults_ok = table.is_some() && order.is_some();
    let order = order.unwrap_or(WordOrder::HighFirst);
    let d = Defaults {
        table: table.unwrap_or(Table::Holding),
        order,
    };
    let model = identity_field(ctx, "link.identity.model", &raw.identity.model, &d);
    let serial = identity_field(ctx, "link.identity.serial", &raw.identity.serial, &d);
    let firmware = identity_field(ctx, "link.identity.firmware", &raw.identity.firmware, &d);
    let quantities = quantities(ctx, &raw.quantities, &d);
    let mut writes = Vec::new();
    let mut writes_ok = true;
    for (name, w) in &raw.writes {
        let path = format!("link.writes.{name}");
        let d = Defaults {
            table: Table::Holding,
            order,
        };
        match register(ctx, &path, w, &d, Use::Write) {
            Some(register) => writes.push(RegisterWrite {
                name: name.clone(),
                register,
            }),
            None => writes_ok = false,
        }
    }
    if !(writes_ok && defaults_ok) {
        return None;
    }
    Some(ModbusLinkSpec {
        port: port?,
        address: address?,
        timeout_s: timeout_s?,
        retries: retries?,
        turnaround_s: turnaround_s?,
        channels,
        channel_stride: channel_stride?,
        model: model?,
        serial: serial?,
        firmware: firmware?,
        quantities: quantities?,
        writes,
    })
}

fn quantities(
    ctx: &mut Ctx,
    raw: &BTreeMap<String, RawRegister>,
    d: &Defaults,
) -> Option<Vec<QuantityRegister>> {
    let mut out = Vec::new();
    let mut ok = true;
    for (name, q) in raw {
        let path = format!("link.quantities.{name}");
        let Some(quantity) = link_quantity(ctx, &path, name) else {
            ok = false;
            continue;
        };
        let value = register(ctx, &path, q, d, Use::Quantity(quantity.dimension()));
        let raw_counts = match &q.raw {
            None => Some(None),
            Some(r) => register(ctx, &format!("{path}.raw"), r, d, Use::Raw).map(Some),
        };
        let resolution = match &q.resolution {
            Some(t) => ctx
                .value(&format!("{path}.resolution"), t, quantity.dimension())
                .map(Some),
            None => Some(
                value
                    .as_ref()
                    .filter(|v| v.data_type.is_integer())
                    .map(|v| v.factor.abs()),
            ),
        };
        match (value, raw_counts, resolution) {
            (Some(value), Some(raw), Some(resolution)) => out.push(QuantityRegister {
                quantity,
                value,
                raw,
                resolution,
            }),
            _ => ok = false,
        }
    }
    ok.then_some(out)
}
