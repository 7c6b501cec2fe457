//! `deeptime status --coordinator URL`: a running job's live status, as a
//! table or as JSON.

use deeptime_node::auth::Token;
use deeptime_node::wire::{self, TlsFiles};
use deeptime_proto::v1;
use num_bigint::BigUint;
use serde_json::json;

use crate::args::StatusArgs;
use crate::numbers::{box_for_people, for_people};

/// Generations per second since the coordinator began, and the seconds
/// left to the target at that rate (None before any progress): decimal
/// strings, exact in integers (the figures can pass any float).
fn pace(status: &v1::JobStatus) -> Option<(String, String)> {
    let parse = |text: &str| text.parse::<BigUint>().ok();
    let (now, from, target) = (
        parse(&status.generation)?,
        parse(&status.started_from)?,
        parse(&status.target)?,
    );
    let millis = BigUint::from((status.uptime_seconds * 1000.0) as u64);
    if now <= from || millis == BigUint::ZERO {
        return None;
    }
    let done = &now - &from;
    let rate = &done * 1000u32 / &millis;
    let left = if target > now {
        target - &now
    } else {
        BigUint::ZERO
    };
    let seconds = left * &millis / (done * 1000u32);
    Some((rate.to_string(), seconds.to_string()))
}

/// Seconds for people: a duration when it fits, else a decimal.
fn seconds_for_people(seconds: &str) -> String {
    match seconds.parse::<u64>() {
        Ok(seconds) => {
            humantime::format_duration(std::time::Duration::from_secs(seconds)).to_string()
        }
        Err(_) => format!("{} s", for_people(seconds)),
    }
}

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
                        "pieces_held": m.pieces_held, "tasks_done": m.tasks_done,
                        "tasks_running": m.tasks_running, "quads": m.quads,
                        "bytes": m.bytes, "memory": m.memory,
                    })
                })
                .collect();
            let bbox = status.bbox.as_ref().map(
                |b| json!({"left": b.left, "top": b.top, "width": b.width, "height": b.height}),
            );
            println!(
                "{}",
                json!({
                    "name": status.name, "state": status.state, "rule": status.rule,
                    "generation": status.generation, "target": status.target,
                    "background": status.background, "population": status.population,
                    "dead_cells": status.dead_cells, "bbox": bbox,
                    "started_from": status.started_from,
                    "shard_level": status.shard_level,
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
        if let Some(error) = &status.error {
            println!("error         {error}");
        }
        println!(
            "generation    {} of {}",
            for_people(&status.generation),
            for_people(&status.target)
        );
        if let Some((rate, left)) = pace(&status) {
            println!(
                "pace          {} generations/s; at that pace the target in {}",
                for_people(&rate),
                seconds_for_people(&left)
            );
        }
        println!(
            "population    {}",
            crate::report::population_for_people(&status.population, status.dead_cells.as_deref())
        );
        if let Some(b) = &status.bbox {
            println!(
                "bounding box  {}",
                box_for_people(&b.left, &b.top, &b.width, &b.height)
            );
        }
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
                "node {:<4} {:<28} {:<5} {:>7} pieces  {:>8} tasks  {} in use of {}",
                m.member,
                m.address,
                m.state,
                m.pieces_held,
                m.tasks_done,
                deeptime_engine::human_bytes(m.bytes),
                deeptime_engine::human_bytes(m.memory)
            );
        }
        Ok(())
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_pace_is_the_generations_since_the_start_over_the_uptime() {
        // Worked example: 1000 generations in 10 s is 100 a second; 2000
        // more to the target take 20 s.
        let status = v1::JobStatus {
            generation: "1000".to_string(),
            started_from: "0".to_string(),
            target: "3000".to_string(),
            uptime_seconds: 10.0,
            ..Default::default()
        };
        assert_eq!(pace(&status), Some(("100".to_string(), "20".to_string())));
        assert_eq!(seconds_for_people("20"), "20s");
        // Nothing advanced yet: no pace.
        let fresh = v1::JobStatus {
            generation: "7".to_string(),
            started_from: "7".to_string(),
            ..status
        };
        assert_eq!(pace(&fresh), None);
    }
}
