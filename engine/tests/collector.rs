//! The collector changes nothing: the same digests under every budget from
//! the tightest that fits to unlimited, and with a collection at every
//! allocation, on soups, far jumps and residual (non power of two)
//! advances. (Common practice for a cache: evicting memoised work may cost
//! time, never change a result; the unlimited run is the reference, and
//! the direct stepper checks the soups cell by cell elsewhere, in
//! direct_vs_hashlife.rs.)

mod common;

use common::soup;

use deeptime_engine::pattern::{Pattern, read_pattern};
use deeptime_engine::rule::Rule;
use deeptime_engine::{AdvanceError, ContentId, Universe};
use num_bigint::BigUint;

const UNLIMITED: u64 = 1 << 30;

/// The Gosper glider gun (the usual RLE, from memory).
const GUN: &[u8] = b"x = 36, y = 9, rule = B3/S23\n24bo$22bobo$12b2o6b2o12b2o$11bo3bo4b2o12b2o$\
    2o8bo5bo3b2o$2o8bo3bob2o4bobo$10bo5bo7bo$11bo3bo$12b2o!";

/// The pattern advanced by each of `steps` in turn under `budget` (with a
/// collection at every allocation when `stress`): the digest after each,
/// and how often the budget took work away (collections of the arena and
/// resets of the residual memo), or the budget error.
fn run(
    pattern: &Pattern,
    rule: &str,
    steps: &[BigUint],
    budget: u64,
    stress: bool,
) -> Result<(Vec<ContentId>, u64), AdvanceError> {
    let mut universe = Universe::from_pattern(pattern, Rule::parse(rule).unwrap(), budget)?;
    if stress {
        universe.collect_at_every_allocation();
    }
    let mut digests = Vec::new();
    for step in steps {
        universe.advance(step, None)?;
        digests.push(universe.digest()?);
    }
    let stats = universe.store_stats();
    Ok((digests, stats.collections + stats.memo_resets))
}

fn numbers(values: &[&str]) -> Vec<BigUint> {
    values.iter().map(|value| value.parse().unwrap()).collect()
}

#[test]
fn a_collection_at_every_allocation_changes_no_digest() {
    let cases: Vec<(Pattern, &str, Vec<BigUint>)> = vec![
        // A soup: residual advances, then a power of two, then a residual
        // one again with the same N (the residual memo carried over).
        (
            soup(1, 24, 96),
            "B3/S23",
            numbers(&["37", "128", "37", "300"]),
        ),
        (soup(2, 16, 120), "B36/S23", numbers(&["255", "1"])),
        // A growing pattern, by a power of two and a residual. (No far
        // jumps: with nothing memoised kept, a far jump costs time
        // exponential in its length; the budget test below makes them.)
        (
            read_pattern(GUN, UNLIMITED).unwrap(),
            "B3/S23",
            numbers(&["256", "300"]),
        ),
    ];
    for (pattern, rule, steps) in &cases {
        let (expected, _) = run(pattern, rule, steps, UNLIMITED, false).unwrap();
        let (stressed, collections) = run(pattern, rule, steps, UNLIMITED, true).unwrap();
        assert_eq!(stressed, expected, "rule {rule}");
        assert!(collections > 1000, "only {collections} collections");
    }
}

#[test]
fn every_budget_from_the_tightest_that_fits_gives_the_same_digests() {
    let cases: Vec<(Pattern, &str, Vec<BigUint>)> = vec![
        (soup(3, 96, 96), "B3/S23", numbers(&["1000", "1024", "77"])),
        (
            read_pattern(GUN, UNLIMITED).unwrap(),
            "B3/S23",
            numbers(&["4096", "100000000000000000000", "3"]),
        ),
    ];
    for (pattern, rule, steps) in &cases {
        let (expected, none) = run(pattern, rule, steps, UNLIMITED, false).unwrap();
        assert_eq!(none, 0);
        // From 16 KiB up by a quarter each time to 64 MiB: once one budget
        // fits, every larger one must too, and all give the same digests.
        let mut budget = 16u64 << 10;
        let mut fitted = None;
        while budget <= 64 << 20 {
            match run(pattern, rule, steps, budget, false) {
                Ok((digests, collections)) => {
                    assert_eq!(digests, expected, "budget {budget}");
                    fitted.get_or_insert((budget, collections));
                }
                Err(AdvanceError::Budget(error)) => {
                    assert!(
                        fitted.is_none(),
                        "budget {budget} failed after a smaller one fitted"
                    );
                    assert_eq!(error.budget, budget);
                }
                Err(other) => panic!("budget {budget}: {other}"),
            }
            budget += budget / 4;
        }
        let (tightest, collections) = fitted.expect("a budget up to 64 MiB fits");
        assert!(
            collections > 0,
            "the tightest budget ({tightest}) never collected nor reset the memo"
        );
    }
}
