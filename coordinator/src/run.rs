//! `deeptime run JOB.toml`: a job in this one process (the embedded mode):
//! advance to the target in steps of the checkpoint interval, writing a
//! checkpoint after each; started again, resume from the newest good one.

use std::collections::HashSet;
use std::time::Instant;

use anyhow::Context;
use deeptime_engine::{Progress, Universe};
use num_bigint::BigUint;
use num_traits::ToPrimitive;

use crate::checkpoint::Checkpoints;
use crate::cli::RunArgs;
use crate::failure::BadInput;
use crate::job::Job;
use crate::report::Report;
use crate::{input, memory, progress};

pub fn run(args: RunArgs) -> anyhow::Result<()> {
    let job = Job::load(&args.job)?;
    let budget = memory::budget(job.memory.as_deref())?;
    let loaded = input::read(&job.pattern)?;
    let rule = input::rule(job.rule.as_deref(), &loaded)?;
    let started = Instant::now();
    let mut fresh = Universe::from_pattern(&loaded.pattern, rule, budget)
        .with_context(|| format!("{}: building the pattern", loaded.name))?;
    let pattern_digest = fresh.digest()?;

    let checkpoints = Checkpoints::new(crate::storage::open(&job.checkpoint_dir)?);
    // One writer at a time: held until the run ends.
    let _lock = checkpoints.lock()?;
    let resumed =
        checkpoints.latest_valid(budget, |warning| eprintln!("deeptime: warning: {warning}"))?;
    let (mut universe, mut previous, mut known) = match resumed {
        Some(stored) => {
            let manifest = stored.manifest;
            if manifest.rule != rule.to_string() {
                return Err(BadInput(format!(
                    "{}: the stored run uses rule {}, the job now says {rule}; use another checkpoint.dir",
                    job.checkpoint_dir.display(),
                    manifest.rule
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
            eprintln!(
                "deeptime: resuming {} from checkpoint {} at generation {}",
                job.name, manifest.sequence, manifest.generation
            );
            (stored.universe, Some(manifest), stored.known)
        }
        None => {
            let mut known = HashSet::new();
            let manifest =
                checkpoints.write(&mut fresh, None, &mut known, &job.name, &pattern_digest)?;
            (fresh, Some(manifest), known)
        }
    };
    if universe.generation() > &job.target {
        return Err(BadInput(format!(
            "the stored run is at generation {}, past the job's target {}",
            universe.generation(),
            job.target
        ))
        .into());
    }
    // One progress line for the whole run: generation, population at the
    // last checkpoint, rate, time left and memory.
    let from = universe.generation().clone();
    let line = progress::Line::start(&job.name);
    let advancing = Instant::now();
    while universe.generation() < &job.target {
        let left: BigUint = &job.target - universe.generation();
        let step = left.min(job.every.clone());
        let before = share(&(universe.generation() - &from), &(&job.target - &from));
        let span = share(&step, &(&job.target - &from));
        let population = previous.as_ref().map_or("?", |m| m.population.as_str());
        let seconds = advancing.elapsed().as_secs_f64().max(1e-9);
        let rate = approximate(&(universe.generation() - &from)) / seconds;
        let note = format!(
            "gen {} pop {} {}/s ",
            short(&universe.generation().to_string()),
            short(population),
            short_float(rate)
        );
        let mut observe = |progress: &Progress| line.update_part(before, span, progress, &note);
        let advanced = universe.advance(&step, Some(&mut observe));
        advanced.with_context(|| format!("advancing {step} generations"))?;
        let manifest = checkpoints.write(
            &mut universe,
            previous.as_ref(),
            &mut known,
            &job.name,
            &pattern_digest,
        )?;
        previous = Some(manifest);
        if let Some(keep) = job.keep
            && let Err(error) = checkpoints.prune(keep)
        {
            eprintln!("deeptime: warning: retention: {error:#}");
        }
    }
    line.finish();
    Report::of(&mut universe, started.elapsed())?.print(args.json)
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

/// A decimal shortened for a progress line.
fn short(decimal: &str) -> String {
    if decimal.len() <= 12 {
        return decimal.to_string();
    }
    format!("{}.{}e{}", &decimal[..1], &decimal[1..3], decimal.len() - 1)
}

fn short_float(value: f64) -> String {
    if value < 1e6 {
        format!("{value:.0}")
    } else {
        format!("{value:.2e}")
    }
}
