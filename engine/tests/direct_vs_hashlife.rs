//! The direct stepper and the HashLife engine, two independent ways to the
//! same answer, must agree cell by cell on every pattern (common practice:
//! differential testing of two implementations of one specification).

mod common;

use common::soup;

use deeptime_engine::Universe;
use deeptime_engine::direct::Grid;
use deeptime_engine::pattern::{Pattern, read_pattern};
use deeptime_engine::rule::Rule;
use num_bigint::BigUint;

const BUDGET: u64 = 1 << 30;

fn agree(pattern: &Pattern, rule: &str, checkpoints: &[u64]) {
    let rule = Rule::parse(rule).unwrap();
    let mut grid = Grid::from_pattern(pattern, rule);
    let mut universe = Universe::from_pattern(pattern, rule, BUDGET).unwrap();
    let mut at = 0;
    for &generation in checkpoints {
        grid.advance(generation - at);
        universe
            .advance(&BigUint::from(generation - at), None)
            .unwrap();
        at = generation;
        assert_eq!(
            grid.cells(),
            universe.cells().unwrap(),
            "rule {rule} generation {generation}"
        );
    }
}

#[test]
fn soups_agree_under_several_rules() {
    let checkpoints = [1, 2, 3, 4, 5, 8, 16, 31, 64, 100, 128, 200, 256];
    for (at, rule) in ["B3/S23", "B36/S23", "B3678/S34678", "B2/S", "B3/S012345678"]
        .into_iter()
        .enumerate()
    {
        for seed in 0..2 {
            let pattern = soup(seed * 7 + at as u64, 40, 96);
            let limit = if rule == "B2/S" {
                &checkpoints[..9]
            } else {
                &checkpoints[..]
            };
            agree(&pattern, rule, limit);
        }
    }
}

#[test]
fn the_gosper_gun_agrees_for_a_thousand_generations() {
    // The usual RLE of the gun (from memory).
    let gun = read_pattern(
        b"x = 36, y = 9\n24bo$22bobo$12b2o6b2o12b2o$11bo3bo4b2o12b2o$2o8bo5bo3b2o$\
          2o8bo3bob2o4bobo$10bo5bo7bo$11bo3bo$12b2o!",
        BUDGET,
    )
    .unwrap();
    agree(&gun, "B3/S23", &[30, 300, 1000]);
}
