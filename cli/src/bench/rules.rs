//! What an isotropic rule costs against its outer-totalistic parent, and
//! a B0 rule against the rule without B0 that does the same work: the
//! same soup under both, by HashLife and by the direct stepper, side by
//! side. The two rules evolve the soup differently, so HashLife's jump is
//! timed per quad it created (its unit of work), and the direct
//! stepper's per generation over the same area. Each side is timed in
//! several rounds, the rules taking turns, and the fastest round counts.

use anyhow::ensure;
use deeptime_engine::Universe;
use deeptime_engine::rule::Rule;
use num_bigint::BigUint;

use super::suite::{soup, timed, timed_direct, timed_jump};
use super::{Figure, Goal, Settings};

/// Plenty: this part measures speed.
const BUDGET: u64 = 16 << 30;

/// Rounds of each measurement, of which the fastest counts: one run of a
/// side varies by a third on a shared two-core machine (the B0 row, whose
/// two sides do the same work, read 0.90× and 1.31× in single runs), and
/// the fastest of three HashLife runs of a few tenths of a second still
/// read 1.22× and 1.41× for the same build. The direct stepper's runs take
/// seconds each, and vary less.
const HASHLIFE_ROUNDS: usize = 7;
const DIRECT_ROUNDS: usize = 3;

/// (outer-totalistic parent, isotropic child). The first child is LifeWiki's
/// example of the notation ("Isotropic non-totalistic rule"); the second
/// leaves out one letter of a birth count.
const PAIRS: [(&str, &str); 2] = [("B3/S23", "B3/S2-i34q"), ("B36/S23", "B36-k/S23")];

pub fn rules(settings: &Settings) -> anyhow::Result<Vec<Figure>> {
    let (side, generations) = if settings.quick {
        (512u64, 1u64 << 10)
    } else {
        (1024, 1 << 12)
    };
    let label = format!("{side}² soup, 2^{}", generations.trailing_zeros());
    let pattern = soup(side, 1)?;
    let steps = BigUint::from(generations);
    let mut figures = Vec::new();
    let rounds = |many: usize| if settings.quick { 1 } else { many };
    let (hashlife_rounds, direct_rounds) = (rounds(HASHLIFE_ROUNDS), rounds(DIRECT_ROUNDS));
    for (parent, child) in PAIRS {
        let rules = [Rule::parse(parent)?, Rule::parse(child)?];
        // The fastest of several rounds, the two rules taking turns, so
        // that a neighbour's burst on this shared machine lands on neither
        // side alone.
        let mut hashlife = [f64::INFINITY; 2];
        let mut stepped = [f64::INFINITY; 2];
        let (mut universes, mut created, mut populations) = (Vec::new(), Vec::new(), Vec::new());
        for round in 0..hashlife_rounds.max(direct_rounds) {
            for (side, &rule) in rules.iter().enumerate() {
                if round < hashlife_rounds {
                    // The jump alone: building the soup's quads takes the
                    // same time under both rules, a larger share of the
                    // side that creates fewer.
                    let mut universe = Universe::from_pattern(&pattern, rule, BUDGET)?;
                    let built = universe.store_stats().created;
                    let ((), took) = timed(|| Ok(universe.advance(&steps, None)?))?;
                    hashlife[side] = hashlife[side].min(took.as_secs_f64());
                    if round == 0 {
                        created.push(universe.store_stats().created - built);
                        universes.push(universe);
                    }
                }
                if round < direct_rounds {
                    let (grid, took) = timed_direct(&pattern, rule, generations);
                    stepped[side] = stepped[side].min(took.as_secs_f64());
                    if round == 0 {
                        ensure!(
                            universes[side].cells()? == grid.cells(),
                            "HashLife and the direct stepper differ on the {label} soup under {rule}"
                        );
                        populations.push(grid.population());
                    }
                }
            }
        }
        let outcomes: Vec<(u64, u64)> = created.into_iter().zip(populations).collect();
        let per_quad: Vec<f64> = (0..2)
            .map(|side| hashlife[side] / outcomes[side].0 as f64)
            .collect();
        let direct = stepped.to_vec();
        let details: Vec<String> = [parent, child]
            .iter()
            .enumerate()
            .map(|(side, text)| {
                let (created, population) = outcomes[side];
                format!(
                    "{text}: HashLife {:.2} s for {created} quads, direct {:.2} s, population {population}",
                    hashlife[side], stepped[side]
                )
            })
            .collect();
        let detail = details.join("; ");
        for (what, seconds) in [
            ("HashLife time per quad created", per_quad),
            ("direct stepper time", direct),
        ] {
            figures.push(
                Figure::new(
                    "rules",
                    &format!("{label}: {child} / {parent}, {what}"),
                    seconds[1] / seconds[0],
                    "×",
                    Some(Goal::AtMost(1.5)),
                )
                .detail(detail.clone()),
            );
        }
    }
    figures.push(b0_cost(&pattern, &label, generations, hashlife_rounds)?);
    Ok(figures)
}

/// A B0 rule and its twin without B0: the cells B01245/S0125 keeps (those
/// that differ from its flipping background) evolve exactly as B3678/S34678
/// evolves the same soup (README, "Rules with B0"), so both runs do the same
/// work but for the B0 rule's two rules taking turns in the kernel. Compared
/// by time, after checking the two states are the same.
fn b0_cost(
    pattern: &deeptime_engine::pattern::Pattern,
    label: &str,
    generations: u64,
    rounds: usize,
) -> anyhow::Result<Figure> {
    const TWINS: [&str; 2] = ["B3678/S34678", "B01245/S0125"];
    // One more than the others: the B0 rule's background is alive at the end.
    let steps = BigUint::from(generations + 1);
    let rules = [Rule::parse(TWINS[0])?, Rule::parse(TWINS[1])?];
    let mut seconds = [f64::INFINITY; 2];
    let mut digests = Vec::new();
    for round in 0..rounds {
        for (side, &rule) in rules.iter().enumerate() {
            let (mut universe, took) = timed_jump(pattern, rule, &steps, BUDGET)?;
            seconds[side] = seconds[side].min(took.as_secs_f64());
            if round == 0 {
                digests.push(universe.digest()?);
            }
        }
    }
    ensure!(
        digests[0] == digests[1],
        "{} and {} differ on the {label} soup",
        TWINS[0],
        TWINS[1]
    );
    Ok(Figure::new(
        "rules",
        &format!("{label}+1: {} / {}, HashLife time", TWINS[1], TWINS[0]),
        seconds[1] / seconds[0],
        "×",
        None,
    )
    .detail(format!(
        "{}: {:.2} s; {}: {:.2} s; the same state",
        TWINS[0], seconds[0], TWINS[1], seconds[1]
    )))
}
