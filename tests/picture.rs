//! Pictures a person can read: the tide pool of the demo jobs at 10^9
//! generations (a few ships a quarter of a billion cells apart) drawn in
//! each shade; the pixel grid in the JSON and in the PNG's text chunks.

use std::path::Path;

use deeptime_tests::{run_deeptime, temp_dir};
use serde_json::Value;

/// (grey values of the pixels, text chunks) of a PNG.
fn read_png(path: &Path) -> (Vec<u8>, Vec<(String, String)>) {
    let decoder = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(path).unwrap()));
    let mut reader = decoder.read_info().unwrap();
    let texts = reader
        .info()
        .uncompressed_latin1_text
        .iter()
        .map(|t| (t.keyword.clone(), t.text.clone()))
        .collect();
    let mut buffer = vec![0; reader.output_buffer_size().unwrap()];
    let frame = reader.next_frame(&mut buffer).unwrap();
    buffer.truncate(frame.buffer_size());
    (buffer, texts)
}

#[test]
fn a_sparse_wide_state_is_visible_and_says_where_it_lies() {
    let dir = temp_dir();
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo-jobs/tidepool.rle");
    std::fs::copy(&demo, dir.path().join("tidepool.rle")).unwrap();
    std::fs::write(
        dir.path().join("tide.toml"),
        "version = 1\npattern = \"tidepool.rle\"\ntarget = \"10^9\"\n\
         [checkpoint]\ndir = \"runs\"\nevery = \"10^8\"\n",
    )
    .unwrap();
    run_deeptime(["run", dir.path().join("tide.toml").to_str().unwrap()]).assert_success();
    let runs = dir.path().join("runs");
    let mut lit = Vec::new();
    for shade in ["log", "any", "share"] {
        let out = dir.path().join(format!("{shade}.png"));
        let run = run_deeptime([
            "snapshot",
            runs.to_str().unwrap(),
            "--gen",
            "10^9",
            "--out",
            out.to_str().unwrap(),
            "--shade",
            shade,
            "--json",
        ]);
        run.assert_success();
        let report: Value = serde_json::from_str(&run.stdout).unwrap();
        let grid = &report["picture"];
        assert_eq!(grid["shade"], shade);
        let (pixels, texts) = read_png(&out);
        assert_eq!(
            pixels.len() as u64,
            grid["columns"].as_u64().unwrap() * grid["rows"].as_u64().unwrap()
        );
        // The grid's corner is a multiple of 2^scale at or before the
        // bounding box's corner, and the text chunks say the same.
        let scale = grid["scale"].as_u64().unwrap();
        for (axis, key) in [("left", "deeptime-left"), ("top", "deeptime-top")] {
            let corner: i64 = grid[axis].as_str().unwrap().parse().unwrap();
            let cell: i64 = report["bbox"][axis].as_str().unwrap().parse().unwrap();
            assert!(corner <= cell && cell - corner < 1 << scale, "{axis}");
            assert_eq!(corner % (1 << scale), 0, "{axis}");
            let text = texts.iter().find(|(k, _)| k == key).expect(key);
            assert_eq!(text.1, grid[axis].as_str().unwrap());
        }
        let text = texts.iter().find(|(k, _)| k == "deeptime-scale").unwrap();
        assert_eq!(text.1, scale.to_string());
        let drawn: Vec<u8> = pixels.iter().copied().filter(|&g| g < 255).collect();
        assert!(!drawn.is_empty(), "{shade}: nothing drawn");
        let darkest = *drawn.iter().min().unwrap();
        match shade {
            // One live cell in a pixel of 4^scale is mid-grey or darker.
            "log" => assert!(darkest <= 160, "log: darkest {darkest}"),
            "any" => assert!(drawn.iter().all(|&g| g == 0), "any: {drawn:?}"),
            // The share of a few cells in 4^18 is all but white.
            _ => assert!(drawn.iter().all(|&g| g >= 200), "share: {drawn:?}"),
        }
        lit.push(drawn.len());
    }
    // The same pixels are lit in every shade.
    assert!(lit.windows(2).all(|w| w[0] == w[1]), "{lit:?}");
}

#[test]
fn leap_draws_a_picture_too() {
    // The one-shot command: the R-pentomino at 1103 (LifeWiki: 116 cells)
    // drawn at one cell a pixel, black where a cell lives.
    let dir = temp_dir();
    let pattern = dir.path().join("r.rle");
    std::fs::write(&pattern, "x = 3, y = 3\nb2o$2o$bo!").unwrap();
    let out = dir.path().join("r.png");
    let run = run_deeptime([
        "leap",
        pattern.to_str().unwrap(),
        "--gens",
        "1103",
        "--out",
        out.to_str().unwrap(),
        "--scale",
        "0",
        "--json",
    ]);
    run.assert_success();
    let report: Value = serde_json::from_str(&run.stdout).unwrap();
    assert_eq!(report["picture"]["scale"], 0);
    assert_eq!(report["picture"]["left"], report["bbox"]["left"]);
    let (pixels, _) = read_png(&out);
    assert_eq!(pixels.iter().filter(|&&g| g == 0).count(), 116);
    assert_eq!(pixels.iter().filter(|&&g| g != 0 && g != 255).count(), 0);
}
