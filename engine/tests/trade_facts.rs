//! The engine against published facts of the trade, at the generations the
//! facts name and at astronomically far ones, where the exact answer follows
//! from the fact. Each check names its source.

use deeptime_engine::Universe;
use deeptime_engine::generation::parse_generations;
use deeptime_engine::pattern::read_pattern;
use deeptime_engine::rule::Rule;
use num_bigint::{BigInt, BigUint};

const BUDGET: u64 = 2 << 30;

/// Standard RLE of the patterns below (common practice: these are the
/// usual published RLE texts of each pattern, from memory).
const R_PENTOMINO: &str = "x = 3, y = 3\nb2o$2o$bo!";
const ACORN: &str = "x = 7, y = 3\nbo5b$3bo3b$2o2b3o!";
const DIEHARD: &str = "x = 8, y = 3\n6bob$2o6b$bo3b3o!";
const GLIDER: &str = "x = 3, y = 3\nbob$2bo$3o!";
const LWSS: &str = "x = 5, y = 4\nbo2bo$o4b$o3bo$4o!";
const GOSPER_GUN: &str = "x = 36, y = 9, rule = B3/S23\n\
    24bo$22bobo$12b2o6b2o12b2o$11bo3bo4b2o12b2o$2o8bo5bo3b2o$\
    2o8bo3bob2o4bobo$10bo5bo7bo$11bo3bo$12b2o!";

fn universe(rle: &str, rule: &str) -> Universe {
    let pattern = read_pattern(rle.as_bytes(), BUDGET).expect("a valid pattern");
    Universe::from_pattern(&pattern, Rule::parse(rule).unwrap(), BUDGET).unwrap()
}

fn gens(text: &str) -> BigUint {
    parse_generations(text).unwrap()
}

fn advanced(rle: &str, rule: &str, by: &str) -> Universe {
    let mut state = universe(rle, rule);
    state.advance(&gens(by), None).unwrap();
    state
}

fn population(state: &Universe) -> BigUint {
    state.population()
}

/// The same cells as `rle`, moved by (dx, dy).
fn shifted(rle: &str, dx: i64, dy: i64) -> Vec<(i64, i64)> {
    let mut state = universe(rle, "B3/S23");
    let mut cells = state.cells().unwrap();
    for cell in &mut cells {
        cell.0 += dx;
        cell.1 += dy;
    }
    cells
}

#[test]
fn r_pentomino_settles_at_1103_with_116_cells() {
    // LifeWiki, "R-pentomino": stabilises at generation 1103 with a
    // population of 116 (including six escaping gliders).
    assert_eq!(
        population(&advanced(R_PENTOMINO, "B3/S23", "1103")),
        116u32.into()
    );
    assert_ne!(
        population(&advanced(R_PENTOMINO, "B3/S23", "1102")),
        116u32.into()
    );
    // What is left is still lifes, blinkers and gliders that never meet
    // again, so the population stays 116 forever (follows from the fact).
    let mut far = advanced(R_PENTOMINO, "B3/S23", "1103");
    far.advance(&gens("10^100"), None).unwrap();
    assert_eq!(population(&far), 116u32.into());
}

#[test]
fn acorn_settles_at_5206_with_633_cells() {
    // LifeWiki, "Acorn": stabilises after 5206 generations with 633 cells.
    let mut acorn = advanced(ACORN, "B3/S23", "5206");
    assert_eq!(population(&acorn), 633u32.into());
    // Follows from the fact: the debris and the gliders stay as they are.
    acorn.advance(&gens("30*10^100"), None).unwrap();
    assert_eq!(population(&acorn), 633u32.into());
}

#[test]
fn diehard_vanishes_after_130_generations() {
    // LifeWiki, "Die hard": disappears after 130 generations.
    assert!(population(&advanced(DIEHARD, "B3/S23", "129")) > 0u32.into());
    assert_eq!(population(&advanced(DIEHARD, "B3/S23", "130")), 0u32.into());
    let mut gone = advanced(DIEHARD, "B3/S23", "130");
    assert_eq!(gone.bounding_box(), None);
    gone.advance(&gens("10^1000"), None).unwrap();
    assert_eq!(population(&gone), 0u32.into());
}

#[test]
fn glider_moves_one_cell_diagonally_every_four_generations() {
    // LifeWiki, "Glider": period 4, displacement (1, 1) — this orientation
    // travels towards +x, +y.
    for periods in [1i64, 2, 3, 10, 25] {
        let mut state = advanced(GLIDER, "B3/S23", &(4 * periods).to_string());
        assert_eq!(state.cells().unwrap(), shifted(GLIDER, periods, periods));
    }
    // At 4·10^100 generations it has moved 10^100 cells each way.
    let state = advanced(GLIDER, "B3/S23", "4*10^100");
    let bbox = state.bounding_box().unwrap();
    let far = BigInt::from(gens("10^100"));
    assert_eq!((bbox.left, bbox.top), (far.clone(), far));
    assert_eq!((bbox.width, bbox.height), (3u32.into(), 3u32.into()));
    assert_eq!(population(&state), 5u32.into());
}

#[test]
fn glider_digest_depends_only_on_the_cells() {
    // Common practice for content addressing: the same cells at the same
    // place give the same digest, whatever history or root size led there.
    let mut travelled = advanced(GLIDER, "B3/S23", "4*10^30");
    let offset: u64 = 10u64.pow(12);
    let mut near = advanced(GLIDER, "B3/S23", &(4 * offset).to_string());
    // Move the near one the rest of the way.
    near.advance(&(gens("4*10^30") - BigUint::from(4 * offset)), None)
        .unwrap();
    assert_eq!(travelled.digest().unwrap(), near.digest().unwrap());
    let mut start = universe(GLIDER, "B3/S23");
    assert_ne!(travelled.digest().unwrap(), start.digest().unwrap());
}

#[test]
fn lightweight_spaceship_moves_two_cells_every_four_generations() {
    // LifeWiki, "Lightweight spaceship": period 4, speed c/2, orthogonal;
    // this orientation travels towards -x.
    for periods in [1i64, 2, 7] {
        let mut state = advanced(LWSS, "B3/S23", &(4 * periods).to_string());
        assert_eq!(state.cells().unwrap(), shifted(LWSS, -2 * periods, 0));
    }
    let state = advanced(LWSS, "B3/S23", "4*10^50");
    let bbox = state.bounding_box().unwrap();
    assert_eq!(bbox.left, -BigInt::from(gens("2*10^50")));
    assert_eq!(bbox.top, BigInt::from(0));
    assert_eq!(population(&state), 9u32.into());
}

#[test]
fn gosper_gun_adds_one_glider_every_thirty_generations() {
    // LifeWiki, "Gosper glider gun": period 30, population 36, emits one
    // glider (5 cells) per period; the gliders never collide.
    let mut gun = universe(GOSPER_GUN, "B3/S23");
    assert_eq!(population(&gun), 36u32.into());
    for period in 1..=40u32 {
        gun.advance(&30u32.into(), None).unwrap();
        assert_eq!(
            population(&gun),
            (36 + 5 * period).into(),
            "period {period}"
        );
    }
    // At 30·10^100: 36 + 5·10^100 cells, exactly.
    let far = advanced(GOSPER_GUN, "B3/S23", "30*10^100");
    assert_eq!(population(&far), gens("5*10^100") + 36u32);
    let farther = advanced(GOSPER_GUN, "B3/S23", "30*10^1000");
    assert_eq!(population(&farther), gens("5*10^1000") + 36u32);
    assert_eq!(farther.generation(), &gens("30*10^1000"));
}

#[test]
fn every_cell_with_a_neighbour_is_born_in_the_square_rule() {
    // Worked example from the rule's definition: under B12345678/S012345678
    // no cell dies and every dead cell next to a live one is born, so one
    // cell becomes a (1+2t)×(1+2t) square after t generations.
    for t in [1u32, 2, 5, 31, 32, 33, 100] {
        let state = advanced("x = 1, y = 1\no!", "B12345678/S012345678", &t.to_string());
        let side = BigUint::from(1 + 2 * t);
        assert_eq!(population(&state), &side * &side, "t = {t}");
    }
    let t = gens("10^100");
    let state = advanced("x = 1, y = 1\no!", "B12345678/S012345678", "10^100");
    let side = BigUint::from(1u32) + &t * 2u32;
    assert_eq!(population(&state), &side * &side);
    let bbox = state.bounding_box().unwrap();
    assert_eq!(bbox.left, -BigInt::from(t.clone()));
    assert_eq!(bbox.top, -BigInt::from(t));
    assert_eq!(bbox.width, side.clone());
    assert_eq!(bbox.height, side);
}

#[test]
fn blinker_oscillates_and_block_stays() {
    // Common practice: the blinker has period 2, the block is a still life.
    let blinker = "x = 3, y = 1\n3o!";
    let mut one = advanced(blinker, "B3/S23", "1");
    assert_eq!(one.cells().unwrap(), vec![(1, -1), (1, 0), (1, 1)]);
    let mut two = advanced(blinker, "B3/S23", "2");
    assert_eq!(two.cells().unwrap(), shifted(blinker, 0, 0));
    let block = "x = 2, y = 2\n2o$2o!";
    let mut still = advanced(block, "B3/S23", "10^300");
    assert_eq!(still.cells().unwrap(), shifted(block, 0, 0));
    assert_eq!(
        still.digest().unwrap(),
        universe(block, "B3/S23").digest().unwrap()
    );
}
