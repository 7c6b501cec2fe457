//! What an isotropic rule costs against its outer-totalistic parent: the
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
    Ok(figures)
}
