//! The direct stepper: a dense grid of 64-cell words advanced one generation
//! at a time, skipping empty regions. It is the baseline every speed ratio
//! is measured against, a second check on the HashLife engine written
//! independently of it, and the faster choice for short chaotic runs.
//!
//! The grid is tiled into 64×64 squares (one word wide, 64 rows tall). A
//! tile is stepped only when it or one of its eight neighbours holds a live
//! cell; others stay empty (no B0 rules, so empty space stays empty). The
//! grid grows by whole tiles whenever a live cell reaches its outer ring of
//! tiles, so the plane is unbounded in practice.

use crate::pattern::{BuildError, Builder, Pattern};
use crate::rule::Rule;
use crate::rule::sliced::Sliced;
use crate::rule::tile::Tile;

const TILE: usize = 64;

/// A state of the plane as a dense, growing grid.
#[derive(Clone)]
pub struct Grid {
    rule: Rule,
    sliced: Sliced,
    /// column of bit 0 of the first word of each row (a multiple of 64)
    left: i64,
    /// row of the first row (a multiple of 64)
    top: i64,
    /// words per row (= tile columns)
    words: usize,
    /// rows (a multiple of 64)
    rows: usize,
    cells: Vec<u64>,
    back: Vec<u64>,
    /// whether each tile holds a live cell, row-major over tiles
    occupied: Vec<bool>,
    /// the same for the back buffer (what it held a generation ago)
    occupied_back: Vec<bool>,
    generation: u64,
    /// where an isotropic rule's fixes are applied to a whole tile at
    /// once; None for an outer-totalistic rule
    tile: Option<Box<Tile>>,
}

impl Grid {
    /// The grid holding `pattern` with its top-left cell at (0, 0), under
    /// a rule without B0 (the benchmark's baseline and the tests' second
    /// check never run one; a B0 rule panics here).
    pub fn from_pattern(pattern: &Pattern, rule: Rule) -> Grid {
        assert!(
            !rule.births_on_empty(),
            "the direct stepper skips empty tiles and runs no B0 rule ({rule})"
        );
        let (width, height) = pattern.extent();
        let (width, height) = (width.max(1), height.max(1));
        // One empty ring of tiles around the pattern.
        let words = (width as usize).div_ceil(TILE) + 2;
        let rows = ((height as usize).div_ceil(TILE) + 2) * TILE;
        let sliced = Sliced::new(&rule);
        let mut grid = Grid {
            rule,
            tile: Tile::of(&sliced),
            sliced,
            left: -(TILE as i64),
            top: -(TILE as i64),
            words,
            rows,
            cells: vec![0; words * rows],
            back: vec![0; words * rows],
            occupied: vec![false; words * rows / TILE],
            occupied_back: vec![false; words * rows / TILE],
            generation: 0,
        };
        // A leaf's rows are bytes that sit whole inside one word (leaf
        // columns and the grid's left edge are multiples of 8).
        for (row, leaves) in pattern.leaf_rows() {
            for &(column, bits) in leaves {
                let x = ((column * 8) as i64 - grid.left) as usize;
                for line in 0..8 {
                    let y = ((row * 8 + line) as i64 - grid.top) as usize;
                    let byte = (bits >> (line * 8)) & 0xff;
                    grid.cells[y * grid.words + x / 64] |= byte << (x % 64);
                }
            }
        }
        grid.refresh_occupancy();
        grid
    }

    /// The rule the grid runs under.
    pub fn rule(&self) -> Rule {
        self.rule
    }

    /// Generations stepped so far.
    pub fn generation(&self) -> u64 {
        self.generation
    }

    /// Cells the grid spans now (its area), for cell-update rates.
    pub fn area(&self) -> u64 {
        (self.words * 64 * self.rows) as u64
    }

    /// The number of live cells.
    pub fn population(&self) -> u64 {
        self.cells.iter().map(|word| word.count_ones() as u64).sum()
    }

    /// The live cells as (x, y), sorted by row then column.
    pub fn cells(&self) -> Vec<(i64, i64)> {
        let mut cells = Vec::new();
        for row in 0..self.rows {
            for word in 0..self.words {
                let mut bits = self.cells[row * self.words + word];
                while bits != 0 {
                    let bit = bits.trailing_zeros() as i64;
                    bits &= bits - 1;
                    cells.push((self.left + word as i64 * 64 + bit, self.top + row as i64));
                }
            }
        }
        cells
    }

    /// The cells as a pattern with the top-left of the bounding box at
    /// (0, 0), and that corner's plane coordinates; None when empty. The
    /// pattern's leaves may take up to `budget` bytes.
    pub fn to_pattern(&self, budget: u64) -> Result<Option<(Pattern, i64, i64)>, BuildError> {
        let cells = self.cells();
        let (Some(left), Some(top)) = (
            cells.iter().map(|cell| cell.0).min(),
            cells.iter().map(|cell| cell.1).min(),
        ) else {
            return Ok(None);
        };
        let mut pattern = Builder::new(budget);
        for (x, y) in cells {
            pattern.push_run((y - top) as u64, (x - left) as u64, 1)?;
        }
        Ok(Some((pattern.finish(None), left, top)))
    }

    /// Steps `generations` generations, one at a time.
    pub fn advance(&mut self, generations: u64) {
        for _ in 0..generations {
            self.step();
        }
    }

    /// One generation.
    pub fn step(&mut self) {
        self.make_room();
        let tiles_across = self.words;
        let tiles_down = self.rows / TILE;
        for tile_row in 0..tiles_down {
            for tile_column in 0..tiles_across {
                let tile = tile_row * tiles_across + tile_column;
                if self.near_life(tile_row, tile_column) {
                    self.occupied_back[tile] = self.step_tile(tile_row, tile_column);
                } else if self.occupied_back[tile] {
                    // It held cells a generation ago: clear them.
                    for row in tile_row * TILE..(tile_row + 1) * TILE {
                        self.back[row * self.words + tile_column] = 0;
                    }
                    self.occupied_back[tile] = false;
                }
            }
        }
        std::mem::swap(&mut self.cells, &mut self.back);
        std::mem::swap(&mut self.occupied, &mut self.occupied_back);
        self.generation += 1;
    }

    fn near_life(&self, tile_row: usize, tile_column: usize) -> bool {
        let tiles_down = self.rows / TILE;
        for row in tile_row.saturating_sub(1)..(tile_row + 2).min(tiles_down) {
            for column in tile_column.saturating_sub(1)..(tile_column + 2).min(self.words) {
                if self.occupied[row * self.words + column] {
                    return true;
                }
            }
        }
        false
    }

    /// Steps one tile into the back buffer; returns whether it holds life.
    fn step_tile(&mut self, tile_row: usize, column: usize) -> bool {
        if self.tile.is_some() {
            self.step_tile_rows::<true>(tile_row, column)
        } else {
            self.step_tile_rows::<false>(tile_row, column)
        }
    }

    /// [`Grid::step_tile`] row by row, by the rule's base alone, or with
    /// `FIXES` into the [`Tile`], whose fixes then apply to all rows at
    /// once (two versions, so that a rule without fixes runs the plain loop).
    #[inline(always)]
    fn step_tile_rows<const FIXES: bool>(&mut self, tile_row: usize, column: usize) -> bool {
        let words = self.words;
        let rows = self.rows;
        let cells = &self.cells;
        // One line of the column: the word and its neighbours' facing bits,
        // as the 3-cell horizontal sum (two bit planes) and the 2-cell sum
        // without the centre. Lines outside the grid are empty.
        let line = |row: usize| -> Line {
            if row >= rows {
                return Line::default();
            }
            let at = row * words + column;
            let word = cells[at];
            let west = if column > 0 { cells[at - 1] } else { 0 };
            let east = if column + 1 < words { cells[at + 1] } else { 0 };
            let left = word << 1 | west >> 63;
            let right = word >> 1 | east << 63;
            let sides = left ^ right;
            Line {
                word,
                west: left,
                east: right,
                ones: sides ^ word,
                twos: (left & right) | (sides & word),
                side_ones: sides,
                side_twos: left & right,
            }
        };
        let first = tile_row * TILE;
        let mut up = line(first.wrapping_sub(1));
        let mut mid = line(first);
        let mut any = 0u64;
        // Without FIXES the row loop below compiles to the plain one.
        let mut tile = if FIXES {
            self.tile.as_deref_mut()
        } else {
            None
        };
        for (at, row) in (first..first + TILE).enumerate() {
            let down = line(row + 1);
            // Neighbour count = up (3 cells) + mid (2 cells) + down (3 cells),
            // each a 2-bit number, added into four bit planes.
            let (bit0, carry0) = full_add(up.ones, mid.side_ones, down.ones);
            let (t, carry1) = full_add(up.twos, mid.side_twos, down.twos);
            let bit1 = t ^ carry0;
            let carry2 = t & carry0;
            let planes = [bit0, bit1, carry1 ^ carry2, carry1 & carry2];
            let out = self.sliced.base(mid.word, &planes);
            match tile.as_deref_mut() {
                // Clockwise from north; bit x is the cell (x, y), x growing east.
                Some(tile) => {
                    let neighbours = [
                        up.word, up.east, mid.east, down.east, down.word, down.west, mid.west,
                        up.west,
                    ];
                    tile.hold(at, neighbours, planes, mid.word, out);
                }
                None => {
                    self.back[row * words + column] = out;
                    any |= out;
                }
            }
            up = mid;
            mid = down;
        }
        if let Some(tile) = tile {
            let next = tile.fixed();
            for (at, row) in (first..first + TILE).enumerate() {
                self.back[row * words + column] = next.0[at];
                any |= next.0[at];
            }
        }
        any != 0
    }

    fn refresh_occupancy(&mut self) {
        let tiles_down = self.rows / TILE;
        for tile_row in 0..tiles_down {
            for column in 0..self.words {
                let any = (tile_row * TILE..(tile_row + 1) * TILE)
                    .any(|row| self.cells[row * self.words + column] != 0);
                self.occupied[tile_row * self.words + column] = any;
            }
        }
    }

    /// Grows the grid by whole tiles on every side whose outer ring of tiles
    /// holds life, so that no live cell can reach the edge in one step.
    fn make_room(&mut self) {
        let tiles_down = self.rows / TILE;
        let across = self.words;
        let occupied = |row: usize, column: usize| self.occupied[row * across + column];
        let top = (0..across).any(|c| occupied(0, c));
        let bottom = (0..across).any(|c| occupied(tiles_down - 1, c));
        let west = (0..tiles_down).any(|r| occupied(r, 0));
        let east = (0..tiles_down).any(|r| occupied(r, across - 1));
        if !(top || bottom || west || east) {
            return;
        }
        // Grow by a quarter of the size (at least a tile) so that a pattern
        // growing steadily costs amortised constant time per step.
        let grow_across = (across / 4).max(1);
        let grow_down = (tiles_down / 4).max(1);
        let add_west = if west { grow_across } else { 0 };
        let add_east = if east { grow_across } else { 0 };
        let add_top = if top { grow_down } else { 0 };
        let add_bottom = if bottom { grow_down } else { 0 };
        let words = across + add_west + add_east;
        let rows = self.rows + (add_top + add_bottom) * TILE;
        let mut cells = vec![0u64; words * rows];
        for row in 0..self.rows {
            let from = row * across;
            let to = (row + add_top * TILE) * words + add_west;
            cells[to..to + across].copy_from_slice(&self.cells[from..from + across]);
        }
        self.cells = cells;
        self.back = vec![0; words * rows];
        self.left -= (add_west * 64) as i64;
        self.top -= (add_top * TILE) as i64;
        self.words = words;
        self.rows = rows;
        self.occupied = vec![false; words * rows / TILE];
        self.occupied_back = vec![false; words * rows / TILE];
        self.refresh_occupancy();
    }
}

/// One row's word of a tile column with its horizontal neighbour sums.
#[derive(Clone, Copy, Default)]
struct Line {
    word: u64,
    /// each cell's western and eastern neighbour
    west: u64,
    east: u64,
    /// low and high bit of the sum of each cell and its two neighbours
    ones: u64,
    twos: u64,
    /// the same for the two neighbours alone
    side_ones: u64,
    side_twos: u64,
}

#[inline]
fn full_add(a: u64, b: u64, c: u64) -> (u64, u64) {
    let partial = a ^ b;
    (partial ^ c, (a & b) | (partial & c))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pattern::read_pattern;

    #[test]
    fn a_glider_crosses_word_and_tile_boundaries() {
        // LifeWiki, "Glider": period 4, displacement (1, 1).
        let glider = read_pattern(b"x = 3, y = 3\nbob$2bo$3o!", 1 << 20).unwrap();
        let mut grid = Grid::from_pattern(&glider, Rule::LIFE);
        let start = grid.cells();
        grid.advance(4 * 300);
        let moved: Vec<(i64, i64)> = start.iter().map(|&(x, y)| (x + 300, y + 300)).collect();
        assert_eq!(grid.cells(), moved);
        assert_eq!(grid.generation(), 1200);
    }

    #[test]
    fn a_glider_flying_north_west_grows_the_grid_on_that_side() {
        // The glider above, turned by 180 degrees, travels towards -x, -y.
        let glider = read_pattern(b"x = 3, y = 3\n3o$o$bo!", 1 << 20).unwrap();
        let mut grid = Grid::from_pattern(&glider, Rule::LIFE);
        let start = grid.cells();
        grid.advance(4 * 200);
        let moved: Vec<(i64, i64)> = start.iter().map(|&(x, y)| (x - 200, y - 200)).collect();
        assert_eq!(grid.cells(), moved);
    }

    /// One generation of a set of live cells, cell by cell by the rule's
    /// neighbourhood sets: the definition, written apart from the words.
    fn by_definition(cells: &[(i64, i64)], rule: Rule) -> Vec<(i64, i64)> {
        use crate::rule::letters::OFFSETS;
        use std::collections::BTreeSet;
        let live: BTreeSet<(i64, i64)> = cells.iter().copied().collect();
        let mut candidates = BTreeSet::new();
        for &(x, y) in &live {
            candidates.insert((x, y));
            for (dx, dy) in OFFSETS {
                candidates.insert((x + dx, y + dy));
            }
        }
        let mut next: Vec<(i64, i64)> = candidates
            .into_iter()
            .filter(|&(x, y)| {
                let neighbourhood = OFFSETS.iter().enumerate().fold(0u8, |n, (bit, (dx, dy))| {
                    n | (live.contains(&(x + dx, y + dy)) as u8) << bit
                });
                rule.next_state(live.contains(&(x, y)), neighbourhood)
            })
            .collect();
        next.sort_by_key(|&(x, y)| (y, x));
        next
    }

    #[test]
    fn isotropic_rules_agree_with_their_definition_across_tiles() {
        // A seeded 150×90 soup spans tiles and words both ways.
        let mut state = 0x9e37_79b9_7f4a_7c15u64;
        let mut rows = Vec::new();
        for _ in 0..90 {
            let row: String = (0..150)
                .map(|_| {
                    state ^= state << 13;
                    state ^= state >> 7;
                    state ^= state << 17;
                    if state % 5 < 2 { 'o' } else { 'b' }
                })
                .collect();
            rows.push(row);
        }
        let text = format!("x = 150, y = 90\n{}!", rows.join("$"));
        let soup = read_pattern(text.as_bytes(), 1 << 24).unwrap();
        for text in ["B3/S2-i34q", "B36-k/S23", "B2ce3-k4z5ai/S1c2-n4wt6k7e8"] {
            let rule = Rule::parse(text).unwrap();
            // As built (AVX2 where the processor has it), and portable.
            let mut grids = [
                Grid::from_pattern(&soup, rule),
                Grid::from_pattern(&soup, rule),
            ];
            grids[1]
                .tile
                .as_mut()
                .expect("an isotropic rule has fixes")
                .avx2 = false;
            let mut cells = grids[0].cells();
            for generation in 1..=12 {
                cells = by_definition(&cells, rule);
                for grid in &mut grids {
                    grid.step();
                    assert_eq!(grid.cells(), cells, "{text} at generation {generation}");
                }
            }
        }
    }
}
