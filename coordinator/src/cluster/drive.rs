//! A cluster job from its stored state to its target: load the state onto
//! the nodes, advance in steps, store checkpoints, and when pieces were lost
//! with a node, roll back to the newest checkpoint and go on.
//!
//! Checkpoints (`checkpoint.rs`) are written in the embedded run's format,
//! by the nodes in parallel where they can.

use std::collections::HashSet;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::Context;
use deeptime_engine::cut::Piece;
use deeptime_engine::rule::Rule;
use deeptime_engine::{ContentId, KnownQuads, Universe};
use num_bigint::BigUint;

use crate::cluster::advance::{self, Memo};
use crate::cluster::checkpoint::Written;
use crate::cluster::members::{Board, Members};
use crate::cluster::recover::Recovered;
use crate::cluster::tasks::{Dispatcher, HandOver, PiecesLost};
use crate::job::Job;
use crate::numbers::for_people;
use crate::report::{self, BoxReport, EngineReport, Report};
use deeptime_engine::top::Top;
use deeptime_node::fetch::Peers;
use deeptime_storage::checkpoint::{Checkpoints, Manifest, RunIdentity};

/// Everything a cluster run works with.
pub struct Run<'a> {
    pub min_nodes: usize,
    pub job: &'a Job,
    pub job_id: &'a str,
    pub rule: Rule,
    pub shard_level: u32,
    pub budget: u64,
    pub pattern_digest: ContentId,
    pub members: &'a Arc<Members>,
    pub tasks: &'a Arc<Dispatcher>,
    pub board: &'a Arc<Board>,
    pub peers: Peers,
    /// the job's checkpoint folder as nodes name theirs (`storage::location`)
    pub checkpoint_location: String,
    /// how checkpoints were written, for the report
    pub written: Mutex<Written>,
    pub said_gathering: std::sync::atomic::AtomicBool,
}

/// The state on the nodes: the top of the tree and its root.
pub(super) struct OnNodes {
    pub top: Arc<Mutex<Top>>,
    pub root: ContentId,
    pub level: u32,
    pub generation: BigUint,
}

/// Pieces the finished sub-advances of a step may keep on the nodes for the
/// next step, beyond the state's, however small the state.
const MIN_CARRIED_PIECES: usize = 4096;

/// Keeps in the top what the next step needs: the state `(root, level)`,
/// `also` (quads only, no pieces), and the memo with what its results
/// need, unless the memo's pieces would more than double the state's (and
/// are more than `MIN_CARRIED_PIECES`): then the memo is forgotten. Returns
/// the pieces the nodes are to keep: the state's and the memo's.
pub(super) fn keep_for_next(
    top: &mut Top,
    state: (ContentId, u32),
    also: &[(ContentId, u32)],
) -> HashSet<ContentId> {
    let pieces = top.pieces(&state.0, state.1);
    let results = top.memo_results();
    let carried = top.pieces_under_quads(&results);
    let extra = carried.difference(&pieces).count();
    let roots: Vec<(ContentId, u32)> = std::iter::once(state).chain(also.iter().copied()).collect();
    if extra > pieces.len().max(MIN_CARRIED_PIECES) {
        top.memo_clear();
        top.keep_under(&roots);
        return pieces;
    }
    top.keep_under(&roots);
    pieces.union(&carried).copied().collect()
}

/// Times a step may lose pieces and recover them (see `recover`) before
/// the run rolls back.
const MAX_RECOVERIES: u32 = 3;

/// How an epoch (a run from one stored state) ended.
enum Ended {
    Target(OnNodes),
    Lost(anyhow::Error),
}

impl Run<'_> {
    /// What this run's checkpoints say it is (a cluster runs on the plane).
    pub(super) fn identity(&self) -> RunIdentity<'_> {
        RunIdentity {
            name: &self.job.name,
            pattern: &self.pattern_digest,
            universe: deeptime_engine::finite::Space::Plane,
            origin: (0, 0),
        }
    }

    pub(super) fn say(&self, state: &str) {
        self.board.status.lock().expect("board").state = state.to_string();
    }

    pub async fn drive(&self, fresh: Universe) -> anyhow::Result<Report> {
        let started = Instant::now();
        let checkpoints = Checkpoints::new(deeptime_storage::open(&self.job.checkpoint_dir)?);
        // One writer at a time: held until the run ends.
        let _lock = checkpoints.lock()?;
        // A new run stores its pattern as checkpoint 1 and loads it from
        // memory; a run that has checkpoints goes on from the newest that
        // loads, which the nodes read themselves where they can.
        let stored = tokio::task::block_in_place(|| checkpoints.manifest_keys())?;
        let (mut from_memory, mut previous, mut known) = if stored.is_empty() {
            let (universe, previous, known) = tokio::task::block_in_place(|| {
                crate::run::resume_or_start(
                    &checkpoints,
                    self.job,
                    fresh,
                    &self.identity(),
                    self.budget,
                )
            })?;
            (Some(universe), previous, known)
        } else {
            drop(fresh);
            (None, None, KnownQuads::default())
        };
        // The first load waits for --min-nodes; after a loss the run goes on
        // with the nodes that are left (or waits for one, if none is).
        let mut needed = self.min_nodes;
        loop {
            self.wait_for_nodes(needed).await;
            needed = 1;
            let loaded = match from_memory.as_mut() {
                Some(universe) => self.load(universe).await,
                None => match self.load_stored(&checkpoints).await {
                    Ok((on_nodes, manifest, stored_known)) => {
                        previous = Some(manifest);
                        known = stored_known;
                        Ok(on_nodes)
                    }
                    Err(error) => Err(error),
                },
            };
            let on_nodes = match loaded {
                Ok(on_nodes) => on_nodes,
                Err(error) if error.chain().any(|cause| cause.is::<PiecesLost>()) => {
                    tracing::warn!("{error:#}; loading again");
                    self.tasks.lose_the_gone().await;
                    self.tasks.forget_all();
                    continue;
                }
                Err(error) => return Err(error),
            };
            from_memory = None;
            match self
                .epoch(on_nodes, &checkpoints, &mut previous, &mut known)
                .await?
            {
                Ended::Target(state) => return self.report(&state, started).await,
                Ended::Lost(why) => {
                    tracing::warn!("{why:#}; rolling back to the newest checkpoint");
                    self.say("rolling back");
                    self.tasks.forget_all();
                }
            }
        }
    }

    async fn wait_for_nodes(&self, needed: usize) {
        let mut said = false;
        loop {
            let live = self.members.live().len();
            if live >= needed {
                return;
            }
            if !said {
                self.say("waiting");
                said = true;
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }

    /// Cuts the state at the shard level and hands its pieces to the live
    /// nodes, in runs of nearby pieces so that tasks find most of their
    /// input at one node.
    pub(super) async fn load(&self, universe: &mut Universe) -> anyhow::Result<OnNodes> {
        self.say("loading");
        let shard_level = self.shard_level;
        let cut = tokio::task::block_in_place(|| universe.cut(shard_level))?;
        let mut top = Top::new(shard_level);
        for quad in &cut.upper {
            top.insert(*quad);
        }
        // Pieces a node still has (a coordinator started again, a roll back
        // to a state the nodes still hold) stay where they are; the rest go
        // out in runs of neighbouring pieces.
        let live = self.members.live();
        let ids: Vec<ContentId> = cut.pieces.iter().map(|p| p.id).collect();
        let mut warm: std::collections::HashMap<ContentId, usize> = Default::default();
        for (at, member) in live.iter().enumerate() {
            for id in self.tasks.pieces_at(member, &ids).await {
                warm.entry(id).or_insert(at);
            }
        }
        let cold: Vec<_> = cut
            .pieces
            .iter()
            .filter(|p| !warm.contains_key(&p.id))
            .collect();
        if !warm.is_empty() {
            tracing::info!(
                "{} of {} pieces are on the nodes already",
                warm.len(),
                cut.pieces.len()
            );
        }
        let share = cold.len().div_ceil(live.len().max(1)).max(1);
        let mut chunks = cold.chunks(share);
        for (at, member) in live.iter().enumerate() {
            let pieces = chunks.next().unwrap_or(&[]);
            let mut batches = hand_over_batches(universe, pieces, shard_level - 1);
            let warm: Vec<_> = cut
                .pieces
                .iter()
                .filter(|p| warm.get(&p.id) == Some(&at))
                .map(|p| (p.id, p.figures))
                .collect();
            if !warm.is_empty() {
                batches.push(HandOver {
                    records: Vec::new(),
                    pieces: warm,
                });
            }
            if batches.is_empty() {
                continue;
            }
            self.tasks.hand_over(self.job_id, member, batches).await?;
        }
        let (root, level) = (cut.root, cut.root_level);
        let pieces = top.pieces(&root, level);
        self.tasks.retain(self.job_id, &pieces).await?;
        let generation = universe.generation().clone();
        {
            let mut status = self.board.status.lock().expect("board");
            status.generation = generation.to_string();
            status.started_from = generation.to_string();
            let differing = universe.population().to_string();
            report::show_population(&mut status, universe.background(), differing);
            status.bbox = universe
                .bounding_box()
                .map(|bbox| deeptime_proto::v1::BoundingBox {
                    left: bbox.left.to_string(),
                    top: bbox.top.to_string(),
                    width: bbox.width.to_string(),
                    height: bbox.height.to_string(),
                });
        }
        Ok(OnNodes {
            top: Arc::new(Mutex::new(top)),
            root,
            level,
            generation,
        })
    }

    /// Advances to the target, storing checkpoints on the way.
    async fn epoch(
        &self,
        mut state: OnNodes,
        checkpoints: &Checkpoints,
        previous: &mut Option<Manifest>,
        known: &mut KnownQuads,
    ) -> anyhow::Result<Ended> {
        self.say("running");
        let job = self.job;
        let shard_level = self.shard_level;
        let mut pacer = job.wall_clock.map(crate::run::Pacer::new);
        let mut last_checkpoint = Instant::now();
        let mut memo = Memo::default();
        // Recoveries in the current step (see `recover`).
        let mut recoveries = 0;
        while state.generation < job.target {
            // As in an embedded run: stop on every multiple of `every` and
            // at the target, in steps the wall-clock pacer allows.
            let stop = match &job.every {
                Some(every) => ((&state.generation / every + 1u32) * every).min(job.target.clone()),
                None => job.target.clone(),
            };
            let mut step: BigUint = &stop - &state.generation;
            if let Some(pacer) = &pacer {
                step = step.min(pacer.step.clone());
            }
            // A B0 rule's state away from the background the memo is made
            // for moves one generation on its own first (see
            // `deeptime_engine::rule::Background`).
            let from = self.rule.background(&state.generation);
            if !self.rule.memo_holds_from(from) {
                step = BigUint::from(1u32);
            }
            let stepping = Instant::now();
            // Kept (its top) until the step's checkpoint is stored: pieces
            // lost before then are read again from it.
            let start = (state.root, state.level, state.generation.clone());
            let (root, level) =
                state
                    .top
                    .lock()
                    .expect("top")
                    .grown_for(state.root, state.level, step.bits());
            let outcome = advance::advance(
                self.tasks,
                self.job_id,
                &state.top,
                &mut memo,
                root,
                level,
                (&step, from),
            )
            .await;
            let root = match outcome {
                Ok(root) => root,
                Err(error) => {
                    if error.chain().any(|cause| cause.is::<PiecesLost>()) {
                        recoveries += 1;
                        match self
                            .recover_or_end(error, recoveries, &state, previous, known)
                            .await?
                        {
                            None => continue,
                            Some(ended) => return Ok(ended),
                        }
                    }
                    return Err(error).with_context(|| {
                        format!(
                            "advancing {} generations from generation {}",
                            for_people(&step.to_string()),
                            for_people(&state.generation.to_string())
                        )
                    });
                }
            };
            state.generation += &step;
            let took = stepping.elapsed();
            let kept = {
                let mut top = state.top.lock().expect("top");
                let (root, level) = top.shrunk(root, level - 1, shard_level + 1);
                state.root = root;
                state.level = level;
                // The step's start stays in the top until the checkpoint is
                // stored (pieces lost meanwhile are read again from it).
                keep_for_next(&mut top, (root, level), &[(start.0, start.1)])
            };
            self.tasks.retain(self.job_id, &kept).await?;
            let (differing, bbox) = self.figures(&state);
            let background = self.rule.background(&state.generation);
            let (population, dead_cells) = report::population(background, differing.to_string());
            let population = report::population_for_people(&population, dead_cells.as_deref());
            {
                let mut status = self.board.status.lock().expect("board");
                status.generation = state.generation.to_string();
                report::show_population(&mut status, background, differing.to_string());
                status.bbox = bbox.map(|bbox| deeptime_proto::v1::BoundingBox {
                    left: bbox.left,
                    top: bbox.top,
                    width: bbox.width,
                    height: bbox.height,
                });
            }
            tracing::info!(
                "generation {}, population {}, {} tasks",
                for_people(&state.generation.to_string()),
                population,
                self.tasks.counters().done
            );
            let due = match pacer.as_mut() {
                Some(pacer) => {
                    pacer.record(&step, took);
                    pacer.due(last_checkpoint.elapsed())
                }
                None => false,
            };
            if state.generation != stop && !due {
                recoveries = 0;
                continue;
            }
            match self.checkpoint(&state, checkpoints, previous, known).await {
                Ok(()) => {
                    last_checkpoint = Instant::now();
                    recoveries = 0;
                }
                Err(error) if error.chain().any(|cause| cause.is::<PiecesLost>()) => {
                    // The new state's lost pieces were never stored: the
                    // step runs again from its start (stored), with what
                    // the memo still holds.
                    (state.root, state.level, state.generation) = start;
                    recoveries += 1;
                    if let Some(ended) = self
                        .recover_or_end(error, recoveries, &state, previous, known)
                        .await?
                    {
                        return Ok(ended);
                    }
                }
                Err(error) => return Err(error),
            }
        }
        Ok(Ended::Target(state))
    }

    /// After pieces were lost: puts the lost pieces of `state` back (see
    /// `recover`) and says to go on (None), or how the epoch ends.
    async fn recover_or_end(
        &self,
        error: anyhow::Error,
        recoveries: u32,
        state: &OnNodes,
        previous: &Option<Manifest>,
        known: &KnownQuads,
    ) -> anyhow::Result<Option<Ended>> {
        if recoveries > MAX_RECOVERIES {
            return Ok(Some(Ended::Lost(error.context(format!(
                "pieces were lost {MAX_RECOVERIES} times in one step"
            )))));
        }
        self.say("recovering");
        match self.recover(state, previous.as_ref(), known).await? {
            Recovered::Reloaded { pieces, sequence } => {
                tracing::warn!(
                    "{error:#}; read {pieces} lost pieces again from the packs of checkpoint {sequence}, and going on from generation {}",
                    for_people(&state.generation.to_string())
                );
                self.say("running");
                Ok(None)
            }
            Recovered::No(why) => Ok(Some(Ended::Lost(error.context(why)))),
        }
    }

    /// The canonical root of the state (the smallest centred quad holding
    /// every live cell: its id is the digest) and its level; below the
    /// shard level a node finds it.
    pub(super) async fn canonical(&self, state: &OnNodes) -> anyhow::Result<(ContentId, u32)> {
        let shard_level = self.shard_level;
        let (quad, at, kids) = {
            let mut top = state.top.lock().expect("top");
            let (quad, at) = top.shrunk(state.root, state.level, shard_level);
            (quad, at, top.kids(&quad, at))
        };
        if at == shard_level {
            return self.tasks.describe(self.job_id, at, kids).await;
        }
        Ok((quad, at))
    }

    /// The state's population and bounding box, from the pieces' figures.
    pub(super) fn figures(&self, state: &OnNodes) -> (BigUint, Option<BoxReport>) {
        let mut top = state.top.lock().expect("top");
        let pieces = top.pieces(&state.root, state.level);
        let figures = self.tasks.figures(&pieces);
        let (population, bbox) = top.bounding_box(&state.root, state.level, &figures);
        (population, bbox.as_ref().map(BoxReport::from))
    }

    async fn report(&self, state: &OnNodes, started: Instant) -> anyhow::Result<Report> {
        let (population, bbox) = self.figures(state);
        let (digest, _) = self.canonical(state).await?;
        let level = state.level;
        let members = self.members.all();
        let sum = |f: &dyn Fn(&crate::cluster::members::Member) -> u64| {
            members.iter().map(|m| f(m)).sum::<u64>()
        };
        use std::sync::atomic::Ordering::Relaxed;
        let background = self.rule.background(&state.generation);
        let (population, dead_cells) = report::population(background, population.to_string());
        Ok(Report {
            generation: state.generation.to_string(),
            background: background.name(),
            population,
            dead_cells,
            bbox,
            rule: self.members.terms.rule.clone(),
            digest: digest.to_string(),
            engine: EngineReport {
                quads: sum(&|m| m.quads.load(Relaxed)),
                leaves: 0,
                quads_created: self.tasks.counters().done,
                bytes: sum(&|m| m.bytes.load(Relaxed)),
                budget: sum(&|m| m.memory),
                collections: 0,
                memo_resets: 0,
                root_level: level,
                seconds: started.elapsed().as_secs_f64(),
            },
            bytes_read: None,
            pack_bytes: None,
            region: None,
            picture: None,
            universe: None,
            period: None,
        })
    }
}

/// Records (after children, each batch standing alone) that hand whole
/// pieces to a node in batches of about a quarter of MAX_BATCH records: a
/// batch holds its pieces as it ends, so a node whose memory fills while it
/// takes its share can spill the pieces of earlier batches.
fn hand_over_batches(universe: &mut Universe, pieces: &[&Piece], level: u32) -> Vec<HandOver> {
    let limit = deeptime_node::wire::MAX_BATCH / 4;
    let mut batches = Vec::new();
    let mut batch = HandOver {
        records: Vec::new(),
        pieces: Vec::new(),
    };
    let mut sent = std::collections::HashSet::new();
    for piece in pieces {
        let mut records = universe.records(piece.handle, level, &mut sent);
        if !batch.pieces.is_empty() && batch.records.len() + records.len() > limit {
            batches.push(std::mem::replace(
                &mut batch,
                HandOver {
                    records: Vec::new(),
                    pieces: Vec::new(),
                },
            ));
            sent.clear();
            records = universe.records(piece.handle, level, &mut sent);
        }
        batch.records.extend(records);
        batch.pieces.push((piece.id, piece.figures));
    }
    if !batch.pieces.is_empty() {
        batches.push(batch);
    }
    batches
}
