//! Two-state rules on the square grid: the outer-totalistic ones in B/S
//! notation (`B3/S23`) and the isotropic non-totalistic ones in Hensel
//! notation (`B2-a/S12`, `B3/S2-i34q`), whose letters say which
//! arrangements of a count of live neighbours count.
//!
//! [`parse`] reads rule text (the slashed and slashless forms, and the older
//! survival/birth digits `23/3`); [`Display`] prints one canonical form;
//! [`letters`] holds the notation's letter table; [`sliced`] compiles a
//! rule for the steppers that work on 64 cells at once; and [`background`]
//! turns a B0 rule into rules without B0 over the cells that differ from
//! the background.
//!
//! [`Display`]: fmt::Display

use std::fmt;
use std::str::FromStr;

mod background;
pub(crate) mod fixing;
pub mod letters;
pub(crate) mod orbits;
mod parse;
pub(crate) mod sliced;
pub(crate) mod tile;

pub use background::Background;
pub use parse::RuleError;

/// Bits 0 to 8: one per possible count of live neighbours.
const NEIGHBOUR_COUNTS: u16 = 0x1ff;

/// A set of neighbourhoods: bit k of word k / 64 is the neighbourhood k,
/// whose bit i says whether neighbour i (see [`letters`]) is alive.
type Neighbourhoods = [u64; 4];

/// A two-state rule on the eight neighbours: which neighbourhoods bring a
/// dead cell to life (`birth`) and which keep a live one (`survive`). Every
/// rule that parses is isotropic: a neighbourhood and its eight symmetries
/// are in a set together.
///
/// A rule may have B0 (birth on the empty neighbourhood); the steppers of
/// the unbounded plane run such a rule through [`Rule::stepping`].
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Rule {
    birth: Neighbourhoods,
    survive: Neighbourhoods,
}

/// The neighbourhoods with a live-neighbour count in `mask`.
const fn with_counts(mask: u16) -> Neighbourhoods {
    let mut set = [0u64; 4];
    let mut n = 0;
    while n < 256 {
        if mask >> (n as u8).count_ones() & 1 == 1 {
            insert(&mut set, n as u8);
        }
        n += 1;
    }
    set
}

const fn insert(set: &mut Neighbourhoods, neighbourhood: u8) {
    set[neighbourhood as usize / 64] |= 1 << (neighbourhood % 64);
}

fn contains(set: &Neighbourhoods, neighbourhood: u8) -> bool {
    set[neighbourhood as usize / 64] >> (neighbourhood % 64) & 1 == 1
}

/// The counts whose every neighbourhood is in `set`, if the set is made of
/// whole counts.
fn whole_counts(set: &Neighbourhoods) -> Option<u16> {
    let mask = (0..9).fold(0u16, |mask, count| {
        let any = (0..=255u8).any(|n| n.count_ones() == count && contains(set, n));
        mask | (any as u16) << count
    });
    (with_counts(mask) == *set).then_some(mask)
}

impl Rule {
    /// Conway's Life, B3/S23.
    pub const LIFE: Rule = Rule {
        birth: with_counts(1 << 3),
        survive: with_counts((1 << 2) | (1 << 3)),
    };

    /// Parses rule text; see the module documentation for the accepted forms.
    pub fn parse(text: &str) -> Result<Rule, RuleError> {
        parse::parse(text)
    }

    /// Builds an outer-totalistic rule from its masks (bit k: k live
    /// neighbours); refuses bits above 8.
    pub fn from_masks(birth: u16, survive: u16) -> Result<Rule, RuleError> {
        if birth & !NEIGHBOUR_COUNTS != 0 {
            return Err(RuleError::MaskTooWide {
                which: "birth",
                mask: birth,
            });
        }
        if survive & !NEIGHBOUR_COUNTS != 0 {
            return Err(RuleError::MaskTooWide {
                which: "survive",
                mask: survive,
            });
        }
        Ok(Rule {
            birth: with_counts(birth),
            survive: with_counts(survive),
        })
    }

    /// The birth and survival masks by count (bit k: k live neighbours) of
    /// an outer-totalistic rule; `None` for a rule that looks at the
    /// arrangement of the neighbours.
    pub fn totalistic_masks(&self) -> Option<(u16, u16)> {
        Some((whole_counts(&self.birth)?, whole_counts(&self.survive)?))
    }

    /// Whether a cell is alive in the next generation, given its state and
    /// its neighbourhood (bit i: neighbour i of [`letters`] is alive).
    pub fn next_state(&self, alive: bool, neighbourhood: u8) -> bool {
        contains(
            if alive { &self.survive } else { &self.birth },
            neighbourhood,
        )
    }
}

/// The canonical form of one part: each count in ascending order, followed
/// by its letters when only some of its arrangements count, or by `-` and
/// the letters left out when that is shorter; e.g. `2-a`, `34q`.
fn write_part(f: &mut fmt::Formatter<'_>, set: &Neighbourhoods) -> fmt::Result {
    for count in 0..=8u32 {
        let all: Vec<char> = letters::letters(count).collect();
        if all.is_empty() {
            let in_set = (0..=255u8).any(|n| n.count_ones() == count && contains(set, n));
            if in_set {
                write!(f, "{count}")?;
            }
            continue;
        }
        let (named, left_out): (Vec<char>, Vec<char>) = all
            .iter()
            .partition(|&&letter| letters::arrangements(count, letter).all(|n| contains(set, n)));
        if named.is_empty() {
            continue;
        }
        write!(f, "{count}")?;
        if left_out.is_empty() {
            continue;
        }
        if left_out.len() < named.len() {
            f.write_str("-")?;
            left_out
                .iter()
                .try_for_each(|&letter| write!(f, "{letter}"))?;
        } else {
            named.iter().try_for_each(|&letter| write!(f, "{letter}"))?;
        }
    }
    Ok(())
}

/// The canonical form: `B`, the birth counts ascending, `/S`, the survival
/// counts ascending, each count with its letters when it has some, e.g.
/// `B3/S23`, `B2-a/S12`, `B3/S2-i34q`, `B/S`.
impl fmt::Display for Rule {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("B")?;
        write_part(f, &self.birth)?;
        f.write_str("/S")?;
        write_part(f, &self.survive)
    }
}

impl FromStr for Rule {
    type Err = RuleError;

    fn from_str(text: &str) -> Result<Rule, RuleError> {
        Rule::parse(text)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn error(text: &str) -> String {
        Rule::parse(text).unwrap_err().to_string()
    }

    fn canonical(text: &str) -> String {
        Rule::parse(text).unwrap().to_string()
    }

    #[test]
    fn life_in_every_accepted_form() {
        for text in [
            "B3/S23",
            "b3/s23",
            "B3/s23",
            "S23/B3",
            "s23/b3",
            "23/3",
            "  B3/S23\n",
            "B3/S32",
            "B33/S223",
            "B3S23",
            "S23B3",
            "b3s23",
        ] {
            assert_eq!(Rule::parse(text), Ok(Rule::LIFE), "{text:?}");
        }
        assert_eq!("B3/S23".parse::<Rule>(), Ok(Rule::LIFE));
    }

    #[test]
    fn life_masks_and_transitions() {
        // Conway's Life: birth on exactly 3, survival on 2 or 3 (common practice).
        assert_eq!(Rule::LIFE.totalistic_masks(), Some((0b1000, 0b1100)));
        for n in 0..=255u8 {
            let count = n.count_ones();
            assert_eq!(Rule::LIFE.next_state(false, n), count == 3);
            assert_eq!(Rule::LIFE.next_state(true, n), count == 2 || count == 3);
        }
    }

    #[test]
    fn other_rules() {
        // HighLife is B36/S23 and Seeds is B2/S (from memory).
        let highlife = Rule::parse("23/36").unwrap();
        assert_eq!(
            highlife.totalistic_masks(),
            Some(((1 << 3) | (1 << 6), 0b1100))
        );
        assert_eq!(highlife.to_string(), "B36/S23");
        let seeds = Rule::parse("/2").unwrap();
        assert_eq!(seeds.to_string(), "B2/S");
        assert_eq!(seeds.totalistic_masks(), Some((0b100, 0)));
        assert_eq!(Rule::parse("B2/S").unwrap(), seeds);
        assert_eq!(canonical("012345678/"), "B/S012345678");
        assert_eq!(canonical("B/S"), "B/S");
        assert_eq!(canonical("/"), "B/S");
        assert_eq!(canonical("BS"), "B/S");
        assert_eq!(canonical("B8765/S1"), "B5678/S1");
    }

    #[test]
    fn isotropic_rules_read_and_print_back() {
        // Rule strings from LifeWiki, "Isotropic non-totalistic rule".
        assert_eq!(canonical("B2-a/S12"), "B2-a/S12");
        assert_eq!(canonical("B3/S2-i34q"), "B3/S2-i34q");
        assert_eq!(canonical("B1e2ak3inqy4ny5e/S"), "B1e2ak3inqy4ny5e/S");
        assert_eq!(canonical("B3S2-i34q"), "B3/S2-i34q");
        // Letters are written in alphabetical order; the shorter of the two
        // forms wins, the one with the letters named on a tie.
        assert_eq!(canonical("B2nkeic/S"), "B2-a/S");
        assert_eq!(canonical("B2ekain/S"), "B2-c/S");
        assert_eq!(canonical("B2-cek/S"), "B2ain/S");
        assert_eq!(canonical("B2kec/S"), "B2cek/S");
        assert_eq!(canonical("B2c2a/S"), "B2ac/S");
        assert_eq!(canonical("B3/S4-z"), "B3/S4-z");
        assert!(
            Rule::parse("B2-a/S12")
                .unwrap()
                .totalistic_masks()
                .is_none()
        );
        // A count with every letter named is the whole count.
        assert_eq!(canonical("B3cekainyqjr/S2cekain3"), "B3/S23");
        assert_eq!(Rule::parse("B3aceijknqry/S2aceikn3"), Ok(Rule::LIFE));
    }

    #[test]
    fn every_letter_spelled_out_is_the_outer_totalistic_rule() {
        // Hensel notation: a count with no letters takes every arrangement,
        // so naming them all changes nothing (LifeWiki, same page).
        for count in 1..=7u32 {
            let all: String = letters::letters(count).collect();
            let spelled = Rule::parse(&format!("B{count}{all}/S{count}{all}")).unwrap();
            let plain = Rule::parse(&format!("B{count}/S{count}")).unwrap();
            assert_eq!(spelled, plain, "count {count}");
            for letter in letters::letters(count) {
                let without = Rule::parse(&format!("B{count}-{letter}/S")).unwrap();
                let only = Rule::parse(&format!("B{count}{letter}/S")).unwrap();
                for n in (0..=255u8).filter(|n| n.count_ones() == count) {
                    let named = letters::letter_of(n) == Some(letter);
                    assert_eq!(only.next_state(false, n), named);
                    assert_eq!(without.next_state(false, n), !named);
                }
            }
        }
    }

    #[test]
    fn display_round_trips_for_every_outer_totalistic_rule() {
        for birth in (0..=NEIGHBOUR_COUNTS).step_by(2) {
            for survive in 0..=NEIGHBOUR_COUNTS {
                let rule = Rule::from_masks(birth, survive).unwrap();
                let text = rule.to_string();
                assert_eq!(Rule::parse(&text), Ok(rule), "{text}");
                assert_eq!(Rule::parse(&text.to_lowercase()), Ok(rule), "{text}");
            }
        }
    }

    #[test]
    fn display_round_trips_for_random_isotropic_rules() {
        // A small xorshift: every letter of every count in or out at random.
        let mut state = 0x9e37_79b9_7f4a_7c15u64;
        for _ in 0..2000 {
            let mut text = String::from("B");
            for part in 0..2 {
                for count in 1..=8u32 {
                    state ^= state << 13;
                    state ^= state >> 7;
                    state ^= state << 17;
                    let picked: String = letters::letters(count)
                        .enumerate()
                        .filter(|(i, _)| state >> i & 1 == 1)
                        .map(|(_, l)| l)
                        .collect();
                    if state >> 20 & 1 == 1 {
                        text += &format!("{count}{picked}");
                    }
                }
                if part == 0 {
                    text += "/S";
                }
            }
            let rule = Rule::parse(&text).unwrap();
            let printed = rule.to_string();
            assert_eq!(Rule::parse(&printed), Ok(rule), "{text} printed {printed}");
            assert!(printed.len() <= text.len() + 1, "{text} printed {printed}");
        }
    }

    #[test]
    fn b0_rules_read_in_every_form() {
        for text in ["B03/S23", "b03s23", "S23/B03", "23/03"] {
            assert_eq!(canonical(text), "B03/S23", "{text}");
        }
        assert_eq!(canonical("B0/S8"), "B0/S8");
        assert_eq!(canonical("B02-a/S"), "B02-a/S");
    }

    #[test]
    fn from_masks_refuses_wide_masks() {
        assert_eq!(
            Rule::from_masks(0b1001, 0b1100).unwrap().to_string(),
            "B03/S23"
        );
        assert_eq!(
            Rule::from_masks(0x200, 0).unwrap_err().to_string(),
            "birth mask 0x200 has bits above 8: a cell has at most 8 neighbours"
        );
        assert_eq!(
            Rule::from_masks(0, 0x8000).unwrap_err().to_string(),
            "survive mask 0x8000 has bits above 8: a cell has at most 8 neighbours"
        );
        assert!(Rule::from_masks(0x1fe, 0x1ff).is_ok());
    }

    #[test]
    fn malformed_rules() {
        let cases = [
            ("", "empty rule: expected B/S notation such as B3/S23"),
            ("   ", "empty rule: expected B/S notation such as B3/S23"),
            (
                "B3x/S23",
                "unexpected 'x' at position 3 in rule \"B3x/S23\"",
            ),
            (" Life ", "unexpected 'L' at position 1 in rule \"Life\""),
            (
                "B3/S23/",
                "unexpected '/' at position 7 in rule \"B3/S23/\"",
            ),
            (
                "B3 /S23",
                "unexpected ' ' at position 3 in rule \"B3 /S23\"",
            ),
            (
                "B3/S2\t3",
                "unexpected '\\t' at position 6 in rule \"B3/S2\\t3\"",
            ),
            (
                "B3/S2b3",
                "unexpected 'b' at position 6 in rule \"B3/S2b3\"",
            ),
            (
                "B3/S23é",
                "unexpected 'é' at position 7 in rule \"B3/S23é\"",
            ),
            (
                "B39/S23",
                "digit 9 at position 3 in rule \"B39/S23\": a cell has at most 8 neighbours",
            ),
            (
                "B3",
                "missing '/' in rule \"B3\": write birth and survival as B3/S23 or B3S23, or survival/birth as 23/3",
            ),
            (
                "23",
                "missing '/' in rule \"23\": write birth and survival as B3/S23 or B3S23, or survival/birth as 23/3",
            ),
            ("B2x/S", "unexpected 'x' at position 3 in rule \"B2x/S\""),
            (
                "B2y/S",
                "'y' at position 3 in rule \"B2y/S\": 2 neighbours have no arrangement 'y' (2 takes a, c, e, i, k, n)",
            ),
            (
                "B3/S8c",
                "'c' at position 6 in rule \"B3/S8c\": 8 neighbours have no arrangement 'c' (8 neighbours have one arrangement and take no letter)",
            ),
            (
                "B2-/S",
                "'-' at position 3 in rule \"B2-/S\" is not followed by a letter: name the arrangements to leave out, as in B2-a",
            ),
            (
                "B2-3/S",
                "'-' at position 3 in rule \"B2-3/S\" is not followed by a letter: name the arrangements to leave out, as in B2-a",
            ),
            (
                "B2a-c/S",
                "unexpected '-' at position 4 in rule \"B2a-c/S\"",
            ),
            (
                "B2--a/S",
                "unexpected '-' at position 4 in rule \"B2--a/S\"",
            ),
            ("Ba2/S", "unexpected 'a' at position 2 in rule \"Ba2/S\""),
            ("B-2/S", "unexpected '-' at position 2 in rule \"B-2/S\""),
            ("B3S2B3", "unexpected 'B' at position 5 in rule \"B3S2B3\""),
            (
                "3/S23",
                "rule \"3/S23\" mixes B/S notation with bare digits: give both parts their letter, as in B3/S23",
            ),
            (
                "/S23",
                "rule \"/S23\" mixes B/S notation with bare digits: give both parts their letter, as in B3/S23",
            ),
            ("B3/B23", "rule \"B3/B23\" has two 'B' parts"),
            ("s3/S23", "rule \"s3/S23\" has two 'S' parts"),
            ("B3B2", "rule \"B3B2\" has two 'B' parts"),
        ];
        for (text, message) in cases {
            assert_eq!(error(text), message, "{text:?}");
        }
        assert_eq!(Rule::parse("B2y/S").unwrap_err().position(), Some(3));
    }
}
