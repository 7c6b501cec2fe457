//! Big decimals for people, in one form everywhere a person reads them
//! (tables, summaries, progress lines, messages); `--json` keeps them
//! whole. Exact when short; else a power of ten with the leading digits
//! and, where the rest is a few low digits after a run of zeros, those
//! digits exactly (so 5×10^100 + 59 and 5×10^100 + 60 stay apart); else
//! an approximation marked as one, with its last digits.

/// Decimals of at most this many digits are printed whole.
const WHOLE_UP_TO: usize = 24;
/// Leading digits kept before the power of ten.
const LEADING: usize = 6;
/// Low digits printed exactly after the power of ten.
const LOW_UP_TO: usize = 12;

/// `decimal` (an optional `-` and ASCII digits) for people.
pub fn for_people(decimal: &str) -> String {
    let (sign, digits) = match decimal.strip_prefix('-') {
        Some(digits) => ("-", digits),
        None => ("", decimal),
    };
    if digits.len() <= WHOLE_UP_TO || !digits.bytes().all(|b| b.is_ascii_digit()) {
        return decimal.to_string();
    }
    let head = digits[..LEADING].trim_end_matches('0');
    let exponent = digits.len() - head.len();
    let rest = digits[head.len()..].trim_start_matches('0');
    if rest.is_empty() {
        return format!("{sign}{head}×10^{exponent}");
    }
    if rest.len() <= LOW_UP_TO {
        let joiner = if sign.is_empty() { "+" } else { "-" };
        return format!("{sign}{head}×10^{exponent} {joiner} {rest}");
    }
    let (first, more) = digits[..LEADING].split_at(1);
    format!(
        "≈{sign}{first}.{more}×10^{} (…{})",
        digits.len() - 1,
        &digits[digits.len() - LOW_UP_TO / 2..]
    )
}

/// A bounding box for people: `WIDTH × HEIGHT at (LEFT, TOP)`, a side
/// that is a sum in parentheses so the `×` between them stays clear.
pub fn box_for_people(left: &str, top: &str, width: &str, height: &str) -> String {
    let side = |decimal: &str| {
        let text = for_people(decimal);
        if text.contains(' ') {
            format!("({text})")
        } else {
            text
        }
    };
    format!(
        "{} × {} at ({}, {})",
        side(width),
        side(height),
        for_people(left),
        for_people(top)
    )
}

#[cfg(test)]
mod tests {
    use super::{box_for_people, for_people};

    fn power(digit: char, zeros: usize, tail: &str) -> String {
        let mut text = digit.to_string() + &"0".repeat(zeros);
        text.truncate(text.len() - tail.len());
        text + tail
    }

    #[test]
    fn short_decimals_stay_whole() {
        for text in ["0", "7", "-42", "123456789012345678901234"] {
            assert_eq!(for_people(text), text);
        }
    }

    #[test]
    fn a_power_of_ten_plus_low_digits_keeps_them() {
        // 5·10^100 + 59 (worked example, common practice for such forms).
        assert_eq!(for_people(&power('5', 100, "59")), "5×10^100 + 59");
        assert_eq!(for_people(&power('5', 100, "60")), "5×10^100 + 60");
        assert_eq!(for_people(&power('3', 101, "")), "3×10^101");
        let exact = "12".to_string() + &"0".repeat(40);
        assert_eq!(for_people(&exact), "12×10^40");
        assert_eq!(
            for_people(&format!("-{}", power('5', 30, "1"))),
            "-5×10^30 - 1"
        );
    }

    #[test]
    fn a_box_keeps_its_sides_apart() {
        let far = power('2', 100, "18");
        assert_eq!(
            box_for_people("0", "-3", &far, "5"),
            "(2×10^100 + 18) × 5 at (0, -3)"
        );
    }

    #[test]
    fn many_significant_digits_are_approximated_and_marked() {
        let digits = "1234567890".repeat(4); // 40 digits
        assert_eq!(for_people(&digits), "≈1.23456×10^39 (…567890)");
    }
}
