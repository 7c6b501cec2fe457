//! Packs: a state's quads as a file of independently compressed chunks of
//! records, children before parents, with a table at the end that says
//! where each chunk is; and the reverse, with nothing in the input trusted.
//!
//! The format (version 2) is specified in CHECKPOINTS.md. In short: a
//! 16-byte header (magic, version); chunks, each one zstd frame of whole
//! records of at most 64 KiB; a table (record count, per chunk its offset,
//! sizes, first record and checksum, then the names of the packs this one
//! refers to); a 24-byte trailer locating the table. Records are ordered by
//! level, leaves first, so the quads a picture needs sit together at the
//! end and the quads of one region sit near each other in every level's
//! run. A reader that wants a few quads fetches the trailer, the table and
//! the chunks that hold them (see `stored.rs`); a reader of a whole pack
//! (`Reader` here) checks every byte. A pack is named by the BLAKE3 hash of
//! its bytes, so it is written once and checked on every whole read.

use std::collections::{BTreeMap, HashMap};
use std::fmt;
use std::str::FromStr;

use num_bigint::BigUint;

use crate::content_id::{BadContentId, ContentId};
use crate::error::BudgetExceeded;
use crate::store::{Handle, LEAF_LEVEL, Store};

/// The first 12 bytes of every pack.
pub const PACK_MAGIC: &[u8; 12] = b"deeptimepack";
/// The last 8 bytes of every pack.
pub const TRAILER_MAGIC: &[u8; 8] = b"packtail";
/// The pack format version this engine writes and reads.
pub const PACK_VERSION: u32 = 2;
/// Header: magic and version.
pub const HEADER_BYTES: u64 = 16;
/// Trailer: table offset, table length, magic.
pub const TRAILER_BYTES: u64 = 24;
/// A chunk is closed before its records pass this many bytes.
pub const CHUNK_BYTES: usize = 64 << 10;
/// Readers refuse chunks that claim to decompress to more than this.
pub const MAX_CHUNK_BYTES: u64 = 1 << 20;
/// Readers refuse tables larger than this before reading them.
pub const MAX_TABLE_BYTES: u64 = 256 << 20;
/// Records per pack fit a u32 (record numbers are u32 in memory).
pub const MAX_RECORDS: u64 = u32::MAX as u64;
/// The fewest bytes a record takes decompressed: an inner record's tag,
/// level, population and four one-byte references (a leaf takes 9).
const MIN_RECORD_BYTES: u64 = 7;
const TABLE_HEAD: usize = 24;
const CHUNK_ENTRY: usize = 40;
const SLOT_ENTRY: usize = 16;
/// No level above this can come from a real run (generations are capped at
/// 10^6 bits).
pub(crate) const MAX_LEVEL: u32 = 1 << 21;
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
    /// the bytes break the format at this offset of the pack file
    #[error("{what} at byte {offset}")]
    Malformed { offset: u64, what: String },
    /// the bytes are not there (a pack, a record or a range missing)
    #[error("{0}")]
    Fetch(String),
    /// the storage failed while the bytes were fetched (a disk, the
    /// network): nothing is known of the pack
    #[error("{0}")]
    Unreadable(String),
    /// the store could not hold the quads
    #[error(transparent)]
    Budget(#[from] BudgetExceeded),
}

fn malformed(offset: u64, what: impl Into<String>) -> PackError {
    PackError::Malformed {
        offset,
        what: what.into(),
    }
}

/// A BLAKE3-128 checksum: a pack's name (of its bytes), a table's or a
/// chunk's checksum. Printed as 32 lowercase hex digits.
#[derive(Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Checksum(pub [u8; 16]);

impl Checksum {
    /// The first 16 bytes of BLAKE3 of `bytes`.
    pub fn of(bytes: &[u8]) -> Checksum {
        let hash = blake3::hash(bytes);
        let mut sum = [0u8; 16];
        sum.copy_from_slice(&hash.as_bytes()[..16]);
        Checksum(sum)
    }
}

impl fmt::Display for Checksum {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        ContentId(self.0).fmt(f)
    }
}

impl fmt::Debug for Checksum {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "Checksum({self})")
    }
}

impl FromStr for Checksum {
    type Err = BadContentId;

    /// Exactly 32 lowercase hex digits (the one spelling deeptime writes).
    fn from_str(text: &str) -> Result<Checksum, BadContentId> {
        let id: ContentId = text.parse()?;
        if id.to_string() != text {
            return Err(BadContentId(text.to_string()));
        }
        Ok(Checksum(id.0))
    }
}

/// The name of a pack: the checksum of its bytes.
pub fn pack_name(bytes: &[u8]) -> Checksum {
    Checksum::of(bytes)
}

/// Where a stored quad is: a pack (its index in the checkpoint's list of
/// packs) and a record number in it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct QuadAt {
    pub pack: u32,
    pub record: u32,
}

/// A population: a machine word while it fits, else a big integer.
#[derive(Clone, Debug, PartialEq, Eq)]
pub(crate) enum Pop {
    Small(u64),
    Big(BigUint),
}

impl Pop {
    fn from_big(value: BigUint) -> Pop {
        match u64::try_from(&value) {
            Ok(small) => Pop::Small(small),
            Err(_) => Pop::Big(value),
        }
    }

    pub(crate) fn to_big(&self) -> BigUint {
        match self {
            Pop::Small(value) => BigUint::from(*value),
            Pop::Big(value) => value.clone(),
        }
    }

    fn sum(parts: [&Pop; 4]) -> Pop {
        let mut small = Some(0u64);
        for part in parts {
            small = match (small, part) {
                (Some(total), Pop::Small(value)) => total.checked_add(*value),
                _ => None,
            };
        }
        match small {
            Some(total) => Pop::Small(total),
            None => Pop::from_big(parts.into_iter().map(Pop::to_big).sum()),
        }
    }

    fn is_zero(&self) -> bool {
        matches!(self, Pop::Small(0))
    }
}

/// A pack as written: its bytes and what it holds.
pub struct WrittenPack {
    pub bytes: Vec<u8>,
    /// records in the pack
    pub records: u64,
    /// content ids of the quads it holds, by record number
    pub ids: Vec<ContentId>,
    /// the checksum of its table, which a manifest lists so that a reader
    /// of a few chunks can trust the table without the whole pack
    pub table: Checksum,
}

/// How a record refers to a child, while writing.
#[derive(Clone)]
enum Ref {
    /// a new quad, by its place in the post-order
    Local(usize, ContentId),
    External(QuadAt, ContentId),
    Empty,
}

impl Ref {
    fn id(&self, empties: &mut EmptyIds, level: u32) -> ContentId {
        match self {
            Ref::Local(_, id) | Ref::External(_, id) => *id,
            Ref::Empty => empties.of(level),
        }
    }
}

/// A quad going into the pack.
struct NewQuad {
    level: u32,
    /// leaf cells, for a leaf
    bits: u64,
    kids: Option<[Ref; 4]>,
    population: Pop,
    id: ContentId,
}

/// Writes the quads under `roots` (each with its level) that `known` does
/// not locate (and that are not empty) into a pack; `packs` names the packs
/// `known` points into, by index. Returns None when every quad is known
/// already. The content ids are computed here (memoised in the store). A
/// lone root, when new, is the pack's last record; a lone empty root (the
/// empty state's leaf) is stored, so that a checkpoint can name it.
pub(crate) fn write_pack(
    store: &mut Store,
    roots: &[(Handle, u32)],
    known: &dyn Fn(&ContentId) -> Option<QuadAt>,
    packs: &[Checksum],
) -> Option<WrittenPack> {
    let lone_root = match roots {
        [(root, _)] => Some(*root),
        _ => None,
    };
    let mut empties = EmptyIds::new();
    let mut new: Vec<NewQuad> = Vec::new();
    // Populations of the known quads met, by the figures' counter.
    let mut counter = crate::figures::Counter::default();
    // handle → how a parent refers to it
    let mut written: HashMap<Handle, Ref, ahash::RandomState> = HashMap::default();
    // Post-order without recursion: (quad, level, children pushed?)
    let mut stack: Vec<(Handle, u32, bool)> = roots
        .iter()
        .rev()
        .map(|&(root, level)| (root, level, false))
        .collect();
    while let Some((quad, at, expanded)) = stack.pop() {
        if written.contains_key(&quad) {
            continue;
        }
        // Empty quads are referred to by level, except an empty root (the
        // empty state's leaf), which a checkpoint must be able to find.
        if quad == store.known_empty(at) && Some(quad) != lone_root {
            written.insert(quad, Ref::Empty);
            continue;
        }
        if quad.is_leaf() {
            let bits = store.leaf_bits(quad);
            let id = ContentId::of_leaf(bits);
            if let Some(place) = known(&id) {
                written.insert(quad, Ref::External(place, id));
                continue;
            }
            written.insert(quad, Ref::Local(new.len(), id));
            new.push(NewQuad {
                level: LEAF_LEVEL,
                bits,
                kids: None,
                population: Pop::Small(bits.count_ones() as u64),
                id,
            });
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
        let kid_ids = [0, 1, 2, 3].map(|slot| refs[slot].id(&mut empties, at - 1));
        let id = ContentId::of_inner(at, kid_ids);
        if let Some(place) = known(&id) {
            written.insert(quad, Ref::External(place, id));
            continue;
        }
        let pops = [0, 1, 2, 3].map(|slot| match &refs[slot] {
            Ref::Local(index, _) => new[*index].population.clone(),
            Ref::External(..) => Pop::from_big(counter.population(store, kids[slot], at - 1)),
            Ref::Empty => Pop::Small(0),
        });
        let population = Pop::sum([&pops[0], &pops[1], &pops[2], &pops[3]]);
        written.insert(quad, Ref::Local(new.len(), id));
        new.push(NewQuad {
            level: at,
            bits: 0,
            kids: Some(refs),
            population,
            id,
        });
    }
    encode(new, packs)
}

/// A quad of level 4 or more known by the content ids of its children (the
/// coordinator's top of the tree), for `write_id_pack`.
#[derive(Clone, Debug)]
pub struct IdQuad {
    pub id: ContentId,
    pub level: u32,
    pub kids: [ContentId; 4],
    pub population: BigUint,
}

/// Writes quads known by id (children before parents) into a pack. A child
/// is one of the quads before it, a quad `known` locates (in `packs`, by
/// index) or the empty quad of its level; anything else is an error naming
/// it. Empty quads in `quads` are left out. Returns None when nothing is
/// left to store. The last quad, when it is the
/// only one of the highest level, is the pack's last record.
pub fn write_id_pack(
    quads: &[IdQuad],
    known: &dyn Fn(&ContentId) -> Option<QuadAt>,
    packs: &[Checksum],
) -> Result<Option<WrittenPack>, String> {
    let mut empties = EmptyIds::new();
    let mut new: Vec<NewQuad> = Vec::with_capacity(quads.len());
    let mut local: HashMap<ContentId, usize, ahash::RandomState> = HashMap::default();
    for quad in quads {
        if quad.level <= LEAF_LEVEL || quad.level > MAX_LEVEL {
            return Err(format!("quad {} has level {}", quad.id, quad.level));
        }
        // Empty quads are referred to by level, never stored.
        if local.contains_key(&quad.id) || quad.id == empties.of(quad.level) {
            continue;
        }
        let mut refs = Vec::with_capacity(4);
        for kid in quad.kids {
            let reference = if let Some(&index) = local.get(&kid) {
                Ref::Local(index, kid)
            } else if kid == empties.of(quad.level - 1) {
                Ref::Empty
            } else if let Some(place) = known(&kid) {
                Ref::External(place, kid)
            } else {
                return Err(format!(
                    "quad {} (level {}) has a child {kid} that no pack holds",
                    quad.id, quad.level
                ));
            };
            refs.push(reference);
        }
        local.insert(quad.id, new.len());
        new.push(NewQuad {
            level: quad.level,
            bits: 0,
            kids: Some(refs.try_into().map_err(|_| "four children")?),
            population: Pop::from_big(quad.population.clone()),
            id: quad.id,
        });
    }
    Ok(encode(new, packs))
}

/// Encodes new quads (children before parents) as a pack.
fn encode(new: Vec<NewQuad>, packs: &[Checksum]) -> Option<WrittenPack> {
    if new.is_empty() {
        return None;
    }
    assert!(
        new.len() as u64 <= MAX_RECORDS,
        "a pack of more than 2^32 - 1 quads"
    );
    // Records by level, leaves first; within a level in post-order, which
    // keeps the quads of one region together and a parent's new children
    // consecutive (so their references compress to almost nothing).
    let mut order: Vec<usize> = (0..new.len()).collect();
    order.sort_by_key(|&index| new[index].level);
    let mut record_of = vec![0u32; new.len()];
    for (record, &index) in order.iter().enumerate() {
        record_of[index] = record as u32;
    }
    // The packs referred to, in the checkpoint's order, as this pack's slots.
    let mut slots: BTreeMap<u32, u32> = BTreeMap::new();
    for quad in &new {
        for kid in quad.kids.iter().flatten() {
            if let Ref::External(place, _) = kid {
                slots.insert(place.pack, 0);
            }
        }
    }
    for (slot, value) in slots.values_mut().enumerate() {
        *value = slot as u32;
    }

    let mut bytes = Vec::new();
    bytes.extend_from_slice(PACK_MAGIC);
    bytes.extend_from_slice(&PACK_VERSION.to_le_bytes());
    let mut compressor =
        zstd::bulk::Compressor::new(ZSTD_LEVEL).expect("a zstd compressor in memory");
    let mut chunks: Vec<ChunkEntry> = Vec::new();
    let mut body: Vec<u8> = Vec::with_capacity(CHUNK_BYTES);
    let mut first = 0u64;
    let mut expected = 0u64;
    let mut record = Vec::new();
    let mut flush = |body: &mut Vec<u8>, first: u64, bytes: &mut Vec<u8>| {
        let compressed = compressor.compress(body).expect("compressing to memory");
        chunks.push(ChunkEntry {
            offset: bytes.len() as u64,
            compressed: compressed.len() as u32,
            decompressed: body.len() as u32,
            first,
            checksum: Checksum::of(&compressed),
        });
        bytes.extend_from_slice(&compressed);
        body.clear();
    };
    for (number, &index) in order.iter().enumerate() {
        let number = number as u64;
        let quad = &new[index];
        let encode = |expected: &mut u64, record: &mut Vec<u8>| {
            record.clear();
            match &quad.kids {
                None => {
                    record.push(TAG_LEAF);
                    record.extend_from_slice(&quad.bits.to_le_bytes());
                }
                Some(kids) => {
                    record.push(TAG_INNER);
                    write_varint(record, quad.level as u64);
                    write_population(record, &quad.population);
                    for kid in kids {
                        match kid {
                            Ref::Local(child, _) => {
                                let target = record_of[*child] as u64;
                                record.push(REF_LOCAL);
                                write_varint(record, zigzag(target as i64 - *expected as i64));
                                *expected = target + 1;
                            }
                            Ref::External(place, id) => {
                                record.push(REF_EXTERNAL);
                                write_varint(record, slots[&place.pack] as u64);
                                write_varint(record, place.record as u64);
                                record.extend_from_slice(&id.0);
                            }
                            Ref::Empty => record.push(REF_EMPTY),
                        }
                    }
                }
            }
        };
        encode(&mut expected, &mut record);
        if !body.is_empty() && body.len() + record.len() > CHUNK_BYTES {
            // A new chunk: its references start from 0 again.
            flush(&mut body, first, &mut bytes);
            first = number;
            expected = 0;
            encode(&mut expected, &mut record);
        }
        body.extend_from_slice(&record);
    }
    flush(&mut body, first, &mut bytes);
    let table_offset = bytes.len() as u64;
    let mut table = Vec::with_capacity(TABLE_HEAD + CHUNK_ENTRY * chunks.len());
    table.extend_from_slice(&PACK_VERSION.to_le_bytes());
    table.extend_from_slice(&(chunks.len() as u32).to_le_bytes());
    table.extend_from_slice(&(slots.len() as u32).to_le_bytes());
    table.extend_from_slice(&0u32.to_le_bytes());
    table.extend_from_slice(&(new.len() as u64).to_le_bytes());
    for chunk in &chunks {
        table.extend_from_slice(&chunk.offset.to_le_bytes());
        table.extend_from_slice(&chunk.compressed.to_le_bytes());
        table.extend_from_slice(&chunk.decompressed.to_le_bytes());
        table.extend_from_slice(&chunk.first.to_le_bytes());
        table.extend_from_slice(&chunk.checksum.0);
    }
    for &pack in slots.keys() {
        table.extend_from_slice(&packs[pack as usize].0);
    }
    let table_sum = Checksum::of(&table);
    bytes.extend_from_slice(&table);
    bytes.extend_from_slice(&table_offset.to_le_bytes());
    bytes.extend_from_slice(&(table.len() as u64).to_le_bytes());
    bytes.extend_from_slice(TRAILER_MAGIC);
    let ids = order.iter().map(|&index| new[index].id).collect();
    Some(WrittenPack {
        bytes,
        records: new.len() as u64,
        ids,
        table: table_sum,
    })
}

/// Content ids of the empty quads, by level, computed once each.
pub(crate) struct EmptyIds(Vec<ContentId>);

impl EmptyIds {
    pub(crate) fn new() -> EmptyIds {
        EmptyIds(vec![ContentId::of_leaf(0)])
    }

    pub(crate) fn of(&mut self, level: u32) -> ContentId {
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

/// A population as a LEB128 varint of any length.
fn write_population(out: &mut Vec<u8>, population: &Pop) {
    match population {
        Pop::Small(value) => write_varint(out, *value),
        Pop::Big(value) => {
            let groups = value.to_radix_le(128);
            for (at, group) in groups.iter().enumerate() {
                let more = if at + 1 < groups.len() { 0x80 } else { 0 };
                out.push(group | more);
            }
        }
    }
}

fn zigzag(value: i64) -> u64 {
    ((value << 1) ^ (value >> 63)) as u64
}

fn unzigzag(value: u64) -> i64 {
    ((value >> 1) as i64) ^ -((value & 1) as i64)
}

/// One chunk's entry in a pack's table.
#[derive(Clone, Copy, Debug)]
pub(crate) struct ChunkEntry {
    /// where its compressed bytes start in the pack file
    pub(crate) offset: u64,
    pub(crate) compressed: u32,
    pub(crate) decompressed: u32,
    /// the number of its first record
    pub(crate) first: u64,
    /// the checksum of its compressed bytes
    pub(crate) checksum: Checksum,
}

/// Where a pack's table is, from its trailer.
pub(crate) fn read_trailer(trailer: &[u8], pack_bytes: u64) -> Result<(u64, u64), PackError> {
    let at = pack_bytes.saturating_sub(TRAILER_BYTES);
    if pack_bytes < HEADER_BYTES + TRAILER_BYTES || trailer.len() as u64 != TRAILER_BYTES {
        return Err(malformed(
            0,
            format!("pack of {pack_bytes} bytes is shorter than its header and trailer"),
        ));
    }
    if &trailer[16..24] != TRAILER_MAGIC {
        return Err(malformed(at + 16, "pack trailer is damaged (bad magic)"));
    }
    let offset = u64::from_le_bytes(trailer[..8].try_into().expect("8 bytes"));
    let len = u64::from_le_bytes(trailer[8..16].try_into().expect("8 bytes"));
    if len > MAX_TABLE_BYTES {
        return Err(malformed(
            at + 8,
            format!("table of {len} bytes is over the limit"),
        ));
    }
    if offset < HEADER_BYTES || offset.checked_add(len) != Some(at) {
        return Err(malformed(
            at,
            format!("table at {offset}, {len} bytes, does not end where the trailer starts"),
        ));
    }
    Ok((offset, len))
}

/// A pack's table, checked for consistency.
pub(crate) struct PackTable {
    pub(crate) records: u64,
    pub(crate) chunks: Vec<ChunkEntry>,
    /// the packs this one refers to, by slot
    pub(crate) slots: Vec<Checksum>,
}

impl PackTable {
    /// Parses the table found at `offset` of a pack (from its trailer):
    /// its chunks must tile the bytes from the header to the table exactly,
    /// and their first records must rise from 0 below the record count.
    pub(crate) fn parse(table: &[u8], offset: u64) -> Result<PackTable, PackError> {
        let bad = |at: usize, what: String| malformed(offset + at as u64, what);
        if table.len() < TABLE_HEAD {
            return Err(bad(0, "table shorter than its 24-byte head".into()));
        }
        let word = |at: usize| u32::from_le_bytes(table[at..at + 4].try_into().expect("4 bytes"));
        let long = |at: usize| u64::from_le_bytes(table[at..at + 8].try_into().expect("8 bytes"));
        let version = word(0);
        if version != PACK_VERSION {
            return Err(bad(
                0,
                format!("pack version {version} (this build reads {PACK_VERSION})"),
            ));
        }
        let (chunks, slots) = (word(4) as usize, word(8) as usize);
        if word(12) != 0 {
            return Err(bad(12, "table's reserved word is not zero".into()));
        }
        let records = long(16);
        if records == 0 || records > MAX_RECORDS {
            return Err(bad(16, format!("record count {records} is out of range")));
        }
        let expected = (chunks as u64) * CHUNK_ENTRY as u64 + (slots as u64) * SLOT_ENTRY as u64;
        if chunks == 0 || TABLE_HEAD as u64 + expected != table.len() as u64 {
            return Err(bad(
                4,
                format!(
                    "{chunks} chunks and {slots} pack names do not fill a table of {} bytes",
                    table.len()
                ),
            ));
        }
        let mut entries: Vec<ChunkEntry> = Vec::with_capacity(chunks);
        let mut next_offset = HEADER_BYTES;
        for index in 0..chunks {
            let at = TABLE_HEAD + index * CHUNK_ENTRY;
            let entry = ChunkEntry {
                offset: long(at),
                compressed: word(at + 8),
                decompressed: word(at + 12),
                first: long(at + 16),
                checksum: Checksum(table[at + 24..at + 40].try_into().expect("16 bytes")),
            };
            if entry.offset != next_offset || entry.compressed == 0 {
                return Err(bad(
                    at,
                    format!("chunk {index} is not where the chunk before it ends"),
                ));
            }
            if entry.decompressed == 0 || entry.decompressed as u64 > MAX_CHUNK_BYTES {
                return Err(bad(
                    at + 12,
                    format!(
                        "chunk {index} of {} bytes decompressed is out of range",
                        entry.decompressed
                    ),
                ));
            }
            let rises = match entries.last() {
                None => entry.first == 0,
                Some(previous) => entry.first > previous.first,
            };
            if !rises || entry.first >= records {
                return Err(bad(
                    at + 16,
                    format!("chunk {index} starts at record {}", entry.first),
                ));
            }
            next_offset += entry.compressed as u64;
            entries.push(entry);
        }
        if next_offset != offset {
            return Err(bad(
                0,
                format!("the chunks end at byte {next_offset}, the table starts at {offset}"),
            ));
        }
        // Readers size their arrays by the record count: it must be one the
        // chunks can hold, not anything a u32 can say.
        let held: u64 = entries.iter().map(|entry| entry.decompressed as u64).sum();
        if records > held / MIN_RECORD_BYTES {
            return Err(bad(
                16,
                format!("record count {records} is more than chunks of {held} bytes can hold"),
            ));
        }
        let names = TABLE_HEAD + chunks * CHUNK_ENTRY;
        let slots = (0..slots)
            .map(|slot| {
                let at = names + slot * SLOT_ENTRY;
                Checksum(table[at..at + 16].try_into().expect("16 bytes"))
            })
            .collect();
        Ok(PackTable {
            records,
            chunks: entries,
            slots,
        })
    }

    /// How many records chunk `index` holds.
    pub(crate) fn chunk_records(&self, index: usize) -> u64 {
        let end = self
            .chunks
            .get(index + 1)
            .map_or(self.records, |next| next.first);
        end - self.chunks[index].first
    }

    /// The chunk that holds `record`.
    pub(crate) fn chunk_of(&self, record: u64) -> usize {
        self.chunks.partition_point(|chunk| chunk.first <= record) - 1
    }
}

/// A record as stored, decoded but not yet trusted beyond its own bytes.
#[derive(Clone, Debug)]
pub(crate) enum RawRecord {
    Leaf(u64),
    Inner {
        level: u32,
        population: Pop,
        kids: [RawRef; 4],
    },
}

impl RawRecord {
    pub(crate) fn level(&self) -> u32 {
        match self {
            RawRecord::Leaf(_) => LEAF_LEVEL,
            RawRecord::Inner { level, .. } => *level,
        }
    }
}

/// A child reference as stored.
#[derive(Clone, Copy, Debug)]
pub(crate) enum RawRef {
    /// a record of the same pack, by number
    Local(u32),
    /// a record of the pack in `slot` of the table
    External {
        slot: u32,
        record: u32,
        id: ContentId,
    },
    Empty,
}

/// Checks chunk `index` of a pack against its table entry (checksum, one
/// whole zstd frame and nothing after it, decompressed size, capped) and
/// decodes its records. Every reference is checked to point backwards
/// within the pack, or to a slot and record number in range.
pub(crate) fn decode_chunk(
    data: &[u8],
    table: &PackTable,
    index: usize,
    decompressor: &mut zstd::bulk::Decompressor<'static>,
) -> Result<Vec<RawRecord>, PackError> {
    let entry = table.chunks[index];
    let start = entry.offset;
    if data.len() != entry.compressed as usize || Checksum::of(data) != entry.checksum {
        return Err(malformed(
            start,
            format!("chunk {index} does not match its checksum (damaged)"),
        ));
    }
    match zstd::zstd_safe::find_frame_compressed_size(data) {
        Ok(frame) if frame == data.len() => {}
        _ => {
            return Err(malformed(
                start,
                format!("chunk {index} is not exactly one zstd frame"),
            ));
        }
    }
    let body = decompressor
        .decompress(data, entry.decompressed as usize)
        .map_err(|error| malformed(start, format!("chunk {index} is damaged: {error}")))?;
    if body.len() != entry.decompressed as usize {
        return Err(malformed(
            start,
            format!(
                "chunk {index} decompresses to {} bytes, the table says {}",
                body.len(),
                entry.decompressed
            ),
        ));
    }
    let count = table.chunk_records(index);
    let mut records = Vec::with_capacity(count.min(body.len() as u64 / 6 + 1) as usize);
    let mut at = 0usize;
    let mut expected = 0u64;
    while at < body.len() {
        let number = entry.first + records.len() as u64;
        let bad =
            |what: String| malformed(start, format!("chunk {index}, record {number}: {what}"));
        if records.len() as u64 == count {
            return Err(bad("bytes after the chunk's last record".into()));
        }
        let tag = body[at];
        at += 1;
        match tag {
            TAG_LEAF => {
                let bits = body
                    .get(at..at + 8)
                    .ok_or_else(|| bad("leaf record cut short".into()))?;
                at += 8;
                records.push(RawRecord::Leaf(u64::from_le_bytes(
                    bits.try_into().expect("8 bytes"),
                )));
            }
            TAG_INNER => {
                let level = read_varint(&body, &mut at)
                    .ok_or_else(|| bad("inner record cut short".into()))?;
                if level <= LEAF_LEVEL as u64 || level > MAX_LEVEL as u64 {
                    return Err(bad(format!("inner record of level {level}")));
                }
                let level = level as u32;
                let population = read_population(&body, &mut at, level)
                    .ok_or_else(|| bad("population cut short, too long or too large".into()))?;
                if population.is_zero() {
                    return Err(bad("an empty quad is stored, not referred to".into()));
                }
                let mut kids = [RawRef::Empty; 4];
                for kid in &mut kids {
                    let kind = *body
                        .get(at)
                        .ok_or_else(|| bad("inner record cut short".into()))?;
                    at += 1;
                    *kid = match kind {
                        REF_LOCAL => {
                            let delta = read_varint(&body, &mut at)
                                .ok_or_else(|| bad("reference cut short".into()))?;
                            let target = (expected as i64).checked_add(unzigzag(delta));
                            let target = target
                                .filter(|&target| target >= 0 && (target as u64) < number)
                                .ok_or_else(|| {
                                    bad("reference to a record not before this one".into())
                                })?;
                            expected = target as u64 + 1;
                            RawRef::Local(target as u32)
                        }
                        REF_EXTERNAL => {
                            let slot = read_varint(&body, &mut at)
                                .ok_or_else(|| bad("reference cut short".into()))?;
                            let record = read_varint(&body, &mut at)
                                .ok_or_else(|| bad("reference cut short".into()))?;
                            let raw = body
                                .get(at..at + 16)
                                .ok_or_else(|| bad("reference cut short".into()))?;
                            at += 16;
                            if slot >= table.slots.len() as u64 || record >= MAX_RECORDS {
                                return Err(bad(format!(
                                    "reference to record {record} of pack slot {slot}, which the table lacks"
                                )));
                            }
                            RawRef::External {
                                slot: slot as u32,
                                record: record as u32,
                                id: ContentId(raw.try_into().expect("16 bytes")),
                            }
                        }
                        REF_EMPTY => RawRef::Empty,
                        other => return Err(bad(format!("unknown reference kind {other}"))),
                    };
                }
                records.push(RawRecord::Inner {
                    level,
                    population,
                    kids,
                });
            }
            other => return Err(bad(format!("unknown record tag {other}"))),
        }
    }
    if records.len() as u64 != count {
        return Err(malformed(
            start,
            format!(
                "chunk {index} holds {} records, the table says {count}",
                records.len()
            ),
        ));
    }
    // Levels never fall within a pack: leaves first, then level by level.
    Ok(records)
}

/// The table of a whole pack, with its header, trailer and table checked
/// (the table against `table_sum` when given); its chunks are checked as
/// they are decoded.
pub(crate) fn open_whole(
    bytes: &[u8],
    table_sum: Option<Checksum>,
) -> Result<PackTable, PackError> {
    let size = bytes.len() as u64;
    if size < HEADER_BYTES + TRAILER_BYTES {
        return Err(malformed(
            size,
            "pack shorter than its 16-byte header and 24-byte trailer",
        ));
    }
    if &bytes[..12] != PACK_MAGIC {
        return Err(malformed(0, "not a deeptime pack (bad magic)"));
    }
    let version = u32::from_le_bytes(bytes[12..16].try_into().expect("4 bytes"));
    if version != PACK_VERSION {
        return Err(malformed(
            12,
            format!("pack version {version} (this build reads {PACK_VERSION})"),
        ));
    }
    let (offset, len) = read_trailer(&bytes[(size - TRAILER_BYTES) as usize..], size)?;
    let table_bytes = &bytes[offset as usize..(offset + len) as usize];
    if let Some(expected) = table_sum
        && Checksum::of(table_bytes) != expected
    {
        return Err(malformed(
            offset,
            "table does not match the manifest's checksum (damaged)",
        ));
    }
    PackTable::parse(table_bytes, offset)
}

/// A record once read: its quad in the store, level and content id.
type ReadQuad = (Handle, u32, ContentId);

/// The quads read so far from the packs of one checkpoint, pack by pack.
pub(crate) struct Reader {
    /// per pack read: its name, and per record (handle, level, content id)
    packs: Vec<(Checksum, Vec<ReadQuad>)>,
    /// populations of the records, per pack (a big one in `big`)
    pops: Vec<Vec<u64>>,
    big: HashMap<(usize, u32), BigUint, ahash::RandomState>,
    /// every quad read: where it is stored
    pub(crate) known: HashMap<ContentId, QuadAt, ahash::RandomState>,
    empties: EmptyIds,
}

/// Marks a population held in `Reader::big`.
const BIG_POP: u64 = u64::MAX;

impl Reader {
    pub(crate) fn new() -> Reader {
        Reader {
            packs: Vec::new(),
            pops: Vec::new(),
            big: HashMap::default(),
            known: HashMap::default(),
            empties: EmptyIds::new(),
        }
    }

    /// The quad at `place`, once its pack has been read.
    pub(crate) fn quad(&self, place: QuadAt) -> Option<(Handle, u32, ContentId)> {
        self.packs
            .get(place.pack as usize)?
            .1
            .get(place.record as usize)
            .copied()
    }

    fn pop(&self, pack: usize, record: u32) -> Pop {
        match self.pops[pack][record as usize] {
            BIG_POP => Pop::Big(self.big[&(pack, record)].clone()),
            small => Pop::Small(small),
        }
    }

    /// Reads one whole pack (named `name`, whose table has checksum
    /// `table_sum`) into the store. Every reference must resolve to an
    /// earlier record or a record of a pack read before; levels, content
    /// ids and populations must agree; no quad may be stored twice in one
    /// pack.
    pub(crate) fn read(
        &mut self,
        store: &mut Store,
        bytes: &[u8],
        name: Checksum,
        table_sum: Option<Checksum>,
        expected_records: Option<u64>,
    ) -> Result<(), PackError> {
        let table = open_whole(bytes, table_sum)?;
        if let Some(expected) = expected_records
            && expected != table.records
        {
            return Err(malformed(
                bytes.len() as u64 - TRAILER_BYTES,
                format!(
                    "holds {} records, the manifest says {expected}",
                    table.records
                ),
            ));
        }
        // Slots name packs read before this one.
        let mut slots = Vec::with_capacity(table.slots.len());
        for (slot, wanted) in table.slots.iter().enumerate() {
            let found = self.packs.iter().position(|(name, _)| name == wanted);
            slots.push(found.ok_or_else(|| {
                malformed(
                    0,
                    format!("pack slot {slot} names pack {wanted}, which no earlier pack is"),
                )
            })?);
        }
        let pack = self.packs.len();
        let mut local: Vec<ReadQuad> = Vec::with_capacity(table.records as usize);
        let mut pops: Vec<u64> = Vec::with_capacity(table.records as usize);
        let mut decompressor = zstd::bulk::Decompressor::new().expect("a zstd decompressor");
        // Quads of this pack that an earlier pack holds too.
        let mut also_here: std::collections::HashSet<ContentId, ahash::RandomState> =
            Default::default();
        // Chunk by chunk: one chunk's records are held decoded at a time.
        for chunk in 0..table.chunks.len() {
            let entry = table.chunks[chunk];
            let data =
                &bytes[entry.offset as usize..(entry.offset + entry.compressed as u64) as usize];
            let records = decode_chunk(data, &table, chunk, &mut decompressor)?;
            for record in &records {
                let number = local.len();
                let bad = |what: String| {
                    malformed(
                        entry.offset,
                        format!("chunk {chunk}, record {number}: {what}"),
                    )
                };
                let (handle, level, id, population) = match record {
                    RawRecord::Leaf(bits) => (
                        store.leaf(*bits)?,
                        LEAF_LEVEL,
                        ContentId::of_leaf(*bits),
                        Pop::Small(bits.count_ones() as u64),
                    ),
                    RawRecord::Inner {
                        level,
                        population,
                        kids: refs,
                    } => {
                        let level = *level;
                        let mut kids = [Handle::NONE; 4];
                        let mut kid_ids = [ContentId([0; 16]); 4];
                        let mut kid_pops =
                            [Pop::Small(0), Pop::Small(0), Pop::Small(0), Pop::Small(0)];
                        for slot in 0..4 {
                            let (handle, kid_level, id, kid_pop) = match refs[slot] {
                                RawRef::Local(target) => {
                                    let (handle, kid_level, id) = local[target as usize];
                                    let kid_pop = match pops[target as usize] {
                                        BIG_POP => Pop::Big(self.big[&(pack, target)].clone()),
                                        small => Pop::Small(small),
                                    };
                                    (handle, kid_level, id, kid_pop)
                                }
                                RawRef::External {
                                    slot: which,
                                    record: target,
                                    id: stated,
                                } => {
                                    let other = slots[which as usize];
                                    let (handle, kid_level, id) =
                                    *self.packs[other].1.get(target as usize).ok_or_else(|| {
                                        bad(format!(
                                            "reference to record {target} of pack {}, which holds {}",
                                            self.packs[other].0,
                                            self.packs[other].1.len()
                                        ))
                                    })?;
                                    if id != stated {
                                        return Err(bad(format!(
                                            "reference to quad {stated}, but that record holds {id}"
                                        )));
                                    }
                                    (handle, kid_level, id, self.pop(other, target))
                                }
                                RawRef::Empty => (
                                    store.empty(level - 1)?,
                                    level - 1,
                                    self.empties.of(level - 1),
                                    Pop::Small(0),
                                ),
                            };
                            if kid_level != level - 1 {
                                return Err(bad(format!(
                                    "a child of level {kid_level} in a quad of level {level}"
                                )));
                            }
                            kids[slot] = handle;
                            kid_ids[slot] = id;
                            kid_pops[slot] = kid_pop;
                        }
                        let sum =
                            Pop::sum([&kid_pops[0], &kid_pops[1], &kid_pops[2], &kid_pops[3]]);
                        if &sum != population {
                            return Err(bad(format!(
                                "population {} stored, its children hold {}",
                                population.to_big(),
                                sum.to_big()
                            )));
                        }
                        let handle = store.join(kids)?;
                        if handle == store.known_empty(level) {
                            return Err(bad("an empty quad is stored, not referred to".into()));
                        }
                        (
                            handle,
                            level,
                            ContentId::of_inner(level, kid_ids),
                            population.clone(),
                        )
                    }
                };
                if let Some(last) = local.last()
                    && last.1 > level
                {
                    return Err(bad(format!(
                        "a quad of level {level} after one of level {}",
                        last.1
                    )));
                }
                let place = QuadAt {
                    pack: pack as u32,
                    record: number as u32,
                };
                // Packs that cluster nodes write side by side may hold the
                // same quad; within one pack a quad is stored once. The
                // first place found is the one references resolve to.
                match self.known.entry(id) {
                    std::collections::hash_map::Entry::Occupied(first) => {
                        // Twice in this pack: found here first, or found in
                        // an earlier pack and already met once in this one.
                        if first.get().pack == pack as u32 || !also_here.insert(id) {
                            return Err(bad(format!("quad {id} is stored twice")));
                        }
                    }
                    std::collections::hash_map::Entry::Vacant(slot) => {
                        slot.insert(place);
                    }
                }
                match population {
                    Pop::Small(small) if small != BIG_POP => pops.push(small),
                    other => {
                        pops.push(BIG_POP);
                        self.big.insert((pack, number as u32), other.to_big());
                    }
                }
                local.push((handle, level, id));
            }
        }
        self.packs.push((name, local));
        self.pops.push(pops);
        Ok(())
    }
}

/// A LEB128 varint in its shortest form (a longer spelling of the same
/// number is refused: every quad has one encoding).
pub(crate) fn read_varint(bytes: &[u8], at: &mut usize) -> Option<u64> {
    let mut value = 0u64;
    for shift in (0..64).step_by(7) {
        let byte = *bytes.get(*at)?;
        *at += 1;
        value |= ((byte & 0x7f) as u64).checked_shl(shift)?;
        if byte & 0x80 == 0 {
            if byte == 0 && shift > 0 {
                return None;
            }
            if shift == 63 && byte > 1 {
                return None;
            }
            return Some(value);
        }
    }
    None
}

/// A population of a quad of `level`: a LEB128 varint of any length in its
/// shortest form, at most 4^level.
fn read_population(bytes: &[u8], at: &mut usize, level: u32) -> Option<Pop> {
    let start = *at;
    let most = (2 * level as usize + 1) / 7 + 1;
    loop {
        let byte = *bytes.get(*at)?;
        *at += 1;
        if *at - start > most {
            return None;
        }
        if byte & 0x80 == 0 {
            break;
        }
    }
    let groups: Vec<u8> = bytes[start..*at].iter().map(|byte| byte & 0x7f).collect();
    if groups.len() > 1 && groups.last() == Some(&0) {
        return None;
    }
    let value = BigUint::from_radix_le(&groups, 128)?;
    // At most 4^level: fewer than 2·level + 1 bits, or 4^level itself.
    let bits = value.bits();
    let within = bits <= 2 * level as u64
        || (bits == 2 * level as u64 + 1 && value.trailing_zeros() == Some(2 * level as u64));
    if !within {
        return None;
    }
    Some(Pop::from_big(value))
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

    #[test]
    fn populations_of_any_size_round_trip_and_are_bounded_by_the_level() {
        for (value, level) in [
            (BigUint::from(0u32), 4),
            (BigUint::from(256u32), 4),
            (BigUint::from(1u32) << 100, 60),
            ((BigUint::from(1u32) << 2000) - 1u32, 1000),
        ] {
            let mut out = Vec::new();
            write_population(&mut out, &Pop::from_big(value.clone()));
            let back = read_population(&out, &mut 0, level).unwrap();
            assert_eq!(back.to_big(), value);
        }
        // 4^4 = 256 cells in a level-4 quad (common practice): 257 is refused.
        let mut out = Vec::new();
        write_population(&mut out, &Pop::Small(257));
        assert_eq!(read_population(&out, &mut 0, 4), None);
    }

    #[test]
    fn zigzag_round_trips() {
        // Zigzag (common practice): 0, -1, 1, -2 → 0, 1, 2, 3.
        assert_eq!([0, -1, 1, -2].map(zigzag), [0, 1, 2, 3]);
        for value in [0i64, 5, -5, i64::MAX / 2, i64::MIN / 2] {
            assert_eq!(unzigzag(zigzag(value)), value);
        }
    }
}

/// Damage or a failed fetch in one pack of a stored state.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{place}: {error}")]
pub struct ReadError {
    /// the pack, as `StoredPack::place`
    pub place: String,
    pub error: PackError,
}
