//! A stored checkpoint put back on the nodes (when a run resumes or rolls
//! back), without the state passing through the coordinator: it reads only
//! the top of the tree (the records of level K and up, which sit together
//! at the end of each pack), gives each node a run of neighbouring pieces
//! by where their records are, and every node reads its pieces from the
//! storage itself (`Load`). Pieces a node still holds (it wrote or read
//! them for this job) stay where they are.
//!
//! Trust: the nodes compute every piece's content id from the cells they
//! read, the coordinator computes the ids of the top from the pieces' up,
//! and the state is taken only if that gives the manifest's root: one
//! content id covers every cell below it.

use std::collections::{HashMap, HashSet};
use std::sync::{Arc, Mutex};

use anyhow::Context;
use deeptime_engine::cut::UpperQuad;
use deeptime_engine::pack::QuadAt;
use deeptime_engine::shard::Figures;
use deeptime_engine::stored::{StoredNode, Visited};
use deeptime_engine::{BudgetExceeded, ContentId, KnownQuads};
use deeptime_node::wire::{self, MAX_BATCH};
use deeptime_proto::v1;

use crate::cluster::drive::{OnNodes, Run};
use crate::cluster::members::Member;
use crate::cluster::tasks::{NodeOutOfMemory, PiecesLost};
use crate::numbers::for_people;
use deeptime_engine::BadInput;
use deeptime_engine::top::Top;
use deeptime_storage::checkpoint::{CheckpointError, Checkpoints, Manifest};

/// The top of a stored state, read down to its pieces.
struct StoredTop {
    /// quads of level K and up, children before parents, with their
    /// children (pieces, other quads of the top, or empty)
    quads: Vec<(QuadAt, u32, [StoredNode; 4])>,
    /// the distinct pieces, in the order a walk from the root meets them
    pieces: Vec<QuadAt>,
    root_level: u32,
}

/// The packs a checkpoint needs, as a `Load` call names them.
pub(super) fn packs_of(manifest: &Manifest) -> anyhow::Result<Vec<v1::PackWritten>> {
    manifest
        .packs
        .iter()
        .map(|entry| -> anyhow::Result<v1::PackWritten> {
            let name: deeptime_engine::pack::Checksum = entry.name.parse()?;
            let table: deeptime_engine::pack::Checksum = entry.table.parse()?;
            Ok(v1::PackWritten {
                name: name.0.to_vec(),
                bytes: entry.bytes,
                records: entry.records,
                table: table.0.to_vec(),
            })
        })
        .collect()
}

/// A piece read (or found held) by a member.
struct Placed {
    id: ContentId,
    figures: Figures,
    member: u64,
}

impl Run<'_> {
    /// Puts the newest checkpoint that loads onto the live nodes (going
    /// back past damaged ones, each with a warning): read by the nodes
    /// themselves when they can, else read whole here and handed out.
    pub(super) async fn load_stored(
        &self,
        checkpoints: &Checkpoints,
    ) -> anyhow::Result<(OnNodes, Manifest, KnownQuads)> {
        let keys = tokio::task::block_in_place(|| checkpoints.manifest_keys())?;
        for key in keys.iter().rev() {
            let manifest = match tokio::task::block_in_place(|| checkpoints.manifest(key)) {
                Ok(manifest) => manifest,
                Err(error) if !error.is_damage() => return Err(error.into()),
                Err(error) => {
                    tracing::warn!("skipping damaged checkpoint: {error}");
                    continue;
                }
            };
            crate::run::check_identity(
                &manifest,
                self.job,
                &self.members.terms.rule,
                &self.identity(),
            )?;
            let attempt = if self.nodes_write() {
                match self.load_on_nodes(checkpoints, &manifest).await {
                    // The nodes could not read it (damage, or a storage or
                    // node that failed): read it here, whole, which tells
                    // damage from the rest as an embedded run does.
                    Err(error) if !stops_the_load(&error) => {
                        tracing::warn!(
                            "the nodes could not read checkpoint {}: {error:#}; reading it whole",
                            manifest.sequence
                        );
                        self.tasks.forget_all();
                        Ok(None)
                    }
                    other => other,
                }
            } else {
                Ok(None)
            };
            let outcome = match attempt {
                Ok(Some((on_nodes, known))) => Ok((on_nodes, known)),
                Ok(None) => {
                    let budget = self.budget;
                    let whole =
                        tokio::task::block_in_place(|| checkpoints.load(manifest.clone(), budget));
                    match whole {
                        Ok(mut loaded) => self
                            .load(&mut loaded.universe)
                            .await
                            .map(|on_nodes| (on_nodes, loaded.known)),
                        Err(error) => Err(error.into()),
                    }
                }
                Err(error) => Err(error),
            };
            match outcome {
                Ok((on_nodes, known)) => {
                    tracing::info!(
                        "resuming {} from checkpoint {} at generation {}",
                        self.job.name,
                        manifest.sequence,
                        for_people(&manifest.generation)
                    );
                    return Ok((on_nodes, manifest, known));
                }
                // Only damage sends the load to an earlier checkpoint.
                Err(error) if !CheckpointError::is_damage_in(&error) => return Err(error),
                Err(error) => {
                    tracing::warn!(
                        "skipping damaged checkpoint {}: {error:#}",
                        manifest.sequence
                    );
                    self.tasks.forget_all();
                }
            }
        }
        anyhow::bail!(
            "{}: no checkpoint loads (all are damaged)",
            self.job.checkpoint_dir.display()
        )
    }

    /// The checkpoint read onto the nodes by the nodes; None when its root
    /// is below the shard level + 1 (a state that small is read whole).
    async fn load_on_nodes(
        &self,
        checkpoints: &Checkpoints,
        manifest: &Manifest,
    ) -> anyhow::Result<Option<(OnNodes, KnownQuads)>> {
        self.say("loading");
        let shard_level = self.shard_level;
        let top = tokio::task::block_in_place(|| read_top(checkpoints, manifest, shard_level))
            .with_context(|| format!("checkpoint {}", manifest.sequence))?;
        let Some(top) = top else {
            return Ok(None);
        };
        let packs = packs_of(manifest)?;
        let live = self.members.live();
        if live.is_empty() {
            return Err(PiecesLost("no node is live".to_string()).into());
        }
        // Pieces still on a node stay there.
        let mut placed: HashMap<QuadAt, Placed> = HashMap::new();
        for member in &live {
            let found = self.load_call(member, &packs, &top.pieces, true).await?;
            for (at, piece) in top.pieces.iter().zip(found) {
                if let Some((id, figures)) = piece {
                    placed.entry(*at).or_insert(Placed {
                        id,
                        figures,
                        member: member.id,
                    });
                }
            }
        }
        if !placed.is_empty() {
            tracing::info!(
                "{} of {} pieces are on the nodes already",
                placed.len(),
                top.pieces.len()
            );
        }
        // The rest in runs of neighbours, one run per node, read in parallel.
        let cold: Vec<QuadAt> = top
            .pieces
            .iter()
            .filter(|at| !placed.contains_key(at))
            .copied()
            .collect();
        let share = cold.len().div_ceil(live.len().max(1)).max(1);
        let reads = live.iter().zip(cold.chunks(share)).map(|(member, run)| {
            let packs = &packs;
            async move {
                let read = self.load_call(member, packs, run, false).await?;
                anyhow::Ok((member.id, run, read))
            }
        });
        for (member, run, read) in futures::future::try_join_all(reads).await? {
            for (at, piece) in run.iter().zip(read) {
                let (id, figures) = piece.with_context(|| {
                    format!("node {member} read no piece at record {}", at.record)
                })?;
                placed.insert(
                    *at,
                    Placed {
                        id,
                        figures,
                        member,
                    },
                );
            }
        }
        // The ids of the top, from the pieces' up; the root's must be the
        // manifest's.
        let mut tree = Top::new(shard_level);
        let mut ids: HashMap<QuadAt, ContentId> = HashMap::new();
        let mut known = KnownQuads::default();
        for (at, level, kids) in &top.quads {
            let mut kid_ids = [ContentId([0; 16]); 4];
            for (slot, kid) in kids.iter().enumerate() {
                kid_ids[slot] = match kid {
                    StoredNode::Empty => tree.empty(level - 1),
                    StoredNode::At(kid) if *level == shard_level => {
                        placed
                            .get(kid)
                            .with_context(|| {
                                format!("no node read the piece at record {}", kid.record)
                            })?
                            .id
                    }
                    StoredNode::At(kid) => ids[kid],
                };
            }
            let id = ContentId::of_inner(*level, kid_ids);
            tree.insert(UpperQuad {
                id,
                level: *level,
                kids: kid_ids,
            });
            ids.insert(*at, id);
            known.insert(id, *at);
        }
        let root = ids[&top.quads.last().expect("a root of level K + 1 or more").0];
        if root.to_string() != manifest.root {
            anyhow::bail!(
                "the pieces the nodes read do not hash to the manifest's root {} but to {root} (damaged)",
                manifest.root
            );
        }
        let mut pieces = HashSet::new();
        for (at, piece) in &placed {
            known.entry(piece.id).or_insert(*at);
            pieces.insert(piece.id);
            self.tasks
                .record_holding(piece.id, piece.member, piece.figures);
        }
        self.tasks.retain(self.job_id, &pieces).await?;
        let generation = manifest.generation()?;
        let on_nodes = OnNodes {
            top: Arc::new(Mutex::new(tree)),
            root,
            level: top.root_level,
            generation,
        };
        let (population, _) = self.figures(&on_nodes);
        if population.to_string() != manifest.population {
            anyhow::bail!(
                "the pieces the nodes read hold {population} live cells, the manifest says {} (damaged)",
                manifest.population
            );
        }
        {
            let mut status = self.board.status.lock().expect("board");
            status.generation = on_nodes.generation.to_string();
            status.started_from = on_nodes.generation.to_string();
            let background = self.rule.background(&on_nodes.generation);
            crate::report::show_population(&mut status, background, population.to_string());
        }
        Ok(Some((on_nodes, known)))
    }

    /// One member's `Load` of `pieces` (in batches); per piece its id and
    /// figures, or None where `held_only` found it not held.
    pub(super) async fn load_call(
        &self,
        member: &Arc<Member>,
        packs: &[v1::PackWritten],
        pieces: &[QuadAt],
        held_only: bool,
    ) -> anyhow::Result<Vec<Option<(ContentId, Figures)>>> {
        let mut out = Vec::with_capacity(pieces.len());
        for batch in pieces.chunks(MAX_BATCH) {
            let request = v1::LoadRequest {
                job: self.job_id.to_string(),
                checkpoint_dir: self.checkpoint_location.clone(),
                packs: packs.to_vec(),
                pieces: batch
                    .iter()
                    .map(|at| v1::PieceAt {
                        pack: at.pack,
                        record: at.record,
                    })
                    .collect(),
                held_only,
            };
            let reply = self.tasks.load(member, request).await?;
            if reply.pieces.len() != batch.len() {
                anyhow::bail!(
                    "node {} ({}) answered for {} pieces of {}",
                    member.id,
                    member.address,
                    reply.pieces.len(),
                    batch.len()
                );
            }
            for piece in reply.pieces {
                out.push(if piece.id.is_empty() {
                    None
                } else {
                    Some((
                        wire::id_from(&piece.id)?,
                        wire::figures_from_wire(piece.population, piece.extent),
                    ))
                });
            }
        }
        Ok(out)
    }
}

/// Errors that are no damage of a checkpoint: a lost node, memory, a
/// checkpoint of another version or run. The load stops rather than go
/// further back.
fn stops_the_load(error: &anyhow::Error) -> bool {
    error.chain().any(|c| {
        c.is::<PiecesLost>()
            || c.is::<NodeOutOfMemory>()
            || c.is::<BudgetExceeded>()
            || c.is::<BadInput>()
    })
}

/// Reads a checkpoint's records of level K and up, on demand; None when its
/// root is below level K + 1.
fn read_top(
    checkpoints: &Checkpoints,
    manifest: &Manifest,
    shard_level: u32,
) -> anyhow::Result<Option<StoredTop>> {
    let mut parts = checkpoints.open_stored(manifest)?;
    let mut stored = parts.state()?;
    let (root, root_level) = stored.root_node();
    let StoredNode::At(root) = root else {
        return Ok(None);
    };
    if root_level < shard_level + 1 {
        return Ok(None);
    }
    let mut quads = Vec::new();
    let mut pieces = Vec::new();
    let mut seen_pieces = HashSet::new();
    let mut visited = HashSet::default();
    // Down to the level-K quads, whose children are the pieces.
    stored.post_order(
        root,
        root_level,
        shard_level,
        &mut visited,
        &mut |at, level, quad| {
            let Visited::Inner(kids) = quad else {
                unreachable!("no leaf above the shard level");
            };
            if level == shard_level {
                for kid in kids {
                    if let StoredNode::At(kid) = kid
                        && seen_pieces.insert(kid)
                    {
                        pieces.push(kid);
                    }
                }
            }
            quads.push((at, level, kids));
        },
    )?;
    Ok(Some(StoredTop {
        quads,
        pieces,
        root_level,
    }))
}
