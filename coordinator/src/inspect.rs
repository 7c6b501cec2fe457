//! Commands over a run's storage: `checkpoints` lists the stored
//! generations, `verify` reads every one back whole.

use anyhow::bail;
use serde::Serialize;

use crate::checkpoint::Checkpoints;
use crate::cli::DirArgs;

#[derive(Serialize)]
struct Row {
    sequence: u64,
    generation: String,
    population: String,
    digest: String,
    pack_bytes: u64,
}

pub fn list(args: DirArgs) -> anyhow::Result<()> {
    let checkpoints = Checkpoints::new(deeptime_node::storage::open(&args.dir)?);
    let mut rows = Vec::new();
    for key in checkpoints.manifest_keys()? {
        let manifest = match checkpoints.manifest(&key) {
            Ok(manifest) => manifest,
            // Another format version is no damage: say so and stop.
            Err(error)
                if error
                    .chain()
                    .any(|cause| cause.is::<crate::failure::BadInput>()) =>
            {
                return Err(error);
            }
            Err(error) => {
                eprintln!("deeptime: warning: skipping damaged checkpoint: {error:#}");
                continue;
            }
        };
        rows.push(Row {
            sequence: manifest.sequence,
            pack_bytes: manifest.pack_bytes(),
            generation: manifest.generation,
            population: manifest.population,
            digest: manifest.root,
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
        "{:>8}  {:>24}  {:>24}  {:32}  {:>12}",
        "sequence", "generation", "population", "digest", "pack bytes"
    );
    for row in rows {
        println!(
            "{:>8}  {:>24}  {:>24}  {:32}  {:>12}",
            row.sequence,
            short(&row.generation),
            short(&row.population),
            row.digest,
            row.pack_bytes
        );
    }
    Ok(())
}

pub fn verify(args: DirArgs) -> anyhow::Result<()> {
    let checkpoints = Checkpoints::new(deeptime_node::storage::open(&args.dir)?);
    let keys = checkpoints.manifest_keys()?;
    if keys.is_empty() {
        bail!("{}: no checkpoints to verify", args.dir.display());
    }
    let mut damaged = Vec::new();
    for key in &keys {
        let checked = checkpoints
            .manifest(key)
            .and_then(|manifest| checkpoints.load(manifest, crate::memory::budget(None)?));
        match checked {
            Ok(loaded) => println!(
                "ok       checkpoint {} generation {} digest {}",
                loaded.manifest.sequence, loaded.manifest.generation, loaded.manifest.root
            ),
            Err(error) => {
                println!("DAMAGED  {key}: {error:#}");
                damaged.push(key.clone());
            }
        }
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

/// A decimal for a table column: whole when it fits, else its size.
fn short(decimal: &str) -> String {
    if decimal.len() <= 24 {
        return decimal.to_string();
    }
    format!("{}.{}e{}", &decimal[..1], &decimal[1..4], decimal.len() - 1)
}

pub fn prune(args: crate::cli::PruneArgs) -> anyhow::Result<()> {
    let checkpoints = Checkpoints::new(deeptime_node::storage::open(&args.dir)?);
    let _lock = checkpoints.lock()?;
    let (manifests, packs) = checkpoints.prune(args.keep)?;
    println!(
        "deleted {manifests} checkpoints and {packs} packs from {}; kept the newest {}",
        args.dir.display(),
        args.keep.max(1)
    );
    Ok(())
}
