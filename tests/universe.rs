//! Bounded universes (`--universe`, a job's `universe`) through the real
//! binary: stored runs of a torus resume with the same figures as `leap`
//! and the independent reference, a stored run's universe cannot change
//! under it, and the commands that do not take bounded universes yet say
//! so. (Cell-by-cell checks against the reference are in reference.rs.)

use std::path::{Path, PathBuf};

use deeptime_tests::{reference_soup, run_deeptime, run_reference, temp_dir, write_job};

/// `job.toml` in `dir` over `pattern` in `universe`: checkpoints every
/// `every`, to `target`.
fn write_universe_job(dir: &Path, universe: &str, target: &str, every: &str) -> std::path::PathBuf {
    let path = write_job(dir, "job.toml", "ring", "soup.rle", "B3/S23", target, every);
    let text = std::fs::read_to_string(&path).unwrap();
    let text = text.replace(
        "[checkpoint]",
        &format!("universe = \"{universe}\"\n[checkpoint]"),
    );
    std::fs::write(&path, text).unwrap();
    path
}

fn report(run: &deeptime_tests::Run) -> serde_json::Value {
    run.assert_success();
    serde_json::from_str(run.stdout.trim()).unwrap()
}

/// The reference's seeded 19×19 soup under B3/S23, as `dir/soup.rle`.
fn soup_in(dir: &Path, seed: u64) -> PathBuf {
    let pattern = dir.join("soup.rle");
    reference_soup(&pattern, "B3/S23", seed, 19, 0.4);
    pattern
}

/// The reference's records of `pattern` under B3/S23 in `universe` at
/// `gens` (comma-separated decimals), with where its cycle starts and its
/// period. Independent reference: numpy/scipy, cycles by a full table of
/// states.
fn reference_records(pattern: &Path, gens: &str, universe: &str) -> serde_json::Value {
    let expected = pattern.with_file_name("expected.json");
    run_reference([
        "expect".to_string(),
        "--pattern".into(),
        pattern.display().to_string(),
        "--rule".into(),
        "B3/S23".into(),
        "--gens".into(),
        gens.into(),
        "--universe".into(),
        universe.into(),
        "--out".into(),
        expected.display().to_string(),
    ])
    .assert_success();
    serde_json::from_str(&std::fs::read_to_string(&expected).unwrap()).unwrap()
}

#[test]
fn a_stored_run_on_a_torus_resumes_with_the_figures_of_leap_and_of_the_reference() {
    let dir = temp_dir();
    let pattern = soup_in(dir.path(), 7);
    let universe = "torus 37x23";
    let far = "1000000000000000000000000000000000000037";

    // Part of the way, then on to a far target: the second run resumes
    // from the first's newest checkpoint.
    let job = write_universe_job(dir.path(), universe, "1000", "250");
    report(&run_deeptime([
        "run".as_ref(),
        job.as_os_str(),
        "--json".as_ref(),
    ]));
    let job = write_universe_job(dir.path(), universe, far, "3*10^38");
    let resumed = run_deeptime(["run".as_ref(), job.as_os_str(), "--json".as_ref()]);
    assert!(
        resumed.stderr.contains("resuming ring"),
        "{}",
        resumed.describe()
    );
    let stored = report(&resumed);
    assert_eq!(stored["universe"], universe);

    let leap = report(&run_deeptime([
        "leap".as_ref(),
        pattern.as_os_str(),
        "--gens".as_ref(),
        far.as_ref(),
        "--universe".as_ref(),
        universe.as_ref(),
        "--json".as_ref(),
    ]));
    for field in ["generation", "population", "bbox", "digest"] {
        assert_eq!(stored[field], leap[field], "{field}");
    }
    let expected = reference_records(&pattern, far, universe);
    let record = &expected["generations"][far];
    assert_eq!(stored["population"], record["population"]);
    assert_eq!(stored["digest"], record["digest"]);

    // Every checkpoint reads back whole; a snapshot between them says the
    // universe.
    let runs = dir.path().join("runs");
    run_deeptime(["verify".as_ref(), runs.as_os_str()]).assert_success();
    let snapshot = report(&run_deeptime([
        "snapshot".as_ref(),
        runs.as_os_str(),
        "--gen".as_ref(),
        "3*10^38".as_ref(),
        "--json".as_ref(),
    ]));
    assert_eq!(snapshot["universe"], universe);

    // A generation between two checkpoints: the stored state advanced in
    // its universe (not on the plane), as leap and the reference have it.
    let between = report(&run_deeptime([
        "snapshot".as_ref(),
        runs.as_os_str(),
        "--gen".as_ref(),
        "777".as_ref(),
        "--json".as_ref(),
    ]));
    assert_eq!(between["universe"], universe);
    let leap = report(&run_deeptime([
        "leap".as_ref(),
        pattern.as_os_str(),
        "--gens".as_ref(),
        "777".as_ref(),
        "--universe".as_ref(),
        universe.as_ref(),
        "--json".as_ref(),
    ]));
    let expected = reference_records(&pattern, "777", universe);
    for field in ["generation", "population", "bbox", "digest"] {
        assert_eq!(between[field], leap[field], "{field}");
    }
    assert_eq!(between["digest"], expected["generations"]["777"]["digest"]);
}

#[test]
fn a_stored_run_keeps_its_universe_and_bad_universes_are_one_line_errors() {
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), "x = 3, y = 3\nbo$2bo$3o!\n").unwrap();
    let job = write_universe_job(dir.path(), "torus 10x10", "100", "50");
    report(&run_deeptime([
        "run".as_ref(),
        job.as_os_str(),
        "--json".as_ref(),
    ]));
    let job = write_universe_job(dir.path(), "bounded 10x10", "200", "50");
    let changed = run_deeptime(["run".as_ref(), job.as_os_str()]);
    assert_eq!(changed.code, Some(2), "{}", changed.describe());
    assert!(
        changed
            .stderr
            .contains("the stored run lives in the torus 10x10, the job now says bounded 10x10"),
        "{}",
        changed.describe()
    );

    let job = write_universe_job(dir.path(), "torus 0x10", "200", "50");
    let bad = run_deeptime(["run".as_ref(), job.as_os_str()]);
    assert_eq!(bad.code, Some(2), "{}", bad.describe());
    assert_eq!(bad.stderr.trim().lines().count(), 1, "{}", bad.describe());
    assert!(
        bad.stderr
            .contains("job.toml: universe \"torus 0x10\": the width must be from 1"),
        "{}",
        bad.describe()
    );

    // A pattern that does not fit is refused, naming the file.
    let small = run_deeptime([
        "leap".as_ref(),
        dir.path().join("soup.rle").as_os_str(),
        "--gens".as_ref(),
        "1".as_ref(),
        "--universe".as_ref(),
        "torus 2x2".as_ref(),
    ]);
    assert_eq!(small.code, Some(2), "{}", small.describe());
    assert!(
        small.stderr.contains("soup.rle in the torus 2x2"),
        "{}",
        small.describe()
    );

    // The coordinator runs a bounded job itself, says so, and gives the
    // figures leap gives in the same universe.
    let job = write_universe_job(dir.path(), "torus 10x10", "200", "50");
    let cluster = run_deeptime([
        "coordinator".as_ref(),
        job.as_os_str(),
        "--listen".as_ref(),
        "127.0.0.1:0".as_ref(),
        "--token-file".as_ref(),
        dir.path().join("token").as_os_str(),
        "--json".as_ref(),
    ]);
    let figures = report(&cluster);
    assert!(
        cluster.stderr.contains("the coordinator runs it itself"),
        "{}",
        cluster.describe()
    );
    let leap = report(&run_deeptime([
        "leap".as_ref(),
        dir.path().join("soup.rle").as_os_str(),
        "--gens".as_ref(),
        "200".as_ref(),
        "--universe".as_ref(),
        "torus 10x10".as_ref(),
        "--json".as_ref(),
    ]));
    for field in ["generation", "population", "bbox", "digest", "rule"] {
        assert_eq!(
            figures[field],
            leap[field],
            "{field}: {}",
            cluster.describe()
        );
    }
    assert_eq!(figures["cluster"]["nodes"], 0, "{figures}");
}

#[test]
fn a_timeline_in_a_bounded_universe_matches_the_reference_at_every_sample() {
    let dir = temp_dir();
    let pattern = soup_in(dir.path(), 11);
    let universe = "bounded 31x29";
    let csv = dir.path().join("timeline.csv");
    run_deeptime([
        "timeline".as_ref(),
        pattern.as_os_str(),
        "--gens".as_ref(),
        "10^30".as_ref(),
        "--every".as_ref(),
        "10^29".as_ref(),
        "--universe".as_ref(),
        universe.as_ref(),
        "--csv".as_ref(),
        csv.as_os_str(),
    ])
    .assert_success();
    // Independent reference: numpy/scipy, at the same generations.
    let gens: Vec<String> = (0..=10u32)
        .map(|k| {
            if k == 0 {
                "0".to_string()
            } else {
                format!("{k}{}", "0".repeat(29))
            }
        })
        .collect();
    let expected = reference_records(&pattern, &gens.join(","), universe);
    let text = std::fs::read_to_string(&csv).unwrap();
    let rows: Vec<&str> = text.lines().skip(1).collect();
    assert_eq!(rows.len(), gens.len(), "{text}");
    for (row, generation) in rows.iter().zip(&gens) {
        let fields: Vec<&str> = row.split(',').collect();
        let record = &expected["generations"][generation.as_str()];
        assert_eq!(fields[0], generation, "{row}");
        assert_eq!(fields[1], record["population"], "{row}");
        assert_eq!(fields[6], record["digest"], "{row}");
    }
}

#[test]
fn the_fate_in_a_bounded_universe_is_where_the_reference_sees_the_cycle_start() {
    for (universe, seed) in [("torus 37x23", 5u64), ("bounded 29x41", 6)] {
        let dir = temp_dir();
        let pattern = soup_in(dir.path(), seed);
        let fate = report(&run_deeptime([
            "fate".as_ref(),
            pattern.as_os_str(),
            "--universe".as_ref(),
            universe.as_ref(),
            "--json".as_ref(),
        ]));
        let expect = |gens: &str| reference_records(&pattern, gens, universe);
        let cycle = expect("10000000000000000000000000000000000000000");
        let settles_at = cycle["settles_at"].as_u64().unwrap();
        assert_eq!(fate["settles_at"], settles_at.to_string(), "{universe}");
        assert_eq!(
            fate["period"],
            cycle["period"].as_u64().unwrap().to_string(),
            "{universe}"
        );
        assert!(
            settles_at > 0,
            "{universe}: the soup should take a while to settle"
        );
        let there = expect(&settles_at.to_string());
        let record = &there["generations"][settles_at.to_string()];
        assert_eq!(fate["population"], record["population"], "{universe}");
        assert_eq!(fate["digest"], record["digest"], "{universe}");
        assert_eq!(fate["universe"], universe);
    }
}
