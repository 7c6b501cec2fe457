//! The top of a tree cut at a shard level K: the quads of level K and up as
//! content ids (each with its children's ids) above opaque level-(K-1)
//! pieces kept elsewhere. A cluster's coordinator advances it with the one
//! walker ([`crate::walk`]); here is what a state's root needs besides:
//! growing it for an advance, shrinking it after, the pieces under it, and
//! the figures of the whole from the pieces' figures.

use std::collections::{HashMap, HashSet};

use crate::content_id::ContentId;
use crate::cut::UpperQuad;
use crate::recursion;
use crate::shard::Figures;
use crate::universe::BoundingBox;
use num_bigint::{BigInt, BigUint};
use num_traits::{One, Zero};

/// Quads of level ≥ K by id; the empty quad of every level.
pub struct Top {
    pub shard_level: u32,
    quads: HashMap<ContentId, UpperQuad, ahash::RandomState>,
    /// `empties[level]`: the id of the empty quad of that level (from 3)
    empties: Vec<ContentId>,
}

impl Top {
    pub fn new(shard_level: u32) -> Top {
        let mut top = Top {
            shard_level,
            quads: HashMap::default(),
            empties: vec![ContentId([0; 16]); 3],
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
            if at >= self.shard_level {
                self.quads.insert(
                    id,
                    UpperQuad {
                        id,
                        level: at,
                        kids: [below; 4],
                    },
                );
            }
            self.empties.push(id);
        }
        self.empties[level as usize]
    }

    /// The id of the empty quad of `level`, if made (see [`Top::empty`]).
    pub fn known_empty(&self, level: u32) -> Option<ContentId> {
        self.empties.get(level as usize).copied()
    }

    /// A quad of level ≥ K this tree knows.
    pub fn get(&self, id: &ContentId) -> Option<UpperQuad> {
        self.quads.get(id).copied()
    }

    pub fn insert(&mut self, quad: UpperQuad) {
        self.quads.insert(quad.id, quad);
    }

    /// The children of a quad of level ≥ K.
    pub fn kids(&mut self, id: &ContentId, level: u32) -> [ContentId; 4] {
        if let Some(quad) = self.quads.get(id) {
            return quad.kids;
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
        let id = ContentId::of_inner(level, kids);
        self.quads
            .entry(id)
            .or_insert(UpperQuad { id, level, kids });
        id
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
        let piece_level = self.shard_level - 1;
        let empty = self.empty(piece_level);
        let mut seen: HashSet<ContentId, ahash::RandomState> = HashSet::default();
        let mut pieces = HashSet::new();
        let mut stack = roots.to_vec();
        while let Some((id, level)) = stack.pop() {
            if level == piece_level {
                if id != empty {
                    pieces.insert(id);
                }
                continue;
            }
            if !seen.insert(id) {
                continue;
            }
            for kid in self.kids(&id, level) {
                stack.push((kid, level - 1));
            }
        }
        pieces
    }

    /// The distinct non-empty quads of level ≥ K under `root`, children
    /// before parents, each with its population (from the pieces'): the
    /// order a pack stores them in.
    pub fn with_populations(
        &mut self,
        root: &ContentId,
        level: u32,
        pieces: &HashMap<ContentId, Figures>,
    ) -> Vec<(UpperQuad, BigUint)> {
        let piece_level = self.shard_level - 1;
        let mut population: HashMap<ContentId, BigUint, ahash::RandomState> = HashMap::default();
        let mut out = Vec::new();
        // (quad, level, children done?)
        let mut stack = vec![(*root, level, false)];
        while let Some((id, at, expanded)) = stack.pop() {
            if population.contains_key(&id) || id == self.empty(at) {
                continue;
            }
            let kids = self.kids(&id, at);
            if !expanded {
                stack.push((id, at, true));
                if at - 1 > piece_level {
                    for kid in kids.iter().rev() {
                        stack.push((*kid, at - 1, false));
                    }
                }
                continue;
            }
            let mut sum = BigUint::zero();
            for kid in &kids {
                sum += if at - 1 == piece_level {
                    pieces
                        .get(kid)
                        .map_or_else(BigUint::zero, |f| BigUint::from(f.population))
                } else {
                    population.get(kid).cloned().unwrap_or_default()
                };
            }
            population.insert(id, sum.clone());
            out.push((
                UpperQuad {
                    id,
                    level: at,
                    kids,
                },
                sum,
            ));
        }
        out
    }

    /// Forgets every quad not under one of `roots`.
    pub fn keep_under(&mut self, roots: &[(ContentId, u32)]) {
        let mut keep: HashSet<ContentId, ahash::RandomState> = HashSet::default();
        let mut stack = roots.to_vec();
        while let Some((id, level)) = stack.pop() {
            if level < self.shard_level || !keep.insert(id) {
                continue;
            }
            for kid in self.kids(&id, level) {
                stack.push((kid, level - 1));
            }
        }
        let empties: HashSet<ContentId> = self.empties.iter().copied().collect();
        self.quads
            .retain(|id, _| keep.contains(id) || empties.contains(id));
    }

    /// Population and extent (left, top, right, bottom, as offsets from the
    /// root's corner) of the state under `root`, from the pieces' figures.
    /// Folded level by level from the pieces up: no deep recursion, memory
    /// linear in the distinct quads.
    pub fn figures(
        &mut self,
        root: &ContentId,
        level: u32,
        pieces: &HashMap<ContentId, Figures>,
    ) -> (BigUint, Option<[BigUint; 4]>) {
        let piece_level = self.shard_level - 1;
        // The distinct quads of each level, root first.
        let mut levels: Vec<Vec<ContentId>> = vec![vec![*root]];
        for _ in piece_level + 1..level {
            let mut seen = HashSet::new();
            let mut next = Vec::new();
            let at = level - levels.len() as u32 + 1;
            for id in levels.last().expect("the root's level") {
                for kid in self.kids(id, at) {
                    if seen.insert(kid) {
                        next.push(kid);
                    }
                }
            }
            levels.push(next);
        }
        type Value = (BigUint, Option<[BigUint; 4]>);
        let mut below: HashMap<ContentId, Value> = HashMap::new();
        let lowest = level - levels.len() as u32 + 1;
        for id in levels.last().expect("at least the root") {
            for kid in self.kids(id, lowest) {
                let value = match pieces.get(&kid) {
                    Some(figures) => (
                        BigUint::from(figures.population),
                        figures.extent.map(|e| {
                            [e.left.into(), e.top.into(), e.right.into(), e.bottom.into()]
                        }),
                    ),
                    None => (BigUint::zero(), None),
                };
                below.insert(kid, value);
            }
        }
        for (depth, quads) in levels.iter().enumerate().rev() {
            let at = level - depth as u32;
            let half = BigUint::one() << (at - 1);
            let mut here: HashMap<ContentId, Value> = HashMap::new();
            for id in quads {
                let kids = self.kids(id, at);
                let mut population = BigUint::zero();
                let mut extent: Option<[BigUint; 4]> = None;
                for (quarter, kid) in kids.iter().enumerate() {
                    let (count, kid_extent) = &below[kid];
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
                here.insert(*id, (population, extent));
            }
            below = here;
        }
        below.remove(root).expect("the root was folded")
    }
}
