//! The quad store: an arena of canonical (hash-consed) quads addressed by
//! `u32` handles, under a memory budget, with a collector that keeps the
//! working set.
//!
//! One arena holds both kinds of quad in 20-byte slots: inner quads (four
//! child handles and a memoised result) and leaves (8×8 cells in a `u64`,
//! level 3, marked by a child slot no inner quad can have). A handle's top bit
//! says which kind it names, so the recursion never reads a slot to know. One
//! arena, not one per kind, so that the budget freed by one kind can be used
//! by the other.
//!
//! The table that makes quads canonical is made of 64-byte buckets (one
//! cache line each) of twelve slot indices and a one-byte hash tag per
//! index: a probe compares tags and reads the arena only where a tag
//! matches, so a lookup costs about one cache miss in the table and, when it
//! finds the quad, one in the arena; a lookup that misses hands back the
//! bucket where the insert goes. Buckets fill left to right and are only
//! emptied by a rebuild, so the first bucket with room ends a probe.
//!
//! The collector never moves a quad. It marks what is reachable from the
//! roots (pinned states, the empty quads, and the scratch stack that the
//! recursion keeps its intermediate handles on) and from the quads used most
//! recently with their memoised results, up to about half the arena, so the
//! advance in progress keeps its working memo; it threads the rest onto a
//! free list and rebuilds the table. Recency is an epoch stamp in four bits
//! of each inner quad that its handles do not need (see `Node`), written
//! when the quad is made and when its result is set or used.

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
    /// Slot indices stay below this (the top index, all ones, means none).
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

pub use crate::LEAF_LEVEL;

const INDEX_BITS: u32 = !Handle::LEAF_BIT;

/// A slot of the arena.
///
/// An inner quad: its children (nw, ne, sw, se) and the memoised result of
/// advancing it by its full stride (2^(level-2) generations). The four
/// children are of one kind, and so is the result (a leaf exactly when the
/// children are), so only the first child keeps its kind bit: the kind bits
/// of the other three and of the result hold the quad's epoch stamp (bit 0
/// in `raw[1]` up to bit 3 in `result`). A leaf: its cells in `raw[0]` (low
/// half) and `raw[1]` (high half), `raw[2]` all ones (an inner quad's third
/// child never is: its index stays below `MAX_INDEX`). A free slot: the
/// next free index in `raw[0]`, and the leaf mark.
#[derive(Clone, Copy, Debug)]
#[repr(C)]
pub(crate) struct Node {
    raw: [u32; 4],
    result: u32,
}

impl Node {
    fn of_leaf(bits: u64) -> Node {
        Node {
            raw: [bits as u32, (bits >> 32) as u32, u32::MAX, 0],
            result: u32::MAX,
        }
    }

    fn of_kids(kids: [Handle; 4], epoch: u8) -> Node {
        let mut node = Node {
            raw: [
                kids[0].0,
                kids[1].0 & INDEX_BITS,
                kids[2].0 & INDEX_BITS,
                kids[3].0 & INDEX_BITS,
            ],
            result: INDEX_BITS,
        };
        node.stamp(epoch);
        node
    }

    fn free(next: u32) -> Node {
        Node {
            raw: [next, 0, u32::MAX, 0],
            result: u32::MAX,
        }
    }

    #[inline]
    fn is_leaf(&self) -> bool {
        self.raw[2] == u32::MAX
    }

    #[inline]
    fn bits(&self) -> u64 {
        self.raw[0] as u64 | (self.raw[1] as u64) << 32
    }

    /// The children of an inner quad, with their kind bits put back.
    #[inline]
    fn kids(&self) -> [Handle; 4] {
        let kind = self.raw[0] & Handle::LEAF_BIT;
        [
            Handle(self.raw[0]),
            Handle(self.raw[1] & INDEX_BITS | kind),
            Handle(self.raw[2] & INDEX_BITS | kind),
            Handle(self.raw[3] & INDEX_BITS | kind),
        ]
    }

    /// Whether this slot is the inner quad with these children (a leaf's
    /// third child, all ones, never matches a real child).
    #[inline]
    fn has_kids(&self, kids: [Handle; 4]) -> bool {
        self.raw[0] == kids[0].0
            && (self.raw[1] ^ kids[1].0) & INDEX_BITS == 0
            && (self.raw[2] ^ kids[2].0) & INDEX_BITS == 0
            && (self.raw[3] ^ kids[3].0) & INDEX_BITS == 0
            && !self.is_leaf()
    }

    #[inline]
    fn result(&self) -> Handle {
        let index = self.result & INDEX_BITS;
        if index == INDEX_BITS {
            Handle::NONE
        } else {
            Handle(index | self.raw[0] & Handle::LEAF_BIT)
        }
    }

    #[inline]
    fn set_result(&mut self, result: Handle) {
        self.result = self.result & Handle::LEAF_BIT | result.0 & INDEX_BITS;
    }

    #[inline]
    fn epoch(&self) -> u8 {
        (self.raw[1] >> 31
            | self.raw[2] >> 31 << 1
            | self.raw[3] >> 31 << 2
            | self.result >> 31 << 3) as u8
    }

    #[inline]
    fn stamp(&mut self, epoch: u8) {
        let bit = |at: u32| (epoch as u32 >> at & 1) << 31;
        self.raw[1] = self.raw[1] & INDEX_BITS | bit(0);
        self.raw[2] = self.raw[2] & INDEX_BITS | bit(1);
        self.raw[3] = self.raw[3] & INDEX_BITS | bit(2);
        self.result = self.result & INDEX_BITS | bit(3);
    }
}

/// Slots in a bucket of the table.
const BUCKET_SLOTS: usize = 12;

/// A cache line of the table: the tags of up to twelve quads (one byte of
/// each one's hash), how many are filled (`tags[15]`), and their indices.
#[derive(Clone, Copy)]
#[repr(C, align(64))]
struct Bucket {
    tags: [u8; 16],
    slots: [u32; BUCKET_SLOTS],
}

const EMPTY_BUCKET: Bucket = Bucket {
    tags: [0; 16],
    slots: [0; BUCKET_SLOTS],
};

impl Bucket {
    #[inline]
    fn len(&self) -> usize {
        self.tags[15] as usize
    }

    /// The filled slots whose tag is `tag`, as a set of bits (bit 8·i + 7
    /// for slot i), found with word arithmetic on all sixteen bytes at once.
    #[inline]
    fn matching(&self, tag: u8) -> u128 {
        const LOW: u128 = u128::from_le_bytes([0x01; 16]);
        const SEVEN: u128 = u128::from_le_bytes([0x7f; 16]);
        let differ = u128::from_le_bytes(self.tags) ^ (LOW * tag as u128);
        // High bit of each byte set exactly where `differ` has a zero byte.
        let zero = !(((differ & SEVEN) + SEVEN) | differ | SEVEN);
        zero & ((1u128 << (8 * self.len())) - 1)
    }

    #[inline]
    fn push(&mut self, tag: u8, index: u32) {
        let at = self.len();
        debug_assert!(at < BUCKET_SLOTS);
        self.tags[at] = tag;
        self.slots[at] = index;
        self.tags[15] += 1;
    }
}

const NO_FREE: u32 = u32::MAX;
const NODE_BYTES: u64 = std::mem::size_of::<Node>() as u64;
const BUCKET_BYTES: u64 = std::mem::size_of::<Bucket>() as u64;
/// Smallest arena growth step, in quads.
const MIN_CAPACITY: usize = 1 << 10;
/// Smallest table, in buckets.
const MIN_BUCKETS: usize = 1 << 6;
/// Epoch stamps run from 0 (old) to this (new); a collection brings the
/// newest back to `EPOCH_AFTER_COLLECTION`, older ones with it.
const EPOCH_MAX: u8 = 15;
const EPOCH_AFTER_COLLECTION: u8 = 7;
/// Bytes of one entry of the residual memo map: key, value and the control
/// byte, at the map's highest load (7/8).
const RESIDUAL_ENTRY: u64 = (2 * 4 + 1) * 8 / 7 + 1;

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
    /// collections of the arena run so far
    pub collections: u64,
    /// times the residual memo was dropped whole for want of budget to
    /// grow it (a sign of a budget near the live state, apart from
    /// collections, which it costs far less than)
    pub memo_resets: u64,
    /// bytes in use by the arena's filled slots, the table and the memo maps
    pub bytes: u64,
    /// the memory budget in bytes
    pub budget: u64,
}

/// The buckets of a table that holds `count` quads at a load of 2/3; it
/// grows again when the load passes 9/10, so the table costs 5.9 to 8
/// bytes per quad.
fn buckets_for(count: usize) -> usize {
    count.div_ceil(8).max(MIN_BUCKETS)
}

/// Whether `count` quads fit `buckets` buckets under the highest load.
fn fits_buckets(count: usize, buckets: usize) -> bool {
    count * 10 <= buckets * BUCKET_SLOTS * 9
}

/// The home bucket of a hash in a table of `len` buckets (any length: the
/// hash is scaled into range, not masked, so its high bits choose).
#[inline]
fn home(hash: u64, len: usize) -> usize {
    ((hash as u128 * len as u128) >> 64) as usize
}

/// The tag of a hash: its low byte (the home bucket comes from its high bits).
#[inline]
fn tag_of(hash: u64) -> u8 {
    hash as u8
}

/// Where a probe of the table ended.
enum Probe {
    /// the quad is at this arena index
    Found(u32),
    /// it is not there; this bucket (by index) has room for it
    Vacant(usize),
}

/// The arena of quads, its canonicalising table and its memory budget.
pub struct Store {
    nodes: Vec<Node>,
    table: Vec<Bucket>,
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
    /// Bytes held outside the store that count against its budget for a
    /// while (a pattern whose quads are being made).
    held_outside: u64,
    /// When true, every allocation collects first (tests: any handle the
    /// recursion forgot to protect is freed at once).
    stress: bool,
    /// The epoch quads are stamped with now, and how many more quads are
    /// made before it moves on.
    epoch: u8,
    epoch_left: usize,
    created: u64,
    collections: u64,
    memo_resets: u64,
}

impl Store {
    /// An empty store that will keep its arena, table and memo maps within
    /// `budget` bytes.
    pub fn new(budget: u64) -> Store {
        Store {
            nodes: Vec::new(),
            table: vec![EMPTY_BUCKET; MIN_BUCKETS],
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
            held_outside: 0,
            stress: false,
            epoch: EPOCH_AFTER_COLLECTION,
            epoch_left: MIN_CAPACITY,
            created: 0,
            collections: 0,
            memo_resets: 0,
        }
    }

    /// Counters and the memory in use.
    pub fn stats(&self) -> StoreStats {
        StoreStats {
            quads: self.count() as u64,
            leaves: self.leaf_count as u64,
            created: self.created,
            collections: self.collections,
            memo_resets: self.memo_resets,
            bytes: self.bytes_in_use(),
            budget: self.budget,
        }
    }

    /// How often the budget took work away: collections, and resets of
    /// the residual memo (an advance that keeps losing either thrashes).
    pub(crate) fn losses(&self) -> u64 {
        self.collections + self.memo_resets
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
    /// table of `buckets` or of what a full arena needs, if more.
    fn bytes_reserved(&self, capacity: usize, buckets: usize) -> u64 {
        capacity as u64 * NODE_BYTES
            + self
                .table_bytes_reserved(capacity)
                .max(buckets as u64 * BUCKET_BYTES)
            + self.maps()
            + self.held_outside
    }

    /// Bytes of the table a full arena of `capacity` needs (highest load).
    fn table_bytes_reserved(&self, capacity: usize) -> u64 {
        (capacity * 10).div_ceil(BUCKET_SLOTS * 9) as u64 * BUCKET_BYTES
    }

    fn table_and_maps(&self) -> u64 {
        self.table.len() as u64 * BUCKET_BYTES + self.maps()
    }

    fn maps(&self) -> u64 {
        let id_entry = 4 + 16 + 1;
        let by_id_entry = 16 + 8 + 1;
        self.residual.capacity() as u64 * RESIDUAL_ENTRY
            + self.ids.capacity() as u64 * id_entry
            + self.by_id.capacity() as u64 * by_id_entry
    }

    /// Counts `bytes` held outside the store against its budget, until set
    /// back to 0.
    pub(crate) fn set_held_outside(&mut self, bytes: u64) {
        self.held_outside = bytes;
    }

    /// Allows or forbids collection when the budget is reached.
    pub(crate) fn set_collect_allowed(&mut self, allowed: bool) {
        self.collect_allowed = allowed;
    }

    /// Makes every allocation collect first, keeping only the roots (a test
    /// mode: a handle the recursion holds unprotected is freed at once).
    pub(crate) fn set_stress(&mut self, stress: bool) {
        self.stress = stress;
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
        self.nodes[handle.index()].kids()
    }

    /// The cells of a leaf: bit `y * 8 + x` is the cell at column x, row y.
    #[inline]
    pub fn leaf_bits(&self, handle: Handle) -> u64 {
        debug_assert!(handle.is_leaf());
        self.nodes[handle.index()].bits()
    }

    /// The memoised full-stride result of an inner quad (NONE if unset);
    /// a result found counts as a use of the quad.
    #[inline]
    pub(crate) fn result(&mut self, handle: Handle) -> Handle {
        let epoch = self.epoch;
        let node = &mut self.nodes[handle.index()];
        let result = node.result();
        if result != Handle::NONE {
            node.stamp(epoch);
        }
        result
    }

    #[inline]
    pub(crate) fn set_result(&mut self, handle: Handle, result: Handle) {
        let epoch = self.epoch;
        let node = &mut self.nodes[handle.index()];
        node.set_result(result);
        node.stamp(epoch);
    }

    /// Forgets every memoised full-stride result (for tests that must
    /// compute everything again).
    #[cfg(test)]
    pub(crate) fn forget_results(&mut self) {
        for node in self.nodes.iter_mut().filter(|node| !node.is_leaf()) {
            node.set_result(Handle::NONE);
        }
    }

    /// Marks an inner quad as used now (its residual result was found).
    #[inline]
    pub(crate) fn touch(&mut self, handle: Handle) {
        debug_assert!(!handle.is_leaf());
        let epoch = self.epoch;
        self.nodes[handle.index()].stamp(epoch);
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
        let hash = self.hasher.hash_one(bits);
        let vacant = match self.probe(hash, |node| node.is_leaf() && node.bits() == bits) {
            Probe::Found(index) => return Ok(Handle::leaf(index)),
            Probe::Vacant(bucket) => bucket,
        };
        let bucket = self.room_for(hash, vacant, &[], |node| {
            node.is_leaf() && node.bits() == bits
        })?;
        let index = self.insert(hash, bucket, Node::of_leaf(bits));
        self.leaf_count += 1;
        Ok(Handle::leaf(index))
    }

    /// The canonical inner quad with these children (nw, ne, sw, se).
    #[inline]
    pub fn join(&mut self, kids: [Handle; 4]) -> Result<Handle, BudgetExceeded> {
        let hash = self.hash_kids(kids);
        let vacant = match self.probe(hash, |node| node.has_kids(kids)) {
            Probe::Found(index) => return Ok(Handle::inner(index)),
            Probe::Vacant(bucket) => bucket,
        };
        let bucket = self.room_for(hash, vacant, &kids, |node| node.has_kids(kids))?;
        let index = self.insert(hash, bucket, Node::of_kids(kids, self.epoch));
        Ok(Handle::inner(index))
    }

    #[inline]
    fn hash_kids(&self, kids: [Handle; 4]) -> u64 {
        let packed = kids[0].0 as u128
            | (kids[1].0 as u128) << 32
            | (kids[2].0 as u128) << 64
            | (kids[3].0 as u128) << 96;
        self.hasher.hash_one(packed)
    }

    fn hash_of(&self, node: &Node) -> u64 {
        if node.is_leaf() {
            self.hasher.hash_one(node.bits())
        } else {
            self.hash_kids(node.kids())
        }
    }

    /// Looks for the quad the table holds under `hash` that satisfies
    /// `matches`; reads the arena only where a tag matches.
    #[inline]
    fn probe(&self, hash: u64, matches: impl Fn(&Node) -> bool) -> Probe {
        let tag = tag_of(hash);
        let len = self.table.len();
        let mut at = home(hash, len);
        loop {
            let bucket = &self.table[at];
            let mut candidates = bucket.matching(tag);
            while candidates != 0 {
                let slot = (candidates.trailing_zeros() / 8) as usize;
                let index = bucket.slots[slot];
                if matches(&self.nodes[index as usize]) {
                    return Probe::Found(index);
                }
                candidates &= candidates - 1;
            }
            if bucket.len() < BUCKET_SLOTS {
                return Probe::Vacant(at);
            }
            at += 1;
            if at == len {
                at = 0;
            }
        }
    }

    /// Makes room for one more quad, whose probe ended at bucket `vacant`;
    /// returns the bucket it goes in (probed again only when the table was
    /// rebuilt meanwhile).
    #[inline]
    fn room_for(
        &mut self,
        hash: u64,
        vacant: usize,
        protect: &[Handle],
        matches: impl Fn(&Node) -> bool,
    ) -> Result<usize, BudgetExceeded> {
        if !self.stress && self.has_room() {
            return Ok(vacant);
        }
        self.make_room(protect)?;
        match self.probe(hash, matches) {
            Probe::Vacant(bucket) => Ok(bucket),
            Probe::Found(_) => unreachable!("a quad the table lacked appeared in it"),
        }
    }

    /// Puts `node` in a free slot (room was made) and in `bucket`.
    fn insert(&mut self, hash: u64, bucket: usize, node: Node) -> u32 {
        let index = match self.free_head {
            NO_FREE => {
                self.nodes.push(node);
                (self.nodes.len() - 1) as u32
            }
            head => {
                self.free_head = self.nodes[head as usize].raw[0];
                self.free_count -= 1;
                self.nodes[head as usize] = node;
                head
            }
        };
        self.table[bucket].push(tag_of(hash), index);
        self.created += 1;
        self.epoch_left -= 1;
        if self.epoch_left == 0 {
            self.next_epoch();
        }
        index
    }

    /// Moves the epoch on: it passes through about eight values while the
    /// arena fills what room it has, then stays at the newest.
    fn next_epoch(&mut self) {
        self.epoch = (self.epoch + 1).min(EPOCH_MAX);
        self.epoch_left = self.epoch_length();
    }

    /// How many quads are made in one epoch: an eighth of the arena's room.
    fn epoch_length(&self) -> usize {
        ((self.nodes.capacity() - self.count()) / 8).max(MIN_CAPACITY / 4)
    }

    /// Brings the epochs back so the newest is `EPOCH_AFTER_COLLECTION`
    /// (older stamps move with it, the oldest stay at 0), when the arena has
    /// new room to fill: after it grows.
    fn renumber_epochs(&mut self) {
        let shift = self.epoch.saturating_sub(EPOCH_AFTER_COLLECTION);
        if shift > 0 {
            for node in self.nodes.iter_mut().filter(|node| !node.is_leaf()) {
                let epoch = node.epoch();
                node.stamp(epoch.saturating_sub(shift));
            }
            self.epoch -= shift;
        }
        self.epoch_left = self.epoch_length();
    }

    /// Ensures one more quad fits: a free slot and table room, grown within
    /// the budget, or made by collecting. `protect` are extra roots (the
    /// children about to be joined).
    fn make_room(&mut self, protect: &[Handle]) -> Result<(), BudgetExceeded> {
        if self.stress && self.collect_allowed {
            self.collect_keeping(protect, false);
            if self.has_room() || self.grow() {
                return Ok(());
            }
        }
        if self.has_room() || self.grow() {
            return Ok(());
        }
        if !self.collect_allowed {
            return Err(self.exceeded(false));
        }
        // First keep the working set; if that leaves too little room, keep
        // only what must stay. Collecting again after a handful of new quads
        // would thrash: demand that a useful share of the arena came free,
        // or that it can grow into what the collection released.
        for keep_recent in [true, false] {
            self.collect_keeping(protect, keep_recent);
            let useful = self.free_count > 0 && self.free_count >= self.nodes.capacity() / 16;
            if (useful && self.table_has_room()) || self.grow() {
                return Ok(());
            }
        }
        Err(self.exceeded(false))
    }

    fn table_has_room(&self) -> bool {
        fits_buckets(self.count() + 1, self.table.len())
    }

    /// A free slot (or spare capacity) and room in the table.
    #[inline]
    fn has_room(&self) -> bool {
        (self.free_head != NO_FREE || self.nodes.len() < self.nodes.capacity())
            && self.table_has_room()
    }

    /// The error for a budget the live quads fill (or, `thrashing`, that
    /// collections keep the advance from getting any further in).
    pub(crate) fn exceeded(&self, thrashing: bool) -> BudgetExceeded {
        // What is allocated after the last collection: the live quads.
        BudgetExceeded {
            budget: self.budget,
            in_use: self.count() as u64 * NODE_BYTES + self.table_and_maps() + self.held_outside,
            thrashing,
        }
    }

    /// Grows the table and the arena (at most doubling it) as far as the
    /// budget allows, until one more quad fits. Returns false when that is
    /// not possible.
    fn grow(&mut self) -> bool {
        if !self.table_has_room() {
            // At a load of 2/3 if the budget allows, else as large as it
            // allows (the budget always leaves room for the table of a full
            // arena).
            let count = self.count() + 1;
            let capacity = self.nodes.capacity();
            let spare = self.budget.saturating_sub(
                self.bytes_reserved(capacity, 0) - self.table_bytes_reserved(capacity),
            );
            let affordable = (spare / BUCKET_BYTES) as usize;
            let new_len = buckets_for(count).min(affordable);
            if !fits_buckets(count + 1, new_len) {
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
        self.renumber_epochs();
        true
    }

    /// Refills the table, at `len` buckets, with every allocated quad (or
    /// only the marked ones).
    fn rebuild_table(&mut self, len: usize, marks: Option<&[u64]>) {
        let mut table = std::mem::take(&mut self.table);
        table.clear();
        table.resize(len, EMPTY_BUCKET);
        // Without marks every allocated quad is kept, except the free ones.
        let mut on_free_list = Vec::new();
        if marks.is_none() && self.free_head != NO_FREE {
            on_free_list = vec![false; self.nodes.len()];
            let mut at = self.free_head;
            while at != NO_FREE {
                on_free_list[at as usize] = true;
                at = self.nodes[at as usize].raw[0];
            }
        }
        // Hashes are computed a batch ahead of their inserts and their
        // buckets prefetched, so the batch's cache misses overlap.
        const BATCH: usize = 16;
        let mut batch = [(0u64, 0u32); BATCH];
        let mut filled = 0;
        let insert = |table: &mut [Bucket], batch: &[(u64, u32)]| {
            for &(hash, index) in batch {
                let mut at = home(hash, len);
                while table[at].len() == BUCKET_SLOTS {
                    at += 1;
                    if at == len {
                        at = 0;
                    }
                }
                table[at].push(tag_of(hash), index);
            }
        };
        for (index, node) in self.nodes.iter().enumerate() {
            let keep = match marks {
                Some(marks) => marks[index / 64] >> (index % 64) & 1 == 1,
                None => on_free_list.get(index) != Some(&true),
            };
            if !keep {
                continue;
            }
            let hash = self.hash_of(node);
            prefetch(&table[home(hash, len)]);
            batch[filled] = (hash, index as u32);
            filled += 1;
            if filled == BATCH {
                insert(&mut table, &batch);
                filled = 0;
            }
        }
        insert(&mut table, &batch[..filled]);
        self.table = table;
    }

    /// A bit set of the quads reachable from `roots`.
    fn mark(&self, roots: &[Handle]) -> Vec<u64> {
        let mut marks = vec![0u64; self.nodes.len().div_ceil(64)];
        self.mark_into(&mut marks, &mut roots.to_vec());
        marks
    }

    /// Adds to `marks` the quads reachable from `stack` (children only),
    /// emptying it.
    fn mark_into(&self, marks: &mut [u64], stack: &mut Vec<Handle>) {
        while let Some(handle) = stack.pop() {
            if handle == Handle::NONE {
                continue;
            }
            let index = handle.index();
            if marks[index / 64] >> (index % 64) & 1 == 1 {
                continue;
            }
            marks[index / 64] |= 1 << (index % 64);
            let node = &self.nodes[index];
            if !node.is_leaf() {
                stack.extend_from_slice(&node.kids());
            }
        }
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

    /// The collector. With `keep_recent`, the most recently stamped inner
    /// quads (up to about half the arena's capacity, roots included), their
    /// results and what lies under both stay too: the working memo of the
    /// advance in progress. Results that pointed at freed quads are
    /// forgotten; the memo maps keep only live entries.
    /// A collection now, keeping only what is pinned (tests of the
    /// pinning rules above the store).
    #[cfg(test)]
    pub(crate) fn collect_now(&mut self) {
        self.collect_keeping(&[], false);
    }

    fn collect_keeping(&mut self, protect: &[Handle], keep_recent: bool) {
        let roots: Vec<Handle> = self
            .pinned
            .iter()
            .chain(self.empties.iter())
            .chain(self.scratch.iter())
            .chain(protect.iter())
            .copied()
            .collect();
        let mut marks = self.mark(&roots);
        if keep_recent {
            self.mark_recent(&mut marks);
        }
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
        // forget results that point at quads about to be reused; bring the
        // epochs back so the newest kept is EPOCH_AFTER_COLLECTION.
        let shift = self.epoch.saturating_sub(EPOCH_AFTER_COLLECTION);
        let mut free_head = NO_FREE;
        let mut free_count = 0;
        let mut leaf_count = 0;
        for index in (0..self.nodes.len()).rev() {
            if marks[index / 64] >> (index % 64) & 1 == 1 {
                let node = &mut self.nodes[index];
                if node.is_leaf() {
                    leaf_count += 1;
                } else {
                    let result = node.result();
                    if result != Handle::NONE && !marked(result) {
                        node.set_result(Handle::NONE);
                    }
                    let epoch = node.epoch();
                    node.stamp(epoch.saturating_sub(shift));
                }
            } else {
                self.nodes[index] = Node::free(free_head);
                free_head = index as u32;
                free_count += 1;
            }
        }
        self.free_head = free_head;
        self.free_count = free_count;
        self.leaf_count = leaf_count;
        self.epoch -= shift;
        self.epoch_left = self.epoch_length();

        self.residual
            .retain(|&key, &mut value| marked(key) && marked(value));
        self.ids.retain(|&key, _| marked(key));
        self.by_id.retain(|_, &mut (handle, _)| marked(handle));
        // The maps count against the budget at their capacity: give back
        // what the collection emptied.
        self.residual.shrink_to_fit();
        self.ids.shrink_to_fit();
        self.by_id.shrink_to_fit();

        // The table shrinks with what is left, to a load of 2/3.
        let len = self.table.len().min(buckets_for(self.count()));
        self.rebuild_table(len, Some(&marks));
        self.collections += 1;
    }

    /// Marks the most recently stamped inner quads, their results (full and
    /// residual) and what lies under them, as many as fit the room: of the
    /// share f of the arena the roots leave, f/2 of it (f²/2 of the arena).
    /// Where the roots leave much, half of it keeps the working memo; where
    /// they leave little, keeping memo would make every collection free too
    /// little to be worth its cost (measured on the 2048² soup: at 1/10 of
    /// its unconstrained bytes 4.2 s instead of 5.2 s, at 1/20 7.7 s
    /// instead of 7.5 s).
    fn mark_recent(&self, marks: &mut [u64]) {
        let is_marked = |marks: &[u64], index: usize| marks[index / 64] >> (index % 64) & 1 == 1;
        let mut by_epoch = [0usize; EPOCH_MAX as usize + 1];
        let mut already = 0usize;
        for (index, node) in self.nodes.iter().enumerate() {
            if is_marked(marks, index) {
                already += 1;
            } else if !node.is_leaf() {
                by_epoch[node.epoch() as usize] += 1;
            }
        }
        let capacity = self.nodes.capacity();
        let free = capacity.saturating_sub(already);
        let room = (free as u128 * free as u128 / (2 * capacity.max(1) as u128)) as usize;
        // The oldest epoch such that it and every newer one fit the room;
        // epoch 0 (the oldest stamps) is never kept for recency.
        let mut oldest = EPOCH_MAX + 1;
        let mut total = 0usize;
        while oldest > 1 && total + by_epoch[oldest as usize - 1] <= room {
            oldest -= 1;
            total += by_epoch[oldest as usize];
        }
        if oldest > EPOCH_MAX {
            return;
        }
        // One seed at a time, so the stack stays as deep as the tree.
        let mut stack = Vec::new();
        for (index, node) in self.nodes.iter().enumerate() {
            if !node.is_leaf() && node.epoch() >= oldest && !is_marked(marks, index) {
                stack.push(Handle::inner(index as u32));
                stack.push(node.result());
                self.mark_into(marks, &mut stack);
            }
        }
        for (&key, &value) in &self.residual {
            if !key.is_leaf() && self.nodes[key.index()].epoch() >= oldest {
                stack.push(key);
                stack.push(value);
                self.mark_into(marks, &mut stack);
            }
        }
    }

    /// Memoises the residual result of `quad`. The map grows only while the
    /// budget allows it; past that it starts afresh (it is a memo).
    pub(crate) fn remember_residual(&mut self, quad: Handle, result: Handle) {
        if self.residual.len() == self.residual.capacity() {
            let grown = (self.residual.capacity() * 2).max(4) as u64 * RESIDUAL_ENTRY;
            let reserved = self.bytes_reserved(self.nodes.capacity(), self.table.len());
            if reserved + grown > self.budget {
                // Counted, so that an advance that keeps losing the memo
                // is seen to thrash (`losses`).
                self.residual.clear();
                self.memo_resets += 1;
            }
        }
        self.residual.insert(quad, result);
    }
}

/// Starts loading `value`'s cache line (a hint; nothing on other targets).
#[inline]
fn prefetch<T>(value: &T) {
    #[cfg(target_arch = "x86_64")]
    // SAFETY: prefetching is a hint that never faults, and the pointer comes
    // from a reference.
    unsafe {
        std::arch::x86_64::_mm_prefetch::<{ std::arch::x86_64::_MM_HINT_T0 }>(
            value as *const T as *const i8,
        );
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = value;
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
        store.collect_keeping(&[], false);
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
mod working_set {
    use super::*;

    #[test]
    fn a_collection_keeps_the_recently_used_quads_and_their_results() {
        // A store whose arena holds a few thousand quads: old ones made
        // first, then recent ones, each with a result.
        let mut store = Store::new(1 << 30);
        let e = store.empty(3).unwrap();
        let leaves: Vec<Handle> = (1..300u64).map(|bits| store.leaf(bits).unwrap()).collect();
        let mut made = Vec::new();
        for &a in &leaves {
            for &b in &leaves {
                let quad = store.join([a, b, e, e]).unwrap();
                store.set_result(quad, a);
                made.push((quad, [a, b, e, e]));
            }
        }
        let created = store.stats().created;
        store.collect_keeping(&[], true);
        assert!(store.stats().quads < created, "something was freed");
        // The newest quads are still there with their results: joining
        // their children again creates nothing.
        let &(quad, kids) = made.last().unwrap();
        assert_eq!(store.result(quad), kids[0]);
        let before = store.stats().created;
        assert_eq!(store.join(kids).unwrap(), quad);
        assert_eq!(store.stats().created, before);
        // The oldest were freed.
        let (first, kids) = made[0];
        assert!(!store.nodes[first.index()].has_kids(kids));
        // Using a surviving quad's result keeps it through the next
        // collection, however much is made after it.
        let (kept, kids) = made[made.len() / 2 + made.len() / 4];
        assert!(store.nodes[kept.index()].has_kids(kids));
        assert_ne!(store.result(kept), Handle::NONE);
        let more: Vec<Handle> = (1000..1300u64)
            .map(|bits| store.leaf(bits).unwrap())
            .collect();
        for &a in &more {
            for &b in &more {
                store.join([a, b, e, e]).unwrap();
            }
            store.touch(kept);
        }
        store.collect_keeping(&[], true);
        assert!(store.nodes[kept.index()].has_kids(kids));
        assert_ne!(store.result(kept), Handle::NONE);
    }

    #[test]
    fn the_spare_bits_keep_the_epoch_apart_from_the_handles() {
        let kids = [
            Handle::leaf(5),
            Handle::leaf(6),
            Handle::leaf(7),
            Handle::leaf(8),
        ];
        for epoch in 0..=EPOCH_MAX {
            let mut node = Node::of_kids(kids, epoch);
            assert_eq!(node.epoch(), epoch);
            assert_eq!(node.kids(), kids);
            assert!(node.has_kids(kids) && !node.is_leaf());
            assert_eq!(node.result(), Handle::NONE);
            node.set_result(Handle::leaf(9));
            assert_eq!((node.result(), node.epoch()), (Handle::leaf(9), epoch));
            node.stamp(EPOCH_MAX - epoch);
            assert_eq!((node.result(), node.kids()), (Handle::leaf(9), kids));
        }
        let inner = [
            Handle::inner(1),
            Handle::inner(2),
            Handle::inner(3),
            Handle::inner(4),
        ];
        let node = Node::of_kids(inner, EPOCH_MAX);
        assert_eq!(node.kids(), inner);
        assert!(!node.has_kids(kids));
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

    #[test]
    fn a_memo_reset_is_counted_apart_from_collections() {
        // A budget the residual memo soon fills: it is dropped and counted
        // as a reset, which the thrashing check sees as a loss too.
        let mut store = Store::new(48 * 1024);
        let quads: Vec<Handle> = (0..1_000u64)
            .map(|bits| store.leaf(bits).unwrap())
            .collect();
        let before = store.stats().collections;
        assert_eq!(before, 0, "the leaves fit without a collection");
        for &quad in &quads {
            store.remember_residual(quad, quad);
        }
        let stats = store.stats();
        assert!(stats.memo_resets > 0, "{stats:?}");
        assert_eq!(stats.collections, before);
        assert_eq!(store.losses(), stats.collections + stats.memo_resets);
    }
}
