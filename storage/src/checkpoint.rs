//! A run's checkpoints over a storage backend: manifests (one per stored
//! generation, written last and atomically) naming the packs they need and
//! where the root record is; whole reads (resume, verify) that check
//! everything, and on-demand reads of one stored state (snapshots).
//! CHECKPOINTS.md specifies the layout and the manifest's fields.

use std::collections::HashSet;

use deeptime_engine::finite::Space;
use deeptime_engine::pack::{Checksum, PackError, QuadAt, WrittenPack, pack_name};
use deeptime_engine::rule::{Background, Rule};
use deeptime_engine::stored::{StoredPack, StoredState};
use deeptime_engine::{BoundingBox, ContentId, KnownQuads, PackInput, Universe};
use num_bigint::{BigInt, BigUint};
use serde::{Deserialize, Serialize};

use deeptime_engine::{BadInput, BudgetExceeded};

use crate::{self as storage, PackFetch, Storage, pack_key};

/// What reading or writing a run's checkpoints fails with. Only `Damaged`
/// sends a reader to an earlier checkpoint; the rest stop it, so that a
/// storage that fails for a moment or a budget too small never passes for
/// damage (and a run never goes back for them).
#[derive(Debug, thiserror::Error)]
pub enum CheckpointError {
    /// Something the user can fix: a folder that does not exist, a
    /// checkpoint of another format version, `keep` 0.
    #[error(transparent)]
    BadInput(#[from] BadInput),
    /// A stored object that is missing or does not read back as written:
    /// this checkpoint is damaged, an earlier one may do.
    #[error("{0}")]
    Damaged(String),
    /// The state does not fit the memory budget.
    #[error(transparent)]
    Budget(#[from] BudgetExceeded),
    /// The storage failed (a disk, the network): nothing is known of the
    /// checkpoint.
    #[error("{0}")]
    Storage(String),
}

impl CheckpointError {
    /// Whether the checkpoint read is damaged (an earlier one may do).
    pub fn is_damage(&self) -> bool {
        matches!(self, CheckpointError::Damaged(_))
    }

    /// Whether an error is, at its root, damage of a stored checkpoint:
    /// the checkpoint's own, or of a stored quad read on demand (directly,
    /// or while a state was written as text or drawn).
    pub fn is_damage_in(error: &anyhow::Error) -> bool {
        use deeptime_engine::WriteError;
        use deeptime_engine::pack::ReadError;
        use deeptime_engine::render::RenderError;
        error.chain().any(|cause| {
            if let Some(error) = cause.downcast_ref::<CheckpointError>() {
                return error.is_damage();
            }
            let read = cause.downcast_ref::<ReadError>().or_else(|| {
                match (
                    cause.downcast_ref::<WriteError>(),
                    cause.downcast_ref::<RenderError>(),
                ) {
                    (Some(WriteError::Read(read)), _) | (_, Some(RenderError::Read(read))) => {
                        Some(read)
                    }
                    _ => None,
                }
            });
            read.is_some_and(|read| {
                matches!(
                    read.error,
                    PackError::Malformed { .. } | PackError::Fetch(_)
                )
            })
        })
    }
}

type Result<T> = std::result::Result<T, CheckpointError>;

/// A damaged object, as an error.
fn damaged(text: impl Into<String>) -> CheckpointError {
    CheckpointError::Damaged(text.into())
}

/// A failed storage call on `place`, as an error.
fn unreadable(what: &str, place: &str, error: impl std::fmt::Display) -> CheckpointError {
    CheckpointError::Storage(format!("cannot {what} {place}: {error}"))
}

/// The storage of a run that is there to read: its folder (or `s3://`
/// URL). A local folder that does not exist is the user's mistake, not an
/// empty run, and is not made.
pub fn open_existing(dir: &std::path::Path) -> Result<Box<dyn Storage>> {
    let is_url = dir.to_string_lossy().contains("s3://");
    if !is_url && !dir.is_dir() {
        return Err(BadInput(format!("{}: no such folder", dir.display())).into());
    }
    storage::open(dir).map_err(|error| unreadable("open", &dir.display().to_string(), error))
}

/// The manifest format's name and version.
pub const FORMAT: &str = "deeptime-checkpoint";
pub const VERSION: u32 = 2;
/// Manifests larger than this are not read (a real one is a few KiB).
const MAX_MANIFEST_BYTES: u64 = 64 << 20;
/// A manifest lists at most this many packs (a cluster checkpoint lists one
/// per node and one for the top), so manifests and reads stay bounded.
pub const MAX_PACKS: usize = 1024;
/// A checkpoint whose list would pass this many packs stands alone: it
/// stores its whole state in packs of its own and lists only those.
pub const STAND_ALONE_AFTER: usize = 64;

/// One stored generation.
#[derive(Serialize, Deserialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct Manifest {
    /// always "deeptime-checkpoint"
    pub format: String,
    /// the manifest format version (2)
    pub version: u32,
    /// 1, 2, 3... in the order checkpoints were written
    pub sequence: u64,
    /// the job's name
    pub name: String,
    /// the rule, canonical B/S text
    pub rule: String,
    /// the digest of the job's pattern at generation 0 (identifies the run)
    pub pattern: String,
    /// the generation stored, decimal
    pub generation: String,
    /// content id of the state's canonical root: its digest
    pub root: String,
    /// the pack that holds the root record, by index in `packs`
    pub root_pack: u32,
    /// the root's record number in that pack
    pub root_record: u32,
    /// live cells, decimal; when `background` is alive, the dead cells
    pub population: String,
    /// the extent of the cells that differ from the background (decimal
    /// strings), null when there are none
    pub bbox: Option<BoxText>,
    /// `alive` when the background is (a B0 rule's); absent when dead.
    /// The rule and generation say it too: this is for people reading.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub background: Option<String>,
    /// every pack the state needs, in the order to read them
    pub packs: Vec<PackEntry>,
    /// seconds since 1970 when the manifest was written
    pub written: u64,
    /// the bounded universe the run lives in (`torus WxH`, `bounded WxH`);
    /// absent on the unbounded plane
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub universe: Option<String>,
    /// where the bounded universe's top-left cell stands on the plane
    /// (x, y); absent on the plane, and read as (0, 0) when absent
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub origin: Option<(i64, i64)>,
}

/// What a run's checkpoints say it is: the job's name, the digest of its
/// pattern at generation 0 and the universe it lives in.
#[derive(Clone, Copy, Debug)]
pub struct RunIdentity<'a> {
    pub name: &'a str,
    pub pattern: &'a ContentId,
    pub universe: Space,
    /// where a bounded universe's top-left cell stands on the plane
    pub origin: (i64, i64),
}

/// A pack a manifest needs.
#[derive(Serialize, Deserialize, Debug, Clone, PartialEq, Eq)]
#[serde(deny_unknown_fields)]
pub struct PackEntry {
    /// the pack's BLAKE3-128 hash in hex, also its file name
    pub name: String,
    /// its size in bytes
    pub bytes: u64,
    /// quad records in it
    pub records: u64,
    /// the BLAKE3-128 checksum of its table, in hex
    pub table: String,
}

/// A bounding box in a manifest: decimal strings.
#[derive(Serialize, Deserialize, Debug, Clone, PartialEq, Eq)]
#[serde(deny_unknown_fields)]
pub struct BoxText {
    pub left: String,
    pub top: String,
    pub width: String,
    pub height: String,
}

impl BoxText {
    fn of(bbox: &BoundingBox) -> BoxText {
        BoxText {
            left: bbox.left.to_string(),
            top: bbox.top.to_string(),
            width: bbox.width.to_string(),
            height: bbox.height.to_string(),
        }
    }

    /// The box, checked: integers, width and height at least 1.
    pub fn parse(&self) -> Result<BoundingBox> {
        let signed = |text: &str, what: &str| -> Result<BigInt> {
            let digits = text.strip_prefix('-').unwrap_or(text);
            decimal(digits, what)?;
            Ok(text.parse().expect("digits parse"))
        };
        let bbox = BoundingBox {
            left: signed(&self.left, "bbox.left")?,
            top: signed(&self.top, "bbox.top")?,
            width: decimal(&self.width, "bbox.width")?,
            height: decimal(&self.height, "bbox.height")?,
        };
        if bbox.width == BigUint::ZERO || bbox.height == BigUint::ZERO {
            return Err(damaged("bbox is empty"));
        }
        Ok(bbox)
    }
}

impl Manifest {
    fn key(sequence: u64) -> String {
        format!("manifests/{sequence:010}.json")
    }

    /// Parses and checks the manifest stored under `key` (its sequence
    /// must match the key) from its bytes; `place` names it in messages.
    pub fn parse(bytes: &[u8], key: &str, place: &str) -> Result<Manifest> {
        let place = place.to_string();
        let at = |error: serde_json::Error| {
            damaged(format!(
                "{place}:{}:{}: {error}",
                error.line(),
                error.column()
            ))
        };
        // The version first: a manifest of another version is not damaged,
        // and its fields differ.
        let value: serde_json::Value = serde_json::from_slice(bytes).map_err(at)?;
        let format = value.get("format").and_then(|v| v.as_str());
        let version = value.get("version").and_then(|v| v.as_u64());
        if format == Some(FORMAT)
            && let Some(version) = version
            && version != VERSION as u64
        {
            return Err(BadInput(format!(
                "{place}: checkpoint format version {version}, which this build does not read \
                 (it reads version {VERSION}): run the job into a new checkpoint.dir, or open \
                 this one with the deeptime that wrote it"
            ))
            .into());
        }
        let manifest: Manifest = serde_json::from_slice(bytes).map_err(at)?;
        if manifest.format != FORMAT || manifest.version != VERSION {
            return Err(damaged(format!(
                "{place}: format {} version {} (this build reads {FORMAT} version {VERSION})",
                manifest.format, manifest.version
            )));
        }
        if Manifest::key(manifest.sequence) != key {
            return Err(damaged(format!(
                "{place}: holds sequence {}",
                manifest.sequence
            )));
        }
        decimal(&manifest.generation, "generation")
            .map_err(|error| damaged(format!("{place}: {error}")))?;
        decimal(&manifest.population, "population")
            .map_err(|error| damaged(format!("{place}: {error}")))?;
        if manifest.packs.len() > MAX_PACKS {
            return Err(damaged(format!(
                "{place}: lists {} packs (at most {MAX_PACKS})",
                manifest.packs.len()
            )));
        }
        let mut names = HashSet::new();
        for pack in &manifest.packs {
            if !names.insert(pack.name.as_str()) {
                return Err(damaged(format!("{place}: lists pack {} twice", pack.name)));
            }
            hex(&pack.name, "pack name").map_err(|error| damaged(format!("{place}: {error}")))?;
            hex(&pack.table, "pack table").map_err(|error| damaged(format!("{place}: {error}")))?;
        }
        hex(&manifest.root, "root").map_err(|error| damaged(format!("{place}: {error}")))?;
        let root_pack = manifest.packs.get(manifest.root_pack as usize);
        if root_pack.is_none_or(|pack| manifest.root_record as u64 >= pack.records) {
            return Err(damaged(format!(
                "{place}: the root record {} of pack {} is not among the packs listed",
                manifest.root_record, manifest.root_pack
            )));
        }
        let empty = manifest.population()? == BigUint::ZERO;
        match &manifest.bbox {
            None if !empty => return Err(damaged(format!("{place}: live cells but no bbox"))),
            Some(_) if empty => return Err(damaged(format!("{place}: a bbox but no live cells"))),
            Some(bbox) => {
                bbox.parse()
                    .map_err(|error| damaged(format!("{place}: {error}")))?;
            }
            None => {}
        }
        Ok(manifest)
    }

    pub fn generation(&self) -> Result<BigUint> {
        decimal(&self.generation, "generation")
    }

    pub fn population(&self) -> Result<BigUint> {
        decimal(&self.population, "population")
    }

    /// The rule, read.
    pub fn rule(&self) -> Result<Rule> {
        Rule::parse(&self.rule)
            .map_err(|error| damaged(format!("manifest {}: {error}", self.sequence)))
    }

    /// The background at the stored generation, from the rule and the
    /// generation (the `background` field only repeats it for people): dead
    /// but under a B0 rule on the plane at a generation it brings to life.
    pub fn background(&self) -> Result<Background> {
        if self.universe.is_some() {
            // A torus or bounded plane has no background outside it.
            return Ok(Background::Dead);
        }
        Ok(self.rule()?.background(&self.generation()?))
    }

    /// Where the root record is.
    pub fn root_at(&self) -> QuadAt {
        QuadAt {
            pack: self.root_pack,
            record: self.root_record,
        }
    }

    /// Bytes of all packs this checkpoint needs.
    pub fn pack_bytes(&self) -> u64 {
        self.packs.iter().map(|pack| pack.bytes).sum()
    }
}

/// A decimal string as written by deeptime: digits only.
fn decimal(text: &str, what: &str) -> Result<BigUint> {
    if text.is_empty() || !text.bytes().all(|b| b.is_ascii_digit()) {
        return Err(damaged(format!("{what} {text:?} is not a decimal number")));
    }
    Ok(text.parse().expect("digits parse"))
}

/// A checksum or content id as written by deeptime: 32 lowercase hex digits.
fn hex(text: &str, what: &str) -> Result<Checksum> {
    text.parse()
        .map_err(|_| damaged(format!("{what} {text:?} is not 32 lowercase hex digits")))
}

/// A sample of a run's timeline taken between its checkpoints (a
/// checkpoint's own figures are in its manifest).
#[derive(Serialize, Deserialize, Debug, Clone, PartialEq, Eq)]
#[serde(deny_unknown_fields)]
pub struct TimelineSample {
    /// the generation, decimal
    pub generation: String,
    /// live cells, decimal; when `background` is alive, the dead cells
    pub population: String,
    /// the extent of the cells that differ from the background, null when
    /// there are none
    pub bbox: Option<BoxText>,
    /// the state's digest
    pub digest: String,
    /// `alive` when the background is (a B0 rule's); absent when dead
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub background: Option<String>,
}

/// What manifests and samples write of a background: `alive`, or nothing
/// for the dead background of every rule without B0.
pub fn background_field(background: Background) -> Option<String> {
    background.is_alive().then(|| background.name().to_string())
}

/// The background a timeline sample names (absent: dead).
pub fn background_of(field: Option<&str>) -> Background {
    Background::of(field == Some(Background::Alive.name()))
}

impl TimelineSample {
    /// The figures of `universe` now.
    pub fn of(universe: &mut Universe) -> Result<TimelineSample> {
        Ok(TimelineSample {
            generation: universe.generation().to_string(),
            population: universe.population().to_string(),
            bbox: universe.bounding_box().as_ref().map(BoxText::of),
            digest: universe.digest()?.to_string(),
            background: background_field(universe.background()),
        })
    }
}

/// Where the samples taken before the checkpoint of `sequence` are kept.
fn samples_key(sequence: u64) -> String {
    format!("timeline/{sequence:010}.json")
}

/// A state loaded from a checkpoint, with the content ids its packs hold.
pub struct Loaded {
    pub manifest: Manifest,
    pub universe: Universe,
    pub known: KnownQuads,
}

/// The checkpoints of one run.
pub struct Checkpoints {
    storage: Box<dyn Storage>,
}

impl Checkpoints {
    pub fn new(storage: Box<dyn Storage>) -> Checkpoints {
        Checkpoints { storage }
    }

    /// Takes the store's writer lock (see `Storage::lock`).
    pub fn lock(&self) -> Result<Option<std::fs::File>> {
        self.storage
            .lock()
            .map_err(|error| unreadable("lock", &self.storage.locate(".lock"), error))
    }

    /// The manifest keys, oldest first.
    pub fn manifest_keys(&self) -> Result<Vec<String>> {
        let keys = self
            .storage
            .list("manifests/")
            .map_err(|error| unreadable("list", &self.storage.locate("manifests"), error))?;
        Ok(keys
            .into_iter()
            .filter(|key| key.ends_with(".json"))
            .collect())
    }

    /// Reads and checks one manifest.
    pub fn manifest(&self, key: &str) -> Result<Manifest> {
        let place = self.storage.locate(key);
        let bytes = self
            .storage
            .get(key, MAX_MANIFEST_BYTES)
            .map_err(|error| unreadable("read", &place, error))?
            .ok_or_else(|| damaged(format!("{place} is missing")))?;
        Manifest::parse(&bytes, key, &place)
    }

    /// Every manifest that reads, oldest first, with its key. A damaged one
    /// is told to `skipped` and left out; anything else (another format
    /// version, a storage that fails) stops the listing.
    pub fn readable_manifests(
        &self,
        mut skipped: impl FnMut(CheckpointError),
    ) -> Result<Vec<(String, Manifest)>> {
        let mut readable = Vec::new();
        for key in self.manifest_keys()? {
            match self.manifest(&key) {
                Ok(manifest) => readable.push((key, manifest)),
                Err(error) if !error.is_damage() => return Err(error),
                Err(error) => skipped(error),
            }
        }
        Ok(readable)
    }

    /// Reads every pack of `manifest` whole, checks each against its name,
    /// size and table checksum, rebuilds the state and checks its digest,
    /// population and bounding box against the manifest's. Errors name the
    /// damaged file.
    pub fn load(&self, manifest: Manifest, budget: u64) -> Result<Loaded> {
        let mut packs = Vec::with_capacity(manifest.packs.len());
        for entry in &manifest.packs {
            let key = pack_key(&entry.name);
            let place = self.storage.locate(&key);
            let bytes = self
                .storage
                .get(&key, entry.bytes)
                .map_err(|error| unreadable("read", &place, error))?
                .ok_or_else(|| damaged(format!("{place} is missing")))?;
            if bytes.len() as u64 != entry.bytes {
                return Err(damaged(format!(
                    "{place}: {} bytes, the manifest says {}",
                    bytes.len(),
                    entry.bytes
                )));
            }
            if pack_name(&bytes).to_string() != entry.name {
                return Err(damaged(format!(
                    "{place}: content does not match its checksum (damaged)"
                )));
            }
            packs.push(bytes);
        }
        let root: ContentId = manifest.root.parse().map_err(|_| {
            damaged(format!(
                "manifest {}: root {:?} is not 32 lowercase hex digits",
                manifest.sequence, manifest.root
            ))
        })?;
        let rule = manifest.rule()?;
        let generation = manifest.generation()?;
        let mut inputs = Vec::with_capacity(packs.len());
        for (bytes, entry) in packs.iter().zip(&manifest.packs) {
            inputs.push(PackInput {
                bytes,
                table: Some(hex(&entry.table, "pack table")?),
                records: Some(entry.records),
            });
        }
        let (mut universe, known) =
            Universe::from_packs(inputs, root, manifest.root_at(), rule, generation, budget)
                .map_err(|(index, error)| {
                    let place = manifest
                        .packs
                        .get(index)
                        .map(|entry| self.storage.locate(&pack_key(&entry.name)))
                        .unwrap_or_else(|| "the packs".to_string());
                    from_pack_error(&place, error)
                })?;
        if manifest.universe.is_some() {
            universe.mark_bounded();
        }
        let digest = universe.digest()?;
        if digest != root {
            return Err(damaged(format!(
                "checkpoint {}: state has digest {digest}, the manifest says {root}",
                manifest.sequence
            )));
        }
        if universe.population().to_string() != manifest.population {
            return Err(damaged(format!(
                "checkpoint {}: population differs from the manifest",
                manifest.sequence
            )));
        }
        if universe.bounding_box().as_ref().map(BoxText::of) != manifest.bbox {
            return Err(damaged(format!(
                "checkpoint {}: bounding box differs from the manifest",
                manifest.sequence
            )));
        }
        Ok(Loaded {
            manifest,
            universe,
            known,
        })
    }

    /// Opens the state of `manifest` for reading on demand: only its root
    /// record now, then whatever a region or picture walks to. Each chunk
    /// read is checked against its table, each table against the manifest.
    pub fn open_stored(&self, manifest: &Manifest) -> Result<StoredParts<'_>> {
        let mut packs = Vec::with_capacity(manifest.packs.len());
        for entry in &manifest.packs {
            packs.push(StoredPack {
                name: hex(&entry.name, "pack name")?,
                bytes: entry.bytes,
                records: entry.records,
                table: hex(&entry.table, "pack table")?,
                place: self.storage.locate(&pack_key(&entry.name)),
            });
        }
        let fetch = PackFetch {
            storage: self.storage.as_ref(),
            keys: manifest
                .packs
                .iter()
                .map(|entry| pack_key(&entry.name))
                .collect(),
        };
        Ok(StoredParts {
            fetch,
            packs,
            root: manifest.root_at(),
            population: manifest.population()?,
            rule: (manifest.rule()?, manifest.background()?),
        })
    }

    /// The newest checkpoint that loads whole, going back past damaged
    /// ones (each reported through `warn`). None when there is none.
    pub fn latest_valid(
        &self,
        budget: u64,
        mut warn: impl FnMut(String),
    ) -> Result<Option<Loaded>> {
        for key in self.manifest_keys()?.iter().rev() {
            let loaded = self
                .manifest(key)
                .and_then(|manifest| self.load(manifest, budget));
            match loaded {
                Ok(loaded) => return Ok(Some(loaded)),
                // A budget too small, a checkpoint of another version or a
                // storage that fails is no damage: stop rather than skip.
                Err(error) if !error.is_damage() => return Err(error),
                Err(error) => warn(format!("skipping damaged checkpoint: {error}")),
            }
        }
        Ok(None)
    }

    /// Keeps the first checkpoint and the newest `keep` (at least one, else
    /// a bad-input error) and deletes the rest: manifests first, oldest first, then every pack no kept
    /// manifest needs. Returns (manifests, packs) deleted. A crash part way
    /// leaves only unneeded packs behind, which the next prune removes.
    pub fn prune(&self, keep: usize) -> Result<(usize, usize)> {
        if keep == 0 {
            return Err(BadInput("keep at least 1 checkpoint".to_string()).into());
        }
        // Only checkpoints that can be read count towards `keep`; damaged
        // manifests are left alone (verify reports them).
        // Packs of checkpoints of another version are not ours to judge,
        // nor those of a folder that cannot be read.
        let readable = self.readable_manifests(|_| {})?;
        // The first checkpoint stays too: the generations before the kept
        // ones can only be reached from it.
        let cut = readable.len().saturating_sub(keep);
        let first = usize::from(cut > 0);
        let old = &readable[first.min(cut)..cut];
        let kept = readable[..first].iter().chain(&readable[cut..]);
        let mut needed = HashSet::new();
        for (_, manifest) in kept {
            needed.extend(manifest.packs.iter().map(|pack| pack_key(&pack.name)));
        }
        let old: Vec<&String> = old.iter().map(|(key, _)| key).collect();
        for key in &old {
            self.storage
                .delete(key)
                .map_err(|error| unreadable("delete", &self.storage.locate(key), error))?;
        }
        let mut packs = 0;
        let listed = self
            .storage
            .list("packs/")
            .map_err(|error| unreadable("list", &self.storage.locate("packs"), error))?;
        for key in listed {
            if key.ends_with(".pack") && !needed.contains(&key) {
                self.storage
                    .delete(&key)
                    .map_err(|error| unreadable("delete", &self.storage.locate(&key), error))?;
                packs += 1;
            }
        }
        Ok((old.len(), packs))
    }

    /// Deletes what nodes spilled (`spill/`, CHECKPOINTS.md): called when
    /// a run has finished, when no node needs it any more (a node that
    /// stops in time deletes its own; a killed one leaves them behind).
    /// Returns how many objects went.
    pub fn sweep_spills(&self) -> Result<usize> {
        let listed = self
            .storage
            .list("spill/")
            .map_err(|error| unreadable("list", &self.storage.locate("spill"), error))?;
        for key in &listed {
            self.storage
                .delete(key)
                .map_err(|error| unreadable("delete", &self.storage.locate(key), error))?;
        }
        Ok(listed.len())
    }

    /// Writes a checkpoint of `universe`: the pack of quads no earlier pack
    /// holds, then the manifest, last. `previous` is the checkpoint it
    /// follows (its packs are needed too); `known` grows with the new ids.
    pub fn write(
        &self,
        universe: &mut Universe,
        previous: Option<&Manifest>,
        known: &mut KnownQuads,
        run: &RunIdentity<'_>,
    ) -> Result<Manifest> {
        let mut packs = previous.map(|m| m.packs.clone()).unwrap_or_default();
        if packs.len() >= STAND_ALONE_AFTER {
            // Consolidate: this checkpoint stands on one pack of its own.
            packs.clear();
            known.clear();
        }
        let mut names = Vec::with_capacity(packs.len());
        for entry in &packs {
            names.push(hex(&entry.name, "pack name")?);
        }
        let (digest, pack) = universe.write_pack(&|id| known.get(id).copied(), &names)?;
        let root_at = match pack {
            Some(WrittenPack {
                bytes,
                records,
                ids,
                table,
            }) => {
                let name = self.put_pack(&bytes)?;
                let index = packs.len() as u32;
                packs.push(PackEntry {
                    name,
                    bytes: bytes.len() as u64,
                    records,
                    table: table.to_string(),
                });
                for (record, id) in ids.into_iter().enumerate() {
                    let at = QuadAt {
                        pack: index,
                        record: record as u32,
                    };
                    known.insert(id, at);
                }
                // A new root is its pack's last record.
                QuadAt {
                    pack: index,
                    record: (records - 1) as u32,
                }
            }
            None => *known
                .get(&digest)
                .ok_or_else(|| damaged("the state's root is in no pack of the run"))?,
        };
        self.commit(
            previous,
            Manifest {
                format: FORMAT.to_string(),
                version: VERSION,
                sequence: 0,
                name: run.name.to_string(),
                rule: universe.rule().to_string(),
                pattern: run.pattern.to_string(),
                generation: universe.generation().to_string(),
                root: digest.to_string(),
                root_pack: root_at.pack,
                root_record: root_at.record,
                population: universe.population().to_string(),
                bbox: universe.bounding_box().as_ref().map(BoxText::of),
                background: background_field(universe.background()),
                packs,
                written: 0,
                universe: (run.universe != Space::Plane).then(|| run.universe.to_string()),
                origin: (run.universe != Space::Plane).then_some(run.origin),
            },
        )
    }

    /// Stores the timeline samples taken since the checkpoint before
    /// `manifest`'s, beside it: written once, and left by `prune` (they are
    /// small, and the history is what they are for).
    pub fn put_samples(&self, manifest: &Manifest, samples: &[TimelineSample]) -> Result<()> {
        if samples.is_empty() {
            return Ok(());
        }
        let key = samples_key(manifest.sequence);
        let text = serde_json::to_vec(samples).expect("samples serialise");
        self.storage
            .put_new(&key, &text)
            .map_err(|error| unreadable("write", &self.storage.locate(&key), error))?;
        Ok(())
    }

    /// Every timeline sample stored between checkpoints; a file that does
    /// not parse is reported through `warn` and skipped.
    pub fn samples(&self, mut warn: impl FnMut(String)) -> Result<Vec<TimelineSample>> {
        let keys = self
            .storage
            .list("timeline/")
            .map_err(|error| unreadable("list", &self.storage.locate("timeline"), error))?;
        let mut samples = Vec::new();
        for key in keys.iter().filter(|key| key.ends_with(".json")) {
            let place = self.storage.locate(key);
            let Some(bytes) = self
                .storage
                .get(key, MAX_MANIFEST_BYTES)
                .map_err(|error| unreadable("read", &place, error))?
            else {
                continue;
            };
            match serde_json::from_slice::<Vec<TimelineSample>>(&bytes) {
                Ok(read) => samples.extend(read),
                Err(error) => warn(format!(
                    "skipping damaged timeline {place}:{}:{}: {error}",
                    error.line(),
                    error.column()
                )),
            }
        }
        Ok(samples)
    }

    /// Stores a pack (named by its content) for a checkpoint about to be
    /// committed; returns its name in hex.
    pub fn put_pack(&self, bytes: &[u8]) -> Result<String> {
        storage::put_pack(self.storage.as_ref(), bytes)
            .map_err(|error| CheckpointError::Storage(format!("{error:#}")))
    }

    /// Makes a checkpoint exist: gives `manifest` the next sequence number
    /// and the time, and writes it, last and atomically. Every pack it
    /// lists must be stored already.
    pub fn commit(&self, previous: Option<&Manifest>, mut manifest: Manifest) -> Result<Manifest> {
        manifest.sequence = match self.manifest_keys()?.last() {
            Some(last) => {
                last.trim_start_matches("manifests/")
                    .trim_end_matches(".json")
                    .parse::<u64>()
                    .unwrap_or(0)
                    .max(previous.map_or(0, |m| m.sequence))
                    + 1
            }
            None => 1,
        };
        manifest.written = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |elapsed| elapsed.as_secs());
        let key = Manifest::key(manifest.sequence);
        let text = serde_json::to_vec_pretty(&manifest).expect("a manifest serialises");
        let wrote = self
            .storage
            .put_new(&key, &text)
            .map_err(|error| unreadable("write", &self.storage.locate(&key), error))?;
        if !wrote {
            return Err(damaged(format!(
                "{} appeared while writing it: is another run using this folder?",
                self.storage.locate(&key)
            )));
        }
        Ok(manifest)
    }
}

/// What reading a stored state on demand needs: open it with
/// `StoredParts::state`.
pub struct StoredParts<'s> {
    fetch: PackFetch<'s>,
    packs: Vec<StoredPack>,
    root: QuadAt,
    population: BigUint,
    rule: (Rule, Background),
}

impl StoredParts<'_> {
    /// The state, its root record read and checked.
    pub fn state(&mut self) -> Result<StoredState<'_>> {
        StoredState::open(
            &mut self.fetch,
            self.packs.clone(),
            self.root,
            &self.population,
            self.rule,
        )
        .map_err(|error| from_pack_error(&error.place, error.error))
    }
}

/// A pack's error, as the checkpoint's: malformed or missing bytes are
/// damage, a storage that failed is not, a full store is the budget's.
pub fn from_pack_error(place: &str, error: PackError) -> CheckpointError {
    match error {
        PackError::Budget(budget) => CheckpointError::Budget(budget),
        PackError::Unreadable(text) => CheckpointError::Storage(format!("{place}: {text}")),
        damage @ (PackError::Malformed { .. } | PackError::Fetch(_)) => {
            damaged(format!("{place}: {damage}"))
        }
    }
}
