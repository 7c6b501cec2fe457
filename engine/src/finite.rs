//! Bounded universes: a torus of W×H cells (its edges wrap) or a bounded
//! plane of W×H cells (the cells outside stay dead), any size, not only
//! powers of two. The universe's top-left cell is the pattern's (0, 0).
//!
//! A finite universe has finitely many states, so its history ends in a
//! cycle: it is stepped a generation at a time (bit-parallel, 64 cells a
//! word) while Brent's cycle finding watches for a state seen before
//! (compared whole, never by a hash). Once the period is known, a
//! generation however far off is reached by stepping only the remainder
//! of the distance modulo the period. HashLife does not serve here: a
//! bounded plane kills cells at its edge every generation, which breaks
//! the jumps of 2^k generations its memo is made of.

use std::fmt;
use std::str::FromStr;

use num_bigint::BigUint;
use num_traits::{ToPrimitive, Zero};

use crate::pattern::{BuildError, Builder, Pattern};
use crate::rule::Rule;
use crate::rule::sliced::{self, Sliced};
use crate::rule::tile::Tile;

/// The largest side of a bounded universe: 2^24 cells.
pub const MAX_SIDE: u64 = 1 << 24;

/// The largest bounded universe, in cells (the state is kept as a bit
/// grid, three copies of it while stepping).
pub const MAX_CELLS: u64 = 1 << 32;

/// Where a pattern lives: the unbounded plane, a torus or a bounded plane.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub enum Space {
    #[default]
    Plane,
    Torus {
        width: u64,
        height: u64,
    },
    Bounded {
        width: u64,
        height: u64,
    },
}

/// A universe description that cannot be read.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{0}")]
pub struct SpaceError(String);

impl FromStr for Space {
    type Err = SpaceError;

    /// `plane`, `torus WxH` or `bounded WxH` (W and H from 1 to 2^24,
    /// `x` or `×` between them).
    fn from_str(text: &str) -> Result<Space, SpaceError> {
        let text = text.trim();
        if text == "plane" {
            return Ok(Space::Plane);
        }
        let (kind, size) = text.split_once(char::is_whitespace).ok_or_else(|| {
            SpaceError(format!(
                "universe {text:?}: write plane, torus WxH or bounded WxH"
            ))
        })?;
        let size = size.trim();
        let (width, height) = size
            .split_once(['x', 'X', '×'])
            .ok_or_else(|| SpaceError(format!("universe {text:?}: the size is WxH, e.g. 10x10")))?;
        let side = |what: &str, digits: &str| -> Result<u64, SpaceError> {
            let value: u64 = digits.trim().parse().map_err(|_| {
                SpaceError(format!(
                    "universe {text:?}: the {what} {digits:?} is not a whole number"
                ))
            })?;
            if !(1..=MAX_SIDE).contains(&value) {
                return Err(SpaceError(format!(
                    "universe {text:?}: the {what} must be from 1 to {MAX_SIDE}"
                )));
            }
            Ok(value)
        };
        let (width, height) = (side("width", width)?, side("height", height)?);
        if width * height > MAX_CELLS {
            return Err(SpaceError(format!(
                "universe {text:?}: at most {MAX_CELLS} cells"
            )));
        }
        match kind {
            "torus" => Ok(Space::Torus { width, height }),
            "bounded" => Ok(Space::Bounded { width, height }),
            other => Err(SpaceError(format!(
                "universe {text:?}: {other:?} is not a kind of universe (plane, torus or bounded)"
            ))),
        }
    }
}

impl fmt::Display for Space {
    /// The canonical text, which `from_str` reads back.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Space::Plane => write!(f, "plane"),
            Space::Torus { width, height } => write!(f, "torus {width}x{height}"),
            Space::Bounded { width, height } => write!(f, "bounded {width}x{height}"),
        }
    }
}

/// Why a pattern cannot be put in a bounded universe.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum FiniteError {
    #[error("the pattern is {width}×{height} cells from its (0, 0), larger than the {space}")]
    TooLarge {
        width: u64,
        height: u64,
        space: Space,
    },
    #[error("a live cell {x}, {y} from the universe's top-left cell lies outside the {space}")]
    Outside { x: i64, y: i64, space: Space },
    #[error("the plane is not a bounded universe")]
    Unbounded,
}

/// The state of a bounded universe, stepped a generation at a time.
#[derive(Clone)]
pub struct Finite {
    space: Space,
    rule: Rule,
    sliced: Sliced,
    width: usize,
    height: usize,
    /// whether the edges wrap (a torus)
    wrap: bool,
    /// 64-bit words per row; bits past the width are always 0
    words: usize,
    cells: Vec<u64>,
    /// what the cells are written into while stepping, then swapped in
    next: Vec<u64>,
    /// each row with every cell moved one to the east (`west[x]` is
    /// `cells[x - 1]`) and to the west, remade at every step
    west: Vec<u64>,
    east: Vec<u64>,
    /// the rows above and below each row, None past a bounded edge
    around: Vec<(Option<usize>, Option<usize>)>,
    /// where an isotropic rule's fixes are applied to 64 rows at once;
    /// None for an outer-totalistic rule
    tile: Option<Box<Tile>>,
    generation: BigUint,
}

/// What `advance` found out about the universe's history.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct History {
    /// the period of the cycle the history ends in, once it was seen
    /// (a multiple of the smallest period is never reported: Brent's
    /// method gives the smallest)
    pub period: Option<u64>,
    /// generations actually stepped
    pub stepped: u64,
}

impl Finite {
    /// The universe `space` holding `pattern` (its (0, 0) at the universe's
    /// top-left cell) at generation 0.
    pub fn from_pattern(
        pattern: &Pattern,
        rule: Rule,
        space: Space,
    ) -> Result<Finite, FiniteError> {
        let mut finite = Finite::empty(rule, space)?;
        let (used_width, used_height) = pattern.extent();
        if used_width > finite.width as u64 || used_height > finite.height as u64 {
            return Err(FiniteError::TooLarge {
                width: used_width,
                height: used_height,
                space,
            });
        }
        for (leaf_row, leaves) in pattern.leaf_rows() {
            for &(leaf_column, bits) in leaves {
                for bit in 0..64u64 {
                    if bits >> bit & 1 == 1 {
                        finite.set(
                            (leaf_column * 8 + bit % 8) as usize,
                            (leaf_row * 8 + bit / 8) as usize,
                        );
                    }
                }
            }
        }
        Ok(finite)
    }

    /// The universe `space` holding `cells` (from its top-left cell) at
    /// `generation`.
    pub fn from_cells(
        rule: Rule,
        space: Space,
        cells: impl IntoIterator<Item = (i64, i64)>,
        generation: BigUint,
    ) -> Result<Finite, FiniteError> {
        let mut finite = Finite::empty(rule, space)?;
        for (x, y) in cells {
            if !(0..finite.width as i64).contains(&x) || !(0..finite.height as i64).contains(&y) {
                return Err(FiniteError::Outside { x, y, space });
            }
            finite.set(x as usize, y as usize);
        }
        finite.generation = generation;
        Ok(finite)
    }

    fn empty(rule: Rule, space: Space) -> Result<Finite, FiniteError> {
        let (width, height, wrap) = match space {
            Space::Plane => return Err(FiniteError::Unbounded),
            Space::Torus { width, height } => (width as usize, height as usize, true),
            Space::Bounded { width, height } => (width as usize, height as usize, false),
        };
        let words = width.div_ceil(64);
        let sliced = Sliced::new(&rule);
        Ok(Finite {
            space,
            rule,
            tile: Tile::of(&sliced),
            sliced,
            width,
            height,
            wrap,
            words,
            cells: vec![0; words * height],
            next: vec![0; words * height],
            west: vec![0; words * height],
            east: vec![0; words * height],
            around: (0..height)
                .map(|y| {
                    let row = |dy: isize| {
                        let row = y as isize + dy;
                        if (0..height as isize).contains(&row) {
                            Some(row as usize)
                        } else if wrap {
                            Some(row.rem_euclid(height as isize) as usize)
                        } else {
                            None
                        }
                    };
                    (row(-1), row(1))
                })
                .collect(),
            generation: BigUint::zero(),
        })
    }

    fn set(&mut self, x: usize, y: usize) {
        self.cells[y * self.words + x / 64] |= 1 << (x % 64);
    }

    pub fn space(&self) -> Space {
        self.space
    }

    pub fn rule(&self) -> Rule {
        self.rule
    }

    pub fn generation(&self) -> &BigUint {
        &self.generation
    }

    pub fn population(&self) -> u64 {
        self.cells
            .iter()
            .map(|word| u64::from(word.count_ones()))
            .sum()
    }

    /// The live cells as a pattern whose (0, 0) is the universe's top-left
    /// cell (so `origin` places it where the universe is).
    pub fn to_pattern(&self, budget: u64) -> Result<Pattern, BuildError> {
        let mut pattern = Builder::new(budget);
        for (x, y) in self.cells() {
            pattern.push_run(y as u64, x as u64, 1)?;
        }
        Ok(pattern.finish(None))
    }

    /// Advances `generations` on, watching for the cycle the history ends
    /// in; once it is found only the remainder modulo the period is
    /// stepped. `observe` hears the generations stepped so far, now and
    /// then.
    pub fn advance(&mut self, generations: &BigUint, mut observe: impl FnMut(u64)) -> History {
        let mut left = generations.clone();
        let mut stepped = 0u64;
        // Brent: the tortoise waits at powers of two; the hare (this state)
        // meets it again exactly when it has gone round the cycle.
        let mut tortoise = self.cells.clone();
        let (mut power, mut lap) = (1u64, 0u64);
        let mut period = None;
        while !left.is_zero() {
            self.step();
            stepped += 1;
            left -= 1u32;
            lap += 1;
            if stepped.is_multiple_of(4096) {
                observe(stepped);
            }
            if self.cells == tortoise {
                period = Some(lap);
                break;
            }
            if lap == power {
                tortoise.clone_from(&self.cells);
                power *= 2;
                lap = 0;
            }
        }
        if let Some(period) = period {
            let rest = (&left % period).to_u64().expect("below the period");
            self.generation += &left - rest;
            for _ in 0..rest {
                self.step();
                stepped += 1;
            }
        }
        History { period, stepped }
    }

    /// Goes on to where the history from this state settles: the first
    /// generation (counted from this one) of the cycle it ends in, whose
    /// state this becomes, and the cycle's period. None when the cycle is
    /// not seen within `limit` generations; this is then the state at the
    /// limit.
    pub fn settle(&mut self, limit: &BigUint) -> Option<(u64, u64)> {
        let start_state = self.clone();
        let history = self.advance(limit, |_| {});
        let period = history.period?;
        // The cycle starts where a state and the one a period later first
        // agree.
        let (mut early, mut late) = (start_state.clone(), start_state);
        for _ in 0..period {
            late.step();
        }
        let mut start = 0u64;
        while early.cells != late.cells {
            early.step();
            late.step();
            start += 1;
        }
        *self = early;
        Some((start, period))
    }

    /// The live cells, from the universe's top-left cell.
    pub fn cells(&self) -> Vec<(i64, i64)> {
        let mut cells = Vec::new();
        for y in 0..self.height {
            for word in 0..self.words {
                let mut bits = self.cells[y * self.words + word];
                while bits != 0 {
                    let bit = bits.trailing_zeros() as i64;
                    bits &= bits - 1;
                    cells.push((word as i64 * 64 + bit, y as i64));
                }
            }
        }
        cells
    }

    /// One generation.
    pub fn step(&mut self) {
        let (words, width) = (self.words, self.width);
        let last_mask = if width % 64 == 0 {
            u64::MAX
        } else {
            (1u64 << (width % 64)) - 1
        };
        let last_bit = (width - 1) % 64;
        // Each row moved one cell east and one west, with the cell that
        // falls off one edge coming in at the other on a torus.
        for y in 0..self.height {
            let row = &self.cells[y * words..(y + 1) * words];
            let first = row[0] & 1;
            let end = row[words - 1] >> last_bit & 1;
            let west = &mut self.west[y * words..(y + 1) * words];
            let east = &mut self.east[y * words..(y + 1) * words];
            for at in 0..words {
                let below = if at > 0 { row[at - 1] >> 63 } else { 0 };
                let above = if at + 1 < words { row[at + 1] << 63 } else { 0 };
                west[at] = row[at] << 1 | below;
                east[at] = row[at] >> 1 | above;
            }
            west[words - 1] &= last_mask;
            if self.wrap {
                west[0] |= end;
                east[words - 1] |= first << last_bit;
            }
        }
        let planes = Planes {
            cells: &self.cells,
            east: &self.east,
            west: &self.west,
            around: &self.around,
            words,
        };
        let mask = |at: usize| if at + 1 == words { last_mask } else { u64::MAX };
        let sliced = &self.sliced;
        match self.tile.as_deref_mut() {
            // An isotropic rule: 64 rows at a time, a word column after
            // another, so that the fixes run over whole blocks.
            Some(tile) => {
                for first in (0..self.height).step_by(64) {
                    let rows = first..(first + 64).min(self.height);
                    for at in 0..words {
                        for (k, y) in rows.clone().enumerate() {
                            let around = planes.neighbours(y, at);
                            let sum = sliced::counts(&around);
                            let alive = planes.cells[y * words + at];
                            tile.hold(k, around, sum, alive, sliced.base(alive, &sum));
                        }
                        let fixed = tile.fixed();
                        for (k, y) in rows.clone().enumerate() {
                            self.next[y * words + at] = fixed.0[k] & mask(at);
                        }
                    }
                }
            }
            None => {
                for y in 0..self.height {
                    for at in 0..words {
                        let sum = sliced::counts(&planes.neighbours(y, at));
                        let alive = planes.cells[y * words + at];
                        self.next[y * words + at] = sliced.base(alive, &sum) & mask(at);
                    }
                }
            }
        }
        std::mem::swap(&mut self.cells, &mut self.next);
        self.generation += 1u32;
    }
}

/// The planes a generation of a bounded universe reads: the cells, the
/// rows moved east and west, and which rows are above and below each.
struct Planes<'a> {
    cells: &'a [u64],
    east: &'a [u64],
    west: &'a [u64],
    around: &'a [(Option<usize>, Option<usize>)],
    words: usize,
}

impl Planes<'_> {
    /// The eight neighbours of word `at` of row `y`, clockwise from north
    /// (see `rule::letters`); rows past a bounded edge are dead.
    #[inline(always)]
    fn neighbours(&self, y: usize, at: usize) -> [u64; 8] {
        let (up, down) = self.around[y];
        let word = |grid: &[u64], row: Option<usize>| row.map_or(0, |r| grid[r * self.words + at]);
        [
            word(self.cells, up),
            word(self.east, up),
            word(self.east, Some(y)),
            word(self.east, down),
            word(self.cells, down),
            word(self.west, down),
            word(self.west, Some(y)),
            word(self.west, up),
        ]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn finite(rle: &str, rule: &str, space: &str) -> Finite {
        let pattern = crate::pattern::read_pattern(rle.as_bytes(), 1 << 24).unwrap();
        Finite::from_pattern(&pattern, rule.parse().unwrap(), space.parse().unwrap()).unwrap()
    }

    fn cells(finite: &Finite) -> Vec<(usize, usize)> {
        let mut out = Vec::new();
        for y in 0..finite.height {
            for x in 0..finite.width {
                if finite.cells[y * finite.words + x / 64] >> (x % 64) & 1 == 1 {
                    out.push((x, y));
                }
            }
        }
        out
    }

    #[test]
    fn universes_are_read_and_written_back() {
        for text in ["plane", "torus 10x10", "bounded 37x23", "torus 1x16777216"] {
            let space: Space = text.parse().unwrap();
            assert_eq!(space.to_string(), text);
        }
        assert_eq!(
            "torus 3×4".parse::<Space>().unwrap(),
            Space::Torus {
                width: 3,
                height: 4
            }
        );
        for bad in [
            "",
            "torus",
            "torus 10",
            "torus 0x5",
            "sphere 4x4",
            "bounded 4xq",
            "torus 16777217x1",
        ] {
            assert!(bad.parse::<Space>().is_err(), "{bad}");
        }
    }

    #[test]
    fn a_glider_on_a_ten_by_ten_torus_is_back_after_forty_generations() {
        // Common practice: a glider moves one cell diagonally every four
        // generations, so on a 10×10 torus it is back after 40, and (from
        // the issue) at 40·10^100 too.
        let mut glider = finite("x = 3, y = 3\nbo$2bo$3o!\n", "B3/S23", "torus 10x10");
        let start = cells(&glider);
        let history = glider.advance(&BigUint::from(40u32), |_| {});
        assert_eq!(cells(&glider), start);
        assert_eq!(history.stepped, 40);
        let far = BigUint::from(40u32) * BigUint::from(10u32).pow(100);
        let mut glider = finite("x = 3, y = 3\nbo$2bo$3o!\n", "B3/S23", "torus 10x10");
        let history = glider.advance(&far, |_| {});
        assert_eq!(history.period, Some(40));
        assert!(history.stepped < 200, "{history:?}");
        assert_eq!(cells(&glider), start);
        assert_eq!(glider.generation(), &far);
    }

    #[test]
    fn the_edges_wrap_on_a_torus_and_kill_on_a_bounded_plane() {
        // Reasoned by hand: a blinker lying across the wrap seam of a 5×5
        // torus still blinks; against the edge of a bounded plane its
        // outer cells lack neighbours beyond the edge.
        let mut torus = finite("x = 5, y = 1\n2o2bo!\n", "B3/S23", "torus 5x5");
        torus.step();
        assert_eq!(cells(&torus), vec![(0, 0), (0, 1), (0, 4)]);
        // A block in the corner of a bounded plane is still a block.
        let mut block = finite("x = 2, y = 2\n2o$2o!\n", "B3/S23", "bounded 7x3");
        block.step();
        assert_eq!(cells(&block), vec![(0, 0), (1, 0), (0, 1), (1, 1)]);
        // A blinker standing on the bottom edge of a bounded plane: its
        // middle cell has two live neighbours, the cells beside it three,
        // nothing below the edge is born; the next row up gets a cell.
        let mut edge = finite("x = 3, y = 2\n3b$3o!\n", "B3/S23", "bounded 3x2");
        edge.step();
        assert_eq!(cells(&edge), vec![(1, 0), (1, 1)]);
    }

    #[test]
    fn a_history_settles_where_its_cycle_starts() {
        // Reasoned by hand: a glider on a 10×10 torus is in its cycle from
        // the start (period 40); a glider in a bounded 10×10 plane runs
        // into the corner and leaves a block (common practice: a glider
        // meeting a wall of dead cells), still from then on.
        let glider = finite("x = 3, y = 3\nbo$2bo$3o!\n", "B3/S23", "torus 10x10");
        assert_eq!(
            glider.clone().settle(&BigUint::from(1000u32)),
            Some((0, 40))
        );
        let walled = finite("x = 3, y = 3\nbo$2bo$3o!\n", "B3/S23", "bounded 10x10");
        let mut at = walled.clone();
        let (start, period) = at.settle(&BigUint::from(1000u32)).unwrap();
        assert_eq!(period, 1);
        // Settled at `start`, not before; the state is left there.
        assert_eq!(at.generation(), &BigUint::from(start));
        let mut stepped = walled.clone();
        stepped.advance(&BigUint::from(start), |_| {});
        assert!(at.cells == stepped.cells);
        let mut next = at.clone();
        next.step();
        assert!(at.cells == next.cells);
        let mut before = walled.clone();
        before.advance(&BigUint::from(start - 1), |_| {});
        let mut after = before.clone();
        after.step();
        assert!(before.cells != after.cells);
        let mut short = glider.clone();
        assert_eq!(short.settle(&BigUint::from(10u32)), None, "not within 10");
        assert_eq!(
            short.generation(),
            &BigUint::from(10u32),
            "left at the limit"
        );
    }

    #[test]
    fn a_pattern_larger_than_the_universe_is_refused() {
        let pattern = crate::pattern::read_pattern(b"x = 3, y = 3\nbo$2bo$3o!\n", 1 << 20).unwrap();
        let error = Finite::from_pattern(&pattern, Rule::LIFE, "torus 2x10".parse().unwrap())
            .err()
            .unwrap();
        assert_eq!(
            error.to_string(),
            "the pattern is 3×3 cells from its (0, 0), larger than the torus 2x10"
        );
    }

    /// One generation of a `width`×`height` universe cell by cell, from
    /// the rule's definition: neighbours wrap with `wrap`, else are dead.
    fn by_definition(
        live: &[bool],
        width: usize,
        height: usize,
        wrap: bool,
        rule: Rule,
    ) -> Vec<bool> {
        use crate::rule::letters::OFFSETS;
        let at = |x: i64, y: i64| -> bool {
            let (w, h) = (width as i64, height as i64);
            if wrap {
                live[(y.rem_euclid(h) * w + x.rem_euclid(w)) as usize]
            } else {
                (0..w).contains(&x) && (0..h).contains(&y) && live[(y * w + x) as usize]
            }
        };
        (0..width * height)
            .map(|i| {
                let (x, y) = ((i % width) as i64, (i / width) as i64);
                let neighbourhood = OFFSETS.iter().enumerate().fold(0u8, |n, (bit, (dx, dy))| {
                    n | (at(x + dx, y + dy) as u8) << bit
                });
                rule.next_state(live[i], neighbourhood)
            })
            .collect()
    }

    // Universes of several 64-row blocks and word columns whose sides are
    // not multiples of 64 (common practice: a stepper checked against the
    // rule's definition on random soups), on both paths of the fixes.
    #[test]
    fn isotropic_rules_agree_with_their_definition_across_blocks() {
        for (rule, space) in [
            ("B3/S2-i34q", "torus 150x130"),
            ("B36-k/S23", "bounded 131x70"),
            ("B2ce3-k4z5ai/S1c2-n4wt6k7e8", "torus 70x200"),
            ("B02a3-k/S2-i3", "bounded 65x129"),
        ] {
            let (rule, space): (Rule, Space) = (rule.parse().unwrap(), space.parse().unwrap());
            let (width, height) = match space {
                Space::Torus { width, height } | Space::Bounded { width, height } => {
                    (width as usize, height as usize)
                }
                Space::Plane => unreachable!(),
            };
            let wrap = matches!(space, Space::Torus { .. });
            let mut state = 0x9e37_79b9_7f4a_7c15u64;
            let mut live: Vec<bool> = (0..width * height)
                .map(|_| {
                    state ^= state << 13;
                    state ^= state >> 7;
                    state ^= state << 17;
                    state % 8 < 3
                })
                .collect();
            let soup = live
                .iter()
                .enumerate()
                .filter(|&(_, &alive)| alive)
                .map(|(i, _)| ((i % width) as i64, (i / width) as i64));
            let start = Finite::from_cells(rule, space, soup, BigUint::zero()).unwrap();
            let mut portable = start.clone();
            portable
                .tile
                .as_mut()
                .expect("an isotropic rule has fixes")
                .avx2 = false;
            let mut universes = [start, portable];
            for generation in 1..=10 {
                live = by_definition(&live, width, height, wrap, rule);
                // Row by row, as `cells` lists them.
                let expected: Vec<(usize, usize)> = (0..width * height)
                    .filter(|&i| live[i])
                    .map(|i| (i % width, i / width))
                    .collect();
                for universe in &mut universes {
                    universe.step();
                    assert_eq!(cells(universe), expected, "{rule} {space} at {generation}");
                }
            }
        }
    }
}
