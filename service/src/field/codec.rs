//! Engineering values to and from Modbus registers: the one place that knows register
//! types, word order, scale and offset.

use crate::config::{Codec, RegisterType, WordOrder};

/// A setpoint that cannot be written in its register's type.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{value} cannot be written as {kind} with scale {scale} and offset {offset}: {why}")]
pub struct EncodeError {
    pub value: f64,
    pub kind: RegisterType,
    pub scale: f64,
    pub offset: f64,
    pub why: &'static str,
}

/// The engineering value of registers read for `codec` (`raw * scale + offset`).
/// `words` holds exactly `codec.kind.width()` registers.
pub fn decode(codec: &Codec, words: &[u16]) -> f64 {
    let raw = match (codec.kind, words) {
        (RegisterType::U16, [w, ..]) => f64::from(*w),
        (RegisterType::I16, [w, ..]) => f64::from(*w as i16),
        (kind, [a, b, ..]) => {
            let bits = join(codec.word_order, *a, *b);
            match kind {
                RegisterType::U32 => f64::from(bits),
                RegisterType::I32 => f64::from(bits as i32),
                _ => f64::from(f32::from_bits(bits)),
            }
        }
        _ => f64::NAN,
    };
    raw * codec.scale + codec.offset
}

/// The registers that hold `value` for `codec`: `(value - offset) / scale`, rounded to the
/// nearest integer for integer types. Refuses what the type cannot hold rather than
/// clipping it, so a wrong scale never writes a wrong setpoint.
pub fn encode(codec: &Codec, value: f64) -> Result<Vec<u16>, EncodeError> {
    let raw = raw_value(codec, value)?;
    let nearest = match codec.kind {
        RegisterType::F32 => f64::from(raw as f32),
        _ => raw.round(),
    };
    words(codec, nearest).ok_or_else(|| refusal(codec, value, "the raw value is outside the type's range"))
}

/// Like [`encode`], but the value the registers hold stays inside `[min, max]`: where
/// rounding to the register's resolution would step past a bound, the neighbouring
/// register value inside is taken.
pub fn encode_within(codec: &Codec, value: f64, min: f64, max: f64) -> Result<Vec<u16>, EncodeError> {
    let raw = raw_value(codec, value)?;
    let candidates = match codec.kind {
        RegisterType::F32 => {
            let f = raw as f32;
            [f64::from(f), f64::from(f.next_down()), f64::from(f.next_up())]
        }
        _ => [raw.round(), raw.floor(), raw.ceil()],
    };
    let mut any = false;
    for candidate in candidates {
        if let Some(w) = words(codec, candidate) {
            any = true;
            if (min..=max).contains(&decode(codec, &w)) {
                return Ok(w);
            }
        }
    }
    let why = if any {
        "no register value lies within the bounds"
    } else {
        "the raw value is outside the type's range"
    };
    Err(refusal(codec, value, why))
}

fn refusal(codec: &Codec, value: f64, why: &'static str) -> EncodeError {
    EncodeError { value, kind: codec.kind, scale: codec.scale, offset: codec.offset, why }
}

fn raw_value(codec: &Codec, value: f64) -> Result<f64, EncodeError> {
    if !value.is_finite() {
        return Err(refusal(codec, value, "the value is not a finite number"));
    }
    let raw = (value - codec.offset) / codec.scale;
    if raw.is_finite() { Ok(raw) } else { Err(refusal(codec, value, "the raw value is not a finite number")) }
}

/// The registers of an already rounded raw value, or `None` when the type cannot hold it.
fn words(codec: &Codec, raw: f64) -> Option<Vec<u16>> {
    let fits = |lo: f64, hi: f64| (lo..=hi).contains(&raw);
    Some(match codec.kind {
        RegisterType::U16 if fits(0.0, f64::from(u16::MAX)) => vec![raw as u16],
        RegisterType::I16 if fits(f64::from(i16::MIN), f64::from(i16::MAX)) => vec![raw as i16 as u16],
        RegisterType::U32 if fits(0.0, f64::from(u32::MAX)) => split(codec.word_order, raw as u32),
        RegisterType::I32 if fits(f64::from(i32::MIN), f64::from(i32::MAX)) => {
            split(codec.word_order, raw as i32 as u32)
        }
        RegisterType::F32 if raw.abs() <= f64::from(f32::MAX) => {
            split(codec.word_order, (raw as f32).to_bits())
        }
        _ => return None,
    })
}

/// Two registers into 32 bits; `big` means the first register holds the high word.
fn join(order: WordOrder, first: u16, second: u16) -> u32 {
    let (high, low) = match order {
        WordOrder::Big => (first, second),
        WordOrder::Little => (second, first),
    };
    (u32::from(high) << 16) | u32::from(low)
}

fn split(order: WordOrder, bits: u32) -> Vec<u16> {
    let (high, low) = ((bits >> 16) as u16, bits as u16);
    match order {
        WordOrder::Big => vec![high, low],
        WordOrder::Little => vec![low, high],
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn codec(kind: RegisterType, word_order: WordOrder) -> Codec {
        Codec { kind, word_order, scale: 1.0, offset: 0.0 }
    }

    #[test]
    fn f32_big_word_order_puts_the_high_word_first() {
        // From memory: IEEE 754 single 1.0 is 0x3F800000.
        let c = codec(RegisterType::F32, WordOrder::Big);
        assert_eq!(encode(&c, 1.0).unwrap(), vec![0x3F80, 0x0000]);
        assert_eq!(decode(&c, &[0x3F80, 0x0000]), 1.0);
        let little = codec(RegisterType::F32, WordOrder::Little);
        assert_eq!(encode(&little, 1.0).unwrap(), vec![0x0000, 0x3F80]);
    }

    #[test]
    fn signed_types_use_twos_complement() {
        let c = codec(RegisterType::I16, WordOrder::Big);
        assert_eq!(encode(&c, -2.0).unwrap(), vec![0xFFFE]);
        assert_eq!(decode(&c, &[0xFFFE]), -2.0);
        let c = codec(RegisterType::I32, WordOrder::Little);
        assert_eq!(encode(&c, -2.0).unwrap(), vec![0xFFFE, 0xFFFF]);
        assert_eq!(decode(&c, &[0xFFFE, 0xFFFF]), -2.0);
    }

    #[test]
    fn scale_and_offset_are_applied_and_inverted() {
        let c = Codec { kind: RegisterType::U16, word_order: WordOrder::Big, scale: 0.1, offset: -50.0 };
        assert_eq!(encode(&c, 20.0).unwrap(), vec![700]);
        assert!((decode(&c, &[700]) - 20.0).abs() < 1e-12);
    }

    #[test]
    fn values_the_type_cannot_hold_are_refused_not_clipped() {
        let c = codec(RegisterType::U16, WordOrder::Big);
        assert!(encode(&c, -1.0).is_err());
        assert!(encode(&c, 65_536.0).is_err());
        assert!(encode(&c, f64::NAN).is_err());
        assert!(encode(&codec(RegisterType::F32, WordOrder::Big), 1e39).is_err());
        let scaled = Codec { kind: RegisterType::I16, word_order: WordOrder::Big, scale: 0.001, offset: 0.0 };
        let e = encode(&scaled, 40.0).unwrap_err();
        assert!(e.to_string().contains("40 cannot be written as i16 with scale 0.001"), "{e}");
    }

    #[test]
    fn rounding_to_the_register_never_steps_past_a_bound() {
        let c = Codec { kind: RegisterType::U16, word_order: WordOrder::Big, scale: 0.1, offset: 0.0 };
        // 5.96 rounds to 6.0, past a bound at 5.97: the register gets 5.9 instead.
        let w = encode_within(&c, 5.96, 1.0, 5.97).unwrap();
        assert!((decode(&c, &w) - 5.9).abs() < 1e-12);
        assert!(encode_within(&c, 5.96, 5.91, 5.97).is_err(), "no step of 0.1 lies in [5.91, 5.97]");
        let f = Codec { kind: RegisterType::F32, word_order: WordOrder::Big, scale: 1.0, offset: 0.0 };
        let max = 0.1f64; // not exactly representable in f32, which rounds it up
        let w = encode_within(&f, max, 0.0, max).unwrap();
        assert!(decode(&f, &w) <= max);
    }
}
