//! A state of the unbounded plane at some generation: a root quad centred on
//! the origin, the rule, and the store that holds its quads.
//!
//! The root of level L covers x and y in [-2^(L-1), 2^(L-1)); it grows before
//! an advance so that the pattern cannot reach its edge, and shrinks after
//! one, so the plane is unbounded while the tree stays as small as the
//! pattern. Generation, population and coordinates are unbounded integers.

use std::collections::HashMap;
use std::io::Write;

use num_bigint::{BigInt, BigUint};
use num_traits::{One, Zero};

use crate::advance::{self, Advance, Observer};
use crate::content_id::ContentId;
use crate::error::{AdvanceError, BudgetExceeded, TooLargeForText};
use crate::figures::{self, Side};
use crate::pack::ReadError;
use crate::pack::{self, Checksum, QuadAt};
use crate::pattern::{MAX_COORDINATE, Pattern, write};
use crate::rule::{Background, Rule};
use crate::store::{Handle, LEAF_LEVEL, Store, StoreStats};
use crate::view::{QuadView, StoreView, descend};

/// The smallest root level kept while advancing (32×32 cells).
const MIN_ROOT_LEVEL: u32 = 5;

/// How many times an advance that thrashes is halved before it fails: at
/// most 2^3 pieces, each a pass of its own.
const MAX_SPLITS: u32 = 3;
/// Cells allowed in a pattern written as text.
pub const MAX_TEXT_CELLS: u64 = 1 << 26;

/// The extent of the live cells, in cells; x grows right, y grows down.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct BoundingBox {
    /// column of the leftmost live cell
    pub left: BigInt,
    /// row of the topmost live cell
    pub top: BigInt,
    /// columns from the leftmost to the rightmost live cell, inclusive
    pub width: BigUint,
    /// rows from the topmost to the bottommost live cell, inclusive
    pub height: BigUint,
}

/// A rectangle of the plane, in cells: columns left..left+width, rows
/// top..top+height.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Region {
    pub left: BigInt,
    pub top: BigInt,
    pub width: u64,
    pub height: u64,
}

impl Region {
    /// The region of a bounding box, if it fits text's limits.
    pub fn of_box(bbox: &BoundingBox) -> Result<Region, TooLargeForText> {
        let too_large = || TooLargeForText {
            what: format!(
                "its bounding box is {}×{} cells (at most {MAX_COORDINATE} each way)",
                bbox.width, bbox.height
            ),
        };
        let width = u64::try_from(&bbox.width).map_err(|_| too_large())?;
        let height = u64::try_from(&bbox.height).map_err(|_| too_large())?;
        if width > MAX_COORDINATE || height > MAX_COORDINATE {
            return Err(too_large());
        }
        Ok(Region {
            left: bbox.left.clone(),
            top: bbox.top.clone(),
            width,
            height,
        })
    }
}

/// Why a state could not be written as pattern text.
#[derive(Debug, thiserror::Error)]
pub enum WriteError {
    /// the state is too big for text
    #[error(transparent)]
    TooLarge(#[from] TooLargeForText),
    /// the quads needed to canonicalise the root did not fit the budget
    #[error(transparent)]
    Budget(#[from] BudgetExceeded),
    /// the output failed
    #[error("cannot write the pattern: {0}")]
    Io(#[from] std::io::Error),
    /// a stored quad could not be read
    #[error(transparent)]
    Read(#[from] ReadError),
}

/// Where each stored quad of a run is, by content id.
pub type KnownQuads = HashMap<ContentId, QuadAt, ahash::RandomState>;

/// One whole pack to read: its bytes and, when a manifest lists it, the
/// checksum its table must have.
#[derive(Clone, Copy)]
pub struct PackInput<'p> {
    pub bytes: &'p [u8],
    pub table: Option<Checksum>,
    /// the record count the manifest lists, when there is one
    pub records: Option<u64>,
}

/// A state of the plane under a rule, at a generation.
pub struct Universe {
    pub(crate) store: Store,
    rule: Rule,
    pub(crate) root: Handle,
    pub(crate) level: u32,
    pub(crate) generation: BigUint,
    /// The advance the residual memo was filled for: N's words and the
    /// background it started from.
    residual_for: (Vec<u64>, Background),
    /// Whether the state holds the cells of a torus or bounded plane (see
    /// [`Universe::mark_bounded`]).
    bounded: bool,
}

impl Universe {
    /// An empty plane at generation 0.
    pub fn new(rule: Rule, budget: u64) -> Result<Universe, BudgetExceeded> {
        let mut store = Store::new(budget);
        let root = store.empty(MIN_ROOT_LEVEL)?;
        store.pin(root);
        Ok(Universe {
            store,
            rule,
            root,
            level: MIN_ROOT_LEVEL,
            generation: BigUint::zero(),
            residual_for: (Vec::new(), Background::Dead),
            bounded: false,
        })
    }

    /// The plane holding `pattern` with its top-left cell at (0, 0). The
    /// pattern stays in memory while its quads are made, so it counts
    /// against the budget until the state is built.
    pub fn from_pattern(
        pattern: &Pattern,
        rule: Rule,
        budget: u64,
    ) -> Result<Universe, BudgetExceeded> {
        if let Some((x, y)) = pattern.origin.filter(|&origin| origin != (0, 0)) {
            return Universe::from_pattern_at(pattern, x, y, rule, budget);
        }
        let mut universe = Universe::new(rule, budget)?;
        // Nothing here is garbage, and the builder's rows hold handles the
        // collector cannot see: collection stays off until the root is pinned.
        let store = &mut universe.store;
        store.set_collect_allowed(false);
        store.set_held_outside(pattern.heap_bytes());
        let built = build_tree(store, pattern).and_then(|(quad, level)| {
            let empty = store.empty(level)?;
            let root = store.join([empty, empty, empty, quad])?;
            store.empty(level + 1)?;
            Ok((root, level + 1))
        });
        store.set_held_outside(0);
        store.set_collect_allowed(true);
        let (root, level) = built?;
        universe.set_root(root, level);
        Ok(universe)
    }

    /// The plane holding `pattern` with its top-left cell at (x, y) (each
    /// at most `MAX_POSITION` from 0, the far corner too, as the RLE
    /// reader checks): the pattern moved into the corner square of a root
    /// centred on the origin, then built as `from_pattern` builds it.
    fn from_pattern_at(
        pattern: &Pattern,
        x: i64,
        y: i64,
        rule: Rule,
        budget: u64,
    ) -> Result<Universe, BudgetExceeded> {
        let (width, height) = pattern.extent();
        let reach = [x, y, x + width as i64, y + height as i64]
            .iter()
            .map(|c| c.unsigned_abs())
            .max()
            .unwrap_or(0);
        let mut level = MIN_ROOT_LEVEL;
        while (1u64 << (level - 1)) < reach {
            level += 1;
        }
        let half = 1i64 << (level - 1);
        let mut moved = crate::pattern::Builder::new(budget);
        for run in pattern.runs() {
            let at_x = (run.x as i64 + x + half) as u64;
            let at_y = (run.y as i64 + y + half) as u64;
            moved
                .push_run(at_y, at_x, run.len)
                .map_err(|_| BudgetExceeded {
                    budget,
                    in_use: pattern.heap_bytes(),
                    thrashing: false,
                })?;
        }
        let moved = moved.finish(None);
        let mut universe = Universe::new(rule, budget)?;
        let store = &mut universe.store;
        store.set_collect_allowed(false);
        store.set_held_outside(moved.heap_bytes());
        let built = build_tree(store, &moved).and_then(|(mut quad, mut at)| {
            // The moved pattern's (0, 0) is the root's corner: nest it as
            // the north-west quarter up to the root's level.
            while at < level {
                let empty = store.empty(at)?;
                quad = store.join([quad, empty, empty, empty])?;
                at += 1;
            }
            store.empty(level + 1)?;
            Ok(quad)
        });
        store.set_held_outside(0);
        store.set_collect_allowed(true);
        let root = built?;
        universe.set_root(root, level);
        Ok(universe)
    }

    /// Writes the quads of this state that `known` does not locate into a
    /// pack (`packs` names the packs `known` points into, by index);
    /// returns the state's digest (the id of its canonical root, which a
    /// checkpoint names as its root) and the pack, if anything was new. A
    /// new root is the pack's last record.
    pub fn write_pack(
        &mut self,
        known: &dyn Fn(&ContentId) -> Option<QuadAt>,
        packs: &[Checksum],
    ) -> Result<(ContentId, Option<pack::WrittenPack>), BudgetExceeded> {
        let digest = self.digest()?;
        let (quad, level) = self.canonical_root()?;
        let base = self.store.scratch.len();
        self.store.scratch.push(quad);
        let written = pack::write_pack(&mut self.store, &[(quad, level)], known, packs);
        self.store.scratch.truncate(base);
        Ok((digest, written))
    }

    /// The state stored as packs (whole, in the order a checkpoint lists
    /// them) whose root record is at `root_at` and has content id `root`,
    /// at `generation`. Returns it and where each quad the packs hold is.
    /// Errors name the pack (by index) and where in it the damage is.
    pub fn from_packs<'p>(
        packs: impl IntoIterator<Item = PackInput<'p>>,
        root: ContentId,
        root_at: QuadAt,
        rule: Rule,
        generation: BigUint,
        budget: u64,
    ) -> Result<(Universe, KnownQuads), (usize, pack::PackError)> {
        let mut universe = Universe::new(rule, budget).map_err(|e| (0, e.into()))?;
        let store = &mut universe.store;
        // As when building a pattern: the reader's map holds handles the
        // collector cannot see, and nothing read is garbage.
        store.set_collect_allowed(false);
        let mut reader = pack::Reader::new();
        let mut count = 0;
        let mut outcome = Ok(());
        for (index, input) in packs.into_iter().enumerate() {
            count = index + 1;
            let name = pack::pack_name(input.bytes);
            if let Err(error) = reader.read(store, input.bytes, name, input.table, input.records) {
                outcome = Err((index, error));
                break;
            }
        }
        let at = (root_at.pack as usize).min(count.saturating_sub(1));
        let placed = outcome.and_then(|()| {
            let found = reader.quad(root_at).filter(|&(_, _, id)| id == root);
            let Some((quad, level, _)) = found else {
                return Err((
                    at,
                    pack::PackError::Malformed {
                        offset: 0,
                        what: format!(
                            "record {} of pack {} is not the root quad {root}",
                            root_at.record, root_at.pack
                        ),
                    },
                ));
            };
            centred_root(store, quad, level).map_err(|e| (at, e.into()))
        });
        store.set_collect_allowed(true);
        let (quad, level) = placed?;
        universe.set_root(quad, level);
        universe.generation = generation;
        Ok((universe, reader.known))
    }

    /// The rule this state runs under.
    pub fn rule(&self) -> Rule {
        self.rule
    }

    /// The state of the cells far from the pattern (alive at some
    /// generations under a B0 rule). The store holds the cells that differ
    /// from it, and every figure (population, bounding box, digest) and
    /// every cell written counts those.
    pub fn background(&self) -> Background {
        if self.bounded {
            return Background::Dead;
        }
        self.rule.background(&self.generation)
    }

    /// Marks the state as the cells of a torus or bounded plane, held here
    /// between the bounded stepper's runs: there is no background outside
    /// them, so it is dead whatever the rule (B0 brings to life only cells
    /// inside, which are stored as they are).
    pub fn mark_bounded(&mut self) {
        self.bounded = true;
    }

    /// Whether the state holds a bounded universe's cells (see
    /// [`Universe::mark_bounded`]).
    pub fn is_bounded(&self) -> bool {
        self.bounded
    }

    /// Says which generation this state is (a state computed elsewhere,
    /// as a bounded universe's).
    pub fn set_generation(&mut self, generation: BigUint) {
        self.generation = generation;
    }

    /// The generation of this state.
    pub fn generation(&self) -> &BigUint {
        &self.generation
    }

    /// Makes every allocation of later advances collect first, keeping only
    /// what must stay: a test mode that finds any handle the recursion
    /// holds without protecting it (runs are many times slower).
    #[doc(hidden)]
    pub fn collect_at_every_allocation(&mut self) {
        self.store.set_stress(true);
    }

    /// The store's counters.
    pub fn store_stats(&self) -> StoreStats {
        self.store.stats()
    }

    /// Distinct quads of the state itself (inner quads, leaves): what must
    /// stay in memory whatever the memo holds.
    pub fn live_quads(&self) -> (u64, u64) {
        self.store.reachable(self.root)
    }

    /// The root quad's level now (it grows and shrinks with the pattern).
    pub fn root_level(&self) -> u32 {
        self.level
    }

    pub(crate) fn set_root(&mut self, root: Handle, level: u32) {
        self.store.pin(root);
        self.store.unpin(self.root);
        self.root = root;
        self.level = level;
    }

    /// Advances the state by `generations`, in one pass of the recursion;
    /// where collections keep that pass from getting any further, in two
    /// halves (and so on, up to `MAX_SPLITS` times). On an error the state
    /// is the last one reached, at its generation.
    pub fn advance(
        &mut self,
        generations: &BigUint,
        mut observer: Option<Observer<'_>>,
    ) -> Result<(), AdvanceError> {
        // A bounded universe's cells move by its own stepper, not on the
        // plane (`coordinator::input::advance` takes them there and back).
        debug_assert!(!self.bounded, "HashLife on a bounded universe's cells");
        self.advance_split(generations, &mut observer, 0)
    }

    fn advance_split(
        &mut self,
        generations: &BigUint,
        observer: &mut Option<Observer<'_>>,
        splits: u32,
    ) -> Result<(), AdvanceError> {
        let piece: Option<Observer<'_>> = match observer {
            Some(observer) => Some(&mut **observer),
            None => None,
        };
        match self.advance_whole(generations, piece) {
            Err(AdvanceError::Budget(error))
                if error.thrashing && splits < MAX_SPLITS && *generations > BigUint::one() =>
            {
                let half = generations / 2u32;
                self.advance_split(&half, observer, splits + 1)?;
                self.advance_split(&(generations - &half), observer, splits + 1)
            }
            outcome => outcome,
        }
    }

    /// Advances the state by `generations`: in one pass of the recursion
    /// from the background the rule's memo is made for, after one single
    /// generation when the state is not there (B0 rules only).
    fn advance_whole(
        &mut self,
        generations: &BigUint,
        observer: Option<Observer<'_>>,
    ) -> Result<(), AdvanceError> {
        if generations.is_zero() {
            return Ok(());
        }
        if !self.rule.memo_holds_from(self.background()) {
            self.advance_pass(&BigUint::one(), None)?;
            return self.advance_pass(&(generations - 1u32), observer);
        }
        self.advance_pass(generations, observer)
    }

    /// Advances the state by `generations` in one pass of the recursion.
    fn advance_pass(
        &mut self,
        generations: &BigUint,
        observer: Option<Observer<'_>>,
    ) -> Result<(), AdvanceError> {
        if generations.is_zero() {
            return Ok(());
        }
        // Grow until the pattern sits in the centre half and the stride
        // allows the advance, then once more: the pattern then sits in the
        // centre quarter and cannot leave the result in N generations.
        let bits = generations.bits();
        loop {
            let room = (self.level as u64).saturating_sub(2);
            let stride_ok = bits <= room; // N < 2^(level-2), or N = 2^k with k < level-2
            if stride_ok && self.fits_centre_half(self.root, self.level) {
                break;
            }
            self.expand()?;
        }
        self.expand()?;
        self.store.empty(self.level)?;
        let from = self.background();
        let key = (generations.to_u64_digits(), from);
        if key != self.residual_for {
            self.store.residual.clear();
            self.residual_for = key;
        }
        let level = self.level;
        let rules = self.rule.stepping_pair(from);
        // The walk keeps its frames on the heap: no deep stack needed.
        let result = Advance::new(
            &mut self.store,
            rules,
            &self.residual_for.0,
            level,
            observer,
        )
        .run(self.root);
        // A failed advance leaves its path on the scratch stack: drop it, so
        // a caller that retries (with a larger budget) starts clean.
        self.store.scratch.clear();
        let result = result?;
        self.set_root(result, level - 1);
        self.generation += generations;
        while self.level > MIN_ROOT_LEVEL && self.fits_centre_half(self.root, self.level) {
            let centre = advance::centre(&mut self.store, self.root, self.level)?;
            self.set_root(centre, self.level - 1);
        }
        Ok(())
    }

    /// Doubles the root around the origin.
    pub(crate) fn expand(&mut self) -> Result<(), BudgetExceeded> {
        let level = self.level;
        let empty = self.store.empty(level - 1)?;
        let [nw, ne, sw, se] = self.store.kids(self.root);
        let base = self.store.scratch.len();
        let mut kids = [Handle::NONE; 4];
        for (at, quarter) in [
            [empty, empty, empty, nw],
            [empty, empty, ne, empty],
            [empty, sw, empty, empty],
            [se, empty, empty, empty],
        ]
        .into_iter()
        .enumerate()
        {
            kids[at] = self.store.join(quarter)?;
            self.store.scratch.push(kids[at]);
        }
        let root = self.store.join(kids)?;
        self.store.scratch.truncate(base);
        self.set_root(root, level + 1);
        Ok(())
    }

    fn fits_centre_half(&self, quad: Handle, level: u32) -> bool {
        fits_centre_half(&self.store, quad, level)
    }

    /// The number of cells that differ from the background: the live ones,
    /// or under a B0 rule at an alive background the dead ones.
    pub fn population(&self) -> BigUint {
        figures::population(&self.store, self.root, self.level)
    }

    /// The extent of the cells that differ from the background (see
    /// `population`), or None when there are none.
    pub fn bounding_box(&self) -> Option<BoundingBox> {
        let find =
            |axis, max| figures::extreme(&self.store, self.root, self.level, Side { axis, max });
        let left = find(0, false)?;
        let right = find(0, true)?;
        let top = find(1, false)?;
        let bottom = find(1, true)?;
        let half = BigInt::one() << (self.level - 1);
        Some(BoundingBox {
            width: &right - &left + 1u32,
            height: &bottom - &top + 1u32,
            left: BigInt::from(left) - &half,
            top: BigInt::from(top) - &half,
        })
    }

    /// The smallest centred quad (level ≥ 3) holding every live cell.
    fn canonical_root(&mut self) -> Result<(Handle, u32), BudgetExceeded> {
        let (mut quad, mut level) = (self.root, self.level);
        let base = self.store.scratch.len();
        while level > LEAF_LEVEL && self.fits_centre_half(quad, level) {
            quad = advance::centre(&mut self.store, quad, level)?;
            self.store.scratch.push(quad);
            level -= 1;
        }
        self.store.scratch.truncate(base);
        Ok((quad, level))
    }

    /// The state's digest: the content id of its canonical root (see
    /// `content_id`). Equal cells that differ from the background give equal
    /// digests (the background is told apart by `background`).
    pub fn digest(&mut self) -> Result<ContentId, BudgetExceeded> {
        let (quad, level) = self.canonical_root()?;
        Ok(figures::content_id(&mut self.store, quad, level))
    }

    /// The cells that differ from the background (the live ones when it is
    /// dead) as (x, y), sorted by row then column. For states whose
    /// coordinates fit `i64` and whose cells fit text (see `write_rle`).
    pub fn cells(&mut self) -> Result<Vec<(i64, i64)>, WriteError> {
        let Some(bbox) = self.bounding_box() else {
            return Ok(Vec::new());
        };
        let too_far = || TooLargeForText {
            what: format!(
                "its corner ({}, {}) is beyond 64-bit coordinates",
                bbox.left, bbox.top
            ),
        };
        let left = i64::try_from(&bbox.left).map_err(|_| too_far())?;
        let top = i64::try_from(&bbox.top).map_err(|_| too_far())?;
        let region = Region::of_box(&bbox)?;
        let mut cells = Vec::new();
        for (y, runs) in rows_in(
            &mut StoreView::new(&self.store, self.root, self.level),
            &region,
        )? {
            for (x, len) in runs {
                for dx in 0..len {
                    cells.push((left + (x + dx) as i64, top + y as i64));
                }
            }
        }
        Ok(cells)
    }

    /// Writes the state as RLE text positioned at its bounding box: a
    /// `#position` comment gives the box's corner, and a `#C` comment the
    /// generation and the digest.
    pub fn write_rle(&mut self, out: &mut impl Write) -> Result<(), WriteError> {
        let rule = self.rule.to_string();
        let Some(bbox) = self.bounding_box() else {
            write::write_empty_rle(out, &rule, self.background())?;
            return Ok(());
        };
        let region = Region::of_box(&bbox)?;
        let digest = self.digest()?;
        let note = format!("generation {}, digest {digest}", self.generation);
        self.write_rle_noted(out, &region, Some(&note))
    }

    /// Writes the cells of `region` as RLE text whose (0, 0) is the
    /// region's top-left corner, which a `#position` comment gives.
    pub fn write_rle_region(
        &mut self,
        out: &mut impl Write,
        region: &Region,
    ) -> Result<(), WriteError> {
        self.write_rle_noted(out, region, None)
    }

    /// As `write_rle_region`, with a `#C` comment line holding `note`.
    pub fn write_rle_noted(
        &mut self,
        out: &mut impl Write,
        region: &Region,
        note: Option<&str>,
    ) -> Result<(), WriteError> {
        let (rule, background) = (self.rule, self.background());
        let mut view = StoreView::new(&self.store, self.root, self.level);
        write_region_rle(&mut view, (rule, background), out, region, note)
    }
}

/// The cells of `region` of a quadtree as RLE text, its (0, 0) the
/// region's corner (the `#position` comment gives it), with a `#C` comment
/// holding `note`: what a state in memory and a stored one both write.
/// The cells are those that differ from `background`, which a comment
/// names when it is alive.
pub(crate) fn write_region_rle<V: QuadView>(
    view: &mut V,
    (rule, background): (Rule, Background),
    out: &mut impl Write,
    region: &Region,
    note: Option<&str>,
) -> Result<(), WriteError> {
    let rows = rows_in(view, region)?;
    write::write_rle_at(
        out,
        (&region.left, &region.top),
        background,
        note,
        region.width,
        region.height,
        &rule.to_string(),
        rows,
    )?;
    Ok(())
}

/// The non-empty rows of `region` with their runs of live cells
/// (x, len), both relative to the region's corner.
#[allow(clippy::type_complexity)]
pub(crate) fn rows_in<V: QuadView>(
    view: &mut V,
    region: &Region,
) -> Result<Vec<(u64, Vec<(u64, u64)>)>, WriteError> {
    let (root, root_level) = view.root();
    if region.width > MAX_COORDINATE || region.height > MAX_COORDINATE {
        return Err(TooLargeForText {
            what: format!(
                "the region is {}×{} cells (at most {MAX_COORDINATE} each way)",
                region.width, region.height
            ),
        }
        .into());
    }
    // The region from the root's corner; cells beyond the root are dead.
    let half = BigInt::one() << (root_level - 1);
    let size = BigInt::one() << root_level;
    let left = &region.left + &half;
    let top = &region.top + &half;
    let zero = BigInt::from(0);
    if left >= size
        || top >= size
        || &left + region.width <= zero
        || &top + region.height <= zero
        || region.width == 0
        || region.height == 0
    {
        return Ok(Vec::new());
    }
    let clip_left = std::cmp::max(left.clone(), zero.clone())
        .magnitude()
        .clone();
    let clip_top = std::cmp::max(top.clone(), zero).magnitude().clone();
    // Covered by at most 2×2 aligned squares of level BLOCK (the region
    // is at most 2^40 wide), within which offsets fit u64.
    const BLOCK: u32 = MAX_COORDINATE.trailing_zeros() + 1;
    let (origin_x, origin_y) = if root_level <= BLOCK + 1 {
        (BigUint::from(0u32), BigUint::from(0u32))
    } else {
        (
            (&clip_left >> BLOCK) << BLOCK,
            (&clip_top >> BLOCK) << BLOCK,
        )
    };
    // The region's corner from the origin, in cells (may be negative).
    let shift_x = i64::try_from(&left - BigInt::from(origin_x.clone())).expect("near the origin");
    let shift_y = i64::try_from(&top - BigInt::from(origin_y.clone())).expect("near the origin");
    // The window of leaves to collect, from the origin, in leaf units.
    let window = [
        shift_x.max(0) as u64 / 8,
        shift_y.max(0) as u64 / 8,
        (shift_x + region.width as i64 - 1).max(0) as u64 / 8,
        (shift_y + region.height as i64 - 1).max(0) as u64 / 8,
    ];
    let mut blocks = Vec::new();
    let mut allowance = MAX_TEXT_CELLS;
    let too_many = || TooLargeForText {
        what: format!("the region has more than {MAX_TEXT_CELLS} live cells"),
    };
    if root_level <= BLOCK + 1 {
        leaf_blocks(
            view,
            root,
            root_level,
            [0, 0],
            window,
            &mut blocks,
            &mut allowance,
        )
        .map_err(|failure| failure.into_write(too_many))?;
    } else {
        let side = BigUint::one() << BLOCK;
        for (dx, dy) in [(0u64, 0u64), (1, 0), (0, 1), (1, 1)] {
            let x = &origin_x + &side * dx;
            let y = &origin_y + &side * dy;
            if let Some(quad) = descend(view, x, y, BLOCK)? {
                let leaves = 1u64 << (BLOCK - LEAF_LEVEL);
                let corner = [dx * leaves, dy * leaves];
                leaf_blocks(
                    view,
                    quad,
                    BLOCK,
                    corner,
                    window,
                    &mut blocks,
                    &mut allowance,
                )
                .map_err(|failure| failure.into_write(too_many))?;
            }
        }
    }
    blocks.sort_unstable();
    let (width, height) = (region.width as i64, region.height as i64);
    let mut rows = Vec::new();
    let mut at = 0;
    while at < blocks.len() {
        let band = blocks[at].0;
        let mut end = at;
        while end < blocks.len() && blocks[end].0 == band {
            end += 1;
        }
        for row in 0..8u64 {
            let y = (band * 8 + row) as i64 - shift_y;
            if y < 0 || y >= height {
                continue;
            }
            let mut runs: Vec<(u64, u64)> = Vec::new();
            for &(_, column, bits) in &blocks[at..end] {
                let mut byte = (bits >> (8 * row)) & 0xff;
                while byte != 0 {
                    let start = byte.trailing_zeros() as u64;
                    let len = (!(byte >> start)).trailing_zeros() as u64;
                    byte &= !(((1u64 << len) - 1) << start);
                    // Clip the run to the region's columns.
                    let from = ((column * 8 + start) as i64 - shift_x).max(0);
                    let to = ((column * 8 + start + len) as i64 - shift_x).min(width);
                    if from >= to {
                        continue;
                    }
                    let (x, len) = (from as u64, (to - from) as u64);
                    match runs.last_mut() {
                        Some(last) if last.0 + last.1 == x => last.1 += len,
                        _ => runs.push((x, len)),
                    }
                }
            }
            if !runs.is_empty() {
                rows.push((y as u64, runs));
            }
        }
        at = end;
    }
    Ok(rows)
}

/// A root of at least `MIN_ROOT_LEVEL` centred like `quad` (of `level`),
/// which is centred on the origin: padded with empty quads around it.
fn centred_root(
    store: &mut Store,
    mut quad: Handle,
    mut level: u32,
) -> Result<(Handle, u32), BudgetExceeded> {
    if level == LEAF_LEVEL {
        // A leaf covers [-4, 4): its quarters go to the inner corners of
        // four leaves of a level-4 quad.
        let bits = store.leaf_bits(quad);
        let quarter = |x: u32, y: u32| {
            let mut out = 0u64;
            for row in 0..4 {
                let line = (bits >> (8 * (y * 4 + row) + x * 4)) & 0xf;
                // move to the opposite corner of the new leaf
                out |= line << (8 * ((1 - y) * 4 + row) + (1 - x) * 4);
            }
            out
        };
        let kids = [
            store.leaf(quarter(0, 0))?,
            store.leaf(quarter(1, 0))?,
            store.leaf(quarter(0, 1))?,
            store.leaf(quarter(1, 1))?,
        ];
        quad = store.join(kids)?;
        level += 1;
    }
    while level < MIN_ROOT_LEVEL {
        let empty = store.empty(level - 1)?;
        let [nw, ne, sw, se] = store.kids(quad);
        let kids = [
            store.join([empty, empty, empty, nw])?,
            store.join([empty, empty, ne, empty])?,
            store.join([empty, sw, empty, empty])?,
            store.join([se, empty, empty, empty])?,
        ];
        quad = store.join(kids)?;
        level += 1;
    }
    store.empty(level + 1)?;
    Ok((quad, level))
}

/// The quad of the smallest level (at least 4) whose square, with its
/// corner at (0, 0), holds the pattern, and that level. Rows of leaves are
/// joined into rows of their parents as they come, so the builder holds at
/// most one waiting row per level, whatever the pattern's height.
fn build_tree(store: &mut Store, pattern: &Pattern) -> Result<(Handle, u32), BudgetExceeded> {
    let (width, height) = pattern.extent();
    let extent = width.max(height).max(1);
    let top = (64 - (extent - 1).leading_zeros()).max(LEAF_LEVEL + 1);
    let mut rows = RowJoiner {
        top,
        waiting: vec![None; (top - LEAF_LEVEL) as usize],
        quad: None,
    };
    for (y, leaves) in pattern.leaf_rows() {
        let mut row = Vec::with_capacity(leaves.len());
        for &(x, bits) in leaves {
            row.push((x, store.leaf(bits)?));
        }
        rows.push(store, LEAF_LEVEL, y, row)?;
    }
    for level in LEAF_LEVEL..top {
        if let Some((y, row)) = rows.waiting[(level - LEAF_LEVEL) as usize].take() {
            let joined = join_rows(store, level, &row, &[])?;
            rows.push(store, level + 1, y / 2, joined)?;
        }
    }
    let quad = match rows.quad {
        Some(quad) => quad,
        None => store.empty(top)?,
    };
    Ok((quad, top))
}

/// A row of quads of one level: (column, quad), left to right.
type QuadRow = Vec<(u64, Handle)>;

/// Rows of quads joined level by level up to the top level's one quad.
struct RowJoiner {
    top: u32,
    /// Per level from the leaves up: an even row waiting for the row below.
    waiting: Vec<Option<(u64, QuadRow)>>,
    /// The quad of the top level, once made.
    quad: Option<Handle>,
}

impl RowJoiner {
    /// Takes row `y` of `level`; rows of a level come top to bottom.
    fn push(
        &mut self,
        store: &mut Store,
        level: u32,
        y: u64,
        row: QuadRow,
    ) -> Result<(), BudgetExceeded> {
        if level == self.top {
            // The pattern fits the top quad: its one row holds column 0.
            self.quad = row.first().map(|&(_, quad)| quad);
            return Ok(());
        }
        let slot = (level - LEAF_LEVEL) as usize;
        if let Some((above, upper)) = self.waiting[slot].take() {
            if above / 2 == y / 2 {
                let joined = join_rows(store, level, &upper, &row)?;
                return self.push(store, level + 1, y / 2, joined);
            }
            let joined = join_rows(store, level, &upper, &[])?;
            self.push(store, level + 1, above / 2, joined)?;
        }
        if y.is_multiple_of(2) {
            self.waiting[slot] = Some((y, row));
            return Ok(());
        }
        let joined = join_rows(store, level, &[], &row)?;
        self.push(store, level + 1, y / 2, joined)
    }
}

/// Joins an even row of quads of `level` and the odd row below it (either
/// may be empty) into the row of their parents.
fn join_rows(
    store: &mut Store,
    level: u32,
    upper: &[(u64, Handle)],
    lower: &[(u64, Handle)],
) -> Result<QuadRow, BudgetExceeded> {
    let empty = store.empty(level)?;
    let mut parents = Vec::with_capacity(upper.len().max(lower.len()));
    let (mut i, mut j) = (0, 0);
    loop {
        let next = match (upper.get(i), lower.get(j)) {
            (Some(&(a, _)), Some(&(b, _))) => a.min(b) / 2,
            (Some(&(a, _)), None) => a / 2,
            (None, Some(&(b, _))) => b / 2,
            (None, None) => break,
        };
        // nw, ne, sw, se
        let mut kids = [empty; 4];
        while let Some(&(x, quad)) = upper.get(i).filter(|&&(x, _)| x / 2 == next) {
            kids[(x % 2) as usize] = quad;
            i += 1;
        }
        while let Some(&(x, quad)) = lower.get(j).filter(|&&(x, _)| x / 2 == next) {
            kids[2 + (x % 2) as usize] = quad;
            j += 1;
        }
        parents.push((next, store.join(kids)?));
    }
    Ok(parents)
}

/// Why collecting leaves stopped.
enum Stop {
    /// more live cells than allowed
    TooMany,
    /// a stored quad could not be read
    Read(ReadError),
}

impl Stop {
    fn into_write(self, too_many: impl Fn() -> TooLargeForText) -> WriteError {
        match self {
            Stop::TooMany => too_many().into(),
            Stop::Read(error) => error.into(),
        }
    }
}

/// Collects (leaf row, leaf column, bits) of the non-empty leaves of a quad
/// whose corner is at leaf column `corner[0]`, row `corner[1]`, that lie in
/// `window` (first column, first row, last column, last row, in leaves).
/// Fails when more than `allowance` live cells would be collected.
fn leaf_blocks<V: QuadView>(
    view: &mut V,
    quad: V::Node,
    level: u32,
    corner: [u64; 2],
    window: [u64; 4],
    out: &mut Vec<(u64, u64, u64)>,
    allowance: &mut u64,
) -> Result<(), Stop> {
    let [x, y] = corner;
    let span = 1u64 << (level - LEAF_LEVEL);
    if x > window[2] || y > window[3] || x + span <= window[0] || y + span <= window[1] {
        return Ok(());
    }
    if view.is_empty(quad, level) {
        return Ok(());
    }
    if level == LEAF_LEVEL {
        let bits = view.leaf_bits(quad).map_err(Stop::Read)?;
        if bits != 0 {
            let count = bits.count_ones() as u64;
            *allowance = allowance.checked_sub(count).ok_or(Stop::TooMany)?;
            out.push((y, x, bits));
        }
        return Ok(());
    }
    let half = span / 2;
    let kids = view.kids(quad, level).map_err(Stop::Read)?;
    for (at, kid) in kids.into_iter().enumerate() {
        let (dx, dy) = ((at as u64 % 2) * half, (at as u64 / 2) * half);
        leaf_blocks(
            view,
            kid,
            level - 1,
            [x + dx, y + dy],
            window,
            out,
            allowance,
        )?;
    }
    Ok(())
}

/// Whether every live cell of `quad` (of `level` ≥ 4) lies in its centre
/// half.
pub(crate) fn fits_centre_half(store: &Store, quad: Handle, level: u32) -> bool {
    let kids = store.kids(quad);
    if level == LEAF_LEVEL + 1 {
        // The inner quarter of each leaf: se of nw, sw of ne, ne of sw, nw of se.
        const INNER: [u64; 4] = [
            0xf0f0_f0f0_0000_0000,
            0x0f0f_0f0f_0000_0000,
            0x0000_0000_f0f0_f0f0,
            0x0000_0000_0f0f_0f0f,
        ];
        return kids
            .iter()
            .zip(INNER)
            .all(|(&leaf, inner)| store.leaf_bits(leaf) & !inner == 0);
    }
    let empty = store.known_empty(level - 2);
    kids.iter()
        .zip(crate::recursion::AWAY_FROM_CENTRE)
        .all(|(&kid, away)| {
            let grand = store.kids(kid);
            away.iter().all(|&at| grand[at] == empty)
        })
}
