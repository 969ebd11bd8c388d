//! Integration tests of the `lossprism` command line: exit codes and one-line errors for bad
//! input, the `validate` and `families` subcommands, the embedded default run, the output files
//! (`--out`, `--csv`, `--points`, `-` for standard output) and thread-count independence.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::Command;

mod common;
use common::*;

use serde_json::Value;

/// A small valid scenario (invented: a smooth 1-D curve with Gaussian noise). Line numbers
/// matter: the bad-input tests below edit it and expect errors at the edited line.
///
/// Line 3 is `replicates`, 16 the truth formula, 19 the noise `sd`, 22 the family, 23 the grid.
const BASE: &str = r#"name = "probe"
seed = 3
replicates = 4

[data]
source = "synthetic"
train_size = 30
eval_size = 20
design = "random"

[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]

[data.truth]
formula = "sin(3*x)"

[data.noise]
sd = 0.5

[model]
family = "tree"
grid = [1, 2, 3]
"#;

/// Grid values of [`BASE`].
const BASE_GRID: [f64; 3] = [1.0, 2.0, 3.0];
/// Evaluation points of [`BASE`].
const BASE_EVAL: usize = 20;

/// `BASE` with `from` replaced by `to` (exactly once).
fn edit(from: &str, to: &str) -> String {
    assert_eq!(
        BASE.matches(from).count(),
        1,
        "fixture edit `{from}` must be unique"
    );
    BASE.replacen(from, to, 1)
}

/// Writes `body` as `name`, runs both `validate` and `run --quiet` on it, and checks that each
/// fails with the same one-line error containing `name` and every needle.
fn bad_scenario(name: &str, body: &str, needles: &[&str]) -> String {
    let dir = tempfile::tempdir().unwrap();
    let file = put(dir.path(), name, body);
    let mut all = vec![file.as_str()];
    all.extend_from_slice(needles);
    let v = assert_bad(&lossprism(dir.path(), &["validate", &file]), &all);
    let r = assert_bad(
        &lossprism(dir.path(), &["run", &file, "--quiet", "--threads", "1"]),
        &all,
    );
    assert_eq!(v, r, "`validate` and `run` should report the same error");
    v
}

// ---------------------------------------------------------------------------------------------
// Bad input: exit 2, one line, names the file and the key or line at fault, never panics.
// ---------------------------------------------------------------------------------------------

#[test]
fn base_fixture_is_valid() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    let out = lossprism(dir.path(), &["validate", &f]);
    no_panic(&out);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(text(&out.stdout).contains("valid"));
}

/// `merge` with no parts names the argument it needs whole (sweep 69: `<PART.json>..`, the
/// ellipsis cut as if it ended a sentence).
#[test]
fn merge_without_parts_names_the_argument_whole() {
    let dir = tempfile::tempdir().unwrap();
    assert_bad(
        &lossprism(dir.path(), &["merge", "--out", "m.json"]),
        &["<PART.json>...; see --help"],
    );
}

#[test]
fn missing_file() {
    let dir = tempfile::tempdir().unwrap();
    assert_bad(
        &lossprism(dir.path(), &["validate", "no-such-scenario.toml"]),
        &["no-such-scenario.toml"],
    );
    assert_bad(
        &lossprism(dir.path(), &["run", "no-such-scenario.toml"]),
        &["no-such-scenario.toml"],
    );
}

#[test]
fn bad_toml_syntax_names_the_line() {
    bad_scenario(
        "syntax.toml",
        &edit("seed = 3", "seed = = 3"),
        &["syntax.toml:2:"],
    );
}

#[test]
fn unknown_top_level_key_names_key_and_line() {
    bad_scenario(
        "unknown-top.toml",
        &edit("replicates = 4\n", "replicates = 4\ncolour = \"red\"\n"),
        &["unknown-top.toml:4:", "colour"],
    );
}

#[test]
fn unknown_nested_key_names_key_and_line() {
    bad_scenario(
        "unknown-nested.toml",
        &edit("grid = [1, 2, 3]\n", "grid = [1, 2, 3]\ndepth = 3\n"),
        &["unknown-nested.toml:24:", "depth"],
    );
}

#[test]
fn unknown_key_in_inputs_array_names_key_and_line() {
    bad_scenario(
        "unknown-input-key.toml",
        &edit(
            "uniform = [0.0, 1.0]\n",
            "uniform = [0.0, 1.0]\nunits = \"m\"\n",
        ),
        &["unknown-input-key.toml:14:", "units"],
    );
}

#[test]
fn wrong_type_names_key_and_line() {
    bad_scenario(
        "wrong-type.toml",
        &edit("replicates = 4", "replicates = \"many\""),
        &["wrong-type.toml:3:", "replicates"],
    );
}

#[test]
fn missing_required_key() {
    bad_scenario(
        "no-name.toml",
        &edit("name = \"probe\"\n", ""),
        &["no-name.toml", "name"],
    );
}

#[test]
fn unknown_family() {
    bad_scenario(
        "family.toml",
        &edit("\"tree\"", "\"forrest\""),
        &["family.toml:22:", "model.family", "forrest"],
    );
}

#[test]
fn empty_grid() {
    bad_scenario(
        "empty-grid.toml",
        &edit("[1, 2, 3]", "[]"),
        &["empty-grid.toml:23:", "model.grid"],
    );
}

#[test]
fn duplicate_grid_value() {
    bad_scenario(
        "dup-grid.toml",
        &edit("[1, 2, 3]", "[1, 2, 2]"),
        &["dup-grid.toml:23:", "model.grid"],
    );
}

#[test]
fn tree_depth_zero() {
    bad_scenario(
        "depth0.toml",
        &edit("[1, 2, 3]", "[0, 1, 2]"),
        &["depth0.toml:23:", "model.grid", "0"],
    );
}

#[test]
fn knn_k_larger_than_n() {
    // train_size is 30.
    let body = edit("\"tree\"", "\"knn\"").replacen("[1, 2, 3]", "[1, 5, 31]", 1);
    bad_scenario("knn-k.toml", &body, &["knn-k.toml:23:", "model.grid", "31"]);
}

#[test]
fn poly_degree_too_large_for_n() {
    // One input, 10 training rows: degree 12 needs 13 coefficients (degree 12 is otherwise an
    // allowed degree, so the failure is about n).
    let body = edit("\"tree\"", "\"poly\"")
        .replacen("[1, 2, 3]", "[1, 12]", 1)
        .replacen("train_size = 30", "train_size = 10", 1);
    bad_scenario(
        "poly-deg.toml",
        &body,
        &["poly-deg.toml:23:", "model.grid", "12"],
    );
}

#[test]
fn negative_ridge_penalty() {
    let body = edit("\"tree\"", "\"ridge\"").replacen("[1, 2, 3]", "[-1, 2]", 1);
    bad_scenario(
        "ridge-neg.toml",
        &body,
        &["ridge-neg.toml:23:", "model.grid"],
    );
}

#[test]
fn replicates_below_two_in_file() {
    bad_scenario(
        "r1.toml",
        &edit("replicates = 4", "replicates = 1"),
        &["r1.toml:3:", "replicates"],
    );
}

#[test]
fn replicates_below_two_on_command_line() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    assert_bad(
        &lossprism(dir.path(), &["run", &f, "--replicates", "1"]),
        &["--replicates", "1"],
    );
    // Also for the embedded default.
    assert_bad(
        &lossprism(dir.path(), &["run", "--replicates", "0"]),
        &["--replicates"],
    );
}

#[test]
fn undefined_variable_in_formula() {
    let line = bad_scenario(
        "undef.toml",
        &edit("sin(3*x)", "sin(3*z)"),
        &["undef.toml:16:", "data.truth.formula"],
    );
    assert!(line.contains("`z`"), "must name the variable: {line}");
}

#[test]
fn formula_syntax_error() {
    bad_scenario(
        "formula-syntax.toml",
        &edit("sin(3*x)", "sin(3*x"),
        &["formula-syntax.toml:16:", "data.truth.formula", "sin(3*x"],
    );
}

#[test]
fn formula_nan_at_drawn_input() {
    // sqrt(x - 2) is NaN for every x in [0, 1]: the error must name the formula, the input
    // values where it failed, the file and the key of the formula.
    let line = bad_scenario(
        "nan.toml",
        &edit("sin(3*x)", "sqrt(x - 2)"),
        &["nan.toml", "data.truth.formula", "sqrt(x - 2)", "x = "],
    );
    assert!(line.contains("NaN"), "should say the value is NaN: {line}");
}

#[test]
fn negative_sd_formula_at_drawn_input() {
    bad_scenario(
        "sd-neg.toml",
        &edit("sd = 0.5", "sd_formula = \"x - 2\""),
        &["sd-neg.toml", "data.noise.sd_formula", "x - 2", "x = "],
    );
}

#[test]
fn both_sd_and_sd_formula() {
    bad_scenario(
        "both-sd.toml",
        &edit("sd = 0.5\n", "sd = 0.5\nsd_formula = \"0.1 + x\"\n"),
        &["both-sd.toml:19:", "data.noise", "sd_formula"],
    );
}

#[test]
fn negative_sd() {
    bad_scenario(
        "neg-sd.toml",
        &edit("sd = 0.5", "sd = -1"),
        &["neg-sd.toml:19:", "data.noise.sd"],
    );
}

#[test]
fn unknown_builtin() {
    bad_scenario(
        "builtin.toml",
        &edit("formula = \"sin(3*x)\"", "builtin = \"friedman9\""),
        &["builtin.toml:16:", "data.truth.builtin", "friedman9"],
    );
}

#[test]
fn eval_design_with_random_design() {
    bad_scenario(
        "eval-design.toml",
        &edit(
            "design = \"random\"\n",
            "design = \"random\"\neval = \"design\"\n",
        ),
        &["eval-design.toml:10:", "data.eval"],
    );
}

#[test]
fn absurd_sizes_are_rejected_without_panicking() {
    // 2^62 rows cannot be allocated: the allocation size overflows at once, so this is safe to
    // run, and the answer must be an error naming the key, not a crash.
    bad_scenario(
        "huge-eval.toml",
        &edit("eval_size = 20", "eval_size = 4611686018427387904"),
        &["huge-eval.toml:8:", "data.eval_size"],
    );
    bad_scenario(
        "huge-train.toml",
        &edit("train_size = 30", "train_size = 4611686018427387904"),
        &["huge-train.toml:7:", "data.train_size"],
    );
}

#[test]
fn unknown_flag_is_a_usage_error() {
    // clap prints a usage block after the error line, so only the first line is checked here.
    let dir = tempfile::tempdir().unwrap();
    for args in [
        &["run", "--bogus"][..],
        &["validate"][..],
        &["frobnicate"][..],
        &["run", "--replicates", "many"][..],
        &["run", "--threads", "-3"][..],
    ] {
        let out = lossprism(dir.path(), args);
        no_panic(&out);
        let err = text(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{args:?}: {err}");
        let first = err.lines().next().unwrap_or("");
        assert!(first.starts_with("error:"), "{args:?}: {err}");
    }
    let out = lossprism(dir.path(), &["run", "--bogus"]);
    assert!(text(&out.stderr)
        .lines()
        .next()
        .unwrap()
        .contains("--bogus"));
}

#[test]
fn help_and_version_exit_zero() {
    let dir = tempfile::tempdir().unwrap();
    for args in [&["--help"][..], &["run", "--help"][..], &["--version"][..]] {
        let out = lossprism(dir.path(), args);
        no_panic(&out);
        assert_eq!(out.status.code(), Some(0), "{args:?}");
        assert!(!out.stdout.is_empty());
    }
}

// ---------------------------------------------------------------------------------------------
// validate, families, the embedded default.
// ---------------------------------------------------------------------------------------------

fn shipped() -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = fs::read_dir(repo().join("scenarios"))
        .expect("scenarios/ exists")
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "toml"))
        .collect();
    v.sort();
    assert!(!v.is_empty(), "no shipped scenarios found");
    v
}

#[test]
fn validate_accepts_every_shipped_scenario() {
    for p in shipped() {
        let out = lossprism(&repo(), &["validate", p.to_str().unwrap()]);
        no_panic(&out);
        assert_eq!(
            out.status.code(),
            Some(0),
            "{}: {}",
            p.display(),
            text(&out.stderr)
        );
        assert!(text(&out.stdout).contains("valid"), "{}", p.display());
    }
}

#[test]
fn families_lists_the_four_families() {
    let out = lossprism(&repo(), &["families"]);
    no_panic(&out);
    assert_eq!(out.status.code(), Some(0));
    let s = text(&out.stdout);
    for (name, knob) in [
        ("tree", "max_depth"),
        ("knn", "k"),
        ("poly", "degree"),
        ("ridge", "penalty"),
    ] {
        let line = s
            .lines()
            .find(|l| l.split_whitespace().next() == Some(name))
            .unwrap_or_else(|| panic!("family `{name}` not listed:\n{s}"));
        assert!(
            line.split_whitespace().any(|w| w == knob),
            "family `{name}` should show knob `{knob}`: {line}"
        );
    }
}

#[test]
fn run_without_argument_runs_the_embedded_default() {
    let dir = tempfile::tempdir().unwrap();
    let out = lossprism(dir.path(), &["run", "--replicates", "20"]);
    no_panic(&out);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let s = text(&out.stdout);
    assert!(s.contains("max_depth"), "table should name the knob:\n{s}");
    assert!(
        s.contains("reading:"),
        "table should carry the reading:\n{s}"
    );
    assert!(
        s.contains("R = 20"),
        "table should show the overridden R:\n{s}"
    );
    // One table row per grid value of the orchard scenario (depth 1..=10).
    for d in 1..=10 {
        assert!(
            s.lines()
                .any(|l| l.split_whitespace().next() == Some(&d.to_string())),
            "no table row for max_depth {d}:\n{s}"
        );
    }
    // Nothing written to the working folder.
    assert_eq!(fs::read_dir(dir.path()).unwrap().count(), 0);
}

#[test]
fn quiet_prints_nothing_and_needs_an_output() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    let out = lossprism(dir.path(), &["run", &f, "--quiet", "--out", "r.json"]);
    no_panic(&out);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(out.stdout.is_empty() && out.stderr.is_empty());
    // With no output file, --quiet would compute a result and show nothing: refused.
    let out = lossprism(dir.path(), &["run", &f, "--quiet"]);
    assert_bad(&out, &["--quiet", "--out"]);
}

// ---------------------------------------------------------------------------------------------
// Output files.
// ---------------------------------------------------------------------------------------------

fn num(v: &Value, what: &str) -> f64 {
    v.as_f64()
        .unwrap_or_else(|| panic!("`{what}` should be a number, got {v}"))
}

/// Checks the `lossprism-result/2` contract on a parsed document.
fn check_contract(doc: &Value, grid: &[f64], replicates: u64, seed: u64) {
    assert_eq!(doc["format"], "lossprism-result/2");
    assert!(
        doc["version"].as_str().is_some_and(|v| !v.is_empty()),
        "version missing"
    );
    assert!(doc["scenario"].is_object(), "scenario echo missing");
    assert_eq!(doc["scenario"]["name"], "probe");
    assert_eq!(doc["family"], "tree");
    assert_eq!(doc["knob"], "max_depth");
    assert_eq!(doc["loss"], "squared");
    assert_eq!(doc["replicates"].as_u64(), Some(replicates));
    assert_eq!(doc["seed"].as_u64(), Some(seed));
    let points = doc["points"].as_array().expect("points is an array");
    assert_eq!(points.len(), grid.len());
    let mut min_loss = f64::INFINITY;
    for (p, &g) in points.iter().zip(grid) {
        assert_eq!(num(&p["value"], "value"), g);
        let el = num(&p["expected_loss"], "expected_loss");
        let b = num(&p["bias_sq"], "bias_sq");
        let v = num(&p["variance"], "variance");
        let n = num(&p["noise"], "noise");
        let d = num(&p["expected_loss_direct"], "expected_loss_direct");
        assert!(d.is_finite());
        // Exact identity (design §1, ESL eq. 7.9): expected_loss = noise + bias² + variance,
        // up to the decimal round trip of JSON.
        assert!(
            (el - (n + b + v)).abs() <= 1e-9 * el.abs().max(1e-300),
            "identity fails at {g}: {el} vs {}",
            n + b + v
        );
        // Known noise of BASE: sd 0.5.
        assert!((n - 0.25).abs() < 1e-12, "noise {n}");
        min_loss = min_loss.min(el);
        let se = &p["stderr"];
        for k in [
            "expected_loss",
            "bias_sq",
            "variance",
            "expected_loss_direct",
        ] {
            assert!(
                se.get(k).is_some_and(|x| x.is_number() || x.is_null()),
                "stderr.{k} missing at {g}: {se}"
            );
        }
    }
    let best = &doc["best"];
    let bv = num(&best["value"], "best.value");
    assert!(grid.contains(&bv), "best value {bv} not on the grid");
    assert_eq!(num(&best["expected_loss"], "best.expected_loss"), min_loss);
    assert!(best.get("stderr").is_some(), "best.stderr missing");
    let within = best["within_one_se"]
        .as_array()
        .expect("best.within_one_se is an array");
    assert!(within.iter().any(|x| x.as_f64() == Some(bv)));
    assert!(
        doc["reading"].as_str().is_some_and(|r| !r.is_empty()),
        "reading missing"
    );
}

/// Names in `dir`, sorted.
fn listing(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

#[test]
fn out_csv_and_points_files() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    let out = lossprism(
        dir.path(),
        &[
            "run",
            &f,
            "--out",
            "r.json",
            "--csv",
            "r.csv",
            "--points",
            "p.csv",
            "--replicates",
            "6",
            "--seed",
            "9",
        ],
    );
    no_panic(&out);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(text(&out.stdout).contains("reading:"));

    // No temporary files left behind: exactly the scenario and the three outputs.
    let names = listing(dir.path());
    for n in &names {
        assert!(
            !n.starts_with('.') && !n.ends_with(".tmp"),
            "temporary file left: {n}"
        );
    }
    assert_eq!(names, ["ok.toml", "p.csv", "r.csv", "r.json"]);

    let doc: Value = serde_json::from_str(&fs::read_to_string(dir.path().join("r.json")).unwrap())
        .expect("--out writes valid JSON");
    check_contract(&doc, &BASE_GRID, 6, 9);

    // Per-grid CSV: one header, one row per grid value, values matching the JSON.
    let mut rd = csv::Reader::from_path(dir.path().join("r.csv")).unwrap();
    let header = rd.headers().unwrap().clone();
    let col = |name: &str| {
        header
            .iter()
            .position(|h| h == name)
            .unwrap_or_else(|| panic!("column `{name}` missing from {header:?}"))
    };
    let (cv, ce) = (col("value"), col("expected_loss"));
    let rows: Vec<csv::StringRecord> = rd.records().map(|r| r.unwrap()).collect();
    assert_eq!(rows.len(), BASE_GRID.len());
    let points = doc["points"].as_array().unwrap();
    for (row, p) in rows.iter().zip(points) {
        assert_eq!(row[cv].parse::<f64>().unwrap(), num(&p["value"], "value"));
        let a: f64 = row[ce].parse().unwrap();
        let b = num(&p["expected_loss"], "expected_loss");
        assert!((a - b).abs() <= 1e-12 * b.abs(), "csv {a} vs json {b}");
    }
    let raw = fs::read_to_string(dir.path().join("r.csv")).unwrap();
    assert_eq!(raw.lines().count(), 1 + BASE_GRID.len());

    // Per-point CSV: one header, grid × eval rows, with the input column `x`.
    let mut rd = csv::Reader::from_path(dir.path().join("p.csv")).unwrap();
    let header = rd.headers().unwrap().clone();
    for c in ["value", "point", "x", "truth", "bias_sq", "variance"] {
        assert!(
            header.iter().any(|h| h == c),
            "column `{c}` missing: {header:?}"
        );
    }
    let cv = header.iter().position(|h| h == "value").unwrap();
    let mut per_value = vec![0usize; BASE_GRID.len()];
    for rec in rd.records() {
        let rec = rec.expect("well-formed per-point row");
        assert_eq!(rec.len(), header.len());
        let v: f64 = rec[cv].parse().unwrap();
        let g = BASE_GRID
            .iter()
            .position(|&g| g == v)
            .expect("value on the grid");
        per_value[g] += 1;
    }
    // grid × eval rows: every grid value once per evaluation point.
    assert_eq!(per_value, [BASE_EVAL; 3]);
}

#[test]
fn out_dash_writes_json_to_stdout_and_table_to_stderr() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    let out = lossprism(dir.path(), &["run", &f, "--out", "-"]);
    no_panic(&out);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let doc: Value =
        serde_json::from_slice(&out.stdout).expect("stdout is exactly one JSON document");
    check_contract(&doc, &BASE_GRID, 4, 3);
    let err = text(&out.stderr);
    assert!(
        err.contains("max_depth") && err.contains("reading:"),
        "table on stderr:\n{err}"
    );
    assert_eq!(
        listing(dir.path()),
        ["ok.toml"],
        "`-` must not create a file"
    );
}

/// A closed standard output is reopened on `/dev/null` by the runtime, so `--out -` would lose
/// the result with exit 0; it is refused. A shell's `> /dev/null` is the user's choice and runs.
#[cfg(target_os = "linux")]
#[test]
fn out_dash_with_standard_output_closed_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    let run = |redirect: &str| {
        std::process::Command::new("sh")
            .current_dir(dir.path())
            .args([
                "-c",
                &format!("exec \"$0\" run \"$1\" --out - --quiet {redirect}"),
            ])
            .args([bin(), f.as_str()])
            .output()
            .unwrap()
    };
    let closed = run(">&-");
    no_panic(&closed);
    assert_eq!(closed.status.code(), Some(2), "{}", text(&closed.stderr));
    let err = text(&closed.stderr);
    assert!(err.contains("--out -: standard output is closed"), "{err}");
    let null = run(">/dev/null");
    assert_eq!(null.status.code(), Some(0), "{}", text(&null.stderr));
    assert_eq!(listing(dir.path()), ["ok.toml"]);
    // The table of a plain run goes to standard output too.
    let table = std::process::Command::new("sh")
        .current_dir(dir.path())
        .args(["-c", "exec \"$0\" run \"$1\" >&-"])
        .args([bin(), f.as_str()])
        .output()
        .unwrap();
    assert_eq!(table.status.code(), Some(2), "{}", text(&table.stderr));
    assert!(text(&table.stderr).contains("standard output is closed and no output file is named"));
    // /dev/null opened read-write (Python's subprocess.DEVNULL, a shell's `1<>/dev/null`) is a
    // choice to discard, not a closed descriptor: it ran before and runs now (a first version of
    // the check read it as closed).
    for redirect in ["1<>/dev/null", ">&- --out r2.json"] {
        let out = std::process::Command::new("sh")
            .current_dir(dir.path())
            .args(["-c", &format!("exec \"$0\" run \"$1\" {redirect}")])
            .args([bin(), f.as_str()])
            .output()
            .unwrap();
        assert_eq!(
            out.status.code(),
            Some(0),
            "{redirect}: {}",
            text(&out.stderr)
        );
    }
    assert!(dir.path().join("r2.json").exists());
}

/// An output named by the very file standard output is redirected to (`>`) is written through
/// standard output, as `-` is (the table goes to standard error): a rename replaced the file,
/// so the table went into the old, unlinked one, and `>> log` lost the log's earlier lines.
#[cfg(target_os = "linux")]
#[test]
fn an_output_that_is_the_redirected_standard_output_is_written_through_it() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    let sh = |script: &str| {
        std::process::Command::new("sh")
            .current_dir(dir.path())
            .args(["-c", script])
            .args([bin(), f.as_str()])
            .output()
            .unwrap()
    };
    let out = sh("exec \"$0\" run \"$1\" --out r.json > r.json");
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let doc: Value = serde_json::from_slice(&fs::read(dir.path().join("r.json")).unwrap())
        .expect("the file holds exactly the result document");
    check_contract(&doc, &BASE_GRID, 4, 3);
    assert!(
        text(&out.stderr).contains("reading:"),
        "the table on standard error"
    );
    // Opened to append or to read and write, the file would hold the output after (or over)
    // what it held, which is no result document: refused, the file untouched (a second
    // reading found `1<>` leaving an old tail after the JSON, exit 0).
    for (redirect, held) in [(">>", "earlier line\n"), ("1<>", "a longer earlier text\n")] {
        fs::write(dir.path().join("a.log"), held).unwrap();
        let out = sh(&format!(
            "exec \"$0\" run \"$1\" --out a.log --quiet {redirect} a.log"
        ));
        assert_eq!(
            out.status.code(),
            Some(2),
            "{redirect}: {}",
            text(&out.stderr)
        );
        assert!(
            text(&out.stderr).contains("opened to append"),
            "{}",
            text(&out.stderr)
        );
        assert_eq!(fs::read_to_string(dir.path().join("a.log")).unwrap(), held);
    }
    // Standard error into the same file (`2>&1`): the table would follow the JSON (a sweep
    // found exit 0 and an unreadable result).
    let out = sh("exec \"$0\" run \"$1\" --out m.json > m.json 2>&1");
    assert_eq!(out.status.code(), Some(2));
    let m = fs::read_to_string(dir.path().join("m.json")).unwrap();
    assert!(
        m.contains("standard output and standard error both go"),
        "{m}"
    );
    // Standard output opened on an input with `1<>`: the table was written over the scenario.
    let before = fs::read_to_string(dir.path().join(&f)).unwrap();
    let out = sh("exec \"$0\" run \"$1\" --out x.json 1<> \"$1\"");
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    assert!(text(&out.stderr).contains("standard output is redirected to the scenario file"));
    assert_eq!(fs::read_to_string(dir.path().join(&f)).unwrap(), before);
    // Standard error opened on the scenario (`2>>`, `2<>`): the table (`--out -` prints it
    // there) and error messages were written into it with exit 0 (sweep 71). The refusal goes
    // to standard output, or nowhere when that is the scenario too.
    for redirect in ["2>>", "2<>"] {
        let out = sh(&format!("exec \"$0\" run \"$1\" --out - {redirect} \"$1\""));
        assert_eq!(out.status.code(), Some(2), "{redirect}");
        assert!(
            text(&out.stdout).contains("standard error is redirected to the scenario file"),
            "{redirect}: {}",
            text(&out.stdout)
        );
        assert_eq!(fs::read_to_string(dir.path().join(&f)).unwrap(), before);
    }
    let out = sh("exec \"$0\" run \"$1\" --out x.json >> \"$1\" 2>&1");
    assert_eq!(out.status.code(), Some(2));
    assert_eq!(fs::read_to_string(dir.path().join(&f)).unwrap(), before);
    // An input found wrong before the check of the redirections (a scenario that does not
    // parse, a table with a short row, read by `run` and by `validate`): the error goes to
    // standard output, not into the input (the second reading found it appended there).
    fs::write(dir.path().join("bad.toml"), "name = \"x\"\nbogus = 1\n").unwrap();
    fs::write(dir.path().join("short.csv"), "a,b,y\n1,2\n").unwrap();
    fs::write(
        dir.path().join("t.toml"),
        "name = \"t\"\n[data]\nsource = \"table\"\npath = \"short.csv\"\ntarget = \"y\"\n\
         [model]\nfamily = \"tree\"\ngrid = [1, 2]\n",
    )
    .unwrap();
    for (script, input, said) in [
        (
            "exec \"$0\" run bad.toml 2>> bad.toml",
            "bad.toml",
            "unknown field `bogus`",
        ),
        (
            "exec \"$0\" run t.toml 2>> short.csv",
            "short.csv",
            "short.csv:2: has 2 fields",
        ),
        (
            "exec \"$0\" validate t.toml 2>> short.csv",
            "short.csv",
            "short.csv:2: has 2 fields",
        ),
    ] {
        let held = fs::read(dir.path().join(input)).unwrap();
        let out = sh(script);
        assert_eq!(out.status.code(), Some(2), "{script}");
        assert!(
            text(&out.stdout).contains(said),
            "{script}: {}",
            text(&out.stdout)
        );
        assert_eq!(fs::read(dir.path().join(input)).unwrap(), held, "{script}");
    }
}

/// A checkpoint that standard output is redirected to is named as such (the words of the run
/// would land in it), and the file is left as it was.
#[cfg(target_os = "linux")]
#[test]
fn checkpoint_under_standard_output_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    let out = std::process::Command::new("sh")
        .current_dir(dir.path())
        .args([
            "-c",
            "exec \"$0\" run \"$1\" --checkpoint ck.json --out r.json > ck.json",
        ])
        .args([bin(), f.as_str()])
        .output()
        .unwrap();
    no_panic(&out);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    let err = text(&out.stderr);
    assert!(
        err.contains("standard output is redirected to the checkpoint ck.json"),
        "{err}"
    );
    assert_eq!(fs::read(dir.path().join("ck.json")).unwrap(), b"");
    assert_eq!(listing(dir.path()), ["ck.json", "ok.toml"]);
}

#[test]
fn missing_output_folder_fails_cleanly() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    for flag in ["--out", "--csv", "--points"] {
        let target = "no-such-folder/result.out";
        let line = assert_bad(
            &lossprism(dir.path(), &["run", &f, flag, target, "--quiet"]),
            &["no-such-folder"],
        );
        assert!(line.contains("result.out"), "{flag}: {line}");
        assert_eq!(
            listing(dir.path()),
            ["ok.toml"],
            "{flag}: nothing may be left behind"
        );
    }
}

#[test]
fn one_bad_output_path_leaves_no_other_output_behind() {
    // A run that exits 2 must not leave half of its outputs: the good `--out` file may only
    // appear when every requested output can be written.
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    assert_bad(
        &lossprism(
            dir.path(),
            &[
                "run",
                &f,
                "--out",
                "good.json",
                "--csv",
                "no-such-folder/r.csv",
                "--quiet",
            ],
        ),
        &["no-such-folder"],
    );
    assert_eq!(
        listing(dir.path()),
        ["ok.toml"],
        "nothing may be left behind"
    );
}

#[test]
fn output_path_that_is_a_folder_fails_cleanly() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    fs::create_dir(dir.path().join("sub")).unwrap();
    assert_bad(
        &lossprism(dir.path(), &["run", &f, "--out", "sub", "--quiet"]),
        &["sub"],
    );
    assert_eq!(listing(dir.path()), ["ok.toml", "sub"]);
    assert!(listing(&dir.path().join("sub")).is_empty());
}

#[test]
fn seed_override_changes_the_result() {
    let dir = tempfile::tempdir().unwrap();
    let f = put(dir.path(), "ok.toml", BASE);
    let a = lossprism(dir.path(), &["run", &f, "--out", "-", "--quiet"]);
    let b = lossprism(
        dir.path(),
        &["run", &f, "--out", "-", "--quiet", "--seed", "4"],
    );
    assert_eq!(a.status.code(), Some(0));
    assert_eq!(b.status.code(), Some(0));
    let (a, b): (Value, Value) = (
        serde_json::from_slice(&a.stdout).unwrap(),
        serde_json::from_slice(&b.stdout).unwrap(),
    );
    assert_eq!(a["seed"].as_u64(), Some(3));
    assert_eq!(b["seed"].as_u64(), Some(4));
    assert_ne!(a["points"], b["points"]);
}

#[test]
fn json_is_bit_identical_across_thread_counts() {
    let dir = tempfile::tempdir().unwrap();
    let scenario = repo().join("scenarios").join("friedman1-tree.toml");
    let s = scenario.to_str().unwrap();
    for t in ["1", "2"] {
        let name = format!("t{t}.json");
        let out = lossprism(
            dir.path(),
            &[
                "run",
                s,
                "--replicates",
                "24",
                "--threads",
                t,
                "--out",
                &name,
                "--quiet",
            ],
        );
        no_panic(&out);
        assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    }
    let a = fs::read(dir.path().join("t1.json")).unwrap();
    let b = fs::read(dir.path().join("t2.json")).unwrap();
    assert!(!a.is_empty());
    assert!(a == b, "--threads 1 and --threads 2 give different JSON");
    // And a second run with the same thread count reproduces the file byte for byte.
    let out = lossprism(
        dir.path(),
        &[
            "run",
            s,
            "--replicates",
            "24",
            "--threads",
            "2",
            "--out",
            "-",
            "--quiet",
        ],
    );
    assert_eq!(out.stdout, a);
}

// ---------------------------------------------------------------------------------------------
// Help examples and the families listing (issue 17).
// ---------------------------------------------------------------------------------------------

/// The commands of the top-level help's examples (the text before the description, which is
/// set off by at least three spaces).
fn help_examples() -> Vec<Vec<String>> {
    lossprism::cli::EXAMPLES
        .lines()
        .skip(1)
        .map(|l| {
            let cmd = l.trim_start().split("   ").next().unwrap_or("").trim();
            cmd.split_whitespace().map(str::to_string).collect()
        })
        .collect()
}

#[test]
fn help_examples_parse_and_name_shipped_files() {
    use clap::Parser;
    let cmds = help_examples();
    assert!(cmds.len() >= 10, "{cmds:?}");
    let joined: Vec<String> = cmds.iter().map(|c| c.join(" ")).collect();
    for needle in ["lossprism twin ", "--assess", "--plot ", "--report "] {
        assert!(
            joined
                .iter()
                .any(|c| c.contains(needle) || c.ends_with(needle.trim())),
            "no example with `{needle}`: {joined:#?}"
        );
    }
    for c in &cmds {
        assert_eq!(c[0], "lossprism", "{c:?}");
        if let Err(e) = lossprism::cli::Cli::try_parse_from(c) {
            panic!("example `{}` does not parse: {e}", c.join(" "));
        }
        // Every scenario or table it names is shipped.
        for w in c
            .iter()
            .filter(|w| w.ends_with(".toml") || w.ends_with(".csv"))
        {
            if w.starts_with("scenarios/") {
                assert!(repo().join(w).is_file(), "`{w}` is not shipped");
            }
        }
    }
    // The help shows them.
    let out = lossprism(&repo(), &["--help"]);
    assert!(text(&out.stdout).contains("lossprism twin scenarios/data/cold-store.csv"));
}

/// The cheap examples run as written, in order, in a copy of the shipped scenarios (the twin
/// with a small fidelity check, the assessment counted in the copy's ledger).
#[test]
fn help_examples_run_as_written() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    fs::create_dir_all(d.join("scenarios/data")).unwrap();
    for f in [
        "orchard-yield.toml",
        "seed-sorter-flip.toml",
        "cold-store-table.toml",
    ] {
        fs::copy(
            repo().join("scenarios").join(f),
            d.join("scenarios").join(f),
        )
        .unwrap();
    }
    fs::copy(
        repo().join("scenarios/data/cold-store.csv"),
        d.join("scenarios/data/cold-store.csv"),
    )
    .unwrap();
    for c in help_examples() {
        let words: Vec<&str> = c.iter().skip(1).map(String::as_str).collect();
        let runs_here = match words[0] {
            "validate" | "families" | "twin" => true,
            "run" => words.contains(&"--plot") || words.contains(&"--assess"),
            _ => false,
        };
        if !runs_here {
            continue;
        }
        let mut args = words.clone();
        if words[0] == "twin" {
            args.extend(["--fidelity", "0"]);
        }
        if words[0] == "run" && words.contains(&"--plot") {
            args.extend(["--replicates", "10"]);
        }
        let out = lossprism(d, &args);
        no_panic(&out);
        assert_eq!(
            out.status.code(),
            Some(0),
            "`{}`: {}",
            c.join(" "),
            text(&out.stderr)
        );
    }
    for f in [
        "curve.svg",
        "report.html",
        "cold-twin.toml",
        "scenarios/cold-store-table.holdout-ledger.json",
    ] {
        assert!(d.join(f).is_file(), "{f} not written");
    }
}

/// `families` lines up its columns for every family, whatever the length of its name or knob.
#[test]
fn families_columns_line_up() {
    let out = lossprism(&repo(), &["families"]);
    assert_eq!(out.status.code(), Some(0));
    let s = text(&out.stdout);
    let heads: Vec<&str> = s.lines().filter(|l| !l.starts_with(' ')).collect();
    for name in [
        "tree",
        "forest",
        "boost",
        "knn",
        "logistic",
        "minnorm",
        "random_features",
        "custom",
    ] {
        assert!(
            heads
                .iter()
                .any(|l| l.split_whitespace().next() == Some(name)),
            "`{name}` not listed"
        );
    }
    // The knob column and the meaning column start at the same character for every family.
    let col = |l: &str, from: usize| -> usize {
        let chars: Vec<char> = l.chars().collect();
        let mut i = from;
        // Skip the cell, then the spaces after it.
        while i < chars.len() && !(chars[i] == ' ' && chars.get(i + 1) == Some(&' ')) {
            i += 1;
        }
        while i < chars.len() && chars[i] == ' ' {
            i += 1;
        }
        i
    };
    let knob_at: Vec<usize> = heads.iter().map(|l| col(l, 0)).collect();
    let meaning_at: Vec<usize> = heads.iter().map(|l| col(l, knob_at[0] + 5)).collect();
    assert!(knob_at.iter().all(|&c| c == knob_at[0]), "{knob_at:?}\n{s}");
    assert!(
        meaning_at.iter().all(|&c| c == meaning_at[0]),
        "{meaning_at:?}\n{s}"
    );
    for l in s.lines().filter(|l| l.starts_with(' ')) {
        let at = l.chars().take_while(|c| *c == ' ').count();
        assert_eq!(at, knob_at[0], "{l}");
    }
}

/// In a shared folder with the sticky bit (as `/tmp`), a file of another user cannot be renamed
/// over or have a link to it removed, even when its mode lets everyone write it. Sweep 71: `run
/// --out new.json --csv shared.csv` staged both, failed at the rename with "Operation not
/// permitted" and left a `.bak` link to the other user's file that its own user could not
/// remove. It is refused before anything is written. Runs only as root with `setpriv` (to act
/// as the unprivileged user 65534); otherwise it says so and checks nothing.
#[test]
fn another_users_file_in_a_sticky_folder_is_refused_before_anything_is_written() {
    let root = Command::new("id")
        .arg("-u")
        .output()
        .is_ok_and(|o| text(&o.stdout).trim() == "0");
    let setpriv = Command::new("setpriv").arg("--version").output().is_ok();
    if !root || !setpriv {
        println!("note: not root or no setpriv; the sticky-folder case is skipped");
        return;
    }
    use std::os::unix::fs::PermissionsExt;
    let dir = tempfile::tempdir().unwrap();
    let top = dir.path();
    fs::set_permissions(top, fs::Permissions::from_mode(0o755)).unwrap();
    let exe = top.join("lossprism");
    fs::copy(bin(), &exe).unwrap();
    fs::set_permissions(&exe, fs::Permissions::from_mode(0o755)).unwrap();
    let shared = top.join("shared");
    fs::create_dir(&shared).unwrap();
    fs::set_permissions(&shared, fs::Permissions::from_mode(0o1777)).unwrap();
    fs::write(
        shared.join("s.toml"),
        "name = \"sticky\"\nseed = 3\nreplicates = 20\n[data]\nsource = \"synthetic\"\n\
         train_size = 50\neval_size = 40\n[[data.inputs]]\nname = \"x\"\nuniform = [0.0, 1.0]\n\
         [data.truth]\nformula = \"sin(3*x)\"\n[data.noise]\nsd = 0.5\n[model]\n\
         family = \"tree\"\ngrid = [1, 2, 3]\n",
    )
    .unwrap();
    fs::write(shared.join("shared.csv"), "root's file\n").unwrap();
    fs::set_permissions(shared.join("shared.csv"), fs::Permissions::from_mode(0o666)).unwrap();
    let out = Command::new("setpriv")
        .args(["--reuid=65534", "--regid=65534", "--clear-groups"])
        .arg(&exe)
        .args([
            "run",
            "s.toml",
            "--out",
            "new.json",
            "--csv",
            "shared.csv",
            "--quiet",
        ])
        .current_dir(&shared)
        .output()
        .unwrap();
    let err = text(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(
        err.contains("--csv: shared.csv belongs to another user in a shared folder"),
        "{err}"
    );
    let mut left: Vec<String> = fs::read_dir(&shared)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    left.sort();
    assert_eq!(
        left,
        ["s.toml", "shared.csv"],
        "nothing written or kept aside"
    );
    assert_eq!(
        fs::read_to_string(shared.join("shared.csv")).unwrap(),
        "root's file\n"
    );
}
