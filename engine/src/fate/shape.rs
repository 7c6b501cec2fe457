//! Digests of cell lists, and the shape digest: the same wherever the same
//! cells stand and in whichever of the eight orientations.
//!
//! The digest of a list is the state digest of those live cells (README,
//! "Digest"), computed here straight from the list. The shape digest
//! (README, "Shape digest") turns the cells each of the eight ways, moves
//! each so that its bounding box starts at (0, 0), and keeps the smallest
//! of the eight digests, comparing their 16 bytes in order.

use crate::content_id::ContentId;
use crate::fate::cells::{self, Cell};
use crate::store::LEAF_LEVEL;

/// The digest of the state whose live cells are `cells`: the content id of
/// the smallest centred square of level ≥ 3 holding them all.
pub fn digest_of(cells: &[Cell]) -> ContentId {
    let reach = cells
        .iter()
        .map(|&(x, y)| {
            // Cell c lies in [-2^(L-1), 2^(L-1)) iff c < 2^(L-1) and -c ≤ 2^(L-1).
            let need = |c: i64| {
                if c >= 0 {
                    c as u64 + 1
                } else {
                    c.unsigned_abs()
                }
            };
            need(x).max(need(y))
        })
        .max()
        .unwrap_or(0);
    let mut level = LEAF_LEVEL;
    while (1u64 << (level - 1)) < reach {
        level += 1;
    }
    let empties = empty_ids(level);
    let half = 1i64 << (level - 1);
    let mut owned: Vec<Cell> = cells.to_vec();
    square_id(&mut owned, -half, -half, level, &empties)
}

/// The shape digest of `cells`: the smallest digest of the eight
/// orientations, each moved so that its bounding box starts at (0, 0).
pub fn shape_digest_of(cells: &[Cell]) -> ContentId {
    (0..8)
        .map(|orientation| digest_of(&cells::oriented(cells, orientation)))
        .min()
        .expect("eight orientations")
}

/// The content ids of the empty squares of levels 3 to `top`, by level.
fn empty_ids(top: u32) -> Vec<ContentId> {
    let mut ids = vec![ContentId([0; 16]); top as usize + 1];
    ids[LEAF_LEVEL as usize] = ContentId::of_leaf(0);
    for level in LEAF_LEVEL + 1..=top {
        let below = ids[level as usize - 1];
        ids[level as usize] = ContentId::of_inner(level, [below; 4]);
    }
    ids
}

/// The content id of the square of `level` with its corner at (x0, y0)
/// holding `cells` (all inside it). Reorders `cells`.
fn square_id(cells: &mut [Cell], x0: i64, y0: i64, level: u32, empties: &[ContentId]) -> ContentId {
    if cells.is_empty() {
        return empties[level as usize];
    }
    if level == LEAF_LEVEL {
        let mut bits = 0u64;
        for &(x, y) in cells.iter() {
            bits |= 1u64 << (8 * (y - y0) + (x - x0));
        }
        return ContentId::of_leaf(bits);
    }
    let half = 1i64 << (level - 1);
    let (xm, ym) = (x0 + half, y0 + half);
    // Split into the top half and the bottom, then each into left and right.
    let split = partition(cells, |&(_, y)| y < ym);
    let (upper, lower) = cells.split_at_mut(split);
    let at = partition(upper, |&(x, _)| x < xm);
    let (nw, ne) = upper.split_at_mut(at);
    let at = partition(lower, |&(x, _)| x < xm);
    let (sw, se) = lower.split_at_mut(at);
    let kids = [
        square_id(nw, x0, y0, level - 1, empties),
        square_id(ne, xm, y0, level - 1, empties),
        square_id(sw, x0, ym, level - 1, empties),
        square_id(se, xm, ym, level - 1, empties),
    ];
    ContentId::of_inner(level, kids)
}

/// Moves the cells for which `first` holds to the front; returns how many.
fn partition(cells: &mut [Cell], first: impl Fn(&Cell) -> bool) -> usize {
    let mut at = 0;
    for k in 0..cells.len() {
        if first(&cells[k]) {
            cells.swap(at, k);
            at += 1;
        }
    }
    at
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pattern::read_pattern;
    use crate::rule::Rule;
    use crate::universe::Universe;

    fn universe_digest(cells: &[Cell]) -> ContentId {
        // The same cells through the quad store, placed by an RLE whose
        // (0, 0) is the cells' corner, then advanced by nothing.
        let (moved, _) = cells::normalise(cells);
        let mut text = String::new();
        let bounds = cells::Bounds::of(&moved).unwrap();
        for y in 0..bounds.height() {
            for x in 0..bounds.width() {
                text.push(if moved.contains(&(x, y)) { 'O' } else { '.' });
            }
            text.push('\n');
        }
        let pattern = read_pattern(text.as_bytes(), 1 << 24).unwrap();
        let mut universe = Universe::from_pattern(&pattern, Rule::LIFE, 1 << 26).unwrap();
        universe.digest().unwrap()
    }

    #[test]
    fn the_list_digest_is_the_state_digest() {
        // The same definition computed two ways: from the list here, and by
        // the quad store (README, "Digest").
        let shapes: [&[Cell]; 3] = [
            &[(0, 0)],
            &[(1, 0), (2, 1), (0, 2), (1, 2), (2, 2)],
            &[(0, 0), (9, 0), (0, 17), (40, 3), (3, 40)],
        ];
        for shape in shapes {
            assert_eq!(digest_of(shape), universe_digest(shape), "{shape:?}");
        }
        assert_eq!(digest_of(&[]), ContentId::of_leaf(0));
    }

    #[test]
    fn the_shape_digest_ignores_place_and_orientation() {
        // A glider moved, turned and mirrored keeps its shape digest; the
        // other phase of it does not share it.
        let glider = vec![(1, 0), (2, 1), (0, 2), (1, 2), (2, 2)];
        let id = shape_digest_of(&glider);
        for orientation in 0..8 {
            let mut turned = cells::oriented(&glider, orientation);
            for cell in &mut turned {
                cell.0 += 1000;
                cell.1 -= 77;
            }
            assert_eq!(shape_digest_of(&turned), id);
        }
        let other_phase = vec![(0, 0), (2, 0), (1, 1), (2, 1), (1, 2)];
        assert_ne!(shape_digest_of(&other_phase), id);
    }
}
