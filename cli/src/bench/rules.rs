//! What an isotropic rule costs against its outer-totalistic parent, and
//! a B0 rule against the rule without B0 that does the same work: the
//! same soup under both, by HashLife and by the direct stepper, side by
//! side. The two rules evolve the soup differently, so HashLife's time is
//! compared per quad it created (its unit of work), and the direct
//! stepper's per generation over the same area.

use anyhow::ensure;
use deeptime_engine::rule::Rule;
use num_bigint::BigUint;

use super::suite::{soup, timed_direct, timed_jump};
use super::{Figure, Goal, Settings};

/// Plenty: this part measures speed.
const BUDGET: u64 = 16 << 30;

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
    for (parent, child) in PAIRS {
        let mut per_quad = Vec::new();
        let mut direct = Vec::new();
        let mut details = Vec::new();
        for text in [parent, child] {
            let rule = Rule::parse(text)?;
            let (mut universe, hashlife) = timed_jump(&pattern, rule, &steps, BUDGET)?;
            let (grid, stepped) = timed_direct(&pattern, rule, generations);
            ensure!(
                universe.cells()? == grid.cells(),
                "HashLife and the direct stepper differ on the {label} soup under {text}"
            );
            let created = universe.store_stats().created;
            per_quad.push(hashlife.as_secs_f64() / created as f64);
            direct.push(stepped.as_secs_f64());
            details.push(format!(
                "{text}: HashLife {:.2} s for {created} quads, direct {:.2} s, population {}",
                hashlife.as_secs_f64(),
                stepped.as_secs_f64(),
                grid.population()
            ));
        }
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
    figures.push(b0_cost(&pattern, &label, generations)?);
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
) -> anyhow::Result<Figure> {
    const TWINS: [&str; 2] = ["B3678/S34678", "B01245/S0125"];
    // One more than the others: the B0 rule's background is alive at the end.
    let steps = BigUint::from(generations + 1);
    let mut seconds = Vec::new();
    let mut digests = Vec::new();
    for text in TWINS {
        let (mut universe, took) = timed_jump(pattern, Rule::parse(text)?, &steps, BUDGET)?;
        seconds.push(took.as_secs_f64());
        digests.push(universe.digest()?);
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
