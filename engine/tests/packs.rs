//! Packs: a state written and read back is the same state (by digest, an
//! independent content hash of its cells); incremental packs hold only what
//! is new; damaged packs are refused with where the damage is. (Common
//! practice for content-addressed storage.)

use deeptime_engine::pack::{Checksum, QuadAt, pack_name};
use deeptime_engine::pattern::read_pattern;
use deeptime_engine::rule::Rule;
use deeptime_engine::stored::{Fetch, FetchError, StoredPack, StoredState};
use deeptime_engine::{KnownQuads, PackInput, Region, Universe};
use num_bigint::{BigInt, BigUint};

const BUDGET: u64 = 1 << 30;

fn soup(side: u64, seed: u64) -> Universe {
    let mut state = seed | 1;
    let mut rows = Vec::new();
    for _ in 0..side {
        let mut row = String::new();
        for _ in 0..side {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            row.push(if state % 8 < 3 { 'o' } else { 'b' });
        }
        rows.push(row);
    }
    let text = format!("x = {side}, y = {side}\n{}!", rows.join("$"));
    Universe::from_pattern(
        &read_pattern(text.as_bytes(), BUDGET).unwrap(),
        Rule::LIFE,
        BUDGET,
    )
    .unwrap()
}

#[test]
fn a_state_read_back_from_its_pack_has_its_digest() {
    for steps in [0u32, 1, 100, 1000] {
        let mut state = soup(200, 7);
        state.advance(&steps.into(), None).unwrap();
        let (digest, pack) = state.write_pack(&|_| None, &[]).unwrap();
        let pack = pack.expect("a non-empty state writes a pack");
        let (mut back, ids) = Universe::from_packs(
            [whole(&pack.bytes)],
            digest,
            last(0, pack.records),
            Rule::LIFE,
            BigUint::from(steps),
            BUDGET,
        )
        .unwrap();
        assert_eq!(back.digest().unwrap(), digest);
        assert_eq!(back.population(), state.population());
        assert_eq!(back.generation(), &BigUint::from(steps));
        assert_eq!(ids.len() as u64, pack.records);
        // And it goes on like the original.
        back.advance(&64u32.into(), None).unwrap();
        state.advance(&64u32.into(), None).unwrap();
        assert_eq!(back.digest().unwrap(), state.digest().unwrap());
    }
}

#[test]
fn small_and_empty_states_round_trip() {
    for text in [
        "x = 1, y = 1\no!",
        "x = 3, y = 3\nbob$2bo$3o!",
        "x = 0, y = 0\n!",
    ] {
        let mut state = Universe::from_pattern(
            &read_pattern(text.as_bytes(), BUDGET).unwrap(),
            Rule::LIFE,
            BUDGET,
        )
        .unwrap();
        let (digest, pack) = state.write_pack(&|_| None, &[]).unwrap();
        let pack = pack.expect("even the empty state stores its root");
        let (mut back, _) = Universe::from_packs(
            [whole(&pack.bytes)],
            digest,
            last(0, pack.records),
            Rule::LIFE,
            BigUint::from(0u32),
            BUDGET,
        )
        .unwrap();
        assert_eq!(back.digest().unwrap(), digest, "{text}");
        assert_eq!(back.cells().unwrap(), state.cells().unwrap(), "{text}");
    }
}

#[test]
fn an_incremental_pack_holds_only_new_quads() {
    let mut state = soup(200, 11);
    state.advance(&500u32.into(), None).unwrap();
    let (first_digest, first) = state.write_pack(&|_| None, &[]).unwrap();
    let first = first.unwrap();
    let first_name = pack_name(&first.bytes);
    let known: KnownQuads = first
        .ids
        .iter()
        .enumerate()
        .map(|(record, id)| {
            let at = QuadAt {
                pack: 0,
                record: record as u32,
            };
            (*id, at)
        })
        .collect();
    state.advance(&8u32.into(), None).unwrap();
    let (second_digest, second) = state
        .write_pack(&|id| known.get(id).copied(), &[first_name])
        .unwrap();
    let second = second.unwrap();
    assert!(
        second.records < first.records,
        "{} vs {}",
        second.records,
        first.records
    );
    assert!(second.ids.iter().all(|id| !known.contains_key(id)));
    // Both packs in order give the second state; the first alone the first.
    let (mut later, found) = Universe::from_packs(
        [whole(&first.bytes), whole(&second.bytes)],
        second_digest,
        last(1, second.records),
        Rule::LIFE,
        BigUint::from(508u32),
        BUDGET,
    )
    .unwrap();
    assert_eq!(later.digest().unwrap(), second_digest);
    assert_eq!(found.len() as u64, first.records + second.records);
    let (mut earlier, _) = Universe::from_packs(
        [whole(&first.bytes)],
        first_digest,
        last(0, first.records),
        Rule::LIFE,
        BigUint::from(500u32),
        BUDGET,
    )
    .unwrap();
    assert_eq!(earlier.digest().unwrap(), first_digest);
    // The second pack alone refers to a pack nobody read.
    let alone = Universe::from_packs(
        [whole(&second.bytes)],
        second_digest,
        last(0, second.records),
        Rule::LIFE,
        BigUint::from(508u32),
        BUDGET,
    );
    let (index, error) = alone.err().expect("references must resolve");
    assert_eq!(index, 0);
    assert!(
        error.to_string().contains("which no earlier pack is"),
        "{error}"
    );
    // A table that differs from the one the manifest names is refused.
    let wrong = Universe::from_packs(
        [PackInput {
            bytes: &first.bytes,
            table: Some(second.table),
            records: None,
        }],
        first_digest,
        last(0, first.records),
        Rule::LIFE,
        BigUint::from(500u32),
        BUDGET,
    );
    let (_, error) = wrong.err().expect("the table is checked");
    assert!(error.to_string().contains("manifest's checksum"), "{error}");
}

#[test]
fn damaged_packs_are_refused_never_misread() {
    let mut state = soup(64, 5);
    state.advance(&50u32.into(), None).unwrap();
    let (digest, pack) = state.write_pack(&|_| None, &[]).unwrap();
    let pack = pack.unwrap();
    let (bytes, records) = (pack.bytes, pack.records);
    let read = |bytes: &[u8]| {
        Universe::from_packs(
            [PackInput {
                bytes,
                table: None,
                records: None,
            }],
            digest,
            last(0, records),
            Rule::LIFE,
            BigUint::from(50u32),
            BUDGET,
        )
    };
    // Truncations at every length, and one bit flipped at many offsets:
    // each is refused, or (if the flip hits nothing meaningful) gives back
    // exactly the same state — never a different one.
    for len in (0..bytes.len()).step_by(7) {
        assert!(read(&bytes[..len]).is_err(), "truncated to {len}");
    }
    for offset in (0..bytes.len()).step_by(3) {
        let mut damaged = bytes.clone();
        damaged[offset] ^= 1 << (offset % 8);
        match read(&damaged) {
            Err(_) => {}
            Ok((mut back, _)) => assert_eq!(back.digest().unwrap(), digest, "flip at {offset}"),
        }
    }
    let mut wrong_version = bytes.clone();
    wrong_version[12] = 9;
    let (_, error) = read(&wrong_version).err().unwrap();
    assert_eq!(
        error.to_string(),
        "pack version 9 (this build reads 2) at byte 12"
    );
    // Anything after the trailer, or a second zstd frame after a chunk's
    // frame, is refused rather than ignored.
    let mut longer = bytes.clone();
    longer.push(0);
    assert!(read(&longer).is_err());
    let (_, error) = read(&with_second_frame(&bytes)).err().unwrap();
    assert!(
        error.to_string().contains("not exactly one zstd frame"),
        "{error}"
    );
}

/// Found by fuzzing (fuzz target `pack`): a table claiming u32::MAX records
/// made the whole reader reserve 40 GB for them and abort. The count must
/// fit the chunks' bytes (a record takes at least 7) and is refused with
/// where it is, by both readers.
#[test]
fn a_record_count_the_chunks_cannot_hold_is_refused_before_any_allocation() {
    let text = "x = 3, y = 3\nbob$2bo$3o!";
    let mut state = Universe::from_pattern(
        &read_pattern(text.as_bytes(), BUDGET).unwrap(),
        Rule::LIFE,
        BUDGET,
    )
    .unwrap();
    let (digest, pack) = state.write_pack(&|_| None, &[]).unwrap();
    let mut bytes = pack.unwrap().bytes;
    let size = bytes.len();
    let table_at = u64::from_le_bytes(bytes[size - 24..size - 16].try_into().unwrap()) as usize;
    bytes[table_at + 16..table_at + 24].copy_from_slice(&(u32::MAX as u64).to_le_bytes());
    let expected = format!(
        "record count 4294967295 is more than chunks of 9 bytes can hold at byte {}",
        table_at + 16
    );
    let (_, error) = Universe::from_packs(
        [whole(&bytes)],
        digest,
        last(0, 1),
        Rule::LIFE,
        BigUint::ZERO,
        BUDGET,
    )
    .err()
    .unwrap();
    assert_eq!(error.to_string(), expected);
    let table = Checksum::of(&bytes[table_at..size - 24]);
    let packs = stored_packs(&[(&bytes, table, u32::MAX as u64)]);
    let mut fetch = Counted {
        packs: vec![&bytes],
        fetched: 0,
    };
    let error = StoredState::open(
        &mut fetch,
        packs,
        last(0, 1),
        &BigUint::from(5u32),
        (Rule::LIFE, deeptime_engine::rule::Background::Dead),
    )
    .err()
    .unwrap();
    assert!(error.to_string().ends_with(&expected), "{error}");
}

/// `pack` with an empty zstd frame appended to its first chunk, and its
/// table rewritten to match (offsets, sizes, checksums): every check but
/// the one-frame rule passes.
fn with_second_frame(pack: &[u8]) -> Vec<u8> {
    let u64_at =
        |bytes: &[u8], at: usize| u64::from_le_bytes(bytes[at..at + 8].try_into().unwrap());
    let u32_at =
        |bytes: &[u8], at: usize| u32::from_le_bytes(bytes[at..at + 4].try_into().unwrap());
    let size = pack.len();
    let table_offset = u64_at(pack, size - 24) as usize;
    let table_len = u64_at(pack, size - 16) as usize;
    let mut table = pack[table_offset..table_offset + table_len].to_vec();
    let chunks = u32_at(&table, 4) as usize;
    let extra = zstd::bulk::compress(&[], 3).unwrap();
    let mut out = pack[..16].to_vec();
    for chunk in 0..chunks {
        let at = 24 + 40 * chunk;
        let offset = u64_at(&table, at) as usize;
        let len = u32_at(&table, at + 8) as usize;
        let mut data = pack[offset..offset + len].to_vec();
        if chunk == 0 {
            data.extend_from_slice(&extra);
        }
        table[at..at + 8].copy_from_slice(&(out.len() as u64).to_le_bytes());
        table[at + 8..at + 12].copy_from_slice(&(data.len() as u32).to_le_bytes());
        table[at + 24..at + 40].copy_from_slice(&Checksum::of(&data).0);
        out.extend_from_slice(&data);
    }
    let new_offset = out.len() as u64;
    out.extend_from_slice(&table);
    out.extend_from_slice(&new_offset.to_le_bytes());
    out.extend_from_slice(&(table.len() as u64).to_le_bytes());
    out.extend_from_slice(b"packtail");
    out
}

/// A whole pack read without a manifest's table checksum.
fn whole(bytes: &[u8]) -> PackInput<'_> {
    PackInput {
        bytes,
        table: None,
        records: None,
    }
}

/// The last record of pack `pack`, which holds `records`: where a new root is.
fn last(pack: u32, records: u64) -> QuadAt {
    QuadAt {
        pack,
        record: records as u32 - 1,
    }
}

/// Packs in memory, counting the bytes fetched.
struct Counted<'a> {
    packs: Vec<&'a [u8]>,
    fetched: u64,
}

impl Fetch for Counted<'_> {
    fn fetch(&mut self, pack: usize, offset: u64, len: u64) -> Result<Vec<u8>, FetchError> {
        let bytes = self.packs[pack];
        let end = offset
            .checked_add(len)
            .filter(|&end| end <= bytes.len() as u64);
        let end = end.ok_or_else(|| {
            FetchError::Missing(format!("{len} bytes at {offset} are past the end"))
        })?;
        self.fetched += len;
        Ok(bytes[offset as usize..end as usize].to_vec())
    }
}

fn stored_packs(packs: &[(&[u8], Checksum, u64)]) -> Vec<StoredPack> {
    packs
        .iter()
        .enumerate()
        .map(|(index, (bytes, table, records))| StoredPack {
            name: pack_name(bytes),
            bytes: bytes.len() as u64,
            records: *records,
            table: *table,
            place: format!("pack {index}"),
        })
        .collect()
}

#[test]
fn a_region_and_a_picture_read_from_a_few_chunks_equal_those_of_the_whole_state() {
    let mut state = soup(1024, 21);
    state.advance(&20u32.into(), None).unwrap();
    let (_, first) = state.write_pack(&|_| None, &[]).unwrap();
    let first = first.unwrap();
    let known: KnownQuads = first
        .ids
        .iter()
        .enumerate()
        .map(|(record, id)| {
            let at = QuadAt {
                pack: 0,
                record: record as u32,
            };
            (*id, at)
        })
        .collect();
    // A second, incremental pack: its references into the first are followed too.
    state.advance(&4u32.into(), None).unwrap();
    let (_, second) = state
        .write_pack(&|id| known.get(id).copied(), &[pack_name(&first.bytes)])
        .unwrap();
    let second = second.unwrap();
    let packs = stored_packs(&[
        (&first.bytes, first.table, first.records),
        (&second.bytes, second.table, second.records),
    ]);
    let total = (first.bytes.len() + second.bytes.len()) as u64;
    let population = state.population();
    let root = last(1, second.records);
    let region = Region {
        left: BigInt::from(300),
        top: BigInt::from(-200),
        width: 64,
        height: 48,
    };
    let mut fetch = Counted {
        packs: vec![&first.bytes, &second.bytes],
        fetched: 0,
    };
    let mut stored = StoredState::open(
        &mut fetch,
        packs.clone(),
        root,
        &population,
        (Rule::LIFE, deeptime_engine::rule::Background::Dead),
    )
    .unwrap();
    let mut from_stored = Vec::new();
    stored.write_rle_region(&mut from_stored, &region).unwrap();
    drop(stored);
    let mut from_memory = Vec::new();
    state.write_rle_region(&mut from_memory, &region).unwrap();
    assert_eq!(
        String::from_utf8(from_stored).unwrap(),
        String::from_utf8(from_memory).unwrap()
    );
    // The region needs a small part of the packs: tables and a few chunks
    // (the bound is common practice for an index: well under a tenth).
    assert!(
        fetch.fetched * 10 < total,
        "the region fetched {} of {total} bytes",
        fetch.fetched
    );
    // A picture at 64 cells per pixel of the whole soup reads quads of
    // level 6 and up only, which sit together at the end of each pack.
    let mut fetch = Counted {
        packs: vec![&first.bytes, &second.bytes],
        fetched: 0,
    };
    let mut stored = StoredState::open(
        &mut fetch,
        packs,
        root,
        &population,
        (Rule::LIFE, deeptime_engine::rule::Background::Dead),
    )
    .unwrap();
    let (left, top) = (BigInt::from(-40), BigInt::from(-40));
    let picture = stored.picture(&left, &top, 20, 20, 6).unwrap();
    drop(stored);
    let expected = state.picture(&left, &top, 20, 20, 6).unwrap();
    assert_eq!(picture.shares, expected.shares);
    assert!(
        fetch.fetched * 10 < total,
        "the picture fetched {} of {total} bytes",
        fetch.fetched
    );
}

#[test]
fn a_partial_read_refuses_a_damaged_chunk_or_a_wrong_population() {
    let mut state = soup(256, 9);
    state.advance(&10u32.into(), None).unwrap();
    let (_, pack) = state.write_pack(&|_| None, &[]).unwrap();
    let pack = pack.unwrap();
    let root = last(0, pack.records);
    let region = Region {
        left: BigInt::from(-100),
        top: BigInt::from(-100),
        width: 200,
        height: 200,
    };
    // A wrong population in the manifest.
    let packs = stored_packs(&[(&pack.bytes, pack.table, pack.records)]);
    let mut fetch = Counted {
        packs: vec![&pack.bytes],
        fetched: 0,
    };
    let wrong = &state.population() + 1u32;
    let error = StoredState::open(
        &mut fetch,
        packs.clone(),
        root,
        &wrong,
        (Rule::LIFE, deeptime_engine::rule::Background::Dead),
    )
    .err()
    .unwrap();
    assert!(error.to_string().contains("live cells"), "{error}");
    // One flipped bit in the first chunk (leaves): the region reads it and
    // refuses it by its checksum.
    let mut damaged = pack.bytes.clone();
    damaged[40] ^= 4;
    let mut fetch = Counted {
        packs: vec![&damaged],
        fetched: 0,
    };
    let refused = match StoredState::open(
        &mut fetch,
        packs,
        root,
        &state.population(),
        (Rule::LIFE, deeptime_engine::rule::Background::Dead),
    ) {
        // The root's chunk may be the damaged one; else the region's is.
        Err(error) => error.to_string(),
        Ok(mut stored) => stored
            .write_rle_region(&mut Vec::new(), &region)
            .expect_err("the damaged chunk is refused")
            .to_string(),
    };
    assert!(
        refused.contains("chunk 0 does not match its checksum"),
        "{refused}"
    );
}

#[test]
fn shard_packs_that_share_quads_and_a_pack_of_the_top_read_back_as_the_state() {
    // A cluster checkpoint: a state cut at a shard level, its pieces
    // written by two shards whose pieces overlap (so both packs hold the
    // shared quads), and the top of the tree written by content id on top.
    // Read back whole it is the same state (by digest, common practice for
    // content-addressed storage).
    use deeptime_engine::pack::{IdQuad, write_id_pack};
    use deeptime_engine::shard::Shard;
    use std::collections::{HashMap, HashSet};

    let mut state = soup(160, 11);
    state.advance(&50u32.into(), None).unwrap();
    let digest = state.digest().unwrap();
    let cut = state.cut(6).unwrap();
    assert!(cut.pieces.len() > 8, "{} pieces", cut.pieces.len());
    let third = cut.pieces.len() / 3;
    let shares = [&cut.pieces[..2 * third], &cut.pieces[third..]];
    let mut packs = Vec::new();
    let mut known: HashMap<_, QuadAt> = HashMap::new();
    for (index, share) in shares.iter().enumerate() {
        let mut shard = Shard::new(Rule::LIFE, BUDGET).unwrap();
        let mut sent = HashSet::new();
        let mut records = Vec::new();
        for piece in share.iter() {
            records.extend(state.records(piece.handle, 5, &mut sent));
        }
        let ids: Vec<_> = share.iter().map(|p| p.id).collect();
        shard.put(&records, &ids).unwrap();
        let pack = shard.write_pack(&ids, &|_| None, &[]).unwrap().unwrap();
        for (record, id) in pack.ids.iter().enumerate() {
            known.entry(*id).or_insert(QuadAt {
                pack: index as u32,
                record: record as u32,
            });
        }
        packs.push(pack);
    }
    // The pieces in the middle third are in both packs.
    let first: HashSet<_> = packs[0].ids.iter().collect();
    assert!(packs[1].ids.iter().filter(|id| first.contains(id)).count() >= third);
    // The top: children before parents, each with its population.
    let mut population: HashMap<_, BigUint> = cut
        .pieces
        .iter()
        .map(|p| (p.id, BigUint::from(p.figures.population)))
        .collect();
    let mut top = Vec::new();
    for quad in cut.upper.iter().rev() {
        let sum: BigUint = quad
            .kids
            .iter()
            .map(|kid| population.get(kid).cloned().unwrap_or_default())
            .sum();
        population.insert(quad.id, sum.clone());
        top.push(IdQuad {
            id: quad.id,
            level: quad.level,
            kids: quad.kids,
            population: sum,
        });
    }
    let names = [pack_name(&packs[0].bytes), pack_name(&packs[1].bytes)];
    let upper = write_id_pack(&top, &|id| known.get(id).copied(), &names)
        .unwrap()
        .unwrap();
    // A child no pack holds is refused, by name.
    let lonely = IdQuad {
        kids: [cut.root; 4],
        level: cut.root_level + 1,
        ..top[0].clone()
    };
    let Err(refused) = write_id_pack(&[lonely], &|_| None, &[]) else {
        panic!("a pack with a dangling child was written");
    };
    assert!(refused.contains("that no pack holds"), "{refused}");
    let (back, _) = Universe::from_packs(
        [
            whole(&packs[0].bytes),
            whole(&packs[1].bytes),
            whole(&upper.bytes),
        ],
        cut.root,
        last(2, upper.records),
        Rule::LIFE,
        BigUint::from(50u32),
        BUDGET,
    )
    .unwrap();
    let mut back = back;
    assert_eq!(back.digest().unwrap(), digest);
    assert_eq!(back.population(), state.population());
}
