//! Regression-testing estimators: the library API (`harness::run_with_family`,
//! `check::compare`) on the example Nadaraya–Watson smoother and deliberately changed variants,
//! and the `lossprism check` command line: each mode (identical, paired, unpaired at the same or
//! at different evaluation points), each refusal, exit codes, `--update`. The statistical
//! calibration (false alarms, power) is in `tests/check_calibration.rs`.

mod common;
use common::{assert_bad, lossprism, put, run3};
use std::sync::Arc;

use lossprism::check::{self, CheckError, CheckOptions, Mode};
use lossprism::harness;
use lossprism::scenario::PlanOptions;

#[path = "../examples/kernel_smoother.rs"]
#[allow(dead_code)]
mod kernel_smoother;

use kernel_smoother::NadarayaWatson;

/// A small invented scenario (a sensor line's drift), cheap enough to run many times. Inputs are
/// `even` (evenly spaced, the same for every seed) so that runs with different seeds estimate
/// the same quantities at the same evaluation points.
const SMALL: &str = r#"
name = "probe-small"
seed = 5
replicates = 64

[data]
source = "synthetic"
train_size = 40
eval_size = 20

[[data.inputs]]
name = "hours"
even = [0.0, 10.0]

[data.truth]
formula = "0.5 * sin(hours) + 0.05 * hours"

[data.noise]
sd = 0.3

[model]
family = "custom"
grid = [0.3, 0.8, 2.0]
"#;

fn run(fam: NadarayaWatson, text: &str, seed: Option<u64>) -> lossprism::report::ResultDoc {
    let opts = PlanOptions {
        seed,
        replicates: None,
        eval_seed: None,
        memory_limit: None,
    };
    harness::run_with_family_opts(text, Arc::new(fam), &opts, 2).expect("run succeeds")
}

fn noisy() -> NadarayaWatson {
    NadarayaWatson {
        jitter: 0.3,
        ..NadarayaWatson::default()
    }
}

#[test]
fn same_estimator_same_seed_is_identical() {
    let a = run(NadarayaWatson::default(), SMALL, None);
    let b = run(NadarayaWatson::default(), SMALL, None);
    let r = check::compare(&b, &a, &CheckOptions::default()).unwrap();
    assert!(r.identical);
    assert!(!r.regressed());
    assert_eq!(r.comparisons.len(), 9);
    assert!(r.to_string().starts_with("identical"), "{r}");
}

#[test]
fn noisier_variant_regresses_with_variance_named() {
    let base = run(NadarayaWatson::default(), SMALL, None);
    let new = run(noisy(), SMALL, None);
    let r = check::compare(&new, &base, &CheckOptions::default()).unwrap();
    println!("{r}");
    assert!(!r.identical);
    assert!(r.regressed());
    // Jitter uniform on [-0.3, 0.3] adds 0.3²/3 = 0.03 of variance at every bandwidth.
    let worse = r.worse_terms();
    assert!(worse.iter().any(|t| t == "variance"), "{r}");
    assert!(worse.iter().any(|t| t == "expected_loss"), "{r}");
    for c in r.worse().filter(|c| c.term == "variance") {
        assert!(c.diff > 0.02 && c.diff < 0.04, "{c:?}");
    }
    let text = r.to_string();
    assert!(text.contains("REGRESSED"), "{text}");
    assert!(text.contains("variance"), "{text}");
}

#[test]
fn improved_variant_is_better_and_not_regressed() {
    let base = run(noisy(), SMALL, None);
    let new = run(NadarayaWatson::default(), SMALL, None);
    let r = check::compare(&new, &base, &CheckOptions::default()).unwrap();
    println!("{r}");
    assert!(!r.regressed(), "{r}");
    assert!(r.better().any(|c| c.term == "variance"), "{r}");
    assert!(r.to_string().contains("better"));
}

#[test]
fn mismatched_scenario_is_refused() {
    let base = run(NadarayaWatson::default(), SMALL, None);
    let other = SMALL.replace("train_size = 40", "train_size = 50");
    let new = run(NadarayaWatson::default(), &other, None);
    let e = check::compare(&new, &base, &CheckOptions::default()).unwrap_err();
    assert!(matches!(e, CheckError::Mismatch(_)), "{e}");
    assert!(e.to_string().contains("train_size"), "{e}");
    let other = SMALL.replace("[0.3, 0.8, 2.0]", "[0.3, 0.8, 2.5]");
    let new = run(NadarayaWatson::default(), &other, None);
    let e = check::compare(&new, &base, &CheckOptions::default()).unwrap_err();
    assert!(e.to_string().contains("grid differs"), "{e}");
}

/// The README's library recipe: a fresh run against the same estimator's saved result is
/// `identical` (it was `paired`: a document read back lists its terms alphabetically, a fresh
/// one in the loss's order, and rows were compared by position; and serde_json's default float
/// parser is not correctly rounded, so 0.0015879777906180961 came back 1 ulp off).
#[test]
fn a_fresh_run_is_identical_to_its_saved_result() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("base.json");
    harness::save_result(&path, &run(NadarayaWatson::default(), SMALL, None)).unwrap();
    let base = harness::load_result(&path).unwrap();
    let new = run(NadarayaWatson::default(), SMALL, None);
    assert_ne!(
        new.points[0].terms.iter().map(|t| &t.0).collect::<Vec<_>>(),
        base.points[0]
            .terms
            .iter()
            .map(|t| &t.0)
            .collect::<Vec<_>>(),
        "the fixture no longer tests the order"
    );
    let r = check::compare(&new, &base, &CheckOptions::default()).unwrap();
    assert!(r.identical, "{r}");
    // One bit of one term still breaks it.
    let mut off = new.clone();
    let v = &mut off.points[1].terms[2].1;
    *v = f64::from_bits(v.to_bits() + 1);
    assert!(
        !check::compare(&off, &base, &CheckOptions::default())
            .unwrap()
            .identical
    );
}

#[test]
fn custom_family_must_accept_the_grid() {
    let bad = SMALL.replace("[0.3, 0.8, 2.0]", "[0.3, -1]");
    let e = harness::run_with_family(&bad, Arc::new(NadarayaWatson::default())).unwrap_err();
    assert!(e.to_string().contains("bandwidth = -1"), "{e}");
}

#[test]
fn command_line_check() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let save = |name: &str, doc: &lossprism::report::ResultDoc| {
        harness::save_result(&d.join(name), doc).unwrap();
    };
    let plain = run(NadarayaWatson::default(), SMALL, None);
    save("base.json", &plain);
    save("same.json", &plain);
    save("noisy.json", &run(noisy(), SMALL, None));
    let other = SMALL.replace("train_size = 40", "train_size = 50");
    save("other.json", &run(NadarayaWatson::default(), &other, None));
    // Results without standard errors (`null`), as runs with one block wrote them before such
    // plans were refused: `check` must still say what is missing rather than compare.
    let one_block = |fam: NadarayaWatson| {
        let mut plan =
            harness::plan_with_family(SMALL, Arc::new(fam), &PlanOptions::default()).unwrap();
        plan.blocks = 1;
        let outcome = lossprism::runner::run(&plan, 2).unwrap();
        lossprism::report::build(&plan, &outcome)
    };
    save("one-a.json", &one_block(NadarayaWatson::default()));
    save("one-b.json", &one_block(noisy()));

    let (code, out, _) = run3(d, &["check", "same.json", "--baseline", "base.json"]);
    assert_eq!(code, 0);
    assert!(out.starts_with("identical"), "{out}");

    // A baseline saved by an editor with a byte-order mark, or after more blank space than
    // the first look reads (64 KiB), is the same document: both were refused ("invalid JSON at
    // line 1 column 1"; "the file is empty").
    let text = std::fs::read(d.join("base.json")).unwrap();
    let mut bom = b"\xef\xbb\xbf".to_vec();
    bom.extend_from_slice(&text);
    std::fs::write(d.join("bom.json"), bom).unwrap();
    let mut blank = vec![b' '; 66_000];
    blank.extend_from_slice(&text);
    std::fs::write(d.join("blank.json"), blank).unwrap();
    for b in ["bom.json", "blank.json"] {
        let (code, out, err) = run3(d, &["check", "same.json", "--baseline", b]);
        assert_eq!(code, 0, "{b}: {err}");
        assert!(out.starts_with("identical"), "{b}: {out}");
    }
    std::fs::write(d.join("spaces.json"), b"  \n\n  ").unwrap();
    let (code, _, err) = run3(d, &["check", "same.json", "--baseline", "spaces.json"]);
    assert_eq!(code, 2);
    assert!(err.contains("holds only blank space"), "{err}");
    // An empty baseline (made by `touch`) holds nothing to compare with: `check` says how to
    // create it, and `--update` creates it as it creates a missing one.
    std::fs::write(d.join("empty.json"), b"").unwrap();
    let (code, _, err) = run3(d, &["check", "same.json", "--baseline", "empty.json"]);
    assert_eq!(code, 2);
    assert!(
        err.contains("empty.json: baseline is empty; create it with"),
        "{err}"
    );
    let (code, out, err) = run3(
        d,
        &["check", "same.json", "--baseline", "empty.json", "--update"],
    );
    assert_eq!(code, 0, "{err}");
    assert!(
        out.contains("baseline empty.json created from same.json"),
        "{out}"
    );
    let (code, out, _) = run3(d, &["check", "same.json", "--baseline", "empty.json"]);
    assert_eq!(code, 0);
    assert!(out.starts_with("identical"), "{out}");

    let (code, out, _) = run3(d, &["check", "noisy.json", "--baseline", "base.json"]);
    assert_eq!(code, 1, "{out}");
    assert!(
        out.contains("REGRESSED") && out.contains("variance"),
        "{out}"
    );

    // A 1000 % margin on every term hides the change; per-term margins override it.
    let (code, _, _) = run3(
        d,
        &[
            "check",
            "noisy.json",
            "--baseline",
            "base.json",
            "--margin",
            "1000%",
        ],
    );
    assert_eq!(code, 0);
    let (code, _, _) = run3(
        d,
        &[
            "check",
            "noisy.json",
            "--baseline",
            "base.json",
            "--margin",
            "1000%",
            "--margin-term",
            "variance=1%",
        ],
    );
    assert_eq!(code, 1);

    let (code, out, _) = run3(d, &["check", "base.json", "--baseline", "noisy.json"]);
    assert_eq!(code, 0, "{out}");
    assert!(out.contains("better"), "{out}");

    let (code, _, err) = run3(d, &["check", "other.json", "--baseline", "base.json"]);
    assert_eq!(code, 2);
    assert_eq!(err.lines().count(), 1, "{err}");
    assert!(err.contains("scenario.train_size differs"), "{err}");

    let (code, _, err) = run3(d, &["check", "one-b.json", "--baseline", "one-a.json"]);
    assert_eq!(code, 2);
    assert!(err.contains("at least 2 replicate blocks"), "{err}");

    let (code, _, err) = run3(
        d,
        &[
            "check",
            "noisy.json",
            "--baseline",
            "base.json",
            "--margin-term",
            "varience=1%",
        ],
    );
    assert_eq!(code, 2);
    assert!(err.contains("unknown term"), "{err}");

    // --update accepts the new result: the baseline becomes its exact bytes.
    let (code, _, _) = run3(
        d,
        &["check", "noisy.json", "--baseline", "base.json", "--update"],
    );
    assert_eq!(code, 0);
    assert_eq!(
        std::fs::read(d.join("base.json")).unwrap(),
        std::fs::read(d.join("noisy.json")).unwrap()
    );
    // ... and creates a missing baseline; without --update a missing baseline is an error.
    let (code, _, err) = run3(d, &["check", "same.json", "--baseline", "new.json"]);
    assert_eq!(code, 2);
    assert!(err.contains("--update"), "{err}");
    let (code, _, _) = run3(
        d,
        &["check", "same.json", "--baseline", "new.json", "--update"],
    );
    assert_eq!(code, 0);
    assert!(d.join("new.json").exists());
    // A baseline of the first format: the refusal says to accept a new one with --update, and
    // --update replaces it (it refused, repeating the same advice); without --update it stays.
    let v1 = r#"{"format": "lossprism-result/1", "version": "0.1.0", "points": []}"#;
    std::fs::write(d.join("v1.json"), v1).unwrap();
    let (code, _, err) = run3(d, &["check", "same.json", "--baseline", "v1.json"]);
    assert_eq!(code, 2);
    assert!(err.contains("--update"), "{err}");
    assert_eq!(std::fs::read_to_string(d.join("v1.json")).unwrap(), v1);
    let (code, out, err) = run3(
        d,
        &["check", "same.json", "--baseline", "v1.json", "--update"],
    );
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("written by an earlier lossprism"), "{out}");
    assert_eq!(
        std::fs::read(d.join("v1.json")).unwrap(),
        std::fs::read(d.join("same.json")).unwrap()
    );
    // Anything else that is not a result is not replaced, with or without --update.
    std::fs::write(d.join("notes.json"), r#"{"format": "my-notes"}"#).unwrap();
    let (code, _, _) = run3(
        d,
        &["check", "same.json", "--baseline", "notes.json", "--update"],
    );
    assert_eq!(code, 2);
    assert_eq!(
        std::fs::read_to_string(d.join("notes.json")).unwrap(),
        r#"{"format": "my-notes"}"#
    );
}

#[test]
fn command_line_refuses_custom_family() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("c.toml"), SMALL).unwrap();
    for args in [&["run", "c.toml"][..], &["validate", "c.toml"][..]] {
        let (code, _, err) = run3(dir.path(), args);
        assert_eq!(code, 2, "{args:?}");
        assert_eq!(err.lines().count(), 1, "{err}");
        assert!(err.contains("family `custom`"), "{err}");
    }
}

/// A tiny k-NN scenario for the command line: uniform inputs, so `--eval-seed` moves the
/// evaluation points.
const KNN: &str = r#"
name = "tiny-knn"
seed = 3
replicates = 16

[data]
source = "synthetic"
train_size = 40
eval_size = 30

[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]

[data.truth]
formula = "sin(6 * x)"

[data.noise]
sd = 0.5

[model]
family = "knn"
grid = [1, 3, 9]
"#;

#[test]
fn command_line_modes_and_refusals() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let save = |name: &str, doc: &lossprism::report::ResultDoc| {
        harness::save_result(&d.join(name), doc).unwrap();
    };
    let base = run(NadarayaWatson::default(), SMALL, None);
    save("base.json", &base);
    // Same seed, a changed estimator: paired.
    save("noisy.json", &run(noisy(), SMALL, None));
    let (code, out, _) = run3(d, &["check", "noisy.json", "--baseline", "base.json"]);
    assert_eq!(code, 1, "{out}");
    assert!(
        out.starts_with("mode: paired (same seed 5, 64 replicates, 32 blocks"),
        "{out}"
    );
    assert!(
        out.contains("[paired: z > 4.622 and d > 2% of |base|]"),
        "{out}"
    );
    assert!(
        out.contains("worse  bandwidth = 0.3  expected_loss"),
        "{out}"
    );
    assert!(out.contains("paired standard errors are"), "{out}");
    // A fresh seed: unpaired at the same points (evenly spaced inputs never move).
    save(
        "fresh.json",
        &run(NadarayaWatson::default(), SMALL, Some(77)),
    );
    let (code, out, _) = run3(d, &["check", "fresh.json", "--baseline", "base.json"]);
    assert_eq!(code, 0, "{out}");
    assert!(
        out.starts_with("mode: unpaired, same evaluation points (seed 77 against 5"),
        "{out}"
    );
    assert!(out.contains("ok: "), "{out}");

    // The built-in k-NN through the binary: fresh seeds keep the points, --eval-seed moves them.
    put(d, "knn.toml", KNN);
    let fixed = KNN.replace("eval_size = 30", "eval_size = 30\ndesign = \"fixed\"");
    put(d, "fixed.toml", &fixed);
    for (args, name) in [
        (&["run", "knn.toml"][..], "k-base.json"),
        (&["run", "knn.toml", "--seed", "8"][..], "k-seed.json"),
        (
            &["run", "knn.toml", "--seed", "8", "--eval-seed", "9"][..],
            "k-eval.json",
        ),
        (&["run", "fixed.toml"][..], "f-base.json"),
        (
            &["run", "fixed.toml", "--seed", "8", "--eval-seed", "9"][..],
            "f-eval.json",
        ),
    ] {
        let mut a = args.to_vec();
        a.extend(["--quiet", "--out", name]);
        let (code, _, err) = run3(d, &a);
        assert_eq!(code, 0, "{a:?}: {err}");
    }
    let (code, out, _) = run3(d, &["check", "k-base.json", "--baseline", "k-base.json"]);
    assert_eq!(code, 0);
    assert!(out.starts_with("identical"), "{out}");
    let (code, out, _) = run3(d, &["check", "k-seed.json", "--baseline", "k-base.json"]);
    assert_eq!(code, 0, "{out}");
    assert!(
        out.starts_with("mode: unpaired, same evaluation points"),
        "{out}"
    );
    let (code, out, _) = run3(d, &["check", "k-eval.json", "--baseline", "k-base.json"]);
    assert_eq!(code, 0, "{out}");
    assert!(
        out.starts_with("mode: unpaired, different evaluation points (eval_seed 9 against 3"),
        "{out}"
    );
    // A fixed design moves with the evaluation seed: refused, saying how to compare.
    let line = assert_bad(
        &lossprism(d, &["check", "f-eval.json", "--baseline", "f-base.json"]),
        &[
            "eval_seed 9 in the result, 3 in the baseline",
            "fixed design",
            "same eval_seed",
        ],
    );
    assert!(line.starts_with("error: cannot compare:"), "{line}");

    // A baseline written before `uncertainty` existed: identical is fine, anything else is
    // refused with what to do.
    let mut old: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(d.join("base.json")).unwrap()).unwrap();
    old.as_object_mut().unwrap().remove("uncertainty");
    std::fs::write(
        d.join("old.json"),
        serde_json::to_string_pretty(&old).unwrap(),
    )
    .unwrap();
    let (code, out, _) = run3(d, &["check", "base.json", "--baseline", "old.json"]);
    assert_eq!(code, 0, "{out}");
    assert!(out.starts_with("identical"), "{out}");
    assert_bad(
        &lossprism(d, &["check", "noisy.json", "--baseline", "old.json"]),
        &[
            "the baseline has no `uncertainty` section",
            "rerun the baseline",
            "--update",
        ],
    );

    // Thresholds: negative values are refused with a clear line (not a parser puzzle), and
    // the help shows each default once.
    assert_bad(
        &lossprism(
            d,
            &[
                "check",
                "noisy.json",
                "--baseline",
                "base.json",
                "--sigma",
                "-1",
            ],
        ),
        &["--sigma cannot be negative"],
    );
    let out = lossprism(
        d,
        &[
            "check",
            "noisy.json",
            "--baseline",
            "base.json",
            "--margin",
            "-5%",
        ],
    );
    assert_eq!(out.status.code(), Some(2));
    assert!(
        common::text(&out.stderr).contains("cannot be negative"),
        "{out:?}"
    );
    // `--margin` takes a fraction or a percentage.
    let (code, frac, _) = run3(
        d,
        &[
            "check",
            "noisy.json",
            "--baseline",
            "base.json",
            "--margin",
            "0.05",
        ],
    );
    assert_eq!(code, 1, "{frac}");
    assert!(frac.contains("d > 5% of |base|"), "{frac}");
    let (_, pct, _) = run3(
        d,
        &[
            "check",
            "noisy.json",
            "--baseline",
            "base.json",
            "--margin",
            "5%",
        ],
    );
    assert_eq!(frac, pct);
    let (code, help, _) = run3(d, &["check", "--help"]);
    assert_eq!(code, 0);
    assert_eq!(help.matches("[default: 4]").count(), 1, "{help}");
    assert_eq!(help.matches("default 4").count(), 0, "{help}");
    let (_, help, _) = run3(d, &["run", "--help"]);
    assert!(help.contains("--eval-seed"), "{help}");

    // --update creates the baseline's folders.
    let (code, out, _) = run3(
        d,
        &[
            "check",
            "k-seed.json",
            "--baseline",
            "ci/baselines/knn.json",
            "--update",
        ],
    );
    assert_eq!(code, 0, "{out}");
    assert_eq!(
        std::fs::read(d.join("ci/baselines/knn.json")).unwrap(),
        std::fs::read(d.join("k-seed.json")).unwrap()
    );
}

#[test]
fn library_modes() {
    let base = run(NadarayaWatson::default(), SMALL, None);
    let r = check::compare(&run(noisy(), SMALL, None), &base, &CheckOptions::default()).unwrap();
    assert_eq!(r.mode, Mode::Paired);
    // Pairing shrinks the standard errors: the same training sets cancel most Monte Carlo noise.
    assert!(r.se_ratio().unwrap() < 1.0, "{r}");
    let r = check::compare(
        &run(noisy(), SMALL, Some(9)),
        &base,
        &CheckOptions::default(),
    )
    .unwrap();
    assert_eq!(r.mode, Mode::SamePoints);
}

/// A result written before the format's second version is refused with what to do (rerun, and
/// accept a baseline with `--update`), not compared.
#[test]
fn results_of_the_first_format_are_refused_with_a_way_out() {
    let old = r#"{"format": "lossprism-result/1", "version": "0.1.0", "points": []}"#;
    let err = lossprism::check::parse_result(old, "baseline")
        .unwrap_err()
        .to_string();
    assert!(err.contains("earlier lossprism"), "{err}");
    assert!(err.contains("--update"), "{err}");
    assert!(err.contains("lossprism-result/2"), "{err}");
}

/// Every shipped scenario's result, at 20 replicates, is a document `check` and `plot` accept
/// as written: every loss, synthetic, table and twin sources, ensembles, several models, a
/// learning curve and a selection audit. `validate` holds each standard error to the jackknife
/// of its leave-one-block-out values except where a loss adds a part
/// (`Loss::stderr_beyond_jackknife`), and a loss that added one without saying so would be
/// refused here.
#[test]
fn every_shipped_scenario_writes_a_document_check_accepts() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let scenarios = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios");
    let mut names: Vec<_> = std::fs::read_dir(&scenarios)
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|x| x == "toml"))
        .collect();
    names.sort();
    assert!(names.len() >= 15, "{names:?}");
    for path in names {
        let name = path.file_stem().unwrap().to_string_lossy().to_string();
        let out = d.join(format!("{name}.json"));
        let (s, o) = (path.to_string_lossy(), out.to_string_lossy());
        let (code, _, err) = run3(d, &["run", &s, "--replicates", "20", "--out", &o, "-q"]);
        assert_eq!(code, 0, "{name}: {err}");
        let (code, text, err) = run3(d, &["check", &o, "--baseline", &o]);
        assert_eq!(code, 0, "{name}: {text}{err}");
        let svg = d.join(format!("{name}.svg"));
        let (code, _, err) = run3(d, &["plot", &o, "--out", &svg.to_string_lossy()]);
        assert_eq!(code, 0, "{name}: {err}");
    }
}

#[test]
fn a_table_scenario_moved_elsewhere_compares_with_its_baseline() {
    // The table's location is not part of the run: the same scenario moved into another folder
    // and given its table by an absolute path is identical to the baseline; the same scenario
    // on a table with one value changed is refused (its evaluation points' truth differs).
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let repo = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios");
    let text = std::fs::read_to_string(repo.join("cold-store-table.toml")).unwrap();
    let csv = std::fs::read_to_string(repo.join("data/cold-store.csv")).unwrap();
    std::fs::create_dir_all(d.join("a/data")).unwrap();
    std::fs::create_dir_all(d.join("b/deep")).unwrap();
    std::fs::write(d.join("a/data/cold-store.csv"), &csv).unwrap();
    std::fs::write(d.join("a/s.toml"), &text).unwrap();
    let moved = d.join("b/deep/t.csv");
    std::fs::write(&moved, &csv).unwrap();
    let abs = text.replace(
        "path = \"data/cold-store.csv\"",
        &format!("path = {:?}", moved.to_string_lossy()),
    );
    assert_ne!(
        abs, text,
        "the scenario names its table as data/cold-store.csv"
    );
    std::fs::write(d.join("b/deep/s.toml"), &abs).unwrap();
    let go = |s: &str, out: &str| {
        let (code, _, err) = run3(d, &["run", s, "--replicates", "12", "--out", out, "-q"]);
        assert_eq!(code, 0, "{err}");
    };
    go("a/s.toml", "base.json");
    go("b/deep/s.toml", "moved.json");
    let (code, text_out, err) = run3(d, &["check", "moved.json", "--baseline", "base.json"]);
    assert_eq!(code, 0, "{text_out}{err}");
    assert!(text_out.starts_with("identical"), "{text_out}");
    // One temperature changed: refused, not compared.
    let mut lines: Vec<String> = csv.lines().map(str::to_string).collect();
    let last = lines[4].rfind(',').unwrap();
    lines[4] = format!("{},99.5", &lines[4][..last]);
    std::fs::write(&moved, lines.join("\n") + "\n").unwrap();
    go("b/deep/s.toml", "changed.json");
    let (code, _, err) = run3(d, &["check", "changed.json", "--baseline", "base.json"]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("the scenario's data changed"), "{err}");
}

#[test]
fn a_twin_result_of_0_2_0_still_reads() {
    // Written by lossprism 0.2.0 (commit a723367^, built from `git archive`): the cold-store
    // twin (`twin scenarios/data/cold-store.csv --target temp_c --seed 7 --fidelity 2
    // --fidelity-replicates 20`) run at 20 replicates. Its twin section has a fidelity record
    // and no recommended picks, which came later; a CI baseline of it was refused as "not the
    // picks of its fidelity models".
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let old = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/twin-result-0.2.0.json");
    let old = old.to_string_lossy();
    let (code, out, err) = run3(d, &["check", &old, "--baseline", &old]);
    assert_eq!(code, 0, "{out}{err}");
    assert!(out.starts_with("identical"), "{out}");
    let (code, _, err) = run3(d, &["plot", &old, "--out", "old.svg"]);
    assert_eq!(code, 0, "{err}");
    // A result of this version whose twin section lost its picks is edited, not old.
    let twin =
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/cold-store-twin.toml");
    let (code, _, err) = run3(
        d,
        &[
            "run",
            &twin.to_string_lossy(),
            "--replicates",
            "12",
            "--out",
            "tw.json",
            "-q",
        ],
    );
    assert_eq!(code, 0, "{err}");
    let mut v: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(d.join("tw.json")).unwrap()).unwrap();
    assert!(v["scenario"]["twin"]["recommended"].is_array(), "{v}");
    v["scenario"]["twin"]
        .as_object_mut()
        .unwrap()
        .remove("recommended");
    std::fs::write(d.join("tw2.json"), v.to_string()).unwrap();
    let (code, _, err) = run3(d, &["check", "tw2.json", "--baseline", "tw2.json"]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("`scenario.twin.recommended`"), "{err}");
}
