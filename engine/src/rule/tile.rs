//! A column of 64 words that an isotropic rule's fixes apply to at once,
//! for the steppers that otherwise go a word at a time (the direct stepper
//! over a 64×64 tile, the bounded one over 64 rows of a word column): the
//! fixes then run the kernel's loops over whole blocks (`fixing`), compiled
//! for AVX2 where the processor has it, instead of word by word.

use crate::kernel::Isa;
use crate::rule::fixing::{Aimed, Fixing, Neighbours, WORDS, Words, Workspace};
use crate::rule::sliced::Sliced;

/// 64 words of a column as the fixes read them (see `rule::fixing`): each
/// word's eight neighbour planes, its neighbour count, its cells, and its
/// next state by the rule's base, which the fixes then correct.
#[derive(Clone)]
pub(crate) struct Tile {
    /// the rule's fixes, for a count of the eight neighbours
    fixes: Vec<Aimed>,
    planes: [Words; 8],
    count: [Words; 4],
    cells: Words,
    next: Words,
    room: Workspace,
    /// whether this processor has AVX2, for the fixes' loops (the words'
    /// own loop is word by word whatever the processor); tests clear it
    /// to check the portable path too
    pub(crate) avx2: bool,
}

impl Tile {
    /// The tile for a rule's fixes; None for a rule without any (an
    /// outer-totalistic rule), whose steppers then run the base alone.
    pub(crate) fn of(sliced: &Sliced) -> Option<Box<Tile>> {
        (!sliced.fixes.is_empty()).then(|| Box::new(Tile::new(sliced)))
    }

    pub(crate) fn new(sliced: &Sliced) -> Tile {
        let empty = Words([0; WORDS]);
        Tile {
            // These steppers count neighbours, not the cell itself.
            fixes: Aimed::all(sliced.fixes.clone(), false),
            planes: [empty; 8],
            count: [empty; 4],
            cells: empty,
            next: empty,
            room: Workspace::new(),
            avx2: Isa::detect().has_avx2(),
        }
    }

    /// Word `at` of the tile: its neighbour planes, count, cells and
    /// state by the base.
    #[inline(always)]
    pub(crate) fn hold(
        &mut self,
        at: usize,
        neighbours: [u64; 8],
        count: [u64; 4],
        cells: u64,
        base: u64,
    ) {
        for (plane, word) in self.planes.iter_mut().zip(neighbours) {
            plane.0[at] = word;
        }
        for (plane, word) in self.count.iter_mut().zip(count) {
            plane.0[at] = word;
        }
        self.cells.0[at] = cells;
        self.next.0[at] = base;
    }

    /// The words' next states with the fixes applied, four words at once
    /// where the processor can. Words not held since the last call hold
    /// what they held then: each word's result depends on its own alone.
    pub(crate) fn fixed(&mut self) -> &Words {
        #[cfg(target_arch = "x86_64")]
        if self.avx2 {
            // SAFETY: `avx2` is only set where the processor has AVX2
            // (`Tile::new`, by `Isa::detect`).
            unsafe { fix_tile_avx2(self) };
            return &self.next;
        }
        fix_tile(self);
        &self.next
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn fix_tile_avx2(tile: &mut Tile) {
    fix_tile(tile)
}

/// The fixes applied to a tile's words, in the instruction set of the
/// caller.
#[inline(always)]
fn fix_tile(tile: &mut Tile) {
    let Tile {
        fixes,
        planes,
        count,
        cells,
        next,
        room,
        ..
    } = tile;
    let fixing = Fixing::Counted { count, cells };
    fixing.apply::<8>(fixes, &mut Held(planes), room, next);
}

/// A tile's neighbour planes, held since its words were.
struct Held<'a>(&'a [Words; 8]);

impl Neighbours for Held<'_> {
    #[inline(always)]
    fn planes(&mut self) -> [&[u64; WORDS]; 8] {
        std::array::from_fn(|k| &self.0[k].0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rule::Rule;
    use crate::rule::sliced::counts;

    /// The neighbour planes and counts of 64 random neighbourhoods, one per
    /// bit, and the cells' states.
    fn random_words(seed: u64) -> ([u64; 8], [u64; 4], u64) {
        let mut state = seed;
        let mut next = || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state
        };
        let planes: [u64; 8] = std::array::from_fn(|_| next());
        (planes, counts(&planes), next())
    }

    // The base and the fixes together give each cell's next state as the
    // rule's definition does, on both paths of the fixes (common practice:
    // a compiled rule checked against its plain definition, on random
    // neighbourhoods).
    #[test]
    fn base_and_fixes_agree_with_the_rule_bit_by_bit() {
        for text in [
            "B3/S23",
            "B2-a/S12",
            "B3/S2-i34q",
            "B1e2ak3inqy4ny5e/S",
            "B2ce3-k4z5ai/S1c2-n4wt6k7e8",
        ] {
            let rule = Rule::parse(text).unwrap();
            let sliced = Sliced::new(&rule);
            if rule.totalistic_masks().is_some() {
                assert!(sliced.fixes.is_empty(), "{text}");
            }
            for avx2 in [false, Isa::detect().has_avx2()] {
                let mut tile = Tile::new(&sliced);
                tile.avx2 = avx2;
                let words: Vec<_> = (1..=WORDS as u64)
                    .map(|seed| random_words(seed * 7919))
                    .collect();
                for (at, &(planes, count, alive)) in words.iter().enumerate() {
                    tile.hold(at, planes, count, alive, sliced.base(alive, &count));
                }
                let fixed = tile.fixed();
                for (at, &(planes, _, alive)) in words.iter().enumerate() {
                    for bit in 0..64 {
                        let n = (0..8).fold(0u8, |n, i| n | ((planes[i] >> bit & 1) as u8) << i);
                        let expected = rule.next_state(alive >> bit & 1 == 1, n);
                        assert_eq!(
                            fixed.0[at] >> bit & 1 == 1,
                            expected,
                            "{text} avx2 {avx2} {n:08b}"
                        );
                    }
                }
            }
        }
    }
}
