//! Integration tests of shards, merging and checkpoints through the `lossprism` binary: merged
//! shards and resumed runs are byte-identical to the plain run, every merge refusal exits 2 with a
//! one-line message naming the files, bad `--shard` values are usage errors, and the block
//! accumulators' size does not depend on the number of replicates.

use std::fs;
use std::path::Path;
use std::process::Output;

mod common;
use common::*;

use serde_json::Value;

/// A small squared-loss scenario (invented: a smooth 1-D curve with Gaussian noise), 14 blocks of
/// two replicates each.
const SMALL: &str = r#"name = "shard-probe"
about = "Invented: a smooth curve with noise, for shard tests."
seed = 3
replicates = 28
blocks = 14

[data]
source = "synthetic"
train_size = 40
eval_size = 25

[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]

[data.truth]
formula = "sin(3*x)"

[data.noise]
sd = 0.5

[model]
family = "tree"
grid = [1, 2, 3, 4]
"#;

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// Runs and asserts success.
fn ok(cwd: &Path, args: &[&str]) -> Output {
    let o = lossprism(cwd, args);
    assert_eq!(o.status.code(), Some(0), "{args:?}: {}", stderr(&o));
    o
}

/// Runs and asserts exit 2 with a one-line error message; returns the message.
fn refused(cwd: &Path, args: &[&str]) -> String {
    let o = lossprism(cwd, args);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "{args:?}: {err}");
    let line = err.trim_end();
    assert!(!line.contains('\n'), "{args:?}: not one line: {err}");
    assert!(line.starts_with("error: "), "{args:?}: {err}");
    line.to_string()
}

fn read(dir: &Path, f: &str) -> String {
    fs::read_to_string(dir.join(f)).unwrap_or_else(|e| panic!("{f}: {e}"))
}

/// The 0-1 loss scenario shipped in `scenarios/`, with 14 blocks (R comes from `--replicates`).
fn packing_line(dir: &Path) -> &'static str {
    let src = fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/packing-line-tree.toml"),
    )
    .expect("shipped scenario");
    assert!(src.contains("\nreplicates = "));
    let src = src.replacen("\nreplicates = ", "\nblocks = 14\nreplicates = ", 1);
    fs::write(dir.join("packing.toml"), src).unwrap();
    "packing.toml"
}

/// Runs `args` (a `run` command writing `out`) with `--checkpoint ck.json`, stops it after 5
/// blocks (exit 3), runs it again to resume from the checkpoint, and returns `out`'s text.
fn stop_and_resume(dir: &Path, args: &[&str], out: &str) -> String {
    let _ = fs::remove_file(dir.join("ck.json"));
    let mut base = args.to_vec();
    base.extend_from_slice(&["--checkpoint", "ck.json"]);
    let mut stop = base.clone();
    stop.extend_from_slice(&["--stop-after-blocks", "5"]);
    assert_eq!(
        lossprism(dir, &stop).status.code(),
        Some(3),
        "{args:?}: stop"
    );
    ok(dir, &base);
    read(dir, out)
}

/// Runs every shard of an `n`-way split (extra args appended) and merges them; returns the
/// merged JSON text.
fn shard_and_merge(dir: &Path, scenario: &str, extra: &[&str], n: u64) -> String {
    let mut parts = Vec::new();
    for i in 1..=n {
        let part = format!("part-{n}-{i}.json");
        let spec = format!("{i}/{n}");
        let mut args = vec!["run", scenario, "--shard", &spec, "--out", &part];
        args.extend_from_slice(extra);
        ok(dir, &args);
        parts.push(part);
    }
    let out = format!("merged-{n}.json");
    let mut args = vec!["merge"];
    args.extend(parts.iter().map(String::as_str));
    args.extend_from_slice(&["--out", &out, "--quiet"]);
    ok(dir, &args);
    read(dir, &out)
}

/// The noise line of [`SMALL`], which a hand edit changes.
const SMALL_NOISE: &str = "sd = 0.5";

/// An edited part document with its checksum recomputed, as the program computes it.
fn reseal(v: &Value) -> String {
    let mut doc: lossprism::report::part::PartDoc =
        serde_json::from_value(v.clone()).expect("still a part document");
    doc.checksum = lossprism::shard::checksum(&doc);
    lossprism::shard::part_json(&doc)
}

#[test]
fn merged_shards_are_byte_identical_to_the_unsharded_run_squared_loss() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    fs::write(d.join("s.toml"), SMALL).unwrap();
    ok(d, &["run", "s.toml", "--out", "full.json", "--quiet"]);
    let full = read(d, "full.json");
    for n in [1, 3, 7] {
        assert_eq!(shard_and_merge(d, "s.toml", &[], n), full, "{n} shards");
    }
    // parts given in any order, and CSV from merge equals CSV from run
    ok(d, &["run", "s.toml", "--csv", "full.csv", "--quiet"]);
    ok(
        d,
        &[
            "merge",
            "part-3-3.json",
            "part-3-1.json",
            "part-3-2.json",
            "--csv",
            "m.csv",
            "--quiet",
        ],
    );
    assert_eq!(read(d, "m.csv"), read(d, "full.csv"));
    // the merge prints the same table as the run
    let run_table = ok(d, &["run", "s.toml"]).stdout;
    let merge_table = ok(d, &["merge", "part-1-1.json"]).stdout;
    assert_eq!(run_table, merge_table);
}

#[test]
fn merged_shards_are_byte_identical_to_the_unsharded_run_zero_one_loss() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let s = packing_line(d);
    let r = ["--replicates", "28"];
    ok(
        d,
        &["run", s, "--replicates", "28", "--out", "full.json", "-q"],
    );
    let full = read(d, "full.json");
    let v: Value = serde_json::from_str(&full).unwrap();
    assert_eq!(v["loss"], "zero_one");
    assert_eq!(v["replicates"], 28);
    assert_eq!(v["scenario"]["blocks"], 14);
    for n in [1, 3, 7] {
        assert_eq!(shard_and_merge(d, s, &r, n), full, "{n} shards");
    }
}

#[test]
fn percentile_intervals_are_identical_across_threads_shards_merge_and_resume() {
    // The 95 % bootstrap percentile intervals (`interval95`, the CSV's lower95_/upper95_
    // columns) come from the same block-bootstrap draws as the standard errors: one and two
    // threads, a 3-way shard split merged, and a run stopped and resumed from a checkpoint give
    // the same intervals bit for bit (and the same documents byte for byte).
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let s = packing_line(d);
    let r = ["--replicates", "28"];
    let run = |threads: &str, out: &str, csv: &str| {
        ok(
            d,
            &[
                "run",
                s,
                "--replicates",
                "28",
                "--threads",
                threads,
                "--out",
                out,
                "--csv",
                csv,
                "-q",
            ],
        );
        read(d, out)
    };
    let one = run("1", "one.json", "one.csv");
    let two = run("2", "two.json", "two.csv");
    let merged = shard_and_merge(d, s, &r, 3);
    ok(
        d,
        &[
            "merge",
            "part-3-1.json",
            "part-3-2.json",
            "part-3-3.json",
            "--csv",
            "merged.csv",
            "-q",
        ],
    );
    let resumed = stop_and_resume(
        d,
        &[
            "run",
            s,
            "--replicates",
            "28",
            "--out",
            "resumed.json",
            "-q",
        ],
        "resumed.json",
    );

    let intervals = |text: &str| -> Vec<Value> {
        let v: Value = serde_json::from_str(text).unwrap();
        v["points"]
            .as_array()
            .unwrap()
            .iter()
            .map(|p| p["interval95"].clone())
            .collect()
    };
    let want = intervals(&one);
    // exactly the bootstrap terms, each a finite [lower, upper] with lower ≤ upper
    let v: Value = serde_json::from_str(&one).unwrap();
    let boot: Vec<String> = v["terms"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|t| t["bootstrap"] == true)
        .map(|t| t["key"].as_str().unwrap().to_string())
        .collect();
    assert_eq!(boot.len(), 7, "{boot:?}");
    for iv in &want {
        let mut found = 0;
        for key in &boot {
            let leaf = key.split('.').fold(iv, |o, k| &o[k]);
            let b = leaf.as_array().unwrap_or_else(|| panic!("{key}: {leaf}"));
            let (lo, hi) = (b[0].as_f64().unwrap(), b[1].as_f64().unwrap());
            assert!(
                lo.is_finite() && hi.is_finite() && lo <= hi,
                "{key}: {leaf}"
            );
            found += 1;
        }
        let leaves = iv
            .as_object()
            .unwrap()
            .values()
            .fold(0, |n, x| n + x.as_object().map_or(1, serde_json::Map::len));
        assert_eq!(found, leaves, "only bootstrap terms: {iv}");
    }
    for (name, text) in [
        ("2 threads", &two),
        ("3 shards merged", &merged),
        ("resumed", &resumed),
    ] {
        assert_eq!(intervals(text), want, "{name}");
        assert_eq!(text, &one, "{name}: the whole document");
    }
    // the CSV's interval columns agree too
    assert!(read(d, "one.csv").contains(",lower95_bias,upper95_bias,"));
    assert_eq!(read(d, "two.csv"), read(d, "one.csv"));
    assert_eq!(read(d, "merged.csv"), read(d, "one.csv"));
}

#[test]
fn merge_refuses_parts_that_do_not_make_one_run() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    fs::write(d.join("s.toml"), SMALL).unwrap();
    fs::write(
        d.join("other.toml"),
        SMALL.replace("grid = [1, 2, 3, 4]", "grid = [1, 2, 3, 5]"),
    )
    .unwrap();
    for i in 1..=3 {
        let (spec, out) = (format!("{i}/3"), format!("p{i}.json"));
        ok(d, &["run", "s.toml", "--shard", &spec, "--out", &out]);
    }
    ok(
        d,
        &[
            "run",
            "s.toml",
            "--shard",
            "2/3",
            "--seed",
            "9",
            "--out",
            "seed9.json",
        ],
    );
    ok(
        d,
        &["run", "other.toml", "--shard", "2/3", "--out", "other.json"],
    );
    ok(
        d,
        &["run", "s.toml", "--shard", "2/7", "--out", "seven.json"],
    );
    ok(d, &["run", "s.toml", "--checkpoint", "ck.json", "-q"]);

    let msg = refused(d, &["merge", "p1.json", "seed9.json", "p3.json"]);
    assert!(
        msg.contains("p1.json") && msg.contains("seed9.json"),
        "{msg}"
    );
    assert!(msg.contains("seed 3 vs 9"), "{msg}");

    let msg = refused(d, &["merge", "p1.json", "other.json", "p3.json"]);
    assert!(
        msg.contains("other.json") && msg.contains("grid [1, 2, 3, 4] vs [1, 2, 3, 5]"),
        "{msg}"
    );

    let msg = refused(d, &["merge", "p1.json", "seven.json", "p3.json"]);
    assert!(
        msg.contains("shard 1/3") && msg.contains("seven.json is shard 2/7"),
        "{msg}"
    );

    let msg = refused(d, &["merge", "p1.json", "p3.json"]);
    assert!(msg.contains("block 4") && msg.contains("missing"), "{msg}");
    assert!(msg.contains("shard 2/3"), "{msg}");

    let msg = refused(d, &["merge", "p1.json", "p2.json", "p2.json", "p3.json"]);
    assert!(
        msg.contains("p2.json and p2.json are both shard 2/3 (duplicated part)"),
        "{msg}"
    );
    fs::copy(d.join("p2.json"), d.join("copy.json")).unwrap();
    let msg = refused(d, &["merge", "p1.json", "p2.json", "copy.json", "p3.json"]);
    assert!(
        msg.contains("duplicated part") && msg.contains("copy.json"),
        "{msg}"
    );

    let msg = refused(d, &["merge", "ck.json"]);
    assert!(msg.contains("ck.json is a checkpoint"), "{msg}");

    // Sweep 69: a part whose embedded scenario was edited (checksum resealed) merged when it
    // was not the first part; it is refused in any position.
    let mut v: Value = serde_json::from_str(&read(d, "p3.json")).unwrap();
    let text = v["scenario_text"].as_str().unwrap().to_string();
    assert!(text.contains(SMALL_NOISE), "fixture: no `{SMALL_NOISE}`");
    v["scenario_text"] = Value::from(text.replace(SMALL_NOISE, "sd = 0.9"));
    fs::write(d.join("text.json"), reseal(&v)).unwrap();
    for order in [
        ["p1.json", "p2.json", "text.json"],
        ["text.json", "p1.json", "p2.json"],
    ] {
        let mut args = vec!["merge"];
        args.extend(order);
        let msg = refused(d, &args);
        assert!(
            msg.contains("text.json") && msg.contains("fingerprint does not match"),
            "{order:?}: {msg}"
        );
    }
    // A comment edited between shards changes no number: that part still merges.
    let mut v: Value = serde_json::from_str(&read(d, "p3.json")).unwrap();
    let text = v["scenario_text"].as_str().unwrap().to_string();
    v["scenario_text"] = Value::from(format!("# a comment added later\n{text}"));
    fs::write(d.join("comment.json"), reseal(&v)).unwrap();
    ok(
        d,
        &[
            "merge",
            "p1.json",
            "p2.json",
            "comment.json",
            "--out",
            "c.json",
        ],
    );

    // an edited part is refused by its checksum, naming the file
    let mut v: Value = serde_json::from_str(&read(d, "p2.json")).unwrap();
    v["completed"].as_array_mut().unwrap().remove(1);
    fs::write(d.join("edited.json"), v.to_string()).unwrap();
    let msg = refused(d, &["merge", "p1.json", "edited.json", "p3.json"]);
    assert!(
        msg.contains("edited.json") && msg.contains("checksum"),
        "{msg}"
    );

    // a part with a block removed by hand (checksum resealed): the merge names the block and
    // the file
    fs::write(d.join("cut.json"), reseal(&v)).unwrap();
    let msg = refused(d, &["merge", "p1.json", "cut.json", "p3.json"]);
    assert!(
        msg.contains("block 5") && msg.contains("cut.json (shard 2/3) lacks it"),
        "{msg}"
    );

    // a part with a block listed twice
    let mut v: Value = serde_json::from_str(&read(d, "p2.json")).unwrap();
    let first = v["completed"][0].clone();
    v["completed"].as_array_mut().unwrap().push(first);
    fs::write(d.join("twice.json"), reseal(&v)).unwrap();
    let msg = refused(d, &["merge", "p1.json", "twice.json", "p3.json"]);
    assert!(msg.contains("twice.json holds block 4 twice"), "{msg}");

    // a tampered accumulator (replicate count) and a non-part file
    let mut v: Value = serde_json::from_str(&read(d, "p2.json")).unwrap();
    v["completed"][0]["models"][0]["replicates"] = Value::from(3);
    fs::write(d.join("bad.json"), reseal(&v)).unwrap();
    let msg = refused(d, &["merge", "p1.json", "bad.json", "p3.json"]);
    assert!(msg.contains("bad.json: block 4"), "{msg}");
    ok(d, &["run", "s.toml", "--out", "result.json", "-q"]);
    let msg = refused(d, &["merge", "result.json"]);
    assert!(
        msg.contains("result.json") && msg.contains("lossprism-result/2"),
        "{msg}"
    );
}

#[test]
fn bad_shard_flags_are_usage_errors_naming_the_flag() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    fs::write(d.join("s.toml"), SMALL).unwrap();
    for bad in ["3", "0/3", "4/3", "a/b"] {
        let o = lossprism(d, &["run", "s.toml", "--shard", bad, "--out", "p.json"]);
        assert_eq!(o.status.code(), Some(2), "{bad}");
        let err = stderr(&o);
        assert!(err.contains("--shard") && err.contains(bad), "{bad}: {err}");
    }
    let o = lossprism(d, &["run", "s.toml", "--shard", "1/3"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("--out"), "{}", stderr(&o));
    // more shards than blocks (14)
    let msg = refused(d, &["run", "s.toml", "--shard", "1/15", "--out", "p.json"]);
    assert!(
        msg.contains("--shard 1/15") && msg.contains("`blocks`"),
        "{msg}"
    );
    assert!(!d.join("p.json").exists());
}

/// A run of a few seconds (k-NN, 12 000 replicates in 100 blocks), for signals.
fn slow_scenario() -> String {
    SMALL
        .replace(
            "replicates = 28\nblocks = 14",
            "replicates = 12000\nblocks = 100",
        )
        .replace(
            "train_size = 40\neval_size = 25",
            "train_size = 400\neval_size = 400",
        )
        .replace(
            "family = \"tree\"\ngrid = [1, 2, 3, 4]",
            "family = \"knn\"\ngrid = [1, 2, 3, 5, 8, 13, 21]",
        )
}

/// The checkpointed run the signal and staging tests use.
const CHECKPOINTED: [&str; 7] = [
    "run",
    "s.toml",
    "--checkpoint",
    "ck.json",
    "--out",
    "r.json",
    "-q",
];

/// Runs `scenario` in `d` as [`CHECKPOINTED`] through `sh -c "{shell} exec ..."`, sends
/// `signal` `times` times once its checkpoint exists, and returns how it ended.
#[cfg(unix)]
fn signalled_times(
    d: &Path,
    scenario: &str,
    shell: &str,
    signal: &str,
    times: usize,
) -> std::process::Output {
    fs::write(d.join("s.toml"), scenario).unwrap();
    let child = std::process::Command::new("sh")
        .current_dir(d)
        .args(["-c", &format!("{shell} exec \"$0\" \"$@\"")])
        .arg(env!("CARGO_BIN_EXE_lossprism"))
        .args(CHECKPOINTED)
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let waited = std::time::Instant::now();
    while !d.join("ck.json").exists() && waited.elapsed().as_secs() < 60 {
        std::thread::sleep(std::time::Duration::from_millis(5));
    }
    for i in 0..times {
        if i > 0 {
            // Two signals of one kind sent together may arrive as one (they are not queued).
            std::thread::sleep(std::time::Duration::from_millis(50));
        }
        let status = std::process::Command::new("kill")
            .args([signal, &child.id().to_string()])
            .status()
            .unwrap();
        assert!(status.success());
    }
    child.wait_with_output().unwrap()
}

/// [`signalled_times`] on [`slow_scenario`], once.
#[cfg(unix)]
fn signalled(d: &Path, shell: &str, signal: &str) -> std::process::Output {
    signalled_times(d, &slow_scenario(), shell, signal, 1)
}

/// Two signals: the second stops the run at once, and says that the checkpoint, not the
/// outputs, holds the finished blocks (sweep 69: a checkpoint's rewrite counted as "the outputs
/// were written" with no `--out` file).
#[cfg(unix)]
#[test]
fn a_second_signal_says_the_checkpoint_holds_the_blocks_not_the_outputs() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // Blocks of 2000 replicates, so that the blocks in flight outlast the second signal.
    let slow = slow_scenario();
    assert!(slow.contains("blocks = 100"));
    let out = signalled_times(
        d,
        &slow.replace("blocks = 100", "blocks = 6"),
        "",
        "-TERM",
        2,
    );
    let err = stderr(&out);
    if out.status.code() == Some(0) || !err.contains("interrupted twice") {
        // The run (or its first stop) ended before the second signal arrived.
        println!("the second signal came too late to test: {err}");
        return;
    }
    assert!(
        err.contains("interrupted twice: stopping now; the finished blocks are saved in ck.json"),
        "{err}"
    );
    assert!(!d.join("r.json").exists());
}

/// A SIGHUP ignored at start (`nohup`) stays ignored: the handler that stops a run on SIGTERM
/// also takes SIGHUP, and a `nohup` run was stopped, nothing written, when its terminal closed.
#[cfg(unix)]
#[test]
fn a_run_started_with_hangups_ignored_ignores_them() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let out = signalled(d, "trap '' HUP;", "-HUP");
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    assert!(d.join("r.json").exists());
}

/// SIGTERM (what Slurm, `timeout` and service managers send) stops a run as Ctrl-C does: the
/// blocks in flight finish, the checkpoint keeps every finished block, and resuming gives the
/// uninterrupted result. Before, the process died at once with no word, and a staging file
/// could be left beside the checkpoint.
#[cfg(unix)]
#[test]
fn a_terminated_run_keeps_its_checkpoint_and_resumes_to_the_same_result() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let out = signalled(d, "", "-TERM");
    let err = stderr(&out);
    if out.status.code() == Some(0) {
        // The run finished before the signal arrived (a very fast machine): nothing to test.
        println!("the run ended before SIGTERM");
        return;
    }
    assert_eq!(out.status.code(), Some(130), "{err}");
    assert!(err.contains("interrupt"), "{err}");
    assert!(!d.join("r.json").exists());
    let ck: Value = serde_json::from_str(&read(d, "ck.json")).unwrap();
    let kept = ck["completed"].as_array().unwrap().len();
    assert!((1..100).contains(&kept), "{kept} blocks kept");
    let staged: Vec<_> = fs::read_dir(d)
        .unwrap()
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".tmp"))
        .collect();
    assert!(staged.is_empty(), "{staged:?}");
    ok(d, &CHECKPOINTED);
    ok(d, &["run", "s.toml", "--out", "full.json", "-q"]);
    assert_eq!(read(d, "r.json"), read(d, "full.json"));
}

/// Staged copies left beside a checkpoint by a killed process are removed when a run uses the
/// checkpoint again; those of a running process and backups are kept.
#[cfg(target_os = "linux")]
#[test]
fn a_killed_writers_staged_copies_are_removed_and_nothing_else() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    fs::write(d.join("s.toml"), SMALL).unwrap();
    // 4294967 is above Linux's largest process id (pid_max is at most 2^22).
    let stale = ".ck.json.4294967.12.tmp";
    let live = format!(".ck.json.{}.3.tmp", std::process::id());
    let backup = ".ck.json.4294967.4.bak";
    let other = ".other.json.4294967.1.tmp";
    for f in [stale, live.as_str(), backup, other] {
        fs::write(d.join(f), "partial").unwrap();
    }
    ok(d, &CHECKPOINTED);
    assert!(!d.join(stale).exists());
    for f in [live.as_str(), backup, other] {
        assert!(d.join(f).exists(), "{f} was removed");
    }
}

#[test]
fn an_interrupted_run_resumes_to_the_uninterrupted_result() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    fs::write(d.join("s.toml"), SMALL).unwrap();
    ok(d, &["run", "s.toml", "--out", "full.json", "-q"]);
    let base = [
        "run",
        "s.toml",
        "--threads",
        "2",
        "--checkpoint",
        "ck.json",
        "--out",
        "r.json",
        "-q",
    ];

    let mut stop = base.to_vec();
    stop.extend_from_slice(&["--stop-after-blocks", "3"]);
    let o = lossprism(d, &stop);
    assert_eq!(o.status.code(), Some(3), "{}", stderr(&o));
    assert!(stderr(&o).contains("stopped"), "{}", stderr(&o));
    assert!(!d.join("r.json").exists());
    let ck: Value = serde_json::from_str(&read(d, "ck.json")).unwrap();
    assert_eq!(ck["checkpoint"], true);
    assert_eq!(ck["completed"].as_array().unwrap().len(), 3);

    // a second interruption adds four more blocks to the same checkpoint
    let mut stop = base.to_vec();
    stop.extend_from_slice(&["--stop-after-blocks", "4"]);
    assert_eq!(lossprism(d, &stop).status.code(), Some(3));
    let ck: Value = serde_json::from_str(&read(d, "ck.json")).unwrap();
    assert_eq!(ck["completed"].as_array().unwrap().len(), 7);

    ok(d, &base);
    assert_eq!(read(d, "r.json"), read(d, "full.json"));
    let ck: Value = serde_json::from_str(&read(d, "ck.json")).unwrap();
    assert_eq!(ck["completed"].as_array().unwrap().len(), 14);
    // rerunning a finished checkpoint recomputes nothing and gives the same result
    ok(d, &base);
    assert_eq!(read(d, "r.json"), read(d, "full.json"));

    // a checkpointed shard, interrupted and resumed, writes the same part as a plain shard
    ok(
        d,
        &["run", "s.toml", "--shard", "2/3", "--out", "plain.json"],
    );
    let shard = [
        "run",
        "s.toml",
        "--shard",
        "2/3",
        "--checkpoint",
        "ck2.json",
        "--out",
        "resumed.json",
    ];
    let mut stop = shard.to_vec();
    stop.extend_from_slice(&["--stop-after-blocks", "2"]);
    assert_eq!(lossprism(d, &stop).status.code(), Some(3));
    ok(d, &shard);
    assert_eq!(read(d, "resumed.json"), read(d, "plain.json"));
    // the checkpoint belongs to shard 2/3, not to shard 1/3
    let msg = refused(
        d,
        &[
            "run",
            "s.toml",
            "--shard",
            "1/3",
            "--checkpoint",
            "ck2.json",
            "--out",
            "x.json",
        ],
    );
    assert!(
        msg.contains("shard 2/3") && msg.contains("shard 1/3"),
        "{msg}"
    );
}

#[test]
fn a_stale_checkpoint_from_another_seed_is_refused_and_left_alone() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    fs::write(d.join("s.toml"), SMALL).unwrap();
    let o = lossprism(
        d,
        &[
            "run",
            "s.toml",
            "--checkpoint",
            "ck.json",
            "--stop-after-blocks",
            "2",
            "-q",
        ],
    );
    assert_eq!(o.status.code(), Some(3));
    let before = read(d, "ck.json");
    let msg = refused(
        d,
        &[
            "run",
            "s.toml",
            "--seed",
            "4",
            "--checkpoint",
            "ck.json",
            "-q",
        ],
    );
    assert!(
        msg.contains("checkpoint ck.json belongs to another run")
            && msg.contains("seed 3 vs 4")
            && msg.contains("delete it or choose another file"),
        "{msg}"
    );
    assert_eq!(read(d, "ck.json"), before);
    // a file that is not a checkpoint at all
    fs::write(d.join("junk.json"), "{\"hello\": 1}").unwrap();
    let msg = refused(d, &["run", "s.toml", "--checkpoint", "junk.json", "-q"]);
    // lossprism never tells the user to delete a file that is not its checkpoint.
    assert!(
        msg.contains("junk.json")
            && msg.contains("not a checkpoint, so lossprism leaves it alone")
            && !msg.contains("delete"),
        "{msg}"
    );
    // An empty file (made by `touch`) holds nothing to resume or to lose: the run starts
    // afresh and writes its checkpoint there, as `--out` replaces an empty file.
    fs::write(d.join("empty.json"), "").unwrap();
    let o = lossprism(
        d,
        &[
            "run",
            "s.toml",
            "--checkpoint",
            "empty.json",
            "--stop-after-blocks",
            "2",
            "-q",
        ],
    );
    assert_eq!(o.status.code(), Some(3), "{}", stderr(&o));
    assert!(read(d, "empty.json").contains("checkpoint"));
}

#[test]
fn block_accumulator_size_does_not_depend_on_the_number_of_replicates() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let small = SMALL.replace("blocks = 14", "blocks = 4");
    fs::write(d.join("s.toml"), small).unwrap();
    let accs = |r: &str, out: &str| -> Vec<Value> {
        ok(
            d,
            &[
                "run",
                "s.toml",
                "--replicates",
                r,
                "--shard",
                "1/1",
                "--out",
                out,
            ],
        );
        let v: Value = serde_json::from_str(&read(d, out)).unwrap();
        v["completed"]
            .as_array()
            .unwrap()
            .iter()
            .map(|b| b["models"][0].clone())
            .collect()
    };
    let a = accs("40", "r40.json");
    let b = accs("400", "r400.json");
    assert_eq!(a.len(), 4);
    assert_eq!(b.len(), 4);
    let array = |acc: &Value, name: &str| -> String {
        acc["floats"]
            .as_array()
            .unwrap()
            .iter()
            .find(|f| f["name"] == name)
            .unwrap_or_else(|| panic!("array `{name}` missing"))["data"]
            .as_str()
            .unwrap()
            .to_string()
    };
    for (x, y) in a.iter().zip(&b) {
        assert_eq!(x["replicates"], 10);
        assert_eq!(y["replicates"], 100);
        for key in ["mean", "m2", "direct"] {
            assert_eq!(array(x, key).len(), array(y, key).len(), "{key}");
        }
        // 4 grid values × 25 points, 8 bytes per value, base64 (4 characters per 3 bytes)
        assert_eq!(array(x, "mean").len(), (4 * 25 * 8usize).div_ceil(3) * 4);
        assert_eq!(array(x, "direct").len(), (4 * 8usize).div_ceil(3) * 4);
    }
}

#[test]
fn shards_and_checkpoints_carry_the_selection_audit() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    fs::write(d.join("a.toml"), format!("{SMALL}\n[audit]\nfolds = 3\n")).unwrap();
    ok(d, &["run", "a.toml", "--out", "full.json", "-q"]);
    let full = read(d, "full.json");
    let v: Value = serde_json::from_str(&full).unwrap();
    assert!(v.get("selection").is_some(), "the audit is in the result");
    assert_eq!(shard_and_merge(d, "a.toml", &[], 3), full);
    let resumed = stop_and_resume(d, &["run", "a.toml", "--out", "r.json", "-q"], "r.json");
    assert_eq!(resumed, full);
}

/// A watch that asks to stop once `after` blocks have finished, counting the replicates it is
/// told about (as the progress bar does).
struct StopAfter {
    after: u64,
    blocks: std::sync::atomic::AtomicU64,
    replicates: std::sync::atomic::AtomicU64,
}

impl lossprism::runner::Watch for StopAfter {
    fn block_done(&self, replicates: u64) {
        use std::sync::atomic::Ordering;
        self.blocks.fetch_add(1, Ordering::SeqCst);
        self.replicates.fetch_add(replicates, Ordering::SeqCst);
    }
    fn stop(&self) -> bool {
        self.blocks.load(std::sync::atomic::Ordering::SeqCst) >= self.after
    }
}

#[test]
fn a_watch_stops_a_checkpointed_job_which_then_resumes_to_the_plain_result() {
    use lossprism::shard::{self, Finish, Job, ScenarioSource};
    use std::sync::atomic::{AtomicU64, Ordering};
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    fs::write(d.join("s.toml"), SMALL).unwrap();
    let source = ScenarioSource::read(Some(&d.join("s.toml"))).unwrap();
    let plan = source.plan(&Default::default()).unwrap();
    let ck = d.join("ck.json");
    let watch = StopAfter {
        after: 3,
        blocks: AtomicU64::new(0),
        replicates: AtomicU64::new(0),
    };
    let job = Job {
        plan: &plan,
        source: &source,
        shard: None,
        checkpoint: Some(&ck),
        stop_after_blocks: None,
        threads: 1,
        watch: &watch,
    };
    // One worker: the watch is asked before every block, so exactly three finish.
    match shard::execute(&job).unwrap() {
        Finish::Stopped {
            new_blocks,
            remaining,
            interrupted,
        } => {
            assert!(interrupted);
            assert_eq!((new_blocks, remaining), (3, 11));
        }
        Finish::Done(_) => panic!("the watch did not stop the job"),
    }
    // SMALL has two replicates per block.
    assert_eq!(watch.replicates.load(Ordering::SeqCst), 6);
    let doc: Value = serde_json::from_str(&read(d, "ck.json")).unwrap();
    assert_eq!(doc["completed"].as_array().unwrap().len(), 3);

    // Resuming reports the three saved blocks first, then computes the other eleven.
    let watch = StopAfter {
        after: u64::MAX,
        blocks: AtomicU64::new(0),
        replicates: AtomicU64::new(0),
    };
    let job = Job {
        watch: &watch,
        ..job
    };
    let done = match shard::execute(&job).unwrap() {
        Finish::Done(done) => done,
        Finish::Stopped { .. } => panic!("the resumed job stopped"),
    };
    assert_eq!(done.resumed, 3);
    assert_eq!(watch.blocks.load(Ordering::SeqCst), 14);
    assert_eq!(watch.replicates.load(Ordering::SeqCst), 28);
    let merged = shard::outcome(&plan, *done, 2).unwrap();
    let plain = lossprism::runner::run(&plan, 1).unwrap();
    assert_eq!(
        lossprism::report::to_json(&lossprism::report::build(&plan, &merged)),
        lossprism::report::to_json(&lossprism::report::build(&plan, &plain))
    );
}

/// Shaped noise draws from the replicate streams like Gaussian noise: a Student's t scenario and
/// a twin with resampled residuals (constant and varying noise, the latter also with its own
/// `smooth_k` and `level`) give byte-identical results plain, on 1 thread, as 3 shards merged,
/// and stopped and resumed from a checkpoint.
#[test]
fn shaped_noise_is_identical_across_threads_shards_and_resume() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // A table with skewed noise (invented): y = sin(4a) + b + 0.3·(u³ scaled), u uniform.
    let mut csv = String::from("a,b,y\n");
    for i in 0..60 {
        let a = (i * 7 % 61) as f64 / 61.0;
        let b = (i * 13 % 59) as f64 / 59.0;
        let u = (i * 29 % 53) as f64 / 53.0;
        csv.push_str(&format!(
            "{a},{b},{}\n",
            (4.0 * a).sin() + b + 0.9 * u.powi(3)
        ));
    }
    fs::write(d.join("t.csv"), csv).unwrap();
    let twin = |noise: &str| {
        format!(
            "name = \"shaped-twin\"\nseed = 5\nreplicates = 28\nblocks = 14\n[data]\n\
             source = \"twin\"\npath = \"t.csv\"\ntarget = \"y\"\ntrain_size = 60\n\
             eval_size = 30\nreference = {{ family = \"knn\", k = 7, standardize = true }}\n\
             [data.noise]\n{noise}\nshape = \"residuals\"\n[model]\nfamily = \"tree\"\n\
             grid = [1, 2, 3]\n"
        )
    };
    let scenarios = [
        (
            "student.toml",
            SMALL.replace("sd = 0.5", "sd = 0.5\nshape = \"student\"\ndf = 5"),
        ),
        ("residuals.toml", twin("sd = 0.3")),
        ("varying.toml", twin("varying = true")),
        // Varying noise smoothed over its own neighbours and scaled to a level.
        (
            "leveled.toml",
            twin("varying = true\nsmooth_k = 15\nlevel = 0.05"),
        ),
    ];
    for (name, text) in &scenarios {
        fs::write(d.join(name), text).unwrap();
        ok(d, &["run", name, "--out", "full.json", "-q"]);
        let full = read(d, "full.json");
        ok(
            d,
            &["run", name, "--threads", "1", "--out", "one.json", "-q"],
        );
        assert_eq!(read(d, "one.json"), full, "{name}: 1 thread");
        assert_eq!(
            shard_and_merge(d, name, &["-q"], 3),
            full,
            "{name}: 3 shards"
        );
        let resumed = stop_and_resume(
            d,
            &["run", name, "--out", "resumed.json", "-q"],
            "resumed.json",
        );
        assert_eq!(resumed, full, "{name}: resumed");
    }
}

/// The fingerprint of a run with an external estimator covers the files it runs: a script
/// edited between a stop and its resume (or between shards) was folded into one result with
/// exit 0, a mix neither script gives. Planning starts no process, so no interpreter is needed.
#[test]
fn the_fingerprint_covers_an_external_estimators_script() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let text = "name = \"ext\"\nseed = 5\nreplicates = 20\n[data]\nsource = \"synthetic\"\n\
                train_size = 40\neval_size = 20\n[data.truth]\nbuiltin = \"friedman1\"\n\
                [model]\nfamily = \"external\"\ncommand = [\"python3\", \"m.py\"]\nknob = \"k\"\n\
                grid = [1, 3]\n";
    fs::write(d.join("s.toml"), text).unwrap();
    let print = || {
        let plan = lossprism::scenario::load(&d.join("s.toml"), &Default::default()).unwrap();
        lossprism::shard::fingerprint(&plan, text).unwrap()
    };
    fs::write(d.join("m.py"), "print('one')\n").unwrap();
    let (a, again) = (print(), print());
    fs::write(d.join("m.py"), "print('two')\n").unwrap();
    let b = print();
    assert_eq!(a, again);
    assert_ne!(a, b);
    // Only the scripts: the part before them is the run's, which `merge` checks against its
    // own reading of the embedded scenario where the scripts may be absent.
    assert_eq!(
        a.split_once("+scripts:").unwrap().0,
        b.split_once("+scripts:").unwrap().0
    );
    fs::remove_file(d.join("m.py")).unwrap();
    assert_eq!(print(), a.split_once("+scripts:").unwrap().0);
}

/// Without a checkpoint nothing keeps the blocks in flight, so SIGTERM ends the run at once,
/// exit 130, nothing written (it waited for the blocks in flight, 49 s on a large run, then
/// threw them away; a batch system's SIGKILL can come first). Two blocks of 50 000 replicates:
/// waiting for them takes the whole run.
#[cfg(unix)]
#[test]
fn a_terminated_run_without_a_checkpoint_stops_at_once() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let text = slow_scenario().replace(
        "replicates = 12000\nblocks = 100",
        "replicates = 100000\nblocks = 2",
    );
    fs::write(d.join("s.toml"), text).unwrap();
    let child = std::process::Command::new(env!("CARGO_BIN_EXE_lossprism"))
        .current_dir(d)
        .args(["run", "s.toml", "--out", "r.json", "-q"])
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    std::thread::sleep(std::time::Duration::from_millis(800));
    let sent = std::time::Instant::now();
    let status = std::process::Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let out = child.wait_with_output().unwrap();
    let waited = sent.elapsed();
    assert_eq!(out.status.code(), Some(130), "{}", stderr(&out));
    assert!(stderr(&out).contains("nothing written"), "{}", stderr(&out));
    assert!(!d.join("r.json").exists());
    // The blocks in flight are the whole run (two blocks of 50 000 replicates, tens of
    // seconds); stopping at once takes milliseconds.
    assert!(waited.as_secs() < 5, "stopped {waited:?} after the signal");
}
