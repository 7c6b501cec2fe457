//! The fate part of the suite: how long `deeptime fate`'s analysis takes on
//! the R-pentomino and on a seeded soup, beside the direct stepper running
//! the same pattern to the generation the analysis found (whose population
//! must be the one the analysis reports).

use anyhow::{bail, ensure};
use deeptime_engine::Universe;
use deeptime_engine::fate::{self, Fate};
use deeptime_engine::pattern::Pattern;
use deeptime_engine::rule::Rule;
use num_bigint::BigUint;
use num_traits::ToPrimitive;

use super::suite::{pattern_of, soup, timed, timed_direct};
use super::{Figure, Goal, Settings};

const BUDGET: u64 = 16 << 30;
/// The R-pentomino (the usual RLE, from memory).
const R_PENTOMINO: &str = "x = 3, y = 3\nb2o$2o$bo!";

pub fn fate(settings: &Settings) -> anyhow::Result<Vec<Figure>> {
    let mut figures = Vec::new();
    let (r, rule) = pattern_of(R_PENTOMINO)?;
    figures.push(measure("R-pentomino", &r, rule, 1.0)?);
    let side = if settings.quick { 256 } else { 1024 };
    let soup = soup(side, 1)?;
    figures.push(measure(&format!("{side}² soup"), &soup, Rule::LIFE, 60.0)?);
    Ok(figures)
}

/// The fate of `pattern` timed (goal: at most `goal` seconds), checked
/// against the direct stepper at the settle generation.
fn measure(label: &str, pattern: &Pattern, rule: Rule, goal: f64) -> anyhow::Result<Figure> {
    let limit = BigUint::from(1u64 << 20);
    let (told, took) = timed(|| {
        let mut universe = Universe::from_pattern(pattern, rule, BUDGET)?;
        Ok(fate::fate(&mut universe, &limit)?)
    })?;
    let Fate::Settled(settled) = told else {
        bail!("the {label} did not settle by 2^20");
    };
    let at = settled.generation.to_u64().expect("below the limit");
    let (grid, direct) = timed_direct(pattern, rule, at);
    ensure!(
        BigUint::from(grid.population()) == settled.population,
        "the {label}: the direct stepper's population at {at} is not the fate's"
    );
    let seconds = took.as_secs_f64();
    Ok(Figure::new(
        "fate",
        &format!("fate: {label}, seconds to settle generation, census and shape digest"),
        seconds,
        "s",
        Some(Goal::AtMost(goal)),
    )
    .detail(format!(
        "settles at {at} with {} cells, {} kinds of object; the direct stepper to {at} alone: {:.3} s",
        settled.population,
        settled.census.len(),
        direct.as_secs_f64()
    )))
}
