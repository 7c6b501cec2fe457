//! `deeptime timeline`: the gun's exact population at every sample (also
//! at astronomically spaced ones), every sample against `deeptime leap` to
//! the same generation, the CSV's form, the plot, and malformed input.

use std::path::Path;

use deeptime_tests::{leap_report, run_deeptime, temp_dir, write_job};
use num_bigint::BigUint;
use serde_json::Value;

/// The Gosper glider gun (the usual RLE, from memory).
const GOSPER_GUN: &str = "x = 36, y = 9, rule = B3/S23\n\
    24bo$22bobo$12b2o6b2o12b2o$11bo3bo4b2o12b2o$2o8bo5bo3b2o$\
    2o8bo3bob2o4bobo$10bo5bo7bo$11bo3bo$12b2o!";
/// The R-pentomino (the usual RLE, from memory).
const R_PENTOMINO: &str = "x = 3, y = 3\nb2o$2o$bo!";

fn write(dir: &Path, name: &str, text: &str) -> std::path::PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, text).unwrap();
    path
}

#[test]
fn the_gun_has_36_plus_5k_cells_at_30k() {
    // LifeWiki, "Gosper glider gun": 36 cells, period 30, one 5-cell glider
    // a period: 36 + 5k live cells at generation 30k.
    let dir = temp_dir();
    let gun = write(dir.path(), "gun.rle", GOSPER_GUN);
    let csv = dir.path().join("gun.csv");
    run_deeptime([
        "timeline",
        gun.to_str().unwrap(),
        "--gens",
        "3000",
        "--every",
        "30",
        "--csv",
        csv.to_str().unwrap(),
    ])
    .assert_success();
    let text = std::fs::read_to_string(&csv).unwrap();
    let mut lines = text.lines();
    assert_eq!(
        lines.next(),
        Some("generation,population,left,top,width,height,digest,background,dead_cells")
    );
    let rows: Vec<Vec<&str>> = lines.map(|line| line.split(',').collect()).collect();
    assert_eq!(rows.len(), 101);
    for (k, row) in rows.iter().enumerate() {
        assert_eq!(row.len(), 9, "{row:?}");
        assert_eq!(row[0], (30 * k).to_string());
        assert_eq!(row[1], (36 + 5 * k).to_string(), "generation {}", row[0]);
        assert_eq!(row[6].len(), 32);
        assert_eq!((row[7], row[8]), ("dead", ""), "a rule without B0");
    }
}

#[test]
fn astronomical_steps_keep_the_gun_exact() {
    // The same fact at generations 3·10^99 apart: 36 + 5k at 30k, with
    // k = m·10^98 at the m-th sample (LifeWiki, "Gosper glider gun").
    let dir = temp_dir();
    let gun = write(dir.path(), "gun.rle", GOSPER_GUN);
    let run = run_deeptime([
        "timeline",
        gun.to_str().unwrap(),
        "--gens",
        "30*10^100",
        "--every",
        "3*10^99",
        "--json",
    ]);
    run.assert_success();
    let report: Value = serde_json::from_str(&run.stdout).unwrap();
    let samples = report["samples"].as_array().unwrap();
    assert_eq!(samples.len(), 101);
    let step = BigUint::from(10u32).pow(98);
    for (m, sample) in samples.iter().enumerate() {
        let k = &step * m;
        let generation = &k * 30u32;
        assert_eq!(sample["generation"], generation.to_string());
        assert_eq!(sample["population"], (k * 5u32 + 36u32).to_string());
    }
}

#[test]
fn every_sample_is_what_leap_reports() {
    // deeptime leap to each sampled generation (the command tested against
    // the independent reference in tests/reference.rs).
    let dir = temp_dir();
    let pattern = write(dir.path(), "r.rle", R_PENTOMINO);
    let run = run_deeptime([
        "timeline",
        pattern.to_str().unwrap(),
        "--gens",
        "1103",
        "--every",
        "250",
        "--json",
    ]);
    run.assert_success();
    let report: Value = serde_json::from_str(&run.stdout).unwrap();
    let samples = report["samples"].as_array().unwrap();
    let generations: Vec<&str> = samples
        .iter()
        .map(|s| s["generation"].as_str().unwrap())
        .collect();
    // 0, 250, …, 1000, and the last generation although it is no multiple.
    assert_eq!(generations, ["0", "250", "500", "750", "1000", "1103"]);
    for sample in samples {
        let generation = sample["generation"].as_str().unwrap();
        let leap = leap_report(&pattern, generation, "B3/S23");
        for key in ["population", "bbox", "digest"] {
            assert_eq!(sample[key], leap[key], "{key} at {generation}");
        }
    }
}

#[test]
fn a_runs_timeline_is_its_stored_generations() {
    // A run checkpointing every 300 generations to 1200 gives the same
    // samples, read from its manifests, as the pattern sampled every 300.
    let dir = temp_dir();
    write(dir.path(), "gun.rle", GOSPER_GUN);
    let job = write_job(
        dir.path(),
        "gun.toml",
        "gun",
        "gun.rle",
        "B3/S23",
        "1200",
        "300",
    );
    run_deeptime(["run", job.to_str().unwrap()]).assert_success();
    let runs = dir.path().join("runs");
    let stored = run_deeptime(["timeline", runs.to_str().unwrap(), "--json"]);
    stored.assert_success();
    let stored: Value = serde_json::from_str(&stored.stdout).unwrap();
    let sampled = run_deeptime([
        "timeline",
        dir.path().join("gun.rle").to_str().unwrap(),
        "--gens",
        "1200",
        "--every",
        "300",
        "--json",
    ]);
    sampled.assert_success();
    let sampled: Value = serde_json::from_str(&sampled.stdout).unwrap();
    assert_eq!(stored["samples"], sampled["samples"]);
    assert_eq!(stored["samples"].as_array().unwrap().len(), 5);
    assert_eq!(stored["every"], Value::Null);
    // The options of a pattern are refused for a run, in one line.
    let run = run_deeptime(["timeline", runs.to_str().unwrap(), "--every", "3"]);
    assert_eq!(run.code, Some(2), "{}", run.describe());
    assert_eq!(run.stderr.trim().lines().count(), 1, "{}", run.describe());
}

#[test]
fn a_run_with_a_timeline_samples_between_its_checkpoints() {
    // Checkpoints every 600 to 1200, `[timeline] every = "150"`: the run's
    // timeline has every multiple of 150, the same samples as the pattern
    // sampled every 150 (each of those checked against leap and against
    // the gun's 36 + 5k at 30k above).
    let dir = temp_dir();
    write(dir.path(), "gun.rle", GOSPER_GUN);
    let job = write_job(
        dir.path(),
        "gun.toml",
        "gun",
        "gun.rle",
        "B3/S23",
        "1200",
        "600",
    );
    let text = std::fs::read_to_string(&job).unwrap();
    std::fs::write(&job, format!("{text}\n[timeline]\nevery = \"150\"\n")).unwrap();
    run_deeptime(["run", job.to_str().unwrap()]).assert_success();
    let runs = dir.path().join("runs");
    let stored = run_deeptime(["timeline", runs.to_str().unwrap(), "--json"]);
    stored.assert_success();
    let stored: Value = serde_json::from_str(&stored.stdout).unwrap();
    let sampled = run_deeptime([
        "timeline",
        dir.path().join("gun.rle").to_str().unwrap(),
        "--gens",
        "1200",
        "--every",
        "150",
        "--json",
    ]);
    sampled.assert_success();
    let sampled: Value = serde_json::from_str(&sampled.stdout).unwrap();
    assert_eq!(stored["samples"].as_array().unwrap().len(), 9);
    assert_eq!(stored["samples"], sampled["samples"]);
}

#[test]
fn the_plot_is_a_png_with_the_line_drawn() {
    let dir = temp_dir();
    let gun = write(dir.path(), "gun.rle", GOSPER_GUN);
    let png = dir.path().join("gun.png");
    run_deeptime([
        "timeline",
        gun.to_str().unwrap(),
        "--gens",
        "2^16",
        "--every",
        "64",
        "--png",
        png.to_str().unwrap(),
    ])
    .assert_success();
    let decoder = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(&png).unwrap()));
    let mut reader = decoder.read_info().unwrap();
    let mut buffer = vec![0; reader.output_buffer_size().unwrap()];
    let frame = reader.next_frame(&mut buffer).unwrap();
    assert_eq!((frame.width, frame.height), (1200, 750));
    let bytes = &buffer[..frame.buffer_size()];
    // The line's colour (31, 90, 160) covers a stretch of pixels.
    let line = bytes
        .chunks(3)
        .filter(|p| p[0] == 31 && p[1] == 90 && p[2] == 160)
        .count();
    assert!(line > 500, "{line} pixels of the line");
}

#[test]
fn bad_input_is_one_line_and_exit_2() {
    let dir = temp_dir();
    let gun = write(dir.path(), "gun.rle", GOSPER_GUN);
    let gun = gun.to_str().unwrap();
    let csv_txt = dir.path().join("out.txt");
    for (args, says) in [
        (vec!["--gens", "300", "--every", "0"], "--every"),
        (vec!["--gens", "10^9", "--every", "1"], "samples"),
        (vec!["--gens", "ten", "--every", "1"], "--gens"),
        (
            vec![
                "--gens",
                "30",
                "--every",
                "3",
                "--csv",
                csv_txt.to_str().unwrap(),
            ],
            ".csv",
        ),
    ] {
        let mut full = vec!["timeline", gun];
        full.extend(args);
        let run = run_deeptime(&full);
        assert_eq!(run.code, Some(2), "{}", run.describe());
        assert!(run.stderr.contains(says), "{}", run.describe());
        assert_eq!(run.stderr.trim().lines().count(), 1, "{}", run.describe());
    }
}
