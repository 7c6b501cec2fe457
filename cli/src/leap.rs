//! `deeptime leap`: read a pattern, advance it, report and optionally
//! write the result.

use std::path::Path;
use std::time::Instant;

use anyhow::Context;
use deeptime_engine::finite::Space;
use deeptime_engine::generation::parse_generations;
use deeptime_engine::{Progress, Universe, WriteError};

use crate::cli::LeapArgs;
use crate::failure::BadInput;
use deeptime_coordinator::progress;
use deeptime_coordinator::report::Report;
use deeptime_coordinator::{input, memory, output};

pub fn run(args: LeapArgs) -> anyhow::Result<()> {
    // Validate everything the user typed before any work starts.
    let generations =
        parse_generations(&args.gens).map_err(|error| BadInput(format!("--gens: {error}")))?;
    let budget = memory::budget(args.memory.as_deref())?;
    let loaded = input::read(&args.pattern, budget)?;
    let rule = input::rule(args.rule.as_deref(), &loaded)?;
    if let Some(out) = &args.out {
        check_output_path(out)?;
    }
    let region = args
        .region
        .as_deref()
        .map(crate::snapshot::parse_region)
        .transpose()?;
    let space = args.universe.space()?;

    let started = Instant::now();
    let origin = loaded.pattern.origin.unwrap_or((0, 0));
    let name = loaded.name.clone();
    let mut universe = input::build(loaded, rule, budget)?;
    let line = progress::Line::start("advancing");
    let mut observe = |progress: &Progress| line.update(progress);
    let advanced = input::advance(
        &mut universe,
        space,
        origin,
        &generations,
        budget,
        Some(&mut observe),
    );
    line.finish();
    let period = advanced.with_context(|| match space {
        Space::Plane => format!("advancing {} generations", args.gens),
        space => format!("{name} in the {space}"),
    })?;
    let elapsed = started.elapsed();

    let mut picture = None;
    if let Some(out) = &args.out {
        if is_png(out) {
            picture = Some(crate::snapshot::picture_of_universe(
                &mut universe,
                out,
                args.scale,
                &args.shade,
            )?);
        } else {
            write_rle(&mut universe, out)?;
        }
    }
    let mut report = Report::of(&mut universe, elapsed)?;
    report.picture = picture;
    if space != Space::Plane {
        report.universe = Some(space.to_string());
        report.period = period.map(|period| period.to_string());
    }
    if let Some(region) = &region {
        let figures = universe
            .region_figures(region)
            .with_context(|| format!("--region {}", args.region.as_deref().unwrap_or("")))?;
        report.region = Some(deeptime_coordinator::report::RegionReport::of(
            region,
            figures,
            universe.background(),
        ));
    }
    report.print(args.json)
}

fn is_png(out: &Path) -> bool {
    let extension = out.extension().and_then(|e| e.to_str()).unwrap_or("");
    extension.eq_ignore_ascii_case("png")
}

fn check_output_path(out: &Path) -> Result<(), BadInput> {
    let extension = out.extension().and_then(|e| e.to_str()).unwrap_or("");
    if !extension.eq_ignore_ascii_case("rle") && !is_png(out) {
        return Err(BadInput(format!(
            "--out {}: write .rle or .png",
            out.display()
        )));
    }
    Ok(())
}

/// Writes the final pattern as RLE, whole or not at all.
fn write_rle(universe: &mut Universe, out: &Path) -> anyhow::Result<()> {
    output::write_whole(out, |writer| match universe.write_rle(writer) {
        Ok(()) => Ok(()),
        Err(WriteError::Io(error)) => {
            Err(error).with_context(|| format!("cannot write {}", out.display()))
        }
        Err(error) => Err(error).with_context(|| format!("--out {}", out.display())),
    })
}
