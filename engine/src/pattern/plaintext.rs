//! Reading plaintext patterns: one text line per row, `.` for a dead cell,
//! `O` (or `o`, `*`) for a live one, and `!` comment lines.
//!
//! Rows are turned into leaves as they are read; the format has no header,
//! so it carries no rule.

use super::{
    Builder, MAX_COORDINATE, MAX_LIVE_CELLS, Pattern, PatternError, Position, Source,
    unexpected_character,
};

/// Reads a plaintext pattern.
///
/// A line starting with `!` is a comment wherever it stands. Every other line
/// is a row, trailing whitespace ignored; blank lines before the first row
/// are skipped, blank lines after it are empty rows. The pattern's leaves
/// may take up to `budget` bytes.
pub fn read_plaintext(bytes: &[u8], budget: u64) -> Result<Pattern, PatternError> {
    let mut source = Source::new(bytes);
    let mut cells = Builder::new(budget);
    let mut started = false;
    let mut y: u64 = 0;
    let mut live: u64 = 0;
    while let Some(line) = source.next_line()? {
        if line.text.starts_with('!') {
            continue;
        }
        let row = line.text.trim_end();
        if !started && row.is_empty() {
            continue;
        }
        started = true;
        if y >= MAX_COORDINATE {
            return Err(PatternError::new(
                line.number,
                1,
                format!("pattern is taller than {MAX_COORDINATE} rows"),
            ));
        }
        // Every byte before `x` is ASCII (anything else is an error), so
        // byte offsets are columns.
        for (offset, byte) in row.bytes().enumerate() {
            let x = offset as u64;
            let error = |message: String| PatternError::new(line.number, offset + 1, message);
            match byte {
                b'.' => {}
                b'O' | b'o' | b'*' => {
                    if x >= MAX_COORDINATE {
                        return Err(error(format!(
                            "pattern is wider than {MAX_COORDINATE} columns"
                        )));
                    }
                    live += 1;
                    if live > MAX_LIVE_CELLS {
                        return Err(error(format!(
                            "pattern has more than {MAX_LIVE_CELLS} live cells"
                        )));
                    }
                    let at = Position {
                        line: line.number,
                        column: offset + 1,
                    };
                    cells
                        .push_run(y, x, 1)
                        .map_err(|e| PatternError::build(at, e))?;
                }
                _ => return Err(unexpected_character(&line, offset)),
            }
        }
        y += 1;
    }
    if !started {
        return Err(PatternError::empty());
    }
    Ok(cells.finish(None))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pattern::Run;

    const BUDGET: u64 = 1 << 26;

    fn run(y: u64, x: u64, len: u64) -> Run {
        Run { y, x, len }
    }

    #[test]
    fn glider() {
        // The glider, as in the RLE tests (common practice).
        let pattern = read_plaintext(b"!Name: Glider\n!\n.O.\n..O\nOOO\n", BUDGET).unwrap();
        assert_eq!(pattern.runs(), [run(0, 1, 1), run(1, 2, 1), run(2, 0, 3)]);
        assert_eq!(pattern.rule, None);
        assert_eq!(pattern.population(), 5);
    }

    #[test]
    fn alive_markers_line_endings_and_blank_rows() {
        let inputs: [&[u8]; 4] = [
            b"\n\n.o\r\n..*\r\nOoO   \r\n",
            b".O\r..O\rOOO\r",
            b"  \n!comment\n.O.. \t\n..O\n!between rows\nOOO",
            b"\xef\xbb\xbf.O\n..O\nOOO\n\n\n",
        ];
        for input in inputs {
            let pattern =
                read_plaintext(input, BUDGET).unwrap_or_else(|e| panic!("{input:?}: {e}"));
            assert_eq!(
                pattern.runs(),
                [run(0, 1, 1), run(1, 2, 1), run(2, 0, 3)],
                "{input:?}"
            );
        }
        // A blank line after the first row is an empty row.
        let gapped = read_plaintext(b"O\n\n\n.OO", BUDGET).unwrap();
        assert_eq!(gapped.runs(), [run(0, 0, 1), run(3, 1, 2)]);
        // Rows of dead cells only are a valid, empty pattern.
        assert_eq!(read_plaintext(b"...\n...", BUDGET).unwrap().runs(), []);
    }

    #[test]
    fn malformed_plaintext() {
        let cases: &[(&[u8], usize, usize, &str)] = &[
            (b"", 1, 1, "empty pattern: no cells and no header"),
            (
                b"!Name: nothing\n\n",
                1,
                1,
                "empty pattern: no cells and no header",
            ),
            (b".O.\n.x.\n", 2, 2, "unexpected 'x'"),
            (b".O.\n .O\n", 2, 1, "unexpected ' '"),
            (b".O.\n.O\t.\n", 2, 3, "unexpected '\\t'"),
            (b".O#\n", 1, 3, "unexpected '#'"),
            (b".\xc3\xa9\n", 1, 2, "unexpected '\u{e9}'"),
            (b".O\n\xff", 2, 1, "unexpected byte 0xff"),
            (b".O\x00\n", 1, 3, "unexpected byte 0x00"),
        ];
        for &(input, line, column, message) in cases {
            assert_eq!(
                read_plaintext(input, BUDGET),
                Err(PatternError::new(line, column, message)),
                "{:?}",
                String::from_utf8_lossy(input)
            );
        }
    }
}
