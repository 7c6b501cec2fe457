//! The command-line settings of the runs this crate drives (`deeptime run`,
//! `deeptime coordinator`, `deeptime status`), as plain structs that the
//! `deeptime` binary parses and tests can build in process.

use std::path::PathBuf;

use clap::Args;

#[derive(Args, Debug)]
pub struct CoordinatorArgs {
    /// The job file (TOML), as for `deeptime run`
    pub job: PathBuf,

    /// Address to listen on for nodes and status calls (e.g. 0.0.0.0:7100)
    #[arg(long)]
    pub listen: std::net::SocketAddr,

    /// Wait for this many nodes before starting
    #[arg(long, default_value_t = 1, value_parser = clap::builder::RangedU64ValueParser::<usize>::new().range(1..=4096))]
    pub min_nodes: usize,

    /// The cluster token file (one line); made with a fresh token if missing
    #[arg(long)]
    pub token_file: PathBuf,

    /// The shard level K (6 to 48): tasks advance squares of 2^K cells a side
    /// [default: chosen from the pattern and the number of nodes]
    #[arg(long)]
    pub shard_level: Option<u32>,

    /// Print exactly one JSON object on standard output at the end
    #[arg(long)]
    pub json: bool,

    /// Stay up after the target for status calls, until interrupted
    #[arg(long)]
    pub stay: bool,

    /// How long a node may go unheard before it is late: no new tasks go to
    /// it, but what it holds stays listed and its running tasks are waited
    /// for (e.g. 10s, 500ms)
    #[arg(long, default_value = "10s", value_parser = humantime::parse_duration)]
    pub lease: std::time::Duration,

    /// How long a node may go unheard before it is lost: what it held is
    /// then found elsewhere (at least the lease)
    #[arg(long, default_value = "60s", value_parser = humantime::parse_duration)]
    pub lost_after: std::time::Duration,

    #[command(flatten)]
    pub tls: TlsArgs,
}

#[derive(Args, Debug)]
pub struct StatusArgs {
    /// The coordinator's URL (http://HOST:PORT)
    #[arg(long)]
    pub coordinator: String,

    /// The cluster token file
    #[arg(long)]
    pub token_file: PathBuf,

    /// The authority (PEM) that signs the coordinator's certificate
    #[arg(long)]
    pub tls_ca: Option<PathBuf>,

    /// Print JSON instead of a table
    #[arg(long)]
    pub json: bool,
}

#[derive(Args, Debug)]
pub struct RunArgs {
    /// The job file (TOML): pattern, rule, target, checkpoint folder and interval
    pub job: PathBuf,

    /// Print exactly one JSON object on standard output at the end
    #[arg(long)]
    pub json: bool,
}

/// TLS for the cluster roles: their own certificate and key (to serve TLS)
/// and the authority that signs the other processes' certificates.
#[derive(Args, Debug)]
pub struct TlsArgs {
    /// Serve TLS with this certificate (PEM), with --tls-key
    #[arg(long)]
    pub tls_cert: Option<PathBuf>,

    /// The private key (PEM) of --tls-cert
    #[arg(long)]
    pub tls_key: Option<PathBuf>,

    /// The authority (PEM) that signs the other processes' certificates,
    /// for https:// URLs
    #[arg(long)]
    pub tls_ca: Option<PathBuf>,
}

impl TlsArgs {
    pub fn files(&self) -> deeptime_node::wire::TlsFiles {
        deeptime_node::wire::TlsFiles {
            cert: self.tls_cert.clone(),
            key: self.tls_key.clone(),
            ca: self.tls_ca.clone(),
        }
    }
}
