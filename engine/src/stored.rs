//! A stored generation read on demand: from a checkpoint's root record down
//! to only the quads a region of text or a picture needs, fetching only the
//! bytes that hold them (a pack's trailer and table once, then one chunk at
//! a time), through a `Fetch` the caller provides.
//!
//! Trust comes down a chain: the manifest lists each pack's table checksum,
//! the table lists each chunk's checksum, and every chunk read is checked
//! against it (one whole zstd frame, capped decompression, record count).
//! Every reference followed is checked: to a pack listed before this one
//! and a record it has, to a record of the level the parent implies. What a
//! partial read cannot check without the rest (content ids, the sums of
//! populations below what it reads) a whole read (`Reader` in pack.rs)
//! does.

use std::collections::HashMap;
use std::io::Write;

use num_bigint::{BigInt, BigUint};

use crate::pack::{
    Checksum, PackError, PackTable, QuadAt, RawRecord, RawRef, ReadError, TRAILER_BYTES,
    decode_chunk, read_trailer,
};
use crate::render::{Picture, RenderError, picture_of};
use crate::rule::{Background, Rule};
use crate::store::LEAF_LEVEL;
use crate::universe::{Region, WriteError, write_region_rle};
use crate::view::QuadView;

/// Byte ranges of a checkpoint's packs.
pub trait Fetch {
    /// Exactly `len` bytes from `offset` of pack `pack` (its index in the
    /// checkpoint's list); why not, when they cannot be had.
    fn fetch(&mut self, pack: usize, offset: u64, len: u64) -> Result<Vec<u8>, FetchError>;
}

/// Why bytes of a pack could not be had.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum FetchError {
    /// the pack, or the range, is not there: the checkpoint is damaged
    Missing(String),
    /// the storage failed (a disk, the network): nothing is known of it
    Failed(String),
}

/// A pack as its checkpoint's manifest describes it.
#[derive(Clone, Debug)]
pub struct StoredPack {
    /// its name (the checksum of its bytes)
    pub name: Checksum,
    /// its size in bytes
    pub bytes: u64,
    /// its record count
    pub records: u64,
    /// the checksum of its table
    pub table: Checksum,
    /// where it is, for messages (a path or URL)
    pub place: String,
}

/// A quad of a stored state: a record, or an empty quad (never stored).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum StoredNode {
    Empty,
    At(QuadAt),
}

/// A quad met by `StoredState::post_order`.
#[derive(Clone, Copy, Debug)]
pub enum Visited {
    Leaf(u64),
    Inner([StoredNode; 4]),
}

/// A pack's table, once read, with its slots resolved to pack indices.
struct OpenPack {
    table: PackTable,
    slots: Vec<usize>,
}

/// A stored generation, read as far as it has been walked.
pub struct StoredState<'f> {
    fetch: &'f mut dyn Fetch,
    packs: Vec<StoredPack>,
    open: Vec<Option<OpenPack>>,
    chunks: HashMap<(usize, usize), Vec<RawRecord>>,
    decompressor: zstd::bulk::Decompressor<'static>,
    root: StoredNode,
    level: u32,
    rule: Rule,
    /// the background at the stored generation: the quads hold the cells
    /// that differ from it
    background: Background,
    /// records decoded so far (whole chunks)
    pub records_decoded: u64,
    /// of which leaves
    pub leaves_decoded: u64,
    /// chunks fetched so far
    pub chunks_read: u64,
}

impl<'f> StoredState<'f> {
    /// Opens the state whose root record is at `root` (of `packs`, in the
    /// manifest's order), reading that record and checking its population
    /// against the manifest's.
    pub fn open(
        fetch: &'f mut dyn Fetch,
        packs: Vec<StoredPack>,
        root: QuadAt,
        population: &BigUint,
        (rule, background): (Rule, Background),
    ) -> Result<StoredState<'f>, ReadError> {
        let count = packs.len();
        let mut state = StoredState {
            fetch,
            packs,
            open: (0..count).map(|_| None).collect(),
            chunks: HashMap::new(),
            decompressor: zstd::bulk::Decompressor::new().expect("a zstd decompressor"),
            root: StoredNode::At(root),
            level: LEAF_LEVEL,
            rule,
            background,
            records_decoded: 0,
            leaves_decoded: 0,
            chunks_read: 0,
        };
        let place = |state: &StoredState| {
            state
                .packs
                .get(root.pack as usize)
                .map_or_else(|| "the manifest".to_string(), |pack| pack.place.clone())
        };
        if root.pack as usize >= count {
            return Err(ReadError {
                place: place(&state),
                error: PackError::Fetch(format!("root pack {} is not listed", root.pack)),
            });
        }
        let record = state.record(root)?;
        state.level = record.level();
        let stored = match &record {
            RawRecord::Leaf(bits) => BigUint::from(bits.count_ones()),
            RawRecord::Inner { population, .. } => population.to_big(),
        };
        if &stored != population {
            return Err(ReadError {
                place: place(&state),
                error: PackError::Malformed {
                    offset: 0,
                    what: format!(
                        "root record {} holds {stored} live cells, the manifest says {population}",
                        root.record
                    ),
                },
            });
        }
        Ok(state)
    }

    /// The packs of a checkpoint, for reading quads by where they are
    /// (`children`, `cells`) rather than from a root: a cluster node
    /// reading the pieces it is given.
    pub fn over(fetch: &'f mut dyn Fetch, packs: Vec<StoredPack>, rule: Rule) -> StoredState<'f> {
        let count = packs.len();
        StoredState {
            fetch,
            packs,
            open: (0..count).map(|_| None).collect(),
            chunks: HashMap::new(),
            decompressor: zstd::bulk::Decompressor::new().expect("a zstd decompressor"),
            root: StoredNode::Empty,
            level: LEAF_LEVEL,
            rule,
            // No state of a generation: nothing is written from it.
            background: Background::Dead,
            records_decoded: 0,
            leaves_decoded: 0,
            chunks_read: 0,
        }
    }

    /// The root record and its level.
    pub fn root_node(&self) -> (StoredNode, u32) {
        (self.root, self.level)
    }

    /// The children (nw, ne, sw, se) of the stored quad at `node`, which
    /// its parent says is of `level` (at least 4); checked as every
    /// reference followed is.
    pub fn children(&mut self, node: StoredNode, level: u32) -> Result<[StoredNode; 4], ReadError> {
        if let StoredNode::At(at) = node
            && at.pack as usize >= self.packs.len()
        {
            return Err(ReadError {
                place: "the manifest".to_string(),
                error: PackError::Fetch(format!("pack {} is not listed", at.pack)),
            });
        }
        QuadView::kids(self, node, level)
    }

    /// The cells of the stored leaf at `node` (bit `8*y + x`).
    pub fn cells(&mut self, node: StoredNode) -> Result<u64, ReadError> {
        if let StoredNode::At(at) = node
            && at.pack as usize >= self.packs.len()
        {
            return Err(ReadError {
                place: "the manifest".to_string(),
                error: PackError::Fetch(format!("pack {} is not listed", at.pack)),
            });
        }
        QuadView::leaf_bits(self, node)
    }

    /// Visits the stored quads under `root` (of `level`) once each,
    /// children before parents, nw to se: leaves with their cells, inner
    /// quads with their children. Quads of level `floor` are visited but
    /// not gone below (their children are named, not visited); quads in
    /// `visited` are skipped (and every quad visited is added to it, so
    /// several walks share their work).
    pub fn post_order(
        &mut self,
        root: QuadAt,
        level: u32,
        floor: u32,
        visited: &mut std::collections::HashSet<QuadAt, ahash::RandomState>,
        visit: &mut dyn FnMut(QuadAt, u32, Visited),
    ) -> Result<(), ReadError> {
        // (quad, level, its children once read)
        let mut stack: Vec<(QuadAt, u32, Option<[StoredNode; 4]>)> = vec![(root, level, None)];
        while let Some((at, level, kids)) = stack.pop() {
            if visited.contains(&at) {
                continue;
            }
            if level == LEAF_LEVEL {
                let bits = self.cells(StoredNode::At(at))?;
                visited.insert(at);
                visit(at, level, Visited::Leaf(bits));
                continue;
            }
            match kids {
                None => {
                    let kids = self.children(StoredNode::At(at), level)?;
                    stack.push((at, level, Some(kids)));
                    if level > floor {
                        for kid in kids.iter().rev() {
                            if let StoredNode::At(kid) = kid
                                && !visited.contains(kid)
                            {
                                stack.push((*kid, level - 1, None));
                            }
                        }
                    }
                }
                Some(kids) => {
                    visited.insert(at);
                    visit(at, level, Visited::Inner(kids));
                }
            }
        }
        Ok(())
    }

    /// How many decoded chunks are kept.
    pub fn chunks_held(&self) -> usize {
        self.chunks.len()
    }

    /// Drops the decoded chunks kept so far (they are read again if needed),
    /// to bound memory on a long walk; returns how many there were.
    pub fn forget_chunks(&mut self) -> usize {
        let held = self.chunks.len();
        self.chunks.clear();
        held
    }

    /// The level of the root record (3 for a state within one leaf).
    pub fn root_level(&self) -> u32 {
        self.level
    }

    /// The rule the state runs under.
    pub fn rule(&self) -> Rule {
        self.rule
    }

    /// The background at the stored generation (see [`Background`]).
    pub fn background(&self) -> Background {
        self.background
    }

    fn fail(&self, pack: usize, error: PackError) -> ReadError {
        ReadError {
            place: self.packs[pack].place.clone(),
            error,
        }
    }

    fn fetch(&mut self, pack: usize, offset: u64, len: u64) -> Result<Vec<u8>, ReadError> {
        let bytes = self.fetch.fetch(pack, offset, len).map_err(|error| {
            let error = match error {
                FetchError::Missing(message) => PackError::Fetch(message),
                FetchError::Failed(message) => PackError::Unreadable(message),
            };
            self.fail(pack, error)
        })?;
        if bytes.len() as u64 != len {
            return Err(self.fail(
                pack,
                PackError::Fetch(format!(
                    "asked for {len} bytes at {offset}, got {}",
                    bytes.len()
                )),
            ));
        }
        Ok(bytes)
    }

    /// Reads pack `pack`'s trailer and table, once.
    fn open_pack(&mut self, pack: usize) -> Result<(), ReadError> {
        if self.open[pack].is_some() {
            return Ok(());
        }
        let size = self.packs[pack].bytes;
        let trailer = self.fetch(pack, size.saturating_sub(TRAILER_BYTES), TRAILER_BYTES)?;
        let (offset, len) = read_trailer(&trailer, size).map_err(|e| self.fail(pack, e))?;
        let bytes = self.fetch(pack, offset, len)?;
        if Checksum::of(&bytes) != self.packs[pack].table {
            return Err(self.fail(
                pack,
                PackError::Malformed {
                    offset,
                    what: "table does not match the manifest's checksum (damaged)".into(),
                },
            ));
        }
        let table = PackTable::parse(&bytes, offset).map_err(|e| self.fail(pack, e))?;
        if table.records != self.packs[pack].records {
            return Err(self.fail(
                pack,
                PackError::Malformed {
                    offset: offset + 16,
                    what: format!(
                        "holds {} records, the manifest says {}",
                        table.records, self.packs[pack].records
                    ),
                },
            ));
        }
        let mut slots = Vec::with_capacity(table.slots.len());
        for (slot, name) in table.slots.iter().enumerate() {
            let found = self.packs[..pack].iter().position(|p| &p.name == name);
            let Some(found) = found else {
                return Err(self.fail(
                    pack,
                    PackError::Malformed {
                        offset,
                        what: format!(
                            "pack slot {slot} names pack {name}, which the manifest does not list before it"
                        ),
                    },
                ));
            };
            slots.push(found);
        }
        self.open[pack] = Some(OpenPack { table, slots });
        Ok(())
    }

    /// The record at `at`, fetching and checking its chunk if needed.
    fn record(&mut self, at: QuadAt) -> Result<RawRecord, ReadError> {
        let pack = at.pack as usize;
        self.open_pack(pack)?;
        let open = self.open[pack].as_ref().expect("opened");
        if at.record as u64 >= open.table.records {
            let records = open.table.records;
            return Err(self.fail(
                pack,
                PackError::Fetch(format!("no record {} (it holds {records})", at.record)),
            ));
        }
        let chunk = open.table.chunk_of(at.record as u64);
        let first = open.table.chunks[chunk].first;
        if !self.chunks.contains_key(&(pack, chunk)) {
            let entry = open.table.chunks[chunk];
            let data = self.fetch(pack, entry.offset, entry.compressed as u64)?;
            let open = self.open[pack].as_ref().expect("opened");
            let records = decode_chunk(&data, &open.table, chunk, &mut self.decompressor)
                .map_err(|e| self.fail(pack, e))?;
            self.chunks_read += 1;
            self.records_decoded += records.len() as u64;
            self.leaves_decoded += records
                .iter()
                .filter(|record| matches!(record, RawRecord::Leaf(_)))
                .count() as u64;
            self.chunks.insert((pack, chunk), records);
        }
        Ok(self.chunks[&(pack, chunk)][(at.record as u64 - first) as usize].clone())
    }

    /// The record of `node`, which its parent says is of `level`.
    fn record_of_level(&mut self, at: QuadAt, level: u32) -> Result<RawRecord, ReadError> {
        let record = self.record(at)?;
        if record.level() != level {
            return Err(self.fail(
                at.pack as usize,
                PackError::Malformed {
                    offset: 0,
                    what: format!(
                        "record {} is of level {}, its parent needs level {level}",
                        at.record,
                        record.level()
                    ),
                },
            ));
        }
        Ok(record)
    }

    /// Writes the cells of `region` as RLE text whose (0, 0) is the
    /// region's top-left corner, reading only the quads that overlap it.
    pub fn write_rle_region(
        &mut self,
        out: &mut impl Write,
        region: &Region,
    ) -> Result<(), WriteError> {
        self.write_rle_noted(out, region, None)
    }

    /// As `write_rle_region`, with a `#C` comment line holding `note`.
    pub fn write_rle_noted(
        &mut self,
        out: &mut impl Write,
        region: &Region,
        note: Option<&str>,
    ) -> Result<(), WriteError> {
        let rule = (self.rule, self.background);
        write_region_rle(self, rule, out, region, note)
    }

    /// The picture of the cells from (`left`, `top`), as
    /// `Universe::picture`, reading quads only down to the pixel's level.
    pub fn picture(
        &mut self,
        left: &BigInt,
        top: &BigInt,
        columns: u64,
        rows: u64,
        scale: u32,
    ) -> Result<Picture, RenderError> {
        picture_of(self, left, top, columns, rows, scale)
    }
}

impl QuadView for StoredState<'_> {
    type Node = StoredNode;

    fn root(&self) -> (StoredNode, u32) {
        (self.root, self.level)
    }

    fn is_empty(&self, node: StoredNode, _level: u32) -> bool {
        node == StoredNode::Empty
    }

    fn kids(&mut self, node: StoredNode, level: u32) -> Result<[StoredNode; 4], ReadError> {
        let StoredNode::At(at) = node else {
            return Ok([StoredNode::Empty; 4]);
        };
        let RawRecord::Inner { kids, .. } = self.record_of_level(at, level)? else {
            unreachable!("a record of level 4 or more is inner");
        };
        let pack = at.pack as usize;
        let mut nodes = [StoredNode::Empty; 4];
        for (slot, kid) in kids.iter().enumerate() {
            nodes[slot] = match *kid {
                RawRef::Local(record) => StoredNode::At(QuadAt {
                    pack: at.pack,
                    record,
                }),
                RawRef::External {
                    slot: which,
                    record,
                    ..
                } => {
                    let open = self.open[pack].as_ref().expect("read its record");
                    let other = open.slots[which as usize];
                    if record as u64 >= self.packs[other].records {
                        return Err(self.fail(
                            pack,
                            PackError::Malformed {
                                offset: 0,
                                what: format!(
                                    "record {} refers to record {record} of {}, which holds {}",
                                    at.record, self.packs[other].place, self.packs[other].records
                                ),
                            },
                        ));
                    }
                    StoredNode::At(QuadAt {
                        pack: other as u32,
                        record,
                    })
                }
                RawRef::Empty => StoredNode::Empty,
            };
        }
        Ok(nodes)
    }

    fn leaf_bits(&mut self, node: StoredNode) -> Result<u64, ReadError> {
        let StoredNode::At(at) = node else {
            return Ok(0);
        };
        match self.record_of_level(at, LEAF_LEVEL)? {
            RawRecord::Leaf(bits) => Ok(bits),
            RawRecord::Inner { .. } => unreachable!("a record of level 3 is a leaf"),
        }
    }

    fn population(&mut self, node: StoredNode, level: u32) -> Result<BigUint, ReadError> {
        let StoredNode::At(at) = node else {
            return Ok(BigUint::ZERO);
        };
        Ok(match self.record_of_level(at, level)? {
            RawRecord::Leaf(bits) => BigUint::from(bits.count_ones()),
            RawRecord::Inner { population, .. } => population.to_big(),
        })
    }
}
