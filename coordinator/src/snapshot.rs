//! `deeptime snapshot DIR --gen G`: the state at any generation of a stored
//! run — the stored one if G is stored, else the nearest earlier one
//! advanced to G — as figures, as RLE of a region, or as a picture.
//!
//! A stored generation is read on demand: the figures come from its
//! manifest (checked against its root record), and a region or picture
//! reads only the chunks of the quads it needs. A generation between
//! checkpoints needs the whole earlier state, read and checked whole, to
//! advance it.

use std::io::Write;
use std::path::Path;
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{Context, bail};
use deeptime_engine::generation::parse_generations;
use deeptime_engine::render::Picture;
use deeptime_engine::stored::StoredState;
use deeptime_engine::{BoundingBox, Progress, Region, Universe};
use num_bigint::{BigInt, BigUint};

use crate::checkpoint::{Checkpoints, Manifest};
use crate::cli::SnapshotArgs;
use crate::failure::BadInput;
use crate::numbers::for_people;
use crate::report::{BoxReport, EngineReport, Report};
use crate::{memory, output, progress};
use deeptime_node::storage::Counting;

/// Pictures are at most this many pixels on their longer side by default.
const DEFAULT_PICTURE: u64 = 1024;

pub fn run(args: SnapshotArgs) -> anyhow::Result<()> {
    let generation =
        parse_generations(&args.generation).map_err(|error| BadInput(format!("--gen: {error}")))?;
    let region = args.region.as_deref().map(parse_region).transpose()?;
    let budget = memory::budget(args.memory.as_deref())?;
    let started = Instant::now();
    // Every byte read from the run's storage is counted, for the report.
    let counted = Arc::new(Counting::new(deeptime_node::storage::open(&args.dir)?));
    let checkpoints = Checkpoints::new(Box::new(counted.clone()));
    let keys = checkpoints.manifest_keys()?;
    if keys.is_empty() {
        bail!("{}: no checkpoints", args.dir.display());
    }
    // The stored generations at or before G, newest first; damaged
    // manifests and checkpoints are skipped with a warning.
    let mut candidates = Vec::new();
    let mut earliest: Option<BigUint> = None;
    for key in &keys {
        let manifest = match checkpoints.manifest(key) {
            Ok(manifest) => manifest,
            Err(error) if stops(&error) => return Err(error),
            Err(error) => {
                eprintln!("deeptime: warning: skipping damaged checkpoint: {error:#}");
                continue;
            }
        };
        let stored = manifest.generation()?;
        if earliest.as_ref().is_none_or(|e| &stored < e) {
            earliest = Some(stored.clone());
        }
        if stored <= generation {
            candidates.push((stored, manifest));
        }
    }
    candidates.sort_by(|a, b| b.0.cmp(&a.0));
    if candidates.is_empty() {
        return Err(BadInput(format!(
            "no checkpoint at or before generation {generation} (the earliest is {})",
            earliest
                .map(|e| e.to_string())
                .unwrap_or_else(|| "none".to_string())
        ))
        .into());
    }
    let mut opened = None;
    for (stored, manifest) in candidates {
        let pack_bytes = manifest.pack_bytes();
        if stored == generation {
            // Stored: read on demand.
            match from_stored(&checkpoints, &manifest, &args, region.as_ref(), budget) {
                Ok(Some(mut report)) => {
                    report.engine.seconds = started.elapsed().as_secs_f64();
                    report.bytes_read = Some(counted.bytes_read());
                    report.pack_bytes = Some(pack_bytes);
                    return report.print(args.json);
                }
                Ok(None) => {} // a state within one leaf: read whole below
                Err(error) => {
                    if stops(&error) {
                        return Err(error);
                    }
                    eprintln!("deeptime: warning: skipping damaged checkpoint: {error:#}");
                    continue;
                }
            }
        }
        match checkpoints.load(manifest, budget) {
            Ok(loaded) => {
                opened = Some((stored, loaded.universe, pack_bytes));
                break;
            }
            Err(error) => {
                if stops(&error) {
                    return Err(error);
                }
                eprintln!("deeptime: warning: skipping damaged checkpoint: {error:#}");
            }
        }
    }
    let Some((stored, mut universe, pack_bytes)) = opened else {
        bail!(
            "no undamaged checkpoint at or before generation {}",
            for_people(&generation.to_string())
        );
    };
    if stored < generation {
        let steps = &generation - &stored;
        eprintln!(
            "deeptime: advancing from the checkpoint at generation {}",
            for_people(&stored.to_string())
        );
        let line = progress::Line::start("advancing");
        let mut observe = |progress: &Progress| line.update(progress);
        let advanced = universe.advance(&steps, Some(&mut observe));
        line.finish();
        advanced.with_context(|| format!("advancing {steps} generations"))?;
    }
    if let Some(out) = &args.out {
        let bbox = universe.bounding_box();
        write_out(
            &mut Source::Memory(&mut universe),
            bbox,
            out,
            region.as_ref(),
            args.scale,
        )?;
    }
    let mut report = Report::of(&mut universe, started.elapsed())?;
    report.bytes_read = Some(counted.bytes_read());
    report.pack_bytes = Some(pack_bytes);
    report.print(args.json)
}

/// Errors that end the snapshot rather than send it to an earlier
/// checkpoint: a budget too small, a checkpoint of another version, bad
/// options.
fn stops(error: &anyhow::Error) -> bool {
    error
        .chain()
        .any(|cause| cause.is::<deeptime_engine::BudgetExceeded>() || cause.is::<BadInput>())
}

/// The snapshot of a stored generation read on demand: the figures from
/// its manifest, checked against its root record, and the output from the
/// quads it needs. None when the state lies within one leaf (then reading
/// it whole costs as little).
fn from_stored(
    checkpoints: &Checkpoints,
    manifest: &Manifest,
    args: &SnapshotArgs,
    region: Option<&Region>,
    budget: u64,
) -> anyhow::Result<Option<Report>> {
    let mut parts = checkpoints.open_stored(manifest)?;
    let mut state = parts.state()?;
    if state.root_level() <= 3 {
        return Ok(None);
    }
    let bbox = manifest.bbox.as_ref().map(|b| b.parse()).transpose()?;
    if let Some(out) = &args.out {
        write_out(
            &mut Source::Stored(&mut state),
            bbox,
            out,
            region,
            args.scale,
        )?;
    }
    Ok(Some(Report {
        generation: manifest.generation.clone(),
        population: manifest.population.clone(),
        bbox: manifest.bbox.as_ref().map(|bbox| BoxReport {
            left: bbox.left.clone(),
            top: bbox.top.clone(),
            width: bbox.width.clone(),
            height: bbox.height.clone(),
        }),
        rule: manifest.rule.clone(),
        digest: manifest.root.clone(),
        engine: EngineReport {
            quads: state.records_decoded,
            leaves: state.leaves_decoded,
            quads_created: state.records_decoded,
            bytes: 0,
            budget,
            collections: 0,
            root_level: state.root_level().max(5),
            seconds: Duration::ZERO.as_secs_f64(),
        },
        bytes_read: None,
        pack_bytes: None,
    }))
}

/// What a snapshot draws from: a state in memory, or a stored one read on
/// demand.
enum Source<'a, 'f> {
    Memory(&'a mut Universe),
    Stored(&'a mut StoredState<'f>),
}

impl Source<'_, '_> {
    fn rule(&self) -> String {
        match self {
            Source::Memory(universe) => universe.rule().to_string(),
            Source::Stored(state) => state.rule().to_string(),
        }
    }

    fn write_rle_region(&mut self, out: &mut impl Write, region: &Region) -> anyhow::Result<()> {
        match self {
            Source::Memory(universe) => universe.write_rle_region(out, region)?,
            Source::Stored(state) => state.write_rle_region(out, region)?,
        }
        Ok(())
    }

    fn picture(
        &mut self,
        left: &BigInt,
        top: &BigInt,
        columns: u64,
        rows: u64,
        scale: u32,
    ) -> anyhow::Result<Picture> {
        Ok(match self {
            Source::Memory(universe) => universe.picture(left, top, columns, rows, scale)?,
            Source::Stored(state) => state.picture(left, top, columns, rows, scale)?,
        })
    }
}

fn parse_region(text: &str) -> Result<Region, BadInput> {
    let bad = || {
        BadInput(format!(
            "--region {text:?}: expected LEFT,TOP,WIDTH,HEIGHT (integers, width and height ≥ 0)"
        ))
    };
    let parts: Vec<&str> = text.split(',').map(str::trim).collect();
    let [left, top, width, height] = parts.as_slice() else {
        return Err(bad());
    };
    Ok(Region {
        left: left.parse::<BigInt>().map_err(|_| bad())?,
        top: top.parse::<BigInt>().map_err(|_| bad())?,
        width: width.parse().map_err(|_| bad())?,
        height: height.parse().map_err(|_| bad())?,
    })
}

fn write_out(
    source: &mut Source,
    bbox: Option<BoundingBox>,
    out: &Path,
    region: Option<&Region>,
    scale: Option<u32>,
) -> anyhow::Result<()> {
    let extension = out
        .extension()
        .and_then(|e| e.to_str())
        .unwrap_or("")
        .to_ascii_lowercase();
    output::write_whole(out, |writer| match extension.as_str() {
        "rle" => match region {
            Some(region) => source.write_rle_region(writer, region),
            // The whole state: the region of its bounding box.
            None => match &bbox {
                Some(bbox) => source.write_rle_region(writer, &Region::of_box(bbox)?),
                None => {
                    deeptime_engine::pattern::write::write_rle(writer, 0, 0, &source.rule(), [])?;
                    Ok(())
                }
            },
        }
        .with_context(|| format!("--out {}", out.display())),
        "png" => draw(source, bbox, writer, region, scale)
            .with_context(|| format!("--out {}", out.display())),
        _ => Err(BadInput(format!("--out {}: write .rle or .png", out.display())).into()),
    })
}

/// A grey picture: white where nothing lives, darker the denser.
fn draw(
    source: &mut Source,
    bbox: Option<BoundingBox>,
    writer: &mut impl Write,
    region: Option<&Region>,
    scale: Option<u32>,
) -> anyhow::Result<()> {
    let (left, top, width, height) = match region {
        Some(region) => (
            region.left.clone(),
            region.top.clone(),
            BigUint::from(region.width),
            BigUint::from(region.height),
        ),
        None => match bbox {
            Some(bbox) => (bbox.left, bbox.top, bbox.width, bbox.height),
            None => (
                BigInt::from(0),
                BigInt::from(0),
                BigUint::from(1u32),
                BigUint::from(1u32),
            ),
        },
    };
    // The scale: as given, else the smallest that fits the default size.
    let longer = std::cmp::max(width.clone(), height.clone());
    let scale = scale.unwrap_or_else(|| {
        let mut scale = 0;
        while (&longer >> scale) > BigUint::from(DEFAULT_PICTURE) {
            scale += 1;
        }
        scale
    });
    // Pixels start at multiples of 2^scale at or before the corner, so
    // count them from there: every cell of the region is drawn.
    let pixel = BigInt::from(1u32) << scale;
    let pixels = |start: &BigInt, cells: &BigUint| -> u64 {
        let before = ((start % &pixel) + &pixel) % &pixel; // start mod 2^scale, ≥ 0
        let span = before + BigInt::from(cells.clone());
        let whole: BigInt = (span + &pixel - 1u32) >> scale;
        u64::try_from(whole).unwrap_or(u64::MAX)
    };
    let (columns, rows) = (pixels(&left, &width), pixels(&top, &height));
    if columns == 0 || rows == 0 {
        return Err(BadInput("the region to draw is empty".to_string()).into());
    }
    let picture = source.picture(&left, &top, columns, rows, scale)?;
    let mut encoder = png::Encoder::new(writer, picture.columns.max(1), picture.rows.max(1));
    encoder.set_color(png::ColorType::Grayscale);
    encoder.set_depth(png::BitDepth::Eight);
    let mut png = encoder.write_header()?;
    let grey: Vec<u8> = if picture.shares.is_empty() {
        vec![255]
    } else {
        picture
            .shares
            .iter()
            .map(|&share| {
                if share <= 0.0 {
                    255
                } else {
                    (223.0 - 223.0 * share.min(1.0)) as u8
                }
            })
            .collect()
    };
    png.write_image_data(&grey)?;
    png.finish()?;
    Ok(())
}
