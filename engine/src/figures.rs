//! The figures of a state: population, the extremes of its live cells (for
//! the bounding box) and content ids.
//!
//! Below a floor level each figure is a memoised recursion in machine words
//! (populations up to level 31, offsets up to level 62). Above it the values
//! are big integers with as many bits as the level, and a state advanced
//! 10^100000 generations has levels by the hundred thousand: there the
//! figures are folded level by level from the bottom, keeping the values of
//! one level at a time, so memory stays linear in the number of levels and
//! no recursion goes deep.

use std::collections::{HashMap, HashSet};

use num_bigint::BigUint;
use num_traits::One;

use crate::content_id::ContentId;
use crate::store::{Handle, Store};

type Map<K, V> = HashMap<K, V, ahash::RandomState>;

/// Folds a value over the distinct quads of the tree under `root` (of
/// `level`): `base` gives the value of a quad at `floor`, `combine` that of
/// a quad of level l from its four children's values.
fn fold_levels<T>(
    store: &Store,
    root: Handle,
    level: u32,
    floor: u32,
    mut base: impl FnMut(Handle, u32) -> T,
    mut combine: impl FnMut([&T; 4], u32) -> T,
) -> T {
    if level <= floor {
        return base(root, level);
    }
    // The distinct quads of each level from the root down to floor + 1.
    let mut levels: Vec<Vec<Handle>> = vec![vec![root]];
    for _ in floor + 1..level {
        let mut seen: HashSet<Handle, ahash::RandomState> = HashSet::default();
        let mut next = Vec::new();
        for &quad in levels.last().expect("the root's level is there") {
            for kid in store.kids(quad) {
                if seen.insert(kid) {
                    next.push(kid);
                }
            }
        }
        levels.push(next);
    }
    // Values of the floor level, then upward one level at a time.
    let mut below: Map<Handle, T> = Map::default();
    for &quad in levels.last().expect("at least the root") {
        for kid in store.kids(quad) {
            below.entry(kid).or_insert_with(|| base(kid, floor));
        }
    }
    for (depth, quads) in levels.iter().enumerate().rev() {
        let at = level - depth as u32;
        let mut here: Map<Handle, T> = Map::default();
        for &quad in quads {
            let kids = store.kids(quad).map(|kid| &below[&kid]);
            let value = combine(kids, at);
            here.insert(quad, value);
        }
        below = here;
    }
    below.remove(&root).expect("the root was folded")
}

/// The number of live cells under `quad` (of `level`).
pub(crate) fn population(store: &Store, quad: Handle, level: u32) -> BigUint {
    let mut counter = Counter::default();
    fold_levels(
        store,
        quad,
        level,
        31,
        |quad, level| BigUint::from(counter.count(store, quad, level)),
        |kids, _| kids.into_iter().sum(),
    )
}

/// Populations in machine words, memoised (4^31 cells fit a `u64`).
#[derive(Default)]
pub(crate) struct Counter {
    memo: Map<Handle, u64>,
    /// populations above level 31, for callers that ask about many quads
    /// of one state (a pack's writer): each distinct quad summed once
    big: Map<Handle, BigUint>,
}

impl Counter {
    /// The population of `quad` (of `level`), memoised up to level 31.
    pub(crate) fn population(&mut self, store: &Store, quad: Handle, level: u32) -> BigUint {
        if level <= 31 {
            return BigUint::from(self.count(store, quad, level));
        }
        if let Some(known) = self.big.get(&quad) {
            return known.clone();
        }
        // Post-order over the quads above level 31 not summed yet, without
        // recursion (levels can be hundreds of thousands deep).
        let mut stack = vec![(quad, level, false)];
        while let Some((at, level, expanded)) = stack.pop() {
            if self.big.contains_key(&at) {
                continue;
            }
            if at == store.known_empty(level) {
                self.big.insert(at, BigUint::default());
                continue;
            }
            let kids = store.kids(at);
            if !expanded {
                stack.push((at, level, true));
                if level - 1 > 31 {
                    for kid in kids {
                        if !self.big.contains_key(&kid) {
                            stack.push((kid, level - 1, false));
                        }
                    }
                }
                continue;
            }
            let mut total = BigUint::default();
            for kid in kids {
                if level - 1 <= 31 {
                    total += self.count(store, kid, level - 1);
                } else {
                    total += &self.big[&kid];
                }
            }
            self.big.insert(at, total);
        }
        self.big[&quad].clone()
    }

    fn count(&mut self, store: &Store, quad: Handle, level: u32) -> u64 {
        if quad.is_leaf() {
            return store.leaf_bits(quad).count_ones() as u64;
        }
        if quad == store.known_empty(level) {
            return 0;
        }
        if let Some(&count) = self.memo.get(&quad) {
            return count;
        }
        let count = store
            .kids(quad)
            .iter()
            .map(|&kid| self.count(store, kid, level - 1))
            .sum();
        self.memo.insert(quad, count);
        count
    }
}

/// Which extreme of the live cells to find.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Side {
    /// 0: columns (x), 1: rows (y)
    pub axis: usize,
    /// the highest instead of the lowest
    pub max: bool,
}

impl Side {
    /// The children nearest this side, the others, and whether the nearest
    /// lie in the higher half.
    fn groups(self) -> ([usize; 2], [usize; 2], bool) {
        let (low, high) = if self.axis == 0 {
            ([0, 2], [1, 3])
        } else {
            ([0, 1], [2, 3])
        };
        if self.max {
            (high, low, true)
        } else {
            (low, high, false)
        }
    }

    fn leaf(self, bits: u64) -> Option<u64> {
        if bits == 0 {
            return None;
        }
        let lines = if self.axis == 0 {
            // columns with a live cell, as the bits of one byte
            let mut columns = bits;
            columns |= columns >> 32;
            columns |= columns >> 16;
            columns |= columns >> 8;
            columns & 0xff
        } else {
            // rows with a live cell
            (0..8).fold(0u64, |rows, row| {
                rows | (((bits >> (8 * row)) & 0xff != 0) as u64) << row
            })
        };
        Some(if self.max {
            63 - lines.leading_zeros() as u64
        } else {
            lines.trailing_zeros() as u64
        })
    }

    /// The better of two offsets for this side.
    fn pick<T: Ord>(self, a: T, b: T) -> T {
        if self.max { a.max(b) } else { a.min(b) }
    }
}

/// The lowest or highest live column or row under `quad` (of `level`), as
/// an offset from its corner; None when it is empty.
pub(crate) fn extreme(store: &Store, quad: Handle, level: u32, side: Side) -> Option<BigUint> {
    let mut small = Extremes {
        side,
        memo: Map::default(),
    };
    let (near, far, near_is_high) = side.groups();
    fold_levels(
        store,
        quad,
        level,
        62,
        |quad, level| small.find(store, quad, level).map(BigUint::from),
        |kids, level| {
            let half = BigUint::one() << (level - 1);
            for (group, high) in [(near, near_is_high), (far, !near_is_high)] {
                let mut found: Option<BigUint> = None;
                for at in group {
                    if let Some(offset) = kids[at] {
                        let offset = if high { offset + &half } else { offset.clone() };
                        found = Some(match found {
                            Some(best) => side.pick(best, offset),
                            None => offset,
                        });
                    }
                }
                if found.is_some() {
                    return found;
                }
            }
            None
        },
    )
}

/// Extremes in machine words, memoised (offsets below 2^62).
struct Extremes {
    side: Side,
    memo: Map<Handle, Option<u64>>,
}

impl Extremes {
    fn find(&mut self, store: &Store, quad: Handle, level: u32) -> Option<u64> {
        if quad.is_leaf() {
            return self.side.leaf(store.leaf_bits(quad));
        }
        if quad == store.known_empty(level) {
            return None;
        }
        if let Some(&found) = self.memo.get(&quad) {
            return found;
        }
        let kids = store.kids(quad);
        let (near, far, near_is_high) = self.side.groups();
        let half = 1u64 << (level - 1);
        let mut found = None;
        for (group, high) in [(near, near_is_high), (far, !near_is_high)] {
            for at in group {
                if let Some(offset) = self.find(store, kids[at], level - 1) {
                    let offset = if high { offset + half } else { offset };
                    found = Some(match found {
                        Some(best) => self.side.pick(best, offset),
                        None => offset,
                    });
                }
            }
            if found.is_some() {
                break;
            }
        }
        self.memo.insert(quad, found);
        found
    }
}

/// The content id of `quad` (of `level`), memoised in the store below the
/// floor level (above it there are few quads per level).
pub(crate) fn content_id(store: &mut Store, quad: Handle, level: u32) -> ContentId {
    let mut fresh: Map<Handle, ContentId> = Map::default();
    let id = {
        let view: &Store = store;
        fold_levels(
            view,
            quad,
            level,
            64,
            |quad, level| id_recursive(view, &mut fresh, quad, level),
            |kids, level| ContentId::of_inner(level, kids.map(|id| *id)),
        )
    };
    store.ids.extend(fresh);
    id
}

/// Content ids by recursion (depth at most the floor level), reading the
/// store's memo and collecting new ids in `fresh`.
fn id_recursive(
    store: &Store,
    fresh: &mut Map<Handle, ContentId>,
    quad: Handle,
    level: u32,
) -> ContentId {
    if quad.is_leaf() {
        return ContentId::of_leaf(store.leaf_bits(quad));
    }
    if let Some(&id) = store.ids.get(&quad).or_else(|| fresh.get(&quad)) {
        return id;
    }
    let kids = store
        .kids(quad)
        .map(|kid| id_recursive(store, fresh, kid, level - 1));
    let id = ContentId::of_inner(level, kids);
    fresh.insert(quad, id);
    id
}
