//! The external-process family end to end: the standard-library Python k-NN example
//! (`docs/examples/knn_stdlib.py`) against the built-in `knn` family, exact number exchange with
//! Python, the optional scikit-learn example, and misbehaving processes (crash, wrong count,
//! non-numeric output, no answer): each a one-line error with exit 2, fast, with no process left.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use lossprism::family::external::{format_number, parse_number};
use lossprism::report::{self, ResultDoc};
use lossprism::runner;
use lossprism::scenario::{self, PlanOptions};

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn python_ok() -> bool {
    Command::new("python3")
        .arg("--version")
        .output()
        .is_ok_and(|o| o.status.success())
}

/// Regression scenario (invented: a packing line's fill weight against two settings).
fn regression(model: &str) -> String {
    format!(
        r#"name = "fill-weight"
seed = 17
replicates = 24

[data]
source = "synthetic"
train_size = 50
eval_size = 25

[[data.inputs]]
name = "speed"
uniform = [0.0, 1.0]
[[data.inputs]]
name = "temp"
normal = [0.0, 1.0]

[data.truth]
formula = "sin(3*speed) + 0.5*temp"

[data.noise]
sd = 0.4

[model]
{model}
grid = [1, 2, 3, 7, 15, 50]
"#
    )
}

/// Two-class scenario with a rounded input (distance ties) for the vote tie rule.
fn classification(model: &str) -> String {
    format!(
        r#"name = "bruise-check"
seed = 23
replicates = 20

[data]
source = "synthetic"
train_size = 40
eval_size = 30

[[data.inputs]]
name = "firmness"
even = [0.0, 1.0]

[data.classes]
labels = ["sound", "bruised"]
probability = "1/(1+exp(-(6*firmness - 3)))"

[model]
{model}
grid = [1, 2, 4, 9]
"#
    )
}

fn run_text(dir: &Path, name: &str, text: &str) -> ResultDoc {
    let path = dir.join(name);
    std::fs::write(&path, text).unwrap();
    let plan = scenario::load(&path, &PlanOptions::default()).expect("plans");
    let outcome = runner::run(&plan, 2).expect("runs");
    report::build(&plan, &outcome)
}

fn rel(a: f64, b: f64) -> f64 {
    if a == b {
        0.0
    } else {
        (a - b).abs() / a.abs().max(b.abs())
    }
}

/// Every number of the decomposition rows, in a fixed order.
fn numbers(doc: &ResultDoc) -> Vec<f64> {
    let v = serde_json::to_value(&doc.points).unwrap();
    let mut out = Vec::new();
    fn walk(v: &serde_json::Value, out: &mut Vec<f64>) {
        match v {
            serde_json::Value::Number(n) => out.push(n.as_f64().unwrap()),
            serde_json::Value::Array(a) => a.iter().for_each(|x| walk(x, out)),
            serde_json::Value::Object(m) => m.values().for_each(|x| walk(x, out)),
            _ => {}
        }
    }
    walk(&v, &mut out);
    out
}

// Reference: the built-in `knn` family (itself checked against ESL eq. 7.10 and brute force).
// The Python example uses the same neighbour order (squared distance accumulated input by
// input, ties by training row index), the same running sums nearest-first and the same vote
// tie rule, and numbers cross the pipe exactly, so the predictions are the same floats; 1e-9
// relative allows only for a different summation order, which does not occur here (the two
// agree bit for bit in practice).
#[test]
fn stdlib_knn_matches_builtin_knn() {
    if !python_ok() {
        println!("skipped: python3 is not available");
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let script = repo().join("docs/examples/knn_stdlib.py");
    let ext = format!(
        "family = \"external\"\ncommand = [\"python3\", {:?}]\nknob = \"k\"",
        script.display().to_string()
    );
    for (make, what) in [
        (regression as fn(&str) -> String, "regression"),
        (classification, "classification"),
    ] {
        let a = run_text(dir.path(), "ext.toml", &make(&ext));
        let b = run_text(dir.path(), "knn.toml", &make("family = \"knn\""));
        assert_eq!(a.family, "external");
        assert_eq!(a.knob, "k");
        let (na, nb) = (numbers(&a), numbers(&b));
        assert_eq!(na.len(), nb.len());
        let worst = na
            .iter()
            .zip(&nb)
            .map(|(x, y)| rel(*x, *y))
            .fold(0.0, f64::max);
        println!(
            "{what}: largest relative difference {worst:e} over {} numbers",
            na.len()
        );
        assert!(worst <= 1e-9, "{what}: {worst}");
    }
}

// Exact identity: 17 significant digits identify every binary64 value and both Python's
// `float()`/`repr()` and Rust's parser round correctly, so numbers survive the round trip
// lossprism -> Python -> lossprism bit for bit.
#[test]
fn numbers_round_trip_through_python() {
    if !python_ok() {
        println!("skipped: python3 is not available");
        return;
    }
    let mut state = 0x1234_5678_9abc_def0u64;
    let mut values = vec![
        0.0,
        -0.0,
        0.1,
        1.0 / 3.0,
        5e-324,
        f64::MAX,
        f64::MIN_POSITIVE,
    ];
    while values.len() < 3000 {
        // xorshift64 (Marsaglia 2003) over raw bit patterns: every exponent range appears.
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        let v = f64::from_bits(state);
        if v.is_finite() {
            values.push(v);
        }
    }
    let input: String = values.iter().map(|v| format_number(*v) + "\n").collect();
    let mut child = Command::new("python3")
        .args([
            "-c",
            "import sys\nfor l in sys.stdin:\n    print(repr(float(l)))",
        ])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    use std::io::Write;
    child
        .stdin
        .take()
        .unwrap()
        .write_all(input.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    let back: Vec<f64> = String::from_utf8(out.stdout)
        .unwrap()
        .lines()
        .map(|l| parse_number(l).unwrap())
        .collect();
    assert_eq!(back.len(), values.len());
    for (a, b) in values.iter().zip(&back) {
        assert_eq!(a.to_bits(), b.to_bits(), "{a:e} came back as {b:e}");
    }
}

#[test]
fn sklearn_example_runs_when_available() {
    let ok = Command::new("python3")
        .args([
            "-c",
            "import importlib.util as u, sys\n\
             sys.exit(0 if u.find_spec('sklearn') and u.find_spec('numpy') else 1)",
        ])
        .output()
        .is_ok_and(|o| o.status.success());
    if !ok {
        println!("skipped: scikit-learn/numpy are not importable by python3 (docs/examples/sklearn_tree.py not run)");
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let script = repo().join("docs/examples/sklearn_tree.py");
    let ext = format!(
        "family = \"external\"\ncommand = [\"python3\", {:?}]\nknob = \"max_depth\"",
        script.display().to_string()
    );
    let text = regression(&ext)
        .replace("[1, 2, 3, 7, 15, 50]", "[1, 2, 4, 8]")
        .replace("replicates = 24", "replicates = 8");
    let doc = run_text(dir.path(), "sk.toml", &text);
    assert_eq!(doc.points.len(), 4);
    // Deeper trees fit the training set more closely: more variance than a stump.
    assert!(doc.points[3].get("variance") > doc.points[0].get("variance"));
}

/// A misbehaving estimator: answers `good` fits correctly-shaped (constant 0.5), then
/// misbehaves as `mode` says.
const BAD: &str = r#"
import sys, time
mode, good = sys.argv[1], int(sys.argv[2])
inp, out = sys.stdin, sys.stdout
inp.readline()
out.write("ready 1\n"); out.flush()
done = 0
while True:
    head = inp.readline().split()
    if not head:
        sys.exit(0)
    rid, m, g = head[1], int(head[7]), int(head[8])
    while inp.readline().strip() != "end":
        pass
    if done >= good:
        if mode == "crash":
            raise RuntimeError("simulated crash in the estimator")
        if mode == "sleep":
            time.sleep(120)
        if mode == "count":
            m -= 1
        if mode == "extra":
            out.write("ok %s\n" % rid)
            for _ in range(g + 1):
                out.write("pred " + " ".join(["0.5"] * m) + "\n")
            out.flush()
            done += 1
            continue
        if mode == "text":
            out.write("ok %s\n" % rid)
            out.write("pred " + " ".join(["0.5"] * (m - 1) + ["oops"]) + "\n")
            out.flush()
            continue
    out.write("ok %s\n" % rid)
    for _ in range(g):
        out.write("pred " + " ".join(["0.5"] * m) + "\n")
    out.flush()
    done += 1
"#;

fn leftover(tag: &str) -> bool {
    Command::new("pgrep")
        .args(["-f", tag])
        .output()
        .is_ok_and(|o| o.status.success())
}

/// Runs the CLI on a scenario whose process misbehaves; returns (exit code, stderr, seconds).
fn misbehave(mode: &str, good: u32, timeout: Option<u32>) -> (i32, String, f64, String) {
    let dir = tempfile::tempdir().unwrap();
    let tag = format!("lp_ext_{mode}_{}", std::process::id());
    let script = format!("{tag}.py");
    std::fs::write(dir.path().join(&script), BAD).unwrap();
    let mut model = format!(
        "family = \"external\"\ncommand = [\"python3\", \"{script}\", \"{mode}\", \"{good}\"]\nknob = \"k\""
    );
    if let Some(t) = timeout {
        model.push_str(&format!("\ntimeout_seconds = {t}"));
    }
    std::fs::write(dir.path().join("s.toml"), regression(&model)).unwrap();
    let start = Instant::now();
    let out = Command::new(env!("CARGO_BIN_EXE_lossprism"))
        .args(["run", "s.toml", "--threads", "2"])
        .current_dir(dir.path())
        .output()
        .unwrap();
    let secs = start.elapsed().as_secs_f64();
    let err = String::from_utf8_lossy(&out.stderr).into_owned();
    assert!(
        !leftover(&tag),
        "{mode}: a process running {script} is still alive"
    );
    (out.status.code().unwrap_or(-1), err, secs, script)
}

fn assert_clean_failure(mode: &str, good: u32, timeout: Option<u32>, needle: &str, max_secs: f64) {
    if !python_ok() {
        println!("skipped: python3 is not available");
        return;
    }
    let (code, err, secs, script) = misbehave(mode, good, timeout);
    println!("{mode} ({secs:.2} s): {err}");
    assert_eq!(code, 2, "{mode}: {err}");
    assert_eq!(
        err.trim_end().lines().count(),
        1,
        "{mode}: not one line: {err}"
    );
    assert!(
        err.contains(&format!(
            "external process `python3 {script} {mode} {good}`"
        )),
        "{mode}: command not named: {err}"
    );
    assert!(err.contains("request"), "{mode}: request not named: {err}");
    assert!(err.contains(needle), "{mode}: {err}");
    assert!(secs < max_secs, "{mode}: took {secs} s");
}

/// One answer line too many, from processes that each serve a single request (one block per
/// thread): nothing follows in the protocol to show it, so the run reads what each process
/// wrote after its answer when it ends. Before, the run exited 0 with the grid read shifted by
/// a line where one thread per block ran, and failed with two blocks per thread.
#[test]
fn an_answer_with_a_line_too_many_fails_the_run_whatever_the_threads() {
    if !python_ok() {
        println!("skipped: python3 is not available");
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("bad.py"), BAD).unwrap();
    let model = "family = \"external\"\ncommand = [\"python3\", \"bad.py\", \"extra\", \"0\"]\nknob = \"k\"";
    let text = regression(model).replace("replicates = 24", "replicates = 3\nblocks = 3");
    std::fs::write(dir.path().join("s.toml"), text).unwrap();
    for threads in ["1", "3"] {
        let out = Command::new(env!("CARGO_BIN_EXE_lossprism"))
            .args(["run", "s.toml", "--threads", threads, "--out", "r.json"])
            .current_dir(dir.path())
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "threads {threads}: {err}");
        assert!(
            err.contains("more line after its last answer") || err.contains("answered request 2"),
            "threads {threads}: {err}"
        );
        if threads == "3" {
            assert!(err.contains("more line after its last answer"), "{err}");
        }
        assert!(!dir.path().join("r.json").exists());
    }
}

/// A script that is not where `command` says was found only by the first fit (after
/// `validate` had said "valid"), and one whose `#!` names a missing interpreter was reported as
/// the script itself missing. Neither needs Python.
#[test]
fn missing_scripts_and_interpreters_are_named_before_any_fit() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let model = "family = \"external\"\ncommand = [\"python3\", \"gone.py\"]\nknob = \"k\"";
    std::fs::write(d.join("s.toml"), regression(model)).unwrap();
    for args in [
        &["validate", "s.toml"][..],
        &["run", "s.toml", "--out", "r.json"],
    ] {
        let out = Command::new(env!("CARGO_BIN_EXE_lossprism"))
            .args(args)
            .current_dir(d)
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{args:?}: {err}");
        assert!(
            err.contains("`command` names the script `gone.py`, which does not exist"),
            "{args:?}: {err}"
        );
    }
    // Words that are not file names are not checked: code after `-c`, a program found on PATH.
    for command in [
        "[\"sh\", \"-c\", \"exec python3 gone.py\"]",
        "[\"gone.py\", \"x\"]",
        "[\"python3\", \"-m\", \"pkg.gone\"]",
    ] {
        let model = format!("family = \"external\"\ncommand = {command}\nknob = \"k\"");
        std::fs::write(d.join("v.toml"), regression(&model)).unwrap();
        let out = Command::new(env!("CARGO_BIN_EXE_lossprism"))
            .args(["validate", "v.toml"])
            .current_dir(d)
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(0), "{command}: {err}");
    }
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        let script = d.join("odd.py");
        std::fs::write(&script, "#!/nonexistent/bin/python9\nprint(1)\n").unwrap();
        std::fs::set_permissions(&script, std::fs::Permissions::from_mode(0o755)).unwrap();
        let model = "family = \"external\"\ncommand = [\"./odd.py\"]\nknob = \"k\"";
        std::fs::write(d.join("t.toml"), regression(model)).unwrap();
        let out = Command::new(env!("CARGO_BIN_EXE_lossprism"))
            .args(["run", "t.toml", "--out", "r.json"])
            .current_dir(d)
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{err}");
        assert!(
            err.contains("its first line, `#!/nonexistent/bin/python9`, names an interpreter"),
            "{err}"
        );
    }
}

#[test]
fn crash_mid_run_is_a_clear_error() {
    assert_clean_failure("crash", 3, None, "simulated crash in the estimator", 20.0);
}

#[test]
fn wrong_number_of_predictions_is_a_clear_error() {
    assert_clean_failure(
        "count",
        2,
        None,
        "sent 24 predictions for k = 1, expected 25",
        20.0,
    );
}

#[test]
fn non_numeric_output_is_a_clear_error() {
    assert_clean_failure("text", 1, None, "\"oops\" where prediction 25 of 25", 20.0);
}

#[test]
fn a_process_that_never_answers_times_out() {
    // timeout_seconds = 1: the run must end well before the script's 120 s sleep.
    assert_clean_failure("sleep", 1, Some(1), "did not answer within 1 s", 15.0);
}

#[test]
fn external_keys_are_checked() {
    let dir = tempfile::tempdir().unwrap();
    let cases = [
        (
            "family = \"knn\"\ncommand = [\"python3\", \"m.py\"]",
            "key `model.command`: not an option of family `knn`",
        ),
        (
            "family = \"tree\"\ntimeout_seconds = 5",
            "model.timeout_seconds",
        ),
        ("family = \"external\"\nknob = \"k\"", "needs `command`"),
        (
            "family = \"external\"\ncommand = [\"python3\"]",
            "needs `knob`",
        ),
        (
            "family = \"external\"\ncommand = [\"python3\"]\nknob = \"max depth\"",
            "not a knob name",
        ),
        (
            "family = \"external\"\ncommand = []\nknob = \"k\"",
            "key `model.command`: must name a program",
        ),
        (
            "family = \"external\"\ncommand = [\"python3\"]\nknob = \"k\"\ntimeout_seconds = -1",
            "key `model.timeout_seconds`",
        ),
        (
            "family = \"external\"\ncommand = [\"python3\"]\nknob = \"k\"\nstandardize = true",
            "not an option of family `external`",
        ),
    ];
    for (model, needle) in cases {
        std::fs::write(dir.path().join("s.toml"), regression(model)).unwrap();
        let out = Command::new(env!("CARGO_BIN_EXE_lossprism"))
            .args(["validate", "s.toml"])
            .current_dir(dir.path())
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{model}: {err}");
        assert!(err.contains(needle), "{model}: {err}");
    }
    // A valid external scenario validates without starting the process.
    let ok = "family = \"external\"\ncommand = [\"/nonexistent/program\"]\nknob = \"k\"";
    std::fs::write(dir.path().join("s.toml"), regression(ok)).unwrap();
    let out = Command::new(env!("CARGO_BIN_EXE_lossprism"))
        .args(["validate", "s.toml"])
        .current_dir(dir.path())
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(0));
}

/// A signal to lossprism alone (not its process group, as a supervisor sends it) ends the
/// external estimator too: the process was left running under PID 1 until its current fit
/// ended (a hostile-input sweep), though every process is to be waited for.
#[cfg(unix)]
#[test]
fn a_signal_to_lossprism_ends_its_external_processes() {
    if !python_ok() {
        println!("skipped: python3 is not available");
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let tag = format!("lp_ext_signal_{}", std::process::id());
    let script = format!("{tag}.py");
    std::fs::write(dir.path().join(&script), BAD).unwrap();
    // `sleep` after 0 good answers: the first fit sleeps 120 s.
    let model =
        format!("family = \"external\"\ncommand = [\"python3\", \"{script}\", \"sleep\", \"0\"]\nknob = \"k\"");
    std::fs::write(dir.path().join("s.toml"), regression(&model)).unwrap();
    let child = Command::new(env!("CARGO_BIN_EXE_lossprism"))
        .args(["run", "s.toml", "--threads", "1", "-q", "--out", "r.json"])
        .current_dir(dir.path())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    // Wait until the estimator runs, then signal lossprism's own id only.
    let start = Instant::now();
    while !leftover(&tag) && start.elapsed().as_secs() < 20 {
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
    assert!(leftover(&tag), "the estimator never started");
    std::thread::sleep(std::time::Duration::from_millis(300));
    let status = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let out = child.wait_with_output().unwrap();
    assert_eq!(out.status.code(), Some(130));
    std::thread::sleep(std::time::Duration::from_millis(300));
    assert!(
        !leftover(&tag),
        "the estimator outlived lossprism: {}",
        String::from_utf8_lossy(&out.stderr)
    );
}

/// Runs `scenario` in `dir` as shards 1/2 and 2/2, into `out` with `#` the shard's number.
fn shards(dir: &Path, scenario: &str, out: &str) {
    for i in ["1", "2"] {
        let part = out.replace('#', i);
        let (code, err) = lp(
            dir,
            &[
                "run",
                scenario,
                "--shard",
                &format!("{i}/2"),
                "--out",
                &part,
                "-q",
            ],
        );
        assert_eq!(code, 0, "{err}");
    }
}

/// `lossprism` in `dir` with `args`: exit code and standard error.
fn lp(dir: &Path, args: &[&str]) -> (i32, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_lossprism"))
        .current_dir(dir)
        .args(args)
        .output()
        .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

// Found by a hostile-input sweep: parts run in a folder and merged from its parent (or the
// other way round) read the estimator's script from another folder than the one it is in, and
// `merge --csv` replaced the script with a CSV, exit 0.
#[test]
fn merge_from_another_folder_never_replaces_the_estimators_script() {
    if !python_ok() {
        println!("skipped: python3 is not available");
        return;
    }
    let d = tempfile::tempdir().unwrap();
    let (top, ex) = (d.path(), d.path().join("ex"));
    std::fs::create_dir(&ex).unwrap();
    let script = std::fs::read(repo().join("docs/examples/knn_stdlib.py")).unwrap();
    std::fs::write(ex.join("m.py"), &script).unwrap();
    std::fs::write(
        ex.join("x.toml"),
        regression("family = \"external\"\ncommand = [\"python3\", \"m.py\"]\nknob = \"k\""),
    )
    .unwrap();
    // Shards run inside ex, merged from the parent folder.
    shards(&ex, "x.toml", "p#.json");
    for flag in ["--csv", "--points"] {
        let (code, err) = lp(
            top,
            &["merge", "ex/p1.json", "ex/p2.json", flag, "ex/m.py", "-q"],
        );
        assert_eq!(code, 2, "{flag}: {err}");
        assert!(
            err.contains("a file the external estimator runs"),
            "{flag}: {err}"
        );
    }
    // Shards run from the parent folder, merged inside ex.
    shards(top, "ex/x.toml", "ex/q#.json");
    for (flag, target) in [("--csv", "m.py"), ("--csv", "x.toml")] {
        let (code, err) = lp(&ex, &["merge", "q1.json", "q2.json", flag, target, "-q"]);
        assert_eq!(code, 2, "{flag} {target}: {err}");
    }
    // Shards run inside ex writing their parts to the parent folder, merged there: neither the
    // recorded name nor the part's folder leads to the scenario, but the part records where it
    // was (a second sweep replaced the scenario with `--csv ex/x.toml`).
    shards(&ex, "x.toml", "../r#.json");
    for (flag, target) in [("--csv", "ex/x.toml"), ("--points", "ex/m.py")] {
        let (code, err) = lp(top, &["merge", "r1.json", "r2.json", flag, target, "-q"]);
        assert_eq!(code, 2, "{flag} {target}: {err}");
    }
    assert_eq!(std::fs::read(ex.join("m.py")).unwrap(), script);
    assert!(std::fs::read_to_string(ex.join("x.toml"))
        .unwrap()
        .contains("family = \"external\""));
    // Merged where the paths lead to it, the merge itself still works.
    let (code, err) = lp(
        top,
        &[
            "merge",
            "ex/p1.json",
            "ex/p2.json",
            "--csv",
            "ex/m.csv",
            "-q",
        ],
    );
    assert_eq!(code, 0, "{err}");
}
