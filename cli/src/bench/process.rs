//! The suite's child processes: the executable they run, starting them so
//! that the kernel's count of a child's peak resident memory is the child's
//! own, and reaping them with that peak. The cluster's figures and the
//! resident-memory figures both use these.

use std::io::Read;
use std::os::unix::process::{CommandExt, ExitStatusExt};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};

use anyhow::{Context, ensure};

/// A copy of this executable in `dir`, so every process of a part runs
/// this very build even if a build replaces the file meanwhile (on Linux
/// the running image stays readable through /proc/self/exe).
pub fn this_executable(dir: &Path) -> anyhow::Result<PathBuf> {
    let mut source = std::env::current_exe().context("cannot find this executable")?;
    if !source.exists() {
        source = PathBuf::from("/proc/self/exe");
    }
    let copy = dir.join("deeptime");
    std::fs::copy(&source, &copy)
        .with_context(|| format!("cannot copy {} to {}", source.display(), copy.display()))?;
    Ok(copy)
}

/// Starts `command` by fork and exec. Linux starts a child's peak resident
/// count from the memory map it execs from: with a vfork-style spawn (the
/// standard library's default) that is this process's own, so a child
/// started after a large run reports that run's peak as its own; a fork
/// copies only the mappings holding private pages now, which the allocator
/// is first asked to give back.
pub fn spawn(command: &mut Command) -> std::io::Result<Child> {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: a plain call into the allocator, which gives freed pages back.
    unsafe {
        libc::malloc_trim(0);
    }
    // SAFETY: the hook does nothing; having one makes the standard library
    // fork instead of spawning the vfork way.
    unsafe {
        command.pre_exec(|| Ok(()));
    }
    command.spawn()
}

/// Waits for a child; its exit status and peak resident memory (from the
/// kernel's accounting of the reaped process, in KiB on Linux).
pub fn wait_with_peak(child: &Child) -> anyhow::Result<(ExitStatus, Option<u64>)> {
    let mut status = 0;
    // SAFETY: rusage is plain data; wait4 fills it for our own child.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    let pid = child.id() as libc::pid_t;
    // SAFETY: waits for a child this process started and has not reaped.
    let reaped = unsafe { libc::wait4(pid, &mut status, 0, &mut usage) };
    ensure!(
        reaped == pid,
        "waiting for process {pid}: {}",
        std::io::Error::last_os_error()
    );
    let peak = u64::try_from(usage.ru_maxrss).ok().map(|kib| kib * 1024);
    Ok((ExitStatus::from_raw(status), peak))
}

/// Peak resident bytes of a live process (VmHWM, from /proc; Linux).
pub fn peak_resident(pid: u32) -> Option<u64> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let kib: u64 = status
        .lines()
        .find_map(|line| line.strip_prefix("VmHWM:"))?
        .split_whitespace()
        .next()?
        .parse()
        .ok()?;
    Some(kib * 1024)
}

/// The resident bytes a fork of this process would start with (Linux): the
/// mappings holding private pages are copied whole, the rest (program text,
/// shared files) is left to fault in again. Summed from /proc/self/smaps.
fn copied_by_fork() -> Option<u64> {
    let smaps = std::fs::read_to_string("/proc/self/smaps").ok()?;
    let kib = |line: &str, field: &str| -> Option<u64> {
        line.strip_prefix(field)?
            .split_whitespace()
            .next()?
            .parse()
            .ok()
    };
    let (mut total, mut resident) = (0, 0);
    for line in smaps.lines() {
        if let Some(rss) = kib(line, "Rss:") {
            resident = rss;
        } else if let Some(anonymous) = kib(line, "Anonymous:")
            && anonymous > 0
        {
            total += resident;
        }
    }
    Some(total * 1024)
}

/// A child run to its end by `run`.
pub struct Finished {
    pub status: ExitStatus,
    pub stdout: Vec<u8>,
    pub stderr: String,
    /// its peak resident bytes, where the system says
    pub peak: Option<u64>,
    /// the resident bytes the child was forked with (`copied_by_fork`): the
    /// kernel's count for the child starts there, so a peak no higher may
    /// be this process's rather than the child's
    pub started_from: Option<u64>,
}

/// Runs `command` to its end (started by `spawn`), with what it printed and
/// its peak resident memory.
pub fn run(command: &mut Command) -> anyhow::Result<Finished> {
    command
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    let mut child = spawn(command).context("cannot start a child process")?;
    // Just after the fork, with the freed memory given back.
    let started_from = copied_by_fork();
    let mut stdout = child.stdout.take().expect("piped");
    let mut stderr = child.stderr.take().expect("piped");
    let errors = std::thread::spawn(move || {
        let mut text = String::new();
        let _ = stderr.read_to_string(&mut text);
        text
    });
    let mut printed = Vec::new();
    let read = stdout.read_to_end(&mut printed);
    // Reaped by wait4, before any error is returned, for its peak memory.
    let (status, peak) = wait_with_peak(&child)?;
    read.context("cannot read a child's output")?;
    Ok(Finished {
        status,
        stdout: printed,
        stderr: errors.join().unwrap_or_default(),
        peak,
        started_from,
    })
}
