//! Generation numbers as people write them: `1103`, `1_000_000`, `2^40`,
//! `30*10^100`.
//!
//! Targets can be astronomically far, so the result is an unbounded
//! [`BigUint`]; but a number is only useful if it can be held, so anything
//! needing more than [`MAX_GENERATION_BITS`] bits is refused, and refused by
//! estimating its size first: `10^999999999999` fails at once instead of
//! computing a power that would never finish.

use num_bigint::BigUint;
use num_traits::{One, Zero};

/// The largest generation accepted, in bits: about 10^301029.
pub const MAX_GENERATION_BITS: u64 = 1_000_000;

/// A decimal integer with more significant digits than this is at least
/// 10^301030, which needs more than [`MAX_GENERATION_BITS`] bits
/// (301030 × log2 10 ≈ 1000000.4).
const MAX_DECIMAL_DIGITS: usize = 301_030;

/// Text longer than this is cut short in error messages.
const SHOWN_CHARS: usize = 64;

/// Generation text that cannot be turned into a number.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum GenerationError {
    /// The text is empty or only whitespace.
    #[error("empty generation: expected a number such as 1103, 2^40 or 30*10^100")]
    Empty,
    /// The text starts with a minus sign.
    #[error("generation {text:?} is negative")]
    Negative { text: String },
    /// The text is not one of the accepted forms; `reason` says which part
    /// is wrong.
    #[error("generation {text:?} is not a number: {reason}")]
    NotANumber { text: String, reason: String },
    /// The value would need more than [`MAX_GENERATION_BITS`] bits.
    #[error("generation {text} is too large (more than {MAX_GENERATION_BITS} bits)")]
    TooLarge { text: String },
}

/// Parses a generation: a decimal integer (`_` allowed between digits),
/// a power `B^E`, or a multiple of a power `M*B^E`, with optional whitespace
/// around the operators. `0^0` is 1.
pub fn parse_generations(text: &str) -> Result<BigUint, GenerationError> {
    let trimmed = text.trim();
    if trimmed.is_empty() {
        return Err(GenerationError::Empty);
    }
    let shown = shorten(trimmed);
    if trimmed.starts_with('-') {
        return Err(GenerationError::Negative { text: shown });
    }
    let not_a_number = |reason: String| GenerationError::NotANumber {
        text: shown.clone(),
        reason,
    };
    let too_large = || GenerationError::TooLarge {
        text: shown.clone(),
    };

    let (multiplier, power) = match trimmed.split_once('*') {
        Some((multiplier, power)) => (Some(multiplier), power),
        None => (None, trimmed),
    };
    if power.contains('*') {
        return Err(not_a_number("more than one '*'".into()));
    }
    if multiplier.is_some_and(|m| m.contains('^')) {
        return Err(not_a_number("write a multiple of a power as M*B^E".into()));
    }
    let (base, exponent) = match power.split_once('^') {
        Some((base, exponent)) => (base, Some(exponent)),
        None => (power, None),
    };
    if exponent.is_some_and(|e| e.contains('^')) {
        return Err(not_a_number("more than one '^'".into()));
    }
    if multiplier.is_some() && exponent.is_none() {
        return Err(not_a_number("expected a power B^E after '*'".into()));
    }

    let base = significant_digits(base).map_err(&not_a_number)?;
    let Some(exponent) = exponent else {
        return decimal(&base).ok_or_else(too_large);
    };
    let exponent = significant_digits(exponent).map_err(&not_a_number)?;
    let multiplier = match multiplier {
        Some(m) => decimal(&significant_digits(m).map_err(&not_a_number)?).ok_or_else(too_large)?,
        None => BigUint::one(),
    };

    if multiplier.is_zero() {
        return Ok(multiplier);
    }
    let power = power_of(&base, &exponent).ok_or_else(too_large)?;
    if power.is_zero() {
        return Ok(power);
    }
    // The product has at least bits(M) + bits(P) - 1 bits: refuse before
    // multiplying when even that is too many.
    if multiplier.bits() + power.bits() - 1 > MAX_GENERATION_BITS {
        return Err(too_large());
    }
    let product = multiplier * power;
    if product.bits() > MAX_GENERATION_BITS {
        return Err(too_large());
    }
    Ok(product)
}

/// `base^exponent` from their significant digits, or `None` when it would
/// need more than [`MAX_GENERATION_BITS`] bits. Sizes are checked before
/// anything large is computed.
fn power_of(base: &str, exponent: &str) -> Option<BigUint> {
    if exponent.is_empty() {
        // Anything to the power 0, including 0, is 1.
        return Some(BigUint::one());
    }
    match base {
        "" => return Some(BigUint::zero()),
        "1" => return Some(BigUint::one()),
        _ => {}
    }
    // From here the base is at least 2, so the power has more bits than the
    // exponent's value: seven digits already exceed the limit.
    if exponent.len() > 7 {
        return None;
    }
    let exponent: u32 = exponent.parse().ok()?;
    let base = decimal(base)?;
    // base^e has at least e * (bits(base) - 1) + 1 bits.
    let lower_bound = u64::from(exponent) * (base.bits() - 1) + 1;
    if lower_bound > MAX_GENERATION_BITS {
        return None;
    }
    let power = base.pow(exponent);
    (power.bits() <= MAX_GENERATION_BITS).then_some(power)
}

/// The value of significant decimal digits, or `None` when it needs more than
/// [`MAX_GENERATION_BITS`] bits.
fn decimal(digits: &str) -> Option<BigUint> {
    if digits.len() > MAX_DECIMAL_DIGITS {
        return None;
    }
    if digits.is_empty() {
        return Some(BigUint::zero());
    }
    let value = BigUint::parse_bytes(digits.as_bytes(), 10)?;
    (value.bits() <= MAX_GENERATION_BITS).then_some(value)
}

/// The digits of a decimal integer without its `_` separators and leading
/// zeros (so zero is the empty string), or the reason it is not one.
fn significant_digits(piece: &str) -> Result<String, String> {
    let piece = piece.trim();
    if piece.is_empty() {
        return Err("a number is missing around '*' or '^'".into());
    }
    let bytes = piece.as_bytes();
    let mut digits = String::with_capacity(piece.len());
    for (index, &byte) in bytes.iter().enumerate() {
        let separates_digits = byte == b'_'
            && index > 0
            && bytes[index - 1].is_ascii_digit()
            && bytes.get(index + 1).is_some_and(u8::is_ascii_digit);
        if byte.is_ascii_digit() {
            if !(digits.is_empty() && byte == b'0') {
                digits.push(char::from(byte));
            }
        } else if !separates_digits {
            return Err(format!("{:?} is not a decimal integer", shorten(piece)));
        }
    }
    Ok(digits)
}

/// Text for an error message, cut short when long.
fn shorten(text: &str) -> String {
    if text.chars().count() <= SHOWN_CHARS {
        return text.to_string();
    }
    let head: String = text.chars().take(SHOWN_CHARS - 4).collect();
    format!("{head}...")
}

#[cfg(test)]
mod tests {
    use super::*;
    use num_traits::Pow;

    fn parsed(text: &str) -> BigUint {
        parse_generations(text).unwrap_or_else(|e| panic!("{text:?}: {e}"))
    }

    fn error(text: &str) -> String {
        parse_generations(text).unwrap_err().to_string()
    }

    #[test]
    fn decimal_integers() {
        assert_eq!(parsed("1103"), BigUint::from(1103u32));
        assert_eq!(parsed("  0 "), BigUint::zero());
        assert_eq!(parsed("000042"), BigUint::from(42u32));
        assert_eq!(parsed("1_000_000"), BigUint::from(1_000_000u32));
        assert_eq!(
            parsed("340282366920938463463374607431768211456"),
            BigUint::one() << 128
        );
    }

    #[test]
    fn powers_and_multiples() {
        assert_eq!(parsed("2^40"), BigUint::one() << 40);
        assert_eq!(parsed("10^100"), BigUint::from(10u32).pow(100u32));
        assert_eq!(
            parsed("30*10^100"),
            BigUint::from(10u32).pow(100u32) * 30u32
        );
        assert_eq!(parsed(" 30 * 10 ^ 100 "), parsed("30*10^100"));
        assert_eq!(parsed("1_000 * 2 ^ 1_0"), BigUint::from(1_024_000u32));
        assert_eq!(parsed("7^0"), BigUint::one());
        assert_eq!(parsed("0^0"), BigUint::one());
        assert_eq!(parsed("0^5"), BigUint::zero());
        // Trivial bases and multipliers never compute a power, however large
        // the exponent.
        assert_eq!(parsed("1^99999999999999999999999"), BigUint::one());
        assert_eq!(parsed("0^99999999999999999999999"), BigUint::zero());
        assert_eq!(parsed("0*10^99999999999999999999999"), BigUint::zero());
    }

    #[test]
    fn size_limit_is_exact() {
        // 2^999999 has exactly 1000000 bits; 2^1000000 has one more.
        assert_eq!(parsed("2^999999").bits(), MAX_GENERATION_BITS);
        assert_eq!(
            error("2^1000000"),
            "generation 2^1000000 is too large (more than 1000000 bits)"
        );
        assert_eq!(parsed("2*2^999998").bits(), MAX_GENERATION_BITS);
        assert!(parse_generations("4*2^999998").is_err());
        assert!(parse_generations("3^630929").is_ok()); // 630929 log2 3 ≈ 999999.2
        assert!(parse_generations("3^630930").is_err()); // ≈ 1000000.8
    }

    #[test]
    fn too_large_is_refused_before_computing() {
        assert_eq!(
            error("10^10000000"),
            "generation 10^10000000 is too large (more than 1000000 bits)"
        );
        // These would take far too long (or far too much memory) if computed.
        for text in [
            "10^999999999999",
            "10^99999999999999999999999999999",
            "99999999999999999999^9999999",
            "5*10^999999999999",
            "1*10^999999999999",
        ] {
            assert!(parse_generations(text).is_err(), "{text}");
        }
        let huge_decimal = format!("1{}", "0".repeat(400_000));
        assert_eq!(
            error(&huge_decimal),
            format!(
                "generation {}... is too large (more than 1000000 bits)",
                &huge_decimal[..60]
            )
        );
        let huge_base = format!("{}^2", "9".repeat(400_000));
        assert!(parse_generations(&huge_base).is_err());
    }

    #[test]
    fn decimal_just_below_and_above_the_limit() {
        // 10^301029 needs 999997 bits; 10^301030 - 1 needs 1000001.
        let below = format!("1{}", "0".repeat(301_029));
        assert_eq!(parsed(&below).bits(), 999_997);
        let above = "9".repeat(301_030);
        assert!(parse_generations(&above).is_err());
    }

    #[test]
    fn malformed_generations() {
        let cases = [
            (
                "",
                "empty generation: expected a number such as 1103, 2^40 or 30*10^100",
            ),
            (
                " \t",
                "empty generation: expected a number such as 1103, 2^40 or 30*10^100",
            ),
            ("-5", "generation \"-5\" is negative"),
            ("-2^10", "generation \"-2^10\" is negative"),
            (
                "abc",
                "generation \"abc\" is not a number: \"abc\" is not a decimal integer",
            ),
            (
                "1 000",
                "generation \"1 000\" is not a number: \"1 000\" is not a decimal integer",
            ),
            (
                "1__000",
                "generation \"1__000\" is not a number: \"1__000\" is not a decimal integer",
            ),
            (
                "_1",
                "generation \"_1\" is not a number: \"_1\" is not a decimal integer",
            ),
            (
                "1_",
                "generation \"1_\" is not a number: \"1_\" is not a decimal integer",
            ),
            (
                "1e6",
                "generation \"1e6\" is not a number: \"1e6\" is not a decimal integer",
            ),
            (
                "+5",
                "generation \"+5\" is not a number: \"+5\" is not a decimal integer",
            ),
            (
                "2^-3",
                "generation \"2^-3\" is not a number: \"-3\" is not a decimal integer",
            ),
            (
                "2^",
                "generation \"2^\" is not a number: a number is missing around '*' or '^'",
            ),
            (
                "^3",
                "generation \"^3\" is not a number: a number is missing around '*' or '^'",
            ),
            (
                "*2^3",
                "generation \"*2^3\" is not a number: a number is missing around '*' or '^'",
            ),
            (
                "2^3^4",
                "generation \"2^3^4\" is not a number: more than one '^'",
            ),
            (
                "2*3*4^5",
                "generation \"2*3*4^5\" is not a number: more than one '*'",
            ),
            (
                "3*5",
                "generation \"3*5\" is not a number: expected a power B^E after '*'",
            ),
            (
                "2^3*4",
                "generation \"2^3*4\" is not a number: write a multiple of a power as M*B^E",
            ),
        ];
        for (text, message) in cases {
            assert_eq!(error(text), message, "{text:?}");
        }
    }
}
