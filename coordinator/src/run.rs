//! `deeptime run JOB.toml`: a job in this one process (the embedded mode):
//! advance to the target, writing a checkpoint at every multiple of the
//! job's `every` and, with a `wall_clock` interval, often enough in time
//! (an advance cannot be cut part way, so the step sizes are chosen by the
//! measured pace); started again, resume from the newest good one.

use std::time::{Duration, Instant};

use anyhow::Context;
use deeptime_engine::{KnownQuads, Progress, Universe};
use num_bigint::BigUint;
use num_traits::{One, ToPrimitive, Zero};

use crate::args::RunArgs;
use crate::job::Job;
use crate::numbers::for_people;
use crate::report::Report;
use crate::{input, memory, progress};
use deeptime_engine::BadInput;
use deeptime_engine::finite::Space;
use deeptime_storage::checkpoint::{Checkpoints, Manifest, RunIdentity, TimelineSample};

/// `deeptime run`: runs the job and prints its figures.
pub fn run(args: RunArgs) -> anyhow::Result<()> {
    run_job(&args.job)?.print(args.json)
}

/// Runs the job file at `path` to its target in this process, resuming
/// from its newest valid checkpoint; the figures of the state it reached.
pub fn run_job(path: &std::path::Path) -> anyhow::Result<Report> {
    let job = Job::load(path)?;
    let budget = memory::budget(job.memory.as_deref())?;
    let loaded = input::read(&job.pattern, budget)?;
    let rule = input::rule(job.rule.as_deref(), &loaded)?;
    // A bounded universe's top-left cell: the pattern's (0, 0).
    let origin = loaded.pattern.origin.unwrap_or((0, 0));
    let started = Instant::now();
    let mut fresh = input::build(loaded, rule, budget)?;
    let pattern_digest = fresh.digest()?;
    let identity = RunIdentity {
        name: &job.name,
        pattern: &pattern_digest,
        universe: job.universe,
        origin,
    };

    let checkpoints = Checkpoints::new(deeptime_storage::open(&job.checkpoint_dir)?);
    // One writer at a time: held until the run ends.
    let _lock = checkpoints.lock()?;
    let (mut universe, mut previous, mut known) =
        resume_or_start(&checkpoints, &job, fresh, &identity, budget)?;
    if universe.generation() > &job.target {
        return Err(BadInput(format!(
            "the stored run is at generation {}, past the job's target {}",
            for_people(&universe.generation().to_string()),
            for_people(&job.target.to_string())
        ))
        .into());
    }
    // One progress line for the whole run: generation, population at the
    // last checkpoint, rate, time left and memory.
    let from = universe.generation().clone();
    let line = progress::Line::start(&job.name);
    let advancing = Instant::now();
    let mut pacer = job.wall_clock.map(Pacer::new);
    let mut last_checkpoint = Instant::now();
    // Timeline samples taken since the last checkpoint, stored beside the
    // next one.
    let mut samples = Vec::new();
    while universe.generation() < &job.target {
        // The next generation that must be stored: a multiple of `every`,
        // or the target.
        let stop = match &job.every {
            Some(every) => ((universe.generation() / every + 1u32) * every).min(job.target.clone()),
            None => job.target.clone(),
        };
        // And the next timeline sample, if one comes first.
        let sample_at = job
            .timeline_every
            .as_ref()
            .map(|every| (universe.generation() / every + 1u32) * every)
            .filter(|at| at < &stop);
        let mut step: BigUint = sample_at.as_ref().unwrap_or(&stop) - universe.generation();
        if let Some(pacer) = &pacer {
            step = step.min(pacer.step.clone());
        }
        let before = share(&(universe.generation() - &from), &(&job.target - &from));
        let span = share(&step, &(&job.target - &from));
        let population = match previous.as_ref() {
            None => "?".to_string(),
            Some(manifest) => {
                let background = manifest.background()?;
                let (population, dead) =
                    crate::report::population(background, manifest.population.clone());
                crate::report::population_for_people(&population, dead.as_deref())
            }
        };
        let seconds = advancing.elapsed().as_secs_f64().max(1e-9);
        let rate = approximate(&(universe.generation() - &from)) / seconds;
        let note = format!(
            "gen {} pop {} {}/s ",
            for_people(&universe.generation().to_string()),
            population,
            short_float(rate)
        );
        let mut observe = |progress: &Progress| line.update_part(before, span, progress, &note);
        let started_step = Instant::now();
        input::advance(
            &mut universe,
            job.universe,
            origin,
            &step,
            budget,
            Some(&mut observe),
        )
        .with_context(|| format!("advancing {} generations", for_people(&step.to_string())))?;
        let took = started_step.elapsed();
        let due = match pacer.as_mut() {
            Some(pacer) => {
                pacer.record(&step, took);
                pacer.due(last_checkpoint.elapsed())
            }
            None => false,
        };
        if sample_at.as_ref() == Some(universe.generation()) {
            samples.push(TimelineSample::of(&mut universe)?);
        }
        if universe.generation() != &stop && !due {
            continue;
        }
        let manifest =
            checkpoints.write(&mut universe, previous.as_ref(), &mut known, &identity)?;
        checkpoints.put_samples(&manifest, &samples)?;
        samples.clear();
        last_checkpoint = Instant::now();
        previous = Some(manifest);
        if let Some(keep) = job.keep
            && let Err(error) = checkpoints.prune(keep)
        {
            eprintln!("deeptime: warning: retention: {error:#}");
        }
    }
    line.finish();
    let mut report = Report::of(&mut universe, started.elapsed())?;
    if job.universe != Space::Plane {
        report.universe = Some(job.universe.to_string());
    }
    Ok(report)
}

/// The run's state to go on from: the newest checkpoint that reads back
/// whole (saying so), or `fresh` stored as the first checkpoint. A stored
/// run of another pattern or rule is refused.
pub fn resume_or_start(
    checkpoints: &Checkpoints,
    job: &Job,
    mut fresh: Universe,
    identity: &RunIdentity<'_>,
    budget: u64,
) -> anyhow::Result<(Universe, Option<Manifest>, KnownQuads)> {
    let rule = fresh.rule();
    let resumed = checkpoints
        .latest_valid(budget, |warning| eprintln!("deeptime: warning: {warning}"))
        .with_context(|| {
            format!(
                "{}: reading the newest checkpoint",
                job.checkpoint_dir.display()
            )
        })?;
    Ok(match resumed {
        Some(stored) => {
            let manifest = stored.manifest;
            check_identity(&manifest, job, &rule.to_string(), identity)?;
            eprintln!(
                "deeptime: resuming {} from checkpoint {} at generation {}",
                job.name,
                manifest.sequence,
                for_people(&manifest.generation)
            );
            (stored.universe, Some(manifest), stored.known)
        }
        None => {
            let mut known = KnownQuads::default();
            let manifest = checkpoints.write(&mut fresh, None, &mut known, identity)?;
            (fresh, Some(manifest), known)
        }
    })
}

/// Refuses a stored run of another rule or pattern than the job's (a
/// changed target or interval is fine).
pub fn check_identity(
    manifest: &Manifest,
    job: &Job,
    rule: &str,
    identity: &RunIdentity<'_>,
) -> anyhow::Result<()> {
    let pattern_digest = identity.pattern;
    if manifest.rule != rule {
        return Err(BadInput(format!(
            "{}: the stored run uses rule {}, the job now says {rule}; use another checkpoint.dir",
            job.checkpoint_dir.display(),
            manifest.rule
        ))
        .into());
    }
    let universe = identity.universe.to_string();
    let stored = manifest.universe.as_deref().unwrap_or("plane");
    if stored != universe {
        return Err(BadInput(format!(
            "{}: the stored run lives in the {stored}, the job now says {universe}; use another checkpoint.dir",
            job.checkpoint_dir.display()
        ))
        .into());
    }
    if manifest.pattern != pattern_digest.to_string() {
        return Err(BadInput(format!(
            "{}: the stored run is of another pattern (digest {}, the job's is {pattern_digest}); use another checkpoint.dir",
            job.checkpoint_dir.display(),
            manifest.pattern
        ))
        .into());
    }
    Ok(())
}

/// Chooses power-of-two step sizes so that one advance takes between about
/// an eighth and a half of the wall-clock interval, and says when a
/// checkpoint is due: when the next step, at the last one's pace, would
/// carry the time since the last checkpoint past the interval.
pub struct Pacer {
    interval: Duration,
    /// the next step's size: a power of two
    pub step: BigUint,
    /// how long the last advance took
    last: Duration,
}

impl Pacer {
    pub fn new(interval: Duration) -> Pacer {
        Pacer {
            interval,
            step: BigUint::one(),
            last: Duration::ZERO,
        }
    }

    /// Learns from an advance of `generations` that took `took`: halves
    /// the step when it took more than half the interval, doubles it when
    /// a whole step took less than a quarter.
    pub fn record(&mut self, generations: &BigUint, took: Duration) {
        self.last = took;
        if took * 2 > self.interval {
            if self.step > BigUint::one() {
                self.step >>= 1;
            }
        } else if took * 4 < self.interval && generations == &self.step {
            self.step <<= 1;
        }
        debug_assert!(!self.step.is_zero());
    }

    /// Whether to write a checkpoint now, `since` the last one.
    pub fn due(&self, since: Duration) -> bool {
        since + self.last >= self.interval
    }
}

/// `part / whole` as a float, for big integers of any size.
fn share(part: &BigUint, whole: &BigUint) -> f64 {
    let drop = whole.bits().max(part.bits()).saturating_sub(60);
    let part = (part >> drop).to_f64().unwrap_or(0.0);
    let whole = (whole >> drop)
        .to_f64()
        .unwrap_or(1.0)
        .max(f64::MIN_POSITIVE);
    part / whole
}

/// A big integer as the nearest float (infinite beyond about 10^308).
fn approximate(value: &BigUint) -> f64 {
    let drop = value.bits().saturating_sub(60);
    (value >> drop).to_f64().unwrap_or(0.0) * 2f64.powi(drop.min(2000) as i32)
}

fn short_float(value: f64) -> String {
    if value < 1e6 {
        format!("{value:.0}")
    } else {
        format!("{value:.2e}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_pacer_doubles_fast_steps_halves_slow_ones_and_keeps_checkpoints_in_time() {
        let second = Duration::from_secs(1);
        let mut pacer = Pacer::new(10 * second);
        let ms = Duration::from_millis;
        // Fast whole steps double: 1, 2, 4, 8.
        for expected in [2u32, 4, 8] {
            let step = pacer.step.clone();
            pacer.record(&step, ms(10));
            assert_eq!(pacer.step, BigUint::from(expected));
        }
        // A step cut short by a stop (3 of 8) does not double it.
        pacer.record(&BigUint::from(3u32), ms(10));
        assert_eq!(pacer.step, BigUint::from(8u32));
        // Between a quarter and a half of the interval: kept.
        pacer.record(&BigUint::from(8u32), 3 * second);
        assert_eq!(pacer.step, BigUint::from(8u32));
        // Over half: halved, never below 1.
        pacer.record(&BigUint::from(8u32), 6 * second);
        assert_eq!(pacer.step, BigUint::from(4u32));
        for _ in 0..5 {
            let step = pacer.step.clone();
            pacer.record(&step, 60 * second);
        }
        assert_eq!(pacer.step, BigUint::one());
        // Due once the next step, at the last pace, would pass the interval.
        pacer.record(&BigUint::one(), 3 * second);
        assert!(!pacer.due(6 * second));
        assert!(pacer.due(7 * second));
    }
}
