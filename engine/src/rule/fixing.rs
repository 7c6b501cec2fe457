//! An isotropic rule's fixes (see `sliced`) applied over whole arrays of
//! 64-cell words at once, for the steppers that hold a block of words: the
//! kernel, on the rows of its square, and the direct stepper, on a tile.
//! Every loop runs over all words and does one thing, so that the compiler
//! vectorises it for whatever instruction set its caller is compiled for
//! (everything here is inlined into the caller).

use std::array;

use super::orbits::{self, for_orbit};
use super::sliced::{Fix, Term};

/// Words in an array: a square of side 64, one word per row, or a direct
/// stepper's tile.
pub(crate) const WORDS: usize = 64;

/// Words aligned to 64 bytes: an unaligned vector load or store straddles
/// two cache lines and costs twice (measured on the whole kernel: 1.4× on
/// AVX-512, 1.08× on AVX2).
#[derive(Clone, Copy)]
#[repr(C, align(64))]
pub(crate) struct Words(pub [u64; WORDS]);

pub(crate) static DEAD_WORDS: Words = Words([0; WORDS]);
pub(crate) static LIVE_WORDS: Words = Words([u64::MAX; WORDS]);

/// How a stepper hands a generation to the fixes: the four planes of every
/// word's count (`[0]` the lowest) and the cells, from which each fix
/// chooses the cells it is for; or, for a rule of one fix, those cells
/// already chosen where the counts were made (in [`Workspace::chosen`]),
/// which spares storing the counts and reading them back.
pub(crate) enum Fixing<'a> {
    Counted {
        count: &'a [Words; 4],
        cells: &'a Words,
    },
    Chosen {
        /// whether any cell is chosen
        any: bool,
    },
}

/// The eight neighbour planes of every word, clockwise from north (as the
/// neighbourhoods' bits, see `letters`), asked for once a fix needs them:
/// a stepper that must make them (the kernel) then makes them only in the
/// generations where some fix does.
pub(crate) trait Neighbours {
    fn planes(&mut self) -> [&[u64; WORDS]; 8];
}

/// A fix compiled for a stepper: with the cells it is for, and its
/// arrangements as whole orbits of the square's symmetries (see
/// `orbits`; none where they are not, which an isotropic rule never has).
#[derive(Clone, Debug)]
pub(crate) struct Aimed {
    pub fix: Fix,
    pub target: Target,
    orbits: Vec<u8>,
}

impl Aimed {
    /// A rule's fixes for a stepper whose count is of the nine cells around
    /// and including each cell (`nine`, the kernel's) or of its eight
    /// neighbours.
    pub(crate) fn all(fixes: Vec<Fix>, nine: bool) -> Vec<Aimed> {
        fixes
            .into_iter()
            .map(|fix| Aimed {
                target: Target::of(&fix, nine),
                orbits: whole_orbits(&fix),
                fix,
            })
            .collect()
    }
}

/// The orbits that make up a fix's arrangements, or none if they do not
/// make whole orbits.
fn whole_orbits(fix: &Fix) -> Vec<u8> {
    let arrangements: Vec<u8> = fix
        .terms
        .iter()
        .map(|term| {
            let named = term.cells[..fix.cells()]
                .iter()
                .fold(0u8, |named, &cell| named | 1 << cell);
            if fix.count > 4 { !named } else { named }
        })
        .collect();
    let mut orbits: Vec<u8> = arrangements
        .iter()
        .map(|&arrangement| orbits::orbit_of(arrangement) as u8)
        .collect();
    orbits.sort_unstable();
    orbits.dedup();
    let covered: usize = orbits
        .iter()
        .map(|&orbit| orbits::TABLE[orbit as usize].len)
        .sum();
    if covered == arrangements.len() {
        orbits
    } else {
        Vec::new()
    }
}

/// The cells of one state and count, as masks to compare 64 cells with:
/// each bit of the count (all ones where a count plane, xored with it,
/// agrees), and the state (0 for live cells, to xor the cells with).
#[derive(Clone, Copy, Debug)]
pub(crate) struct Target {
    want: [u64; 4],
    state: u64,
}

impl Target {
    fn of(fix: &Fix, nine: bool) -> Target {
        // A live cell's count of nine is its neighbours and itself.
        let value = fix.count + (nine && fix.alive) as u32;
        Target {
            want: [0, 1, 2, 3].map(|bit| if value >> bit & 1 == 1 { 0 } else { u64::MAX }),
            state: if fix.alive { 0 } else { u64::MAX },
        }
    }

    /// Where 64 cells, with their count as four planes, are of the target.
    #[inline(always)]
    pub(crate) fn at(&self, count: [u64; 4], cells: u64) -> u64 {
        (count[0] ^ self.want[0])
            & (count[1] ^ self.want[1])
            & (count[2] ^ self.want[2])
            & (count[3] ^ self.want[3])
            & (cells ^ self.state)
    }
}

/// The arrays the fixes write in between: the cells each fix is for, and
/// where the arrangements of a fix of many match so far.
#[derive(Clone)]
pub(crate) struct Workspace {
    chosen: Words,
    matched: Words,
}

impl Workspace {
    pub(crate) fn new() -> Workspace {
        Workspace {
            chosen: Words([0; WORDS]),
            matched: Words([0; WORDS]),
        }
    }

    /// Room for the cells a fix is for (see [`Fixing::Chosen`]).
    pub(crate) fn chosen(&mut self) -> &mut Words {
        &mut self.chosen
    }
}

impl Fixing<'_> {
    /// Applies `fixes` to the first 8L words of `next`, computed from the
    /// cells by the rule's base: where a cell's arrangement is one the rule
    /// treats apart from its count, its new state flips.
    #[inline(always)]
    pub(crate) fn apply<const L: usize>(
        &self,
        fixes: &[Aimed],
        neighbours: &mut impl Neighbours,
        room: &mut Workspace,
        next: &mut Words,
    ) {
        for Aimed {
            fix,
            target,
            orbits,
        } in fixes
        {
            let any = match *self {
                Fixing::Counted { count, cells } => {
                    choose::<L>(target, count, cells, &mut room.chosen)
                }
                Fixing::Chosen { any } => any,
            };
            // Many fixes are for counts that a square often has nowhere in
            // a generation: then there is nothing to match.
            if !any {
                continue;
            }
            let planes = &neighbours.planes();
            let (chosen, matched) = (&room.chosen, &mut room.matched);
            // Whole blocks of 64 words (the kernel's largest square, the
            // direct stepper's tile) match orbit by orbit; the smaller
            // squares keep the code that reads arrangements from the list.
            if L == 8 && !orbits.is_empty() {
                match_orbits::<L>(orbits, planes, chosen, matched, next);
                continue;
            }
            match (fix.cells(), fix.count > 4) {
                (1, false) => apply_fix::<L, 1, false>(fix, planes, chosen, matched, next),
                (2, false) => apply_fix::<L, 2, false>(fix, planes, chosen, matched, next),
                (3, false) => apply_fix::<L, 3, false>(fix, planes, chosen, matched, next),
                (_, false) => apply_fix::<L, 4, false>(fix, planes, chosen, matched, next),
                (1, true) => apply_fix::<L, 1, true>(fix, planes, chosen, matched, next),
                (2, true) => apply_fix::<L, 2, true>(fix, planes, chosen, matched, next),
                (3, true) => apply_fix::<L, 3, true>(fix, planes, chosen, matched, next),
                (_, true) => apply_fix::<L, 4, true>(fix, planes, chosen, matched, next),
            }
        }
    }
}

/// The cells of the target into `chosen`, and whether there are any.
#[inline(always)]
#[allow(clippy::needless_range_loop)] // index loops over arrays in step vectorise
fn choose<const L: usize>(
    target: &Target,
    count: &[Words; 4],
    cells: &Words,
    chosen: &mut Words,
) -> bool {
    let mut any = 0;
    for word in 0..8 * L {
        let planes = [0, 1, 2, 3].map(|bit| count[bit].0[word]);
        let these = target.at(planes, cells.0[word]);
        chosen.0[word] = these;
        any |= these;
    }
    any != 0
}

/// Arrangements matched in one loop over the words: enough to keep the
/// loop's work in registers, few enough to keep it simple.
const TERMS_AT_ONCE: usize = 4;

/// One fix, its arrangements each told by K cells (see [`Term`]): all
/// live, or with `DEAD` (counts above 4) all dead. Whole groups of
/// [`TERMS_AT_ONCE`] arrangements gather into `matched`; the last group, of
/// exactly the arrangements left, flips `next` in the same loop where a
/// chosen cell (see [`Fixing::choose`]) matches any of them.
#[inline(always)]
fn apply_fix<const L: usize, const K: usize, const DEAD: bool>(
    fix: &Fix,
    planes: &[&[u64; WORDS]; 8],
    chosen: &Words,
    matched: &mut Words,
    next: &mut Words,
) {
    let groups = fix.terms.len().div_ceil(TERMS_AT_ONCE);
    for (group, terms) in fix.terms.chunks(TERMS_AT_ONCE).enumerate() {
        if group + 1 < groups {
            if group == 0 {
                gather::<L, K, DEAD, true>(terms, planes, matched);
            } else {
                gather::<L, K, DEAD, false>(terms, planes, matched);
            }
            continue;
        }
        let so_far = if group == 0 { &DEAD_WORDS } else { &*matched };
        match terms.len() {
            1 => flip::<L, K, DEAD, 1>(terms, planes, so_far, chosen, next),
            2 => flip::<L, K, DEAD, 2>(terms, planes, so_far, chosen, next),
            3 => flip::<L, K, DEAD, 3>(terms, planes, so_far, chosen, next),
            _ => flip::<L, K, DEAD, 4>(terms, planes, so_far, chosen, next),
        }
    }
}

/// The planes of T arrangements' K cells (T ≤ the arrangements given).
#[inline(always)]
fn cells_of<'a, const K: usize, const T: usize>(
    terms: &[Term],
    planes: &[&'a [u64; WORDS]; 8],
) -> [[&'a [u64; WORDS]; K]; T] {
    array::from_fn(|t| array::from_fn(|k| planes[terms[t].cells[k] as usize & 7]))
}

/// Where any of T arrangements, each all live (or with `DEAD` all dead) in
/// its K cells, matches at one word.
#[inline(always)]
fn any_matches<const K: usize, const DEAD: bool, const T: usize>(
    cells: &[[&[u64; WORDS]; K]; T],
    word: usize,
) -> u64 {
    let mut any = 0;
    for term in cells {
        any |= if DEAD {
            !term.iter().fold(0, |any, plane| any | plane[word])
        } else {
            term.iter().fold(u64::MAX, |all, plane| all & plane[word])
        };
    }
    any
}

/// A whole group of arrangements into `matched`: in place of it with
/// `FIRST`, else added to it.
#[inline(always)]
#[allow(clippy::needless_range_loop)] // index loops over arrays in step vectorise
fn gather<const L: usize, const K: usize, const DEAD: bool, const FIRST: bool>(
    terms: &[Term],
    planes: &[&[u64; WORDS]; 8],
    matched: &mut Words,
) {
    let cells = cells_of::<K, TERMS_AT_ONCE>(terms, planes);
    for word in 0..8 * L {
        let any = any_matches::<K, DEAD, TERMS_AT_ONCE>(&cells, word);
        matched.0[word] = if FIRST { any } else { matched.0[word] | any };
    }
}

/// The fix's last T arrangements and those matched before (`so_far`):
/// flips the chosen cells where any matches.
#[inline(always)]
#[allow(clippy::needless_range_loop)] // index loops over arrays in step vectorise
fn flip<const L: usize, const K: usize, const DEAD: bool, const T: usize>(
    terms: &[Term],
    planes: &[&[u64; WORDS]; 8],
    so_far: &Words,
    chosen: &Words,
    next: &mut Words,
) {
    let cells = cells_of::<K, T>(terms, planes);
    for word in 0..8 * L {
        let matched = so_far.0[word] | any_matches::<K, DEAD, T>(&cells, word);
        next.0[word] ^= matched & chosen.0[word];
    }
}

/// A fix matched orbit by orbit (see `orbits`): one orbit flips `next`
/// where it matches a chosen cell; more gather into `matched` first.
#[inline(always)]
#[allow(clippy::needless_range_loop)] // index loops over arrays in step vectorise
fn match_orbits<const L: usize>(
    orbits: &[u8],
    planes: &[&[u64; WORDS]; 8],
    chosen: &Words,
    matched: &mut Words,
    next: &mut Words,
) {
    if let [orbit] = *orbits {
        for_orbit!(orbit as usize, flip_orbit::<L>(planes, chosen, next));
        return;
    }
    matched.0[..8 * L].fill(0);
    for &orbit in orbits {
        for_orbit!(orbit as usize, gather_orbit::<L>(planes, matched));
    }
    for word in 0..8 * L {
        next.0[word] ^= matched.0[word] & chosen.0[word];
    }
}

/// The eight neighbour planes at one word.
#[inline(always)]
fn planes_at(planes: &[&[u64; WORDS]; 8], word: usize) -> [u64; 8] {
    [
        planes[0][word],
        planes[1][word],
        planes[2][word],
        planes[3][word],
        planes[4][word],
        planes[5][word],
        planes[6][word],
        planes[7][word],
    ]
}

/// Flips the chosen cells where orbit O matches.
#[inline(always)]
#[allow(clippy::needless_range_loop)] // index loops over arrays in step vectorise
fn flip_orbit<const L: usize, const O: usize>(
    planes: &[&[u64; WORDS]; 8],
    chosen: &Words,
    next: &mut Words,
) {
    for word in 0..8 * L {
        let matched = orbits::matches::<O>(&planes_at(planes, word));
        next.0[word] ^= matched & chosen.0[word];
    }
}

/// Adds where orbit O matches to `matched`.
#[inline(always)]
#[allow(clippy::needless_range_loop)] // index loops over arrays in step vectorise
fn gather_orbit<const L: usize, const O: usize>(planes: &[&[u64; WORDS]; 8], matched: &mut Words) {
    for word in 0..8 * L {
        matched.0[word] |= orbits::matches::<O>(&planes_at(planes, word));
    }
}
