//! The coordinator's half of the one idea: the engine's walker
//! ([`deeptime_engine::walk`]) over the top of the tree ([`Top`]), with a
//! task on a node as its base case. The walker hands out every sub-advance
//! that does not wait for another; this file sends them as tasks, feeds the
//! answers back as they come, and keeps the memo from one step to the next.
//! What is left here is scheduling: equal tasks in flight are sent once,
//! and where each goes is the dispatcher's choice.

use std::collections::HashMap;
use std::sync::Mutex;
use std::sync::atomic::Ordering;

use anyhow::anyhow;
use deeptime_engine::ContentId;
use deeptime_engine::recursion::{self, Stride};
use deeptime_engine::rule::Background;
use deeptime_engine::top::{Quad, Top};
use deeptime_engine::walk::{Answer, Ticket, Tree, Walk};
use futures::FutureExt;
use futures::stream::{FuturesUnordered, StreamExt};
use num_bigint::BigUint;

use crate::cluster::tasks::Dispatcher;

/// Finished sub-advances a step hands on whole; beyond this, only the ones
/// it used.
const MAX_CARRIED: usize = 1 << 20;

/// The results of sub-advances above and at the shard level, kept from one
/// step to the next in the top's quads as the local engine keeps results
/// in its store, so what recurs (the regular parts of a pattern) is not
/// computed again. What is left here is which N the residual results are
/// for.
pub struct Memo {
    /// the N (little-endian words) the residual entries are for, and the
    /// background the advance started from (B0 rules)
    residual_for: (Vec<u64>, Background),
}

impl Default for Memo {
    fn default() -> Memo {
        Memo {
            residual_for: (Vec::new(), Background::Dead),
        }
    }
}

impl Memo {
    /// Before an advance by N from `from`: residual results hold only for
    /// the same N from the same background. (Full-stride results hold for
    /// every advance: all that are long enough to make them start from the
    /// background the rule settles in.)
    fn begin(&mut self, top: &mut Top, words: &[u64], from: Background) {
        let changed = (words, from) != (&self.residual_for.0[..], self.residual_for.1);
        if changed {
            self.residual_for = (words.to_vec(), from);
        }
        top.memo_begin(changed);
    }
}

/// A task the walker asked for: advance the level-K square `square` (of
/// these quarters) by `generations` (0: only its centre).
#[derive(Clone, Copy)]
struct Ask {
    ticket: Ticket,
    kids: [ContentId; 4],
    generations: u64,
}

/// The tasks of one advance: asked and not yet sent, and in flight.
#[derive(Default)]
struct Asks {
    unsent: Vec<Ask>,
    /// tickets by (square, generations): equal tasks share one
    tickets: HashMap<(Quad, u64), Ticket, ahash::RandomState>,
    by_ticket: HashMap<Ticket, (Quad, u64), ahash::RandomState>,
    /// centres of level-K squares found by tasks in this advance (the
    /// walker memoises advances only)
    centres: HashMap<Quad, Quad, ahash::RandomState>,
    next: u64,
}

impl Asks {
    fn ask(&mut self, square: Quad, kids: [ContentId; 4], generations: u64) -> Ticket {
        if let Some(ticket) = self.tickets.get(&(square, generations)) {
            return *ticket;
        }
        let ticket = Ticket(self.next);
        self.next += 1;
        self.tickets.insert((square, generations), ticket);
        self.by_ticket.insert(ticket, (square, generations));
        self.unsent.push(Ask {
            ticket,
            kids,
            generations,
        });
        ticket
    }

    /// A task's answer is in.
    fn settle(&mut self, ticket: Ticket, result: Quad) {
        if let Some(key) = self.by_ticket.remove(&ticket) {
            self.tickets.remove(&key);
            if key.1 == 0 {
                self.centres.insert(key.0, result);
            }
        }
    }
}

/// The top of the tree as the walker's tree, with tasks as its base case.
/// The walker works with the top's handles; content ids are read where a
/// quad leaves (a task, the memo, the result).
struct Remote<'a> {
    top: &'a mut Top,
    asks: &'a mut Asks,
    tasks: &'a Dispatcher,
    shard_level: u32,
    /// the empty quads from level K - 1 up
    empties: &'a [Quad],
}

impl Remote<'_> {
    fn ids(&self, quads: [Quad; 4]) -> [ContentId; 4] {
        quads.map(|quad| self.top.id(quad))
    }
}

impl Tree for Remote<'_> {
    type Quad = Quad;
    type Error = anyhow::Error;

    fn base_level(&self) -> u32 {
        self.shard_level
    }

    fn answers_later(&self) -> bool {
        true
    }

    fn is_empty(&self, quad: Quad, level: u32) -> bool {
        self.empty(level) == quad
    }

    /// (Below the pieces, which the walker meets only when it weighs the
    /// parts of a frame for its progress estimate, a piece stands for each
    /// of its quarters: the empty piece for empty ones.)
    fn empty(&self, level: u32) -> Quad {
        self.empties[(level + 1).saturating_sub(self.shard_level) as usize]
    }

    fn kids(&mut self, quad: Quad, level: u32) -> [Quad; 4] {
        if level < self.shard_level {
            return [quad; 4];
        }
        self.top.kids_of(quad)
    }

    fn join(&mut self, kids: [Quad; 4], level: u32) -> anyhow::Result<Quad> {
        Ok(self.top.join_quads(level, kids))
    }

    fn memo(&mut self, quad: Quad, _level: u32, stride: Stride) -> Option<Quad> {
        let result = self.top.memo(quad, stride)?;
        self.tasks.memoised.fetch_add(1, Ordering::Relaxed);
        Some(result)
    }

    fn remember(&mut self, quad: Quad, _level: u32, stride: Stride, result: Quad) {
        self.top.remember(quad, stride, result);
    }

    fn base(&mut self, quad: Quad, level: u32, generations: u64) -> anyhow::Result<Answer<Quad>> {
        debug_assert_eq!(level, self.shard_level, "the walk reaches tasks at level K");
        let kids = self.ids(self.top.kids_of(quad));
        Ok(Answer::Later(self.asks.ask(quad, kids, generations)))
    }

    /// Above the pieces, from the top's own quads; of four pieces, a task
    /// of no generations on the level-K square they make.
    fn centre_of_four(&mut self, four: [Quad; 4], level: u32) -> anyhow::Result<Answer<Quad>> {
        if level >= self.shard_level {
            let grandchildren = four.map(|quad| self.top.kids_of(quad));
            let centre = recursion::centre_of_four(grandchildren);
            return Ok(Answer::Now(self.top.join_quads(level, centre)));
        }
        let square = self.top.join_quads(level + 1, four);
        if let Some(centre) = self.asks.centres.get(&square) {
            return Ok(Answer::Now(*centre));
        }
        let kids = self.ids(four);
        Ok(Answer::Later(self.asks.ask(square, kids, 0)))
    }
}

/// Advances `root` (of `level`, grown for N: see [`Top::grown_for`]) by N
/// generations from a generation whose background is `from` (more than one
/// only from the background the rule settles in) with tasks on the nodes;
/// returns the root's centre. On an error every task still in flight is
/// dropped (its call cancelled).
pub async fn advance(
    tasks: &Dispatcher,
    job: &str,
    top: &Mutex<Top>,
    memo: &mut Memo,
    root: ContentId,
    level: u32,
    (steps, from): (&BigUint, Background),
) -> anyhow::Result<ContentId> {
    let shard_level = top.lock().expect("top").shard_level;
    let words = steps.to_u64_digits();
    let mut walk = Walk::new(&words, level);
    let mut asks = Asks::default();
    // The empty quads from level K - 1 up, and the walk started, under one
    // lock of the top.
    let empties: Vec<Quad>;
    let mut out;
    {
        let mut top = top.lock().expect("top");
        memo.begin(&mut top, &words, from);
        empties = (shard_level - 1..=level)
            .map(|at| {
                let id = top.empty(at);
                top.quad(&id).expect("the top has its empty quads")
            })
            .collect();
        let root = top
            .quad(&root)
            .ok_or_else(|| anyhow!("the root {} is not in the top of the tree", root.short()))?;
        let mut remote = Remote {
            top: &mut top,
            asks: &mut asks,
            tasks,
            shard_level,
            empties: &empties,
        };
        out = walk.start(&mut remote, root, Stride::Residual)?;
    }
    let mut running = FuturesUnordered::new();
    loop {
        if let Some(result) = out {
            let mut top = top.lock().expect("top");
            top.memo_end(MAX_CARRIED);
            return Ok(top.id(result));
        }
        for ask in asks.unsent.drain(..) {
            running.push(async move {
                let outcome = tasks
                    .advance(job, shard_level, ask.kids, (ask.generations, from))
                    .await;
                (ask, outcome)
            });
        }
        let Some((ask, outcome)) = running.next().await else {
            return Err(anyhow!(
                "the advance waits for {} answers but no task is running",
                walk.unanswered().count()
            ));
        };
        // Every answer that is in goes to the walker before it runs again.
        let mut answers = vec![(ask, outcome?)];
        while let Some(Some((ask, outcome))) = running.next().now_or_never() {
            answers.push((ask, outcome?));
        }
        let mut top = top.lock().expect("top");
        let mut remote = Remote {
            top: &mut top,
            asks: &mut asks,
            tasks,
            shard_level,
            empties: &empties,
        };
        for (ask, result) in answers {
            let result = remote.top.piece(result);
            remote.asks.settle(ask.ticket, result);
            walk.answer(&mut remote, ask.ticket, result);
        }
        // A run may take long on a deep tree: other work of this runtime
        // moves to another thread meanwhile.
        out = tokio::task::block_in_place(|| walk.run(&mut remote))?;
    }
}
