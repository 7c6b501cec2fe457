//! A smoke run of the benchmark suite at small sizes, so it never rots. It
//! checks that every part runs and reports finite figures with their goals;
//! it holds no figure to its goal (speed is for the benchmark's own report,
//! never for timed tests).

use deeptime_tests::{python, run_deeptime, temp_dir};

#[test]
fn the_quick_suite_runs_and_reports_every_figure() {
    let dir = temp_dir();
    let json = dir.path().join("bench.json");
    let python = python();
    let run = run_deeptime([
        "bench",
        "--quick",
        "--python",
        python.to_str().unwrap(),
        "--json",
        json.to_str().unwrap(),
    ]);
    run.assert_success();
    let report: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    assert!(report["machine"]["cores"].as_u64().unwrap() >= 1);
    assert_eq!(report["quick"], true);
    let figures = report["figures"].as_array().unwrap();
    let groups: Vec<&str> = figures
        .iter()
        .map(|f| f["group"].as_str().unwrap())
        .collect();
    for group in [
        "reach",
        "stepping",
        "chaotic",
        "pressure",
        "numpy",
        "checkpoint",
        "cluster",
        "capacity",
    ] {
        assert!(groups.contains(&group), "no {group} figure in {groups:?}");
    }
    for figure in figures {
        let value = figure["value"].as_f64().unwrap();
        // Counts held to none (roll backs) may be 0; every other figure is
        // a positive measure.
        let count_of_none = figure["goal"]["at_most"].as_f64() == Some(0.0);
        assert!(
            value.is_finite() && (value > 0.0 || count_of_none && value == 0.0),
            "{figure}"
        );
        if !figure["goal"].is_null() {
            assert!(figure["goal"].is_object(), "{figure}");
            assert!(figure["met"].is_boolean(), "{figure}");
        }
    }
    // The table names every figure.
    for figure in figures {
        assert!(
            run.stdout.contains(figure["name"].as_str().unwrap()),
            "{}",
            run.stdout
        );
    }
}
