//! Reading rule text: `B3/S23`, `S23/B3`, the slashless `B3S23`, the older
//! survival/birth digits `23/3`, and letters after any count 1 to 7 in
//! Hensel notation (`B2-a/S12`): the letters name the arrangements that
//! count, or after `-` those that do not.

use super::letters;
use super::{Neighbourhoods, Rule, insert};

/// Rule text that cannot be turned into a [`Rule`]. Positions count
/// characters from 1 in the text with surrounding whitespace removed.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum RuleError {
    /// The text is empty or only whitespace.
    #[error("empty rule: expected B/S notation such as B3/S23")]
    Empty,
    /// A character that has no place where it stands.
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
    /// Neither a `/` nor a second `B` or `S` between the two parts.
    #[error(
        "missing '/' in rule {rule:?}: write birth and survival as B3/S23 or B3S23, or survival/birth as 23/3"
    )]
    MissingSlash { rule: String },
    /// A letter that the count before it has no arrangement for.
    #[error(
        "'{letter}' at position {position} in rule {rule:?}: {count} neighbours have no arrangement '{letter}' ({})",
        letter_list(*count)
    )]
    UnknownLetter {
        letter: char,
        count: u32,
        position: usize,
        rule: String,
    },
    /// A `-` with no letter after it.
    #[error(
        "'-' at position {position} in rule {rule:?} is not followed by a letter: name the arrangements to leave out, as in B2-a"
    )]
    DashWithoutLetter { position: usize, rule: String },
    /// One part carries its `B` or `S` letter and the other does not.
    #[error(
        "rule {rule:?} mixes B/S notation with bare digits: give both parts their letter, as in B3/S23"
    )]
    MixedForms { rule: String },
    /// Both parts carry the same letter.
    #[error("rule {rule:?} has two '{letter}' parts")]
    RepeatedPart { letter: char, rule: String },
    /// A mask given to [`Rule::from_masks`] with a bit for more than 8
    /// neighbours.
    #[error("{which} mask {mask:#x} has bits above 8: a cell has at most 8 neighbours")]
    MaskTooWide { which: &'static str, mask: u16 },
}

/// What a count takes, for the message of a letter it does not.
fn letter_list(count: u32) -> String {
    let all: Vec<String> = letters::letters(count).map(String::from).collect();
    if all.is_empty() {
        format!("{count} neighbours have one arrangement and take no letter")
    } else {
        format!("{count} takes {}", all.join(", "))
    }
}

impl RuleError {
    /// The character the error points at, counted from 1 in the trimmed
    /// rule text, when it points at one.
    pub fn position(&self) -> Option<usize> {
        match self {
            RuleError::Unexpected { position, .. }
            | RuleError::NineNeighbours { position, .. }
            | RuleError::UnknownLetter { position, .. }
            | RuleError::DashWithoutLetter { position, .. } => Some(*position),
            _ => None,
        }
    }
}

fn is_part_letter(character: char) -> bool {
    matches!(character, 'b' | 'B' | 's' | 'S')
}

fn is_arrangement_letter(character: char) -> bool {
    letters::LETTER_ORDER.contains(&character)
}

pub(super) fn parse(text: &str) -> Result<Rule, RuleError> {
    let rule = text.trim();
    if rule.is_empty() {
        return Err(RuleError::Empty);
    }
    check_characters(rule)?;

    // Every character is now ASCII, so byte offsets are character offsets.
    let split = match rule.find('/') {
        Some(slash) => Some((slash, slash + 1)),
        // The slashless form: the second part starts at the next B or S.
        None if rule.starts_with(is_part_letter) => {
            rule[1..].find(is_part_letter).map(|at| (at + 1, at + 1))
        }
        None => None,
    };
    let Some((left_end, right_start)) = split else {
        return Err(RuleError::MissingSlash { rule: rule.into() });
    };
    let (left, right) = (&rule[..left_end], &rule[right_start..]);
    let part = |text: &str, offset: usize| neighbourhoods(text, offset, rule);
    let (birth, survive) = match (part_letter(left), part_letter(right)) {
        // The older form: survival digits, then birth digits.
        (None, None) => (part(right, right_start)?, part(left, 0)?),
        (Some(a), Some(b)) if a == b => {
            return Err(RuleError::RepeatedPart {
                letter: a,
                rule: rule.into(),
            });
        }
        (Some(a), Some(_)) => {
            let left_set = part(&left[1..], 1)?;
            let right_set = part(&right[1..], right_start + 1)?;
            if a == 'B' {
                (left_set, right_set)
            } else {
                (right_set, left_set)
            }
        }
        _ => return Err(RuleError::MixedForms { rule: rule.into() }),
    };
    Ok(Rule { birth, survive })
}

/// First pass: every character must belong to rule text. Runs before the
/// structural checks so that a stray character is reported where it is.
fn check_characters(rule: &str) -> Result<(), RuleError> {
    let mut slashes = 0;
    for (index, character) in rule.chars().enumerate() {
        let position = index + 1;
        match character {
            '0'..='8' | '-' => {}
            c if is_part_letter(c) || is_arrangement_letter(c) => {}
            '9' => {
                return Err(RuleError::NineNeighbours {
                    position,
                    rule: rule.into(),
                });
            }
            '/' if slashes == 0 => slashes += 1,
            _ => {
                return Err(RuleError::Unexpected {
                    character,
                    position,
                    rule: rule.into(),
                });
            }
        }
    }
    Ok(())
}

/// The `B` or `S` that opens a part, upper-cased, if there is one.
fn part_letter(part: &str) -> Option<char> {
    let letter = part.chars().next()?.to_ascii_uppercase();
    is_part_letter(letter).then_some(letter)
}

/// One count and what follows it: the letters named, after a `-` if there
/// is one.
struct Item {
    count: u32,
    dash: Option<usize>,
    letters: Vec<char>,
}

impl Item {
    /// The neighbourhoods the item names.
    fn add_to(&self, set: &mut Neighbourhoods, rule: &str) -> Result<(), RuleError> {
        if let (Some(position), true) = (self.dash, self.letters.is_empty()) {
            return Err(RuleError::DashWithoutLetter {
                position,
                rule: rule.into(),
            });
        }
        for n in 0..=255u8 {
            if n.count_ones() != self.count {
                continue;
            }
            let named = match letters::letter_of(n) {
                _ if self.letters.is_empty() => true,
                Some(letter) => self.letters.contains(&letter) != self.dash.is_some(),
                None => true,
            };
            if named {
                insert(set, n);
            }
        }
        Ok(())
    }
}

/// The neighbourhoods a part names; the part starts `offset` characters
/// into `rule`. Repeated counts and letters are allowed and add up.
fn neighbourhoods(part: &str, offset: usize, rule: &str) -> Result<Neighbourhoods, RuleError> {
    let mut set = [0u64; 4];
    let mut item: Option<Item> = None;
    for (index, character) in part.chars().enumerate() {
        let position = offset + index + 1;
        let unexpected = || RuleError::Unexpected {
            character,
            position,
            rule: rule.into(),
        };
        if let Some(count) = character.to_digit(10) {
            if let Some(done) = item.replace(Item {
                count,
                dash: None,
                letters: Vec::new(),
            }) {
                done.add_to(&mut set, rule)?;
            }
            continue;
        }
        let Some(current) = item.as_mut() else {
            return Err(unexpected());
        };
        match character {
            '-' if current.dash.is_none() && current.letters.is_empty() => {
                current.dash = Some(position);
            }
            letter if is_arrangement_letter(letter) => {
                if !letters::letters(current.count).any(|l| l == letter) {
                    return Err(RuleError::UnknownLetter {
                        letter,
                        count: current.count,
                        position,
                        rule: rule.into(),
                    });
                }
                current.letters.push(letter);
            }
            _ => return Err(unexpected()),
        }
    }
    if let Some(done) = item {
        done.add_to(&mut set, rule)?;
    }
    Ok(set)
}
