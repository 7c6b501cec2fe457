//! `deeptime timeline`: a pattern's figures (population, bounding box,
//! digest) at generations 0, K, 2K, … N, as a table for people, CSV, JSON,
//! and a plot of the population (`timeline_plot.rs`). K may be
//! astronomically large: each sample is one HashLife jump of K, and the
//! jumps all share one memo, since they advance by the same K. Given a
//! run's checkpoint folder instead, the samples are its stored
//! generations, read from their manifests alone.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::Context;
use deeptime_engine::generation::parse_generations;
use deeptime_engine::{Universe, human_bytes};
use num_bigint::BigUint;
use num_traits::{ToPrimitive, Zero};
use serde::Serialize;

use crate::cli::TimelineArgs;
use crate::failure::{BadInput, OutputFailed};
use deeptime_coordinator::numbers::{box_for_people, for_people};
use deeptime_coordinator::report::{self, BoxReport, EngineReport, population_for_people};
use deeptime_coordinator::{input, memory, output, progress};
use deeptime_engine::rule::Background;
use deeptime_storage::checkpoint::{Checkpoints, background_of};

/// At most this many samples in one timeline.
pub const MAX_SAMPLES: u64 = 100_000;

/// The CSV header, one line per sample after it. Under a B0 rule the
/// population may be `infinite` (an alive background), the box and digest
/// are of the cells that differ from the background, and `dead_cells`
/// counts them when it is alive (see `deeptime_coordinator::report`).
pub const CSV_HEADER: &str =
    "generation,population,left,top,width,height,digest,background,dead_cells";

/// The figures of one sampled generation.
#[derive(Serialize, Debug)]
pub struct Sample {
    pub generation: String,
    pub background: &'static str,
    pub population: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub dead_cells: Option<String>,
    pub bbox: Option<BoxReport>,
    pub digest: String,
}

impl Sample {
    /// A sample whose cells that differ from `background` number
    /// `differing`.
    fn new(
        generation: String,
        background: Background,
        differing: String,
        bbox: Option<BoxReport>,
        digest: String,
    ) -> Sample {
        let (population, dead_cells) = report::population(background, differing);
        Sample {
            generation,
            background: background.name(),
            population,
            dead_cells,
            bbox,
            digest,
        }
    }
}

#[derive(Serialize, Debug)]
struct TimelineReport {
    rule: String,
    /// the last generation sampled
    gens: String,
    /// null for a run's checkpoints
    every: Option<String>,
    samples: Vec<Sample>,
    /// null for a run's checkpoints
    engine: Option<EngineReport>,
}

pub fn run(args: TimelineArgs) -> anyhow::Result<()> {
    let is_run = args.pattern.to_string_lossy().contains("s3://") || args.pattern.is_dir();
    if is_run {
        return from_run(&args);
    }
    let (Some(gens_text), Some(every_text)) = (&args.gens, &args.every) else {
        return Err(BadInput(format!(
            "{}: a pattern needs --gens N and --every K",
            args.pattern.display()
        ))
        .into());
    };
    let gens =
        parse_generations(gens_text).map_err(|error| BadInput(format!("--gens: {error}")))?;
    let every =
        parse_generations(every_text).map_err(|error| BadInput(format!("--every: {error}")))?;
    if every.is_zero() {
        return Err(BadInput("--every: must be at least 1".into()).into());
    }
    let count = &gens / &every + if (&gens % &every).is_zero() { 1u32 } else { 2 };
    if count > BigUint::from(MAX_SAMPLES) {
        return Err(BadInput(format!(
            "--every {every_text}: gives {} samples up to --gens {gens_text} (at most {MAX_SAMPLES})",
            for_people(&count.to_string()),
        ))
        .into());
    }
    check_outputs(&args)?;
    let budget = memory::budget(args.memory.as_deref())?;
    let space = args.universe.space()?;
    let loaded = input::read(&args.pattern, budget)?;
    let rule = input::rule(args.rule.as_deref(), &loaded)?;
    let origin = loaded.pattern.origin.unwrap_or((0, 0));

    let started = Instant::now();
    let mut universe = input::build(loaded, rule, budget)?;
    let line = progress::Line::start("sampling");
    let sampled = sample(&mut universe, &gens, &every, |universe, step| {
        input::advance(universe, space, origin, step, budget, None).map(|_| ())
    });
    line.finish();
    let samples = sampled?;
    let elapsed = started.elapsed();

    let report = TimelineReport {
        rule: rule.to_string(),
        gens: gens.to_string(),
        every: Some(every.to_string()),
        samples,
        engine: Some(EngineReport::of(&universe, elapsed)),
    };
    finish(report, &args)
}

/// The stored generations of a run, from their manifests.
fn from_run(args: &TimelineArgs) -> anyhow::Result<()> {
    if args.gens.is_some() || args.every.is_some() {
        return Err(BadInput(format!(
            "{}: a run's timeline is its stored generations; --gens and --every are for a pattern",
            args.pattern.display()
        ))
        .into());
    }
    check_outputs(args)?;
    let checkpoints = Checkpoints::new(deeptime_storage::checkpoint::open_existing(&args.pattern)?);
    let mut stored = Vec::new();
    let mut rule = None;
    let readable = checkpoints.readable_manifests(|error| {
        eprintln!("deeptime: warning: skipping damaged checkpoint: {error}");
    })?;
    for (_, manifest) in readable {
        rule.get_or_insert_with(|| manifest.rule.clone());
        let generation = manifest.generation()?;
        stored.push((
            generation,
            Sample::new(
                manifest.generation.clone(),
                manifest.background()?,
                manifest.population.clone(),
                manifest.bbox.as_ref().map(|b| BoxReport {
                    left: b.left.clone(),
                    top: b.top.clone(),
                    width: b.width.clone(),
                    height: b.height.clone(),
                }),
                manifest.root.clone(),
            ),
        ));
    }
    // And the samples `[timeline] every` took between the checkpoints.
    let between = checkpoints.samples(|warning| eprintln!("deeptime: warning: {warning}"))?;
    for sample in between {
        let Ok(generation) = sample.generation.parse::<BigUint>() else {
            eprintln!(
                "deeptime: warning: skipping a timeline sample at generation {:?}",
                sample.generation
            );
            continue;
        };
        stored.push((
            generation,
            Sample::new(
                sample.generation,
                background_of(sample.background.as_deref()),
                sample.population,
                sample.bbox.map(|b| BoxReport {
                    left: b.left,
                    top: b.top,
                    width: b.width,
                    height: b.height,
                }),
                sample.digest,
            ),
        ));
    }
    stored.sort_by(|a, b| a.0.cmp(&b.0));
    stored.dedup_by(|a, b| a.0 == b.0);
    let Some(rule) = rule else {
        return Err(BadInput(format!("{}: no checkpoints", args.pattern.display())).into());
    };
    let gens = stored.last().map(|s| s.0.to_string()).unwrap_or_default();
    let report = TimelineReport {
        rule,
        gens,
        every: None,
        samples: stored.into_iter().map(|(_, sample)| sample).collect(),
        engine: None,
    };
    finish(report, args)
}

fn check_outputs(args: &TimelineArgs) -> Result<(), BadInput> {
    for (option, path, extension) in [("--csv", &args.csv, "csv"), ("--png", &args.png, "png")] {
        if let Some(path) = path {
            check_extension(option, path, extension)?;
        }
    }
    Ok(())
}

/// Writes the files asked for and prints the report.
fn finish(report: TimelineReport, args: &TimelineArgs) -> anyhow::Result<()> {
    let samples = &report.samples;
    if let Some(path) = &args.csv {
        output::write_whole(path, |writer| {
            write_csv(writer, samples).map_err(|error| {
                OutputFailed(format!("cannot write {}: {error}", path.display()))
            })?;
            Ok(())
        })?;
    }
    if let Some(path) = &args.png {
        let bytes = crate::timeline_plot::population_png(samples, &report.rule)
            .with_context(|| format!("--png {}", path.display()))?;
        output::write_whole(path, |writer| {
            writer.write_all(&bytes).map_err(|error| {
                OutputFailed(format!("cannot write {}: {error}", path.display()))
            })?;
            Ok(())
        })?;
    }
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
        return Ok(());
    }
    print_table(&report, &args.csv, &args.png);
    Ok(())
}

fn check_extension(option: &str, path: &Path, extension: &str) -> Result<(), BadInput> {
    let given = path.extension().and_then(|e| e.to_str()).unwrap_or("");
    if !given.eq_ignore_ascii_case(extension) {
        return Err(BadInput(format!(
            "{option} {}: the file name must end in .{extension}",
            path.display()
        )));
    }
    Ok(())
}

/// The figures at 0, every, 2·every, … and `gens` (the last sample even
/// when `gens` is not a multiple of `every`).
pub fn sample(
    universe: &mut Universe,
    gens: &BigUint,
    every: &BigUint,
    mut advance: impl FnMut(&mut Universe, &BigUint) -> anyhow::Result<()>,
) -> anyhow::Result<Vec<Sample>> {
    let start = universe.generation().clone();
    let end = &start + gens;
    let mut samples = Vec::new();
    loop {
        samples.push(Sample::new(
            (universe.generation() - &start).to_string(),
            universe.background(),
            universe.population().to_string(),
            universe.bounding_box().as_ref().map(BoxReport::from),
            universe.digest()?.to_string(),
        ));
        let left = &end - universe.generation();
        if left.is_zero() {
            return Ok(samples);
        }
        let step = std::cmp::min(left, every.clone());
        let to = universe.generation() + &step;
        advance(universe, &step).with_context(|| format!("advancing to generation {to}"))?;
    }
}

/// The samples as CSV under [`CSV_HEADER`]; a state with no live cell has
/// its four bounding-box fields empty.
pub fn write_csv(out: &mut impl Write, samples: &[Sample]) -> std::io::Result<()> {
    writeln!(out, "{CSV_HEADER}")?;
    for sample in samples {
        let (left, top, width, height) = match &sample.bbox {
            Some(b) => (&*b.left, &*b.top, &*b.width, &*b.height),
            None => ("", "", "", ""),
        };
        writeln!(
            out,
            "{},{},{left},{top},{width},{height},{},{},{}",
            sample.generation,
            sample.population,
            sample.digest,
            sample.background,
            sample.dead_cells.as_deref().unwrap_or("")
        )?;
    }
    Ok(())
}

fn print_table(report: &TimelineReport, csv: &Option<PathBuf>, png: &Option<PathBuf>) {
    let shown = |decimal: &str| for_people(decimal);
    let width = report
        .samples
        .iter()
        .map(|s| shown(&s.generation).chars().count())
        .max()
        .unwrap_or(10)
        .max(10);
    let counts = report
        .samples
        .iter()
        .map(|s| {
            population_for_people(&s.population, s.dead_cells.as_deref())
                .chars()
                .count()
        })
        .max()
        .unwrap_or(10)
        .max(10);
    println!(
        "{:<width$}  {:>counts$}  {:<32}  bounding box",
        "generation", "population", "digest"
    );
    for sample in &report.samples {
        let bbox = match &sample.bbox {
            Some(b) => box_for_people(&b.left, &b.top, &b.width, &b.height),
            None => "none".to_string(),
        };
        println!(
            "{:<width$}  {:>counts$}  {:<32}  {bbox}",
            shown(&sample.generation),
            population_for_people(&sample.population, sample.dead_cells.as_deref()),
            sample.digest
        );
    }
    match &report.engine {
        Some(engine) => println!(
            "{} samples, rule {}; engine {:.3} s, {} quads created, {} live in {}",
            report.samples.len(),
            report.rule,
            engine.seconds,
            engine.quads_created,
            engine.quads,
            human_bytes(engine.bytes)
        ),
        None => println!(
            "{} stored generations, rule {}",
            report.samples.len(),
            report.rule
        ),
    }
    for (what, path) in [("CSV", csv), ("plot", png)] {
        if let Some(path) = path {
            println!("{what} written to {}", path.display());
        }
    }
}

/// A decimal's value as f64 when it is finite, for plotting.
pub fn as_f64(decimal: &str) -> Option<f64> {
    let value: BigUint = decimal.parse().ok()?;
    value.to_f64().filter(|v| v.is_finite())
}
