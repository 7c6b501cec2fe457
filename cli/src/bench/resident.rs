//! Resident memory under a budget: the chaotic soup's jump run by a child
//! `deeptime leap --memory BYTES --json` (this executable), its peak
//! resident memory as the kernel counts it at exit, less the process's fixed
//! overhead (the same child's peak on a glider), against its budget. Each
//! child's digest is checked equal to the in-process run's.

use std::path::{Path, PathBuf};
use std::process::Command;

use anyhow::{Context, bail, ensure};
use deeptime_engine::pattern::Pattern;
use deeptime_engine::rule::Rule;
use deeptime_engine::{ContentId, human_bytes};
use serde_json::Value;
use tempfile::TempDir;

use super::suite::write_rle;
use super::{Figure, Goal, process};
use deeptime_coordinator::memory::MIN_BUDGET;

/// A glider: the smallest run that goes through all of `leap`.
const GLIDER: &str = "x = 3, y = 3, rule = B3/S23\nbo$2bo$3o!\n";

const MIB: f64 = (1u64 << 20) as f64;

/// A finished child `leap`: its report and its peak resident bytes.
struct ChildRun {
    report: Value,
    peak: u64,
    /// this process's private bytes when it forked the child
    started_from: Option<u64>,
}

impl ChildRun {
    fn engine(&self, field: &str) -> &Value {
        &self.report["engine"][field]
    }

    /// A note for a peak that may be this process's rather than the
    /// child's: the kernel's count for a forked child starts from the
    /// private memory of the process that forked it.
    fn caveat(&self) -> String {
        match self.started_from {
            Some(from) if self.peak <= from => format!(
                "; at most: the child started from {} of the bench's own memory",
                human_bytes(from)
            ),
            _ => String::new(),
        }
    }
}

/// Runs `exe leap PATTERN --gens N --memory BUDGET --json`; a child that
/// fails is an error carrying what it said.
fn leap(exe: &Path, pattern: &Path, generations: &str, budget: u64) -> anyhow::Result<ChildRun> {
    let finished = process::run(
        Command::new(exe)
            .arg("leap")
            .arg(pattern)
            .args(["--gens", generations, "--memory", &budget.to_string()])
            .arg("--json"),
    )?;
    ensure!(
        finished.status.success(),
        "deeptime leap failed: {}",
        finished.stderr.trim()
    );
    let Some(peak) = finished.peak else {
        bail!("the system reports no peak resident memory for deeptime leap");
    };
    Ok(ChildRun {
        report: serde_json::from_slice(&finished.stdout)
            .context("deeptime leap printed no JSON")?,
        peak,
        started_from: finished.started_from,
    })
}

/// The executable, the soup as RLE, and the process's fixed overhead.
pub struct Resident {
    directory: TempDir,
    exe: PathBuf,
    fixed: ChildRun,
}

impl Resident {
    /// Copies this executable and measures its process's fixed overhead on
    /// a glider. Called first, while this process is small: a child's count
    /// starts from this process's private memory.
    pub fn start() -> anyhow::Result<Resident> {
        let directory = tempfile::tempdir()?;
        let exe = process::this_executable(directory.path())?;
        let glider = directory.path().join("glider.rle");
        std::fs::write(&glider, GLIDER)?;
        let fixed = leap(&exe, &glider, "1", MIN_BUDGET).context("leap on a glider")?;
        Ok(Resident {
            directory,
            exe,
            fixed,
        })
    }

    fn soup(&self) -> PathBuf {
        self.directory.path().join("soup.rle")
    }

    pub fn write_soup(&self, pattern: &Pattern, rule: Rule) -> anyhow::Result<()> {
        write_rle(pattern, rule, &self.soup())
    }

    /// The fixed overhead, then the soup advanced `generations` under each
    /// of `budgets` (named by the fraction they are). Call it once this
    /// process has let go of its large runs, for the reason `start` says.
    pub fn figures(
        &self,
        label: &str,
        generations: u64,
        digest: &ContentId,
        budgets: &[(&str, u64)],
    ) -> anyhow::Result<Vec<Figure>> {
        let fixed = self.fixed.peak;
        let mut figures = vec![
            Figure::new(
                "resident",
                "leap on a glider: fixed peak resident",
                fixed as f64 / MIB,
                "MiB",
                None,
            )
            .detail(format!(
                "the process's own memory outside any budget (its store held {} B), \
                 subtracted below{}",
                self.fixed.engine("bytes"),
                self.fixed.caveat()
            )),
        ];
        for &(fraction, wanted) in budgets {
            let budget = wanted.max(MIN_BUDGET);
            let raised = if budget > wanted {
                format!(
                    " (raised from {}, below leap's smallest)",
                    human_bytes(wanted)
                )
            } else {
                String::new()
            };
            let name = format!("{label}, budget {fraction}: (peak resident − fixed) / budget");
            let goal = Some(Goal::AtMost(1.1));
            let run =
                match leap(&self.exe, &self.soup(), &generations.to_string(), budget) {
                    Ok(run) => run,
                    Err(error) => {
                        figures.push(Figure::new("resident", &name, 0.0, "×", goal).detail(
                            format!("failed under {}{raised}: {error:#}", human_bytes(budget)),
                        ));
                        continue;
                    }
                };
            let theirs = run.report["digest"].as_str().unwrap_or("");
            ensure!(
                theirs == digest.to_string(),
                "leap under a budget of {} gave digest {theirs}, the in-process run {digest}",
                human_bytes(budget)
            );
            let mib = |bytes: u64| bytes as f64 / MIB;
            // In tenths of a MiB, as printed; adding 0.0 turns a -0.0 into 0.0.
            let over =
                |bytes: u64| ((bytes as f64 - budget as f64) / MIB * 10.0).round() / 10.0 + 0.0;
            figures.push(
                Figure::new(
                    "resident",
                    &name,
                    run.peak.saturating_sub(fixed) as f64 / budget as f64,
                    "×",
                    goal,
                )
                .detail(format!(
                    "peak {:.1} MiB = fixed {:.1} MiB + {:.1} MiB, budget {:.1} MiB{raised}: \
                     peak − budget {:+.1} MiB, peak − fixed − budget {:+.1} MiB; leap \
                     {:.2} s, {} collections, store {:.1} MiB at the end; same digest {}{}",
                    mib(run.peak),
                    mib(fixed),
                    mib(run.peak.saturating_sub(fixed)),
                    mib(budget),
                    over(run.peak),
                    over(run.peak.saturating_sub(fixed)),
                    run.engine("seconds").as_f64().unwrap_or(f64::NAN),
                    run.engine("collections"),
                    mib(run.engine("bytes").as_u64().unwrap_or(0)),
                    digest.short(),
                    run.caveat()
                )),
            );
        }
        Ok(figures)
    }
}
