//! Reading a pattern file (or standard input) and deciding its rule, with
//! errors that name the file, line and column.

use std::io::Read;
use std::path::Path;

use deeptime_engine::finite::Space;
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

/// Advances `universe`, the state of a bounded universe held as a plane
/// state of its cells (so figures, digests, pictures, RLE and checkpoints
/// come from where they come for the plane), by `step` generations in
/// `space`, whose top-left cell stands at `origin` on the plane. Returns
/// the period of the cycle the history ends in, when it was seen.
pub fn advance_in(
    universe: &mut Universe,
    space: Space,
    origin: (i64, i64),
    step: &num_bigint::BigUint,
    budget: u64,
) -> anyhow::Result<Option<u64>> {
    use anyhow::Context;
    let (left, top) = origin;
    let rule = universe.rule();
    let cells = universe.cells().context("the bounded universe's cells")?;
    let mut finite = deeptime_engine::finite::Finite::from_cells(
        rule,
        space,
        cells.into_iter().map(|(x, y)| (x - left, y - top)),
        universe.generation().clone(),
    )
    .map_err(|error| BadInput(error.to_string()))?;
    let line = crate::progress::Line::start("stepping");
    let history = finite.advance(step, |stepped| line.note(stepped));
    line.finish();
    let mut pattern = finite
        .to_pattern(budget)
        .context("the bounded universe's cells")?;
    pattern.origin = Some(origin);
    *universe =
        Universe::from_pattern(&pattern, rule, budget).context("the bounded universe's cells")?;
    universe.set_generation(finite.generation().clone());
    Ok(history.period)
}
