//! `deeptime fate`: what a pattern becomes — when it settles, at what
//! period and speed, and the census of what is left — or, when it has not
//! settled by the limit, how its population changes.

use std::time::Instant;

use deeptime_engine::fate::{self, CensusEntry, Fate, FateError, Growth, NotYet};
use deeptime_engine::finite::{Finite, Space};
use deeptime_engine::generation::parse_generations;
use deeptime_engine::rule::Background;
use num_bigint::BigUint;
use serde::Serialize;

use crate::cli::FateArgs;
use crate::failure::BadInput;
use deeptime_coordinator::numbers::{box_for_people, for_people};
use deeptime_coordinator::report::{self, BoxReport, EngineReport, population_for_people};
use deeptime_coordinator::{input, memory};

/// The limit when none is given: 2^20 generations.
pub const DEFAULT_LIMIT: &str = "2^20";

#[derive(Serialize, Debug)]
struct FateReport {
    rule: String,
    limit: String,
    settles_at: Option<String>,
    period: Option<String>,
    displacement: Option<Shift>,
    /// "whole" when the pattern repeats up to a shift, else "settled part"
    period_of: Option<&'static str>,
    /// "dead" or "alive" at the settle generation; under a B0 rule the
    /// population is then "infinite", and the dead cells, box, digests and
    /// census are of the cells that differ from the background
    background: Option<&'static str>,
    population: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    dead_cells: Option<String>,
    bbox: Option<BoxReport>,
    digest: Option<String>,
    shape_digest: Option<String>,
    census: Option<Vec<CensusReport>>,
    unsettled: Option<UnsettledReport>,
    engine: EngineReport,
    /// the bounded universe the pattern lives in; absent on the plane
    #[serde(skip_serializing_if = "Option::is_none")]
    universe: Option<String>,
}

impl FateReport {
    /// A report that says nothing yet of the fate.
    fn of(rule: deeptime_engine::rule::Rule, limit: &BigUint, engine: EngineReport) -> FateReport {
        FateReport {
            rule: rule.to_string(),
            limit: limit.to_string(),
            settles_at: None,
            period: None,
            displacement: None,
            period_of: None,
            background: None,
            population: None,
            dead_cells: None,
            bbox: None,
            digest: None,
            shape_digest: None,
            census: None,
            unsettled: None,
            engine,
            universe: None,
        }
    }
}

#[derive(Serialize, Debug)]
struct Shift {
    x: String,
    y: String,
}

impl Shift {
    fn of((x, y): (i64, i64)) -> Shift {
        Shift {
            x: x.to_string(),
            y: y.to_string(),
        }
    }
}

#[derive(Serialize, Debug)]
struct CensusReport {
    name: String,
    count: String,
    kind: &'static str,
    cells: String,
    period: String,
    displacement: Shift,
    direction: Option<&'static str>,
    shape_id: String,
}

impl From<&CensusEntry> for CensusReport {
    fn from(entry: &CensusEntry) -> CensusReport {
        CensusReport {
            name: entry.name.clone(),
            count: entry.count.to_string(),
            kind: entry.kind.word(),
            cells: entry.cells.to_string(),
            period: entry.period.to_string(),
            displacement: Shift::of(entry.displacement),
            direction: entry.direction,
            shape_id: entry.shape.to_string(),
        }
    }
}

#[derive(Serialize, Debug)]
struct UnsettledReport {
    generation: String,
    background: &'static str,
    population: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    dead_cells: Option<String>,
    bbox: Option<BoxReport>,
    digest: String,
    reason: &'static str,
    growth: Option<GrowthReport>,
}

#[derive(Serialize, Debug)]
struct GrowthReport {
    every: String,
    change: String,
    from: String,
    to: String,
}

impl From<&Growth> for GrowthReport {
    fn from(growth: &Growth) -> GrowthReport {
        GrowthReport {
            every: growth.every.to_string(),
            change: growth.change.to_string(),
            from: growth.from.to_string(),
            to: growth.to.to_string(),
        }
    }
}

fn reason_text(reason: NotYet) -> &'static str {
    match reason {
        NotYet::Changing => "an object is still changing",
        NotYet::Meeting => "moving objects may still meet others",
        NotYet::TooMuchWork => "the state is too busy to take apart",
        NotYet::TooLarge => "the state has more live cells than are taken apart (2^23)",
        NotYet::Background => "the background is still coming alive",
    }
}

pub fn run(args: FateArgs) -> anyhow::Result<()> {
    let limit_text = args.limit.as_deref().unwrap_or(DEFAULT_LIMIT);
    let limit =
        parse_generations(limit_text).map_err(|error| BadInput(format!("--limit: {error}")))?;
    let budget = memory::budget(args.memory.as_deref())?;
    let space = args.universe.space()?;
    let loaded = input::read(&args.pattern, budget)?;
    let rule = input::rule(args.rule.as_deref(), &loaded)?;
    if space != Space::Plane {
        return bounded(loaded, rule, space, &limit, budget, args.json);
    }

    let started = Instant::now();
    let mut universe = input::build(loaded, rule, budget)?;
    let fate = match fate::fate(&mut universe, &limit) {
        Ok(fate) => fate,
        // The advance's own error, so that its kind gives the exit code.
        Err(FateError::Advance(error)) => {
            return Err(anyhow::Error::new(error).context("telling the pattern's fate"));
        }
        Err(error @ FateError::TooLarge { .. }) => {
            return Err(anyhow::anyhow!("{error}; try a smaller --limit"));
        }
    };
    let elapsed = started.elapsed();
    let engine = EngineReport::of(&universe, elapsed);
    let mut report = FateReport::of(rule, &limit, engine);
    match &fate {
        Fate::Settled(settled) => {
            report.settles_at = Some(settled.generation.to_string());
            report.period = Some(settled.period.to_string());
            report.displacement = Some(Shift::of(settled.displacement));
            report.period_of = Some(if settled.whole {
                "whole"
            } else {
                "settled part"
            });
            let (population, dead_cells) =
                report::population(settled.background, settled.population.to_string());
            report.background = Some(settled.background.name());
            report.population = Some(population);
            report.dead_cells = dead_cells;
            report.bbox = settled.bbox.as_ref().map(BoxReport::from);
            report.digest = Some(settled.digest.to_string());
            report.shape_digest = Some(settled.shape_digest.to_string());
            report.census = Some(settled.census.iter().map(CensusReport::from).collect());
        }
        Fate::Unsettled(unsettled) => {
            let (population, dead_cells) =
                report::population(unsettled.background, unsettled.population.to_string());
            report.unsettled = Some(UnsettledReport {
                generation: unsettled.generation.to_string(),
                background: unsettled.background.name(),
                population,
                dead_cells,
                bbox: unsettled.bbox.as_ref().map(BoxReport::from),
                digest: unsettled.digest.to_string(),
                reason: reason_text(unsettled.reason),
                growth: unsettled.growth.as_ref().map(GrowthReport::from),
            });
        }
    }
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
    } else {
        print_summary(&report);
    }
    Ok(())
}

/// The fate of a pattern in a torus or bounded plane: where its history's
/// cycle starts and its period (`Finite::settle`), and the state there. No
/// census: objects are named by how they behave on the plane.
fn bounded(
    loaded: input::Loaded,
    rule: deeptime_engine::rule::Rule,
    space: Space,
    limit: &BigUint,
    budget: u64,
    json: bool,
) -> anyhow::Result<()> {
    let started = Instant::now();
    let origin = loaded.pattern.origin.unwrap_or((0, 0));
    let mut finite = Finite::from_pattern(&loaded.pattern, rule, space)
        .map_err(|error| BadInput(format!("{}: {error}", loaded.name)))?;
    drop(loaded);
    // Left where it settles, or at the limit.
    let settled = finite.settle(limit);
    let mut universe = input::plane_state(&finite, origin, budget)?;
    let population = universe.population().to_string();
    let bbox = universe.bounding_box().as_ref().map(BoxReport::from);
    let digest = universe.digest()?.to_string();
    let mut report = FateReport::of(rule, limit, EngineReport::of(&universe, started.elapsed()));
    report.universe = Some(space.to_string());
    match settled {
        Some((start, period)) => {
            // Nothing lies outside a bounded universe: its cells are stored
            // as they are, on a dead background.
            report.background = Some(Background::Dead.name());
            let cells = universe.cells()?;
            report.settles_at = Some(start.to_string());
            report.period = Some(period.to_string());
            report.displacement = Some(Shift::of((0, 0)));
            report.period_of = Some("whole");
            report.population = Some(population);
            report.bbox = bbox;
            report.digest = Some(digest);
            report.shape_digest = Some(fate::shape_digest_of(&cells).to_string());
        }
        None => {
            report.unsettled = Some(UnsettledReport {
                generation: limit.to_string(),
                background: Background::Dead.name(),
                population,
                dead_cells: None,
                bbox,
                digest,
                reason: "no state came again",
                growth: None,
            });
        }
    }
    if json {
        println!("{}", serde_json::to_string(&report)?);
    } else {
        print_summary(&report);
    }
    Ok(())
}

fn print_summary(report: &FateReport) {
    match (&report.settles_at, &report.unsettled) {
        (Some(at), _) => {
            println!("settles at    generation {}", for_people(at));
            let period = report.period.as_deref().unwrap_or("1");
            let shift = report.displacement.as_ref().expect("set when settled");
            let of = if report.period_of == Some("whole") {
                "the whole pattern"
            } else {
                "what stays; spaceships leave it"
            };
            if shift.x == "0" && shift.y == "0" {
                println!("period        {period} ({of})");
            } else {
                println!(
                    "period        {period}, moving ({}, {}) per period ({of})",
                    shift.x, shift.y
                );
            }
            println!(
                "population    {}",
                population_for_people(
                    report.population.as_deref().unwrap_or("0"),
                    report.dead_cells.as_deref()
                )
            );
            print_box(report.bbox.as_ref());
            println!("digest        {}", report.digest.as_deref().unwrap_or(""));
            println!(
                "shape digest  {}",
                report.shape_digest.as_deref().unwrap_or("")
            );
            let census = report.census.as_deref().unwrap_or(&[]);
            if let Some(universe) = &report.universe {
                println!(
                    "universe      {universe} (no census: objects are named as they behave on the plane)"
                );
            } else if census.is_empty() {
                println!("census        nothing left");
            }
            for (at, entry) in census.iter().enumerate() {
                let label = if at == 0 { "census" } else { "" };
                let heading = match entry.direction {
                    Some(direction) => format!(", heading {direction}"),
                    None if entry.kind == "spaceship" => format!(
                        ", moving ({}, {}) per {}",
                        entry.displacement.x, entry.displacement.y, entry.period
                    ),
                    None => String::new(),
                };
                println!("{label:<14}{} {}{heading}", entry.count, entry.name);
            }
        }
        (None, Some(unsettled)) => {
            println!(
                "settles at    not by generation {} ({})",
                for_people(&unsettled.generation),
                unsettled.reason
            );
            println!(
                "population    {} at generation {}",
                population_for_people(&unsettled.population, unsettled.dead_cells.as_deref()),
                for_people(&unsettled.generation)
            );
            print_box(unsettled.bbox.as_ref());
            println!("digest        {}", unsettled.digest);
            match &unsettled.growth {
                Some(growth) if growth.change != "0" => println!(
                    "growth        {} {} every {} generations (generations {} to {})",
                    if growth.change.starts_with('-') {
                        "shrinks by"
                    } else {
                        "grows by"
                    },
                    growth.change.trim_start_matches('-'),
                    growth.every,
                    for_people(&growth.from),
                    for_people(&growth.to)
                ),
                Some(growth) => println!(
                    "growth        none: the population repeats every {} generations (generations {} to {})",
                    growth.every,
                    for_people(&growth.from),
                    for_people(&growth.to)
                ),
                None => println!("growth        no regular change seen"),
            }
        }
        (None, None) => {}
    }
    println!("engine        {}", report.engine.summary());
}

fn print_box(bbox: Option<&BoxReport>) {
    match bbox {
        None => println!("bounding box  none (no live cells)"),
        Some(bbox) => println!(
            "bounding box  {}",
            box_for_people(&bbox.left, &bbox.top, &bbox.width, &bbox.height)
        ),
    }
}
