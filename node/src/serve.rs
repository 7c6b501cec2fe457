//! `deeptime node`: bind, serve the node's service and the health service
//! (both behind the token), and keep membership with the coordinator.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::atomic::AtomicU64;
use std::sync::{Arc, Mutex};

use deeptime_proto::v1;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::Server;
use tonic::transport::server::TcpIncoming;

use crate::auth::{CheckToken, Token};
use crate::fetch::Peers;
use crate::membership::keep_membership;
use crate::packs::{Checkpoints, Written};
use crate::service::{NodeService, NodeState};
use crate::wire::{MAX_MESSAGE_BYTES, TlsFiles};

/// A node's settings, validated.
#[derive(Debug, Clone)]
pub struct NodeConfig {
    /// the coordinator's URL
    pub join: String,
    /// where to listen
    pub listen: SocketAddr,
    /// the URL peers and the coordinator use to reach this node (default:
    /// http(s)://<the bound address>)
    pub advertise: Option<String>,
    pub budget: u64,
    pub token_file: PathBuf,
    pub tls: TlsFiles,
    /// where this node writes checkpoint packs (the jobs' checkpoint folder)
    pub checkpoint_dir: Option<PathBuf>,
    /// the most bytes of pieces it may spill to that folder when its
    /// memory is full (0: never spill)
    pub spill_limit: u64,
}

/// Runs a node until it is refused (an error) or interrupted (Ok).
pub async fn run_node(config: NodeConfig) -> anyhow::Result<()> {
    let token = Token::read(&config.token_file)?;
    let checkpoints = match &config.checkpoint_dir {
        Some(dir) => Some(Checkpoints::open(dir)?),
        None => None,
    };
    let listener = tokio::net::TcpListener::bind(config.listen)
        .await
        .map_err(|error| anyhow::anyhow!("cannot listen on {}: {error}", config.listen))?;
    let bound = listener.local_addr()?;
    let server_tls = config.tls.server()?;
    let scheme = if server_tls.is_some() {
        "https"
    } else {
        "http"
    };
    let advertise = config
        .advertise
        .clone()
        .unwrap_or_else(|| format!("{scheme}://{bound}"));
    let state = Arc::new(NodeState {
        shard: Arc::new(Mutex::new(None)),
        terms: Mutex::new(None),
        peers: Peers::new(token.clone(), config.tls.clone()),
        budget: config.budget,
        tasks_done: AtomicU64::new(0),
        spill_to: checkpoints
            .as_ref()
            .filter(|_| config.spill_limit > 0)
            .map(|checkpoints| (checkpoints.storage.clone(), config.spill_limit)),
        spill: Mutex::new(None),
        checkpoints,
        written: Mutex::new(Written::default()),
    });
    let (reporter, health) = tonic_health::server::health_reporter();
    reporter
        .set_serving::<v1::node_server::NodeServer<NodeService>>()
        .await;
    let service = v1::node_server::NodeServer::new(NodeService {
        state: state.clone(),
    })
    .max_decoding_message_size(MAX_MESSAGE_BYTES)
    .max_encoding_message_size(MAX_MESSAGE_BYTES);
    let check = CheckToken::new(&token);
    let mut builder = Server::builder();
    if let Some(tls) = server_tls {
        builder = builder.tls_config(tls)?;
    }
    let router = builder
        .add_service(InterceptedService::new(service, check.clone()))
        .add_service(InterceptedService::new(health, check));
    tracing::info!("listening on {bound}, joining {}", config.join);
    let serving = router.serve_with_incoming_shutdown(
        TcpIncoming::from(listener).with_nodelay(Some(true)),
        stopped(),
    );
    // Renewals on a thread and runtime of their own: no task, collection
    // or lock of this node's work can delay one.
    let kept = state.clone();
    let (ended, membership) = tokio::sync::oneshot::channel();
    let join = config.join.clone();
    let tls = config.tls.clone();
    std::thread::Builder::new()
        .name("membership".to_string())
        .spawn(move || {
            let outcome = match tokio::runtime::Builder::new_current_thread()
                .enable_all()
                .build()
            {
                Ok(runtime) => runtime
                    .block_on(keep_membership(state, join, advertise, token, tls))
                    .map_err(anyhow::Error::from),
                Err(error) => Err(anyhow::anyhow!("starting the membership runtime: {error}")),
            };
            let _ = ended.send(outcome);
        })?;
    let outcome = tokio::select! {
        served = serving => served.map_err(|error| anyhow::anyhow!("serving: {error}")),
        refused = membership => refused
            .unwrap_or_else(|_| Err(anyhow::anyhow!("the membership thread stopped"))),
    };
    // Its spill packs go with it.
    kept.spill.lock().expect("spill").take();
    outcome
}

/// Interrupted or asked to terminate.
async fn stopped() {
    #[cfg(unix)]
    {
        let Ok(mut terminate) =
            tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())
        else {
            let _ = tokio::signal::ctrl_c().await;
            return;
        };
        tokio::select! {
            _ = tokio::signal::ctrl_c() => {}
            _ = terminate.recv() => {}
        }
    }
    #[cfg(not(unix))]
    let _ = tokio::signal::ctrl_c().await;
}
