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
use deeptime_engine::top::Top;
use deeptime_engine::walk::{Answer, Ticket, Tree, Walk};
use futures::FutureExt;
use futures::stream::{FuturesUnordered, StreamExt};
use num_bigint::BigUint;

use crate::cluster::tasks::Dispatcher;

/// Finished sub-advances a step hands on whole; beyond this, only the ones
/// it used (an entry is about 80 bytes).
const MAX_CARRIED: usize = 1 << 20;

/// The results of sub-advances above and at the shard level, kept from one
/// step to the next as the local engine keeps results in its quads, so
/// what recurs (the regular parts of a pattern) is not computed again.
#[derive(Default)]
pub struct Memo {
    entries: HashMap<(ContentId, Stride), Entry, ahash::RandomState>,
    /// the N (little-endian words) the residual entries are for
    residual_for: Vec<u64>,
}

struct Entry {
    result: ContentId,
    /// the result's level
    level: u32,
    /// found or made by the latest advance
    used: bool,
}

impl Memo {
    /// Before an advance by N: residual results hold only for the same N.
    fn begin(&mut self, words: &[u64]) {
        if words != self.residual_for {
            self.entries
                .retain(|(_, stride), _| *stride != Stride::Residual);
            self.residual_for = words.to_vec();
        }
        for entry in self.entries.values_mut() {
            entry.used = false;
        }
    }

    /// After an advance: past `MAX_CARRIED` entries only the used ones stay.
    fn end(&mut self) {
        if self.entries.len() > MAX_CARRIED {
            self.entries.retain(|_, entry| entry.used);
        }
    }

    /// The results (each with its level), for keeping what they need.
    pub fn results(&self) -> Vec<(ContentId, u32)> {
        self.entries
            .values()
            .map(|entry| (entry.result, entry.level))
            .collect()
    }

    pub fn clear(&mut self) {
        self.entries.clear();
    }

    /// Keeps only the entries whose result (id, level) passes `keep`.
    pub fn forget_unless(&mut self, mut keep: impl FnMut(ContentId, u32) -> bool) {
        self.entries
            .retain(|_, entry| keep(entry.result, entry.level));
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
    tickets: HashMap<(ContentId, u64), Ticket, ahash::RandomState>,
    by_ticket: HashMap<Ticket, (ContentId, u64), ahash::RandomState>,
    /// centres of level-K squares found by tasks in this advance (the
    /// walker memoises advances only)
    centres: HashMap<ContentId, ContentId, ahash::RandomState>,
    next: u64,
}

impl Asks {
    fn ask(&mut self, square: ContentId, kids: [ContentId; 4], generations: u64) -> Ticket {
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
    fn settle(&mut self, ticket: Ticket, result: ContentId) {
        if let Some(key) = self.by_ticket.remove(&ticket) {
            self.tickets.remove(&key);
            if key.1 == 0 {
                self.centres.insert(key.0, result);
            }
        }
    }
}

/// The top of the tree as the walker's tree, with tasks as its base case.
struct Remote<'a> {
    top: &'a mut Top,
    memo: &'a mut Memo,
    asks: &'a mut Asks,
    tasks: &'a Dispatcher,
    shard_level: u32,
}

impl Tree for Remote<'_> {
    type Quad = ContentId;
    type Error = anyhow::Error;

    fn base_level(&self) -> u32 {
        self.shard_level
    }

    fn answers_later(&self) -> bool {
        true
    }

    fn is_empty(&self, quad: ContentId, level: u32) -> bool {
        self.top.known_empty(level) == Some(quad)
    }

    fn empty(&self, level: u32) -> ContentId {
        self.top
            .known_empty(level)
            .expect("the empty quads up to the root were made before the walk")
    }

    fn kids(&mut self, quad: ContentId, level: u32) -> [ContentId; 4] {
        self.top.kids(&quad, level)
    }

    fn join(&mut self, kids: [ContentId; 4], level: u32) -> anyhow::Result<ContentId> {
        Ok(self.top.join(level, kids))
    }

    fn memo(&mut self, quad: ContentId, _level: u32, stride: Stride) -> Option<ContentId> {
        let entry = self.memo.entries.get_mut(&(quad, stride))?;
        entry.used = true;
        self.tasks.memoised.fetch_add(1, Ordering::Relaxed);
        Some(entry.result)
    }

    fn remember(&mut self, quad: ContentId, level: u32, stride: Stride, result: ContentId) {
        self.memo.entries.insert(
            (quad, stride),
            Entry {
                result,
                level: level - 1,
                used: true,
            },
        );
    }

    fn base(
        &mut self,
        quad: ContentId,
        level: u32,
        generations: u64,
    ) -> anyhow::Result<Answer<ContentId>> {
        debug_assert_eq!(level, self.shard_level, "the walk reaches tasks at level K");
        let kids = self.top.kids(&quad, level);
        Ok(Answer::Later(self.asks.ask(quad, kids, generations)))
    }

    /// Above the pieces, from the top's own quads; of four pieces, a task
    /// of no generations on the level-K square they make.
    fn centre_of_four(
        &mut self,
        four: [ContentId; 4],
        level: u32,
    ) -> anyhow::Result<Answer<ContentId>> {
        if level >= self.shard_level {
            let grandchildren = four.map(|quad| self.top.kids(&quad, level));
            let centre = recursion::centre_of_four(grandchildren);
            return Ok(Answer::Now(self.top.join(level, centre)));
        }
        let square = self.top.join(level + 1, four);
        if let Some(centre) = self.asks.centres.get(&square) {
            return Ok(Answer::Now(*centre));
        }
        Ok(Answer::Later(self.asks.ask(square, four, 0)))
    }
}

/// Advances `root` (of `level`, grown for N: see [`Top::grown_for`]) by N
/// generations with tasks on the nodes; returns the root's centre. On an
/// error every task still in flight is dropped (its call cancelled).
pub async fn advance(
    tasks: &Dispatcher,
    job: &str,
    top: &Mutex<Top>,
    memo: &mut Memo,
    root: ContentId,
    level: u32,
    steps: &BigUint,
) -> anyhow::Result<ContentId> {
    let shard_level = top.lock().expect("top").shard_level;
    let words = steps.to_u64_digits();
    memo.begin(&words);
    let mut walk = Walk::new(&words, level);
    let mut asks = Asks::default();
    let mut out = {
        let mut top = top.lock().expect("top");
        top.empty(level);
        let mut remote = Remote {
            top: &mut top,
            memo,
            asks: &mut asks,
            tasks,
            shard_level,
        };
        walk.start(&mut remote, root, Stride::Residual)?
    };
    let mut running = FuturesUnordered::new();
    loop {
        if let Some(result) = out {
            memo.end();
            return Ok(result);
        }
        for ask in asks.unsent.drain(..) {
            running.push(async move {
                let outcome = tasks
                    .advance(job, shard_level, ask.kids, ask.generations)
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
            memo,
            asks: &mut asks,
            tasks,
            shard_level,
        };
        for (ask, result) in answers {
            remote.asks.settle(ask.ticket, result);
            walk.answer(&mut remote, ask.ticket, result);
        }
        // A run may take long on a deep tree: other work of this runtime
        // moves to another thread meanwhile.
        out = tokio::task::block_in_place(|| walk.run(&mut remote))?;
    }
}
