//! Runs that survive: real `deeptime run` processes killed with SIGKILL at
//! random moments, damaged checkpoints, changed jobs. The final digest must
//! always equal that of one uninterrupted `deeptime leap` (common practice
//! for crash-consistent storage: a crash loses at most the work since the
//! last durable checkpoint, never correctness).

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Duration;

use deeptime_tests::{Run, deeptime_bin, run_deeptime, soup, temp_dir, write_job};

/// A seeded `side`×`side` soup and a job over it in `dir`.
fn job_of(dir: &Path, side: usize, target: u32, every: u32, rule: &str) -> PathBuf {
    std::fs::write(dir.join("soup.rle"), soup(side, 0x9e37_79b9_7f4a_7c15)).unwrap();
    write_job(
        dir,
        "soup.toml",
        "soup",
        "soup.rle",
        rule,
        &target.to_string(),
        &every.to_string(),
    )
}

/// Points the job at another checkpoint folder (or URL).
fn store_runs_in(job_path: &Path, place: &str) {
    let text = std::fs::read_to_string(job_path)
        .unwrap()
        .replace("dir = \"runs\"", &format!("dir = {place:?}"));
    std::fs::write(job_path, text).unwrap();
}

/// A 160×160 soup job.
fn job(dir: &Path, target: u32, every: u32, rule: &str) -> PathBuf {
    job_of(dir, 160, target, every, rule)
}

fn digest_of(run: &Run) -> String {
    run.assert_success();
    let report: serde_json::Value =
        serde_json::from_str(&run.stdout).unwrap_or_else(|e| panic!("{e}: {}", run.describe()));
    report["digest"].as_str().unwrap().to_string()
}

fn digest_after(dir: &Path, generations: u32) -> String {
    let pattern = dir.join("soup.rle");
    digest_of(&run_deeptime([
        "leap",
        pattern.to_str().unwrap(),
        "--gens",
        &generations.to_string(),
        "--json",
    ]))
}

/// The manifests of a run, oldest first.
fn manifests(dir: &Path) -> Vec<PathBuf> {
    let mut found: Vec<PathBuf> = std::fs::read_dir(dir.join("runs/manifests"))
        .unwrap()
        .map(|entry| entry.unwrap().path())
        .filter(|path| path.extension().is_some_and(|e| e == "json"))
        .collect();
    found.sort();
    found
}

/// The generations of the stored checkpoints, in order.
fn stored_generations(dir: &Path) -> Vec<u64> {
    manifests(dir)
        .iter()
        .map(|path| {
            let manifest: serde_json::Value =
                serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
            manifest["generation"].as_str().unwrap().parse().unwrap()
        })
        .collect()
}

#[test]
fn a_folder_that_does_not_exist_is_bad_input_for_every_reader() {
    let dir = temp_dir();
    let missing = dir.path().join("no-such-run");
    for command in [
        vec!["checkpoints"],
        vec!["checkpoints", "--json"],
        vec!["verify"],
        vec!["prune", "--keep", "1"],
        vec!["snapshot", "--gen", "0"],
    ] {
        let mut args = vec![command[0], missing.to_str().unwrap()];
        args.extend(&command[1..]);
        let run = run_deeptime(&args);
        assert_eq!(run.code, Some(2), "{}", run.describe());
        assert!(run.stderr.contains("no such folder"), "{}", run.describe());
    }
    assert!(!missing.exists(), "a reader made the folder");
}

#[test]
fn a_run_killed_many_times_finishes_with_the_uninterrupted_digest() {
    let dir = temp_dir();
    // About 3 s uninterrupted: 300 checkpoints of a 512² soup.
    let job = job_of(dir.path(), 512, 3000, 10, "B3/S23");
    let expected = digest_after(dir.path(), 3000);
    // Deterministic "random" kill moments, 30 to 400 ms into each start.
    let mut state = 12345u64;
    let mut kills = 0;
    for _ in 0..6 {
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        let wait = 30 + (state >> 33) % 370;
        let mut child = Command::new(deeptime_bin())
            .arg("run")
            .arg(&job)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(Duration::from_millis(wait));
        if child.try_wait().unwrap().is_none() {
            child.kill().unwrap(); // SIGKILL
            kills += 1;
        }
        child.wait().unwrap();
    }
    assert!(kills >= 3, "the run ended before most kills ({kills})");
    let last = run_deeptime(["run", job.to_str().unwrap(), "--json"]);
    assert!(
        last.stderr.contains("resuming soup from checkpoint"),
        "{}",
        last.describe()
    );
    assert_eq!(digest_of(&last), expected);
    let runs = dir.path().join("runs");
    let verify = run_deeptime(["verify", runs.to_str().unwrap()]);
    verify.assert_success();
    assert!(!verify.stdout.contains("DAMAGED"), "{}", verify.describe());
}

#[test]
fn a_damaged_newest_checkpoint_is_reported_and_the_previous_one_used() {
    let dir = temp_dir();
    let job_path = job(dir.path(), 300, 100, "B3/S23");
    run_deeptime(["run", job_path.to_str().unwrap()]).assert_success();
    let runs = dir.path().join("runs");
    run_deeptime(["verify", runs.to_str().unwrap()]).assert_success();

    // Flip one bit in the newest pack (used only by the newest checkpoint).
    let newest = manifests(dir.path()).pop().unwrap();
    let manifest: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&newest).unwrap()).unwrap();
    let pack_name = manifest["packs"].as_array().unwrap().last().unwrap()["name"]
        .as_str()
        .unwrap()
        .to_string();
    let pack = runs.join("packs").join(format!("{pack_name}.pack"));
    let mut bytes = std::fs::read(&pack).unwrap();
    let middle = bytes.len() / 2;
    bytes[middle] ^= 0x10;
    std::fs::write(&pack, &bytes).unwrap();

    let verify = run_deeptime(["verify", runs.to_str().unwrap()]);
    assert_ne!(verify.code, Some(0), "{}", verify.describe());
    assert!(
        verify.stdout.contains(&format!("{pack_name}.pack")),
        "{}",
        verify.describe()
    );
    assert!(verify.stdout.contains("damaged"), "{}", verify.describe());

    // Carry on to 400: the run warns, resumes from generation 200.
    let job_path = job(dir.path(), 400, 100, "B3/S23");
    let resumed = run_deeptime(["run", job_path.to_str().unwrap(), "--json"]);
    assert!(
        resumed
            .stderr
            .contains("warning: skipping damaged checkpoint"),
        "{}",
        resumed.describe()
    );
    assert!(
        resumed.stderr.contains("at generation 200"),
        "{}",
        resumed.describe()
    );
    assert_eq!(digest_of(&resumed), digest_after(dir.path(), 400));
    // Redoing generation 300 made the same pack again: the damaged file was
    // repaired, not reused, so every checkpoint reads back whole now.
    run_deeptime(["verify", runs.to_str().unwrap()]).assert_success();

    // A truncated newest manifest is skipped the same way.
    let newest = manifests(dir.path()).pop().unwrap();
    let text = std::fs::read(&newest).unwrap();
    std::fs::write(&newest, &text[..text.len() / 2]).unwrap();
    let verify = run_deeptime(["verify", runs.to_str().unwrap()]);
    assert_ne!(verify.code, Some(0));
    assert!(
        verify
            .stdout
            .contains(newest.file_name().unwrap().to_str().unwrap()),
        "{}",
        verify.describe()
    );
    let job_path = job(dir.path(), 500, 100, "B3/S23");
    let resumed = run_deeptime(["run", job_path.to_str().unwrap(), "--json"]);
    assert!(
        resumed
            .stderr
            .contains("warning: skipping damaged checkpoint"),
        "{}",
        resumed.describe()
    );
    assert_eq!(digest_of(&resumed), digest_after(dir.path(), 500));
}

#[test]
fn a_budget_too_small_for_the_newest_checkpoint_is_no_damage() {
    // A 32×32 soup under B2/S spreads into a wide chaotic state: the
    // checkpoint at 1536 holds many times the quads of generation 0. Resumed
    // with 1 MiB, the run must stop with exit 3 (the budget), not skip the
    // newer checkpoints as damaged and go on from an older one (common
    // practice: a failure to hold data is not a failure of the data).
    let dir = temp_dir();
    let job_path = job_of(dir.path(), 32, 1536, 512, "B2/S");
    run_deeptime(["run", job_path.to_str().unwrap()]).assert_success();
    assert_eq!(stored_generations(dir.path()), [0, 512, 1024, 1536]);
    let text = std::fs::read_to_string(&job_path).unwrap();
    std::fs::write(
        &job_path,
        format!(
            "memory = \"1MiB\"\n{}",
            text.replace("\"1536\"", "\"2048\"")
        ),
    )
    .unwrap();
    let resumed = run_deeptime(["run", job_path.to_str().unwrap()]);
    assert_eq!(resumed.code, Some(3), "{}", resumed.describe());
    assert!(
        !resumed.stderr.contains("damaged"),
        "{}",
        resumed.describe()
    );
    assert!(
        resumed.stderr.contains("too small"),
        "{}",
        resumed.describe()
    );
    assert_eq!(stored_generations(dir.path()), [0, 512, 1024, 1536]);
}

#[test]
fn a_job_that_no_longer_matches_its_run_is_refused() {
    let dir = temp_dir();
    let job_path = job(dir.path(), 50, 25, "B3/S23");
    run_deeptime(["run", job_path.to_str().unwrap()]).assert_success();
    let job_path = job(dir.path(), 100, 25, "B36/S23");
    let refused = run_deeptime(["run", job_path.to_str().unwrap()]);
    assert_eq!(refused.code, Some(2), "{}", refused.describe());
    assert!(
        refused
            .stderr
            .contains("the stored run uses rule B3/S23, the job now says B36/S23"),
        "{}",
        refused.describe()
    );
    // A changed target and interval are fine.
    let job_path = job(dir.path(), 90, 30, "B3/S23");
    let more = run_deeptime(["run", job_path.to_str().unwrap(), "--json"]);
    assert_eq!(digest_of(&more), digest_after(dir.path(), 90));
    // An unknown key is refused with its place.
    let text = std::fs::read_to_string(&job_path)
        .unwrap()
        .replace("target", "tagret");
    std::fs::write(&job_path, text).unwrap();
    let refused = run_deeptime(["run", job_path.to_str().unwrap()]);
    assert_eq!(refused.code, Some(2), "{}", refused.describe());
    assert!(
        refused
            .stderr
            .contains("soup.toml:5:1: unknown field `tagret`"),
        "{}",
        refused.describe()
    );
}

#[test]
fn a_snapshot_of_any_generation_matches_leap() {
    let dir = temp_dir();
    let job_path = job(dir.path(), 400, 100, "B3/S23");
    run_deeptime(["run", job_path.to_str().unwrap()]).assert_success();
    let runs = dir.path().join("runs");
    let runs = runs.to_str().unwrap();
    // Stored (200) and between checkpoints (250, 399): the same digest as
    // one leap from the pattern.
    for generation in [200u32, 250, 399] {
        let snap = run_deeptime(["snapshot", runs, "--gen", &generation.to_string(), "--json"]);
        assert_eq!(
            digest_of(&snap),
            digest_after(dir.path(), generation),
            "generation {generation}"
        );
    }
    // Beyond the last checkpoint: advanced from it.
    let snap = run_deeptime(["snapshot", runs, "--gen", "1000", "--json"]);
    assert_eq!(digest_of(&snap), digest_after(dir.path(), 1000));

    // The RLE of the whole state is byte for byte leap's.
    let from_snapshot = dir.path().join("snap.rle");
    let from_leap = dir.path().join("leap.rle");
    run_deeptime([
        "snapshot",
        runs,
        "--gen",
        "250",
        "--out",
        from_snapshot.to_str().unwrap(),
    ])
    .assert_success();
    let pattern = dir.path().join("soup.rle");
    run_deeptime([
        "leap",
        pattern.to_str().unwrap(),
        "--gens",
        "250",
        "--out",
        from_leap.to_str().unwrap(),
    ])
    .assert_success();
    assert_eq!(
        std::fs::read(&from_snapshot).unwrap(),
        std::fs::read(&from_leap).unwrap()
    );

    // A picture at one cell per pixel of a region is black exactly where
    // the region's RLE has live cells.
    let region = "-20,-10,90,60";
    let picture = dir.path().join("region.png");
    let text = dir.path().join("region.rle");
    run_deeptime([
        "snapshot",
        runs,
        "--gen",
        "250",
        "--region",
        region,
        "--scale",
        "0",
        "--out",
        picture.to_str().unwrap(),
    ])
    .assert_success();
    run_deeptime([
        "snapshot",
        runs,
        "--gen",
        "250",
        "--region",
        region,
        "--out",
        text.to_str().unwrap(),
    ])
    .assert_success();
    let decoder = png::Decoder::new(std::io::BufReader::new(
        std::fs::File::open(&picture).unwrap(),
    ));
    let mut reader = decoder.read_info().unwrap();
    let mut pixels = vec![0; reader.output_buffer_size().unwrap()];
    let info = reader.next_frame(&mut pixels).unwrap();
    assert_eq!((info.width, info.height), (90, 60));
    let cells = rle_cells(&std::fs::read_to_string(&text).unwrap());
    for y in 0..60usize {
        for x in 0..90usize {
            let dark = pixels[y * 90 + x] < 128;
            assert_eq!(dark, cells.contains(&(x, y)), "pixel ({x}, {y})");
        }
    }
}

#[test]
fn a_snapshot_before_any_checkpoint_or_of_a_bad_region_is_refused() {
    let dir = temp_dir();
    let job_path = job(dir.path(), 20, 10, "B3/S23");
    run_deeptime(["run", job_path.to_str().unwrap()]).assert_success();
    let runs = dir.path().join("runs");
    let bad = run_deeptime([
        "snapshot",
        runs.to_str().unwrap(),
        "--gen",
        "5",
        "--region",
        "1,2,3",
    ]);
    assert_eq!(bad.code, Some(2), "{}", bad.describe());
    assert!(
        bad.stderr
            .contains("--region \"1,2,3\": expected LEFT,TOP,WIDTH,HEIGHT"),
        "{}",
        bad.describe()
    );
    let empty = temp_dir();
    let none = run_deeptime(["snapshot", empty.path().to_str().unwrap(), "--gen", "5"]);
    assert_ne!(none.code, Some(0));
    assert!(
        none.stderr.contains("no checkpoints"),
        "{}",
        none.describe()
    );
}

#[test]
fn a_snapshot_reads_a_few_manifests_of_a_long_run_not_all() {
    // A glider stored at every generation from 0 to 200: 201 manifests.
    // A snapshot of a stored generation finds its manifest by bisection:
    // it reads a handful of manifests (log2 201 < 8, plus the one it
    // opens), never all of them.
    let dir = temp_dir();
    std::fs::write(dir.path().join("glider.rle"), "bo$2bo$3o!\n").unwrap();
    let job_path = write_job(
        dir.path(),
        "g.toml",
        "g",
        "glider.rle",
        "B3/S23",
        "200",
        "1",
    );
    run_deeptime(["run", job_path.to_str().unwrap()]).assert_success();
    let all = manifests(dir.path());
    assert_eq!(all.len(), 201);
    let largest = all
        .iter()
        .map(|path| std::fs::metadata(path).unwrap().len())
        .max()
        .unwrap();
    let runs = dir.path().join("runs");
    for generation in ["0", "57", "200"] {
        let snap = run_deeptime([
            "snapshot",
            runs.to_str().unwrap(),
            "--gen",
            generation,
            "--json",
        ]);
        let report = report_of(&snap);
        assert_eq!(report["generation"], generation);
        let read = report["bytes_read"].as_u64().unwrap();
        let packs = report["pack_bytes"].as_u64().unwrap();
        assert!(
            read <= packs + 10 * largest,
            "generation {generation}: read {read} bytes, packs {packs}, a manifest at most {largest}"
        );
    }
}

#[test]
fn an_output_that_cannot_be_written_is_never_blamed_on_the_checkpoints() {
    // README: exit code 2 for what the user must fix, checked before any
    // work; a checkpoint is never called damaged for an output error.
    let dir = temp_dir();
    let job_path = job(dir.path(), 40, 20, "B3/S23");
    run_deeptime(["run", job_path.to_str().unwrap()]).assert_success();
    let runs = dir.path().join("runs");
    let runs = runs.to_str().unwrap();
    let missing = dir.path().join("no-such-folder/x.png");
    let cases: Vec<(Vec<&str>, &str)> = vec![
        // Stored (20) and between checkpoints (30): the folder is missing.
        (
            vec!["--gen", "20", "--out", missing.to_str().unwrap()],
            "does not exist",
        ),
        (
            vec!["--gen", "30", "--out", missing.to_str().unwrap()],
            "does not exist",
        ),
        (vec!["--gen", "20", "--out", "x.gif"], "write .rle or .png"),
        // A region too large for a picture at scale 0, with its real size.
        (
            vec![
                "--gen",
                "30",
                "--region",
                "0,0,1000000,1000000",
                "--scale",
                "0",
                "--out",
                "x.png",
            ],
            "a picture of 1000000×1000000 pixels is too large",
        ),
    ];
    for (options, says) in cases {
        let mut args = vec!["snapshot", runs];
        args.extend(&options);
        let run = run_deeptime(&args);
        assert_eq!(run.code, Some(2), "{args:?}: {}", run.describe());
        assert!(run.stderr.contains(says), "{args:?}: {}", run.describe());
        assert!(
            !run.stderr.contains("damaged"),
            "{args:?}: {}",
            run.describe()
        );
        assert!(
            !run.stderr.contains("advancing"),
            "{args:?}: {}",
            run.describe()
        );
    }
    // Two gliders flying apart (each moves one cell diagonally every four
    // generations, a published fact): 80000 generations on, 40000 cells
    // each way, too large a picture at scale 0, known only once the state
    // is there. Stored (read on demand) or advanced from the checkpoint
    // before: told with the real size, and no checkpoint called damaged.
    let far = temp_dir();
    // A glider heading up-left in rows 0-2, one heading down-right in rows
    // 13-15 (columns 15-17).
    std::fs::write(far.path().join("pair.rle"), "3o$o$bo$10$16bo$17bo$15b3o!\n").unwrap();
    let job_path = write_job(
        far.path(),
        "pair.toml",
        "pair",
        "pair.rle",
        "B3/S23",
        "80000",
        "40000",
    );
    run_deeptime(["run", job_path.to_str().unwrap()]).assert_success();
    let runs = far.path().join("runs");
    // The listing gives each checkpoint's extent and write time: at 80000
    // each glider has moved 20000 cells diagonally (one cell per four
    // generations, a published fact), so the box runs from (-20000, -20000)
    // to (17 + 20000, 15 + 20000).
    let listed = run_deeptime(["checkpoints", runs.to_str().unwrap(), "--json"]);
    listed.assert_success();
    let rows: serde_json::Value = serde_json::from_str(&listed.stdout).unwrap();
    let last = &rows.as_array().unwrap()[2];
    assert_eq!(last["generation"], "80000");
    assert_eq!(last["population"], "10");
    assert_eq!(
        last["bbox"],
        serde_json::json!({"left": "-20000", "top": "-20000", "width": "40018", "height": "40016"})
    );
    let written = last["written"].as_str().unwrap();
    assert!(
        written.starts_with("20") && written.ends_with('Z'),
        "{written}"
    );
    let table = run_deeptime(["checkpoints", runs.to_str().unwrap()]);
    assert!(
        table.stdout.contains("40018 × 40016 at (-20000, -20000)"),
        "{}",
        table.stdout
    );
    for generation in ["80000", "79999"] {
        let picture = far.path().join("whole.png");
        let run = run_deeptime([
            "snapshot",
            runs.to_str().unwrap(),
            "--gen",
            generation,
            "--scale",
            "0",
            "--out",
            picture.to_str().unwrap(),
        ]);
        assert_eq!(run.code, Some(2), "{}", run.describe());
        assert!(
            run.stderr.contains("pixels is too large"),
            "{}",
            run.describe()
        );
        assert!(
            !run.stderr.contains("18446744073709551615"),
            "{}",
            run.describe()
        );
        assert!(!run.stderr.contains("damaged"), "{}", run.describe());
        assert!(!picture.exists());
    }
}

/// Live cells of a small RLE text, read here without the engine (common
/// practice: the RLE tags b, o, $ and !).
fn rle_cells(text: &str) -> std::collections::HashSet<(usize, usize)> {
    let mut cells = std::collections::HashSet::new();
    let (mut x, mut y, mut count) = (0usize, 0usize, 0usize);
    for line in text
        .lines()
        .filter(|line| !line.starts_with('x') && !line.starts_with('#'))
    {
        for c in line.chars() {
            match c {
                '0'..='9' => count = count * 10 + c.to_digit(10).unwrap() as usize,
                'b' | 'o' | '$' => {
                    let n = count.max(1);
                    count = 0;
                    match c {
                        'b' => x += n,
                        'o' => {
                            for dx in 0..n {
                                cells.insert((x + dx, y));
                            }
                            x += n;
                        }
                        _ => {
                            y += n;
                            x = 0;
                        }
                    }
                }
                '!' => return cells,
                _ => {}
            }
        }
    }
    cells
}

#[test]
fn retention_bounds_the_checkpoints_and_keeps_what_they_need() {
    let dir = temp_dir();
    let job_path = job(dir.path(), 300, 20, "B3/S23");
    let text = std::fs::read_to_string(&job_path).unwrap() + "keep = 3\n";
    std::fs::write(&job_path, text).unwrap();
    let done = run_deeptime(["run", job_path.to_str().unwrap(), "--json"]);
    assert_eq!(digest_of(&done), digest_after(dir.path(), 300));
    // The first checkpoint and the newest three.
    assert_eq!(stored_generations(dir.path()), [0, 260, 280, 300]);
    let runs = dir.path().join("runs");
    // What verify reads, as JSON: one entry per checkpoint, all whole.
    let verify = run_deeptime(["verify", runs.to_str().unwrap(), "--json"]);
    verify.assert_success();
    let checked: serde_json::Value = serde_json::from_str(&verify.stdout).unwrap();
    let checked = checked.as_array().unwrap();
    assert_eq!(checked.len(), 4, "{}", verify.stdout);
    assert!(
        checked.iter().all(|entry| entry["ok"] == true),
        "{}",
        verify.stdout
    );
    assert_eq!(checked[3]["generation"], "300");
    // Every pack left is needed by a kept checkpoint.
    let mut needed = std::collections::HashSet::new();
    for manifest in manifests(dir.path()) {
        let manifest: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(manifest).unwrap()).unwrap();
        for pack in manifest["packs"].as_array().unwrap() {
            needed.insert(format!("{}.pack", pack["name"].as_str().unwrap()));
        }
    }
    for entry in std::fs::read_dir(runs.join("packs")).unwrap() {
        let name = entry.unwrap().file_name().into_string().unwrap();
        assert!(
            needed.contains(&name),
            "{name} is needed by no kept checkpoint"
        );
    }
    // Keeping none is refused and deletes nothing.
    let refused = run_deeptime(["prune", runs.to_str().unwrap(), "--keep", "0"]);
    assert_eq!(refused.code, Some(2), "{}", refused.describe());
    assert_eq!(manifests(dir.path()).len(), 4);
    // Prune by hand to one; the run still resumes and the state is whole,
    // and a generation before the newest still opens from the first.
    let pruned = run_deeptime(["prune", runs.to_str().unwrap(), "--keep", "1"]);
    pruned.assert_success();
    assert_eq!(stored_generations(dir.path()), [0, 300]);
    let early = run_deeptime(["snapshot", runs.to_str().unwrap(), "--gen", "50", "--json"]);
    assert_eq!(digest_of(&early), digest_after(dir.path(), 50));
    let job_path = job(dir.path(), 340, 20, "B3/S23");
    let resumed = run_deeptime(["run", job_path.to_str().unwrap(), "--json"]);
    assert!(
        resumed.stderr.contains("at generation 300"),
        "{}",
        resumed.describe()
    );
    assert_eq!(digest_of(&resumed), digest_after(dir.path(), 340));
}

/// A tmpfs of `size` mounted on a fresh folder, unmounted when dropped
/// (the tests run as root, as CI does).
struct SmallDisk {
    path: PathBuf,
    _parent: tempfile::TempDir,
}

impl SmallDisk {
    fn mount(size: &str) -> SmallDisk {
        let parent = temp_dir();
        let path = parent.path().join("disk");
        std::fs::create_dir(&path).unwrap();
        let status = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(&path)
            .status()
            .expect("mount runs");
        assert!(
            status.success(),
            "mounting a tmpfs needs root (CI runs as root)"
        );
        SmallDisk {
            path,
            _parent: parent,
        }
    }

    fn read_only(&self) {
        let status = Command::new("mount")
            .args(["-o", "remount,ro"])
            .arg(&self.path)
            .status()
            .unwrap();
        assert!(status.success());
    }
}

impl Drop for SmallDisk {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg(&self.path).status();
    }
}

#[test]
fn a_full_disk_or_read_only_folder_is_a_clear_error_and_keeps_what_is_stored() {
    // The run's folder on a 200 KiB disk: a 512² soup's checkpoints fill it.
    let disk = SmallDisk::mount("200k");
    let dir = temp_dir();
    let job_path = job_of(dir.path(), 512, 400, 20, "B3/S23");
    store_runs_in(&job_path, disk.path.join("runs").to_str().unwrap());
    let full = run_deeptime(["run", job_path.to_str().unwrap()]);
    assert_eq!(full.code, Some(1), "{}", full.describe());
    let message = full.stderr.trim();
    assert_eq!(message.lines().count(), 1, "{message}");
    assert!(
        message.contains("cannot write") && message.contains("No space left on device"),
        "{message}"
    );
    let runs = disk.path.join("runs");
    let verify = run_deeptime(["verify", runs.to_str().unwrap()]);
    verify.assert_success();
    let stored = verify
        .stdout
        .lines()
        .filter(|line| line.starts_with("ok"))
        .count();
    assert!(stored >= 1, "{}", verify.describe());

    // Read-only: the run resumes, then cannot write, and says so.
    disk.read_only();
    let refused = run_deeptime(["run", job_path.to_str().unwrap()]);
    assert_eq!(refused.code, Some(1), "{}", refused.describe());
    assert!(
        refused.stderr.contains("Read-only file system"),
        "{}",
        refused.describe()
    );
    let verify = run_deeptime(["verify", runs.to_str().unwrap()]);
    verify.assert_success();
    assert_eq!(
        verify
            .stdout
            .lines()
            .filter(|line| line.starts_with("ok"))
            .count(),
        stored
    );
}

#[test]
fn a_run_on_s3_compatible_storage_matches_the_local_one() {
    // tests/run-tests starts an S3-compatible server on loopback and names
    // a bucket in it; the run, its verification and a snapshot go there.
    let url = std::env::var("DEEPTIME_S3_URL").expect(
        "DEEPTIME_S3_URL is not set: run the tests with tests/run-tests, which starts an \
         S3-compatible server on loopback",
    );
    let nonce = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_nanos();
    let remote = format!("{url}/run-{nonce}");
    let dir = temp_dir();
    let job_path = job(dir.path(), 300, 50, "B3/S23");
    store_runs_in(&job_path, &remote);
    let done = run_deeptime(["run", job_path.to_str().unwrap(), "--json"]);
    assert_eq!(digest_of(&done), digest_after(dir.path(), 300));
    let verify = run_deeptime(["verify", &remote]);
    verify.assert_success();
    assert_eq!(
        verify
            .stdout
            .lines()
            .filter(|l| l.starts_with("ok"))
            .count(),
        7
    );
    let listed = run_deeptime(["checkpoints", &remote, "--json"]);
    listed.assert_success();
    let rows: serde_json::Value = serde_json::from_str(&listed.stdout).unwrap();
    assert_eq!(rows.as_array().unwrap().len(), 7);
    let snap = run_deeptime(["snapshot", &remote, "--gen", "275", "--json"]);
    assert_eq!(digest_of(&snap), digest_after(dir.path(), 275));
    // Resumed from S3 after the target grows.
    let job_path2 = job(dir.path(), 350, 50, "B3/S23");
    store_runs_in(&job_path2, &remote);
    let more = run_deeptime(["run", job_path2.to_str().unwrap(), "--json"]);
    assert!(
        more.stderr.contains("at generation 300"),
        "{}",
        more.describe()
    );
    assert_eq!(digest_of(&more), digest_after(dir.path(), 350));
}

#[test]
fn a_prune_while_a_run_writes_is_refused() {
    // Common practice for a write-once store with deletion: one writer at
    // a time, so a prune can never delete a pack a running job just wrote.
    let dir = temp_dir();
    let job = job_of(dir.path(), 512, 3000, 10, "B3/S23");
    let mut child = Command::new(deeptime_bin())
        .arg("run")
        .arg(&job)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    std::thread::sleep(Duration::from_millis(400));
    let runs = dir.path().join("runs");
    let prune = run_deeptime(["prune", runs.to_str().unwrap(), "--keep", "1"]);
    let still_running = child.try_wait().unwrap().is_none();
    child.kill().unwrap();
    child.wait().unwrap();
    assert!(still_running, "the run ended before the prune");
    assert_eq!(prune.code, Some(1), "{}", prune.describe());
    assert!(
        prune.stderr.contains("another deeptime process is writing"),
        "{}",
        prune.describe()
    );
    // With the run gone, the prune goes ahead.
    run_deeptime(["prune", runs.to_str().unwrap(), "--keep", "1"]).assert_success();
    run_deeptime(["verify", runs.to_str().unwrap()]).assert_success();
}

/// The JSON report a run printed.
fn report_of(run: &Run) -> serde_json::Value {
    run.assert_success();
    serde_json::from_str(&run.stdout).unwrap_or_else(|e| panic!("{e}: {}", run.describe()))
}

#[test]
fn a_snapshot_of_a_small_region_of_a_stored_state_reads_a_small_part_of_its_packs() {
    let dir = temp_dir();
    // A 4096² soup stored at generation 0 and 2: about 350 thousand quads.
    let job_path = job_of(dir.path(), 4096, 2, 2, "B3/S23");
    run_deeptime(["run", job_path.to_str().unwrap()]).assert_success();
    let runs = dir.path().join("runs");
    let runs = runs.to_str().unwrap();
    let region = "1000,2000,40,30";
    let part = dir.path().join("part.rle");
    let snap = run_deeptime([
        "snapshot",
        runs,
        "--gen",
        "2",
        "--region",
        region,
        "--out",
        part.to_str().unwrap(),
        "--json",
    ]);
    let report = report_of(&snap);
    let read = report["bytes_read"].as_u64().unwrap();
    let packs = report["pack_bytes"].as_u64().unwrap();
    // Far fewer bytes than the packs hold (without partial reads a snapshot
    // reads every pack whole, so read ≥ packs): tables, a few chunks per
    // level and the manifests. Bound: common practice for an index, a
    // twentieth; measured here at well under that.
    assert!(
        read * 20 < packs,
        "read {read} of {packs} bytes: {}",
        snap.describe()
    );
    // The figures are the manifest's, the same as leap's.
    let pattern = dir.path().join("soup.rle");
    let leap_out = dir.path().join("whole.rle");
    let leapt = report_of(&run_deeptime([
        "leap",
        pattern.to_str().unwrap(),
        "--gens",
        "2",
        "--out",
        leap_out.to_str().unwrap(),
        "--json",
    ]));
    for field in ["digest", "population", "bbox", "generation"] {
        assert_eq!(report[field], leapt[field], "{field}");
    }
    // The region's cells are leap's cells inside it.
    let bbox = &leapt["bbox"];
    let (left, top): (i64, i64) = (
        bbox["left"].as_str().unwrap().parse().unwrap(),
        bbox["top"].as_str().unwrap().parse().unwrap(),
    );
    let whole = rle_cells(&std::fs::read_to_string(&leap_out).unwrap());
    let expected: std::collections::HashSet<(usize, usize)> = whole
        .iter()
        .map(|&(x, y)| (x as i64 + left - 1000, y as i64 + top - 2000))
        .filter(|&(x, y)| (0..40).contains(&x) && (0..30).contains(&y))
        .map(|(x, y)| (x as usize, y as usize))
        .collect();
    assert!(!expected.is_empty(), "a soup region holds live cells");
    assert_eq!(
        rle_cells(&std::fs::read_to_string(&part).unwrap()),
        expected
    );

    // A picture of the whole soup at 64 cells a pixel reads only the quads
    // of level 6 and up (stored together at each pack's end).
    let picture = dir.path().join("whole.png");
    let snap = run_deeptime([
        "snapshot",
        runs,
        "--gen",
        "2",
        "--scale",
        "6",
        "--out",
        picture.to_str().unwrap(),
        "--json",
    ]);
    let report = report_of(&snap);
    let read = report["bytes_read"].as_u64().unwrap();
    assert!(read * 10 < packs, "read {read} of {packs} bytes");
    let decoder = png::Decoder::new(std::io::BufReader::new(
        std::fs::File::open(&picture).unwrap(),
    ));
    let info = decoder.read_info().unwrap().info().clone();
    // 4096 cells and the two generations' spill, at 64 cells a pixel.
    assert!((64..=66).contains(&info.width), "{}", info.width);

    // A whole-state RLE of a stored generation is byte for byte leap's.
    let stored_out = dir.path().join("stored.rle");
    run_deeptime([
        "snapshot",
        runs,
        "--gen",
        "2",
        "--out",
        stored_out.to_str().unwrap(),
    ])
    .assert_success();
    assert_eq!(
        std::fs::read(&stored_out).unwrap(),
        std::fs::read(&leap_out).unwrap()
    );
}

#[test]
fn a_wall_clock_interval_writes_checkpoints_between_those_of_every() {
    let dir = temp_dir();
    // Several seconds of work (a 2048² soup for 8000 generations); `every`
    // alone stores generations 0, 4000 and 8000.
    let job_path = job_of(dir.path(), 2048, 8000, 4000, "B3/S23");
    let text = std::fs::read_to_string(&job_path).unwrap() + "wall_clock = \"1s\"\n";
    std::fs::write(&job_path, text).unwrap();
    let done = run_deeptime(["run", job_path.to_str().unwrap(), "--json"]);
    assert_eq!(digest_of(&done), digest_after(dir.path(), 8000));
    let generations: Vec<u64> = manifests(dir.path())
        .iter()
        .map(|path| {
            let manifest: serde_json::Value =
                serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
            manifest["generation"].as_str().unwrap().parse().unwrap()
        })
        .collect();
    // Still on the grid of `every` and the target...
    for grid in [0, 4000, 8000] {
        assert!(generations.contains(&grid), "{generations:?}");
    }
    // ...and more: the clock asked for checkpoints in between.
    assert!(generations.len() > 3, "{generations:?}");
    assert!(
        generations.windows(2).all(|w| w[0] < w[1]),
        "{generations:?}"
    );
    // A wall clock alone is enough.
    let job_path = job_of(dir.path(), 64, 100, 1, "B3/S23");
    let text = std::fs::read_to_string(&job_path)
        .unwrap()
        .replace("every = \"1\"", "wall_clock = \"1h\"");
    std::fs::write(&job_path, text).unwrap();
    store_runs_in(&job_path, "clock-only");
    let done = run_deeptime(["run", job_path.to_str().unwrap(), "--json"]);
    assert_eq!(digest_of(&done), digest_after(dir.path(), 100));
}

#[test]
fn unfinished_writes_are_ignored_by_readers_and_cleared_by_the_next_writer() {
    let dir = temp_dir();
    let job_path = job(dir.path(), 40, 20, "B3/S23");
    run_deeptime(["run", job_path.to_str().unwrap()]).assert_success();
    let runs = dir.path().join("runs");
    // What a writer killed between writing and renaming leaves.
    let left = [
        runs.join("packs/.incoming-AbC123"),
        runs.join("manifests/.incoming-xYz789"),
    ];
    for path in &left {
        std::fs::write(path, b"half written").unwrap();
    }
    run_deeptime(["verify", runs.to_str().unwrap()]).assert_success();
    let listed = run_deeptime(["checkpoints", runs.to_str().unwrap(), "--json"]);
    listed.assert_success();
    assert!(left.iter().all(|path| path.exists()), "readers leave them");
    let job_path = job(dir.path(), 60, 20, "B3/S23");
    let resumed = run_deeptime(["run", job_path.to_str().unwrap(), "--json"]);
    assert_eq!(digest_of(&resumed), digest_after(dir.path(), 60));
    for path in &left {
        assert!(!path.exists(), "{} is still there", path.display());
    }
}

#[test]
fn a_checkpoint_of_another_format_version_is_refused_in_one_line() {
    let dir = temp_dir();
    let job_path = job(dir.path(), 20, 10, "B3/S23");
    let runs = dir.path().join("runs");
    std::fs::create_dir_all(runs.join("manifests")).unwrap();
    // A version-1 manifest, as the first format wrote them.
    std::fs::write(
        runs.join("manifests/0000000001.json"),
        r#"{"format": "deeptime-checkpoint", "version": 1, "sequence": 1}"#,
    )
    .unwrap();
    for args in [
        vec!["run", job_path.to_str().unwrap()],
        vec!["snapshot", runs.to_str().unwrap(), "--gen", "0"],
        vec!["prune", runs.to_str().unwrap(), "--keep", "1"],
    ] {
        let refused = run_deeptime(&args);
        assert_eq!(refused.code, Some(2), "{}", refused.describe());
        assert!(
            refused.stderr.contains(
                "0000000001.json: checkpoint format version 1, which this build does not read (it reads version 2)"
            ),
            "{}",
            refused.describe()
        );
        assert_eq!(
            refused.stderr.trim().lines().count(),
            1,
            "{}",
            refused.describe()
        );
    }
    assert!(runs.join("manifests/0000000001.json").exists());
}
