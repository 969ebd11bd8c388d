//! Reference check of the forest and boost families against scikit-learn, in distribution.
//!
//! Source of the expected values: scikit-learn's `RandomForestRegressor`,
//! `GradientBoostingRegressor` and `GradientBoostingClassifier`, run by
//! `tests/fixtures/make_ensemble_fixtures.py` into `tests/fixtures/sklearn-ensembles.json` (the
//! scikit-learn, numpy and Python versions are in its `meta`: scikit-learn 1.9.1, numpy 2.4.6 when
//! it was made). No Python is needed here.
//!
//! Both programs draw random numbers (bootstrap samples, input subsets, subsamples, tie-breaks)
//! and draw different ones, so single fits cannot be compared. What is compared is a Monte Carlo
//! expected loss over training sets of the same size from the same distribution (Friedman #1;
//! Friedman 1991, *Annals of Statistics* 19:1-67), estimated on each side from its own
//! replicates with its own standard error: for every grid value of every curve,
//! `|mean_here − mean_sklearn| ≤ 4 · sqrt(se_here² + se_sklearn²)`.
//!
//! The settings match scikit-learn's estimator by estimator (see the script's docstring): the
//! same bootstrap (n rows with replacement), `max_features = 3` drawn per node among inputs not
//! constant in the node, fully grown trees, prefix averages of one forest for the tree-count curve;
//! boosting with the mean (or the log-odds of the class share) as the start, depth-3 trees on the
//! residuals, mean-residual leaves (squared loss) or one Newton step (log-loss), subsampling
//! without replacement. Split criteria agree in their argmax (scikit-learn's `friedman_mse`
//! improvement is `n` times the variance reduction).

use lossprism::family::boost::BoostFamily;
use lossprism::family::forest::{ForestFamily, ForestKnob, MaxFeatures};
use lossprism::family::{Family, FitInput, FitSeed, Out, Task};
use ndarray::{Array1, Array2, Array3};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use serde_json::Value;

const FIXTURE: &str = "tests/fixtures/sklearn-ensembles.json";

fn friedman1(r: &[f64]) -> f64 {
    10.0 * (std::f64::consts::PI * r[0] * r[1]).sin()
        + 20.0 * (r[2] - 0.5).powi(2)
        + 10.0 * r[3]
        + 5.0 * r[4]
}

fn class_prob(f: f64) -> f64 {
    1.0 / (1.0 + (-(f - 14.0) / 2.0).exp())
}

/// One curve: the family, its task and how a replicate's predictions become the statistic.
struct Curve {
    name: &'static str,
    family: Box<dyn Family>,
    classify: bool,
}

fn curves() -> Vec<Curve> {
    let forest = ForestFamily {
        max_features: MaxFeatures::Count(3),
        bootstrap: true,
        min_samples_leaf: 1,
        ..ForestFamily::default()
    };
    vec![
        Curve {
            name: "forest-trees",
            family: Box::new(forest),
            classify: false,
        },
        Curve {
            name: "forest-depth",
            family: Box::new(ForestFamily {
                knob: ForestKnob::MaxDepth,
                trees: 25,
                ..forest
            }),
            classify: false,
        },
        Curve {
            name: "boost",
            family: Box::new(BoostFamily::default()),
            classify: false,
        },
        Curve {
            name: "boost-subsample",
            family: Box::new(BoostFamily {
                subsample: 0.5,
                ..BoostFamily::default()
            }),
            classify: false,
        },
        Curve {
            name: "boost-logloss",
            family: Box::new(BoostFamily::default()),
            classify: true,
        },
    ]
}

#[test]
fn forest_and_boost_curves_agree_with_scikit_learn() {
    let text = std::fs::read_to_string(FIXTURE).expect("fixture");
    let doc: Value = serde_json::from_str(&text).expect("fixture JSON");
    let meta = &doc["meta"];
    assert_eq!(meta["script"], "tests/fixtures/make_ensemble_fixtures.py");
    let n = meta["n_train"].as_u64().unwrap() as usize;
    let p = meta["n_inputs"].as_u64().unwrap() as usize;
    let m = meta["n_eval"].as_u64().unwrap() as usize;
    let reps = meta["replicates"].as_u64().unwrap();
    assert_eq!(p, 10);
    let curves = curves();
    let fixture: Vec<(Vec<f64>, Vec<f64>, Vec<f64>)> = curves
        .iter()
        .map(|c| {
            let v = doc["curves"]
                .as_array()
                .unwrap()
                .iter()
                .find(|v| v["name"] == c.name)
                .unwrap_or_else(|| panic!("curve {} missing from the fixture", c.name));
            let nums = |k: &str| -> Vec<f64> {
                v[k].as_array()
                    .unwrap()
                    .iter()
                    .map(|x| x.as_f64().unwrap())
                    .collect()
            };
            (nums("grid"), nums("mean"), nums("se"))
        })
        .collect();
    let mut sums: Vec<(Vec<f64>, Vec<f64>)> = fixture
        .iter()
        .map(|(g, _, _)| (vec![0.0; g.len()], vec![0.0; g.len()]))
        .collect();
    let mut rng = ChaCha8Rng::seed_from_u64(20261202);
    for r in 0..reps {
        let x = Array2::from_shape_fn((n, p), |_| rng.gen::<f64>());
        let f: Vec<f64> = x
            .rows()
            .into_iter()
            .map(|r| friedman1(r.as_slice().unwrap()))
            .collect();
        let y = Array1::from_shape_fn(n, |i| f[i] + rng.sample::<f64, _>(StandardNormal));
        let labels = Array1::from_shape_fn(n, |i| {
            f64::from(u8::from(rng.gen::<f64>() < class_prob(f[i])))
        });
        let eval = Array2::from_shape_fn((m, p), |_| rng.gen::<f64>());
        let fe: Vec<f64> = eval
            .rows()
            .into_iter()
            .map(|r| friedman1(r.as_slice().unwrap()))
            .collect();
        let seed = FitSeed {
            seed: 7,
            replicate: r,
            fold: 0,
            copy: 0,
        };
        for (c, (curve, (grid, _, _))) in curves.iter().zip(&fixture).enumerate() {
            let task = if curve.classify {
                Task::Classify { classes: 2 }
            } else {
                Task::Regress
            };
            let mut values = Array2::zeros((grid.len(), m));
            let mut probs = Array3::zeros((grid.len(), m, task.classes()));
            let input = FitInput {
                x: x.view(),
                y: if curve.classify {
                    labels.view()
                } else {
                    y.view()
                },
                eval: eval.view(),
                task,
                seed,
            };
            let out = Out {
                values: values.view_mut(),
                probs: curve.classify.then(|| probs.view_mut()),
                diversity: None,
            };
            curve.family.fit_predict(&input, grid, out).expect("fit");
            for g in 0..grid.len() {
                let stat = if curve.classify {
                    (0..m)
                        .map(|e| {
                            let pi = class_prob(fe[e]);
                            let q = probs[[g, e, 1]].clamp(1e-15, 1.0 - 1e-15);
                            -(pi * q.ln() + (1.0 - pi) * (1.0 - q).ln())
                        })
                        .sum::<f64>()
                        / m as f64
                } else {
                    (0..m)
                        .map(|e| (fe[e] - values[[g, e]]).powi(2))
                        .sum::<f64>()
                        / m as f64
                };
                sums[c].0[g] += stat;
                sums[c].1[g] += stat * stat;
            }
        }
    }
    let rf = reps as f64;
    let mut worst: f64 = 0.0;
    let mut failures = Vec::new();
    for (curve, ((grid, mean_sk, se_sk), (s, s2))) in curves.iter().zip(fixture.iter().zip(&sums)) {
        for g in 0..grid.len() {
            let mean = s[g] / rf;
            let se = ((s2[g] - rf * mean * mean).max(0.0) / (rf - 1.0) / rf).sqrt();
            let z = (mean - mean_sk[g]) / (se * se + se_sk[g] * se_sk[g]).sqrt();
            eprintln!(
                "{:>16} {:>5}: lossprism {mean:.4} ± {se:.4}, scikit-learn {:.4} ± {:.4}, z = {z:+.2}",
                curve.name, grid[g], mean_sk[g], se_sk[g]
            );
            worst = worst.max(z.abs());
            if z.abs() > 4.0 {
                failures.push(format!("{} at {}: z = {z:.2}", curve.name, grid[g]));
            }
        }
    }
    eprintln!("largest |z| = {worst:.2}");
    assert!(failures.is_empty(), "{failures:?}");
}
