//! B0 rules through the commands users run: a stored run whose checkpoints
//! fall at generations with a dead and an alive background resumes and
//! serves snapshots with `leap`'s figures; `--out` names an alive
//! background; Life's black/white reversal agrees with Life itself at
//! 10^30 generations; `fate` under a flipping rule is its twin's with even
//! periods, and under the reversal Life's one generation later.
//! (Cell-by-cell checks against the reference are in reference.rs.)

use std::path::{Path, PathBuf};

use deeptime_tests::{leap_report, reference_soup, run_deeptime, temp_dir, write_job};
use serde_json::Value;

fn report(run: &deeptime_tests::Run) -> Value {
    run.assert_success();
    serde_json::from_str(run.stdout.trim()).unwrap()
}

fn snapshot(runs: &Path, generation: &str, extra: &[&str]) -> Value {
    let mut args = vec![
        "snapshot",
        runs.to_str().unwrap(),
        "--gen",
        generation,
        "--json",
    ];
    args.extend_from_slice(extra);
    report(&run_deeptime(args))
}

/// The figures a user relies on, equal between two reports.
fn assert_same_state(got: &Value, want: &Value, what: &str) {
    for field in [
        "generation",
        "background",
        "population",
        "dead_cells",
        "bbox",
        "digest",
    ] {
        assert_eq!(got[field], want[field], "{what}: {field}");
    }
}

/// Runs the job over `dir/soup.rle` to `first` (target, every), then again
/// to `then`, resuming from the first run's newest checkpoint; returns the
/// second run's report.
fn run_then_resume(dir: &Path, rule: &str, first: (&str, &str), then: (&str, &str)) -> Value {
    let run = |(target, every): (&str, &str)| {
        let job = write_job(dir, "job.toml", "tide", "soup.rle", rule, target, every);
        run_deeptime(["run".as_ref(), job.as_os_str(), "--json".as_ref()])
    };
    report(&run(first));
    let resumed = run(then);
    assert!(
        resumed.stderr.contains("resuming tide"),
        "{}",
        resumed.describe()
    );
    report(&resumed)
}

/// A rule without B0 and a flipping B0 rule whose differing cells evolve
/// by it (see below).
const TWINS: [&str; 2] = ["B3678/S34678", "B01245/S0125"];

/// B0 without S8: the background flips every generation (common practice).
/// B01245/S0125 is built so that the cells differing from its background
/// evolve by B3678/S34678, which is its own black/white reversal (LifeWiki,
/// "Day & Night", from memory): complementing a state, stepping it by
/// B01245/S0125 and complementing again is a step of B3678/S34678. So at
/// every generation its dead or live cells (whichever differ from the
/// background) are the live cells of B3678/S34678. Checkpoints fall at odd
/// (alive) and even (dead) generations, and snapshots between them start
/// from either.
#[test]
fn a_stored_b0_run_resumes_and_serves_snapshots_at_either_background() {
    let dir = temp_dir();
    let [twin, rule] = TWINS;
    let pattern = dir.path().join("soup.rle");
    reference_soup(&pattern, rule, 82, 64, 0.5);
    let finished = run_then_resume(dir.path(), rule, ("6002", "3001"), ("1000001", "300001"));
    let leap = leap_report(&pattern, "1000001", rule);
    assert_same_state(&finished, &leap, "the resumed run");
    assert_eq!(leap["background"], "alive");
    assert_eq!(leap["population"], "infinite");
    assert!(leap["dead_cells"].as_str().unwrap().parse::<u64>().unwrap() > 0);

    let runs = dir.path().join("runs");
    run_deeptime(["verify".as_ref(), runs.as_os_str()]).assert_success();
    for (generation, background) in [
        ("3001", "alive"),
        ("4500", "dead"),
        ("4501", "alive"),
        ("6002", "dead"),
        ("900003", "alive"),
        ("950000", "dead"),
        ("950001", "alive"),
    ] {
        let got = snapshot(&runs, generation, &[]);
        assert_eq!(got["background"], background, "generation {generation}");
        assert_same_state(&got, &leap_report(&pattern, generation, rule), generation);
        let twin = leap_report(&pattern, generation, twin);
        let counted = if background == "alive" {
            "dead_cells"
        } else {
            "population"
        };
        assert_eq!(got[counted], twin["population"], "{generation}: {twin}");
        assert_eq!(got["digest"], twin["digest"], "generation {generation}");
    }

    // --out names an alive background in a comment, and the reader refuses
    // to start a pattern from such a text.
    let out = dir.path().join("odd.rle");
    snapshot(&runs, "900003", &["--out", out.to_str().unwrap()]);
    let text = std::fs::read_to_string(&out).unwrap();
    assert!(
        text.lines()
            .any(|line| line.starts_with("#background alive")),
        "{text}"
    );
    let refused = run_deeptime([
        "leap".as_ref(),
        out.as_os_str(),
        "--gens".as_ref(),
        "1".as_ref(),
    ]);
    assert_eq!(refused.code, Some(2), "{}", refused.describe());
    assert!(
        refused.stderr.contains("odd.rle:2:1: ") && refused.stderr.contains("background is alive"),
        "{}",
        refused.describe()
    );
    let even = dir.path().join("even.rle");
    snapshot(&runs, "600002", &["--out", even.to_str().unwrap()]);
    assert!(
        !std::fs::read_to_string(&even)
            .unwrap()
            .contains("#background")
    );

    // A rectangle far from the pattern on an alive background: every one
    // of its cells lives (common practice).
    let far = snapshot(&runs, "900003", &["--region", "100000,100000,30,20"]);
    assert_eq!(far["region"]["population"], "600");
    assert_eq!(far["region"]["bbox"], Value::Null);
}

/// The same with a flipping rule whose two steps (from a dead and from an
/// alive background) are different rules, so that a step taken with the
/// wrong one shows: B02a3-k/S2-i3, which reference.rs checks cell by cell
/// against the reference through 300 generations.
#[test]
fn a_stored_run_of_a_flipping_rule_resumes_at_an_alive_background() {
    let dir = temp_dir();
    let rule = "B02a3-k/S2-i3";
    let pattern = dir.path().join("soup.rle");
    reference_soup(&pattern, rule, 85, 40, 0.4);
    let resumed = run_then_resume(dir.path(), rule, ("225", "75"), ("451", "75"));
    assert_same_state(&resumed, &leap_report(&pattern, "451", rule), "resumed");
    let runs = dir.path().join("runs");
    for (generation, background) in [
        ("225", "alive"),
        ("300", "dead"),
        ("301", "alive"),
        ("376", "dead"),
        ("377", "alive"),
    ] {
        let got = snapshot(&runs, generation, &[]);
        assert_eq!(got["background"], background, "generation {generation}");
        assert_same_state(&got, &leap_report(&pattern, generation, rule), generation);
    }
}

/// LifeWiki, "Black/white reversal" (from memory): B0123478/S01234678 is
/// Life with the states swapped. Its first generation brings the
/// background to life, and from there the dead cells evolve by Life: the
/// dead cells at 10^30 are Life's live cells 10^30 - 1 generations after
/// the dead cells of generation 1.
#[test]
fn lifes_reversal_agrees_with_life_at_ten_to_the_thirty() {
    let dir = temp_dir();
    let (pattern, first) = reversal_soup_and_its_first_generation_as_life(dir.path());
    let far = leap_report(&pattern, "10^30", REVERSAL);
    let life = leap_report(&first, "999999999999999999999999999999", "B3/S23");
    assert_eq!(far["background"], "alive");
    assert_eq!(far["population"], "infinite");
    assert_eq!(far["dead_cells"], life["population"]);
    assert_eq!(far["bbox"], life["bbox"]);
    assert_eq!(far["digest"], life["digest"]);
}

/// Life with the states swapped (see above).
const REVERSAL: &str = "B0123478/S01234678";

/// A seeded soup under [`REVERSAL`], and the dead cells of its generation
/// 1 written as a Life pattern where they stand.
fn reversal_soup_and_its_first_generation_as_life(dir: &Path) -> (PathBuf, PathBuf) {
    let pattern = dir.join("soup.rle");
    reference_soup(&pattern, REVERSAL, 82, 40, 0.4);
    let first = dir.join("first.rle");
    let run = run_deeptime([
        "leap".as_ref(),
        pattern.as_os_str(),
        "--rule".as_ref(),
        REVERSAL.as_ref(),
        "--gens".as_ref(),
        "1".as_ref(),
        "--out".as_ref(),
        first.as_os_str(),
    ]);
    run.assert_success();
    let text = std::fs::read_to_string(&first).unwrap();
    let as_life: String = text
        .lines()
        .filter(|line| !line.starts_with("#background"))
        .map(|line| line.replace(REVERSAL, "B3/S23") + "\n")
        .collect();
    std::fs::write(&first, as_life).unwrap();
    (pattern, first)
}

/// A timeline of the twin rules above, sample by sample: the flipping one
/// alternates between a dead background (its live cells counted) and an
/// alive one (`infinite`, its dead cells counted), and what it counts is
/// always the live cells of B3678/S34678 (as above).
#[test]
fn a_b0_timeline_names_each_samples_background() {
    let dir = temp_dir();
    let pattern = dir.path().join("soup.rle");
    reference_soup(&pattern, TWINS[1], 84, 48, 0.5);
    let rows = |rule: &str| -> Vec<Vec<String>> {
        let csv = dir.path().join("timeline.csv");
        run_deeptime([
            "timeline".as_ref(),
            pattern.as_os_str(),
            "--rule".as_ref(),
            rule.as_ref(),
            "--gens".as_ref(),
            "41".as_ref(),
            "--every".as_ref(),
            "1".as_ref(),
            "--csv".as_ref(),
            csv.as_os_str(),
        ])
        .assert_success();
        let text = std::fs::read_to_string(&csv).unwrap();
        let mut lines = text.lines();
        assert_eq!(
            lines.next(),
            Some("generation,population,left,top,width,height,digest,background,dead_cells")
        );
        lines
            .map(|line| line.split(',').map(String::from).collect())
            .collect()
    };
    let flipping = rows(TWINS[1]);
    let twin = rows(TWINS[0]);
    assert_eq!(flipping.len(), 42);
    for (g, (row, twin)) in flipping.iter().zip(&twin).enumerate() {
        let alive = g % 2 == 1;
        assert_eq!(
            row[7],
            if alive { "alive" } else { "dead" },
            "generation {g}"
        );
        let (population, counted) = if alive {
            ("infinite", &row[8])
        } else {
            (twin[1].as_str(), &row[1])
        };
        assert_eq!(row[1], population, "generation {g}");
        assert_eq!(counted, &twin[1], "generation {g}");
        assert_eq!(row[2..7], twin[2..7], "generation {g}: box and digest");
    }
}

/// `deeptime fate` on `pattern` under `rule`, as JSON.
fn fate(pattern: &Path, rule: &str) -> Value {
    let run = run_deeptime([
        "fate".as_ref(),
        pattern.as_os_str(),
        "--rule".as_ref(),
        rule.as_ref(),
        "--json".as_ref(),
    ]);
    report(&run)
}

/// The census, sorted, as (shape id, kind, period, "dx dy count"): what a
/// census says of each kind of object but its name.
fn census(report: &Value) -> Vec<(String, String, u64, String)> {
    let mut out: Vec<_> = report["census"]
        .as_array()
        .expect("a census")
        .iter()
        .map(|entry| {
            let text = |key: &str| entry[key].as_str().unwrap().to_string();
            (
                text("shape_id"),
                text("kind"),
                text("period").parse().unwrap(),
                format!(
                    "{} {} {}",
                    entry["displacement"]["x"],
                    entry["displacement"]["y"],
                    text("count")
                ),
            )
        })
        .collect();
    out.sort();
    out
}

/// The fate of a soup under the flipping B01245/S0125 is that of its twin
/// B3678/S34678 (whose live cells its differing cells are, see above): it
/// settles at the same generation into the same cells, each object of the
/// same shape and motion, but every period even, as the whole state's
/// with its background flipping every generation is: a still life of the
/// twin is a period-2 oscillator here.
#[test]
fn a_flipping_rules_fate_is_its_twins_with_even_periods() {
    let dir = temp_dir();
    let pattern = dir.path().join("soup.rle");
    reference_soup(&pattern, TWINS[1], 88, 48, 0.45);
    let twin = fate(&pattern, TWINS[0]);
    let flipping = fate(&pattern, TWINS[1]);
    for key in ["settles_at", "digest", "shape_digest", "bbox", "period_of"] {
        assert_eq!(flipping[key], twin[key], "{key}");
    }
    let settles: u64 = flipping["settles_at"].as_str().unwrap().parse().unwrap();
    let (background, population) = if settles.is_multiple_of(2) {
        ("dead", twin["population"].clone())
    } else {
        ("alive", Value::from("infinite"))
    };
    assert_eq!(flipping["background"], background);
    assert_eq!(flipping["population"], population);
    let period = |report: &Value| -> u64 { report["period"].as_str().unwrap().parse().unwrap() };
    let even = |p: u64| if p.is_multiple_of(2) { p } else { 2 * p };
    assert_eq!(period(&flipping), even(period(&twin)));
    assert!(
        census(&twin).iter().any(|entry| entry.1 == "still-life"),
        "the seed is chosen to leave a still life: {twin}"
    );
    let mut expected: Vec<_> = census(&twin)
        .into_iter()
        .map(|(shape, kind, p, rest)| {
            let kind = if kind == "still-life" {
                "oscillator".to_string()
            } else {
                kind
            };
            (shape, kind, even(p), rest)
        })
        .collect();
    expected.sort();
    let got = census(&flipping);
    assert!(!got.is_empty(), "the soup leaves objects");
    assert_eq!(got, expected);
}

/// The fate of a soup under Life's reversal is Life's fate of the dead
/// cells of its generation 1, one generation later: the same period,
/// cells and census, the trade's names included (the dead cells are Life's
/// objects), on an alive background.
#[test]
fn lifes_reversals_fate_is_lifes_from_generation_one() {
    let dir = temp_dir();
    let (pattern, first) = reversal_soup_and_its_first_generation_as_life(dir.path());
    let reversal = fate(&pattern, REVERSAL);
    let life = fate(&first, "B3/S23");
    let at = |report: &Value| -> u64 { report["settles_at"].as_str().unwrap().parse().unwrap() };
    assert_eq!(at(&reversal), at(&life) + 1);
    for key in ["period", "digest", "shape_digest", "bbox", "census"] {
        assert_eq!(reversal[key], life[key], "{key}");
    }
    assert_eq!(reversal["background"], "alive");
    assert_eq!(reversal["population"], "infinite");
    assert_eq!(reversal["dead_cells"], life["population"]);
    assert_eq!(life["background"], "dead");
}

/// The background alone, from the definition of B0 and S8 (common
/// practice): an empty plane under a flipping rule is settled at once and
/// repeats every two generations, with no object to say so; under Life's
/// reversal it settles at generation 1, when its background has come alive
/// for good, and is not settled at generation 0.
#[test]
fn fate_of_the_background_alone() {
    let dir = temp_dir();
    let empty = dir.path().join("empty.rle");
    std::fs::write(&empty, "x = 0, y = 0\n!\n").unwrap();
    let flipping = fate(&empty, TWINS[1]);
    assert_eq!(flipping["settles_at"], "0");
    assert_eq!(flipping["period"], "2");
    assert_eq!(flipping["background"], "dead");
    assert_eq!(flipping["population"], "0");
    let reversal = fate(&empty, REVERSAL);
    assert_eq!(reversal["settles_at"], "1");
    assert_eq!(reversal["period"], "1");
    assert_eq!(reversal["background"], "alive");
    assert_eq!(reversal["population"], "infinite");
    assert_eq!(reversal["dead_cells"], "0");
    let run = run_deeptime([
        "fate".as_ref(),
        empty.as_os_str(),
        "--rule".as_ref(),
        REVERSAL.as_ref(),
        "--limit".as_ref(),
        "0".as_ref(),
        "--json".as_ref(),
    ]);
    let unsettled = &report(&run)["unsettled"];
    assert_eq!(unsettled["reason"], "the background is still coming alive");
    assert_eq!(unsettled["background"], "dead");
}
