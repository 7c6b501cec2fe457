//! `deeptime run JOB.toml`: a job in this one process (the embedded mode):
//! advance to the target in steps of the checkpoint interval, writing a
//! checkpoint after each; started again, resume from the newest good one.

use std::collections::HashSet;
use std::time::Instant;

use anyhow::Context;
use deeptime_engine::{Progress, Universe};
use num_bigint::BigUint;

use crate::checkpoint::Checkpoints;
use crate::cli::RunArgs;
use crate::failure::BadInput;
use crate::job::Job;
use crate::report::Report;
use crate::storage::LocalDir;
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

    let checkpoints = Checkpoints::new(Box::new(LocalDir::new(job.checkpoint_dir.clone())));
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
    while universe.generation() < &job.target {
        let left: BigUint = &job.target - universe.generation();
        let step = left.min(job.every.clone());
        let line = progress::Line::start(&format!("to {}", universe.generation() + &step));
        let mut observe = |progress: &Progress| line.update(progress);
        let advanced = universe.advance(&step, Some(&mut observe));
        line.finish();
        advanced.with_context(|| format!("advancing {step} generations"))?;
        let manifest = checkpoints.write(
            &mut universe,
            previous.as_ref(),
            &mut known,
            &job.name,
            &pattern_digest,
        )?;
        previous = Some(manifest);
        if let Some(keep) = job.keep {
            checkpoints.prune(keep)?;
        }
    }
    Report::of(&mut universe, started.elapsed())?.print(args.json)
}
