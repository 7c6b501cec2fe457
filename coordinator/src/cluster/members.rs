//! Membership: the nodes that joined, their leases and load, and the
//! coordinator's gRPC service (join, renew, status).

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex, RwLock};
use std::time::{Duration, Instant};

use deeptime_node::auth::Token;
use deeptime_node::wire::{self, NodeClient, TlsFiles};
use deeptime_proto::v1;
use tokio::sync::{Notify, Semaphore};
use tonic::{Request, Response, Status};

/// Nodes renew this often; three missed renewals lose the lease.
pub const RENEW_EVERY: Duration = Duration::from_millis(500);
/// Tasks a member runs at once (one computes, the others fetch).
pub const TASKS_PER_MEMBER: usize = 3;

pub struct Member {
    pub id: u64,
    pub address: String,
    pub client: NodeClient,
    /// false once the member is lost
    pub live: AtomicBool,
    /// true from its first renewal: the node has taken the job's terms and
    /// can take tasks (before, a task could reach it ahead of its join reply)
    pub ready: AtomicBool,
    pub running: AtomicU64,
    pub done: AtomicU64,
    pub permits: Semaphore,
    pub lease_until: Mutex<Instant>,
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
    /// Holds a lease and has taken the job's terms: tasks may go to it.
    pub fn is_live(&self) -> bool {
        self.live.load(Ordering::Relaxed) && self.ready.load(Ordering::Relaxed)
    }

    fn holds_lease(&self) -> bool {
        self.live.load(Ordering::Relaxed)
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
}

impl Members {
    pub fn new(token: Token, tls: TlsFiles, terms: Terms) -> Members {
        Members {
            list: RwLock::new(Vec::new()),
            // Ids start at a random point, so a node that joined a previous
            // coordinator is not taken for another member.
            next_id: AtomicU64::new((rand::random::<u32>() as u64) << 16 | 1),
            changed: Notify::new(),
            token,
            tls,
            terms,
        }
    }

    /// Every member, live or lost, in join order.
    pub fn all(&self) -> Vec<Arc<Member>> {
        self.list.read().expect("members").clone()
    }

    pub fn live(&self) -> Vec<Arc<Member>> {
        self.all().into_iter().filter(|m| m.is_live()).collect()
    }

    pub fn get(&self, id: u64) -> Option<Arc<Member>> {
        self.all().into_iter().find(|m| m.id == id)
    }

    /// Marks a member lost (its lease lapsed or it stopped answering).
    pub fn lose(&self, member: &Member, why: &str) {
        if member.live.swap(false, Ordering::Relaxed) {
            member.ready.store(false, Ordering::Relaxed);
            member.lost.send_replace(true);
            eprintln!(
                "deeptime: node {} ({}) lost: {why}",
                member.id, member.address
            );
            self.changed.notify_waiters();
        }
    }

    fn join(&self, request: v1::JoinRequest) -> Result<v1::JoinReply, Status> {
        let endpoint = wire::endpoint(&request.address, &self.tls)
            .map_err(|error| Status::invalid_argument(format!("address: {error}")))?;
        let client = wire::node_client(endpoint.connect_lazy(), &self.token);
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
            ready: AtomicBool::new(false),
            running: AtomicU64::new(0),
            done: AtomicU64::new(0),
            permits: Semaphore::new(TASKS_PER_MEMBER),
            lease_until: Mutex::new(Instant::now() + 3 * RENEW_EVERY),
            quads: AtomicU64::new(0),
            bytes: AtomicU64::new(0),
            peak_bytes: AtomicU64::new(0),
            memory: request.memory,
            checkpoint_dir: request.checkpoint_dir.clone(),
            lost: tokio::sync::watch::channel(false).0,
        }));
        drop(list);
        eprintln!(
            "deeptime: node {id} joined from {} (version {})",
            request.address, request.version
        );
        self.changed.notify_waiters();
        Ok(v1::JoinReply {
            member: id,
            renew_every_ms: RENEW_EVERY.as_millis() as u64,
            rule: self.terms.rule.clone(),
            shard_level: self.terms.shard_level,
            job: self.terms.job.clone(),
        })
    }

    fn renew(&self, request: v1::RenewRequest) -> v1::RenewReply {
        let Some(member) = self.get(request.member).filter(|m| m.holds_lease()) else {
            return v1::RenewReply { member: false };
        };
        *member.lease_until.lock().expect("lease") = Instant::now() + 3 * RENEW_EVERY;
        member.quads.store(request.quads, Ordering::Relaxed);
        member.report_bytes(request.bytes);
        if !member.ready.swap(true, Ordering::Relaxed) {
            self.changed.notify_waiters();
        }
        v1::RenewReply { member: true }
    }

    /// Loses the members whose lease lapsed; runs for ever.
    pub async fn watch_leases(self: Arc<Self>) {
        loop {
            tokio::time::sleep(RENEW_EVERY).await;
            let now = Instant::now();
            for member in self.all().into_iter().filter(|m| m.holds_lease()) {
                if *member.lease_until.lock().expect("lease") < now {
                    self.lose(&member, "its lease lapsed");
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
        let holds = self.tasks.holdings();
        status.members = self
            .members
            .all()
            .iter()
            .map(|m| v1::MemberStatus {
                member: m.id,
                address: m.address.clone(),
                state: if m.is_live() {
                    "live"
                } else if m.holds_lease() {
                    "joining"
                } else {
                    "lost"
                }
                .to_string(),
                pieces_held: holds.get(&m.id).copied().unwrap_or(0),
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
