//! Membership: the nodes that joined, their leases and load, and the
//! coordinator's gRPC service (join, renew, status).
//!
//! A node unheard for the lease is *late*: no new task goes to it, but its
//! pieces stay listed and its running tasks are waited for (a busy or
//! collecting node, a node frozen for a while, a slow network). Unheard
//! for `lost_after`, or refusing connections, it is *lost*: its pieces must
//! be found elsewhere. A late node that renews is taken back as it was.

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex, RwLock};
use std::time::{Duration, Instant};

use deeptime_node::auth::Token;
use deeptime_node::wire::{self, NodeClient, TlsFiles};
use deeptime_proto::v1;
use tokio::sync::{Notify, Semaphore};
use tonic::{Request, Response, Status};

/// How long nodes may go unheard: late after `lease`, lost after
/// `lost_after` (see the module's note); nodes renew every `renew_every`.
#[derive(Clone, Copy, Debug)]
pub struct Leases {
    pub renew_every: Duration,
    pub lease: Duration,
    pub lost_after: Duration,
}

impl Leases {
    /// Renewals ten times a lease (at most every 2 s, at least every 50 ms),
    /// so a few lost or delayed ones never make a node late.
    pub fn new(lease: Duration, lost_after: Duration) -> Leases {
        Leases {
            renew_every: (lease / 10).clamp(Duration::from_millis(50), Duration::from_secs(2)),
            lease,
            lost_after,
        }
    }
}
/// Tasks a member runs at once (one computes, the others fetch).
pub const TASKS_PER_MEMBER: usize = 3;

pub struct Member {
    pub id: u64,
    pub address: String,
    pub client: NodeClient,
    /// false once the member is lost
    pub live: AtomicBool,
    /// unheard for longer than the lease: no new tasks (see the module note)
    pub late: AtomicBool,
    /// true from its first renewal: the node has taken the job's terms and
    /// can take tasks (before, a task could reach it ahead of its join reply)
    pub ready: AtomicBool,
    pub running: AtomicU64,
    pub done: AtomicU64,
    /// pieces the directory lists it as holding
    pub pieces: AtomicU64,
    pub permits: Semaphore,
    /// when it last renewed
    pub heard: Mutex<Instant>,
    pub quads: AtomicU64,
    pub bytes: AtomicU64,
    /// the most bytes its store reported (renewals and retain replies)
    pub peak_bytes: AtomicU64,
    pub memory: u64,
    /// where the node writes checkpoint packs (`storage::location`), or ""
    pub checkpoint_dir: String,
    /// becomes true when the member is lost, so calls to it stop waiting
    lost: tokio::sync::watch::Sender<bool>,
}

impl Member {
    /// Holds its lease and has taken the job's terms: tasks may go to it.
    pub fn is_live(&self) -> bool {
        self.holds_lease() && self.ready.load(Ordering::Relaxed) && !self.is_late()
    }

    /// Not lost (live, joining or late): what it holds can still be had.
    pub fn holds_lease(&self) -> bool {
        self.live.load(Ordering::Relaxed)
    }

    pub fn is_late(&self) -> bool {
        self.late.load(Ordering::Relaxed)
    }

    /// Takes the bytes its store reports now (keeping the peak).
    pub fn report_bytes(&self, bytes: u64) {
        self.bytes.store(bytes, Ordering::Relaxed);
        self.peak_bytes.fetch_max(bytes, Ordering::Relaxed);
    }

    /// Resolves once the member is lost (at once if it is already).
    pub async fn lost(&self) {
        let mut lost = self.lost.subscribe();
        let _ = lost.wait_for(|lost| *lost).await;
    }
}

/// The job's terms, told to every node at join.
#[derive(Clone, Debug)]
pub struct Terms {
    pub job: String,
    pub rule: String,
    pub shard_level: u32,
}

pub struct Members {
    list: RwLock<Vec<Arc<Member>>>,
    next_id: AtomicU64,
    pub changed: Notify,
    token: Token,
    tls: TlsFiles,
    pub terms: Terms,
    pub leases: Leases,
    /// the runtime the coordinator's calls to nodes run on (membership is
    /// served on a runtime of its own; see `cluster::serve_membership`)
    calls: tokio::runtime::Handle,
}

impl Members {
    pub fn new(
        token: Token,
        tls: TlsFiles,
        terms: Terms,
        leases: Leases,
        calls: tokio::runtime::Handle,
    ) -> Members {
        Members {
            list: RwLock::new(Vec::new()),
            // Ids start at a random point, so a node that joined a previous
            // coordinator is not taken for another member.
            next_id: AtomicU64::new((rand::random::<u32>() as u64) << 16 | 1),
            changed: Notify::new(),
            token,
            tls,
            terms,
            leases,
            calls,
        }
    }

    /// Every member, live or lost, in join order.
    pub fn all(&self) -> Vec<Arc<Member>> {
        self.list.read().expect("members").clone()
    }

    pub fn live(&self) -> Vec<Arc<Member>> {
        self.all().into_iter().filter(|m| m.is_live()).collect()
    }

    /// Members not lost (live, joining or late).
    pub fn joined(&self) -> Vec<Arc<Member>> {
        self.all().into_iter().filter(|m| m.holds_lease()).collect()
    }

    pub fn get(&self, id: u64) -> Option<Arc<Member>> {
        self.all().into_iter().find(|m| m.id == id)
    }

    /// Marks a member lost (its lease lapsed or it stopped answering).
    pub fn lose(&self, member: &Member, why: &str) {
        if member.live.swap(false, Ordering::Relaxed) {
            member.ready.store(false, Ordering::Relaxed);
            member.lost.send_replace(true);
            tracing::warn!("node {} ({}) lost: {why}", member.id, member.address);
            self.changed.notify_waiters();
        }
    }

    fn join(&self, request: v1::JoinRequest) -> Result<v1::JoinReply, Status> {
        let endpoint = wire::endpoint(&request.address, &self.tls)
            .map_err(|error| Status::invalid_argument(format!("address: {error}")))?;
        // The connection's worker runs where the calls are made.
        let client = {
            let _calls = self.calls.enter();
            wire::node_client(endpoint.connect_lazy(), &self.token)
        };
        let mut list = self.list.write().expect("members");
        // A node joining again from the same address replaces its old entry.
        for old in list.iter() {
            if old.address == request.address {
                old.live.store(false, Ordering::Relaxed);
                old.lost.send_replace(true);
            }
        }
        let id = self.next_id.fetch_add(1, Ordering::Relaxed);
        list.push(Arc::new(Member {
            id,
            address: request.address.clone(),
            client,
            live: AtomicBool::new(true),
            late: AtomicBool::new(false),
            ready: AtomicBool::new(false),
            running: AtomicU64::new(0),
            done: AtomicU64::new(0),
            pieces: AtomicU64::new(0),
            permits: Semaphore::new(TASKS_PER_MEMBER),
            heard: Mutex::new(Instant::now()),
            quads: AtomicU64::new(0),
            bytes: AtomicU64::new(0),
            peak_bytes: AtomicU64::new(0),
            memory: request.memory,
            checkpoint_dir: request.checkpoint_dir.clone(),
            lost: tokio::sync::watch::channel(false).0,
        }));
        drop(list);
        tracing::info!(
            "node {id} joined from {} (version {})",
            request.address,
            request.version
        );
        self.changed.notify_waiters();
        Ok(v1::JoinReply {
            member: id,
            renew_every_ms: self.leases.renew_every.as_millis() as u64,
            rule: self.terms.rule.clone(),
            shard_level: self.terms.shard_level,
            job: self.terms.job.clone(),
        })
    }

    fn renew(&self, request: v1::RenewRequest) -> v1::RenewReply {
        let Some(member) = self.get(request.member).filter(|m| m.holds_lease()) else {
            return v1::RenewReply { member: false };
        };
        let silent = {
            let mut heard = member.heard.lock().expect("heard");
            let silent = heard.elapsed();
            *heard = Instant::now();
            silent
        };
        if member.late.swap(false, Ordering::Relaxed) {
            tracing::info!(
                member = member.id,
                address = %member.address,
                silent_seconds = silent.as_secs_f64(),
                "a late node answers again; it takes tasks as before"
            );
            tracing::info!(
                "node {} ({}) is back after {:.1} s; it keeps what it held",
                member.id,
                member.address,
                silent.as_secs_f64()
            );
            self.changed.notify_waiters();
        }
        member.quads.store(request.quads, Ordering::Relaxed);
        member.report_bytes(request.bytes);
        if !member.ready.swap(true, Ordering::Relaxed) {
            self.changed.notify_waiters();
        }
        v1::RenewReply { member: true }
    }

    /// Marks members late or lost as they go unheard; runs for ever.
    /// A pause of the coordinator itself (a stop, a starved thread) is not
    /// the nodes' silence: time the watch did not run is forgiven.
    pub async fn watch_leases(self: Arc<Self>) {
        let tick = self.leases.renew_every;
        let mut last = Instant::now();
        loop {
            tokio::time::sleep(tick).await;
            let now = Instant::now();
            let stalled = (now - last).saturating_sub(tick * 2);
            last = now;
            for member in self.joined() {
                let silent = {
                    let mut heard = member.heard.lock().expect("heard");
                    let forgiven = stalled.min(now - *heard);
                    *heard += forgiven;
                    now - *heard
                };
                if silent > self.leases.lost_after {
                    self.lose(
                        &member,
                        &format!("unheard for {:.1} s", silent.as_secs_f64()),
                    );
                } else if silent > self.leases.lease
                    && member.ready.load(Ordering::Relaxed)
                    && !member.late.swap(true, Ordering::Relaxed)
                {
                    tracing::warn!(
                        "node {} ({}) is late (unheard for {:.1} s): no new tasks go to it; \
                         it counts as lost after {:.0} s",
                        member.id,
                        member.address,
                        silent.as_secs_f64(),
                        self.leases.lost_after.as_secs_f64()
                    );
                    self.changed.notify_waiters();
                }
            }
        }
    }
}

/// The job's live status, as the Status call reports it.
#[derive(Default)]
pub struct Board {
    pub status: Mutex<v1::JobStatus>,
    pub started: Option<Instant>,
}

pub struct CoordinatorService {
    pub members: Arc<Members>,
    pub board: Arc<Board>,
    pub tasks: Arc<crate::cluster::tasks::Dispatcher>,
}

#[tonic::async_trait]
impl v1::coordinator_server::Coordinator for CoordinatorService {
    async fn join(
        &self,
        request: Request<v1::JoinRequest>,
    ) -> Result<Response<v1::JoinReply>, Status> {
        Ok(Response::new(self.members.join(request.into_inner())?))
    }

    async fn renew(
        &self,
        request: Request<v1::RenewRequest>,
    ) -> Result<Response<v1::RenewReply>, Status> {
        Ok(Response::new(self.members.renew(request.into_inner())))
    }

    async fn status(
        &self,
        _: Request<v1::StatusRequest>,
    ) -> Result<Response<v1::JobStatus>, Status> {
        let mut status = self.board.status.lock().expect("board").clone();
        status.uptime_seconds = self
            .board
            .started
            .map_or(0.0, |s| s.elapsed().as_secs_f64());
        let counters = self.tasks.counters();
        status.tasks_done = counters.done;
        status.tasks_running = counters.running;
        status.tasks_memoised = counters.memoised;
        status.bytes_fetched = counters.bytes_fetched;
        status.members = self
            .members
            .all()
            .iter()
            .map(|m| v1::MemberStatus {
                member: m.id,
                address: m.address.clone(),
                state: if m.is_live() {
                    "live"
                } else if m.is_late() && m.holds_lease() {
                    "late"
                } else if m.holds_lease() {
                    "joining"
                } else {
                    "lost"
                }
                .to_string(),
                pieces_held: m.pieces.load(Ordering::Relaxed),
                tasks_done: m.done.load(Ordering::Relaxed),
                tasks_running: m.running.load(Ordering::Relaxed),
                quads: m.quads.load(Ordering::Relaxed),
                bytes: m.bytes.load(Ordering::Relaxed),
                memory: m.memory,
            })
            .collect();
        Ok(Response::new(status))
    }
}
