//! Writing RLE: a header line, then body items wrapped at 70 characters and
//! ended by `!`.
//!
//! The writer works row by row from runs, so its cost follows the number of
//! runs, not the area; it checks its input and refuses rows or runs out of
//! order rather than writing text that would read back differently.

use crate::rule::Background;
use std::io::{self, Write};

/// Body lines are at most this long (common practice for RLE).
const MAX_LINE: usize = 70;

/// The comment that says a text holds the dead cells of a state whose
/// background is alive (a B0 rule's): the reader refuses such a text.
pub const ALIVE_BACKGROUND: &str = "#background alive";

/// RLE text as [`write_rle`] writes it, after a `#position X Y` comment
/// giving the plane coordinates of the text's (0, 0) (which the reader
/// puts back), the [`ALIVE_BACKGROUND`] comment when `background` is alive
/// (the cells written are then the dead ones) and, when given, a `#C`
/// comment line with `note`.
#[allow(clippy::too_many_arguments)]
pub fn write_rle_at<W: Write>(
    out: &mut W,
    (left, top): (&num_bigint::BigInt, &num_bigint::BigInt),
    background: Background,
    note: Option<&str>,
    width: u64,
    height: u64,
    rule: &str,
    rows: impl IntoIterator<Item = (u64, Vec<(u64, u64)>)>,
) -> io::Result<()> {
    writeln!(out, "#position {left} {top}")?;
    if background.is_alive() {
        writeln!(
            out,
            "{ALIVE_BACKGROUND}: every cell not written is alive, and the cells written are dead"
        )?;
    }
    if let Some(note) = note {
        if note.chars().any(|c| c.is_control()) {
            return Err(invalid(format!("note {note:?} cannot stand in a comment")));
        }
        writeln!(out, "#C {note}")?;
    }
    write_rle(out, width, height, rule, rows)
}

/// The text of a state with no cell that differs from `background`: an
/// empty pattern, and on an alive background the comment that says so.
pub fn write_empty_rle<W: Write>(
    out: &mut W,
    rule: &str,
    background: Background,
) -> io::Result<()> {
    let zero = num_bigint::BigInt::from(0);
    write_rle_at(out, (&zero, &zero), background, None, 0, 0, rule, [])
}

/// Writes RLE text: header `x = W, y = H, rule = R`, body lines at most 70
/// characters, ending with `!`.
///
/// `rows` yields the non-empty rows in increasing y (0-based, < height), each
/// with its runs as (x, len) sorted, x relative to the left edge,
/// x + len <= width. Touching runs are written as one; a row given with no
/// runs is skipped. Input that breaks these rules is an
/// [`io::ErrorKind::InvalidInput`] error.
pub fn write_rle<W: Write>(
    out: &mut W,
    width: u64,
    height: u64,
    rule: &str,
    rows: impl IntoIterator<Item = (u64, Vec<(u64, u64)>)>,
) -> io::Result<()> {
    if rule.is_empty() || rule.chars().any(|c| c.is_control() || c == ',') {
        return Err(invalid(format!(
            "rule {rule:?} cannot stand in an RLE header"
        )));
    }
    writeln!(out, "x = {width}, y = {height}, rule = {rule}")?;
    let mut body = Body {
        out,
        line: String::with_capacity(MAX_LINE + 1),
        pending: None,
    };
    // The row the cursor is on, once a row has been written.
    let mut current: Option<u64> = None;
    for (y, runs) in rows {
        if runs.is_empty() {
            continue;
        }
        if y >= height {
            return Err(invalid(format!(
                "row {y} is outside a pattern of height {height}"
            )));
        }
        let gap = match current {
            None => y,
            Some(previous) if y > previous => y - previous,
            Some(previous) => {
                return Err(invalid(format!("row {y} comes after row {previous}")));
            }
        };
        body.item(gap, '$')?;
        current = Some(y);
        let mut x = 0;
        for (start, len) in runs {
            let end = start.checked_add(len).filter(|&end| end <= width);
            let Some(end) = end.filter(|_| len > 0 && start >= x) else {
                return Err(invalid(format!(
                    "run of {len} cells at x = {start} in row {y} is empty, out of order or outside width {width}"
                )));
            };
            body.item(start - x, 'b')?;
            body.item(len, 'o')?;
            x = end;
        }
    }
    body.finish()
}

fn invalid(message: String) -> io::Error {
    io::Error::new(io::ErrorKind::InvalidInput, message)
}

/// Body text being written: the current line, and the last item held back
/// so that touching runs of the same tag become one item.
struct Body<'a, W: Write> {
    out: &'a mut W,
    line: String,
    pending: Option<(u64, char)>,
}

impl<W: Write> Body<'_, W> {
    /// Adds `count` of `tag`; a count of zero adds nothing.
    fn item(&mut self, count: u64, tag: char) -> io::Result<()> {
        if count == 0 {
            return Ok(());
        }
        if let Some((held, held_tag)) = self.pending
            && held_tag == tag
            && let Some(sum) = held.checked_add(count)
        {
            self.pending = Some((sum, tag));
            return Ok(());
        }
        self.flush_pending()?;
        self.pending = Some((count, tag));
        Ok(())
    }

    fn flush_pending(&mut self) -> io::Result<()> {
        let Some((count, tag)) = self.pending.take() else {
            return Ok(());
        };
        let text = if count == 1 {
            tag.to_string()
        } else {
            format!("{count}{tag}")
        };
        self.push(&text)
    }

    /// Appends one item's text, starting a new line first when it would not
    /// fit: an item is never split, so a count stays with its tag.
    fn push(&mut self, text: &str) -> io::Result<()> {
        if self.line.len() + text.len() > MAX_LINE {
            self.line.push('\n');
            self.out.write_all(self.line.as_bytes())?;
            self.line.clear();
        }
        self.line.push_str(text);
        Ok(())
    }

    fn finish(mut self) -> io::Result<()> {
        self.flush_pending()?;
        self.push("!")?;
        self.line.push('\n');
        self.out.write_all(self.line.as_bytes())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pattern::rle::read_rle;
    use crate::pattern::{MAX_COORDINATE, Run};
    use proptest::prelude::*;
    use std::collections::BTreeSet;

    const BUDGET: u64 = 1 << 26;

    type Rows = Vec<(u64, Vec<(u64, u64)>)>;

    fn written(
        width: u64,
        height: u64,
        rows: impl IntoIterator<Item = (u64, Vec<(u64, u64)>)>,
    ) -> String {
        let mut out = Vec::new();
        write_rle(&mut out, width, height, "B3/S23", rows).unwrap();
        String::from_utf8(out).unwrap()
    }

    /// Rows of (x, len) runs from a set of (y, x) cells.
    fn rows_of(cells: &BTreeSet<(u64, u64)>) -> Rows {
        let mut rows: Rows = Vec::new();
        for &(y, x) in cells {
            if rows.last().is_none_or(|(row, _)| *row != y) {
                rows.push((y, Vec::new()));
            }
            let runs = &mut rows.last_mut().unwrap().1;
            match runs.last_mut() {
                Some((start, len)) if *start + *len == x => *len += 1,
                _ => runs.push((x, 1)),
            }
        }
        rows
    }

    #[test]
    fn glider() {
        // The standard RLE of the glider is bob$2bo$3o! (common practice);
        // the writer leaves out the dead cell that ends the first row.
        let text = written(
            3,
            3,
            [(0, vec![(1, 1)]), (1, vec![(2, 1)]), (2, vec![(0, 3)])],
        );
        assert_eq!(text, "x = 3, y = 3, rule = B3/S23\nbo$2bo$3o!\n");
    }

    #[test]
    fn gaps_touching_runs_and_empty_rows() {
        let text = written(
            10,
            8,
            [
                (2, vec![(0, 2), (2, 3), (7, 1)]),
                (3, vec![]),
                (6, vec![(9, 1)]),
            ],
        );
        assert_eq!(text, "x = 10, y = 8, rule = B3/S23\n2$5o2bo4$9bo!\n");
        assert_eq!(written(0, 0, []), "x = 0, y = 0, rule = B3/S23\n!\n");
    }

    #[test]
    fn long_rows_wrap_at_70_without_splitting_items() {
        let runs: Vec<(u64, u64)> = (0..500).map(|i| (i * 13, 1 + i % 11)).collect();
        let far = MAX_COORDINATE - 1;
        let rows = vec![(0, runs.clone()), (1000, runs), (far, vec![(far, 1)])];
        let text = written(MAX_COORDINATE, MAX_COORDINATE, rows.clone());
        let body: Vec<&str> = text.lines().skip(1).collect();
        assert!(body.len() > 10);
        for line in &body {
            assert!(line.len() <= MAX_LINE, "{line:?}");
            // An item is never split: a line never ends in a count.
            assert!(!line.ends_with(|c: char| c.is_ascii_digit()), "{line:?}");
        }
        // Lines are filled: each line but the last would overflow with the
        // next one's first item.
        for pair in body.windows(2) {
            let next_item = pair[1]
                .find(|c: char| !c.is_ascii_digit())
                .map_or(pair[1].len(), |i| i + 1);
            assert!(pair[0].len() + next_item > MAX_LINE, "{pair:?}");
        }
        let pattern = read_rle(text.as_bytes(), BUDGET).unwrap();
        let expected: Vec<Run> = rows
            .iter()
            .flat_map(|(y, runs)| runs.iter().map(|&(x, len)| Run { y: *y, x, len }))
            .collect();
        assert_eq!(pattern.runs(), expected);
    }

    #[test]
    fn refuses_bad_input() {
        let cases: Vec<(&str, Rows, &str)> = vec![
            (
                "B3/S23",
                vec![(3, vec![(0, 1)])],
                "row 3 is outside a pattern of height 3",
            ),
            (
                "B3/S23",
                vec![(1, vec![(0, 1)]), (1, vec![(2, 1)])],
                "row 1 comes after row 1",
            ),
            (
                "B3/S23",
                vec![(0, vec![(2, 1)]), (1, vec![(3, 1), (1, 1)])],
                "run of 1 cells at x = 1 in row 1 is empty, out of order or outside width 4",
            ),
            (
                "B3/S23",
                vec![(0, vec![(0, 3), (2, 1)])],
                "run of 1 cells at x = 2 in row 0 is empty, out of order or outside width 4",
            ),
            (
                "B3/S23",
                vec![(0, vec![(2, 3)])],
                "run of 3 cells at x = 2 in row 0 is empty, out of order or outside width 4",
            ),
            (
                "B3/S23",
                vec![(0, vec![(1, 0)])],
                "run of 0 cells at x = 1 in row 0 is empty, out of order or outside width 4",
            ),
            (
                "B3/S23",
                vec![(0, vec![(u64::MAX, 2)])],
                "run of 2 cells at x = 18446744073709551615 in row 0 is empty, out of order or outside width 4",
            ),
            (
                "B3/S23\n",
                vec![],
                "rule \"B3/S23\\n\" cannot stand in an RLE header",
            ),
            ("", vec![], "rule \"\" cannot stand in an RLE header"),
        ];
        for (rule, rows, message) in cases {
            let error = write_rle(&mut Vec::new(), 4, 3, rule, rows).unwrap_err();
            assert_eq!(error.kind(), io::ErrorKind::InvalidInput);
            assert_eq!(error.to_string(), message);
        }
    }

    proptest! {
        #[test]
        fn write_then_read_gives_the_same_runs(
            cells in proptest::collection::btree_set((0u64..60, 0u64..400), 0..600),
            spread in 0u64..3,
        ) {
            // Spread the cells out sometimes, for counts of many digits.
            let scale = [1, 1_000, 1_000_000_000][spread as usize];
            let cells: BTreeSet<(u64, u64)> =
                cells.into_iter().map(|(y, x)| (y * scale, x)).collect();
            let rows = rows_of(&cells);
            let text = written(400, 60 * scale, rows.clone());
            for line in text.lines().skip(1) {
                prop_assert!(line.len() <= MAX_LINE);
            }
            let pattern = read_rle(text.as_bytes(), BUDGET).unwrap();
            let expected: Vec<Run> = rows
                .iter()
                .flat_map(|(y, runs)| runs.iter().map(|&(x, len)| Run { y: *y, x, len }))
                .collect();
            prop_assert_eq!(pattern.runs(), expected);
            prop_assert_eq!(pattern.population(), cells.len() as u64);
            prop_assert_eq!(pattern.rule.map(|(rule, _)| rule), Some("B3/S23".to_string()));
        }
    }
}
