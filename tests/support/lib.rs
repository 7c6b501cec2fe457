//! Shared helpers for deeptime's whole-system tests (the crate
//! `deeptime-tests`): find the real `deeptime` binary and the Python of the
//! independent reference, run programs and capture what they print, and make
//! temporary folders. Nothing here is ever skipped: a missing binary or a
//! missing Python fails the test with a message that says what to do.

use std::ffi::OsStr;
use std::path::{Path, PathBuf};
use std::process::Command;

/// What a finished program left: its exit code and its output.
#[derive(Debug)]
pub struct Run {
    /// The command line, for messages.
    pub command: String,
    /// The exit code; `None` when a signal ended the program.
    pub code: Option<i32>,
    pub stdout: String,
    pub stderr: String,
}

impl Run {
    /// Whether the program exited with code 0.
    pub fn succeeded(&self) -> bool {
        self.code == Some(0)
    }

    /// Panics, showing the command and all it printed, unless it exited 0.
    pub fn assert_success(&self) -> &Run {
        assert!(self.succeeded(), "command failed:\n{}", self.describe());
        self
    }

    /// The command, its exit code and its output, for failure messages.
    pub fn describe(&self) -> String {
        format!(
            "  $ {}\n  exit code: {:?}\n  --- stdout ---\n{}\n  --- stderr ---\n{}",
            self.command, self.code, self.stdout, self.stderr
        )
    }
}

/// Runs `program` with `args` to its end, capturing stdout and stderr.
pub fn run_program<I, S>(program: &Path, args: I) -> Run
where
    I: IntoIterator<Item = S>,
    S: AsRef<OsStr>,
{
    run_program_with_env(program, &[], args)
}

/// [`run_program`] with the environment variables `env` set.
pub fn run_program_with_env<I, S>(program: &Path, env: &[(&str, &str)], args: I) -> Run
where
    I: IntoIterator<Item = S>,
    S: AsRef<OsStr>,
{
    let args: Vec<_> = args
        .into_iter()
        .map(|a| a.as_ref().to_os_string())
        .collect();
    let command = env
        .iter()
        .map(|(name, value)| format!("{name}={value}"))
        .chain(
            std::iter::once(program.as_os_str())
                .chain(args.iter().map(|a| a.as_os_str()))
                .map(|a| a.to_string_lossy().into_owned()),
        )
        .collect::<Vec<_>>()
        .join(" ");
    let output = Command::new(program)
        .args(&args)
        .envs(env.iter().copied())
        .output()
        .unwrap_or_else(|e| panic!("cannot start `{command}`: {e}"));
    Run {
        command,
        code: output.status.code(),
        stdout: String::from_utf8_lossy(&output.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&output.stderr).into_owned(),
    }
}

/// The `deeptime` binary under test: `$DEEPTIME_BIN`, else the `deeptime`
/// beside the test executable's folder (the test runs from
/// `target/release/deps/`, the binary is `target/release/deeptime`).
pub fn deeptime_bin() -> PathBuf {
    if let Some(bin) = std::env::var_os("DEEPTIME_BIN") {
        let bin = PathBuf::from(bin);
        assert!(
            bin.is_file(),
            "DEEPTIME_BIN={} is not a file",
            bin.display()
        );
        return bin;
    }
    let exe = std::env::current_exe().expect("the test executable's path");
    let profile_dir = exe
        .parent()
        .and_then(Path::parent)
        .expect("the test executable lies in <target>/<profile>/deps/");
    let bin = profile_dir.join(format!("deeptime{}", std::env::consts::EXE_SUFFIX));
    assert!(
        bin.is_file(),
        "the deeptime binary {} is missing: build it first with cargo build --release \
         (or set DEEPTIME_BIN)",
        bin.display()
    );
    bin
}

/// Runs the `deeptime` binary with `args`.
pub fn run_deeptime<I, S>(args: I) -> Run
where
    I: IntoIterator<Item = S>,
    S: AsRef<OsStr>,
{
    run_program(&deeptime_bin(), args)
}

/// The Python that runs the independent reference: `$DEEPTIME_PYTHON`,
/// required. Never skipped: without it the test fails and says how to run.
pub fn python() -> PathBuf {
    let python = std::env::var_os("DEEPTIME_PYTHON").unwrap_or_else(|| {
        panic!(
            "DEEPTIME_PYTHON is not set. Run the tests with `bash tests/run-tests`, which makes \
             .venv, installs tests/requirements.txt and sets DEEPTIME_PYTHON=.venv/bin/python"
        )
    });
    let python = PathBuf::from(python);
    assert!(
        python.is_file(),
        "DEEPTIME_PYTHON={} is not a file: run `bash tests/run-tests`",
        python.display()
    );
    python
}

/// The reference simulator's script, tests/reference/life_reference.py.
pub fn reference_script() -> PathBuf {
    let script = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("reference")
        .join("life_reference.py");
    assert!(
        script.is_file(),
        "the reference script {} is missing",
        script.display()
    );
    script
}

/// Runs the reference script with `args` under `python()`.
pub fn run_reference<I, S>(args: I) -> Run
where
    I: IntoIterator<Item = S>,
    S: AsRef<OsStr>,
{
    let script = reference_script();
    let all = std::iter::once(script.into_os_string())
        .chain(args.into_iter().map(|a| a.as_ref().to_os_string()));
    run_program(&python(), all)
}

/// Has the reference write its seeded random `size`×`size` soup of
/// `density` under `rule` to `out` (top-left cell at (0, 0)).
pub fn reference_soup(out: &Path, rule: &str, seed: u64, size: u32, density: f64) {
    run_reference([
        "soup".to_string(),
        "--rule".into(),
        rule.into(),
        "--seed".into(),
        seed.to_string(),
        "--size".into(),
        size.to_string(),
        "--density".into(),
        density.to_string(),
        "--out".into(),
        out.display().to_string(),
    ])
    .assert_success();
}

/// A fresh temporary folder, removed when the value is dropped.
pub fn temp_dir() -> tempfile::TempDir {
    tempfile::Builder::new()
        .prefix("deeptime-test-")
        .tempdir()
        .expect("a temporary folder")
}

/// Child processes, killed and reaped when the value is dropped (however
/// the test ends).
pub struct Processes(pub Vec<std::process::Child>);

impl Drop for Processes {
    fn drop(&mut self) {
        for child in &mut self.0 {
            let _ = child.kill();
            let _ = child.wait();
        }
    }
}

/// A loopback port nobody listens on now.
pub fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .expect("a loopback port")
        .local_addr()
        .expect("its address")
        .port()
}

/// A `side`×`side` soup as RLE: 3/8 of the cells alive, from a xorshift
/// generator started at `seed` (each test file keeps its own seed).
pub fn soup(side: usize, seed: u64) -> String {
    let mut state = seed;
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

/// Writes the job file `file` in `dir`: job `name`, checkpoints in
/// `dir/runs`. Returns its path.
pub fn write_job(
    dir: &Path,
    file: &str,
    name: &str,
    pattern: &str,
    rule: &str,
    target: &str,
    every: &str,
) -> PathBuf {
    let path = dir.join(file);
    std::fs::write(
        &path,
        format!(
            "version = 1\nname = \"{name}\"\npattern = \"{pattern}\"\nrule = \"{rule}\"\n\
             target = \"{target}\"\n[checkpoint]\ndir = \"runs\"\nevery = \"{every}\"\n"
        ),
    )
    .expect("the job file");
    path
}

/// `deeptime leap PATTERN --gens GENS --rule RULE --json`, succeeded: its
/// report.
pub fn leap_report(pattern: &Path, gens: &str, rule: &str) -> serde_json::Value {
    let run = run_deeptime([
        "leap".as_ref(),
        pattern.as_os_str(),
        "--gens".as_ref(),
        gens.as_ref(),
        "--rule".as_ref(),
        rule.as_ref(),
        "--json".as_ref(),
    ]);
    run.assert_success();
    serde_json::from_str(&run.stdout).expect("leap --json prints one object")
}
