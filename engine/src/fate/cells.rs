//! Finite sets of live cells, as sorted lists, and what the fate analysis
//! does with them: step one object alone, split a state into 8-connected
//! pieces, find pieces near each other, turn and move a set.
//!
//! A cell is `(x, y)`, x to the right, y down; lists are sorted by row then
//! column (`(y, x)`), as `Universe::cells` returns them. Objects are small
//! next to the states they come from, so one object is stepped on a dense
//! grid of its bounding box plus a ring.

use std::collections::HashMap;

use crate::rule::Rule;
use crate::rule::letters::OFFSETS;

/// A live cell: (x, y).
pub type Cell = (i64, i64);

/// An inclusive rectangle of cells.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Bounds {
    pub left: i64,
    pub top: i64,
    pub right: i64,
    pub bottom: i64,
}

impl Bounds {
    /// The bounds of `cells`, or None when there are none.
    pub fn of(cells: &[Cell]) -> Option<Bounds> {
        let (&(x, y), rest) = cells.split_first()?;
        let mut bounds = Bounds {
            left: x,
            top: y,
            right: x,
            bottom: y,
        };
        for &(x, y) in rest {
            bounds.left = bounds.left.min(x);
            bounds.right = bounds.right.max(x);
            bounds.top = bounds.top.min(y);
            bounds.bottom = bounds.bottom.max(y);
        }
        Some(bounds)
    }

    /// The smallest rectangle holding both.
    pub fn union(self, other: Bounds) -> Bounds {
        Bounds {
            left: self.left.min(other.left),
            top: self.top.min(other.top),
            right: self.right.max(other.right),
            bottom: self.bottom.max(other.bottom),
        }
    }

    /// Moved by (dx, dy).
    pub fn shifted(self, dx: i64, dy: i64) -> Bounds {
        Bounds {
            left: self.left + dx,
            top: self.top + dy,
            right: self.right + dx,
            bottom: self.bottom + dy,
        }
    }

    /// The Chebyshev distance between the nearest cells of two rectangles
    /// (0 when they overlap). Two live cells at distance 2 or less can
    /// share a neighbour, so only then can they influence each other.
    pub fn distance(self, other: Bounds) -> i64 {
        let dx = (self.left - other.right)
            .max(other.left - self.right)
            .max(0);
        let dy = (self.top - other.bottom)
            .max(other.top - self.bottom)
            .max(0);
        dx.max(dy)
    }

    pub fn width(self) -> i64 {
        self.right - self.left + 1
    }

    pub fn height(self) -> i64 {
        self.bottom - self.top + 1
    }
}

/// Sorts cells by row then column, the order every list here keeps.
pub fn sort(cells: &mut [Cell]) {
    cells.sort_unstable_by_key(|&(x, y)| (y, x));
}

/// One generation of `cells` alone on the plane under `rule`. The result
/// is sorted. Costs the area of the cells' bounding box plus a ring.
pub fn step(cells: &[Cell], rule: Rule) -> Vec<Cell> {
    let Some(bounds) = Bounds::of(cells) else {
        return Vec::new();
    };
    // The grid holds the box and a ring of two: births reach one cell
    // out, and the ring beyond that keeps every count in range.
    let (left, top) = (bounds.left - 2, bounds.top - 2);
    let width = (bounds.width() + 4) as usize;
    let height = (bounds.height() + 4) as usize;
    let mut alive = vec![0u8; width * height];
    for &(x, y) in cells {
        alive[(y - top) as usize * width + (x - left) as usize] = 1;
    }
    let mut next = Vec::with_capacity(cells.len() + 8);
    for row in 1..height - 1 {
        for x in 1..width - 1 {
            let at = row * width + x;
            let neighbourhood = OFFSETS.iter().enumerate().fold(0u8, |n, (bit, &(dx, dy))| {
                let cell = (at as i64 + dy * width as i64 + dx) as usize;
                n | alive[cell] << bit
            });
            if rule.next_state(alive[at] == 1, neighbourhood) {
                next.push((left + x as i64, top + row as i64));
            }
        }
    }
    next
}

/// The cells moved so that their bounding box starts at (0, 0), and the
/// corner they were moved from.
pub fn normalise(cells: &[Cell]) -> (Vec<Cell>, (i64, i64)) {
    let Some(bounds) = Bounds::of(cells) else {
        return (Vec::new(), (0, 0));
    };
    let moved = cells
        .iter()
        .map(|&(x, y)| (x - bounds.left, y - bounds.top))
        .collect();
    (moved, (bounds.left, bounds.top))
}

/// The cells in one of the eight orientations (0 is as they are; 1–3
/// turned by a quarter each; 4–7 the same after a mirror image), moved so
/// that their bounding box starts at (0, 0), sorted.
pub fn oriented(cells: &[Cell], orientation: u8) -> Vec<Cell> {
    let mut turned: Vec<Cell> = cells
        .iter()
        .map(|&(x, y)| {
            let (x, y) = if orientation >= 4 { (-x, y) } else { (x, y) };
            match orientation % 4 {
                0 => (x, y),
                1 => (-y, x),
                2 => (-x, -y),
                _ => (y, -x),
            }
        })
        .collect();
    let (mut moved, _) = normalise(&turned);
    turned.clear();
    sort(&mut moved);
    moved
}

/// The 8-connected pieces of `cells` (sorted), each sorted.
pub fn pieces(cells: &[Cell]) -> Vec<Vec<Cell>> {
    let index: HashMap<Cell, usize, ahash::RandomState> = cells
        .iter()
        .enumerate()
        .map(|(at, &cell)| (cell, at))
        .collect();
    let mut sets = Sets::new(cells.len());
    for (at, &(x, y)) in cells.iter().enumerate() {
        // Half the neighbours suffice: each pair is met from one side.
        for (dx, dy) in [(1, 0), (-1, 1), (0, 1), (1, 1)] {
            if let Some(&other) = index.get(&(x + dx, y + dy)) {
                sets.join(at, other);
            }
        }
    }
    sets.groups(cells.len())
        .into_iter()
        .map(|members| members.into_iter().map(|at| cells[at]).collect())
        .collect()
}

/// Pairs (i, j), i < j, of rectangles at most `gap` apart (see
/// [`Bounds::distance`]), found through a grid of buckets.
pub fn near_pairs(boxes: &[Bounds], gap: i64) -> Vec<(usize, usize)> {
    const BUCKET: i64 = 32;
    let mut buckets: HashMap<(i64, i64), Vec<usize>, ahash::RandomState> = HashMap::default();
    for (at, bounds) in boxes.iter().enumerate() {
        let (x0, x1) = (
            bounds.left.div_euclid(BUCKET),
            (bounds.right + gap).div_euclid(BUCKET),
        );
        let (y0, y1) = (
            bounds.top.div_euclid(BUCKET),
            (bounds.bottom + gap).div_euclid(BUCKET),
        );
        for bx in x0..=x1 {
            for by in y0..=y1 {
                buckets.entry((bx, by)).or_default().push(at);
            }
        }
    }
    let mut pairs = Vec::new();
    for members in buckets.values() {
        for (k, &i) in members.iter().enumerate() {
            for &j in &members[k + 1..] {
                if boxes[i].distance(boxes[j]) <= gap {
                    pairs.push((i.min(j), i.max(j)));
                }
            }
        }
    }
    pairs.sort_unstable();
    pairs.dedup();
    pairs
}

/// Disjoint sets over 0..n (union by size, path halving).
pub struct Sets {
    parent: Vec<usize>,
    size: Vec<usize>,
}

impl Sets {
    pub fn new(n: usize) -> Sets {
        Sets {
            parent: (0..n).collect(),
            size: vec![1; n],
        }
    }

    pub fn find(&mut self, mut at: usize) -> usize {
        while self.parent[at] != at {
            self.parent[at] = self.parent[self.parent[at]];
            at = self.parent[at];
        }
        at
    }

    /// Joins the sets of `a` and `b`; true when they were apart.
    pub fn join(&mut self, a: usize, b: usize) -> bool {
        let (mut a, mut b) = (self.find(a), self.find(b));
        if a == b {
            return false;
        }
        if self.size[a] < self.size[b] {
            std::mem::swap(&mut a, &mut b);
        }
        self.parent[b] = a;
        self.size[a] += self.size[b];
        true
    }

    /// The members of each set, sets in order of their first member.
    pub fn groups(&mut self, n: usize) -> Vec<Vec<usize>> {
        let mut slot: HashMap<usize, usize, ahash::RandomState> = HashMap::default();
        let mut groups: Vec<Vec<usize>> = Vec::new();
        for at in 0..n {
            let root = self.find(at);
            let next = groups.len();
            let index = *slot.entry(root).or_insert(next);
            if index == next {
                groups.push(Vec::new());
            }
            groups[index].push(at);
        }
        groups
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn life() -> Rule {
        Rule::parse("B3/S23").unwrap()
    }

    #[test]
    fn a_blinker_turns() {
        // Blinker: three in a row become three in a column (common practice).
        let row = vec![(0, 0), (1, 0), (2, 0)];
        assert_eq!(step(&row, life()), vec![(1, -1), (1, 0), (1, 1)]);
        assert_eq!(step(&step(&row, life()), life()), row);
    }

    #[test]
    fn pieces_are_eight_connected() {
        // Two cells touching at a corner are one piece; a gap of one makes two.
        let mut cells = vec![(0, 0), (1, 1), (3, 1)];
        sort(&mut cells);
        let found = pieces(&cells);
        assert_eq!(found.len(), 2);
        assert_eq!(found[0], vec![(0, 0), (1, 1)]);
    }

    #[test]
    fn orientations_keep_the_shape() {
        // An L of three cells, in each of its eight orientations: every one
        // is three cells in a 2×2 box.
        let cells = vec![(0, 0), (0, 1), (1, 1)];
        for orientation in 0..8 {
            let turned = oriented(&cells, orientation);
            assert_eq!(turned.len(), 3);
            let bounds = Bounds::of(&turned).unwrap();
            assert_eq!(
                (bounds.left, bounds.top, bounds.right, bounds.bottom),
                (0, 0, 1, 1)
            );
        }
    }

    #[test]
    fn near_pairs_find_only_close_boxes() {
        let a = Bounds {
            left: 0,
            top: 0,
            right: 1,
            bottom: 1,
        };
        let b = Bounds {
            left: 4,
            top: 0,
            right: 5,
            bottom: 1,
        };
        let c = Bounds {
            left: 100,
            top: 100,
            right: 101,
            bottom: 101,
        };
        assert_eq!(near_pairs(&[a, b, c], 2), vec![]);
        assert_eq!(near_pairs(&[a, b, c], 3), vec![(0, 1)]);
    }
}
