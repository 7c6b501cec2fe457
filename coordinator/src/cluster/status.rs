//! `deeptime status --coordinator URL`: a running job's live status, as a
//! table or as JSON.

use deeptime_node::auth::Token;
use deeptime_node::wire::{self, TlsFiles};
use deeptime_proto::v1;
use serde_json::json;

use crate::cli::StatusArgs;

pub fn run(args: StatusArgs) -> anyhow::Result<()> {
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?;
    runtime.block_on(async {
        let token = Token::read(&args.token_file)?;
        let tls = TlsFiles {
            ca: args.tls_ca.clone(),
            ..Default::default()
        };
        let channel = wire::endpoint(&args.coordinator, &tls)?
            .connect()
            .await
            .map_err(|error| {
                anyhow::anyhow!(
                    "cannot reach the coordinator at {}: {error}",
                    args.coordinator
                )
            })?;
        let status = wire::coordinator_client(channel, &token)
            .status(v1::StatusRequest {})
            .await
            .map_err(|status| anyhow::anyhow!("{}: {}", args.coordinator, status.message()))?
            .into_inner();
        if args.json {
            let members: Vec<_> = status
                .members
                .iter()
                .map(|m| {
                    json!({
                        "member": m.member, "address": m.address, "state": m.state,
                        "holds": m.holds, "tasks_done": m.tasks_done,
                        "tasks_running": m.tasks_running, "quads": m.quads,
                        "bytes": m.bytes, "memory": m.memory,
                    })
                })
                .collect();
            println!(
                "{}",
                json!({
                    "name": status.name, "state": status.state, "rule": status.rule,
                    "generation": status.generation, "target": status.target,
                    "population": status.population, "shard_level": status.shard_level,
                    "tasks_done": status.tasks_done, "tasks_running": status.tasks_running,
                    "tasks_memoised": status.tasks_memoised,
                    "bytes_fetched": status.bytes_fetched,
                    "uptime_seconds": status.uptime_seconds, "error": status.error,
                    "members": members,
                })
            );
            return Ok(());
        }
        println!(
            "job           {} ({}), {}",
            status.name, status.rule, status.state
        );
        if !status.error.is_empty() {
            println!("error         {}", status.error);
        }
        println!("generation    {} of {}", status.generation, status.target);
        println!("population    {}", status.population);
        println!(
            "tasks         {} done, {} running, {} memoised; {} fetched between nodes",
            status.tasks_done,
            status.tasks_running,
            status.tasks_memoised,
            deeptime_engine::human_bytes(status.bytes_fetched)
        );
        println!("shard level   {}", status.shard_level);
        for m in &status.members {
            println!(
                "node {:<4} {:<28} {:<5} holds {:<7} tasks {:<8} {} in use of {}",
                m.member,
                m.address,
                m.state,
                m.holds,
                m.tasks_done,
                deeptime_engine::human_bytes(m.bytes),
                deeptime_engine::human_bytes(m.memory)
            );
        }
        Ok(())
    })
}
