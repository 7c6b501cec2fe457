//! The top of a tree cut at a shard level K: the quads of level K and up as
//! content ids (each with its children's ids) above opaque level-(K-1)
//! pieces kept elsewhere. A cluster's coordinator advances it with the one
//! walker ([`crate::walk`]); here is what a state's root needs besides:
//! growing it for an advance, shrinking it after, the pieces under it, and
//! the figures of the whole from the pieces' figures. The walker's memo
//! lives in the quads, as in the engine's store: a lookup is a slot read,
//! and what a memoised result needs is kept with it.

use std::collections::{HashMap, HashSet};
use std::sync::Arc;

use crate::content_id::ContentId;
use crate::cut::UpperQuad;
use crate::recursion::{self, Stride};
use crate::shard::Figures;
use crate::universe::BoundingBox;
use num_bigint::{BigInt, BigUint};
use num_traits::{One, Zero};

/// A quad of the top, as the walker sees it: a handle into the arena.
/// Stable while the quad is kept (see [`Top::keep_under`]).
#[derive(Clone, Copy, PartialEq, Eq, Hash, Debug)]
pub struct Quad(u32);

/// No child: a piece's (its quads live on the nodes), or a quad named
/// before its children were told (see [`Top::insert`]).
const NONE: u32 = u32::MAX;

/// The id a freed slot carries until it is used again, so that a handle
/// kept past a collection is found out (see [`Top::holds`]).
const FREED: ContentId = ContentId([0xff; 16]);

/// Where a stride's result sits in a slot's memo.
fn stride_bit(stride: Stride) -> usize {
    match stride {
        Stride::Full => 0,
        Stride::Residual => 1,
    }
}

/// One quad of the arena.
#[derive(Clone, Copy)]
struct Slot {
    id: ContentId,
    level: u32,
    kids: [u32; 4],
    /// the walker's memo, as the engine's store keeps it: the results of
    /// advancing this quad by a full and by the residual stride (NONE:
    /// none), and which of the two the latest advance used (bits 0, 1)
    memo: [u32; 2],
    used: u8,
}

/// The quads of level ≥ K - 1 in an arena, found by content id and, for
/// quads above the pieces, by their children's handles (hash-consing), so
/// the walker joins and descends without hashing content; the empty quad
/// of every level.
pub struct Top {
    pub shard_level: u32,
    slots: Vec<Slot>,
    free: Vec<u32>,
    by_id: HashMap<ContentId, u32, ahash::RandomState>,
    by_kids: HashMap<[u32; 4], u32, ahash::RandomState>,
    /// `empties[level]`: the id of the empty quad of that level (from 3)
    empties: Vec<ContentId>,
    /// each quad's figures once folded (see [`Top::figures`]), by slot
    figured: Vec<Option<Arc<Folded>>>,
}

/// A quad's population and extent (see [`Top::figures`]).
type Folded = (BigUint, Option<[BigUint; 4]>);

impl Top {
    pub fn new(shard_level: u32) -> Top {
        let mut top = Top {
            shard_level,
            slots: Vec::new(),
            free: Vec::new(),
            by_id: HashMap::default(),
            by_kids: HashMap::default(),
            empties: vec![ContentId([0; 16]); 3],
            figured: Vec::new(),
        };
        top.empties.push(ContentId::of_leaf(0));
        top
    }

    /// The id of the empty quad of `level` (≥ 3).
    pub fn empty(&mut self, level: u32) -> ContentId {
        while self.empties.len() <= level as usize {
            let at = self.empties.len() as u32;
            let below = *self.empties.last().expect("the leaf level is there");
            let id = ContentId::of_inner(at, [below; 4]);
            self.empties.push(id);
            if at + 1 == self.shard_level {
                self.piece(id);
            } else if at >= self.shard_level {
                let kid = self.by_id[&below];
                self.make(id, at, [kid; 4]);
            }
        }
        self.empties[level as usize]
    }

    /// The id of the empty quad of `level`, if made (see [`Top::empty`]).
    pub fn known_empty(&self, level: u32) -> Option<ContentId> {
        self.empties.get(level as usize).copied()
    }

    /// The handle of the quad with this id, if the tree has it.
    pub fn quad(&self, id: &ContentId) -> Option<Quad> {
        self.by_id.get(id).map(|&at| Quad(at))
    }

    /// The handle of a piece (a quad of level K - 1), named by its id.
    pub fn piece(&mut self, id: ContentId) -> Quad {
        match self.by_id.get(&id) {
            Some(&at) => Quad(at),
            None => self.make(id, self.shard_level - 1, [NONE; 4]),
        }
    }

    /// Whether `quad` is still the quad `id` (a handle kept across a
    /// collection may have been freed, or reused for another quad).
    pub fn holds(&self, quad: Quad, id: &ContentId) -> bool {
        self.slots
            .get(quad.0 as usize)
            .is_some_and(|slot| slot.id == *id)
    }

    pub fn id(&self, quad: Quad) -> ContentId {
        self.slots[quad.0 as usize].id
    }

    pub fn level(&self, quad: Quad) -> u32 {
        self.slots[quad.0 as usize].level
    }

    /// The children of a quad of level ≥ K.
    pub fn kids_of(&self, quad: Quad) -> [Quad; 4] {
        let kids = self.slots[quad.0 as usize].kids;
        debug_assert!(
            kids[0] != NONE,
            "the children of a piece or of a quad named only"
        );
        kids.map(Quad)
    }

    /// The quad of `level` ≥ K with these children.
    pub fn join_quads(&mut self, level: u32, kids: [Quad; 4]) -> Quad {
        let kids = kids.map(|kid| kid.0);
        if let Some(&at) = self.by_kids.get(&kids) {
            return Quad(at);
        }
        let id = ContentId::of_inner(level, kids.map(|kid| self.slots[kid as usize].id));
        self.make(id, level, kids)
    }

    /// A new quad in the arena (or the one with its id, given its children
    /// now if it was named before them).
    fn make(&mut self, id: ContentId, level: u32, kids: [u32; 4]) -> Quad {
        if let Some(&at) = self.by_id.get(&id) {
            let slot = &mut self.slots[at as usize];
            if slot.kids[0] == NONE && kids[0] != NONE {
                slot.kids = kids;
                self.by_kids.insert(kids, at);
            }
            return Quad(at);
        }
        let slot = Slot {
            id,
            level,
            kids,
            memo: [NONE; 2],
            used: 0,
        };
        let at = match self.free.pop() {
            Some(at) => {
                self.slots[at as usize] = slot;
                if let Some(figured) = self.figured.get_mut(at as usize) {
                    *figured = None;
                }
                at
            }
            None => {
                self.slots.push(slot);
                (self.slots.len() - 1) as u32
            }
        };
        self.by_id.insert(id, at);
        if kids[0] != NONE {
            self.by_kids.insert(kids, at);
        }
        Quad(at)
    }

    /// The handle of a quad of `level` by id, named (without children) if
    /// the tree does not have it yet.
    fn named(&mut self, id: ContentId, level: u32) -> u32 {
        match self.by_id.get(&id) {
            Some(&at) => at,
            None => self.make(id, level, [NONE; 4]).0,
        }
    }

    /// A quad of level ≥ K this tree knows, with its children.
    pub fn get(&self, id: &ContentId) -> Option<UpperQuad> {
        let slot = self.slots[*self.by_id.get(id)? as usize];
        (slot.level >= self.shard_level && slot.kids[0] != NONE).then(|| UpperQuad {
            id: slot.id,
            level: slot.level,
            kids: slot.kids.map(|kid| self.slots[kid as usize].id),
        })
    }

    /// Adds a quad of the top (its children may come later).
    pub fn insert(&mut self, quad: UpperQuad) {
        let kids = quad.kids.map(|kid| self.named(kid, quad.level - 1));
        self.make(quad.id, quad.level, kids);
    }

    /// The children of a quad of level ≥ K.
    pub fn kids(&mut self, id: &ContentId, level: u32) -> [ContentId; 4] {
        if let Some(&at) = self.by_id.get(id) {
            let kids = self.slots[at as usize].kids;
            if kids[0] != NONE {
                return kids.map(|kid| self.slots[kid as usize].id);
            }
        }
        debug_assert_eq!(
            *id,
            self.empty(level),
            "a quad of the top this tree does not know"
        );
        [self.empty(level - 1); 4]
    }

    /// The quad of `level` ≥ K with these children.
    pub fn join(&mut self, level: u32, kids: [ContentId; 4]) -> ContentId {
        let kids = kids.map(|kid| Quad(self.named(kid, level - 1)));
        let quad = self.join_quads(level, kids);
        self.id(quad)
    }

    /// The centre of a quad of level ≥ K + 1.
    pub fn centre(&mut self, id: &ContentId, level: u32) -> ContentId {
        let kids = self.kids(id, level);
        let of_kids = kids.map(|kid| self.kids(&kid, level - 1));
        self.join(level - 1, recursion::centre_of_four(of_kids))
    }

    /// Whether all live cells of a quad of level ≥ K + 1 lie in its centre half.
    pub fn fits_centre_half(&mut self, id: &ContentId, level: u32) -> bool {
        let empty = self.empty(level - 2);
        let kids = self.kids(id, level);
        kids.iter()
            .zip(recursion::AWAY_FROM_CENTRE)
            .all(|(kid, away)| {
                let grand = self.kids(kid, level - 1);
                away.iter().all(|&at| grand[at] == empty)
            })
    }

    /// Doubles a root of `level` around the origin; returns the new root.
    pub fn expand(&mut self, root: &ContentId, level: u32) -> ContentId {
        let e = self.empty(level - 1);
        let [nw, ne, sw, se] = self.kids(root, level);
        let kids = [
            self.join(level, [e, e, e, nw]),
            self.join(level, [e, e, ne, e]),
            self.join(level, [e, sw, e, e]),
            self.join(level, [se, e, e, e]),
        ];
        self.join(level + 1, kids)
    }

    /// The root to advance `root` (of `level`) by a number of generations
    /// of `bits` binary digits, and its level: grown until the state sits in
    /// its centre half and the stride allows the advance, then once more, so
    /// the state sits in the centre quarter and cannot leave the result.
    /// (The same rule as `Universe::advance`.)
    pub fn grown_for(&mut self, root: ContentId, level: u32, bits: u64) -> (ContentId, u32) {
        let (mut root, mut level) = (root, level);
        while !(bits <= (level as u64).saturating_sub(2) && self.fits_centre_half(&root, level)) {
            root = self.expand(&root, level);
            level += 1;
        }
        (self.expand(&root, level), level + 1)
    }

    /// `root` (of `level`) cut down to its centre while the state fits the
    /// centre half, down to level `lowest`.
    pub fn shrunk(&mut self, root: ContentId, level: u32, lowest: u32) -> (ContentId, u32) {
        let (mut root, mut level) = (root, level);
        while level > lowest && self.fits_centre_half(&root, level) {
            root = self.centre(&root, level);
            level -= 1;
        }
        (root, level)
    }

    /// The state's bounding box, from the figures of its pieces (see
    /// [`Top::figures`]); the root is centred on the origin.
    pub fn bounding_box(
        &mut self,
        root: &ContentId,
        level: u32,
        pieces: &HashMap<ContentId, Figures>,
    ) -> (BigUint, Option<BoundingBox>) {
        let (population, extent) = self.figures(root, level, pieces);
        let half = BigInt::from(BigUint::one() << (level - 1));
        let bbox = extent.map(|[left, top, right, bottom]| BoundingBox {
            width: &right - &left + 1u32,
            height: &bottom - &top + 1u32,
            left: BigInt::from(left) - &half,
            top: BigInt::from(top) - &half,
        });
        (population, bbox)
    }

    /// The distinct level-(K-1) pieces under `root` (empty ones left out).
    pub fn pieces(&mut self, root: &ContentId, level: u32) -> HashSet<ContentId> {
        self.pieces_under(&[(*root, level)])
    }

    /// The distinct level-(K-1) pieces under any of `roots` (each of level
    /// K-1 or more; empty ones left out).
    pub fn pieces_under(&mut self, roots: &[(ContentId, u32)]) -> HashSet<ContentId> {
        let roots = self.quads_of(roots);
        self.pieces_under_quads(&roots)
    }

    /// The pieces under these quads (as [`Top::pieces_under`]).
    pub fn pieces_under_quads(&mut self, roots: &[Quad]) -> HashSet<ContentId> {
        let piece_level = self.shard_level - 1;
        let empty = self.empty(piece_level);
        let mut seen = vec![false; self.slots.len()];
        let mut pieces = HashSet::new();
        let mut stack: Vec<u32> = roots.iter().map(|quad| quad.0).collect();
        while let Some(at) = stack.pop() {
            if std::mem::replace(&mut seen[at as usize], true) {
                continue;
            }
            let slot = &self.slots[at as usize];
            if slot.level == piece_level {
                if slot.id != empty {
                    pieces.insert(slot.id);
                }
            } else if slot.kids[0] != NONE {
                stack.extend(slot.kids);
            }
        }
        pieces
    }

    /// The handles of those of these quads the top has.
    fn quads_of(&self, roots: &[(ContentId, u32)]) -> Vec<Quad> {
        roots.iter().filter_map(|(id, _)| self.quad(id)).collect()
    }

    /// The distinct non-empty quads of level ≥ K under `root` that
    /// `stored` does not know (a stored quad's descendants are stored
    /// too, so its subtree is skipped), children before parents, each with
    /// its population (from the pieces'): what an incremental pack of the
    /// top adds, in the order it stores them.
    pub fn unstored(
        &mut self,
        root: &ContentId,
        level: u32,
        pieces: &HashMap<ContentId, Figures>,
        stored: impl Fn(&ContentId) -> bool,
    ) -> Vec<(UpperQuad, BigUint)> {
        self.figures(root, level, pieces);
        let piece_level = self.shard_level - 1;
        // (Every quad under the root is folded now, unless a piece's
        // figures were missing: such a quad's population reads as 0.)
        let empties: HashSet<ContentId> = self.empties.iter().copied().collect();
        let Some(&root_at) = self.by_id.get(root) else {
            return Vec::new();
        };
        let mut done = vec![false; self.slots.len()];
        let mut out = Vec::new();
        // (quad, children pushed?)
        let mut stack = vec![(root_at, false)];
        while let Some((at, expanded)) = stack.pop() {
            let slot = self.slots[at as usize];
            if done[at as usize]
                || slot.level == piece_level
                || slot.kids[0] == NONE
                || empties.contains(&slot.id)
                || stored(&slot.id)
            {
                continue;
            }
            if !expanded {
                stack.push((at, true));
                stack.extend(slot.kids.iter().rev().map(|&kid| (kid, false)));
                continue;
            }
            done[at as usize] = true;
            let population = self.figured[at as usize]
                .as_ref()
                .map_or_else(BigUint::zero, |value| value.0.clone());
            out.push((
                UpperQuad {
                    id: slot.id,
                    level: slot.level,
                    kids: slot.kids.map(|kid| self.slots[kid as usize].id),
                },
                population,
            ));
        }
        out
    }

    /// The result memoised for advancing `quad` by `stride`, marked used.
    pub fn memo(&mut self, quad: Quad, stride: Stride) -> Option<Quad> {
        let bit = stride_bit(stride);
        let slot = &mut self.slots[quad.0 as usize];
        let result = slot.memo[bit];
        (result != NONE).then(|| {
            slot.used |= 1 << bit;
            Quad(result)
        })
    }

    /// Memoises the result of advancing `quad` by `stride`.
    pub fn remember(&mut self, quad: Quad, stride: Stride, result: Quad) {
        let bit = stride_bit(stride);
        let slot = &mut self.slots[quad.0 as usize];
        slot.memo[bit] = result.0;
        slot.used |= 1 << bit;
    }

    /// Before an advance: every entry unused so far, and the residual ones
    /// forgotten when `residual_changed` (they hold for one N only).
    pub fn memo_begin(&mut self, residual_changed: bool) {
        for slot in &mut self.slots {
            slot.used = 0;
            if residual_changed {
                slot.memo[stride_bit(Stride::Residual)] = NONE;
            }
        }
    }

    /// After an advance: past `max` entries only the ones it used stay.
    pub fn memo_end(&mut self, max: usize) {
        let entries: usize = self
            .slots
            .iter()
            .map(|slot| slot.memo.iter().filter(|&&result| result != NONE).count())
            .sum();
        if entries > max {
            for slot in &mut self.slots {
                for bit in 0..2 {
                    if slot.used & (1 << bit) == 0 {
                        slot.memo[bit] = NONE;
                    }
                }
            }
        }
    }

    /// Forgets every memoised result.
    pub fn memo_clear(&mut self) {
        for slot in &mut self.slots {
            slot.memo = [NONE; 2];
        }
    }

    /// The memoised results.
    pub fn memo_results(&self) -> Vec<Quad> {
        self.slots
            .iter()
            .flat_map(|slot| slot.memo)
            .filter(|&result| result != NONE)
            .map(Quad)
            .collect()
    }

    /// Forgets the memoised results that `keep` refuses.
    pub fn memo_forget_unless(&mut self, mut keep: impl FnMut(&mut Top, Quad) -> bool) {
        for at in 0..self.slots.len() {
            for bit in 0..2 {
                let result = self.slots[at].memo[bit];
                if result != NONE && !keep(self, Quad(result)) {
                    self.slots[at].memo[bit] = NONE;
                }
            }
        }
    }

    /// The quads that have a memoised result.
    fn memo_holders(&self) -> impl Iterator<Item = u32> + '_ {
        (0..self.slots.len() as u32).filter(|&at| self.slots[at as usize].memo != [NONE; 2])
    }

    /// Forgets every quad not under one of `roots`, a memoised quad or a
    /// memoised result (their handles may be given to new quads).
    pub fn keep_under(&mut self, roots: &[(ContentId, u32)]) {
        let roots = self.quads_of(roots);
        self.keep_under_quads(&roots);
    }

    /// Keeps what is under these quads (as [`Top::keep_under`]).
    pub fn keep_under_quads(&mut self, roots: &[Quad]) {
        let mut keep = vec![false; self.slots.len()];
        let mut stack: Vec<u32> = roots
            .iter()
            .map(|quad| quad.0)
            .chain(
                self.empties
                    .iter()
                    .filter_map(|id| self.by_id.get(id).copied()),
            )
            .chain(self.memo_holders())
            .collect();
        while let Some(at) = stack.pop() {
            if std::mem::replace(&mut keep[at as usize], true) {
                continue;
            }
            let slot = &self.slots[at as usize];
            if slot.kids[0] != NONE {
                stack.extend(slot.kids);
            }
            stack.extend(slot.memo.iter().filter(|&&result| result != NONE));
        }
        for (at, kept) in keep.iter().enumerate() {
            let at32 = at as u32;
            // Freed before: free already.
            if *kept || self.slots[at].id == FREED {
                continue;
            }
            let slot = self.slots[at];
            self.by_id.remove(&slot.id);
            if slot.kids[0] != NONE {
                self.by_kids.remove(&slot.kids);
            }
            self.slots[at].id = FREED;
            self.slots[at].memo = [NONE; 2];
            self.free.push(at32);
        }
    }

    /// Population and extent (left, top, right, bottom, as offsets from the
    /// root's corner) of the state under `root`, from the pieces' figures.
    /// A quad's figures never change (its id names its content), so each is
    /// folded once, from its children's, and kept while the quad is: a step
    /// folds only the quads it made. (A piece missing from `pieces` counts
    /// as empty, and is not kept.)
    pub fn figures(
        &mut self,
        root: &ContentId,
        _level: u32,
        pieces: &HashMap<ContentId, Figures>,
    ) -> (BigUint, Option<[BigUint; 4]>) {
        let piece_level = self.shard_level - 1;
        self.empty(piece_level);
        let Some(&root_at) = self.by_id.get(root) else {
            return (BigUint::zero(), None);
        };
        if self.figured.len() < self.slots.len() {
            self.figured.resize(self.slots.len(), None);
        }
        let mut unknown: HashMap<u32, Arc<Folded>> = HashMap::new();
        // (quad, children pushed?)
        let mut stack = vec![(root_at, false)];
        while let Some((at, expanded)) = stack.pop() {
            if self.figured[at as usize].is_some() || unknown.contains_key(&at) {
                continue;
            }
            let slot = self.slots[at as usize];
            if slot.level == piece_level || slot.kids[0] == NONE {
                if slot.id == self.empties[piece_level as usize] {
                    self.figured[at as usize] = Some(Arc::new((BigUint::zero(), None)));
                    continue;
                }
                match pieces.get(&slot.id) {
                    Some(figures) => {
                        self.figured[at as usize] = Some(Arc::new((
                            BigUint::from(figures.population),
                            figures.extent.map(|e| {
                                [e.left.into(), e.top.into(), e.right.into(), e.bottom.into()]
                            }),
                        )));
                    }
                    None => {
                        unknown.insert(at, Arc::new((BigUint::zero(), None)));
                    }
                }
                continue;
            }
            if !expanded {
                stack.push((at, true));
                stack.extend(slot.kids.iter().map(|&kid| (kid, false)));
                continue;
            }
            let half = BigUint::one() << (slot.level - 1);
            let mut population = BigUint::zero();
            let mut extent: Option<[BigUint; 4]> = None;
            let mut whole = true;
            for (quarter, &kid) in slot.kids.iter().enumerate() {
                let value = match &self.figured[kid as usize] {
                    Some(value) => value.clone(),
                    None => {
                        whole = false;
                        unknown[&kid].clone()
                    }
                };
                let (count, kid_extent) = &*value;
                population += count;
                let Some([l, t, r, b]) = kid_extent else {
                    continue;
                };
                let dx = if quarter % 2 == 1 {
                    half.clone()
                } else {
                    BigUint::zero()
                };
                let dy = if quarter >= 2 {
                    half.clone()
                } else {
                    BigUint::zero()
                };
                let moved = [l + &dx, t + &dy, r + &dx, b + &dy];
                extent = Some(match extent {
                    None => moved,
                    Some([l0, t0, r0, b0]) => {
                        let [l1, t1, r1, b1] = moved;
                        [l0.min(l1), t0.min(t1), r0.max(r1), b0.max(b1)]
                    }
                });
            }
            let value = Arc::new((population, extent));
            if whole {
                self.figured[at as usize] = Some(value);
            } else {
                unknown.insert(at, value);
            }
        }
        let value = match &self.figured[root_at as usize] {
            Some(value) => value.clone(),
            None => unknown[&root_at].clone(),
        };
        (*value).clone()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::shard::Extent;

    /// A piece id and its figures, from a number.
    fn piece(n: u64) -> (ContentId, Figures) {
        let figures = Figures {
            population: n,
            extent: Some(Extent {
                left: n % 7,
                top: n % 5,
                right: 8 + n % 3,
                bottom: 9,
            }),
        };
        (ContentId::of_leaf(n), figures)
    }

    /// A quad of level K + 2 over 16 pieces numbered from `first`.
    fn square(top: &mut Top, first: u64) -> ContentId {
        let k = top.shard_level;
        let quarters: Vec<ContentId> = (0..4)
            .map(|q| {
                let kids = [0, 1, 2, 3].map(|i| piece(first + 4 * q + i).0);
                for kid in kids {
                    top.piece(kid);
                }
                top.join(k, kids)
            })
            .collect();
        top.join(k + 1, [quarters[0], quarters[1], quarters[2], quarters[3]])
    }

    // The arena forgets what no root needs and gives its handles to new
    // quads; ids, children and figures stay those of the content (common
    // practice: a collected cache answers as a fresh one).
    #[test]
    fn kept_quads_survive_and_freed_handles_serve_new_content() {
        let mut top = Top::new(8);
        top.empty(12);
        let pieces: HashMap<ContentId, Figures> = (0..64).map(piece).collect();
        let a = square(&mut top, 0);
        let b = square(&mut top, 16);
        let kids_of_a = top.kids(&a, 10);
        let figures_of_a = top.figures(&a, 10, &pieces);
        let (a_at, b_at) = (top.quad(&a).unwrap(), top.quad(&b).unwrap());
        top.keep_under(&[(a, 10)]);
        assert!(top.quad(&b).is_none(), "b was forgotten");
        assert!(top.holds(a_at, &a), "a kept its handle");
        assert!(!top.holds(b_at, &b), "b's handle no longer names b");
        let c = square(&mut top, 32);
        assert!(!top.holds(b_at, &b), "nor once its slot serves again");
        assert_eq!(top.kids(&a, 10), kids_of_a);
        assert_eq!(top.figures(&a, 10, &pieces), figures_of_a);
        let mut fresh = Top::new(8);
        fresh.empty(12);
        let c_fresh = square(&mut fresh, 32);
        assert_eq!(c, c_fresh);
        assert_eq!(
            top.figures(&c, 10, &pieces),
            fresh.figures(&c_fresh, 10, &pieces)
        );
        assert_eq!(top.pieces(&c, 10).len(), 16);
        // A square with empty quarters: folded (its population counts) and
        // listed for a pack with it.
        let e = top.empty(7);
        let (one, _) = piece(5);
        let lone = top.join(8, [one, e, e, e]);
        let e8 = top.empty(8);
        let root = top.join(9, [lone, e8, e8, e8]);
        let unstored = top.unstored(&root, 9, &pieces, |_| false);
        let populations: Vec<u64> = unstored
            .iter()
            .map(|(_, population)| u64::try_from(population).unwrap())
            .collect();
        assert_eq!(populations, [5, 5]);
    }

    // The memo lives in the quads: a memoised quad and its result are kept
    // with it, residual results go when N changes, unused ones go past the
    // limit, and a freed quad takes its memo with it.
    #[test]
    fn memoised_quads_and_results_are_kept_and_forgotten_as_told() {
        let mut top = Top::new(8);
        top.empty(12);
        let (a, b, c) = (
            square(&mut top, 0),
            square(&mut top, 16),
            square(&mut top, 32),
        );
        let [a, b, c] = [a, b, c].map(|id| top.quad(&id).unwrap());
        top.remember(a, Stride::Full, b);
        top.remember(a, Stride::Residual, c);
        top.keep_under_quads(&[]);
        assert_eq!(top.memo(a, Stride::Full), Some(b));
        assert_eq!(top.memo(a, Stride::Residual), Some(c));
        let mut results = top.memo_results();
        results.sort_by_key(|quad| quad.0);
        let mut expected = vec![b, c];
        expected.sort_by_key(|quad| quad.0);
        assert_eq!(results, expected);

        top.memo_begin(true);
        assert_eq!(top.memo(a, Stride::Residual), None, "a new N");
        top.memo_begin(false);
        top.memo_end(0);
        assert_eq!(top.memo(a, Stride::Full), None, "unused past the limit");

        let a_id = top.id(a);
        top.remember(b, Stride::Full, c);
        top.memo_forget_unless(|_, result| result != c);
        assert_eq!(top.memo(b, Stride::Full), None);
        top.keep_under_quads(&[]);
        assert!(!top.holds(a, &a_id), "nothing keeps a now");
    }
}
