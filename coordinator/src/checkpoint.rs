//! A run's checkpoints over a storage backend: manifests (one per stored
//! generation, written last and atomically) naming the packs they need.
//! CHECKPOINTS.md specifies the layout and the manifest's fields.

use std::collections::HashSet;

use anyhow::{Context, bail};
use deeptime_engine::pack::{WrittenPack, pack_name};
use deeptime_engine::rule::Rule;
use deeptime_engine::{ContentId, Universe};
use num_bigint::BigUint;
use serde::{Deserialize, Serialize};

use crate::storage::Storage;

/// The manifest format's name and version.
pub const FORMAT: &str = "deeptime-checkpoint";
pub const VERSION: u32 = 1;
/// Manifests larger than this are not read (a real one is a few KiB).
const MAX_MANIFEST_BYTES: usize = 64 << 20;
/// A manifest lists at most this many packs: the checkpoint after one that
/// lists this many writes its whole state into one pack, so manifests and
/// reads stay bounded.
pub const MAX_PACKS: usize = 64;

/// One stored generation.
#[derive(Serialize, Deserialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct Manifest {
    /// always "deeptime-checkpoint"
    pub format: String,
    /// the manifest format version (1)
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
    /// live cells, decimal
    pub population: String,
    /// every pack the state needs, in the order to read them
    pub packs: Vec<PackEntry>,
    /// seconds since 1970 when the manifest was written
    pub written: u64,
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
}

impl Manifest {
    fn key(sequence: u64) -> String {
        format!("manifests/{sequence:010}.json")
    }

    pub fn generation(&self) -> anyhow::Result<BigUint> {
        decimal(&self.generation, "generation")
    }

    /// Bytes of all packs this checkpoint needs.
    pub fn pack_bytes(&self) -> u64 {
        self.packs.iter().map(|pack| pack.bytes).sum()
    }
}

/// A decimal string as written by deeptime: digits only.
fn decimal(text: &str, what: &str) -> anyhow::Result<BigUint> {
    if text.is_empty() || !text.bytes().all(|b| b.is_ascii_digit()) {
        bail!("{what} {text:?} is not a decimal number");
    }
    Ok(text.parse().expect("digits parse"))
}

fn pack_key(name: &str) -> String {
    format!("packs/{name}.pack")
}

/// A state loaded from a checkpoint, with the content ids its packs hold.
pub struct Loaded {
    pub manifest: Manifest,
    pub universe: Universe,
    pub known: HashSet<ContentId>,
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
    pub fn lock(&self) -> anyhow::Result<Option<std::fs::File>> {
        self.storage
            .lock()
            .with_context(|| format!("cannot lock {}", self.storage.locate(".lock")))
    }

    /// The manifest keys, oldest first.
    pub fn manifest_keys(&self) -> anyhow::Result<Vec<String>> {
        let keys = self
            .storage
            .list("manifests/")
            .with_context(|| format!("cannot list {}", self.storage.locate("manifests")))?;
        Ok(keys
            .into_iter()
            .filter(|key| key.ends_with(".json"))
            .collect())
    }

    /// Reads and checks one manifest.
    pub fn manifest(&self, key: &str) -> anyhow::Result<Manifest> {
        let place = self.storage.locate(key);
        let bytes = self
            .storage
            .get(key)
            .with_context(|| format!("cannot read {place}"))?
            .with_context(|| format!("{place} is missing"))?;
        if bytes.len() > MAX_MANIFEST_BYTES {
            bail!(
                "{place}: manifest of {} bytes is over the limit",
                bytes.len()
            );
        }
        let manifest: Manifest = serde_json::from_slice(&bytes).map_err(|error| {
            anyhow::anyhow!("{place}:{}:{}: {error}", error.line(), error.column())
        })?;
        if manifest.format != FORMAT || manifest.version != VERSION {
            bail!(
                "{place}: format {} version {} (this build reads {FORMAT} version {VERSION})",
                manifest.format,
                manifest.version
            );
        }
        if Manifest::key(manifest.sequence) != key {
            bail!("{place}: holds sequence {}", manifest.sequence);
        }
        decimal(&manifest.generation, "generation").with_context(|| place.clone())?;
        decimal(&manifest.population, "population").with_context(|| place.clone())?;
        if manifest.packs.len() > MAX_PACKS {
            bail!(
                "{place}: lists {} packs (at most {MAX_PACKS})",
                manifest.packs.len()
            );
        }
        let mut names = HashSet::new();
        for pack in &manifest.packs {
            if !names.insert(pack.name.as_str()) {
                bail!("{place}: lists pack {} twice", pack.name);
            }
        }
        Ok(manifest)
    }

    /// Reads every pack of `manifest`, checks each against its name and
    /// size, and rebuilds the state. Errors name the damaged file.
    pub fn load(&self, manifest: Manifest, budget: u64) -> anyhow::Result<Loaded> {
        let mut packs = Vec::with_capacity(manifest.packs.len());
        for entry in &manifest.packs {
            let key = pack_key(&entry.name);
            let place = self.storage.locate(&key);
            let bytes = self
                .storage
                .get(&key)
                .with_context(|| format!("cannot read {place}"))?
                .with_context(|| format!("{place} is missing"))?;
            if bytes.len() as u64 != entry.bytes {
                bail!(
                    "{place}: {} bytes, the manifest says {}",
                    bytes.len(),
                    entry.bytes
                );
            }
            if pack_name(&bytes) != entry.name {
                bail!("{place}: content does not match its checksum (damaged)");
            }
            let records = bytes
                .get(16..24)
                .map(|field| u64::from_le_bytes(field.try_into().expect("8 bytes")));
            if records != Some(entry.records) {
                bail!(
                    "{place}: holds {records:?} records, the manifest says {}",
                    entry.records
                );
            }
            packs.push(bytes);
        }
        let root: ContentId = manifest
            .root
            .parse()
            .ok()
            .filter(|id: &ContentId| id.to_string() == manifest.root)
            .with_context(|| {
                format!(
                    "manifest {}: root {:?} is not 32 lowercase hex digits",
                    manifest.sequence, manifest.root
                )
            })?;
        let rule = Rule::parse(&manifest.rule)
            .with_context(|| format!("manifest {}: bad rule", manifest.sequence))?;
        let generation = manifest.generation()?;
        let (mut universe, ids) = Universe::from_packs(
            packs.iter().map(|bytes| bytes.as_slice()),
            root,
            rule,
            generation,
            budget,
        )
        .map_err(|(index, error)| {
            let place = manifest
                .packs
                .get(index)
                .map(|entry| self.storage.locate(&pack_key(&entry.name)))
                .unwrap_or_else(|| "the packs".to_string());
            anyhow::anyhow!("{place}: {error}")
        })?;
        let digest = universe.digest()?;
        if digest != root {
            bail!(
                "checkpoint {}: state has digest {digest}, the manifest says {root}",
                manifest.sequence
            );
        }
        if universe.population().to_string() != manifest.population {
            bail!(
                "checkpoint {}: population differs from the manifest",
                manifest.sequence
            );
        }
        Ok(Loaded {
            manifest,
            universe,
            known: ids.into_iter().collect(),
        })
    }

    /// The newest checkpoint that loads whole, going back past damaged
    /// ones (each reported through `warn`). None when there is none.
    pub fn latest_valid(
        &self,
        budget: u64,
        mut warn: impl FnMut(String),
    ) -> anyhow::Result<Option<Loaded>> {
        for key in self.manifest_keys()?.iter().rev() {
            let loaded = self
                .manifest(key)
                .and_then(|manifest| self.load(manifest, budget));
            match loaded {
                Ok(loaded) => return Ok(Some(loaded)),
                Err(error) => {
                    if error
                        .chain()
                        .any(|cause| cause.is::<deeptime_engine::BudgetExceeded>())
                    {
                        return Err(error);
                    }
                    warn(format!("skipping damaged checkpoint: {error:#}"));
                }
            }
        }
        Ok(None)
    }

    /// Keeps the newest `keep` checkpoints (at least one) and deletes the
    /// rest: manifests first, oldest first, then every pack no kept
    /// manifest needs. Returns (manifests, packs) deleted. A crash part way
    /// leaves only unneeded packs behind, which the next prune removes.
    pub fn prune(&self, keep: usize) -> anyhow::Result<(usize, usize)> {
        let keep = keep.max(1);
        // Only checkpoints that can be read count towards `keep`; damaged
        // manifests are left alone (verify reports them).
        let mut readable = Vec::new();
        for key in self.manifest_keys()? {
            if let Ok(manifest) = self.manifest(&key) {
                readable.push((key, manifest));
            }
        }
        let cut = readable.len().saturating_sub(keep);
        let (old, kept) = readable.split_at(cut);
        let mut needed = HashSet::new();
        for (_, manifest) in kept {
            needed.extend(manifest.packs.iter().map(|pack| pack_key(&pack.name)));
        }
        let old: Vec<&String> = old.iter().map(|(key, _)| key).collect();
        for key in &old {
            self.storage
                .delete(key)
                .with_context(|| format!("cannot delete {}", self.storage.locate(key)))?;
        }
        let mut packs = 0;
        for key in self.storage.list("packs/")? {
            if key.ends_with(".pack") && !needed.contains(&key) {
                self.storage
                    .delete(&key)
                    .with_context(|| format!("cannot delete {}", self.storage.locate(&key)))?;
                packs += 1;
            }
        }
        Ok((old.len(), packs))
    }

    /// Writes a checkpoint of `universe`: the pack of quads no earlier pack
    /// holds, then the manifest, last. `previous` is the checkpoint it
    /// follows (its packs are needed too); `known` grows with the new ids.
    pub fn write(
        &self,
        universe: &mut Universe,
        previous: Option<&Manifest>,
        known: &mut HashSet<ContentId>,
        name: &str,
        pattern: &ContentId,
    ) -> anyhow::Result<Manifest> {
        let mut packs = previous.map(|m| m.packs.clone()).unwrap_or_default();
        if packs.len() >= MAX_PACKS {
            // Consolidate: this checkpoint stands on one pack of its own.
            packs.clear();
            known.clear();
        }
        let (digest, pack) = universe.write_pack(&|id| known.contains(id))?;
        if let Some(WrittenPack {
            bytes,
            records,
            ids,
        }) = pack
        {
            let name = pack_name(&bytes);
            let key = pack_key(&name);
            let place = self.storage.locate(&key);
            let wrote = self
                .storage
                .put_new(&key, &bytes)
                .with_context(|| format!("cannot write {place}"))?;
            // The same pack may be there from an earlier attempt: use it
            // only if it is whole, else put the good bytes in its place.
            if !wrote {
                let stored = self
                    .storage
                    .get(&key)
                    .with_context(|| format!("cannot read {place}"))?;
                if stored.as_deref() != Some(bytes.as_slice()) {
                    self.storage
                        .replace(&key, &bytes)
                        .with_context(|| format!("cannot repair {place}"))?;
                }
            }
            packs.push(PackEntry {
                name,
                bytes: bytes.len() as u64,
                records,
            });
            known.extend(ids);
        }
        let sequence = match self.manifest_keys()?.last() {
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
        let manifest = Manifest {
            format: FORMAT.to_string(),
            version: VERSION,
            sequence,
            name: name.to_string(),
            rule: universe.rule().to_string(),
            pattern: pattern.to_string(),
            generation: universe.generation().to_string(),
            root: digest.to_string(),
            population: universe.population().to_string(),
            packs,
            written: std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map_or(0, |elapsed| elapsed.as_secs()),
        };
        let key = Manifest::key(sequence);
        let text = serde_json::to_vec_pretty(&manifest)?;
        let wrote = self
            .storage
            .put_new(&key, &text)
            .with_context(|| format!("cannot write {}", self.storage.locate(&key)))?;
        if !wrote {
            bail!(
                "{} appeared while writing it: is another run using this folder?",
                self.storage.locate(&key)
            );
        }
        Ok(manifest)
    }
}
