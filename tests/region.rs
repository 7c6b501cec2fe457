//! `deeptime snapshot --region`: the rectangle's population and bounding
//! box beside the whole state's, from a stored generation read on demand
//! and from one advanced in memory, against the cells of the whole state
//! as `deeptime leap --out` writes them (placed by their `#position`).

use std::collections::HashSet;

use deeptime_tests::{run_deeptime, soup, temp_dir, write_job};
use serde_json::Value;

/// The live cells of RLE text, placed by its `#position X Y` comment
/// (common practice for the body: counts, `b`, `o`, `$`, `!`).
fn cells(text: &str) -> HashSet<(i64, i64)> {
    let mut origin = (0, 0);
    let mut body = String::new();
    for line in text.lines() {
        if let Some(rest) = line.strip_prefix("#position ") {
            let mut parts = rest.split_whitespace().map(|p| p.parse::<i64>().unwrap());
            origin = (parts.next().unwrap(), parts.next().unwrap());
        } else if !line.starts_with('#') && !line.starts_with('x') {
            body.push_str(line.trim());
        }
    }
    let (mut x, mut y, mut count) = (0i64, 0i64, 0i64);
    let mut out = HashSet::new();
    for c in body.chars() {
        match c {
            '0'..='9' => count = count * 10 + c.to_digit(10).unwrap() as i64,
            'b' | 'o' | '$' => {
                let n = count.max(1);
                match c {
                    'b' => x += n,
                    'o' => {
                        for dx in 0..n {
                            out.insert((origin.0 + x + dx, origin.1 + y));
                        }
                        x += n;
                    }
                    _ => {
                        y += n;
                        x = 0;
                    }
                }
                count = 0;
            }
            _ => break,
        }
    }
    out
}

#[test]
fn a_region_reports_its_own_figures() {
    let dir = temp_dir();
    std::fs::write(dir.path().join("soup.rle"), soup(64, 0x5eed_2026)).unwrap();
    let job = write_job(
        dir.path(),
        "soup.toml",
        "soup",
        "soup.rle",
        "B3/S23",
        "400",
        "200",
    );
    run_deeptime(["run", job.to_str().unwrap()]).assert_success();
    let runs = dir.path().join("runs");
    let (left, top, width, height) = (10i64, 5i64, 30i64, 40i64);
    let region = format!("{left},{top},{width},{height}");
    // 200 is stored (read on demand); 300 is advanced from it in memory.
    for generation in ["200", "300"] {
        let run = run_deeptime([
            "snapshot",
            runs.to_str().unwrap(),
            "--gen",
            generation,
            "--region",
            &region,
            "--json",
        ]);
        run.assert_success();
        let report: Value = serde_json::from_str(&run.stdout).unwrap();
        let whole = dir.path().join(format!("whole-{generation}.rle"));
        run_deeptime([
            "leap",
            dir.path().join("soup.rle").to_str().unwrap(),
            "--gens",
            generation,
            "--out",
            whole.to_str().unwrap(),
        ])
        .assert_success();
        let all = cells(&std::fs::read_to_string(&whole).unwrap());
        assert_eq!(report["population"], all.len().to_string(), "{generation}");
        let inside: Vec<(i64, i64)> = all
            .into_iter()
            .filter(|&(x, y)| x >= left && x < left + width && y >= top && y < top + height)
            .collect();
        let got = &report["region"];
        assert_eq!(got["population"], inside.len().to_string(), "{generation}");
        assert_eq!(got["width"], width.to_string());
        let min_x = inside.iter().map(|c| c.0).min().unwrap();
        let max_x = inside.iter().map(|c| c.0).max().unwrap();
        let min_y = inside.iter().map(|c| c.1).min().unwrap();
        let max_y = inside.iter().map(|c| c.1).max().unwrap();
        assert_eq!(
            got["bbox"],
            serde_json::json!({
                "left": min_x.to_string(), "top": min_y.to_string(),
                "width": (max_x - min_x + 1).to_string(), "height": (max_y - min_y + 1).to_string()
            }),
            "{generation}"
        );
    }
}

#[test]
fn leap_reports_a_region_too() {
    // The R-pentomino at 1103 (LifeWiki: 116 cells); a rectangle holding
    // every cell reports them all, one beside it reports none.
    let dir = temp_dir();
    let pattern = dir.path().join("r.rle");
    std::fs::write(&pattern, "x = 3, y = 3\nb2o$2o$bo!").unwrap();
    let leap = |region: &str| -> Value {
        let run = run_deeptime([
            "leap",
            pattern.to_str().unwrap(),
            "--gens",
            "1103",
            "--region",
            region,
            "--json",
        ]);
        run.assert_success();
        serde_json::from_str(&run.stdout).unwrap()
    };
    let all = leap("-1000,-1000,2000,2000");
    assert_eq!(all["region"]["population"], "116");
    assert_eq!(all["region"]["bbox"], all["bbox"]);
    let none = leap("5000,5000,10,10");
    assert_eq!(none["region"]["population"], "0");
    assert_eq!(none["region"]["bbox"], Value::Null);
    let run = run_deeptime([
        "leap",
        pattern.to_str().unwrap(),
        "--gens",
        "1",
        "--region",
        "1,2,3",
    ]);
    assert_eq!(run.code, Some(2), "{}", run.describe());
}
