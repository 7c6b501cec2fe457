//! The local advance: the one HashLife walker ([`crate::walk`]) over store
//! handles, with the bit-parallel kernel as its base case, so every answer
//! comes at once.
//!
//! An advance of a whole state by N generations meets at level m only the
//! full stride 2^(m-2) and the residual N mod 2^(m-2). So each quad
//! memoises two results: the full-stride one in the quad itself and the
//! residual one in a side map kept while N's low bits (and, for a B0 rule,
//! the background the advance starts from) stay the same. One
//! pass costs about two passes of the next power of two, never one pass per
//! binary digit of N.
//!
//! The base case is a quad of level 6 (64×64 cells) or smaller, advanced
//! by the bit-parallel kernel: on chaotic patterns, making and hashing every
//! smaller square in between costs more than computing it again. Every
//! handle the walk holds across an allocation sits on the store's scratch
//! stack, so the collector may run at any allocation.

use std::time::{Duration, Instant};

use crate::error::BudgetExceeded;
use crate::kernel::{self, Kernel, LeafGrid};
use crate::recursion::{self, Stride};
use crate::rule::Rule;
use crate::store::{Handle, LEAF_LEVEL, Store, StoreStats};
use crate::walk::{Answer, Tree, Walk};

/// Where a long advance is, for progress lines.
#[derive(Clone, Copy, Debug)]
pub struct Progress {
    /// share of the advance done, 0 to 1 (estimated from the top levels)
    pub done: f64,
    /// the store's counters now
    pub store: StoreStats,
}

/// Receives progress at most every `PROGRESS_EVERY` of wall time.
pub type Observer<'a> = &'a mut (dyn FnMut(&Progress) + Send);

const PROGRESS_EVERY: Duration = Duration::from_millis(250);

/// An advance is thrashing (each collection discards work it then repeats,
/// so each piece of progress costs more collections than the last) when,
/// over its latest `THRASHING_WINDOW` losses to the budget (collections,
/// and resets of the residual memo: `Store::losses`), it moved so little that
/// the rest at that rate would take more than `THRASHING_PROJECTED`. An
/// advance that merely collects often keeps a steady rate and needs a few
/// thousand in all.
const THRASHING_WINDOW: u64 = 256;
const THRASHING_PROJECTED: f64 = (1u64 << 18) as f64;

/// The highest level advanced by the kernel: a square of 64×64 cells moved
/// 16 generations at once. Above it results are memoised in the store;
/// below it nothing is made but the result's own quads.
const BASE_LEVEL: u32 = 6;

/// One advance of a state by N generations.
pub(crate) struct Advance<'a, 'o> {
    tree: Local<'a, 'o>,
    /// N as little-endian 64-bit words
    steps: &'a [u64],
    top_level: u32,
}

/// The store seen as the walker's tree.
struct Local<'a, 'o> {
    store: &'a mut Store,
    kernel: Kernel,
    observer: Option<Observer<'o>>,
    calls: u32,
    last_report: Instant,
    /// the store's losses and the share done when the latest window of
    /// them began (see `THRASHING_WINDOW`)
    window_start: (u64, f64),
}

impl<'a, 'o> Advance<'a, 'o> {
    /// Prepares an advance of a level-`top_level` quad by N generations,
    /// where N is given by its little-endian words and 0 < N < 2^(top_level-2),
    /// under two rules without B0 taking turns (the first at the start; see
    /// [`Rule::stepping_pair`]). The full-stride memo in the quads holds
    /// for one pair only: every advance of a store must use the same pair,
    /// but for advances by one generation, which never use it.
    pub(crate) fn new(
        store: &'a mut Store,
        rules: [Rule; 2],
        steps: &'a [u64],
        top_level: u32,
        observer: Option<Observer<'o>>,
    ) -> Advance<'a, 'o> {
        Advance {
            tree: Local::new(store, rules, observer),
            steps,
            top_level,
        }
    }

    /// Runs the advance of `root` (of the top level); returns the centre.
    pub(crate) fn run(&mut self, root: Handle) -> Result<Handle, BudgetExceeded> {
        self.run_as(root, Stride::Residual)
    }

    /// Runs the advance of `root` by `stride` at the top level (the full
    /// stride 2^(top-2), or the residual: N itself, N < 2^(top-2)).
    pub(crate) fn run_as(
        &mut self,
        root: Handle,
        stride: Stride,
    ) -> Result<Handle, BudgetExceeded> {
        debug_assert!(self.top_level >= 4);
        let mut walk = Walk::new(self.steps, self.top_level);
        let result = walk
            .start(&mut self.tree, root, stride)?
            .expect("every local answer comes at once");
        if let Some(observer) = self.tree.observer.as_mut() {
            observer(&Progress {
                done: 1.0,
                store: self.tree.store.stats(),
            });
        }
        Ok(result)
    }
}

impl<'a, 'o> Local<'a, 'o> {
    fn new(
        store: &'a mut Store,
        rules: [Rule; 2],
        observer: Option<Observer<'o>>,
    ) -> Local<'a, 'o> {
        let losses = store.losses();
        Local {
            store,
            kernel: Kernel::alternating(rules),
            observer,
            calls: 0,
            last_report: Instant::now(),
            window_start: (losses, 0.0),
        }
    }
}

impl Tree for Local<'_, '_> {
    type Quad = Handle;
    type Error = BudgetExceeded;

    fn base_level(&self) -> u32 {
        BASE_LEVEL
    }

    #[inline]
    fn is_empty(&self, quad: Handle, level: u32) -> bool {
        quad == self.store.known_empty(level)
    }

    #[inline]
    fn empty(&self, level: u32) -> Handle {
        self.store.known_empty(level)
    }

    #[inline]
    fn kids(&mut self, quad: Handle, _level: u32) -> [Handle; 4] {
        self.store.kids(quad)
    }

    #[inline]
    fn join(&mut self, kids: [Handle; 4], _level: u32) -> Result<Handle, BudgetExceeded> {
        self.store.join(kids)
    }

    #[inline]
    fn memo(&mut self, quad: Handle, _level: u32, stride: Stride) -> Option<Handle> {
        let found = match stride {
            Stride::Full => self.store.result(quad),
            Stride::Residual => match self.store.residual.get(&quad).copied() {
                Some(found) => {
                    self.store.touch(quad);
                    found
                }
                None => Handle::NONE,
            },
        };
        (found != Handle::NONE).then_some(found)
    }

    #[inline]
    fn remember(&mut self, quad: Handle, _level: u32, stride: Stride, result: Handle) {
        match stride {
            Stride::Full => self.store.set_result(quad, result),
            Stride::Residual => self.store.remember_residual(quad, result),
        }
    }

    /// Advances a quad of level 4 to `BASE_LEVEL` (a square of side 16 to
    /// 64) with the kernel and builds its centre from the leaves out.
    fn base(
        &mut self,
        quad: Handle,
        level: u32,
        generations: u64,
    ) -> Result<Answer<Handle>, BudgetExceeded> {
        let side = 8usize << (level - LEAF_LEVEL);
        let mut leaves = [[0; 8]; 8];
        gather_leaves(self.store, quad, level, 0, 0, &mut leaves);
        let mut block = kernel::block_from_leaves(&leaves, side);
        self.kernel
            .advance_block(&mut block, side, generations as u32);
        let centre = kernel::centre_leaves(&block, side);
        Ok(Answer::Now(build_from_leaves(
            self.store,
            &centre,
            level - 1,
            0,
            0,
        )?))
    }

    #[inline]
    fn centre_of_four(
        &mut self,
        four: [Handle; 4],
        level: u32,
    ) -> Result<Answer<Handle>, BudgetExceeded> {
        Ok(Answer::Now(centre_of_four(self.store, four, level)?))
    }

    #[inline]
    fn hold(&mut self, quad: Handle) {
        self.store.scratch.push(quad);
    }

    #[inline]
    fn held(&self) -> usize {
        self.store.scratch.len()
    }

    #[inline]
    fn release(&mut self, mark: usize) {
        self.store.scratch.truncate(mark);
    }

    /// Counts sub-advances, reports progress now and then, and stops an
    /// advance that collections keep from getting any further.
    fn tick(&mut self, done: &dyn Fn() -> f64) -> Result<(), BudgetExceeded> {
        self.calls = self.calls.wrapping_add(1);
        if !self.calls.is_multiple_of(1024) {
            return Ok(());
        }
        let losses = self.store.losses();
        let (started, done_then) = self.window_start;
        if losses - started >= THRASHING_WINDOW {
            let done_now = done();
            let rate = (done_now - done_then) / (losses - started) as f64;
            if (1.0 - done_now) > rate * THRASHING_PROJECTED {
                return Err(self.store.exceeded(true));
            }
            self.window_start = (losses, done_now);
        }
        if self.observer.is_none() {
            return Ok(());
        }
        let now = Instant::now();
        if now - self.last_report < PROGRESS_EVERY {
            return Ok(());
        }
        self.last_report = now;
        let progress = Progress {
            done: done(),
            store: self.store.stats(),
        };
        if let Some(observer) = self.observer.as_mut() {
            observer(&progress);
        }
        Ok(())
    }
}

/// Writes the leaves of `quad` (of `level` ≤ `BASE_LEVEL`) into `leaves`
/// from leaf-column x, leaf-row y on; empty quads are skipped (the grid
/// starts empty).
fn gather_leaves(
    store: &Store,
    quad: Handle,
    level: u32,
    x: usize,
    y: usize,
    leaves: &mut LeafGrid,
) {
    if level == LEAF_LEVEL {
        leaves[x][y] = store.leaf_bits(quad);
        return;
    }
    if quad == store.known_empty(level) {
        return;
    }
    let half = 1 << (level - LEAF_LEVEL - 1);
    for (at, kid) in store.kids(quad).into_iter().enumerate() {
        let (dx, dy) = (at & 1, at >> 1);
        gather_leaves(store, kid, level - 1, x + dx * half, y + dy * half, leaves);
    }
}

/// The quad of `level` whose leaves are `centre[x..][y..]`. Each quad made
/// is held on the scratch stack until its parent is joined.
fn build_from_leaves(
    store: &mut Store,
    centre: &[[u64; 4]; 4],
    level: u32,
    x: usize,
    y: usize,
) -> Result<Handle, BudgetExceeded> {
    if level == LEAF_LEVEL {
        return store.leaf(centre[x][y]);
    }
    let base = store.scratch.len();
    let half = 1 << (level - LEAF_LEVEL - 1);
    let mut kids = [Handle::NONE; 4];
    for (at, kid) in kids.iter_mut().enumerate() {
        let (dx, dy) = (at & 1, at >> 1);
        *kid = build_from_leaves(store, centre, level - 1, x + dx * half, y + dy * half)?;
        store.scratch.push(*kid);
    }
    let quad = store.join(kids)?;
    store.scratch.truncate(base);
    Ok(quad)
}

/// The centre (level n-1) of a quad of level n ≥ 4.
pub(crate) fn centre(
    store: &mut Store,
    quad: Handle,
    level: u32,
) -> Result<Handle, BudgetExceeded> {
    let kids = store.kids(quad);
    centre_of_four(store, kids, level - 1)
}

/// The centre of the square made of four quads of `level` (nw, ne, sw, se):
/// a quad of the same level.
pub(crate) fn centre_of_four(
    store: &mut Store,
    four: [Handle; 4],
    level: u32,
) -> Result<Handle, BudgetExceeded> {
    if level == LEAF_LEVEL {
        let bits = four.map(|leaf| store.leaf_bits(leaf));
        return store.leaf(kernel::centre_of_leaves(bits));
    }
    store.join(recursion::centre_of_four(four.map(|quad| store.kids(quad))))
}

#[cfg(test)]
mod tests {
    use std::collections::HashMap;

    use super::*;
    use crate::walk::Ticket;

    /// The local tree, except that every base case and every centre of
    /// level-4 quads is answered later, as a node answers the coordinator:
    /// equal requests share a ticket.
    struct Deferred<'a, 'o> {
        local: Local<'a, 'o>,
        tickets: HashMap<(Handle, u32, u64), Ticket>,
        answers: HashMap<Ticket, Handle>,
        requests: u64,
    }

    impl Deferred<'_, '_> {
        fn later(&mut self, key: (Handle, u32, u64), answer: Handle) -> Answer<Handle> {
            self.requests += 1;
            let next = Ticket(self.tickets.len() as u64);
            let ticket = *self.tickets.entry(key).or_insert(next);
            self.answers.insert(ticket, answer);
            Answer::Later(ticket)
        }
    }

    impl Tree for Deferred<'_, '_> {
        type Quad = Handle;
        type Error = BudgetExceeded;

        fn base_level(&self) -> u32 {
            self.local.base_level()
        }
        fn answers_later(&self) -> bool {
            true
        }
        fn is_empty(&self, quad: Handle, level: u32) -> bool {
            self.local.is_empty(quad, level)
        }
        fn empty(&self, level: u32) -> Handle {
            self.local.empty(level)
        }
        fn kids(&mut self, quad: Handle, level: u32) -> [Handle; 4] {
            self.local.kids(quad, level)
        }
        fn join(&mut self, kids: [Handle; 4], level: u32) -> Result<Handle, BudgetExceeded> {
            self.local.join(kids, level)
        }
        fn memo(&mut self, quad: Handle, level: u32, stride: Stride) -> Option<Handle> {
            self.local.memo(quad, level, stride)
        }
        fn remember(&mut self, quad: Handle, level: u32, stride: Stride, result: Handle) {
            self.local.remember(quad, level, stride, result)
        }
        fn base(
            &mut self,
            quad: Handle,
            level: u32,
            generations: u64,
        ) -> Result<Answer<Handle>, BudgetExceeded> {
            let Answer::Now(result) = self.local.base(quad, level, generations)? else {
                unreachable!("the local base case answers at once")
            };
            Ok(self.later((quad, level, generations), result))
        }
        fn centre_of_four(
            &mut self,
            four: [Handle; 4],
            level: u32,
        ) -> Result<Answer<Handle>, BudgetExceeded> {
            let centre = centre_of_four(self.local.store, four, level)?;
            if level != 4 {
                return Ok(Answer::Now(centre));
            }
            let square = self.local.store.join(four)?;
            Ok(self.later((square, level + 1, 0), centre))
        }
    }

    /// A level-`level` quad of random cells (density 1/2) from `seed`.
    fn soup(store: &mut Store, level: u32, seed: &mut u64) -> Handle {
        if level == LEAF_LEVEL {
            *seed = seed
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            return store.leaf(*seed ^ *seed >> 29).unwrap();
        }
        let kids = [0; 4].map(|_| soup(store, level - 1, seed));
        store.join(kids).unwrap()
    }

    // The walker gives the same result whether every answer comes at once
    // or later, in any order, with equal requests sharing one ticket
    // (common practice: one computation, two schedules).
    #[test]
    fn answers_later_in_any_order_give_the_same_result() {
        let rule = Rule::LIFE;
        for (level, steps, stride) in [
            (7, 1u64, Stride::Residual),
            (7, 31, Stride::Residual),
            (8, 37, Stride::Residual),
            (9, 127, Stride::Residual),
            (9, 64, Stride::Residual),
            (8, 64, Stride::Full),
        ] {
            let mut store = Store::new(1 << 30);
            for at in LEAF_LEVEL..=level {
                store.empty(at).unwrap();
            }
            let mut seed = steps;
            let root = soup(&mut store, level, &mut seed);
            store.scratch.push(root);
            let words = [steps];
            let at_once = Advance::new(&mut store, [rule, rule], &words, level, None)
                .run_as(root, stride)
                .unwrap();
            // A fresh memo: the deferred walk must not find the answers.
            store.residual.clear();
            store.forget_results();
            let mut tree = Deferred {
                local: Local::new(&mut store, [rule, rule], None),
                tickets: HashMap::new(),
                answers: HashMap::new(),
                requests: 0,
            };
            let mut walk = Walk::new(&words, level);
            let mut outcome = walk.start(&mut tree, root, stride).unwrap();
            let mut widest = 0;
            while outcome.is_none() {
                let mut owed: Vec<Ticket> = walk.unanswered().collect();
                widest = widest.max(owed.len());
                assert!(!owed.is_empty(), "a walk that waits owes answers");
                owed.sort_by_key(|ticket| std::cmp::Reverse(ticket.0));
                for ticket in owed {
                    let answer = tree.answers[&ticket];
                    walk.answer(&mut tree, ticket, answer);
                }
                outcome = walk.run(&mut tree).unwrap();
            }
            assert_eq!(outcome, Some(at_once), "level {level}, {steps} generations");
            assert!(
                tree.requests as usize > tree.tickets.len() || level < 8,
                "equal requests shared tickets"
            );
            // At least the four second-phase squares of the top wait at once.
            assert!(widest >= 4, "{widest} requests at once, level {level}");
        }
    }

    /// Runs a deferred walk to its end, answering every owed ticket
    /// between runs; the result and the requests the tree met.
    fn deferred(store: &mut Store, root: Handle, level: u32, words: &[u64]) -> (Handle, u64) {
        let mut tree = Deferred {
            local: Local::new(store, [Rule::LIFE; 2], None),
            tickets: HashMap::new(),
            answers: HashMap::new(),
            requests: 0,
        };
        let mut walk = Walk::new(words, level);
        let mut outcome = walk.start(&mut tree, root, Stride::Residual).unwrap();
        while outcome.is_none() {
            let owed: Vec<Ticket> = walk.unanswered().collect();
            for ticket in owed {
                let answer = tree.answers[&ticket];
                walk.answer(&mut tree, ticket, answer);
            }
            outcome = walk.run(&mut tree).unwrap();
        }
        (outcome.unwrap(), tree.requests)
    }

    // A tiled state meets each sub-advance many times while the first is
    // still waiting for its answers: the walker waits for that one instead
    // of walking it again. Walked again, the 9 equal first-phase squares of
    // every frame would each recurse: about 9^8 requests at level 14; shared,
    // a few per level (common practice: the memo's in-flight twin).
    #[test]
    fn a_sub_advance_in_progress_is_waited_for_not_walked_again() {
        let level = 14;
        let mut store = Store::new(1 << 30);
        for at in LEAF_LEVEL..=level {
            store.empty(at).unwrap();
        }
        let mut quad = store.leaf(0x0066_0000_0000_6600).unwrap();
        for _ in LEAF_LEVEL..level {
            quad = store.join([quad; 4]).unwrap();
        }
        store.scratch.push(quad);
        let words = [(1u64 << 12) - 1];
        let at_once = Advance::new(&mut store, [Rule::LIFE; 2], &words, level, None)
            .run(quad)
            .unwrap();
        store.residual.clear();
        store.forget_results();
        let (result, requests) = deferred(&mut store, quad, level, &words);
        assert_eq!(result, at_once);
        assert!(requests < 200, "{requests} requests");
    }
}
