//! Job files: a run described in TOML (pattern, rule, target, checkpoint
//! policy), validated whole before anything runs. Unknown keys are refused
//! with their name and position; paths are relative to the job file.

use std::path::{Path, PathBuf};

use deeptime_engine::generation::parse_generations;
use num_bigint::BigUint;
use num_traits::Zero;
use serde::Deserialize;

use crate::failure::BadInput;

/// The job file format version this build reads.
pub const JOB_VERSION: u32 = 1;

#[derive(Deserialize, Debug)]
#[serde(deny_unknown_fields)]
struct JobFile {
    version: u32,
    name: Option<String>,
    pattern: String,
    rule: Option<String>,
    target: String,
    memory: Option<String>,
    checkpoint: CheckpointFile,
}

#[derive(Deserialize, Debug)]
#[serde(deny_unknown_fields)]
struct CheckpointFile {
    dir: String,
    every: String,
    keep: Option<usize>,
}

/// A job, validated.
#[derive(Debug)]
pub struct Job {
    pub name: String,
    pub pattern: PathBuf,
    pub rule: Option<String>,
    pub target: BigUint,
    pub memory: Option<String>,
    pub checkpoint_dir: PathBuf,
    pub every: BigUint,
    /// how many of the newest checkpoints to keep (None: all)
    pub keep: Option<usize>,
}

impl Job {
    pub fn load(path: &Path) -> Result<Job, BadInput> {
        let place = path.display();
        let text = std::fs::read_to_string(path)
            .map_err(|error| BadInput(format!("{place}: cannot read the job: {error}")))?;
        let file: JobFile = toml::from_str(&text).map_err(|error| {
            let (line, column) = error
                .span()
                .map(|span| line_column(&text, span.start))
                .unwrap_or((1, 1));
            BadInput(format!("{place}:{line}:{column}: {}", error.message()))
        })?;
        if file.version != JOB_VERSION {
            return Err(BadInput(format!(
                "{place}: job version {} (this build reads version {JOB_VERSION})",
                file.version
            )));
        }
        let base = path.parent().unwrap_or(Path::new("."));
        let target = parse_generations(&file.target)
            .map_err(|error| BadInput(format!("{place}: target: {error}")))?;
        let every = parse_generations(&file.checkpoint.every)
            .map_err(|error| BadInput(format!("{place}: checkpoint.every: {error}")))?;
        if every.is_zero() {
            return Err(BadInput(format!(
                "{place}: checkpoint.every must be at least 1"
            )));
        }
        if file.checkpoint.keep == Some(0) {
            return Err(BadInput(format!(
                "{place}: checkpoint.keep must be at least 1"
            )));
        }
        let dir = &file.checkpoint.dir;
        if dir.contains("://") && !dir.starts_with("s3://") {
            return Err(BadInput(format!(
                "{place}: checkpoint.dir {dir:?}: a local folder or an s3:// URL"
            )));
        }
        let name = file.name.unwrap_or_else(|| {
            path.file_stem()
                .map(|stem| stem.to_string_lossy().into_owned())
                .unwrap_or_else(|| "job".to_string())
        });
        Ok(Job {
            name,
            pattern: base.join(&file.pattern),
            rule: file.rule,
            target,
            memory: file.memory,
            // A URL as it is; a folder relative to the job file.
            checkpoint_dir: if dir.starts_with("s3://") {
                PathBuf::from(dir)
            } else {
                base.join(dir)
            },
            every,
            keep: file.checkpoint.keep,
        })
    }
}

/// 1-based line and column of a byte offset.
fn line_column(text: &str, offset: usize) -> (usize, usize) {
    let before = &text[..offset.min(text.len())];
    let line = before.matches('\n').count() + 1;
    let column = before.len() - before.rfind('\n').map_or(0, |at| at + 1) + 1;
    (line, column)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn load(text: &str) -> Result<Job, BadInput> {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("job.toml");
        std::fs::write(&path, text).unwrap();
        Job::load(&path).map_err(|BadInput(message)| {
            BadInput(message.replace(&path.display().to_string(), "JOB"))
        })
    }

    const GOOD: &str = "version = 1\npattern = \"a.rle\"\ntarget = \"10^12\"\n\
                        [checkpoint]\ndir = \"runs/a\"\nevery = \"2^16\"\n";

    #[test]
    fn a_job_reads_whole() {
        let job = load(GOOD).unwrap();
        assert_eq!(job.name, "job");
        assert_eq!(job.target, BigUint::from(10u32).pow(12));
        assert_eq!(job.every, BigUint::from(1u32 << 16));
        assert!(job.pattern.ends_with("a.rle"));
        assert!(job.checkpoint_dir.ends_with("runs/a"));
    }

    #[test]
    fn unknown_keys_and_bad_values_are_refused_with_their_place() {
        let error = load(&GOOD.replace("target", "tagret")).unwrap_err();
        assert!(
            error.0.starts_with("JOB:3:1: unknown field `tagret`"),
            "{}",
            error.0
        );
        let error = load(&format!("{GOOD}speed = 3\n")).unwrap_err();
        assert!(error.0.contains("unknown field `speed`"), "{}", error.0);
        let error = load(&GOOD.replace("version = 1", "version = 2")).unwrap_err();
        assert_eq!(error.0, "JOB: job version 2 (this build reads version 1)");
        let error = load(&GOOD.replace("2^16", "0")).unwrap_err();
        assert_eq!(error.0, "JOB: checkpoint.every must be at least 1");
        let error = load(&GOOD.replace("10^12", "ten")).unwrap_err();
        assert!(error.0.starts_with("JOB: target: "), "{}", error.0);
    }
}
