//! The local base case of the recursion: a 16×16 square made of four leaves,
//! advanced 0 to 4 generations with bit-parallel arithmetic, gives the 8×8
//! leaf at its centre.
//!
//! Each row of the square is a machine word; the eight neighbours of every
//! cell of a row are summed at once with carry-save adders into four bit
//! planes (the neighbour count in binary), and the rule picks the new row
//! from those planes. Cells near the square's border see missing neighbours
//! and go wrong, but the error moves inward one cell per generation, so after
//! t ≤ 4 generations the centre 8×8 is exact.

use crate::rule::Rule;

/// Rows of the 16×16 square: bit x of `rows[y]` is the cell at (x, y).
type Rows = [u32; 16];

/// A rule compiled for the kernel: for each neighbour count that matters,
/// the count's bits as all-ones/all-zeros words and whether it gives birth
/// or survival.
#[derive(Clone, Debug)]
pub struct Kernel {
    /// (count bit planes wanted, born word, stays word) for the counts in B ∪ S
    counts: Vec<([u32; 4], u32, u32)>,
}

impl Kernel {
    pub fn new(rule: &Rule) -> Kernel {
        let word = |yes: bool| if yes { u32::MAX } else { 0 };
        let counts = rule
            .active_counts()
            .map(|(count, born, stays)| {
                let want = [0, 1, 2, 3].map(|bit| word(count >> bit & 1 == 1));
                (want, word(born), word(stays))
            })
            .collect();
        Kernel { counts }
    }

    /// The centre leaf of the square `[nw, ne, sw, se]` after `steps` ≤ 4
    /// generations. Leaf bits: `y * 8 + x`.
    pub fn advance_square(&self, leaves: [u64; 4], steps: u32) -> u64 {
        debug_assert!(steps <= 4);
        let mut rows = spread(leaves);
        // After s generations only rows s..16-s are exact; compute no more.
        for done in 0..steps as usize {
            rows = self.step(&rows, done + 1, 16 - done - 1);
        }
        centre(&rows)
    }

    /// One generation of rows `from..to` (the rest are left zero).
    #[inline]
    fn step(&self, rows: &Rows, from: usize, to: usize) -> Rows {
        let mut next = [0u32; 16];
        for y in from..to {
            let (up, mid, down) = (rows[y - 1], rows[y], rows[y + 1]);
            // The eight neighbours, each moved onto the column of the cell,
            // summed by carry-save adders into the bits of the count.
            let (s1, c1) = full_add(up << 1, up, up >> 1);
            let (s2, c2) = full_add(mid << 1, mid >> 1, down);
            let (s3, c3) = (down << 1 ^ down >> 1, down << 1 & down >> 1);
            let (bit0, c4) = full_add(s1, s2, s3);
            let (t, d1) = full_add(c1, c2, c3);
            let bit1 = t ^ c4;
            let d2 = t & c4;
            let planes = [bit0, bit1, d1 ^ d2, d1 & d2];
            let mut out = 0u32;
            for (want, born, stays) in &self.counts {
                let differs = (planes[0] ^ want[0])
                    | (planes[1] ^ want[1])
                    | (planes[2] ^ want[2])
                    | (planes[3] ^ want[3]);
                out |= !differs & ((born & !mid) | (stays & mid));
            }
            next[y] = out & 0xffff;
        }
        next
    }
}

/// The centre leaf of the square `[nw, ne, sw, se]` after `steps` ≤ 4
/// generations under `rule` (compiles the rule each call; see `Kernel`).
#[cfg(test)]
fn advance_square(rule: &Rule, leaves: [u64; 4], steps: u32) -> u64 {
    Kernel::new(rule).advance_square(leaves, steps)
}

/// The centre leaf of the square `[nw, ne, sw, se]` as it is.
pub fn centre_of_leaves(leaves: [u64; 4]) -> u64 {
    centre(&spread(leaves))
}

fn spread(leaves: [u64; 4]) -> Rows {
    let [nw, ne, sw, se] = leaves;
    let mut rows = [0u32; 16];
    for y in 0..8 {
        let byte = |leaf: u64| ((leaf >> (8 * y)) & 0xff) as u32;
        rows[y] = byte(nw) | byte(ne) << 8;
        rows[y + 8] = byte(sw) | byte(se) << 8;
    }
    rows
}

fn centre(rows: &Rows) -> u64 {
    let mut leaf = 0u64;
    for y in 0..8 {
        leaf |= (((rows[y + 4] >> 4) & 0xff) as u64) << (8 * y);
    }
    leaf
}

#[inline]
fn full_add(a: u32, b: u32, c: u32) -> (u32, u32) {
    let partial = a ^ b;
    (partial ^ c, (a & b) | (partial & c))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// One generation of a 16×16 torus-free square cell by cell, the plain way.
    fn naive_step(rule: &Rule, cells: &[[bool; 16]; 16]) -> [[bool; 16]; 16] {
        let mut next = [[false; 16]; 16];
        for y in 0..16i32 {
            for x in 0..16i32 {
                let mut count = 0;
                for dy in -1..=1 {
                    for dx in -1..=1 {
                        let (nx, ny) = (x + dx, y + dy);
                        if (dx, dy) != (0, 0)
                            && (0..16).contains(&nx)
                            && (0..16).contains(&ny)
                            && cells[ny as usize][nx as usize]
                        {
                            count += 1;
                        }
                    }
                }
                next[y as usize][x as usize] =
                    rule.next_state(cells[y as usize][x as usize], count);
            }
        }
        next
    }

    #[test]
    #[allow(clippy::needless_range_loop)]
    fn agrees_with_cell_by_cell_stepping() {
        let rules = ["B3/S23", "B36/S23", "B2/S", "B3678/S34678", "B1/S012345678"];
        let mut seed = 0x9e37_79b9_7f4a_7c15u64;
        for rule in rules {
            let rule: Rule = rule.parse().unwrap();
            for _ in 0..50 {
                let mut leaves = [0u64; 4];
                for leaf in leaves.iter_mut() {
                    // xorshift: a deterministic soup
                    seed ^= seed << 13;
                    seed ^= seed >> 7;
                    seed ^= seed << 17;
                    *leaf = seed;
                }
                let rows = spread(leaves);
                let mut cells = [[false; 16]; 16];
                for y in 0..16 {
                    for x in 0..16 {
                        cells[y][x] = rows[y] >> x & 1 == 1;
                    }
                }
                for steps in 0..=4 {
                    let mut expected = cells;
                    for _ in 0..steps {
                        expected = naive_step(&rule, &expected);
                    }
                    let got = advance_square(&rule, leaves, steps);
                    for y in 0..8 {
                        for x in 0..8 {
                            assert_eq!(
                                got >> (y * 8 + x) & 1 == 1,
                                expected[y + 4][x + 4],
                                "rule {rule} steps {steps} cell ({x},{y})"
                            );
                        }
                    }
                }
            }
        }
    }
}
