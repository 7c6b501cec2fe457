//! B0 rules on the unbounded plane: the engine stores the cells that differ
//! from the background and steps them by rules without B0. Checked here
//! against stepping the true cells of a window wide enough that nothing
//! from its edge can reach the pattern, with every cell outside the window
//! in the background's state (common practice for such rules: the
//! background is dead at generation 0, flips every generation without S8,
//! and stays alive from generation 1 with S8).

mod common;

use common::soup;

use deeptime_engine::Universe;
use deeptime_engine::rule::{Background, Rule, letters};
use num_bigint::BigUint;

/// The true cells of a square window of `side`, whose outside is all
/// `background`.
struct Window {
    side: usize,
    cells: Vec<bool>,
    background: bool,
}

impl Window {
    fn step(&mut self, rule: &Rule) {
        let side = self.side as i64;
        let at = |x: i64, y: i64| {
            if (0..side).contains(&x) && (0..side).contains(&y) {
                self.cells[(y * side + x) as usize]
            } else {
                self.background
            }
        };
        let next: Vec<bool> = (0..side * side)
            .map(|i| {
                let (x, y) = (i % side, i / side);
                let n = letters::OFFSETS
                    .iter()
                    .enumerate()
                    .fold(0u8, |n, (bit, (dx, dy))| {
                        n | (at(x + dx, y + dy) as u8) << bit
                    });
                rule.next_state(at(x, y), n)
            })
            .collect();
        self.cells = next;
        self.background = rule.next_state(self.background, if self.background { 0xff } else { 0 });
    }

    /// The cells that differ from the background, shifted by `margin`.
    fn differing(&self, margin: i64) -> Vec<(i64, i64)> {
        let side = self.side as i64;
        let mut cells: Vec<(i64, i64)> = (0..side * side)
            .filter(|&i| self.cells[i as usize] != self.background)
            .map(|i| (i % side - margin, i / side - margin))
            .collect();
        cells.sort();
        cells
    }
}

fn sorted(mut cells: Vec<(i64, i64)>) -> Vec<(i64, i64)> {
    cells.sort();
    cells
}

/// Rules with B0, without S8 (the background flips) and with it (it stays
/// alive), outer-totalistic and isotropic.
const RULES: [&str; 6] = [
    "B03/S23",
    "B0124/S1357",
    "B02a3-k/S2-i3",
    "B0123478/S01234678",
    "B0138/S0238",
    "B03ce4/S12-a8",
];

/// Each rule, from one soup, by several ways of cutting the same number of
/// generations into advances: one at a time, all at once, and odd pieces
/// starting at either background.
#[test]
fn b0_rules_match_the_true_cells_of_a_wide_window() {
    const GENERATIONS: u64 = 72;
    const SOUP: u64 = 16;
    let margin = GENERATIONS as i64 + 2;
    for (index, text) in RULES.iter().enumerate() {
        let rule = Rule::parse(text).unwrap();
        assert!(rule.births_on_empty(), "{text}");
        let start = soup(index as u64 + 1, SOUP, 110);
        let side = SOUP as usize + 2 * margin as usize;
        let mut window = Window {
            side,
            cells: vec![false; side * side],
            background: false,
        };
        for run in start.runs() {
            for x in run.x..run.x + run.len {
                window.cells
                    [(run.y as usize + margin as usize) * side + x as usize + margin as usize] =
                    true;
            }
        }
        let mut truth = vec![window.differing(margin)];
        for _ in 0..GENERATIONS {
            window.step(&rule);
            truth.push(window.differing(margin));
        }
        for cuts in [
            vec![1; GENERATIONS as usize],
            vec![GENERATIONS],
            vec![1, 7, 33, 2, 29],
            vec![2, 5, 64, 1],
        ] {
            let mut universe = Universe::from_pattern(&start, rule, 1 << 28).unwrap();
            let mut at = 0;
            for cut in &cuts {
                universe.advance(&BigUint::from(*cut), None).unwrap();
                at += cut;
                let expected = rule.background(&BigUint::from(at));
                assert_eq!(universe.background(), expected, "{text} at {at}");
                assert_eq!(
                    sorted(universe.cells().unwrap()),
                    truth[at as usize],
                    "{text}: generation {at} after advances of {cuts:?}"
                );
            }
        }
    }
}

/// LifeWiki, "Black/white reversal" (from memory): B0123478/S01234678 is
/// Life with the states swapped. From a dead background its first
/// generation brings the background to life; from then on the dead cells
/// it stores evolve by Life itself.
#[test]
fn life_reversed_stores_life() {
    let reversed = Rule::parse("B0123478/S01234678").unwrap();
    assert_eq!(reversed.stepping(Background::Alive), Rule::LIFE);
    let start = soup(9, 24, 100);
    let mut universe = Universe::from_pattern(&start, reversed, 1 << 28).unwrap();
    universe.advance(&BigUint::from(1u32), None).unwrap();
    let after_one = universe.cells().unwrap();
    // The stored cells after one generation, as a pattern under Life.
    let left = after_one.iter().map(|c| c.0).min().unwrap();
    let top = after_one.iter().map(|c| c.1).min().unwrap();
    let mut rows = sorted(
        after_one
            .iter()
            .map(|&(x, y)| (y - top, x - left))
            .collect(),
    );
    rows.dedup();
    let mut builder = deeptime_engine::pattern::Builder::new(1 << 28);
    for (y, x) in rows {
        builder.push_run(y as u64, x as u64, 1).unwrap();
    }
    let mut life = Universe::from_pattern(&builder.finish(None), Rule::LIFE, 1 << 28).unwrap();
    let far = BigUint::from(3001u32);
    universe.advance(&far, None).unwrap();
    life.advance(&far, None).unwrap();
    assert_eq!(universe.background(), Background::Alive);
    let shifted: Vec<(i64, i64)> = sorted(
        life.cells()
            .unwrap()
            .into_iter()
            .map(|(x, y)| (x + left, y + top))
            .collect(),
    );
    assert_eq!(sorted(universe.cells().unwrap()), shifted);
}
