//! Rules with B0, where empty cells with no live neighbour are born, on the
//! unbounded plane: after one generation the whole background is alive.
//!
//! The engine stores only the cells that differ from the background, so
//! empty space stays empty whatever the rule. A B0 rule without S8 flips
//! the background every generation (dead at even generations, alive at odd
//! ones); a B0 rule with S8 keeps it alive from generation 1 on. Each step
//! of the stored cells is then itself a rule without B0, one of three:
//!
//! - from a dead background to an alive one, the rule's complement:
//!   a cell differs next iff the rule leaves it dead;
//! - from an alive background to a dead one (no S8): a cell that differs
//!   is dead, and the neighbourhood it sees is the complement of the
//!   stored one;
//! - from an alive background to an alive one (S8): both of those.
//!
//! Each keeps empty space empty: that is exactly what B0 (and for the last
//! two, the missing or present S8) says of the background.

use num_bigint::BigUint;
use num_traits::Zero;

use super::{Neighbourhoods, Rule, contains, insert};

/// The state of every cell far from the pattern at some generation.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Background {
    Dead,
    Alive,
}

impl Background {
    /// The background whose cells are `alive`, or dead.
    pub fn of(alive: bool) -> Background {
        if alive {
            Background::Alive
        } else {
            Background::Dead
        }
    }

    pub fn is_alive(self) -> bool {
        self == Background::Alive
    }

    /// `dead` or `alive`, as reports and comments write it.
    pub fn name(self) -> &'static str {
        match self {
            Background::Dead => "dead",
            Background::Alive => "alive",
        }
    }
}

impl Rule {
    /// Whether an empty cell with no live neighbour is born (B0).
    pub fn births_on_empty(&self) -> bool {
        contains(&self.birth, 0)
    }

    /// Whether a live cell with eight live neighbours stays (S8).
    fn survives_full(&self) -> bool {
        contains(&self.survive, 0xff)
    }

    /// The background one generation after a generation whose background
    /// is `from`.
    pub fn next_background(&self, from: Background) -> Background {
        Background::of(match from {
            Background::Dead => self.births_on_empty(),
            Background::Alive => self.survives_full(),
        })
    }

    /// The background at `generation`, starting from a dead one at 0.
    pub fn background(&self, generation: &BigUint) -> Background {
        match (self.births_on_empty(), self.survives_full()) {
            (false, _) => Background::Dead,
            (true, true) if generation.is_zero() => Background::Dead,
            (true, true) => Background::Alive,
            (true, false) if generation.bit(0) => Background::Alive,
            (true, false) => Background::Dead,
        }
    }

    /// The background the engine's memo of whole strides is made for:
    /// every advance long enough to use it starts there (after one single
    /// generation when it does not). From it the background repeats every
    /// two generations.
    fn settled_background(&self) -> Background {
        if self.births_on_empty() && self.survives_full() {
            Background::Alive
        } else {
            Background::Dead
        }
    }

    /// Whether an advance of several generations from a generation whose
    /// background is `from` may use the memo of whole strides; when it may
    /// not (odd generations of a flipping rule, generation 0 of one with
    /// S8), one generation is moved on its own first.
    pub fn memo_holds_from(&self, from: Background) -> bool {
        from == self.settled_background()
    }

    /// The rule without B0 that steps the cells differing from the
    /// background, from a generation whose background is `from` to the
    /// next (the module documentation gives the three cases). For a rule
    /// without B0 and a dead background, the rule itself.
    pub fn stepping(&self, from: Background) -> Rule {
        let to = self.next_background(from);
        if from == Background::Dead && to == Background::Dead {
            return *self;
        }
        // A stored cell is `stored ^ from` in truth, and its neighbourhood
        // `n ^ mask(from)`; the rule gives its true next state, which is
        // stored as `next ^ to`.
        let seen = |n: u8| match from {
            Background::Dead => n,
            Background::Alive => !n,
        };
        let mut birth: Neighbourhoods = [0; 4];
        let mut survive: Neighbourhoods = [0; 4];
        for n in 0..=255u8 {
            for stored in [false, true] {
                let alive = stored ^ from.is_alive();
                let next = self.next_state(alive, seen(n)) ^ to.is_alive();
                if next {
                    insert(if stored { &mut survive } else { &mut birth }, n);
                }
            }
        }
        Rule { birth, survive }
    }

    /// The two rules an advance starting at a generation whose background
    /// is `from` applies: the first at the generations an even number after
    /// its start, the second at the odd ones. Exact for the whole advance
    /// when the background repeats every two generations from `from`.
    pub(crate) fn stepping_pair(&self, from: Background) -> [Rule; 2] {
        [
            self.stepping(from),
            self.stepping(self.next_background(from)),
        ]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rule(text: &str) -> Rule {
        Rule::parse(text).unwrap()
    }

    #[test]
    fn backgrounds_follow_b0_and_s8() {
        let at = |rule: &Rule, g: u32| rule.background(&BigUint::from(g));
        let life = Rule::LIFE;
        assert!((0..4).all(|g| at(&life, g) == Background::Dead));
        // B0 without S8: alternates (common practice for such rules).
        let flips = rule("B0125/S0234");
        assert_eq!(
            (0..4).map(|g| at(&flips, g)).collect::<Vec<_>>(),
            [
                Background::Dead,
                Background::Alive,
                Background::Dead,
                Background::Alive
            ]
        );
        // B0 with S8: alive for good after one generation.
        let stays = rule("B0/S8");
        assert_eq!(at(&stays, 0), Background::Dead);
        assert!((1..5).all(|g| at(&stays, g) == Background::Alive));
        for r in [life, flips, stays] {
            for g in 0..5u32 {
                assert_eq!(r.next_background(at(&r, g)), at(&r, g + 1), "{r} at {g}");
            }
        }
    }

    #[test]
    fn stepping_rules_never_have_b0() {
        for text in [
            "B0/S",
            "B0/S8",
            "B0125/S0234",
            "B0123478/S34678",
            "B02a3/S1c8",
            "B3/S23",
        ] {
            let r = rule(text);
            for from in [Background::Dead, Background::Alive] {
                let step = r.stepping(from);
                assert!(!step.births_on_empty(), "{text} from {from:?}: {step}");
            }
        }
    }

    /// Cell by cell, a step of the stored cells equals a step of the true
    /// ones: on a 12×12 torus, whose every cell is explicit, so B0 needs no
    /// background there.
    #[test]
    fn stepping_agrees_with_the_rule_on_explicit_cells() {
        const SIDE: usize = 12;
        let step = |rule: &Rule, cells: &[bool]| -> Vec<bool> {
            (0..SIDE * SIDE)
                .map(|at| {
                    let (x, y) = ((at % SIDE) as i64, (at / SIDE) as i64);
                    let n = super::super::letters::OFFSETS.iter().enumerate().fold(
                        0u8,
                        |n, (bit, (dx, dy))| {
                            let (nx, ny) = (
                                (x + dx).rem_euclid(SIDE as i64) as usize,
                                (y + dy).rem_euclid(SIDE as i64) as usize,
                            );
                            n | (cells[ny * SIDE + nx] as u8) << bit
                        },
                    );
                    rule.next_state(cells[at], n)
                })
                .collect()
        };
        let mut seed = 7u64;
        for text in [
            "B0/S8",
            "B0125/S0234",
            "B0123478/S34678",
            "B02a3/S1c8",
            "B0/S2-i34q",
        ] {
            let r = rule(text);
            let mut truth: Vec<bool> = (0..SIDE * SIDE)
                .map(|_| {
                    seed = seed
                        .wrapping_mul(6364136223846793005)
                        .wrapping_add(1442695040888963407);
                    seed >> 61 < 3
                })
                .collect();
            let mut background = Background::Dead;
            let mut stored = truth.clone();
            for g in 0..10 {
                let stepping = r.stepping(background);
                truth = step(&r, &truth);
                stored = step(&stepping, &stored);
                background = r.next_background(background);
                let flip = background.is_alive();
                let back: Vec<bool> = stored.iter().map(|&s| s ^ flip).collect();
                assert_eq!(back, truth, "{text} at generation {}", g + 1);
            }
        }
    }
}
