//! The local base case of the recursion: a square of side 16, 32 or 64 cells
//! advanced by up to a quarter of its side in generations with bit-parallel
//! arithmetic, of which the centre half comes out exact. A 64×64 square
//! moved 16 generations at once spares the recursion the creation and
//! hashing of every smaller square in between, which dominates on chaotic
//! patterns.
//!
//! Each row of the square is a 64-bit word. Every row is first summed across
//! (each cell with its left and right neighbours, two bit planes), then three
//! such sums (the rows above, at and below) are added by carry-save adders
//! into the four bit planes of the number of live cells among the nine around
//! and including each cell. The rule, compiled once into a selection tree
//! over those planes whose ten leaves are "dead", "live", "as it was" or "the
//! opposite", picks the new row: the same few operations for any B/S rule,
//! however many counts it names. An isotropic rule's letters are applied
//! after that as fixes: where a cell's arrangement is one its count's
//! decision does not cover, its new state flips (see `rule::sliced`).
//! Cells near the border see wrong neighbours, but the error moves inward one cell per generation, so after t ≤ side/4
//! generations the centre half is exact.
//!
//! The rows are held strided (see [`Block`]): row y is lane y/8 of group
//! y%8, so the rows above and below a group of rows are the neighbouring
//! groups, lane for lane, and every load is whole and aligned. A generation
//! is two loops over all the words of the square in arrays that stay in the
//! first-level cache: sums across, then counts and the rule. The compiler
//! vectorises such loops reliably (the same code written on values in
//! registers came out as shuffles and spills); on x86-64 it is compiled three
//! times, for the baseline, AVX2 and AVX-512 (whose three-input logic
//! instruction takes a full adder in two), and the widest the processor has is
//! picked once, when the rule is compiled. Leaves go in and out by 8×8 byte
//! transposes done eight leaves at a time, which the strided layout makes
//! free of any other shuffling.

use std::array;
use std::cell::RefCell;

use crate::rule::Rule;
use crate::rule::fixing::{
    Aimed, DEAD_WORDS, Fixing, LIVE_WORDS, Neighbours, Target, WORDS, Words, Workspace,
};
use crate::rule::sliced::Sliced;

/// The cells of a square of side 16, 32 or 64, strided: row y is
/// `groups[y % 8][y / 8]`, and bit x of a row is the cell (x, y). A square
/// of side s uses rows below s and their low s bits; the rest is ignored.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[repr(align(64))]
pub(crate) struct Block {
    groups: [[u64; 8]; 8],
}

impl Block {
    pub(crate) const EMPTY: Block = Block {
        groups: [[0; 8]; 8],
    };

    pub(crate) fn row(&self, y: usize) -> u64 {
        self.groups[y % 8][y / 8]
    }
}

/// The leaves of a square, column by column like cells: `leaves[x][y]` is
/// the leaf at leaf-column x, leaf-row y (leaf bits `8*y + x`).
pub(crate) type LeafGrid = [[u64; 8]; 8];

/// One or two rules compiled for the kernel: the first steps the
/// generations an even number after the start of an advance, the second
/// the odd ones (the same rule twice but for the B0 rules, see
/// [`crate::rule::Background`]).
#[derive(Clone, Debug)]
pub struct Kernel {
    steps: [Compiled; 2],
    isa: Isa,
}

/// A rule compiled for the kernel: the selection tree's leaves as indices
/// into [dead, live, as it was, the opposite], an order in which xor of two
/// indices is the index of the xor of the two words.
#[derive(Clone, Debug)]
struct Compiled {
    /// leaf of the even count of each pair (0/1, 2/3, 4/5, 6/7, 8/9)
    even: [u8; 5],
    /// xor of the pair's two leaves: what a set lowest count bit flips
    flip: [u8; 5],
    /// whether the tree has a leaf "the opposite"
    flips: bool,
    /// the arrangements where an isotropic rule differs from the tree,
    /// which picks by count alone; none for an outer-totalistic rule
    fixes: Vec<Aimed>,
}

/// The instruction set the kernel's loops are compiled for (and the fixes
/// of the direct and bounded steppers, see `rule::tile`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
pub(crate) enum Isa {
    Portable,
    #[cfg(target_arch = "x86_64")]
    Avx2,
    #[cfg(target_arch = "x86_64")]
    Avx512,
}

/// The environment variable that narrows the kernel's instruction set, so
/// that one machine can measure the paths of narrower ones.
const KERNEL_VARIABLE: &str = "DEEPTIME_KERNEL";

/// The instruction set the kernel runs here, by name: the widest this
/// processor has, or a narrower one named in `DEEPTIME_KERNEL` (`portable`,
/// `avx2`, `avx512`). An unknown name, or one wider than the processor has,
/// is an error for the command line to report before any work.
pub fn kernel_instruction_set() -> Result<&'static str, String> {
    chosen_isa().map(Isa::name)
}

/// `DEEPTIME_KERNEL` read once: every kernel of the process runs one path.
fn chosen_isa() -> Result<Isa, String> {
    static CHOSEN: std::sync::OnceLock<Result<Isa, String>> = std::sync::OnceLock::new();
    CHOSEN
        .get_or_init(|| {
            let widest = Isa::widest();
            let Some(name) = std::env::var_os(KERNEL_VARIABLE) else {
                return Ok(widest);
            };
            let name = name.to_string_lossy();
            let wanted = Isa::ALL
                .iter()
                .copied()
                .find(|isa| isa.name() == name.trim())
                .ok_or_else(|| {
                    format!("{KERNEL_VARIABLE}={name}: not an instruction set (portable, avx2 or avx512)")
                })?;
            if wanted > widest {
                return Err(format!(
                    "{KERNEL_VARIABLE}={name}: this processor's widest is {}",
                    widest.name()
                ));
            }
            Ok(wanted)
        })
        .clone()
}

impl Isa {
    /// Every instruction set the kernel is compiled for, narrowest first.
    #[cfg(target_arch = "x86_64")]
    const ALL: &[Isa] = &[Isa::Portable, Isa::Avx2, Isa::Avx512];
    #[cfg(not(target_arch = "x86_64"))]
    const ALL: &[Isa] = &[Isa::Portable];

    /// The instruction set the kernel runs: the widest this processor runs,
    /// or the narrower one `DEEPTIME_KERNEL` names (a bad name, which the
    /// command line refuses at start, leaves the widest).
    pub(crate) fn detect() -> Isa {
        chosen_isa().unwrap_or_else(|_| Isa::widest())
    }

    /// The widest instruction set this processor runs.
    fn widest() -> Isa {
        #[cfg(target_arch = "x86_64")]
        {
            if is_x86_feature_detected!("avx512f") && is_x86_feature_detected!("avx512vl") {
                return Isa::Avx512;
            }
            if is_x86_feature_detected!("avx2") {
                return Isa::Avx2;
            }
        }
        Isa::Portable
    }

    fn name(self) -> &'static str {
        match self {
            Isa::Portable => "portable",
            #[cfg(target_arch = "x86_64")]
            Isa::Avx2 => "avx2",
            #[cfg(target_arch = "x86_64")]
            Isa::Avx512 => "avx512",
        }
    }

    /// Whether code compiled for AVX2 runs here (AVX-512 has it too).
    pub(crate) fn has_avx2(self) -> bool {
        self != Isa::Portable
    }
}

impl Kernel {
    /// The kernel of one rule without B0, every generation.
    #[cfg(test)]
    pub fn new(rule: &Rule) -> Kernel {
        Kernel::alternating([*rule, *rule])
    }

    /// The kernel of two rules without B0 taking turns, the first at the
    /// start of every block advanced (see [`Rule::stepping_pair`]).
    pub(crate) fn alternating(rules: [Rule; 2]) -> Kernel {
        Kernel::with_isa(rules, Isa::detect())
    }

    fn with_isa(rules: [Rule; 2], isa: Isa) -> Kernel {
        Kernel {
            steps: rules.map(|rule| Compiled::new(&rule)),
            isa,
        }
    }
}

impl Compiled {
    fn new(rule: &Rule) -> Compiled {
        debug_assert!(
            !rule.births_on_empty(),
            "the kernel runs no B0 rule: {rule}"
        );
        let Sliced { base, fixes } = Sliced::new(rule);
        // The count includes the cell: a dead cell counting q has q live
        // neighbours, a live one q - 1.
        let leaf = |count: usize| -> u8 {
            let born = count <= 8 && base[count].0;
            let stays = count > 0 && base[count - 1].1;
            match (born, stays) {
                (false, false) => DEAD,
                (true, true) => LIVE,
                (false, true) => SAME,
                (true, false) => OPPOSITE,
            }
        };
        let even: [u8; 5] = array::from_fn(|pair| leaf(2 * pair));
        let flip: [u8; 5] = array::from_fn(|pair| even[pair] ^ leaf(2 * pair + 1));
        Compiled {
            even,
            flip,
            flips: even.iter().chain(&flip).any(|&leaf| leaf == OPPOSITE),
            // The kernel counts nine cells: a live cell's count includes
            // itself.
            fixes: Aimed::all(fixes, true),
        }
    }
}

impl Kernel {
    /// Advances the square of side `side` (16, 32 or 64) in `block` by
    /// `steps` ≤ side/4 generations in place; afterwards rows and columns
    /// side/4 .. 3*side/4 (the centre half) are exact, the rest unspecified.
    pub(crate) fn advance_block(&self, block: &mut Block, side: usize, steps: u32) {
        assert!(
            steps as usize <= side / 4,
            "{steps} generations on side {side}"
        );
        match side {
            16 => self.advance_lanes::<2>(block, steps),
            32 => self.advance_lanes::<4>(block, steps),
            64 => self.advance_lanes::<8>(block, steps),
            _ => panic!("no block of side {side}"),
        }
    }

    /// The block's first L lanes (side 8L) through `steps` generations.
    fn advance_lanes<const L: usize>(&self, block: &mut Block, steps: u32) {
        let mut cells = Words([0; WORDS]);
        for (k, group) in block.groups.iter().enumerate() {
            cells.0[L * k..L * (k + 1)].copy_from_slice(&group[..L]);
        }
        let has_fixes = self.steps.iter().any(|rule| !rule.fixes.is_empty());
        if has_fixes {
            FIX_SCRATCH
                .with_borrow_mut(|fixing| self.dispatch::<L>(&mut cells, steps, Some(fixing)));
        } else {
            self.dispatch::<L>(&mut cells, steps, None);
        }
        for (k, group) in block.groups.iter_mut().enumerate() {
            group[..L].copy_from_slice(&cells.0[L * k..L * (k + 1)]);
        }
    }
}

impl Kernel {
    /// `generations` compiled for the widest instruction set there is.
    fn dispatch<const L: usize>(
        &self,
        cells: &mut Words,
        steps: u32,
        fixing: Option<&mut FixScratch>,
    ) {
        match self.isa {
            #[cfg(target_arch = "x86_64")]
            // SAFETY: `Isa::Avx512` is only chosen when the processor was
            // found to have AVX-512F and AVX-512VL (`Isa::detect`).
            Isa::Avx512 => unsafe { generations_avx512::<L>(self, cells, steps, fixing) },
            #[cfg(target_arch = "x86_64")]
            // SAFETY: `Isa::Avx2` is only chosen when the processor was found
            // to have AVX2 (`Isa::detect`).
            Isa::Avx2 => unsafe { generations_avx2::<L>(self, cells, steps, fixing) },
            Isa::Portable => generations::<L, false>(self, cells, steps, fixing),
        }
    }
}

thread_local! {
    /// What the fixes of an isotropic rule work in, made once per thread:
    /// clearing it for every block cost a tenth of the block's
    /// instructions.
    static FIX_SCRATCH: RefCell<FixScratch> = RefCell::new(FixScratch::new());
}

const DEAD: u8 = 0;
const LIVE: u8 = 1;
const SAME: u8 = 2;
const OPPOSITE: u8 = 3;

/// Sums across of the words with room for one group before and after. The
/// words of a square of side 8L are one array (`Words`): word `L*k + lane`
/// is row `8*lane + k`, so the row above a word is L words before it.
const SUMS: usize = WORDS + 16;

/// `steps` generations of a square of side 8L, on whatever instruction set
/// this is compiled for, back and forth between two arrays.
#[inline(always)]
fn generations<const L: usize, const TERNARY: bool>(
    kernel: &Kernel,
    cells: &mut Words,
    steps: u32,
    mut fixing: Option<&mut FixScratch>,
) {
    let mut scratch = Scratch {
        ones: [0; SUMS],
        twos: [0; SUMS],
        opposite: Words([0; WORDS]),
    };
    let mut other = Words([0; WORDS]);
    // One call in the loop, the two arrays swapped by reference: the
    // generation and its fixes are inlined once, not once per array.
    let (mut from, mut to) = (&mut *cells, &mut other);
    for step in 0..steps {
        let rule = &kernel.steps[step as usize % 2];
        one_generation::<L, TERNARY>(rule, &mut scratch, fixing.as_deref_mut(), from, to);
        std::mem::swap(&mut from, &mut to);
    }
    if steps % 2 == 1 {
        *cells = other;
    }
}

/// One generation from `cells` into `next`, then the fixes of an isotropic
/// rule when there are any. A function, not a closure: a closure would be
/// compiled without the instruction set its caller is compiled for.
#[inline(always)]
fn one_generation<const L: usize, const TERNARY: bool>(
    rule: &Compiled,
    scratch: &mut Scratch,
    fixing: Option<&mut FixScratch>,
    cells: &Words,
    next: &mut Words,
) {
    let Some(FixScratch {
        shifted,
        count,
        room,
    }) = fixing.filter(|_| !rule.fixes.is_empty())
    else {
        generation::<L, TERNARY, PLAIN>(rule, scratch, cells, next, ForFixes::Nothing);
        return;
    };
    // A rule of one fix chooses its cells with the counts; others keep the
    // counts for each fix to choose from.
    let fixing = if let [only] = rule.fixes.as_slice() {
        let chosen = ForFixes::Chosen(&only.target, room.chosen());
        let any = generation::<L, TERNARY, CHOOSE>(rule, scratch, cells, next, chosen);
        Fixing::Chosen { any }
    } else {
        generation::<L, TERNARY, COUNT>(rule, scratch, cells, next, ForFixes::Counts(count));
        Fixing::Counted { count, cells }
    };
    let mut neighbours = Neighbourhood::<L> {
        cells,
        shifted,
        made: false,
    };
    fixing.apply::<L>(&rule.fixes, &mut neighbours, room, next);
}

/// What a generation leaves for the fixes, by the const parameter of
/// `generation` that says which: nothing ([`PLAIN`]), the count planes
/// ([`COUNT`]), or the cells of one fix and whether there are any
/// ([`CHOOSE`]).
enum ForFixes<'a> {
    Nothing,
    Counts(&'a mut [Words; 4]),
    Chosen(&'a Target, &'a mut Words),
}

const PLAIN: u8 = 0;
const COUNT: u8 = 1;
const CHOOSE: u8 = 2;

/// What one generation works in; every field a multiple of 64 bytes, so
/// all stay aligned.
#[repr(C, align(64))]
struct Scratch {
    /// Bit 0 and bit 1 of each row's sums across, word w at index L + w.
    ones: [u64; SUMS],
    twos: [u64; SUMS],
    /// The cells, each flipped: a leaf of the selection tree.
    opposite: Words,
}

/// One generation of a square of side 8L: two loops over all words (sums
/// across, then counts and the rule), which the compiler vectorises across
/// words. With [`CHOOSE`], whether any cell is chosen.
#[inline(always)]
fn generation<const L: usize, const TERNARY: bool, const FIXES: u8>(
    rule: &Compiled,
    scratch: &mut Scratch,
    cells: &Words,
    next: &mut Words,
    for_fixes: ForFixes,
) -> bool {
    let (mut counts, mut chosen) = match for_fixes {
        ForFixes::Nothing => (None, None),
        ForFixes::Counts(counts) => (Some(counts), None),
        ForFixes::Chosen(target, chosen) => (None, Some((target, chosen))),
    };
    let mut any = 0;
    let words = 8 * L;
    let Scratch {
        ones,
        twos,
        opposite,
    } = scratch;
    for word in 0..words {
        let row = cells.0[word];
        let (left, right) = (row << 1, row >> 1);
        ones[L + word] = left ^ row ^ right;
        twos[L + word] = majority::<TERNARY>(left, row, right);
    }
    // Many rules (Life among them) never flip a cell: then no need.
    if rule.flips {
        for word in 0..words {
            opposite.0[word] = !cells.0[word];
        }
    }
    pad::<L>(ones);
    pad::<L>(twos);
    let leaves = [&DEAD_WORDS.0, &LIVE_WORDS.0, &cells.0, &opposite.0];
    let even = rule.even.map(|leaf| leaves[leaf as usize & 3]);
    let flip = rule.flip.map(|leaf| leaves[leaf as usize & 3]);
    for word in 0..words {
        let (above, at, below) = (word, word + L, word + 2 * L);
        // The count of nine cells from three sums across, by carry-save adders.
        let q0 = ones[above] ^ ones[at] ^ ones[below];
        let carry = majority::<TERNARY>(ones[above], ones[at], ones[below]);
        let twos_sum = twos[above] ^ twos[at] ^ twos[below];
        let fours = majority::<TERNARY>(twos[above], twos[at], twos[below]);
        let q1 = twos_sum ^ carry;
        let carry = twos_sum & carry;
        let (q2, q3) = (fours ^ carry, fours & carry);
        // The selection tree, lowest count bit first.
        let pair = |p: usize| even[p][word] ^ (q0 & flip[p][word]);
        let low = select(q1, pair(0), pair(1));
        let high = select(q1, pair(2), pair(3));
        // Counts 8 and 9 are the only ones with bit 3, and have bits 1, 2 clear.
        next.0[word] = select(q3, select(q2, low, high), pair(4));
        // The fixes of an isotropic rule compare the counts again.
        if FIXES == COUNT
            && let Some(counts) = counts.as_deref_mut()
        {
            counts[0].0[word] = q0;
            counts[1].0[word] = q1;
            counts[2].0[word] = q2;
            counts[3].0[word] = q3;
        }
        if FIXES == CHOOSE
            && let Some((target, chosen)) = chosen.as_mut()
        {
            let these = target.at([q0, q1, q2, q3], cells.0[word]);
            chosen.0[word] = these;
            any |= these;
        }
    }
    any != 0
}

/// Fills the group before and after the words of an array laid out as
/// the sums across (word w at index L + w). Above group 0 is group 7 one
/// lane earlier; below group 7 is group 0 one lane later. Lane 0 above and
/// the last lane below lie outside the square and get any word: only
/// border cells see them.
#[inline(always)]
fn pad<const L: usize>(array: &mut [u64; SUMS]) {
    array.copy_within(8 * L - 1..9 * L - 1, 0);
    array.copy_within(L + 1..2 * L + 1, 9 * L);
}

/// What the fixes of an isotropic rule work in: the shifted rows that
/// make the neighbour planes ([`Shifted`]), the four planes of the count of
/// nine (for a rule of more than one fix), and the arrays the fixes write
/// in between ([`Workspace`]).
#[repr(C, align(64))]
struct FixScratch {
    shifted: Shifted,
    count: [Words; 4],
    room: Workspace,
}

impl FixScratch {
    fn new() -> FixScratch {
        FixScratch {
            shifted: Shifted {
                rows: [0; SUMS],
                east: [0; SUMS],
                west: [0; SUMS],
            },
            count: [Words([0; WORDS]); 4],
            room: Workspace::new(),
        }
    }
}

/// The cells with room for one group before and after (as the sums
/// across), which are the northern and southern neighbour planes of the
/// words, and the same moved one cell west and east, which are the six
/// others.
#[repr(C, align(64))]
struct Shifted {
    rows: [u64; SUMS],
    east: [u64; SUMS],
    west: [u64; SUMS],
}

/// The neighbour planes of a square of side 8L in one generation: the
/// shifted rows, made from the cells when a fix first asks.
struct Neighbourhood<'a, const L: usize> {
    cells: &'a Words,
    shifted: &'a mut Shifted,
    made: bool,
}

impl<const L: usize> Neighbours for Neighbourhood<'_, L> {
    #[inline(always)]
    #[allow(clippy::needless_range_loop)] // index loops over arrays in step vectorise
    fn planes(&mut self) -> [&[u64; WORDS]; 8] {
        let Shifted { rows, east, west } = &mut *self.shifted;
        if !self.made {
            rows[L..9 * L].copy_from_slice(&self.cells.0[..8 * L]);
            pad::<L>(rows);
            // Bit x is the cell (x, y), x growing east: the eastern
            // neighbour is one bit higher, so a row's eastern neighbours
            // are the row moved down a bit.
            for word in 0..SUMS {
                east[word] = rows[word] >> 1;
                west[word] = rows[word] << 1;
            }
            self.made = true;
        }
        // The rows above and below a word are L words before and after
        // it, in each of the three arrays.
        let (rows, east, west) = (&*rows, &*east, &*west);
        let (above, row, below) = (0, L, 2 * L);
        // Clockwise from north, as the neighbourhoods' bits.
        [
            window(rows, above),
            window(east, above),
            window(east, row),
            window(east, below),
            window(rows, below),
            window(west, below),
            window(west, row),
            window(west, above),
        ]
    }
}

/// The words of an array laid out as the sums across from `offset` on: at
/// 0 those of the rows above the square's words, at L their own, at 2L
/// those below.
#[inline(always)]
fn window(array: &[u64; SUMS], offset: usize) -> &[u64; WORDS] {
    array[offset..offset + WORDS]
        .try_into()
        .expect("the arrays have a group either side")
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn generations_avx2<const L: usize>(
    kernel: &Kernel,
    cells: &mut Words,
    steps: u32,
    fixing: Option<&mut FixScratch>,
) {
    generations::<L, false>(kernel, cells, steps, fixing)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx512vl")]
fn generations_avx512<const L: usize>(
    kernel: &Kernel,
    cells: &mut Words,
    steps: u32,
    fixing: Option<&mut FixScratch>,
) {
    generations::<L, true>(kernel, cells, steps, fixing)
}

/// Where at least two of the three are set. With `TERNARY` (an instruction
/// set with any three-input logic in one instruction) as one expression of
/// the three, else sharing a ^ b with the sum beside it.
#[inline(always)]
fn majority<const TERNARY: bool>(a: u64, b: u64, c: u64) -> u64 {
    if TERNARY {
        (a & b) | (b & c) | (a & c)
    } else {
        (a & b) | (c & (a ^ b))
    }
}

/// `yes` where `when` is set, else `no`.
#[inline(always)]
fn select(when: u64, no: u64, yes: u64) -> u64 {
    no ^ ((no ^ yes) & when)
}

/// Gathers leaves into a block of side `side` (16, 32 or 64): the leaves
/// with x, y < side/8 are used, the others land outside the square.
pub(crate) fn block_from_leaves(leaves: &LeafGrid, side: usize) -> Block {
    // Lane y of word x is the leaf (x, y), byte j its row j: transposed,
    // lane y of word j is row 8y + j of the square, byte x its leaf x.
    match side {
        16 => block_of::<2>(leaves),
        32 => block_of::<4>(leaves),
        64 => {
            let mut groups = *leaves;
            transpose_bytes(&mut groups);
            Block { groups }
        }
        _ => panic!("no block of side {side}"),
    }
}

/// The block of the first N lanes (leaf-rows) of the leaves.
#[inline(always)]
fn block_of<const N: usize>(leaves: &LeafGrid) -> Block {
    let mut lanes = [[0; N]; 8];
    for (row, column) in lanes.iter_mut().zip(leaves) {
        row.copy_from_slice(&column[..N]);
    }
    transpose_bytes(&mut lanes);
    let mut block = Block::EMPTY;
    for (group, row) in block.groups.iter_mut().zip(&lanes) {
        group[..N].copy_from_slice(row);
    }
    block
}

/// The centre half of a block as leaves: `result[x][y]` for x, y < side/16,
/// zero elsewhere.
pub(crate) fn centre_leaves(block: &Block, side: usize) -> [[u64; 4]; 4] {
    let mut result = [[0; 4]; 4];
    if side == 16 {
        // The centre 8×8 starts at cell (4, 4): not on a leaf boundary.
        for y in 0..8 {
            result[0][0] |= (block.row(y + 4) >> 4 & 0xff) << (8 * y);
        }
        return result;
    }
    debug_assert!(matches!(side, 32 | 64));
    if side == 32 {
        centre_of::<2>(block, 1, &mut result);
    } else {
        centre_of::<4>(block, 2, &mut result);
    }
    result
}

/// The N×N leaves from leaf (from, from) on: only their N lanes transposed.
#[inline(always)]
fn centre_of<const N: usize>(block: &Block, from: usize, result: &mut [[u64; 4]; 4]) {
    let mut lanes = [[0; N]; 8];
    for (row, group) in lanes.iter_mut().zip(&block.groups) {
        row.copy_from_slice(&group[from..from + N]);
    }
    transpose_bytes(&mut lanes);
    for x in 0..N {
        result[x][..N].copy_from_slice(&lanes[x + from]);
    }
}

/// Transposes, in every lane, the 8×8 matrix of bytes whose row r is word
/// r: swaps of 4×4, then 2×2, then 1×1 blocks.
#[inline(always)]
fn transpose_bytes<const N: usize>(words: &mut [[u64; N]; 8]) {
    swap_blocks::<N, 4>(words, 0x0000_0000_ffff_ffff);
    swap_blocks::<N, 2>(words, 0x0000_ffff_0000_ffff);
    swap_blocks::<N, 1>(words, 0x00ff_00ff_00ff_00ff);
}

/// Swaps the upper right and lower left HALF×HALF byte blocks of each
/// 2HALF×2HALF block, in every lane.
#[inline(always)]
fn swap_blocks<const N: usize, const HALF: usize>(words: &mut [[u64; N]; 8], mask: u64) {
    let shift = 8 * HALF as u32;
    for r in (0..8).filter(|r| r & HALF == 0) {
        let (low, high) = (words[r], words[r + HALF]);
        for lane in 0..N {
            let swap = ((low[lane] >> shift) ^ high[lane]) & mask;
            words[r][lane] = low[lane] ^ (swap << shift);
            words[r + HALF][lane] = high[lane] ^ swap;
        }
    }
}

/// The 16×16 block of the square `[nw, ne, sw, se]`.
#[cfg(test)]
fn square_block(leaves: [u64; 4]) -> Block {
    let [nw, ne, sw, se] = leaves;
    let mut grid = [[0; 8]; 8];
    grid[0][0] = nw;
    grid[1][0] = ne;
    grid[0][1] = sw;
    grid[1][1] = se;
    block_from_leaves(&grid, 16)
}

/// The centre leaf of the square `[nw, ne, sw, se]` after `steps` ≤ 4
/// generations under `rule` (compiles the rule each call; see `Kernel`).
#[cfg(test)]
fn advance_square(rule: &Rule, leaves: [u64; 4], steps: u32) -> u64 {
    let mut block = square_block(leaves);
    Kernel::new(rule).advance_block(&mut block, 16, steps);
    centre_leaves(&block, 16)[0][0]
}

/// The centre leaf of the square `[nw, ne, sw, se]` as it is.
pub fn centre_of_leaves(leaves: [u64; 4]) -> u64 {
    let [nw, ne, sw, se] = leaves;
    let mut leaf = 0u64;
    for y in 0..8 {
        // Row y + 4 of the square: from the top leaves for y < 4.
        let (west, east, shift) = if y < 4 {
            (nw, ne, 8 * (y + 4))
        } else {
            (sw, se, 8 * (y - 4))
        };
        let row = (west >> shift & 0xff) | (east >> shift & 0xff) << 8;
        leaf |= (row >> 4 & 0xff) << (8 * y);
    }
    leaf
}

#[cfg(test)]
mod tests {
    use super::*;

    /// One generation of a square cell by cell, the plain way; cells outside
    /// count as dead.
    fn naive_step(rule: &Rule, cells: &[Vec<bool>]) -> Vec<Vec<bool>> {
        let side = cells.len() as i32;
        let mut next = vec![vec![false; side as usize]; side as usize];
        for y in 0..side {
            for x in 0..side {
                let mut neighbourhood = 0u8;
                for (bit, (dx, dy)) in crate::rule::letters::OFFSETS.into_iter().enumerate() {
                    let (dx, dy) = (dx as i32, dy as i32);
                    let (nx, ny) = (x + dx, y + dy);
                    if (0..side).contains(&nx)
                        && (0..side).contains(&ny)
                        && cells[ny as usize][nx as usize]
                    {
                        neighbourhood |= 1 << bit;
                    }
                }
                next[y as usize][x as usize] =
                    rule.next_state(cells[y as usize][x as usize], neighbourhood);
            }
        }
        next
    }

    /// xorshift: a deterministic soup
    fn random(seed: &mut u64) -> u64 {
        *seed ^= *seed << 13;
        *seed ^= *seed >> 7;
        *seed ^= *seed << 17;
        *seed
    }

    /// An 8×8 grid of leaves of random cells.
    fn random_leaves(seed: &mut u64) -> LeafGrid {
        let mut leaves = [[0u64; 8]; 8];
        for column in leaves.iter_mut() {
            for leaf in column.iter_mut() {
                *leaf = random(seed);
            }
        }
        leaves
    }

    const RULES: [&str; 12] = [
        "B3/S23",
        // Isotropic rules, which the kernel steps with fixes: rule strings
        // from LifeWiki, "Isotropic non-totalistic rule", and one with
        // fixes at every count.
        "B2-a/S12",
        "B3/S2-i34q",
        "B1e2ak3inqy4ny5e/S",
        "B1c2-n3ajr4ciqtz5-ek6ak7c8/S01e2ain3qy4-kt5cej6c7e8",
        "B36/S23",
        "B2/S",
        "B3678/S34678",
        "B1/S012345678",
        "B/S",
        "B12345678/S",
        "B35678/S5678",
    ];

    /// Every instruction set this machine runs.
    fn isas() -> Vec<Isa> {
        let widest = Isa::widest();
        Isa::ALL
            .iter()
            .copied()
            .filter(|&isa| isa <= widest)
            .collect()
    }

    // The centre half of a block after t ≤ side/4 generations equals the
    // cell-by-cell stepper's (common practice: check a fast stepper against
    // the plain definition on random soups).
    #[test]
    fn blocks_agree_with_cell_by_cell_stepping() {
        let pairs = RULES.map(|text| {
            let rule: Rule = text.parse().unwrap();
            [rule, rule]
        });
        blocks_agree_with_cell_by_cell_stepping_under(&pairs);
    }

    // Two rules taking turns, the first at the start: the pairs that step
    // the cells of B0 rules that differ from their background, from either
    // background (a flipping background's two rules differ).
    #[test]
    fn alternating_rules_take_turns_from_the_first() {
        use crate::rule::Background;
        let mut pairs = Vec::new();
        for text in ["B03/S23", "B0124/S1357", "B02a3-k/S2-i3", "B0123478/S34678"] {
            let rule: Rule = text.parse().unwrap();
            for from in [Background::Dead, Background::Alive] {
                let pair = rule.stepping_pair(from);
                if rule.next_background(from) != from {
                    assert_ne!(pair[0], pair[1], "{text} from {from:?}");
                }
                pairs.push(pair);
            }
        }
        blocks_agree_with_cell_by_cell_stepping_under(&pairs);
    }

    #[allow(clippy::needless_range_loop)]
    fn blocks_agree_with_cell_by_cell_stepping_under(pairs: &[[Rule; 2]]) {
        let mut seed = 0x9e37_79b9_7f4a_7c15u64;
        for isa in isas() {
            for &[first, second] in pairs {
                let (rule, kernel) = (first, Kernel::with_isa([first, second], isa));
                for side in [16, 32, 64] {
                    for _ in 0..4 {
                        // Leaves outside the square hold soup too: they
                        // must not reach the centre.
                        let leaves = random_leaves(&mut seed);
                        let block = block_from_leaves(&leaves, side);
                        let mut cells: Vec<Vec<bool>> = (0..side)
                            .map(|y| (0..side).map(|x| block.row(y) >> x & 1 == 1).collect())
                            .collect();
                        for steps in 0..=side as u32 / 4 {
                            let mut got = block;
                            kernel.advance_block(&mut got, side, steps);
                            for y in side / 4..3 * side / 4 {
                                for x in side / 4..3 * side / 4 {
                                    assert_eq!(
                                        got.row(y) >> x & 1 == 1,
                                        cells[y][x],
                                        "{isa:?} rule {rule} side {side} steps {steps} cell ({x},{y})"
                                    );
                                }
                            }
                            let turn = if steps % 2 == 0 { &first } else { &second };
                            cells = naive_step(turn, &cells);
                        }
                    }
                }
            }
        }
    }

    // Gathering puts leaf (x, y)'s bit 8j + i at cell (8x + i, 8y + j), and
    // the centre half comes back as the leaves it was made of (common
    // practice: the definitions, checked bit by bit).
    #[test]
    #[allow(clippy::needless_range_loop)]
    fn leaves_round_trip_through_blocks() {
        let mut seed = 0x2545_f491_4f6c_dd1du64;
        for side in [16, 32, 64] {
            for _ in 0..20 {
                let leaves = random_leaves(&mut seed);
                let block = block_from_leaves(&leaves, side);
                for y in 0..side {
                    for x in 0..side {
                        let leaf = leaves[x / 8][y / 8];
                        assert_eq!(
                            block.row(y) >> x & 1,
                            leaf >> (8 * (y % 8) + x % 8) & 1,
                            "side {side} cell ({x},{y})"
                        );
                    }
                }
                let centre = centre_leaves(&block, side);
                for cx in 0..4 {
                    for cy in 0..4 {
                        let mut want = 0u64;
                        if cx < side / 16 && cy < side / 16 {
                            for j in 0..8 {
                                for i in 0..8 {
                                    let (x, y) = (side / 4 + 8 * cx + i, side / 4 + 8 * cy + j);
                                    want |= (block.row(y) >> x & 1) << (8 * j + i);
                                }
                            }
                        }
                        assert_eq!(centre[cx][cy], want, "side {side} leaf ({cx},{cy})");
                    }
                }
                if side == 64 {
                    let inner: [[u64; 4]; 4] =
                        array::from_fn(|x| array::from_fn(|y| leaves[x + 2][y + 2]));
                    assert_eq!(centre, inner);
                }
            }
        }
    }

    // The 16×16 square of four leaves: its centre leaf after 0..=4
    // generations matches the cell-by-cell stepper (common practice).
    #[test]
    #[allow(clippy::needless_range_loop)]
    fn squares_agree_with_cell_by_cell_stepping() {
        let mut seed = 0x9e37_79b9_7f4a_7c15u64;
        for rule in RULES {
            let rule: Rule = rule.parse().unwrap();
            for _ in 0..50 {
                let leaves = [0; 4].map(|_: u64| random(&mut seed));
                let block = square_block(leaves);
                let mut cells: Vec<Vec<bool>> = (0..16)
                    .map(|y| (0..16).map(|x| block.row(y) >> x & 1 == 1).collect())
                    .collect();
                assert_eq!(
                    centre_of_leaves(leaves),
                    centre_leaves(&block, 16)[0][0],
                    "centre of {leaves:x?}"
                );
                for steps in 0..=4 {
                    let got = advance_square(&rule, leaves, steps);
                    for y in 0..8 {
                        for x in 0..8 {
                            assert_eq!(
                                got >> (y * 8 + x) & 1 == 1,
                                cells[y + 4][x + 4],
                                "rule {rule} steps {steps} cell ({x},{y})"
                            );
                        }
                    }
                    cells = naive_step(&rule, &cells);
                }
            }
        }
    }
}
