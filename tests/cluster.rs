//! A cluster on loopback: a real coordinator and real nodes, each its own
//! process. Whatever the cluster computes must equal what one process
//! computes (`deeptime leap`): the same digest, population and bounding
//! box (common practice: a distributed run is checked against the
//! sequential one).

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use deeptime_tests::{Processes, deeptime_bin, free_port, leap_report, run_deeptime, temp_dir};

/// How a coordinator ended.
struct Outcome {
    code: Option<i32>,
    stdout: String,
    stderr: String,
}

/// A coordinator and its nodes on loopback, in a job's folder.
struct Cluster {
    job: PathBuf,
    token: PathBuf,
    port: u16,
    extra: Vec<String>,
    coordinator: Option<Child>,
    nodes: Processes,
    /// the job's checkpoint folder, given to nodes as --checkpoint-dir so
    /// that they write their own packs (None: the coordinator gathers)
    node_checkpoints: Option<PathBuf>,
}

/// The checkpoint folder a job file of these tests names (`dir = "..."`),
/// relative to the job file.
fn checkpoint_dir_of(job: &Path) -> PathBuf {
    let text = std::fs::read_to_string(job).unwrap();
    let line = text
        .lines()
        .find(|line| line.trim_start().starts_with("dir"))
        .expect("a checkpoint dir in the job");
    let value = line.split('=').nth(1).unwrap().trim().trim_matches('"');
    job.parent().unwrap().join(value)
}

impl Cluster {
    /// Starts a coordinator for `job` (waiting for `min_nodes`).
    fn start(job: &Path, min_nodes: usize, extra: &[&str]) -> Cluster {
        let mut cluster = Cluster {
            job: job.to_path_buf(),
            token: job.parent().unwrap().join("cluster.token"),
            port: free_port(),
            extra: extra.iter().map(|s| s.to_string()).collect(),
            coordinator: None,
            nodes: Processes(Vec::new()),
            node_checkpoints: Some(checkpoint_dir_of(job)),
        };
        cluster.start_coordinator(min_nodes);
        cluster
    }

    fn start_coordinator(&mut self, min_nodes: usize) {
        let child = Command::new(deeptime_bin())
            .arg("coordinator")
            .arg(&self.job)
            .args(["--listen", &format!("127.0.0.1:{}", self.port)])
            .args(["--min-nodes", &min_nodes.to_string(), "--json"])
            .arg("--token-file")
            .arg(&self.token)
            .args(&self.extra)
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        self.coordinator = Some(child);
        // The coordinator writes the token file before it listens.
        let deadline = Instant::now() + Duration::from_secs(20);
        while !self.token.exists() {
            assert!(Instant::now() < deadline, "the coordinator wrote no token");
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    fn add_nodes(&mut self, count: usize, memory: &str, extra: &[&str]) {
        for _ in 0..count {
            let node = Command::new(deeptime_bin())
                .args([
                    "node",
                    "--join",
                    &format!("{}://127.0.0.1:{}", self.scheme(), self.port),
                ])
                .args(["--listen", "127.0.0.1:0", "--memory", memory])
                .arg("--token-file")
                .arg(&self.token)
                .args(
                    self.node_checkpoints
                        .iter()
                        .flat_map(|dir| ["--checkpoint-dir".as_ref(), dir.as_os_str()]),
                )
                .args(extra)
                .stdout(Stdio::null())
                .stderr(self.node_log(self.nodes.0.len()))
                .spawn()
                .unwrap();
            self.nodes.0.push(node);
        }
    }

    /// Where node `index` writes its messages (shown when a run fails).
    fn node_log(&self, index: usize) -> std::fs::File {
        let path = self.job.parent().unwrap().join(format!("node-{index}.log"));
        std::fs::File::create(path).unwrap()
    }

    /// Every node's messages so far.
    fn node_logs(&self) -> String {
        (0..self.nodes.0.len())
            .map(|index| {
                let path = self.job.parent().unwrap().join(format!("node-{index}.log"));
                let text = std::fs::read_to_string(path).unwrap_or_default();
                format!("--- node {index}:\n{text}")
            })
            .collect()
    }

    fn scheme(&self) -> &str {
        if self.extra.iter().any(|arg| arg == "--tls-cert") {
            "https"
        } else {
            "http"
        }
    }

    /// Waits until the run's folder holds `count` checkpoints.
    fn wait_for_checkpoints(&self, count: usize) {
        let manifests = self.job.parent().unwrap().join("runs/manifests");
        let deadline = Instant::now() + Duration::from_secs(120);
        loop {
            let stored = std::fs::read_dir(&manifests)
                .map(|dir| {
                    dir.filter(|entry| {
                        let name = entry.as_ref().unwrap().file_name();
                        !name.to_string_lossy().starts_with('.')
                    })
                    .count()
                })
                .unwrap_or(0);
            if stored >= count {
                return;
            }
            assert!(
                Instant::now() < deadline,
                "only {stored} checkpoints after two minutes"
            );
            std::thread::sleep(Duration::from_millis(10));
        }
    }

    /// SIGKILL, as a crash would.
    fn kill_coordinator(&mut self) {
        let mut child = self.coordinator.take().unwrap();
        child.kill().unwrap();
        child.wait().unwrap();
    }

    fn kill_node(&mut self, index: usize) {
        self.nodes.0[index].kill().unwrap();
        self.nodes.0[index].wait().unwrap();
    }

    /// Waits for the coordinator to end.
    fn finish(&mut self) -> Outcome {
        let mut child = self.coordinator.take().unwrap();
        let stdout = child.stdout.take().unwrap();
        let stderr = child.stderr.take().unwrap();
        let errors = std::thread::spawn(move || std::io::read_to_string(stderr).unwrap());
        let output = std::thread::spawn(move || std::io::read_to_string(stdout).unwrap());
        // No run here takes a minute; one that hangs fails with what it said.
        let deadline = Instant::now() + Duration::from_secs(180);
        let status = loop {
            if let Some(status) = child.try_wait().unwrap() {
                break status;
            }
            if Instant::now() > deadline {
                child.kill().unwrap();
                child.wait().unwrap();
                panic!(
                    "the coordinator did not finish in 3 minutes: {}\n{}",
                    errors.join().unwrap(),
                    self.node_logs()
                );
            }
            std::thread::sleep(Duration::from_millis(20));
        };
        let stdout = output.join().unwrap();
        Outcome {
            code: status.code(),
            stdout,
            stderr: errors.join().unwrap(),
        }
    }

    /// Waits for the coordinator to end well; its report.
    fn report(&mut self) -> (serde_json::Value, String) {
        let outcome = self.finish();
        assert_eq!(
            outcome.code,
            Some(0),
            "the coordinator failed: {}\n{}",
            outcome.stderr,
            self.node_logs()
        );
        let report = serde_json::from_str(&outcome.stdout)
            .unwrap_or_else(|error| panic!("{error}: {:?}", outcome.stdout));
        (report, outcome.stderr)
    }
}

impl Drop for Cluster {
    fn drop(&mut self) {
        if let Some(mut child) = self.coordinator.take() {
            let _ = child.kill();
            let _ = child.wait();
        }
    }
}

/// Runs `job` on a coordinator and `nodes` nodes with `memory` each.
fn run_cluster_with(job: &Path, nodes: usize, memory: &str, extra: &[&str]) -> Outcome {
    let mut cluster = Cluster::start(job, nodes, extra);
    cluster.add_nodes(nodes, memory, &[]);
    cluster.finish()
}

/// Runs `job` on a coordinator and `nodes` nodes; returns its JSON report.
fn run_cluster(job: &Path, nodes: usize, extra: &[&str]) -> serde_json::Value {
    let mut cluster = Cluster::start(job, nodes, extra);
    cluster.add_nodes(nodes, "256MiB", &[]);
    cluster.report().0
}

/// The stored run's checkpoints all read back whole, and the newest holds
/// the report's state.
fn assert_checkpoints_hold(dir: &Path, report: &serde_json::Value) {
    let runs = dir.join("runs");
    run_deeptime(["verify".as_ref(), runs.as_os_str()]).assert_success();
    let listed = run_deeptime(["checkpoints".as_ref(), runs.as_os_str(), "--json".as_ref()]);
    listed.assert_success();
    let listed: serde_json::Value = serde_json::from_str(&listed.stdout).unwrap();
    let newest = listed.as_array().unwrap().last().unwrap().clone();
    assert_eq!(newest["generation"], report["generation"], "{newest}");
    assert_eq!(newest["digest"], report["digest"], "{newest}");
}

/// This file's soups.
const SEED: u64 = 0x2545_f491_4f6c_dd1d;

fn soup(side: usize) -> String {
    deeptime_tests::soup(side, SEED)
}

fn write_job(dir: &Path, pattern: &str, rule: &str, target: &str, every: &str) -> PathBuf {
    deeptime_tests::write_job(dir, "job.toml", "loopback", pattern, rule, target, every)
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
    // Nodes without --checkpoint-dir: the coordinator gathers the state for
    // each checkpoint and writes it whole.
    let mut cluster = Cluster::start(&job, 3, &[]);
    cluster.node_checkpoints = None;
    cluster.add_nodes(3, "256MiB", &[]);
    let (cluster, stderr) = cluster.report();
    let single = leap_report(&dir.path().join("lighthouse.rle"), "30000", "B3/S23");
    assert_same_figures(&cluster, &single);
    assert_eq!(cluster["cluster"]["nodes"], 3);
    assert_eq!(cluster["cluster"]["checkpoints_by_nodes"], 0, "{cluster}");
    assert_eq!(cluster["cluster"]["checkpoints_gathered"], 3, "{cluster}");
    assert!(stderr.contains("has no --checkpoint-dir"), "{stderr}");
    assert_checkpoints_hold(dir.path(), &cluster);
}

#[test]
fn three_nodes_give_the_embedded_run_figures_on_the_tide_pool_demo_job() {
    // The demo job as shipped (demo-jobs/tidepool.toml), run embedded and
    // on a cluster, each into its own folder.
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo-jobs");
    let embedded = temp_dir();
    let clustered = temp_dir();
    for dir in [embedded.path(), clustered.path()] {
        for file in ["tidepool.rle", "tidepool.toml"] {
            std::fs::copy(demo.join(file), dir.join(file)).unwrap();
        }
    }
    let run = run_deeptime([
        "run".as_ref(),
        embedded.path().join("tidepool.toml").as_os_str(),
        "--json".as_ref(),
    ]);
    run.assert_success();
    let single: serde_json::Value = serde_json::from_str(&run.stdout).unwrap();
    let cluster = run_cluster(&clustered.path().join("tidepool.toml"), 3, &[]);
    assert_same_figures(&cluster, &single);
    // The same stored generations, with the same digests.
    let list = |dir: &Path| {
        let listed = run_deeptime([
            "checkpoints".as_ref(),
            dir.join("runs/tidepool").as_os_str(),
            "--json".as_ref(),
        ]);
        listed.assert_success();
        let listed: serde_json::Value = serde_json::from_str(&listed.stdout).unwrap();
        listed
            .as_array()
            .unwrap()
            .iter()
            .map(|c| (c["generation"].clone(), c["digest"].clone()))
            .collect::<Vec<_>>()
    };
    assert_eq!(list(clustered.path()), list(embedded.path()));
    // The nodes wrote the packs of every checkpoint but the first (the
    // pattern, stored before any node joined), and they read back whole.
    assert_eq!(cluster["cluster"]["checkpoints_gathered"], 0, "{cluster}");
    assert_eq!(cluster["cluster"]["checkpoints_by_nodes"], 10, "{cluster}");
    assert!(cluster["cluster"]["node_pack_bytes"].as_u64().unwrap() > 0);
    run_deeptime([
        "verify".as_ref(),
        clustered.path().join("runs/tidepool").as_os_str(),
    ])
    .assert_success();
}

#[test]
fn one_node_process_with_two_slots_serves_as_two_nodes_and_gives_the_single_process_figures() {
    // Each slot is a member with a store of its own on a port of its own:
    // two tasks at once, quads fetched between the slots.
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), soup(96)).unwrap();
    let job = write_job(dir.path(), "soup.rle", "B3/S23", "200", "100");
    let mut cluster = Cluster::start(&job, 2, &["--shard-level", "6"]);
    cluster.add_nodes(1, "128MiB", &["--slots", "2"]);
    let (cluster, _) = cluster.report();
    // Against leap on the same soup, itself checked against the reference
    // simulator in tests/reference.rs.
    let single = leap_report(&dir.path().join("soup.rle"), "200", "B3/S23");
    assert_same_figures(&cluster, &single);
    assert_eq!(cluster["cluster"]["nodes"], 2, "{cluster}");
    assert_checkpoints_hold(dir.path(), &cluster);
}

#[test]
fn three_nodes_give_the_single_process_figures_on_a_soup_that_spans_many_pieces() {
    // Shard level 6: pieces of 32×32 cells, so a 96×96 soup spans many and
    // tasks must fetch quads from other nodes. The rule is isotropic (Hensel
    // notation): the nodes parse it and step it as leap does.
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), soup(96)).unwrap();
    let job = write_job(dir.path(), "soup.rle", "B36-k/S23", "200", "64");
    let cluster = run_cluster(&job, 3, &["--shard-level", "6"]);
    let single = leap_report(&dir.path().join("soup.rle"), "200", "B36-k/S23");
    assert_same_figures(&cluster, &single);
    // Checkpoints at 64, 128, 192 and 200 (and 0), readable as any run's;
    // the nodes wrote all but the first, each its own pack.
    assert_checkpoints_hold(dir.path(), &cluster);
    assert_eq!(cluster["cluster"]["checkpoints_by_nodes"], 4, "{cluster}");
    // A snapshot of a stored generation reads the nodes' packs on demand
    // and gives leap's figures (the same stats as leap, README).
    let snapshot = run_deeptime([
        "snapshot".as_ref(),
        dir.path().join("runs").as_os_str(),
        "--gen".as_ref(),
        "128".as_ref(),
        "--json".as_ref(),
    ]);
    snapshot.assert_success();
    let snapshot: serde_json::Value = serde_json::from_str(&snapshot.stdout).unwrap();
    let at_128 = leap_report(&dir.path().join("soup.rle"), "128", "B36-k/S23");
    assert_same_figures(&snapshot, &at_128);
    assert!(
        cluster["cluster"]["bytes_fetched"].as_u64().unwrap() > 0,
        "no quads moved between nodes: {cluster}"
    );
}

/// B0 rules on the cluster: tasks carry the background their generation
/// has, and a step from a background other than the one the rule settles
/// in moves one generation first, as in one process. B02a3-k/S2-i3 flips
/// its background every generation, and the two rules that step what
/// differs from it differ (checkpoints at 75, 225 and 301 are at an alive
/// background, 150 and 300 at a dead one); B0123478/S0134678 keeps it
/// alive from generation 1 (S8). Each equals leap, itself checked against
/// the reference in tests/reference.rs, and a run resumed from a
/// checkpoint at an alive background goes on to leap's figures.
#[test]
fn b0_rules_on_three_nodes_give_the_single_process_figures_at_either_background() {
    for (rule, first, every, resumed) in [
        ("B02a3-k/S2-i3", "301", "75", "451"),
        ("B0123478/S0134678", "200", "75", "333"),
    ] {
        let dir = temp_dir();
        let pattern = dir.path().join("soup.rle");
        deeptime_tests::reference_soup(&pattern, rule, 91, 96, 0.5);
        let job = write_job(dir.path(), "soup.rle", rule, first, every);
        let cluster = run_cluster(&job, 3, &["--shard-level", "6"]);
        let single = leap_report(&pattern, first, rule);
        assert_same_figures(&cluster, &single);
        for field in ["background", "dead_cells"] {
            assert_eq!(cluster[field], single[field], "{rule}: {field}");
        }
        assert_eq!(single["background"], "alive", "{rule}");
        assert_checkpoints_hold(dir.path(), &cluster);
        let snapshot = run_deeptime([
            "snapshot".as_ref(),
            dir.path().join("runs").as_os_str(),
            "--gen".as_ref(),
            "225".as_ref(),
            "--json".as_ref(),
        ]);
        snapshot.assert_success();
        let snapshot: serde_json::Value = serde_json::from_str(&snapshot.stdout).unwrap();
        let at_225 = leap_report(&pattern, "225", rule);
        assert_same_figures(&snapshot, &at_225);
        assert_eq!(snapshot["background"], at_225["background"], "{rule}");

        let job = write_job(dir.path(), "soup.rle", rule, resumed, every);
        let mut cluster = Cluster::start(&job, 3, &["--shard-level", "6"]);
        cluster.add_nodes(3, "256MiB", &[]);
        let (report, stderr) = cluster.report();
        assert!(stderr.contains("resuming"), "{stderr}");
        let single = leap_report(&pattern, resumed, rule);
        assert_same_figures(&report, &single);
        assert_eq!(report["background"], single["background"], "{rule}");
        assert_eq!(report["dead_cells"], single["dead_cells"], "{rule}");
    }
}

#[test]
fn a_node_with_a_wrong_token_is_refused_and_exits_non_zero() {
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), soup(16)).unwrap();
    let job = write_job(dir.path(), "soup.rle", "B3/S23", "100", "100");
    let cluster = Cluster::start(&job, 1, &[]);
    let wrong = dir.path().join("wrong.token");
    std::fs::write(&wrong, "not-the-cluster-token-0000\n").unwrap();
    let node = Command::new(deeptime_bin())
        .args([
            "node",
            "--join",
            &format!("http://127.0.0.1:{}", cluster.port),
        ])
        .args(["--listen", "127.0.0.1:0", "--memory", "64MiB"])
        .arg("--token-file")
        .arg(&wrong)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
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
    // on one node). One node of 4 MiB that may not spill cannot hold it and
    // says so; four nodes of 4 MiB each hold a quarter apiece and finish
    // with leap's figures.
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), soup(2048)).unwrap();
    let job = write_job(dir.path(), "soup.rle", "B3/S23", "32", "16");
    let mut cluster = Cluster::start(&job, 1, &["--shard-level", "8"]);
    cluster.add_nodes(1, "4MiB", &["--spill-limit", "0"]);
    let alone = cluster.finish();
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
    let single = leap_report(&dir.path().join("soup.rle"), "32", "B3/S23");
    assert_same_figures(&cluster, &single);
}

#[test]
fn a_node_whose_memory_fills_spills_to_the_storage_and_reads_back() {
    // The soup above on one node of 4 MiB that may spill: it writes the
    // pieces it has held longest to the run's storage and reads them back
    // when tasks need them; the figures are leap's, the checkpoints (which
    // take in spilled pieces as copies of their spill packs) read back
    // whole, and no spill pack is left once the run is done.
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), soup(2048)).unwrap();
    let job = write_job(dir.path(), "soup.rle", "B3/S23", "32", "16");
    let mut cluster = Cluster::start(&job, 1, &["--shard-level", "8"]);
    cluster.add_nodes(1, "4MiB", &[]);
    let (report, stderr) = cluster.report();
    let node_log = std::fs::read_to_string(dir.path().join("node-0.log")).unwrap();
    assert!(node_log.contains("store full: spilled"), "{node_log}");
    let single = leap_report(&dir.path().join("soup.rle"), "32", "B3/S23");
    assert_same_figures(&report, &single);
    assert_checkpoints_hold(dir.path(), &report);
    let spill = dir.path().join("runs/spill");
    let left: Vec<_> = std::fs::read_dir(&spill)
        .map(|entries| entries.map(|e| e.unwrap().path()).collect())
        .unwrap_or_default();
    assert!(left.is_empty(), "{left:?}\n{stderr}");

    // With a limit it cannot keep within, it stops as a full node does,
    // and says which limit.
    let job = write_job(dir.path(), "soup.rle", "B3/S23", "32", "16");
    std::fs::remove_dir_all(dir.path().join("runs")).unwrap();
    let mut cluster = Cluster::start(&job, 1, &["--shard-level", "8"]);
    cluster.add_nodes(1, "4MiB", &["--spill-limit", "200KiB"]);
    let limited = cluster.finish();
    assert_eq!(limited.code, Some(3), "{}", limited.stderr);
    assert!(
        limited
            .stderr
            .contains("its --spill-limit of 200.0 KiB is reached"),
        "{}",
        limited.stderr
    );
}

/// A job long enough to kill things in: a 256² soup to generation 3000,
/// a checkpoint every 250, shard level 6 (about 4 s on three nodes).
fn long_job(dir: &Path) -> PathBuf {
    std::fs::write(dir.join("soup.rle"), soup(256)).unwrap();
    write_job(dir, "soup.rle", "B3/S23", "3000", "250")
}

#[test]
fn a_node_killed_mid_run_costs_only_its_pieces_and_the_figures_stay_the_same() {
    // Its pieces are read again from the run's packs by the nodes left;
    // the run goes on from where it was, not from a checkpoint.
    let dir = temp_dir();
    let job = long_job(dir.path());
    let mut cluster = Cluster::start(&job, 3, &["--shard-level", "6"]);
    cluster.add_nodes(3, "256MiB", &[]);
    cluster.wait_for_checkpoints(4);
    cluster.kill_node(1);
    let (report, stderr) = cluster.report();
    assert!(stderr.contains(") lost: "), "{stderr}");
    assert!(
        stderr.contains("lost pieces again from the packs"),
        "{stderr}"
    );
    assert!(!stderr.contains("rolling back"), "{stderr}");
    let single = leap_report(&dir.path().join("soup.rle"), "3000", "B3/S23");
    assert_same_figures(&report, &single);
    assert_checkpoints_hold(dir.path(), &report);
}

#[test]
fn a_node_killed_where_no_node_can_read_the_packs_costs_a_roll_back_that_says_why() {
    // Nodes without --checkpoint-dir cannot read the lost pieces again:
    // the last resort, a roll back to the newest checkpoint, with the reason.
    let dir = temp_dir();
    let job = long_job(dir.path());
    let mut cluster = Cluster::start(&job, 3, &["--shard-level", "6"]);
    cluster.node_checkpoints = None;
    cluster.add_nodes(3, "256MiB", &[]);
    cluster.wait_for_checkpoints(4);
    cluster.kill_node(1);
    let (report, stderr) = cluster.report();
    assert!(stderr.contains("rolling back"), "{stderr}");
    assert!(
        stderr.contains("the nodes could not read the lost pieces"),
        "{stderr}"
    );
    let single = leap_report(&dir.path().join("soup.rle"), "3000", "B3/S23");
    assert_same_figures(&report, &single);
    assert_checkpoints_hold(dir.path(), &report);
}

#[test]
fn a_coordinator_killed_and_started_again_resumes_and_the_figures_stay_the_same() {
    let dir = temp_dir();
    let job = long_job(dir.path());
    let mut cluster = Cluster::start(&job, 2, &["--shard-level", "6"]);
    cluster.add_nodes(2, "256MiB", &[]);
    cluster.wait_for_checkpoints(4);
    cluster.kill_coordinator();
    // The same command again; the nodes, still running, join it again.
    cluster.start_coordinator(2);
    let (report, stderr) = cluster.report();
    assert!(stderr.contains("resuming"), "{stderr}");
    // The nodes kept their quads: pieces of the stored state still on them
    // are held where they are, not sent again.
    assert!(
        stderr.contains("pieces are on the nodes already"),
        "{stderr}"
    );
    let single = leap_report(&dir.path().join("soup.rle"), "3000", "B3/S23");
    assert_same_figures(&report, &single);
    assert_checkpoints_hold(dir.path(), &report);
}

/// A test authority and a certificate for 127.0.0.1 signed by it, as PEM
/// files in `dir`: (authority, certificate, key).
fn test_certificates(dir: &Path) -> (PathBuf, PathBuf, PathBuf) {
    let authority_key = rcgen::KeyPair::generate().unwrap();
    let mut authority = rcgen::CertificateParams::new(Vec::<String>::new()).unwrap();
    authority.is_ca = rcgen::IsCa::Ca(rcgen::BasicConstraints::Unconstrained);
    let authority_pem = authority.self_signed(&authority_key).unwrap().pem();
    let issuer = rcgen::Issuer::from_params(&authority, &authority_key);
    let key = rcgen::KeyPair::generate().unwrap();
    let leaf =
        rcgen::CertificateParams::new(vec!["127.0.0.1".to_string(), "localhost".to_string()])
            .unwrap()
            .signed_by(&key, &issuer)
            .unwrap();
    let paths = (
        dir.join("ca.pem"),
        dir.join("cert.pem"),
        dir.join("key.pem"),
    );
    std::fs::write(&paths.0, authority_pem).unwrap();
    std::fs::write(&paths.1, leaf.pem()).unwrap();
    std::fs::write(&paths.2, key.serialize_pem()).unwrap();
    paths
}

#[test]
fn a_cluster_over_tls_gives_the_single_process_figures() {
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), soup(64)).unwrap();
    let job = write_job(dir.path(), "soup.rle", "B3/S23", "200", "100");
    let (ca, cert, key) = test_certificates(dir.path());
    let tls: Vec<String> = vec![
        "--tls-cert".into(),
        cert.display().to_string(),
        "--tls-key".into(),
        key.display().to_string(),
        "--tls-ca".into(),
        ca.display().to_string(),
    ];
    let tls: Vec<&str> = tls.iter().map(String::as_str).collect();
    let mut with_level = tls.clone();
    with_level.extend(["--shard-level", "6"]);
    let mut cluster = Cluster::start(&job, 2, &with_level);
    cluster.add_nodes(2, "64MiB", &tls);
    let (report, _) = cluster.report();
    let single = leap_report(&dir.path().join("soup.rle"), "200", "B3/S23");
    assert_same_figures(&report, &single);
}

#[test]
fn a_cluster_started_again_from_nothing_has_its_nodes_read_the_checkpoint_and_skips_a_damaged_one()
{
    // The coordinator and every node killed; fresh nodes hold nothing, so
    // they read their pieces from the checkpoint folder. The newest
    // checkpoint has a byte of a node's pack flipped: the node that reads
    // it finds the damage (chunk checksums, CHECKPOINTS.md), the run goes
    // back to the checkpoint before and ends with leap's figures.
    let dir = temp_dir();
    let job = long_job(dir.path());
    let mut cluster = Cluster::start(&job, 2, &["--shard-level", "6"]);
    cluster.add_nodes(2, "256MiB", &[]);
    cluster.wait_for_checkpoints(4);
    cluster.kill_coordinator();
    for index in 0..2 {
        cluster.kill_node(index);
    }
    let manifests = dir.path().join("runs/manifests");
    let mut names: Vec<PathBuf> = std::fs::read_dir(&manifests)
        .unwrap()
        .map(|entry| entry.unwrap().path())
        .filter(|path| !path.file_name().unwrap().to_string_lossy().starts_with('.'))
        .collect();
    names.sort();
    let read = |path: &Path| -> serde_json::Value {
        serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
    };
    let newest = read(&names[names.len() - 1]);
    let before = read(&names[names.len() - 2]);
    let old: Vec<&serde_json::Value> = before["packs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| &p["name"])
        .collect();
    let new: Vec<&serde_json::Value> = newest["packs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| &p["name"])
        .filter(|name| !old.contains(name))
        .collect();
    // The nodes' packs, then the coordinator's (the top of the tree).
    assert!(new.len() >= 2, "{newest}");
    let damaged = dir
        .path()
        .join(format!("runs/packs/{}.pack", new[0].as_str().unwrap()));
    let mut bytes = std::fs::read(&damaged).unwrap();
    let middle = 16 + (bytes.len() - 40) / 3;
    bytes[middle] ^= 0x10;
    std::fs::write(&damaged, bytes).unwrap();

    cluster.start_coordinator(2);
    cluster.add_nodes(2, "256MiB", &[]);
    let (report, stderr) = cluster.report();
    assert!(stderr.contains("skipping damaged checkpoint"), "{stderr}");
    let resumed_from = before["sequence"].as_u64().unwrap();
    assert!(
        stderr.contains(&format!("from checkpoint {resumed_from} ")),
        "{stderr}"
    );
    // Fresh nodes held nothing: every piece was read from the folder.
    assert!(!stderr.contains("on the nodes already"), "{stderr}");
    let single = leap_report(&dir.path().join("soup.rle"), "3000", "B3/S23");
    assert_same_figures(&report, &single);
    // verify still names the damaged pack (nothing repairs a pack no
    // later checkpoint wrote again).
    let verify = run_deeptime(["verify".as_ref(), dir.path().join("runs").as_os_str()]);
    assert_ne!(verify.code, Some(0), "{}", verify.stdout);
    assert!(
        verify.stdout.contains(new[0].as_str().unwrap())
            || verify.stderr.contains(new[0].as_str().unwrap()),
        "{} {}",
        verify.stdout,
        verify.stderr
    );
}

#[test]
fn a_node_that_stops_answering_loses_its_lease_and_the_run_goes_on() {
    let dir = temp_dir();
    let job = long_job(dir.path());
    let mut cluster = Cluster::start(
        &job,
        3,
        &["--shard-level", "6", "--lease", "1s", "--lost-after", "3s"],
    );
    cluster.add_nodes(3, "256MiB", &[]);
    cluster.wait_for_checkpoints(4);
    // SIGSTOP: the process stays, its connections stay open, nothing answers.
    let stopped = cluster.nodes.0[2].id() as i32;
    // SAFETY: sending a signal to a child process this test started.
    unsafe { libc::kill(stopped, libc::SIGSTOP) };
    let (report, stderr) = cluster.report();
    // SAFETY: as above; let it go so that it can be killed and reaped.
    unsafe { libc::kill(stopped, libc::SIGCONT) };
    assert!(stderr.contains("lost"), "{stderr}");
    let single = leap_report(&dir.path().join("soup.rle"), "3000", "B3/S23");
    assert_same_figures(&report, &single);
    assert_checkpoints_hold(dir.path(), &report);
}

#[test]
fn a_node_frozen_for_longer_than_its_lease_is_taken_back_without_a_roll_back() {
    // A busy machine: one node stops for 4 s, four leases long. It is late
    // (no new tasks), not lost: what it holds is waited for, and when it
    // answers again it takes tasks as before (common practice: a slow node
    // is not a dead node).
    let dir = temp_dir();
    let job = long_job(dir.path());
    let mut cluster = Cluster::start(
        &job,
        3,
        &["--shard-level", "6", "--lease", "1s", "--lost-after", "60s"],
    );
    cluster.add_nodes(3, "256MiB", &[]);
    cluster.wait_for_checkpoints(3);
    let stopped = cluster.nodes.0[2].id() as i32;
    // SAFETY: sending signals to a child process this test started.
    unsafe { libc::kill(stopped, libc::SIGSTOP) };
    std::thread::sleep(std::time::Duration::from_secs(4));
    // SAFETY: as above.
    unsafe { libc::kill(stopped, libc::SIGCONT) };
    let (report, stderr) = cluster.report();
    assert!(stderr.contains("is late"), "{stderr}");
    assert!(stderr.contains("is back after"), "{stderr}");
    assert!(!stderr.contains(") lost: "), "{stderr}");
    assert!(!stderr.contains("rolling back"), "{stderr}");
    let single = leap_report(&dir.path().join("soup.rle"), "3000", "B3/S23");
    assert_same_figures(&report, &single);
    assert_checkpoints_hold(dir.path(), &report);
}

#[test]
fn nodes_that_join_mid_run_are_used_at_once() {
    // One node starts the run; two more join after a few checkpoints and
    // must get tasks before the end (common practice for elastic workers).
    let dir = temp_dir();
    let job = long_job(dir.path());
    let mut cluster = Cluster::start(&job, 1, &["--shard-level", "6"]);
    cluster.add_nodes(1, "256MiB", &[]);
    cluster.wait_for_checkpoints(3);
    cluster.add_nodes(2, "256MiB", &[]);
    let (report, _) = cluster.report();
    let tasks: Vec<u64> = report["cluster"]["node_tasks"]
        .as_array()
        .unwrap()
        .iter()
        .map(|n| n.as_u64().unwrap())
        .collect();
    assert_eq!(tasks.len(), 3, "{report}");
    assert!(tasks.iter().all(|&n| n > 0), "tasks per node {tasks:?}");
    let single = leap_report(&dir.path().join("soup.rle"), "3000", "B3/S23");
    assert_same_figures(&report, &single);
}
