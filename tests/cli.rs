//! The `deeptime leap` command as a user meets it: the figures it reports,
//! its output files, and a table of malformed inputs, each with the exit code
//! and the one-line message it must give — never a panic, never a hang.

use std::io::Write;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use deeptime_tests::{Run, deeptime_bin, run_deeptime, temp_dir};

/// Runs deeptime with `stdin`, killing it if it takes longer than `limit`.
fn run_bounded(args: &[&str], stdin: &[u8], limit: Duration) -> Run {
    let mut child = Command::new(deeptime_bin())
        .args(args)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("deeptime starts");
    // A child that stops reading early closes the pipe: not an error here.
    let _ = child.stdin.take().expect("piped").write_all(stdin);
    let started = Instant::now();
    while child.try_wait().expect("waiting works").is_none() {
        if started.elapsed() > limit {
            child.kill().expect("kill works");
            panic!("deeptime {args:?} hung for more than {limit:?}");
        }
        std::thread::sleep(Duration::from_millis(5));
    }
    let output = child.wait_with_output().expect("output");
    Run {
        command: format!("deeptime {}", args.join(" ")),
        code: output.status.code(),
        stdout: String::from_utf8_lossy(&output.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&output.stderr).into_owned(),
    }
}

fn json(run: &Run) -> serde_json::Value {
    run.assert_success();
    assert_eq!(
        run.stdout.lines().count(),
        1,
        "exactly one line:\n{}",
        run.describe()
    );
    serde_json::from_str(&run.stdout).unwrap_or_else(|e| panic!("{e}: {}", run.describe()))
}

const GLIDER: &str = "x = 3, y = 3, rule = B3/S23\nbob$2bo$3o!\n";

#[test]
fn reports_the_figures_as_json() {
    // LifeWiki, "Glider": period 4, displacement (1, 1).
    let dir = temp_dir();
    let path = dir.path().join("glider.rle");
    std::fs::write(&path, GLIDER).unwrap();
    let report = json(&run_deeptime([
        "leap",
        path.to_str().unwrap(),
        "--gens",
        "4*10^20",
        "--json",
    ]));
    assert_eq!(report["generation"], "400000000000000000000");
    assert_eq!(report["population"], "5");
    assert_eq!(report["rule"], "B3/S23");
    let bbox = &report["bbox"];
    assert_eq!(bbox["left"], "100000000000000000000");
    assert_eq!(bbox["top"], "100000000000000000000");
    assert_eq!(
        (bbox["width"].as_str(), bbox["height"].as_str()),
        (Some("3"), Some("3"))
    );
    let digest = report["digest"].as_str().unwrap();
    assert_eq!(digest.len(), 32);
    assert!(
        digest
            .bytes()
            .all(|b| b.is_ascii_hexdigit() && !b.is_ascii_uppercase())
    );
    assert!(report["engine"]["quads_created"].as_u64().unwrap() > 0);
}

#[test]
fn reads_standard_input_and_writes_rle_at_the_bounding_box() {
    // Common practice: a glider after 2 generations is the same 5 cells in
    // its other phase; written at its bounding box, read back, it carries on.
    let dir = temp_dir();
    let out = dir.path().join("later.rle");
    let run = run_bounded(
        &[
            "leap",
            "-",
            "--gens",
            "2",
            "--json",
            "--out",
            out.to_str().unwrap(),
        ],
        GLIDER.as_bytes(),
        Duration::from_secs(20),
    );
    let two = json(&run);
    let text = std::fs::read_to_string(&out).unwrap();
    // The box's corner in a `#position` comment, generation and digest in
    // a `#C` one, then the header.
    let digest = two["digest"].as_str().unwrap();
    assert!(
        text.starts_with(&format!(
            "#position {} {}\n#C generation 2, digest {digest}\nx = 3, y = 3, rule = B3/S23\n",
            two["bbox"]["left"].as_str().unwrap(),
            two["bbox"]["top"].as_str().unwrap()
        )),
        "{text}"
    );
    assert!(text.lines().all(|line| line.len() <= 70));
    // The written pattern, advanced 2 more, is the glider of generation 4,
    // where it stands: the position comment put it back in place.
    let four = json(&run_deeptime([
        "leap",
        out.to_str().unwrap(),
        "--gens",
        "2",
        "--json",
    ]));
    let start = json(&run_bounded(
        &["leap", "-", "--gens", "4", "--json"],
        GLIDER.as_bytes(),
        Duration::from_secs(20),
    ));
    let number = |value: &serde_json::Value| value.as_str().unwrap().parse::<i64>().unwrap();
    for axis in ["left", "top"] {
        assert_eq!(
            number(&four["bbox"][axis]),
            number(&start["bbox"][axis]),
            "{axis}"
        );
    }
    assert_eq!(four["digest"], start["digest"]);
    assert_eq!(four["population"], "5");
    assert_eq!(two["population"], "5");
}

#[test]
fn the_readme_demo_runs() {
    // The lighthouse's gun adds one 5-cell glider per 30 generations
    // (LifeWiki, "Gosper glider gun"); the 24 other cells are blinkers and
    // blocks that never change population: 59 + 5k at generation 30k.
    let demo = concat!(env!("CARGO_MANIFEST_DIR"), "/../demo-jobs/lighthouse.rle");
    let report = json(&run_deeptime([
        "leap",
        demo,
        "--gens",
        "30*10^100",
        "--json",
    ]));
    let expected = format!("5{}59", "0".repeat(98));
    assert_eq!(report["population"], expected.as_str());
    let human = run_deeptime(["leap", demo, "--gens", "3000"]);
    human.assert_success();
    assert!(
        human.stdout.contains("population    559"),
        "{}",
        human.describe()
    );
}

#[test]
fn a_state_too_large_for_text_is_refused_and_the_old_file_kept() {
    let dir = temp_dir();
    let pattern = dir.path().join("square.rle");
    std::fs::write(&pattern, "x = 1, y = 1\no!").unwrap();
    let out = dir.path().join("result.rle");
    std::fs::write(&out, "precious").unwrap();
    // Under B12345678/S012345678 the cell becomes a square 2·10^30+1 wide.
    let run = run_deeptime([
        "leap",
        pattern.to_str().unwrap(),
        "--rule",
        "B12345678/S012345678",
        "--gens",
        "10^30",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(run.code, Some(1), "{}", run.describe());
    assert!(
        run.stderr.contains("too large to write as text"),
        "{}",
        run.describe()
    );
    assert_eq!(std::fs::read_to_string(&out).unwrap(), "precious");
}

#[test]
fn a_budget_too_small_is_its_own_exit_code() {
    let dir = temp_dir();
    let path = dir.path().join("soup.rle");
    // A 2048×2048 random soup: its own quads alone take more than 1 MiB.
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let mut rows = Vec::new();
    for _ in 0..2048 {
        let mut row = String::new();
        for _ in 0..2048 {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            row.push(if state % 8 < 3 { 'o' } else { 'b' });
        }
        rows.push(row);
    }
    std::fs::write(&path, format!("x = 2048, y = 2048\n{}!", rows.join("$"))).unwrap();
    let run = run_deeptime([
        "leap",
        path.to_str().unwrap(),
        "--gens",
        "1000",
        "--memory",
        "1MiB",
    ]);
    assert_eq!(run.code, Some(3), "{}", run.describe());
    let message = run.stderr.trim();
    assert_eq!(message.lines().count(), 1, "{message}");
    assert!(
        message.contains("memory budget of 1.0 MiB is too small"),
        "{message}"
    );
    assert!(message.contains("--memory"), "{message}");
}

/// Malformed inputs: (pattern bytes, extra arguments, exit code, expected
/// message with FILE standing for the pattern's path).
const MALFORMED: &[(&[u8], &[&str], i32, &str)] = &[
    (
        b"",
        &[],
        2,
        "FILE:1:1: empty pattern: no cells and no header",
    ),
    (
        b"\n\n   \n#C only a comment\n",
        &[],
        2,
        "FILE:1:1: empty pattern: no cells and no header",
    ),
    (
        b"\xff\xfe\x00garbage",
        &[],
        2,
        "FILE:1:1: unexpected byte 0xff",
    ),
    (
        b"x = 3, y = 3\n\x01o!",
        &[],
        2,
        "FILE:2:1: unexpected byte 0x01",
    ),
    (
        b"x = 3, y = 3\n99999999999999999999999o!",
        &[],
        2,
        "FILE:2:1: run count 99999999999999999999999 is too large",
    ),
    (
        b"x = 999999999999999999999, y = 1\no!",
        &[],
        2,
        "FILE:1:5: header value x = 999999999999999999999 is too large",
    ),
    (
        b"x = 1, y = 1\no",
        &[],
        2,
        "FILE:2:2: pattern ends without '!'",
    ),
    (b"x = 3, y = 1\r\n3q!", &[], 2, "FILE:2:2: unexpected 'q'"),
    (
        b"x = 3, y = 1, z = 4\n3o!",
        &[],
        2,
        "FILE:1:15: unknown header key 'z'",
    ),
    (
        b"x = 1, y = 1\n4294967297o!",
        &[],
        2,
        "FILE:2:1: pattern has more than 4294967296 live cells",
    ),
    (
        b"x = 1, y = 1\n1099511627777bo!",
        &[],
        2,
        "FILE:2:1: pattern is wider than 1099511627776 columns",
    ),
    (
        b"x = 1, y = 1\n12",
        &[],
        2,
        "FILE:2:1: run count 12 is not followed by 'b', 'o' or '$'",
    ),
    (
        b"x = 3, y = 3, rule = B3/S2x\nbo!",
        &[],
        2,
        "FILE:1:27: unexpected 'x' at position 6 in rule \"B3/S2x\"",
    ),
    (
        b"!a comment\n.O.\n.X.\n",
        &[],
        2,
        "FILE:3:2: unexpected 'X'",
    ),
    (
        b"#C a state written by a B0 rule\n#background alive: every cell not written is alive\nx = 1, y = 1\no!",
        &["--rule", "B03/S23"],
        2,
        "FILE:2:1: the text holds the dead cells of a state whose background is alive (a B0 rule's); a pattern starts on a dead background: resume the run from its checkpoint instead",
    ),
    (
        b"x = 1, y = 1\no!",
        &["--rule", "B3/S239"],
        2,
        "--rule: digit 9 at position 7 in rule \"B3/S239\": a cell has at most 8 neighbours",
    ),
    (
        b"x = 1, y = 1\no!",
        &["--gens", "-5"],
        2,
        "--gens: generation \"-5\" is negative",
    ),
    (
        b"x = 1, y = 1\no!",
        &["--gens", "10^99999999999"],
        2,
        "--gens: generation 10^99999999999 is too large (more than 1000000 bits)",
    ),
    (
        b"x = 1, y = 1\no!",
        &["--memory", "1KiB"],
        2,
        "--memory 1KiB is below the smallest budget of 1 MiB",
    ),
    (
        b"x = 1, y = 1\no!",
        &["--out", "picture.gif"],
        2,
        "--out picture.gif: write .rle or .png",
    ),
];

#[test]
fn malformed_input_gets_a_one_line_error_and_exit_code() {
    // Common practice for command-line tools: a non-zero exit code and one
    // line that says what is wrong and where; never a panic or a hang.
    let dir = temp_dir();
    for (at, (bytes, extra, code, message)) in MALFORMED.iter().enumerate() {
        let path = dir.path().join(format!("case{at}.rle"));
        std::fs::write(&path, bytes).unwrap();
        let path = path.to_str().unwrap();
        let mut args = vec!["leap", path];
        if !extra.contains(&"--gens") {
            args.extend(["--gens", "8"]);
        }
        args.extend(extra.iter());
        let run = run_bounded(&args, b"", Duration::from_secs(20));
        assert_eq!(run.code, Some(*code), "case {at}:\n{}", run.describe());
        assert_eq!(
            run.stderr,
            format!("deeptime: {}\n", message.replace("FILE", path)),
            "case {at}"
        );
        assert!(run.stdout.is_empty(), "case {at}:\n{}", run.describe());
    }
}

#[test]
fn a_missing_file_and_bad_usage_are_bad_input() {
    let run = run_deeptime(["leap", "/nonexistent/pattern.rle", "--gens", "1"]);
    assert_eq!(run.code, Some(2), "{}", run.describe());
    assert!(
        run.stderr
            .starts_with("deeptime: /nonexistent/pattern.rle: cannot read the pattern")
    );
    let run = run_deeptime(["leap", "x.rle"]);
    assert_eq!(run.code, Some(2), "{}", run.describe());
    assert!(run.stderr.contains("--gens"), "{}", run.describe());
}

#[test]
fn a_token_file_that_is_missing_or_too_short_is_bad_input() {
    // README: exit code 2 for input the user must fix.
    let dir = temp_dir();
    let missing = dir.path().join("missing.token");
    let short = dir.path().join("short.token");
    std::fs::write(&short, "tooshort\n").unwrap();
    let job = dir.path().join("job.toml");
    std::fs::write(dir.path().join("glider.rle"), "x = 3, y = 3\nbo$2bo$3o!\n").unwrap();
    std::fs::write(
        &job,
        "version = 1\nname = \"glider\"\npattern = \"glider.rle\"\ntarget = \"8\"\n\n\
         [checkpoint]\ndir = \"runs\"\nevery = \"8\"\n",
    )
    .unwrap();
    let cases: Vec<Vec<&str>> = vec![
        vec![
            "status",
            "--coordinator",
            "http://127.0.0.1:9",
            "--token-file",
        ],
        vec![
            "node",
            "--join",
            "http://127.0.0.1:9",
            "--listen",
            "127.0.0.1:0",
            "--token-file",
        ],
        vec![
            "coordinator",
            job.to_str().unwrap(),
            "--listen",
            "127.0.0.1:0",
            "--token-file",
        ],
    ];
    for case in &cases {
        for (token, says) in [
            (&missing, "cannot read the token file"),
            (&short, "at least 16"),
        ] {
            // A coordinator makes its token file when there is none.
            if case[0] == "coordinator" && token == &missing {
                continue;
            }
            let mut args = case.clone();
            args.push(token.to_str().unwrap());
            let run = run_bounded(&args, b"", Duration::from_secs(30));
            assert_eq!(run.code, Some(2), "{args:?}: {}", run.describe());
            assert!(run.stderr.contains(says), "{args:?}: {}", run.describe());
        }
    }
}

#[test]
fn a_far_generation_reads_the_same_short_way_in_the_summary_and_whole_in_json() {
    // 5·10^100 + 59: the summary keeps the low digits that tell it from
    // 5·10^100 + 60 (common practice for such forms); JSON is exact.
    let dir = temp_dir();
    let glider = dir.path().join("glider.rle");
    std::fs::write(&glider, "x = 3, y = 3\nbo$2bo$3o!\n").unwrap();
    let far = format!("5{}59", "0".repeat(98));
    let human = run_deeptime(["leap", glider.to_str().unwrap(), "--gens", &far]);
    human.assert_success();
    assert!(
        human.stdout.contains("generation    5×10^100 + 59\n"),
        "{}",
        human.stdout
    );
    assert!(
        human.stdout.contains("population    5\n"),
        "{}",
        human.stdout
    );
    let json = run_deeptime(["leap", glider.to_str().unwrap(), "--gens", &far, "--json"]);
    json.assert_success();
    let report: serde_json::Value = serde_json::from_str(&json.stdout).unwrap();
    assert_eq!(report["generation"], far.as_str());
}

/// `deeptime leap` with `DEEPTIME_KERNEL` set to `kernel`.
fn leap_on_kernel(kernel: &str, args: &[&str]) -> Run {
    deeptime_tests::run_program_with_env(
        &deeptime_bin(),
        &[("DEEPTIME_KERNEL", kernel)],
        std::iter::once("leap").chain(args.iter().copied()),
    )
}

#[test]
fn every_kernel_path_this_processor_runs_reaches_the_same_state() {
    // Common practice: the narrower paths (DEVELOPERS, "Measuring one
    // path") must agree with the widest, which tests/reference.rs checks
    // against the independent reference. A path wider than the processor
    // has is refused, not run.
    let dir = temp_dir();
    let path = dir.path().join("soup.rle");
    std::fs::write(&path, deeptime_tests::soup(200, 0x5eed_1234)).unwrap();
    let path = path.to_str().unwrap();
    for rule in ["B3/S23", "B3/S2-i34q", "B36-k/S23", "B02a3-k/S2-i3"] {
        let args = ["--rule", rule, "--gens", "1000", "--json", path];
        let widest = json(&run_deeptime(std::iter::once("leap").chain(args)));
        for kernel in ["portable", "avx2", "avx512"] {
            let run = leap_on_kernel(kernel, &args);
            // Every processor runs the portable path.
            if kernel != "portable"
                && run.code == Some(2)
                && run.stderr.contains("this processor's widest is")
            {
                continue;
            }
            let report = json(&run);
            assert_eq!(report["digest"], widest["digest"], "{rule} on {kernel}");
            assert_eq!(
                report["population"], widest["population"],
                "{rule} on {kernel}"
            );
        }
    }
}

#[test]
fn an_unknown_kernel_path_is_bad_input() {
    let run = leap_on_kernel("avx9", &["/nonexistent.rle", "--gens", "1"]);
    assert_eq!(run.code, Some(2), "{}", run.describe());
    assert_eq!(
        run.stderr.trim(),
        "deeptime: DEEPTIME_KERNEL=avx9: not an instruction set (portable, avx2 or avx512)"
    );
}
