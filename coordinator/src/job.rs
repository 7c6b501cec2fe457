//! Job files: a run described in TOML (pattern, rule, target, checkpoint
//! policy), validated whole before anything runs. Unknown keys are refused
//! with their name and position; paths are relative to the job file.

use std::path::{Path, PathBuf};
use std::time::Duration;

use deeptime_engine::finite::Space;
use deeptime_engine::generation::parse_generations;
use num_bigint::BigUint;
use num_traits::Zero;
use serde::Deserialize;

use deeptime_engine::BadInput;

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
    universe: Option<String>,
    checkpoint: CheckpointFile,
    timeline: Option<TimelineFile>,
}

#[derive(Deserialize, Debug)]
#[serde(deny_unknown_fields)]
struct TimelineFile {
    every: String,
}

#[derive(Deserialize, Debug)]
#[serde(deny_unknown_fields)]
struct CheckpointFile {
    dir: String,
    every: Option<String>,
    wall_clock: Option<String>,
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
    /// checkpoints at the multiples of this generation count (None: only
    /// as the wall clock says, and at the target)
    pub every: Option<BigUint>,
    /// a checkpoint at least about this often in time
    pub wall_clock: Option<Duration>,
    /// how many of the newest checkpoints to keep (None: all)
    pub keep: Option<usize>,
    /// timeline samples at the multiples of this generation count between
    /// the checkpoints (None: the checkpoints' figures only)
    pub timeline_every: Option<BigUint>,
    /// where the pattern lives (the unbounded plane unless the job says)
    pub universe: Space,
}

impl Job {
    pub fn load(path: &Path) -> Result<Job, BadInput> {
        let text = std::fs::read_to_string(path).map_err(|error| {
            BadInput(format!("{}: cannot read the job: {error}", path.display()))
        })?;
        Job::parse(&text, path)
    }

    /// A job from the text of the job file at `path` (which names it in
    /// messages and anchors its relative paths); nothing is read.
    pub fn parse(text: &str, path: &Path) -> Result<Job, BadInput> {
        let place = path.display();
        let file: JobFile = toml::from_str(text).map_err(|error| {
            let (line, column) = error
                .span()
                .map(|span| line_column(text, span.start))
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
        let every = match &file.checkpoint.every {
            None => None,
            Some(text) => {
                let every = parse_generations(text)
                    .map_err(|error| BadInput(format!("{place}: checkpoint.every: {error}")))?;
                if every.is_zero() {
                    return Err(BadInput(format!(
                        "{place}: checkpoint.every must be at least 1"
                    )));
                }
                Some(every)
            }
        };
        let timeline_every = match &file.timeline {
            None => None,
            Some(timeline) => {
                let every = parse_generations(&timeline.every)
                    .map_err(|error| BadInput(format!("{place}: timeline.every: {error}")))?;
                if every.is_zero() {
                    return Err(BadInput(format!(
                        "{place}: timeline.every must be at least 1"
                    )));
                }
                Some(every)
            }
        };
        let universe = match &file.universe {
            None => Space::Plane,
            Some(text) => text
                .parse()
                .map_err(|error| BadInput(format!("{place}: {error}")))?,
        };
        let wall_clock = match &file.checkpoint.wall_clock {
            None => None,
            Some(text) => Some(parse_duration(text).ok_or_else(|| {
                BadInput(format!(
                    "{place}: checkpoint.wall_clock {text:?}: a whole number of seconds, \
                     minutes, hours or days, at least 1 (\"90s\", \"10m\", \"2h\", \"1d\")"
                ))
            })?),
        };
        if every.is_none() && wall_clock.is_none() {
            return Err(BadInput(format!(
                "{place}: [checkpoint] needs every (generations) or wall_clock (time), or both"
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
            wall_clock,
            keep: file.checkpoint.keep,
            timeline_every,
            universe,
        })
    }
}

/// A time span as a whole number and a unit: `90s`, `10m`, `2h`, `1d`.
fn parse_duration(text: &str) -> Option<Duration> {
    let unit = text.chars().last()?;
    let seconds: u64 = match unit {
        's' => 1,
        'm' => 60,
        'h' => 3600,
        'd' => 86_400,
        _ => return None,
    };
    let number = &text[..text.len() - 1];
    if number.is_empty() || !number.bytes().all(|b| b.is_ascii_digit()) {
        return None;
    }
    let count: u64 = number.parse().ok()?;
    let total = count.checked_mul(seconds).filter(|&total| total >= 1)?;
    Some(Duration::from_secs(total))
}

/// 1-based line and column of a byte offset.
fn line_column(text: &str, offset: usize) -> (usize, usize) {
    // An offset inside a character counts from that character's start.
    let mut end = offset.min(text.len());
    while !text.is_char_boundary(end) {
        end -= 1;
    }
    let before = &text[..end];
    let line = before.matches('\n').count() + 1;
    let column = before[before.rfind('\n').map_or(0, |at| at + 1)..]
        .chars()
        .count()
        + 1;
    (line, column)
}

#[cfg(test)]
mod tests {
    use super::*;

    // A position inside a multi-byte character is that character's, and
    // columns count characters (common practice for editors' columns).
    #[test]
    fn positions_inside_characters_do_not_panic() {
        let text = "name = \"größe\"\nx = 1";
        // 'ö' is bytes 10 and 11, the 11th character.
        assert_eq!(line_column(text, 10), (1, 11));
        assert_eq!(line_column(text, 11), (1, 11));
        assert_eq!(line_column(text, 12), (1, 12));
        assert_eq!(line_column(text, text.len() + 5), (2, 6));
    }

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
        assert_eq!(job.every, Some(BigUint::from(1u32 << 16)));
        assert_eq!(job.wall_clock, None);
        assert_eq!(job.timeline_every, None);
        assert!(job.pattern.ends_with("a.rle"));
        let job = load(&format!("{GOOD}[timeline]\nevery = \"10^3\"\n")).unwrap();
        assert_eq!(job.timeline_every, Some(BigUint::from(1000u32)));
        let error = load(&format!("{GOOD}[timeline]\nevery = \"0\"\n")).unwrap_err();
        assert_eq!(error.0, "JOB: timeline.every must be at least 1");
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
        let error = load(&GOOD.replace("every = \"2^16\"", "keep = 3")).unwrap_err();
        assert_eq!(
            error.0,
            "JOB: [checkpoint] needs every (generations) or wall_clock (time), or both"
        );
        let error = load(&GOOD.replace("every", "wall_clok")).unwrap_err();
        assert!(
            error.0.starts_with("JOB:6:1: unknown field `wall_clok`"),
            "{}",
            error.0
        );
    }

    #[test]
    fn a_wall_clock_interval_reads_in_its_units() {
        // Seconds in a minute, an hour, a day (common practice).
        let job = load(&GOOD.replace("every = \"2^16\"", "wall_clock = \"10m\"")).unwrap();
        assert_eq!(job.every, None);
        assert_eq!(job.wall_clock, Some(Duration::from_secs(600)));
        for (text, seconds) in [("90s", 90), ("2h", 7200), ("1d", 86_400)] {
            assert_eq!(parse_duration(text), Some(Duration::from_secs(seconds)));
        }
        for bad in ["0s", "10", "m", "1.5h", "-3m", "10 m", "10M"] {
            assert_eq!(parse_duration(bad), None, "{bad}");
        }
        let error = load(&format!("{GOOD}wall_clock = \"soon\"\n")).unwrap_err();
        assert!(
            error
                .0
                .starts_with("JOB: checkpoint.wall_clock \"soon\": a whole number"),
            "{}",
            error.0
        );
    }
}
