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

use deeptime_engine::ContentId;
use deeptime_engine::pack::{Checksum, QuadAt};
use deeptime_proto::v1;
use tonic::Status;

use crate::service::NodeState;
use crate::storage::{self, Storage};
use crate::wire;

/// The checkpoint folder a node writes to.
pub struct Checkpoints {
    /// its identity (`storage::location`), compared with the job's
    pub location: String,
    storage: Arc<dyn Storage>,
}

impl Checkpoints {
    pub fn open(dir: &Path) -> anyhow::Result<Checkpoints> {
        let location = storage::location(dir).map_err(|error| {
            anyhow::anyhow!("--checkpoint-dir {}: {error}", dir.display())
        })?;
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
    quads: HashMap<ContentId, (u32, u32), ahash::RandomState>,
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

    fn add(&mut self, name: Checksum, ids: &[ContentId]) {
        let pack = self.packs.len() as u32;
        self.packs.push(name);
        for (record, id) in ids.iter().enumerate() {
            self.quads.entry(*id).or_insert((pack, record as u32));
        }
    }
}

/// The packs a manifest may list (as CHECKPOINTS.md bounds them).
const MAX_BASE: usize = 4096;

/// Writes the pack of a WritePack request and says where each piece is.
pub async fn write_pieces(
    state: &Arc<NodeState>,
    request: v1::WritePackRequest,
) -> Result<v1::WritePackReply, Status> {
    let started = Instant::now();
    let checkpoints = state.checkpoints.as_ref().ok_or_else(|| {
        Status::failed_precondition("this node writes no checkpoints (it has no --checkpoint-dir)")
    })?;
    if request.checkpoint_dir != checkpoints.location {
        return Err(Status::failed_precondition(format!(
            "this node writes checkpoints to {}, the job's are at {}",
            checkpoints.location, request.checkpoint_dir
        )));
    }
    if request.base.len() > MAX_BASE {
        return Err(Status::invalid_argument(format!(
            "a base of {} packs (at most {MAX_BASE})",
            request.base.len()
        )));
    }
    let mut base = Vec::with_capacity(request.base.len());
    for name in &request.base {
        base.push(Checksum(wire::id_from(name)?.0));
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
            let known = state.written.lock().expect("written");
            let mut guard = state.shard.lock().expect("shard");
            let shard = guard
                .as_mut()
                .ok_or_else(|| Status::failed_precondition("this node has not joined a job"))?;
            let locate = |id: &ContentId| known.locate(id, &index).map(|(_, at)| at);
            shard
                .write_pack(&pieces, &locate, &base)
                .map_err(wire::shard_status)?
        };
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
        let known = state.written.lock().expect("written");
        let mut places = Vec::with_capacity(pieces.len());
        for piece in &pieces {
            let place = match (new_records.get(piece), name) {
                (Some(&record), Some(name)) => v1::PiecePlace {
                    pack: name.0.to_vec(),
                    record,
                },
                _ => {
                    let (name, at) = known.locate(piece, &index).ok_or_else(|| {
                        Status::internal(format!("piece {} is in no pack", piece.short()))
                    })?;
                    v1::PiecePlace {
                        pack: name.0.to_vec(),
                        record: at.record,
                    }
                }
            };
            places.push(place);
        }
        Ok(v1::WritePackReply {
            pack,
            places,
            write_us: started.elapsed().as_micros() as u64,
        })
    })
    .await
    .map_err(|error| Status::internal(format!("writing a pack failed: {error}")))?
}
