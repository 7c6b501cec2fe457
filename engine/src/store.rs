//! The quad store: an arena of canonical (hash-consed) quads addressed by
//! `u32` handles, under a memory budget, with a mark-and-sweep collector.
//!
//! One arena holds both kinds of quad in 20-byte slots: inner quads (four
//! child handles and a memoised result) and leaves (8×8 cells in a `u64`,
//! level 3, marked by a child slot no inner quad can have). A handle's top bit
//! says which kind it names, so the recursion never reads a slot to know. One
//! open-addressing table of `u32` slots makes quads canonical: the same four
//! children (or the same leaf bits) always give the same handle, so equal
//! squares are shared and a result computed once serves every copy. One
//! arena, not one per kind, so that the budget freed by one kind can be used
//! by the other.
//!
//! Memory per quad is 20 bytes in the arena plus 4 bytes per table slot at a
//! load between 1/2 and 3/4 (between 5.3 and 8 bytes). The collector never
//! moves a quad: it marks what is reachable from the roots (pinned states,
//! the empty quads, and the scratch stack that the recursion keeps its
//! intermediate handles on), threads the rest onto a free list and rebuilds
//! the table.

use ahash::RandomState;

use crate::error::BudgetExceeded;

/// A quad in the store: a leaf (level 3) or an inner quad (level 4 and up).
///
/// Handles are only meaningful inside the store that made them; the level
/// of a handle is known to whoever holds it (the root's level, minus depth).
#[derive(Clone, Copy, PartialEq, Eq, Hash, Debug, PartialOrd, Ord)]
pub struct Handle(u32);

impl Handle {
    const LEAF_BIT: u32 = 1 << 31;
    /// No quad: an unset result, and the mark of a leaf's slot.
    pub(crate) const NONE: Handle = Handle(u32::MAX);
    /// Slot indices stay below this (the top leaf index is NONE).
    const MAX_INDEX: u32 = (1 << 31) - 1;

    fn leaf(index: u32) -> Handle {
        Handle(index | Self::LEAF_BIT)
    }

    fn inner(index: u32) -> Handle {
        Handle(index)
    }

    /// Whether this handle names a leaf (an 8×8 square of cells).
    pub fn is_leaf(self) -> bool {
        self.0 & Self::LEAF_BIT != 0
    }

    fn index(self) -> usize {
        (self.0 & !Self::LEAF_BIT) as usize
    }
}

/// The level of leaves: 8×8 cells.
pub const LEAF_LEVEL: u32 = 3;

/// A slot of the arena. An inner quad: children in the order nw, ne, sw, se,
/// and the memoised result of advancing it by its full stride (2^(level-2)
/// generations). A leaf: its cells in `kids[0]` (low half) and `kids[1]`
/// (high half), `kids[2]` = NONE. A free slot: the next free index in
/// `kids[0]`.
#[derive(Clone, Copy, Debug)]
#[repr(C)]
pub(crate) struct Node {
    pub(crate) kids: [Handle; 4],
    pub(crate) result: Handle,
}

impl Node {
    fn of_leaf(bits: u64) -> Node {
        Node {
            kids: [
                Handle(bits as u32),
                Handle((bits >> 32) as u32),
                Handle::NONE,
                Handle::NONE,
            ],
            result: Handle::NONE,
        }
    }

    fn is_leaf(&self) -> bool {
        self.kids[2] == Handle::NONE
    }

    fn bits(&self) -> u64 {
        self.kids[0].0 as u64 | (self.kids[1].0 as u64) << 32
    }
}

const EMPTY_SLOT: u32 = u32::MAX;
const NO_FREE: u32 = u32::MAX;
const NODE_BYTES: u64 = std::mem::size_of::<Node>() as u64;
const SLOT_BYTES: u64 = 4;
/// Smallest arena growth step, in quads.
const MIN_CAPACITY: usize = 1 << 10;
/// Smallest table, in slots.
const MIN_TABLE: usize = 1 << 11;

/// Fixed hasher seeds: table layout is deterministic from run to run.
const SEEDS: [u64; 4] = [
    0x243f_6a88_85a3_08d3,
    0x1319_8a2e_0370_7344,
    0xa409_3822_299f_31d0,
    0x082e_fa98_ec4e_6c89,
];

/// Counters about the store, for reports and progress lines.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct StoreStats {
    /// quads currently allocated (live or not yet collected)
    pub quads: u64,
    /// of which leaves
    pub leaves: u64,
    /// quads ever created (the engine's unit of work)
    pub created: u64,
    /// collections run so far
    pub collections: u64,
    /// bytes in use by the arena's filled slots, the table and the memo maps
    pub bytes: u64,
    /// the memory budget in bytes
    pub budget: u64,
}

/// The length of a table that holds `count` quads at a load of 1/2; it
/// grows again (by half) when the load passes 3/4, so slots cost 5.3 to 8
/// bytes per quad.
fn table_len_for(count: usize) -> usize {
    (2 * count).max(MIN_TABLE)
}

/// The home slot of a hash in a table of `len` slots (any length: the hash
/// is scaled into range, not masked).
#[inline]
fn home(hash: usize, len: usize) -> usize {
    ((hash as u64 as u128 * len as u128) >> 64) as usize
}

/// The arena of quads, its canonicalising table and its memory budget.
pub struct Store {
    pub(crate) nodes: Vec<Node>,
    /// open addressing, linear probing: slot indices, EMPTY_SLOT when unused
    table: Vec<u32>,
    free_head: u32,
    free_count: usize,
    leaf_count: usize,
    hasher: RandomState,
    /// `empties[level]` is the canonical empty quad of that level (from 3 up).
    empties: Vec<Handle>,
    /// Handles the recursion is holding: roots for the collector.
    pub(crate) scratch: Vec<Handle>,
    /// Handles pinned by the states built on this store: roots for the collector.
    pub(crate) pinned: Vec<Handle>,
    /// Memo of residual advances (by less than the full stride), see `advance`.
    pub(crate) residual: ahash::HashMap<Handle, Handle>,
    /// Memo of content ids, kept across calls and pruned by the collector.
    pub(crate) ids: ahash::HashMap<Handle, crate::ContentId>,
    /// The reverse, with each quad's level, for the quads a cluster shard
    /// has named (see `shard`); empty elsewhere. Pruned by the collector.
    pub(crate) by_id: ahash::HashMap<crate::ContentId, (Handle, u32)>,
    budget: u64,
    /// When false, reaching the budget is an error at once (used while a
    /// pattern is built: there is nothing to collect, and the builder's own
    /// maps hold handles the collector cannot see).
    collect_allowed: bool,
    created: u64,
    collections: u64,
}

impl Store {
    /// An empty store that will keep its arena, table and memo maps within
    /// `budget` bytes.
    pub fn new(budget: u64) -> Store {
        Store {
            nodes: Vec::new(),
            table: vec![EMPTY_SLOT; table_len_for(0)],
            free_head: NO_FREE,
            free_count: 0,
            leaf_count: 0,
            hasher: RandomState::with_seeds(SEEDS[0], SEEDS[1], SEEDS[2], SEEDS[3]),
            empties: Vec::new(),
            scratch: Vec::new(),
            pinned: Vec::new(),
            residual: ahash::HashMap::default(),
            ids: ahash::HashMap::default(),
            by_id: ahash::HashMap::default(),
            budget,
            collect_allowed: true,
            created: 0,
            collections: 0,
        }
    }

    /// Counters and the memory in use.
    pub fn stats(&self) -> StoreStats {
        StoreStats {
            quads: self.count() as u64,
            leaves: self.leaf_count as u64,
            created: self.created,
            collections: self.collections,
            bytes: self.bytes_in_use(),
            budget: self.budget,
        }
    }

    /// Quads allocated (live or not yet collected).
    fn count(&self) -> usize {
        self.nodes.len() - self.free_count
    }

    /// Bytes in use: the arena's filled slots, the table and the memo maps.
    /// (Arena capacity beyond the filled slots is reserved address space
    /// that is not touched; the budget counts it all the same.)
    pub fn bytes_in_use(&self) -> u64 {
        self.nodes.len() as u64 * NODE_BYTES + self.table_and_maps()
    }

    /// Bytes the budget is held against: the arena at `capacity`, and a
    /// table of `table` slots or of what a full arena needs, if more.
    fn bytes_reserved(&self, capacity: usize, table: usize) -> u64 {
        capacity as u64 * NODE_BYTES
            + self
                .table_len_reserved(capacity)
                .max(table as u64 * SLOT_BYTES)
            + self.maps()
    }

    /// Bytes of the table a full arena of `capacity` needs (load 3/4).
    fn table_len_reserved(&self, capacity: usize) -> u64 {
        (capacity + capacity / 3 + 1) as u64 * SLOT_BYTES
    }

    fn table_and_maps(&self) -> u64 {
        self.table.len() as u64 * SLOT_BYTES + self.maps()
    }

    fn maps(&self) -> u64 {
        // A hash-map entry of the memo maps: key, value and one control byte.
        let residual_entry = 2 * 4 + 1;
        let id_entry = 4 + 16 + 1;
        let by_id_entry = 16 + 8 + 1;
        self.residual.capacity() as u64 * residual_entry
            + self.ids.capacity() as u64 * id_entry
            + self.by_id.capacity() as u64 * by_id_entry
    }

    /// Allows or forbids collection when the budget is reached.
    pub(crate) fn set_collect_allowed(&mut self, allowed: bool) {
        self.collect_allowed = allowed;
    }

    /// Pins a handle as a root until `unpin` is called with it.
    pub fn pin(&mut self, handle: Handle) {
        self.pinned.push(handle);
    }

    /// Removes one pin of `handle` (pins are counted).
    pub fn unpin(&mut self, handle: Handle) {
        if let Some(at) = self.pinned.iter().rposition(|&h| h == handle) {
            self.pinned.swap_remove(at);
        }
    }

    /// The children of an inner quad (nw, ne, sw, se).
    #[inline]
    pub fn kids(&self, handle: Handle) -> [Handle; 4] {
        debug_assert!(!handle.is_leaf());
        self.nodes[handle.index()].kids
    }

    /// The cells of a leaf: bit `y * 8 + x` is the cell at column x, row y.
    #[inline]
    pub fn leaf_bits(&self, handle: Handle) -> u64 {
        debug_assert!(handle.is_leaf());
        self.nodes[handle.index()].bits()
    }

    #[inline]
    pub(crate) fn result(&self, handle: Handle) -> Handle {
        self.nodes[handle.index()].result
    }

    #[inline]
    pub(crate) fn set_result(&mut self, handle: Handle, result: Handle) {
        self.nodes[handle.index()].result = result;
    }

    /// The canonical empty quad of `level`, made on first use.
    pub fn empty(&mut self, level: u32) -> Result<Handle, BudgetExceeded> {
        while self.empties.len() <= level as usize {
            let next = if self.empties.len() < LEAF_LEVEL as usize {
                Handle::NONE // levels below a leaf do not exist
            } else if self.empties.len() == LEAF_LEVEL as usize {
                self.leaf(0)?
            } else {
                let below = *self.empties.last().expect("levels below exist");
                self.join([below; 4])?
            };
            self.empties.push(next);
        }
        Ok(self.empties[level as usize])
    }

    /// The empty quad of a level that has already been made (see `empty`).
    #[inline]
    pub(crate) fn known_empty(&self, level: u32) -> Handle {
        // A level not made yet has no empty quad to compare with.
        self.empties
            .get(level as usize)
            .copied()
            .unwrap_or(Handle::NONE)
    }

    /// The canonical leaf with these cells.
    pub fn leaf(&mut self, bits: u64) -> Result<Handle, BudgetExceeded> {
        let hash = self.hash_leaf(bits);
        if let Some(index) = self.find(hash, |node| node.is_leaf() && node.bits() == bits) {
            return Ok(Handle::leaf(index));
        }
        self.make_room(&[])?;
        let index = self.insert(hash, Node::of_leaf(bits));
        self.leaf_count += 1;
        Ok(Handle::leaf(index))
    }

    /// The canonical inner quad with these children (nw, ne, sw, se).
    pub fn join(&mut self, kids: [Handle; 4]) -> Result<Handle, BudgetExceeded> {
        let hash = self.hash_kids(kids);
        // A leaf's slot never matches: its third child is NONE.
        if let Some(index) = self.find(hash, |node| node.kids == kids) {
            return Ok(Handle::inner(index));
        }
        self.make_room(&kids)?;
        let index = self.insert(
            hash,
            Node {
                kids,
                result: Handle::NONE,
            },
        );
        Ok(Handle::inner(index))
    }

    #[inline]
    fn hash_kids(&self, kids: [Handle; 4]) -> usize {
        let packed = kids[0].0 as u128
            | (kids[1].0 as u128) << 32
            | (kids[2].0 as u128) << 64
            | (kids[3].0 as u128) << 96;
        self.hasher.hash_one(packed) as usize
    }

    #[inline]
    fn hash_leaf(&self, bits: u64) -> usize {
        self.hasher.hash_one(bits) as usize
    }

    fn hash_of(&self, node: &Node) -> usize {
        if node.is_leaf() {
            self.hash_leaf(node.bits())
        } else {
            self.hash_kids(node.kids)
        }
    }

    /// The slot index of the quad the table holds under `hash` that
    /// satisfies `matches`, if any.
    #[inline]
    fn find(&self, hash: usize, matches: impl Fn(&Node) -> bool) -> Option<u32> {
        let len = self.table.len();
        let mut at = home(hash, len);
        loop {
            let slot = self.table[at];
            if slot == EMPTY_SLOT {
                return None;
            }
            if matches(&self.nodes[slot as usize]) {
                return Some(slot);
            }
            at += 1;
            if at == len {
                at = 0;
            }
        }
    }

    /// Puts `node` in a free slot (room was made) and the table.
    fn insert(&mut self, hash: usize, node: Node) -> u32 {
        let index = match self.free_head {
            NO_FREE => {
                self.nodes.push(node);
                (self.nodes.len() - 1) as u32
            }
            head => {
                self.free_head = self.nodes[head as usize].kids[0].0;
                self.free_count -= 1;
                self.nodes[head as usize] = node;
                head
            }
        };
        let len = self.table.len();
        let mut at = home(hash, len);
        while self.table[at] != EMPTY_SLOT {
            at += 1;
            if at == len {
                at = 0;
            }
        }
        self.table[at] = index;
        self.created += 1;
        index
    }

    /// Ensures one more quad fits: a free slot and table room, grown within
    /// the budget, or made by collecting. `protect` are extra roots (the
    /// children about to be joined).
    fn make_room(&mut self, protect: &[Handle]) -> Result<(), BudgetExceeded> {
        if self.has_room() || self.grow() {
            return Ok(());
        }
        if !self.collect_allowed {
            return Err(self.exceeded());
        }
        self.collect(protect);
        // Collecting again after a handful of new quads would thrash: demand
        // that a useful share of the arena came free, or that it can grow
        // into what the collection released.
        let useful = self.free_count > 0 && self.free_count >= self.nodes.capacity() / 16;
        if (useful && self.table_has_room()) || self.grow() {
            return Ok(());
        }
        Err(self.exceeded())
    }

    fn table_has_room(&self) -> bool {
        (self.count() + 1) * 4 <= self.table.len() * 3
    }

    /// A free slot (or spare capacity) and room in the table.
    fn has_room(&self) -> bool {
        (self.free_head != NO_FREE || self.nodes.len() < self.nodes.capacity())
            && self.table_has_room()
    }

    fn exceeded(&self) -> BudgetExceeded {
        // What is allocated after the last collection: the live quads.
        BudgetExceeded {
            budget: self.budget,
            in_use: self.count() as u64 * NODE_BYTES + self.table_and_maps(),
        }
    }

    /// Grows the table (doubling it) and the arena (at most doubling it) as
    /// far as the budget allows, until one more quad fits. Returns false
    /// when that is not possible.
    fn grow(&mut self) -> bool {
        if !self.table_has_room() {
            // Half full if the budget allows, else as large as it allows
            // (the budget always leaves room for the table of a full arena).
            let count = self.count() + 1;
            let capacity = self.nodes.capacity();
            let spare = self.budget.saturating_sub(
                self.bytes_reserved(capacity, 0) - self.table_len_reserved(capacity),
            );
            let affordable = (spare / SLOT_BYTES) as usize;
            let new_len = table_len_for(count).min(affordable);
            if new_len < count + count / 3 + 2 {
                return false;
            }
            self.rebuild_table(new_len, None);
        }
        let (len, capacity) = (self.nodes.len(), self.nodes.capacity());
        if self.free_head != NO_FREE || len < capacity {
            return true;
        }
        let want = (capacity * 2)
            .max(MIN_CAPACITY)
            .min(Handle::MAX_INDEX as usize);
        let fits = |store: &Store, new: usize| {
            store.bytes_reserved(new, store.table.len()) <= store.budget
        };
        let new_capacity = if fits(self, want) {
            want
        } else {
            // The largest capacity in (capacity, want) that fits, if any.
            let (mut low, mut high) = (capacity, want);
            while high - low > 1 {
                let mid = low + (high - low) / 2;
                if fits(self, mid) {
                    low = mid;
                } else {
                    high = mid;
                }
            }
            low
        };
        if new_capacity <= capacity {
            return false;
        }
        self.nodes.reserve_exact(new_capacity - len);
        true
    }

    /// Refills the table, at `len` slots, with every allocated quad (or only
    /// the marked ones).
    fn rebuild_table(&mut self, len: usize, marks: Option<&[u64]>) {
        let mut table = std::mem::take(&mut self.table);
        table.clear();
        table.resize(len, EMPTY_SLOT);
        // Without marks every allocated quad is kept, except the free ones.
        let mut on_free_list = Vec::new();
        if marks.is_none() && self.free_head != NO_FREE {
            on_free_list = vec![false; self.nodes.len()];
            let mut at = self.free_head;
            while at != NO_FREE {
                on_free_list[at as usize] = true;
                at = self.nodes[at as usize].kids[0].0;
            }
        }
        for (index, node) in self.nodes.iter().enumerate() {
            let keep = match marks {
                Some(marks) => marks[index / 64] >> (index % 64) & 1 == 1,
                None => on_free_list.get(index) != Some(&true),
            };
            if !keep {
                continue;
            }
            let mut at = home(self.hash_of(node), len);
            while table[at] != EMPTY_SLOT {
                at += 1;
                if at == len {
                    at = 0;
                }
            }
            table[at] = index as u32;
        }
        self.table = table;
    }

    /// A bit set of the quads reachable from `roots`.
    fn mark(&self, roots: &[Handle]) -> Vec<u64> {
        let mut marks = vec![0u64; self.nodes.len().div_ceil(64)];
        let mut stack: Vec<Handle> = roots
            .iter()
            .copied()
            .filter(|&root| root != Handle::NONE)
            .collect();
        while let Some(handle) = stack.pop() {
            let index = handle.index();
            if marks[index / 64] >> (index % 64) & 1 == 1 {
                continue;
            }
            marks[index / 64] |= 1 << (index % 64);
            if !handle.is_leaf() {
                stack.extend_from_slice(&self.nodes[index].kids);
            }
        }
        marks
    }

    /// How many distinct quads (inner, leaves) are reachable from `root`.
    pub fn reachable(&self, root: Handle) -> (u64, u64) {
        let marks = self.mark(&[root]);
        let (mut inner, mut leaves) = (0, 0);
        for (index, node) in self.nodes.iter().enumerate() {
            if marks[index / 64] >> (index % 64) & 1 == 1 {
                if node.is_leaf() {
                    leaves += 1;
                } else {
                    inner += 1;
                }
            }
        }
        (inner, leaves)
    }

    /// Frees every quad not reachable from the roots: the pinned states, the
    /// empty quads, the scratch stack and `protect`. Results that pointed at
    /// freed quads are forgotten; the memo maps keep only live entries.
    pub fn collect(&mut self, protect: &[Handle]) {
        let roots: Vec<Handle> = self
            .pinned
            .iter()
            .chain(self.empties.iter())
            .chain(self.scratch.iter())
            .chain(protect.iter())
            .copied()
            .collect();
        let marks = self.mark(&roots);
        let marked = |handle: Handle| {
            let index = handle.index();
            index / 64 < marks.len() && marks[index / 64] >> (index % 64) & 1 == 1
        };
        // Unmarked quads at the end of the arena go back to the allocator.
        let mut keep = self.nodes.len();
        while keep > 0 && !marked(Handle::inner((keep - 1) as u32)) {
            keep -= 1;
        }
        self.nodes.truncate(keep);
        if self.nodes.capacity() - keep >= self.nodes.capacity() / 8 {
            self.nodes.shrink_to(keep.max(MIN_CAPACITY));
        }

        // Sweep: thread the unmarked onto the free list, lowest index first;
        // forget results that point at quads about to be reused.
        let mut free_head = NO_FREE;
        let mut free_count = 0;
        let mut leaf_count = 0;
        for index in (0..self.nodes.len()).rev() {
            if marks[index / 64] >> (index % 64) & 1 == 1 {
                let node = &mut self.nodes[index];
                if node.is_leaf() {
                    leaf_count += 1;
                } else if node.result != Handle::NONE && !marked(node.result) {
                    node.result = Handle::NONE;
                }
            } else {
                self.nodes[index] = Node {
                    kids: [Handle(free_head), Handle::NONE, Handle::NONE, Handle::NONE],
                    result: Handle::NONE,
                };
                free_head = index as u32;
                free_count += 1;
            }
        }
        self.free_head = free_head;
        self.free_count = free_count;
        self.leaf_count = leaf_count;

        self.residual
            .retain(|&key, &mut value| marked(key) && marked(value));
        self.ids.retain(|&key, _| marked(key));
        self.by_id.retain(|_, &mut (handle, _)| marked(handle));
        // The maps count against the budget at their capacity: give back
        // what the collection emptied.
        self.residual.shrink_to_fit();
        self.ids.shrink_to_fit();
        self.by_id.shrink_to_fit();

        // The table shrinks with what is left, to half full.
        let len = self.table.len().min(table_len_for(self.count()));
        self.rebuild_table(len, Some(&marks));
        self.collections += 1;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn equal_squares_share_one_handle() {
        let mut store = Store::new(1 << 30);
        let a = store.leaf(0b1011).unwrap();
        let b = store.leaf(0b1011).unwrap();
        assert_eq!(a, b);
        let e = store.empty(3).unwrap();
        let x = store.join([a, e, e, a]).unwrap();
        let y = store.join([a, e, e, a]).unwrap();
        assert_eq!(x, y);
        assert_ne!(x, store.join([e, a, a, e]).unwrap());
    }

    #[test]
    fn collection_frees_the_unreachable_and_keeps_the_pinned() {
        let mut store = Store::new(1 << 30);
        let e = store.empty(3).unwrap();
        let kept_leaf = store.leaf(7).unwrap();
        let kept = store.join([kept_leaf, e, e, e]).unwrap();
        store.pin(kept);
        for bits in 100..2100u64 {
            let leaf = store.leaf(bits).unwrap();
            store.join([leaf, leaf, e, e]).unwrap();
        }
        let before = store.stats().quads;
        store.collect(&[]);
        let after = store.stats().quads;
        assert!(after < 10, "{before} quads before, {after} after");
        // The kept quad is still canonical: joining its children finds it.
        assert_eq!(store.join([kept_leaf, e, e, e]).unwrap(), kept);
        assert_eq!(store.leaf(7).unwrap(), kept_leaf);
        // Freed slots are reused and stay canonical.
        let again = store.leaf(100).unwrap();
        assert_eq!(store.leaf(100).unwrap(), again);
    }

    #[test]
    fn a_budget_too_small_for_the_live_quads_is_an_error() {
        let mut store = Store::new(64 * 1024);
        let e = store.empty(3).unwrap();
        let mut failed = None;
        for bits in 1..100_000u64 {
            match store.leaf(bits) {
                Ok(leaf) => store.pin(leaf),
                Err(error) => {
                    failed = Some(error);
                    break;
                }
            }
        }
        let error = failed.expect("the budget must run out");
        assert_eq!(error.budget, 64 * 1024);
        assert!(store.stats().bytes <= 64 * 1024);
        let _ = e;
    }
}

#[cfg(test)]
mod balance {
    use super::*;

    #[test]
    fn leaves_can_use_what_inner_quads_freed() {
        // One arena serves both kinds: a run that first makes inner quads
        // and then leaves, under a budget that holds only one batch at a
        // time, succeeds.
        let mut store = Store::new(256 * 1024);
        let e = store.empty(3).unwrap();
        let a = store.leaf(1).unwrap();
        store.pin(a);
        for round in 0..3u64 {
            for bits in 0..4000u64 {
                let other = store.leaf(2 + bits + round * 10_000).unwrap();
                store.join([other, a, e, e]).unwrap();
            }
        }
        assert!(store.stats().collections > 0);
    }
}
