//! The node's gRPC service: tasks (the coordinator's base case), records
//! for peers, quads handed over by the coordinator, retention and figures.
//! CPU work runs on blocking threads; the shard is locked only briefly
//! around engine calls, never across a network wait.

use std::collections::HashSet;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Instant;

use deeptime_engine::ContentId;
use deeptime_engine::rule::Background;
use deeptime_engine::shard::{Record, Shard, ShardError};
use deeptime_proto::v1;
use tonic::{Request, Response, Status};

use crate::fetch::{Fetched, Here, Peers, fetch_missing};
use crate::spill::{Failure, Spill, Spilled};
use crate::wire::{self, MAX_BATCH};

/// The job a node works for, as the coordinator described it at join.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct JobTerms {
    pub job: String,
    pub shard_level: u32,
}

/// A node's state, shared by its service and its membership loop.
pub struct NodeState {
    pub shard: Arc<Mutex<Option<Shard>>>,
    pub terms: Mutex<Option<JobTerms>>,
    pub peers: Peers,
    pub budget: u64,
    pub tasks_done: AtomicU64,
    /// where this node writes checkpoint packs, if it does
    pub checkpoints: Option<crate::packs::Checkpoints>,
    /// the quads of the packs this node wrote, for incremental packs
    pub written: Mutex<crate::packs::Written>,
    /// where and how much this node may spill when its store is full
    /// (None: it never spills)
    pub spill_to: Option<(Arc<dyn deeptime_storage::Storage>, u64)>,
    /// the pieces it spilled for the job it works for (locked after the
    /// shard, never before)
    pub spill: Mutex<Option<Spill>>,
}

impl NodeState {
    pub(crate) fn terms(&self, job: &str) -> Result<JobTerms, Status> {
        let terms = self.terms.lock().expect("terms").clone();
        match terms {
            Some(terms) if terms.job == job => Ok(terms),
            Some(_) => Err(Status::failed_precondition(
                "this node works for another job",
            )),
            None => Err(Status::failed_precondition(
                "this node has not joined a job",
            )),
        }
    }

    /// Runs `work` on the shard (on a blocking thread: it may take long).
    /// When the store is full and the node may spill, it writes out pieces
    /// it holds outside `spare` and runs `work` again, until it fits or
    /// nothing more can go.
    pub(crate) fn on_shard<T>(
        &self,
        spare: &[ContentId],
        mut work: impl FnMut(&mut Shard, Option<&mut Spill>) -> Result<T, Failure>,
    ) -> Result<T, Status> {
        let mut guard = self.shard.lock().expect("shard");
        let shard = guard
            .as_mut()
            .ok_or_else(|| Status::failed_precondition("this node has not joined a job"))?;
        let mut spill = self.spill.lock().expect("spill");
        let spare: HashSet<ContentId> = spare.iter().copied().collect();
        let failed = |failure| match failure {
            Failure::Shard(error) => wire::shard_status(error),
            Failure::Storage(status) => status,
        };
        loop {
            match work(shard, spill.as_mut()) {
                Ok(value) => return Ok(value),
                Err(Failure::Shard(ShardError::Budget(budget))) => {
                    let spilled = match spill.as_mut() {
                        Some(spill) => spill.spill(shard, &spare).map_err(failed)?,
                        None => Spilled::Nothing,
                    };
                    let full = wire::shard_status(ShardError::Budget(budget));
                    match (spilled, spill.as_ref()) {
                        (Spilled::LetGo, _) => {}
                        (Spilled::OverLimit, Some(spill)) => {
                            return Err(Status::resource_exhausted(format!(
                                "{}, and {}",
                                full.message(),
                                spill.limit_text()
                            )));
                        }
                        _ => return Err(full),
                    }
                }
                Err(failure) => return Err(failed(failure)),
            }
        }
    }

    /// `on_shard` from async code.
    async fn with_shard<T: Send + 'static>(
        self: &Arc<Self>,
        spare: Vec<ContentId>,
        work: impl FnMut(&mut Shard, Option<&mut Spill>) -> Result<T, Failure> + Send + 'static,
    ) -> Result<T, Status> {
        self.with_fetched(spare, Vec::new(), work).await
    }

    /// `with_shard` for work on what a fetch found here: gives it back
    /// (`Here::give_back`) once the work is done, or has failed.
    async fn with_fetched<T: Send + 'static>(
        self: &Arc<Self>,
        spare: Vec<ContentId>,
        found: Vec<ContentId>,
        work: impl FnMut(&mut Shard, Option<&mut Spill>) -> Result<T, Failure> + Send + 'static,
    ) -> Result<T, Status> {
        let state = self.clone();
        tokio::task::spawn_blocking(move || {
            let outcome = state.on_shard(&spare, work);
            state.give_back(&found);
            outcome
        })
        .await
        .map_err(|error| Status::internal(format!("a task failed: {error}")))?
    }

    /// Makes sure the four quarters of a square are here, fetching the
    /// missing ones from their sources.
    async fn gather(
        self: &Arc<Self>,
        square: &v1::Square,
        level: u32,
    ) -> Result<([ContentId; 4], Fetched), Status> {
        let kids = wire::ids4_from(&square.kids)?;
        if square.sources.len() > 4 {
            return Err(Status::invalid_argument("a square has four quarters"));
        }
        let mut wanted = Vec::new();
        for (at, kid) in kids.iter().enumerate() {
            let sources = square
                .sources
                .get(at)
                .map(|s| s.addresses.clone())
                .unwrap_or_default();
            wanted.push((*kid, level - 1, sources));
        }
        let fetched = fetch_missing(self.clone(), &self.peers, wanted).await?;
        Ok((kids, fetched))
    }
}

/// A node's own quads, and those it spilled, which it reads back rather
/// than fetch.
impl Here for NodeState {
    fn lacking(&self, ids: &[ContentId]) -> Result<Vec<bool>, Status> {
        self.on_shard(ids, |shard, spill| {
            if let Some(spill) = spill {
                spill.reload_all(shard, ids)?;
            }
            Ok(ids.iter().map(|id| !shard.borrow(id)).collect())
        })
    }

    fn give_back(&self, ids: &[ContentId]) {
        if let Some(shard) = self.shard.lock().expect("shard").as_mut() {
            shard.give_back(ids);
        }
    }
}

pub struct NodeService {
    pub state: Arc<NodeState>,
}

/// Attempts at a task whose inputs the collector took between fetch and use.
const ATTEMPTS: usize = 3;

#[tonic::async_trait]
impl v1::node_server::Node for NodeService {
    async fn advance(
        &self,
        request: Request<v1::AdvanceTask>,
    ) -> Result<Response<v1::AdvanceOutcome>, Status> {
        let task = request.into_inner();
        let terms = self.state.terms(&task.job)?;
        if task.level != terms.shard_level {
            return Err(Status::invalid_argument(format!(
                "a task of level {}, the shard level is {}",
                task.level, terms.shard_level
            )));
        }
        let square = task
            .square
            .ok_or_else(|| Status::invalid_argument("a task needs its square"))?;
        let mut fetched_records = 0;
        let mut fetched_bytes = 0;
        let mut fetched_lacked_bytes = 0;
        let mut fetch_calls = 0;
        for attempt in 1..=ATTEMPTS {
            let (kids, fetched) = self.state.gather(&square, task.level).await?;
            fetched_records += fetched.records.len() as u64;
            fetched_bytes += fetched.bytes;
            fetch_calls += fetched.calls;
            let (level, stride) = (task.level, task.stride);
            let from = Background::of(task.background_alive);
            let started = Instant::now();
            let outcome = self
                .state
                .with_fetched(kids.to_vec(), fetched.found.clone(), move |shard, spill| {
                    // A quarter spilled since the fetch found it here is
                    // read back.
                    if let Some(spill) = spill {
                        spill.reload_all(shard, &kids)?;
                    }
                    // What the fetch brought that is still lacking here (another
                    // task on this node may have brought some of it meanwhile).
                    let lacked: u64 = fetched
                        .records
                        .iter()
                        .filter(|(id, _)| !shard.has(id))
                        .map(|(id, record)| {
                            prost::Message::encoded_len(&wire::record_to_wire(id, record)) as u64
                        })
                        .sum();
                    let (id, figures) = shard.with_inputs(&fetched.records, |shard| {
                        shard.advance(&kids, level, stride, from)
                    })?;
                    Ok((id, figures, lacked, shard.stats()))
                })
                .await;
            match outcome {
                Ok((id, figures, lacked, stats)) => {
                    fetched_lacked_bytes += lacked;
                    self.state.tasks_done.fetch_add(1, Ordering::Relaxed);
                    return Ok(Response::new(v1::AdvanceOutcome {
                        id: id.0.to_vec(),
                        population: figures.population,
                        extent: wire::extent_to_wire(&figures.extent),
                        fetched_records,
                        fetched_bytes,
                        compute_us: started.elapsed().as_micros() as u64,
                        fetched_lacked_bytes,
                        fetch_calls,
                        quads: stats.quads,
                        bytes: stats.bytes,
                    }));
                }
                Err(status) if status.code() == tonic::Code::NotFound && attempt < ATTEMPTS => {
                    tracing::debug!(attempt, "inputs were collected before use, fetching again");
                }
                Err(status) => return Err(status),
            }
        }
        Err(Status::internal("unreachable"))
    }

    async fn fetch(
        &self,
        request: Request<v1::FetchRequest>,
    ) -> Result<Response<v1::FetchReply>, Status> {
        let ids = request.into_inner().ids;
        if ids.len() > MAX_BATCH {
            return Err(Status::invalid_argument(format!(
                "at most {MAX_BATCH} ids per call"
            )));
        }
        let ids = ids
            .iter()
            .map(|id| wire::id_from(id))
            .collect::<Result<Vec<_>, _>>()?;
        // On a blocking thread, as every use of the shard: a task may hold
        // it for long, and a fetch waiting on an async worker would keep
        // that worker (and the lease renewals it runs) from anything else.
        // Spilled pieces asked for are read back first (a peer asks for a
        // piece before the quads under it).
        let records = self
            .state
            .with_shard(ids.clone(), move |shard, spill| {
                if let Some(spill) = spill {
                    spill.reload_all(shard, &ids)?;
                }
                for id in &ids {
                    shard.touch(id);
                }
                Ok(ids
                    .iter()
                    .filter_map(|id| {
                        shard
                            .record(id)
                            .map(|record| wire::record_to_wire(id, &record))
                    })
                    .collect())
            })
            .await?;
        Ok(Response::new(v1::FetchReply { records }))
    }

    async fn put(
        &self,
        request: Request<v1::PutRequest>,
    ) -> Result<Response<v1::PutReply>, Status> {
        let put = request.into_inner();
        self.state.terms(&put.job)?;
        if put.records.len() > MAX_BATCH || put.hold.len() > MAX_BATCH {
            return Err(Status::invalid_argument(format!(
                "at most {MAX_BATCH} records per call"
            )));
        }
        let records: Vec<(ContentId, Record)> = put
            .records
            .iter()
            .map(wire::record_from_wire)
            .collect::<Result<_, _>>()?;
        let hold = put
            .hold
            .iter()
            .map(|id| wire::id_from(id))
            .collect::<Result<Vec<_>, _>>()?;
        let held = self
            .state
            .with_shard(hold.clone(), move |shard, _| {
                shard.put(&records, &hold)?;
                Ok(shard.held() as u64)
            })
            .await?;
        Ok(Response::new(v1::PutReply { held }))
    }

    async fn retain(
        &self,
        request: Request<v1::RetainRequest>,
    ) -> Result<Response<v1::RetainReply>, Status> {
        let retain = request.into_inner();
        self.state.terms(&retain.job)?;
        let keep = retain
            .keep
            .iter()
            .map(|id| wire::id_from(id))
            .collect::<Result<HashSet<_>, _>>()?;
        let (held, quads, bytes) = self
            .state
            .with_shard(Vec::new(), move |shard, spill| {
                if let Some(spill) = spill {
                    spill.forget_unless(&keep);
                }
                let held = shard.retain(&keep) as u64;
                let stats = shard.stats();
                Ok((held, stats.quads, stats.bytes))
            })
            .await?;
        Ok(Response::new(v1::RetainReply { held, quads, bytes }))
    }

    async fn load(
        &self,
        request: Request<v1::LoadRequest>,
    ) -> Result<Response<v1::LoadReply>, Status> {
        let request = request.into_inner();
        let terms = self.state.terms(&request.job)?;
        Ok(Response::new(
            crate::packs::load_pieces(&self.state, request, terms.shard_level - 1).await?,
        ))
    }

    async fn write_pack(
        &self,
        request: Request<v1::WritePackRequest>,
    ) -> Result<Response<v1::WritePackReply>, Status> {
        let request = request.into_inner();
        self.state.terms(&request.job)?;
        Ok(Response::new(
            crate::packs::write_pieces(&self.state, request).await?,
        ))
    }

    async fn describe(
        &self,
        request: Request<v1::DescribeRequest>,
    ) -> Result<Response<v1::DescribeReply>, Status> {
        let describe = request.into_inner();
        let terms = self.state.terms(&describe.job)?;
        if describe.level != terms.shard_level {
            return Err(Status::invalid_argument(
                "describe squares of the shard level",
            ));
        }
        let square = describe
            .square
            .ok_or_else(|| Status::invalid_argument("describe needs a square"))?;
        let (kids, fetched) = self.state.gather(&square, describe.level).await?;
        let level = describe.level;
        let (canonical, canonical_level, figures) = self
            .state
            .with_fetched(kids.to_vec(), fetched.found.clone(), move |shard, spill| {
                if let Some(spill) = spill {
                    spill.reload_all(shard, &kids)?;
                }
                Ok(shard.with_inputs(&fetched.records, |shard| shard.describe(&kids, level))?)
            })
            .await?;
        Ok(Response::new(v1::DescribeReply {
            canonical: canonical.0.to_vec(),
            canonical_level,
            population: figures.population,
            extent: wire::extent_to_wire(&figures.extent),
        }))
    }
}
