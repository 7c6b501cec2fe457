//! Pattern text: the live cells of a pattern as read from RLE or plaintext,
//! and RLE as written back.
//!
//! Readers take raw bytes and never trust them: any malformed input gives a
//! [`PatternError`] with a line and column, never a panic, and every size is
//! checked against [`MAX_COORDINATE`] and [`MAX_LIVE_CELLS`] before it is
//! used. Readers hand their runs to a [`Builder`], which keeps the cells as
//! 8×8 leaves: a loaded pattern costs what its leaves cost, whatever its
//! runs, and is refused once its leaves would pass the memory budget it is
//! read under. Coordinates: the pattern's top-left cell is (0, 0), x grows
//! right, y grows down.

pub mod plaintext;
pub mod rle;
pub mod write;

/// Rows and columns at or beyond this are refused: every live cell has
/// `x < MAX_COORDINATE` and `y < MAX_COORDINATE`.
pub const MAX_COORDINATE: u64 = 1 << 40;

/// A `#position` comment may place a pattern at most this far from the
/// plane's (0, 0), its far corner included.
pub const MAX_POSITION: i64 = 1 << 38;

/// A pattern with more live cells than this is refused.
pub const MAX_LIVE_CELLS: u64 = 1 << 32;

/// Bytes one leaf of a loaded pattern takes (its column and its cells).
pub const LEAF_BYTES: u64 = std::mem::size_of::<(u64, u64)>() as u64;

/// Cells on a side of a leaf.
const SIDE: u64 = 8;

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

/// A pattern as read from text: its live cells in 8×8 leaves.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Pattern {
    /// The rule text of an RLE header, unparsed, with its position (so a bad
    /// rule can be reported at file:line:column).
    pub rule: Option<(String, Position)>,
    /// Where the pattern's (0, 0) stands on the plane, from an RLE
    /// `#position X Y` comment; None puts it at the plane's (0, 0).
    pub origin: Option<(i64, i64)>,
    /// The non-empty leaves, sorted by (leaf row, leaf column): each leaf's
    /// column and cells (bit `8*y + x`, as in the quad store); the rows are
    /// in `rows`.
    leaves: Vec<(u64, u64)>,
    /// Each leaf row that has leaves, ascending, with the end of its leaves
    /// in `leaves`.
    rows: Vec<(u64, usize)>,
    population: u64,
    /// One past the rightmost live column and the lowest live row.
    width: u64,
    height: u64,
}

impl Pattern {
    /// The number of live cells.
    pub fn population(&self) -> u64 {
        self.population
    }

    /// Columns and rows from (0, 0) to the last live cell, inclusive: 0 by 0
    /// when there is none.
    pub fn extent(&self) -> (u64, u64) {
        (self.width, self.height)
    }

    /// The leaf rows that hold live cells, top to bottom: each row's index
    /// (cells `8*row ..`) and its leaves left to right as (leaf column, cells),
    /// cells with bit `8*y + x` for the cell at (`8*column + x`, `8*row + y`).
    pub fn leaf_rows(&self) -> impl Iterator<Item = (u64, &[(u64, u64)])> + '_ {
        let mut start = 0;
        self.rows.iter().map(move |&(row, end)| {
            let leaves = &self.leaves[start..end];
            start = end;
            (row, leaves)
        })
    }

    /// Bytes the pattern holds on the heap, as allocated.
    pub fn heap_bytes(&self) -> u64 {
        let rows = std::mem::size_of::<(u64, usize)>() as u64;
        self.leaves.capacity() as u64 * LEAF_BYTES + self.rows.capacity() as u64 * rows
    }

    /// The live cells as runs, sorted by (y, x), touching runs joined.
    pub fn runs(&self) -> Vec<Run> {
        let mut runs: Vec<Run> = Vec::new();
        for (row, leaves) in self.leaf_rows() {
            for line in 0..SIDE {
                let y = row * SIDE + line;
                for &(column, bits) in leaves {
                    let mut byte = (bits >> (line * SIDE)) & 0xff;
                    while byte != 0 {
                        let start = u64::from(byte.trailing_zeros());
                        let len = u64::from((byte >> start).trailing_ones());
                        byte &= !(((1u64 << len) - 1) << start);
                        let x = column * SIDE + start;
                        match runs.last_mut() {
                            Some(last) if last.y == y && last.x + last.len == x => last.len += len,
                            _ => runs.push(Run { y, x, len }),
                        }
                    }
                }
            }
        }
        runs
    }
}

/// Why a [`Builder`] refused a run.
#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
pub enum BuildError {
    /// the leaves would take more than the memory budget
    #[error(
        "memory budget of {} is too small: the pattern's 8×8 leaves alone would take more",
        crate::error::human_bytes(*budget)
    )]
    OverBudget { budget: u64 },
    /// a run reaches past [`MAX_COORDINATE`] or is empty
    #[error("run of {len} cells at x = {x}, y = {y} is empty or outside the pattern's limits")]
    Outside { y: u64, x: u64, len: u64 },
    /// a run's row is above the row of an earlier run
    #[error("row {y} comes after row {previous}")]
    OutOfOrder { y: u64, previous: u64 },
}

/// Gathers runs, given row by row from the top (in any order within a row),
/// into the leaves of a [`Pattern`], within a memory budget. It holds the
/// leaves done and those of the leaf row being filled, nothing per run.
#[derive(Debug)]
pub struct Builder {
    pattern: Pattern,
    /// Leaves the budget allows (done and in the row being filled).
    max_leaves: u64,
    budget: u64,
    /// The leaf row being filled and its leaves, left to right except for
    /// those of the cell row being read, which may start again at the left.
    row: u64,
    filling: Vec<(u64, u64)>,
    /// Whether `filling` needs sorting and merging before it is read again.
    unsorted: bool,
    /// The cell row of the last run.
    last_y: Option<u64>,
}

impl Builder {
    /// An empty pattern whose leaves may take up to `budget` bytes.
    pub fn new(budget: u64) -> Builder {
        Builder {
            pattern: Pattern::default(),
            max_leaves: budget / LEAF_BYTES,
            budget,
            row: 0,
            filling: Vec::new(),
            unsorted: false,
            last_y: None,
        }
    }

    /// Adds `len` live cells at row `y`, columns `x .. x + len`. Rows come in
    /// increasing order; runs may overlap. The cost is one step per leaf the
    /// run touches, checked against the budget before any is added; a run
    /// refused leaves the builder as it was.
    pub fn push_run(&mut self, y: u64, x: u64, len: u64) -> Result<(), BuildError> {
        let end = x
            .checked_add(len)
            .filter(|&end| len > 0 && end <= MAX_COORDINATE && y < MAX_COORDINATE)
            .ok_or(BuildError::Outside { y, x, len })?;
        if let Some(previous) = self.last_y.filter(|&previous| y < previous) {
            return Err(BuildError::OutOfOrder { y, previous });
        }
        let touched = (end - 1) / SIDE - x / SIDE + 1;
        let held = (self.pattern.leaves.len() + self.filling.len()) as u64;
        if held.saturating_add(touched) > self.max_leaves {
            return Err(BuildError::OverBudget {
                budget: self.budget,
            });
        }
        if self.last_y != Some(y) {
            self.end_line();
            if y / SIDE != self.row {
                self.end_row();
                self.row = y / SIDE;
            }
            self.last_y = Some(y);
        }
        let shift = (y % SIDE) * SIDE;
        let mut at = x;
        while at < end {
            let column = at % SIDE;
            let span = (SIDE - column).min(end - at);
            let bits = (((1u64 << span) - 1) << column) << shift;
            let leaf = at / SIDE;
            match self.filling.last_mut() {
                Some(last) if last.0 == leaf => last.1 |= bits,
                Some(last) => {
                    self.unsorted |= last.0 > leaf;
                    self.filling.push((leaf, bits));
                }
                None => self.filling.push((leaf, bits)),
            }
            at += span;
        }
        self.pattern.width = self.pattern.width.max(end);
        self.pattern.height = self.pattern.height.max(y + 1);
        Ok(())
    }

    /// The pattern, with the rule of its header if it has one.
    pub fn finish(mut self, rule: Option<(String, Position)>) -> Pattern {
        self.end_line();
        self.end_row();
        let mut pattern = self.pattern;
        pattern.rule = rule;
        pattern.leaves.shrink_to_fit();
        pattern.rows.shrink_to_fit();
        pattern
    }

    /// Puts the leaves being filled back in order, merging a leaf given twice.
    fn end_line(&mut self) {
        if !self.unsorted {
            return;
        }
        self.filling.sort_unstable_by_key(|leaf| leaf.0);
        self.filling.dedup_by(|next, kept| {
            let same = next.0 == kept.0;
            if same {
                kept.1 |= next.1;
            }
            same
        });
        self.unsorted = false;
    }

    /// Moves the filled leaf row to the pattern.
    fn end_row(&mut self) {
        if self.filling.is_empty() {
            return;
        }
        let pattern = &mut self.pattern;
        // Grow by doubling, but never past what the budget allows.
        let need = pattern.leaves.len() + self.filling.len();
        if need > pattern.leaves.capacity() {
            let target = (pattern.leaves.capacity() * 2)
                .max(need)
                .min(usize::try_from(self.max_leaves).unwrap_or(usize::MAX));
            pattern.leaves.reserve_exact(target - pattern.leaves.len());
        }
        for &(_, bits) in &self.filling {
            pattern.population += u64::from(bits.count_ones());
        }
        pattern.leaves.append(&mut self.filling);
        pattern.rows.push((self.row, pattern.leaves.len()));
    }
}

/// A malformed pattern text: what is wrong and where.
#[derive(Clone, Debug, thiserror::Error, PartialEq, Eq)]
#[error("{}:{}: {message}", position.line, position.column)]
pub struct PatternError {
    pub position: Position,
    pub message: String,
    /// The memory budget, when the text is sound but the pattern does not
    /// fit it.
    pub budget: Option<u64>,
}

impl PatternError {
    pub(crate) fn new(line: usize, column: usize, message: impl Into<String>) -> PatternError {
        PatternError {
            position: Position { line, column },
            message: message.into(),
            budget: None,
        }
    }

    /// A run the builder refused, at the item that gave it.
    pub(crate) fn build(at: Position, error: BuildError) -> PatternError {
        let mut built = PatternError::new(at.line, at.column, error.to_string());
        if let BuildError::OverBudget { budget } = error {
            built.budget = Some(budget);
        }
        built
    }

    /// Input with no cells and no header at all.
    pub(crate) fn empty() -> PatternError {
        PatternError::new(1, 1, "empty pattern: no cells and no header")
    }
}

/// Reads either format, recognised by content: blank lines are skipped, and
/// a first non-blank line that starts with `!` (a plaintext comment) or is
/// made only of `.`, `O`, `o` and `*` means plaintext; anything else is RLE.
/// The pattern's leaves may take up to `budget` bytes.
pub fn read_pattern(bytes: &[u8], budget: u64) -> Result<Pattern, PatternError> {
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
            plaintext::read_plaintext(bytes, budget)
        } else {
            rle::read_rle(bytes, budget)
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

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// Enough for any test text; a huge count of live cells is refused.
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

    #[test]
    fn detects_rle_and_plaintext() {
        let rle = read_pattern(
            b"#N glider\nx = 3, y = 3, rule = B3/S23\nbob$2bo$3o!\n",
            BUDGET,
        )
        .unwrap();
        assert_eq!(cells(&rle), GLIDER);
        assert!(rle.rule.is_some());
        let plaintext = read_pattern(b"!Name: glider\n.O.\n..O\nOOO\n", BUDGET).unwrap();
        assert_eq!(cells(&plaintext), GLIDER);
        assert_eq!(plaintext.rule, None);
        let no_comment = read_pattern(b"\n\n  \n.O\n..O\nOOO", BUDGET).unwrap();
        assert_eq!(cells(&no_comment), GLIDER);
        let headerless_rle = read_pattern(b"bob$2bo$3o!", BUDGET).unwrap();
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
            assert_eq!(read_pattern(input, BUDGET), Err(empty.clone()), "{input:?}");
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
                read_pattern(input, BUDGET),
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
    fn builder_gathers_leaves() {
        // An 8×8 block given row by row, then a run that touches three
        // leaves, given in two overlapping pieces out of order.
        let mut cells = Builder::new(BUDGET);
        for y in 8..16 {
            cells.push_run(y, 16, 8).unwrap();
        }
        cells.push_run(20, 10, 10).unwrap();
        cells.push_run(20, 5, 8).unwrap();
        let pattern = cells.finish(None);
        let rows: Vec<(u64, Vec<(u64, u64)>)> = pattern
            .leaf_rows()
            .map(|(row, leaves)| (row, leaves.to_vec()))
            .collect();
        assert_eq!(
            rows,
            [
                (1, vec![(2, u64::MAX)]),
                (2, vec![(0, 0xe0 << 32), (1, 0xff << 32), (2, 0x0f << 32)]),
            ]
        );
        assert_eq!(pattern.population(), 64 + 15);
        assert_eq!(pattern.extent(), (24, 21));
        assert_eq!(
            pattern.runs(),
            (8..16)
                .map(|y| Run { y, x: 16, len: 8 })
                .chain([Run {
                    y: 20,
                    x: 5,
                    len: 15
                }])
                .collect::<Vec<_>>()
        );
    }

    #[test]
    fn builder_refusals() {
        // Room for four leaves: three are used, and a run is refused when
        // the leaves it touches might not fit, whatever its length; a
        // refused run changes nothing.
        let budget = 4 * LEAF_BYTES;
        let mut cells = Builder::new(budget);
        cells.push_run(0, 0, 24).unwrap();
        cells.push_run(1, 0, 8).unwrap();
        let over = Err(BuildError::OverBudget { budget });
        assert_eq!(cells.push_run(2, 0, 25), over);
        assert_eq!(cells.push_run(9, 0, 9), over);
        assert_eq!(cells.push_run(9, 0, MAX_COORDINATE), over);
        assert_eq!(
            cells.push_run(0, 0, 1),
            Err(BuildError::OutOfOrder { y: 0, previous: 1 })
        );
        for (y, x, len) in [(1, 0, 0), (MAX_COORDINATE, 0, 1), (1, u64::MAX, 2)] {
            assert_eq!(
                cells.push_run(y, x, len),
                Err(BuildError::Outside { y, x, len })
            );
        }
        let pattern = cells.finish(None);
        assert_eq!(pattern.population(), 32);
        assert_eq!(pattern.extent(), (24, 2));
    }

    /// What every reader promises of the runs it returns.
    fn check_runs(pattern: &Pattern) -> Result<(), TestCaseError> {
        for pair in pattern.runs().windows(2) {
            let (a, b) = (pair[0], pair[1]);
            // Sorted, apart: touching runs would have been joined.
            prop_assert!(
                a.y < b.y || (a.y == b.y && a.x + a.len < b.x),
                "{a:?} {b:?}"
            );
        }
        for run in pattern.runs() {
            prop_assert!(run.len >= 1);
            prop_assert!(run.y < MAX_COORDINATE && run.x + run.len <= MAX_COORDINATE);
        }
        prop_assert!(pattern.population() <= MAX_LIVE_CELLS);
        Ok(())
    }

    proptest! {
        #[test]
        fn arbitrary_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..300)) {
            if let Ok(pattern) = read_pattern(&bytes, BUDGET) {
                check_runs(&pattern)?;
            }
        }

        #[test]
        fn pattern_like_text_never_panics(
            text in "[xyXY=, 0-9bo$!#\n\r\t.O*rulB/S]{0,300}",
        ) {
            for result in [
                read_pattern(text.as_bytes(), BUDGET),
                rle::read_rle(text.as_bytes(), BUDGET),
                plaintext::read_plaintext(text.as_bytes(), BUDGET),
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
