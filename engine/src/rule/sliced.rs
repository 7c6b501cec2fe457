//! A rule compiled for steppers that work on 64 cells at once, one bit
//! plane per neighbour: a base decision per neighbour count (what most of
//! the count's arrangements do), and the arrangements where the rule says
//! otherwise as fixes. An outer-totalistic rule has no fixes, so it costs
//! what it always did; an isotropic one pays per arrangement it fixes.
//!
//! The compiling is here, once; the steppers apply the base word by word
//! and the fixes over whole arrays of words (`fixing`, and `tile` for the
//! direct and bounded steppers) so that the compiler can vectorise them.

use super::Rule;

/// The rule split into a base by count and fixes.
#[derive(Clone, Debug, PartialEq, Eq)]
pub(crate) struct Sliced {
    /// By live-neighbour count: whether a dead cell is born and a live one
    /// stays for most arrangements of the count.
    pub base: [(bool, bool); 9],
    /// The arrangements where the rule differs from the base.
    pub fixes: Vec<Fix>,
}

/// The arrangements of one count where cells of one state differ from
/// the base: where one matches, the base's answer flips.
#[derive(Clone, Debug, PartialEq, Eq)]
pub(crate) struct Fix {
    pub count: u32,
    /// whether the fix is for live cells (survival) or dead ones (birth)
    pub alive: bool,
    pub terms: Vec<Term>,
}

/// One arrangement, told apart from the others of its count by at most four
/// neighbours: the live ones when the count is at most 4, else the dead
/// ones. The first [`Fix::cells`] entries are used.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) struct Term {
    pub cells: [u8; 4],
}

impl Term {
    fn of(neighbourhood: u8) -> Term {
        let named = if neighbourhood.count_ones() <= 4 {
            neighbourhood
        } else {
            !neighbourhood
        };
        let mut cells = [0; 4];
        for (slot, bit) in (0..8u8).filter(|bit| named >> bit & 1 == 1).enumerate() {
            cells[slot] = bit;
        }
        Term { cells }
    }
}

impl Fix {
    /// How many cells tell each arrangement: the count, or for counts above
    /// 4 the dead neighbours (so at most 4).
    pub fn cells(&self) -> usize {
        self.count.min(8 - self.count) as usize
    }
}

impl Sliced {
    pub fn new(rule: &Rule) -> Sliced {
        let mut base = [(false, false); 9];
        let mut fixes = Vec::new();
        for count in 0..9u32 {
            let arrangements: Vec<u8> = (0..=255u8).filter(|n| n.count_ones() == count).collect();
            for alive in [false, true] {
                let yes = arrangements
                    .iter()
                    .filter(|&&n| rule.next_state(alive, n))
                    .count();
                let decision = 2 * yes > arrangements.len();
                if alive {
                    base[count as usize].1 = decision;
                } else {
                    base[count as usize].0 = decision;
                }
                let terms: Vec<Term> = arrangements
                    .iter()
                    .filter(|&&n| rule.next_state(alive, n) != decision)
                    .map(|&n| Term::of(n))
                    .collect();
                if !terms.is_empty() {
                    fixes.push(Fix {
                        count,
                        alive,
                        terms,
                    });
                }
            }
        }
        Sliced { base, fixes }
    }

    /// The next state of 64 cells by the base alone, the decision of each
    /// count (before an isotropic rule's fixes, see `rule::tile`).
    #[inline]
    pub fn base(&self, alive: u64, count: &[u64; 4]) -> u64 {
        let mut next = 0;
        for (value, &(born, stays)) in self.base.iter().enumerate() {
            if born || stays {
                let state = match (born, stays) {
                    (true, true) => u64::MAX,
                    (true, false) => !alive,
                    _ => alive,
                };
                next |= equal(count, value as u32) & state;
            }
        }
        next
    }
}

/// Where the count given as four bit planes is `value`.
#[inline]
fn equal(count: &[u64; 4], value: u32) -> u64 {
    (0..4).fold(u64::MAX, |all, bit| {
        all & if value >> bit & 1 == 1 {
            count[bit]
        } else {
            !count[bit]
        }
    })
}

/// The live-neighbour counts of 64 cells as four bit planes (`[0]` the
/// lowest), added up from their eight neighbour planes.
#[inline]
pub(crate) fn counts(neighbours: &[u64; 8]) -> [u64; 4] {
    let mut sum = [0u64; 4];
    for &plane in neighbours {
        let mut carry = plane;
        for slice in sum.iter_mut() {
            let next = *slice & carry;
            *slice ^= carry;
            carry = next;
        }
    }
    sum
}
