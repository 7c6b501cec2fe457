//! A shard: the quads a cluster node keeps, addressed by content id.
//!
//! A node receives quads as records (a leaf's cells, or an inner quad's
//! level and children's ids), checks each record's id against its content,
//! and answers the coordinator's base case: advance a square of the shard
//! level K, given as four level-(K-1) ids, by a stride of at most 2^(K-2).
//! Results are *held* (pinned against the collector) until the coordinator
//! says which to keep; everything else is memo that the collector may take.
//!
//! Every quad a shard has named is in the store's id index (id → handle,
//! level), with all of its descendants: a quad is indexed only after its
//! children, and the collector frees a quad's children only with it, so a
//! peer that asks for the children of a record it got is always answered.

use std::collections::HashSet;

use crate::advance::{self, Advance};
use crate::content_id::ContentId;
use crate::error::BudgetExceeded;
use crate::figures::{self, Side};
use crate::recursion::Stride;
use crate::rule::{Background, Rule};
use crate::store::{Handle, LEAF_LEVEL, Store};
use crate::universe::fits_centre_half;

/// The highest shard level a shard serves: squares of 2^48 cells a side
/// (offsets inside a held quad then fit a `u64` with room to spare).
pub const MAX_SHARD_LEVEL: u32 = 48;

/// One quad as it travels: a leaf with its cells, or an inner quad with
/// its level (4 and up) and its children's ids (nw, ne, sw, se).
#[derive(Clone, Copy, PartialEq, Eq, Debug)]
pub enum Record {
    Leaf(u64),
    Inner { level: u32, kids: [ContentId; 4] },
}

impl Record {
    /// The content id this record's content hashes to.
    pub fn id(&self) -> ContentId {
        match *self {
            Record::Leaf(bits) => ContentId::of_leaf(bits),
            Record::Inner { level, kids } => ContentId::of_inner(level, kids),
        }
    }

    pub fn level(&self) -> u32 {
        match *self {
            Record::Leaf(_) => LEAF_LEVEL,
            Record::Inner { level, .. } => level,
        }
    }
}

/// The live cells' extent inside a quad, from its top-left corner:
/// columns `left..=right`, rows `top..=bottom`.
#[derive(Clone, Copy, PartialEq, Eq, Debug)]
pub struct Extent {
    pub left: u64,
    pub top: u64,
    pub right: u64,
    pub bottom: u64,
}

/// The figures of a held quad.
#[derive(Clone, Copy, PartialEq, Eq, Debug)]
pub struct Figures {
    pub population: u64,
    /// None when the quad is empty
    pub extent: Option<Extent>,
}

/// What a shard refuses.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ShardError {
    /// a quad named is not here (the caller fetches it and tries again)
    #[error("quad {0} is not held here")]
    Missing(ContentId),
    /// a record's content does not hash to the id it came with
    #[error("a record named {claimed} hashes to {actual}")]
    WrongId {
        claimed: ContentId,
        actual: ContentId,
    },
    /// a record's child has the wrong level
    #[error("quad {id} of level {level} has a child of level {child}")]
    WrongLevel {
        id: ContentId,
        level: u32,
        child: u32,
    },
    /// a level outside what shards serve
    #[error("level {level} is outside 4 to {MAX_SHARD_LEVEL}")]
    BadLevel { level: u32 },
    /// a stride beyond what a square of the level can move
    #[error("a stride of {stride} is more than 2^({level}-2) generations")]
    BadStride { stride: u64, level: u32 },
    /// a stride of several generations from a background the rule does
    /// not settle in (the memo of whole strides holds for that one only)
    #[error(
        "a stride of {stride} generations from a {background} background: a B0 rule's advance moves one generation first"
    )]
    Unsettled {
        stride: u64,
        background: &'static str,
    },
    #[error(transparent)]
    Budget(#[from] BudgetExceeded),
}

/// The quads of one node, by content id, under a memory budget.
pub struct Shard {
    store: Store,
    rule: Rule,
    /// held quads: pinned until `retain` (or `release`) lets them go, with
    /// the order they were held in (oldest first is what `oldest_held` gives)
    held: ahash::HashMap<ContentId, (Handle, u64)>,
    /// the order number the next held quad gets
    next_held: u64,
    /// quads a task counts on while it runs (found here when it fetched
    /// what it lacked), pinned until given back, with how many times
    borrowed: ahash::HashMap<ContentId, (Handle, u32)>,
    /// quads handed over and not yet named held (pinned until `retain`)
    staged: Vec<Handle>,
    /// the stride and starting background the store's residual memo was
    /// filled for
    residual_for: (u64, Background),
}

impl Shard {
    /// An empty shard for `rule`, keeping its quads within `budget` bytes.
    pub fn new(rule: Rule, budget: u64) -> Result<Shard, BudgetExceeded> {
        let mut store = Store::new(budget);
        for level in LEAF_LEVEL..=MAX_SHARD_LEVEL {
            let empty = store.empty(level)?;
            let id = figures::content_id(&mut store, empty, level);
            store.by_id.insert(id, (empty, level));
        }
        Ok(Shard {
            store,
            rule,
            held: Default::default(),
            next_held: 0,
            borrowed: Default::default(),
            staged: Vec::new(),
            residual_for: (0, Background::Dead),
        })
    }

    pub fn rule(&self) -> Rule {
        self.rule
    }

    /// Whether the quad is here (empty quads always are).
    pub fn has(&self, id: &ContentId) -> bool {
        self.store.by_id.contains_key(id)
    }

    /// The level of a quad that is here.
    pub fn level_of(&self, id: &ContentId) -> Option<u32> {
        self.store.by_id.get(id).map(|&(_, level)| level)
    }

    /// The record of a quad that is here, for a peer.
    pub fn record(&self, id: &ContentId) -> Option<Record> {
        let &(handle, level) = self.store.by_id.get(id)?;
        Some(if level == LEAF_LEVEL {
            Record::Leaf(self.store.leaf_bits(handle))
        } else {
            Record::Inner {
                level,
                kids: self.store.kids(handle).map(|kid| self.id_of(kid)),
            }
        })
    }

    /// The id of an indexed quad (inner ids are memoised; leaves hashed).
    fn id_of(&self, handle: Handle) -> ContentId {
        if handle.is_leaf() {
            ContentId::of_leaf(self.store.leaf_bits(handle))
        } else {
            self.store.ids[&handle]
        }
    }

    /// Takes records (children before parents: each record's children are
    /// earlier in `records` or here already) and holds the quads named in
    /// `hold`. What is taken stays until a call holds something (so the
    /// records of one quad may arrive over several calls, the last of them
    /// holding it) or until `retain`; a call that holds lets go of what
    /// earlier calls took, which must be under what is held by then.
    /// Nothing is taken unless every record checks out up to the failing
    /// one.
    pub fn put(
        &mut self,
        records: &[(ContentId, Record)],
        hold: &[ContentId],
    ) -> Result<(), ShardError> {
        for (claimed, record) in records {
            let handle = self.insert(claimed, record)?;
            self.staged.push(handle);
            self.store.pin(handle);
        }
        for id in hold {
            self.hold(id)?;
        }
        if !hold.is_empty() {
            self.staged.clear();
            self.repin();
        }
        Ok(())
    }

    /// Takes in a task's inputs (records fetched from peers, children
    /// first) and runs `work`: the records are kept from the collector only
    /// until `work` ends (what they make that must stay, `work` holds), so
    /// a task's copies of its peers' quads do not pile up until the next
    /// `retain`.
    pub fn with_inputs<T>(
        &mut self,
        records: &[(ContentId, Record)],
        work: impl FnOnce(&mut Shard) -> Result<T, ShardError>,
    ) -> Result<T, ShardError> {
        let base = self.store.scratch.len();
        let outcome = records
            .iter()
            .try_for_each(|(claimed, record)| {
                let handle = self.insert(claimed, record)?;
                self.store.scratch.push(handle);
                Ok(())
            })
            .and_then(|()| work(self));
        self.store.scratch.truncate(base);
        outcome
    }

    /// Takes the records of one quad's subtree (children first) and holds
    /// the quad; unlike `put`, nothing else stays pinned (a node reading
    /// back a piece it spilled).
    pub fn take(
        &mut self,
        records: &[(ContentId, Record)],
        id: &ContentId,
    ) -> Result<(), ShardError> {
        self.with_inputs(records, |shard| shard.hold(id))
    }

    /// Holds a quad that is here until `retain` drops it.
    pub fn hold(&mut self, id: &ContentId) -> Result<(), ShardError> {
        let &(handle, _) = self.store.by_id.get(id).ok_or(ShardError::Missing(*id))?;
        if let std::collections::hash_map::Entry::Vacant(slot) = self.held.entry(*id) {
            slot.insert((handle, self.next_held));
            self.next_held += 1;
            self.store.pin(handle);
        }
        Ok(())
    }

    /// Up to `count` held quads outside `spare`, the longest held first
    /// (a spilling node writes these out: a step's start pieces are held
    /// before its results, and are done with first). Empty quads, which
    /// cost nothing, are left out.
    pub fn oldest_held(&self, count: usize, spare: &HashSet<ContentId>) -> Vec<ContentId> {
        let mut held: Vec<(u64, ContentId)> = self
            .held
            .iter()
            .filter(|(id, (handle, _))| {
                !spare.contains(id) && *handle != self.store.known_empty(self.store.by_id[*id].1)
            })
            .map(|(id, &(_, order))| (order, *id))
            .collect();
        held.sort_unstable();
        held.into_iter().take(count).map(|(_, id)| id).collect()
    }

    /// Stops holding `ids`: the collector may take them from now on (what
    /// is staged stays until `retain`).
    pub fn release(&mut self, ids: &[ContentId]) {
        for id in ids {
            self.held.remove(id);
        }
        self.repin();
    }

    /// Pins exactly what is held, borrowed and staged.
    fn repin(&mut self) {
        self.store.pinned.clear();
        self.store
            .pinned
            .extend(self.held.values().map(|&(handle, _)| handle));
        self.store
            .pinned
            .extend(self.borrowed.values().map(|&(handle, _)| handle));
        self.store.pinned.extend(self.staged.iter().copied());
    }

    /// Keeps a quad that is here from the collector until it is given
    /// back (a task that found it here need not fetch it, and must still
    /// find it when it runs). False when it is not here.
    pub fn borrow(&mut self, id: &ContentId) -> bool {
        let Some(&(handle, _)) = self.store.by_id.get(id) else {
            return false;
        };
        let entry = self.borrowed.entry(*id).or_insert((handle, 0));
        if entry.1 == 0 {
            self.store.pin(handle);
        }
        entry.1 += 1;
        true
    }

    /// Gives back what `borrow` kept (once per borrow).
    pub fn give_back(&mut self, ids: &[ContentId]) {
        let mut freed = false;
        for id in ids {
            if let Some(entry) = self.borrowed.get_mut(id) {
                entry.1 -= 1;
                if entry.1 == 0 {
                    self.borrowed.remove(id);
                    freed = true;
                }
            }
        }
        if freed {
            self.repin();
        }
    }

    /// Counts a held quad as held just now (a peer is reading it: it is
    /// the last a spilling node should write out).
    pub fn touch(&mut self, id: &ContentId) {
        if let Some(entry) = self.held.get_mut(id) {
            entry.1 = self.next_held;
            self.next_held += 1;
        }
    }

    /// Keeps holding only the quads named in `keep` (of those held) and
    /// lets go of everything staged; returns how many are still held.
    pub fn retain(&mut self, keep: &HashSet<ContentId>) -> usize {
        self.held.retain(|id, _| keep.contains(id));
        self.staged.clear();
        self.repin();
        self.held.len()
    }

    /// How many quads are held.
    pub fn held(&self) -> usize {
        self.held.len()
    }

    /// The store's counters.
    pub fn stats(&self) -> crate::StoreStats {
        self.store.stats()
    }

    /// Indexes one record whose children are here.
    fn insert(&mut self, claimed: &ContentId, record: &Record) -> Result<Handle, ShardError> {
        let actual = record.id();
        if actual != *claimed {
            return Err(ShardError::WrongId {
                claimed: *claimed,
                actual,
            });
        }
        if let Some(&(handle, _)) = self.store.by_id.get(claimed) {
            return Ok(handle);
        }
        let (handle, level) = match *record {
            Record::Leaf(bits) => (self.store.leaf(bits)?, LEAF_LEVEL),
            Record::Inner { level, kids } => {
                if !(LEAF_LEVEL + 1..=MAX_SHARD_LEVEL).contains(&level) {
                    return Err(ShardError::BadLevel { level });
                }
                let mut handles = [Handle::NONE; 4];
                for (at, kid) in kids.iter().enumerate() {
                    let &(handle, child) =
                        self.store.by_id.get(kid).ok_or(ShardError::Missing(*kid))?;
                    if child != level - 1 {
                        return Err(ShardError::WrongLevel {
                            id: *claimed,
                            level,
                            child,
                        });
                    }
                    handles[at] = handle;
                }
                let handle = self.store.join(handles)?;
                self.store.ids.insert(handle, actual);
                (handle, level)
            }
        };
        self.store.by_id.insert(actual, (handle, level));
        Ok(handle)
    }

    /// The handles of four level-`level` quads that are here.
    fn handles(&self, kids: &[ContentId; 4], level: u32) -> Result<[Handle; 4], ShardError> {
        let mut handles = [Handle::NONE; 4];
        for (at, kid) in kids.iter().enumerate() {
            let &(handle, found) = self.store.by_id.get(kid).ok_or(ShardError::Missing(*kid))?;
            if found != level {
                return Err(ShardError::WrongLevel {
                    id: *kid,
                    level: level + 1,
                    child: found,
                });
            }
            handles[at] = handle;
        }
        Ok(handles)
    }

    /// The base case of the cluster's recursion: the centre (level K-1) of
    /// the level-K square made of `kids`, `stride` generations on
    /// (0 ≤ stride ≤ 2^(K-2)) from a generation whose background is `from`
    /// (see [`Background`]; a stride of more than one generation starts
    /// from the background the rule settles in). The result is held and
    /// indexed.
    pub fn advance(
        &mut self,
        kids: &[ContentId; 4],
        level: u32,
        stride: u64,
        from: Background,
    ) -> Result<(ContentId, Figures), ShardError> {
        if !(LEAF_LEVEL + 2..=MAX_SHARD_LEVEL).contains(&level) {
            return Err(ShardError::BadLevel { level });
        }
        let full = 1u64 << (level - 2);
        if stride > full {
            return Err(ShardError::BadStride { stride, level });
        }
        if stride > 1 && !self.rule.memo_holds_from(from) {
            return Err(ShardError::Unsettled {
                stride,
                background: from.name(),
            });
        }
        let handles = self.handles(kids, level - 1)?;
        let base = self.store.scratch.len();
        self.store.scratch.extend(handles);
        let outcome = self.advance_square(handles, level, stride, from);
        self.store.scratch.truncate(base);
        let result = outcome?;
        self.store.scratch.push(result);
        let indexed = self.index(result, level - 1);
        self.store.scratch.truncate(base);
        let id = indexed?;
        self.hold(&id)?;
        Ok((id, figures_of(&self.store, result, level - 1)))
    }

    fn advance_square(
        &mut self,
        kids: [Handle; 4],
        level: u32,
        stride: u64,
        from: Background,
    ) -> Result<Handle, ShardError> {
        let quad = self.store.join(kids)?;
        self.store.scratch.push(quad);
        if stride == 0 {
            return Ok(advance::centre(&mut self.store, quad, level)?);
        }
        let full = stride == 1u64 << (level - 2);
        if !full && (stride, from) != self.residual_for {
            self.store.residual.clear();
            self.residual_for = (stride, from);
        }
        let steps = [stride];
        let rules = self.rule.stepping_pair(from);
        let mut run = Advance::new(&mut self.store, rules, &steps, level, None);
        let kind = if full { Stride::Full } else { Stride::Residual };
        Ok(run.run_as(quad, kind)?)
    }

    /// Names a quad and every descendant not named yet; returns its id.
    fn index(&mut self, quad: Handle, level: u32) -> Result<ContentId, ShardError> {
        let id = figures::content_id(&mut self.store, quad, level);
        let mut stack = vec![(quad, level)];
        while let Some((handle, level)) = stack.pop() {
            let id = self.id_of(handle);
            if self.store.by_id.contains_key(&id) {
                continue;
            }
            self.store.by_id.insert(id, (handle, level));
            if !handle.is_leaf() {
                for kid in self.store.kids(handle) {
                    stack.push((kid, level - 1));
                }
            }
        }
        Ok(id)
    }

    /// The population and extent of a quad that is here.
    pub fn figures(&self, id: &ContentId) -> Option<Figures> {
        let &(handle, level) = self.store.by_id.get(id)?;
        Some(figures_of(&self.store, handle, level))
    }

    /// Writes the quads under `pieces` (quads here, held or not) that
    /// `known` does not locate into a pack, as a cluster node's part of a
    /// checkpoint; `packs` names the packs `known` points into, by index.
    /// None when every quad is known already.
    pub fn write_pack(
        &mut self,
        pieces: &[ContentId],
        known: &dyn Fn(&ContentId) -> Option<crate::pack::QuadAt>,
        packs: &[crate::pack::Checksum],
    ) -> Result<Option<crate::pack::WrittenPack>, ShardError> {
        let mut roots = Vec::with_capacity(pieces.len());
        for id in pieces {
            let &(handle, level) = self.store.by_id.get(id).ok_or(ShardError::Missing(*id))?;
            roots.push((handle, level));
        }
        Ok(crate::pack::write_pack(
            &mut self.store,
            &roots,
            known,
            packs,
        ))
    }

    /// Figures of the level-`level` square made of `kids` (level - 1 each,
    /// here): its population, extent, and the id and level of its smallest
    /// centred quad (level 3 or more) holding all its live cells.
    pub fn describe(
        &mut self,
        kids: &[ContentId; 4],
        level: u32,
    ) -> Result<(ContentId, u32, Figures), ShardError> {
        if !(LEAF_LEVEL + 1..=MAX_SHARD_LEVEL).contains(&level) {
            return Err(ShardError::BadLevel { level });
        }
        let handles = self.handles(kids, level - 1)?;
        let base = self.store.scratch.len();
        self.store.scratch.extend(handles);
        let outcome = (|| -> Result<(ContentId, u32, Figures), ShardError> {
            let square = self.store.join(handles)?;
            self.store.scratch.push(square);
            let figures = figures_of(&self.store, square, level);
            let (mut quad, mut at) = (square, level);
            while at > LEAF_LEVEL && fits_centre_half(&self.store, quad, at) {
                quad = advance::centre(&mut self.store, quad, at)?;
                self.store.scratch.push(quad);
                at -= 1;
            }
            Ok((figures::content_id(&mut self.store, quad, at), at, figures))
        })();
        self.store.scratch.truncate(base);
        outcome
    }
}

/// Population and extent of a quad of `level` ≤ 63.
pub(crate) fn figures_of(store: &Store, quad: Handle, level: u32) -> Figures {
    use num_traits::ToPrimitive;
    let population = figures::population(store, quad, level)
        .to_u64()
        .unwrap_or(u64::MAX);
    let find = |axis, max| {
        figures::extreme(store, quad, level, Side { axis, max }).and_then(|offset| offset.to_u64())
    };
    let extent = match (find(0, false), find(0, true), find(1, false), find(1, true)) {
        (Some(left), Some(right), Some(top), Some(bottom)) => Some(Extent {
            left,
            top,
            right,
            bottom,
        }),
        _ => None,
    };
    Figures { population, extent }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::universe::Universe;

    /// The records of `universe`'s quads under each piece of its cut,
    /// children first.
    fn shard_of(universe: &mut Universe, level: u32) -> (Shard, crate::cut::Cut) {
        let cut = universe.cut(level).unwrap();
        let mut shard = Shard::new(universe.rule(), 1 << 28).unwrap();
        let mut sent = HashSet::new();
        for piece in &cut.pieces {
            let records = universe.records(piece.handle, level - 1, &mut sent);
            shard.put(&records, &[piece.id]).unwrap();
        }
        (shard, cut)
    }

    #[test]
    fn a_square_advanced_in_a_shard_equals_the_universe_advanced() {
        // The R-pentomino (common practice): its first 64 generations stay
        // within a 64-cell square around it.
        let pattern = crate::pattern::read_pattern(b"x = 3, y = 3\nb2o$2o$bo!\n", 1 << 28).unwrap();
        let rule: Rule = "B3/S23".parse().unwrap();
        let mut universe = Universe::from_pattern(&pattern, rule, 1 << 28).unwrap();
        let level = 7;
        let (mut shard, cut) = shard_of(&mut universe, level);
        // The root's centre square of level K is made of the four pieces
        // around the origin.
        let centre = cut
            .centre_square()
            .expect("the root is above the shard level");
        let (id, figures) = shard.advance(&centre, level, 16, Background::Dead).unwrap();
        universe.advance(&16u32.into(), None).unwrap();
        assert_eq!(figures.population, universe.population().to_u64_digits()[0]);
        // The result's canonical id is the advanced universe's digest.
        let (digest, _, _) = {
            let record = shard.record(&id).unwrap();
            let Record::Inner { kids, level } = record else {
                panic!("inner")
            };
            shard.describe(&kids, level).unwrap()
        };
        assert_eq!(digest, universe.digest().unwrap());
    }

    /// A B0 rule whose background flips (B03/S23): a square at an odd
    /// generation (alive background) moves one generation, as the universe
    /// does; a longer stride from there is refused, and from the settled
    /// (dead) background it equals the universe's.
    #[test]
    fn a_b0_square_moves_from_either_background_as_the_universe_does() {
        let pattern = crate::pattern::read_pattern(b"x = 3, y = 3\nb2o$2o$bo!\n", 1 << 28).unwrap();
        let rule: Rule = "B03/S23".parse().unwrap();
        let level = 7;
        let mut universe = Universe::from_pattern(&pattern, rule, 1 << 28).unwrap();
        universe.advance(&1u32.into(), None).unwrap();
        assert_eq!(universe.background(), Background::Alive);
        for (stride, from) in [(1, Background::Alive), (16, Background::Dead)] {
            let (mut shard, cut) = shard_of(&mut universe, level);
            let centre = cut.centre_square().expect("above the shard level");
            if from == Background::Alive {
                let refused = shard.advance(&centre, level, 16, from);
                assert!(
                    matches!(refused, Err(ShardError::Unsettled { stride: 16, .. })),
                    "{refused:?}"
                );
            }
            let (id, figures) = shard.advance(&centre, level, stride, from).unwrap();
            universe.advance(&stride.into(), None).unwrap();
            assert_eq!(figures.population, universe.population().to_u64_digits()[0]);
            let record = shard.record(&id).unwrap();
            let Record::Inner { kids, level } = record else {
                panic!("inner")
            };
            let (digest, _, _) = shard.describe(&kids, level).unwrap();
            assert_eq!(digest, universe.digest().unwrap(), "{stride} from {from:?}");
        }
    }

    #[test]
    fn released_pieces_go_at_the_next_collection_and_borrowed_ones_stay_until_given_back() {
        // Common practice for pinning collectors. A 64² field of our own
        // (cells on where a fixed bit mixer says), cut into 16² pieces.
        let mut rle = String::from("x = 64, y = 64\n");
        for y in 0..64u64 {
            for x in 0..64u64 {
                let mixed = (y * 64 + x).wrapping_mul(0x9e37_79b9_7f4a_7c15) >> 61;
                rle.push(if mixed < 3 { 'o' } else { 'b' });
            }
            rle.push_str(if y == 63 { "!\n" } else { "$\n" });
        }
        let pattern = crate::pattern::read_pattern(rle.as_bytes(), 1 << 28).unwrap();
        let rule: Rule = "B3/S23".parse().unwrap();
        let mut universe = Universe::from_pattern(&pattern, rule, 1 << 28).unwrap();
        let (mut shard, _) = shard_of(&mut universe, 5);
        let held = shard.oldest_held(usize::MAX, &HashSet::new());
        assert!(held.len() >= 4, "{} pieces", held.len());
        // Held longest first: the order they were held in.
        let spare: HashSet<ContentId> = [held[0]].into();
        assert_eq!(shard.oldest_held(2, &spare), held[1..3].to_vec());
        // Read by a peer just now: the last to go.
        shard.touch(&held[1]);
        assert_eq!(
            shard.oldest_held(usize::MAX, &HashSet::new()).last(),
            Some(&held[1])
        );

        assert!(shard.borrow(&held[2]));
        shard.release(&held[..3]);
        shard.store.collect_now();
        assert!(!shard.has(&held[0]) && !shard.has(&held[1]));
        assert!(shard.has(&held[2]), "borrowed");
        assert!(shard.has(&held[3]), "still held");
        shard.give_back(&held[2..3]);
        shard.store.collect_now();
        assert!(!shard.has(&held[2]));
        assert!(!shard.borrow(&held[2]), "nothing to borrow once gone");
    }

    #[test]
    fn records_are_checked_against_their_ids() {
        let rule: Rule = "B3/S23".parse().unwrap();
        let mut shard = Shard::new(rule, 1 << 24).unwrap();
        let leaf = Record::Leaf(0b111);
        let wrong = ContentId::of_leaf(0b110);
        assert!(matches!(
            shard.put(&[(wrong, leaf)], &[]),
            Err(ShardError::WrongId { .. })
        ));
        let missing = ContentId::of_leaf(0b1);
        let parent = Record::Inner {
            level: 4,
            kids: [missing; 4],
        };
        assert_eq!(
            shard.put(&[(parent.id(), parent)], &[]),
            Err(ShardError::Missing(missing))
        );
        assert!(!shard.has(&parent.id()));
    }
}
