//! Packs: a state's quads as a compressed file of records, children before
//! parents, and the reverse, with nothing in the input trusted.
//!
//! The format is specified in CHECKPOINTS.md. In short: a 32-byte header
//! (magic `deeptime`, kind `pack`, version, record count, body length) and a
//! zstd frame holding the body. Records are leaves (`0x00` + 8 bytes) or
//! inner quads (`0x01` + level + four child references); a reference names
//! an earlier record of the same pack, a quad of an earlier pack by content
//! id, or the empty quad of the level below. A pack is named by the BLAKE3
//! hash of its bytes, so it is written once and checked on every read.

use std::collections::HashMap;

use crate::content_id::ContentId;
use crate::error::BudgetExceeded;
use crate::store::{Handle, LEAF_LEVEL, Store};

/// The first 12 bytes of every pack.
pub const PACK_MAGIC: &[u8; 12] = b"deeptimepack";
/// The pack format version this engine writes and reads.
pub const PACK_VERSION: u32 = 1;
const HEADER_BYTES: usize = 32;
/// Bodies larger than this are refused before decompression.
pub const MAX_BODY_BYTES: u64 = 4 << 30;
/// No level above this can come from a real run (generations are capped at
/// 10^6 bits).
const MAX_LEVEL: u32 = 1 << 21;
/// zstd level: fast, and most of the gain.
const ZSTD_LEVEL: i32 = 3;

const TAG_LEAF: u8 = 0;
const TAG_INNER: u8 = 1;
const REF_LOCAL: u8 = 0;
const REF_EXTERNAL: u8 = 1;
const REF_EMPTY: u8 = 2;

/// Damage found in a pack, with where it is.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum PackError {
    /// the bytes break the format at this offset
    #[error("{what} at byte {offset}")]
    Malformed {
        /// offset in the pack file (header) or in the decompressed body
        offset: u64,
        what: String,
    },
    /// the store could not hold the quads
    #[error(transparent)]
    Budget(#[from] BudgetExceeded),
}

fn malformed(offset: usize, what: impl Into<String>) -> PackError {
    PackError::Malformed {
        offset: offset as u64,
        what: what.into(),
    }
}

/// The name of a pack: the first 16 bytes of BLAKE3 of its bytes, in hex.
pub fn pack_name(bytes: &[u8]) -> String {
    let hash = blake3::hash(bytes);
    let mut id = [0u8; 16];
    id.copy_from_slice(&hash.as_bytes()[..16]);
    ContentId(id).to_string()
}

/// A pack as written: its bytes and what it holds.
pub struct WrittenPack {
    pub bytes: Vec<u8>,
    /// records in the pack
    pub records: u64,
    /// content ids of the quads it holds, for the run's index
    pub ids: Vec<ContentId>,
}

/// Writes the quads under `root` (of `level`) that `known` does not hold
/// (and that are not empty) into a pack. Returns None when every quad is
/// known already. The content ids are computed here (memoised in the store).
pub(crate) fn write_pack(
    store: &mut Store,
    root: Handle,
    level: u32,
    known: &dyn Fn(&ContentId) -> bool,
) -> Option<WrittenPack> {
    let mut body = Vec::new();
    let mut ids = Vec::new();
    let mut empties = EmptyIds::new();
    // handle → how a parent refers to it
    let mut written: HashMap<Handle, Ref, ahash::RandomState> = HashMap::default();
    // Post-order without recursion: (quad, level, children pushed?)
    let mut stack = vec![(root, level, false)];
    while let Some((quad, at, expanded)) = stack.pop() {
        if written.contains_key(&quad) {
            continue;
        }
        // Empty quads are referred to by level, except an empty root (the
        // empty state's leaf), which a checkpoint must be able to find.
        if quad == store.known_empty(at) && quad != root {
            written.insert(quad, Ref::Empty);
            continue;
        }
        if quad.is_leaf() {
            let id = ContentId::of_leaf(store.leaf_bits(quad));
            if known(&id) {
                written.insert(quad, Ref::External(id));
                continue;
            }
            let index = ids.len();
            body.push(TAG_LEAF);
            body.extend_from_slice(&store.leaf_bits(quad).to_le_bytes());
            ids.push(id);
            written.insert(quad, Ref::Local(index, id));
            continue;
        }
        let kids = store.kids(quad);
        if !expanded {
            stack.push((quad, at, true));
            for kid in kids.into_iter().rev() {
                if !written.contains_key(&kid) {
                    stack.push((kid, at - 1, false));
                }
            }
            continue;
        }
        let refs = kids.map(|kid| written[&kid].clone());
        let kid_ids = refs.clone().map(|r| r.id(&mut empties, at - 1));
        let id = ContentId::of_inner(at, kid_ids);
        if known(&id) {
            written.insert(quad, Ref::External(id));
            continue;
        }
        let index = ids.len();
        body.push(TAG_INNER);
        write_varint(&mut body, at as u64);
        for r in refs {
            match r {
                Ref::Local(child, _) => {
                    body.push(REF_LOCAL);
                    write_varint(&mut body, (index - child) as u64);
                }
                Ref::External(id) => {
                    body.push(REF_EXTERNAL);
                    body.extend_from_slice(&id.0);
                }
                Ref::Empty => body.push(REF_EMPTY),
            }
        }
        ids.push(id);
        written.insert(quad, Ref::Local(index, id));
    }
    if ids.is_empty() {
        return None;
    }
    let compressed = zstd::bulk::compress(&body, ZSTD_LEVEL).expect("compressing to memory");
    let mut bytes = Vec::with_capacity(HEADER_BYTES + compressed.len());
    bytes.extend_from_slice(PACK_MAGIC);
    bytes.extend_from_slice(&PACK_VERSION.to_le_bytes());
    bytes.extend_from_slice(&(ids.len() as u64).to_le_bytes());
    bytes.extend_from_slice(&(body.len() as u64).to_le_bytes());
    bytes.extend_from_slice(&compressed);
    Some(WrittenPack {
        bytes,
        records: ids.len() as u64,
        ids,
    })
}

/// How a record refers to a child.
#[derive(Clone)]
enum Ref {
    Local(usize, ContentId),
    External(ContentId),
    Empty,
}

impl Ref {
    fn id(self, empties: &mut EmptyIds, level: u32) -> ContentId {
        match self {
            Ref::Local(_, id) | Ref::External(id) => id,
            Ref::Empty => empties.of(level),
        }
    }
}

/// Content ids of the empty quads, by level, computed once each.
struct EmptyIds(Vec<ContentId>);

impl EmptyIds {
    fn new() -> EmptyIds {
        EmptyIds(vec![ContentId::of_leaf(0)])
    }

    fn of(&mut self, level: u32) -> ContentId {
        while (self.0.len() as u32) + LEAF_LEVEL <= level {
            let below = *self.0.last().expect("the empty leaf");
            let at = self.0.len() as u32 + LEAF_LEVEL;
            self.0.push(ContentId::of_inner(at, [below; 4]));
        }
        self.0[(level - LEAF_LEVEL) as usize]
    }
}

fn write_varint(out: &mut Vec<u8>, mut value: u64) {
    while value >= 0x80 {
        out.push((value as u8) | 0x80);
        value >>= 7;
    }
    out.push(value as u8);
}

/// The quads read so far from the packs of one checkpoint.
pub(crate) struct Reader {
    /// content id → (handle, level)
    pub(crate) quads: HashMap<ContentId, (Handle, u32), ahash::RandomState>,
    empties: EmptyIds,
}

impl Reader {
    pub(crate) fn new() -> Reader {
        Reader {
            quads: HashMap::default(),
            empties: EmptyIds::new(),
        }
    }

    /// Reads one pack into the store. Every reference must resolve to an
    /// earlier record or a quad of a pack read before; levels must agree.
    pub(crate) fn read(&mut self, store: &mut Store, bytes: &[u8]) -> Result<(), PackError> {
        if bytes.len() < HEADER_BYTES {
            return Err(malformed(
                bytes.len(),
                "pack shorter than its 32-byte header",
            ));
        }
        if &bytes[..12] != PACK_MAGIC {
            return Err(malformed(0, "not a deeptime pack (bad magic)"));
        }
        let word = |at: usize| u32::from_le_bytes(bytes[at..at + 4].try_into().expect("4 bytes"));
        let long = |at: usize| u64::from_le_bytes(bytes[at..at + 8].try_into().expect("8 bytes"));
        let version = word(12);
        if version != PACK_VERSION {
            return Err(malformed(
                12,
                format!("pack version {version} (this build reads {PACK_VERSION})"),
            ));
        }
        let records = long(16);
        let body_len = long(24);
        if body_len > MAX_BODY_BYTES {
            return Err(malformed(
                24,
                format!("body of {body_len} bytes is over the limit"),
            ));
        }
        // Each record takes at least 6 bytes (an inner quad of four empty
        // references): a count beyond that is a lie.
        if records > body_len / 6 + 1 {
            return Err(malformed(
                16,
                format!("{records} records cannot fit {body_len} bytes"),
            ));
        }
        let body =
            zstd::bulk::decompress(&bytes[HEADER_BYTES..], body_len as usize).map_err(|error| {
                malformed(HEADER_BYTES, format!("compressed body is damaged: {error}"))
            })?;
        if body.len() as u64 != body_len {
            return Err(malformed(
                HEADER_BYTES,
                format!("body is {} bytes, the header says {body_len}", body.len()),
            ));
        }
        let mut local: Vec<(Handle, u32, ContentId)> =
            Vec::with_capacity((records as usize).min(body.len() / 6 + 1));
        let mut at = 0usize;
        while at < body.len() {
            let start = at;
            let tag = body[at];
            at += 1;
            match tag {
                TAG_LEAF => {
                    let bits = body
                        .get(at..at + 8)
                        .ok_or_else(|| malformed(start, "leaf record cut short"))?;
                    let bits = u64::from_le_bytes(bits.try_into().expect("8 bytes"));
                    at += 8;
                    let handle = store.leaf(bits)?;
                    let id = ContentId::of_leaf(bits);
                    if self.quads.insert(id, (handle, LEAF_LEVEL)).is_some() {
                        return Err(malformed(start, format!("quad {id} is stored twice")));
                    }
                    local.push((handle, LEAF_LEVEL, id));
                }
                TAG_INNER => {
                    let level = read_varint(&body, &mut at)
                        .ok_or_else(|| malformed(start, "inner record cut short"))?;
                    if level <= LEAF_LEVEL as u64 || level > MAX_LEVEL as u64 {
                        return Err(malformed(start, format!("inner record of level {level}")));
                    }
                    let level = level as u32;
                    let mut kids = [Handle::NONE; 4];
                    let mut kid_ids = [ContentId([0; 16]); 4];
                    for slot in 0..4 {
                        let kind = *body
                            .get(at)
                            .ok_or_else(|| malformed(start, "inner record cut short"))?;
                        at += 1;
                        let (handle, kid_level, id) = match kind {
                            REF_LOCAL => {
                                let back = read_varint(&body, &mut at)
                                    .ok_or_else(|| malformed(start, "reference cut short"))?;
                                let index = (local.len() as u64)
                                    .checked_sub(back)
                                    .filter(|_| back > 0)
                                    .ok_or_else(|| {
                                        malformed(
                                            start,
                                            format!(
                                                "reference {back} records back from record {}",
                                                local.len()
                                            ),
                                        )
                                    })?;
                                local[index as usize]
                            }
                            REF_EXTERNAL => {
                                let raw = body
                                    .get(at..at + 16)
                                    .ok_or_else(|| malformed(start, "reference cut short"))?;
                                at += 16;
                                let id = ContentId(raw.try_into().expect("16 bytes"));
                                let (handle, kid_level) = *self.quads.get(&id).ok_or_else(|| {
                                    malformed(start, format!("reference to quad {id}, which no earlier pack holds"))
                                })?;
                                (handle, kid_level, id)
                            }
                            REF_EMPTY => {
                                let handle = store.empty(level - 1)?;
                                (handle, level - 1, self.empties.of(level - 1))
                            }
                            other => {
                                return Err(malformed(
                                    at - 1,
                                    format!("unknown reference kind {other}"),
                                ));
                            }
                        };
                        if kid_level != level - 1 {
                            return Err(malformed(
                                start,
                                format!("a child of level {kid_level} in a quad of level {level}"),
                            ));
                        }
                        kids[slot] = handle;
                        kid_ids[slot] = id;
                    }
                    let handle = store.join(kids)?;
                    if handle == store.known_empty(level) {
                        return Err(malformed(start, "an empty quad is stored, not referred to"));
                    }
                    let id = ContentId::of_inner(level, kid_ids);
                    if self.quads.insert(id, (handle, level)).is_some() {
                        return Err(malformed(start, format!("quad {id} is stored twice")));
                    }
                    local.push((handle, level, id));
                }
                other => return Err(malformed(start, format!("unknown record tag {other}"))),
            }
        }
        if local.len() as u64 != records {
            return Err(malformed(
                16,
                format!("{} records, the header says {records}", local.len()),
            ));
        }
        Ok(())
    }
}

/// A LEB128 varint in its shortest form (a longer spelling of the same
/// number is refused: every quad has one encoding).
fn read_varint(bytes: &[u8], at: &mut usize) -> Option<u64> {
    let mut value = 0u64;
    for shift in (0..64).step_by(7) {
        let byte = *bytes.get(*at)?;
        *at += 1;
        value |= ((byte & 0x7f) as u64).checked_shl(shift)?;
        if byte & 0x80 == 0 {
            if byte == 0 && shift > 0 {
                return None;
            }
            return Some(value);
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn varints_are_read_in_their_shortest_form_only() {
        // LEB128 (common practice): 5, 128 = 0x80 0x01; 0x80 0x00 spells 0
        // the long way and is refused, as are cut and endless ones.
        let read = |bytes: &[u8]| read_varint(bytes, &mut 0);
        assert_eq!(read(&[0x05]), Some(5));
        assert_eq!(read(&[0x80, 0x01]), Some(128));
        assert_eq!(read(&[0x00]), Some(0));
        assert_eq!(read(&[0x80, 0x00]), None);
        assert_eq!(read(&[0x80]), None);
        assert_eq!(read(&[0xff; 11]), None);
        let mut out = Vec::new();
        for value in [0u64, 1, 127, 128, 300, u32::MAX as u64, u64::MAX] {
            out.clear();
            write_varint(&mut out, value);
            assert_eq!(read(&out), Some(value));
        }
    }
}
