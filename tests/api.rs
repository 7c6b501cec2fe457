//! The cluster API from another language: a stock-gRPC Python client
//! (tests/clients/status_client.py, stubs compiled from our proto at run
//! time) against a real coordinator and real nodes on loopback. What it
//! reads must agree with `deeptime status --json`, with the coordinator's
//! final report and with a single-process `deeptime leap`; a wrong token
//! must get UNAUTHENTICATED and change nothing.

use std::io::{BufRead, BufReader, Read};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use deeptime_tests::{
    Processes, Run, deeptime_bin, free_port, leap_report, python, run_deeptime, run_program, soup,
    temp_dir, write_job,
};
use serde_json::Value;

fn start_node(coordinator: u16, token: &Path, memory: &str) -> Child {
    Command::new(deeptime_bin())
        .args(["node", "--join", &format!("http://127.0.0.1:{coordinator}")])
        .args(["--listen", "127.0.0.1:0", "--memory", memory])
        .arg("--token-file")
        .arg(token)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap()
}

fn client_script() -> PathBuf {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("clients/status_client.py");
    assert!(script.is_file(), "{} is missing", script.display());
    script
}

/// Runs the Python client with `args` under `python()` (which fails the
/// test, saying to run tests/run-tests, when DEEPTIME_PYTHON is not set).
fn run_client(args: &[&str]) -> Run {
    let mut all = vec![client_script().into_os_string()];
    all.extend(args.iter().map(|a| a.into()));
    run_program(&python(), all)
}

fn json_of(run: &Run) -> Value {
    run.assert_success();
    serde_json::from_str(&run.stdout)
        .unwrap_or_else(|error| panic!("{error}: not one JSON object\n{}", run.describe()))
}

/// `deeptime status --json` for the coordinator at `url`.
fn deeptime_status(url: &str, token: &Path) -> Value {
    let run = run_deeptime([
        "status".as_ref(),
        "--coordinator".as_ref(),
        url.as_ref(),
        "--token-file".as_ref(),
        token.as_os_str(),
        "--json".as_ref(),
    ]);
    json_of(&run)
}

/// `status` without the one field that moves on its own.
fn without_uptime(status: &Value) -> Value {
    let mut status = status.clone();
    let uptime = status
        .as_object_mut()
        .expect("the status is an object")
        .remove("uptime_seconds");
    assert!(
        uptime.as_ref().and_then(Value::as_f64).is_some(),
        "uptime_seconds is missing or not a number: {uptime:?}"
    );
    status
}

/// The status once every member has renewed its lease with figures and two
/// calls more than two renewals apart agree (uptime aside).
fn settled_status(url: &str, token: &Path) -> Value {
    let deadline = Instant::now() + Duration::from_secs(60);
    let mut last = deeptime_status(url, token);
    loop {
        std::thread::sleep(Duration::from_millis(1200));
        let now = deeptime_status(url, token);
        let renewed = now["members"]
            .as_array()
            .is_some_and(|m| m.iter().all(|m| m["quads"].as_u64() > Some(0)));
        if renewed && without_uptime(&now) == without_uptime(&last) {
            return now;
        }
        assert!(
            Instant::now() < deadline,
            "the status did not settle within a minute: {last} then {now}"
        );
        last = now;
    }
}

/// A coordinator started with `--stay`, its report lines and its stderr.
struct Coordinator {
    port: u16,
    url: String,
    lines: mpsc::Receiver<String>,
    stderr: Arc<Mutex<String>>,
}

impl Coordinator {
    fn start(
        job: &Path,
        token: &Path,
        nodes: usize,
        extra: &[&str],
        processes: &mut Processes,
    ) -> Self {
        let port = free_port();
        let mut child = Command::new(deeptime_bin())
            .arg("coordinator")
            .arg(job)
            .args(["--listen", &format!("127.0.0.1:{port}")])
            .args(["--min-nodes", &nodes.to_string(), "--json", "--stay"])
            .arg("--token-file")
            .arg(token)
            .args(extra)
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        let stdout = child.stdout.take().unwrap();
        let mut stderr_pipe = child.stderr.take().unwrap();
        processes.0.push(child);
        let (send, lines) = mpsc::channel();
        std::thread::spawn(move || {
            for line in BufReader::new(stdout).lines() {
                let Ok(line) = line else { break };
                if send.send(line).is_err() {
                    break;
                }
            }
        });
        let stderr = Arc::new(Mutex::new(String::new()));
        let sink = stderr.clone();
        std::thread::spawn(move || {
            let mut buffer = [0u8; 4096];
            while let Ok(n) = stderr_pipe.read(&mut buffer) {
                if n == 0 {
                    break;
                }
                sink.lock()
                    .unwrap()
                    .push_str(&String::from_utf8_lossy(&buffer[..n]));
            }
        });
        // The coordinator writes the token file before it listens.
        let deadline = Instant::now() + Duration::from_secs(20);
        while !token.exists() {
            assert!(Instant::now() < deadline, "the coordinator wrote no token");
            std::thread::sleep(Duration::from_millis(20));
        }
        Coordinator {
            port,
            url: format!("http://127.0.0.1:{port}"),
            lines,
            stderr,
        }
    }

    /// The final JSON report (the first line on stdout); with --stay the
    /// coordinator goes on serving after printing it.
    fn report(&self, within: Duration) -> Value {
        let line = self.lines.recv_timeout(within).unwrap_or_else(|error| {
            panic!(
                "no report from the coordinator within {within:?} ({error}); its stderr:\n{}",
                self.stderr.lock().unwrap()
            )
        });
        serde_json::from_str(&line).unwrap_or_else(|error| panic!("{error}: {line:?}"))
    }
}

#[test]
fn a_python_client_reads_the_same_status_as_deeptime_and_wrong_tokens_change_nothing() {
    // Fail before starting any process when DEEPTIME_PYTHON is not set.
    python();
    let dir = temp_dir();
    // Shard level 6 (pieces of 32×32 cells): a 64×64 soup spans several
    // pieces, so both nodes run tasks.
    std::fs::write(dir.path().join("soup.rle"), soup(64, 0x2545_f491_4f6c_dd1d)).unwrap();
    let (target, rule, nodes) = ("200", "B36/S23", 2);
    let job = write_job(
        dir.path(),
        "job.toml",
        "api",
        "soup.rle",
        rule,
        target,
        "100",
    );
    // Our own token (the coordinator uses a token file that exists), ending
    // in 0 so that the decoy below is one character away from it.
    let token = dir.path().join("cluster.token");
    std::fs::write(&token, "api-test-cluster-token-0\n").unwrap();
    let mut processes = Processes(Vec::new());
    let coordinator =
        Coordinator::start(&job, &token, nodes, &["--shard-level", "6"], &mut processes);
    let url = coordinator.url.as_str();
    let token_arg = token.to_str().unwrap();

    // Before any node joins: waiting at generation 0, no members (the
    // proto's JobStatus comments).
    let waiting = json_of(&run_client(&[
        "--coordinator",
        url,
        "--token-file",
        token_arg,
    ]));
    assert_eq!(waiting["status"]["state"], "waiting", "{waiting}");
    assert_eq!(waiting["status"]["generation"], "0", "{waiting}");
    assert_eq!(waiting["status"]["target"], target, "{waiting}");
    assert_eq!(
        waiting["status"]["members"],
        serde_json::json!([]),
        "{waiting}"
    );

    for _ in 0..nodes {
        processes
            .0
            .push(start_node(coordinator.port, &token, "256MiB"));
    }
    let report = coordinator.report(Duration::from_secs(300));
    // The cluster's figures are a single process's (common practice: a
    // distributed run is checked against the sequential one).
    let single = leap_report(&dir.path().join("soup.rle"), target, rule);
    for field in ["generation", "population", "digest", "rule"] {
        assert_eq!(
            report[field], single[field],
            "{field}: {report} against {single}"
        );
    }

    // Members' quads and bytes come from their lease renewals (a tenth of
    // the lease, members.rs), so wait until renewals have reported and nothing
    // moves any more; from then on a status call must see the same figures.
    let before = settled_status(url, &token);
    let client = json_of(&run_client(&[
        "--coordinator",
        url,
        "--token-file",
        token_arg,
    ]));
    let status = &client["status"];

    // Every JobStatus field by its proto name, and the same values as
    // deeptime's own client (uptime aside, which grows between calls).
    assert_eq!(
        without_uptime(status),
        without_uptime(&before),
        "the Python client and deeptime status disagree"
    );
    assert!(
        status["uptime_seconds"].as_f64().unwrap() >= before["uptime_seconds"].as_f64().unwrap(),
        "uptime went back: {status} after {before}"
    );

    // And the final report's figures (the report is printed once the run
    // is done; the proto says what each field means).
    assert_eq!(status["name"], "api", "{status}");
    assert_eq!(status["state"], "done", "{status}");
    assert_eq!(status["error"], Value::Null, "{status}");
    // A fresh run: it began from generation 0; the box is the report's.
    assert_eq!(status["started_from"], "0", "{status}");
    assert_eq!(status["bbox"], report["bbox"], "{status}");
    assert_eq!(status["generation"], target, "{status}");
    assert_eq!(status["target"], target, "{status}");
    assert_eq!(status["generation"], report["generation"], "{status}");
    assert_eq!(status["population"], report["population"], "{status}");
    assert_eq!(status["rule"], report["rule"], "{status}");
    assert_eq!(status["shard_level"], 6, "{status}");
    assert_eq!(
        status["shard_level"], report["cluster"]["shard_level"],
        "{status}"
    );
    assert_eq!(status["tasks_done"], report["cluster"]["tasks"], "{status}");
    assert!(status["tasks_done"].as_u64().unwrap() > 0, "{status}");
    assert_eq!(status["tasks_running"], 0, "{status}");
    assert_eq!(
        status["tasks_memoised"], report["cluster"]["tasks_memoised"],
        "{status}"
    );
    assert_eq!(
        status["bytes_fetched"], report["cluster"]["bytes_fetched"],
        "{status}"
    );
    let members = status["members"].as_array().unwrap();
    assert_eq!(members.len(), nodes, "{status}");
    assert_eq!(report["cluster"]["nodes"], nodes, "{report}");
    let mut member_tasks = 0;
    for member in members {
        assert_eq!(member["state"], "live", "{member}");
        assert_eq!(member["tasks_running"], 0, "{member}");
        assert_eq!(member["memory"], 256 << 20, "{member}");
        assert!(member["pieces_held"].is_u64(), "{member}");
        member_tasks += member["tasks_done"].as_u64().unwrap();
    }
    // Each task is counted once for the job and once for its member.
    assert_eq!(status["tasks_done"], member_tasks, "{status}");

    // The standard health service (grpc.health.v1), behind the same token.
    assert_eq!(
        client["health"],
        serde_json::json!({"server": "SERVING", "coordinator": "SERVING"}),
        "{client}"
    );

    // Wrong tokens (and none): UNAUTHENTICATED for Status, Join and the
    // health check (the proto's header comment).
    let refused = run_client(&[
        "--coordinator",
        url,
        "--token-file",
        token_arg,
        "--wrong-token",
    ]);
    let refused = json_of(&refused);
    for call in [
        "Coordinator.Status",
        "Coordinator.Join",
        "grpc.health.v1.Health.Check",
        "Coordinator.Status without a token",
    ] {
        assert_eq!(
            refused["refused"][call]["code"], "UNAUTHENTICATED",
            "{call}: {refused}"
        );
    }
    // ... and changed nothing: no member joined, no figure moved.
    let after = deeptime_status(url, &token);
    assert_eq!(
        without_uptime(&after),
        without_uptime(&before),
        "a refused call changed the status"
    );

    // The check can fail: given a decoy token whose "wrong" variant (its
    // last character made 0) is the real token, the client's wrong-token
    // Status call is accepted, and it says so with exit code 3.
    let decoy = dir.path().join("decoy.token");
    std::fs::write(&decoy, "api-test-cluster-token-1\n").unwrap();
    let accepted = run_client(&[
        "--coordinator",
        url,
        "--token-file",
        decoy.to_str().unwrap(),
        "--wrong-token",
    ]);
    assert_eq!(accepted.code, Some(3), "{}", accepted.describe());
    assert!(
        accepted.stderr.contains("was accepted"),
        "{}",
        accepted.describe()
    );
    assert_eq!(
        accepted.stderr.lines().count(),
        1,
        "{}",
        accepted.describe()
    );
}

#[test]
fn the_python_client_fails_in_one_line_with_its_exit_codes() {
    let dir = temp_dir();
    let token = dir.path().join("cluster.token");
    std::fs::write(&token, "0123456789abcdef0123\n").unwrap();
    let token_arg = token.to_str().unwrap();
    let nobody = format!("http://127.0.0.1:{}", free_port());

    // Nothing listens there: exit 1 (a call failed), one line naming the URL.
    let unreachable = run_client(&[
        "--coordinator",
        &nobody,
        "--token-file",
        token_arg,
        "--timeout",
        "1",
    ]);
    assert_eq!(unreachable.code, Some(1), "{}", unreachable.describe());
    assert_eq!(
        unreachable.stderr.lines().count(),
        1,
        "{}",
        unreachable.describe()
    );
    assert!(
        unreachable.stderr.contains("cannot reach the coordinator"),
        "{}",
        unreachable.describe()
    );
    assert!(
        unreachable.stderr.contains(&nobody),
        "{}",
        unreachable.describe()
    );
    assert!(unreachable.stdout.is_empty(), "{}", unreachable.describe());

    // A missing token file and a URL without a scheme: exit 2 (bad input).
    let missing = dir.path().join("no.token");
    let no_file = run_client(&[
        "--coordinator",
        &nobody,
        "--token-file",
        missing.to_str().unwrap(),
    ]);
    assert_eq!(no_file.code, Some(2), "{}", no_file.describe());
    assert_eq!(no_file.stderr.lines().count(), 1, "{}", no_file.describe());
    assert!(
        no_file.stderr.contains("cannot read the token file"),
        "{}",
        no_file.describe()
    );
    let bare = nobody.trim_start_matches("http://");
    let no_scheme = run_client(&["--coordinator", bare, "--token-file", token_arg]);
    assert_eq!(no_scheme.code, Some(2), "{}", no_scheme.describe());
    assert_eq!(
        no_scheme.stderr.lines().count(),
        1,
        "{}",
        no_scheme.describe()
    );
    assert!(
        no_scheme.stderr.contains("http://HOST:PORT"),
        "{}",
        no_scheme.describe()
    );
}
