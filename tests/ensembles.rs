//! Ensembles and several fits per training set, checked against numbers recomputed outside the
//! engine from the members themselves, and for bit-identity across runs:
//!
//! - **Bias-variance-diversity** (Krogh and Vedelsby 1995, "Neural network ensembles, cross
//!   validation, and active learning", NIPS 7; Wood et al. 2023, "A unified theory of diversity
//!   in ensemble learning", *JMLR* 24(359)): the ensemble's expected loss equals noise + the
//!   members' average bias² + their average variance − diversity. A recording wrapper around the
//!   forest keeps every tree's prediction (from the prefix averages) for every replicate; the
//!   members' own bias² and variance are computed from those, per member, with no
//!   exchangeability assumed, and the identity is checked against the engine's expected loss and
//!   diversity at float tolerance, for regression (squared loss) and two classes (Brier score).
//! - **Law of total variance** with `fit_seeds = 2`: `variance_data + variance_fit = variance`,
//!   and both parts equal the one-way random-effects estimators (Searle, Casella, McCulloch,
//!   *Variance Components*, 1992, §3.5) recomputed from the recorded predictions.
//! - **Bit-identity**: a forest of one tree without bootstrap on every input is the tree family's
//!   tree (whole runs, every term, with two fit seeds); forest and boosting results are the same
//!   bytes on one and two threads and when three shards are merged.
//!
//! Float tolerance: relative 1e-10 (the engine accumulates with Welford's update and merges
//! blocks pairwise, this file sums directly; both are exact up to rounding).

use std::collections::BTreeMap;
use std::fs;
use std::path::Path;
use std::sync::{Arc, Mutex};

use lossprism::family::forest::ForestFamily;
use lossprism::family::{Caps, Family, FitError, FitInput, Out, Task};
use lossprism::harness;
use lossprism::report::{self, ResultDoc};
use lossprism::runner;
use lossprism::scenario::{self, PlanOptions};
use ndarray::{Array2, Array3, Axis};

mod common;
use common::*;

const TOL: f64 = 1e-10;

/// `|a − b| ≤ TOL · max(|a|, |b|, 1)`; returns the relative residual.
fn close(a: f64, b: f64, what: &str) -> f64 {
    let scale = a.abs().max(b.abs()).max(1.0);
    let r = (a - b).abs() / scale;
    assert!(
        a.is_finite() && b.is_finite() && r <= TOL,
        "{what}: {a} vs {b} (residual {r:e})"
    );
    r
}

/// What one fit recorded: every member's prediction (`tmax × m`) and, for classes, its
/// probability vectors (`tmax × m × K`); and the ensemble's own output at the grid values.
#[derive(Clone)]
struct Fit {
    members: Array2<f64>,
    member_probs: Option<Array3<f64>>,
    values: Array2<f64>,
    probs: Option<Array3<f64>>,
}

/// A forest that records its members. Asked for grid values `T ≤ tmax`, it grows one forest of
/// `tmax` trees (grid `1..=tmax`, prefix averages), answers with the forest of `T` trees exactly
/// as the forest family does, and keeps tree `t`'s own prediction, `t·a_t − (t−1)·a_{t−1}` from
/// the prefix averages `a_t`.
struct Recorder {
    inner: ForestFamily,
    tmax: usize,
    fits: Mutex<BTreeMap<(u64, u32), Fit>>,
    eval: Mutex<Option<Array2<f64>>>,
}

impl Recorder {
    fn new(tmax: usize) -> Arc<Recorder> {
        Arc::new(Recorder {
            inner: ForestFamily::default(),
            tmax,
            fits: Mutex::new(BTreeMap::new()),
            eval: Mutex::new(None),
        })
    }
}

impl Family for Recorder {
    fn name(&self) -> &'static str {
        "recorded_forest"
    }
    fn knob(&self) -> &'static str {
        "trees"
    }
    fn check_grid(&self, grid: &[f64], n: usize, p: usize) -> Result<(), String> {
        self.inner.check_grid(grid, n, p)?;
        match grid.iter().all(|&t| t <= self.tmax as f64) {
            true => Ok(()),
            false => Err(format!("at most {} trees", self.tmax)),
        }
    }
    fn supports(&self, task: Task) -> bool {
        self.inner.supports(task)
    }
    fn caps(&self, task: Task) -> Caps {
        self.inner.caps(task)
    }
    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        out: Out<'_>,
    ) -> Result<(), FitError> {
        let m = input.eval.nrows();
        let inner_grid: Vec<f64> = (1..=self.tmax).map(|t| t as f64).collect();
        let mut vals = Array2::zeros((self.tmax, m));
        let k = out.probs.as_ref().map(|p| p.shape()[2]);
        let mut probs = k.map(|k| Array3::zeros((self.tmax, m, k)));
        let mut div = out
            .diversity
            .as_ref()
            .map(|_| Array2::zeros((self.tmax, m)));
        self.inner.fit_predict(
            input,
            &inner_grid,
            Out {
                values: vals.view_mut(),
                probs: probs.as_mut().map(|p| p.view_mut()),
                diversity: div.as_mut().map(|d| d.view_mut()),
            },
        )?;
        let Out {
            mut values,
            probs: mut out_probs,
            diversity: mut out_div,
        } = out;
        for (g, &t) in grid.iter().enumerate() {
            let i = t as usize - 1;
            values.row_mut(g).assign(&vals.row(i));
            if let (Some(o), Some(p)) = (out_probs.as_mut(), probs.as_ref()) {
                o.index_axis_mut(Axis(0), g)
                    .assign(&p.index_axis(Axis(0), i));
            }
            if let (Some(o), Some(d)) = (out_div.as_mut(), div.as_ref()) {
                o.row_mut(g).assign(&d.row(i));
            }
        }
        // Members from the prefix averages.
        let decode = |t: usize, a: f64, prev: f64| t as f64 * a - (t - 1) as f64 * prev;
        let mut members = vals.clone();
        for t in 1..self.tmax {
            for e in 0..m {
                members[[t, e]] = decode(t + 1, vals[[t, e]], vals[[t - 1, e]]);
            }
        }
        let member_probs = probs.as_ref().map(|p| {
            let mut q = p.clone();
            for t in 1..self.tmax {
                for e in 0..m {
                    for c in 0..p.shape()[2] {
                        q[[t, e, c]] = decode(t + 1, p[[t, e, c]], p[[t - 1, e, c]]);
                    }
                }
            }
            q
        });
        if input.seed.fold == 0 {
            let mut out_vals = Array2::zeros((grid.len(), m));
            let mut out_p = probs
                .as_ref()
                .map(|p| Array3::zeros((grid.len(), m, p.shape()[2])));
            for (g, &t) in grid.iter().enumerate() {
                out_vals.row_mut(g).assign(&vals.row(t as usize - 1));
                if let (Some(o), Some(p)) = (out_p.as_mut(), probs.as_ref()) {
                    o.index_axis_mut(Axis(0), g)
                        .assign(&p.index_axis(Axis(0), t as usize - 1));
                }
            }
            self.fits.lock().unwrap().insert(
                (input.seed.replicate, input.seed.copy),
                Fit {
                    members,
                    member_probs,
                    values: out_vals,
                    probs: out_p,
                },
            );
            *self.eval.lock().unwrap() = Some(input.eval.to_owned());
        }
        Ok(())
    }
}

/// Invented: a smooth surface in two inputs with Gaussian noise (sd 0.5, so noise = 0.25).
const REGRESS: &str = r#"name = "recorded-forest"
about = "Invented: a smooth surface with noise, for the ensemble identities."
seed = 17
replicates = 24
blocks = 6

[data]
source = "synthetic"
train_size = 60
eval_size = 40

[[data.inputs]]
name = "x1"
uniform = [0.0, 1.0]

[[data.inputs]]
name = "x2"
uniform = [0.0, 1.0]

[data.truth]
formula = "sin(3*x1) + x2"

[data.noise]
sd = 0.5

[model]
family = "custom"
grid = [1, 3, 8]
FITS

[loss]
kind = "squared"
"#;

fn truth(x: &[f64]) -> f64 {
    (3.0 * x[0]).sin() + x[1]
}

/// Invented: two classes whose probability rises along x1 and x2, Brier score.
const CLASSIFY: &str = r#"name = "recorded-forest-classes"
about = "Invented: two classes with a smooth probability, for the ensemble identities."
seed = 23
replicates = 24
blocks = 6

[data]
source = "synthetic"
train_size = 60
eval_size = 40

[[data.inputs]]
name = "x1"
uniform = [0.0, 1.0]

[[data.inputs]]
name = "x2"
uniform = [0.0, 1.0]

[data.classes]
labels = ["sound", "flawed"]
probability = "logistic(4*x1 + 2*x2 - 3)"

[model]
family = "custom"
grid = [1, 3, 8]
FITS

[loss]
kind = "brier"
"#;

fn class_probs(x: &[f64]) -> [f64; 2] {
    let p1 = 1.0 / (1.0 + (-(4.0 * x[0] + 2.0 * x[1] - 3.0)).exp());
    [1.0 - p1, p1]
}

/// Runs `text` (with `fit_seeds = fits`) through the recorder; returns the document and what
/// was recorded.
fn recorded(text: &str, fits: u32) -> (ResultDoc, BTreeMap<(u64, u32), Fit>, Array2<f64>) {
    let text = text.replace("FITS", &format!("fit_seeds = {fits}"));
    let rec = Recorder::new(8);
    let doc = harness::run_with_family_opts(&text, rec.clone(), &PlanOptions::default(), 2)
        .expect("the recorded forest runs");
    let fits = rec.fits.lock().unwrap().clone();
    let eval = rec.eval.lock().unwrap().clone().expect("some fit ran");
    (doc, fits, eval)
}

/// The squared distance between the prediction of member (or ensemble) `row` at point `e` and
/// the truth there: a real value or a probability vector.
fn sq(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// One point's member predictions as vectors: `[t][component]`.
fn member_vectors(fit: &Fit, e: usize, t_count: usize) -> Vec<Vec<f64>> {
    (0..t_count)
        .map(|t| match &fit.member_probs {
            Some(q) => q.index_axis(Axis(0), t).row(e).to_vec(),
            None => vec![fit.members[[t, e]]],
        })
        .collect()
}

/// Checks the bias-variance-diversity identity and the engine's diversity and average member
/// loss against the recorded members; returns the largest relative residual.
fn check_wood(
    doc: &ResultDoc,
    fits: &BTreeMap<(u64, u32), Fit>,
    eval: &Array2<f64>,
    classes: bool,
) -> f64 {
    let r = doc.replicates as usize;
    let m = eval.nrows();
    let target = |e: usize| -> Vec<f64> {
        let x = eval.row(e).to_vec();
        if classes {
            class_probs(&x).to_vec()
        } else {
            vec![truth(&x)]
        }
    };
    let noise_at = |e: usize| -> f64 {
        if classes {
            1.0 - target(e).iter().map(|p| p * p).sum::<f64>()
        } else {
            0.25
        }
    };
    let mut worst = 0.0f64;
    for p in &doc.points {
        let t_count = p.value as usize;
        let (mut noise, mut ens_mse, mut div, mut member_mse, mut mb2, mut mv) =
            (0.0, 0.0, 0.0, 0.0, 0.0, 0.0);
        for e in 0..m {
            let f = target(e);
            noise += noise_at(e);
            let per: Vec<Vec<Vec<f64>>> = (0..r as u64)
                .map(|rep| member_vectors(&fits[&(rep, 0)], e, t_count))
                .collect();
            let dim = f.len();
            for h in &per {
                let ens: Vec<f64> = (0..dim)
                    .map(|c| h.iter().map(|v| v[c]).sum::<f64>() / t_count as f64)
                    .collect();
                ens_mse += sq(&ens, &f) / r as f64;
                div += h.iter().map(|v| sq(v, &ens)).sum::<f64>() / (t_count * r) as f64;
                member_mse += h.iter().map(|v| sq(v, &f)).sum::<f64>() / (t_count * r) as f64;
            }
            // each member's own mean over replicates, bias² and variance (plain, divisor R)
            for t in 0..t_count {
                let mean: Vec<f64> = (0..dim)
                    .map(|c| per.iter().map(|h| h[t][c]).sum::<f64>() / r as f64)
                    .collect();
                mb2 += sq(&mean, &f) / t_count as f64;
                mv += per.iter().map(|h| sq(&h[t], &mean)).sum::<f64>() / (r * t_count) as f64;
            }
        }
        let mf = m as f64;
        let (noise, ens_mse, div, member_mse, mb2, mv) = (
            noise / mf,
            ens_mse / mf,
            div / mf,
            member_mse / mf,
            mb2 / mf,
            mv / mf,
        );
        let what = |s: &str| format!("{} at {} trees: {s}", doc.scenario.name, p.value);
        worst = worst.max(close(p.get("noise"), noise, &what("noise")));
        // B̂² + V̂ is exactly the mean over replicates of the squared distance to the truth
        worst = worst.max(close(
            p.get("expected_loss"),
            noise + ens_mse,
            &what("expected loss"),
        ));
        worst = worst.max(close(p.get("diversity"), div, &what("diversity")));
        worst = worst.max(close(
            p.get("member_loss"),
            noise + member_mse,
            &what("avg member loss"),
        ));
        // Wood et al. 2023: loss = noise + average member bias² + average member variance − diversity
        worst = worst.max(close(
            p.get("expected_loss"),
            noise + mb2 + mv - p.get("diversity"),
            &what("bias-variance-diversity"),
        ));
        // the engine's member terms add up the same way: member loss = noise + bias² + member
        // variance (exact identity)
        worst = worst.max(close(
            p.get("member_loss"),
            p.get("noise") + p.get("bias_sq") + p.get("member_variance"),
            &what("member loss = noise + bias² + member variance"),
        ));
    }
    worst
}

#[test]
fn bias_variance_diversity_holds_for_forest_regression() {
    let (doc, fits, eval) = recorded(REGRESS, 1);
    assert_eq!(fits.len(), doc.replicates as usize);
    let worst = check_wood(&doc, &fits, &eval, false);
    println!("forest regression: largest relative residual {worst:.2e}");
    // the members differ: diversity is positive beyond one tree, zero for one
    assert_eq!(doc.points[0].get("diversity"), 0.0);
    assert!(doc.points[2].get("diversity") > 0.0);
}

#[test]
fn bias_variance_diversity_holds_for_forest_brier() {
    let (doc, fits, eval) = recorded(CLASSIFY, 1);
    assert_eq!(doc.loss, "brier");
    let worst = check_wood(&doc, &fits, &eval, true);
    println!("forest Brier: largest relative residual {worst:.2e}");
    assert!(doc.points[2].get("diversity") > 0.0);
}

/// `variance_data`, `variance_fit` recomputed from the recorded ensemble outputs of both fit
/// seeds, and their sum against the engine's variance.
fn check_split(doc: &ResultDoc, fits: &BTreeMap<(u64, u32), Fit>) -> f64 {
    let r = doc.replicates as usize;
    let s = 2usize;
    let mut worst = 0.0f64;
    for (g, p) in doc.points.iter().enumerate() {
        let out = |rep: usize, copy: u32, e: usize| -> Vec<f64> {
            let f = &fits[&(rep as u64, copy)];
            match &f.probs {
                Some(q) => q.index_axis(Axis(0), g).row(e).to_vec(),
                None => vec![f.values[[g, e]]],
            }
        };
        let m = fits[&(0, 0)].values.ncols();
        let (mut vd, mut vf) = (0.0, 0.0);
        for e in 0..m {
            let dim = out(0, 0, e).len();
            let means: Vec<Vec<f64>> = (0..r)
                .map(|rep| {
                    (0..dim)
                        .map(|c| (out(rep, 0, e)[c] + out(rep, 1, e)[c]) / s as f64)
                        .collect()
                })
                .collect();
            let within: f64 = (0..r)
                .map(|rep| {
                    (0..s as u32)
                        .map(|copy| sq(&out(rep, copy, e), &means[rep]))
                        .sum::<f64>()
                        / (s - 1) as f64
                })
                .sum::<f64>()
                / r as f64;
            let grand: Vec<f64> = (0..dim)
                .map(|c| means.iter().map(|v| v[c]).sum::<f64>() / r as f64)
                .collect();
            let between = means.iter().map(|v| sq(v, &grand)).sum::<f64>() / (r - 1) as f64;
            vf += within;
            vd += between - within / s as f64;
        }
        let (vd, vf) = (vd / m as f64, vf / m as f64);
        let what = |t: &str| format!("{} at {} trees: {t}", doc.scenario.name, p.value);
        worst = worst.max(close(p.get("variance_fit"), vf, &what("variance_fit")));
        worst = worst.max(close(p.get("variance_data"), vd, &what("variance_data")));
        worst = worst.max(close(
            p.get("variance"),
            p.get("variance_data") + p.get("variance_fit"),
            &what("variance = variance_data + variance_fit"),
        ));
    }
    worst
}

#[test]
fn variance_splits_into_data_and_fit_parts() {
    for (text, name) in [(REGRESS, "regression"), (CLASSIFY, "Brier")] {
        let (doc, fits, _) = recorded(text, 2);
        assert_eq!(fits.len(), 2 * doc.replicates as usize);
        let worst = check_split(&doc, &fits);
        println!("forest {name}, two fit seeds: largest relative residual {worst:.2e}");
        // a forest's own randomness is real: the fit part is positive at every grid value
        assert!(doc.points.iter().all(|p| p.get("variance_fit") > 0.0));
    }
}

/// A tree scenario and the same with a forest of one tree, no bootstrap, every input (both with
/// two fit seeds, so the random tie-breaks count), invented data with ties (rounded inputs).
const ONE_TREE: &str = r#"name = "one-tree"
about = "Invented: rounded inputs (so split ties occur), for the one-tree forest."
seed = 31
replicates = 16
blocks = 4

[data]
source = "synthetic"
train_size = 50
eval_size = 30

[[data.inputs]]
name = "a"
even = [0.0, 1.0]

[[data.inputs]]
name = "b"
uniform = [0.0, 1.0]

[data.truth]
formula = "(a > 0.5) + b"

[data.noise]
sd = 0.3

[model]
MODEL
grid = [1, 2, 3, 5]
fit_seeds = 2

[loss]
kind = "squared"
"#;

#[test]
fn a_forest_of_one_tree_without_bootstrap_on_every_input_is_the_tree() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let run = |name: &str, model: &str| {
        let path = d.join(name);
        fs::write(&path, ONE_TREE.replace("MODEL", model)).unwrap();
        let plan = scenario::load(&path, &PlanOptions::default()).unwrap();
        report::build(&plan, &runner::run(&plan, 2).unwrap())
    };
    let tree = run("tree.toml", "family = \"tree\"");
    let forest = run(
        "forest.toml",
        "family = \"forest\"\nknob = \"max_depth\"\ntrees = 1\nbootstrap = false\nmax_features = \"all\"",
    );
    // small nodes of deep trees hold split ties, which the fit seed breaks
    let deepest = tree.points.last().unwrap();
    assert!(deepest.get("variance_fit") > 0.0, "ties should occur");
    for (a, b) in tree.points.iter().zip(&forest.points) {
        assert_eq!(a.value, b.value);
        for (k, v) in &a.terms {
            assert_eq!(
                v.to_bits(),
                b.get(k).to_bits(),
                "{k} at depth {}: tree {v}, forest {}",
                a.value,
                b.get(k)
            );
        }
        assert_eq!(b.get("diversity"), 0.0);
    }
}

fn scenario_text(model: &str, classes: bool) -> String {
    let data = if classes {
        "[data.classes]\nlabels = [\"sound\", \"flawed\"]\nprobability = \"logistic(4*x1 + 2*x2 - 3)\"\n\n[loss]\nkind = \"brier\"\n"
    } else {
        "[data.truth]\nformula = \"sin(3*x1) + x2\"\n\n[data.noise]\nsd = 0.5\n"
    };
    format!(
        "name = \"threads-and-shards\"\nabout = \"Invented: a smooth surface, for thread and shard identity.\"\n\
         seed = 41\nreplicates = 18\nblocks = 6\n\n[data]\nsource = \"synthetic\"\ntrain_size = 60\neval_size = 30\n\n\
         [[data.inputs]]\nname = \"x1\"\nuniform = [0.0, 1.0]\n\n[[data.inputs]]\nname = \"x2\"\nuniform = [0.0, 1.0]\n\n\
         {data}\n[model]\n{model}\nfit_seeds = 2\n"
    )
}

fn ok(dir: &Path, args: &[&str]) {
    let o = lossprism(dir, args);
    no_panic(&o);
    assert_eq!(o.status.code(), Some(0), "{args:?}: {}", text(&o.stderr));
}

#[test]
fn forest_and_boost_are_bit_identical_across_threads_and_shards() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let cases = [
        (
            "forest",
            scenario_text("family = \"forest\"\ngrid = [1, 4, 12]", false),
        ),
        (
            "forest-brier",
            scenario_text("family = \"forest\"\ngrid = [1, 4, 12]", true),
        ),
        (
            "forest-depth",
            scenario_text(
                "family = \"forest\"\nknob = \"max_depth\"\ntrees = 6\ngrid = [1, 3, 6]",
                false,
            ),
        ),
        (
            "boost",
            scenario_text(
                "family = \"boost\"\nsubsample = 0.7\ngrid = [0, 5, 20, 60]",
                false,
            ),
        ),
        (
            "boost-brier",
            scenario_text(
                "family = \"boost\"\nsubsample = 0.7\ngrid = [0, 5, 20, 60]",
                true,
            ),
        ),
    ];
    for (name, body) in cases {
        let file = put(d, &format!("{name}.toml"), &body);
        let one = format!("{name}-1.json");
        let two = format!("{name}-2.json");
        ok(
            d,
            &["run", &file, "--threads", "1", "--quiet", "--out", &one],
        );
        ok(
            d,
            &["run", &file, "--threads", "2", "--quiet", "--out", &two],
        );
        let read = |f: &str| fs::read_to_string(d.join(f)).unwrap();
        assert_eq!(read(&one), read(&two), "{name}: 1 thread vs 2 threads");
        let mut parts = Vec::new();
        for i in 1..=3 {
            let part = format!("{name}-part-{i}.json");
            ok(
                d,
                &[
                    "run",
                    &file,
                    "--shard",
                    &format!("{i}/3"),
                    "--quiet",
                    "--out",
                    &part,
                ],
            );
            parts.push(part);
        }
        let merged = format!("{name}-merged.json");
        let mut args = vec!["merge"];
        args.extend(parts.iter().map(String::as_str));
        args.extend(["--quiet", "--out", merged.as_str()]);
        ok(d, &args);
        assert_eq!(
            read(&one),
            read(&merged),
            "{name}: 3 merged shards vs one run"
        );
        // the fit seeds see the learner's randomness (bootstrap, input subsets, subsamples)
        let doc: serde_json::Value = serde_json::from_str(&read(&one)).unwrap();
        let last = doc["points"].as_array().unwrap().last().unwrap().clone();
        assert!(
            last["variance_fit"].as_f64().unwrap() > 0.0,
            "{name}: {last}"
        );
    }
}
