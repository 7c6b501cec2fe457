//! A state taken apart into objects that each repeat on their own and
//! never meet: what a settled state is.
//!
//! The state's cells are split into 8-connected pieces; each piece is run
//! alone until it repeats up to a shift (its period and displacement), at
//! most [`MAX_PERIOD`] generations. A piece that does not repeat is joined
//! to every piece within two cells of it (only cells that close can share
//! a neighbour) and tried again: so the parts of an oscillator whose phases
//! fall apart become one object. Objects that stand still and whose phases
//! come within two cells of each other are run together for a common
//! period and compared with the sum of their runs alone: equal, they stay
//! apart (two blocks one cell apart are two blocks); not, they become one
//! object. Moving objects must never come within two cells of any other
//! object in the future, which is decided on their rectangles moving in
//! straight lines; those that move alike and come that close are checked
//! like the still ones. Anything short of that is "not settled yet" at this
//! generation.
//!
//! The cells are those that differ from the background, and they step by
//! [`Steps`]: under a B0 rule two rules without B0 taking turns, so that
//! objects are run exactly as the engine runs the whole state.

use std::collections::HashMap;
use std::rc::Rc;

use crate::fate::cells::{self, Bounds, Cell, Sets};
use crate::rule::{Background, Rule};

/// Generations an object is run alone to find it repeat.
pub const MAX_PERIOD: u32 = 512;
/// An object's run alone stops when its box passes this many cells.
const MAX_AREA: i64 = 1 << 22;
/// Cell-generations one analysis may spend running objects alone; past
/// it the state counts as not settled yet (a chaotic state costs the
/// most and is the least likely to have settled).
const WORK_LIMIT: u64 = 1 << 30;
/// A common period longer than this is not checked by running objects
/// together; such objects are joined into one instead.
const MAX_JOINT_PERIOD: u64 = 4096;

/// The rules the cells that differ from the background step by: the first
/// at the generation analysed and every even number of generations after
/// it, the second at the odd ones; the same rule twice but under a B0 rule
/// (see [`crate::rule::Background`]). And whether the background flips
/// every generation: then the whole state, background included, repeats
/// only after an even number of generations, and so does every object
/// (a still shape of differing cells is live cells and dead ones in turn).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Steps {
    rules: [Rule; 2],
    flips: bool,
}

impl Steps {
    /// The steps of `rule` from a generation whose background is `from`;
    /// None when the background does not repeat every two generations from
    /// there (generation 0 of a B0 rule with S8, which is never settled:
    /// its background is still coming alive).
    pub fn of(rule: Rule, from: Background) -> Option<Steps> {
        let next = rule.next_background(from);
        (rule.next_background(next) == from).then(|| Steps {
            rules: rule.stepping_pair(from),
            flips: next != from,
        })
    }

    /// A rule without B0 on its dead background, every generation.
    pub fn alone(rule: Rule) -> Steps {
        debug_assert!(!rule.births_on_empty(), "{rule} has B0");
        Steps {
            rules: [rule, rule],
            flips: false,
        }
    }

    /// The rule of the step from `k` generations after the one analysed.
    fn at(&self, k: u64) -> Rule {
        self.rules[(k % 2) as usize]
    }

    /// Whether a state whose differing cells come again after
    /// `generations` repeats: under a flipping background, only after an
    /// even number.
    fn repeats_after(&self, generations: u64) -> bool {
        !self.flips || generations.is_multiple_of(2)
    }

    /// Whether the background flips every generation.
    pub fn flips(&self) -> bool {
        self.flips
    }

    /// Whether these cells step by `rule` alone, every generation, on a
    /// background that stays.
    pub fn are(&self, rule: Rule) -> bool {
        *self == Steps::alone(rule)
    }
}

/// How an object repeats when run alone.
#[derive(Debug)]
pub struct Class {
    /// its generations from one phase to the same phase
    pub period: u32,
    /// how far it moves in one period
    pub dx: i64,
    pub dy: i64,
    /// its cells at each phase 0..period, placed as they stand that many
    /// generations after phase 0, relative to phase 0's corner
    pub phases: Vec<Vec<Cell>>,
    /// the rectangle every phase of one period lies in, relative to
    /// phase 0's corner
    pub extent: Bounds,
}

impl Class {
    pub fn moves(&self) -> bool {
        self.dx != 0 || self.dy != 0
    }
}

/// An object of a settled state: how it repeats and where phase 0 stands.
#[derive(Clone, Debug)]
pub struct Object {
    pub class: Rc<Class>,
    /// the corner of its phase-0 cells at the generation analysed
    pub corner: (i64, i64),
}

impl Object {
    /// Its cells `k` generations after the analysed one (k may be
    /// negative: where it stood, had it always been there).
    pub fn cells_at(&self, k: i64) -> impl Iterator<Item = Cell> + '_ {
        let period = self.class.period as i64;
        let turns = k.div_euclid(period);
        let phase = k.rem_euclid(period) as usize;
        let (x0, y0) = (
            self.corner.0 + turns * self.class.dx,
            self.corner.1 + turns * self.class.dy,
        );
        self.class.phases[phase]
            .iter()
            .map(move |&(x, y)| (x + x0, y + y0))
    }

    /// The rectangle of its phases within one period from now.
    fn extent(&self) -> Bounds {
        self.class.extent.shifted(self.corner.0, self.corner.1)
    }
}

/// Why a state is not settled (yet).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum NotYet {
    /// an object does not repeat on its own
    Changing,
    /// a moving object may still meet another
    Meeting,
    /// taking the state apart cost more than the analysis allows
    TooMuchWork,
    /// the state has more live cells than are ever taken apart
    TooLarge,
    /// the background is still coming alive (generation 0 of a B0 rule
    /// with S8)
    Background,
}

/// Classifications of normalised cell lists, shared across analyses.
#[derive(Default)]
pub struct Classes {
    known: HashMap<(Steps, Vec<Cell>), Option<Rc<Class>>, ahash::RandomState>,
    work: u64,
}

impl Classes {
    /// How `cells` (sorted, any place) repeat alone, or None when they do
    /// not within [`MAX_PERIOD`] generations (or die, or spread too far).
    pub fn classify(&mut self, cells: &[Cell], steps: Steps) -> Option<Rc<Class>> {
        let (start, _) = cells::normalise(cells);
        let key = (steps, start);
        if let Some(known) = self.known.get(&key) {
            return known.clone();
        }
        let found = self.run_alone(&key.1, steps);
        // A run cut short by the allowance says nothing about the shape.
        if !self.over_budget() {
            self.known.insert(key, found.clone());
        }
        found
    }

    fn run_alone(&mut self, start: &[Cell], steps: Steps) -> Option<Rc<Class>> {
        let mut phases = vec![start.to_vec()];
        let mut extent = Bounds::of(start)?;
        let mut now = start.to_vec();
        for period in 1..=MAX_PERIOD {
            let bounds = Bounds::of(&now)?;
            self.work += (bounds.width() as u64 + 4) * (bounds.height() as u64 + 4);
            if self.work > WORK_LIMIT {
                return None;
            }
            now = cells::step(&now, steps.at(period as u64 - 1));
            let bounds = Bounds::of(&now)?;
            if bounds.width() * bounds.height() > MAX_AREA {
                return None;
            }
            if now.len() == start.len() && steps.repeats_after(period as u64) {
                let (shape, corner) = cells::normalise(&now);
                if shape == start {
                    return Some(Rc::new(Class {
                        period,
                        dx: corner.0,
                        dy: corner.1,
                        phases,
                        extent,
                    }));
                }
            }
            extent = extent.union(bounds);
            phases.push(now.clone());
        }
        None
    }

    fn over_budget(&self) -> bool {
        self.work > WORK_LIMIT
    }

    /// Starts a new analysis's allowance of work.
    pub fn reset_work(&mut self) {
        self.work = 0;
    }
}

/// A group of cells being taken apart, and how it repeats if known.
struct Group {
    cells: Vec<Cell>,
    class: Option<Option<Rc<Class>>>,
}

impl Group {
    fn new(cells: Vec<Cell>) -> Group {
        Group { cells, class: None }
    }

    fn object(&self) -> Option<Object> {
        let class = self.class.clone()??;
        let bounds = Bounds::of(&self.cells)?;
        Some(Object {
            class,
            corner: (bounds.left, bounds.top),
        })
    }
}

/// Takes a state's cells (sorted) apart into objects that repeat and never
/// meet, or says why it cannot.
pub fn analyse(cells: &[Cell], steps: Steps, classes: &mut Classes) -> Result<Vec<Object>, NotYet> {
    classes.reset_work();
    let mut groups: Vec<Group> = cells::pieces(cells).into_iter().map(Group::new).collect();
    loop {
        for group in groups.iter_mut() {
            if group.class.is_none() {
                group.class = Some(classes.classify(&group.cells, steps));
            }
        }
        if classes.over_budget() {
            return Err(NotYet::TooMuchWork);
        }
        // Pieces that do not repeat alone: join them to their neighbours.
        let changing: Vec<usize> = (0..groups.len())
            .filter(|&at| groups[at].object().is_none())
            .collect();
        if !changing.is_empty() {
            let boxes: Vec<Bounds> = groups
                .iter()
                .map(|group| Bounds::of(&group.cells).expect("groups are not empty"))
                .collect();
            let mut sets = Sets::new(groups.len());
            let mut joined = false;
            let is_changing = |at: usize| changing.binary_search(&at).is_ok();
            for (i, j) in cells::near_pairs(&boxes, 2) {
                if is_changing(i) || is_changing(j) {
                    joined |= sets.join(i, j);
                }
            }
            if !joined {
                return Err(NotYet::Changing);
            }
            groups = regroup(groups, &mut sets);
            continue;
        }
        let objects: Vec<Object> = groups
            .iter()
            .map(|group| group.object().expect("every group repeats"))
            .collect();
        // Objects standing still whose phases come close: run them together.
        let still: Vec<usize> = (0..objects.len())
            .filter(|&at| !objects[at].class.moves())
            .collect();
        let boxes: Vec<Bounds> = still.iter().map(|&at| objects[at].extent()).collect();
        let mut sets = Sets::new(groups.len());
        let mut close = false;
        for (i, j) in cells::near_pairs(&boxes, 2) {
            close |= sets.join(still[i], still[j]);
        }
        if close && let Some(mut apart) = dependent(&mut sets, &objects, steps) {
            groups = regroup(groups, &mut apart);
            continue;
        }
        // Moving objects: never within reach of anything again. Those that
        // travel together and touch become one object (a flotilla).
        let moving: Vec<usize> = (0..objects.len())
            .filter(|&at| objects[at].class.moves())
            .collect();
        let mut together = Sets::new(groups.len());
        let mut close = false;
        for &m in &moving {
            for other in 0..objects.len() {
                if other == m || (objects[other].class.moves() && other < m) {
                    continue;
                }
                match meet(&objects[m], &objects[other]) {
                    Meeting::Never => {}
                    Meeting::Together => close |= together.join(m, other),
                    Meeting::Maybe => return Err(NotYet::Meeting),
                }
            }
        }
        if close && let Some(mut apart) = dependent(&mut together, &objects, steps) {
            groups = regroup(groups, &mut apart);
            continue;
        }
        return Ok(objects);
    }
}

/// Of the objects `sets` puts together, those of each set that do not run
/// as they do alone, joined into one; None when every set's do.
fn dependent(sets: &mut Sets, objects: &[Object], steps: Steps) -> Option<Sets> {
    let mut joined = false;
    let mut apart = Sets::new(objects.len());
    for members in sets.groups(objects.len()) {
        if members.len() > 1 && !independent(objects, &members, steps) {
            for &other in &members[1..] {
                joined |= apart.join(members[0], other);
            }
        }
    }
    joined.then_some(apart)
}

/// The groups with those in one set joined (classes of joined ones
/// forgotten).
fn regroup(groups: Vec<Group>, sets: &mut Sets) -> Vec<Group> {
    let members = sets.groups(groups.len());
    let mut slots: Vec<Option<Group>> = groups.into_iter().map(Some).collect();
    let mut out = Vec::with_capacity(members.len());
    for set in members {
        if set.len() == 1 {
            out.push(slots[set[0]].take().expect("each group once"));
            continue;
        }
        let mut cells_of: Vec<Cell> = Vec::new();
        for at in set {
            cells_of.extend(slots[at].take().expect("each group once").cells);
        }
        cells::sort(&mut cells_of);
        out.push(Group::new(cells_of));
    }
    out
}

/// Whether the objects `members` (all still, or all moving alike) run
/// together exactly as each runs alone, over a common period (so for ever).
fn independent(objects: &[Object], members: &[usize], steps: Steps) -> bool {
    let mut period = 1u64;
    for &at in members {
        let p = objects[at].class.period as u64;
        period = period / gcd(period, p) * p;
        if period > MAX_JOINT_PERIOD {
            return false;
        }
    }
    let sum_at = |k: i64| {
        let mut sum: Vec<Cell> = members
            .iter()
            .flat_map(|&at| objects[at].cells_at(k))
            .collect();
        cells::sort(&mut sum);
        sum
    };
    let mut together = sum_at(0);
    let before = together.len();
    together.dedup();
    if together.len() != before {
        return false;
    }
    for k in 1..=period as i64 {
        together = cells::step(&together, steps.at(k as u64 - 1));
        if together != sum_at(k) {
            return false;
        }
    }
    true
}

fn gcd(mut a: u64, mut b: u64) -> u64 {
    while b != 0 {
        (a, b) = (b, a % b);
    }
    a
}

/// Whether two objects, one of them moving, can come within reach.
#[derive(Debug, PartialEq, Eq)]
enum Meeting {
    /// never within two cells, from now on
    Never,
    /// they move alike and are within reach now: apart only if they run
    /// together as they run alone
    Together,
    /// they may come within reach
    Maybe,
}

/// Decides [`Meeting`] on rectangles: each object's rectangle over one
/// period, widened by one period's displacement (it moves in steps), moving
/// at the object's mean velocity for all time from now.
fn meet(a: &Object, b: &Object) -> Meeting {
    let (ca, cb) = (&a.class, &b.class);
    let same_velocity = ca.dx * cb.period as i64 == cb.dx * ca.period as i64
        && ca.dy * cb.period as i64 == cb.dy * ca.period as i64;
    let (ea, eb) = (a.extent(), b.extent());
    if same_velocity {
        // Still relative to each other: what holds now holds for ever.
        return if ea.distance(eb) <= 2 {
            Meeting::Together
        } else {
            Meeting::Never
        };
    }
    let widen = |e: Bounds, c: &Class| Bounds {
        left: e.left - c.dx.abs(),
        right: e.right + c.dx.abs(),
        top: e.top - c.dy.abs(),
        bottom: e.bottom + c.dy.abs(),
    };
    let (ea, eb) = (widen(ea, ca), widen(eb, cb));
    let velocity = |c: &Class| (c.dx as f64 / c.period as f64, c.dy as f64 / c.period as f64);
    let (va, vb) = (velocity(ca), velocity(cb));
    // Times τ ≥ 0 at which both axes are within reach: each axis gives two
    // conditions k·τ ≤ c; keep the interval all of them allow.
    let (mut low, mut high) = (0f64, f64::INFINITY);
    let axes = [
        (ea.left, ea.right, eb.left, eb.right, va.0 - vb.0),
        (ea.top, ea.bottom, eb.top, eb.bottom, va.1 - vb.1),
    ];
    for (a_lo, a_hi, b_lo, b_hi, relative) in axes {
        // a.lo + va τ - 2 ≤ b.hi + vb τ  and  b.lo + vb τ - 2 ≤ a.hi + va τ,
        // with a cell of slack against rounding.
        let conditions = [
            (relative, (b_hi - a_lo + 3) as f64),
            (-relative, (a_hi - b_lo + 3) as f64),
        ];
        for (k, c) in conditions {
            if k == 0.0 {
                if c < 0.0 {
                    return Meeting::Never;
                }
            } else if k > 0.0 {
                high = high.min(c / k);
            } else {
                low = low.max(c / k);
            }
        }
    }
    if low <= high {
        Meeting::Maybe
    } else {
        Meeting::Never
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn life() -> Steps {
        Steps::alone(Rule::LIFE)
    }

    fn cells_of(rows: &[&str], at: (i64, i64)) -> Vec<Cell> {
        let mut out = Vec::new();
        for (y, row) in rows.iter().enumerate() {
            for (x, c) in row.chars().enumerate() {
                if c == 'O' {
                    out.push((x as i64 + at.0, y as i64 + at.1));
                }
            }
        }
        out
    }

    #[test]
    fn a_glider_repeats_in_four_one_cell_diagonally() {
        // Glider: period 4, one cell diagonally (LifeWiki, "Glider").
        let glider = cells_of(&[".O.", "..O", "OOO"], (0, 0));
        let class = Classes::default().classify(&glider, life()).unwrap();
        assert_eq!((class.period, class.dx, class.dy), (4, 1, 1));
    }

    #[test]
    fn two_blocks_one_cell_apart_stay_two() {
        // Two blocks with one empty column between: a stable pair of two
        // blocks (common practice).
        let mut cells = cells_of(&["OO.OO", "OO.OO"], (0, 0));
        cells::sort(&mut cells);
        let objects = analyse(&cells, life(), &mut Classes::default()).unwrap();
        assert_eq!(objects.len(), 2);
        assert!(objects.iter().all(|o| o.class.period == 1));
    }

    #[test]
    fn a_pulsar_is_one_object() {
        // Pulsar: its 48-cell phase is twelve bars that do not touch; one
        // object of period 3 (LifeWiki, "Pulsar").
        let mut cells = cells_of(
            &[
                "..OOO...OOO..",
                ".............",
                "O....O.O....O",
                "O....O.O....O",
                "O....O.O....O",
                "..OOO...OOO..",
                ".............",
                "..OOO...OOO..",
                "O....O.O....O",
                "O....O.O....O",
                "O....O.O....O",
                ".............",
                "..OOO...OOO..",
            ],
            (0, 0),
        );
        cells::sort(&mut cells);
        let objects = analyse(&cells, life(), &mut Classes::default()).unwrap();
        assert_eq!(objects.len(), 1);
        assert_eq!(objects[0].class.period, 3);
    }

    #[test]
    fn a_glider_heading_for_a_block_is_not_settled() {
        // A glider coming down-right at a block in its way: not settled;
        // the same glider heading away is (common practice).
        let mut towards = cells_of(&[".O.", "..O", "OOO"], (0, 0));
        towards.extend(cells_of(&["OO", "OO"], (20, 20)));
        cells::sort(&mut towards);
        assert_eq!(
            analyse(&towards, life(), &mut Classes::default()).unwrap_err(),
            NotYet::Meeting
        );
        let mut away = cells_of(&[".O.", "..O", "OOO"], (30, 30));
        away.extend(cells_of(&["OO", "OO"], (20, 20)));
        cells::sort(&mut away);
        assert_eq!(
            analyse(&away, life(), &mut Classes::default())
                .unwrap()
                .len(),
            2
        );
    }

    #[test]
    fn a_growing_piece_is_changing() {
        // The R-pentomino does not repeat within MAX_PERIOD generations
        // alone (LifeWiki, "R-pentomino": it settles at 1103).
        let mut cells = cells_of(&[".OO", "OO.", ".O."], (0, 0));
        cells::sort(&mut cells);
        assert_eq!(
            analyse(&cells, life(), &mut Classes::default()).unwrap_err(),
            NotYet::Changing
        );
    }
}
