//! The cluster where it is needed: real processes on loopback under tight
//! budgets, with more processes than cores, and with a node frozen or
//! killed mid-run, each against `deeptime run` of the same job measured in
//! the same part. Every cluster run's digest is checked equal to the
//! embedded run's before a figure is reported.

use std::path::Path;
use std::time::Duration;

use anyhow::{Context, ensure};
use deeptime_engine::rule::Rule;

use super::cluster::{Fault, Measured, Nodes, embedded, on_nodes, write_job};
use super::suite::{soup, write_rle};
use super::{Figure, Goal, Settings, process};

/// Checks a cluster run ended well with the embedded digest.
fn same(cluster: &Measured, alone: &Measured, what: &str) -> anyhow::Result<()> {
    ensure!(
        cluster.code == Some(0),
        "{what}: the coordinator failed: {}",
        cluster.last_lines()
    );
    ensure!(
        cluster.digest() == alone.digest(),
        "{what}: digest {} against the embedded run's {}",
        cluster.digest(),
        alone.digest()
    );
    Ok(())
}

/// Checks two embedded runs agree.
fn same_digest(one: &Measured, other: &Measured) -> anyhow::Result<()> {
    ensure!(
        one.digest() == other.digest(),
        "embedded runs disagree: {} and {}",
        one.digest(),
        other.digest()
    );
    Ok(())
}

/// The bytes an engine store takes for a pattern's quads (generation 0).
fn state_bytes(exe: &Path, pattern: &Path) -> anyhow::Result<f64> {
    let output = std::process::Command::new(exe)
        .arg("leap")
        .arg(pattern)
        .args(["--gens", "0", "--json"])
        .output()?;
    ensure!(
        output.status.success(),
        "deeptime leap {} failed: {}",
        pattern.display(),
        String::from_utf8_lossy(&output.stderr).trim()
    );
    let report: serde_json::Value = serde_json::from_slice(&output.stdout)?;
    report["engine"]["bytes"]
        .as_f64()
        .context("leap's report has no engine bytes")
}

/// What a run says about faults: roll backs, pieces read again, late nodes.
fn faults(run: &Measured) -> String {
    let count = |text: &str| run.said.iter().filter(|l| l.contains(text)).count();
    let why = run
        .said
        .iter()
        .find(|l| l.contains("rolling back"))
        .map(|l| format!(" (the first: {l})"))
        .unwrap_or_default();
    format!(
        "{} roll backs{why}, {} recoveries from packs, {} late, {} lost",
        count("rolling back"),
        count("lost pieces again"),
        count("is late"),
        count(") lost: ")
    )
}

pub fn capacity(settings: &Settings) -> anyhow::Result<Vec<Figure>> {
    let (side, target) = if settings.quick {
        (512u64, "512")
    } else {
        (2048, "4096")
    };
    let directory = tempfile::tempdir()?;
    let dir = directory.path();
    let exe = process::this_executable(dir)?;
    write_rle(&soup(side, 1)?, Rule::LIFE, &dir.join("soup.rle"))?;
    let label = format!("{side}² soup to {target}");
    let mut figures = Vec::new();
    let checkpoints_of = |name: &str| dir.join(format!("runs/{name}"));

    // Tight budgets: 2 nodes of 32 MiB against one process of 32 MiB;
    // 4 nodes of 64 MiB (five processes on this machine's cores) against
    // one process without a budget.
    let unlimited = embedded(
        &exe,
        &write_job(dir, "alone", "soup.rle", target, target, None)?,
    )?;
    for (nodes, memory, against) in [(2usize, "32MiB", Some("32MiB")), (4, "64MiB", None)] {
        let tight;
        let alone = match against {
            Some(memory) => {
                tight = embedded(
                    &exe,
                    &write_job(dir, "alone-tight", "soup.rle", target, target, Some(memory))?,
                )?;
                same_digest(&tight, &unlimited)?;
                &tight
            }
            None => &unlimited,
        };
        let name = format!("tight-{nodes}");
        let run = on_nodes(
            &exe,
            &write_job(dir, &name, "soup.rle", target, target, None)?,
            dir,
            &Nodes {
                count: nodes,
                slots: 1,
                memory,
                shard_level: None,
                checkpoint_dir: Some(&checkpoints_of(&name)),
                coordinator_args: &[],
                node_args: &[],
                fault: None,
            },
        )?;
        same(&run, &unlimited, &name)?;
        let against = against.unwrap_or("unlimited");
        figures.push(
            Figure::new(
                "capacity",
                &format!("{label}, {nodes} nodes × {memory} / embedded {against}: time"),
                run.seconds / alone.seconds,
                "×",
                Some(Goal::AtMost(if nodes == 2 { 1.0 } else { 1.5 })),
            )
            .detail(format!(
                "cluster {:.2} s, embedded {:.2} s; store peaks {:?}; {}",
                run.seconds,
                alone.seconds,
                run.peaks(),
                faults(&run)
            )),
        );
    }

    // A state several times one node's budget (a 4608² soup; quick: the
    // 2048² one): one node that may not spill stops with exit 3; four of
    // the same size finish, and so does one that spills.
    let budget = "4MiB";
    let (big_side, big_target, big_every) = if settings.quick {
        (2048u64, "32", "16")
    } else {
        (4608, "32", "16")
    };
    write_rle(&soup(big_side, 1)?, Rule::LIFE, &dir.join("big.rle"))?;
    let state = state_bytes(&exe, &dir.join("big.rle"))?;
    let big_alone = embedded(
        &exe,
        &write_job(dir, "big-alone", "big.rle", big_target, big_every, None)?,
    )?;
    let mut outcomes = Vec::new();
    for (nodes, spill) in [(1usize, false), (4, true), (1, true)] {
        let name = format!("big-{nodes}-{spill}");
        let run = on_nodes(
            &exe,
            &write_job(dir, &name, "big.rle", big_target, big_every, None)?,
            dir,
            &Nodes {
                count: nodes,
                slots: 1,
                memory: budget,
                shard_level: Some(8),
                checkpoint_dir: Some(&checkpoints_of(&name)),
                coordinator_args: &[],
                node_args: if spill { &[] } else { &["--spill-limit", "0"] },
                fault: None,
            },
        )?;
        outcomes.push(run);
    }
    ensure!(
        outcomes[0].code == Some(3),
        "one node of {budget} that may not spill should run out (exit 3), it ended with {:?}: {}",
        outcomes[0].code,
        outcomes[0].last_lines()
    );
    same(&outcomes[1], &big_alone, "four small nodes")?;
    same(&outcomes[2], &big_alone, "one small node that spills")?;
    figures.push(
        Figure::new(
            "capacity",
            &format!("{big_side}² soup to {big_target}: its quads / one node's {budget}"),
            state / deeptime_coordinator::memory::budget(Some(budget))? as f64,
            "×",
            Some(Goal::AtLeast(3.0)),
        )
        .detail(format!(
            "the soup's quads in an engine store: {}; one node that may not spill: exit 3; \
             four nodes: the embedded digest in {:.2} s (embedded {:.2} s), store peaks {:?}",
            deeptime_engine::human_bytes(state as u64),
            outcomes[1].seconds,
            big_alone.seconds,
            outcomes[1].peaks()
        )),
    );
    figures.push(
        Figure::new(
            "capacity",
            &format!("{big_side}² soup to {big_target}: one {budget} node that spills / four"),
            outcomes[2].seconds / outcomes[1].seconds,
            "×",
            None,
        )
        .detail(format!(
            "one node {:.2} s with the embedded digest, four {:.2} s",
            outcomes[2].seconds, outcomes[1].seconds
        )),
    );

    // Every core of a node: one node process with a slot per core against
    // the same process with one slot (each slot a store of its own).
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    if cores > 1 {
        let mut by_slots = Vec::new();
        for slots in [1, cores] {
            let name = format!("slots-{slots}");
            let run = on_nodes(
                &exe,
                &write_job(dir, &name, "soup.rle", target, target, None)?,
                dir,
                &Nodes {
                    count: 1,
                    slots,
                    memory: "1GiB",
                    shard_level: None,
                    checkpoint_dir: Some(&checkpoints_of(&name)),
                    coordinator_args: &[],
                    node_args: &[],
                    fault: None,
                },
            )?;
            same(&run, &unlimited, &name)?;
            by_slots.push(run);
        }
        figures.push(
            Figure::new(
                "capacity",
                &format!("{label}, 1 node × {cores} slots / 1 slot: time"),
                by_slots[1].seconds / by_slots[0].seconds,
                "×",
                None,
            )
            .detail(format!(
                "{cores} slots {:.2} s, 1 slot {:.2} s, embedded {:.2} s",
                by_slots[1].seconds, by_slots[0].seconds, unlimited.seconds
            )),
        );
    }

    // Deep jumps: the lighthouse to 10^1000 in 10 steps.
    let lighthouse = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo-jobs/lighthouse.rle");
    std::fs::copy(&lighthouse, dir.join("lighthouse.rle"))?;
    let (far, far_every) = if settings.quick {
        ("10^100", "10^99")
    } else {
        ("10^1000", "10^999")
    };
    let deep_alone = embedded(
        &exe,
        &write_job(dir, "deep-alone", "lighthouse.rle", far, far_every, None)?,
    )?;
    let deep = on_nodes(
        &exe,
        &write_job(dir, "deep", "lighthouse.rle", far, far_every, None)?,
        dir,
        &Nodes {
            count: 2,
            slots: 1,
            memory: "1GiB",
            shard_level: None,
            checkpoint_dir: Some(&checkpoints_of("deep")),
            coordinator_args: &[],
            node_args: &[],
            fault: None,
        },
    )?;
    same(&deep, &deep_alone, "lighthouse")?;
    figures.push(
        Figure::new(
            "capacity",
            &format!("lighthouse to {far} in 10 steps, 2 nodes / embedded: time"),
            deep.seconds / deep_alone.seconds,
            "×",
            Some(Goal::AtMost(2.0)),
        )
        .detail(format!(
            "cluster {:.2} s, embedded {:.2} s; {} tasks",
            deep.seconds,
            deep_alone.seconds,
            deep.cluster("tasks")
        )),
    );

    // Faults: a node frozen for 5 s, a node killed, after the first step.
    let fault_every = if settings.quick { "64" } else { "256" };
    let fault_alone = embedded(
        &exe,
        &write_job(dir, "fault-alone", "soup.rle", target, fault_every, None)?,
    )?;
    for (name, fault) in [
        ("frozen", Fault::Freeze(Duration::from_secs(5))),
        ("killed", Fault::Kill),
    ] {
        let run = on_nodes(
            &exe,
            &write_job(dir, name, "soup.rle", target, fault_every, None)?,
            dir,
            &Nodes {
                count: 3,
                slots: 1,
                memory: "1GiB",
                shard_level: None,
                checkpoint_dir: Some(&checkpoints_of(name)),
                coordinator_args: &[],
                node_args: &[],
                fault: Some(fault),
            },
        )?;
        same(&run, &fault_alone, name)?;
        let rollbacks = run
            .said
            .iter()
            .filter(|l| l.contains("rolling back"))
            .count();
        figures.push(
            Figure::new(
                "capacity",
                &format!("{label}, 3 nodes, one {name} after a step: roll backs"),
                rollbacks as f64,
                "",
                Some(Goal::AtMost(0.0)),
            )
            .detail(format!(
                "cluster {:.2} s, embedded {:.2} s; {}",
                run.seconds,
                fault_alone.seconds,
                faults(&run)
            )),
        );
    }
    Ok(figures)
}
