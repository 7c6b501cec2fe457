//! `deeptime node`: the node role, from the command line to the node crate.
//!
//! A node runs one task at a time on one store. `--slots N` serves N
//! *slots* from one process, each a node of its own (a member of the
//! cluster with its own store, an equal share of the memory budget and its
//! own port): tasks then run N at once, but the slots share no memo and
//! fetch each other's quads over loopback, which on a soup costs more than
//! the second core gives (README, "Cluster"); hence one slot by default.

use deeptime_engine::BadInput;
use deeptime_node::{NodeConfig, run_node};

use crate::cli::NodeArgs;
use deeptime_coordinator::memory;

pub fn run(args: NodeArgs) -> anyhow::Result<()> {
    crate::logging::init("info");
    let budget = memory::budget(args.memory.as_deref())?;
    let slots = args.slots;
    let share = budget / slots as u64;
    if share < memory::MIN_BUDGET {
        return Err(BadInput(format!(
            "--slots {slots}: each slot would have {} of --memory {}; give fewer slots or more memory",
            deeptime_engine::human_bytes(share),
            deeptime_engine::human_bytes(budget)
        ))
        .into());
    }
    // Each slot spills on its own, up to its share of the limit.
    let spill_limit = match args.spill_limit.as_deref() {
        Some(text) => memory::size("--spill-limit", text)? / slots as u64,
        None => u64::MAX,
    };
    let configs = (0..slots)
        .map(|slot| {
            Ok(NodeConfig {
                join: args.join.clone(),
                listen: shifted_address(args.listen, slot)?,
                advertise: args
                    .advertise
                    .as_deref()
                    .map(|url| shifted_url(url, slot))
                    .transpose()?,
                budget: share,
                token_file: args.token_file.clone(),
                tls: args.tls.files(),
                checkpoint_dir: args.checkpoint_dir.clone(),
                spill_limit,
            })
        })
        .collect::<anyhow::Result<Vec<_>>>()?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    runtime.block_on(async {
        futures::future::try_join_all(configs.into_iter().map(run_node))
            .await
            .map(|_| ())
    })
}

/// Slot `slot`'s address: the port after `slot` others (port 0: any).
fn shifted_address(
    address: std::net::SocketAddr,
    slot: usize,
) -> anyhow::Result<std::net::SocketAddr> {
    if address.port() == 0 {
        return Ok(address);
    }
    let port = shifted_port(address.port(), slot, "--listen")?;
    Ok(std::net::SocketAddr::new(address.ip(), port))
}

/// Slot `slot`'s advertised URL: the URL's port, shifted as its address.
fn shifted_url(url: &str, slot: usize) -> anyhow::Result<String> {
    if slot == 0 {
        return Ok(url.to_string());
    }
    let authority_at = url.find("://").map_or(0, |at| at + 3);
    let authority_end = url[authority_at..]
        .find('/')
        .map_or(url.len(), |at| authority_at + at);
    let authority = &url[authority_at..authority_end];
    let port_at = match authority.rfind(':') {
        Some(at) if !authority[at + 1..].is_empty() && !authority.ends_with(']') => at,
        _ => {
            return Err(BadInput(format!(
                "--advertise {url}: give its port, the first slot's, when a node has several slots"
            ))
            .into());
        }
    };
    let port: u16 = authority[port_at + 1..]
        .parse()
        .map_err(|_| BadInput(format!("--advertise {url}: the port is not a number")))?;
    let port = shifted_port(port, slot, "--advertise")?;
    Ok(format!(
        "{}{}:{port}{}",
        &url[..authority_at],
        &authority[..port_at],
        &url[authority_end..]
    ))
}

fn shifted_port(port: u16, slot: usize, option: &str) -> anyhow::Result<u16> {
    u16::try_from(port as usize + slot).map_err(|_| {
        BadInput(format!(
            "{option}: port {port} leaves no room for slot {slot} (ports go up to 65535)"
        ))
        .into()
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // Common practice: each slot listens and is reached on the next port.
    #[test]
    fn slots_take_the_ports_after_the_first() {
        let address: std::net::SocketAddr = "0.0.0.0:7200".parse().unwrap();
        assert_eq!(shifted_address(address, 2).unwrap().port(), 7202);
        let any: std::net::SocketAddr = "127.0.0.1:0".parse().unwrap();
        assert_eq!(shifted_address(any, 3).unwrap().port(), 0);
        assert_eq!(
            shifted_url("https://node-3.example:7200", 1).unwrap(),
            "https://node-3.example:7201"
        );
        assert_eq!(
            shifted_url("http://[::1]:7200/", 2).unwrap(),
            "http://[::1]:7202/"
        );
        assert!(shifted_url("http://node-3.example", 1).is_err());
        assert!(shifted_address("0.0.0.0:65535".parse().unwrap(), 1).is_err());
    }
}
