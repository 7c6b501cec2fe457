//! Reading RLE: `#` comment lines, an optional header line
//! `x = 3, y = 3, rule = B3/S23`, then a body of run-length items ended by
//! `!`.
//!
//! The body is read item by item: a count of dead cells or rows is applied
//! in constant time whatever its size, a count of live cells in one step per
//! leaf it touches; every count and cursor move is checked against the
//! limits of the module and the budget before it is applied.

use super::{
    Builder, Line, MAX_COORDINATE, MAX_LIVE_CELLS, MAX_POSITION, Pattern, PatternError, Position,
    Source, shorten, unexpected_character,
};

/// Reads an RLE pattern.
///
/// Body items are an optional decimal run count followed by a tag: `b` dead
/// cells, `o` live cells, `$` end of row(s), `!` end of pattern. Whitespace
/// and line breaks may stand between items and between a count and its tag;
/// a line whose first non-blank character is `#` is a comment; everything
/// after `!` is ignored. The header's `x` and `y` are checked but not used:
/// the cells alone say where the pattern is. The pattern's leaves may take
/// up to `budget` bytes.
pub fn read_rle(bytes: &[u8], budget: u64) -> Result<Pattern, PatternError> {
    let mut source = Source::new(bytes);
    let mut rule = None;
    let mut body = Body::new(budget);
    let mut started = false;
    // Where a missing '!' is reported: just after the last thing read.
    let mut end = Position { line: 1, column: 1 };
    // The `#position X Y` comment's place and value, if there is one.
    let mut origin: Option<(Position, (i64, i64))> = None;
    while let Some(line) = source.next_line()? {
        let trimmed = line.text.trim_start();
        if let Some(rest) = trimmed.strip_prefix("#position") {
            let at = Position {
                line: line.number,
                column: line.column(line.text.len() - trimmed.len()),
            };
            origin = Some((at, read_position(rest, at)?));
            continue;
        }
        if trimmed.starts_with(super::write::ALIVE_BACKGROUND) {
            return Err(PatternError::new(
                line.number,
                line.column(line.text.len() - trimmed.len()),
                "the text holds the dead cells of a state whose background is alive (a B0 rule's); \
                 a pattern starts on a dead background: resume the run from its checkpoint instead",
            ));
        }
        if trimmed.is_empty() || trimmed.starts_with('#') {
            continue;
        }
        if !started {
            started = true;
            if is_header(trimmed) {
                rule = read_header(&line)?;
                end = Position {
                    line: line.number,
                    column: line.column(line.text.trim_end().len()),
                };
                continue;
            }
        }
        if body.read_line(&line)? {
            let mut pattern = body.cells.finish(rule);
            if let Some((at, (x, y))) = origin {
                let (width, height) = pattern.extent();
                let far =
                    |c: i64, side: u64| c.unsigned_abs().max((c + side as i64).unsigned_abs());
                if far(x, width) > MAX_POSITION as u64 || far(y, height) > MAX_POSITION as u64 {
                    return Err(PatternError::new(
                        at.line,
                        at.column,
                        format!(
                            "#position {x} {y}: the pattern would reach beyond 2^38 cells from \
                             (0, 0); delete the line to read the cells with their corner at (0, 0)"
                        ),
                    ));
                }
                pattern.origin = Some((x, y));
            }
            return Ok(pattern);
        }
        if let Some(last) = body.last_end {
            end = last;
        }
    }
    if !started {
        return Err(PatternError::empty());
    }
    if let Some(count) = body.pending {
        return Err(count.without_tag());
    }
    Err(PatternError::new(
        end.line,
        end.column,
        "pattern ends without '!'",
    ))
}

/// The two integers of a `#position X Y` comment (after its keyword),
/// each at most [`MAX_POSITION`] from 0.
fn read_position(rest: &str, at: Position) -> Result<(i64, i64), PatternError> {
    let bad = || {
        PatternError::new(
            at.line,
            at.column,
            format!(
                "#position{}: expected two integers of at most 2^38, the column and row of the \
                 top-left cell (delete the line to read the cells with their corner at (0, 0))",
                shorten(rest)
            ),
        )
    };
    let mut parts = rest.split_whitespace();
    let mut next = || -> Result<i64, PatternError> {
        let value: i64 = parts.next().ok_or_else(bad)?.parse().map_err(|_| bad())?;
        if value.unsigned_abs() > MAX_POSITION as u64 {
            return Err(bad());
        }
        Ok(value)
    };
    let position = (next()?, next()?);
    if parts.next().is_some() {
        return Err(bad());
    }
    Ok(position)
}

/// A header line starts with `x =` (or `y =`, `rule =`, in any case); no
/// body line can.
fn is_header(trimmed: &str) -> bool {
    let key_end = trimmed
        .find(|c: char| !c.is_ascii_alphabetic())
        .unwrap_or(trimmed.len());
    let key = trimmed[..key_end].to_ascii_lowercase();
    matches!(key.as_str(), "x" | "y" | "rule") && trimmed[key_end..].trim_start().starts_with('=')
}

/// Checks a header line and returns its rule text, if it has one.
fn read_header(line: &Line<'_>) -> Result<Option<(String, Position)>, PatternError> {
    let mut x_seen = false;
    let mut y_seen = false;
    let mut rule: Option<(String, Position)> = None;
    let mut item_start = 0;
    for item in line.text.split(',') {
        let start = item_start;
        item_start += item.len() + 1;
        let key_offset = start + (item.len() - item.trim_start().len());
        let error = |offset: usize, message: String| {
            PatternError::new(line.number, line.column(offset), message)
        };
        if item.trim().is_empty() {
            return Err(error(key_offset, "empty item in header".into()));
        }
        let Some(equals) = item.find('=') else {
            return Err(error(
                key_offset,
                format!(
                    "header item '{}' is not of the form key = value",
                    shorten(item.trim())
                ),
            ));
        };
        let key = item[..equals].trim().to_ascii_lowercase();
        let raw_value = &item[equals + 1..];
        let value = raw_value.trim();
        let value_offset = start + equals + 1 + (raw_value.len() - raw_value.trim_start().len());
        if value.is_empty() && matches!(key.as_str(), "x" | "y" | "rule") {
            return Err(error(
                value_offset,
                format!("header value for {} is empty", shorten(&key)),
            ));
        }
        let seen = match key.as_str() {
            "x" => &mut x_seen,
            "y" => &mut y_seen,
            "rule" => {
                if rule.is_some() {
                    return Err(error(key_offset, "header key 'rule' given twice".into()));
                }
                let position = Position {
                    line: line.number,
                    column: line.column(value_offset),
                };
                rule = Some((value.to_string(), position));
                continue;
            }
            "" => {
                return Err(error(
                    key_offset,
                    format!("header item '{}' has no key", shorten(item.trim())),
                ));
            }
            _ => {
                return Err(error(
                    key_offset,
                    format!("unknown header key '{}'", shorten(key.as_str())),
                ));
            }
        };
        if *seen {
            return Err(error(key_offset, format!("header key '{key}' given twice")));
        }
        *seen = true;
        if !value.bytes().all(|b| b.is_ascii_digit()) {
            return Err(error(
                value_offset,
                format!(
                    "header value {key} = {} is not a non-negative integer",
                    shorten(value)
                ),
            ));
        }
        // The size is only checked, never used to allocate: the cells decide.
        if value.parse::<u64>().is_err() {
            return Err(error(
                value_offset,
                format!("header value {key} = {} is too large", shorten(value)),
            ));
        }
    }
    if !x_seen || !y_seen {
        let missing = if x_seen { 'y' } else { 'x' };
        let trimmed_len = line.text.trim_end().len();
        return Err(PatternError::new(
            line.number,
            line.column(trimmed_len),
            format!("header has no {missing}"),
        ));
    }
    Ok(rule)
}

/// A run count read but not yet applied to a tag.
#[derive(Debug)]
struct Count {
    value: u64,
    position: Position,
}

impl Count {
    fn without_tag(&self) -> PatternError {
        PatternError::new(
            self.position.line,
            self.position.column,
            format!(
                "run count {} is not followed by 'b', 'o' or '$'",
                self.value
            ),
        )
    }
}

/// The state of the body reader: a cursor, the cells so far, and a count that
/// may be waiting for its tag on a later line.
#[derive(Debug)]
struct Body {
    cells: Builder,
    x: u64,
    y: u64,
    live: u64,
    pending: Option<Count>,
    /// Just after the last item character read, for error positions.
    last_end: Option<Position>,
}

impl Body {
    fn new(budget: u64) -> Body {
        Body {
            cells: Builder::new(budget),
            x: 0,
            y: 0,
            live: 0,
            pending: None,
            last_end: None,
        }
    }

    /// Reads the items of one line; `true` once `!` has been read.
    fn read_line(&mut self, line: &Line<'_>) -> Result<bool, PatternError> {
        let bytes = line.text.as_bytes();
        let mut index = 0;
        // Every byte before `index` is ASCII (anything else is an error), so
        // byte offsets are columns.
        while index < bytes.len() {
            let byte = bytes[index];
            let position = Position {
                line: line.number,
                column: index + 1,
            };
            match byte {
                b' ' | b'\t' => {
                    index += 1;
                    continue;
                }
                b'0'..=b'9' => {
                    if let Some(count) = &self.pending {
                        return Err(count.without_tag());
                    }
                    let start = index;
                    while index < bytes.len() && bytes[index].is_ascii_digit() {
                        index += 1;
                    }
                    let digits = &line.text[start..index];
                    let value = parse_count(digits, position)?;
                    self.pending = Some(Count { value, position });
                    self.last_end = Some(Position {
                        line: line.number,
                        column: index + 1,
                    });
                    continue;
                }
                b'b' | b'o' | b'$' => {
                    let (count, at) = match self.pending.take() {
                        Some(count) => (count.value, count.position),
                        None => (1, position),
                    };
                    self.apply(byte, count, at)?;
                }
                b'!' => {
                    if let Some(count) = &self.pending {
                        return Err(count.without_tag());
                    }
                    return Ok(true);
                }
                _ => return Err(unexpected_character(line, index)),
            }
            index += 1;
            self.last_end = Some(Position {
                line: line.number,
                column: index + 1,
            });
        }
        Ok(false)
    }

    /// Applies `count` of a tag; `at` is where the item starts.
    fn apply(&mut self, tag: u8, count: u64, at: Position) -> Result<(), PatternError> {
        let error = |message: String| PatternError::new(at.line, at.column, message);
        if tag == b'$' {
            self.y = self
                .y
                .checked_add(count)
                .filter(|&y| y < MAX_COORDINATE)
                .ok_or_else(|| error(format!("pattern is taller than {MAX_COORDINATE} rows")))?;
            self.x = 0;
            return Ok(());
        }
        let start = self.x;
        self.x = start
            .checked_add(count)
            .filter(|&x| x <= MAX_COORDINATE)
            .ok_or_else(|| error(format!("pattern is wider than {MAX_COORDINATE} columns")))?;
        if tag == b'o' {
            self.live = self
                .live
                .checked_add(count)
                .filter(|&live| live <= MAX_LIVE_CELLS)
                .ok_or_else(|| {
                    error(format!("pattern has more than {MAX_LIVE_CELLS} live cells"))
                })?;
            self.cells
                .push_run(self.y, start, count)
                .map_err(|e| PatternError::build(at, e))?;
        }
        Ok(())
    }
}

/// A run count: decimal, at least 1, fitting in 64 bits.
fn parse_count(digits: &str, position: Position) -> Result<u64, PatternError> {
    let error = |message: String| PatternError::new(position.line, position.column, message);
    let mut value: u64 = 0;
    for byte in digits.bytes() {
        value = value
            .checked_mul(10)
            .and_then(|v| v.checked_add(u64::from(byte - b'0')))
            .ok_or_else(|| error(format!("run count {} is too large", shorten(digits))))?;
    }
    if value == 0 {
        return Err(error("run count 0 is not allowed".into()));
    }
    Ok(value)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pattern::Run;

    const BUDGET: u64 = 1 << 26;

    fn cells(pattern: &Pattern) -> Vec<(u64, u64)> {
        let mut cells = Vec::new();
        for run in pattern.runs() {
            for x in run.x..run.x + run.len {
                cells.push((x, run.y));
            }
        }
        cells
    }

    // The glider as (x, y), from its standard RLE (common practice).
    const GLIDER: [(u64, u64); 5] = [(1, 0), (2, 1), (0, 2), (1, 2), (2, 2)];

    fn run(y: u64, x: u64, len: u64) -> Run {
        Run { y, x, len }
    }

    #[test]
    fn standard_glider() {
        let pattern = read_rle(b"x = 3, y = 3, rule = B3/S23\nbob$2bo$3o!", BUDGET).unwrap();
        assert_eq!(cells(&pattern), GLIDER);
        assert_eq!(pattern.runs(), [run(0, 1, 1), run(1, 2, 1), run(2, 0, 3)]);
        assert_eq!(
            pattern.rule,
            Some((
                "B3/S23".to_string(),
                Position {
                    line: 1,
                    column: 22
                }
            ))
        );
        assert_eq!(pattern.population(), 5);
    }

    #[test]
    fn a_position_comment_places_the_pattern() {
        // Ours: `#position X Y` gives the plane coordinates of (0, 0).
        let pattern = read_rle(b"#position -5 12\nx = 1, y = 1\no!", 1 << 20).unwrap();
        assert_eq!(pattern.origin, Some((-5, 12)));
        let plain = read_rle(b"#C no position\nx = 1, y = 1\no!", 1 << 20).unwrap();
        assert_eq!(plain.origin, None);
        for bad in [
            &b"#position 1\no!"[..],
            b"#position a b\no!",
            b"#position 1 2 3\no!",
            b"#position 274877906945 0\no!",
            b"#position 274877906940 0\n10o!",
        ] {
            let error = read_rle(bad, 1 << 20).unwrap_err();
            assert_eq!(
                (error.position.line, error.position.column),
                (1, 1),
                "{error}"
            );
            assert!(error.to_string().contains("#position"), "{error}");
        }
    }

    #[test]
    fn line_endings_whitespace_and_comments() {
        let inputs: [&[u8]; 8] = [
            b"#N glider\r\n#C by hand\r\nx = 3, y = 3, rule = B3/S23\r\nbob$2bo$\r\n3o!\r\n",
            b"#N glider\rx = 3, y = 3, rule = B3/S23\rbob$\r2bo$3o!\r",
            b"x=3,y=3,rule=B3/S23\nb o b $ 2 b o $\n\n  3\n\to\t!",
            b"X = 3, Y = 3, RULE = B3/S23\nbob$2\nbo$3o!",
            b"rule = B3/S23, y = 3, x = 3\nbob$2bo$3o!",
            b"  \n#C comment\n\nx = 3, y = 3\n#C a comment inside the body\nbob$2bo$3o!",
            b"bob$2bo$3o!trailing text is ignored\n\xff\xfe",
            b"\xef\xbb\xbfx = 3, y = 3\nbob$2bo$3o! and more",
        ];
        for input in inputs {
            let pattern = read_rle(input, BUDGET).unwrap_or_else(|e| panic!("{input:?}: {e}"));
            assert_eq!(cells(&pattern), GLIDER, "{input:?}");
        }
        let spaced = read_rle(b"x=3,y=3,rule=B3/S23\nbob!", BUDGET).unwrap();
        assert_eq!(
            spaced.rule,
            Some((
                "B3/S23".to_string(),
                Position {
                    line: 1,
                    column: 14
                }
            ))
        );
        let lowercase = read_rle(b"x = 1, y = 1, rule = b3/s23 \no!", BUDGET).unwrap();
        assert_eq!(lowercase.rule.unwrap().0, "b3/s23");
    }

    #[test]
    fn runs_are_merged_and_trailing_dead_cells_ignored() {
        let pattern = read_rle(b"x = 9, y = 3\n2o3o2b$$o3b!", BUDGET).unwrap();
        assert_eq!(pattern.runs(), [run(0, 0, 5), run(2, 0, 1)]);
        assert_eq!(pattern.rule, None);
    }

    #[test]
    fn empty_pattern_with_header_is_valid() {
        let pattern = read_rle(b"x = 0, y = 0, rule = B3/S23\n!\n", BUDGET).unwrap();
        assert!(pattern.runs().is_empty());
        assert_eq!(pattern.population(), 0);
        let dead_only = read_rle(b"x = 5, y = 2\n5b$5b!", BUDGET).unwrap();
        assert!(dead_only.runs().is_empty());
    }

    #[test]
    fn huge_counts_cost_nothing_or_are_refused_at_once() {
        // Each of these would take hours if it were a loop over cells.
        let pattern = read_rle(b"1000000000000$1000b3o$1099511627775b!", BUDGET).unwrap();
        assert_eq!(pattern.runs(), [run(1_000_000_000_000, 1000, 3)]);
        let edge = read_rle(b"1099511627775$1099511627775bo!", BUDGET).unwrap();
        assert_eq!(
            edge.runs(),
            [run(MAX_COORDINATE - 1, MAX_COORDINATE - 1, 1)]
        );
        // 2^32 live cells in a row are 2^29 leaves, more than the budget
        // holds: refused at the item, before a leaf is made.
        let error = read_rle(b"1000000000000$1000b4294967296o$1099511627775b!", BUDGET);
        let mut expected = PatternError::new(
            1,
            20,
            "memory budget of 64.0 MiB is too small: the pattern's 8×8 leaves alone would take more",
        );
        expected.budget = Some(BUDGET);
        assert_eq!(error, Err(expected.clone()));
        // So is a count that the live-cell limit allows: 2^32 live cells
        // need 2^26 leaves at least, so below 1 GiB the budget refuses them
        // first.
        expected.position = Position { line: 1, column: 1 };
        assert_eq!(read_rle(b"4294967296o$o!", BUDGET), Err(expected));
    }

    #[test]
    fn long_input_is_linear() {
        // 200000 rows of "bo$": quadratic work would be noticeably slow.
        let mut text = String::from("x = 2, y = 200000\n");
        for _ in 0..200_000 {
            text.push_str("bo$");
        }
        text.push('!');
        let pattern = read_rle(text.as_bytes(), BUDGET).unwrap();
        let runs = pattern.runs();
        assert_eq!(runs.len(), 200_000);
        assert_eq!(runs[199_999], run(199_999, 1, 1));
    }

    #[test]
    fn malformed_rle() {
        let cases: &[(&[u8], usize, usize, &str)] = &[
            (b"", 1, 1, "empty pattern: no cells and no header"),
            (
                b"#C nothing\n\n",
                1,
                1,
                "empty pattern: no cells and no header",
            ),
            (&[0xff, 0xfe, 0x00], 1, 1, "unexpected byte 0xff"),
            (
                b"99999999999999999999999o!",
                1,
                1,
                "run count 99999999999999999999999 is too large",
            ),
            (
                b"bo\n 18446744073709551616b!",
                2,
                2,
                "run count 18446744073709551616 is too large",
            ),
            (
                b"12345678901234567890123456789012345678901234567890o!",
                1,
                1,
                "run count 1234567890123456789012345678901234567... is too large",
            ),
            (
                b"x = 999999999999999999999, y = 1\no!",
                1,
                5,
                "header value x = 999999999999999999999 is too large",
            ),
            (
                b"x = 1, y =99999999999999999999\no!",
                1,
                11,
                "header value y = 99999999999999999999 is too large",
            ),
            (
                b"x = 3, y = 3\nbob$2bo$3o",
                2,
                11,
                "pattern ends without '!'",
            ),
            (
                b"x = 3, y = 3\nbob$2bo$3o  \n\n",
                2,
                11,
                "pattern ends without '!'",
            ),
            (b"x = 3, y = 3\n", 1, 13, "pattern ends without '!'"),
            (b"x = 3, y = 3\nbob$2bo$3q!", 2, 10, "unexpected 'q'"),
            (b"x = 3, y = 3\nbob$2bo$3B!", 2, 10, "unexpected 'B'"),
            (b"x = 3, y = 3\nb\xc3\xa9!", 2, 2, "unexpected '\u{e9}'"),
            (b"x = 3, y = 3\n\n\nbo+", 4, 3, "unexpected '+'"),
            (b"x = 3, y = 3, z = 4\no!", 1, 15, "unknown header key 'z'"),
            (
                b"x = 3, y = 3, Colour = red\no!",
                1,
                15,
                "unknown header key 'colour'",
            ),
            (b"x = 3, x = 3\no!", 1, 8, "header key 'x' given twice"),
            (
                b"x = 3, y = 3, rule = B3/S23, rule = B36/S23\no!",
                1,
                30,
                "header key 'rule' given twice",
            ),
            (
                b"x = 3, y = 3, rule =\no!",
                1,
                21,
                "header value for rule is empty",
            ),
            (b"x = 3, y = 3,\no!", 1, 14, "empty item in header"),
            (
                b"x = 3, y\no!",
                1,
                8,
                "header item 'y' is not of the form key = value",
            ),
            (b"x = 3, = 4\no!", 1, 8, "header item '= 4' has no key"),
            (b"x = 3\no!", 1, 6, "header has no y"),
            (b"Y = 3\no!", 1, 6, "header has no x"),
            (
                b"x = -3, y = 3\no!",
                1,
                5,
                "header value x = -3 is not a non-negative integer",
            ),
            (
                b"x = 3, y = 3.5\no!",
                1,
                12,
                "header value y = 3.5 is not a non-negative integer",
            ),
            (b"x = 3, y = \no!", 1, 12, "header value for y is empty"),
            (
                b"x = 2, y = 1\n12",
                2,
                1,
                "run count 12 is not followed by 'b', 'o' or '$'",
            ),
            (
                b"x = 2, y = 1\n12\n\n",
                2,
                1,
                "run count 12 is not followed by 'b', 'o' or '$'",
            ),
            (
                b"x = 2, y = 1\nbo3!",
                2,
                3,
                "run count 3 is not followed by 'b', 'o' or '$'",
            ),
            (
                b"x = 2, y = 1\n12 3o!",
                2,
                1,
                "run count 12 is not followed by 'b', 'o' or '$'",
            ),
            (b"x = 2, y = 1\nb0o!", 2, 2, "run count 0 is not allowed"),
            (b"x = 2, y = 1\n0$o!", 2, 1, "run count 0 is not allowed"),
            (
                b"1099511627777b o!",
                1,
                1,
                "pattern is wider than 1099511627776 columns",
            ),
            (
                b"1099511627776bo!",
                1,
                15,
                "pattern is wider than 1099511627776 columns",
            ),
            (
                b"1099511627000b\n1000o!",
                2,
                1,
                "pattern is wider than 1099511627776 columns",
            ),
            (
                b"o$1099511627775$o!",
                1,
                3,
                "pattern is taller than 1099511627776 rows",
            ),
            (
                b"18446744073709551615b18446744073709551615b!",
                1,
                1,
                "pattern is wider than 1099511627776 columns",
            ),
            (
                b"1099511627776o!",
                1,
                1,
                "pattern has more than 4294967296 live cells",
            ),
            (b"x = 1, y = 1\no\x00!", 2, 2, "unexpected byte 0x00"),
            (b"x = 1, y = 1\r\no\r\n\x1b!", 3, 1, "unexpected byte 0x1b"),
        ];
        for &(input, line, column, message) in cases {
            assert_eq!(
                read_rle(input, BUDGET),
                Err(PatternError::new(line, column, message)),
                "{:?}",
                String::from_utf8_lossy(input)
            );
        }
    }
}
