//! The coordinator's half of the one idea: the engine's HashLife recursion
//! (its shape from `deeptime_engine::recursion`) run over content ids above
//! the shard level K, with a task on a node as its base case. The nine
//! first-phase sub-advances of a square are independent and run
//! concurrently, then the four of the second phase; equal sub-advances are
//! computed once, even while in flight.

use std::collections::HashMap;
use std::sync::{Arc, Mutex};

use deeptime_engine::ContentId;
use deeptime_engine::recursion::{self, SECOND_PHASE, Stride};
use futures::future::{BoxFuture, FutureExt, Shared, try_join_all};
use num_bigint::BigUint;

use crate::cluster::tasks::{Dispatcher, PiecesLost};
use crate::cluster::upper::Upper;

type Failure = Arc<anyhow::Error>;
type Pending = Shared<BoxFuture<'static, Result<ContentId, Failure>>>;

/// A memo entry: the result's level, its shared future, and whether the
/// advance holding it made or used it.
type MemoEntry = (u32, Pending, bool);

/// What a memo entry is keyed by besides the quad.
#[derive(Clone, Copy, PartialEq, Eq, Hash, Debug)]
pub enum Kind {
    Step(Stride),
    /// the centre, no generations on
    Centre,
}

/// Runs `work` as a task of its own, so that a finished sub-advance wakes
/// only the advances waiting for it (one future tree polled as a whole
/// costs time in proportion to its size at every wake), and sub-advances
/// run on every thread of the runtime.
fn spawned(
    advance: &Advance,
    work: impl std::future::Future<Output = Result<ContentId, Failure>> + Send + 'static,
) -> Pending {
    let running = advance.running.clone();
    let handle = tokio::spawn({
        let running = running.clone();
        async move {
            let outcome = work.await;
            running.lock().expect("running").remove(&tokio::task::id());
            outcome
        }
    });
    {
        let mut running = running.lock().expect("running");
        running.insert(handle.id(), handle.abort_handle());
        if handle.is_finished() {
            running.remove(&handle.id());
        }
    }
    async move {
        match handle.await {
            Ok(outcome) => outcome,
            Err(error) => Err(Arc::new(anyhow::anyhow!("a sub-advance failed: {error}"))),
        }
    }
    .boxed()
    .shared()
}

/// The finished sub-advances of one advance, handed to the next so that
/// what recurs (the same quads advanced by the same strides: the regular
/// parts of a pattern) is not computed again, as the local engine keeps
/// its results in its quads.
pub struct Carried {
    /// the N of the advance they came from (residual strides depend on it)
    steps: BigUint,
    /// the memo, finished entries only
    memo: HashMap<(ContentId, Kind), MemoEntry, ahash::RandomState>,
}

impl Carried {
    /// The results (each with its level), for keeping what they need.
    pub fn results(&self) -> Vec<(ContentId, u32)> {
        self.memo
            .values()
            .filter_map(|(level, pending, _)| match pending.peek() {
                Some(Ok(result)) => Some((*result, *level)),
                _ => None,
            })
            .collect()
    }
}

/// Finished sub-advances an advance hands on whole; beyond this, only the
/// ones it made or used (each entry is about 150 bytes).
const MAX_CARRIED: usize = 1 << 20;

/// One advance of the whole state by N generations.
pub struct Advance {
    pub job: String,
    pub upper: Arc<Mutex<Upper>>,
    pub tasks: Arc<Dispatcher>,
    shard_level: u32,
    /// N as little-endian bits
    steps: BigUint,
    trailing_zeros: u64,
    /// (quad, kind) → (the result's level, its shared future, whether this
    /// advance made or used it: past `MAX_CARRIED` entries only those go on
    /// to the next advance, so the memo stays bounded)
    memo: Mutex<HashMap<(ContentId, Kind), MemoEntry, ahash::RandomState>>,
    /// set when one sub-advance failed: the others stop at their next step
    cancelled: std::sync::atomic::AtomicBool,
    /// the sub-advances running now, to stop them at once when one fails
    /// (only running ones: a handle kept per finished task would keep its
    /// memory until the advance ends)
    running: Arc<Mutex<HashMap<tokio::task::Id, tokio::task::AbortHandle>>>,
}

impl Advance {
    pub fn new(
        job: String,
        upper: Arc<Mutex<Upper>>,
        tasks: Arc<Dispatcher>,
        steps: BigUint,
        carried: Option<Carried>,
    ) -> Arc<Advance> {
        let shard_level = upper.lock().expect("upper").shard_level;
        let trailing_zeros = steps.trailing_zeros().unwrap_or(0);
        let mut memo: HashMap<(ContentId, Kind), MemoEntry, ahash::RandomState> =
            HashMap::default();
        if let Some(carried) = carried {
            let same_steps = carried.steps == steps;
            memo = carried.memo;
            // A residual stride means N's low bits: only for the same N.
            memo.retain(|(_, kind), entry| {
                entry.2 = false;
                same_steps || *kind != Kind::Step(Stride::Residual)
            });
        }
        Arc::new(Advance {
            job,
            upper,
            tasks,
            shard_level,
            steps,
            trailing_zeros,
            memo: Mutex::new(memo),
            cancelled: std::sync::atomic::AtomicBool::new(false),
            running: Arc::new(Mutex::new(HashMap::new())),
        })
    }

    /// Advances `root` (of `level`, with N < 2^(level-2)) by N; its centre.
    pub async fn run(self: &Arc<Self>, root: ContentId, level: u32) -> anyhow::Result<ContentId> {
        self.clone()
            .advance(root, level, Stride::Residual)
            .await
            .map_err(|failure| {
                // Shared results carry the error behind an Arc: keep its kind.
                if failure.chain().any(|cause| cause.is::<PiecesLost>()) {
                    PiecesLost(format!("{failure:#}")).into()
                } else {
                    anyhow::anyhow!("{failure:#}")
                }
            })
    }

    /// Stops every sub-advance still running (after one failed): each
    /// fails at its next step, and no new task is sent.
    pub fn abort_all(&self) {
        self.cancelled
            .store(true, std::sync::atomic::Ordering::Relaxed);
        self.memo.lock().expect("memo").clear();
    }

    /// Its finished sub-advances, for the next advance.
    /// (Takes them: call it once the advance is over.)
    ///
    /// Centres stay behind. A centre is no work (a node joins quarters of
    /// quads it mostly holds already, no generation computed), but its
    /// result is a piece off the state's grid, and every carried result's
    /// pieces stay held on the nodes through the whole next step. A step
    /// shorter than 2^(K-2) asks for the centres of all its level-K squares
    /// first: carried on, those of a 2048² soup's step of 16 at K = 8 (289
    /// pieces beside the state's 320, while the whole carried memo answered
    /// one call in the next step) nearly doubled what each node held into
    /// it, past a 4 MiB node's budget. Where the state recurs,
    /// the centres are asked again, come out the same pieces, and the
    /// sub-advances on them are found carried.
    pub fn finished(&self) -> Carried {
        let mut memo = std::mem::take(&mut *self.memo.lock().expect("memo"));
        let whole = memo.len() <= MAX_CARRIED;
        memo.retain(|&(_, kind), (_, pending, used)| {
            kind != Kind::Centre && (*used || whole) && matches!(pending.peek(), Some(Ok(_)))
        });
        Carried {
            steps: self.steps.clone(),
            memo,
        }
    }

    fn check_cancelled(&self) -> Result<(), Failure> {
        if self.cancelled.load(std::sync::atomic::Ordering::Relaxed) {
            return Err(Arc::new(anyhow::anyhow!("the advance was stopped")));
        }
        Ok(())
    }

    fn bit(&self, index: u32) -> bool {
        self.steps.bit(index as u64)
    }

    /// The generations a stride means at the shard level.
    fn task_steps(&self, stride: Stride) -> u64 {
        let full = 1u64 << (self.shard_level - 2);
        match stride {
            Stride::Full => full,
            Stride::Residual => {
                let low = self.steps.iter_u64_digits().next().unwrap_or(0);
                low & (full - 1)
            }
        }
    }

    fn advance(
        self: Arc<Self>,
        quad: ContentId,
        level: u32,
        stride: Stride,
    ) -> BoxFuture<'static, Result<ContentId, Failure>> {
        // Most calls find the sub-advance done already: answer those at
        // once, without a task or a wait on a shared future.
        if let Some(done) = self.done(quad, level, stride) {
            return futures::future::ready(done).boxed();
        }
        async move {
            // (Empty quads were answered by `done`.)
            if stride == Stride::Residual && self.trailing_zeros >= (level - 2) as u64 {
                return self.centre(quad, level).await;
            }
            let key = (quad, Kind::Step(stride));
            let pending = {
                let mut memo = self.memo.lock().expect("memo");
                if let Some((_, pending, used)) = memo.get_mut(&key) {
                    *used = true;
                    self.tasks
                        .memoised
                        .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                    pending.clone()
                } else {
                    let this = self.clone();
                    let work = spawned(&self, async move {
                        if level == this.shard_level {
                            let kids = this.upper.lock().expect("upper").kids(&quad, level);
                            let steps = this.task_steps(stride);
                            this.task(kids, steps).await
                        } else {
                            this.advance_inner(quad, level, stride).await
                        }
                    });
                    memo.insert(key, (level - 1, work.clone(), true));
                    work
                }
            };
            pending.await
        }
        .boxed()
    }

    /// The result of a sub-advance that needs no waiting: an empty quad's,
    /// or one the memo holds finished.
    fn done(
        &self,
        quad: ContentId,
        level: u32,
        stride: Stride,
    ) -> Option<Result<ContentId, Failure>> {
        {
            let mut upper = self.upper.lock().expect("upper");
            if quad == upper.empty(level) {
                return Some(Ok(upper.empty(level - 1)));
            }
        }
        if stride == Stride::Residual && self.trailing_zeros >= (level - 2) as u64 {
            return None;
        }
        let mut memo = self.memo.lock().expect("memo");
        let entry = memo.get_mut(&(quad, Kind::Step(stride)))?;
        let finished = entry.1.peek()?.clone();
        entry.2 = true;
        self.tasks
            .memoised
            .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        Some(finished)
    }

    async fn task(&self, kids: [ContentId; 4], steps: u64) -> Result<ContentId, Failure> {
        self.check_cancelled()?;
        self.tasks
            .advance(&self.job, self.shard_level, kids, steps)
            .await
            .map_err(Arc::new)
    }

    /// The centre of a quad (no generations on): from the top of the tree
    /// when the quad is above K, else a task of stride 0.
    fn centre(
        self: Arc<Self>,
        quad: ContentId,
        level: u32,
    ) -> BoxFuture<'static, Result<ContentId, Failure>> {
        async move {
            if level > self.shard_level {
                return Ok(self.upper.lock().expect("upper").centre(&quad, level));
            }
            let key = (quad, Kind::Centre);
            let pending = {
                let mut memo = self.memo.lock().expect("memo");
                let entry = memo.entry(key).or_insert_with(|| {
                    let this = self.clone();
                    let work = spawned(&self, async move {
                        let kids = this.upper.lock().expect("upper").kids(&quad, level);
                        this.task(kids, 0).await
                    });
                    (level - 1, work, true)
                });
                entry.2 = true;
                entry.1.clone()
            };
            pending.await
        }
        .boxed()
    }

    async fn advance_inner(
        self: Arc<Self>,
        quad: ContentId,
        level: u32,
        stride: Stride,
    ) -> Result<ContentId, Failure> {
        let (first, second) = recursion::phases(stride, self.bit(level - 3));
        let (g, kids) = {
            let mut upper = self.upper.lock().expect("upper");
            let kids = upper.kids(&quad, level);
            let of_kids = kids.map(|kid| upper.kids(&kid, level - 1));
            (recursion::grandchildren(of_kids), kids)
        };
        // Phase one: nine squares of level n-1, each advanced (or centred:
        // the centre of four level-(n-2) quads is a level-(n-1) square's
        // centre). The squares are made under one lock.
        let squares: Vec<ContentId> = {
            let mut upper = self.upper.lock().expect("upper");
            (0..9)
                .map(|at| {
                    let (i, j) = (at / 3, at % 3);
                    match (first, recursion::corner_child(i, j)) {
                        (Some(_), Some(corner)) => kids[corner],
                        _ => upper.join(level - 1, recursion::block(&g, i, j)),
                    }
                })
                .collect()
        };
        let nine: Vec<_> = squares
            .into_iter()
            .map(|square| match first {
                None => self.clone().centre(square, level - 1),
                Some(stride) => self.clone().advance(square, level - 1, stride),
            })
            .collect();
        let nine = try_join_all(nine).await?;
        let mid: [[ContentId; 3]; 3] = [
            [nine[0], nine[1], nine[2]],
            [nine[3], nine[4], nine[5]],
            [nine[6], nine[7], nine[8]],
        ];
        // Phase two: four squares of the results, advanced the rest.
        let squares: Vec<ContentId> = {
            let mut upper = self.upper.lock().expect("upper");
            SECOND_PHASE
                .iter()
                .map(|&(i, j)| upper.join(level - 1, recursion::block(&mid, i, j)))
                .collect()
        };
        let four: Vec<_> = squares
            .into_iter()
            .map(|square| self.clone().advance(square, level - 1, second))
            .collect();
        let out = try_join_all(four).await?;
        let result = self
            .upper
            .lock()
            .expect("upper")
            .join(level - 1, [out[0], out[1], out[2], out[3]]);
        Ok(result)
    }
}
