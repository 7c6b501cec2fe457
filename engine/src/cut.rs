//! A state cut at a cluster's shard level K: the quads of level K and up
//! (the top of the tree, which the coordinator keeps as content ids) and
//! the distinct level-(K-1) pieces below them (which nodes keep), with the
//! records that carry a piece to a node.

use std::collections::HashSet;

use crate::content_id::ContentId;
use crate::error::BudgetExceeded;
use crate::figures;
use crate::shard::{Figures, MAX_SHARD_LEVEL, Record, figures_of};
use crate::store::{Handle, LEAF_LEVEL};
use crate::universe::Universe;

/// A quad of the top of the tree: its id, level (≥ K) and children's ids.
#[derive(Clone, Copy, PartialEq, Eq, Debug)]
pub struct UpperQuad {
    pub id: ContentId,
    pub level: u32,
    pub kids: [ContentId; 4],
}

/// A distinct non-empty quad of level K-1 under the top of the tree.
#[derive(Clone, Copy, Debug)]
pub struct Piece {
    pub id: ContentId,
    /// where it is in the universe that was cut (for `Universe::records`)
    pub handle: Handle,
    pub figures: Figures,
}

/// A state cut at shard level K.
#[derive(Clone, Debug)]
pub struct Cut {
    pub shard_level: u32,
    /// the root's id and level (at least K + 1), centred on the origin
    pub root: ContentId,
    pub root_level: u32,
    /// every distinct quad of level K and up, parents before children
    pub upper: Vec<UpperQuad>,
    /// every distinct non-empty level-(K-1) quad, in the order a walk of
    /// the tree meets them (nw, ne, sw, se: nearby pieces are near in it)
    pub pieces: Vec<Piece>,
}

impl Cut {
    /// The four pieces of the level-K square centred on the origin, when the
    /// root is of level K + 1 (for tests and small states).
    pub fn centre_square(&self) -> Option<[ContentId; 4]> {
        if self.root_level != self.shard_level + 1 {
            return None;
        }
        let kids_of = |id: &ContentId| {
            self.upper
                .iter()
                .find(|quad| quad.id == *id)
                .map(|q| q.kids)
        };
        let root = kids_of(&self.root)?;
        let [nw, ne, sw, se] = root.map(|kid| kids_of(&kid));
        Some([nw?[3], ne?[2], sw?[1], se?[0]])
    }
}

impl Universe {
    /// Cuts the state at shard level `shard_level` (5 to 48), growing the
    /// root (with empty space) to at least one level above it.
    pub fn cut(&mut self, shard_level: u32) -> Result<Cut, crate::AdvanceError> {
        assert!(
            (LEAF_LEVEL + 2..=MAX_SHARD_LEVEL).contains(&shard_level),
            "shard level {shard_level} out of range"
        );
        while self.level < shard_level + 1 {
            self.expand()?;
        }
        let empty_piece = self.store.empty(shard_level - 1)?;
        let mut upper = Vec::new();
        let mut pieces = Vec::new();
        let mut seen: std::collections::HashMap<Handle, ContentId> = Default::default();
        // Ids of the quads at or above K, computed children first.
        // One frame per level: a state far along needs a deep stack.
        let (root, level) = (self.root, self.level);
        let root_id = crate::stack::deep(level, || {
            self.upper_ids(
                root,
                level,
                shard_level,
                &mut seen,
                &mut upper,
                &mut pieces,
                empty_piece,
            )
        })?;
        upper.reverse();
        Ok(Cut {
            shard_level,
            root: root_id,
            root_level: self.level,
            upper,
            pieces,
        })
    }

    #[allow(clippy::too_many_arguments)]
    fn upper_ids(
        &mut self,
        quad: Handle,
        level: u32,
        shard_level: u32,
        seen: &mut std::collections::HashMap<Handle, ContentId>,
        upper: &mut Vec<UpperQuad>,
        pieces: &mut Vec<Piece>,
        empty_piece: Handle,
    ) -> ContentId {
        // Each distinct quad once: a state far along shares its quads across
        // astronomically many positions.
        if let Some(&id) = seen.get(&quad) {
            return id;
        }
        if level == shard_level - 1 {
            let id = figures::content_id(&mut self.store, quad, level);
            seen.insert(quad, id);
            if quad != empty_piece {
                pieces.push(Piece {
                    id,
                    handle: quad,
                    figures: figures_of(&self.store, quad, level),
                });
            }
            return id;
        }
        let kids = self.store.kids(quad);
        let mut ids = [ContentId([0; 16]); 4];
        for (at, kid) in kids.into_iter().enumerate() {
            ids[at] = self.upper_ids(
                kid,
                level - 1,
                shard_level,
                seen,
                upper,
                pieces,
                empty_piece,
            );
        }
        let id = ContentId::of_inner(level, ids);
        seen.insert(quad, id);
        upper.push(UpperQuad {
            id,
            level,
            kids: ids,
        });
        id
    }

    /// The records of the quads under `quad` (of `level`, from this
    /// universe, e.g. a piece of a cut), children before parents, leaving out
    /// empty quads and those whose ids are in `sent` (which gains the rest).
    pub fn records(
        &mut self,
        quad: Handle,
        level: u32,
        sent: &mut HashSet<ContentId>,
    ) -> Vec<(ContentId, Record)> {
        let mut out = Vec::new();
        self.records_into(quad, level, sent, &mut out);
        out
    }

    fn records_into(
        &mut self,
        quad: Handle,
        level: u32,
        sent: &mut HashSet<ContentId>,
        out: &mut Vec<(ContentId, Record)>,
    ) -> ContentId {
        let id = figures::content_id(&mut self.store, quad, level);
        if quad == self.store.known_empty(level) || sent.contains(&id) {
            return id;
        }
        let record = if level == LEAF_LEVEL {
            Record::Leaf(self.store.leaf_bits(quad))
        } else {
            let kids = self.store.kids(quad);
            let mut ids = [ContentId([0; 16]); 4];
            for (at, kid) in kids.into_iter().enumerate() {
                ids[at] = self.records_into(kid, level - 1, sent, out);
            }
            Record::Inner { level, kids: ids }
        };
        sent.insert(id);
        out.push((id, record));
        id
    }
}

/// Why a state could not be put together from its records.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum AssembleError {
    #[error("no record of quad {0} (level {1})")]
    Missing(ContentId, u32),
    #[error("quad {0} is of level {1}, expected {2}")]
    WrongLevel(ContentId, u32, u32),
    #[error(transparent)]
    Budget(#[from] BudgetExceeded),
}

impl Universe {
    /// The state whose root (centred on the origin, of `level`) is `root`,
    /// at `generation`, built from records that `lookup` gives by id (the
    /// top of a cluster's tree and the pieces its nodes hold). Empty quads
    /// need no record.
    pub fn assemble(
        rule: crate::rule::Rule,
        budget: u64,
        generation: num_bigint::BigUint,
        root: ContentId,
        level: u32,
        lookup: &mut dyn FnMut(&ContentId) -> Option<Record>,
    ) -> Result<Universe, AssembleError> {
        let mut universe = Universe::new(rule, budget)?;
        let store = &mut universe.store;
        // Nothing built is garbage, and the map below holds handles the
        // collector cannot see.
        store.set_collect_allowed(false);
        let built = (|| -> Result<Handle, AssembleError> {
            let mut empties = crate::pack::EmptyIds::new();
            let mut made: std::collections::HashMap<ContentId, Handle> = Default::default();
            // Post-order without recursion: (id, level, children pushed?)
            let mut stack = vec![(root, level, false)];
            while let Some((id, at, expanded)) = stack.pop() {
                if made.contains_key(&id) {
                    continue;
                }
                if id == empties.of(at) {
                    made.insert(id, store.empty(at)?);
                    continue;
                }
                let record = lookup(&id).ok_or(AssembleError::Missing(id, at))?;
                if record.level() != at {
                    return Err(AssembleError::WrongLevel(id, record.level(), at));
                }
                match record {
                    Record::Leaf(bits) => {
                        made.insert(id, store.leaf(bits)?);
                    }
                    Record::Inner { kids, .. } if !expanded => {
                        stack.push((id, at, true));
                        for kid in kids.into_iter().rev() {
                            if !made.contains_key(&kid) {
                                stack.push((kid, at - 1, false));
                            }
                        }
                    }
                    Record::Inner { kids, .. } => {
                        let handles = kids.map(|kid| made[&kid]);
                        made.insert(id, store.join(handles)?);
                    }
                }
            }
            Ok(made[&root])
        })();
        store.set_collect_allowed(true);
        let quad = built?;
        universe.set_root(quad, level);
        universe.generation = generation;
        Ok(universe)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_state_far_along_is_cut_in_time_proportional_to_its_distinct_quads() {
        // The R-pentomino (common practice: it settles by generation 1103
        // and sends off six gliders), 10^40 generations on: a root of level
        // about 135 whose positions are astronomically many but whose
        // distinct quads are few. Visiting positions would never end.
        let pattern = crate::pattern::read_pattern(b"x = 3, y = 3\nb2o$2o$bo!\n", 1 << 28).unwrap();
        let rule: crate::rule::Rule = "B3/S23".parse().unwrap();
        let mut universe = Universe::from_pattern(&pattern, rule, 1 << 28).unwrap();
        let far = num_bigint::BigUint::from(10u32).pow(40);
        universe.advance(&far, None).unwrap();
        let population = universe.population();
        let cut = universe.cut(8).unwrap();
        assert!(cut.root_level > 130, "root level {}", cut.root_level);
        assert!(cut.upper.len() < 10_000, "{} upper quads", cut.upper.len());
        let pieces: u64 = cut.pieces.iter().map(|p| p.figures.population).sum();
        // Distinct pieces are listed once (equal gliders far apart share
        // one), so their cells add up to at most the state's population.
        assert!(num_bigint::BigUint::from(pieces) <= population);
        assert!(!cut.pieces.is_empty());
    }
}
