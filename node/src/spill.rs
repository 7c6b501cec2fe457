//! Spilling: a node whose store is full writes the pieces it has held
//! longest to the run's storage (one pack per spill, under `spill/`) and
//! lets them go; a task or a peer that needs one again has it read back.
//! The coordinator's directory stays true: the node still answers for
//! every piece it was said to hold, from memory or from its spill packs.
//! A checkpoint that names a spilled piece gets a copy of its spill pack
//! among the checkpoint's packs (a pack is self-contained, so the copy is
//! a plain byte copy that needs none of the store's memory).

use std::collections::{HashMap, HashSet};
use std::sync::Arc;

use deeptime_engine::ContentId;
use deeptime_engine::pack::{Checksum, QuadAt};
use deeptime_engine::shard::{Shard, ShardError};
use deeptime_engine::stored::{StoredPack, StoredState};
use deeptime_proto::v1;
use deeptime_storage::{self as storage, Storage};
use tonic::Status;

/// What a shard's work on a node fails with: the shard's refusal, which a
/// spill may cure when it is a full store, or the storage's.
pub(crate) enum Failure {
    Shard(ShardError),
    Storage(Status),
}

impl From<ShardError> for Failure {
    fn from(error: ShardError) -> Failure {
        Failure::Shard(error)
    }
}

impl From<Status> for Failure {
    fn from(status: Status) -> Failure {
        Failure::Storage(status)
    }
}

/// Where pieces are: pack and record.
pub(crate) type Places = HashMap<ContentId, (Checksum, u32)>;

/// What a spill did.
pub(crate) enum Spilled {
    /// let go of at least one piece
    LetGo,
    /// nothing: no piece it may let go of is held
    Nothing,
    /// nothing: writing them would pass the spill limit
    OverLimit,
}

/// One spill pack: what a manifest would list of it, and how many pieces
/// it is the copy of (at none, it is deleted).
struct SpillPack {
    bytes: u64,
    records: u64,
    table: Checksum,
    copies: usize,
}

/// A piece's copy in a spill pack.
#[derive(Clone, Copy)]
struct Copy {
    pack: Checksum,
    record: u32,
    level: u32,
    /// the piece is not held in memory now (it was spilled and not read
    /// back since)
    away: bool,
}

/// A node's spilled pieces and their packs.
pub struct Spill {
    storage: Arc<dyn Storage>,
    /// `spill/<this node's random tag>-`: apart from the checkpoints'
    /// packs (which pruning deletes unless a manifest lists them) and from
    /// other nodes' spills, in one folder (storages list one level)
    prefix: String,
    /// the most bytes of spill packs kept at once
    limit: u64,
    /// bytes of the spill packs kept now
    bytes: u64,
    packs: HashMap<Checksum, SpillPack>,
    /// the pieces spilled since the coordinator last named what to keep:
    /// a piece read back keeps its copy, so spilling it again is free
    pieces: HashMap<ContentId, Copy>,
}

impl Spill {
    /// Spills into `storage`, keeping at most `limit` bytes there at once.
    pub fn new(storage: Arc<dyn Storage>, limit: u64) -> Spill {
        Spill {
            storage,
            prefix: format!("spill/{:016x}-", rand::random::<u64>()),
            limit,
            bytes: 0,
            packs: HashMap::new(),
            pieces: HashMap::new(),
        }
    }

    fn key(&self, name: &Checksum) -> String {
        format!("{}{name}.pack", self.prefix)
    }

    /// Whether `id` is spilled (and not held in memory now).
    pub fn holds(&self, id: &ContentId) -> bool {
        self.pieces.get(id).is_some_and(|copy| copy.away)
    }

    /// Lets go of half of the pieces `shard` holds outside `spare`, the
    /// longest held first: those with a copy in a spill pack at once, the
    /// rest written to a new one.
    pub(crate) fn spill(
        &mut self,
        shard: &mut Shard,
        spare: &HashSet<ContentId>,
    ) -> Result<Spilled, Failure> {
        let spillable = shard.held().saturating_sub(spare.len());
        let chosen = shard.oldest_held(spillable.div_ceil(2).max(1), spare);
        if chosen.is_empty() {
            return Ok(Spilled::Nothing);
        }
        let (copied, chosen): (Vec<ContentId>, Vec<ContentId>) = chosen
            .into_iter()
            .partition(|id| self.pieces.contains_key(id));
        for id in &copied {
            self.pieces.get_mut(id).expect("partitioned").away = true;
        }
        shard.release(&copied);
        // What was let go of without writing, or else what stopped it.
        let only_copied = |otherwise| {
            if copied.is_empty() {
                otherwise
            } else {
                Spilled::LetGo
            }
        };
        if chosen.is_empty() {
            tracing::debug!(pieces = copied.len(), "store full: let go of copied pieces");
            return Ok(only_copied(Spilled::Nothing));
        }
        let Some(written) = shard.write_pack(&chosen, &|_| None, &[])? else {
            return Ok(only_copied(Spilled::Nothing));
        };
        let size = written.bytes.len() as u64;
        if self.bytes + size > self.limit {
            return Ok(only_copied(Spilled::OverLimit));
        }
        let name = deeptime_engine::pack::pack_name(&written.bytes);
        let key = self.key(&name);
        self.storage
            .replace(&key, &written.bytes)
            .map_err(|error| {
                Status::internal(format!(
                    "cannot spill to {}: {error}",
                    self.storage.locate(&key)
                ))
            })?;
        let records: HashMap<ContentId, u32> = written
            .ids
            .iter()
            .enumerate()
            .map(|(record, id)| (*id, record as u32))
            .collect();
        let pack = self.packs.entry(name).or_insert(SpillPack {
            bytes: size,
            records: written.records,
            table: written.table,
            copies: 0,
        });
        if pack.copies == 0 {
            self.bytes += size;
        }
        for id in &chosen {
            let level = shard.level_of(id).expect("a held piece is here");
            self.pieces.insert(
                *id,
                Copy {
                    pack: name,
                    record: records[id],
                    level,
                    away: true,
                },
            );
            pack.copies += 1;
        }
        shard.release(&chosen);
        tracing::info!(
            "store full: spilled {} pieces ({}) to storage, {} spilled now",
            chosen.len() + copied.len(),
            deeptime_engine::human_bytes(size),
            deeptime_engine::human_bytes(self.bytes)
        );
        Ok(Spilled::LetGo)
    }

    /// The limit, as the out-of-memory message names it.
    pub fn limit_text(&self) -> String {
        format!(
            "its --spill-limit of {} is reached",
            deeptime_engine::human_bytes(self.limit)
        )
    }

    /// Reads back those of `ids` that were spilled (`reload`).
    pub(crate) fn reload_all(
        &mut self,
        shard: &mut Shard,
        ids: &[ContentId],
    ) -> Result<(), Failure> {
        for id in ids {
            self.reload(shard, id)?;
        }
        Ok(())
    }

    /// Makes a spilled piece held in `shard` again: at once when the
    /// collector has not taken it yet, else read back from its pack.
    /// False when `id` was not spilled.
    pub(crate) fn reload(&mut self, shard: &mut Shard, id: &ContentId) -> Result<bool, Failure> {
        let Some(&Copy {
            pack: name,
            record,
            level,
            away: true,
        }) = self.pieces.get(id)
        else {
            return Ok(false);
        };
        if !shard.has(id) {
            let key = self.key(&name);
            let pack = &self.packs[&name];
            let mut fetch = storage::PackFetch {
                storage: self.storage.as_ref(),
                keys: vec![key.clone()],
            };
            let packs = vec![StoredPack {
                name,
                bytes: pack.bytes,
                records: pack.records,
                table: pack.table,
                place: self.storage.locate(&key),
            }];
            let mut stored = StoredState::over(&mut fetch, packs, shard.rule());
            let records = crate::packs::read_subtree(
                &mut stored,
                QuadAt { pack: 0, record },
                level,
                &mut HashMap::default(),
                &mut HashSet::default(),
                &mut Vec::new(),
            )
            .map_err(|error| Status::data_loss(format!("reading back a spilled piece: {error}")))?;
            shard.take(&records, id)?;
            tracing::debug!(piece = %id.short(), "read back a spilled piece");
        } else {
            shard.hold(id)?;
        }
        self.pieces.get_mut(id).expect("found above").away = false;
        Ok(true)
    }

    /// Forgets a piece's copy; a pack that is the copy of no piece any
    /// more is deleted.
    fn forget(&mut self, id: &ContentId) {
        let Some(Copy { pack: name, .. }) = self.pieces.remove(id) else {
            return;
        };
        let pack = self.packs.get_mut(&name).expect("a spilled piece's pack");
        pack.copies -= 1;
        if pack.copies == 0 {
            self.bytes -= pack.bytes;
            self.packs.remove(&name);
            let key = self.key(&name);
            if let Err(error) = self.storage.delete(&key) {
                tracing::warn!(
                    "cannot delete spill pack {}: {error}",
                    self.storage.locate(&key)
                );
            }
        }
    }

    /// Forgets the copies of pieces outside `keep` (the coordinator's
    /// retain).
    pub fn forget_unless(&mut self, keep: &HashSet<ContentId>) {
        let gone: Vec<ContentId> = self
            .pieces
            .keys()
            .filter(|id| !keep.contains(id))
            .copied()
            .collect();
        for id in &gone {
            self.forget(id);
        }
    }

    /// For a checkpoint: stores a copy of the spill pack of each spilled
    /// piece among `pieces` as a checkpoint pack; returns the packs copied
    /// and where each of those pieces is.
    pub(crate) fn copy_into_packs(
        &self,
        pieces: &[ContentId],
    ) -> Result<(Vec<v1::PackWritten>, Places), Status> {
        let mut copied = Vec::new();
        let mut places = HashMap::new();
        let mut done = HashSet::new();
        for id in pieces {
            let Some(&Copy {
                pack: name, record, ..
            }) = self.pieces.get(id)
            else {
                continue;
            };
            places.insert(*id, (name, record));
            if !done.insert(name) {
                continue;
            }
            let pack = &self.packs[&name];
            let key = self.key(&name);
            let bytes = self
                .storage
                .get(&key, pack.bytes)
                .map_err(|error| {
                    Status::internal(format!(
                        "cannot read {}: {error}",
                        self.storage.locate(&key)
                    ))
                })?
                .ok_or_else(|| {
                    Status::data_loss(format!("spill pack {} is gone", self.storage.locate(&key)))
                })?;
            storage::put_pack(self.storage.as_ref(), &bytes)
                .map_err(|error| Status::internal(format!("{error:#}")))?;
            copied.push(v1::PackWritten {
                name: name.0.to_vec(),
                bytes: pack.bytes,
                records: pack.records,
                table: pack.table.0.to_vec(),
            });
        }
        if !places.is_empty() {
            tracing::info!(
                "a checkpoint takes {} spilled pieces in copies of {} spill packs",
                places.len(),
                copied.len()
            );
        }
        Ok((copied, places))
    }
}

impl Drop for Spill {
    /// A node that stops (or leaves the job) takes its spill packs along.
    fn drop(&mut self) {
        for name in self.packs.keys() {
            let _ = self.storage.delete(&self.key(name));
        }
    }
}
