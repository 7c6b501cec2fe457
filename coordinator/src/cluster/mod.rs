//! `deeptime coordinator JOB.toml`: a job run on a cluster. The coordinator
//! loads the pattern, cuts it at the shard level K, hands the pieces to the
//! nodes that joined, and runs the engine's walker above K with tasks on
//! nodes as its base case (see `advance`), one step of `checkpoint.every`
//! generations at a time; at the target it prints the same figures as
//! `deeptime run`.

mod advance;
mod checkpoint;
mod drive;
mod members;
mod recover;
mod resume;
pub mod status;
mod tasks;

use std::path::Path;
use std::sync::{Arc, Mutex};
use std::time::Instant;

use anyhow::{Context, anyhow};
use deeptime_engine::shard::MAX_SHARD_LEVEL;
use deeptime_node::auth::{CheckToken, Token};
use deeptime_node::wire::MAX_MESSAGE_BYTES;
use deeptime_proto::v1;
use serde::Serialize;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::Server;
use tonic::transport::server::TcpIncoming;

use crate::args::CoordinatorArgs;
use crate::job::Job;
use crate::report::Report;
use crate::{input, memory};
use deeptime_engine::BadInput;
use members::{Board, CoordinatorService, Leases, Members, Terms};
use tasks::Dispatcher;
pub use tasks::NodeOutOfMemory;

/// Shard levels chosen automatically stay in this range.
const MIN_AUTO_SHARD_LEVEL: u32 = 8;
const MAX_AUTO_SHARD_LEVEL: u32 = 24;

/// `deeptime coordinator`: runs the job and prints its figures (a table,
/// or one JSON object with `--json`).
pub fn run(args: CoordinatorArgs) -> anyhow::Result<()> {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the runtime")?;
    let json = args.json;
    runtime.block_on(coordinate(args, |finished| finished.print(json)))
}

/// The cluster token: read from the file, or made and written there when
/// the file does not exist yet (readable by its owner only).
pub fn token_for_coordinator(path: &Path) -> anyhow::Result<Token> {
    if path.exists() {
        return Token::read(path);
    }
    let token = Token::random();
    let line = format!("{}\n", token.as_str());
    crate::output::write_whole(path, |out| {
        std::io::Write::write_all(out, line.as_bytes())?;
        Ok(())
    })
    .with_context(|| format!("{}: writing a new cluster token", path.display()))?;
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(path, std::fs::Permissions::from_mode(0o600))?;
    }
    tracing::info!("wrote a new cluster token to {}", path.display());
    Ok(token)
}

/// Pieces of the pattern per node that the chosen shard level aims at.
/// Smaller pieces balance better but make more, smaller tasks whose
/// overlaps each node computes again: a 2048² soup to generation 4096 on
/// two nodes of 32 MiB took 5.2 s of node CPU with 16 pieces per node (shard
/// level 9, 4987 tasks) and 4.2 s with 4 (level 10, 941 tasks), against
/// 2.6 s for one process.
const PIECES_PER_NODE: f64 = 4.0;

/// The shard level for a pattern of this extent on `nodes` nodes: pieces of
/// level K-1 small enough that the pattern spans about `PIECES_PER_NODE`
/// per node.
fn choose_shard_level(side: u64, nodes: usize) -> u32 {
    let pieces = PIECES_PER_NODE * nodes.max(1) as f64;
    let piece_side = (side.max(1) as f64 / pieces.sqrt()).max(1.0);
    let level = piece_side.log2().floor() as u32 + 1;
    level.clamp(MIN_AUTO_SHARD_LEVEL, MAX_AUTO_SHARD_LEVEL)
}

/// What a finished cluster run reports: the state's figures, as an
/// embedded run gives them, and the cluster's.
#[derive(Serialize)]
pub struct Finished {
    #[serde(flatten)]
    pub report: Report,
    pub cluster: ClusterFigures,
}

impl Finished {
    /// Prints the figures: a table, or one JSON object.
    pub fn print(&self, json: bool) -> anyhow::Result<()> {
        if json {
            println!("{}", serde_json::to_string(self)?);
            return Ok(());
        }
        self.report.print(false)?;
        println!(
            "cluster       {} nodes, shard level {}, {} tasks ({} memoised), {} fetched between nodes",
            self.cluster.nodes,
            self.cluster.shard_level,
            self.cluster.tasks,
            self.cluster.tasks_memoised,
            deeptime_engine::human_bytes(self.cluster.bytes_fetched)
        );
        Ok(())
    }
}

#[derive(Serialize, Default)]
pub struct ClusterFigures {
    pub nodes: usize,
    pub shard_level: u32,
    pub tasks: u64,
    pub tasks_memoised: u64,
    pub records_fetched: u64,
    /// bytes of the fetch replies nodes received from peers for tasks, and
    /// of those the encoded size of the records the receiver still lacked
    pub bytes_fetched: u64,
    pub bytes_fetched_lacked: u64,
    /// fetch calls tasks made to peers (each a round trip)
    pub fetch_calls: u64,
    /// per node in join order, the most bytes its store reported, and the
    /// tasks it ran
    pub peak_bytes: Vec<u64>,
    pub node_tasks: Vec<u64>,
    /// seconds nodes spent computing tasks, and tasks took end to end
    pub compute_seconds: f64,
    pub task_seconds: f64,
    /// checkpoints whose pieces the nodes wrote themselves, and those the
    /// coordinator gathered; bytes of the packs nodes wrote and of the
    /// coordinator's
    pub checkpoints_by_nodes: u64,
    pub checkpoints_gathered: u64,
    pub node_pack_bytes: u64,
    pub coordinator_pack_bytes: u64,
}

/// Runs the job on the nodes that join, hands its figures to `finished`
/// (before staying up, with `--stay`), and stops serving.
pub async fn coordinate(
    args: CoordinatorArgs,
    finished: impl FnOnce(&Finished) -> anyhow::Result<()>,
) -> anyhow::Result<()> {
    let started = Instant::now();
    let job = Job::load(&args.job)?;
    if job.universe != deeptime_engine::finite::Space::Plane {
        return run_bounded_here(&args, &job, finished);
    }
    let budget = memory::budget(job.memory.as_deref())?;
    let loaded = input::read(&job.pattern, budget)?;
    let rule = input::rule(job.rule.as_deref(), &loaded)?;
    let mut universe = input::build(loaded, rule, budget)?;
    let pattern_digest = universe.digest()?;
    let side = universe
        .bounding_box()
        .map(|b| b.width.max(b.height))
        .and_then(|side| u64::try_from(side).ok())
        .unwrap_or(1);
    let shard_level = match args.shard_level {
        Some(level) if (6..=MAX_SHARD_LEVEL).contains(&level) => level,
        Some(level) => {
            return Err(BadInput(format!(
                "--shard-level {level}: give 6 to {MAX_SHARD_LEVEL}"
            ))
            .into());
        }
        None => choose_shard_level(side, args.min_nodes),
    };
    if args.lease < std::time::Duration::from_millis(100) || args.lost_after < args.lease {
        return Err(BadInput(format!(
            "--lease {} and --lost-after {}: give a lease of 100ms or more and a --lost-after of at least the lease",
            humantime::format_duration(args.lease),
            humantime::format_duration(args.lost_after)
        ))
        .into());
    }
    let token = token_for_coordinator(&args.token_file)?;
    let tls = args.tls.files();
    let job_id = format!("{pattern_digest}-{rule}");
    let members = Arc::new(Members::new(
        token.clone(),
        tls.clone(),
        Terms {
            job: job_id.clone(),
            rule: rule.to_string(),
            shard_level,
        },
        Leases::new(args.lease, args.lost_after),
        tokio::runtime::Handle::current(),
    ));
    let empty_piece = deeptime_engine::top::Top::new(shard_level).empty(shard_level - 1);
    let tasks = Arc::new(Dispatcher::new(members.clone(), empty_piece));
    let board = Arc::new(Board {
        status: Mutex::new(v1::JobStatus {
            name: job.name.clone(),
            state: "waiting".to_string(),
            generation: "0".to_string(),
            target: job.target.to_string(),
            shard_level,
            rule: rule.to_string(),
            ..Default::default()
        }),
        started: Some(started),
    });
    crate::report::show_population(
        &mut board.status.lock().expect("board"),
        universe.background(),
        universe.population().to_string(),
    );

    // Serve before waiting, so nodes can join; on a runtime of its own, so
    // that no work of the run (a long walk, many task replies) delays a
    // renewal or the watch of the leases.
    let listener = std::net::TcpListener::bind(args.listen)
        .and_then(|listener| listener.set_nonblocking(true).map(|()| listener))
        .map_err(|error| anyhow!("cannot listen on {}: {error}", args.listen))?;
    let bound = listener.local_addr()?;
    let service = v1::coordinator_server::CoordinatorServer::new(CoordinatorService {
        members: members.clone(),
        board: board.clone(),
        tasks: tasks.clone(),
    })
    .max_decoding_message_size(MAX_MESSAGE_BYTES)
    .max_encoding_message_size(MAX_MESSAGE_BYTES);
    let check = CheckToken::new(&token);
    let mut builder = Server::builder();
    if let Some(config) = tls.server()? {
        builder = builder.tls_config(config)?;
    }
    let membership = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .thread_name("membership")
        .enable_all()
        .build()
        .context("starting the membership runtime")?;
    let server = membership.spawn({
        let members = members.clone();
        async move {
            let (reporter, health) = tonic_health::server::health_reporter();
            reporter
                .set_serving::<v1::coordinator_server::CoordinatorServer<CoordinatorService>>()
                .await;
            let router = builder
                .add_service(InterceptedService::new(service, check.clone()))
                .add_service(InterceptedService::new(health, check));
            tokio::spawn(members.watch_leases());
            let listener = tokio::net::TcpListener::from_std(listener)?;
            router
                .serve_with_incoming(TcpIncoming::from(listener).with_nodelay(Some(true)))
                .await
                .map_err(anyhow::Error::from)
        }
    });
    tracing::info!(
        "coordinating {} on {bound} (shard level {shard_level}); waiting for {} node(s)",
        job.name,
        args.min_nodes
    );

    let run = drive::Run {
        min_nodes: args.min_nodes,
        job: &job,
        job_id: &job_id,
        rule,
        shard_level,
        budget,
        pattern_digest,
        members: &members,
        tasks: &tasks,
        board: &board,
        peers: deeptime_node::fetch::Peers::new(token.clone(), tls.clone()),
        checkpoint_location: deeptime_storage::location(&job.checkpoint_dir)
            .with_context(|| format!("checkpoint folder {}", job.checkpoint_dir.display()))?,
        written: Mutex::new(Default::default()),
        said_gathering: Default::default(),
    };
    let outcome = run.drive(universe).await;
    let written = *run.written.lock().expect("written");
    let outcome = match outcome {
        Ok(report) => {
            board.status.lock().expect("board").state = "done".to_string();
            sweep_spills(&job.checkpoint_dir);
            let counters = tasks.counters();
            let figures = ClusterFigures {
                nodes: members.all().len(),
                shard_level,
                tasks: counters.done,
                tasks_memoised: counters.memoised,
                records_fetched: counters.records_fetched,
                bytes_fetched: counters.bytes_fetched,
                bytes_fetched_lacked: counters.bytes_lacked,
                fetch_calls: counters.fetch_calls,
                peak_bytes: members
                    .all()
                    .iter()
                    .map(|m| m.peak_bytes.load(std::sync::atomic::Ordering::Relaxed))
                    .collect(),
                node_tasks: members
                    .all()
                    .iter()
                    .map(|m| m.done.load(std::sync::atomic::Ordering::Relaxed))
                    .collect(),
                compute_seconds: counters.compute_us as f64 / 1e6,
                task_seconds: counters.round_trip_us as f64 / 1e6,
                checkpoints_by_nodes: written.by_nodes,
                checkpoints_gathered: written.gathered,
                node_pack_bytes: written.node_pack_bytes,
                coordinator_pack_bytes: written.coordinator_pack_bytes,
            };
            finished(&Finished {
                report,
                cluster: figures,
            })
        }
        Err(error) => {
            let mut status = board.status.lock().expect("board");
            status.state = "failed".to_string();
            status.error = Some(format!("{error:#}"));
            Err(error)
        }
    };
    if args.stay {
        tracing::info!("staying up for status calls (interrupt to stop)");
        let _ = tokio::signal::ctrl_c().await;
    }
    server.abort();
    membership.shutdown_background();
    outcome
}

/// A job in a torus or bounded plane: at most 2^32 cells, stepped a
/// generation at a time with no quadtree to share out, so the coordinator
/// runs it itself as `deeptime run` would (same checkpoints, same figures)
/// and says so; nodes that join get no work.
fn run_bounded_here(
    args: &CoordinatorArgs,
    job: &Job,
    finished: impl FnOnce(&Finished) -> anyhow::Result<()>,
) -> anyhow::Result<()> {
    // The token file is read or written as for any job, so that a bad one
    // is the same error and nodes started for this job can still join.
    token_for_coordinator(&args.token_file)?;
    tracing::info!(
        "{}: the job is in a {}; a bounded universe holds at most 2^32 cells and is stepped a \
         generation at a time, so the coordinator runs it itself, without nodes",
        args.job.display(),
        job.universe
    );
    let report = tokio::task::block_in_place(|| crate::run::run_job(&args.job))?;
    finished(&Finished {
        report,
        cluster: ClusterFigures::default(),
    })
}

/// Deletes the nodes' spill packs once the run is done (a failure to is
/// only said: the run's outcome stands).
fn sweep_spills(dir: &std::path::Path) {
    let swept = deeptime_storage::open(dir)
        .map_err(anyhow::Error::from)
        .and_then(|storage| {
            tokio::task::block_in_place(|| {
                deeptime_storage::checkpoint::Checkpoints::new(storage)
                    .sweep_spills()
                    .map_err(anyhow::Error::from)
            })
        });
    match swept {
        Ok(0) => {}
        Ok(count) => tracing::info!("deleted {count} spill packs the nodes left"),
        Err(error) => tracing::warn!("cannot delete the nodes' spill packs: {error:#}"),
    }
}
