//! A cluster on loopback: a real coordinator and real nodes, each its own
//! process. Whatever the cluster computes must equal what one process
//! computes (`deeptime evolve`): the same digest, population and bounding
//! box (common practice: a distributed run is checked against the
//! sequential one).

use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use deeptime_tests::{deeptime_bin, run_deeptime, temp_dir};

/// Child processes, killed when the test ends however it ends.
struct Processes(Vec<Child>);

impl Drop for Processes {
    fn drop(&mut self) {
        for child in &mut self.0 {
            let _ = child.kill();
            let _ = child.wait();
        }
    }
}

fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

fn start_node(coordinator: u16, token: &Path, memory: &str) -> Child {
    Command::new(deeptime_bin())
        .args(["node", "--join", &format!("http://127.0.0.1:{coordinator}")])
        .args(["--listen", "127.0.0.1:0", "--memory", memory])
        .arg("--token-file")
        .arg(token)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap()
}

/// How a cluster run ended.
struct Outcome {
    code: Option<i32>,
    stdout: String,
    stderr: String,
}

/// Runs `job` on a coordinator and `nodes` nodes with `memory` each.
fn run_cluster_with(job: &Path, nodes: usize, memory: &str, extra: &[&str]) -> Outcome {
    let dir = job.parent().unwrap();
    let token = dir.join("cluster.token");
    let port = free_port();
    let mut coordinator = Command::new(deeptime_bin())
        .arg("coordinator")
        .arg(job)
        .args(["--listen", &format!("127.0.0.1:{port}")])
        .args(["--min-nodes", &nodes.to_string(), "--json"])
        .arg("--token-file")
        .arg(&token)
        .args(extra)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let stdout = coordinator.stdout.take().unwrap();
    let stderr = coordinator.stderr.take().unwrap();
    let mut processes = Processes(vec![coordinator]);
    // The coordinator writes the token file before it listens.
    let deadline = Instant::now() + Duration::from_secs(20);
    while !token.exists() {
        assert!(Instant::now() < deadline, "the coordinator wrote no token");
        std::thread::sleep(Duration::from_millis(20));
    }
    for _ in 0..nodes {
        processes.0.push(start_node(port, &token, memory));
    }
    let errors = std::thread::spawn(move || std::io::read_to_string(stderr).unwrap());
    let stdout = std::io::read_to_string(stdout).unwrap();
    let status = processes.0[0].wait().unwrap();
    Outcome {
        code: status.code(),
        stdout,
        stderr: errors.join().unwrap(),
    }
}

/// Runs `job` on a coordinator and `nodes` nodes; returns its JSON report.
fn run_cluster(job: &Path, nodes: usize, extra: &[&str]) -> serde_json::Value {
    let outcome = run_cluster_with(job, nodes, "256MiB", extra);
    assert_eq!(
        outcome.code,
        Some(0),
        "the coordinator failed: {}",
        outcome.stderr
    );
    serde_json::from_str(&outcome.stdout)
        .unwrap_or_else(|error| panic!("{error}: {:?}", outcome.stdout))
}

fn evolve(pattern: &Path, gens: &str, rule: &str) -> serde_json::Value {
    let run = run_deeptime([
        "evolve".as_ref(),
        pattern.as_os_str(),
        "--gens".as_ref(),
        gens.as_ref(),
        "--rule".as_ref(),
        rule.as_ref(),
        "--json".as_ref(),
    ]);
    run.assert_success();
    serde_json::from_str(&run.stdout).unwrap()
}

fn write_job(dir: &Path, pattern: &str, rule: &str, target: &str, every: &str) -> PathBuf {
    let path = dir.join("job.toml");
    std::fs::write(
        &path,
        format!(
            "version = 1\nname = \"loopback\"\npattern = \"{pattern}\"\nrule = \"{rule}\"\n\
             target = \"{target}\"\n[checkpoint]\ndir = \"runs\"\nevery = \"{every}\"\n"
        ),
    )
    .unwrap();
    path
}

/// A seeded soup, as in the other whole-system tests.
fn soup(side: usize) -> String {
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let mut rows = Vec::new();
    for _ in 0..side {
        let mut row = String::new();
        for _ in 0..side {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            row.push(if state % 8 < 3 { 'o' } else { 'b' });
        }
        rows.push(row);
    }
    format!("x = {side}, y = {side}\n{}!", rows.join("$"))
}

fn assert_same_figures(cluster: &serde_json::Value, single: &serde_json::Value) {
    for field in ["generation", "population", "digest", "bbox", "rule"] {
        assert_eq!(
            cluster[field], single[field],
            "{field}: cluster {cluster}, one process {single}"
        );
    }
}

#[test]
fn three_nodes_give_the_single_process_figures_on_the_demo_pattern() {
    let dir = temp_dir();
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo-jobs/lighthouse.rle");
    std::fs::copy(&demo, dir.path().join("lighthouse.rle")).unwrap();
    let job = write_job(dir.path(), "lighthouse.rle", "B3/S23", "30000", "10000");
    let cluster = run_cluster(&job, 3, &[]);
    let single = evolve(&dir.path().join("lighthouse.rle"), "30000", "B3/S23");
    assert_same_figures(&cluster, &single);
    assert_eq!(cluster["cluster"]["nodes"], 3);
}

#[test]
fn three_nodes_give_the_single_process_figures_on_a_soup_that_spans_many_pieces() {
    // Shard level 6: pieces of 32×32 cells, so a 96×96 soup spans many and
    // tasks must fetch quads from other nodes.
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), soup(96)).unwrap();
    let job = write_job(dir.path(), "soup.rle", "B36/S23", "200", "64");
    let cluster = run_cluster(&job, 3, &["--shard-level", "6"]);
    let single = evolve(&dir.path().join("soup.rle"), "200", "B36/S23");
    assert_same_figures(&cluster, &single);
    assert!(
        cluster["cluster"]["bytes_fetched"].as_u64().unwrap() > 0,
        "no quads moved between nodes: {cluster}"
    );
}

#[test]
fn a_node_with_a_wrong_token_is_refused_and_exits_non_zero() {
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), soup(16)).unwrap();
    let job = write_job(dir.path(), "soup.rle", "B3/S23", "100", "100");
    let token = dir.path().join("cluster.token");
    let port = free_port();
    let coordinator = Command::new(deeptime_bin())
        .arg("coordinator")
        .arg(&job)
        .args(["--listen", &format!("127.0.0.1:{port}")])
        .arg("--token-file")
        .arg(&token)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let _processes = Processes(vec![coordinator]);
    let deadline = Instant::now() + Duration::from_secs(20);
    while !token.exists() {
        assert!(Instant::now() < deadline, "the coordinator wrote no token");
        std::thread::sleep(Duration::from_millis(20));
    }
    let wrong = dir.path().join("wrong.token");
    std::fs::write(&wrong, "not-the-cluster-token-0000\n").unwrap();
    let node = start_node(port, &wrong, "64MiB");
    let output = node.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert_eq!(output.status.code(), Some(1), "{stderr}");
    assert!(
        stderr.contains("refused this node's cluster token"),
        "{stderr}"
    );
}

#[test]
fn a_state_too_big_for_one_node_runs_on_four_nodes_of_the_same_size() {
    // A 2048² soup: about 4.7 MiB of live quads at the first step (measured
    // on one node). One node of 4 MiB cannot hold it and says so; four nodes
    // of 4 MiB each hold a quarter apiece and finish with evolve's figures.
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), soup(2048)).unwrap();
    let job = write_job(dir.path(), "soup.rle", "B3/S23", "32", "16");
    let alone = run_cluster_with(&job, 1, "4MiB", &["--shard-level", "8"]);
    assert_eq!(alone.code, Some(3), "{}", alone.stderr);
    assert!(
        alone.stderr.contains("ran out of memory"),
        "{}",
        alone.stderr
    );
    assert!(alone.stderr.contains("add nodes"), "{}", alone.stderr);
    let four = run_cluster_with(&job, 4, "4MiB", &["--shard-level", "8"]);
    assert_eq!(four.code, Some(0), "{}", four.stderr);
    let cluster: serde_json::Value = serde_json::from_str(&four.stdout).unwrap();
    let single = evolve(&dir.path().join("soup.rle"), "32", "B3/S23");
    assert_same_figures(&cluster, &single);
}
