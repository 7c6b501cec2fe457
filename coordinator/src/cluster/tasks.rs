//! Tasks on nodes: the base case of the coordinator's recursion. Keeps the
//! directory of which member holds which level-(K-1) piece (with its
//! figures), places each task where most of its input lives while keeping
//! load balanced, retries on another member when one stops answering, and
//! hands pieces over at load time.

use std::collections::{HashMap, HashSet};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use anyhow::anyhow;
use deeptime_engine::ContentId;
use deeptime_engine::rule::Background;
use deeptime_engine::shard::{Figures, Record};
use deeptime_node::wire::{self, MAX_BATCH};
use deeptime_proto::v1;

use crate::cluster::members::{Member, Members};

/// A task that takes longer than this is taken as lost.
const TASK_TIMEOUT: Duration = Duration::from_secs(600);
/// A member may run this many more tasks than the least loaded one before
/// work that would go to it for locality goes elsewhere.
const LOAD_SLACK: u64 = 2;
/// Work goes by locality only to members whose stores hold at most a
/// quarter (and this floor) more bytes than the emptiest member's.
const MEMORY_SLACK: u64 = 4;
const MEMORY_FLOOR: u64 = 4 << 20;
/// The pause between tries after a failed fetch. (A task is retried until
/// a node unheard for the whole time would be lost.)
const RETRY_PAUSE: Duration = Duration::from_millis(200);
/// How long a node may take to answer a probe before it counts as slow
/// (not gone): see `Dispatcher::probe`.
const PROBE_TIMEOUT: Duration = Duration::from_secs(2);

/// Pieces handed to a member together: their records (children first)
/// and the pieces they complete.
pub struct HandOver {
    pub records: Vec<(ContentId, Record)>,
    pub pieces: Vec<(ContentId, Figures)>,
}

/// A node's memory budget could not hold its share of the state.
#[derive(Debug, thiserror::Error)]
#[error(
    "node {member} ({address}) ran out of memory: {message}; give the nodes a larger --memory or add nodes"
)]
pub struct NodeOutOfMemory {
    pub member: u64,
    pub address: String,
    pub message: String,
}

/// Pieces of the state are no longer on any live node (their node was
/// lost): the run must go back to its newest checkpoint.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct PiecesLost(pub String);

/// A member's refusal as an error (running out of memory is its own kind).
fn node_error(member: &Member, status: tonic::Status) -> anyhow::Error {
    // NOT_FOUND: a quad the coordinator counted on is no longer at the node
    // (collected between a check and its use): load again.
    if wire::is_unreachable(&status) || status.code() == tonic::Code::NotFound {
        return PiecesLost(format!(
            "node {} ({}) stopped answering: {}",
            member.id,
            member.address,
            status.message()
        ))
        .into();
    }
    if status.code() == tonic::Code::ResourceExhausted {
        return NodeOutOfMemory {
            member: member.id,
            address: member.address.clone(),
            message: status.message().to_string(),
        }
        .into();
    }
    anyhow!(
        "node {} ({}) refused: {}",
        member.id,
        member.address,
        status.message()
    )
}

/// A call to a member that fails as soon as the member is lost (its lease
/// lapsed), rather than when its connection finally times out.
async fn until_lost<T>(
    member: &Member,
    call: impl std::future::Future<Output = Result<T, tonic::Status>>,
) -> Result<T, tonic::Status> {
    tokio::select! {
        outcome = call => outcome,
        () = member.lost() => Err(tonic::Status::unavailable("its lease lapsed")),
    }
}

/// Where a piece lives and what it holds.
struct Holding {
    holders: Vec<u64>,
    figures: Figures,
}

#[derive(Default, Clone, Copy)]
pub struct Counters {
    pub done: u64,
    pub running: u64,
    pub memoised: u64,
    pub bytes_fetched: u64,
    pub records_fetched: u64,
    /// of bytes_fetched, the records' encoded size that receivers lacked
    pub bytes_lacked: u64,
    pub fetch_calls: u64,
    pub compute_us: u64,
    pub round_trip_us: u64,
}

pub struct Dispatcher {
    members: Arc<Members>,
    directory: Mutex<HashMap<ContentId, Holding, ahash::RandomState>>,
    /// the empty piece: every member has it
    empty_piece: ContentId,
    done: AtomicU64,
    running: AtomicU64,
    pub memoised: AtomicU64,
    bytes_fetched: AtomicU64,
    records_fetched: AtomicU64,
    bytes_lacked: AtomicU64,
    fetch_calls: AtomicU64,
    /// microseconds nodes spent computing, and tasks took end to end
    compute_us: AtomicU64,
    round_trip_us: AtomicU64,
}

impl Dispatcher {
    pub fn new(members: Arc<Members>, empty_piece: ContentId) -> Dispatcher {
        Dispatcher {
            members,
            directory: Mutex::new(HashMap::default()),
            empty_piece,
            done: AtomicU64::new(0),
            running: AtomicU64::new(0),
            memoised: AtomicU64::new(0),
            bytes_fetched: AtomicU64::new(0),
            records_fetched: AtomicU64::new(0),
            bytes_lacked: AtomicU64::new(0),
            fetch_calls: AtomicU64::new(0),
            compute_us: AtomicU64::new(0),
            round_trip_us: AtomicU64::new(0),
        }
    }

    pub fn counters(&self) -> Counters {
        Counters {
            done: self.done.load(Ordering::Relaxed),
            running: self.running.load(Ordering::Relaxed),
            memoised: self.memoised.load(Ordering::Relaxed),
            bytes_fetched: self.bytes_fetched.load(Ordering::Relaxed),
            records_fetched: self.records_fetched.load(Ordering::Relaxed),
            bytes_lacked: self.bytes_lacked.load(Ordering::Relaxed),
            fetch_calls: self.fetch_calls.load(Ordering::Relaxed),
            compute_us: self.compute_us.load(Ordering::Relaxed),
            round_trip_us: self.round_trip_us.load(Ordering::Relaxed),
        }
    }

    /// Counts again the pieces the directory lists per member.
    fn count_pieces(&self, directory: &HashMap<ContentId, Holding, ahash::RandomState>) {
        let mut counts: HashMap<u64, u64> = HashMap::new();
        for holding in directory.values() {
            for holder in &holding.holders {
                *counts.entry(*holder).or_insert(0) += 1;
            }
        }
        for member in self.members.all() {
            let count = counts.get(&member.id).copied().unwrap_or(0);
            member.pieces.store(count, Ordering::Relaxed);
        }
    }

    /// Whether a member not lost holds `piece`, by the directory.
    pub fn is_held(&self, piece: &ContentId) -> bool {
        *piece == self.empty_piece || {
            let directory = self.directory.lock().expect("directory");
            !self.holders(&directory, piece).is_empty()
        }
    }

    /// The figures of the pieces named.
    pub fn figures(&self, pieces: &HashSet<ContentId>) -> HashMap<ContentId, Figures> {
        let directory = self.directory.lock().expect("directory");
        pieces
            .iter()
            .filter_map(|id| directory.get(id).map(|h| (*id, h.figures)))
            .collect()
    }

    pub fn record_holding(&self, id: ContentId, member: u64, figures: Figures) {
        if id == self.empty_piece {
            return;
        }
        let mut directory = self.directory.lock().expect("directory");
        let holding = directory.entry(id).or_insert(Holding {
            holders: Vec::new(),
            figures,
        });
        if !holding.holders.contains(&member) {
            holding.holders.push(member);
            if let Some(member) = self.members.get(member) {
                member.pieces.fetch_add(1, Ordering::Relaxed);
            }
        }
    }

    /// The addresses of the members holding each quarter (live ones first,
    /// then late ones: a late node is slow, not gone), and a score per live
    /// member: how much of the input it already holds.
    fn sources(
        &self,
        kids: &[ContentId; 4],
    ) -> anyhow::Result<(Vec<v1::Sources>, HashMap<u64, u64>)> {
        let directory = self.directory.lock().expect("directory");
        let mut sources = Vec::new();
        let mut score: HashMap<u64, u64> = HashMap::new();
        for kid in kids {
            if *kid == self.empty_piece {
                sources.push(v1::Sources::default());
                continue;
            }
            let holding = directory
                .get(kid)
                .ok_or_else(|| PiecesLost(format!("piece {} is held by no node", kid.short())))?;
            let holders = self.holders(&directory, kid);
            for member in holders.iter().filter(|m| m.is_live()) {
                *score.entry(member.id).or_insert(0) += holding.figures.population + 1;
            }
            let addresses: Vec<String> = holders.iter().map(|m| m.address.clone()).collect();
            if addresses.is_empty() {
                return Err(PiecesLost(format!(
                    "piece {} was lost with the node that held it",
                    kid.short()
                ))
                .into());
            }
            sources.push(v1::Sources { addresses });
        }
        Ok((sources, score))
    }

    /// The member a task goes to: the one holding most of its input, unless
    /// it is much busier than the least loaded one; None when no member is
    /// live (all late, or joining).
    fn place(&self, score: &HashMap<u64, u64>, without: &HashSet<u64>) -> Option<Arc<Member>> {
        // One reading of each member's figures (renewals and replies change
        // them): tasks running, and store bytes as of its latest reply.
        let live: Vec<(Arc<Member>, u64, u64)> = self
            .members
            .live()
            .into_iter()
            .filter(|m| !without.contains(&m.id))
            .map(|m| {
                let (load, bytes) = (
                    m.running.load(Ordering::Relaxed),
                    m.bytes.load(Ordering::Relaxed),
                );
                (m, load, bytes)
            })
            .collect();
        let least = live.iter().min_by_key(|(m, load, _)| (*load, m.id))?;
        // Locality decides among the members whose stores are not much
        // fuller than the emptiest one's. Locality is what keeps memory
        // even: a result made where its input lives shares the input's
        // quads (a centre of four pieces is nearly free there), while one
        // made elsewhere holds copies.
        let emptiest = live.iter().map(|(_, _, bytes)| *bytes).min()?;
        let best = live
            .iter()
            .filter(|(_, _, bytes)| *bytes <= emptiest + emptiest / MEMORY_SLACK + MEMORY_FLOOR)
            .max_by_key(|(m, load, _)| {
                (
                    score.get(&m.id).copied().unwrap_or(0),
                    std::cmp::Reverse(*load),
                )
            })
            .unwrap_or(least);
        if best.1 > least.1 + LOAD_SLACK {
            Some(least.0.clone())
        } else {
            Some(best.0.clone())
        }
    }

    /// Waits until a member may be live again (one renews, joins or is
    /// lost), or a renewal interval; fails when no member is left at all.
    async fn wait_for_a_member(&self) -> anyhow::Result<()> {
        if self.members.joined().is_empty() {
            return Err(PiecesLost("no node is left".to_string()).into());
        }
        let _ = tokio::time::timeout(
            self.members.leases.renew_every,
            self.members.changed.notified(),
        )
        .await;
        Ok(())
    }

    /// Loses every member whose address refuses connections (after a
    /// call failed in a way that may mean one is gone).
    pub async fn lose_the_gone(&self) {
        self.lose_gone_among(&self.members.joined()).await;
    }

    /// Loses those of `members` (not lost yet) whose addresses refuse
    /// connections, all probed at once.
    async fn lose_gone_among(&self, members: &[Arc<Member>]) {
        let probes = members
            .iter()
            .filter(|member| member.holds_lease())
            .map(|member| async move { (member, self.probe(member).await) });
        for (member, gone) in futures::future::join_all(probes).await {
            if gone {
                self.members.lose(member, "it refuses connections");
            }
        }
    }

    /// Whether `member` is gone: its address refuses connections. A node
    /// that does not answer within `PROBE_TIMEOUT` is slow, not gone (the
    /// lease decides); one that answers is there.
    async fn probe(&self, member: &Member) -> bool {
        let mut client = member.client.clone();
        let call = client.fetch(v1::FetchRequest { ids: Vec::new() });
        matches!(
            tokio::time::timeout(PROBE_TIMEOUT, call).await,
            Ok(Err(status)) if status.code() == tonic::Code::Unavailable
        )
    }

    /// Advances the level-K square made of `kids` by `stride` on a node;
    /// returns the result's id (a piece the node now holds).
    pub async fn advance(
        &self,
        job: &str,
        level: u32,
        kids: [ContentId; 4],
        (stride, from): (u64, Background),
    ) -> anyhow::Result<ContentId> {
        // Tries until a member answers; a peer that failed a member's fetch
        // is probed, and lost if it is gone; a slow one is given the time a
        // node has before it counts as lost.
        let leases = self.members.leases;
        let give_up = std::time::Instant::now() + leases.lost_after + leases.lease;
        let mut last = PiecesLost("no node is live".to_string());
        // Members that ran out of memory on this task, and the last refusal:
        // the task goes to another, and fails only when every one has.
        let mut out_of_memory: HashSet<u64> = HashSet::new();
        let mut full: Option<NodeOutOfMemory> = None;
        while std::time::Instant::now() < give_up {
            let (sources, score) = self.sources(&kids)?;
            let Some(member) = self.place(&score, &out_of_memory) else {
                if full.is_some()
                    && self
                        .members
                        .live()
                        .iter()
                        .all(|m| out_of_memory.contains(&m.id))
                {
                    // Every live node tried this task and could not hold it.
                    let mut full = full.take().expect("checked just now");
                    full.message = format!(
                        "{}; every live node ({}) ran out on the same task",
                        full.message,
                        out_of_memory.len()
                    );
                    return Err(full.into());
                }
                self.wait_for_a_member().await?;
                continue;
            };
            let _permit = member.permits.acquire().await.expect("never closed");
            if !member.is_live() {
                continue;
            }
            member.running.fetch_add(1, Ordering::Relaxed);
            self.running.fetch_add(1, Ordering::Relaxed);
            let mut request = tonic::Request::new(v1::AdvanceTask {
                job: job.to_string(),
                level,
                square: Some(v1::Square {
                    kids: wire::ids4_bytes(&kids),
                    sources,
                }),
                stride,
                background_alive: from.is_alive(),
            });
            request.set_timeout(TASK_TIMEOUT);
            let sent = std::time::Instant::now();
            // A member lost meanwhile (its lease lapsed) fails the call now.
            let mut client = member.client.clone();
            // The call also ends when a node it fetches from is lost: the
            // task is then tried again with the sources that are left.
            let holders: Vec<Arc<Member>> = score
                .keys()
                .filter(|id| **id != member.id)
                .filter_map(|id| self.members.get(*id))
                .collect();
            let source_lost = async {
                if holders.is_empty() {
                    return std::future::pending::<()>().await;
                }
                futures::future::select_all(holders.iter().map(|m| Box::pin(m.lost()))).await;
            };
            let outcome = tokio::select! {
                outcome = until_lost(&member, client.advance(request)) => outcome,
                () = source_lost => Err(tonic::Status::aborted("a node holding its input was lost")),
            };
            self.round_trip_us
                .fetch_add(sent.elapsed().as_micros() as u64, Ordering::Relaxed);
            member.running.fetch_sub(1, Ordering::Relaxed);
            self.running.fetch_sub(1, Ordering::Relaxed);
            match outcome {
                Ok(reply) => {
                    let reply = reply.into_inner();
                    let id = wire::id_from(&reply.id)?;
                    member.quads.store(reply.quads, Ordering::Relaxed);
                    member.report_bytes(reply.bytes);
                    member.done.fetch_add(1, Ordering::Relaxed);
                    self.done.fetch_add(1, Ordering::Relaxed);
                    self.bytes_fetched
                        .fetch_add(reply.fetched_bytes, Ordering::Relaxed);
                    self.records_fetched
                        .fetch_add(reply.fetched_records, Ordering::Relaxed);
                    self.bytes_lacked
                        .fetch_add(reply.fetched_lacked_bytes, Ordering::Relaxed);
                    self.fetch_calls
                        .fetch_add(reply.fetch_calls, Ordering::Relaxed);
                    self.compute_us
                        .fetch_add(reply.compute_us, Ordering::Relaxed);
                    let figures = wire::figures_from_wire(reply.population, reply.extent);
                    self.record_holding(id, member.id, figures);
                    return Ok(id);
                }
                // A node that answers it has no terms (or another job's)
                // started again behind this member's address; one whose
                // address refuses connections is gone. A call that failed
                // otherwise (a reset, a timeout) is tried again.
                Err(status)
                    if status.code() == tonic::Code::FailedPrecondition
                        || wire::is_unreachable(&status) && self.probe(&member).await =>
                {
                    self.members.lose(&member, status.message());
                    last = PiecesLost(format!(
                        "node {} ({}): {}",
                        member.id,
                        member.address,
                        status.message()
                    ));
                }
                Err(status) if wire::is_unreachable(&status) => {
                    last = PiecesLost(format!(
                        "node {} ({}): {}",
                        member.id,
                        member.address,
                        status.message()
                    ));
                    tokio::time::sleep(RETRY_PAUSE).await;
                }
                Err(status) if status.code() == tonic::Code::Aborted => {
                    last = PiecesLost(format!(
                        "node {} ({}) could not fetch its input: {}",
                        member.id,
                        member.address,
                        status.message()
                    ));
                    self.lose_gone_among(&holders).await;
                    tokio::time::sleep(RETRY_PAUSE).await;
                }
                Err(status) if status.code() == tonic::Code::ResourceExhausted => {
                    tracing::warn!(
                        member = member.id,
                        "a node ran out of memory on a task; trying another"
                    );
                    out_of_memory.insert(member.id);
                    full = Some(NodeOutOfMemory {
                        member: member.id,
                        address: member.address.clone(),
                        message: status.message().to_string(),
                    });
                }
                Err(status) => return Err(node_error(&member, status)),
            }
        }
        Err(last.into())
    }

    /// Forgets where every piece is (before the state is loaded again).
    pub fn forget_all(&self) {
        let mut directory = self.directory.lock().expect("directory");
        directory.clear();
        self.count_pieces(&directory);
    }

    /// The members holding a piece by the directory, live ones first, then
    /// late ones (lost ones left out).
    fn holders(
        &self,
        directory: &HashMap<ContentId, Holding, ahash::RandomState>,
        piece: &ContentId,
    ) -> Vec<Arc<Member>> {
        let mut holders: Vec<Arc<Member>> = directory
            .get(piece)
            .map(|holding| {
                holding
                    .holders
                    .iter()
                    .filter_map(|id| self.members.get(*id).filter(|m| m.holds_lease()))
                    .collect()
            })
            .unwrap_or_default();
        holders.sort_by_key(|m| !m.is_live());
        holders
    }

    /// The addresses of the members holding a piece (live ones first).
    pub fn holders_of(&self, piece: &ContentId) -> anyhow::Result<Vec<String>> {
        let directory = self.directory.lock().expect("directory");
        let addresses: Vec<String> = self
            .holders(&directory, piece)
            .iter()
            .map(|m| m.address.clone())
            .collect();
        if addresses.is_empty() {
            return Err(PiecesLost(format!("piece {} is on no live node", piece.short())).into());
        }
        Ok(addresses)
    }

    /// The canonical id and level of the level-K square made of `kids`.
    pub async fn describe(
        &self,
        job: &str,
        level: u32,
        kids: [ContentId; 4],
    ) -> anyhow::Result<(ContentId, u32)> {
        let (sources, member) = loop {
            let (sources, score) = self.sources(&kids)?;
            match self.place(&score, &HashSet::new()) {
                Some(member) => break (sources, member),
                None => self.wait_for_a_member().await?,
            }
        };
        let mut client = member.client.clone();
        let reply = client.describe(v1::DescribeRequest {
            job: job.to_string(),
            level,
            square: Some(v1::Square {
                kids: wire::ids4_bytes(&kids),
                sources,
            }),
        });
        let reply = until_lost(&member, reply)
            .await
            .map_err(|status| node_error(&member, status))?
            .into_inner();
        Ok((wire::id_from(&reply.canonical)?, reply.canonical_level))
    }

    /// Hands pieces to a member and records it as their holder: each batch
    /// is the records of whole pieces (children first; those already at
    /// the member may be left out) and the pieces it completes, sent in
    /// calls of at most a quarter of MAX_BATCH records, the last of them
    /// holding the pieces (so that a node whose memory fills may spill what
    /// it holds already).
    pub async fn hand_over(
        &self,
        job: &str,
        member: &Member,
        batches: Vec<HandOver>,
    ) -> anyhow::Result<()> {
        let mut client = member.client.clone();
        for batch in &batches {
            let calls: Vec<&[(ContentId, Record)]> = if batch.records.is_empty() {
                vec![&[]]
            } else {
                batch.records.chunks(MAX_BATCH / 4).collect()
            };
            let last = calls.len();
            for (at, records) in calls.into_iter().enumerate() {
                let hold = if at + 1 == last {
                    batch.pieces.iter().map(|(id, _)| id.0.to_vec()).collect()
                } else {
                    Vec::new()
                };
                let put = client.put(v1::PutRequest {
                    job: job.to_string(),
                    records: records
                        .iter()
                        .map(|(id, r)| wire::record_to_wire(id, r))
                        .collect(),
                    hold,
                });
                until_lost(member, put)
                    .await
                    .map_err(|status| node_error(member, status))?;
            }
        }
        for batch in &batches {
            for (id, figures) in &batch.pieces {
                self.record_holding(*id, member.id, *figures);
            }
        }
        Ok(())
    }

    /// Which of `pieces` a member has now (any failure: none). A node has a
    /// quad only with everything under it, so a piece it has needs no
    /// records, only to be held.
    pub async fn pieces_at(&self, member: &Member, pieces: &[ContentId]) -> Vec<ContentId> {
        let mut have = Vec::new();
        for batch in pieces.chunks(MAX_BATCH) {
            let mut client = member.client.clone();
            let call = client.fetch(v1::FetchRequest {
                ids: batch.iter().map(|id| id.0.to_vec()).collect(),
            });
            let Ok(reply) = until_lost(member, call).await else {
                return Vec::new();
            };
            for record in &reply.get_ref().records {
                if let Ok((id, _)) = wire::record_from_wire(record) {
                    have.push(id);
                }
            }
        }
        have
    }

    /// Keeps only the `live` pieces in the directory and on the members.
    pub async fn retain(&self, job: &str, live: &HashSet<ContentId>) -> anyhow::Result<()> {
        let mut keep: HashMap<u64, Vec<Vec<u8>>> = HashMap::new();
        {
            let mut directory = self.directory.lock().expect("directory");
            directory.retain(|id, _| live.contains(id));
            self.count_pieces(&directory);
            for (id, holding) in directory.iter() {
                for holder in &holding.holders {
                    keep.entry(*holder).or_default().push(id.0.to_vec());
                }
            }
        }
        for member in self.members.live() {
            let ids = keep.remove(&member.id).unwrap_or_default();
            let mut client = member.client.clone();
            let retain = client.retain(v1::RetainRequest {
                job: job.to_string(),
                keep: ids,
            });
            let outcome = until_lost(&member, retain).await;
            if let Ok(reply) = &outcome {
                member.report_bytes(reply.get_ref().bytes);
            }
            if let Err(status) = outcome {
                if wire::is_unreachable(&status) {
                    self.members.lose(&member, status.message());
                } else {
                    return Err(node_error(&member, status));
                }
            }
        }
        Ok(())
    }

    /// A member's `Load` call (reading pieces of a checkpoint, or saying
    /// which it holds).
    pub async fn load(
        &self,
        member: &Member,
        request: v1::LoadRequest,
    ) -> anyhow::Result<v1::LoadReply> {
        let mut client = member.client.clone();
        let mut request = tonic::Request::new(request);
        request.set_timeout(TASK_TIMEOUT);
        Ok(until_lost(member, client.load(request))
            .await
            .map_err(|status| node_error(member, status))?
            .into_inner())
    }

    /// Has the holders of `pieces` write them into packs, in parallel: each
    /// piece goes to one live member that holds it (the one with the fewest
    /// pieces to write so far). Returns each writer's reply with the pieces
    /// it was given, in the order of its reply's places.
    pub async fn write_packs(
        &self,
        job: &str,
        checkpoint_dir: &str,
        base: &[Vec<u8>],
        pieces: &[ContentId],
    ) -> anyhow::Result<Vec<(Arc<Member>, v1::WritePackReply, Vec<ContentId>)>> {
        let mut shares: HashMap<u64, (Arc<Member>, Vec<ContentId>)> = HashMap::new();
        {
            let directory = self.directory.lock().expect("directory");
            for piece in pieces {
                let writer = self
                    .holders(&directory, piece)
                    .into_iter()
                    .min_by_key(|m| {
                        (
                            !m.is_live(),
                            shares.get(&m.id).map_or(0, |(_, s)| s.len()),
                            m.id,
                        )
                    })
                    .ok_or_else(|| {
                        PiecesLost(format!("piece {} is on no live node", piece.short()))
                    })?;
                shares
                    .entry(writer.id)
                    .or_insert_with(|| (writer.clone(), Vec::new()))
                    .1
                    .push(*piece);
            }
        }
        let calls = shares.into_values().map(|(member, share)| async move {
            let mut client = member.client.clone();
            let mut request = tonic::Request::new(v1::WritePackRequest {
                job: job.to_string(),
                checkpoint_dir: checkpoint_dir.to_string(),
                base: base.to_vec(),
                pieces: share.iter().map(|id| id.0.to_vec()).collect(),
            });
            request.set_timeout(TASK_TIMEOUT);
            let reply = until_lost(&member, client.write_pack(request))
                .await
                .map_err(|status| node_error(&member, status))?
                .into_inner();
            if reply.places.len() != share.len() {
                return Err(anyhow!(
                    "node {} ({}) placed {} pieces of {}",
                    member.id,
                    member.address,
                    reply.places.len(),
                    share.len()
                ));
            }
            Ok((member, reply, share))
        });
        futures::future::try_join_all(calls).await
    }
}
