//! Commands over a run's storage: `checkpoints` lists the stored
//! generations, `verify` reads every one back whole.

use std::path::Path;

use anyhow::bail;
use serde::Serialize;

use crate::cli::DirArgs;
use deeptime_coordinator::numbers::{box_for_people, for_people};
use deeptime_coordinator::report::population_for_people;
use deeptime_storage::checkpoint::Checkpoints;

fn open(dir: &Path) -> anyhow::Result<Checkpoints> {
    Ok(Checkpoints::new(
        deeptime_storage::checkpoint::open_existing(dir)?,
    ))
}

/// One checkpoint as `verify --json` reports it.
#[derive(Serialize)]
struct Checked {
    manifest: String,
    ok: bool,
    #[serde(skip_serializing_if = "Option::is_none")]
    sequence: Option<u64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    generation: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    digest: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    error: Option<String>,
}

#[derive(Serialize)]
struct Row {
    sequence: u64,
    generation: String,
    /// as in every report: `dead`, or `alive` under a B0 rule
    background: &'static str,
    /// live cells, or `infinite` on an alive background
    population: String,
    /// the dead cells, on an alive background
    #[serde(skip_serializing_if = "Option::is_none")]
    dead_cells: Option<String>,
    /// the extent of the cells that differ from the background, null when
    /// there are none
    bbox: Option<deeptime_storage::checkpoint::BoxText>,
    digest: String,
    /// bytes of every pack the checkpoint needs (its own and earlier ones)
    pack_bytes: u64,
    /// when its manifest was written, UTC (RFC 3339)
    written: String,
}

pub fn list(args: DirArgs) -> anyhow::Result<()> {
    let checkpoints = open(&args.dir)?;
    let mut rows = Vec::new();
    let readable = checkpoints.readable_manifests(|error| {
        eprintln!("deeptime: warning: skipping damaged checkpoint: {error}");
    })?;
    for (_, manifest) in readable {
        let written = std::time::UNIX_EPOCH + std::time::Duration::from_secs(manifest.written);
        let background = manifest.background()?;
        let (population, dead_cells) =
            deeptime_coordinator::report::population(background, manifest.population.clone());
        rows.push(Row {
            sequence: manifest.sequence,
            pack_bytes: manifest.pack_bytes(),
            generation: manifest.generation,
            background: background.name(),
            population,
            dead_cells,
            bbox: manifest.bbox,
            digest: manifest.root,
            written: humantime::format_rfc3339_seconds(written).to_string(),
        });
    }
    if args.json {
        println!("{}", serde_json::to_string(&rows)?);
        return Ok(());
    }
    if rows.is_empty() {
        println!("no checkpoints in {}", args.dir.display());
        return Ok(());
    }
    println!(
        "{:>8}  {:>24}  {:>24}  {:<40}  {:32}  {:>14}  {:20}",
        "sequence",
        "generation",
        "population",
        "bounding box",
        "digest",
        "packs needed",
        "written (UTC)"
    );
    for row in rows {
        let bbox = match &row.bbox {
            Some(bbox) => box_for_people(&bbox.left, &bbox.top, &bbox.width, &bbox.height),
            None => "none".to_string(),
        };
        let population = population_for_people(&row.population, row.dead_cells.as_deref());
        println!(
            "{:>8}  {:>24}  {:>24}  {:<40}  {:32}  {:>14}  {:20}",
            row.sequence,
            for_people(&row.generation),
            population,
            bbox,
            row.digest,
            deeptime_engine::human_bytes(row.pack_bytes),
            row.written
        );
    }
    Ok(())
}

pub fn verify(args: DirArgs) -> anyhow::Result<()> {
    let checkpoints = open(&args.dir)?;
    let keys = checkpoints.manifest_keys()?;
    if keys.is_empty() {
        bail!("{}: no checkpoints to verify", args.dir.display());
    }
    let budget = deeptime_coordinator::memory::budget(None)?;
    let mut damaged = Vec::new();
    let mut report = Vec::new();
    for key in &keys {
        let checked = checkpoints
            .manifest(key)
            .and_then(|manifest| checkpoints.load(manifest, budget));
        let row = match checked {
            Ok(loaded) => Checked {
                manifest: key.clone(),
                ok: true,
                sequence: Some(loaded.manifest.sequence),
                generation: Some(loaded.manifest.generation),
                digest: Some(loaded.manifest.root),
                error: None,
            },
            // A storage that fails, or a budget too small, says nothing
            // of the checkpoint: stop and say so.
            Err(error) if !error.is_damage() => return Err(error.into()),
            Err(error) => {
                damaged.push(key.clone());
                Checked {
                    manifest: key.clone(),
                    ok: false,
                    sequence: None,
                    generation: None,
                    digest: None,
                    error: Some(error.to_string()),
                }
            }
        };
        if !args.json {
            match (&row.sequence, &row.generation, &row.digest, &row.error) {
                (Some(sequence), Some(generation), Some(digest), _) => println!(
                    "ok       checkpoint {sequence} generation {generation} digest {digest}"
                ),
                (_, _, _, error) => {
                    println!("DAMAGED  {key}: {}", error.as_deref().unwrap_or(""))
                }
            }
        }
        report.push(row);
    }
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
    }
    if !damaged.is_empty() {
        bail!(
            "{} of {} checkpoints in {} are damaged: {}",
            damaged.len(),
            keys.len(),
            args.dir.display(),
            damaged.join(", ")
        );
    }
    Ok(())
}

pub fn prune(args: crate::cli::PruneArgs) -> anyhow::Result<()> {
    let checkpoints = open(&args.dir)?;
    let _lock = checkpoints.lock()?;
    let (manifests, packs) = checkpoints.prune(args.keep)?;
    println!(
        "deleted {manifests} checkpoints and {packs} packs from {}; kept the first and the newest {}",
        args.dir.display(),
        args.keep
    );
    Ok(())
}
