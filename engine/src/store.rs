//! The quad store: an arena of canonical (hash-consed) quads addressed by
//! `u32` handles, under a memory budget, with a mark-and-sweep collector.
//!
//! Two arenas share one handle space: leaves (8×8 cells in a `u64`, level 3)
//! and inner quads (four child handles and a memoised result). A handle's top
//! bit says which arena it indexes. Each arena has an open-addressing table
//! of `u32` slots that makes quads canonical: the same four children (or the
//! same leaf bits) always give the same handle, so equal squares are shared
//! and a result computed once serves every copy.
//!
//! Memory per inner quad is 20 bytes in the arena plus 4 bytes per table slot
//! at a load of at most 3/4 (so between 5.3 and 10.7 bytes); leaves take 8
//! bytes plus their slots. The collector never moves a quad: it marks what is
//! reachable from the roots (pinned states, the empty quads, and the scratch
//! stack that the recursion keeps its intermediate handles on), threads the
//! rest onto free lists and rebuilds the tables.

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
    /// No quad: an unset result.
    pub(crate) const NONE: Handle = Handle(u32::MAX);
    /// Leaf and inner indices must stay below this (the top leaf index is NONE).
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

/// An inner quad: children in the order nw, ne, sw, se, and the memoised
/// result of advancing it by its full stride (2^(level-2) generations).
#[derive(Clone, Copy, Debug)]
#[repr(C)]
pub(crate) struct Node {
    pub(crate) kids: [Handle; 4],
    pub(crate) result: Handle,
}

const EMPTY_SLOT: u32 = u32::MAX;
const NO_FREE: u32 = u32::MAX;
const NODE_BYTES: u64 = std::mem::size_of::<Node>() as u64;
const LEAF_BYTES: u64 = 8;
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
    /// inner quads and leaves currently allocated (live or not yet collected)
    pub quads: u64,
    /// of which leaves
    pub leaves: u64,
    /// quads ever created (the engine's unit of work)
    pub created: u64,
    /// collections run so far
    pub collections: u64,
    /// bytes held by the arenas, tables and memo maps
    pub bytes: u64,
    /// the memory budget in bytes
    pub budget: u64,
}

/// One arena's table and free list bookkeeping.
#[derive(Default)]
struct Table {
    slots: Vec<u32>,
    free_head: u32,
    free_count: usize,
}

impl Table {
    fn new() -> Table {
        Table {
            slots: Vec::new(),
            free_head: NO_FREE,
            free_count: 0,
        }
    }

    fn mask(&self) -> usize {
        self.slots.len() - 1
    }

    /// The table length that keeps the load at most 3/4 for `count` quads.
    fn len_for(count: usize) -> usize {
        (count + count / 3 + 1).next_power_of_two().max(MIN_TABLE)
    }

    /// Whether one more entry keeps the load at most 3/4.
    fn has_room(&self, count: usize) -> bool {
        (count + 1) * 4 <= self.slots.len() * 3
    }
}

/// The arena of quads, its canonicalising tables and its memory budget.
pub struct Store {
    pub(crate) nodes: Vec<Node>,
    pub(crate) leaves: Vec<u64>,
    node_table: Table,
    leaf_table: Table,
    hasher: RandomState,
    /// `empties[level]` is the canonical empty quad of that level (from 3 up).
    empties: Vec<Handle>,
    /// Handles the recursion is holding: roots for the collector.
    pub(crate) scratch: Vec<Handle>,
    /// Handles pinned by the states built on this store: roots for the collector.
    pinned: Vec<Handle>,
    /// Memo of residual advances (by less than the full stride), see `advance`.
    pub(crate) residual: ahash::HashMap<Handle, Handle>,
    /// Memo of content ids, kept across calls and pruned by the collector.
    pub(crate) ids: ahash::HashMap<Handle, crate::ContentId>,
    budget: u64,
    /// When false, reaching the budget is an error at once (used while a
    /// pattern is built: there is nothing to collect, and the builder's own
    /// maps hold handles the collector cannot see).
    collect_allowed: bool,
    created: u64,
    collections: u64,
}

impl Store {
    /// An empty store that will keep its arenas, tables and memo maps within
    /// `budget` bytes.
    pub fn new(budget: u64) -> Store {
        let mut store = Store {
            nodes: Vec::new(),
            leaves: Vec::new(),
            node_table: Table::new(),
            leaf_table: Table::new(),
            hasher: RandomState::with_seeds(SEEDS[0], SEEDS[1], SEEDS[2], SEEDS[3]),
            empties: Vec::new(),
            scratch: Vec::new(),
            pinned: Vec::new(),
            residual: ahash::HashMap::default(),
            ids: ahash::HashMap::default(),
            budget,
            collect_allowed: true,
            created: 0,
            collections: 0,
        };
        store.node_table.slots = vec![EMPTY_SLOT; Table::len_for(0)];
        store.leaf_table.slots = vec![EMPTY_SLOT; Table::len_for(0)];
        store
    }

    /// Counters and the memory in use.
    pub fn stats(&self) -> StoreStats {
        StoreStats {
            quads: (self.count(true) + self.count(false)) as u64,
            leaves: self.count(false) as u64,
            created: self.created,
            collections: self.collections,
            bytes: self.bytes_in_use(),
            budget: self.budget,
        }
    }

    /// Quads allocated in one arena (live or not yet collected).
    fn count(&self, inner: bool) -> usize {
        if inner {
            self.nodes.len() - self.node_table.free_count
        } else {
            self.leaves.len() - self.leaf_table.free_count
        }
    }

    /// Bytes in use: the arenas' filled slots, the tables and the memo maps.
    /// (Arena capacity beyond the filled slots is reserved address space
    /// that is not touched; the budget counts it all the same.)
    pub fn bytes_in_use(&self) -> u64 {
        self.nodes.len() as u64 * NODE_BYTES
            + self.leaves.len() as u64 * LEAF_BYTES
            + self.tables_and_maps()
    }

    /// Bytes the budget is held against: arenas at their capacity.
    fn bytes_reserved(&self, node_capacity: usize, leaf_capacity: usize) -> u64 {
        node_capacity as u64 * NODE_BYTES
            + leaf_capacity as u64 * LEAF_BYTES
            + self.tables_and_maps()
    }

    fn tables_and_maps(&self) -> u64 {
        // A hash-map entry of the memo maps: key, value and one control byte.
        let residual_entry = 2 * 4 + 1;
        let id_entry = 4 + 16 + 1;
        (self.node_table.slots.len() + self.leaf_table.slots.len()) as u64 * SLOT_BYTES
            + self.residual.capacity() as u64 * residual_entry
            + self.ids.capacity() as u64 * id_entry
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
        self.leaves[handle.index()]
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
        let hash = self.hasher.hash_one(bits) as usize;
        if let Some(found) = self.find_leaf(bits, hash) {
            return Ok(found);
        }
        self.make_room(false, &[])?;
        let index = match self.leaf_table.free_head {
            NO_FREE => {
                let index = self.leaves.len() as u32;
                self.leaves.push(bits);
                index
            }
            head => {
                self.leaf_table.free_head = self.leaves[head as usize] as u32;
                self.leaf_table.free_count -= 1;
                self.leaves[head as usize] = bits;
                head
            }
        };
        self.insert_slot(false, hash, index);
        self.created += 1;
        Ok(Handle::leaf(index))
    }

    /// The canonical inner quad with these children (nw, ne, sw, se).
    pub fn join(&mut self, kids: [Handle; 4]) -> Result<Handle, BudgetExceeded> {
        let hash = self.hash_kids(kids);
        if let Some(found) = self.find_node(kids, hash) {
            return Ok(found);
        }
        self.make_room(true, &kids)?;
        let node = Node {
            kids,
            result: Handle::NONE,
        };
        let index = match self.node_table.free_head {
            NO_FREE => {
                let index = self.nodes.len() as u32;
                self.nodes.push(node);
                index
            }
            head => {
                self.node_table.free_head = self.nodes[head as usize].kids[0].0;
                self.node_table.free_count -= 1;
                self.nodes[head as usize] = node;
                head
            }
        };
        self.insert_slot(true, hash, index);
        self.created += 1;
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
    fn find_node(&self, kids: [Handle; 4], hash: usize) -> Option<Handle> {
        let mask = self.node_table.mask();
        let mut at = hash & mask;
        loop {
            let slot = self.node_table.slots[at];
            if slot == EMPTY_SLOT {
                return None;
            }
            if self.nodes[slot as usize].kids == kids {
                return Some(Handle::inner(slot));
            }
            at = (at + 1) & mask;
        }
    }

    #[inline]
    fn find_leaf(&self, bits: u64, hash: usize) -> Option<Handle> {
        let mask = self.leaf_table.mask();
        let mut at = hash & mask;
        loop {
            let slot = self.leaf_table.slots[at];
            if slot == EMPTY_SLOT {
                return None;
            }
            if self.leaves[slot as usize] == bits {
                return Some(Handle::leaf(slot));
            }
            at = (at + 1) & mask;
        }
    }

    fn insert_slot(&mut self, inner: bool, hash: usize, index: u32) {
        let table = if inner {
            &mut self.node_table
        } else {
            &mut self.leaf_table
        };
        let mask = table.mask();
        let mut at = hash & mask;
        while table.slots[at] != EMPTY_SLOT {
            at = (at + 1) & mask;
        }
        table.slots[at] = index;
    }

    /// Ensures one more quad of the given arena fits: a free slot and table
    /// room, grown within the budget, or made by collecting. `protect` are
    /// extra roots (the children about to be joined).
    fn make_room(&mut self, inner: bool, protect: &[Handle]) -> Result<(), BudgetExceeded> {
        if self.has_room(inner) || self.grow(inner) {
            return Ok(());
        }
        if !self.collect_allowed {
            return Err(self.exceeded());
        }
        self.collect(protect);
        // Collecting again after a handful of new quads would thrash: demand
        // that a useful share of the arena came free, or that it can grow
        // into what the collection released.
        let (free, capacity) = if inner {
            (self.node_table.free_count, self.nodes.capacity())
        } else {
            (self.leaf_table.free_count, self.leaves.capacity())
        };
        let table_room = if inner {
            self.node_table.has_room(self.count(true))
        } else {
            self.leaf_table.has_room(self.count(false))
        };
        if (free > 0 && free >= capacity / 16 && table_room) || self.grow(inner) {
            return Ok(());
        }
        Err(self.exceeded())
    }

    /// A free slot (or spare capacity) and room in the table.
    fn has_room(&self, inner: bool) -> bool {
        let count = self.count(inner);
        if inner {
            (self.node_table.free_head != NO_FREE || self.nodes.len() < self.nodes.capacity())
                && self.node_table.has_room(count)
        } else {
            (self.leaf_table.free_head != NO_FREE || self.leaves.len() < self.leaves.capacity())
                && self.leaf_table.has_room(count)
        }
    }

    fn exceeded(&self) -> BudgetExceeded {
        // What is allocated after the last collection: the live quads.
        let live = self.count(true) as u64 * NODE_BYTES
            + self.count(false) as u64 * LEAF_BYTES
            + self.tables_and_maps();
        BudgetExceeded {
            budget: self.budget,
            in_use: live,
        }
    }

    /// Grows one arena's table (doubling it) and the arena itself (at most
    /// doubling it) as far as the budget allows, until one more quad fits.
    /// Returns false when that is not possible.
    fn grow(&mut self, inner: bool) -> bool {
        let count = self.count(inner);
        let table = if inner {
            &self.node_table
        } else {
            &self.leaf_table
        };
        if !table.has_room(count) {
            let new_len = table.slots.len() * 2;
            let extra = ((new_len - table.slots.len()) as u64) * SLOT_BYTES;
            let reserved = self.bytes_reserved(self.nodes.capacity(), self.leaves.capacity());
            if reserved + extra > self.budget {
                return false;
            }
            self.rebuild_table(inner, new_len, None);
        }
        let (len, capacity, free_head) = if inner {
            (
                self.nodes.len(),
                self.nodes.capacity(),
                self.node_table.free_head,
            )
        } else {
            (
                self.leaves.len(),
                self.leaves.capacity(),
                self.leaf_table.free_head,
            )
        };
        if free_head != NO_FREE || len < capacity {
            return true;
        }
        let limit = Handle::MAX_INDEX as usize;
        let want = (capacity * 2).max(MIN_CAPACITY).min(limit);
        let fits = |store: &Store, new: usize| {
            let bytes = if inner {
                store.bytes_reserved(new, store.leaves.capacity())
            } else {
                store.bytes_reserved(store.nodes.capacity(), new)
            };
            bytes <= store.budget
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
        if inner {
            self.nodes.reserve_exact(new_capacity - len);
        } else {
            self.leaves.reserve_exact(new_capacity - len);
        }
        true
    }

    /// Refills a table with every allocated quad of its arena (or only the
    /// marked ones).
    fn rebuild_table(&mut self, inner: bool, len: usize, marks: Option<&[u64]>) {
        let mut slots = if inner {
            std::mem::take(&mut self.node_table.slots)
        } else {
            std::mem::take(&mut self.leaf_table.slots)
        };
        slots.clear();
        slots.resize(len, EMPTY_SLOT);
        let mask = len - 1;
        let count = if inner {
            self.nodes.len()
        } else {
            self.leaves.len()
        };
        let free = if inner {
            self.node_table.free_head
        } else {
            self.leaf_table.free_head
        };
        // Without marks every allocated quad is kept, except the free ones.
        let mut on_free_list = Vec::new();
        if marks.is_none() && free != NO_FREE {
            on_free_list = vec![false; count];
            let mut at = free;
            while at != NO_FREE {
                on_free_list[at as usize] = true;
                at = if inner {
                    self.nodes[at as usize].kids[0].0
                } else {
                    self.leaves[at as usize] as u32
                };
            }
        }
        for index in 0..count {
            let keep = match marks {
                Some(marks) => marks[index / 64] >> (index % 64) & 1 == 1,
                None => on_free_list.get(index) != Some(&true),
            };
            if !keep {
                continue;
            }
            let hash = if inner {
                self.hash_kids(self.nodes[index].kids)
            } else {
                self.hasher.hash_one(self.leaves[index]) as usize
            };
            let mut at = hash & mask;
            while slots[at] != EMPTY_SLOT {
                at = (at + 1) & mask;
            }
            slots[at] = index as u32;
        }
        if inner {
            self.node_table.slots = slots;
        } else {
            self.leaf_table.slots = slots;
        }
    }

    /// Bit sets of the inner quads and leaves reachable from `roots`.
    fn mark(&self, roots: &[Handle]) -> (Vec<u64>, Vec<u64>) {
        let mut node_marks = vec![0u64; self.nodes.len().div_ceil(64)];
        let mut leaf_marks = vec![0u64; self.leaves.len().div_ceil(64)];
        let mut stack: Vec<Handle> = roots
            .iter()
            .copied()
            .filter(|&root| root != Handle::NONE)
            .collect();
        while let Some(handle) = stack.pop() {
            let index = handle.index();
            let marks = if handle.is_leaf() {
                &mut leaf_marks
            } else {
                &mut node_marks
            };
            if marks[index / 64] >> (index % 64) & 1 == 1 {
                continue;
            }
            marks[index / 64] |= 1 << (index % 64);
            if !handle.is_leaf() {
                stack.extend_from_slice(&self.nodes[index].kids);
            }
        }
        (node_marks, leaf_marks)
    }

    /// How many distinct quads (inner, leaves) are reachable from `root`.
    pub fn reachable(&self, root: Handle) -> (u64, u64) {
        let (nodes, leaves) = self.mark(&[root]);
        let count = |marks: &[u64]| marks.iter().map(|word| word.count_ones() as u64).sum();
        (count(&nodes), count(&leaves))
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
        let (node_marks, leaf_marks) = self.mark(&roots);
        // Unmarked quads at the end of an arena go back to the allocator, so
        // the other arena can grow into the budget they held.
        release_tail(&mut self.nodes, &node_marks);
        release_tail(&mut self.leaves, &leaf_marks);
        let marked = |handle: Handle| {
            let index = handle.index();
            let marks = if handle.is_leaf() {
                &leaf_marks
            } else {
                &node_marks
            };
            index / 64 < marks.len() && marks[index / 64] >> (index % 64) & 1 == 1
        };

        // Sweep inner quads: thread the unmarked onto the free list, forget
        // results that point at quads about to be reused.
        let mut free_head = NO_FREE;
        let mut free_count = 0;
        for index in (0..self.nodes.len()).rev() {
            if node_marks[index / 64] >> (index % 64) & 1 == 1 {
                let result = self.nodes[index].result;
                if result != Handle::NONE && !marked(result) {
                    self.nodes[index].result = Handle::NONE;
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
        self.node_table.free_head = free_head;
        self.node_table.free_count = free_count;

        let mut free_head = NO_FREE;
        let mut free_count = 0;
        for index in (0..self.leaves.len()).rev() {
            if leaf_marks[index / 64] >> (index % 64) & 1 == 0 {
                self.leaves[index] = free_head as u64;
                free_head = index as u32;
                free_count += 1;
            }
        }
        self.leaf_table.free_head = free_head;
        self.leaf_table.free_count = free_count;

        self.residual
            .retain(|&key, &mut value| marked(key) && marked(value));
        self.ids.retain(|&key, _| marked(key));

        // Tables shrink with what is left, down to half full at most.
        let node_len = self
            .node_table
            .slots
            .len()
            .min(Table::len_for(2 * self.count(true)));
        let leaf_len = self
            .leaf_table
            .slots
            .len()
            .min(Table::len_for(2 * self.count(false)));
        self.rebuild_table(true, node_len, Some(&node_marks));
        self.rebuild_table(false, leaf_len, Some(&leaf_marks));
        self.collections += 1;
    }
}

/// Drops the unmarked quads at the end of an arena and, when that frees an
/// eighth of it or more, gives the memory back.
fn release_tail<T>(arena: &mut Vec<T>, marks: &[u64]) {
    let mut keep = arena.len();
    while keep > 0 && marks[(keep - 1) / 64] >> ((keep - 1) % 64) & 1 == 0 {
        keep -= 1;
    }
    arena.truncate(keep);
    if arena.capacity() - keep >= arena.capacity() / 8 {
        arena.shrink_to(keep.max(MIN_CAPACITY));
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
