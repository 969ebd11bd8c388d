//! Every shipped scenario (and the embedded default) parses, plans and runs at library level
//! with a small R, and its result document satisfies the exact identities its loss declares
//! (squared loss: noise + bias² + variance; 0-1 loss: Domingos, Kohavi-Wolpert and James sums).

use std::fs;
use std::path::PathBuf;

use lossprism::report::{self, ResultDoc};
use lossprism::runner;
use lossprism::scenario::{self, Plan, PlanOptions};

/// Replicates used for every scenario here: enough for variances and block standard errors,
/// and no fewer than any shipped scenario's own `blocks` (bakery-study: 20), which a smaller
/// `--replicates` would be refused for.
const R: u64 = 20;

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

/// Checks one result document against its plan: finite terms, non-negative variance, and every
/// exact identity the loss declares (squared loss: ESL eq. 7.9; 0-1 loss: Domingos, Kohavi and
/// Wolpert, James; further losses: their own) holding at every grid value to rounding.
fn check(what: &str, plan: &Plan, doc: &ResultDoc) {
    assert_eq!(doc.format, report::FORMAT, "{what}");
    assert_eq!(doc.replicates, R, "{what}");
    assert!(
        !doc.scenario.about.trim().is_empty(),
        "{what}: `about` is empty"
    );
    let observed = doc.table.is_some();
    let cells: usize = plan.models.iter().map(|m| m.grid.len()).sum::<usize>() * plan.sizes.len();
    assert_eq!(
        doc.points.len(),
        cells,
        "{what}: one row per (size, model, value)"
    );
    for (s, &n) in plan.sizes.iter().enumerate() {
        for (i, model) in plan.models.iter().enumerate() {
            let family = model.family.name();
            let rows: Vec<_> = doc
                .points
                .iter()
                .filter(|p| p.family.as_deref().map_or(true, |f| f == family))
                .filter(|p| p.train_size.map_or(true, |t| t as usize == n))
                .collect();
            let grid = &model.grid;
            assert_eq!(
                rows.len(),
                grid.len(),
                "{what}: {family} at size {n} (size {s})"
            );
            let identities = plan.loss.identities(&plan.shape(i, 0), observed);
            assert!(
                !identities.is_empty(),
                "{what}: the loss declares no identity"
            );
            for (p, &g) in rows.iter().zip(grid) {
                assert_eq!(p.value, g, "{what}");
                for (k, v) in &p.terms {
                    assert!(v.is_finite(), "{what} at {g}: `{k}` = {v}");
                }
                // The main variance-type term, by role (a loss may key it otherwise).
                let variance = doc
                    .terms
                    .iter()
                    .find(|t| t.role == "variance" && t.group == "main")
                    .map_or("variance", |t| t.key.as_str());
                assert!(
                    p.get(variance) >= 0.0,
                    "{what} at {g}: {variance} {}",
                    p.get(variance)
                );
                for id in &identities {
                    let sum: f64 = id.parts.iter().map(|(k, c)| c * p.get(k)).sum();
                    close(p.get(id.total), sum, &format!("{what} at {g}: {}", id.name));
                }
            }
        }
    }
    let best_model = plan
        .models
        .iter()
        .find(|m| {
            doc.best
                .family
                .as_deref()
                .map_or(true, |f| f == m.family.name())
        })
        .expect("the best names a model");
    assert!(
        best_model.grid.contains(&doc.best.value),
        "{what}: best off grid"
    );
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

/// Lognormal and exponential inputs: the draws' mean and variance agree with the laws' moments
/// (textbook: lognormal mean exp(m + s²/2), variance (exp(s²) − 1)·exp(2m + s²); exponential
/// mean 1/λ, variance 1/λ²; from memory) within 5 standard errors of 200 000 draws, and a
/// scenario with them runs.
#[test]
fn lognormal_and_exponential_inputs_draw_their_laws() {
    use rand::SeedableRng;
    let src = r#"name = "skewed-inputs"
about = "Invented: a saturating truth on skewed inputs."
seed = 4
replicates = 8
[data]
source = "synthetic"
train_size = 60
eval_size = 40
[[data.inputs]]
name = "a"
exponential = 2.0
[[data.inputs]]
name = "b"
lognormal = [0.0, 0.5]
[data.truth]
formula = "3*tanh(a - b)"
[data.noise]
sd = 1.0
[model]
family = "tree"
grid = [1, 3]
"#;
    let dir = tempfile::tempdir().unwrap();
    let f = dir.path().join("s.toml");
    std::fs::write(&f, src).unwrap();
    let plan = lossprism::scenario::load(&f, &opts()).expect("plans");
    let lossprism::scenario::Source::Synthetic(sp) = &plan.source else {
        panic!("synthetic")
    };
    let n = 200_000;
    let x = sp
        .process
        .draw_inputs(n, &mut rand_chacha::ChaCha8Rng::seed_from_u64(3));
    let moments = |j: usize| {
        let c = x.column(j);
        let m = c.sum() / n as f64;
        let v = c.iter().map(|t| (t - m) * (t - m)).sum::<f64>() / (n - 1) as f64;
        (m, v)
    };
    let (ma, va) = moments(0);
    // Exponential(2): mean 0.5, variance 0.25 (the variance's SE from the fourth moment, 9/λ⁴).
    assert!((ma - 0.5).abs() < 5.0 * (0.25f64 / n as f64).sqrt(), "{ma}");
    assert!(
        (va - 0.25).abs() < 5.0 * ((9.0 / 16.0 - 0.0625) / n as f64).sqrt(),
        "{va}"
    );
    assert!(x.column(0).iter().all(|v| *v >= 0.0));
    let (mb, vb) = moments(1);
    let s2: f64 = 0.25;
    let (mean, var) = ((s2 / 2.0).exp(), s2.exp_m1() * s2.exp());
    assert!(
        (mb - mean).abs() < 5.0 * (var / n as f64).sqrt(),
        "{mb} vs {mean}"
    );
    // The sample variance's relative SE is √((κ + 2)/n), κ the excess kurtosis
    // exp(4s²) + 2 exp(3s²) + 3 exp(2s²) − 6 (textbook, from memory): about 0.63% here.
    let kurt = (4.0 * s2).exp() + 2.0 * (3.0 * s2).exp() + 3.0 * (2.0 * s2).exp() - 6.0;
    let rel = ((kurt + 2.0) / n as f64).sqrt();
    assert!(
        (vb / var - 1.0).abs() < 5.0 * rel,
        "{vb} vs {var} (rel SE {rel})"
    );
    assert!(x.column(1).iter().all(|v| *v > 0.0));
    let doc = lossprism::report::build(&plan, &lossprism::runner::run(&plan, 1).expect("runs"));
    assert!(doc.scenario.inputs[0]
        .distribution
        .contains("exponential(rate 2)"));
    assert!(doc.scenario.inputs[1]
        .distribution
        .contains("lognormal(meanlog 0, sdlog 0.5)"));
}
