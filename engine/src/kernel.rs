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

/// The centre leaf of the square `[nw, ne, sw, se]` after `steps` ≤ 4
/// generations under `rule`. Leaf bits: `y * 8 + x`.
pub fn advance_square(rule: &Rule, leaves: [u64; 4], steps: u32) -> u64 {
    debug_assert!(steps <= 4);
    let mut rows = spread(leaves);
    let table = RuleMasks::new(rule);
    for _ in 0..steps {
        rows = step(&table, &rows);
    }
    centre(&rows)
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

/// For each neighbour count 0..=8: whether a dead cell is born and whether
/// a live cell survives, as all-ones or all-zeros words.
struct RuleMasks {
    born: [u32; 9],
    stays: [u32; 9],
}

impl RuleMasks {
    fn new(rule: &Rule) -> RuleMasks {
        let mut masks = RuleMasks {
            born: [0; 9],
            stays: [0; 9],
        };
        for count in 0..9 {
            if rule.birth_mask() >> count & 1 == 1 {
                masks.born[count] = u32::MAX;
            }
            if rule.survive_mask() >> count & 1 == 1 {
                masks.stays[count] = u32::MAX;
            }
        }
        masks
    }
}

#[inline]
fn full_add(a: u32, b: u32, c: u32) -> (u32, u32) {
    let partial = a ^ b;
    (partial ^ c, (a & b) | (partial & c))
}

/// One generation of every row (rows 0 and 15 see nothing beyond them).
fn step(masks: &RuleMasks, rows: &Rows) -> Rows {
    let mut next = [0u32; 16];
    for y in 0..16 {
        let up = if y > 0 { rows[y - 1] } else { 0 };
        let mid = rows[y];
        let down = if y < 15 { rows[y + 1] } else { 0 };
        // The eight neighbours, each moved onto the column of the cell.
        let (s1, c1) = full_add(up << 1, up, up >> 1);
        let (s2, c2) = full_add(mid << 1, mid >> 1, down);
        let (s3, c3) = (down << 1 ^ down >> 1, down << 1 & down >> 1);
        let (bit0, c4) = full_add(s1, s2, s3);
        let (t, d1) = full_add(c1, c2, c3);
        let bit1 = t ^ c4;
        let d2 = t & c4;
        let bit2 = d1 ^ d2;
        let bit3 = d1 & d2;
        let planes = [bit0, bit1, bit2, bit3];
        let mut out = 0u32;
        for count in 0..9 {
            if masks.born[count] == 0 && masks.stays[count] == 0 {
                continue;
            }
            let chooses = (masks.born[count] & !mid) | (masks.stays[count] & mid);
            let mut equal = u32::MAX;
            for (bit, plane) in planes.iter().enumerate() {
                equal &= if count >> bit & 1 == 1 {
                    *plane
                } else {
                    !*plane
                };
            }
            out |= equal & chooses;
        }
        next[y] = out & 0xffff;
    }
    next
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
