//! Life-like rules: outer-totalistic two-state rules written in B/S notation.
//!
//! This module parses rule text (`B3/S23`, `S23/B3`, the older survival/birth
//! form `23/3`), refuses what the engine cannot run (B0 rules, rules that
//! look at which neighbours are alive rather than how many), prints rules in
//! one canonical form, and answers the one question the kernels ask: does a
//! cell live in the next generation.

use std::fmt;
use std::str::FromStr;

/// Bits 0 to 8: one per possible count of live neighbours.
const NEIGHBOUR_COUNTS: u16 = 0x1ff;

/// An outer-totalistic two-state rule: bit k of `birth` set means a dead cell
/// with k live neighbours is born; bit k of `survive` means a live cell with
/// k neighbours stays.
///
/// A `Rule` never has bit 0 of `birth` set (see [`Rule::from_masks`]) nor
/// any bit above 8.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Rule {
    birth: u16,
    survive: u16,
}

/// Rule text that cannot be turned into a [`Rule`].
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum RuleError {
    /// The text is empty or only whitespace.
    #[error("empty rule: expected B/S notation such as B3/S23")]
    Empty,
    /// A character that has no place in rule text; `position` counts
    /// characters from 1 in the text with surrounding whitespace removed.
    #[error(
        "unexpected '{}' at position {position} in rule {rule:?}",
        .character.escape_debug()
    )]
    Unexpected {
        character: char,
        position: usize,
        rule: String,
    },
    /// The digit 9: a cell has only eight neighbours.
    #[error("digit 9 at position {position} in rule {rule:?}: a cell has at most 8 neighbours")]
    NineNeighbours { position: usize, rule: String },
    /// No `/` between the two parts.
    #[error(
        "missing '/' in rule {rule:?}: write birth and survival as B3/S23, or survival/birth as 23/3"
    )]
    MissingSlash { rule: String },
    /// A letter that qualifies a neighbour count (as in `B2n3`): such rules
    /// depend on the arrangement of the neighbours, not only their number.
    #[error(
        "rule {rule:?} is not outer-totalistic ('{}' at position {position}): only outer-totalistic rules are supported",
        .character.escape_debug()
    )]
    NotTotalistic {
        character: char,
        position: usize,
        rule: String,
    },
    /// One part carries its `B` or `S` letter and the other does not.
    #[error(
        "rule {rule:?} mixes B/S notation with bare digits: give both parts their letter, as in B3/S23"
    )]
    MixedForms { rule: String },
    /// Both parts carry the same letter.
    #[error("rule {rule:?} has two '{letter}' parts")]
    RepeatedPart { letter: char, rule: String },
    /// Birth on zero neighbours: every empty cell of the infinite plane would
    /// be born, which the engine's quadtree (empty space stays empty) cannot
    /// represent. This is a documented choice, not a parsing failure.
    #[error("rule {rule} has B0 (empty cells are born): deeptime does not run B0 rules")]
    BirthOnZero { rule: String },
    /// A mask given to [`Rule::from_masks`] with a bit for more than 8
    /// neighbours.
    #[error("{which} mask {mask:#x} has bits above 8: a cell has at most 8 neighbours")]
    MaskTooWide { which: &'static str, mask: u16 },
}

impl RuleError {
    /// The character the error points at, counted from 1 in the trimmed
    /// rule text, when it points at one.
    pub fn position(&self) -> Option<usize> {
        match self {
            RuleError::Unexpected { position, .. }
            | RuleError::NineNeighbours { position, .. }
            | RuleError::NotTotalistic { position, .. } => Some(*position),
            _ => None,
        }
    }
}

impl Rule {
    /// Conway's Life, B3/S23.
    pub const LIFE: Rule = Rule {
        birth: 1 << 3,
        survive: (1 << 2) | (1 << 3),
    };

    /// Parses rule text; see the module documentation for the accepted forms.
    pub fn parse(text: &str) -> Result<Rule, RuleError> {
        let rule = text.trim();
        if rule.is_empty() {
            return Err(RuleError::Empty);
        }
        check_characters(rule)?;

        // Every character is now ASCII, so byte offsets are character offsets.
        let Some(slash) = rule.find('/') else {
            return Err(RuleError::MissingSlash { rule: rule.into() });
        };
        let (left, right) = (&rule[..slash], &rule[slash + 1..]);
        let (birth, survive) = match (part_letter(left), part_letter(right)) {
            // The older form: survival digits, then birth digits.
            (None, None) => (digits(right, slash + 1, rule)?, digits(left, 0, rule)?),
            (Some(a), Some(b)) if a == b => {
                return Err(RuleError::RepeatedPart {
                    letter: a,
                    rule: rule.into(),
                });
            }
            (Some(a), Some(_)) => {
                let left_mask = digits(&left[1..], 1, rule)?;
                let right_mask = digits(&right[1..], slash + 2, rule)?;
                if a == 'B' {
                    (left_mask, right_mask)
                } else {
                    (right_mask, left_mask)
                }
            }
            _ => return Err(RuleError::MixedForms { rule: rule.into() }),
        };
        Rule::from_masks(birth, survive)
    }

    /// Builds a rule from its masks; refuses bits above 8 and B0.
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
        let rule = Rule { birth, survive };
        if birth & 1 != 0 {
            return Err(RuleError::BirthOnZero {
                rule: rule.to_string(),
            });
        }
        Ok(rule)
    }

    /// Bit k set: a dead cell with k live neighbours is born.
    pub fn birth_mask(&self) -> u16 {
        self.birth
    }

    /// Bit k set: a live cell with k live neighbours stays alive.
    pub fn survive_mask(&self) -> u16 {
        self.survive
    }

    /// The neighbour counts that matter (in B or in S), each with whether a
    /// dead cell is born and a live one stays: what a bit-parallel stepper
    /// compares its count planes against.
    pub fn active_counts(&self) -> impl Iterator<Item = (u32, bool, bool)> + '_ {
        (0..9u32).filter_map(|count| {
            let born = self.birth >> count & 1 == 1;
            let stays = self.survive >> count & 1 == 1;
            (born || stays).then_some((count, born, stays))
        })
    }

    /// Whether a cell is alive in the next generation, given its state and its
    /// number of live neighbours. A count above 8 cannot happen on the
    /// square grid and gives `false`.
    pub fn next_state(&self, alive: bool, neighbours: u32) -> bool {
        let mask = if alive { self.survive } else { self.birth };
        neighbours <= 8 && (mask >> neighbours) & 1 == 1
    }
}

/// Letters that qualify a neighbour count in non-totalistic notation
/// (from memory: the isotropic non-totalistic notation names neighbour
/// arrangements with these letters).
fn is_arrangement_letter(c: char) -> bool {
    matches!(
        c.to_ascii_lowercase(),
        'a' | 'c' | 'e' | 'i' | 'j' | 'k' | 'n' | 'q' | 'r' | 't' | 'w' | 'y' | 'z'
    )
}

/// First pass: every character must belong to rule text. Runs before the
/// structural checks so that a stray character is reported where it is.
fn check_characters(rule: &str) -> Result<(), RuleError> {
    let mut previous: Option<char> = None;
    let mut slashes = 0;
    for (index, character) in rule.chars().enumerate() {
        let position = index + 1;
        let after_count =
            previous.is_some_and(|p| p.is_ascii_digit() || p == '-' || is_arrangement_letter(p));
        match character {
            '0'..='8' | 'b' | 'B' | 's' | 'S' => {}
            '9' => {
                return Err(RuleError::NineNeighbours {
                    position,
                    rule: rule.into(),
                });
            }
            '/' => {
                slashes += 1;
                if slashes > 1 {
                    return Err(RuleError::Unexpected {
                        character,
                        position,
                        rule: rule.into(),
                    });
                }
            }
            c if after_count && (c == '-' || is_arrangement_letter(c)) => {
                return Err(RuleError::NotTotalistic {
                    character,
                    position,
                    rule: rule.into(),
                });
            }
            _ => {
                return Err(RuleError::Unexpected {
                    character,
                    position,
                    rule: rule.into(),
                });
            }
        }
        previous = Some(character);
    }
    Ok(())
}

/// The `B` or `S` that opens a part, upper-cased, if there is one.
fn part_letter(part: &str) -> Option<char> {
    match part.chars().next()?.to_ascii_uppercase() {
        letter @ ('B' | 'S') => Some(letter),
        _ => None,
    }
}

/// The mask of a run of digits 0 to 8 that starts `offset` characters into
/// `rule`. Repeated digits are allowed and count once.
fn digits(part: &str, offset: usize, rule: &str) -> Result<u16, RuleError> {
    let mut mask = 0u16;
    for (index, character) in part.chars().enumerate() {
        match character.to_digit(10) {
            Some(digit) if digit <= 8 => mask |= 1 << digit,
            _ => {
                return Err(RuleError::Unexpected {
                    character,
                    position: offset + index + 1,
                    rule: rule.into(),
                });
            }
        }
    }
    Ok(mask)
}

fn write_digits(f: &mut fmt::Formatter<'_>, mask: u16) -> fmt::Result {
    for count in 0..=8 {
        if (mask >> count) & 1 == 1 {
            write!(f, "{count}")?;
        }
    }
    Ok(())
}

/// The canonical form: `B`, the birth digits ascending, `/S`, the survival
/// digits ascending, e.g. `B3/S23`, `B2/S`, `B/S23`.
impl fmt::Display for Rule {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("B")?;
        write_digits(f, self.birth)?;
        f.write_str("/S")?;
        write_digits(f, self.survive)
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
        ] {
            assert_eq!(Rule::parse(text), Ok(Rule::LIFE), "{text:?}");
        }
        assert_eq!("B3/S23".parse::<Rule>(), Ok(Rule::LIFE));
    }

    #[test]
    fn life_masks_and_transitions() {
        // Conway's Life: birth on exactly 3, survival on 2 or 3 (common practice).
        assert_eq!(Rule::LIFE.birth_mask(), 0b1000);
        assert_eq!(Rule::LIFE.survive_mask(), 0b1100);
        for neighbours in 0..=9 {
            assert_eq!(Rule::LIFE.next_state(false, neighbours), neighbours == 3);
            assert_eq!(
                Rule::LIFE.next_state(true, neighbours),
                neighbours == 2 || neighbours == 3
            );
        }
        assert!(!Rule::LIFE.next_state(true, 40));
    }

    #[test]
    fn other_rules() {
        // HighLife is B36/S23 and Seeds is B2/S (from memory).
        let highlife = Rule::parse("23/36").unwrap();
        assert_eq!(highlife.birth_mask(), (1 << 3) | (1 << 6));
        assert_eq!(highlife.to_string(), "B36/S23");
        let seeds = Rule::parse("/2").unwrap();
        assert_eq!(seeds.to_string(), "B2/S");
        assert_eq!(seeds.survive_mask(), 0);
        assert_eq!(Rule::parse("B2/S").unwrap(), seeds);
        let only_survive = Rule::parse("012345678/").unwrap();
        assert_eq!(only_survive.to_string(), "B/S012345678");
        assert_eq!(Rule::parse("B/S").unwrap().to_string(), "B/S");
        assert_eq!(Rule::parse("/").unwrap().to_string(), "B/S");
        assert_eq!(Rule::parse("B8765/S1").unwrap().to_string(), "B5678/S1");
    }

    #[test]
    fn display_round_trips_for_every_rule() {
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
    fn from_masks_refuses_b0_and_wide_masks() {
        assert_eq!(
            Rule::from_masks(0b1001, 0b1100).unwrap_err().to_string(),
            "rule B03/S23 has B0 (empty cells are born): deeptime does not run B0 rules"
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
                "B3S23",
                "missing '/' in rule \"B3S23\": write birth and survival as B3/S23, or survival/birth as 23/3",
            ),
            (
                "23",
                "missing '/' in rule \"23\": write birth and survival as B3/S23, or survival/birth as 23/3",
            ),
            (
                "B2n3/S23",
                "rule \"B2n3/S23\" is not outer-totalistic ('n' at position 3): only outer-totalistic rules are supported",
            ),
            (
                "B3/S2-a3",
                "rule \"B3/S2-a3\" is not outer-totalistic ('-' at position 6): only outer-totalistic rules are supported",
            ),
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
            (
                "B03/S23",
                "rule B03/S23 has B0 (empty cells are born): deeptime does not run B0 rules",
            ),
            (
                "23/03",
                "rule B03/S23 has B0 (empty cells are born): deeptime does not run B0 rules",
            ),
        ];
        for (text, message) in cases {
            assert_eq!(error(text), message, "{text:?}");
        }
    }
}
