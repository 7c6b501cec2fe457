//! The cluster in one process: a coordinator and two nodes on loopback,
//! called as libraries (no binary), give the figures of the embedded run.

use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use deeptime_coordinator::args::{CoordinatorArgs, TlsArgs};
use deeptime_coordinator::cluster::{coordinate, token_for_coordinator};
use deeptime_coordinator::run::run_job;
use deeptime_node::wire::TlsFiles;
use deeptime_node::{NodeConfig, run_node};

/// The R-pentomino (LifeWiki, "R-pentomino").
const R_PENTOMINO: &str = "x = 3, y = 3, rule = B3/S23\nb2o$2ob$bo!\n";

fn job(dir: &Path, name: &str) -> PathBuf {
    let path = dir.join(format!("{name}.toml"));
    std::fs::write(
        &path,
        format!(
            "version = 1\nname = \"{name}\"\npattern = \"r.rle\"\nrule = \"B3/S23\"\n\
             target = \"1103\"\n\n[checkpoint]\ndir = \"runs/{name}\"\nevery = \"1000\"\n"
        ),
    )
    .unwrap();
    path
}

/// A loopback port free a moment ago (common practice for tests that need
/// to name a port before the server binds it).
fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

#[test]
fn a_coordinator_and_two_nodes_in_one_process_give_the_embedded_figures() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("r.rle"), R_PENTOMINO).unwrap();
    let embedded = run_job(&job(dir.path(), "embedded")).unwrap();
    // LifeWiki, "R-pentomino": it stabilises at generation 1103 with a
    // population of 116.
    assert_eq!(embedded.population, "116");

    let token_file = dir.path().join("cluster.token");
    token_for_coordinator(&token_file).unwrap();
    let port = free_port();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .unwrap();
    for _ in 0..2 {
        runtime.spawn(run_node(NodeConfig {
            join: format!("http://127.0.0.1:{port}"),
            listen: "127.0.0.1:0".parse().unwrap(),
            advertise: None,
            budget: 64 << 20,
            token_file: token_file.clone(),
            tls: TlsFiles::default(),
            checkpoint_dir: Some(dir.path().join("runs/cluster")),
            spill_limit: u64::MAX,
        }));
    }
    let args = CoordinatorArgs {
        job: job(dir.path(), "cluster"),
        listen: format!("127.0.0.1:{port}").parse().unwrap(),
        min_nodes: 2,
        token_file,
        shard_level: Some(6),
        json: false,
        stay: false,
        lease: Duration::from_secs(10),
        lost_after: Duration::from_secs(60),
        tls: TlsArgs {
            tls_cert: None,
            tls_key: None,
            tls_ca: None,
        },
    };
    let figures = Arc::new(Mutex::new(None));
    let seen = figures.clone();
    runtime
        .block_on(coordinate(args, move |finished| {
            *seen.lock().unwrap() = Some((
                finished.report.digest.clone(),
                finished.report.population.clone(),
                finished.report.generation.clone(),
                finished.cluster.nodes,
                finished.cluster.tasks,
            ));
            Ok(())
        }))
        .unwrap();
    let (digest, population, generation, nodes, tasks) = figures.lock().unwrap().take().unwrap();
    assert_eq!(nodes, 2);
    assert!(tasks > 0, "the nodes ran no task");
    assert_eq!(generation, "1103");
    assert_eq!(population, embedded.population);
    assert_eq!(digest, embedded.digest);
    runtime.shutdown_timeout(Duration::from_secs(1));
}
