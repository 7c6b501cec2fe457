//! The HashLife advance written once: an explicit-stack walker over any
//! quadtree ([`Tree`]) with any base case. The local engine walks store
//! handles and answers every base case at once with the kernel; the cluster's
//! coordinator walks content ids and answers a base case later, with a task
//! on a node. One walker serves both because a base case may answer
//! [`Answer::Later`]: the walker then goes on with every other sub-advance
//! that does not depend on it, and when nothing is left that can go on,
//! [`Walk::run`] returns so the caller can wait for the answers it owes
//! ([`Walk::answer`]) and run again. Whatever was launched between two runs
//! is one batch of independent requests.
//!
//! Why a walker and not recursion with a base case that returns a future: a
//! future per sub-advance costs an allocation and a poll at every level,
//! which the local engine (tens of millions of sub-advances) cannot afford,
//! and a recursion cannot hand out the nine independent sub-advances of a
//! square before the first one finishes. The walker's frames are plain
//! structs on a vector; with every answer at once it visits exactly what a
//! depth-first recursion would, in the same order, and needs no deep stack.
//!
//! To advance a quad of level n by a stride (see [`crate::recursion`]): the
//! nine first-phase squares are advanced (or only centred) and their results
//! form a 3×3 grid; after all nine are in, the four second-phase squares of
//! that grid are advanced; after those four, their results are joined.

use std::collections::HashMap;

use crate::recursion::{self, SECOND_PHASE, Stride};

/// An answer to a request the walker made of its tree.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Answer<Q> {
    /// the result, now
    Now(Q),
    /// the result comes later, given to [`Walk::answer`] with this ticket;
    /// the same ticket may be given for equal requests
    Later(Ticket),
}

/// Names a request whose answer comes later.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Ticket(pub u64);

/// A quadtree the walker advances, with its base case and its memo.
///
/// `hold` and `release` keep the quads the walker works with alive across
/// the tree's allocations (a tree that collects garbage at any allocation
/// needs them). They nest like a stack only when every answer is `Now`; a
/// tree that answers later must not need them.
pub trait Tree {
    /// A quad of this tree: a handle, a content id.
    type Quad: Copy + Eq;
    type Error;

    /// The highest level whose advance is a base case.
    fn base_level(&self) -> u32;
    /// Whether `quad` (of `level`) is the empty quad.
    fn is_empty(&self, quad: Self::Quad, level: u32) -> bool;
    /// The empty quad of `level`, of a level that the tree has made.
    fn empty(&self, level: u32) -> Self::Quad;
    /// The children (nw, ne, sw, se) of `quad` of `level`.
    fn kids(&mut self, quad: Self::Quad, level: u32) -> [Self::Quad; 4];
    /// The quad of `level` with these children.
    fn join(&mut self, kids: [Self::Quad; 4], level: u32) -> Result<Self::Quad, Self::Error>;
    /// The result memoised for advancing `quad` by `stride`, if any.
    fn memo(&mut self, quad: Self::Quad, level: u32, stride: Stride) -> Option<Self::Quad>;
    /// Memoises a result.
    fn remember(&mut self, quad: Self::Quad, level: u32, stride: Stride, result: Self::Quad);
    /// Advances `quad` of a level up to `base_level` by `generations` (at
    /// most 2^(level-2)): its centre.
    fn base(
        &mut self,
        quad: Self::Quad,
        level: u32,
        generations: u64,
    ) -> Result<Answer<Self::Quad>, Self::Error>;
    /// The centre (of `level`) of the square made of four quads of `level`.
    fn centre_of_four(
        &mut self,
        four: [Self::Quad; 4],
        level: u32,
    ) -> Result<Answer<Self::Quad>, Self::Error>;

    /// Whether any answer may come later. Such a tree may meet a
    /// sub-advance while an equal one is still in progress (waiting for an
    /// answer): the walker then waits for that one instead of starting it
    /// again, which costs a map entry per frame (a tree that answers at
    /// once never meets one, and pays nothing).
    fn answers_later(&self) -> bool {
        false
    }

    /// Keeps `quad` alive until released (see the trait's note).
    fn hold(&mut self, _quad: Self::Quad) {}
    /// How many quads are held: a mark to release back to.
    fn held(&self) -> usize {
        0
    }
    /// Lets go of the quads held since `mark`.
    fn release(&mut self, _mark: usize) {}
    /// Called once per sub-advance launched, with the share of the whole
    /// advance done so far (estimated from the top levels; costs a little,
    /// so call it only now and then). An error stops the walk.
    fn tick(&mut self, _done: &dyn Fn() -> f64) -> Result<(), Self::Error> {
        Ok(())
    }
}

/// How many levels below the top are tracked for the progress estimate
/// (13^-12 is finer than any step of a thrashing advance needs to show).
const TRACKED_DEPTH: usize = 12;
/// Parts of a frame: nine first-phase results, then four second-phase.
const PARTS: usize = 13;
const FIRST_PARTS: u8 = 9;

/// One advance of a quad above the base level, in progress.
struct Frame<Q> {
    quad: Q,
    level: u32,
    stride: Stride,
    /// the first phase's stride (None: centres only) and the second's
    first: Option<Stride>,
    second: Stride,
    grandchildren: [[Q; 4]; 4],
    /// which of the 8×8 great-grandchildren are not empty (bit 8·row +
    /// column), for the parts' weights in the progress estimate; None
    /// below `WEIGHED_DEPTH`, where every part weighs alike
    occupied: Option<u64>,
    /// the second phase's squares, once made
    squares: [Q; 4],
    second_made: bool,
    /// the results: nine of the first phase, four of the second
    parts: [Q; PARTS],
    /// the next part to launch
    next: u8,
    /// parts launched but not in
    pending: u8,
    /// off the runnable stack until its pending parts are in
    waiting: bool,
    /// where the result goes: a part of another frame, or out
    parent: Option<(u32, u8)>,
    /// the tree's hold mark when the frame began
    mark: usize,
}

/// Who waits for a ticket: a part of a frame (None: the top), and what to
/// memoise.
struct Waiter<Q> {
    into: Option<(u32, u8)>,
    memo: Option<(Q, u32, Stride)>,
}

/// One advance of a state by N generations, over a tree `T`.
pub struct Walk<'n, Q> {
    /// N as little-endian 64-bit words
    steps: &'n [u64],
    /// N's trailing zero bits: the residual at level m is 0 iff m-2 ≤ this
    trailing_zeros: u64,
    top_level: u32,
    frames: Vec<Frame<Q>>,
    free: Vec<u32>,
    runnable: Vec<u32>,
    waiting: HashMap<Ticket, Vec<Waiter<Q>>, ahash::RandomState>,
    /// the frames in progress by sub-advance, and the parts that wait for
    /// each besides its own parent (trees that answer later only)
    open: HashMap<(Q, Stride), u32, ahash::RandomState>,
    followers: HashMap<u32, Vec<Option<(u32, u8)>>, ahash::RandomState>,
    /// the result, once the top is done (or while the top is one request)
    result: Option<Q>,
    /// the progress estimate at each tracked depth
    path: [Share; TRACKED_DEPTH],
}

impl<'n, Q: Copy + Eq + std::hash::Hash> Walk<'n, Q> {
    /// An advance by N (little-endian words) of a state whose root has
    /// level `top_level`, with N < 2^(top_level-2) for a residual root stride.
    pub fn new(steps: &'n [u64], top_level: u32) -> Walk<'n, Q> {
        let mut trailing_zeros = 0;
        for word in steps {
            if *word == 0 {
                trailing_zeros += 64;
            } else {
                trailing_zeros += word.trailing_zeros() as u64;
                break;
            }
        }
        Walk {
            steps,
            trailing_zeros,
            top_level,
            frames: Vec::new(),
            free: Vec::new(),
            runnable: Vec::new(),
            waiting: HashMap::default(),
            open: HashMap::default(),
            followers: HashMap::default(),
            result: None,
            path: [Share::default(); TRACKED_DEPTH],
        }
    }

    /// Starts the advance of `root` (of the top level, held by the caller)
    /// by `stride` there, and runs it as far as it goes (see [`Walk::run`]).
    pub fn start<T: Tree<Quad = Q>>(
        &mut self,
        tree: &mut T,
        root: Q,
        stride: Stride,
    ) -> Result<Option<Q>, T::Error> {
        match self.launch(tree, root, self.top_level, stride, None)? {
            Launched::Now(result) => self.result = Some(result),
            Launched::Later | Launched::Frame => {}
        }
        self.run(tree)
    }

    /// Goes on until the advance is done (its result) or every part left
    /// waits for an answer (None: answer some and run again).
    pub fn run<T: Tree<Quad = Q>>(&mut self, tree: &mut T) -> Result<Option<Q>, T::Error> {
        while let Some(&at) = self.runnable.last() {
            let frame = &self.frames[at as usize];
            let (next, pending) = (frame.next, frame.pending);
            if next < FIRST_PARTS || (next > FIRST_PARTS || frame.second_made) && next < PARTS as u8
            {
                self.frames[at as usize].next += 1;
                self.launch_part(tree, at, next)?;
            } else if pending > 0 {
                self.runnable.pop();
                self.frames[at as usize].waiting = true;
            } else if next == FIRST_PARTS {
                self.make_second_phase(tree, at)?;
            } else {
                self.runnable.pop();
                self.finish(tree, at)?;
            }
        }
        Ok(self.result)
    }

    /// Gives the answer to a ticket; run again to go on.
    pub fn answer<T: Tree<Quad = Q>>(&mut self, tree: &mut T, ticket: Ticket, result: Q) {
        for waiter in self.waiting.remove(&ticket).unwrap_or_default() {
            if let Some((quad, level, stride)) = waiter.memo {
                tree.remember(quad, level, stride, result);
            }
            self.deliver(tree, waiter.into, result);
        }
    }

    /// The tickets not answered yet.
    pub fn unanswered(&self) -> impl Iterator<Item = Ticket> + '_ {
        self.waiting.keys().copied()
    }

    /// The share of the advance done, 0 to 1 (estimated from the top levels).
    pub fn done(&self) -> f64 {
        done_of(&self.path)
    }

    /// Launches part `part` of frame `at`: a first-phase square advanced
    /// or centred, or a second-phase square advanced.
    fn launch_part<T: Tree<Quad = Q>>(
        &mut self,
        tree: &mut T,
        at: u32,
        part: u8,
    ) -> Result<(), T::Error> {
        let path = &self.path;
        tree.tick(&|| done_of(path))?;
        let frame = &self.frames[at as usize];
        let (quad, level, first, second) = (frame.quad, frame.level, frame.first, frame.second);
        let into = Some((at, part));
        let launched = if part >= FIRST_PARTS {
            let square = frame.squares[(part - FIRST_PARTS) as usize];
            self.launch(tree, square, level - 1, second, into)?
        } else {
            let (i, j) = (part as usize / 3, part as usize % 3);
            let four = recursion::block(&frame.grandchildren, i, j);
            match first {
                None => {
                    let answer = tree.centre_of_four(four, level - 2)?;
                    self.launched(answer, into, None)
                }
                Some(stride) => {
                    let square = match recursion::corner_child(i, j) {
                        Some(corner) => tree.kids(quad, level)[corner],
                        None => tree.join(four, level - 1)?,
                    };
                    tree.hold(square);
                    self.launch(tree, square, level - 1, stride, into)?
                }
            }
        };
        match launched {
            Launched::Now(result) => self.part_in(tree, at, part, result),
            Launched::Later | Launched::Frame => self.frames[at as usize].pending += 1,
        }
        Ok(())
    }

    /// Part `part` of frame `at` is in: kept, held, and counted in the
    /// progress estimate (centres count for nothing: only advanced parts).
    fn part_in<T: Tree<Quad = Q>>(&mut self, tree: &mut T, at: u32, part: u8, result: Q) {
        let frame = &mut self.frames[at as usize];
        frame.parts[part as usize] = result;
        tree.hold(result);
        if counts(frame.first, part) {
            let weight = part_weight(frame.occupied, part);
            let depth = frame_depth(self.top_level, frame.level);
            self.part_done(depth, weight);
        }
    }

    /// An answer of the tree as a launch: now, or waited for (and then
    /// memoised as `memo` says).
    fn launched(
        &mut self,
        answer: Answer<Q>,
        into: Option<(u32, u8)>,
        memo: Option<(Q, u32, Stride)>,
    ) -> Launched<Q> {
        match answer {
            Answer::Now(result) => Launched::Now(result),
            Answer::Later(ticket) => {
                self.wait(ticket, into, memo);
                Launched::Later
            }
        }
    }

    /// The first phase of frame `at` is in: makes the four squares of the
    /// second phase from its 3×3 results.
    fn make_second_phase<T: Tree<Quad = Q>>(
        &mut self,
        tree: &mut T,
        at: u32,
    ) -> Result<(), T::Error> {
        let frame = &self.frames[at as usize];
        let level = frame.level;
        let mid: [[Q; 3]; 3] =
            std::array::from_fn(|i| std::array::from_fn(|j| frame.parts[i * 3 + j]));
        let mut squares = [frame.quad; 4];
        for (square, (i, j)) in squares.iter_mut().zip(SECOND_PHASE) {
            *square = tree.join(recursion::block(&mid, i, j), level - 1)?;
            tree.hold(*square);
        }
        let frame = &mut self.frames[at as usize];
        frame.squares = squares;
        frame.second_made = true;
        Ok(())
    }

    /// Starts advancing `quad` by `stride`: answered now, a frame, or
    /// waiting for a ticket (then `into` is told when it comes).
    fn launch<T: Tree<Quad = Q>>(
        &mut self,
        tree: &mut T,
        quad: Q,
        level: u32,
        stride: Stride,
        into: Option<(u32, u8)>,
    ) -> Result<Launched<Q>, T::Error> {
        if tree.is_empty(quad, level) {
            return Ok(Launched::Now(tree.empty(level - 1)));
        }
        if stride == Stride::Residual && self.trailing_zeros >= (level - 2) as u64 {
            // No generations at this level: only the centre.
            let kids = tree.kids(quad, level);
            let answer = tree.centre_of_four(kids, level - 1)?;
            return Ok(self.launched(answer, into, None));
        }
        if let Some(found) = tree.memo(quad, level, stride) {
            return Ok(Launched::Now(found));
        }
        if tree.answers_later()
            && let Some(&at) = self.open.get(&(quad, stride))
        {
            self.followers.entry(at).or_default().push(into);
            return Ok(Launched::Later);
        }
        if level <= tree.base_level() {
            let generations = self.generations(level, stride);
            let answer = tree.base(quad, level, generations)?;
            if let Answer::Now(result) = answer {
                tree.remember(quad, level, stride, result);
            }
            return Ok(self.launched(answer, into, Some((quad, level, stride))));
        }
        let (first, second) = recursion::phases(stride, self.bit(level - 3));
        let depth = frame_depth(self.top_level, level);
        let g =
            recursion::grandchildren(tree.kids(quad, level).map(|kid| tree.kids(kid, level - 1)));
        let occupied = (depth < WEIGHED_DEPTH).then(|| occupancy(tree, &g, level - 2));
        if depth < TRACKED_DEPTH {
            self.path[depth] = Share {
                done: 0.0,
                total: (0..PARTS as u8)
                    .filter(|&part| counts(first, part))
                    .map(|part| part_weight(occupied, part))
                    .sum(),
                current: 0.0,
            };
            self.forget_below(depth);
            if let Some((parent, part)) = into
                && depth > 0
            {
                self.path[depth - 1].current =
                    part_weight(self.frames[parent as usize].occupied, part);
            }
        }
        let frame = Frame {
            quad,
            level,
            stride,
            first,
            second,
            grandchildren: g,
            occupied,
            squares: [quad; 4],
            second_made: false,
            parts: [quad; PARTS],
            next: 0,
            pending: 0,
            waiting: false,
            parent: into,
            mark: tree.held(),
        };
        let at = match self.free.pop() {
            Some(at) => {
                self.frames[at as usize] = frame;
                at
            }
            None => {
                self.frames.push(frame);
                (self.frames.len() - 1) as u32
            }
        };
        if tree.answers_later() {
            self.open.insert((quad, stride), at);
        }
        self.runnable.push(at);
        Ok(Launched::Frame)
    }

    /// Frame `at` has all its parts: joins them, memoises, hands it on.
    fn finish<T: Tree<Quad = Q>>(&mut self, tree: &mut T, at: u32) -> Result<(), T::Error> {
        let frame = &self.frames[at as usize];
        let out = [9, 10, 11, 12].map(|part| frame.parts[part]);
        let (quad, level, stride, parent, mark) = (
            frame.quad,
            frame.level,
            frame.stride,
            frame.parent,
            frame.mark,
        );
        let result = tree.join(out, level - 1)?;
        tree.release(mark);
        tree.remember(quad, level, stride, result);
        self.free.push(at);
        if tree.answers_later() {
            self.open.remove(&(quad, stride));
            for into in self.followers.remove(&at).unwrap_or_default() {
                self.deliver(tree, into, result);
            }
        }
        self.deliver(tree, parent, result);
        Ok(())
    }

    /// Puts a result into the part it was for (or out, for the top).
    fn deliver<T: Tree<Quad = Q>>(&mut self, tree: &mut T, into: Option<(u32, u8)>, result: Q) {
        let Some((at, part)) = into else {
            self.result = Some(result);
            return;
        };
        let frame = &mut self.frames[at as usize];
        frame.pending -= 1;
        if frame.waiting && frame.pending == 0 {
            frame.waiting = false;
            self.runnable.push(at);
        }
        self.part_in(tree, at, part, result);
    }

    fn wait(&mut self, ticket: Ticket, into: Option<(u32, u8)>, memo: Option<(Q, u32, Stride)>) {
        self.waiting
            .entry(ticket)
            .or_default()
            .push(Waiter { into, memo });
    }

    fn part_done(&mut self, depth: usize, weight: f64) {
        if depth < TRACKED_DEPTH {
            self.path[depth].done += weight;
            self.forget_below(depth);
        }
    }

    /// The frame below `depth` is no longer the one in progress: its share
    /// is counted in (or not yet begun at) `depth`.
    fn forget_below(&mut self, depth: usize) {
        if depth + 1 < TRACKED_DEPTH {
            self.path[depth + 1] = Share::default();
        }
    }

    fn bit(&self, index: u32) -> bool {
        let word = (index / 64) as usize;
        word < self.steps.len() && self.steps[word] >> (index % 64) & 1 == 1
    }

    /// The generations `stride` means at a base `level` (≤ 65).
    fn generations(&self, level: u32, stride: Stride) -> u64 {
        let shift = level - 2;
        debug_assert!(shift <= 64, "a base case of level {level}");
        let mask = if shift >= 64 {
            u64::MAX
        } else {
            (1u64 << shift) - 1
        };
        match stride {
            Stride::Full => mask.wrapping_add(1),
            Stride::Residual => self.steps.first().copied().unwrap_or(0) & mask,
        }
    }
}

/// What launching a sub-advance gave.
enum Launched<Q> {
    Now(Q),
    /// a ticket to wait for
    Later,
    /// a frame on the runnable stack
    Frame,
}

fn frame_depth(top_level: u32, level: u32) -> usize {
    (top_level - level) as usize
}

/// Whether part `part` of a frame whose first phase is `first` counts in
/// the progress estimate: advanced parts do, first-phase centres do not.
fn counts(first: Option<Stride>, part: u8) -> bool {
    part >= FIRST_PARTS || first.is_some()
}

/// Frames this close to the top weigh their parts by the work they add;
/// deeper ones (small next to their ancestors) weigh them alike.
const WEIGHED_DEPTH: usize = 8;

/// The progress of one tracked frame: the weights of its parts done, of
/// all its counted parts, and of the part the next depth is working on.
#[derive(Clone, Copy, Debug, Default)]
struct Share {
    done: f64,
    total: f64,
    current: f64,
}

/// Which of the 8×8 great-grandchildren (of `level` - 1) under the 4×4
/// grandchildren `g` (of `level`) are not empty.
fn occupancy<T: Tree>(tree: &mut T, g: &[[T::Quad; 4]; 4], level: u32) -> u64 {
    let mut occupied = 0u64;
    for (row, line) in g.iter().enumerate() {
        for (column, &grandchild) in line.iter().enumerate() {
            if tree.is_empty(grandchild, level) {
                continue;
            }
            for (at, kid) in tree.kids(grandchild, level).into_iter().enumerate() {
                if !tree.is_empty(kid, level - 1) {
                    let (r, c) = (2 * row + at / 2, 2 * column + at % 2);
                    occupied |= 1 << (8 * r + c);
                }
            }
        }
    }
    occupied
}

/// The 4×4 great-grandchildren a square covers from (row, column).
const fn square_mask(row: usize, column: usize) -> u64 {
    let mut mask = 0u64;
    let mut r = 0;
    while r < 4 {
        let mut c = 0;
        while c < 4 {
            mask |= 1 << (8 * (row + r) + column + c);
            c += 1;
        }
        r += 1;
    }
    mask
}

/// What each part adds to the area the parts of its phase before it
/// covered, in great-grandchildren: the nine first-phase squares (row by
/// row) from (2i, 2j), the four second-phase ones from (2i+1, 2j+1). The
/// squares overlap, and each reuses the memoised work of the overlap the
/// ones before it computed (they run in order), so a part's work is its
/// new area; on a pattern much smaller than the frame, the first square
/// over it does nearly all the work, and is weighed so.
const NEW_AREA: [u64; PARTS] = {
    let mut new = [0u64; PARTS];
    let mut covered = 0u64;
    let mut part = 0;
    while part < PARTS {
        if part == FIRST_PARTS as usize {
            covered = 0; // the second phase is other generations
        }
        let mask = if part < FIRST_PARTS as usize {
            square_mask(2 * (part / 3), 2 * (part % 3))
        } else {
            let (i, j) = SECOND_PHASE[part - FIRST_PARTS as usize];
            square_mask(2 * i + 1, 2 * j + 1)
        };
        new[part] = mask & !covered;
        covered |= mask;
        part += 1;
    }
    new
};

/// A part's weight in the progress estimate: the non-empty area it adds
/// (no occupancy: every part alike), at least `LEAST_WEIGHT` so that a
/// square over empty space, which may still hold what moved in, shows its
/// work.
fn part_weight(occupied: Option<u64>, part: u8) -> f64 {
    match occupied {
        Some(occupied) => {
            ((NEW_AREA[part as usize] & occupied).count_ones() as f64).max(LEAST_WEIGHT)
        }
        None => 1.0,
    }
}

const LEAST_WEIGHT: f64 = 1.0 / 1024.0;

/// The share done from the tracked depths.
fn done_of(path: &[Share; TRACKED_DEPTH]) -> f64 {
    let mut done = 0.0;
    let mut scale = 1.0;
    for share in path {
        if share.total <= 0.0 {
            break;
        }
        done += scale * share.done / share.total;
        scale *= share.current / share.total;
    }
    done.min(1.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_phase_covers_its_area_once() {
        // The nine first-phase squares tile the whole 8×8 grid of
        // great-grandchildren; the four second-phase ones its centre 6×6.
        let first = NEW_AREA[..FIRST_PARTS as usize]
            .iter()
            .fold(0u64, |all, new| {
                assert_eq!(all & new, 0, "a first-phase area counted twice");
                all | new
            });
        assert_eq!(first, u64::MAX);
        let second = NEW_AREA[FIRST_PARTS as usize..]
            .iter()
            .fold(0u64, |all, new| {
                assert_eq!(all & new, 0, "a second-phase area counted twice");
                all | new
            });
        let centre = (1..7).flat_map(|r| (1..7).map(move |c| 1u64 << (8 * r + c)));
        assert_eq!(second, centre.fold(0, |all, bit| all | bit));
    }

    #[test]
    fn the_first_square_over_a_small_pattern_weighs_nearly_all() {
        // A pattern on the four centre great-grandchildren: the first
        // second-phase square covers it whole, so it does the work and the
        // other three find it memoised.
        let centre = [(3, 3), (3, 4), (4, 3), (4, 4)]
            .iter()
            .fold(0u64, |all, (r, c)| all | 1 << (8 * r + c));
        let weights: Vec<f64> = (FIRST_PARTS..PARTS as u8)
            .map(|part| part_weight(Some(centre), part))
            .collect();
        assert_eq!(weights[0], 4.0);
        assert!(
            weights[1..].iter().all(|&w| w == LEAST_WEIGHT),
            "{weights:?}"
        );
        // Without occupancy every part weighs alike.
        assert!((0..PARTS as u8).all(|part| part_weight(None, part) == 1.0));
    }
}
