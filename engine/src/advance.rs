//! The HashLife recursion: advance a quad of level n by any number of
//! generations t ≤ 2^(n-2) and get its centre, a quad of level n-1.
//!
//! Nine overlapping squares of level n-1 are advanced by t₁, their centres
//! form four squares of level n-1, and those are advanced by t₂, with
//! t₁ + t₂ = t and each at most 2^(n-3). An advance of a whole state by N
//! generations runs this once: at level m the only strides that occur are
//! the full stride 2^(m-2) and the residual N mod 2^(m-2). So each quad
//! memoises two results: the full-stride one in the quad itself and the
//! residual one in a side map kept while N's low bits stay the same. One
//! pass costs about two passes of the next power of two, never one pass per
//! binary digit of N.
//!
//! The base case is a quad of level 6 (64×64 cells) or smaller, advanced
//! by the bit-parallel kernel: on chaotic patterns, making and hashing every
//! smaller square in between costs more than computing it again. Every handle the recursion holds across an allocation sits on the
//! store's scratch stack, so the collector may run at any allocation.

use std::time::{Duration, Instant};

use crate::error::BudgetExceeded;
use crate::kernel::{self, Kernel, LeafGrid};
use crate::recursion::{self, SECOND_PHASE, Stride};
use crate::rule::Rule;
use crate::store::{Handle, LEAF_LEVEL, Store, StoreStats};

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
/// How many levels below the top are tracked for the progress estimate.
const TRACKED_DEPTH: usize = 4;

/// One advance of a state by N generations.
pub(crate) struct Advance<'a, 'o> {
    store: &'a mut Store,
    kernel: Kernel,
    /// N as little-endian 64-bit words
    steps: &'a [u64],
    /// N's trailing zero bits: the residual at level m is 0 iff m-2 ≤ this
    trailing_zeros: u64,
    top_level: u32,
    observer: Option<Observer<'o>>,
    /// (sub-advances done, sub-advances in all) at each tracked depth
    path: [(u8, u8); TRACKED_DEPTH],
    calls: u32,
    last_report: Instant,
}

impl<'a, 'o> Advance<'a, 'o> {
    /// Prepares an advance of a level-`top_level` quad by N generations,
    /// where N is given by its little-endian words and 0 < N < 2^(top_level-2).
    pub(crate) fn new(
        store: &'a mut Store,
        rule: Rule,
        steps: &'a [u64],
        top_level: u32,
        observer: Option<Observer<'o>>,
    ) -> Advance<'a, 'o> {
        let mut trailing_zeros = 0;
        for word in steps {
            if *word == 0 {
                trailing_zeros += 64;
            } else {
                trailing_zeros += word.trailing_zeros() as u64;
                break;
            }
        }
        Advance {
            store,
            kernel: Kernel::new(&rule),
            steps,
            trailing_zeros,
            top_level,
            observer,
            path: [(0, 0); TRACKED_DEPTH],
            calls: 0,
            last_report: Instant::now(),
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
        let result = self.advance(root, self.top_level, stride)?;
        if let Some(observer) = self.observer.as_mut() {
            observer(&Progress {
                done: 1.0,
                store: self.store.stats(),
            });
        }
        Ok(result)
    }

    fn bit(&self, index: u32) -> bool {
        let word = (index / 64) as usize;
        word < self.steps.len() && self.steps[word] >> (index % 64) & 1 == 1
    }

    /// The number of generations a stride means at a level ≤ `BASE_LEVEL`.
    fn small_steps(&self, level: u32, stride: Stride) -> u32 {
        debug_assert!((4..=BASE_LEVEL).contains(&level));
        let full = 1u32 << (level - 2);
        match stride {
            Stride::Full => full,
            Stride::Residual => (self.steps.first().copied().unwrap_or(0) as u32) & (full - 1),
        }
    }

    /// Advances a quad of level 4 to `BASE_LEVEL` (a square of side 16 to
    /// 64) with the kernel and builds its centre from the leaves out.
    fn base_case(
        &mut self,
        quad: Handle,
        level: u32,
        stride: Stride,
    ) -> Result<Handle, BudgetExceeded> {
        let side = 8usize << (level - LEAF_LEVEL);
        let mut leaves = [[0; 8]; 8];
        gather_leaves(self.store, quad, level, 0, 0, &mut leaves);
        let mut block = kernel::block_from_leaves(&leaves, side);
        self.kernel
            .advance_block(&mut block, side, self.small_steps(level, stride));
        let centre = kernel::centre_leaves(&block, side);
        build_from_leaves(self.store, &centre, level - 1, 0, 0)
    }

    fn advance(
        &mut self,
        quad: Handle,
        level: u32,
        stride: Stride,
    ) -> Result<Handle, BudgetExceeded> {
        if quad == self.store.known_empty(level) {
            return Ok(self.store.known_empty(level - 1));
        }
        if stride == Stride::Residual && self.trailing_zeros >= (level - 2) as u64 {
            return centre(self.store, quad, level);
        }
        let memo = match stride {
            Stride::Full => self.store.result(quad),
            Stride::Residual => match self.store.residual.get(&quad).copied() {
                Some(found) => {
                    self.store.touch(quad);
                    found
                }
                None => Handle::NONE,
            },
        };
        if memo != Handle::NONE {
            return Ok(memo);
        }
        self.tick();
        let result = if level <= BASE_LEVEL {
            self.base_case(quad, level, stride)?
        } else {
            self.advance_inner(quad, level, stride)?
        };
        match stride {
            Stride::Full => self.store.set_result(quad, result),
            Stride::Residual => {
                self.store.remember_residual(quad, result);
            }
        }
        Ok(result)
    }

    fn advance_inner(
        &mut self,
        quad: Handle,
        level: u32,
        stride: Stride,
    ) -> Result<Handle, BudgetExceeded> {
        // The first phase moves 2^(level-3) generations or none; the second
        // moves the rest.
        let (first, second) = recursion::phases(stride, self.bit(level - 3));
        let depth = (self.top_level - level) as usize;
        let parts = if first.is_some() { 13 } else { 4 };
        if depth < TRACKED_DEPTH {
            self.path[depth] = (0, parts);
        }
        let base = self.store.scratch.len();
        let g = grandchildren(self.store, quad);
        let mut mid = [[Handle::NONE; 3]; 3];
        for (i, row) in mid.iter_mut().enumerate() {
            for (j, cell) in row.iter_mut().enumerate() {
                let four = recursion::block(&g, i, j);
                *cell = match first {
                    None => centre_of_four(self.store, four, level - 2)?,
                    Some(stride) => {
                        let square = self.square(quad, i, j, four)?;
                        self.store.scratch.push(square);
                        let result = self.advance(square, level - 1, stride)?;
                        self.mark_done(depth);
                        result
                    }
                };
                self.store.scratch.push(*cell);
            }
        }
        let mut out = [Handle::NONE; 4];
        for (at, (i, j)) in SECOND_PHASE.into_iter().enumerate() {
            let square = self.store.join(recursion::block(&mid, i, j))?;
            self.store.scratch.push(square);
            out[at] = self.advance(square, level - 1, second)?;
            self.store.scratch.push(out[at]);
            self.mark_done(depth);
        }
        let result = self.store.join(out)?;
        self.store.scratch.truncate(base);
        Ok(result)
    }

    /// The level-(n-1) square at offset (i, j) in halves of a child: the
    /// corners are the children themselves, the others are joined.
    fn square(
        &mut self,
        quad: Handle,
        i: usize,
        j: usize,
        four: [Handle; 4],
    ) -> Result<Handle, BudgetExceeded> {
        Ok(match recursion::corner_child(i, j) {
            Some(at) => self.store.kids(quad)[at],
            None => self.store.join(four)?,
        })
    }

    fn mark_done(&mut self, depth: usize) {
        if depth < TRACKED_DEPTH {
            self.path[depth].0 += 1;
        }
    }

    /// Counts calls and reports progress now and then.
    fn tick(&mut self) {
        self.calls = self.calls.wrapping_add(1);
        if self.observer.is_none() || !self.calls.is_multiple_of(1024) {
            return;
        }
        let now = Instant::now();
        if now - self.last_report < PROGRESS_EVERY {
            return;
        }
        self.last_report = now;
        let mut done = 0.0;
        let mut weight = 1.0;
        for (finished, parts) in self.path {
            if parts == 0 {
                break;
            }
            done += weight * finished as f64 / parts as f64;
            weight /= parts as f64;
        }
        let progress = Progress {
            done: done.min(1.0),
            store: self.store.stats(),
        };
        if let Some(observer) = self.observer.as_mut() {
            observer(&progress);
        }
    }
}

/// The highest level advanced by the kernel: a square of 64×64 cells moved
/// 16 generations at once. Above it results are memoised in the store;
/// below it nothing is made but the result's own quads.
const BASE_LEVEL: u32 = 6;

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

/// The 4×4 grandchildren of an inner quad of level ≥ 5, row by row.
fn grandchildren(store: &Store, quad: Handle) -> [[Handle; 4]; 4] {
    recursion::grandchildren(store.kids(quad).map(|kid| store.kids(kid)))
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
