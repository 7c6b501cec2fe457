//! The letters of Hensel notation: which arrangement of live neighbours
//! each letter after a neighbour count names.
//!
//! Source: LifeWiki, "Isotropic non-totalistic rule", the table of
//! neighbourhood configurations. That page draws the table as pictures; the
//! arrangements below are written out from memory of it, one per letter,
//! and every other arrangement of the letter is one of its eight symmetries.
//! What the page states in words is checked in the tests: `2i` is the centre
//! of a blinker, `4q` a middle cell of the beacon's dense phase, the counts
//! above 4 are the complements of those below, and `B1e2ak3inqy4ny5e/S`
//! holds exactly the arrangements with one orthogonal neighbour.

use std::sync::LazyLock;

/// The eight neighbours as bits of a neighbourhood, clockwise from north.
/// Turning a neighbourhood a quarter clockwise moves each bit two places up.
pub const N: u8 = 1 << 0;
pub const NE: u8 = 1 << 1;
pub const E: u8 = 1 << 2;
pub const SE: u8 = 1 << 3;
pub const S: u8 = 1 << 4;
pub const SW: u8 = 1 << 5;
pub const W: u8 = 1 << 6;
pub const NW: u8 = 1 << 7;

/// Where each neighbour stands, bit by bit from [`N`]: (dx, dy) with x
/// growing east and y growing south.
pub const OFFSETS: [(i64, i64); 8] = [
    (0, -1),
    (1, -1),
    (1, 0),
    (1, 1),
    (0, 1),
    (-1, 1),
    (-1, 0),
    (-1, -1),
];

/// Every letter, in the order they are written back: alphabetical, as in
/// the rule strings of the published definition (`B1e2ak3inqy4ny5e/S`).
pub const LETTER_ORDER: [char; 13] = [
    'a', 'c', 'e', 'i', 'j', 'k', 'n', 'q', 'r', 't', 'w', 'y', 'z',
];

/// One arrangement for each letter of the counts 1 to 4. A count n above 4
/// has the letters of 8 - n, each naming the complement of its arrangement.
const TABLE: [(u32, char, u8); 31] = [
    (1, 'c', NE),
    (1, 'e', N),
    (2, 'c', NE | SE),
    (2, 'e', N | E),
    (2, 'k', N | SE),
    (2, 'a', N | NE),
    (2, 'i', N | S),
    (2, 'n', NE | SW),
    (3, 'c', NE | SE | SW),
    (3, 'e', N | E | S),
    (3, 'k', N | E | SW),
    (3, 'a', N | NE | E),
    (3, 'i', N | NE | NW),
    (3, 'n', N | NE | SE),
    (3, 'y', N | SE | SW),
    (3, 'q', N | NE | SW),
    (3, 'j', N | NE | W),
    (3, 'r', N | NE | S),
    (4, 'c', NE | SE | SW | NW),
    (4, 'e', N | E | S | W),
    (4, 'k', N | NE | SE | W),
    (4, 'a', N | NE | E | SE),
    (4, 'i', N | NE | SE | S),
    (4, 'n', N | NE | SE | NW),
    (4, 'y', N | NE | SE | SW),
    (4, 'q', N | NE | E | SW),
    (4, 'j', N | NE | S | W),
    (4, 'r', N | NE | E | S),
    (4, 't', N | NE | S | NW),
    (4, 'w', N | NE | SW | W),
    (4, 'z', N | NE | S | SW),
];

/// The eight images of a neighbourhood under the symmetries of the square:
/// four quarter turns, each also mirrored left to right.
pub const fn symmetries(neighbourhood: u8) -> [u8; 8] {
    // Loops by hand: this runs while the program compiles too (`orbits`).
    let mut mirrored = 0u8;
    let mut bit = 0;
    while bit < 8 {
        mirrored |= ((neighbourhood >> bit) & 1) << ((8 - bit) % 8);
        bit += 1;
    }
    let mut images = [0u8; 8];
    let mut k = 0;
    while k < 8 {
        let turns = (k % 4) as u32 * 2;
        let base = if k < 4 { neighbourhood } else { mirrored };
        images[k] = base.rotate_left(turns);
        k += 1;
    }
    images
}

/// The letter of every neighbourhood (`None` for counts 0 and 8, which have
/// one arrangement each), built once from the table.
static LETTER: LazyLock<[Option<char>; 256]> = LazyLock::new(|| {
    let mut letter = [None; 256];
    for &(count, name, arrangement) in &TABLE {
        for image in symmetries(arrangement) {
            letter[image as usize] = Some(name);
            if count < 4 {
                letter[!image as usize] = Some(name);
            }
        }
    }
    letter
});

/// The letter that names `neighbourhood`'s arrangement among those with the
/// same number of live neighbours; `None` for 0 and 8 neighbours.
pub fn letter_of(neighbourhood: u8) -> Option<char> {
    LETTER[neighbourhood as usize]
}

/// The letters a count has, in [`LETTER_ORDER`]: none for 0 and 8.
pub fn letters(count: u32) -> impl Iterator<Item = char> {
    // Counts above 4 have the letters of their complements.
    let base = if count > 4 {
        8u32.saturating_sub(count)
    } else {
        count
    };
    let defined = move |letter: char| {
        count <= 8
            && TABLE
                .iter()
                .any(|&(c, name, _)| c == base && name == letter)
    };
    LETTER_ORDER
        .into_iter()
        .filter(move |&letter| defined(letter))
}

/// The neighbourhoods with `count` live neighbours named by `letter`.
pub fn arrangements(count: u32, letter: char) -> impl Iterator<Item = u8> {
    (0..=255u8).filter(move |&n| n.count_ones() == count && letter_of(n) == Some(letter))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_neighbourhood_of_counts_one_to_seven_has_exactly_one_letter() {
        for n in 0..=255u8 {
            let count = n.count_ones();
            assert_eq!(letter_of(n).is_some(), (1..=7).contains(&count), "{n:08b}");
        }
        // The published table has 51 arrangements in all, 0 to 8 included.
        let classes: usize = (0..=8).map(|count| letters(count).count().max(1)).sum();
        assert_eq!(classes, 51);
        // Counts per neighbour count: 1, 2, 6, 10, 13, 10, 6, 2, 1 (from memory).
        let per_count: Vec<usize> = (0..=8).map(|c| letters(c).count()).collect();
        assert_eq!(per_count, [0, 2, 6, 10, 13, 10, 6, 2, 0]);
    }

    #[test]
    fn a_letter_is_closed_under_the_symmetries_and_complements_mirror() {
        for n in 0..=255u8 {
            for image in symmetries(n) {
                assert_eq!(letter_of(image), letter_of(n), "{n:08b} -> {image:08b}");
            }
            // LifeWiki: for n ≠ 4, (8 - n)x is the complement of nx.
            if n.count_ones() != 4 {
                assert_eq!(letter_of(!n), letter_of(n));
            }
        }
        // The eight symmetries of one asymmetric arrangement are distinct.
        let mut images = symmetries(N | NE | W).to_vec();
        images.sort();
        images.dedup();
        assert_eq!(images.len(), 8);
    }

    #[test]
    fn what_the_published_definition_says_in_words() {
        // LifeWiki, "Isotropic non-totalistic rule": 2i is the centre of a
        // blinker (two opposite orthogonal neighbours); 4q a middle cell of
        // the beacon's dense phase (two 2×2 blocks touching at a corner).
        assert_eq!(letter_of(N | S), Some('i'));
        assert_eq!(letter_of(E | W), Some('i'));
        // The beacon's cell (1, 1) in a 4×4 box of two full blocks: its
        // neighbours (0, 0), (1, 0), (0, 1) and (2, 2).
        assert_eq!(letter_of(NW | N | W | SE), Some('q'));
        // LifeWiki, same page: B1e2ak3inqy4ny5e/S emulates B1/S on the four
        // orthogonal neighbours, so those letters are exactly the
        // arrangements with one orthogonal neighbour alive.
        let orthogonal = N | E | S | W;
        let listed = [(1, "e"), (2, "ak"), (3, "inqy"), (4, "ny"), (5, "e")];
        for n in 0..=255u8 {
            let one_orthogonal = (n & orthogonal).count_ones() == 1;
            let count = n.count_ones() as usize;
            let named = listed
                .iter()
                .any(|&(c, names)| c == count && letter_of(n).is_some_and(|l| names.contains(l)));
            assert_eq!(named, one_orthogonal, "{n:08b}");
        }
        // LifeWiki, same page, "Subsets": growing past the bounding box
        // needs one of b1c, b1e, b2c, b2a, ..., the births that see live
        // cells on one side only; three in a row there is 3i (from memory).
        for (side, expected) in [
            (NW, 'c'),
            (N, 'e'),
            (NW | NE, 'c'),
            (NW | N, 'a'),
            (NW | N | NE, 'i'),
        ] {
            assert_eq!(letter_of(side), Some(expected));
        }
    }

    #[test]
    fn arrangements_list_every_image() {
        // 2a: an orthogonal neighbour and a diagonal one beside it, 8 ways.
        assert_eq!(arrangements(2, 'a').count(), 8);
        assert_eq!(arrangements(4, 'e').collect::<Vec<_>>(), [N | E | S | W]);
        let total: usize = (1..=7)
            .flat_map(|c| letters(c).map(move |l| arrangements(c, l).count()))
            .sum();
        assert_eq!(total, 254);
        assert_eq!(letters(5).collect::<String>(), "aceijknqry");
        assert_eq!(letters(4).collect::<String>(), "aceijknqrtwyz");
        assert_eq!(letters(0).count(), 0);
    }
}
