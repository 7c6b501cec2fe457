//! The shape of the HashLife recursion, written once for every driver: the
//! local advance (over store handles, with a bit-parallel base case) and the
//! cluster's coordinator (over content ids, with a task on a node as its
//! base case) both take their sub-squares and strides from here.
//!
//! To advance a quad of level n by t ≤ 2^(n-2) generations: take its 4×4
//! grandchildren, form the nine overlapping level-(n-1) squares of 2×2
//! grandchildren and advance each by t₁ (their centres, level n-2, form a
//! 3×3 grid), form four level-(n-1) squares of 2×2 of those and advance
//! each by t₂, and join the four results. t₁ + t₂ = t, each ≤ 2^(n-3).
//! Advancing a state by N generations meets only two strides at level m:
//! the full stride 2^(m-2) and the residual N mod 2^(m-2).

/// The stride of one advance at some level m.
#[derive(Clone, Copy, PartialEq, Eq, Hash, Debug)]
pub enum Stride {
    /// 2^(m-2) generations
    Full,
    /// N mod 2^(m-2) generations, for the N of the whole advance
    Residual,
}

/// The strides of the two phases of an advance at level m by `stride`, where
/// `bit` is bit m-3 of N (used only for the residual): the first phase
/// moves 2^(m-3) generations or none (None: take the centres), the second
/// moves the rest.
pub fn phases(stride: Stride, bit: bool) -> (Option<Stride>, Stride) {
    match stride {
        Stride::Full => (Some(Stride::Full), Stride::Full),
        Stride::Residual if bit => (Some(Stride::Full), Stride::Residual),
        Stride::Residual => (None, Stride::Residual),
    }
}

/// The 4×4 grandchildren of a quad, row by row, from its children's
/// children (each nw, ne, sw, se).
pub fn grandchildren<T: Copy>(kids_of_kids: [[T; 4]; 4]) -> [[T; 4]; 4] {
    let [nw, ne, sw, se] = kids_of_kids;
    [
        [nw[0], nw[1], ne[0], ne[1]],
        [nw[2], nw[3], ne[2], ne[3]],
        [sw[0], sw[1], se[0], se[1]],
        [sw[2], sw[3], se[2], se[3]],
    ]
}

/// The quarters (nw, ne, sw, se) of the 2×2 block at row i, column j of a
/// grid: the nine first-phase squares of the 4×4 grandchildren (i, j < 3),
/// and the four second-phase squares of the 3×3 first results (i, j < 2).
pub fn block<T: Copy, const N: usize>(grid: &[[T; N]; N], i: usize, j: usize) -> [T; 4] {
    [
        grid[i][j],
        grid[i][j + 1],
        grid[i + 1][j],
        grid[i + 1][j + 1],
    ]
}

/// The child a first-phase square (i, j) is when it is one: the corners of
/// the 3×3 grid are the quad's own children (index nw, ne, sw, se).
pub fn corner_child(i: usize, j: usize) -> Option<usize> {
    match (i, j) {
        (0, 0) => Some(0),
        (0, 2) => Some(1),
        (2, 0) => Some(2),
        (2, 2) => Some(3),
        _ => None,
    }
}

/// Of each child (nw, ne, sw, se), the three grandchildren away from the
/// quad's centre: a quad's live cells lie in its centre half iff these are
/// all empty.
pub const AWAY_FROM_CENTRE: [[usize; 3]; 4] = [[0, 1, 2], [0, 1, 3], [0, 2, 3], [1, 2, 3]];

/// The four second-phase squares, in the order of the result's quarters.
pub const SECOND_PHASE: [(usize, usize); 4] = [(0, 0), (0, 1), (1, 0), (1, 1)];

/// The centre of a square made of four quads of level l ≥ 4 (nw, ne, sw,
/// se), as the four grandchildren it is made of: a quad of level l.
pub fn centre_of_four<T: Copy>(kids_of_four: [[T; 4]; 4]) -> [T; 4] {
    let [nw, ne, sw, se] = kids_of_four;
    [nw[3], ne[2], sw[1], se[0]]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_blocks_cover_the_grid_with_overlap() {
        // Grandchildren numbered by position: row * 4 + column.
        let kids = [[0, 1, 4, 5], [2, 3, 6, 7], [8, 9, 12, 13], [10, 11, 14, 15]];
        let g = grandchildren(kids);
        for (row, line) in g.iter().enumerate() {
            for (column, &at) in line.iter().enumerate() {
                assert_eq!(at, row * 4 + column);
            }
        }
        assert_eq!(block(&g, 1, 1), [5, 6, 9, 10]);
        assert_eq!(block(&g, 0, 2), [2, 3, 6, 7]);
        assert_eq!(corner_child(0, 2), Some(1));
        assert_eq!(centre_of_four(kids), [5, 6, 9, 10]);
    }

    #[test]
    fn the_phases_add_up_to_the_stride() {
        assert_eq!(
            phases(Stride::Full, false),
            (Some(Stride::Full), Stride::Full)
        );
        assert_eq!(
            phases(Stride::Residual, true),
            (Some(Stride::Full), Stride::Residual)
        );
        assert_eq!(phases(Stride::Residual, false), (None, Stride::Residual));
    }
}
