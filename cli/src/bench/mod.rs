//! `deeptime bench`: a fixed suite of speed and memory figures, each
//! comparison measured side by side in one run, printed as a table and
//! written as JSON with a description of the machine.
//!
//! The figures themselves live in `suite.rs` (the cluster's in
//! `cluster.rs`, with real processes on loopback, and under tight budgets
//! and faults in `capacity.rs`; the resident memory of a
//! child under a budget in `resident.rs`; the child processes' plumbing in
//! `process.rs`); this file runs them, decides whether each goal is met, and
//! reports.

mod capacity;
mod cluster;
mod fate;
mod process;
mod resident;
mod rules;
mod suite;

use std::path::PathBuf;

use anyhow::Context;
use serde::Serialize;

use crate::cli::BenchArgs;

/// A goal a figure is held to.
#[derive(Serialize, Clone, Copy, Debug)]
#[serde(rename_all = "snake_case")]
pub enum Goal {
    AtLeast(f64),
    AtMost(f64),
}

impl Goal {
    fn met(self, value: f64) -> bool {
        match self {
            Goal::AtLeast(goal) => value >= goal,
            Goal::AtMost(goal) => value <= goal,
        }
    }

    fn describe(self, unit: &str) -> String {
        match self {
            Goal::AtLeast(goal) => format!("≥ {} {unit}", compact(goal)),
            Goal::AtMost(goal) => format!("≤ {} {unit}", compact(goal)),
        }
    }
}

/// One measured figure.
#[derive(Serialize, Debug)]
pub struct Figure {
    /// which part of the suite, e.g. "chaotic"
    pub group: String,
    /// what is measured
    pub name: String,
    pub value: f64,
    pub unit: String,
    pub goal: Option<Goal>,
    /// whether the goal is met (None without a goal)
    pub met: Option<bool>,
    /// the raw measurements behind the figure
    pub detail: String,
}

impl Figure {
    pub fn new(group: &str, name: &str, value: f64, unit: &str, goal: Option<Goal>) -> Figure {
        Figure {
            group: group.to_string(),
            name: name.to_string(),
            value,
            unit: unit.to_string(),
            goal,
            met: goal.map(|goal| goal.met(value)),
            detail: String::new(),
        }
    }

    pub fn detail(mut self, detail: String) -> Figure {
        self.detail = detail;
        self
    }
}

/// The machine the suite ran on.
#[derive(Serialize, Debug)]
struct Machine {
    cpu: String,
    cores: usize,
    memory_bytes: u64,
    os: String,
    /// the instruction set the kernel ran (`DEEPTIME_KERNEL` can narrow it)
    kernel: String,
    deeptime: String,
}

impl Machine {
    fn describe() -> Machine {
        let cpu = std::fs::read_to_string("/proc/cpuinfo")
            .ok()
            .and_then(|info| {
                info.lines()
                    .find(|line| line.starts_with("model name"))
                    .and_then(|line| line.split(':').nth(1))
                    .map(|name| name.trim().to_string())
            })
            .unwrap_or_else(|| "unknown".to_string());
        let memory_bytes = sysinfo::System::new()
            .map(|mut system| {
                system.refresh_memory();
                system.total_memory()
            })
            .unwrap_or(0);
        let os = std::fs::read_to_string("/proc/sys/kernel/osrelease")
            .map(|release| format!("{} {}", std::env::consts::OS, release.trim()))
            .unwrap_or_else(|_| std::env::consts::OS.to_string());
        Machine {
            cpu,
            cores: std::thread::available_parallelism().map_or(1, |n| n.get()),
            memory_bytes,
            os,
            kernel: deeptime_engine::kernel_instruction_set()
                .unwrap_or("unknown")
                .to_string(),
            deeptime: env!("CARGO_PKG_VERSION").to_string(),
        }
    }
}

#[derive(Serialize, Debug)]
struct Report {
    machine: Machine,
    quick: bool,
    figures: Vec<Figure>,
}

/// Where the suite finds Python for the numpy/scipy comparison.
pub struct Settings {
    pub quick: bool,
    pub python: Option<PathBuf>,
}

pub fn run(args: BenchArgs) -> anyhow::Result<()> {
    let settings = Settings {
        quick: args.quick,
        python: args
            .python
            .or_else(|| std::env::var_os("DEEPTIME_PYTHON").map(PathBuf::from)),
    };
    let machine = Machine::describe();
    eprintln!(
        "deeptime bench{}: {} ({} cores, {:.1} GiB, kernel {})",
        if settings.quick { " --quick" } else { "" },
        machine.cpu,
        machine.cores,
        machine.memory_bytes as f64 / (1u64 << 30) as f64,
        machine.kernel
    );
    let mut figures = Vec::new();
    for part in suite::PARTS {
        if let Some(only) = &args.only
            && only != part.name
        {
            continue;
        }
        eprintln!("running {} ...", part.name);
        let measured = (part.run)(&settings).with_context(|| format!("bench {}", part.name))?;
        for figure in &measured {
            eprintln!(
                "  {}: {} {}",
                figure.name,
                compact(figure.value),
                figure.unit
            );
        }
        figures.extend(measured);
    }
    print_table(&figures);
    let report = Report {
        machine,
        quick: settings.quick,
        figures,
    };
    if let Some(path) = &args.json {
        let text = serde_json::to_string_pretty(&report)?;
        std::fs::write(path, text + "\n")
            .with_context(|| format!("cannot write {}", path.display()))?;
        eprintln!("figures written to {}", path.display());
    }
    Ok(())
}

fn print_table(figures: &[Figure]) {
    println!(
        "{:<10} {:<48} {:>14} {:<18} {:<4}",
        "group", "figure", "measured", "goal", "met"
    );
    for figure in figures {
        let goal = figure
            .goal
            .map(|goal| goal.describe(&figure.unit))
            .unwrap_or_default();
        let met = match figure.met {
            Some(true) => "yes",
            Some(false) => "NO",
            None => "",
        };
        println!(
            "{:<10} {:<48} {:>14} {:<18} {:<4}",
            figure.group,
            figure.name,
            format!("{} {}", compact(figure.value), figure.unit),
            goal,
            met
        );
        if !figure.detail.is_empty() {
            println!("{:<10} {}", "", figure.detail);
        }
    }
}

/// A number in at most four significant figures, with a k/M/G suffix.
pub fn compact(value: f64) -> String {
    let magnitude = value.abs();
    let (scaled, suffix) = if magnitude >= 1e9 {
        (value / 1e9, "G")
    } else if magnitude >= 1e6 {
        (value / 1e6, "M")
    } else if magnitude >= 1e4 {
        (value / 1e3, "k")
    } else {
        (value, "")
    };
    let digits = if scaled.abs() >= 100.0 {
        0
    } else if scaled.abs() >= 10.0 {
        1
    } else {
        2
    };
    format!("{scaled:.digits$}{suffix}")
}
