//! Packs: a state written and read back is the same state (by digest, an
//! independent content hash of its cells); incremental packs hold only what
//! is new; damaged packs are refused with where the damage is. (Common
//! practice for content-addressed storage.)

use std::collections::HashSet;

use deeptime_engine::pattern::read_pattern;
use deeptime_engine::rule::Rule;
use deeptime_engine::{ContentId, Universe};
use num_bigint::BigUint;

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
    Universe::from_pattern(&read_pattern(text.as_bytes()).unwrap(), Rule::LIFE, BUDGET).unwrap()
}

#[test]
fn a_state_read_back_from_its_pack_has_its_digest() {
    for steps in [0u32, 1, 100, 1000] {
        let mut state = soup(200, 7);
        state.advance(&steps.into(), None).unwrap();
        let (digest, pack) = state.write_pack(&|_| false).unwrap();
        let pack = pack.expect("a non-empty state writes a pack");
        let (mut back, ids) = Universe::from_packs(
            [pack.bytes.as_slice()],
            digest,
            Rule::LIFE,
            BigUint::from(steps),
            BUDGET,
        )
        .unwrap();
        assert_eq!(back.digest().unwrap(), digest);
        assert_eq!(back.population(), state.population());
        assert_eq!(back.generation(), &BigUint::from(steps));
        assert_eq!(ids.len() as u64, pack.records);
        // And it evolves on like the original.
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
        let mut state =
            Universe::from_pattern(&read_pattern(text.as_bytes()).unwrap(), Rule::LIFE, BUDGET)
                .unwrap();
        let (digest, pack) = state.write_pack(&|_| false).unwrap();
        let packs: Vec<Vec<u8>> = pack.into_iter().map(|p| p.bytes).collect();
        let (mut back, _) = Universe::from_packs(
            packs.iter().map(|p| p.as_slice()),
            digest,
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
    let (first_digest, first) = state.write_pack(&|_| false).unwrap();
    let first = first.unwrap();
    let known: HashSet<ContentId> = first.ids.iter().copied().collect();
    state.advance(&8u32.into(), None).unwrap();
    let (second_digest, second) = state.write_pack(&|id| known.contains(id)).unwrap();
    let second = second.unwrap();
    assert!(
        second.records < first.records,
        "{} vs {}",
        second.records,
        first.records
    );
    assert!(second.ids.iter().all(|id| !known.contains(id)));
    // Both packs in order give the second state; the first alone the first.
    let (mut later, _) = Universe::from_packs(
        [first.bytes.as_slice(), second.bytes.as_slice()],
        second_digest,
        Rule::LIFE,
        BigUint::from(508u32),
        BUDGET,
    )
    .unwrap();
    assert_eq!(later.digest().unwrap(), second_digest);
    let (mut earlier, _) = Universe::from_packs(
        [first.bytes.as_slice()],
        first_digest,
        Rule::LIFE,
        BigUint::from(500u32),
        BUDGET,
    )
    .unwrap();
    assert_eq!(earlier.digest().unwrap(), first_digest);
    // The second pack alone refers to quads nobody holds.
    let alone = Universe::from_packs(
        [second.bytes.as_slice()],
        second_digest,
        Rule::LIFE,
        BigUint::from(508u32),
        BUDGET,
    );
    let (index, error) = alone.err().expect("references must resolve");
    assert_eq!(index, 0);
    assert!(
        error.to_string().contains("no earlier pack holds"),
        "{error}"
    );
}

#[test]
fn damaged_packs_are_refused_never_misread() {
    let mut state = soup(64, 5);
    state.advance(&50u32.into(), None).unwrap();
    let (digest, pack) = state.write_pack(&|_| false).unwrap();
    let bytes = pack.unwrap().bytes;
    let read = |bytes: &[u8]| {
        Universe::from_packs([bytes], digest, Rule::LIFE, BigUint::from(50u32), BUDGET)
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
        "pack version 9 (this build reads 1) at byte 12"
    );
}
