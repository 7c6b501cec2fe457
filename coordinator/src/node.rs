//! `deeptime node`: the node role, from the command line to the node crate.

use deeptime_node::{NodeConfig, run_node};

use crate::cli::NodeArgs;
use crate::memory;

pub fn run(args: NodeArgs) -> anyhow::Result<()> {
    tracing_subscriber::fmt()
        .with_writer(std::io::stderr)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_env("DEEPTIME_LOG")
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("warn")),
        )
        .init();
    let config = NodeConfig {
        join: args.join,
        listen: args.listen,
        advertise: args.advertise,
        budget: memory::budget(args.memory.as_deref())?,
        token_file: args.token_file,
        tls: args.tls.files(),
        checkpoint_dir: args.checkpoint_dir,
    };
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    runtime.block_on(run_node(config))
}
