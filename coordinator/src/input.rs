//! Reading a pattern file (or standard input) and deciding its rule, with
//! errors that name the file, line and column.

use std::io::Read;
use std::path::Path;

use deeptime_engine::finite::{Finite, Space};
use deeptime_engine::pattern::{self, Pattern};
use deeptime_engine::rule::Rule;

use deeptime_engine::{BadInput, InputOverBudget, Universe};

/// Pattern files larger than this are refused before they are read whole.
const MAX_PATTERN_BYTES: u64 = 1 << 30;

/// A pattern as read, with the name to use for it in messages.
pub struct Loaded {
    pub name: String,
    pub pattern: Pattern,
}

/// Reads and parses a pattern file (`-` is standard input) into leaves that
/// take at most `budget` bytes. The file's bytes are let go once parsed.
pub fn read(path: &Path, budget: u64) -> anyhow::Result<Loaded> {
    let name = if path == Path::new("-") {
        "<stdin>".to_string()
    } else {
        path.display().to_string()
    };
    let mut bytes = Vec::new();
    let read = if path == Path::new("-") {
        std::io::stdin()
            .lock()
            .take(MAX_PATTERN_BYTES + 1)
            .read_to_end(&mut bytes)
    } else {
        std::fs::File::open(path)
            .and_then(|file| file.take(MAX_PATTERN_BYTES + 1).read_to_end(&mut bytes))
    };
    if let Err(error) = read {
        return Err(BadInput(format!("{name}: cannot read the pattern: {error}")).into());
    }
    if bytes.len() as u64 > MAX_PATTERN_BYTES {
        return Err(BadInput(format!("{name}: pattern file is larger than 1 GiB")).into());
    }
    let pattern = pattern::read_pattern(&bytes, budget).map_err(|error| {
        let message = format!("{name}:{error}");
        match error.budget {
            Some(_) => anyhow::Error::new(InputOverBudget(message)),
            None => anyhow::Error::new(BadInput(message)),
        }
    })?;
    Ok(Loaded { name, pattern })
}

/// The state of a pattern as read. The pattern counts against the budget
/// only while its quads are made: it is let go before they fill it.
pub fn build(loaded: Loaded, rule: Rule, budget: u64) -> anyhow::Result<Universe> {
    use anyhow::Context;
    Universe::from_pattern(&loaded.pattern, rule, budget)
        .with_context(|| format!("{}: building the pattern", loaded.name))
}

/// The rule: the option if given, else the pattern's header, else B3/S23.
pub fn rule(option: Option<&str>, loaded: &Loaded) -> Result<Rule, BadInput> {
    if let Some(text) = option {
        return Rule::parse(text).map_err(|error| BadInput(format!("--rule: {error}")));
    }
    match &loaded.pattern.rule {
        Some((text, at)) => Rule::parse(text).map_err(|error| {
            // Point at the offending character itself when there is one.
            let column = at.column + error.position().map_or(0, |position| position - 1);
            BadInput(format!("{}:{}:{column}: {error}", loaded.name, at.line))
        }),
        None => Ok(Rule::LIFE),
    }
}

/// The universe option's text read (`plane`, `torus WxH`, `bounded WxH`),
/// `what` naming where it came from in the error.
pub fn space(text: Option<&str>, what: &str) -> Result<Space, BadInput> {
    match text {
        None => Ok(Space::Plane),
        Some(text) => text
            .parse()
            .map_err(|error: deeptime_engine::finite::SpaceError| {
                BadInput(format!("{what}: {error}"))
            }),
    }
}

/// Advances `universe` by `step` generations where it lives (`observe`
/// hears the progress): on the plane by HashLife; in a bounded `space`,
/// whose top-left cell stands at `origin` on the plane, a generation at a
/// time with its cycle found and jumped over, the state held as a plane
/// state of its cells between calls (so figures, digests, pictures, RLE
/// and checkpoints come from where they come for the plane). Returns the
/// period of a bounded universe's cycle, when it was seen.
pub fn advance(
    universe: &mut Universe,
    space: Space,
    origin: (i64, i64),
    step: &num_bigint::BigUint,
    budget: u64,
    observe: Option<deeptime_engine::Observer<'_>>,
) -> anyhow::Result<Option<u64>> {
    use anyhow::Context;
    if space == Space::Plane {
        universe.advance(step, observe)?;
        return Ok(None);
    }
    let (left, top) = origin;
    let cells = universe.cells().context("the bounded universe's cells")?;
    let mut finite = Finite::from_cells(
        universe.rule(),
        space,
        cells.into_iter().map(|(x, y)| (x - left, y - top)),
        universe.generation().clone(),
    )
    .map_err(|error| BadInput(error.to_string()))?;
    // Progress as a share of the step (the cycle, once seen, ends it early).
    let store = universe.store_stats();
    let whole = num_traits::ToPrimitive::to_f64(step).unwrap_or(f64::MAX);
    let mut observe = observe;
    let history = finite.advance(step, |stepped| {
        if let Some(observe) = observe.as_mut() {
            observe(&deeptime_engine::Progress {
                done: (stepped as f64 / whole).min(1.0),
                store,
            });
        }
    });
    *universe = plane_state(&finite, origin, budget)?;
    Ok(history.period)
}

/// A bounded universe's state as the plane state of its cells, its
/// top-left cell at `origin`, at the same generation.
pub fn plane_state(finite: &Finite, origin: (i64, i64), budget: u64) -> anyhow::Result<Universe> {
    use anyhow::Context;
    let mut pattern = finite
        .to_pattern(budget)
        .context("the bounded universe's cells")?;
    pattern.origin = Some(origin);
    let mut universe = Universe::from_pattern(&pattern, finite.rule(), budget)
        .context("the bounded universe's cells")?;
    universe.set_generation(finite.generation().clone());
    universe.mark_bounded();
    Ok(universe)
}
