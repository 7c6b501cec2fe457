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
use deeptime_engine::render::{MAX_PIXELS, Picture};
use deeptime_engine::rule::Background;
use deeptime_engine::stored::StoredState;
use deeptime_engine::{BoundingBox, Progress, Region, Universe};
use num_bigint::{BigInt, BigUint};

use crate::cli::SnapshotArgs;
use crate::failure::{BadInput, OutputFailed};
use deeptime_coordinator::numbers::for_people;
use deeptime_coordinator::report::{
    self, BoxReport, EngineReport, PictureReport, RegionReport, Report,
};
use deeptime_coordinator::{input, memory, output, progress};
use deeptime_storage::Counting;
use deeptime_storage::checkpoint::{CheckpointError, Checkpoints, Manifest};

/// Pictures are at most this many pixels on their longer side by default.
const DEFAULT_PICTURE: u64 = 1024;

pub fn run(args: SnapshotArgs) -> anyhow::Result<()> {
    let generation =
        parse_generations(&args.generation).map_err(|error| BadInput(format!("--gen: {error}")))?;
    let region = args.region.as_deref().map(parse_region).transpose()?;
    let shade = Shade::parse(&args.shade)?;
    if let Some(out) = &args.out {
        check_out(out, region.as_ref(), args.scale)?;
    }
    let budget = memory::budget(args.memory.as_deref())?;
    let started = Instant::now();
    // Every byte read from the run's storage is counted, for the report.
    let counted = Arc::new(Counting::new(deeptime_storage::checkpoint::open_existing(
        &args.dir,
    )?));
    let checkpoints = Checkpoints::new(Box::new(counted.clone()));
    let keys = checkpoints.manifest_keys()?;
    if keys.is_empty() {
        bail!("{}: no checkpoints", args.dir.display());
    }
    // The newest checkpoint at or before G, found by bisection (the
    // generations grow with the sequence), so only a handful of manifests
    // are read; then the earlier ones, newest first, should it be damaged.
    let last = last_at_or_before(&checkpoints, &keys, &generation)?;
    let mut candidates = keys[..last.unwrap_or(0)]
        .iter()
        .rev()
        .filter_map(|key| match checkpoints.manifest(key) {
            Ok(manifest) => match manifest.generation() {
                Ok(stored) => (stored <= generation).then_some(Ok((stored, manifest))),
                Err(error) => Some(Err(error)),
            },
            Err(error) if !error.is_damage() => Some(Err(error)),
            Err(error) => {
                eprintln!("deeptime: warning: skipping damaged checkpoint: {error}");
                None
            }
        });
    let mut opened = None;
    for candidate in &mut candidates {
        let (stored, manifest) = candidate?;
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
                let lives = (loaded.manifest.universe.clone(), loaded.manifest.origin);
                opened = Some((stored, loaded.universe, pack_bytes, lives));
                break;
            }
            Err(error) if !error.is_damage() => return Err(error.into()),
            Err(error) => eprintln!("deeptime: warning: skipping damaged checkpoint: {error}"),
        }
    }
    drop(candidates);
    let Some((stored, mut universe, pack_bytes, (space_text, origin))) = opened else {
        if last.is_none() {
            let earliest = earliest_generation(&checkpoints, &keys)
                .map_or_else(|| "none".to_string(), |e| for_people(&e.to_string()));
            return Err(BadInput(format!(
                "no checkpoint at or before generation {} (the earliest is {earliest})",
                for_people(&generation.to_string())
            ))
            .into());
        }
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
        // Where the run lives: the plane, or the bounded universe its
        // manifest names, with its top-left cell where it stood.
        let space = input::space(space_text.as_deref(), "the checkpoint's universe")?;
        let line = progress::Line::start("advancing");
        let mut observe = |progress: &Progress| line.update(progress);
        let advanced = input::advance(
            &mut universe,
            space,
            origin.unwrap_or((0, 0)),
            &steps,
            budget,
            Some(&mut observe),
        );
        line.finish();
        advanced.with_context(|| format!("advancing {steps} generations"))?;
    }
    let mut picture = None;
    if let Some(out) = &args.out {
        let bbox = universe.bounding_box();
        let digest = universe.digest()?;
        let note = format!("generation {}, digest {digest}", universe.generation());
        picture = write_out(
            &mut Source::Memory(&mut universe),
            bbox,
            note,
            out,
            region.as_ref(),
            (args.scale, shade),
        )?;
    }
    let mut report = Report::of(&mut universe, started.elapsed())?;
    report.picture = picture;
    report.universe = space_text;
    if let Some(region) = &region {
        let figures = universe
            .region_figures(region)
            .with_context(|| format!("--region {}", args.region.as_deref().unwrap_or("")))?;
        report.region = Some(RegionReport::of(region, figures, universe.background()));
    }
    report.bytes_read = Some(counted.bytes_read());
    report.pack_bytes = Some(pack_bytes);
    report.print(args.json)
}

/// One past the index of the newest key whose checkpoint is at or before
/// `generation` (None: every readable one is later). Bisects while the
/// manifests it reads are sound; a damaged one ends the bisection, and
/// the walk down from the bound found so far skips it.
fn last_at_or_before(
    checkpoints: &Checkpoints,
    keys: &[String],
    generation: &BigUint,
) -> anyhow::Result<Option<usize>> {
    // Invariant: keys[..low] may hold it; keys[high..] are all later.
    let (mut low, mut high) = (0, keys.len());
    while low < high {
        let middle = low + (high - low) / 2;
        let stored = match checkpoints.manifest(&keys[middle]) {
            Ok(manifest) => manifest.generation()?,
            Err(error) if !error.is_damage() => return Err(error.into()),
            Err(_) => return Ok(Some(high)), // damaged: walk down from here
        };
        if &stored <= generation {
            low = middle + 1;
        } else {
            high = middle;
        }
    }
    Ok((high > 0).then_some(high))
}

/// The generation of the oldest readable checkpoint, for messages.
fn earliest_generation(checkpoints: &Checkpoints, keys: &[String]) -> Option<BigUint> {
    keys.iter()
        .find_map(|key| checkpoints.manifest(key).ok())
        .and_then(|manifest| manifest.generation().ok())
}

/// Errors that end the snapshot rather than send it to an earlier
/// checkpoint: all but damage of what was read (a budget too small, a
/// checkpoint of another version, bad options, an output that cannot be
/// written, a storage that fails).
fn stops(error: &anyhow::Error) -> bool {
    !CheckpointError::is_damage_in(error)
}

/// What can be known of `--out` before any work: its kind, its folder and,
/// for a region, its size.
fn check_out(out: &Path, region: Option<&Region>, scale: Option<u32>) -> anyhow::Result<()> {
    let kind = out_kind(out)?;
    let folder = output::folder_of(out);
    if !folder.is_dir() {
        return Err(BadInput(format!(
            "--out {}: the folder {} does not exist",
            out.display(),
            folder.display()
        ))
        .into());
    }
    if let Some(region) = region {
        let too_wide = deeptime_engine::pattern::MAX_COORDINATE;
        if kind == OutKind::Rle && (region.width > too_wide || region.height > too_wide) {
            return Err(BadInput(format!(
                "--out {}: the region is {}×{} cells, too large for RLE (at most {too_wide} each way)",
                out.display(),
                for_people(&region.width.to_string()),
                for_people(&region.height.to_string())
            ))
            .into());
        }
        if kind == OutKind::Png
            && let Some(scale) = scale
        {
            let width = BigUint::from(region.width);
            let height = BigUint::from(region.height);
            picture_fits(&region.left, &region.top, &width, &height, scale)
                .with_context(|| format!("--out {}", out.display()))?;
        }
    }
    Ok(())
}

/// What `--out` writes, by its extension.
#[derive(Clone, Copy, PartialEq, Eq)]
enum OutKind {
    Rle,
    Png,
}

fn out_kind(out: &Path) -> Result<OutKind, BadInput> {
    match out.extension().and_then(|e| e.to_str()) {
        Some(e) if e.eq_ignore_ascii_case("rle") => Ok(OutKind::Rle),
        Some(e) if e.eq_ignore_ascii_case("png") => Ok(OutKind::Png),
        _ => Err(BadInput(format!(
            "--out {}: write .rle or .png",
            out.display()
        ))),
    }
}

/// The pixels each way of a picture of the cells from (left, top), width ×
/// height, at `scale` (pixels start at multiples of 2^scale); a bad-input
/// error with the real size when it passes the largest picture drawn.
fn picture_fits(
    left: &BigInt,
    top: &BigInt,
    width: &BigUint,
    height: &BigUint,
    scale: u32,
) -> anyhow::Result<(u64, u64)> {
    let pixel = BigInt::from(1u32) << scale;
    let pixels = |start: &BigInt, cells: &BigUint| -> BigInt {
        let before = ((start % &pixel) + &pixel) % &pixel; // start mod 2^scale, ≥ 0
        let span = before + BigInt::from(cells.clone());
        (span + &pixel - 1u32) >> scale
    };
    let (columns, rows) = (pixels(left, width), pixels(top, height));
    let most = BigInt::from(MAX_PIXELS);
    if columns > most || rows > most {
        return Err(BadInput(format!(
            "a picture of {}×{} pixels is too large (at most {MAX_PIXELS} each way): give a larger --scale",
            for_people(&columns.to_string()),
            for_people(&rows.to_string())
        ))
        .into());
    }
    let small = |value: BigInt| u64::try_from(value).expect("at most MAX_PIXELS");
    Ok((small(columns), small(rows)))
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
    let shade = Shade::parse(&args.shade)?;
    let mut picture = None;
    if let Some(out) = &args.out {
        let note = format!(
            "generation {}, digest {}",
            manifest.generation, manifest.root
        );
        picture = write_out(
            &mut Source::Stored(&mut state),
            bbox,
            note,
            out,
            region,
            (args.scale, shade),
        )?;
    }
    let region_report = match region {
        Some(region) => Some(RegionReport::of(
            region,
            state.region_figures(region)?,
            state.background(),
        )),
        None => None,
    };
    let background = state.background();
    let (population, dead_cells) = report::population(background, manifest.population.clone());
    Ok(Some(Report {
        generation: manifest.generation.clone(),
        background: background.name(),
        population,
        dead_cells,
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
            memo_resets: 0,
            root_level: state.root_level().max(5),
            seconds: Duration::ZERO.as_secs_f64(),
        },
        bytes_read: None,
        pack_bytes: None,
        region: region_report,
        picture,
        universe: manifest.universe.clone(),
        period: None,
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

    fn write_rle_region(
        &mut self,
        out: &mut impl Write,
        region: &Region,
        note: &str,
    ) -> anyhow::Result<()> {
        match self {
            Source::Memory(universe) => universe.write_rle_noted(out, region, Some(note))?,
            Source::Stored(state) => state.write_rle_noted(out, region, Some(note))?,
        }
        Ok(())
    }

    fn background(&self) -> Background {
        match self {
            Source::Memory(universe) => universe.background(),
            Source::Stored(state) => state.background(),
        }
    }

    /// The picture of the live cells: where the background is alive, the
    /// stored cells are the dead ones, and each share is turned over.
    fn picture(
        &mut self,
        left: &BigInt,
        top: &BigInt,
        columns: u64,
        rows: u64,
        scale: u32,
    ) -> anyhow::Result<Picture> {
        let background = self.background();
        let mut picture = match self {
            Source::Memory(universe) => universe.picture(left, top, columns, rows, scale)?,
            Source::Stored(state) => state.picture(left, top, columns, rows, scale)?,
        };
        if background.is_alive() {
            for share in &mut picture.shares {
                *share = 1.0 - *share;
            }
        }
        Ok(picture)
    }
}

pub(crate) fn parse_region(text: &str) -> Result<Region, BadInput> {
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
    // "generation G, digest D" of the whole state, for the RLE's comment
    note: String,
    out: &Path,
    region: Option<&Region>,
    (scale, shade): (Option<u32>, Shade),
) -> anyhow::Result<Option<PictureReport>> {
    let kind = out_kind(out)?;
    let mut picture = None;
    let written = output::write_whole(out, |writer| match kind {
        OutKind::Rle => match region {
            Some(region) => {
                source.write_rle_region(writer, region, &format!("{note} (of the whole state)"))
            }
            // The whole state: the region of its bounding box.
            None => match &bbox {
                Some(bbox) => source.write_rle_region(writer, &Region::of_box(bbox)?, &note),
                None => {
                    let (rule, background) = (source.rule(), source.background());
                    deeptime_engine::pattern::write::write_empty_rle(writer, &rule, background)?;
                    Ok(())
                }
            },
        }
        .with_context(|| format!("--out {}", out.display())),
        OutKind::Png => draw(source, bbox, writer, region, scale, shade)
            .map(|grid| picture = Some(grid))
            .with_context(|| format!("--out {}", out.display())),
    });
    written.map_err(|error| as_output_error(error, out))?;
    Ok(picture)
}

/// Writes the picture of a state in memory (its bounding box) to `out`,
/// for `deeptime leap --out x.png`; returns where its pixels lie.
pub(crate) fn picture_of_universe(
    universe: &mut Universe,
    out: &Path,
    scale: Option<u32>,
    shade: &str,
) -> anyhow::Result<PictureReport> {
    let shade = Shade::parse(shade)?;
    check_out(out, None, scale)?;
    let bbox = universe.bounding_box();
    let mut grid = None;
    let written = output::write_whole(out, |writer| {
        grid = Some(
            draw(
                &mut Source::Memory(universe),
                bbox,
                writer,
                None,
                scale,
                shade,
            )
            .with_context(|| format!("--out {}", out.display()))?,
        );
        Ok(())
    });
    written.map_err(|error| as_output_error(error, out))?;
    Ok(grid.expect("drawn when written"))
}

/// How a picture's pixels are shaded.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Shade {
    /// grey by the logarithm of the live cells in the pixel: one cell is
    /// mid-grey, a full pixel black, so a lone glider in a wide state shows
    Log,
    /// black wherever any cell lives
    Any,
    /// grey by the share of live cells (a lone cell in a large pixel is
    /// nearly white)
    Share,
}

impl Shade {
    fn parse(text: &str) -> Result<Shade, BadInput> {
        match text {
            "log" => Ok(Shade::Log),
            "any" => Ok(Shade::Any),
            "share" => Ok(Shade::Share),
            _ => Err(BadInput(format!(
                "--shade {text:?}: expected log, any or share"
            ))),
        }
    }

    fn word(self) -> &'static str {
        match self {
            Shade::Log => "log",
            Shade::Any => "any",
            Shade::Share => "share",
        }
    }

    /// The grey (255 white) of a pixel of 4^scale cells, `share` of them live.
    fn grey(self, share: f32, scale: u32) -> u8 {
        if share <= 0.0 {
            return 255;
        }
        let share = share.min(1.0);
        match self {
            Shade::Any => 0,
            Shade::Share => (223.0 - 223.0 * share) as u8,
            Shade::Log => {
                // live cells from 1 to 4^scale, on a log scale from 160 to 0
                let cells = 4f64.powi(scale as i32);
                if cells <= 1.0 {
                    return 0;
                }
                let live = (f64::from(share) * cells).max(1.0);
                (160.0 - 160.0 * live.ln() / cells.ln())
                    .round()
                    .clamp(0.0, 160.0) as u8
            }
        }
    }
}

/// An error met while writing `--out`, told apart from damage of what was
/// read: a state too large for the output is bad input (the user picks
/// another region or scale), a failed write is an output failure; only a
/// stored quad that cannot be read stays what it is.
fn as_output_error(error: anyhow::Error, out: &Path) -> anyhow::Error {
    use deeptime_engine::WriteError;
    for cause in error.chain() {
        if cause.is::<BadInput>() || cause.is::<OutputFailed>() {
            return error;
        }
        let text = format!("--out {}: {cause}", out.display());
        match cause.downcast_ref::<WriteError>() {
            Some(WriteError::TooLarge(_)) => return BadInput(text).into(),
            Some(WriteError::Io(_)) => return OutputFailed(text).into(),
            _ => {}
        }
        use deeptime_engine::render::RenderError;
        if let Some(RenderError::TooLarge { .. } | RenderError::Scale(_)) =
            cause.downcast_ref::<RenderError>()
        {
            return BadInput(text).into();
        }
        if cause.is::<png::EncodingError>() {
            return OutputFailed(text).into();
        }
    }
    error
}

/// A grey picture: white where nothing lives, darker the denser.
fn draw(
    source: &mut Source,
    bbox: Option<BoundingBox>,
    writer: &mut impl Write,
    region: Option<&Region>,
    scale: Option<u32>,
    shade: Shade,
) -> anyhow::Result<PictureReport> {
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
    let (columns, rows) = picture_fits(&left, &top, &width, &height, scale)?;
    if columns == 0 || rows == 0 {
        return Err(BadInput("the region to draw is empty".to_string()).into());
    }
    let picture = source.picture(&left, &top, columns, rows, scale)?;
    // Pixels start at multiples of 2^scale (BigInt shifts round down).
    let grid = PictureReport {
        left: ((&left >> scale) << scale).to_string(),
        top: ((&top >> scale) << scale).to_string(),
        scale,
        columns: picture.columns.max(1),
        rows: picture.rows.max(1),
        shade: shade.word(),
    };
    let mut encoder = png::Encoder::new(writer, grid.columns, grid.rows);
    encoder.set_color(png::ColorType::Grayscale);
    encoder.set_depth(png::BitDepth::Eight);
    // The grid in text chunks, so the picture says where it lies.
    for (key, value) in [
        ("deeptime-left", grid.left.clone()),
        ("deeptime-top", grid.top.clone()),
        ("deeptime-scale", grid.scale.to_string()),
        ("deeptime-shade", grid.shade.to_string()),
    ] {
        encoder.add_text_chunk(key.to_string(), value)?;
    }
    let mut png = encoder.write_header()?;
    let grey: Vec<u8> = if picture.shares.is_empty() {
        vec![255]
    } else {
        picture
            .shares
            .iter()
            .map(|&share| shade.grey(share, scale))
            .collect()
    };
    png.write_image_data(&grey)?;
    png.finish()?;
    Ok(grid)
}
