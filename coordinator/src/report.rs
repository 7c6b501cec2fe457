//! The figures of a state, as one JSON object or a short human summary.
//! Numbers a user relies on (generation, population, coordinates) are
//! decimal strings: they can be astronomically large.
//!
//! Under a B0 rule the background (every cell far from the pattern) is
//! alive at some generations. Then the population is the string
//! `infinite`, and `dead_cells`, the bounding box and the digest are of the
//! cells that differ from the background: the dead ones.

use crate::numbers::{box_for_people, for_people};
use std::time::Duration;

use deeptime_engine::rule::Background;
use deeptime_engine::{Universe, human_bytes};
use num_bigint::BigUint;
use serde::Serialize;

#[derive(Serialize, Debug)]
pub struct Report {
    pub generation: String,
    /// `dead` or `alive`: the state of every cell far from the pattern
    pub background: &'static str,
    /// live cells, or `infinite` when the background is alive
    pub population: String,
    /// the cells that are dead, when the background is alive
    #[serde(skip_serializing_if = "Option::is_none")]
    pub dead_cells: Option<String>,
    /// the extent of the cells that differ from the background
    pub bbox: Option<BoxReport>,
    pub rule: String,
    pub digest: String,
    pub engine: EngineReport,
    /// bytes read from a run's storage (snapshots only)
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bytes_read: Option<u64>,
    /// bytes of all packs the checkpoint read from needs (snapshots only)
    #[serde(skip_serializing_if = "Option::is_none")]
    pub pack_bytes: Option<u64>,
    /// the figures of `--region`'s rectangle (snapshots with --region only)
    #[serde(skip_serializing_if = "Option::is_none")]
    pub region: Option<RegionReport>,
    /// the pixel grid of a picture written (snapshots with --out x.png)
    #[serde(skip_serializing_if = "Option::is_none")]
    pub picture: Option<PictureReport>,
    /// the bounded universe the pattern lives in (`torus WxH`, `bounded
    /// WxH`); absent on the unbounded plane
    #[serde(skip_serializing_if = "Option::is_none")]
    pub universe: Option<String>,
    /// the period of the cycle a bounded universe's history ends in, when
    /// the run saw it
    #[serde(skip_serializing_if = "Option::is_none")]
    pub period: Option<String>,
}

/// Where a picture's pixels lie: pixel (c, r) is the square of 2^scale
/// cells a side whose top-left cell is (left + c·2^scale, top + r·2^scale).
#[derive(Serialize, Debug, Clone)]
pub struct PictureReport {
    pub left: String,
    pub top: String,
    pub scale: u32,
    pub columns: u32,
    pub rows: u32,
    pub shade: &'static str,
}

/// The rectangle asked for and the live cells inside it.
#[derive(Serialize, Debug)]
pub struct RegionReport {
    pub left: String,
    pub top: String,
    pub width: String,
    pub height: String,
    pub population: String,
    /// the extent of the cells inside that differ from the background
    pub bbox: Option<BoxReport>,
}

impl RegionReport {
    /// The report of `region`, given the count and extent of the cells in
    /// it that differ from `background`.
    pub fn of(
        region: &deeptime_engine::Region,
        (differing, bbox): (u64, Option<deeptime_engine::BoundingBox>),
        background: Background,
    ) -> RegionReport {
        let population = match background {
            Background::Dead => BigUint::from(differing),
            Background::Alive => {
                BigUint::from(region.width) * BigUint::from(region.height) - differing
            }
        };
        RegionReport {
            left: region.left.to_string(),
            top: region.top.to_string(),
            width: region.width.to_string(),
            height: region.height.to_string(),
            population: population.to_string(),
            bbox: bbox.as_ref().map(BoxReport::from),
        }
    }
}

/// The population of a state whose cells that differ from the background
/// number `differing`, and the count of its dead cells when the background
/// is alive (see the module documentation).
pub fn population(background: Background, differing: String) -> (String, Option<String>) {
    match background {
        Background::Dead => (differing, None),
        Background::Alive => (INFINITE.to_string(), Some(differing)),
    }
}

/// The population of a state on an alive background.
pub const INFINITE: &str = "infinite";

/// Sets a job status's population, background and dead cells from the
/// count of cells that differ from `background`.
pub fn show_population(
    status: &mut deeptime_proto::v1::JobStatus,
    background: Background,
    differing: String,
) {
    let (population, dead_cells) = population(background, differing);
    status.population = population;
    status.dead_cells = dead_cells;
    status.background = background.name().to_string();
}

/// A population as tables and status lines show it: the number, or on an
/// alive background `infinite; N dead`.
pub fn population_for_people(population: &str, dead_cells: Option<&str>) -> String {
    match dead_cells {
        None => for_people(population),
        Some(dead) => format!("{INFINITE}; {} dead", for_people(dead)),
    }
}

#[derive(Serialize, Debug)]
pub struct BoxReport {
    pub left: String,
    pub top: String,
    pub width: String,
    pub height: String,
}

impl From<&deeptime_engine::BoundingBox> for BoxReport {
    fn from(bbox: &deeptime_engine::BoundingBox) -> BoxReport {
        BoxReport {
            left: bbox.left.to_string(),
            top: bbox.top.to_string(),
            width: bbox.width.to_string(),
            height: bbox.height.to_string(),
        }
    }
}

/// What the engine did to get there.
#[derive(Serialize, Debug)]
pub struct EngineReport {
    /// quads allocated now (live or not yet collected)
    pub quads: u64,
    /// of which leaves (8×8 cells)
    pub leaves: u64,
    /// quads created in all
    pub quads_created: u64,
    /// bytes held by the quad store now
    pub bytes: u64,
    /// the memory budget in bytes
    pub budget: u64,
    /// collections run
    pub collections: u64,
    /// times the residual memo was dropped for want of budget
    pub memo_resets: u64,
    /// level of the root quad
    pub root_level: u32,
    /// wall time of the advance, in seconds
    pub seconds: f64,
}

impl EngineReport {
    /// What `universe`'s store holds and did, after `elapsed` of work.
    pub fn of(universe: &Universe, elapsed: Duration) -> EngineReport {
        let stats = universe.store_stats();
        EngineReport {
            quads: stats.quads,
            leaves: stats.leaves,
            quads_created: stats.created,
            bytes: stats.bytes,
            budget: stats.budget,
            collections: stats.collections,
            memo_resets: stats.memo_resets,
            root_level: universe.root_level(),
            seconds: elapsed.as_secs_f64(),
        }
    }
}

impl EngineReport {
    /// The figures as the reports print them: time, quads and memory.
    pub fn summary(&self) -> String {
        let mut text = format!(
            "{:.3} s, {} quads created, {} live in {}, {} collections",
            self.seconds,
            self.quads_created,
            self.quads,
            human_bytes(self.bytes),
            self.collections
        );
        if self.memo_resets > 0 {
            text.push_str(&format!(", {} memo resets", self.memo_resets));
        }
        text
    }
}

impl Report {
    pub fn of(universe: &mut Universe, elapsed: Duration) -> anyhow::Result<Report> {
        let digest = universe.digest()?;
        let engine = EngineReport::of(universe, elapsed);
        let background = universe.background();
        let (population, dead_cells) = population(background, universe.population().to_string());
        Ok(Report {
            generation: universe.generation().to_string(),
            background: background.name(),
            population,
            dead_cells,
            bbox: universe.bounding_box().as_ref().map(BoxReport::from),
            rule: universe.rule().to_string(),
            digest: digest.to_string(),
            engine,
            bytes_read: None,
            pack_bytes: None,
            region: None,
            picture: None,
            universe: None,
            period: None,
        })
    }

    pub fn print(&self, json: bool) -> anyhow::Result<()> {
        if json {
            println!("{}", serde_json::to_string(self)?);
            return Ok(());
        }
        println!("generation    {}", for_people(&self.generation));
        let (cells, of) = match &self.dead_cells {
            None => {
                println!("population    {}", for_people(&self.population));
                ("live", "")
            }
            Some(dead) => {
                println!(
                    "population    infinite: the background is alive, and {} cells are dead",
                    for_people(dead)
                );
                ("dead", " of the dead cells")
            }
        };
        match &self.bbox {
            None => println!("bounding box  none (no {cells} cells)"),
            Some(bbox) => println!(
                "bounding box  {}{of}",
                box_for_people(&bbox.left, &bbox.top, &bbox.width, &bbox.height)
            ),
        }
        println!("rule          {}", self.rule);
        if let Some(universe) = &self.universe {
            match &self.period {
                Some(period) if period == "1" => {
                    println!("universe      {universe} (its history has come to rest)")
                }
                Some(period) => println!(
                    "universe      {universe} (its history repeats every {} generations)",
                    for_people(period)
                ),
                None => println!("universe      {universe}"),
            }
        }
        println!("digest        {}", self.digest);
        let engine = &self.engine;
        println!("engine        {}", engine.summary());
        if let Some(region) = &self.region {
            let inside = match &region.bbox {
                Some(b) => box_for_people(&b.left, &b.top, &b.width, &b.height),
                None => "none".to_string(),
            };
            println!(
                "region        {}: {} live cells, bounding box {inside}",
                box_for_people(&region.left, &region.top, &region.width, &region.height),
                for_people(&region.population)
            );
        }
        if let (Some(read), Some(packs)) = (self.bytes_read, self.pack_bytes) {
            println!(
                "storage       {} read; the checkpoint's packs hold {}",
                human_bytes(read),
                human_bytes(packs)
            );
        }
        Ok(())
    }
}
