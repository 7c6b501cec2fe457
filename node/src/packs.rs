//! A node's part of a checkpoint: the quads under the pieces the
//! coordinator names, written as one pack straight to the run's storage,
//! so that a checkpoint of a state spread over many nodes is written in
//! parallel and never passes through one machine. The coordinator then
//! writes the top of the tree and the manifest, last.
//!
//! A node keeps where each quad it wrote is (pack and record), so that its
//! next pack refers to them instead of storing them again; it uses only the
//! packs the coordinator names as the checkpoint's base (a pack whose
//! checkpoint was never committed is never referred to).

use std::collections::HashMap;
use std::path::Path;
use std::sync::Arc;
use std::time::Instant;

use deeptime_engine::pack::{Checksum, QuadAt};
use deeptime_engine::shard::Record;
use deeptime_engine::stored::{StoredNode, StoredPack, StoredState, Visited};
use deeptime_engine::{ContentId, LEAF_LEVEL};
use deeptime_proto::v1;
use tonic::Status;

use crate::service::NodeState;
use crate::wire;
use deeptime_storage::{self as storage, Storage};

/// The checkpoint folder a node writes to.
pub struct Checkpoints {
    /// its identity (`storage::location`), compared with the job's
    pub location: String,
    pub(crate) storage: Arc<dyn Storage>,
}

impl Checkpoints {
    pub fn open(dir: &Path) -> anyhow::Result<Checkpoints> {
        let location = storage::location(dir)
            .map_err(|error| anyhow::anyhow!("--checkpoint-dir {}: {error}", dir.display()))?;
        let storage: Arc<dyn Storage> = Arc::from(
            storage::open(dir)
                .map_err(|error| anyhow::anyhow!("--checkpoint-dir {}: {error}", dir.display()))?,
        );
        Ok(Checkpoints { location, storage })
    }
}

/// Where the quads of the packs this node wrote are.
#[derive(Default)]
pub struct Written {
    /// the packs, by the index `quads` uses
    packs: Vec<Checksum>,
    by_name: HashMap<Checksum, u32>,
    quads: HashMap<ContentId, (u32, u32), ahash::RandomState>,
    /// the pieces among them, by where they are (to answer `held_only`)
    pieces: HashMap<(u32, u32), ContentId, ahash::RandomState>,
}

impl Written {
    /// Where `id` is among the `base` packs, if this node wrote it there.
    fn locate(&self, id: &ContentId, base: &HashMap<Checksum, u32>) -> Option<(Checksum, QuadAt)> {
        let &(pack, record) = self.quads.get(id)?;
        let name = self.packs[pack as usize];
        let &index = base.get(&name)?;
        Some((
            name,
            QuadAt {
                pack: index,
                record,
            },
        ))
    }

    /// Forgets what no later pack can refer to: quads in packs outside
    /// `base` (a checkpoint that never got its manifest, or packs a
    /// checkpoint that stood alone let go) and quads the shard no longer
    /// has (it cannot write them). Keeps this map within the shard's size.
    fn prune(&mut self, base: &HashMap<Checksum, u32>, has: impl Fn(&ContentId) -> bool) {
        let kept: Vec<bool> = self
            .packs
            .iter()
            .map(|name| base.contains_key(name))
            .collect();
        self.quads
            .retain(|id, (pack, _)| kept[*pack as usize] && has(id));
        self.pieces
            .retain(|(pack, _), id| kept[*pack as usize] && has(id));
    }

    fn pack_index(&mut self, name: Checksum) -> u32 {
        *self.by_name.entry(name).or_insert_with(|| {
            self.packs.push(name);
            self.packs.len() as u32 - 1
        })
    }

    /// Takes the quads of a pack just written; a quad also in an older
    /// pack is found at its newest place (the one a later base keeps).
    fn add(&mut self, name: Checksum, ids: &[ContentId]) {
        let pack = self.pack_index(name);
        for (record, id) in ids.iter().enumerate() {
            self.quads.insert(*id, (pack, record as u32));
        }
    }

    fn add_piece(&mut self, name: Checksum, record: u32, id: ContentId) {
        let pack = self.pack_index(name);
        self.quads.insert(id, (pack, record));
        self.pieces.insert((pack, record), id);
    }

    fn piece_at(&self, name: &Checksum, record: u32) -> Option<ContentId> {
        let pack = *self.by_name.get(name)?;
        self.pieces.get(&(pack, record)).copied()
    }
}

/// The packs a manifest may list (as CHECKPOINTS.md bounds them).
const MAX_BASE: usize = 1024;

/// The node's checkpoint folder, if it is the one the coordinator names.
fn folder<'s>(state: &'s NodeState, named: &str) -> Result<&'s Checkpoints, Status> {
    let checkpoints = state.checkpoints.as_ref().ok_or_else(|| {
        Status::failed_precondition("this node writes no checkpoints (it has no --checkpoint-dir)")
    })?;
    if named != checkpoints.location {
        return Err(Status::failed_precondition(format!(
            "this node writes checkpoints to {}, the job's are at {named}",
            checkpoints.location
        )));
    }
    Ok(checkpoints)
}

/// Writes the pack of a WritePack request and says where each piece is.
pub async fn write_pieces(
    state: &Arc<NodeState>,
    request: v1::WritePackRequest,
) -> Result<v1::WritePackReply, Status> {
    let started = Instant::now();
    let checkpoints = folder(state, &request.checkpoint_dir)?;
    if request.base.len() > MAX_BASE {
        return Err(Status::invalid_argument(format!(
            "a base of {} packs (at most {MAX_BASE})",
            request.base.len()
        )));
    }
    let mut base = Vec::with_capacity(request.base.len());
    for name in &request.base {
        base.push(wire::checksum_from(name)?);
    }
    let mut pieces = Vec::with_capacity(request.pieces.len());
    for piece in &request.pieces {
        pieces.push(wire::id_from(piece)?);
    }
    let state = state.clone();
    let storage = checkpoints.storage.clone();
    tokio::task::spawn_blocking(move || {
        let index: HashMap<Checksum, u32> = base
            .iter()
            .enumerate()
            .map(|(at, name)| (*name, at as u32))
            .collect();
        let written = {
            let mut known = state.written.lock().expect("written");
            let mut guard = state.shard.lock().expect("shard");
            let shard = guard
                .as_mut()
                .ok_or_else(|| Status::failed_precondition("this node has not joined a job"))?;
            known.prune(&index, |id| shard.has(id));
            // Pieces spilled (and collected since) are in their spill
            // packs already: those are copied in as they are.
            let spill = state.spill.lock().expect("spill");
            let (copied, spilled) = match spill.as_ref() {
                Some(spill) => {
                    let away: Vec<ContentId> = pieces
                        .iter()
                        .filter(|id| spill.holds(id) && !shard.has(id))
                        .copied()
                        .collect();
                    spill.copy_into_packs(&away)?
                }
                None => Default::default(),
            };
            let here: Vec<ContentId> = pieces
                .iter()
                .filter(|id| !spilled.contains_key(id))
                .copied()
                .collect();
            let locate = |id: &ContentId| known.locate(id, &index).map(|(_, at)| at);
            let written = shard
                .write_pack(&here, &locate, &base)
                .map_err(wire::shard_status)?;
            (written, copied, spilled)
        };
        let (written, copied, spilled) = written;
        let mut new_records: HashMap<ContentId, u32> = HashMap::new();
        let mut pack = None;
        let mut name = None;
        if let Some(written) = written {
            storage::put_pack(storage.as_ref(), &written.bytes)
                .map_err(|error| Status::internal(format!("{error:#}")))?;
            let checksum = deeptime_engine::pack::pack_name(&written.bytes);
            let wanted: std::collections::HashSet<&ContentId> = pieces.iter().collect();
            for (record, id) in written.ids.iter().enumerate() {
                if wanted.contains(id) {
                    new_records.insert(*id, record as u32);
                }
            }
            state
                .written
                .lock()
                .expect("written")
                .add(checksum, &written.ids);
            pack = Some(v1::PackWritten {
                name: checksum.0.to_vec(),
                bytes: written.bytes.len() as u64,
                records: written.records,
                table: written.table.0.to_vec(),
            });
            name = Some(checksum);
        }
        let mut known = state.written.lock().expect("written");
        let mut places = Vec::with_capacity(pieces.len());
        for piece in &pieces {
            let (name, record) = match (new_records.get(piece), name) {
                (Some(&record), Some(name)) => (name, record),
                _ if spilled.contains_key(piece) => spilled[piece],
                _ => {
                    let (name, at) = known.locate(piece, &index).ok_or_else(|| {
                        Status::internal(format!("piece {} is in no pack", piece.short()))
                    })?;
                    (name, at.record)
                }
            };
            known.add_piece(name, record, *piece);
            places.push(v1::PiecePlace {
                pack: name.0.to_vec(),
                record,
            });
        }
        Ok(v1::WritePackReply {
            pack,
            copied,
            places,
            write_us: started.elapsed().as_micros() as u64,
        })
    })
    .await
    .map_err(|error| Status::internal(format!("writing a pack failed: {error}")))?
}

/// Decoded chunks a load keeps before it lets them go (about 64 KiB of
/// records each).
const CHUNKS_KEPT: usize = 256;

/// Reads the pieces of a Load request from the storage into the shard (or,
/// with `held_only`, says which it holds), with each one's id and figures.
pub async fn load_pieces(
    state: &Arc<NodeState>,
    request: v1::LoadRequest,
    piece_level: u32,
) -> Result<v1::LoadReply, Status> {
    let checkpoints = folder(state, &request.checkpoint_dir)?;
    if request.packs.len() > MAX_BASE {
        return Err(Status::invalid_argument(format!(
            "a checkpoint of {} packs (at most {MAX_BASE})",
            request.packs.len()
        )));
    }
    let mut packs = Vec::with_capacity(request.packs.len());
    for pack in &request.packs {
        let name = wire::checksum_from(&pack.name)?;
        packs.push(StoredPack {
            name,
            bytes: pack.bytes,
            records: pack.records,
            table: wire::checksum_from(&pack.table)?,
            place: checkpoints
                .storage
                .locate(&storage::pack_key(&name.to_string())),
        });
    }
    let mut pieces = Vec::with_capacity(request.pieces.len());
    for piece in &request.pieces {
        if piece.pack as usize >= packs.len() {
            return Err(Status::invalid_argument(format!(
                "a piece in pack {} of {}",
                piece.pack,
                packs.len()
            )));
        }
        pieces.push(QuadAt {
            pack: piece.pack,
            record: piece.record,
        });
    }
    let state = state.clone();
    let storage = checkpoints.storage.clone();
    let held_only = request.held_only;
    tokio::task::spawn_blocking(move || {
        if held_only {
            return held(&state, &packs, &pieces);
        }
        let keys = packs
            .iter()
            .map(|p| storage::pack_key(&p.name.to_string()))
            .collect();
        let mut fetch = storage::PackFetch {
            storage: storage.as_ref(),
            keys,
        };
        let rule = {
            let guard = state.shard.lock().expect("shard");
            guard
                .as_ref()
                .ok_or_else(|| Status::failed_precondition("this node has not joined a job"))?
                .rule()
        };
        let names: Vec<Checksum> = packs.iter().map(|p| p.name).collect();
        let mut stored = StoredState::over(&mut fetch, packs, rule);
        let mut ids: HashMap<QuadAt, ContentId, ahash::RandomState> = HashMap::default();
        let mut visited = std::collections::HashSet::default();
        let mut empties = Vec::new();
        let mut out = Vec::with_capacity(pieces.len());
        for piece in &pieces {
            let records = read_subtree(
                &mut stored,
                *piece,
                piece_level,
                &mut ids,
                &mut visited,
                &mut empties,
            )
            .map_err(|error| Status::data_loss(error.to_string()))?;
            let id = ids[piece];
            let figures = state.on_shard(&[id], |shard, _| {
                shard.put(&records, &[id])?;
                Ok(shard.figures(&id).expect("held just now"))
            })?;
            out.push(v1::LoadedPiece {
                id: id.0.to_vec(),
                population: figures.population,
                extent: wire::extent_to_wire(&figures.extent),
            });
            if stored.chunks_held() > CHUNKS_KEPT {
                stored.forget_chunks();
            }
        }
        let mut written = state.written.lock().expect("written");
        for (at, id) in &ids {
            let name = names[at.pack as usize];
            let pack = written.pack_index(name);
            written.quads.insert(*id, (pack, at.record));
        }
        for piece in &pieces {
            written.add_piece(names[piece.pack as usize], piece.record, ids[piece]);
        }
        Ok(v1::LoadReply {
            pieces: out,
            records_read: stored.records_decoded,
            chunks_read: stored.chunks_read,
        })
    })
    .await
    .map_err(|error| Status::internal(format!("loading pieces failed: {error}")))?
}

/// Which of `pieces` the node holds already, from the packs it wrote or read.
fn held(
    state: &NodeState,
    packs: &[StoredPack],
    pieces: &[QuadAt],
) -> Result<v1::LoadReply, Status> {
    let written = state.written.lock().expect("written");
    let mut guard = state.shard.lock().expect("shard");
    let shard = guard
        .as_mut()
        .ok_or_else(|| Status::failed_precondition("this node has not joined a job"))?;
    let mut out = Vec::with_capacity(pieces.len());
    for piece in pieces {
        let found = written
            .piece_at(&packs[piece.pack as usize].name, piece.record)
            .and_then(|id| shard.figures(&id).map(|figures| (id, figures)));
        // Found: held from now on, as pieces read are (else the collector
        // could take it before the coordinator's retain names it).
        if let Some((id, _)) = &found {
            shard.hold(id).map_err(wire::shard_status)?;
        }
        out.push(match found {
            Some((id, figures)) => v1::LoadedPiece {
                id: id.0.to_vec(),
                population: figures.population,
                extent: wire::extent_to_wire(&figures.extent),
            },
            None => v1::LoadedPiece::default(),
        });
    }
    Ok(v1::LoadReply {
        pieces: out,
        records_read: 0,
        chunks_read: 0,
    })
}

/// The records under the stored quad at `root` (of `level`) that `ids`
/// does not have yet, children before parents, with their content ids
/// computed from the cells; `ids` learns each one's id.
pub(crate) fn read_subtree(
    stored: &mut StoredState<'_>,
    root: QuadAt,
    level: u32,
    ids: &mut HashMap<QuadAt, ContentId, ahash::RandomState>,
    visited: &mut std::collections::HashSet<QuadAt, ahash::RandomState>,
    empties: &mut Vec<ContentId>,
) -> Result<Vec<(ContentId, Record)>, deeptime_engine::pack::ReadError> {
    let mut empty = |level: u32| -> ContentId {
        while empties.len() <= (level - LEAF_LEVEL) as usize {
            let id = match empties.last() {
                None => ContentId::of_leaf(0),
                Some(below) => ContentId::of_inner(LEAF_LEVEL + empties.len() as u32, [*below; 4]),
            };
            empties.push(id);
        }
        empties[(level - LEAF_LEVEL) as usize]
    };
    let mut records = Vec::new();
    stored.post_order(root, level, LEAF_LEVEL, visited, &mut |at, level, quad| {
        let (id, record) = match quad {
            Visited::Leaf(bits) => (ContentId::of_leaf(bits), Record::Leaf(bits)),
            Visited::Inner(kids) => {
                let kids = kids.map(|kid| match kid {
                    StoredNode::Empty => empty(level - 1),
                    StoredNode::At(kid) => ids[&kid],
                });
                (
                    ContentId::of_inner(level, kids),
                    Record::Inner { level, kids },
                )
            }
        };
        ids.insert(at, id);
        records.push((id, record));
    })?;
    Ok(records)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn id(n: u8) -> ContentId {
        ContentId([n; 16])
    }

    fn name(n: u8) -> Checksum {
        Checksum([n; 16])
    }

    #[test]
    fn written_quads_are_found_only_in_base_packs_and_pruned_to_them_and_the_shard() {
        // Common practice for incremental content-addressed writes: refer
        // only to what the reader is told to read.
        let mut written = Written::default();
        written.add(name(1), &[id(10), id(11)]);
        written.add(name(2), &[id(20), id(11)]);
        written.add_piece(name(2), 0, id(20));
        let base: HashMap<Checksum, u32> = [(name(2), 0)].into();
        // id 10 is only in pack 1, which is not in the base.
        assert_eq!(written.locate(&id(10), &base), None);
        let (pack, at) = written.locate(&id(20), &base).unwrap();
        assert_eq!((pack, at.pack, at.record), (name(2), 0, 0));
        // id 11 is in both: found at its newest place, in the base.
        let (pack, at) = written.locate(&id(11), &base).unwrap();
        assert_eq!((pack, at.record), (name(2), 1));
        assert_eq!(written.piece_at(&name(2), 0), Some(id(20)));
        // Pruned to the base and to what the shard has.
        written.prune(&base, |quad| *quad != id(20));
        assert_eq!(written.quads.len(), 1, "{:?}", written.quads);
        assert!(written.quads.contains_key(&id(11)));
        assert_eq!(written.piece_at(&name(2), 0), None);
    }
}
