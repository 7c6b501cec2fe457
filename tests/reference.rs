//! Whole-system test: the real `deeptime` binary against the independent
//! reference simulator (tests/reference/life_reference.py, numpy/scipy).
//!
//! For each rule and a few seeded random soups, the reference runs the soup
//! for 300 generations and records population, bounding box, digest and cells
//! at many generations (powers of two and their neighbours matter most to
//! HashLife); `deeptime leap --json --out` is run once for each of those
//! generations, from generation 0, and the reference compares its report and
//! RLE with its own records cell by cell. Needs `DEEPTIME_PYTHON` (set by
//! tests/run-tests) and a release build of the binary.

use std::path::Path;

use deeptime_tests::{reference_soup, run_deeptime, run_reference, temp_dir};

/// The generations compared: small ones, each power of two up to 256 with
/// its neighbours, and a few others up to 300.
const GENS: &[u64] = &[
    0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 15, 16, 17, 31, 32, 33, 47, 48, 63, 64, 65, 100, 127, 128,
    129, 150, 200, 255, 256, 257, 299, 300,
];

/// One soup: a seeded random `size` x `size` square of the given density.
struct Soup {
    seed: u64,
    size: u32,
    density: f64,
}

/// The reference's records, read back as JSON.
fn read_expected(path: &Path) -> serde_json::Value {
    let text = std::fs::read_to_string(path).expect("the reference's expected.json");
    serde_json::from_str(&text).expect("expected.json is JSON")
}

/// Runs deeptime for every generation of `gens` on `pattern` under `rule`
/// and has the reference compare each result with `expected`.
fn compare_all(dir: &Path, pattern: &Path, rule: &str, gens: &[u64], expected: &Path, what: &str) {
    let gens: Vec<String> = gens.iter().map(u64::to_string).collect();
    compare_all_in(dir, pattern, rule, &gens, None, expected, what);
}

/// `compare_all` for generations of any size, in `universe` if given.
fn compare_all_in(
    dir: &Path,
    pattern: &Path,
    rule: &str,
    gens: &[String],
    universe: Option<&str>,
    expected: &Path,
    what: &str,
) {
    let mut compare_args: Vec<String> = vec![
        "compare".into(),
        "--expected".into(),
        expected.display().to_string(),
    ];
    for generation in gens {
        let got_rle = dir.join(format!("got-{generation}.rle"));
        let got_json = dir.join(format!("got-{generation}.json"));
        let mut args: Vec<&std::ffi::OsStr> = vec![
            "leap".as_ref(),
            pattern.as_os_str(),
            "--rule".as_ref(),
            rule.as_ref(),
            "--gens".as_ref(),
            generation.as_ref(),
            "--json".as_ref(),
            "--out".as_ref(),
            got_rle.as_os_str(),
        ];
        if let Some(universe) = universe {
            args.push(std::ffi::OsStr::new("--universe"));
            args.push(std::ffi::OsStr::new(universe));
        }
        let run = run_deeptime(args);
        assert!(
            run.succeeded(),
            "{what}: deeptime failed at generation {generation}:\n{}",
            run.describe()
        );
        // --json prints exactly one JSON object (the command's contract).
        let report: serde_json::Value =
            serde_json::from_str(run.stdout.trim()).unwrap_or_else(|e| {
                panic!(
                    "{what}: generation {generation}: stdout is not one JSON value ({e}):\n{}",
                    run.describe()
                )
            });
        assert!(
            report.is_object(),
            "{what}: generation {generation}: stdout is not a JSON object:\n{}",
            run.describe()
        );
        std::fs::write(&got_json, &run.stdout).expect("write got.json");
        compare_args.extend([
            "--gen".into(),
            generation.clone(),
            "--got".into(),
            got_rle.display().to_string(),
            "--got-json".into(),
            got_json.display().to_string(),
        ]);
    }
    // Independent reference: numpy/scipy. Population, bbox, digest and every
    // cell must equal the reference's at each generation.
    let run = run_reference(&compare_args);
    assert!(
        run.succeeded(),
        "{what}: deeptime differs from the reference:\n{}",
        run.describe()
    );
}

/// Checks one rule on each soup, through `GENS`.
fn check_rule(rule: &str, soups: &[Soup]) {
    for soup in soups {
        let dir = temp_dir();
        let pattern = dir.path().join("soup.rle");
        let expected = dir.path().join("expected.json");
        let what = format!(
            "rule {rule}, soup seed {} size {} density {}",
            soup.seed, soup.size, soup.density
        );
        reference_soup(&pattern, rule, soup.seed, soup.size, soup.density);
        reference_expect(&pattern, rule, &expected);
        assert_interesting(&read_expected(&expected), &what);
        compare_all(dir.path(), &pattern, rule, GENS, &expected, &what);
    }
}

/// Has the reference run `pattern` under `rule` and record every
/// generation of GENS in `expected`.
fn reference_expect(pattern: &Path, rule: &str, expected: &Path) {
    let gens: Vec<String> = GENS.iter().map(u64::to_string).collect();
    reference_expect_in(pattern, rule, &gens, None, expected);
}

/// `reference_expect` for generations of any size, in `universe` if given.
fn reference_expect_in(
    pattern: &Path,
    rule: &str,
    gens: &[String],
    universe: Option<&str>,
    expected: &Path,
) {
    let mut args = vec![
        "expect".to_string(),
        "--pattern".into(),
        pattern.display().to_string(),
        "--rule".into(),
        rule.into(),
        "--gens".into(),
        gens.join(","),
        "--out".into(),
        expected.display().to_string(),
    ];
    if let Some(universe) = universe {
        args.extend(["--universe".to_string(), universe.to_string()]);
    }
    run_reference(args).assert_success();
}

/// The soup must stay interesting through the run, or the comparison says
/// little: alive at the end, changing, and not a solid block. Source: the
/// reference's own records (independent reference: numpy/scipy).
/// Under a B0 rule the cells counted are those that differ from the
/// background (the dead ones when it is alive).
fn assert_interesting(expected: &serde_json::Value, what: &str) {
    let gens = &expected["generations"];
    let population = |generation: u64| -> u64 {
        let record = &gens[generation.to_string()];
        let counted = match record["dead_cells"].as_str() {
            Some(dead) => dead,
            None => record["population"].as_str().expect("population"),
        };
        counted.parse().expect("decimal")
    };
    let last = *GENS.last().unwrap();
    let final_population = population(last);
    assert!(
        final_population >= 50,
        "{what}: only {final_population} cells live at generation {last}"
    );
    let distinct: std::collections::BTreeSet<u64> = GENS.iter().map(|&g| population(g)).collect();
    assert!(
        distinct.len() >= GENS.len() / 3,
        "{what}: the population hardly changes: {distinct:?}"
    );
    let bbox = &gens[last.to_string()]["bbox"];
    let side = |key: &str| -> u64 {
        bbox[key]
            .as_str()
            .expect("bbox side")
            .parse()
            .expect("decimal")
    };
    let area = side("width") * side("height");
    assert!(
        final_population * 100 < area * 90,
        "{what}: {final_population} of {area} bbox cells live at generation {last}: nearly full"
    );
}

#[test]
fn reference_selftest() {
    // The reference checks its digest, RLE and step code on cases worked by
    // hand (from memory, common practice) before the comparisons rely on it.
    let run = run_reference(["selftest"]);
    run.assert_success();
    assert!(
        run.stdout.contains("selftest:"),
        "selftest printed no summary:\n{}",
        run.describe()
    );
}

#[test]
fn conway_b3_s23() {
    check_rule(
        "B3/S23",
        &[
            Soup {
                seed: 1,
                size: 56,
                density: 0.35,
            },
            Soup {
                seed: 2,
                size: 64,
                density: 0.4,
            },
            Soup {
                seed: 3,
                size: 48,
                density: 0.5,
            },
        ],
    );
}

#[test]
fn b36_s23() {
    check_rule(
        "B36/S23",
        &[
            Soup {
                seed: 11,
                size: 56,
                density: 0.35,
            },
            Soup {
                seed: 12,
                size: 64,
                density: 0.45,
            },
            Soup {
                seed: 13,
                size: 48,
                density: 0.3,
            },
        ],
    );
}

#[test]
fn b3678_s34678() {
    check_rule(
        "B3678/S34678",
        &[
            Soup {
                seed: 21,
                size: 56,
                density: 0.5,
            },
            Soup {
                seed: 22,
                size: 64,
                density: 0.45,
            },
            Soup {
                seed: 23,
                size: 48,
                density: 0.5,
            },
        ],
    );
}

#[test]
fn b2_s() {
    // B2/S spreads at about one cell a generation on every side: a 48-cell
    // soup is some 650 x 650 at generation 300, a grid numpy handles easily.
    check_rule(
        "B2/S",
        &[
            Soup {
                seed: 31,
                size: 48,
                density: 0.3,
            },
            Soup {
                seed: 32,
                size: 48,
                density: 0.4,
            },
        ],
    );
}

#[test]
fn b3_s012345678() {
    // S0: a live cell with no neighbour survives; nothing ever dies here, and
    // the pattern grows slowly with gaps (from memory).
    check_rule(
        "B3/S012345678",
        &[
            Soup {
                seed: 41,
                size: 56,
                density: 0.3,
            },
            Soup {
                seed: 42,
                size: 48,
                density: 0.4,
            },
            Soup {
                seed: 43,
                size: 64,
                density: 0.35,
            },
        ],
    );
}

#[test]
fn b1357_s02468() {
    // S0 again; this rule copies any pattern at powers of two (from memory),
    // which HashLife's 2^k jumps meet head on.
    check_rule(
        "B1357/S02468",
        &[
            Soup {
                seed: 51,
                size: 48,
                density: 0.3,
            },
            Soup {
                seed: 52,
                size: 48,
                density: 0.45,
            },
        ],
    );
}

/// Checks each rule on a 40² soup of density 0.4 with its own seed.
fn check_rules_on_own_soups(rules: &[(&str, u64)]) {
    for &(rule, seed) in rules {
        check_rule(
            rule,
            &[Soup {
                seed,
                size: 40,
                density: 0.4,
            }],
        );
    }
}

/// Six isotropic rules in Hensel notation, each on its own soup. The first
/// three rule strings are LifeWiki's ("Isotropic non-totalistic rule"); the
/// others were picked because soups stay active under them through 300
/// generations (measured with the reference).
#[test]
fn isotropic_rules_in_hensel_notation() {
    check_rules_on_own_soups(&[
        ("B2-a/S12", 61),
        ("B3/S2-i34q", 62),
        ("B1e2ak3inqy4ny5e/S", 63),
        ("B36-k/S23", 64),
        ("B2i34c/S2-i3", 65),
        ("B3/S23-a4i", 66),
    ]);
}

/// Rules with B0, each on its own soup: two without S8 (the background
/// flips every generation) and two with S8 (it stays alive from generation
/// 1). B0123478/S01234678 and B0123478/S0134678 are the black/white
/// reversals of B3/S23 and B36/S23 (LifeWiki, "Black/white reversal", from
/// memory); the others were picked because soups stay active under them
/// through 300 generations without filling their box (measured with the
/// reference). The reference keeps the true cells and the background's
/// state; deeptime keeps the cells that differ from it.
#[test]
fn b0_rules_with_and_without_s8() {
    check_rules_on_own_soups(&[
        ("B03/S23", 71),
        ("B02a3-k/S2-i3", 72),
        ("B0123478/S01234678", 73),
        ("B0123478/S0134678", 74),
    ]);
}

#[test]
fn glider_northwest() {
    // A glider flying towards negative x and y (common practice: it moves by
    // (-1, -1) every 4 generations), so the bbox and digest go far into
    // negative coordinates.
    let dir = temp_dir();
    let pattern = dir.path().join("glider.rle");
    std::fs::write(&pattern, "x = 3, y = 3, rule = B3/S23\n3o$o$bo!\n").expect("write glider.rle");
    let expected = dir.path().join("expected.json");
    reference_expect(&pattern, "B3/S23", &expected);
    // Common practice: at generation 300 = 75 * 4 the glider is its first
    // phase again, moved by (-75, -75); population 5, bbox 3 x 3.
    let record = &read_expected(&expected)["generations"]["300"];
    assert_eq!(record["population"], "5");
    assert_eq!(record["bbox"]["left"], "-75");
    assert_eq!(record["bbox"]["top"], "-75");
    assert_eq!(record["bbox"]["width"], "3");
    assert_eq!(record["bbox"]["height"], "3");
    compare_all(
        dir.path(),
        &pattern,
        "B3/S23",
        GENS,
        &expected,
        "glider flying north-west",
    );
}

/// Bounded universes against the reference: seeded soups on tori and
/// bounded planes whose sides are not powers of two, cell by cell at small
/// generations and far beyond the point where their histories repeat (the
/// reference finds the cycle with a full table of states, deeptime with
/// Brent's method).
#[test]
fn tori_and_bounded_planes_against_the_reference() {
    let far = "1000000000000000000000000000000000000037";
    let gens: Vec<String> = [
        "0", "1", "2", "3", "7", "8", "63", "64", "65", "100", "999", "1000", "4097",
    ]
    .iter()
    .map(|g| g.to_string())
    .chain([far.to_string(), format!("{far}0")])
    .collect();
    for (rule, universe, seed) in [
        ("B3/S23", "torus 37x23", 1u64),
        ("B3/S23", "bounded 29x41", 2),
        ("B36/S23", "torus 40x24", 3),
        ("B36/S23", "bounded 33x19", 4),
        ("B2-a/S12", "torus 30x26", 5),
        ("B3/S2-i34q", "bounded 27x35", 6),
        // B0: every cell of a torus is explicit, and outside a bounded
        // plane cells stay dead, so no background is ever alive there.
        ("B02a3-k/S2-i3", "torus 21x20", 7),
        ("B0123478/S0134678", "bounded 23x19", 8),
    ] {
        let dir = temp_dir();
        let pattern = dir.path().join("soup.rle");
        let expected = dir.path().join("expected.json");
        let what = format!("rule {rule} in the {universe}, soup seed {seed}");
        reference_soup(&pattern, rule, seed, 19, 0.4);
        reference_expect_in(&pattern, rule, &gens, Some(universe), &expected);
        let period = &read_expected(&expected)["period"];
        assert!(
            period.is_u64(),
            "{what}: the reference saw no cycle by generation 4097"
        );
        compare_all_in(
            dir.path(),
            &pattern,
            rule,
            &gens,
            Some(universe),
            &expected,
            &what,
        );
    }
}
