//! Every shipped scenario (and the embedded default) parses, plans and runs at library level
//! with a small R, and its result document satisfies the exact decomposition identities
//! (squared loss: noise + bias² + variance; 0-1 loss: Kohavi-Wolpert and James sums).

use std::fs;
use std::path::PathBuf;

use lossprism::report::{self, ResultDoc};
use lossprism::runner;
use lossprism::scenario::{self, Plan, PlanOptions};

/// Replicates used for every scenario here: enough for variances and block standard errors.
const R: u64 = 8;

fn shipped() -> Vec<PathBuf> {
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("scenarios");
    let mut v: Vec<PathBuf> = fs::read_dir(&dir)
        .expect("scenarios/ exists")
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "toml"))
        .collect();
    v.sort();
    assert!(!v.is_empty(), "no scenarios in {}", dir.display());
    v
}

fn opts() -> PlanOptions {
    PlanOptions {
        replicates: Some(R),
        ..PlanOptions::default()
    }
}

/// `a == b` to 1e-9 relative: the two sides of an exact identity, up to rounding.
fn close(a: f64, b: f64, what: &str) {
    assert!(
        a.is_finite() && b.is_finite() && (a - b).abs() <= 1e-9 * a.abs().max(b.abs()),
        "{what}: {a} vs {b}"
    );
}

/// Checks one result document against its plan.
fn check(what: &str, plan: &Plan, doc: &ResultDoc) {
    assert_eq!(doc.format, report::FORMAT, "{what}");
    assert_eq!(doc.replicates, R, "{what}");
    assert!(
        !doc.scenario.about.trim().is_empty(),
        "{what}: `about` is empty"
    );
    assert_eq!(doc.points.len(), plan.grid.len(), "{what}");
    for (p, &g) in doc.points.iter().zip(&plan.grid) {
        assert_eq!(p.value, g, "{what}");
        assert!(p.noise > 0.0, "{what} at {g}: noise {}", p.noise);
        assert!(p.variance >= 0.0, "{what} at {g}: variance {}", p.variance);
        assert!(
            p.expected_loss_direct.is_finite(),
            "{what} at {g}: expected_loss_direct {}",
            p.expected_loss_direct
        );
        match doc.loss.as_str() {
            "squared" => {
                let bias_sq = p
                    .bias_sq
                    .unwrap_or_else(|| panic!("{what} at {g}: no bias_sq"));
                assert!(bias_sq.is_finite(), "{what} at {g}: bias_sq {bias_sq}");
                // Exact identity (design §1, ESL 2nd ed. eq. 7.9): expected loss is
                // noise + bias² + variance; only rounding may separate the two sides.
                close(
                    p.expected_loss,
                    p.noise + bias_sq + p.variance,
                    &format!("{what} at {g}: noise + bias_sq + variance"),
                );
            }
            "zero_one" => {
                assert!(
                    (0.0..=1.0).contains(&p.expected_loss),
                    "{what} at {g}: 0-1 expected loss {}",
                    p.expected_loss
                );
                assert!(p.variance <= 1.0, "{what} at {g}: variance {}", p.variance);
                let bias = p.bias.unwrap_or_else(|| panic!("{what} at {g}: no bias"));
                assert!((0.0..=1.0).contains(&bias), "{what} at {g}: bias {bias}");
                // Exact identity (Kohavi & Wolpert 1996, ICML; the finite-R correction enters
                // bias² and variance with opposite signs): noise + bias² + variance = E L.
                let kw = p.kohavi_wolpert.as_ref().expect("Kohavi-Wolpert terms");
                let kw_sum = kw.noise.unwrap() + kw.bias_sq.unwrap() + kw.variance.unwrap();
                close(
                    p.expected_loss,
                    kw_sum,
                    &format!("{what} at {g}: Kohavi-Wolpert sum"),
                );
                // Exact identity (James 2003, Machine Learning 51:115-135, the sum
                // telescopes): Bayes error + systematic effect + variance effect = E L.
                let j = p.james.as_ref().expect("James terms");
                let j_sum = p.noise + j.systematic_effect.unwrap() + j.variance_effect.unwrap();
                close(p.expected_loss, j_sum, &format!("{what} at {g}: James sum"));
            }
            other => panic!("{what}: unexpected loss `{other}`"),
        }
    }
    assert!(plan.grid.contains(&doc.best.value), "{what}: best off grid");
    assert!(!doc.reading.is_empty(), "{what}: empty reading");
}

#[test]
fn every_shipped_scenario_runs_and_decomposes_exactly() {
    for path in shipped() {
        let what = path.display().to_string();
        let plan = scenario::load(&path, &opts()).unwrap_or_else(|e| panic!("{what}: {e}"));
        assert_eq!(plan.replicates, R, "{what}: --replicates override ignored");
        let outcome = runner::run(&plan, 2).unwrap_or_else(|e| panic!("{what}: {e}"));
        let doc = report::build(&plan, &outcome);
        check(&what, &plan, &doc);
    }
}

#[test]
fn shipped_scenarios_do_not_depend_on_thread_count() {
    // Design §2 invariant: per-replicate streams and in-order block merging make results
    // bit-identical for any thread count.
    for path in shipped() {
        let what = path.display().to_string();
        let plan = scenario::load(&path, &opts()).unwrap_or_else(|e| panic!("{what}: {e}"));
        let one = report::build(&plan, &runner::run(&plan, 1).unwrap());
        let two = report::build(&plan, &runner::run(&plan, 2).unwrap());
        assert_eq!(
            report::to_json(&one),
            report::to_json(&two),
            "{what}: thread count changes the result"
        );
    }
}

#[test]
fn embedded_default_runs_and_matches_its_file() {
    let plan = scenario::load_default(&opts()).expect("embedded default plans");
    let outcome = runner::run(&plan, 2).expect("embedded default runs");
    let doc = report::build(&plan, &outcome);
    check("embedded default", &plan, &doc);

    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("scenarios/orchard-yield.toml");
    let from_file = scenario::load(&path, &opts()).unwrap();
    let doc_file = report::build(&from_file, &runner::run(&from_file, 2).unwrap());
    assert_eq!(
        report::to_json(&doc),
        report::to_json(&doc_file),
        "the embedded default should be the shipped orchard scenario"
    );
}
