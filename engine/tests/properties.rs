//! Properties that must hold for any pattern: advancing by a then b equals
//! advancing by a + b; the digest depends only on the live cells; RLE text
//! written and read back gives the same cells. (Common practice for a
//! deterministic simulator and a content-addressed store.)

use deeptime_engine::Universe;
use deeptime_engine::pattern::{Builder, Pattern, read_pattern};
use deeptime_engine::rule::Rule;
use num_bigint::BigUint;
use proptest::prelude::*;

const BUDGET: u64 = 1 << 30;
const RULES: [&str; 4] = ["B3/S23", "B36/S23", "B3678/S34678", "B2/S"];

/// A soup from a list of cell bits, `side` wide.
fn soup(bits: &[bool], side: u64, at: (u64, u64)) -> Pattern {
    let mut cells = Builder::new(BUDGET);
    for (index, &alive) in bits.iter().enumerate() {
        if alive {
            let (x, y) = (index as u64 % side + at.0, index as u64 / side + at.1);
            cells.push_run(y, x, 1).unwrap();
        }
    }
    cells.finish(None)
}

fn state(pattern: &Pattern, rule: &str) -> Universe {
    Universe::from_pattern(pattern, Rule::parse(rule).unwrap(), BUDGET).unwrap()
}

/// A generation count: small, near a power of two, or astronomically large.
fn generations() -> impl Strategy<Value = BigUint> {
    prop_oneof![
        (0u64..300).prop_map(BigUint::from),
        (0u32..12, -1i64..=1).prop_map(|(k, d)| BigUint::from(((1i64 << k) + d).max(0) as u64)),
        (60u32..200, 0u64..1000).prop_map(|(k, d)| (BigUint::from(1u32) << k) + d),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    #[test]
    fn advancing_by_a_then_b_equals_advancing_by_a_plus_b(
        bits in proptest::collection::vec(any::<bool>(), 144),
        rule in 0usize..RULES.len(),
        a in generations(),
        b in generations(),
    ) {
        let pattern = soup(&bits, 12, (0, 0));
        let rule = RULES[rule];
        // B2/S spreads at light speed: keep its far jumps to a modest size.
        let (a, b) = if rule == "B2/S" { (a % 512u32, b % 512u32) } else { (a, b) };
        let mut stepwise = state(&pattern, rule);
        stepwise.advance(&a, None).unwrap();
        stepwise.advance(&b, None).unwrap();
        let mut at_once = state(&pattern, rule);
        at_once.advance(&(&a + &b), None).unwrap();
        prop_assert_eq!(stepwise.generation(), at_once.generation());
        prop_assert_eq!(stepwise.digest().unwrap(), at_once.digest().unwrap());
        prop_assert_eq!(stepwise.population(), at_once.population());
    }

    #[test]
    fn the_digest_depends_only_on_the_cells(
        bits in proptest::collection::vec(any::<bool>(), 100),
        far in 0u64..(1 << 37),
    ) {
        // The same cells built directly and built far away give one digest
        // each, which writing and reading RLE keeps (its `#position`
        // comment puts the cells back where they were); a move changes it.
        let pattern = soup(&bits, 10, (0, 0));
        let mut direct = state(&pattern, "B3/S23");
        let moved = soup(&bits, 10, (far % 1000, far));
        let mut distant = state(&moved, "B3/S23");
        let mut text = Vec::new();
        distant.write_rle(&mut text).unwrap();
        let mut again = state(&read_pattern(&text, BUDGET).unwrap(), "B3/S23");
        let mut direct_text = Vec::new();
        direct.write_rle(&mut direct_text).unwrap();
        let mut direct_again = state(&read_pattern(&direct_text, BUDGET).unwrap(), "B3/S23");
        prop_assert_eq!(again.digest().unwrap(), distant.digest().unwrap());
        prop_assert_eq!(direct_again.digest().unwrap(), direct.digest().unwrap());
        if bits.iter().any(|&b| b) && far > 0 {
            prop_assert_ne!(direct.digest().unwrap(), distant.digest().unwrap());
        }
    }

    #[test]
    fn rle_round_trip_keeps_every_cell(
        bits in proptest::collection::vec(any::<bool>(), 400),
        rule in 0usize..RULES.len(),
        steps in 0u64..40,
    ) {
        let mut original = state(&soup(&bits, 20, (3, 5)), RULES[rule]);
        original.advance(&BigUint::from(steps), None).unwrap();
        let mut text = Vec::new();
        original.write_rle(&mut text).unwrap();
        let text = String::from_utf8(text).unwrap();
        prop_assert!(text.lines().all(|line| line.len() <= 70));
        let read = read_pattern(text.as_bytes(), BUDGET).unwrap();
        let rule_text = read.rule.clone().map(|(rule, _)| rule);
        prop_assert_eq!(rule_text, Some(RULES[rule].to_string()));
        let mut copy = state(&read, RULES[rule]);
        // Every cell where it was: the `#position` comment keeps the place.
        prop_assert_eq!(copy.cells().unwrap(), original.cells().unwrap());
    }
}

#[test]
fn a_state_reached_through_a_huge_root_has_the_digest_of_its_cells() {
    // Common practice: padding and root level must not matter. A block
    // (still life) advanced 10^100 generations grows its root to level ~340
    // and back; its digest equals the block's built directly.
    let block = read_pattern(b"x = 2, y = 2\n2o$2o!", BUDGET).unwrap();
    let mut far = state(&block, "B3/S23");
    far.advance(&BigUint::from(10u32).pow(100), None).unwrap();
    let mut near = state(&block, "B3/S23");
    assert_eq!(far.digest().unwrap(), near.digest().unwrap());
}

#[test]
fn every_budget_either_gives_the_same_state_or_a_budget_error() {
    // Common practice for a bounded cache: a tight budget may fail cleanly
    // or succeed, never give a different result or stall. A B2/S soup grows
    // at light speed, so its live set passes each budget below mid-run
    // (this once stalled in table growth at 1.5 MiB).
    let bits: Vec<bool> = (0..256u32)
        .map(|i| i.wrapping_mul(2_654_435_761) >> 29 & 1 == 1)
        .collect();
    let pattern = soup(&bits, 16, (0, 0));
    let rule = Rule::parse("B2/S").unwrap();
    let steps = BigUint::from(300u32);
    let mut free = Universe::from_pattern(&pattern, rule, BUDGET).unwrap();
    free.advance(&steps, None).unwrap();
    let expected = free.digest().unwrap();
    let mut successes = 0;
    for quarter_mib in 3..=8u64 {
        let budget = quarter_mib << 18;
        let outcome = Universe::from_pattern(&pattern, rule, budget)
            .map_err(deeptime_engine::AdvanceError::from)
            .and_then(|mut tight| tight.advance(&steps, None).map(|()| tight));
        match outcome {
            Ok(mut tight) => {
                assert_eq!(tight.digest().unwrap(), expected, "budget {budget}");
                successes += 1;
            }
            Err(deeptime_engine::AdvanceError::Budget(error)) => {
                assert_eq!(error.budget, budget);
            }
            Err(other) => panic!("budget {budget}: {other}"),
        }
    }
    assert!(successes > 0, "no budget up to 2 MiB was enough");
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(32))]

    #[test]
    fn a_region_written_as_rle_holds_exactly_the_cells_inside_it(
        bits in proptest::collection::vec(any::<bool>(), 400),
        steps in 0u64..30,
        left in -40i64..40,
        top in -40i64..40,
        width in 0u64..70,
        height in 0u64..70,
    ) {
        // Common practice: a crop keeps the cells inside and nothing else.
        let mut state = state(&soup(&bits, 20, (0, 0)), "B3/S23");
        state.advance(&BigUint::from(steps), None).unwrap();
        let region = deeptime_engine::Region { left: left.into(), top: top.into(), width, height };
        let mut text = Vec::new();
        state.write_rle_region(&mut text, &region).unwrap();
        let read = read_pattern(&text, BUDGET).unwrap();
        let mut got: Vec<(i64, i64)> = Vec::new();
        for run in read.runs() {
            for dx in 0..run.len {
                got.push(((run.x + dx) as i64 + left, run.y as i64 + top));
            }
        }
        let expected: Vec<(i64, i64)> = state
            .cells()
            .unwrap()
            .into_iter()
            .filter(|&(x, y)| x >= left && x < left + width as i64 && y >= top && y < top + height as i64)
            .collect();
        prop_assert_eq!(got, expected);
    }
}
