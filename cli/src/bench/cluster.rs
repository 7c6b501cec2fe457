//! The cluster's figures: real `deeptime node` processes and a coordinator
//! on loopback (children of this executable), against `deeptime run` on the
//! same job: throughput with one checkpoint and with many, bytes fetched
//! between nodes against the bytes of the records the receivers lacked,
//! and each node's peak store bytes on 1, 2 and 4 nodes. Every run's digest
//! is checked equal to the embedded run's before a figure is reported.

use std::io::{BufRead, BufReader, Read};
use std::net::{TcpListener, TcpStream};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{Context, bail, ensure};
use deeptime_engine::human_bytes;
use deeptime_engine::rule::Rule;
use serde_json::Value;

use super::suite::{soup, write_rle};
use super::{Figure, Goal, Settings, compact, process};

/// Child processes, killed when the part ends however it ends.
struct Children(Vec<Child>);

impl Drop for Children {
    fn drop(&mut self) {
        for child in &mut self.0 {
            let _ = child.kill();
            let _ = child.wait();
        }
    }
}

/// One run of a job: its `--json` report and its time.
pub(super) struct Measured {
    pub report: Value,
    /// wall time of the process, less the wait for nodes to join
    pub seconds: f64,
    /// the wait for nodes to join (cluster runs)
    waited: f64,
    /// each node's peak resident memory (VmHWM), where the system says
    resident: Vec<u64>,
    /// the coordinator's peak resident memory (its rusage at exit)
    coordinator_resident: Option<u64>,
    /// the coordinator's exit code, and its messages
    pub code: Option<i32>,
    pub said: Vec<String>,
}

impl Measured {
    /// The last few of the coordinator's messages, for an error.
    pub fn last_lines(&self) -> String {
        self.said[self.said.len().saturating_sub(5)..].join("; ")
    }

    pub fn digest(&self) -> &str {
        self.report["digest"].as_str().unwrap_or("")
    }

    pub fn cluster(&self, field: &str) -> f64 {
        self.report["cluster"][field].as_f64().unwrap_or(0.0)
    }

    pub fn peaks(&self) -> Vec<u64> {
        self.per_node("peak_bytes")
    }

    fn per_node(&self, field: &str) -> Vec<u64> {
        self.report["cluster"][field]
            .as_array()
            .map(|peaks| peaks.iter().filter_map(Value::as_u64).collect())
            .unwrap_or_default()
    }
}

/// Writes a job file `NAME.toml` in `dir` over `pattern` (in `dir`) to
/// `target`, a checkpoint every `every` into `runs/NAME`, with `memory` as
/// the embedded run's budget if given.
pub(super) fn write_job(
    dir: &Path,
    name: &str,
    pattern: &str,
    target: &str,
    every: &str,
    memory: Option<&str>,
) -> anyhow::Result<PathBuf> {
    let path = dir.join(format!("{name}.toml"));
    let memory = memory
        .map(|m| format!("memory = \"{m}\"\n"))
        .unwrap_or_default();
    let text = format!(
        "version = 1\nname = \"{name}\"\npattern = \"{pattern}\"\ntarget = \"{target}\"\n{memory}\n\
         [checkpoint]\ndir = \"runs/{name}\"\nevery = \"{every}\"\n"
    );
    std::fs::write(&path, text)?;
    Ok(path)
}

pub(super) fn embedded(exe: &Path, job: &Path) -> anyhow::Result<Measured> {
    let started = Instant::now();
    let output = Command::new(exe)
        .arg("run")
        .arg(job)
        .arg("--json")
        .stdin(Stdio::null())
        .output()
        .context("cannot start deeptime run")?;
    let seconds = started.elapsed().as_secs_f64();
    ensure!(
        output.status.success(),
        "deeptime run {} failed: {}",
        job.display(),
        String::from_utf8_lossy(&output.stderr).trim()
    );
    Ok(Measured {
        report: serde_json::from_slice(&output.stdout).context("deeptime run printed no JSON")?,
        seconds,
        waited: 0.0,
        resident: Vec::new(),
        coordinator_resident: None,
        code: output.status.code(),
        said: Vec::new(),
    })
}

/// A free loopback port (bound, then let go for the coordinator).
fn free_port() -> anyhow::Result<u16> {
    Ok(TcpListener::bind("127.0.0.1:0")?.local_addr()?.port())
}

/// Runs `job` on a coordinator with `nodes` fresh nodes on loopback.
/// With `checkpoint_dir`, the nodes write their own packs there (it must
/// be the job's folder); without, the coordinator gathers each checkpoint.
fn on_cluster(
    exe: &Path,
    job: &Path,
    nodes: usize,
    shard_level: Option<u64>,
    dir: &Path,
    checkpoint_dir: Option<&Path>,
) -> anyhow::Result<Measured> {
    let run = on_nodes(
        exe,
        job,
        dir,
        &Nodes {
            count: nodes,
            slots: 1,
            memory: "8G",
            shard_level,
            checkpoint_dir,
            coordinator_args: &[],
            node_args: &[],
            fault: None,
        },
    )?;
    ensure!(
        run.code == Some(0),
        "the coordinator on {nodes} node(s) failed: {}",
        run.last_lines()
    );
    Ok(run)
}

/// How a cluster run is set up.
pub(super) struct Nodes<'a> {
    /// node processes, and each one's --slots
    pub count: usize,
    pub slots: usize,
    /// each node's --memory
    pub memory: &'a str,
    pub shard_level: Option<u64>,
    /// the nodes' --checkpoint-dir (the job's folder), if any
    pub checkpoint_dir: Option<&'a Path>,
    /// the coordinator's arguments besides the usual ones
    pub coordinator_args: &'a [&'a str],
    /// each node's arguments besides the usual ones
    pub node_args: &'a [&'a str],
    /// what happens to the second node after the first step
    pub fault: Option<Fault>,
}

/// A fault a cluster run meets once the coordinator reports its first step.
#[derive(Clone, Copy)]
pub(super) enum Fault {
    /// SIGSTOP for this long, then SIGCONT
    Freeze(Duration),
    /// SIGKILL
    Kill,
}

/// Runs `job` on a coordinator and fresh nodes as `nodes` says; the run's
/// figures whatever its exit code.
pub(super) fn on_nodes(
    exe: &Path,
    job: &Path,
    dir: &Path,
    nodes: &Nodes<'_>,
) -> anyhow::Result<Measured> {
    let (shard_level, checkpoint_dir) = (nodes.shard_level, nodes.checkpoint_dir);
    let nodes_count = nodes.count;
    let token = dir.join(format!("token-{}", rand::random::<u64>()));
    let port = free_port()?;
    let mut command = Command::new(exe);
    command
        .arg("coordinator")
        .arg(job)
        .args(["--listen", &format!("127.0.0.1:{port}")])
        .args(["--min-nodes", &nodes_count.to_string(), "--json"])
        .args(nodes.coordinator_args)
        .arg("--token-file")
        .arg(&token);
    if let Some(level) = shard_level {
        command.args(["--shard-level", &level.to_string()]);
    }
    let started = Instant::now();
    command
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    let mut coordinator =
        process::spawn(&mut command).context("cannot start deeptime coordinator")?;
    let mut stdout = coordinator.stdout.take().expect("piped");
    let stderr = coordinator.stderr.take().expect("piped");
    let mut children = Children(vec![coordinator]);
    // Its messages, with the time each arrived.
    let lines: Arc<Mutex<Vec<(Instant, String)>>> = Arc::default();
    let reader = {
        let lines = lines.clone();
        std::thread::spawn(move || {
            for line in BufReader::new(stderr).lines().map_while(Result::ok) {
                lines.lock().expect("lines").push((Instant::now(), line));
            }
        })
    };
    // Nodes start once the coordinator listens, so none waits out a backoff.
    let deadline = Instant::now() + Duration::from_secs(60);
    while TcpStream::connect(("127.0.0.1", port)).is_err() {
        if Instant::now() > deadline || children.0[0].try_wait()?.is_some() {
            bail!("the coordinator did not listen: {}", said(&lines));
        }
        std::thread::sleep(Duration::from_millis(10));
    }
    for _ in 0..nodes_count {
        let node = Command::new(exe)
            .args(["node", "--join", &format!("http://127.0.0.1:{port}")])
            .args(["--listen", "127.0.0.1:0", "--memory", nodes.memory])
            .args(["--slots", &nodes.slots.to_string()])
            .args(nodes.node_args)
            .arg("--token-file")
            .arg(&token)
            .args(
                checkpoint_dir
                    .iter()
                    .flat_map(|dir| ["--checkpoint-dir".as_ref(), dir.as_os_str()]),
            )
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .context("cannot start deeptime node")?;
        children.0.push(node);
    }
    if let Some(fault) = nodes.fault {
        // After the first step's report, to the second node.
        let deadline = Instant::now() + Duration::from_secs(600);
        while !lines
            .lock()
            .expect("lines")
            .iter()
            .any(|(_, line)| line.contains(" generation ") && line.contains(" tasks"))
        {
            if Instant::now() > deadline || children.0[0].try_wait()?.is_some() {
                bail!("the run ended before its first step: {}", said(&lines));
            }
            std::thread::sleep(Duration::from_millis(5));
        }
        let pid = children.0.get(2).map(|node| node.id() as i32);
        match (fault, pid) {
            (Fault::Freeze(time), Some(pid)) => {
                // SAFETY: signals to a child process this part started.
                unsafe { libc::kill(pid, libc::SIGSTOP) };
                std::thread::sleep(time);
                // SAFETY: as above.
                unsafe { libc::kill(pid, libc::SIGCONT) };
            }
            (Fault::Kill, Some(_)) => {
                // Killed in place; reaped with the others when the part ends.
                children.0[2].kill()?;
            }
            (_, None) => bail!("a fault needs two nodes"),
        }
    }
    let mut text = String::new();
    stdout.read_to_string(&mut text)?;
    // Reaped by wait4 below, which also gives its peak memory.
    #[allow(clippy::zombie_processes)]
    let coordinator = children.0.remove(0);
    let (status, coordinator_resident) = process::wait_with_peak(&coordinator)?;
    let seconds = started.elapsed().as_secs_f64();
    let resident = children
        .0
        .iter()
        .filter_map(|node| process::peak_resident(node.id()))
        .collect();
    drop(children);
    let _ = reader.join();
    // The wait for nodes: from the coordinator's first line (it listens) to
    // the last node's join.
    let waited = {
        let lines = lines.lock().expect("lines");
        let first = lines.iter().find(|(_, line)| line.contains("coordinating"));
        let joined = lines
            .iter()
            .filter(|(_, line)| line.contains("joined"))
            .nth(nodes_count - 1);
        match (first, joined) {
            (Some((from, _)), Some((to, _))) => to.duration_since(*from).as_secs_f64(),
            _ => 0.0,
        }
    };
    let said: Vec<String> = lines
        .lock()
        .expect("lines")
        .iter()
        .map(|(_, line)| line.clone())
        .collect();
    Ok(Measured {
        report: serde_json::from_str(text.trim()).unwrap_or(Value::Null),
        seconds: seconds - waited,
        waited,
        resident,
        coordinator_resident,
        code: status.code(),
        said,
    })
}

/// The coordinator's last few messages, for an error.
fn said(lines: &Mutex<Vec<(Instant, String)>>) -> String {
    let lines = lines.lock().expect("lines");
    let start = lines.len().saturating_sub(5);
    lines[start..]
        .iter()
        .map(|(_, line)| line.as_str())
        .collect::<Vec<_>>()
        .join("; ")
}

/// The cluster's figures, on a soup that takes a few seconds embedded.
pub fn cluster(settings: &Settings) -> anyhow::Result<Vec<Figure>> {
    let (side, target, every) = if settings.quick {
        (256u64, "2^8", "2^6")
    } else {
        (1024, "2^10", "2^6")
    };
    let directory = tempfile::tempdir()?;
    let dir = directory.path();
    let exe = process::this_executable(dir)?;
    write_rle(&soup(side, 4)?, Rule::LIFE, &dir.join("soup.rle"))?;
    let label = format!("{side}² soup to {target}");

    // One checkpoint (at the target) and one every `every` generations.
    let mut figures = Vec::new();
    let mut two_nodes = None;
    let mut shard_level = None;
    let mut costs = Vec::new();
    for (name, every) in [("once", target), ("often", every)] {
        let embedded_job = write_job(
            dir,
            &format!("embedded-{name}"),
            "soup.rle",
            target,
            every,
            None,
        )?;
        let cluster_job = write_job(
            dir,
            &format!("cluster-{name}"),
            "soup.rle",
            target,
            every,
            None,
        )?;
        let alone = embedded(&exe, &embedded_job)?;
        let folder = dir.join(format!("runs/cluster-{name}"));
        let cluster = on_cluster(&exe, &cluster_job, 2, None, dir, Some(&folder))?;
        ensure!(
            cluster.digest() == alone.digest(),
            "the cluster's digest {} differs from the embedded run's {}",
            cluster.digest(),
            alone.digest()
        );
        let checkpoints = std::fs::read_dir(dir.join(format!("runs/cluster-{name}/manifests")))
            .map(|entries| {
                entries
                    .filter_map(Result::ok)
                    .filter(|entry| !entry.file_name().to_string_lossy().starts_with('.'))
                    .count()
            })
            .unwrap_or(0);
        let tasks = cluster.cluster("tasks");
        let (compute, task) = (
            cluster.cluster("compute_seconds"),
            cluster.cluster("task_seconds"),
        );
        figures.push(
            Figure::new(
                "cluster",
                &format!(
                    "{label}, {checkpoints} checkpoint{}: 2 nodes / embedded gen/s",
                    if checkpoints == 1 { "" } else { "s" }
                ),
                alone.seconds / cluster.seconds,
                "×",
                Some(Goal::AtLeast(0.5)),
            )
            .detail(format!(
                "embedded {:.2} s, cluster {:.2} s (after {:.2} s waiting for nodes); \
                 checkpoints written by the nodes {} (their packs {}, the coordinator's {}), \
                 coordinator peak resident {}; \
                 {} tasks ({} memoised), on nodes {:.2} s computing of {:.2} s in tasks; \
                 digest {}",
                alone.seconds,
                cluster.seconds,
                cluster.waited,
                cluster.cluster("checkpoints_by_nodes"),
                human_bytes(cluster.cluster("node_pack_bytes") as u64),
                human_bytes(cluster.cluster("coordinator_pack_bytes") as u64),
                cluster
                    .coordinator_resident
                    .map_or("?".to_string(), human_bytes),
                tasks,
                cluster.cluster("tasks_memoised"),
                compute,
                task,
                &alone.digest()[..8.min(alone.digest().len())]
            )),
        );
        costs.push((checkpoints, alone.seconds, cluster.seconds));
        if name == "once" {
            shard_level = cluster.report["cluster"]["shard_level"].as_u64();
            two_nodes = Some(cluster);
        }
    }
    if let [
        (one, alone_one, cluster_one),
        (many, alone_many, cluster_many),
    ] = costs[..]
        && many > one
    {
        let extra = (many - one) as f64;
        if let Some(last) = figures.last_mut() {
            last.detail.push_str(&format!(
                "; each extra stop (a shorter stride and a checkpoint) cost the \
                 embedded run {:.3} s, the cluster {:.3} s (its nodes write their \
                 pieces' packs in parallel)",
                (alone_many - alone_one) / extra,
                (cluster_many - cluster_one) / extra
            ));
        }
    }

    // Bytes fetched between nodes against what the receivers lacked.
    let two = two_nodes.expect("measured above");
    let fetched = two.cluster("bytes_fetched");
    let lacked = two.cluster("bytes_fetched_lacked");
    let tasks = two.cluster("tasks").max(1.0);
    ensure!(
        lacked > 0.0,
        "no task fetched anything from a peer on the {label}: too small to measure"
    );
    figures.push(
        Figure::new(
            "cluster",
            &format!("{label}, 2 nodes: bytes fetched / bytes lacked"),
            fetched / lacked,
            "×",
            Some(Goal::AtMost(2.0)),
        )
        .detail(format!(
            "per task {} B fetched, {} B of records the receiver lacked; {} records, \
             {} in {} fetch calls over {} tasks ({:.2} calls per task)",
            compact(fetched / tasks),
            compact(lacked / tasks),
            two.cluster("records_fetched"),
            human_bytes(fetched as u64),
            two.cluster("fetch_calls"),
            tasks,
            two.cluster("fetch_calls") / tasks
        )),
    );

    // Peak store bytes per node as nodes are added, at one shard level.
    let job = |nodes: usize| {
        write_job(
            dir,
            &format!("memory-{nodes}"),
            "soup.rle",
            target,
            target,
            None,
        )
    };
    let folder = |nodes: usize| dir.join(format!("runs/memory-{nodes}"));
    let single = on_cluster(&exe, &job(1)?, 1, shard_level, dir, Some(&folder(1)))?;
    ensure!(
        single.digest() == two.digest(),
        "one node's digest differs from the embedded run's"
    );
    let single_peak = single.peaks().into_iter().max().unwrap_or(0);
    ensure!(single_peak > 0, "the single node reported no bytes");
    let runs = [
        (2usize, two),
        (
            4,
            on_cluster(&exe, &job(4)?, 4, shard_level, dir, Some(&folder(4)))?,
        ),
    ];
    for (nodes, run) in &runs {
        ensure!(
            run.digest() == single.digest(),
            "{nodes} nodes gave a different digest"
        );
        let peaks = run.peaks();
        let largest = peaks.iter().copied().max().unwrap_or(0);
        let total: u64 = peaks.iter().sum();
        let list = peaks
            .iter()
            .map(|&bytes| human_bytes(bytes))
            .collect::<Vec<_>>()
            .join(", ");
        let node_tasks = run
            .per_node("node_tasks")
            .iter()
            .map(u64::to_string)
            .collect::<Vec<_>>()
            .join(", ");
        let resident = run
            .resident
            .iter()
            .map(|&bytes| human_bytes(bytes))
            .collect::<Vec<_>>()
            .join(", ");
        figures.push(
            Figure::new(
                "cluster",
                &format!("{label}, {nodes} nodes: largest node's peak / 1 node's"),
                largest as f64 / single_peak as f64,
                "×",
                // "Close to 1/N": within a quarter of it.
                Some(Goal::AtMost(1.25 / *nodes as f64)),
            )
            .detail(format!(
                "store peaks {list} against {} on one node (shard level {}); tasks per \
                 node {node_tasks}; all nodes together {:.2}× the single node's; resident \
                 peaks (in start order) {resident} against {}",
                human_bytes(single_peak),
                run.cluster("shard_level"),
                total as f64 / single_peak as f64,
                single
                    .resident
                    .first()
                    .map_or("?".to_string(), |&bytes| human_bytes(bytes)),
            )),
        );
    }
    Ok(figures)
}
