//! `deeptime node`: the node role, from the command line to the node crate.

use deeptime_node::{NodeConfig, run_node};

use crate::cli::NodeArgs;
use deeptime_coordinator::memory;

pub fn run(args: NodeArgs) -> anyhow::Result<()> {
    crate::logging::init("warn");
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
