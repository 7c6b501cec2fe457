//! Checkpoints of a cluster run, in the embedded run's format.
//!
//! Where every node writes to the job's checkpoint folder (`deeptime node
//! --checkpoint-dir`), each node writes the quads under its pieces into a
//! pack of its own, all in parallel and straight to the storage; the
//! coordinator then writes one pack of the top of the tree (levels K and
//! up, referring to the pieces in the nodes' packs) and the manifest, last.
//! The state never passes through one machine. Nodes cannot know what the
//! others write, so packs of one checkpoint may share quads (CHECKPOINTS.md
//! allows it); each node refers to what it wrote before instead of storing
//! it again.
//!
//! Otherwise (a node that writes no packs, or a state whose canonical root
//! lies below the shard level, so small that it sits in four pieces) the
//! coordinator gathers the pieces from the nodes, puts the state together
//! and writes it as an embedded run does.

use std::collections::HashMap;
use std::sync::{Arc, Mutex};

use anyhow::Context;
use deeptime_engine::pack::{Checksum, IdQuad, QuadAt, write_id_pack};
use deeptime_engine::shard::{Record, Shard};
use deeptime_engine::{ContentId, KnownQuads, Universe};

use crate::cluster::drive::{OnNodes, Run};
use crate::cluster::tasks::PiecesLost;
use deeptime_node::fetch::fetch_missing;
use deeptime_storage::checkpoint::{
    BoxText, Checkpoints, FORMAT, MAX_PACKS, Manifest, PackEntry, STAND_ALONE_AFTER, VERSION,
};

/// How the last checkpoint was written, for the run's report.
#[derive(Default, Clone, Copy, Debug)]
pub struct Written {
    /// checkpoints whose pieces the nodes wrote
    pub by_nodes: u64,
    /// checkpoints the coordinator gathered and wrote
    pub gathered: u64,
    /// bytes of the packs the nodes wrote, and of the coordinator's
    pub node_pack_bytes: u64,
    pub coordinator_pack_bytes: u64,
}

impl Run<'_> {
    /// Stores the state on the nodes as a checkpoint.
    pub(super) async fn checkpoint(
        &self,
        state: &OnNodes,
        checkpoints: &Checkpoints,
        previous: &mut Option<Manifest>,
        known: &mut KnownQuads,
    ) -> anyhow::Result<()> {
        self.say("checkpointing");
        let manifest = match self.on_nodes(state, checkpoints, previous, known).await? {
            Some(manifest) => manifest,
            None => {
                let mut universe = self.gather(state).await?;
                let manifest = tokio::task::block_in_place(|| {
                    checkpoints.write(&mut universe, previous.as_ref(), known, &self.identity())
                })?;
                let mut written = self.written.lock().expect("written");
                written.gathered += 1;
                let before: Vec<&str> = previous
                    .iter()
                    .flat_map(|m| m.packs.iter().map(|p| p.name.as_str()))
                    .collect();
                written.coordinator_pack_bytes += manifest
                    .packs
                    .iter()
                    .filter(|p| !before.contains(&p.name.as_str()))
                    .map(|p| p.bytes)
                    .sum::<u64>();
                manifest
            }
        };
        *previous = Some(manifest);
        if let Some(keep) = self.job.keep
            && let Err(error) = tokio::task::block_in_place(|| checkpoints.prune(keep))
        {
            tracing::warn!("retention: {error:#}");
        }
        self.say("running");
        Ok(())
    }

    /// Whether every live node writes packs to this job's folder (said
    /// once when one does not).
    pub(super) fn nodes_write(&self) -> bool {
        let live = self.members.live();
        let others: Vec<String> = live
            .iter()
            .filter(|m| m.checkpoint_dir != self.checkpoint_location)
            .map(|m| match m.checkpoint_dir.as_str() {
                "" => format!("node {} has no --checkpoint-dir", m.id),
                dir => format!("node {} writes to {dir}", m.id),
            })
            .collect();
        if !others.is_empty()
            && !self
                .said_gathering
                .swap(true, std::sync::atomic::Ordering::Relaxed)
        {
            tracing::info!(
                "checkpoints pass through the coordinator ({}; the job's folder is {})",
                others.join(", "),
                self.checkpoint_location
            );
        }
        !live.is_empty() && others.is_empty()
    }

    /// The checkpoint written by the nodes and the coordinator together, or
    /// None when it must be gathered.
    async fn on_nodes(
        &self,
        state: &OnNodes,
        checkpoints: &Checkpoints,
        previous: &Option<Manifest>,
        known: &mut KnownQuads,
    ) -> anyhow::Result<Option<Manifest>> {
        // One pack per node and one for the top must fit a manifest.
        if !self.nodes_write() || self.members.live().len() + 1 > MAX_PACKS {
            return Ok(None);
        }
        let (root, level) = self.canonical(state).await?;
        if level < self.shard_level {
            return Ok(None);
        }
        let pieces = state.top.lock().expect("top").pieces(&root, level);
        let figures = self.tasks.figures(&pieces);
        // The packs this checkpoint builds on; when its own would take the
        // list past the bound, it stands alone.
        let mut packs = previous
            .as_ref()
            .map(|m| m.packs.clone())
            .unwrap_or_default();
        let adds = self.members.live().len() + 1;
        if packs.len() + adds > STAND_ALONE_AFTER.max(adds) {
            packs.clear();
            known.clear();
        }
        let mut names: Vec<Checksum> = Vec::with_capacity(packs.len());
        for entry in &packs {
            names.push(entry.name.parse().context("a pack name in the manifest")?);
        }
        let unwritten: Vec<ContentId> = pieces
            .iter()
            .filter(|piece| !known.contains_key(piece))
            .copied()
            .collect();
        let base: Vec<Vec<u8>> = names.iter().map(|name| name.0.to_vec()).collect();
        let replies = self
            .tasks
            .write_packs(self.job_id, &self.checkpoint_location, &base, &unwritten)
            .await?;
        let mut index: HashMap<Checksum, u32> = names
            .iter()
            .enumerate()
            .map(|(at, name)| (*name, at as u32))
            .collect();
        let mut node_bytes = 0;
        for (member, reply, share) in replies {
            for pack in reply.pack.iter().chain(&reply.copied) {
                let name = deeptime_node::wire::checksum_from(&pack.name)?;
                let table = deeptime_node::wire::checksum_from(&pack.table)?;
                if let std::collections::hash_map::Entry::Vacant(slot) = index.entry(name) {
                    slot.insert(names.len() as u32);
                    names.push(name);
                    packs.push(PackEntry {
                        name: name.to_string(),
                        bytes: pack.bytes,
                        records: pack.records,
                        table: table.to_string(),
                    });
                    node_bytes += pack.bytes;
                }
            }
            for (piece, place) in share.iter().zip(&reply.places) {
                let name = deeptime_node::wire::checksum_from(&place.pack)?;
                let pack = *index.get(&name).with_context(|| {
                    format!(
                        "node {} ({}) placed piece {} in pack {name}, which this checkpoint does not list",
                        member.id,
                        member.address,
                        piece.short()
                    )
                })?;
                known.insert(
                    *piece,
                    QuadAt {
                        pack,
                        record: place.record,
                    },
                );
            }
        }
        // The top of the tree, into the coordinator's own pack.
        let top: Vec<IdQuad> = state
            .top
            .lock()
            .expect("top")
            .unstored(&root, level, &figures, |id| known.contains_key(id))
            .into_iter()
            .map(|(quad, population)| IdQuad {
                id: quad.id,
                level: quad.level,
                kids: quad.kids,
                population,
            })
            .collect();
        let written = write_id_pack(&top, &|id| known.get(id).copied(), &names)
            .map_err(|error| anyhow::anyhow!("the top of the tree: {error}"))?;
        let mut coordinator_bytes = 0;
        if let Some(pack) = written {
            let name = tokio::task::block_in_place(|| checkpoints.put_pack(&pack.bytes))?;
            let at = packs.len() as u32;
            coordinator_bytes = pack.bytes.len() as u64;
            packs.push(PackEntry {
                name,
                bytes: pack.bytes.len() as u64,
                records: pack.records,
                table: pack.table.to_string(),
            });
            for (record, id) in pack.ids.iter().enumerate() {
                known.insert(
                    *id,
                    QuadAt {
                        pack: at,
                        record: record as u32,
                    },
                );
            }
        }
        let root_at = *known
            .get(&root)
            .context("the state's root is in no pack of the run")?;
        let (population, bbox) = self.figures(state);
        let background = self.rule.background(&state.generation);
        let manifest = tokio::task::block_in_place(|| {
            checkpoints.commit(
                previous.as_ref(),
                Manifest {
                    format: FORMAT.to_string(),
                    version: VERSION,
                    sequence: 0,
                    name: self.job.name.clone(),
                    rule: self.members.terms.rule.clone(),
                    pattern: self.pattern_digest.to_string(),
                    generation: state.generation.to_string(),
                    root: root.to_string(),
                    root_pack: root_at.pack,
                    root_record: root_at.record,
                    population: population.to_string(),
                    bbox: bbox.map(|b| BoxText {
                        left: b.left,
                        top: b.top,
                        width: b.width,
                        height: b.height,
                    }),
                    background: deeptime_storage::checkpoint::background_field(background),
                    packs,
                    written: 0,
                    universe: None,
                    origin: None,
                },
            )
        })?;
        let mut counts = self.written.lock().expect("written");
        counts.by_nodes += 1;
        counts.node_pack_bytes += node_bytes;
        counts.coordinator_pack_bytes += coordinator_bytes;
        Ok(Some(manifest))
    }

    /// The whole state, put together from the top of the tree and the
    /// pieces fetched from the nodes.
    async fn gather(&self, state: &OnNodes) -> anyhow::Result<Universe> {
        let pieces = state
            .top
            .lock()
            .expect("top")
            .pieces(&state.root, state.level);
        let shard = Arc::new(Mutex::new(Some(Shard::new(self.rule, self.budget)?)));
        let mut wanted = Vec::new();
        for piece in &pieces {
            wanted.push((*piece, self.shard_level - 1, self.tasks.holders_of(piece)?));
        }
        let fetched = fetch_missing(shard.clone(), &self.peers, wanted)
            .await
            .map_err(|status| {
                PiecesLost(format!("gathering a checkpoint: {}", status.message()))
            })?;
        let top = state.top.clone();
        let (root, level, generation) = (state.root, state.level, state.generation.clone());
        let (rule, budget) = (self.rule, self.budget);
        tokio::task::block_in_place(move || {
            let mut guard = shard.lock().expect("shard");
            let shard = guard.as_mut().expect("made above");
            shard.put(&fetched.records, &[])?;
            let top = top.lock().expect("top");
            let mut lookup = |id: &ContentId| -> Option<Record> {
                match top.get(id) {
                    Some(quad) => Some(Record::Inner {
                        level: quad.level,
                        kids: quad.kids,
                    }),
                    None => shard.record(id),
                }
            };
            Ok(Universe::assemble(
                rule,
                budget,
                generation,
                root,
                level,
                &mut lookup,
            )?)
        })
    }
}
