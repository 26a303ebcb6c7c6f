//! Values in registers: how a number or a text is laid out in 16-bit registers (type, word
//! order), both ways. Pure functions; the bus and the link are `super`'s.

use crate::plan::modbus_link::{DataType, WordOrder};

/// What a register holds once read.
#[derive(Debug, Clone, PartialEq)]
pub enum Content {
    Number(f64),
    Text(String),
}

/// The words of a value in significance order (most significant first).
fn significance_order(words: &[u16], order: WordOrder) -> Vec<u16> {
    let mut w = words.to_vec();
    if order == WordOrder::LowFirst {
        w.reverse();
    }
    w
}

/// Reads a value out of its registers, as they came off the wire (lowest address first). The
/// number is in register counts; [`Register::factor`] turns it into base units.
pub fn decode(data_type: DataType, order: WordOrder, words: &[u16]) -> Result<Content, String> {
    if words.len() != usize::from(data_type.words()) {
        return Err(format!(
            "{} registers where a {} takes {}",
            words.len(),
            data_type.name(),
            data_type.words()
        ));
    }
    if let DataType::Ascii { .. } = data_type {
        let bytes: Vec<u8> = words.iter().flat_map(|w| w.to_be_bytes()).collect();
        let text: String = bytes
            .iter()
            .take_while(|b| **b != 0)
            .map(|b| *b as char)
            .collect();
        if text.chars().any(|c| !(' '..='~').contains(&c)) {
            return Err(format!(
                "the text {text:?} holds characters that are not printable ASCII"
            ));
        }
        return Ok(Content::Text(text.trim_end().to_string()));
    }
    let mut bytes = Vec::with_capacity(8);
    for w in significance_order(words, order) {
        bytes.extend_from_slice(&w.to_be_bytes());
    }
    let n = match data_type {
        DataType::U16 => f64::from(u16::from_be_bytes([bytes[0], bytes[1]])),
        DataType::I16 => f64::from(i16::from_be_bytes([bytes[0], bytes[1]])),
        DataType::U32 => f64::from(u32::from_be_bytes(bytes[..4].try_into().expect("4 bytes"))),
        DataType::I32 => f64::from(i32::from_be_bytes(bytes[..4].try_into().expect("4 bytes"))),
        DataType::U64 => u64::from_be_bytes(bytes[..8].try_into().expect("8 bytes")) as f64,
        DataType::F32 => f64::from(f32::from_be_bytes(bytes[..4].try_into().expect("4 bytes"))),
        DataType::F64 => f64::from_be_bytes(bytes[..8].try_into().expect("8 bytes")),
        DataType::Ascii { .. } => unreachable!("handled above"),
    };
    if !n.is_finite() {
        return Err(format!("the {} is not a finite number", data_type.name()));
    }
    Ok(Content::Number(n))
}

/// The registers (lowest address first) that hold `counts` as `data_type`: the inverse of
/// [`decode`]. Integer types take the nearest whole number and refuse one out of their range.
pub fn encode(data_type: DataType, order: WordOrder, counts: f64) -> Result<Vec<u16>, String> {
    if !counts.is_finite() {
        return Err("the value is not a finite number".into());
    }
    let whole = |lo: f64, hi: f64| -> Result<f64, String> {
        let r = counts.round();
        if r < lo || r > hi {
            Err(format!("{counts} does not fit a {}", data_type.name()))
        } else {
            Ok(r)
        }
    };
    let bytes: Vec<u8> = match data_type {
        DataType::U16 => (whole(0.0, 65_535.0)? as u16).to_be_bytes().to_vec(),
        DataType::I16 => (whole(-32_768.0, 32_767.0)? as i16).to_be_bytes().to_vec(),
        DataType::U32 => (whole(0.0, 4_294_967_295.0)? as u32).to_be_bytes().to_vec(),
        DataType::I32 => (whole(-2_147_483_648.0, 2_147_483_647.0)? as i32)
            .to_be_bytes()
            .to_vec(),
        DataType::U64 => (whole(0.0, 1.8e19)? as u64).to_be_bytes().to_vec(),
        DataType::F32 => (counts as f32).to_be_bytes().to_vec(),
        DataType::F64 => counts.to_be_bytes().to_vec(),
        DataType::Ascii { .. } => return Err("a number cannot be written as text".into()),
    };
    let words: Vec<u16> = bytes
        .chunks(2)
        .map(|c| u16::from_be_bytes([c[0], c[1]]))
        .collect();
    Ok(significance_order(&words, order))
}

/// Text into registers, two characters each, padded with NULs (for the simulator).
pub fn encode_text(text: &str, words: u16) -> Vec<u16> {
    let mut bytes: Vec<u8> = text.bytes().take(usize::from(words) * 2).collect();
    bytes.resize(usize::from(words) * 2, 0);
    bytes
        .chunks(2)
        .map(|c| u16::from_be_bytes([c[0], c[1]]))
        .collect()
}

/// An identity field as the plan's format writes it: `{value}` is the text, or the whole
/// number in decimal.
pub fn identity_text(format: &str, content: &Content) -> String {
    let value = match content {
        Content::Text(t) => t.clone(),
        Content::Number(n) => format!("{}", *n as i64),
    };
    format.replace("{value}", &value)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// IEEE 754 binary32 of 230.0 is 0x43660000 (general IEEE 754 arithmetic: 230 = 1.796875 ·
    /// 2^7, exponent 134 = 0x86); in registers high word first, or low word first.
    #[test]
    fn a_float_is_read_in_either_word_order() {
        let hi = [0x4366, 0x0000];
        assert_eq!(
            decode(DataType::F32, WordOrder::HighFirst, &hi),
            Ok(Content::Number(230.0))
        );
        let lo = [0x0000, 0x4366];
        assert_eq!(
            decode(DataType::F32, WordOrder::LowFirst, &lo),
            Ok(Content::Number(230.0))
        );
        // A u32 of 0x0001_0000 is 65536, whichever word holds the 1.
        assert_eq!(
            decode(DataType::U32, WordOrder::HighFirst, &[1, 0]),
            Ok(Content::Number(65_536.0))
        );
        assert_eq!(
            decode(DataType::U32, WordOrder::LowFirst, &[0, 1]),
            Ok(Content::Number(65_536.0))
        );
        assert_eq!(
            decode(DataType::I16, WordOrder::HighFirst, &[0xFFFE]),
            Ok(Content::Number(-2.0))
        );
    }

    #[test]
    fn a_number_becomes_a_serial_as_the_plan_writes_it() {
        let n = decode(DataType::U32, WordOrder::HighFirst, &[0x0004, 0xEC32]).unwrap();
        assert_eq!(identity_text("TM16-{value}", &n), "TM16-322610");
        let t = Content::Text("2.1.4".into());
        assert_eq!(identity_text("{value}", &t), "2.1.4");
    }

    #[test]
    fn text_registers_and_their_mistakes() {
        let words = encode_text("TM-16", 4);
        assert_eq!(words, [0x544D, 0x2D31, 0x3600, 0x0000]);
        assert_eq!(
            decode(DataType::Ascii { words: 4 }, WordOrder::HighFirst, &words),
            Ok(Content::Text("TM-16".into()))
        );
        let e = decode(
            DataType::Ascii { words: 1 },
            WordOrder::HighFirst,
            &[0x07FF],
        )
        .unwrap_err();
        assert!(e.contains("not printable"), "{e}");
        let e = decode(DataType::F32, WordOrder::HighFirst, &[0x7FC0, 0]).unwrap_err();
        assert!(e.contains("not a finite number"), "{e}");
        let e = decode(DataType::U64, WordOrder::HighFirst, &[0, 0]).unwrap_err();
        assert!(e.contains("2 registers where a u64 takes 4"), "{e}");
        assert!(encode(DataType::U16, WordOrder::HighFirst, 70_000.0).is_err());
    }

    fn any_type() -> impl Strategy<Value = DataType> {
        prop_oneof![
            Just(DataType::U16),
            Just(DataType::I16),
            Just(DataType::U32),
            Just(DataType::I32),
            Just(DataType::U64),
            Just(DataType::F32),
            Just(DataType::F64),
        ]
    }

    proptest! {
        /// Every number a type can hold comes back as written, in both word orders.
        #[test]
        fn numbers_round_trip_through_registers(
            t in any_type(),
            low_first in any::<bool>(),
            x in -1.0e6f64..1.0e6,
        ) {
            let order = if low_first { WordOrder::LowFirst } else { WordOrder::HighFirst };
            let value = match t {
                DataType::U16 => x.abs().round() % 65_536.0,
                DataType::I16 => x.round() % 32_768.0,
                DataType::U32 | DataType::U64 => x.abs().round(),
                DataType::I32 => x.round(),
                DataType::F32 => f64::from(x as f32),
                _ => x,
            };
            let words = encode(t, order, value).unwrap();
            prop_assert_eq!(words.len(), usize::from(t.words()));
            prop_assert_eq!(decode(t, order, &words), Ok(Content::Number(value)));
        }

        /// Whatever a unit sends, reading it never panics: a value or a reason.
        #[test]
        fn any_registers_read_to_a_value_or_a_reason(
            t in any_type(),
            words in proptest::collection::vec(any::<u16>(), 0..6),
        ) {
            let _ = decode(t, WordOrder::HighFirst, &words);
        }
    }
}
