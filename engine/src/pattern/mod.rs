//! Pattern text: the live cells of a pattern as read from RLE or plaintext,
//! and RLE as written back.
//!
//! Readers take raw bytes and never trust them: any malformed input gives a
//! [`PatternError`] with a line and column, never a panic, and every size is
//! checked against [`MAX_COORDINATE`] and [`MAX_LIVE_CELLS`] before it is
//! used. Cells are kept as horizontal runs, so a run of a billion cells costs
//! the same as a run of one. Coordinates: the pattern's top-left cell is
//! (0, 0), x grows right, y grows down.

pub mod plaintext;
pub mod rle;
pub mod write;

/// Rows and columns at or beyond this are refused: every live cell has
/// `x < MAX_COORDINATE` and `y < MAX_COORDINATE`.
pub const MAX_COORDINATE: u64 = 1 << 40;

/// A pattern with more live cells than this is refused.
pub const MAX_LIVE_CELLS: u64 = 1 << 32;

/// A horizontal run of live cells: row `y`, columns `x .. x + len`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Run {
    pub y: u64,
    pub x: u64,
    pub len: u64,
}

/// Where in a text something was found, 1-based.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Position {
    pub line: usize,
    pub column: usize,
}

/// A pattern as read from text.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Pattern {
    /// The rule text of an RLE header, unparsed, with its position (so a bad
    /// rule can be reported at file:line:column).
    pub rule: Option<(String, Position)>,
    /// Live cells as runs, sorted by (y, x), non-overlapping, len >= 1.
    pub runs: Vec<Run>,
}

impl Pattern {
    /// The number of live cells.
    pub fn population(&self) -> u64 {
        let mut total: u64 = 0;
        for run in &self.runs {
            // Readers keep the total within MAX_LIVE_CELLS, but the fields
            // are public.
            total = total.saturating_add(run.len);
        }
        total
    }
}

/// A malformed pattern text: what is wrong and where.
#[derive(Clone, Debug, thiserror::Error, PartialEq, Eq)]
#[error("{}:{}: {message}", position.line, position.column)]
pub struct PatternError {
    pub position: Position,
    pub message: String,
}

impl PatternError {
    pub(crate) fn new(line: usize, column: usize, message: impl Into<String>) -> PatternError {
        PatternError {
            position: Position { line, column },
            message: message.into(),
        }
    }

    /// Input with no cells and no header at all.
    pub(crate) fn empty() -> PatternError {
        PatternError::new(1, 1, "empty pattern: no cells and no header")
    }
}

/// Reads either format, recognised by content: blank lines are skipped, and
/// a first non-blank line that starts with `!` (a plaintext comment) or is
/// made only of `.`, `O`, `o` and `*` means plaintext; anything else is RLE.
pub fn read_pattern(bytes: &[u8]) -> Result<Pattern, PatternError> {
    let mut source = Source::new(bytes);
    while let Some(line) = source.next_line()? {
        if line.text.trim().is_empty() {
            continue;
        }
        let first = line.text.trim_end();
        let plaintext = first.starts_with('!')
            || first
                .bytes()
                .all(|b| matches!(b, b'.' | b'O' | b'o' | b'*'));
        return if plaintext {
            plaintext::read_plaintext(bytes)
        } else {
            rle::read_rle(bytes)
        };
    }
    Err(PatternError::empty())
}

/// One line of input, without its line ending.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Line<'a> {
    pub(crate) text: &'a str,
    /// 1-based.
    pub(crate) number: usize,
}

impl Line<'_> {
    /// The 1-based column of the character that starts at byte `offset`.
    pub(crate) fn column(&self, offset: usize) -> usize {
        self.text[..offset].chars().count() + 1
    }
}

/// Splits input bytes into lines (LF, CRLF or a lone CR end a line) and
/// checks them: a line is handed out only if it is valid UTF-8 and free of
/// control characters other than tab. A leading UTF-8 byte-order mark is
/// skipped. Bytes after the line where a reader stops are never looked at.
pub(crate) struct Source<'a> {
    /// The longest valid UTF-8 prefix of the input.
    text: &'a str,
    /// The byte just after `text`, when the input is not valid UTF-8 there.
    invalid: Option<u8>,
    /// Byte offset of the next line in `text`.
    offset: usize,
    /// Number of the next line.
    line: usize,
}

impl<'a> Source<'a> {
    pub(crate) fn new(bytes: &'a [u8]) -> Source<'a> {
        let bytes = bytes.strip_prefix(b"\xef\xbb\xbf").unwrap_or(bytes);
        let (text, invalid) = match std::str::from_utf8(bytes) {
            Ok(text) => (text, None),
            Err(error) => {
                let (valid, rest) = bytes.split_at(error.valid_up_to());
                // `valid_up_to` promises that this prefix is UTF-8.
                let text = std::str::from_utf8(valid).unwrap_or_default();
                (text, rest.first().copied())
            }
        };
        Source {
            text,
            invalid,
            offset: 0,
            line: 1,
        }
    }

    pub(crate) fn next_line(&mut self) -> Result<Option<Line<'a>>, PatternError> {
        let rest = &self.text[self.offset..];
        if rest.is_empty() {
            return match self.invalid {
                Some(byte) => Err(unexpected_byte(self.line, 1, byte)),
                None => Ok(None),
            };
        }
        let number = self.line;
        self.line += 1;
        let (text, consumed) = match rest.find(['\n', '\r']) {
            Some(end) if rest[end..].starts_with("\r\n") => (&rest[..end], end + 2),
            Some(end) => (&rest[..end], end + 1),
            None => (rest, rest.len()),
        };
        self.offset += consumed;
        let line = Line { text, number };
        if self.offset == self.text.len()
            && consumed == text.len()
            && let Some(byte) = self.invalid
        {
            // The line is cut short by a byte that is not UTF-8.
            return Err(unexpected_byte(number, line.column(text.len()), byte));
        }
        for (index, character) in text.chars().enumerate() {
            if character.is_control() && character != '\t' {
                let column = index + 1;
                return Err(match u8::try_from(character) {
                    Ok(byte) if byte.is_ascii() => unexpected_byte(number, column, byte),
                    _ => PatternError::new(
                        number,
                        column,
                        format!("unexpected character U+{:04X}", u32::from(character)),
                    ),
                });
            }
        }
        Ok(Some(line))
    }
}

fn unexpected_byte(line: usize, column: usize, byte: u8) -> PatternError {
    PatternError::new(line, column, format!("unexpected byte 0x{byte:02x}"))
}

/// The error for a character that has no place where it stands.
pub(crate) fn unexpected_character(line: &Line<'_>, offset: usize) -> PatternError {
    let character = line.text[offset..].chars().next().unwrap_or(' ');
    PatternError::new(
        line.number,
        line.column(offset),
        format!("unexpected '{}'", character.escape_debug()),
    )
}

/// Text for an error message, cut short when long.
pub(crate) fn shorten(text: &str) -> String {
    const SHOWN_CHARS: usize = 40;
    if text.chars().count() <= SHOWN_CHARS {
        return text.to_string();
    }
    let head: String = text.chars().take(SHOWN_CHARS - 3).collect();
    format!("{head}...")
}

/// Appends `len` live cells at (`x`, `y`) to runs sorted by (y, x), joining
/// them to the last run when they touch it.
pub(crate) fn push_run(runs: &mut Vec<Run>, y: u64, x: u64, len: u64) {
    if let Some(last) = runs.last_mut()
        && last.y == y
        && last.x + last.len == x
    {
        last.len += len;
        return;
    }
    runs.push(Run { y, x, len });
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn cells(pattern: &Pattern) -> Vec<(u64, u64)> {
        let mut cells = Vec::new();
        for run in &pattern.runs {
            for x in run.x..run.x + run.len {
                cells.push((x, run.y));
            }
        }
        cells
    }

    // The glider as (x, y), from its standard RLE (common practice).
    const GLIDER: [(u64, u64); 5] = [(1, 0), (2, 1), (0, 2), (1, 2), (2, 2)];

    #[test]
    fn detects_rle_and_plaintext() {
        let rle = read_pattern(b"#N glider\nx = 3, y = 3, rule = B3/S23\nbob$2bo$3o!\n").unwrap();
        assert_eq!(cells(&rle), GLIDER);
        assert!(rle.rule.is_some());
        let plaintext = read_pattern(b"!Name: glider\n.O.\n..O\nOOO\n").unwrap();
        assert_eq!(cells(&plaintext), GLIDER);
        assert_eq!(plaintext.rule, None);
        let no_comment = read_pattern(b"\n\n  \n.O\n..O\nOOO").unwrap();
        assert_eq!(cells(&no_comment), GLIDER);
        let headerless_rle = read_pattern(b"bob$2bo$3o!").unwrap();
        assert_eq!(cells(&headerless_rle), GLIDER);
        assert_eq!(headerless_rle.population(), 5);
    }

    #[test]
    fn empty_inputs() {
        let empty = PatternError::new(1, 1, "empty pattern: no cells and no header");
        for input in [
            &b""[..],
            b"\n\n",
            b"  \r\n\t\r",
            b"#C only a comment\n",
            b"!Name: only a comment\n",
            b"\xef\xbb\xbf",
        ] {
            assert_eq!(read_pattern(input), Err(empty.clone()), "{input:?}");
        }
    }

    #[test]
    fn binary_input_is_an_error_not_a_panic() {
        let cases: [(&[u8], usize, usize, &str); 6] = [
            (&[0xff, 0xfe, 0x00], 1, 1, "unexpected byte 0xff"),
            (&[0x00, 0x01], 1, 1, "unexpected byte 0x00"),
            (b"x = 1, y = 1\nbo\x9fo!", 2, 3, "unexpected byte 0x9f"),
            (b"x = 1, y = 1\n\xc3", 2, 1, "unexpected byte 0xc3"),
            (b"#C caf\xc3\xa9\nb\x07o!", 2, 2, "unexpected byte 0x07"),
            (b"#C \xc2\x85\n", 1, 4, "unexpected character U+0085"),
        ];
        for (input, line, column, message) in cases {
            assert_eq!(
                read_pattern(input),
                Err(PatternError::new(line, column, message)),
                "{input:?}"
            );
        }
    }

    #[test]
    fn error_display() {
        let error = PatternError::new(3, 14, "unexpected 'q'");
        assert_eq!(error.to_string(), "3:14: unexpected 'q'");
    }

    #[test]
    fn population_saturates() {
        let pattern = Pattern {
            rule: None,
            runs: vec![
                Run {
                    y: 0,
                    x: 0,
                    len: u64::MAX,
                },
                Run { y: 1, x: 0, len: 5 },
            ],
        };
        assert_eq!(pattern.population(), u64::MAX);
    }

    /// What every reader promises of the runs it returns.
    fn check_runs(pattern: &Pattern) -> Result<(), TestCaseError> {
        for pair in pattern.runs.windows(2) {
            let (a, b) = (pair[0], pair[1]);
            // Sorted, apart: touching runs would have been joined.
            prop_assert!(
                a.y < b.y || (a.y == b.y && a.x + a.len < b.x),
                "{a:?} {b:?}"
            );
        }
        for run in &pattern.runs {
            prop_assert!(run.len >= 1);
            prop_assert!(run.y < MAX_COORDINATE && run.x + run.len <= MAX_COORDINATE);
        }
        prop_assert!(pattern.population() <= MAX_LIVE_CELLS);
        Ok(())
    }

    proptest! {
        #[test]
        fn arbitrary_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..300)) {
            if let Ok(pattern) = read_pattern(&bytes) {
                check_runs(&pattern)?;
            }
        }

        #[test]
        fn pattern_like_text_never_panics(
            text in "[xyXY=, 0-9bo$!#\n\r\t.O*rulB/S]{0,300}",
        ) {
            for result in [
                read_pattern(text.as_bytes()),
                rle::read_rle(text.as_bytes()),
                plaintext::read_plaintext(text.as_bytes()),
            ] {
                match result {
                    Ok(pattern) => check_runs(&pattern)?,
                    Err(error) => {
                        prop_assert!(error.position.line >= 1 && error.position.column >= 1);
                        prop_assert!(!error.message.is_empty());
                    }
                }
            }
        }
    }
}
