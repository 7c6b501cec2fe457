//! `deeptime coordinator JOB.toml`: a job run on a cluster. The coordinator
//! loads the pattern, cuts it at the shard level K, hands the pieces to the
//! nodes that joined, and runs the engine's recursion above K with tasks on
//! nodes as its base case (see `recursion`), one step of `checkpoint.every`
//! generations at a time; at the target it prints the same figures as
//! `deeptime run`.

mod members;
mod recursion;
pub mod status;
mod tasks;
mod upper;

use std::collections::HashSet;
use std::path::Path;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{Context, anyhow};
use deeptime_engine::shard::MAX_SHARD_LEVEL;
use deeptime_engine::{ContentId, Universe};
use deeptime_node::auth::{CheckToken, Token};
use deeptime_node::wire::{MAX_MESSAGE_BYTES, TlsFiles};
use deeptime_proto::v1;
use num_bigint::{BigInt, BigUint};
use serde::Serialize;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::Server;
use tonic::transport::server::TcpIncoming;

use crate::cli::CoordinatorArgs;
use crate::failure::BadInput;
use crate::job::Job;
use crate::report::{BoxReport, EngineReport, Report};
use crate::{input, memory};
use members::{Board, CoordinatorService, Members, Terms};
use tasks::Dispatcher;
pub use tasks::NodeOutOfMemory;
use upper::Upper;

/// Shard levels chosen automatically stay in this range.
const MIN_AUTO_SHARD_LEVEL: u32 = 8;
const MAX_AUTO_SHARD_LEVEL: u32 = 24;

pub fn run(args: CoordinatorArgs) -> anyhow::Result<()> {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the runtime")?;
    runtime.block_on(coordinate(args))
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
    eprintln!("deeptime: wrote a new cluster token to {}", path.display());
    Ok(token)
}

/// The shard level for a pattern of this extent on `nodes` nodes: pieces of
/// level K-1 small enough that the pattern spans about 16 per node.
fn choose_shard_level(side: u64, nodes: usize) -> u32 {
    let pieces = 16.0 * nodes.max(1) as f64;
    let piece_side = (side.max(1) as f64 / pieces.sqrt()).max(1.0);
    let level = piece_side.log2().floor() as u32 + 1;
    level.clamp(MIN_AUTO_SHARD_LEVEL, MAX_AUTO_SHARD_LEVEL)
}

#[derive(Serialize)]
struct ClusterReport {
    #[serde(flatten)]
    report: Report,
    cluster: ClusterFigures,
}

#[derive(Serialize)]
struct ClusterFigures {
    nodes: usize,
    shard_level: u32,
    tasks: u64,
    tasks_memoised: u64,
    records_fetched: u64,
    bytes_fetched: u64,
    /// seconds nodes spent computing tasks, and tasks took end to end
    compute_seconds: f64,
    task_seconds: f64,
}

async fn coordinate(args: CoordinatorArgs) -> anyhow::Result<()> {
    let started = Instant::now();
    let job = Job::load(&args.job)?;
    let budget = memory::budget(job.memory.as_deref())?;
    let loaded = input::read(&job.pattern)?;
    let rule = input::rule(job.rule.as_deref(), &loaded)?;
    let mut universe = Universe::from_pattern(&loaded.pattern, rule, budget)
        .with_context(|| format!("{}: building the pattern", loaded.name))?;
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
    let token = token_for_coordinator(&args.token_file)?;
    let tls = TlsFiles {
        cert: args.tls_cert.clone(),
        key: args.tls_key.clone(),
        ca: args.tls_ca.clone(),
    };
    let job_id = format!("{pattern_digest}-{rule}");
    let members = Arc::new(Members::new(
        token.clone(),
        tls.clone(),
        Terms {
            job: job_id.clone(),
            rule: rule.to_string(),
            shard_level,
        },
    ));
    let mut upper = Upper::new(shard_level);
    let empty_piece = upper.empty(shard_level - 1);
    let tasks = Arc::new(Dispatcher::new(members.clone(), empty_piece));
    let board = Arc::new(Board {
        status: Mutex::new(v1::JobStatus {
            name: job.name.clone(),
            state: "waiting".to_string(),
            generation: "0".to_string(),
            target: job.target.to_string(),
            population: universe.population().to_string(),
            shard_level,
            rule: rule.to_string(),
            ..Default::default()
        }),
        started: Some(started),
    });

    // Serve before waiting, so nodes can join.
    let listener = tokio::net::TcpListener::bind(args.listen)
        .await
        .map_err(|error| anyhow!("cannot listen on {}: {error}", args.listen))?;
    let bound = listener.local_addr()?;
    let (reporter, health) = tonic_health::server::health_reporter();
    reporter
        .set_serving::<v1::coordinator_server::CoordinatorServer<CoordinatorService>>()
        .await;
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
    let router = builder
        .add_service(InterceptedService::new(service, check.clone()))
        .add_service(InterceptedService::new(health, check));
    let server = tokio::spawn(
        router.serve_with_incoming(TcpIncoming::from(listener).with_nodelay(Some(true))),
    );
    tokio::spawn(members.clone().watch_leases());
    eprintln!(
        "deeptime: coordinating {} on {bound} (shard level {shard_level}); waiting for {} node(s)",
        job.name, args.min_nodes
    );

    let outcome = drive(
        &args,
        &job,
        &mut universe,
        &mut upper,
        &members,
        &tasks,
        &board,
        &job_id,
        shard_level,
    )
    .await;
    let outcome = match outcome {
        Ok(report) => {
            board.status.lock().expect("board").state = "done".to_string();
            let figures = ClusterFigures {
                nodes: members.all().len(),
                shard_level,
                tasks: tasks.counters().done,
                tasks_memoised: tasks.counters().memoised,
                records_fetched: tasks.counters().records_fetched,
                bytes_fetched: tasks.counters().bytes_fetched,
                compute_seconds: tasks.counters().compute_us as f64 / 1e6,
                task_seconds: tasks.counters().round_trip_us as f64 / 1e6,
            };
            if args.json {
                println!(
                    "{}",
                    serde_json::to_string(&ClusterReport {
                        report,
                        cluster: figures
                    })?
                );
            } else {
                report.print(false)?;
                println!(
                    "cluster       {} nodes, shard level {}, {} tasks ({} memoised), {} fetched between nodes",
                    figures.nodes,
                    figures.shard_level,
                    figures.tasks,
                    figures.tasks_memoised,
                    deeptime_engine::human_bytes(figures.bytes_fetched)
                );
            }
            Ok(())
        }
        Err(error) => {
            let mut status = board.status.lock().expect("board");
            status.state = "failed".to_string();
            status.error = format!("{error:#}");
            Err(error)
        }
    };
    if args.stay {
        eprintln!("deeptime: staying up for status calls (interrupt to stop)");
        let _ = tokio::signal::ctrl_c().await;
    }
    server.abort();
    outcome
}

#[allow(clippy::too_many_arguments)]
async fn drive(
    args: &CoordinatorArgs,
    job: &Job,
    universe: &mut Universe,
    upper: &mut Upper,
    members: &Arc<Members>,
    tasks: &Arc<Dispatcher>,
    board: &Arc<Board>,
    job_id: &str,
    shard_level: u32,
) -> anyhow::Result<Report> {
    let started = Instant::now();
    while members.live().len() < args.min_nodes {
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    board.status.lock().expect("board").state = "loading".to_string();

    // Cut the pattern and hand its pieces to the nodes, in runs of nearby
    // pieces so that tasks find most of their input at one node.
    let cut = universe.cut(shard_level)?;
    for quad in &cut.upper {
        upper.insert(*quad);
    }
    let live = members.live();
    let share = cut.pieces.len().div_ceil(live.len().max(1)).max(1);
    for (member, pieces) in live.iter().zip(cut.pieces.chunks(share)) {
        let mut sent = HashSet::new();
        let mut records = Vec::new();
        for piece in pieces {
            records.extend(universe.records(piece.handle, shard_level - 1, &mut sent));
        }
        let held: Vec<_> = pieces.iter().map(|p| (p.id, p.figures)).collect();
        tasks.hand_over(job_id, member, records, &held).await?;
    }
    let (mut root, mut level) = (cut.root, cut.root_level);
    let upper = Arc::new(Mutex::new(std::mem::replace(
        upper,
        Upper::new(shard_level),
    )));
    let loaded = upper.lock().expect("upper").pieces(&root, level);
    tasks.retain(job_id, &loaded).await?;

    board.status.lock().expect("board").state = "running".to_string();
    let mut generation = universe.generation().clone();
    let mut pacer = job.wall_clock.map(crate::run::Pacer::new);
    while generation < job.target {
        // As in an embedded run: stop on every multiple of `every` and at
        // the target, in steps the wall-clock pacer allows.
        let stop = match &job.every {
            Some(every) => ((&generation / every + 1u32) * every).min(job.target.clone()),
            None => job.target.clone(),
        };
        let mut step: BigUint = &stop - &generation;
        if let Some(pacer) = &pacer {
            step = step.min(pacer.step.clone());
        }
        let stepping = Instant::now();
        {
            let mut upper = upper.lock().expect("upper");
            let bits = step.bits();
            while !(bits <= (level as u64).saturating_sub(2)
                && upper.fits_centre_half(&root, level))
            {
                root = upper.expand(&root, level);
                level += 1;
            }
            root = upper.expand(&root, level);
            level += 1;
        }
        let advance = recursion::Advance::new(
            job_id.to_string(),
            upper.clone(),
            tasks.clone(),
            step.clone(),
        );
        root = advance.run(root, level).await.with_context(|| {
            format!("advancing {step} generations from generation {generation}")
        })?;
        level -= 1;
        generation += &step;
        if let Some(pacer) = pacer.as_mut() {
            pacer.record(&step, stepping.elapsed());
        }
        let pieces = {
            let mut upper = upper.lock().expect("upper");
            while level > shard_level + 1 && upper.fits_centre_half(&root, level) {
                root = upper.centre(&root, level);
                level -= 1;
            }
            upper.keep_only(&root, level);
            upper.pieces(&root, level)
        };
        tasks.retain(job_id, &pieces).await?;
        let figures = tasks.figures(&pieces);
        let (population, _) = upper.lock().expect("upper").figures(&root, level, &figures);
        let mut status = board.status.lock().expect("board");
        status.generation = generation.to_string();
        status.population = population.to_string();
        eprintln!(
            "deeptime: generation {generation}, population {population}, {} tasks",
            tasks.counters().done
        );
    }
    report(
        job_id,
        &upper,
        tasks,
        root,
        level,
        generation,
        universe,
        shard_level,
        members,
        started,
    )
    .await
}

#[allow(clippy::too_many_arguments)]
async fn report(
    job_id: &str,
    upper: &Arc<Mutex<Upper>>,
    tasks: &Arc<Dispatcher>,
    root: ContentId,
    level: u32,
    generation: BigUint,
    universe: &Universe,
    shard_level: u32,
    members: &Arc<Members>,
    started: Instant,
) -> anyhow::Result<Report> {
    let pieces = upper.lock().expect("upper").pieces(&root, level);
    let figures = tasks.figures(&pieces);
    let (population, extent) = upper.lock().expect("upper").figures(&root, level, &figures);
    // The digest: the smallest centred quad holding every live cell; below
    // the shard level a node finds it.
    let (mut quad, mut at) = (root, level);
    {
        let mut upper = upper.lock().expect("upper");
        while at > shard_level && upper.fits_centre_half(&quad, at) {
            quad = upper.centre(&quad, at);
            at -= 1;
        }
    }
    let digest = if at == shard_level {
        let kids = upper.lock().expect("upper").kids(&quad, at);
        tasks.describe(job_id, at, kids).await?.0
    } else {
        quad
    };
    let half = BigInt::from(BigUint::from(1u32) << (level - 1));
    let bbox = extent.map(|[left, top, right, bottom]| BoxReport {
        left: (BigInt::from(left.clone()) - &half).to_string(),
        top: (BigInt::from(top.clone()) - &half).to_string(),
        width: (right - left + 1u32).to_string(),
        height: (bottom - top + 1u32).to_string(),
    });
    let live = members.all();
    Ok(Report {
        generation: generation.to_string(),
        population: population.to_string(),
        bbox,
        rule: universe.rule().to_string(),
        digest: digest.to_string(),
        engine: EngineReport {
            quads: live
                .iter()
                .map(|m| m.quads.load(std::sync::atomic::Ordering::Relaxed))
                .sum(),
            leaves: 0,
            quads_created: tasks.counters().done,
            bytes: live
                .iter()
                .map(|m| m.bytes.load(std::sync::atomic::Ordering::Relaxed))
                .sum(),
            budget: live.iter().map(|m| m.memory).sum(),
            collections: 0,
            root_level: level,
            seconds: started.elapsed().as_secs_f64(),
        },
        bytes_read: None,
        pack_bytes: None,
    })
}
