//! `deeptime fate` as a user meets it: against facts of the trade (each
//! with its source), its census against the independent reference's on
//! seeded soups, the shape digest against turned and moved copies, and
//! malformed input.

use std::collections::BTreeMap;
use std::path::Path;

use deeptime_tests::{run_deeptime, run_reference, soup, temp_dir};
use serde_json::Value;

/// Standard RLE of the patterns below (common practice: the usual
/// published RLE of each, from memory).
const R_PENTOMINO: &str = "x = 3, y = 3\nb2o$2o$bo!";
const PI_HEPTOMINO: &str = "x = 3, y = 3\n3o$obo$obo!";
const ACORN: &str = "x = 7, y = 3\nbo5b$3bo3b$2o2b3o!";
const DIEHARD: &str = "x = 8, y = 3\n6bob$2o6b$bo3b3o!";
const GLIDER: &str = "x = 3, y = 3\nbob$2bo$3o!";
const LWSS: &str = "x = 5, y = 4\nbo2bo$o4b$o3bo$4o!";
const BLINKER: &str = "x = 3, y = 1\n3o!";
const PULSAR: &str = "x = 13, y = 13\n2b3o3b3o2b2$o4bobo4bo$o4bobo4bo$o4bobo4bo$2b3o3b3o2b2$\
    2b3o3b3o2b$o4bobo4bo$o4bobo4bo$o4bobo4bo2$2b3o3b3o!";
const PENTADECATHLON: &str = "x = 10, y = 3\n2bo4bo2b$2ob4ob2o$2bo4bo2b!";
const GOSPER_GUN: &str = "x = 36, y = 9, rule = B3/S23\n\
    24bo$22bobo$12b2o6b2o12b2o$11bo3bo4b2o12b2o$2o8bo5bo3b2o$\
    2o8bo3bob2o4bobo$10bo5bo7bo$11bo3bo$12b2o!";

fn write(dir: &Path, name: &str, text: &str) -> std::path::PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, text).unwrap();
    path
}

/// `deeptime fate` on `rle` with extra arguments, as JSON.
fn fate(rle: &str, extra: &[&str]) -> Value {
    let dir = temp_dir();
    let path = write(dir.path(), "pattern.rle", rle);
    let mut args = vec![
        "fate".to_string(),
        path.display().to_string(),
        "--json".into(),
    ];
    args.extend(extra.iter().map(|s| s.to_string()));
    let run = run_deeptime(&args);
    run.assert_success();
    serde_json::from_str(&run.stdout).unwrap_or_else(|e| panic!("{e}: {}", run.stdout))
}

fn text<'v>(value: &'v Value, key: &str) -> &'v str {
    value[key]
        .as_str()
        .unwrap_or_else(|| panic!("{key} is not a string in {value}"))
}

/// The census as name → count, spaceships of every direction together.
fn counts(report: &Value) -> BTreeMap<String, u64> {
    let mut out = BTreeMap::new();
    for entry in report["census"].as_array().expect("a census") {
        let count: u64 = text(entry, "count").parse().unwrap();
        *out.entry(text(entry, "name").to_string()).or_default() += count;
    }
    out
}

fn expected(pairs: &[(&str, u64)]) -> BTreeMap<String, u64> {
    pairs.iter().map(|&(n, c)| (n.to_string(), c)).collect()
}

#[test]
fn r_pentomino_settles_at_1103_with_its_census() {
    // LifeWiki, "R-pentomino": stabilises at generation 1103 with 116
    // cells: 8 blocks, 6 gliders, 4 beehives, 4 blinkers, a boat, a ship
    // and a loaf.
    let report = fate(R_PENTOMINO, &[]);
    assert_eq!(text(&report, "settles_at"), "1103");
    assert_eq!(text(&report, "population"), "116");
    assert_eq!(
        counts(&report),
        expected(&[
            ("block", 8),
            ("glider", 6),
            ("beehive", 4),
            ("blinker", 4),
            ("boat", 1),
            ("ship", 1),
            ("loaf", 1),
        ])
    );
    // What stays has the blinkers' period; the gliders leave it.
    assert_eq!(text(&report, "period"), "2");
    assert_eq!(text(&report, "period_of"), "settled part");
    assert_eq!(report["displacement"]["x"], "0");
    for entry in report["census"].as_array().unwrap() {
        if entry["name"] == "glider" {
            let direction = text(entry, "direction");
            assert!(
                direction.contains('-'),
                "a glider heads diagonally: {direction}"
            );
        }
    }
}

#[test]
fn pi_heptomino_settles_at_173_with_55_cells() {
    // LifeWiki, "Pi-heptomino": stabilises at generation 173 with 55
    // cells: 6 blocks, 5 blinkers and 2 ponds.
    let report = fate(PI_HEPTOMINO, &[]);
    assert_eq!(text(&report, "settles_at"), "173");
    assert_eq!(text(&report, "population"), "55");
    assert_eq!(
        counts(&report),
        expected(&[("block", 6), ("blinker", 5), ("pond", 2)])
    );
}

#[test]
fn acorn_settles_at_5206_with_633_cells() {
    // LifeWiki, "Acorn": stabilises at generation 5206 with 633 cells,
    // 13 gliders among them.
    let report = fate(ACORN, &[]);
    assert_eq!(text(&report, "settles_at"), "5206");
    assert_eq!(text(&report, "population"), "633");
    assert_eq!(counts(&report)["glider"], 13);
}

#[test]
fn die_hard_dies_at_130() {
    // LifeWiki, "Die hard": vanishes after 130 generations.
    let report = fate(DIEHARD, &[]);
    assert_eq!(text(&report, "settles_at"), "130");
    assert_eq!(text(&report, "population"), "0");
    assert_eq!(report["census"], serde_json::json!([]));
    assert_eq!(report["bbox"], Value::Null);
}

#[test]
fn a_glider_repeats_every_4_one_cell_diagonally() {
    // LifeWiki, "Glider": period 4, one cell diagonally per period.
    let report = fate(GLIDER, &[]);
    assert_eq!(text(&report, "settles_at"), "0");
    assert_eq!(text(&report, "period"), "4");
    assert_eq!(text(&report, "period_of"), "whole");
    assert_eq!(
        report["displacement"],
        serde_json::json!({"x": "1", "y": "1"})
    );
    assert_eq!(counts(&report), expected(&[("glider", 1)]));
    assert_eq!(report["census"][0]["direction"], "south-east");
}

#[test]
fn a_lightweight_spaceship_repeats_every_4_two_cells_across() {
    // LifeWiki, "Lightweight spaceship": period 4, two cells orthogonally
    // per period (this phase heads west, from memory).
    let report = fate(LWSS, &[]);
    assert_eq!(text(&report, "period"), "4");
    assert_eq!(
        report["displacement"],
        serde_json::json!({"x": "-2", "y": "0"})
    );
    assert_eq!(counts(&report), expected(&[("lightweight spaceship", 1)]));
    assert_eq!(report["census"][0]["direction"], "west");
}

#[test]
fn oscillators_have_their_periods() {
    // LifeWiki, "Blinker" (period 2), "Pulsar" (3), "Pentadecathlon" (15).
    for (rle, name, period) in [
        (BLINKER, "blinker", "2"),
        (PULSAR, "pulsar", "3"),
        (PENTADECATHLON, "pentadecathlon", "15"),
    ] {
        let report = fate(rle, &[]);
        assert_eq!(text(&report, "settles_at"), "0", "{name}");
        assert_eq!(text(&report, "period"), period, "{name}");
        assert_eq!(text(&report, "period_of"), "whole", "{name}");
        assert_eq!(counts(&report), expected(&[(name, 1)]), "{name}");
    }
}

#[test]
fn the_gun_never_settles_and_grows_by_5_every_30() {
    // LifeWiki, "Gosper glider gun": period 30, one 5-cell glider per
    // period, so the population grows by 5 every 30 generations for ever.
    let report = fate(GOSPER_GUN, &["--limit", "4096"]);
    assert_eq!(report["settles_at"], Value::Null);
    assert_eq!(report["census"], Value::Null);
    let unsettled = &report["unsettled"];
    assert_eq!(text(unsettled, "generation"), "4096");
    let growth = &unsettled["growth"];
    assert_eq!(text(growth, "every"), "30");
    assert_eq!(text(growth, "change"), "5");
}

/// The cells of rows, turned a quarter and mirrored, then moved.
fn turned_rle(rle_rows: &[&str], dx: usize) -> String {
    let height = rle_rows.len();
    let width = rle_rows[0].len();
    let mut rows = Vec::new();
    for x in 0..width {
        let mut row = ".".repeat(dx);
        for line in rle_rows {
            row.push(line.as_bytes()[x] as char);
        }
        rows.push(row);
    }
    let mut text = "!moved and turned\n".to_string();
    for _ in 0..3 {
        text.push_str(&".".repeat(dx + height));
        text.push('\n');
    }
    for row in rows {
        text.push_str(&row);
        text.push('\n');
    }
    text
}

#[test]
fn the_shape_digest_is_the_same_turned_and_moved() {
    // The R-pentomino given transposed (a quarter turn and a mirror image)
    // and moved: the same fate, the same shape digest, another digest
    // (README, "Shape digest").
    let plain = fate(R_PENTOMINO, &[]);
    let turned = fate(&turned_rle(&[".OO", "OO.", ".O."], 11), &[]);
    assert_eq!(text(&turned, "settles_at"), "1103");
    assert_eq!(text(&turned, "shape_digest"), text(&plain, "shape_digest"));
    assert_ne!(text(&turned, "digest"), text(&plain, "digest"));
    assert_eq!(counts(&turned), counts(&plain));
}

#[test]
fn the_census_agrees_with_the_reference_on_seeded_soups() {
    // Independent reference: numpy/scipy component labelling, each object
    // run alone (tests/reference/life_reference.py, `census`), on the state
    // well after deeptime says the soup settled.
    for seed in [11u64, 12, 13] {
        let dir = temp_dir();
        let pattern = write(dir.path(), "soup.rle", &soup(32, seed));
        let report = fate(&soup(32, seed), &[]);
        let settles: u64 = text(&report, "settles_at")
            .parse()
            .unwrap_or_else(|_| panic!("seed {seed} did not settle: {report}"));
        let later = (settles + 1024).to_string();
        let out = dir.path().join("later.rle");
        run_deeptime([
            "leap",
            pattern.to_str().unwrap(),
            "--gens",
            &later,
            "--out",
            out.to_str().unwrap(),
        ])
        .assert_success();
        let run = run_reference(["census", "--pattern", out.to_str().unwrap()]);
        run.assert_success();
        let reference: Value = serde_json::from_str(&run.stdout).unwrap();
        assert_eq!(
            reference["population"].as_u64().unwrap().to_string(),
            text(&report, "population"),
            "seed {seed}"
        );
        let mut theirs = BTreeMap::new();
        for entry in reference["census"].as_array().unwrap() {
            let key = (
                text(entry, "name").to_string(),
                entry["direction"].as_str().map(str::to_string),
            );
            theirs.insert(key, entry["count"].as_u64().unwrap());
        }
        let mut ours = BTreeMap::new();
        for entry in report["census"].as_array().unwrap() {
            let key = (
                text(entry, "name").to_string(),
                entry["direction"].as_str().map(str::to_string),
            );
            ours.insert(key, text(entry, "count").parse::<u64>().unwrap());
        }
        assert_eq!(ours, theirs, "seed {seed}");
    }
}

#[test]
fn bad_input_is_one_line_and_exit_2() {
    let dir = temp_dir();
    let path = write(dir.path(), "g.rle", GLIDER);
    let run = run_deeptime(["fate", path.to_str().unwrap(), "--limit", "ten"]);
    assert_eq!(run.code, Some(2), "{}", run.describe());
    assert!(run.stderr.contains("--limit"), "{}", run.describe());
    assert_eq!(run.stderr.trim().lines().count(), 1, "{}", run.describe());
    let bad = write(dir.path(), "bad.rle", "x = 3, y = 3\nbo$q!");
    let run = run_deeptime(["fate", bad.to_str().unwrap()]);
    assert_eq!(run.code, Some(2), "{}", run.describe());
    assert!(run.stderr.contains("bad.rle:2:"), "{}", run.describe());
}
