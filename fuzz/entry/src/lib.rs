//! One fuzz input, one call of a parser that takes bytes from outside:
//! pattern text, generation expressions, rules, job files, checkpoint
//! manifests, packs (whole and read on demand), and the wire messages a
//! node or coordinator accepts. Each function calls the library's own entry
//! point and may only return: a panic, a hang or an allocation past the
//! budgets here is a finding. The cargo-fuzz targets (`fuzz/fuzz_targets/`)
//! and the stable smoke test (`tests/smoke.rs`) both call these, so the
//! harness is written once.

use std::collections::HashSet;
use std::path::Path;

use deeptime_coordinator::job::Job;
use deeptime_engine::generation::parse_generations;
use deeptime_engine::pack::{
    Checksum, PACK_MAGIC, PACK_VERSION, QuadAt, TRAILER_BYTES, TRAILER_MAGIC, pack_name,
};
use deeptime_engine::pattern::{plaintext, rle};
use deeptime_engine::rule::Rule;
use deeptime_engine::stored::{Fetch, FetchError, StoredNode, StoredPack, StoredState};
use deeptime_engine::{ContentId, PackInput, Universe};
use deeptime_node::wire;
use deeptime_proto::v1;
use deeptime_storage::checkpoint::Manifest;
use num_bigint::BigUint;
use prost::Message;

/// The memory budget patterns and packs are read under: small enough that
/// the fuzzer's memory limit catches anything that ignores it, and that an
/// input filling it costs milliseconds (a pattern up to its budget is
/// legitimate work, not a finding).
pub const BUDGET: u64 = 1 << 20;

/// A fuzz target: its name (also its folder under `fuzz/corpus/`) and the
/// function that feeds it one input.
pub struct Target {
    pub name: &'static str,
    pub run: fn(&[u8]),
}

/// Every target, in the order `fuzz/run` runs them.
pub const TARGETS: &[Target] = &[
    Target {
        name: "rle",
        run: rle,
    },
    Target {
        name: "plaintext",
        run: plaintext,
    },
    Target {
        name: "generation",
        run: generation,
    },
    Target {
        name: "rule",
        run: rule,
    },
    Target {
        name: "job",
        run: job,
    },
    Target {
        name: "manifest",
        run: manifest,
    },
    Target {
        name: "pack",
        run: pack,
    },
    Target {
        name: "pack_records",
        run: pack_records,
    },
    Target {
        name: "wire",
        run: wire,
    },
];

/// RLE text, as `deeptime` reads a pattern file.
pub fn rle(data: &[u8]) {
    let _ = rle::read_rle(data, BUDGET);
}

/// Plaintext pattern text.
pub fn plaintext(data: &[u8]) {
    let _ = plaintext::read_plaintext(data, BUDGET);
}

/// A generation expression (`--gen`, a job's target): `1103`, `2^40`,
/// `30*10^100`.
pub fn generation(data: &[u8]) {
    if let Ok(text) = std::str::from_utf8(data) {
        let _ = parse_generations(text);
    }
}

/// A rule, and the same text as a universe (`--universe`): one that
/// parses must read back the same from its canonical text.
pub fn rule(data: &[u8]) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    if let Ok(rule) = Rule::parse(text) {
        let canonical = rule.to_string();
        let again = Rule::parse(&canonical)
            .unwrap_or_else(|error| panic!("canonical rule {canonical:?} refused: {error}"));
        assert_eq!(
            again, rule,
            "rule {text:?} and its canonical text {canonical:?} differ"
        );
    }
    if let Ok(space) = text.parse::<deeptime_engine::finite::Space>() {
        let canonical = space.to_string();
        let again: deeptime_engine::finite::Space = canonical
            .parse()
            .unwrap_or_else(|error| panic!("canonical universe {canonical:?} refused: {error}"));
        assert_eq!(
            again, space,
            "universe {text:?} and its canonical text {canonical:?} differ"
        );
    }
}

/// A job file (TOML).
pub fn job(data: &[u8]) {
    if let Ok(text) = std::str::from_utf8(data) {
        let _ = Job::parse(text, Path::new("fuzz/job.toml"));
    }
}

/// A checkpoint manifest (JSON), as stored under the key of sequence 1.
pub fn manifest(data: &[u8]) {
    let _ = Manifest::parse(data, "manifests/0000000001.json", "fuzz/manifest.json");
}

/// A pack: read whole (every check a resume or verify makes), then read on
/// demand from its last record down (the snapshot and node path: trailer,
/// table, chunks fetched one by one).
pub fn pack(data: &[u8]) {
    read_packs(&[data]);
}

/// The records of one chunk, reached past the checksums: the input is a
/// record count (2 bytes, little-endian) and the chunk's decompressed bytes,
/// made into a pack that follows a valid pack (`BASE_PACK`, in slot 0, so
/// external references have records to point into). Both are then read as
/// `pack` reads one.
pub fn pack_records(data: &[u8]) {
    let Some((count, body)) = data.split_first_chunk::<2>() else {
        return;
    };
    let records = u16::from_le_bytes(*count) as u64;
    let base: &[u8] = BASE_PACK;
    let made = pack_around(body, records, &[pack_name(base)]);
    read_packs(&[base, &made]);
}

/// A valid pack (the lighthouse demo pattern at generation 0, 18 records,
/// written by `deeptime run`), the base that `pack_records` builds on; the
/// seed `lighthouse-gen1e29` refers into it.
pub const BASE_PACK: &[u8] = include_bytes!("../../corpus/pack/lighthouse-gen0.pack");

/// A pack of one chunk holding `body` (compressed as the writer does) and
/// claiming `records` records, with `slots` as its pack names; header,
/// table and trailer as CHECKPOINTS.md specifies, checksums correct.
pub fn pack_around(body: &[u8], records: u64, slots: &[Checksum]) -> Vec<u8> {
    // One compressor for every input: making a context per call (megabytes
    // of tables) was most of this harness's time.
    thread_local! {
        static COMPRESSOR: std::cell::RefCell<zstd::bulk::Compressor<'static>> =
            std::cell::RefCell::new(zstd::bulk::Compressor::new(3).expect("a zstd context"));
    }
    let chunk = COMPRESSOR
        .with(|compressor| compressor.borrow_mut().compress(body))
        .expect("zstd compresses any bytes");
    let mut out = Vec::with_capacity(chunk.len() + 128);
    out.extend_from_slice(PACK_MAGIC);
    out.extend_from_slice(&PACK_VERSION.to_le_bytes());
    let chunk_at = out.len() as u64;
    out.extend_from_slice(&chunk);
    let table_at = out.len() as u64;
    out.extend_from_slice(&PACK_VERSION.to_le_bytes());
    out.extend_from_slice(&1u32.to_le_bytes());
    out.extend_from_slice(&(slots.len() as u32).to_le_bytes());
    out.extend_from_slice(&0u32.to_le_bytes());
    out.extend_from_slice(&records.to_le_bytes());
    out.extend_from_slice(&chunk_at.to_le_bytes());
    out.extend_from_slice(&(chunk.len() as u32).to_le_bytes());
    out.extend_from_slice(&(body.len() as u32).to_le_bytes());
    out.extend_from_slice(&0u64.to_le_bytes());
    out.extend_from_slice(&Checksum::of(&chunk).0);
    for slot in slots {
        out.extend_from_slice(&slot.0);
    }
    let table_len = out.len() as u64 - table_at;
    out.extend_from_slice(&table_at.to_le_bytes());
    out.extend_from_slice(&table_len.to_le_bytes());
    out.extend_from_slice(TRAILER_MAGIC);
    out
}

/// Byte ranges of packs held in memory.
struct InMemory<'p>(&'p [&'p [u8]]);

impl Fetch for InMemory<'_> {
    fn fetch(&mut self, pack: usize, offset: u64, len: u64) -> Result<Vec<u8>, FetchError> {
        let missing = |text: String| FetchError::Missing(text);
        let bytes = self
            .0
            .get(pack)
            .ok_or_else(|| missing("no such pack".to_string()))?;
        let end = offset
            .checked_add(len)
            .ok_or_else(|| missing("range overflows".to_string()))?;
        bytes
            .get(offset as usize..end as usize)
            .map(<[u8]>::to_vec)
            .ok_or_else(|| {
                missing(format!(
                    "bytes {offset}..{end} of a pack of {}",
                    bytes.len()
                ))
            })
    }
}

/// Reads `packs` (in order, as a checkpoint lists them) whole, then on
/// demand from the last record of the last pack, as a manifest would
/// describe them.
fn read_packs(packs: &[&[u8]]) {
    let rule = Rule::parse("B3/S23").expect("the rule of Life");
    let inputs = packs.iter().map(|bytes| PackInput {
        bytes,
        table: None,
        records: None,
    });
    // The root is not known here: the read goes through every pack before
    // it finds that out.
    let root_at = QuadAt {
        pack: packs.len() as u32 - 1,
        record: 0,
    };
    let _ = Universe::from_packs(
        inputs,
        ContentId([0; 16]),
        root_at,
        rule,
        BigUint::ZERO,
        BUDGET,
    );

    // What a manifest would say of each pack: found from its trailer and
    // table when they are where the trailer says (else anything: the reader
    // must refuse it).
    let described: Vec<StoredPack> = packs.iter().map(|bytes| describe(bytes)).collect();
    let Some(last) = described.last() else {
        return;
    };
    let Some(record) = last
        .records
        .checked_sub(1)
        .filter(|&r| r <= u32::MAX as u64)
    else {
        return;
    };
    let root = QuadAt {
        pack: packs.len() as u32 - 1,
        record: record as u32,
    };
    let mut fetch = InMemory(packs);
    let mut state = StoredState::over(&mut fetch, described, rule);
    // A node is told the level of the pieces it reads; here the root's level
    // is whichever one its record holds (a leaf, or the first level its
    // children are read at), and the reader must refuse every other.
    let level = if state.cells(StoredNode::At(root)).is_ok() {
        Some(3)
    } else {
        (4..=64).find(|&level| state.children(StoredNode::At(root), level).is_ok())
    };
    if let Some(level) = level {
        let mut visited = HashSet::default();
        let _ = state.post_order(root, level, 3, &mut visited, &mut |_, _, _| {});
    }
}

/// A pack as a manifest would list it, taking its record count and table
/// from where its trailer says they are.
fn describe(bytes: &[u8]) -> StoredPack {
    let le = |at: usize| -> Option<u64> {
        Some(u64::from_le_bytes(bytes.get(at..at + 8)?.try_into().ok()?))
    };
    let size = bytes.len();
    let table = size
        .checked_sub(TRAILER_BYTES as usize)
        .and_then(|trailer| {
            let offset = le(trailer)? as usize;
            let len = le(trailer + 8)? as usize;
            bytes.get(offset..offset.checked_add(len)?)
        })
        .unwrap_or(&[]);
    let records = table.get(16..24).map_or(0, |count| {
        u64::from_le_bytes(count.try_into().expect("8 bytes"))
    });
    StoredPack {
        name: pack_name(bytes),
        bytes: size as u64,
        records,
        table: Checksum::of(table),
        place: "fuzz.pack".to_string(),
    }
}

/// Message kinds `wire` decodes, chosen by the input's first byte.
pub const WIRE_KINDS: u8 = 9;

/// A message a node or the coordinator accepts (the first byte says which,
/// the rest is its protobuf encoding), decoded and converted as the
/// services do: records (their ids checked), ids, squares, pack names,
/// figures.
pub fn wire(data: &[u8]) {
    let Some((&kind, bytes)) = data.split_first() else {
        return;
    };
    match kind % WIRE_KINDS {
        0 => {
            if let Ok(put) = v1::PutRequest::decode(bytes) {
                for record in &put.records {
                    let _ = wire::record_from_wire(record);
                }
                for id in &put.hold {
                    let _ = wire::id_from(id);
                }
            }
        }
        1 => {
            if let Ok(reply) = v1::FetchReply::decode(bytes) {
                for record in &reply.records {
                    let _ = wire::record_from_wire(record);
                }
            }
        }
        2 => {
            if let Ok(request) = v1::FetchRequest::decode(bytes) {
                for id in &request.ids {
                    let _ = wire::id_from(id);
                }
            }
        }
        3 => {
            if let Ok(request) = v1::RetainRequest::decode(bytes) {
                for id in &request.keep {
                    let _ = wire::id_from(id);
                }
            }
        }
        4 => {
            if let Ok(task) = v1::AdvanceTask::decode(bytes)
                && let Some(square) = &task.square
            {
                let _ = wire::ids4_from(&square.kids);
            }
        }
        5 => {
            if let Ok(request) = v1::DescribeRequest::decode(bytes)
                && let Some(square) = &request.square
            {
                let _ = wire::ids4_from(&square.kids);
            }
        }
        6 => {
            if let Ok(request) = v1::WritePackRequest::decode(bytes) {
                for name in &request.base {
                    let _ = wire::checksum_from(name);
                }
                for id in &request.pieces {
                    let _ = wire::id_from(id);
                }
            }
        }
        7 => {
            if let Ok(request) = v1::LoadRequest::decode(bytes) {
                for pack in &request.packs {
                    let _ = wire::checksum_from(&pack.name);
                    let _ = wire::checksum_from(&pack.table);
                }
            }
        }
        _ => {
            if let Ok(outcome) = v1::AdvanceOutcome::decode(bytes) {
                let _ = wire::id_from(&outcome.id);
                let _ = wire::figures_from_wire(outcome.population, outcome.extent);
            }
        }
    }
}
