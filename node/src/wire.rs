//! What both cluster roles need on the wire: conversions between the
//! engine's types and the protocol's, the bounds on messages and batches,
//! clients that carry the token, TLS settings, and the one place engine
//! errors become gRPC statuses.

use std::path::PathBuf;
use std::time::Duration;

use deeptime_engine::ContentId;
use deeptime_engine::shard::{Extent, Figures, Record, ShardError};
use deeptime_proto::v1;
use tonic::Status;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::{
    Certificate, Channel, ClientTlsConfig, Endpoint, Identity, ServerTlsConfig,
};

use crate::auth::{AddToken, Token};

/// No message in either direction may be larger.
pub const MAX_MESSAGE_BYTES: usize = 64 << 20;
/// No call may carry more records or ids.
pub const MAX_BATCH: usize = 65_536;

pub type NodeClient = v1::node_client::NodeClient<InterceptedService<Channel, AddToken>>;
pub type CoordinatorClient =
    v1::coordinator_client::CoordinatorClient<InterceptedService<Channel, AddToken>>;

/// TLS settings of a process: its own certificate and key (to serve TLS)
/// and the authority that signs its peers' certificates (to call them).
#[derive(Clone, Debug, Default)]
pub struct TlsFiles {
    pub cert: Option<PathBuf>,
    pub key: Option<PathBuf>,
    pub ca: Option<PathBuf>,
}

impl TlsFiles {
    /// The server's TLS configuration, when a certificate and key are given.
    pub fn server(&self) -> anyhow::Result<Option<ServerTlsConfig>> {
        choose_tls_crypto();
        match (&self.cert, &self.key) {
            (Some(cert), Some(key)) => {
                let cert = read(cert)?;
                let key = read(key)?;
                Ok(Some(
                    ServerTlsConfig::new().identity(Identity::from_pem(cert, key)),
                ))
            }
            (None, None) => Ok(None),
            _ => anyhow::bail!("--tls-cert and --tls-key go together"),
        }
    }

    fn client(&self) -> anyhow::Result<ClientTlsConfig> {
        let mut config = ClientTlsConfig::new();
        if let Some(ca) = &self.ca {
            config = config.ca_certificate(Certificate::from_pem(read(ca)?));
        }
        Ok(config)
    }
}

fn read(path: &PathBuf) -> anyhow::Result<Vec<u8>> {
    std::fs::read(path).map_err(|error| anyhow::anyhow!("{}: {error}", path.display()))
}

/// Chooses the TLS library's cryptography (ring) once per process: the
/// object-store client links a second one, and with two the library
/// refuses to guess.
pub fn choose_tls_crypto() {
    let _ = rustls::crypto::ring::default_provider().install_default();
}

/// An endpoint for an http:// or https:// URL (TLS for https).
pub fn endpoint(url: &str, tls: &TlsFiles) -> anyhow::Result<Endpoint> {
    if !(url.starts_with("http://") || url.starts_with("https://")) {
        anyhow::bail!("{url:?} is not an http:// or https:// URL");
    }
    let mut endpoint = Endpoint::from_shared(url.to_string())
        .map_err(|error| anyhow::anyhow!("{url:?}: {error}"))?
        .connect_timeout(Duration::from_secs(5))
        .tcp_nodelay(true)
        .http2_keep_alive_interval(Duration::from_secs(10))
        .keep_alive_timeout(Duration::from_secs(20));
    if url.starts_with("https://") {
        choose_tls_crypto();
        endpoint = endpoint.tls_config(tls.client()?)?;
    }
    Ok(endpoint)
}

/// A client of a node's service over `channel`, carrying the token.
pub fn node_client(channel: Channel, token: &Token) -> NodeClient {
    v1::node_client::NodeClient::with_interceptor(channel, AddToken::new(token))
        .max_decoding_message_size(MAX_MESSAGE_BYTES)
        .max_encoding_message_size(MAX_MESSAGE_BYTES)
}

/// A client of the coordinator's service over `channel`, carrying the token.
pub fn coordinator_client(channel: Channel, token: &Token) -> CoordinatorClient {
    v1::coordinator_client::CoordinatorClient::with_interceptor(channel, AddToken::new(token))
        .max_decoding_message_size(MAX_MESSAGE_BYTES)
        .max_encoding_message_size(MAX_MESSAGE_BYTES)
}

/// A content id from 16 bytes of a message.
pub fn id_from(bytes: &[u8]) -> Result<ContentId, Status> {
    let array: [u8; 16] = bytes.try_into().map_err(|_| {
        Status::invalid_argument(format!("a content id has 16 bytes, not {}", bytes.len()))
    })?;
    Ok(ContentId(array))
}

/// A pack name or table checksum (16 bytes) from the wire.
pub fn checksum_from(bytes: &[u8]) -> Result<deeptime_engine::pack::Checksum, Status> {
    let array: [u8; 16] = bytes.try_into().map_err(|_| {
        Status::invalid_argument(format!("a checksum has 16 bytes, not {}", bytes.len()))
    })?;
    Ok(deeptime_engine::pack::Checksum(array))
}

/// Four content ids (nw, ne, sw, se) from 64 bytes.
pub fn ids4_from(bytes: &[u8]) -> Result<[ContentId; 4], Status> {
    if bytes.len() != 64 {
        return Err(Status::invalid_argument(format!(
            "four content ids have 64 bytes, not {}",
            bytes.len()
        )));
    }
    let mut ids = [ContentId([0; 16]); 4];
    for (at, chunk) in bytes.chunks_exact(16).enumerate() {
        ids[at] = id_from(chunk)?;
    }
    Ok(ids)
}

pub fn ids4_bytes(ids: &[ContentId; 4]) -> Vec<u8> {
    ids.iter().flat_map(|id| id.0).collect()
}

pub fn record_to_wire(id: &ContentId, record: &Record) -> v1::QuadRecord {
    match *record {
        Record::Leaf(cells) => v1::QuadRecord {
            id: id.0.to_vec(),
            level: 3,
            cells,
            kids: Vec::new(),
        },
        Record::Inner { level, kids } => v1::QuadRecord {
            id: id.0.to_vec(),
            level,
            cells: 0,
            kids: ids4_bytes(&kids),
        },
    }
}

/// A record from the wire, its id checked against its content.
pub fn record_from_wire(record: &v1::QuadRecord) -> Result<(ContentId, Record), Status> {
    let id = id_from(&record.id)?;
    let parsed = match record.level {
        3 => Record::Leaf(record.cells),
        level @ 4.. => Record::Inner {
            level,
            kids: ids4_from(&record.kids)?,
        },
        level => return Err(Status::invalid_argument(format!("a quad of level {level}"))),
    };
    if parsed.id() != id {
        return Err(Status::data_loss(format!(
            "record {id} hashes to {}",
            parsed.id()
        )));
    }
    Ok((id, parsed))
}

pub fn extent_to_wire(extent: &Option<Extent>) -> Option<v1::Extent> {
    extent.map(|e| v1::Extent {
        left: e.left,
        top: e.top,
        right: e.right,
        bottom: e.bottom,
    })
}

pub fn figures_from_wire(population: u64, extent: Option<v1::Extent>) -> Figures {
    Figures {
        population,
        extent: extent.map(|e| Extent {
            left: e.left,
            top: e.top,
            right: e.right,
            bottom: e.bottom,
        }),
    }
}

/// Engine refusals as gRPC statuses (the one place they are mapped).
pub fn shard_status(error: ShardError) -> Status {
    match error {
        ShardError::Missing(_) => Status::not_found(error.to_string()),
        ShardError::WrongId { .. } => Status::data_loss(error.to_string()),
        ShardError::WrongLevel { .. }
        | ShardError::BadLevel { .. }
        | ShardError::BadStride { .. }
        | ShardError::Unsettled { .. } => Status::invalid_argument(error.to_string()),
        ShardError::Budget(budget) => Status::resource_exhausted(format!(
            "its memory budget of {} is too small: at least {} of quads are live",
            deeptime_engine::human_bytes(budget.budget),
            deeptime_engine::human_bytes(budget.in_use)
        )),
    }
}

/// Whether a failed call says the peer is gone (so the work goes
/// elsewhere) rather than that the request was wrong.
pub fn is_unreachable(status: &Status) -> bool {
    matches!(
        status.code(),
        tonic::Code::Unavailable
            | tonic::Code::Cancelled
            | tonic::Code::DeadlineExceeded
            | tonic::Code::Unknown
    )
}
