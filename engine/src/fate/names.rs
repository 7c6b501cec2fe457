//! Names of objects: the trade's own for common B3/S23 objects, and our
//! scheme for everything else (and for every object under other rules):
//! `<kind>-<cells>-<id>`, or `<kind>-p<period>-<cells>-<id>` for objects
//! that change, where kind is `still-life`, `oscillator` or `spaceship`,
//! cells the population of its smallest phase and id the first 8 hex
//! digits of its shape id.
//!
//! An object's shape id is the smallest shape digest of its phases (README,
//! "Shape digest"), so every phase, place and orientation of an object
//! gives the same id.

use std::collections::HashMap;

use crate::content_id::ContentId;
use crate::fate::cells::{self, Cell};
use crate::fate::objects::{Class, Classes, Steps};
use crate::fate::shape::shape_digest_of;
use crate::rule::Rule;

/// What an object does, as its name and the census say it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Kind {
    /// period 1, standing still
    StillLife,
    /// a period above 1, standing still
    Oscillator,
    /// moves
    Spaceship,
}

impl Kind {
    pub fn of(class: &Class) -> Kind {
        if class.moves() {
            Kind::Spaceship
        } else if class.period == 1 {
            Kind::StillLife
        } else {
            Kind::Oscillator
        }
    }

    /// The word used in names and in the JSON.
    pub fn word(self) -> &'static str {
        match self {
            Kind::StillLife => "still-life",
            Kind::Oscillator => "oscillator",
            Kind::Spaceship => "spaceship",
        }
    }
}

/// B3/S23 objects with a name in the trade, one phase each as rows of
/// `O` (alive) and `.` (dead) (from memory; the tests check that each
/// repeats with the period and motion its name implies).
pub const LIFE_NAMES: &[(&str, &[&str])] = &[
    ("block", &["OO", "OO"]),
    ("beehive", &[".OO.", "O..O", ".OO."]),
    ("loaf", &[".OO.", "O..O", ".O.O", "..O."]),
    ("boat", &["OO.", "O.O", ".O."]),
    ("ship", &["OO.", "O.O", ".OO"]),
    ("tub", &[".O.", "O.O", ".O."]),
    ("pond", &[".OO.", "O..O", "O..O", ".OO."]),
    ("long boat", &["OO..", "O.O.", ".O.O", "..O."]),
    ("barge", &[".O..", "O.O.", ".O.O", "..O."]),
    ("mango", &[".OO..", "O..O.", ".O..O", "..OO."]),
    ("eater", &["OO..", "O.O.", "..O.", "..OO"]),
    ("blinker", &["OOO"]),
    ("toad", &[".OOO", "OOO."]),
    ("beacon", &["OO..", "OO..", "..OO", "..OO"]),
    (
        "pulsar",
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
    ),
    (
        "pentadecathlon",
        &["..O....O..", "OO.OOOO.OO", "..O....O.."],
    ),
    ("glider", &[".O.", "..O", "OOO"]),
    (
        "lightweight spaceship",
        &[".O..O", "O....", "O...O", "OOOO."],
    ),
    (
        "middleweight spaceship",
        &["...O..", ".O...O", "O.....", "O....O", "OOOOO."],
    ),
    (
        "heavyweight spaceship",
        &["...OO..", ".O....O", "O......", "O.....O", "OOOOOO."],
    ),
];

/// The cells of rows of `O` and `.`, sorted.
pub fn cells_of_rows(rows: &[&str]) -> Vec<Cell> {
    let mut out = Vec::new();
    for (y, row) in rows.iter().enumerate() {
        for (x, c) in row.chars().enumerate() {
            if c == 'O' {
                out.push((x as i64, y as i64));
            }
        }
    }
    cells::sort(&mut out);
    out
}

/// The shape id of an object: the smallest shape digest of its phases.
pub fn shape_id(class: &Class) -> ContentId {
    class
        .phases
        .iter()
        .map(|phase| shape_digest_of(phase))
        .min()
        .expect("an object has a phase")
}

/// Names objects by shape id.
pub struct Namer {
    steps: Steps,
    trade: HashMap<ContentId, &'static str, ahash::RandomState>,
}

impl Namer {
    /// The trade's names apply where the cells step as under B3/S23: under
    /// it, and to the dead cells of a B0 rule whose alive background makes
    /// them do so (Life's black/white reversal, B0123478/S01234678).
    pub fn new(steps: Steps, classes: &mut Classes) -> Namer {
        let mut trade = HashMap::default();
        if steps.are(Rule::LIFE) {
            for &(name, rows) in LIFE_NAMES {
                if let Some(class) = classes.classify(&cells_of_rows(rows), steps) {
                    trade.insert(shape_id(&class), name);
                }
            }
        }
        Namer { steps, trade }
    }

    /// The object's name and its shape id.
    pub fn name(&self, class: &Class) -> (String, ContentId) {
        let id = shape_id(class);
        if let Some(name) = self.trade.get(&id) {
            return (name.to_string(), id);
        }
        debug_assert!(!self.steps.are(Rule::LIFE) || !self.trade.is_empty());
        let cells = class.phases.iter().map(Vec::len).min().unwrap_or(0);
        let kind = Kind::of(class);
        let short = &id.to_string()[..8];
        let name = match kind {
            Kind::StillLife => format!("{}-{cells}-{short}", kind.word()),
            _ => format!("{}-p{}-{cells}-{short}", kind.word(), class.period),
        };
        (name, id)
    }
}

/// The compass direction of a displacement (y grows down, so north is
/// up), or `None` when it is neither along an axis nor a diagonal.
pub fn direction(dx: i64, dy: i64) -> Option<&'static str> {
    let vertical = match dy.signum() {
        -1 => "north",
        1 => "south",
        _ => "",
    };
    let horizontal = match dx.signum() {
        1 => "east",
        -1 => "west",
        _ => "",
    };
    if dx == 0 && dy == 0 {
        return None;
    }
    if dx == 0 {
        return Some(vertical);
    }
    if dy == 0 {
        return Some(horizontal);
    }
    if dx.abs() != dy.abs() {
        return None;
    }
    Some(match (vertical, horizontal) {
        ("north", "east") => "north-east",
        ("north", _) => "north-west",
        (_, "east") => "south-east",
        _ => "south-west",
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_trade_name_repeats_as_its_name_says() {
        // Periods and speeds of the named objects (LifeWiki's pages for
        // each; from memory): still lifes period 1; blinker, toad, beacon 2;
        // pulsar 3; pentadecathlon 15; glider 4 moving (1, 1); the three
        // orthogonal spaceships 4 moving two cells.
        let mut classes = Classes::default();
        for &(name, rows) in LIFE_NAMES {
            let class = classes
                .classify(&cells_of_rows(rows), Steps::alone(Rule::LIFE))
                .unwrap_or_else(|| panic!("{name} does not repeat"));
            let expected = match name {
                "blinker" | "toad" | "beacon" => (2, 0, 0),
                "pulsar" => (3, 0, 0),
                "pentadecathlon" => (15, 0, 0),
                "glider" => (4, 1, 1),
                n if n.ends_with("spaceship") => (4, 2, 0),
                _ => (1, 0, 0),
            };
            let got = (class.period, class.dx.abs(), class.dy.abs());
            let got = if got.1 == 0 {
                (got.0, got.2, got.1)
            } else {
                got
            };
            assert_eq!(got, expected, "{name}");
        }
    }

    #[test]
    fn names_do_not_depend_on_phase_or_orientation() {
        let mut classes = Classes::default();
        let namer = Namer::new(Steps::alone(Rule::LIFE), &mut classes);
        // A beehive on its side and a glider's second phase turned.
        let beehive = cells_of_rows(&[".O.", "O.O", "O.O", ".O."]);
        let class = classes
            .classify(&beehive, Steps::alone(Rule::LIFE))
            .unwrap();
        assert_eq!(namer.name(&class).0, "beehive");
        let glider = cells::oriented(&cells_of_rows(&["O.O", ".OO", ".O."]), 3);
        let class = classes.classify(&glider, Steps::alone(Rule::LIFE)).unwrap();
        assert_eq!(namer.name(&class).0, "glider");
    }

    #[test]
    fn other_objects_get_a_name_of_our_scheme() {
        // A 2×2 block under B36/S23 is still, and has no trade name there.
        let mut classes = Classes::default();
        let rule = Rule::parse("B36/S23").unwrap();
        let namer = Namer::new(Steps::alone(rule), &mut classes);
        let class = classes
            .classify(&cells_of_rows(&["OO", "OO"]), Steps::alone(rule))
            .unwrap();
        let (name, id) = namer.name(&class);
        assert_eq!(name, format!("still-life-4-{}", &id.to_string()[..8]));
    }

    #[test]
    fn compass_directions() {
        assert_eq!(direction(1, 1), Some("south-east"));
        assert_eq!(direction(-2, 0), Some("west"));
        assert_eq!(direction(0, -2), Some("north"));
        assert_eq!(direction(1, -1), Some("north-east"));
        assert_eq!(direction(2, 1), None);
    }
}
