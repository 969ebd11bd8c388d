//! Reference-library checks of the tree and k-NN families against scikit-learn, through fixtures
//! computed once by `tests/fixtures/make_sklearn_fixtures.py` (design §7). The fixtures hold the
//! data, scikit-learn's predictions and the versions that produced them; no Python is needed here.
//!
//! Source of every expected value below: scikit-learn (`DecisionTreeRegressor`,
//! `DecisionTreeClassifier`, `KNeighborsRegressor`, `KNeighborsClassifier`), version recorded in
//! each fixture's `meta.sklearn` (1.9.1 with numpy 2.4.6 when the fixtures were made).
//!
//! # What is expected to agree, and why
//!
//! - **Trees.** Both implementations choose the split of maximal impurity decrease among
//!   thresholds at midpoints `a/2 + b/2` of consecutive distinct sorted values, and predict the
//!   node mean or the majority class (ties to the smallest class index in both). The tree inputs
//!   are float32-representable (scikit-learn casts X to float32) and separated by more than
//!   scikit-learn's 1e-7 `FEATURE_THRESHOLD`, so the candidate sets are identical. Where the best
//!   split at a node is unique, both trees take it; where it is not, the choice is a tie, broken by
//!   input index here and by a random feature order in scikit-learn. Such ties are *not* rare: two
//!   inputs (or a split and a mirror split) that cut a node's samples into the same two groups
//!   have mathematically equal scores, and in a node of 2 samples every input does. The fixture
//!   script finds, for every internal node of every scikit-learn tree, whether its best split was
//!   tied (or had zero gain: scikit-learn still splits, this family makes a leaf), and records per
//!   evaluation point the depth of the first such node on scikit-learn's decision path
//!   (`tie_depth`, -1 if none). Points whose path has no tied node must agree (regression to
//!   1e-9, classes exactly); points below a tie may differ, and are counted, not asserted.
//! - **k-NN regression**: the mean of the same k neighbours, to 1e-12 (continuous data; the
//!   script asserts that no two of the 14 nearest squared distances are within 1e-9 relative).
//! - **k-NN classification**: same neighbours; at a vote tie scikit-learn predicts the smallest
//!   tied class label (argmax of class proportions), this family the class of the nearest
//!   neighbour among the tied classes. Every point is checked against its rule; disagreements
//!   occur only at vote ties, and with two classes and odd k there are none.

use std::collections::BTreeMap;

use lossprism::family::knn::{neighbours, KnnFamily};
use lossprism::family::tree::{Criterion, TreeFamily};
use lossprism::family::{Family, FitInput, Task};
use ndarray::{Array1, Array2};
use serde::Deserialize;

/// Script that wrote the fixtures (recorded in each fixture's metadata).
const SCRIPT: &str = "tests/fixtures/make_sklearn_fixtures.py";

#[derive(Debug, Deserialize)]
struct Fixture {
    meta: Meta,
    datasets: Vec<Dataset>,
}

#[derive(Debug, Deserialize)]
struct Meta {
    script: String,
    generated: String,
    python: String,
    numpy: String,
    sklearn: String,
    estimator: String,
}

#[derive(Debug, Deserialize)]
struct Dataset {
    name: String,
    /// 0 for regression.
    classes: usize,
    x: Vec<Vec<String>>,
    y: Values,
    eval: Vec<Vec<String>>,
    /// scikit-learn's `kneighbors` indices for the largest k, nearest first (k-NN only).
    #[serde(default)]
    neighbours: Vec<Vec<usize>>,
    cases: Vec<Case>,
}

#[derive(Debug, Deserialize)]
struct Case {
    #[serde(default)]
    max_depth: Option<usize>,
    #[serde(default)]
    k: Option<usize>,
    #[serde(default)]
    criterion: Option<String>,
    pred: Values,
    #[serde(default)]
    tie_depth: Vec<i64>,
    /// Internal nodes of scikit-learn's tree whose best split was tied (trees only).
    #[serde(default)]
    n_tied_nodes: usize,
    /// Internal nodes split with zero gain (classification trees only).
    #[serde(default)]
    n_zero_gain_nodes: usize,
}

/// Numbers stored either as `float.hex` strings or as integer class labels.
#[derive(Debug, Deserialize)]
#[serde(untagged)]
enum Values {
    Hex(Vec<String>),
    Labels(Vec<u32>),
}

impl Values {
    fn to_f64(&self) -> Vec<f64> {
        match self {
            Values::Hex(v) => v.iter().map(|s| parse_hex(s)).collect(),
            Values::Labels(v) => v.iter().map(|&c| f64::from(c)).collect(),
        }
    }
}

/// `2^e` for `e` in the normal exponent range.
fn pow2(e: i32) -> f64 {
    assert!((-1022..=1023).contains(&e));
    f64::from_bits(((e + 1023) as u64) << 52)
}

/// Parses Python's `float.hex` format (`[-]0xH.HHHp[+-]E`) exactly.
fn parse_hex(s: &str) -> f64 {
    let (neg, body) = match s.strip_prefix('-') {
        Some(b) => (true, b),
        None => (false, s),
    };
    let body = body
        .strip_prefix("0x")
        .unwrap_or_else(|| panic!("not a hex float: {s}"));
    let (mant, exp) = body
        .split_once('p')
        .unwrap_or_else(|| panic!("not a hex float: {s}"));
    let (int, frac) = mant.split_once('.').unwrap_or((mant, ""));
    assert!(int.len() + frac.len() <= 15, "too many hex digits: {s}");
    let digits = format!("{int}{frac}");
    let m = u64::from_str_radix(&digits, 16).unwrap_or_else(|_| panic!("bad mantissa: {s}"));
    let mut e: i32 = exp.parse().unwrap_or_else(|_| panic!("bad exponent: {s}"));
    e -= 4 * frac.len() as i32;
    // m < 2^60 is exact as f64 only below 2^53; float.hex writes at most 53 significant bits.
    assert!(m < (1 << 53), "mantissa wider than 53 bits: {s}");
    let mut v = m as f64;
    while e < -1000 {
        v *= pow2(-1000);
        e += 1000;
    }
    while e > 1000 {
        v *= pow2(1000);
        e -= 1000;
    }
    v *= pow2(e);
    if neg {
        -v
    } else {
        v
    }
}

fn load(name: &str) -> Fixture {
    let path = format!("{}/tests/fixtures/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    let fx: Fixture = serde_json::from_str(&text).unwrap_or_else(|e| panic!("{path}: {e}"));
    assert_eq!(fx.meta.script, SCRIPT);
    assert!(!fx.meta.sklearn.is_empty() && !fx.meta.numpy.is_empty());
    eprintln!(
        "{name}: {} from scikit-learn {}, numpy {}, Python {}, generated {}",
        fx.meta.estimator, fx.meta.sklearn, fx.meta.numpy, fx.meta.python, fx.meta.generated
    );
    fx
}

fn matrix(rows: &[Vec<String>]) -> Array2<f64> {
    let p = rows[0].len();
    let flat: Vec<f64> = rows
        .iter()
        .flat_map(|r| {
            assert_eq!(r.len(), p);
            r.iter().map(|s| parse_hex(s))
        })
        .collect();
    Array2::from_shape_vec((rows.len(), p), flat).unwrap()
}

struct Data {
    x: Array2<f64>,
    y: Array1<f64>,
    eval: Array2<f64>,
    task: Task,
}

impl Data {
    fn new(ds: &Dataset) -> Self {
        let task = if ds.classes == 0 {
            Task::Regress
        } else {
            Task::Classify {
                classes: ds.classes,
            }
        };
        Data {
            x: matrix(&ds.x),
            y: Array1::from(ds.y.to_f64()),
            eval: matrix(&ds.eval),
            task,
        }
    }

    /// One path fit over the whole grid; row g holds the predictions for grid[g].
    fn fit(&self, fam: &dyn Family, grid: &[f64]) -> Array2<f64> {
        let input = FitInput {
            x: self.x.view(),
            y: self.y.view(),
            eval: self.eval.view(),
            task: self.task,
            seed: lossprism::family::FitSeed::fixed(0),
        };
        assert!(fam.check_grid(grid, self.x.nrows(), self.x.ncols()).is_ok());
        let mut out = Array2::zeros((grid.len(), self.eval.nrows()));
        fam.fit_predict(&input, grid, lossprism::family::Out::values(out.view_mut()))
            .expect("fit succeeds");
        out
    }
}

// Exact identity: the parser reproduces Python's float.hex output for known values.
#[test]
fn hex_parser_round_trips() {
    assert_eq!(parse_hex("0x0.0p+0"), 0.0);
    assert_eq!(parse_hex("-0x1.0000000000000p+0"), -1.0);
    assert_eq!(parse_hex("0x1.999999999999ap-4"), 0.1);
    assert_eq!(parse_hex("0x1.921fb54442d18p+1"), std::f64::consts::PI);
    assert_eq!(parse_hex("0x1.fffffffffffffp+1023"), f64::MAX);
    assert_eq!(parse_hex("0x0.0000000000001p-1022"), f64::from_bits(1));
    assert_eq!(parse_hex("0x1.0000000000000p-1022"), f64::MIN_POSITIVE);
}

/// Agreement counts for one tree case.
#[derive(Default, Debug)]
struct TreeTally {
    clean: usize,
    below_tie: usize,
    below_tie_disagree: usize,
}

/// Compares one tree fit with scikit-learn's predictions: points whose decision path in
/// scikit-learn's tree crosses no tied node must agree within `tol`; the others are counted.
fn compare_tree(label: &str, ours: &[f64], case: &Case, tol: f64) -> TreeTally {
    let sk = case.pred.to_f64();
    let d = case.max_depth.expect("tree case has max_depth") as i64;
    assert_eq!(sk.len(), ours.len());
    assert_eq!(case.tie_depth.len(), ours.len());
    if case.n_tied_nodes + case.n_zero_gain_nodes == 0 {
        assert!(
            case.tie_depth.iter().all(|&t| t < 0),
            "{label}: stray tie depth"
        );
    }
    let mut t = TreeTally::default();
    for (e, ((&a, &b), &tie)) in ours.iter().zip(&sk).zip(&case.tie_depth).enumerate() {
        assert!(tie < d, "{label}: tie depth {tie} is not an internal depth");
        if tie < 0 {
            // Reference: scikit-learn; no tied split on this point's path, so the two trees
            // route it through the same nodes (same samples) and must predict the same value.
            assert!(
                (a - b).abs() <= tol,
                "{label} eval {e}: ours {a}, scikit-learn {b} (no tie on the path)"
            );
            t.clean += 1;
        } else {
            t.below_tie += 1;
            if (a - b).abs() > tol {
                t.below_tie_disagree += 1;
            }
        }
    }
    t
}

// Reference: scikit-learn DecisionTreeRegressor(max_depth=d, random_state=0), d = 1..8, on
// four inputs (friedman4) and on one input. Expectation: equal to 1e-9 at every point whose path
// has no tied split. On one input no split can be tied, so all 8 × 200 points must agree; on four
// inputs the fixture records no tied node at depths 1..3.
#[test]
fn tree_regressor_matches_sklearn() {
    let fx = load("sklearn-tree-regressor.json");
    assert_eq!(fx.datasets.len(), 2);
    for ds in &fx.datasets {
        let data = Data::new(ds);
        let grid: Vec<f64> = ds
            .cases
            .iter()
            .map(|c| c.max_depth.unwrap() as f64)
            .collect();
        let out = data.fit(&TreeFamily::default(), &grid);
        let (mut clean, mut tied, mut differ) = (0, 0, 0);
        for (g, case) in ds.cases.iter().enumerate() {
            let label = format!("regression tree {} depth {}", ds.name, grid[g]);
            let t = compare_tree(&label, out.row(g).as_slice().unwrap(), case, 1e-9);
            eprintln!("{label}: {t:?}");
            clean += t.clean;
            tied += t.below_tie;
            differ += t.below_tie_disagree;
        }
        if ds.name == "one-input" {
            assert_eq!(clean, grid.len() * data.eval.nrows());
        }
        eprintln!(
            "regression tree {}: {clean} points agree to 1e-9 with no tie on the path; \
             {tied} points below a tied split, of which {differ} differ",
            ds.name
        );
    }
}

// Reference: scikit-learn DecisionTreeClassifier(criterion = gini | entropy, max_depth=d,
// random_state=0), d = 1..8, three classes, on four inputs and on one input. Expectation:
// identical classes at every point whose path has no tied (or zero-gain) split; majority ties go
// to the smallest class in both.
#[test]
fn tree_classifier_matches_sklearn() {
    let fx = load("sklearn-tree-classifier.json");
    assert_eq!(fx.datasets.len(), 2);
    for ds in &fx.datasets {
        let data = Data::new(ds);
        let mut by_criterion: BTreeMap<&str, Vec<&Case>> = BTreeMap::new();
        for c in &ds.cases {
            by_criterion
                .entry(c.criterion.as_deref().expect("criterion"))
                .or_default()
                .push(c);
        }
        assert_eq!(by_criterion.len(), 2);
        for (name, cases) in by_criterion {
            let criterion = match name {
                "gini" => Criterion::Gini,
                "entropy" => Criterion::Entropy,
                other => panic!("unknown criterion {other}"),
            };
            let fam = TreeFamily {
                criterion,
                ..TreeFamily::default()
            };
            let grid: Vec<f64> = cases.iter().map(|c| c.max_depth.unwrap() as f64).collect();
            let out = data.fit(&fam, &grid);
            let (mut clean, mut tied, mut differ) = (0, 0, 0);
            for (g, case) in cases.iter().enumerate() {
                let label = format!("{name} tree {} depth {}", ds.name, grid[g]);
                let t = compare_tree(&label, out.row(g).as_slice().unwrap(), case, 0.0);
                eprintln!("{label}: {t:?}");
                clean += t.clean;
                tied += t.below_tie;
                differ += t.below_tie_disagree;
            }
            eprintln!(
                "{name} tree {}: {clean} points identical with no tie on the path; \
                 {tied} points below a tied split, of which {differ} differ",
                ds.name
            );
        }
    }
}

/// Checks that our neighbour order equals scikit-learn's `kneighbors` order (distinct
/// distances, so the order is unique) for the largest k.
fn check_neighbours(ds: &Dataset, data: &Data) {
    let kmax = ds.neighbours[0].len();
    assert_eq!(ds.neighbours.len(), data.eval.nrows());
    for (e, q) in data.eval.outer_iter().enumerate() {
        // Reference: scikit-learn NearestNeighbors.kneighbors (brute force, Euclidean).
        assert_eq!(
            neighbours(data.x.view(), q, kmax),
            ds.neighbours[e],
            "{} eval {e}: neighbour order",
            ds.name
        );
    }
}

// Reference: scikit-learn KNeighborsRegressor(n_neighbors=k, algorithm="brute"),
// k in {1, 2, 3, 5, 8, 13}. Expectation: equal to 1e-12 everywhere (no distance ties).
#[test]
fn knn_regressor_matches_sklearn() {
    let fx = load("sklearn-knn-regressor.json");
    let ds = &fx.datasets[0];
    let data = Data::new(ds);
    check_neighbours(ds, &data);
    let grid: Vec<f64> = ds.cases.iter().map(|c| c.k.unwrap() as f64).collect();
    let out = data.fit(&KnnFamily::default(), &grid);
    let mut n = 0;
    let mut worst: f64 = 0.0;
    for (g, case) in ds.cases.iter().enumerate() {
        for (e, (&a, &b)) in out.row(g).iter().zip(&case.pred.to_f64()).enumerate() {
            assert!(
                (a - b).abs() <= 1e-12,
                "k = {} eval {e}: ours {a}, scikit-learn {b}",
                grid[g]
            );
            worst = worst.max((a - b).abs());
            n += 1;
        }
    }
    eprintln!("k-NN regression: {n} predictions agree, largest difference {worst:e}");
}

// Reference: scikit-learn KNeighborsClassifier(n_neighbors=k, algorithm="brute"),
// k in {1, 2, 3, 5, 8, 13}, three-class and two-class data. Expectation: identical except at
// vote ties, where scikit-learn takes the smallest tied class and this family the tied class of
// the nearest neighbour; each rule is checked at every tie.
#[test]
fn knn_classifier_matches_sklearn() {
    let fx = load("sklearn-knn-classifier.json");
    assert_eq!(fx.datasets.len(), 2);
    for ds in &fx.datasets {
        let data = Data::new(ds);
        check_neighbours(ds, &data);
        let labels: Vec<usize> = data.y.iter().map(|&c| c as usize).collect();
        let grid: Vec<f64> = ds.cases.iter().map(|c| c.k.unwrap() as f64).collect();
        let out = data.fit(&KnnFamily::default(), &grid);
        for (g, case) in ds.cases.iter().enumerate() {
            let k = case.k.unwrap();
            let sk = case.pred.to_f64();
            let (mut same, mut ties, mut differ) = (0, 0, 0);
            for e in 0..data.eval.nrows() {
                let near = &ds.neighbours[e][..k];
                let mut votes = vec![0usize; ds.classes];
                for &i in near {
                    votes[labels[i]] += 1;
                }
                let top = *votes.iter().max().unwrap();
                let tied: Vec<usize> = (0..ds.classes).filter(|&c| votes[c] == top).collect();
                let (ours, theirs) = (out[[g, e]], sk[e]);
                if tied.len() > 1 {
                    ties += 1;
                    // scikit-learn: argmax of class proportions, first (smallest) class on ties.
                    assert_eq!(theirs, tied[0] as f64, "{} k={k} eval {e}", ds.name);
                    // lossprism: the tied class whose member is nearest.
                    let nearest = near
                        .iter()
                        .map(|&i| labels[i])
                        .find(|c| tied.contains(c))
                        .unwrap();
                    assert_eq!(ours, nearest as f64, "{} k={k} eval {e}", ds.name);
                    if ours != theirs {
                        differ += 1;
                    }
                } else {
                    // Reference: scikit-learn; a strict majority is the same class everywhere.
                    assert_eq!(ours, theirs, "{} k={k} eval {e}: no vote tie", ds.name);
                    assert_eq!(ours, tied[0] as f64);
                    same += 1;
                }
            }
            if ds.classes == 2 && k % 2 == 1 {
                assert_eq!(ties, 0, "two classes and odd k cannot tie");
            }
            eprintln!(
                "k-NN classification {} k={k}: {same} identical without a vote tie, \
                 {ties} vote ties ({differ} decided differently, each by the documented rules)",
                ds.name
            );
        }
    }
}
