//! What a pattern becomes: whether and when it settles, at what period and
//! speed, and the census of what is left.
//!
//! The state is taken to growing horizons (64, 128, 256, … generations,
//! HashLife jumps) until it can be taken apart into objects that each
//! repeat on their own and never meet (`objects.rs`). Taking a busy state
//! apart costs far more than a jump, so before the limit a horizon is
//! examined only when its population comes back after a common multiple
//! of the periods up to 6 (at horizon 64), up to 8 (from 1024), … up to 16
//! (from 720,720), as a settled state's does; at the limit it is examined
//! whatever its population. From the objects at
//! that horizon, where every one of them stood at any earlier generation
//! follows (a phase and a whole number of displacements back); the settle
//! generation is the first at which the state is exactly those objects,
//! found by bisection between the start and the horizon, each probe a jump
//! from the nearest state kept on the way. The probes rely on a state that
//! is its objects staying so (objects that do not meet run as they do
//! alone), which is what settled means.

mod cells;
mod names;
mod objects;
mod shape;

use num_bigint::{BigInt, BigUint};
use num_traits::{One, ToPrimitive, Zero};

use crate::content_id::ContentId;
use crate::error::AdvanceError;
use crate::rule::Background;
use crate::store::Handle;
use crate::universe::{BoundingBox, Universe, WriteError};

pub use cells::Cell;
pub use names::{Kind, LIFE_NAMES};
pub use objects::{MAX_PERIOD, NotYet};
pub use shape::{digest_of, shape_digest_of};

use objects::{Classes, Object, Steps};

/// The least common multiples of 1 to n, for n = 6, 8, 10, 12, 16: a
/// settled state whose objects' periods are at most n has the same
/// population that many generations on. A horizon h uses the largest that
/// is at most h (at least the first), so that on a busy state the check
/// costs no more than the jump to the next horizon.
const QUIET: [u64; 5] = [60, 840, 2_520, 27_720, 720_720];
/// The first horizon at which the state is taken apart.
const FIRST_HORIZON: u64 = 64;
/// States with more live cells than this are not taken apart.
pub const MAX_CELLS: u64 = 1 << 23;
/// Generations after the limit whose populations are read to tell how an
/// unsettled pattern grows (periods up to half of it are found).
const GROWTH_WINDOW: u64 = 256;

/// What a pattern becomes, as far as the limit.
#[derive(Debug)]
pub enum Fate {
    Settled(Settled),
    Unsettled(Unsettled),
}

/// A pattern that settled by the limit.
#[derive(Debug)]
pub struct Settled {
    /// the first generation from which the state is objects that repeat
    /// and never meet
    pub generation: BigUint,
    /// the horizon at which the objects were found
    pub examined: BigUint,
    /// of the whole pattern when it repeats up to a shift (`whole`), else
    /// of the objects that stand still
    pub period: u64,
    /// cells moved per period (x right, y down)
    pub displacement: (i64, i64),
    pub whole: bool,
    /// the background at the settle generation; the population, box,
    /// digests and census are of the cells that differ from it
    pub background: Background,
    pub population: BigUint,
    pub bbox: Option<BoundingBox>,
    pub digest: ContentId,
    pub shape_digest: ContentId,
    /// by kind, then count (most first), then name
    pub census: Vec<CensusEntry>,
}

/// One line of a census: objects of one shape (and, for spaceships, one
/// direction).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct CensusEntry {
    pub name: String,
    pub kind: Kind,
    pub count: u64,
    /// live cells of its smallest phase
    pub cells: u64,
    pub period: u32,
    /// cells moved per period
    pub displacement: (i64, i64),
    /// compass direction of a spaceship along an axis or a diagonal
    pub direction: Option<&'static str>,
    /// its shape id: the smallest shape digest of its phases
    pub shape: ContentId,
}

/// A pattern that had not settled by the limit.
#[derive(Debug)]
pub struct Unsettled {
    /// the limit: the last generation examined
    pub generation: BigUint,
    /// the background there (see [`Settled::background`])
    pub background: Background,
    pub population: BigUint,
    pub bbox: Option<BoundingBox>,
    pub digest: ContentId,
    /// why the state at the limit is not settled
    pub reason: NotYet,
    /// how the population changed over the generations after the limit,
    /// when it did so regularly
    pub growth: Option<Growth>,
}

/// The population changes by `change` every `every` generations, at least
/// from `from` to `to`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Growth {
    pub every: u64,
    pub change: i64,
    pub from: BigUint,
    pub to: BigUint,
}

/// Why a fate could not be told.
#[derive(Debug, thiserror::Error)]
pub enum FateError {
    /// an advance failed (the memory budget)
    #[error(transparent)]
    Advance(#[from] AdvanceError),
    /// a state too large to take apart into objects
    #[error("the state at generation {generation} is too large to take apart into objects: {what}")]
    TooLarge { generation: BigUint, what: String },
}

/// What `universe` (at its generation) becomes, looking as far as
/// generation `limit`. Leaves the universe at the settle generation, or at
/// the end of the growth window after the limit.
pub fn fate(universe: &mut Universe, limit: &BigUint) -> Result<Fate, FateError> {
    let rule = universe.rule();
    let start = universe.generation().clone();
    let start_background = universe.background();
    let limit = std::cmp::max(limit.clone(), start.clone());
    let mut states = States::new(universe);
    let mut classes = Classes::default();
    let mut horizon = std::cmp::min(&start + FIRST_HORIZON, limit.clone());
    let found = loop {
        states.goto(&horizon)?;
        states.save();
        // Before the limit, take the state apart only when its population
        // is back a common multiple of small periods later (QUIET), as a
        // settled state's is: a busy state fails this at the cost
        // of a jump, not of an analysis. At the limit, always.
        if states.universe.population() > BigUint::from(MAX_CELLS) {
            // Not taken apart here, and a state this busy is seldom about
            // to settle: stop rather than go on to the limit.
            break Err(NotYet::TooLarge);
        }
        if horizon < limit && !states.quiet(&horizon, &start)? {
            horizon = next_horizon(&horizon, &start, &limit);
            continue;
        }
        // The cells that differ from the background step by one rule or,
        // under a B0 rule, two taking turns from the horizon's background.
        let analysed = match Steps::of(rule, states.universe.background()) {
            Some(steps) => {
                let cells = states.cells()?;
                objects::analyse(&cells, steps, &mut classes).map(|objects| (steps, objects))
            }
            None => Err(NotYet::Background),
        };
        match analysed {
            Ok((steps, objects)) => break Ok((horizon, steps, objects)),
            Err(why) if horizon >= limit => break Err(why),
            Err(_) => horizon = next_horizon(&horizon, &start, &limit),
        }
    };
    let (horizon, steps, objects) = match found {
        Ok(found) => found,
        Err(reason) => return unsettled(&mut states, reason).map(Fate::Unsettled),
    };
    // A B0 rule with S8 is settled at generation 1 at the earliest: at 0 its
    // background is still dead, and comes alive for good.
    let first = if Steps::of(rule, start_background).is_some() {
        start.clone()
    } else {
        &start + 1u32
    };
    let generation = settle_generation(&mut states, &first, &horizon, &objects)?;
    states.goto(&generation)?;
    let universe = &mut *states.universe;
    let background = universe.background();
    let population = universe.population();
    let bbox = universe.bounding_box();
    let digest = universe.digest().map_err(AdvanceError::from)?;
    let cells = states.cells()?;
    let shape_digest = shape_digest_of(&cells);
    let (period, displacement, whole) = period_of(&objects, steps);
    let census = census(&objects, steps, &mut classes);
    Ok(Fate::Settled(Settled {
        generation,
        background,
        examined: horizon,
        period,
        displacement,
        whole,
        population,
        bbox,
        digest,
        shape_digest,
        census,
    }))
}

/// The horizon after `horizon`: twice as far from the start, at most the
/// limit.
fn next_horizon(horizon: &BigUint, start: &BigUint, limit: &BigUint) -> BigUint {
    let next = horizon + (horizon - start).max(BigUint::one());
    std::cmp::min(next, limit.clone())
}

/// The first generation in [start, horizon] at which the state is exactly
/// `objects` (as they stand at `horizon`) traced back.
fn settle_generation(
    states: &mut States<'_>,
    start: &BigUint,
    horizon: &BigUint,
    objects: &[Object],
) -> Result<BigUint, FateError> {
    let is_objects = |states: &mut States<'_>, at: &BigUint| -> Result<bool, FateError> {
        states.goto(at)?;
        let back = BigInt::from(at.clone()) - BigInt::from(horizon.clone());
        let Some(k) = back.to_i64() else {
            return Err(FateError::TooLarge {
                generation: at.clone(),
                what: format!("{horizon} generations are beyond the settle search"),
            });
        };
        let expected: u64 = objects
            .iter()
            .map(|o| o.class.phases[k.rem_euclid(o.class.period as i64) as usize].len() as u64)
            .sum();
        if states.universe.population() != BigUint::from(expected) {
            return Ok(false);
        }
        let mut traced: Vec<Cell> = objects.iter().flat_map(|o| o.cells_at(k)).collect();
        cells::sort(&mut traced);
        Ok(states.cells()? == traced)
    };
    if is_objects(states, start)? {
        return Ok(start.clone());
    }
    // Invariant: not yet at `low`, settled at `high`.
    let (mut low, mut high) = (start.clone(), horizon.clone());
    loop {
        while &high - &low > BigUint::one() {
            let middle: BigUint = (&low + &high) / 2u32;
            if is_objects(states, &middle)? {
                high = middle;
            } else {
                low = middle;
            }
            states.save();
        }
        // Bisection takes "the state is its objects" to hold from the first
        // generation it holds on. Probe the generation after and seven more
        // spread up to the horizon: one that fails (two objects that touched
        // and parted unchanged) moves the search past it.
        let span = horizon - &high;
        let mut probes = vec![&high + 1u32];
        probes.extend((1..8u32).map(|j| &high + &span * j / 8u32));
        let mut failed = None;
        for probe in probes {
            if probe < *horizon && probe > high && !is_objects(states, &probe)? {
                failed = Some(probe);
            }
        }
        match failed {
            Some(probe) => {
                low = probe;
                high = horizon.clone();
            }
            None => return Ok(high),
        }
    }
}

/// The period and displacement of the whole pattern when all its objects
/// move alike (or all stand still), with `true`; else those of the objects
/// that stand still, with `false`. Under a flipping background (`steps`)
/// the period is even.
fn period_of(objects: &[Object], steps: Steps) -> (u64, (i64, i64), bool) {
    let alike = objects.windows(2).all(|pair| {
        let (a, b) = (&pair[0].class, &pair[1].class);
        a.dx * b.period as i64 == b.dx * a.period as i64
            && a.dy * b.period as i64 == b.dy * a.period as i64
    });
    let chosen: Vec<&Object> = if alike {
        objects.iter().collect()
    } else {
        objects.iter().filter(|o| !o.class.moves()).collect()
    };
    // A background that flips every generation repeats after two, even
    // where no object is left to say so.
    let mut period = if steps.flips() { 2 } else { 1 };
    for object in &chosen {
        let p = object.class.period as u64;
        period = period / gcd(period, p) * p;
    }
    let displacement = match chosen.first() {
        Some(object) if alike => {
            let turns = (period / object.class.period as u64) as i64;
            (object.class.dx * turns, object.class.dy * turns)
        }
        _ => (0, 0),
    };
    (period, displacement, alike)
}

fn gcd(mut a: u64, mut b: u64) -> u64 {
    while b != 0 {
        (a, b) = (b, a % b);
    }
    a
}

/// The census of `objects`: one entry per name and direction.
fn census(objects: &[Object], steps: Steps, classes: &mut Classes) -> Vec<CensusEntry> {
    let namer = names::Namer::new(steps, classes);
    let mut entries: Vec<CensusEntry> = Vec::new();
    let mut named: std::collections::HashMap<*const objects::Class, (String, ContentId)> =
        std::collections::HashMap::new();
    for object in objects {
        let class = &object.class;
        let (name, shape) = named
            .entry(std::rc::Rc::as_ptr(class))
            .or_insert_with(|| namer.name(class))
            .clone();
        let direction = names::direction(class.dx, class.dy);
        let kind = Kind::of(class);
        match entries
            .iter_mut()
            .find(|e| e.shape == shape && e.direction == direction && e.kind == kind)
        {
            Some(entry) => entry.count += 1,
            None => entries.push(CensusEntry {
                name,
                kind,
                count: 1,
                cells: class.phases.iter().map(Vec::len).min().unwrap_or(0) as u64,
                period: class.period,
                displacement: (class.dx, class.dy),
                direction,
                shape,
            }),
        }
    }
    entries.sort_by(|a, b| {
        (a.kind, std::cmp::Reverse(a.count), &a.name, a.direction).cmp(&(
            b.kind,
            std::cmp::Reverse(b.count),
            &b.name,
            b.direction,
        ))
    });
    entries
}

/// The state at the limit, and how its population changes after it.
fn unsettled(states: &mut States<'_>, reason: NotYet) -> Result<Unsettled, FateError> {
    let universe = &mut *states.universe;
    let generation = universe.generation().clone();
    let background = universe.background();
    let population = universe.population();
    let bbox = universe.bounding_box();
    let digest = universe.digest().map_err(AdvanceError::from)?;
    let mut populations = vec![BigInt::from(population.clone())];
    // A state too large to take apart is too large to step one generation
    // at a time for long, too.
    let window = if reason == NotYet::TooLarge {
        1
    } else {
        GROWTH_WINDOW
    };
    for _ in 1..window {
        universe.advance(&BigUint::one(), None)?;
        populations.push(BigInt::from(universe.population()));
    }
    // Under a flipping background the counts are of live and of dead cells
    // in turn: only whole pairs of generations compare.
    let unit = if universe.rule().next_background(background) == background {
        1
    } else {
        2
    };
    let growth = regular_change(&populations, unit).map(|(every, change)| Growth {
        every,
        change,
        from: generation.clone(),
        to: &generation + (GROWTH_WINDOW - 1),
    });
    Ok(Unsettled {
        generation,
        background,
        population,
        bbox,
        digest,
        reason,
        growth,
    })
}

/// The smallest p (up to half the series, a multiple of `unit`) such that
/// the population changes by the same amount over every p generations of
/// the series, with that amount; None when there is none (or it does not
/// fit i64).
fn regular_change(populations: &[BigInt], unit: usize) -> Option<(u64, i64)> {
    let n = populations.len();
    for every in (unit..=n / 2).step_by(unit) {
        let change = &populations[every] - &populations[0];
        if (every..n).all(|t| &populations[t] - &populations[t - every] == change) {
            return Some((every as u64, change.to_i64()?));
        }
    }
    None
}

/// The universe with states kept on the way (pinned), so that any
/// generation is a jump from the nearest earlier one.
struct States<'u> {
    universe: &'u mut Universe,
    saved: Vec<(BigUint, Handle, u32)>,
}

impl<'u> States<'u> {
    fn new(universe: &'u mut Universe) -> States<'u> {
        let mut states = States {
            universe,
            saved: Vec::new(),
        };
        states.save();
        states
    }

    /// Keeps the current state.
    fn save(&mut self) {
        let universe = &mut *self.universe;
        if self.saved.iter().any(|s| s.0 == universe.generation) {
            return;
        }
        universe.store.pin(universe.root);
        self.saved
            .push((universe.generation.clone(), universe.root, universe.level));
    }

    /// Brings the universe to generation `at`: from the nearest earlier
    /// state kept (or the current one, if nearer).
    fn goto(&mut self, at: &BigUint) -> Result<(), AdvanceError> {
        let universe = &mut *self.universe;
        let best = self
            .saved
            .iter()
            .filter(|s| &s.0 <= at)
            .max_by(|a, b| a.0.cmp(&b.0))
            .expect("the start is kept and no earlier generation is asked for");
        if universe.generation > *at || universe.generation < best.0 {
            universe.set_root(best.1, best.2);
            universe.generation = best.0.clone();
        }
        let rest = at - &universe.generation;
        if !rest.is_zero() {
            universe.advance(&rest, None)?;
        }
        Ok(())
    }

    /// Whether the population at `at` (the current generation, kept) is
    /// the same a while later (see QUIET; `from` is the start); leaves the
    /// universe at `at`.
    fn quiet(&mut self, at: &BigUint, from: &BigUint) -> Result<bool, AdvanceError> {
        let now = self.universe.population();
        let reach = at - from;
        let quiet = QUIET
            .iter()
            .copied()
            .filter(|&q| BigUint::from(q) <= reach)
            .max()
            .unwrap_or(QUIET[0]);
        self.goto(&(at + quiet))?;
        let later = self.universe.population();
        self.goto(at)?;
        Ok(now == later)
    }

    /// The live cells now, sorted by row then column.
    fn cells(&mut self) -> Result<Vec<Cell>, FateError> {
        let universe = &mut *self.universe;
        let generation = universe.generation.clone();
        let too_large = |what: String| FateError::TooLarge { generation, what };
        let population = universe.population();
        if population > BigUint::from(MAX_CELLS) {
            return Err(too_large(format!(
                "it has {population} live cells (at most {MAX_CELLS})"
            )));
        }
        match universe.cells() {
            Ok(cells) => Ok(cells),
            Err(WriteError::Budget(error)) => Err(AdvanceError::from(error).into()),
            Err(error) => Err(too_large(error.to_string())),
        }
    }
}

impl Drop for States<'_> {
    fn drop(&mut self) {
        for &(_, root, _) in &self.saved {
            self.universe.store.unpin(root);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn regular_change_finds_the_step() {
        // 36 + 5k every 30 generations with wobble inside a period: the
        // shape of a glider gun's population (common practice).
        let series: Vec<BigInt> = (0..120)
            .map(|t: i64| BigInt::from(36 + 5 * (t / 30) + (t % 30 % 3)))
            .collect();
        assert_eq!(regular_change(&series, 1), Some((30, 5)));
        let flat: Vec<BigInt> = (0..10).map(|_| BigInt::from(7)).collect();
        assert_eq!(regular_change(&flat, 1), Some((1, 0)));
        let squares: Vec<BigInt> = (0..40).map(|t: i64| BigInt::from(t * t)).collect();
        assert_eq!(regular_change(&squares, 1), None);
    }
}
