//! A read-only view of a state's quadtree, walked from the root: the
//! store's own quads (a state in memory), or a stored checkpoint's records
//! fetched on demand (`stored.rs`). Pictures and regions of text are drawn
//! over either, so a snapshot of a stored generation visits, and reads,
//! only the quads it needs.

use std::hash::Hash;

use num_bigint::BigUint;
use num_traits::One;

use crate::figures::{self, Counter};
use crate::pack::ReadError;
use crate::store::{Handle, Store};

/// What the drawing code needs of a quadtree. Levels are known to the
/// caller (the root's, minus the depth), as in the store.
pub(crate) trait QuadView {
    type Node: Copy + Eq + Hash;

    /// The root and its level (at least 4), centred on the origin.
    fn root(&self) -> (Self::Node, u32);

    /// Whether `node` (of `level`) is the empty quad of its level.
    fn is_empty(&self, node: Self::Node, level: u32) -> bool;

    /// The children nw, ne, sw, se of an inner quad of `level`.
    fn kids(&mut self, node: Self::Node, level: u32) -> Result<[Self::Node; 4], ReadError>;

    /// The cells of a leaf (bit `8*y + x`).
    fn leaf_bits(&mut self, node: Self::Node) -> Result<u64, ReadError>;

    /// The live cells of `node` (of `level`).
    fn population(&mut self, node: Self::Node, level: u32) -> Result<BigUint, ReadError>;
}

/// The aligned quad of `level` whose corner is at (x, y) from the root's
/// corner, or None when that lies outside the root.
pub(crate) fn descend<V: QuadView>(
    view: &mut V,
    mut x: BigUint,
    mut y: BigUint,
    level: u32,
) -> Result<Option<V::Node>, ReadError> {
    let (mut quad, mut at) = view.root();
    if x.bits() > at as u64 || y.bits() > at as u64 {
        return Ok(None);
    }
    while at > level {
        let half = BigUint::one() << (at - 1);
        let (east, south) = (x >= half, y >= half);
        if east {
            x -= &half;
        }
        if south {
            y -= &half;
        }
        quad = view.kids(quad, at)?[south as usize * 2 + east as usize];
        at -= 1;
    }
    Ok(Some(quad))
}

/// A state in memory, seen through the view.
pub(crate) struct StoreView<'a> {
    pub(crate) store: &'a Store,
    pub(crate) root: Handle,
    pub(crate) level: u32,
    pub(crate) counter: Counter,
}

impl<'a> StoreView<'a> {
    pub(crate) fn new(store: &'a Store, root: Handle, level: u32) -> StoreView<'a> {
        StoreView {
            store,
            root,
            level,
            counter: Counter::default(),
        }
    }
}

impl QuadView for StoreView<'_> {
    type Node = Handle;

    fn root(&self) -> (Handle, u32) {
        (self.root, self.level)
    }

    fn is_empty(&self, node: Handle, level: u32) -> bool {
        node == self.store.known_empty(level)
    }

    fn kids(&mut self, node: Handle, _level: u32) -> Result<[Handle; 4], ReadError> {
        Ok(self.store.kids(node))
    }

    fn leaf_bits(&mut self, node: Handle) -> Result<u64, ReadError> {
        Ok(self.store.leaf_bits(node))
    }

    fn population(&mut self, node: Handle, level: u32) -> Result<BigUint, ReadError> {
        if level <= 31 {
            Ok(self.counter.population(self.store, node, level))
        } else {
            Ok(figures::population(self.store, node, level))
        }
    }
}
