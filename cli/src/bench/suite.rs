//! The benchmark suite's parts. Every ratio is measured in this run, both
//! sides on the same pattern, and every pair of results is checked equal
//! before its ratio is reported.

use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

use anyhow::{Context, bail, ensure};
use deeptime_engine::direct::Grid;
use deeptime_engine::pattern::{Builder, Pattern, read_pattern};
use deeptime_engine::rule::Rule;
use deeptime_engine::{ContentId, Universe, human_bytes};
use num_bigint::BigUint;

use super::resident::Resident;
use super::{Figure, Goal, Settings};

pub struct Part {
    pub name: &'static str,
    pub run: fn(&Settings) -> anyhow::Result<Vec<Figure>>,
}

pub const PARTS: &[Part] = &[
    Part {
        name: "reach",
        run: reach,
    },
    Part {
        name: "stepping",
        run: stepping,
    },
    Part {
        name: "chaotic",
        run: chaotic,
    },
    Part {
        name: "rules",
        run: super::rules::rules,
    },
    Part {
        name: "numpy",
        run: numpy,
    },
    Part {
        name: "checkpoints",
        run: checkpoints,
    },
    Part {
        name: "cluster",
        run: super::cluster::cluster,
    },
    Part {
        name: "capacity",
        run: super::capacity::capacity,
    },
    Part {
        name: "fate",
        run: super::fate::fate,
    },
];

/// The Gosper glider gun (the usual RLE, from memory).
const GUN: &str = "x = 36, y = 9, rule = B3/S23\n24bo$22bobo$12b2o6b2o12b2o$11bo3bo4b2o12b2o$\
    2o8bo5bo3b2o$2o8bo3bob2o4bobo$10bo5bo7bo$11bo3bo$12b2o!";

/// Our quadratic-growth pattern: a seed of our own ("the spill") under
/// B12345678/S012345678, where every cell next to a live one is born and
/// none dies, so the spill's outline grows by one cell a generation each
/// way and its population grows as the square of the generation.
const SPILL: &str = "x = 7, y = 5, rule = B12345678/S012345678\nbo3bo$2obob2o$3bo$2o3b2o$bobobo!";

/// Plenty: the suite measures speed, not budgets (except where it says so).
const BUDGET: u64 = 16 << 30;

pub fn pattern_of(text: &str) -> anyhow::Result<(Pattern, Rule)> {
    let pattern =
        read_pattern(text.as_bytes(), BUDGET).map_err(|error| anyhow::anyhow!("{error}"))?;
    let rule = match &pattern.rule {
        Some((rule, _)) => Rule::parse(rule)?,
        None => Rule::LIFE,
    };
    Ok((pattern, rule))
}

/// A seeded random soup, `side`×`side`, each cell alive with probability 3/8.
pub fn soup(side: u64, seed: u64) -> anyhow::Result<Pattern> {
    let mut state = seed.wrapping_mul(0x9e37_79b9_7f4a_7c15) | 1;
    let mut cells = Builder::new(BUDGET);
    for y in 0..side {
        for x in 0..side {
            // xorshift64
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            if state % 8 < 3 {
                cells.push_run(y, x, 1)?;
            }
        }
    }
    Ok(cells.finish(None))
}

/// Writes `pattern` as RLE to `path`, for the parts that hand it to another
/// program.
pub fn write_rle(pattern: &Pattern, rule: Rule, path: &Path) -> anyhow::Result<()> {
    let mut universe = Universe::from_pattern(pattern, rule, BUDGET)?;
    let mut text = Vec::new();
    universe.write_rle(&mut text)?;
    std::fs::write(path, text).with_context(|| format!("cannot write {}", path.display()))
}

pub fn timed<T>(work: impl FnOnce() -> anyhow::Result<T>) -> anyhow::Result<(T, Duration)> {
    let started = Instant::now();
    let value = work()?;
    Ok((value, started.elapsed()))
}

/// The pattern advanced `steps` generations in one HashLife jump under
/// `budget`, timed from building it.
pub fn timed_jump(
    pattern: &Pattern,
    rule: Rule,
    steps: &BigUint,
    budget: u64,
) -> anyhow::Result<(Universe, Duration)> {
    timed(|| {
        let mut universe = Universe::from_pattern(pattern, rule, budget)?;
        universe.advance(steps, None)?;
        Ok(universe)
    })
}

/// The pattern stepped `generations` times by the direct stepper, timed.
pub fn timed_direct(pattern: &Pattern, rule: Rule, generations: u64) -> (Grid, Duration) {
    let started = Instant::now();
    let mut grid = Grid::from_pattern(pattern, rule);
    grid.advance(generations);
    (grid, started.elapsed())
}

/// Far-future reach: advance to 10^D for growing D (population included)
/// until one run takes the target time; digits of D per second.
fn reach(settings: &Settings) -> anyhow::Result<Vec<Figure>> {
    let target = if settings.quick {
        Duration::from_millis(20)
    } else {
        Duration::from_secs(2)
    };
    let mut figures = Vec::new();
    for (name, text) in [("Gosper glider gun", GUN), ("quadratic spill", SPILL)] {
        let (pattern, rule) = pattern_of(text)?;
        let mut digits = 10u32;
        loop {
            let generations = BigUint::from(10u32).pow(digits);
            let (population, elapsed) = timed(|| {
                let mut universe = Universe::from_pattern(&pattern, rule, BUDGET)?;
                universe.advance(&generations, None)?;
                Ok(universe.population())
            })?;
            if elapsed >= target || digits >= 100_000 {
                let rate = digits as f64 / elapsed.as_secs_f64();
                figures.push(
                    Figure::new(
                        "reach",
                        &format!("{name}: digits of generation per second"),
                        rate,
                        "digits/s",
                        Some(Goal::AtLeast(3000.0)),
                    )
                    .detail(format!(
                        "10^{digits} generations in {:.3} s; exact population has {} digits",
                        elapsed.as_secs_f64(),
                        population.to_string().len()
                    )),
                );
                break;
            }
            digits *= 2;
        }
    }
    Ok(figures)
}

/// One generation at a time: the memoised recursion asked for 1 generation
/// per call vs the direct stepper, on the gun (a growing regular pattern).
fn stepping(settings: &Settings) -> anyhow::Result<Vec<Figure>> {
    let generations = if settings.quick { 256 } else { 16_384 };
    let (pattern, rule) = pattern_of(GUN)?;
    let one = BigUint::from(1u32);
    let (mut memoised, hashlife) = timed(|| {
        let mut universe = Universe::from_pattern(&pattern, rule, BUDGET)?;
        for _ in 0..generations {
            universe.advance(&one, None)?;
        }
        Ok(universe)
    })?;
    let (grid, direct) = timed_direct(&pattern, rule, generations);
    ensure!(
        memoised.cells()? == grid.cells(),
        "the memoised and direct runs of the gun differ after {generations} generations"
    );
    let ratio = direct.as_secs_f64() / hashlife.as_secs_f64();
    Ok(vec![
        Figure::new(
            "stepping",
            &format!("gun, {generations} single generations: direct / memoised time"),
            ratio,
            "×",
            Some(Goal::AtLeast(16.0)),
        )
        .detail(format!(
            "memoised {:.3} s, direct {:.3} s; population {}",
            hashlife.as_secs_f64(),
            direct.as_secs_f64(),
            grid.population()
        )),
    ])
}

/// A random soup advanced 2^k generations: one HashLife jump vs the direct
/// stepper; the same jump under budgets of 1/10 and 1/20 of the bytes it
/// used unconstrained and of twice its live set; and, for the fractions, a
/// child `deeptime leap` whose peak resident memory is held against its
/// budget (see `resident.rs`).
fn chaotic(settings: &Settings) -> anyhow::Result<Vec<Figure>> {
    let (side, generations) = if settings.quick {
        (1024u64, 1u64 << 12)
    } else {
        (2048, 1 << 12)
    };
    // First, while this process holds little: its children's peaks count
    // from its private memory.
    let resident = Resident::start()?;
    let label = format!("{side}² soup, 2^{}", generations.trailing_zeros());
    let pattern = soup(side, 1)?;
    let rule = Rule::LIFE;
    resident.write_soup(&pattern, rule)?;
    let steps = BigUint::from(generations);
    let (mut universe, hashlife) = timed_jump(&pattern, rule, &steps, BUDGET)?;
    let (grid, direct) = timed_direct(&pattern, rule, generations);
    ensure!(
        universe.cells()? == grid.cells(),
        "HashLife and the direct stepper differ on the {label} soup"
    );
    let stats = universe.store_stats();
    let digest = universe.digest()?;
    drop(universe);
    let mut figures = vec![
        Figure::new(
            "chaotic",
            &format!("{label}: HashLife / direct time"),
            hashlife.as_secs_f64() / direct.as_secs_f64(),
            "×",
            Some(Goal::AtMost(1.5)),
        )
        .detail(format!(
            "HashLife {:.2} s, direct {:.2} s; population {}",
            hashlife.as_secs_f64(),
            direct.as_secs_f64(),
            grid.population()
        )),
        Figure::new(
            "chaotic",
            &format!("{label}: quads created per second"),
            stats.created as f64 / hashlife.as_secs_f64(),
            "quads/s",
            Some(Goal::AtLeast(4e6)),
        )
        .detail(format!("{} quads created", stats.created)),
        Figure::new(
            "chaotic",
            &format!("{label}: peak bytes per quad, tables included"),
            stats.bytes as f64 / stats.quads as f64,
            "B",
            Some(Goal::AtMost(28.0)),
        )
        .detail(format!(
            "{} for {} quads ({} leaves; no collection ran)",
            human_bytes(stats.bytes),
            stats.quads,
            stats.leaves
        )),
    ];

    // Memory pressure. An advance holds the state it starts from and the
    // one it makes, so the live set is the bytes of a store holding nothing
    // but the start state, plus those of one holding nothing but the end
    // state.
    let end_state = grid
        .to_pattern(BUDGET)?
        .map(|(pattern, _, _)| pattern)
        .unwrap_or_default();
    drop(grid);
    let live = [&pattern, &end_state]
        .into_iter()
        .map(|state| Universe::from_pattern(state, rule, BUDGET).map(|u| u.store_stats().bytes))
        .collect::<Result<Vec<u64>, _>>()?
        .into_iter()
        .sum::<u64>();
    drop(end_state);
    let unlimited = Unlimited {
        pattern: &pattern,
        rule,
        steps: &steps,
        label: &label,
        seconds: hashlife.as_secs_f64(),
        digest: &digest,
    };
    let fractions = [
        ("1/10", stats.bytes / 10, 0.8),
        ("1/20", stats.bytes / 20, 0.6),
    ];
    for (fraction, budget, goal) in fractions {
        figures.push(unlimited.constrained(&format!("budget {fraction}"), budget, goal, "")?);
    }
    figures.push(unlimited.constrained(
        "budget 2× live",
        2 * live,
        0.5,
        &format!(" (live set {})", human_bytes(live)),
    )?);
    drop(pattern);

    let budgets = fractions.map(|(fraction, budget, _)| (fraction, budget));
    figures.extend(resident.figures(&label, generations, &digest, &budgets)?);
    Ok(figures)
}

/// The unconstrained jump the pressure figures are measured against.
struct Unlimited<'a> {
    pattern: &'a Pattern,
    rule: Rule,
    steps: &'a BigUint,
    label: &'a str,
    seconds: f64,
    digest: &'a ContentId,
}

impl Unlimited<'_> {
    /// The same jump under `budget`: its throughput against the unlimited
    /// run's, once it is checked to reach the same state. A run that fails
    /// (the budget too small for it) is reported as 0 with its error.
    fn constrained(
        &self,
        what: &str,
        budget: u64,
        goal: f64,
        note: &str,
    ) -> anyhow::Result<Figure> {
        let name = format!("{}, {what}: throughput vs unlimited", self.label);
        let goal = Some(Goal::AtLeast(goal));
        let figure = match timed_jump(self.pattern, self.rule, self.steps, budget) {
            Ok((mut tight, elapsed)) => {
                ensure!(
                    tight.digest()? == *self.digest,
                    "the {} soup under a budget of {} gave a different state",
                    self.label,
                    human_bytes(budget)
                );
                Figure::new(
                    "pressure",
                    &name,
                    self.seconds / elapsed.as_secs_f64(),
                    "×",
                    goal,
                )
                .detail(format!(
                    "budget {}{note}, {:.2} s, {} collections; same digest {}",
                    human_bytes(budget),
                    elapsed.as_secs_f64(),
                    tight.store_stats().collections,
                    self.digest.short()
                ))
            }
            Err(error) => Figure::new("pressure", &name, 0.0, "×", goal)
                .detail(format!("failed under {}: {error:#}", human_bytes(budget))),
        };
        Ok(figure)
    }
}

/// The direct stepper vs a straightforward numpy/scipy program on the same
/// soup and the same simulated area.
fn numpy(settings: &Settings) -> anyhow::Result<Vec<Figure>> {
    let (side, generations) = if settings.quick {
        (128u64, 20u64)
    } else {
        (1024, 100)
    };
    let Some(python) = &settings.python else {
        bail!(
            "the numpy comparison needs a Python with numpy and scipy: give --python \
             (bench/run sets one up)"
        );
    };
    let pattern = soup(side, 2)?;
    let rule = Rule::LIFE;
    let directory = tempfile::tempdir()?;
    let soup_path = directory.path().join("soup.rle");
    let mut grid = Grid::from_pattern(&pattern, rule);
    write_rle(&pattern, rule, &soup_path)?;
    let script = directory.path().join("numpy_life.py");
    std::fs::write(&script, include_str!("../../../bench/numpy_life.py"))?;
    let reference = run_python(python, &script, &soup_path, rule, generations)?;
    let (_, direct) = timed(|| {
        grid.advance(generations);
        Ok(())
    })?;
    let population = reference["population"].as_u64().unwrap_or(u64::MAX);
    ensure!(
        population == grid.population(),
        "numpy gave population {population}, the direct stepper {}",
        grid.population()
    );
    let seconds = reference["seconds"].as_f64().unwrap_or(f64::NAN);
    let cells = reference["cells"].as_f64().unwrap_or(f64::NAN);
    let updates = cells * generations as f64;
    Ok(vec![
        Figure::new(
            "numpy",
            &format!("{side}² soup, {generations} generations: direct / numpy speed"),
            seconds / direct.as_secs_f64(),
            "×",
            Some(Goal::AtLeast(100.0)),
        )
        .detail(format!(
            "same {} cell updates: numpy {:.3} s ({}/s), direct {:.4} s ({}/s)",
            super::compact(updates),
            seconds,
            super::compact(updates / seconds),
            direct.as_secs_f64(),
            super::compact(updates / direct.as_secs_f64())
        )),
    ])
}

fn run_python(
    python: &Path,
    script: &Path,
    soup: &Path,
    rule: Rule,
    generations: u64,
) -> anyhow::Result<serde_json::Value> {
    let output = Command::new(python)
        .arg(script)
        .arg(soup)
        .arg(rule.to_string())
        .arg(generations.to_string())
        .output()
        .with_context(|| format!("cannot run {}", python.display()))?;
    ensure!(
        output.status.success(),
        "the numpy program failed: {}",
        String::from_utf8_lossy(&output.stderr).trim()
    );
    serde_json::from_slice(&output.stdout).context("the numpy program printed no JSON")
}

/// Checkpoints of a large chaotic state: bytes per quad on disk, write and
/// resume speed, and an incremental checkpoint against a full one.
fn checkpoints(settings: &Settings) -> anyhow::Result<Vec<Figure>> {
    use deeptime_storage::LocalDir;
    use deeptime_storage::checkpoint::Checkpoints;

    let side = if settings.quick { 512 } else { 23_200 };
    let pattern = soup(side, 3)?;
    let rule = Rule::LIFE;
    let mut universe = Universe::from_pattern(&pattern, rule, BUDGET)?;
    let (inner, leaves) = universe.live_quads();
    let quads = inner + leaves;
    let directory = tempfile::tempdir()?;
    let counted = std::sync::Arc::new(deeptime_storage::Counting::new(Box::new(LocalDir::new(
        directory.path().to_path_buf(),
    ))));
    let checkpoints = Checkpoints::new(Box::new(counted.clone()));
    let digest = universe.digest()?;
    let identity = deeptime_storage::checkpoint::RunIdentity {
        name: "bench",
        pattern: &digest,
        universe: deeptime_engine::finite::Space::Plane,
        origin: (0, 0),
    };
    let mut known = deeptime_engine::KnownQuads::default();
    let (full, full_time) =
        timed(|| Ok(checkpoints.write(&mut universe, None, &mut known, &identity)?))?;
    let full_bytes = full.pack_bytes();
    let before = counted.bytes_read();
    let (mut loaded, resume_time) = timed(|| Ok(checkpoints.load(full.clone(), BUDGET)?))?;
    let load_read = counted.bytes_read() - before;
    ensure!(
        loaded.manifest.root == digest.to_string(),
        "the resumed state differs from the one written"
    );
    // A small region of the stored state read on demand, against the same
    // region of the state loaded whole: the same text, far fewer bytes.
    let region = deeptime_engine::Region {
        left: num_bigint::BigInt::from(side as i64 / 2),
        top: num_bigint::BigInt::from(side as i64 / 3),
        width: 64,
        height: 64,
    };
    let mut whole_text = Vec::new();
    loaded.universe.write_rle_region(&mut whole_text, &region)?;
    drop(loaded);
    let before = counted.bytes_read();
    let (region_text, region_time) = timed(|| {
        let mut parts = checkpoints.open_stored(&full)?;
        let mut state = parts.state()?;
        let mut text = Vec::new();
        state.write_rle_region(&mut text, &region)?;
        Ok(text)
    })?;
    let region_read = counted.bytes_read() - before;
    ensure!(
        region_text == whole_text,
        "the region read on demand differs from the one loaded whole"
    );
    // Incremental: a few generations on, only what changed is written.
    universe.advance(&BigUint::from(16u32), None)?;
    let (incremental, incremental_time) =
        timed(|| Ok(checkpoints.write(&mut universe, Some(&full), &mut known, &identity)?))?;
    let new_bytes = incremental.pack_bytes() - full_bytes;
    let label = format!("{side}² soup ({} quads)", super::compact(quads as f64));
    Ok(vec![
        Figure::new(
            "checkpoint",
            &format!("{label}: bytes per quad on disk"),
            full_bytes as f64 / quads as f64,
            "B",
            Some(Goal::AtMost(8.0)),
        )
        .detail(format!(
            "{} for {quads} quads, zstd level 3",
            human_bytes(full_bytes)
        )),
        Figure::new(
            "checkpoint",
            &format!("{label}: full checkpoint written, quads per second"),
            quads as f64 / full_time.as_secs_f64(),
            "quads/s",
            None,
        )
        .detail(format!(
            "{:.2} s including content ids, compression and fsync",
            full_time.as_secs_f64()
        )),
        Figure::new(
            "checkpoint",
            &format!("{label}: resumed, quads per second"),
            quads as f64 / resume_time.as_secs_f64(),
            "quads/s",
            None,
        )
        .detail(format!(
            "{:.2} s reading, checking and rebuilding the state",
            resume_time.as_secs_f64()
        )),
        Figure::new(
            "checkpoint",
            &format!("{label}: bytes read, full load / 64×64 region snapshot"),
            load_read as f64 / region_read.max(1) as f64,
            "×",
            None,
        )
        .detail(format!(
            "{} against {}; {:.2} s against {:.3} s (same RLE of the region)",
            human_bytes(load_read),
            human_bytes(region_read),
            resume_time.as_secs_f64(),
            region_time.as_secs_f64()
        )),
        Figure::new(
            "checkpoint",
            &format!("{label}, 16 generations on: incremental / full cost"),
            incremental_time.as_secs_f64() / full_time.as_secs_f64(),
            "×",
            None,
        )
        .detail(format!(
            "{:.2} s and {} (of the full {}): a chaotic soup changes almost everywhere",
            incremental_time.as_secs_f64(),
            human_bytes(new_bytes),
            human_bytes(full_bytes)
        )),
    ])
}
