//! The reference model of a simulated twin: a flexible fit of E[y | x] (or of P(y = c | x)) on a
//! table that serves as the twin's truth, the recipe that rebuilds it, and its choice.
//!
//! **Regression**: five candidates, each tuned on the table, chosen by cross-validated R²
//! ([`select`]): k nearest neighbours, bagged trees ([`forest`]), local-linear kernel
//! regression ([`loclin`]), polynomial least squares of total degree 1 to 3
//! ([`crate::family::poly::PolyFit`], the `poly` family's basis; the one candidate that follows
//! a polynomial trend, such as a product of inputs, into the table's sparse tails; never part of
//! the blend `select` builds, though a hand-written recipe may give it a weight) and a stacked
//! non-negative blend of the first three. A [`Choice`] records everything needed to refit the chosen
//! reference exactly (which candidate, its knobs, the forest's seed, the blend's weights), and a twin scenario writes it as
//! `reference = { family = "forest", k = 16, trees = 100, min_leaf = 5, seed = 7, ... }`; `run`
//! refits it at plan time, bit for bit. The older form `{ family = "knn", k = 7, standardize =
//! true }` is the k-NN candidate alone.
//!
//! **k-NN** is on inputs standardized by the table's mean and sd (each column centred and
//! divided by its standard deviation, so an input in large units does not dominate the
//! distance), ties in distance to the lower row index. [`fit`] chooses k alone by 10-fold
//! cross-validation: the reference of classification twins and of the regression twins written
//! before the candidates existed.
//!
//! **Varying noise** (`varying = true`): σ²(x) is the k-NN average (the recipe's k, same
//! standardization) of the k-NN leave-one-out squared residuals times k/(k+1), the factor that
//! removes the variance of the k-neighbour mean from a leave-one-out residual under constant
//! noise (E[(y_i − f̂_{−i}(x_i))²] = σ²(1 + 1/k) + bias²).
//!
//! **Classes**: three references, compared by cross-validated log-loss on the same folds
//! (`commands::twin::class_reference`): the neighbour shares with add-one smoothing,
//! `(count_c + 1) / (k + K)`, so no probability is exactly 0 and the twin's labels keep some
//! noise everywhere (k chosen by the cross-validated Brier score, [`fit`]); and the logistic
//! polynomial and probability tree of [`classes`], both on the inputs that
//! [`select_class_inputs`] keeps (backward elimination on the k-NN shares' cross-validated
//! log-loss with a one-SE guard). The quality printed is the cross-validated accuracy of the
//! most probable class.

pub mod classes;
pub mod forest;
pub mod loclin;
pub mod select;

use std::sync::Arc;

use ndarray::{Array1, Array2, ArrayView1, ArrayView2};
use rand::Rng;

use crate::dataset::noise::{self, NoiseEstimate};
use crate::dataset::Table;
use crate::error::Error;
use crate::family::neighbours::{NeighbourIndex, Scratch};
use crate::family::poly::PolyFit;
use crate::family::standardize::Standardizer;
use crate::family::Task;

pub use forest::{Forest, ForestParams};
pub use loclin::LocLin;

/// Folds of the cross-validation that chooses k in [`fit`].
pub const CV_FOLDS: usize = 10;

/// Candidate neighbour counts of varying noise's variance smoother
/// ([`Reference::choose_smooth_k`]): squared residuals are far noisier than responses (a
/// Gaussian's has a relative sd of √2), so the range reaches further than [`K_CANDIDATES`].
pub const SMOOTH_K_CANDIDATES: [usize; 13] =
    [5, 10, 15, 20, 30, 50, 75, 100, 150, 200, 300, 500, 1000];

/// Largest σ²(x) a [`Reference::set_varying`] level may scale varying noise to (σ(x) up to
/// 1e150): beyond it the responses' squares, summed over points and replicates, overflow.
pub const VAR_MAX: f64 = 1e300;

/// Candidate k values tried by [`fit`] (those that fit in a training fold).
pub const K_CANDIDATES: [usize; 14] = [1, 2, 3, 4, 5, 7, 10, 15, 20, 30, 50, 75, 100, 150];

/// A candidate reference.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Candidate {
    /// k nearest neighbours.
    Knn,
    /// Bagged regression trees.
    Forest,
    /// Local-linear kernel regression.
    LocLin,
    /// Polynomial least squares (total degree by cross-validation).
    Poly,
    /// Non-negative blend of the others.
    Blend,
    /// Classes: logistic polynomial ([`classes::Logit`]; `degree` and `ridge`).
    Logit,
    /// Classes: probability tree ([`classes::ProbTree`]; `depth`, `min_leaf`, `seed`).
    Tree,
}

impl Candidate {
    /// Name as written in scenario files (`family` of `reference`).
    pub fn name(self) -> &'static str {
        match self {
            Candidate::Knn => "knn",
            Candidate::Forest => "forest",
            Candidate::LocLin => "loclin",
            Candidate::Poly => "poly",
            Candidate::Blend => "blend",
            Candidate::Logit => "logit",
            Candidate::Tree => "tree",
        }
    }

    /// Parses a scenario-file name.
    pub fn from_name(s: &str) -> Option<Candidate> {
        match s {
            "knn" => Some(Candidate::Knn),
            "forest" => Some(Candidate::Forest),
            "loclin" => Some(Candidate::LocLin),
            "poly" => Some(Candidate::Poly),
            "blend" => Some(Candidate::Blend),
            "logit" => Some(Candidate::Logit),
            "tree" => Some(Candidate::Tree),
            _ => None,
        }
    }

    /// In words, with its source.
    pub fn describe(self) -> &'static str {
        match self {
            Candidate::Knn => "k nearest neighbours on standardized inputs",
            Candidate::Forest => "bagged regression trees (Breiman 1996)",
            Candidate::LocLin => "local-linear Gaussian-kernel regression (Fan and Gijbels 1996)",
            Candidate::Poly => {
                "polynomial least squares in the inputs (total degree 1 to 3 when chosen by \
                 cross-validation)"
            }
            Candidate::Blend => {
                "non-negative stacked blend of k-NN, bagged trees and local-linear (Breiman 1996)"
            }
            Candidate::Logit => {
                "logistic polynomial: multinomial logistic regression on the polynomial basis, \
                 ridge-penalized"
            }
            Candidate::Tree => "probability tree: Gini CART with add-one leaf shares",
        }
    }
}

/// The recipe of a reference: everything needed to refit it on the table exactly.
#[derive(Debug, Clone, PartialEq)]
pub struct Choice {
    /// The chosen candidate.
    pub family: Candidate,
    /// Standardize the k-NN inputs (local-linear always standardizes; trees need not).
    pub standardize: bool,
    /// The k-NN candidate's k (used with a positive k-NN weight, by classes and by varying
    /// noise).
    pub k: Option<usize>,
    /// The forest (used with a positive forest weight).
    pub forest: Option<ForestParams>,
    /// The local-linear bandwidth in sd units (used with a positive local-linear weight).
    pub bandwidth: Option<f64>,
    /// The polynomial part's total degree (used with a positive polynomial weight).
    pub degree: Option<usize>,
    /// Weights of k-NN, forest, local-linear, polynomial: a single 1 for one candidate.
    pub weights: [f64; 4],
    /// Cross-validated R² of knn, forest, loclin, poly, blend when the choice was made
    /// (informational; not needed to refit; NaN: not tried).
    pub cv_r2: Option<[f64; 5]>,
    /// Twicing (regression): the same recipe is fitted again to the in-sample residuals of the
    /// first fit and the two are added, `f̂ = S y + S (y − S y)` (Tukey 1977, *Exploratory Data
    /// Analysis*, "twicing"; one step of L2 boosting, Bühlmann and Yu 2003, *JASA* 98:324–339).
    /// It restores curvature the cross-validated smoother rounds off.
    pub twice: bool,
    /// Input weights of the k-NN and local-linear parts (one per input, finite, ≥ 0): each
    /// standardized input is multiplied by its weight before any distance, so an input the
    /// response barely depends on stops pushing neighbours apart (gradient weights, Kpotufe,
    /// Boularias, Schultz and Kim 2016, *JMLR* 17, from memory; chosen in [`select`]). `None`:
    /// every input counts alike. Needs `standardize`. A classification twin's logistic
    /// polynomial and probability tree use the inputs of positive weight only (0/1 weights
    /// chosen by [`select_class_inputs`]; the size of a positive weight does not matter there).
    pub metric: Option<Vec<f64>>,
    /// Regression: the inputs (column indices, ascending) every part of the reference is
    /// fitted on, when [`select::eliminate_inputs`] left the others out; the twin's truth does
    /// not move with those. `metric` then has weight 0 on them (the noise estimator's
    /// distances follow it). `None`: every input. Written `inputs = ["x1", ...]` by name.
    pub inputs: Option<Vec<usize>>,
    /// Classes, the logistic polynomial: its ridge penalty (its degree is `degree`).
    pub ridge: Option<f64>,
    /// Classes, the probability tree: depth, smallest leaf and the seed of its tie draws.
    pub tree: Option<TreeParams>,
}

/// The probability tree of a classification reference ([`classes::ProbTree`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TreeParams {
    /// Depth (root 0).
    pub depth: usize,
    /// Smallest number of rows in each child of a split.
    pub min_leaf: usize,
    /// Seed of the stream its exact ties are drawn from.
    pub seed: u64,
}

impl Choice {
    /// The k-NN reference alone (the older scenario form, and classification).
    pub fn knn(k: usize, standardize: bool) -> Choice {
        Choice {
            family: Candidate::Knn,
            standardize,
            k: Some(k),
            forest: None,
            bandwidth: None,
            degree: None,
            weights: [1.0, 0.0, 0.0, 0.0],
            cv_r2: None,
            twice: false,
            metric: None,
            inputs: None,
            ridge: None,
            tree: None,
        }
    }

    /// The logistic polynomial of a classification twin (degree `degree`, ridge `ridge`).
    pub fn logit(degree: usize, ridge: f64) -> Choice {
        Choice {
            family: Candidate::Logit,
            k: None,
            degree: Some(degree),
            weights: [0.0; 4],
            ridge: Some(ridge),
            ..Choice::knn(1, true)
        }
    }

    /// The probability tree of a classification twin.
    pub fn tree(params: TreeParams) -> Choice {
        Choice {
            family: Candidate::Tree,
            k: None,
            weights: [0.0; 4],
            tree: Some(params),
            ..Choice::knn(1, true)
        }
    }

    /// The recipe with the smoothing knob of every part the fit uses (a positive weight)
    /// scaled by `factor` (in (0, 1]: less smoothing): the k-NN part's k and the forest's leaf
    /// size rounded (at least 1), the local-linear bandwidth multiplied. A part with no weight
    /// keeps its knob (a k-NN k without weight still sets varying noise's smoother, which the
    /// sharpening is not meant to touch). Candidate, weights, input weights, twicing and the
    /// polynomial's degree (no smoothing knob to scale) are kept. The twin sharpens its reference this way ([`crate::dgp::twin::SHARPEN`]).
    pub fn sharpened(&self, factor: f64) -> Choice {
        let scale = |v: usize| ((v as f64 * factor).round() as usize).max(1);
        let alone = [
            Candidate::Knn,
            Candidate::Forest,
            Candidate::LocLin,
            Candidate::Poly,
        ];
        let used = |part: usize| self.weights[part] > 0.0 || self.family == alone[part];
        Choice {
            k: self.k.map(|k| if used(0) { scale(k) } else { k }),
            forest: self.forest.map(|f| ForestParams {
                min_leaf: if used(1) {
                    scale(f.min_leaf)
                } else {
                    f.min_leaf
                },
                ..f
            }),
            bandwidth: self.bandwidth.map(|h| if used(2) { h * factor } else { h }),
            ..self.clone()
        }
    }

    /// What [`Choice::sharpened`] changed from `cv` to `self`, in words (`k 15 → 13, bandwidth
    /// 0.400 → 0.340 sd`), for the parts the recipe uses; empty when nothing changed.
    pub fn sharpening_words(&self, cv: &Choice) -> String {
        let mut parts = Vec::new();
        if let (Some(a), Some(b)) = (cv.k, self.k) {
            if a != b {
                parts.push(format!("k {a} → {b}"));
            }
        }
        if let (Some(a), Some(b)) = (cv.forest, self.forest) {
            if a.min_leaf != b.min_leaf {
                parts.push(format!("min_leaf {} → {}", a.min_leaf, b.min_leaf));
            }
        }
        if let (Some(a), Some(b)) = (cv.bandwidth, self.bandwidth) {
            if a != b {
                parts.push(format!("bandwidth {a:.3} → {b:.3} sd"));
            }
        }
        parts.join(", ")
    }

    /// The recipe as fitted on the columns [`Choice::inputs`] keeps (the same recipe when it
    /// keeps every input): no `inputs`, and the metric cut to those columns — or none when it
    /// weighs each of them 1 (the recipe writes those weights to say which inputs are left out;
    /// fitted as the plain metric, bit for bit the twin of a table of those columns alone).
    pub fn on_kept_inputs(&self) -> Choice {
        let Some(cols) = &self.inputs else {
            return self.clone();
        };
        let metric = match &self.metric {
            Some(w) if cols.iter().all(|&j| w.get(j) == Some(&1.0)) => None,
            Some(w) => Some(
                cols.iter()
                    .map(|&j| w.get(j).copied().unwrap_or(0.0))
                    .collect(),
            ),
            None => None,
        };
        Choice {
            inputs: None,
            metric,
            ..self.clone()
        }
    }

    /// The standardizer of the k-NN and local-linear parts on rows `x`: the table's mean and
    /// sd, times the input weights of [`Choice::metric`] when there are any. Errors when the
    /// weights do not match the inputs.
    pub fn standardizer(&self, x: ArrayView2<'_, f64>) -> Result<Standardizer, String> {
        let s = Standardizer::fit(x);
        match &self.metric {
            None => Ok(s),
            Some(w) => match metric_problem(w, x.ncols(), self.standardize) {
                Some(msg) => Err(format!("`metric` {msg}")),
                None => Ok(s.weighted(w)),
            },
        }
    }

    /// The recipe in words.
    pub fn describe(&self) -> String {
        let k = self.k.map(|k| format!("k = {k}")).unwrap_or_default();
        let forest = self
            .forest
            .map(|f| {
                format!(
                    "{} trees, min_leaf = {}, seed {}",
                    f.trees, f.min_leaf, f.seed
                )
            })
            .unwrap_or_default();
        let h = self
            .bandwidth
            .map(|h| format!("bandwidth {} sd", crate::fmt::fmt_exact(h)))
            .unwrap_or_default();
        let deg = self
            .degree
            .map(|d| format!("degree {d}"))
            .unwrap_or_default();
        let plain = match self.family {
            Candidate::Knn => format!(
                "k-NN reference ({k}{})",
                if self.standardize {
                    ", standardized inputs"
                } else {
                    ""
                }
            ),
            Candidate::Forest => format!("bagged-tree reference ({forest})"),
            Candidate::LocLin => format!("local-linear reference ({h})"),
            Candidate::Poly => format!("polynomial reference ({deg})"),
            Candidate::Blend => {
                let mut parts = Vec::new();
                if self.weights[0] > 0.0 {
                    parts.push(format!("{:.3} × k-NN ({k})", self.weights[0]));
                }
                if self.weights[1] > 0.0 {
                    parts.push(format!("{:.3} × bagged trees ({forest})", self.weights[1]));
                }
                if self.weights[2] > 0.0 {
                    parts.push(format!("{:.3} × local-linear ({h})", self.weights[2]));
                }
                if self.weights[3] > 0.0 {
                    parts.push(format!("{:.3} × polynomial ({deg})", self.weights[3]));
                }
                format!("blended reference: {}", parts.join(" + "))
            }
            Candidate::Logit => format!(
                "logistic-polynomial reference ({deg}, ridge {})",
                crate::fmt::fmt_exact(self.ridge.unwrap_or(f64::NAN))
            ),
            Candidate::Tree => match self.tree {
                Some(t) => format!(
                    "probability-tree reference (depth {}, min_leaf = {}, seed {})",
                    t.depth, t.min_leaf, t.seed
                ),
                None => "probability-tree reference".into(),
            },
        };
        // With inputs left out, only the kept inputs' weights are used, and weights of 1 on all
        // of them are no weighting (they only say which inputs are left out).
        let kept = self.on_kept_inputs();
        let plain = match &kept.metric {
            Some(w) if self.weights[0] > 0.0 || self.weights[2] > 0.0 => {
                let ws: Vec<String> = w.iter().map(|v| format!("{v:.3}")).collect();
                format!(
                    "{plain}; neighbour distances weight the inputs by [{}]",
                    ws.join(", ")
                )
            }
            Some(w) if matches!(self.family, Candidate::Logit | Candidate::Tree) => {
                let ws: Vec<String> = w.iter().map(|v| format!("{v:.3}")).collect();
                format!(
                    "{plain}; on the inputs of positive weight in [{}]",
                    ws.join(", ")
                )
            }
            _ => plain,
        };
        let plain = match &self.inputs {
            Some(c) => {
                let cols: Vec<String> = c.iter().map(|j| (j + 1).to_string()).collect();
                format!(
                    "{plain}; on {} of the table's inputs only (by position in its input \
                     order: {}; the others left out)",
                    c.len(),
                    cols.join(", ")
                )
            }
            None => plain,
        };
        if self.twice {
            format!("{plain}, twiced (refitted to its own residuals and added)")
        } else {
            plain
        }
    }
}

/// Largest input weight of [`Choice::metric`] (`select` writes weights scaled so the largest is
/// 1; a weight far above that would overflow squared distances).
pub const MAX_METRIC_WEIGHT: f64 = 1e6;

/// What is wrong with input weights `w` for a table of `inputs` inputs (the one check of
/// [`Choice::metric`], for scenario files and library callers alike), or `None`.
pub fn metric_problem(w: &[f64], inputs: usize, standardize: bool) -> Option<String> {
    if w.len() != inputs {
        Some(format!(
            "has {} weights for the table's {inputs} inputs",
            w.len()
        ))
    } else if let Some(v) = w
        .iter()
        .find(|v| !(v.is_finite() && (0.0..=MAX_METRIC_WEIGHT).contains(*v)))
    {
        Some(format!(
            "weights must be numbers between 0 and {MAX_METRIC_WEIGHT}, got {}",
            crate::fmt::fmt_exact(*v)
        ))
    } else if !w.iter().any(|v| *v > 0.0) {
        Some("needs at least one weight > 0".into())
    } else if !standardize {
        Some("weights standardized inputs: remove `standardize = false`".into())
    } else {
        None
    }
}

/// The columns `cols` of `x`, in row-major order (`select` along columns can give a
/// column-major array, whose column sums are added in another order: the same table cut by
/// `inputs` or read with only those `features` must give the same bits).
pub fn columns(x: ArrayView2<'_, f64>, cols: &[usize]) -> Array2<f64> {
    Array2::from_shape_fn((x.nrows(), cols.len()), |(i, c)| x[[i, cols[c]]])
}

/// What is wrong with the column list of [`Choice::inputs`] for a table of `inputs` inputs, or
/// `None`: it must name at least one input, each once, in the table's order.
pub fn inputs_problem(cols: &[usize], inputs: usize) -> Option<String> {
    if cols.is_empty() {
        Some("must name at least one input".into())
    } else if let Some(&j) = cols.iter().find(|&&j| j >= inputs) {
        Some(format!(
            "names input {} of a table with {inputs} inputs",
            j + 1
        ))
    } else if cols.windows(2).any(|w| w[0] >= w[1]) {
        Some("must name each input once, in the table's order".into())
    } else {
        None
    }
}

/// The inputs of positive weight in `w` (the columns a classification twin's logistic
/// polynomial and probability tree use when the recipe has input weights).
pub fn positive_columns(w: &[f64]) -> Vec<usize> {
    (0..w.len()).filter(|&j| w[j] > 0.0).collect()
}

/// Per-thread scratch of [`Reference::mean_at`].
#[derive(Default)]
struct MeanScratch {
    knn: Scratch,
    buf: Vec<usize>,
    loclin: loclin::Scratch,
}

thread_local! {
    static SCRATCH: std::cell::RefCell<MeanScratch> = std::cell::RefCell::new(MeanScratch::default());
}

/// The k-NN part of a reference.
#[derive(Debug, Clone)]
struct KnnPart {
    index: NeighbourIndex,
    k: usize,
}

/// The reference fit: the fitted parts of a [`Choice`] over the table's rows.
pub struct Reference {
    /// The table file it was fitted on (for descriptions).
    pub source: String,
    /// The table file's path as resolved (an input of the run).
    pub path: Option<std::path::PathBuf>,
    /// The recipe.
    pub choice: Choice,
    /// Number of classes (0 for regression).
    pub classes: usize,
    /// What `lossprism twin` measured when it wrote the scenario (echoed in results).
    pub report: Option<crate::dgp::twin::FitReport>,
    /// Table rows left out under `missing = "drop"` before the fit (echoed in the
    /// description).
    pub dropped_rows: usize,
    knn: Option<KnnPart>,
    forest: Option<Forest>,
    loclin: Option<LocLin>,
    poly: Option<PolyFit>,
    logit: Option<classes::Logit>,
    ptree: Option<classes::ProbTree>,
    /// Classes, the logistic polynomial and the tree: the inputs they use (those of positive
    /// weight in [`Choice::metric`]); `None`: every input.
    cols: Option<Vec<usize>>,
    y: Vec<f64>,
    /// Varying noise: k/(k+1) × squared leave-one-out residual per table row.
    sq_resid: Option<Vec<f64>>,
    /// Varying noise: the neighbours σ²(x) averages (the recipe's k unless
    /// [`Reference::set_varying`] chose another).
    var_k: usize,
    /// Varying noise: the factor that brings σ²(x) to its level (1 unless
    /// [`Reference::set_varying`] set a level).
    var_scale: f64,
    /// Twicing: the second fit, on the first fit's in-sample residuals.
    second: Option<Box<Reference>>,
    /// Classes: the temperature τ that sharpens the class shares, `p_c ∝ p_c^(1/τ)` (1: as
    /// they are; see [`calibrate_temperature`]).
    pub temperature: f64,
    /// Classes with k-NN shares over every row (the class shares alone): the add-one shares of
    /// the whole table, the same at every input, computed once (a neighbour search over every
    /// row at every call cost a 20 000-row twin about 9 s per replicate). Integer counts: the
    /// same bits as the search's sums.
    all_rows_shares: Option<Vec<f64>>,
}

impl std::fmt::Debug for Reference {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Reference")
            .field("source", &self.source)
            .field("choice", &self.choice)
            .field("rows", &self.y.len())
            .field("classes", &self.classes)
            .finish()
    }
}

/// Bytes a fitted reference of `choice` on `n` rows of `p` inputs (`classes` > 0 for class
/// probabilities) holds, rounded up, for the memory checks made before it is fitted: the
/// forest's trees (at most `2 · min(n / min_leaf, 0.64 n) + 1` nodes each, a bootstrap holding
/// about 63.2% distinct rows, 24 bytes a node), the probability tree, copies of the table for
/// the neighbour search and the local-linear part, and everything twice when twiced. A
/// hand-edited recipe of 10 000 trees on 3 000 rows took 937 MB while the run's estimate said
/// 33 MiB.
pub fn fitted_bytes(choice: &Choice, n: usize, p: usize, classes: usize) -> f64 {
    let (nf, pf, kf) = (n as f64, p as f64, classes as f64);
    let node = 24.0 + 4.0 * kf;
    // Leaves: at most one per `min_leaf` samples and one per distinct row (a bootstrap sample
    // holds about 63.2% of them; the probability tree grows on the whole table).
    let nodes = |min_leaf: usize, distinct: f64| {
        2.0 * (nf / min_leaf.max(1) as f64).min(distinct * nf + 1.0) + 1.0
    };
    let w = choice.weights;
    let forest = match choice.forest {
        Some(f) if w[1] > 0.0 => f.trees as f64 * nodes(f.min_leaf, 0.64) * node,
        _ => 0.0,
    };
    let tree = choice.tree.map_or(0.0, |t| {
        nodes(t.min_leaf, 1.0).min(2f64.powi(t.depth.min(60) as i32 + 1)) * node
    });
    let tables = 4.0 * 8.0 * nf * (pf + 2.0);
    let once = forest + tree + tables;
    if choice.twice {
        2.0 * once
    } else {
        once
    }
}

impl Reference {
    /// Tree nodes the fitted reference holds (its forest's and its probability tree's, the
    /// twiced second stage's included): what [`fitted_bytes`] bounds at 24 bytes a node.
    pub fn tree_nodes(&self) -> usize {
        self.forest.as_ref().map_or(0, Forest::nodes)
            + self.ptree.as_ref().map_or(0, classes::ProbTree::nodes)
            + self.second.as_ref().map_or(0, |r| r.tree_nodes())
    }

    /// Fits the reference of `choice` on a table's inputs and response (class indices for
    /// `classes > 0`, which use the k-NN part). With `varying`, also computes the smoothed
    /// squared residuals for σ²(x) (regression; needs the recipe's k). Errors when the recipe
    /// lacks a part it needs.
    pub fn fit(
        x: ArrayView2<'_, f64>,
        y: ArrayView1<'_, f64>,
        classes: usize,
        choice: &Choice,
        varying: bool,
        source: &str,
    ) -> Result<Reference, String> {
        if choice.twice {
            if classes > 0 || varying {
                return Err("twicing applies to a regression mean with constant noise".into());
            }
            let once = Choice {
                twice: false,
                ..choice.clone()
            };
            return Reference::fit(x, y, 0, &once, false, source)?.twiced(x, y);
        }
        if let Some(cols) = &choice.inputs {
            if let Some(msg) = inputs_problem(cols, x.ncols()) {
                return Err(format!("`inputs` {msg}"));
            }
            if classes > 0 || varying {
                return Err(
                    "`inputs` applies to a regression reference with constant noise".into(),
                );
            }
            if choice.metric.as_ref().is_some_and(|w| w.len() != x.ncols()) {
                return Err(format!(
                    "`metric` has {} weights for the table's {} inputs",
                    choice.metric.as_ref().map_or(0, |w| w.len()),
                    x.ncols()
                ));
            }
            let inner = choice.on_kept_inputs();
            let xs = columns(x, cols);
            let mut r = Reference::fit(xs.view(), y, 0, &inner, false, source)?;
            r.choice = choice.clone();
            return Ok(r);
        }
        let n = x.nrows().max(1);
        let w = choice.weights;
        let need_knn = w[0] > 0.0 || (classes > 0 && choice.family == Candidate::Knn) || varying;
        let yv = y.to_vec();
        let knn = if need_knn {
            let k = choice
                .k
                .ok_or("needs `k` (the k-NN part: weight, classes or varying noise)")?;
            let index = match &choice.metric {
                Some(_) => NeighbourIndex::with_standardizer(x, choice.standardizer(x)?),
                None => NeighbourIndex::new(x, choice.standardize),
            };
            Some(KnnPart {
                index,
                k: k.clamp(1, n),
            })
        } else {
            None
        };
        let forest = if w[1] > 0.0 {
            let params = choice
                .forest
                .ok_or("needs `trees`, `min_leaf` and `seed`")?;
            Some(Forest::fit(x, &yv, params))
        } else {
            None
        };
        let loclin = if w[2] > 0.0 {
            let h = choice.bandwidth.ok_or("needs `bandwidth`")?;
            Some(LocLin::fit_with(x, &yv, h, choice.standardizer(x)?))
        } else {
            None
        };
        let poly = if w[3] > 0.0 {
            let d = choice.degree.ok_or("needs `degree`")?;
            Some(PolyFit::fit(x, &yv, d).map_err(|m| format!("the polynomial part: {m}"))?)
        } else {
            None
        };
        // The logistic polynomial and the tree see only the inputs of positive weight.
        let cols = match (&choice.metric, classes, choice.family) {
            (Some(w), 1.., Candidate::Logit | Candidate::Tree) => {
                if let Some(msg) = metric_problem(w, x.ncols(), true) {
                    return Err(format!("`metric` {msg}"));
                }
                Some(positive_columns(w))
            }
            _ => None,
        };
        let x_sel = cols.as_ref().map(|c| x.select(ndarray::Axis(1), c));
        let xc = match &x_sel {
            Some(a) => a.view(),
            None => x.view(),
        };
        let (logit, ptree) = match (classes, choice.family) {
            (0, _) => (None, None),
            (_, Candidate::Knn) => (None, None),
            (_, Candidate::Logit) => {
                let (Some(d), Some(r)) = (choice.degree, choice.ridge) else {
                    return Err("needs `degree` and `ridge`".into());
                };
                let labels: Vec<usize> = yv.iter().map(|&v| v as usize).collect();
                let m = classes::Logit::fit(xc, &labels, classes, d, r)
                    .map_err(|m| format!("the logistic polynomial: {m}"))?;
                (Some(m), None)
            }
            (_, Candidate::Tree) => {
                let t = choice.tree.ok_or("needs `depth`, `min_leaf` and `seed`")?;
                let m = classes::ProbTree::fit(xc, y, classes, t.depth, t.min_leaf, t.seed)
                    .map_err(|m| format!("the probability tree: {m}"))?;
                (None, Some(m))
            }
            (_, other) => {
                return Err(format!(
                    "a classification twin's reference is `knn`, `logit` or `tree`, not `{}`",
                    other.name()
                ))
            }
        };
        let mut r = Reference {
            source: source.to_string(),
            path: None,
            choice: choice.clone(),
            classes,
            report: None,
            dropped_rows: 0,
            knn,
            forest,
            loclin,
            poly,
            logit,
            ptree,
            cols,
            y: yv,
            sq_resid: None,
            var_k: 0,
            var_scale: 1.0,
            second: None,
            temperature: 1.0,
            all_rows_shares: None,
        };
        if classes > 0 && r.knn.as_ref().is_some_and(|kp| kp.k >= r.y.len()) {
            let mut shares = vec![1.0; classes];
            for &c in &r.y {
                if let Some(p) = shares.get_mut(c as usize) {
                    *p += 1.0;
                }
            }
            let total = r.y.len() as f64 + classes as f64;
            shares.iter_mut().for_each(|p| *p /= total);
            r.all_rows_shares = Some(shares);
        }
        if varying && classes == 0 {
            if let Some(kp) = &r.knn {
                if x.nrows() > kp.k {
                    let k = kp.k;
                    let mut scratch = Scratch::default();
                    let mut buf = Vec::new();
                    let sq = (0..x.nrows())
                        .map(|i| {
                            let q = x.row(i).to_vec();
                            kp.index
                                .nearest_excluding(&q, k, |j| j == i, &mut scratch, &mut buf);
                            let m = buf.iter().map(|&j| r.y[j]).sum::<f64>() / k as f64;
                            (r.y[i] - m).powi(2) * k as f64 / (k as f64 + 1.0)
                        })
                        .collect();
                    r.sq_resid = Some(sq);
                    r.var_k = k;
                }
            }
        }
        Ok(r)
    }

    /// Twicing of a regression reference fitted once on `(x, y)`: its recipe is fitted again to
    /// its in-sample residuals `y − f̂(x)` and added (see [`Choice::twice`]).
    pub fn twiced(
        self,
        x: ArrayView2<'_, f64>,
        y: ArrayView1<'_, f64>,
    ) -> Result<Reference, String> {
        let fit = self.mean_at_rows(x);
        self.twiced_with_fit(x, y, &fit)
    }

    /// [`Reference::twiced`] given this reference's in-sample fit `fit` at the rows of `x`
    /// (callers that have it already need not evaluate it again).
    pub fn twiced_with_fit(
        mut self,
        x: ArrayView2<'_, f64>,
        y: ArrayView1<'_, f64>,
        fit: &[f64],
    ) -> Result<Reference, String> {
        if self.classes > 0 || self.sq_resid.is_some() || self.choice.twice {
            return Err("twicing applies once, to a regression mean with constant noise".into());
        }
        if fit.len() != y.len() || x.nrows() != y.len() {
            return Err("twicing needs the in-sample fit at every row".into());
        }
        let resid: Vec<f64> = y.iter().zip(fit).map(|(v, f)| v - f).collect();
        if let Some(i) = resid.iter().position(|r| !r.is_finite()) {
            return Err(format!(
                "the reference fitted once gives {} at data row {} (response {}), so twicing has \
                 no finite residual to refit; check the recipe's `bandwidth` and `weights`",
                fit[i],
                i + 1,
                y[i]
            ));
        }
        let once = self.choice.clone();
        let w = once.weights;
        // The k-NN, local-linear and polynomial parts are linear in the responses,
        // S y + S r = S (y + r): one fit on y + r, so evaluating the twiced truth costs one
        // smoother, not two.
        let lin_y: Vec<f64> = y.iter().zip(&resid).map(|(a, b)| a + b).collect();
        let lin = Choice {
            weights: [w[0], 0.0, w[2], w[3]],
            ..once.clone()
        };
        let mut out = Reference::fit(x, ArrayView1::from(&lin_y), 0, &lin, false, &self.source)?;
        if w[1] > 0.0 {
            // Bagged trees are not linear in the responses (their splits depend on them): the
            // forest fitted once plus a forest fitted to the residuals.
            let only_forest = Choice {
                weights: [0.0, w[1], 0.0, 0.0],
                ..once.clone()
            };
            let on_resid = Reference::fit(
                x,
                ArrayView1::from(&resid),
                0,
                &only_forest,
                false,
                &self.source,
            )?;
            self.knn = None;
            self.loclin = None;
            self.poly = None;
            self.choice = only_forest;
            self.second = Some(Box::new(on_resid));
            out.second = Some(Box::new(self));
        }
        out.choice = Choice {
            twice: true,
            ..once
        };
        Ok(out)
    }

    /// The k-NN part's k (0 without one).
    pub fn k(&self) -> usize {
        self.knn.as_ref().map_or(0, |p| p.k)
    }

    fn neighbours(&self, row: &[f64], scratch: &mut Scratch, buf: &mut Vec<usize>) {
        if let Some(p) = &self.knn {
            p.index.nearest(row, p.k, scratch, buf);
        } else {
            buf.clear();
        }
    }

    /// The reference's E[y | x] at one input row ([`Reference::mean_at_rows`] of that row).
    pub fn mean_at(&self, row: &[f64]) -> f64 {
        let x = ArrayView2::from_shape((1, row.len()), row).expect("one row");
        self.mean_at_rows(x)[0]
    }

    /// The reference's E[y | x] at every row of `x`: the weighted parts in the recipe's order
    /// (k-NN, forest, local-linear, polynomial), plus the second fit when twiced. The forest part is evaluated
    /// for all rows at once ([`Forest::predict_rows`], bit for bit [`Forest::predict`] row by
    /// row), which is several times faster on many rows; scratch space is kept per thread.
    pub fn mean_at_rows(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let full = x;
        // A recipe with `inputs` was fitted on those columns ([`Reference::fit`]), so every row
        // is cut to them.
        let cut = self.choice.inputs.as_ref().map(|c| columns(x, c));
        let x = cut.as_ref().map_or(x.view(), |c| c.view());
        let forest = self.forest.as_ref().map(|f| f.predict_rows(x));
        let poly = self.poly.as_ref().map(|p| p.predict(x));
        let w = self.choice.weights;
        let mut out = Vec::with_capacity(x.nrows());
        SCRATCH.with(|cell| {
            let mut s = cell.borrow_mut();
            let s = &mut *s;
            let mut row = Vec::with_capacity(x.ncols());
            for (i, r) in x.rows().into_iter().enumerate() {
                row.clear();
                row.extend(r.iter().copied());
                let mut v = 0.0;
                if w[0] > 0.0 && self.knn.is_some() {
                    self.neighbours(&row, &mut s.knn, &mut s.buf);
                    v +=
                        w[0] * (s.buf.iter().map(|&j| self.y[j]).sum::<f64>() / s.buf.len() as f64);
                }
                if let Some(f) = &forest {
                    v += w[1] * f[i];
                }
                if let Some(l) = &self.loclin {
                    v += w[2] * l.predict_with(&row, &mut s.loclin);
                }
                if let Some(p) = &poly {
                    v += w[3] * p[i];
                }
                out.push(v);
            }
        });
        if let Some(second) = &self.second {
            for (o, t) in out.iter_mut().zip(second.mean_at_rows(full)) {
                *o += t;
            }
        }
        out
    }

    /// Class probabilities at one input row: neighbour shares with add-one smoothing (k-NN),
    /// the logistic polynomial's, or the probability tree's leaf shares; sharpened by the
    /// temperature.
    pub fn probs_at(&self, row: &[f64], out: &mut [f64]) {
        let picked: Vec<f64>;
        let sel = match &self.cols {
            Some(c) => {
                picked = c.iter().map(|&j| row[j]).collect();
                picked.as_slice()
            }
            None => row,
        };
        if let Some(m) = &self.logit {
            let x = ArrayView2::from_shape((1, sel.len()), sel).expect("one row");
            out.copy_from_slice(&m.probs_rows(x));
        } else if let Some(t) = &self.ptree {
            t.probs_at(sel, out);
        } else if let Some(s) = &self.all_rows_shares {
            out.copy_from_slice(s);
        } else {
            let mut buf = Vec::with_capacity(self.k());
            self.neighbours(row, &mut Scratch::default(), &mut buf);
            out.iter_mut().for_each(|p| *p = 1.0);
            for &j in &buf {
                if let Some(p) = out.get_mut(self.y[j] as usize) {
                    *p += 1.0;
                }
            }
            let total = buf.len() as f64 + out.len() as f64;
            out.iter_mut().for_each(|p| *p /= total);
        }
        if self.temperature != 1.0 {
            sharpen(out, self.temperature);
        }
    }

    /// Class probabilities at every row of `x` (`rows × classes`), [`Reference::probs_at`] row by
    /// row, bit for bit; the logistic polynomial builds its basis once for all rows (the twin
    /// draws labels at every training row of every replicate).
    pub fn probs_rows(&self, x: ArrayView2<'_, f64>) -> Array2<f64> {
        let k = self.classes;
        let mut out = Array2::zeros((x.nrows(), k));
        if let Some(m) = &self.logit {
            let p = match &self.cols {
                Some(c) => m.probs_rows(x.select(ndarray::Axis(1), c).view()),
                None => m.probs_rows(x),
            };
            for (mut row, src) in out.rows_mut().into_iter().zip(p.chunks_exact(k.max(1))) {
                row.iter_mut().zip(src).for_each(|(o, v)| *o = *v);
                if self.temperature != 1.0 {
                    sharpen(
                        row.as_slice_mut().expect("a standard-layout row"),
                        self.temperature,
                    );
                }
            }
        } else {
            let mut buf = vec![0.0; x.ncols()];
            for (mut row, src) in out.rows_mut().into_iter().zip(x.rows()) {
                buf.iter_mut().zip(src).for_each(|(b, v)| *b = *v);
                self.probs_at(&buf, row.as_slice_mut().expect("a standard-layout row"));
            }
        }
        out
    }

    /// Varying noise: σ²(x), the average over its [`Reference::smooth_k`] nearest table rows of
    /// the corrected squared leave-one-out residuals, times the level's factor; `None` without
    /// varying noise.
    pub fn var_at(&self, row: &[f64]) -> Option<f64> {
        let sq = self.sq_resid.as_ref()?;
        let p = self.knn.as_ref()?;
        let mut buf = Vec::with_capacity(self.var_k);
        p.index
            .nearest(row, self.var_k, &mut Scratch::default(), &mut buf);
        Some(self.var_scale * buf.iter().map(|&j| sq[j]).sum::<f64>() / buf.len().max(1) as f64)
    }

    /// Varying noise: the neighbours σ²(x) averages (0 without varying noise).
    pub fn smooth_k(&self) -> usize {
        if self.sq_resid.is_some() {
            self.var_k
        } else {
            0
        }
    }

    /// Varying noise: the factor that brings σ²(x) to its level (1 unless
    /// [`Reference::set_varying`] was given one).
    pub fn level_factor(&self) -> f64 {
        self.var_scale
    }

    /// Varying noise: σ²(x) averages `smooth_k` neighbours (the recipe's k when `None`) and,
    /// with `level`, is scaled so that its mean over the rows of `x` (the table it was fitted
    /// on) is `level`: the shape comes from the local squared residuals, the level from a noise
    /// estimate that was corrected for the reference's bias. Errors (one line) without varying
    /// noise, for `smooth_k` outside 1..rows, a `level` that is not a finite number > 0,
    /// squared residuals that are all 0 or overflow, or a `level` that would take σ²(x) beyond
    /// [`VAR_MAX`].
    pub fn set_varying(
        &mut self,
        x: ArrayView2<'_, f64>,
        smooth_k: Option<usize>,
        level: Option<f64>,
    ) -> Result<(), String> {
        let (Some(_), Some(p)) = (&self.sq_resid, &self.knn) else {
            return Err("σ²(x) needs varying noise and the k-NN part".into());
        };
        let n = self.y.len();
        let k = smooth_k.unwrap_or(p.k);
        if k == 0 || k >= n {
            return Err(format!(
                "`smooth_k` must be between 1 and {}, got {k}",
                n.saturating_sub(1)
            ));
        }
        self.var_k = k;
        self.var_scale = 1.0;
        if let Some(level) = level {
            if !(level.is_finite() && level > 0.0) {
                return Err(format!("`level` must be a finite number > 0, got {level}"));
            }
            let mut row = vec![0.0; x.ncols()];
            let mut total = 0.0;
            for r in x.rows() {
                row.iter_mut().zip(r.iter()).for_each(|(b, v)| *b = *v);
                total += self.var_at(&row).unwrap_or(0.0);
            }
            let m = total / x.nrows().max(1) as f64;
            if !m.is_finite() {
                return Err(
                    "the squared residuals overflow: σ²(x) has no finite mean to scale; rescale the response".into(),
                );
            }
            if m <= 0.0 {
                return Err("the squared residuals are all 0: σ²(x) has no shape to scale".into());
            }
            // σ²(x) anywhere (a jittered input included) averages `k` squared residuals, so it is
            // at most the mean of the `k` largest: bounded so that the responses' squares stay
            // finite (σ(x) up to 1e150, as the runner's own overflow check).
            let scale = level / m;
            let top = self.var_top(k) * scale;
            if !(scale.is_finite() && top <= VAR_MAX) {
                let reach = if top.is_finite() {
                    format!("to as much as {top:e}")
                } else {
                    "past the range of floating-point numbers".into()
                };
                return Err(format!(
                    "`level` = {} would scale σ²(x) {reach} (the mean of its {k} largest squared residuals), above {VAR_MAX:e}, where the responses' squares overflow; lower it (or rescale the response)",
                    crate::fmt::fmt_exact(level),
                ));
            }
            self.var_scale = scale;
        }
        Ok(())
    }

    /// Varying noise, unscaled: the mean of the `k` largest corrected squared residuals, the
    /// most σ²(x) averaging `k` of them can reach at any input (0 without varying noise).
    fn var_top(&self, k: usize) -> f64 {
        let Some(sq) = &self.sq_resid else {
            return 0.0;
        };
        let mut s = sq.clone();
        s.sort_by(|a, b| b.total_cmp(a));
        let k = k.clamp(1, s.len().max(1));
        s.iter().take(k).sum::<f64>() / k as f64
    }

    /// Varying noise: whether each row's corrected squared leave-one-out residual rises with the
    /// average of its `k` nearest other rows' (noise whose variance changes with x makes them
    /// rise together): `(rho, z)`, Spearman's rank correlation of the two over the rows and
    /// `z = rho·√(n − 1)`, the scale of Spearman's rho under independence (its large-sample null
    /// law, from memory). Rows are not independent here (neighbours' leave-one-out residuals
    /// share responses), and on constant noise the median z measured −3.9 to +1.0 (one input
    /// to a step; docs/twin-calibration.md §2.10), so the threshold is set on measurements,
    /// not on the normal law. A test in the
    /// spirit of regressing squared residuals on the inputs (Breusch and Pagan 1979, from
    /// memory) with a k-NN smoother in place of their linear regression and ranks in place of
    /// values, since squared residuals have heavy tails. `None` without varying noise or with
    /// fewer than `k + 2` rows.
    pub fn spread_test(&self, x: ArrayView2<'_, f64>, k: usize) -> Option<(f64, f64)> {
        let sq = self.sq_resid.as_ref()?;
        let p = self.knn.as_ref()?;
        let n = sq.len();
        if k == 0 || n < k + 2 {
            return None;
        }
        let mut scratch = Scratch::default();
        let mut buf = Vec::with_capacity(k);
        let mut row = vec![0.0; x.ncols()];
        let local: Vec<f64> = x
            .rows()
            .into_iter()
            .enumerate()
            .map(|(i, r)| {
                row.iter_mut().zip(r.iter()).for_each(|(b, v)| *b = *v);
                p.index
                    .nearest_excluding(&row, k, |j| j == i, &mut scratch, &mut buf);
                buf.iter().map(|&j| sq[j]).sum::<f64>() / buf.len().max(1) as f64
            })
            .collect();
        let rho = pearson(&ranks(sq), &ranks(&local));
        let z = rho * ((n - 1) as f64).sqrt();
        (rho.is_finite() && z.is_finite()).then_some((rho, z))
    }

    /// Varying noise: the number of neighbours, among [`SMOOTH_K_CANDIDATES`] below the row
    /// count, whose average of the other rows' corrected squared leave-one-out residuals best
    /// predicts each row's own (leave-one-out cross-validation of the variance smoother, squared
    /// error; ties to the larger k). `None` without varying noise or with fewer than 3 rows.
    pub fn choose_smooth_k(&self, x: ArrayView2<'_, f64>) -> Option<usize> {
        let sq = self.sq_resid.as_ref()?;
        let p = self.knn.as_ref()?;
        let n = sq.len();
        let cands: Vec<usize> = SMOOTH_K_CANDIDATES
            .iter()
            .copied()
            .filter(|&k| k < n)
            .collect();
        let kmax = *cands.last()?;
        let mut err = vec![0.0; cands.len()];
        let mut scratch = Scratch::default();
        let mut buf = Vec::with_capacity(kmax);
        let mut row = vec![0.0; x.ncols()];
        for (i, r) in x.rows().into_iter().enumerate() {
            row.iter_mut().zip(r.iter()).for_each(|(b, v)| *b = *v);
            p.index
                .nearest_excluding(&row, kmax, |j| j == i, &mut scratch, &mut buf);
            let mut sum = 0.0;
            let mut c = 0;
            for (m, &j) in buf.iter().enumerate() {
                sum += sq[j];
                if c < cands.len() && m + 1 == cands[c] {
                    err[c] += (sq[i] - sum / cands[c] as f64).powi(2);
                    c += 1;
                }
            }
        }
        let mut best = 0;
        for c in 1..cands.len() {
            if err[c] <= err[best] {
                best = c;
            }
        }
        Some(cands[best])
    }

    /// Varying noise: σ(x) = √σ²(x) ([`Reference::var_at`]) at every row of `x`, 0 where it
    /// is not positive or without varying noise.
    pub fn sd_at_rows(&self, x: ArrayView2<'_, f64>) -> Array1<f64> {
        let mut buf = vec![0.0; x.ncols()];
        x.rows()
            .into_iter()
            .map(|row| {
                buf.iter_mut().zip(row.iter()).for_each(|(b, v)| *b = *v);
                self.var_at(&buf).unwrap_or(0.0).max(0.0).sqrt()
            })
            .collect()
    }

    /// FNV-1a of the reference's responses and recipe (part of a run's fingerprint). For the
    /// k-NN reference alone it is the digest of earlier versions (k, standardize, responses).
    pub fn digest(&self) -> u64 {
        let mut bytes = Vec::with_capacity(8 * self.y.len() + 64);
        bytes.extend_from_slice(&(self.k() as u64).to_le_bytes());
        bytes.push(u8::from(self.choice.standardize));
        for v in &self.y {
            bytes.extend_from_slice(&v.to_bits().to_le_bytes());
        }
        if self.choice.family != Candidate::Knn {
            bytes.extend_from_slice(self.choice.family.name().as_bytes());
            // The first three weights as before the polynomial part (digests of older
            // recipes unchanged); the polynomial's weight and degree only when it is used.
            for w in &self.choice.weights[..3] {
                bytes.extend_from_slice(&w.to_bits().to_le_bytes());
            }
            if self.choice.weights[3] > 0.0 {
                bytes.extend_from_slice(b"poly");
                bytes.extend_from_slice(&self.choice.weights[3].to_bits().to_le_bytes());
                bytes.extend_from_slice(&(self.choice.degree.unwrap_or(0) as u64).to_le_bytes());
            }
            if let Some(f) = self.choice.forest {
                for v in [f.trees as u64, f.min_leaf as u64, f.seed] {
                    bytes.extend_from_slice(&v.to_le_bytes());
                }
            }
            if let Some(h) = self.choice.bandwidth {
                bytes.extend_from_slice(&h.to_bits().to_le_bytes());
            }
        }
        if let (Candidate::Logit, Some(d), Some(r)) =
            (self.choice.family, self.choice.degree, self.choice.ridge)
        {
            bytes.extend_from_slice(&(d as u64).to_le_bytes());
            bytes.extend_from_slice(&r.to_bits().to_le_bytes());
        }
        if let Some(t) = self.choice.tree {
            for v in [t.depth as u64, t.min_leaf as u64, t.seed] {
                bytes.extend_from_slice(&v.to_le_bytes());
            }
        }
        if self.choice.twice {
            bytes.extend_from_slice(b"twice");
        }
        if let Some(w) = &self.choice.metric {
            bytes.extend_from_slice(b"metric");
            for v in w {
                bytes.extend_from_slice(&v.to_bits().to_le_bytes());
            }
        }
        if let Some(c) = &self.choice.inputs {
            bytes.extend_from_slice(b"inputs");
            for &j in c {
                bytes.extend_from_slice(&(j as u64).to_le_bytes());
            }
        }
        crate::codec::fnv1a64(&bytes)
    }

    /// Human-readable form.
    pub fn describe(&self) -> String {
        let dropped = match self.dropped_rows {
            0 => String::new(),
            d => format!(" ({d} more with a missing or non-numeric cell dropped)"),
        };
        format!(
            "{} fitted on the {} rows of {}{dropped}",
            self.choice.describe(),
            self.y.len(),
            self.source
        )
    }

    /// Human-readable form of the varying noise.
    pub fn describe_noise(&self) -> String {
        let base = format!(
            "gaussian, sd(x)² = average over the {} nearest rows of the k-NN (k = {}) leave-one-out squared residuals × k/(k+1)",
            self.smooth_k(),
            self.k()
        );
        if self.var_scale == 1.0 {
            base
        } else {
            format!(
                "{base}, scaled by {} to the corrected noise estimate's level",
                crate::fmt::fmt_num(self.var_scale)
            )
        }
    }
}

/// Ranks 1..n of `v` (ties share their mean rank).
fn ranks(v: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..v.len()).collect();
    order.sort_by(|&a, &b| v[a].total_cmp(&v[b]).then(a.cmp(&b)));
    let mut r = vec![0.0; v.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && v[order[j + 1]] == v[order[i]] {
            j += 1;
        }
        let mean_rank = (i + j) as f64 / 2.0 + 1.0;
        for &o in &order[i..=j] {
            r[o] = mean_rank;
        }
        i = j + 1;
    }
    r
}

/// Pearson's correlation of `a` and `b` (NaN when either is constant).
fn pearson(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len() as f64;
    let (ma, mb) = (a.iter().sum::<f64>() / n, b.iter().sum::<f64>() / n);
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for (x, y) in a.iter().zip(b) {
        sab += (x - ma) * (y - mb);
        saa += (x - ma) * (x - ma);
        sbb += (y - mb) * (y - mb);
    }
    sab / (saa * sbb).sqrt()
}

/// The result of fitting a twin on a table.
#[derive(Debug, Clone)]
pub struct TwinFit {
    /// The chosen k.
    pub k: usize,
    /// Cross-validated loss per tried k: mean squared error (regression) or Brier score (classes).
    pub cv_curve: Vec<(usize, f64)>,
    /// Cross-validated R² (regression) or accuracy (classes) at the chosen k.
    pub quality: f64,
    /// Its standard error (over rows).
    pub quality_stderr: f64,
    /// `R²` or `accuracy`.
    pub quality_name: &'static str,
    /// The noise estimate (regression).
    pub noise: Option<NoiseEstimate>,
    /// k/(k+1) × mean squared cross-validated residual at the chosen k (regression), shown for
    /// comparison with `noise`.
    pub cv_noise: Option<f64>,
    /// Classes: the cross-validated log-loss of the add-one shares at the chosen k and its
    /// standard error over rows (the score [`classes::cross_validate`]'s candidates are compared
    /// on); `None` for regression.
    pub cv_logloss: Option<(f64, f64)>,
    /// Classes: each row's cross-validated log-loss at the chosen k (what
    /// [`select_class_inputs`] pairs); empty for regression.
    pub cv_logloss_rows: Vec<f64>,
}

/// Chooses the k-NN reference's k alone by `CV_FOLDS`-fold cross-validation (folds from
/// `rng::stream(seed, purpose::TWIN, 0)`) and estimates the noise with the estimators of the
/// twins written before the candidates existed (GSJS with one input, nearest-neighbour
/// differences otherwise, uncorrected). Classification twins use it; regression twins use
/// [`select::select`] and [`crate::dgp::twin`]. Errors when the table is too small for
/// cross-validation.
pub fn fit(t: &Table, seed: u64, standardize: bool) -> Result<TwinFit, Error> {
    fit_weighted(t, seed, standardize, None)
}

/// [`fit`] with neighbour distances on standardized inputs times the weights `metric` (one per
/// input, as [`Choice::metric`]; a weight 0 leaves the input out). `None` is [`fit`].
pub fn fit_weighted(
    t: &Table,
    seed: u64,
    standardize: bool,
    metric: Option<&[f64]>,
) -> Result<TwinFit, Error> {
    let n = t.rows();
    let folds = CV_FOLDS.min(n);
    if n < 4 {
        return Err(Error::Usage(format!(
            "{}: {n} rows; a twin needs at least 4",
            t.path.display()
        )));
    }
    let fold = cv_folds(n, seed);
    let min_train = crate::rng::smallest_training_fold(&fold, folds);
    let ks: Vec<usize> = K_CANDIDATES
        .iter()
        .copied()
        .filter(|&k| k <= min_train)
        .collect();
    let kmax = *ks.last().unwrap_or(&1);
    let classes = match t.task {
        Task::Classify { classes } => classes,
        Task::Regress => 0,
    };
    let index = match metric {
        Some(w) => {
            if let Some(msg) = metric_problem(w, t.x.ncols(), standardize) {
                return Err(Error::Usage(format!("`metric` {msg}")));
            }
            NeighbourIndex::with_standardizer(t.x.view(), Standardizer::fit(t.x.view()).weighted(w))
        }
        None => NeighbourIndex::new(t.x.view(), standardize),
    };
    let mut scratch = Scratch::default();
    // Per row and candidate k: the cross-validated loss term.
    let mut loss = vec![vec![0.0; n]; ks.len()];
    let mut hit = vec![vec![0.0; n]; ks.len()];
    let mut logloss = vec![vec![0.0; n]; ks.len()];
    let mut buf: Vec<usize> = Vec::with_capacity(n);
    let mut counts = vec![0.0; classes];
    let mut probs = vec![0.0; classes];
    for i in 0..n {
        let q = t.x.row(i).to_vec();
        index.nearest_excluding(&q, kmax, |j| fold[j] == fold[i], &mut scratch, &mut buf);
        let mut sum = 0.0;
        counts.iter_mut().for_each(|v| *v = 0.0);
        let mut next = 0;
        for (m, &j) in buf.iter().enumerate() {
            sum += t.y[j];
            if classes > 0 {
                counts[t.y[j] as usize] += 1.0;
            }
            while next < ks.len() && ks[next] == m + 1 {
                let k = ks[next] as f64;
                if classes == 0 {
                    let e = t.y[i] - sum / k;
                    loss[next][i] = e * e;
                } else {
                    for (p, cnt) in probs.iter_mut().zip(&counts) {
                        *p = (cnt + 1.0) / (k + classes as f64);
                    }
                    let yi = t.y[i] as usize;
                    loss[next][i] = probs
                        .iter()
                        .enumerate()
                        .map(|(cl, p)| (p - if cl == yi { 1.0 } else { 0.0 }).powi(2))
                        .sum();
                    classes::score_row(&probs, yi, &mut logloss[next][i], &mut hit[next][i]);
                }
                next += 1;
            }
        }
    }
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let cv_curve: Vec<(usize, f64)> = ks.iter().zip(&loss).map(|(&k, l)| (k, mean(l))).collect();
    let bi = (0..cv_curve.len()).fold(0, |b, i| if cv_curve[i].1 < cv_curve[b].1 { i } else { b });
    let k = ks[bi];
    let se_of = |v: &[f64]| {
        let m = mean(v);
        (v.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / ((v.len() - 1) as f64 * v.len() as f64))
            .sqrt()
    };
    let class_scores = (classes > 0).then(|| classes::scored(&logloss[bi], &hit[bi]));
    let cv_logloss = class_scores.map(|s| (s.logloss, s.logloss_se));
    let (quality, quality_stderr, quality_name, noise_est, cv_noise) = if classes == 0 {
        let ym = mean(t.y.as_slice().unwrap_or(&t.y.to_vec()));
        let var = t.y.iter().map(|v| (v - ym) * (v - ym)).sum::<f64>() / n as f64;
        let mse = cv_curve[bi].1;
        let est = noise::estimate(
            if t.x.ncols() == 1 {
                noise::Method::Gsjs
            } else {
                noise::Method::NearestNeighbour
            },
            t.x.view(),
            t.y.view(),
        );
        (
            1.0 - mse / var,
            se_of(&loss[bi]) / var,
            "R²",
            est,
            Some(mse * k as f64 / (k as f64 + 1.0)),
        )
    } else {
        let s = class_scores.expect("scored above for classes");
        (s.accuracy, s.accuracy_se, "accuracy", None, None)
    };
    Ok(TwinFit {
        k,
        cv_curve,
        quality,
        quality_stderr,
        quality_name,
        noise: noise_est,
        cv_noise,
        cv_logloss,
        cv_logloss_rows: if classes > 0 {
            logloss.swap_remove(bi)
        } else {
            Vec::new()
        },
    })
}

/// Most inputs [`select_class_inputs`] tries to leave out: each step repeats the k-NN
/// cross-validation once per input still in (a rule of thumb that keeps wide tables within
/// seconds; no source). A wider table keeps every input.
pub const CLASS_SELECT_MAX_INPUTS: usize = 16;

/// One step of a backward search for inputs ([`backward_elimination`]: the classification
/// twin's [`select_class_inputs`], the regression twin's [`select::eliminate_inputs`]): the
/// input whose leaving out helped the instrument most, and by how much.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct InputStep {
    /// The input (column index).
    pub input: usize,
    /// Mean over rows of the paired gain without it (positive: better without): the k-NN
    /// shares' log-loss with it minus without it (classes), or the paired gain in k-NN's
    /// cross-validated R² ([`select::paired_gain`], regression).
    pub gain: f64,
    /// The standard error of that paired mean (sd of the differences / √rows).
    pub se: f64,
    /// Whether it was left out (the gain above one standard error).
    pub dropped: bool,
}

/// What [`select_class_inputs`] chose.
#[derive(Debug, Clone)]
pub struct ClassInputs {
    /// The k-NN fit on every input ([`fit`]): the k-NN shares candidate and the temperature's
    /// yardstick use it as before (weighting them too measured worse, docs/twin-calibration.md
    /// §5.3).
    pub plain: TwinFit,
    /// The inputs of the logistic polynomial and the probability tree as [`Choice::metric`]
    /// weights (1 kept, 0 left out); `None` when every input is kept.
    pub metric: Option<Vec<f64>>,
    /// The steps taken; the last one was not dropped when the guard stopped the search.
    pub steps: Vec<InputStep>,
    /// Whether the search ran (two classes or more, 2 to [`CLASS_SELECT_MAX_INPUTS`] inputs).
    pub searched: bool,
}

/// The inputs of a classification twin's logistic polynomial and probability tree, by backward
/// elimination on the k-NN shares' cross-validated log-loss ([`fit_weighted`] with weight 0 on
/// the inputs left out; the same folds; k chosen again by the Brier score at every step): while
/// two or more inputs are in, the input whose leaving out lowers the log-loss most is left out
/// if it lowers it by more than one standard error of the paired per-row difference, and the
/// search stops otherwise. The k-NN shares serve as the instrument because they assume no
/// form: an input that does not move the class shares of neighbours does not help any
/// reference. The guard is the one-SE rule of model choice (Breiman, Friedman, Olshen and Stone
/// 1984, *Classification and Regression Trees*, §3.4.3, from memory) applied against the
/// change, as the regression twin's input weights (`select::metric_guard`): an input stays
/// unless the table shows clearly that the shares do better without it. Stated optimism: each
/// step picks the best of the inputs still in on the same held-out rows, so the bar is a little
/// lower than one standard error of a single pre-set comparison. Backward elimination is the
/// classic stepwise search (Hastie, Tibshirani and Friedman 2009, *The Elements of Statistical
/// Learning*, §3.3.2, from memory).
pub fn select_class_inputs(t: &Table, seed: u64) -> Result<ClassInputs, Error> {
    let plain = fit(t, seed, true)?;
    let p = t.x.ncols();
    let classes = match t.task {
        Task::Classify { classes } => classes,
        Task::Regress => 0,
    };
    if classes < 2 || !(2..=CLASS_SELECT_MAX_INPUTS).contains(&p) || plain.cv_logloss_rows.len() < 2
    {
        return Ok(ClassInputs {
            plain,
            metric: None,
            steps: Vec::new(),
            searched: false,
        });
    }
    let (w, steps) = backward_elimination(
        vec![1.0; p],
        plain.cv_logloss_rows.clone(),
        |wj| Ok::<_, Error>(fit_weighted(t, seed, true, Some(wj))?.cv_logloss_rows),
        paired_logloss_gain,
    )?;
    let metric = w.contains(&0.0).then_some(w);
    Ok(ClassInputs {
        plain,
        metric,
        steps,
        searched: true,
    })
}

/// Backward elimination over the inputs of positive weight in `mask` (the stepwise search,
/// Hastie, Tibshirani and Friedman 2009, *The Elements of Statistical Learning*, §3.3.2, from
/// memory): while two or more are in, each is left out in turn and `score` gives the per-row
/// held-out values of the instrument without it; the input of the largest paired `gain` over
/// the current rows `cur` is left out when that gain is above its standard error (the one-SE
/// rule applied against the change), and the search stops otherwise. Returns the final mask and
/// the steps taken (the last one not dropped when the guard stopped the search). Ties keep the
/// lower index; a NaN gain never beats a number.
pub fn backward_elimination<E>(
    mut mask: Vec<f64>,
    mut cur: Vec<f64>,
    mut score: impl FnMut(&[f64]) -> Result<Vec<f64>, E>,
    gain: impl Fn(&[f64], &[f64]) -> (f64, f64),
) -> Result<(Vec<f64>, Vec<InputStep>), E> {
    let mut steps = Vec::new();
    while positive_columns(&mask).len() >= 2 {
        let mut best: Option<(InputStep, Vec<f64>)> = None;
        for j in positive_columns(&mask) {
            let mut without = mask.clone();
            without[j] = 0.0;
            let rows = score(&without)?;
            let (g, se) = gain(&cur, &rows);
            let better = match &best {
                None => true,
                Some(b) => g > b.0.gain || (b.0.gain.is_nan() && !g.is_nan()),
            };
            if better {
                let step = InputStep {
                    input: j,
                    gain: g,
                    se,
                    dropped: g > se,
                };
                best = Some((step, rows));
            }
        }
        let Some((step, rows)) = best else { break };
        steps.push(step);
        if !step.dropped {
            break;
        }
        mask[step.input] = 0.0;
        cur = rows;
    }
    Ok((mask, steps))
}

/// Mean and standard error over rows of `before_i − after_i` (per-row log-losses on the same
/// held-out rows). NaN when either is not finite.
fn paired_logloss_gain(before: &[f64], after: &[f64]) -> (f64, f64) {
    let n = before.len().min(after.len());
    if n < 2 {
        return (f64::NAN, f64::NAN);
    }
    let d: Vec<f64> = before.iter().zip(after).map(|(a, b)| a - b).collect();
    let m = d.iter().sum::<f64>() / n as f64;
    let var = d.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / (n - 1) as f64;
    (m, (var / n as f64).sqrt())
}

/// The folds of [`fit`]'s cross-validation (`CV_FOLDS`, at most one per row), from the twin's
/// seed; [`calibrate_temperature`] repeats that cross-validation on drawn labels.
pub fn cv_folds(n: usize, seed: u64) -> Vec<usize> {
    let mut rng = crate::rng::stream(seed, crate::rng::purpose::TWIN, 0);
    crate::rng::fold_assignment(n, CV_FOLDS.min(n), &mut rng)
}

/// Sharpens class probabilities in place: `p_c ∝ p_c^(1/τ)`, computed on the logarithms so
/// that small shares do not underflow (`τ = 1` leaves them as they are; every `p_c > 0`).
pub fn sharpen(p: &mut [f64], tau: f64) {
    let top = p.iter().fold(f64::NEG_INFINITY, |a, &v| a.max(v.ln()));
    let mut sum = 0.0;
    for v in p.iter_mut() {
        *v = ((v.ln() - top) / tau).exp();
        sum += *v;
    }
    p.iter_mut().for_each(|v| *v /= sum);
}

/// Labels drawn per table by [`calibrate_temperature`].
pub const TEMPERATURE_DRAWS: usize = 40;

/// The stream index (under `purpose::TWIN_BOOT`) of [`calibrate_temperature`]'s labels.
const TEMPERATURE_STREAM: u64 = 1 << 40;

/// What [`calibrate_temperature`] found.
#[derive(Debug, Clone, Copy)]
pub struct Temperature {
    /// The temperature (1: no sharpening).
    pub tau: f64,
    /// The table's cross-validated error of the reference's k-NN classifier.
    pub observed: f64,
    /// The same cross-validation on labels drawn from the twin, at τ = 1 (mean over draws).
    pub at_one: f64,
    /// ... and at `tau`.
    pub at_tau: f64,
}

/// Calibrates the temperature of a classification twin's reference (the recipe `choice`: k-NN
/// shares, logistic polynomial or probability tree) so that the twin reproduces what the table
/// shows: the cross-validated error of a fixed yardstick, the k-NN classifier at `fit.k` on
/// standardized inputs with `fit`'s folds. Shares that average class probabilities over
/// neighbours pull them toward the middle (a helper study put such twins' Bayes error 0.07 too
/// high and their curves 23% high, docs/twin-calibration.md §5); a twin world whose labels are
/// drawn from them makes the yardstick err more than it does on the table. For τ in
/// [`tau_min`, 1], labels are drawn at the table's rows from the sharpened probabilities
/// ([`TEMPERATURE_DRAWS`] tables, the same uniforms for every τ) and the same folds and
/// neighbours give the yardstick's cross-validated error; τ is the value where that error
/// equals the table's (bisection; 1 when the probabilities as they are already err no more than
/// the table). A simulated method of moments (indirect inference: Gouriéroux, Monfort and
/// Renault 1993, from memory) with one parameter and one moment.
pub fn calibrate_temperature(
    t: &Table,
    fit: &TwinFit,
    choice: &Choice,
    seed: u64,
    tau_min: f64,
) -> Temperature {
    let n = t.rows();
    let classes = match t.task {
        Task::Classify { classes } => classes,
        Task::Regress => 0,
    };
    let observed = 1.0 - fit.quality;
    if classes < 2 || n < 4 {
        return Temperature {
            tau: 1.0,
            observed,
            at_one: f64::NAN,
            at_tau: f64::NAN,
        };
    }
    let k = fit.k;
    // The shares of the reference the scenario records (its own code, as `run` refits it).
    let Ok(reference) = Reference::fit(t.x.view(), t.y.view(), classes, choice, false, "") else {
        return Temperature {
            tau: 1.0,
            observed,
            at_one: f64::NAN,
            at_tau: f64::NAN,
        };
    };
    // Each row's neighbours in the cross-validation that gave `fit.quality` (its folds).
    let fold = cv_folds(n, seed);
    let index = NeighbourIndex::new(t.x.view(), true);
    let mut scratch = Scratch::default();
    let mut buf: Vec<usize> = Vec::with_capacity(k + 1);
    let mut cv: Vec<Vec<usize>> = Vec::with_capacity(n);
    let mut shares = vec![0.0; n * classes];
    for i in 0..n {
        let q = t.x.row(i).to_vec();
        index.nearest_excluding(&q, k, |j| fold[j] == fold[i], &mut scratch, &mut buf);
        cv.push(buf.clone());
        reference.probs_at(&q, &mut shares[i * classes..(i + 1) * classes]);
    }
    let mut draw = crate::rng::stream(seed, crate::rng::purpose::TWIN_BOOT, TEMPERATURE_STREAM);
    let u: Vec<f64> = (0..TEMPERATURE_DRAWS * n)
        .map(|_| draw.gen::<f64>())
        .collect();
    let error_at = |tau: f64| -> f64 {
        let mut p = shares.clone();
        if tau != 1.0 {
            p.chunks_mut(classes).for_each(|r| sharpen(r, tau));
        }
        let mut labels = vec![0usize; n];
        let mut counts = vec![0usize; classes];
        let mut misses = 0usize;
        for b in 0..TEMPERATURE_DRAWS {
            for (i, l) in labels.iter_mut().enumerate() {
                let (mut acc, mut c) = (0.0, 0);
                let r = &p[i * classes..(i + 1) * classes];
                while c + 1 < classes {
                    acc += r[c];
                    if u[b * n + i] < acc {
                        break;
                    }
                    c += 1;
                }
                *l = c;
            }
            for i in 0..n {
                counts.iter_mut().for_each(|c| *c = 0);
                for &j in &cv[i] {
                    counts[labels[j]] += 1;
                }
                let best = (0..classes).fold(0, |b, c| if counts[c] > counts[b] { c } else { b });
                misses += usize::from(best != labels[i]);
            }
        }
        misses as f64 / (TEMPERATURE_DRAWS * n) as f64
    };
    let at_one = error_at(1.0);
    let tau = if at_one <= observed {
        1.0
    } else if error_at(tau_min) >= observed {
        tau_min
    } else {
        let (mut lo, mut hi) = (tau_min, 1.0);
        for _ in 0..30 {
            let mid = 0.5 * (lo + hi);
            if error_at(mid) > observed {
                hi = mid;
            } else {
                lo = mid;
            }
        }
        0.5 * (lo + hi)
    };
    Temperature {
        tau,
        observed,
        at_one,
        at_tau: error_at(tau),
    }
}

/// Draws `n` rows (with replacement) of `rows` into an `n × p` matrix, one uniform index per row
/// in order (the twin's input distribution).
pub fn resample_rows<R: Rng + ?Sized>(rows: &Array2<f64>, n: usize, rng: &mut R) -> Array2<f64> {
    let mut x = Array2::zeros((n, rows.ncols()));
    for i in 0..n {
        let r = rng.gen_range(0..rows.nrows());
        x.row_mut(i).assign(&rows.row(r));
    }
    x
}

/// The reference shared by a twin's truth and (varying) noise.
pub type SharedReference = Arc<Reference>;

#[cfg(test)]
mod tests {
    #[test]
    fn sharpening_raises_shares_to_the_inverse_temperature() {
        let mut p = [0.2, 0.3, 0.5];
        super::sharpen(&mut p, 0.5);
        let z = 0.04 + 0.09 + 0.25;
        for (a, b) in p.iter().zip([0.04 / z, 0.09 / z, 0.25 / z]) {
            assert!((a - b).abs() < 1e-12, "{p:?}");
        }
        let mut q = [0.25, 0.75];
        super::sharpen(&mut q, 1.0);
        assert!((q[0] - 0.25).abs() < 1e-15 && (q[1] - 0.75).abs() < 1e-15);
    }

    use super::*;
    use ndarray::{Array1, Array2};

    /// The k-NN smoother's matrix by brute force (unstandardized inputs, ties by index): row i
    /// averages the k nearest table rows of `q_i`.
    fn smoother(x: &Array2<f64>, q: &Array2<f64>, k: usize) -> Array2<f64> {
        let mut s = Array2::zeros((q.nrows(), x.nrows()));
        for i in 0..q.nrows() {
            let mut d: Vec<(f64, usize)> = (0..x.nrows())
                .map(|j| {
                    let dd: f64 = (0..x.ncols())
                        .map(|c| (q[[i, c]] - x[[j, c]]).powi(2))
                        .sum();
                    (dd, j)
                })
                .collect();
            d.sort_by(|a, b| a.partial_cmp(b).unwrap());
            for &(_, j) in &d[..k] {
                s[[i, j]] = 1.0 / k as f64;
            }
        }
        s
    }

    #[test]
    fn sharpening_scales_every_knob_a_blend_uses_and_says_so() {
        let cv = Choice {
            ridge: None,
            inputs: None,
            tree: None,
            family: Candidate::Blend,
            standardize: true,
            k: Some(15),
            forest: Some(ForestParams {
                trees: 100,
                min_leaf: 5,
                seed: 3,
            }),
            bandwidth: Some(0.4),
            degree: None,
            weights: [0.5, 0.0, 0.5, 0.0],
            cv_r2: None,
            twice: true,
            metric: Some(vec![1.0, 0.5]),
        };
        let s = cv.sharpened(0.85);
        // 15 × 0.85 = 12.75 → 13; the forest has no weight in this blend: its leaf size kept.
        assert_eq!(s.k, Some(13));
        assert_eq!(
            s.forest.map(|f| (f.min_leaf, f.trees, f.seed)),
            Some((5, 100, 3))
        );
        assert!((s.bandwidth.unwrap() - 0.34).abs() < 1e-15);
        assert_eq!(
            (s.weights, s.twice, &s.metric),
            (cv.weights, cv.twice, &cv.metric)
        );
        // The forest has no weight in this blend: its leaf size is not reported.
        assert_eq!(
            s.sharpening_words(&cv),
            "k 15 → 13, bandwidth 0.400 → 0.340 sd"
        );
        // With a forest weight, 5 × 0.85 = 4.25 → 4; without a local-linear weight the
        // bandwidth is kept.
        let with_forest = Choice {
            weights: [0.5, 0.5, 0.0, 0.0],
            ..cv.clone()
        };
        let sf = with_forest.sharpened(0.85);
        assert_eq!(sf.forest.map(|f| f.min_leaf), Some(4));
        assert_eq!(sf.bandwidth, Some(0.4));
        assert_eq!(
            sf.sharpening_words(&with_forest),
            "k 15 → 13, min_leaf 5 → 4"
        );
        // A local-linear reference keeps the k that varying noise's smoother uses.
        let loclin = Choice {
            family: Candidate::LocLin,
            weights: [0.0, 0.0, 1.0, 0.0],
            ..cv.clone()
        };
        assert_eq!(loclin.sharpened(0.85).k, Some(15));
        assert_eq!(cv.sharpened(1.0), cv);
        assert_eq!(cv.sharpened(1.0).sharpening_words(&cv), "");
        // Never below 1.
        assert_eq!(Choice::knn(1, true).sharpened(0.25).k, Some(1));
    }

    #[test]
    fn ranks_share_ties_and_the_spread_test_sees_a_fan() {
        assert_eq!(ranks(&[3.0, 1.0, 3.0, 2.0]), vec![3.5, 1.0, 3.5, 2.0]);
        assert!((pearson(&[1.0, 2.0, 3.0], &[2.0, 4.0, 6.0]) - 1.0).abs() < 1e-15);
        assert!((pearson(&[1.0, 2.0, 3.0], &[3.0, 2.0, 1.0]) + 1.0).abs() < 1e-15);
        // 1-D rows, a constant truth; noise sd 1 everywhere, or rising from 0.1 to 2.1. The
        // fan's z is far above the threshold the twin uses (4), the constant's is not.
        let n = 300;
        let x = Array2::from_shape_fn((n, 1), |(i, _)| (i as f64 * 0.7548776662).fract());
        let e: Vec<f64> = {
            use rand::SeedableRng;
            use rand_distr::{Distribution, StandardNormal};
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
            (0..n).map(|_| StandardNormal.sample(&mut rng)).collect()
        };
        let z_of = |sd: &dyn Fn(f64) -> f64| {
            let y = Array1::from_shape_fn(n, |i| sd(x[[i, 0]]) * e[i]);
            let r =
                Reference::fit(x.view(), y.view(), 0, &Choice::knn(20, false), true, "t").unwrap();
            r.spread_test(x.view(), 50).unwrap().1
        };
        let flat = z_of(&|_| 1.0);
        let fan = z_of(&|u| 0.1 + 2.0 * u);
        assert!(flat < 4.0 && fan > 8.0, "flat {flat}, fan {fan}");
    }

    #[test]
    fn varying_noise_smooths_and_scales_as_stated() {
        // 1-D rows at distinct, unevenly spaced positions (no distance ties); responses whose
        // spread grows with x. Checked against brute force: the corrected squared leave-one-out
        // residuals, σ²(x) as the mean of the `smooth_k` nearest rows' values, the smoother
        // chosen by leave-one-out squared error (ties to the larger k), and the level.
        let n = 120;
        let x = Array2::from_shape_fn((n, 1), |(i, _)| (i as f64 * 0.7548776662).fract());
        let y = Array1::from_shape_fn(n, |i| {
            let u = x[[i, 0]];
            (3.0 * u).sin() + (0.2 + 2.0 * u) * ((i * 7919 % 101) as f64 / 50.0 - 1.0)
        });
        let k = 5;
        let mut r =
            Reference::fit(x.view(), y.view(), 0, &Choice::knn(k, false), true, "t").unwrap();
        let order = |q: f64, skip: Option<usize>| {
            let mut d: Vec<(f64, usize)> = (0..n)
                .filter(|&j| Some(j) != skip)
                .map(|j| ((x[[j, 0]] - q).abs(), j))
                .collect();
            d.sort_by(|a, b| a.partial_cmp(b).unwrap());
            d.into_iter().map(|(_, j)| j).collect::<Vec<_>>()
        };
        let sq: Vec<f64> = (0..n)
            .map(|i| {
                let m = order(x[[i, 0]], Some(i))[..k]
                    .iter()
                    .map(|&j| y[j])
                    .sum::<f64>()
                    / k as f64;
                (y[i] - m).powi(2) * k as f64 / (k as f64 + 1.0)
            })
            .collect();
        let avg = |q: f64, m: usize, skip: Option<usize>| {
            order(q, skip)[..m].iter().map(|&j| sq[j]).sum::<f64>() / m as f64
        };
        // As fitted: the recipe's k, unscaled.
        assert_eq!(r.smooth_k(), k);
        assert!((r.var_at(&[0.31]).unwrap() - avg(0.31, k, None)).abs() < 1e-12);
        // The chosen smoother.
        let cands: Vec<usize> = SMOOTH_K_CANDIDATES
            .iter()
            .copied()
            .filter(|&c| c < n)
            .collect();
        let err: Vec<f64> = cands
            .iter()
            .map(|&m| {
                (0..n)
                    .map(|i| (sq[i] - avg(x[[i, 0]], m, Some(i))).powi(2))
                    .sum()
            })
            .collect();
        let mut best = 0;
        for c in 1..cands.len() {
            if err[c] <= err[best] {
                best = c;
            }
        }
        let chosen = r.choose_smooth_k(x.view()).unwrap();
        assert_eq!(chosen, cands[best]);
        // Smoothed over 30 rows and scaled to a mean of 0.7 over the rows.
        r.set_varying(x.view(), Some(30), Some(0.7)).unwrap();
        assert_eq!(r.smooth_k(), 30);
        let at_rows: Vec<f64> = (0..n).map(|i| r.var_at(&[x[[i, 0]]]).unwrap()).collect();
        assert!((at_rows.iter().sum::<f64>() / n as f64 - 0.7).abs() < 1e-12);
        let plain: f64 = (0..n).map(|i| avg(x[[i, 0]], 30, None)).sum::<f64>() / n as f64;
        assert!((r.var_at(&[0.31]).unwrap() - 0.7 * avg(0.31, 30, None) / plain).abs() < 1e-12);
        // Refusals.
        assert!(r.set_varying(x.view(), Some(0), None).is_err());
        assert!(r.set_varying(x.view(), Some(n), None).is_err());
        assert!(r.set_varying(x.view(), None, Some(0.0)).is_err());
        assert!(r.set_varying(x.view(), None, Some(f64::NAN)).is_err());
        let mut plain_ref =
            Reference::fit(x.view(), y.view(), 0, &Choice::knn(k, false), false, "t").unwrap();
        assert!(plain_ref.set_varying(x.view(), None, None).is_err());
        assert!(plain_ref.choose_smooth_k(x.view()).is_none());
    }

    #[test]
    fn a_level_that_would_overflow_the_responses_is_refused() {
        // σ²(x) averages `smooth_k` squared residuals, so at any input it is at most the mean
        // of the `smooth_k` largest: a level taking that bound beyond VAR_MAX is refused (before,
        // level = 1e308 gave an infinite σ²(x), and a run stopped on a non-finite response
        // without naming the key), one just below it is kept and reaches no more than it.
        let n = 60;
        let x = Array2::from_shape_fn((n, 1), |(i, _)| (i as f64 * 0.7548776662).fract());
        let y = Array1::from_shape_fn(n, |i| {
            x[[i, 0]] + (0.1 + x[[i, 0]]) * ((i * 7919 % 101) as f64 / 50.0 - 1.0)
        });
        let mut r =
            Reference::fit(x.view(), y.view(), 0, &Choice::knn(5, false), true, "t").unwrap();
        for k in [1, 5, 30] {
            r.set_varying(x.view(), Some(k), None).unwrap();
            let mean = (0..n).map(|i| r.var_at(&[x[[i, 0]]]).unwrap()).sum::<f64>() / n as f64;
            let top = r.var_top(k);
            assert!(top >= mean, "k {k}: {top} < {mean}");
            // The largest level kept: VAR_MAX · mean / top (up to rounding).
            let edge = VAR_MAX * mean / top;
            r.set_varying(x.view(), Some(k), Some(edge * (1.0 - 1e-9)))
                .unwrap();
            let most = (0..400)
                .map(|i| r.var_at(&[i as f64 / 399.0 * 1.2 - 0.1]).unwrap())
                .fold(0.0_f64, f64::max);
            assert!(most.is_finite() && most <= VAR_MAX, "k {k}: {most}");
            for level in [edge * (1.0 + 1e-9), 1e308, f64::MAX] {
                let e = r.set_varying(x.view(), Some(k), Some(level)).unwrap_err();
                assert!(e.contains("above 1e300"), "{e}");
                // A refusal leaves σ²(x) unscaled, not half set.
                assert_eq!(r.level_factor(), 1.0);
            }
        }
        // Residuals that are all 0 have no shape to scale.
        let flat = Array1::from_shape_fn(n, |i| (i % 3) as f64);
        let xf = Array2::from_shape_fn((n, 1), |(i, _)| (i % 3) as f64);
        let mut z =
            Reference::fit(xf.view(), flat.view(), 0, &Choice::knn(5, false), true, "t").unwrap();
        let e = z.set_varying(xf.view(), None, Some(0.5)).unwrap_err();
        assert!(e.contains("all 0"), "{e}");
    }

    /// A recipe with `inputs` is the same recipe fitted on those columns alone, bit for bit
    /// (a twiced blend of every part, with weighted distances): the other columns never move
    /// the twin's truth. Recipes it cannot refit are refused with a one-line reason.
    #[test]
    fn a_reference_on_some_inputs_is_the_reference_fitted_on_those_columns() {
        let mut rng = crate::rng::stream(8, crate::rng::purpose::TWIN, 3);
        let n = 150;
        let x = Array2::from_shape_fn((n, 4), |_| rng.gen::<f64>());
        let y: Array1<f64> = (0..n)
            .map(|i| (4.0 * x[[i, 0]]).sin() + x[[i, 2]] + 0.3 * rng.gen::<f64>())
            .collect();
        let cols = vec![0, 2];
        let sub = Choice {
            family: Candidate::Blend,
            k: Some(7),
            forest: Some(ForestParams {
                trees: 8,
                min_leaf: 4,
                seed: 2,
            }),
            bandwidth: Some(0.6),
            degree: Some(2),
            weights: [0.25, 0.25, 0.25, 0.25],
            twice: true,
            metric: Some(vec![1.0, 0.4]),
            ..Choice::knn(1, true)
        };
        let full = Choice {
            inputs: Some(cols.clone()),
            metric: Some(vec![1.0, 0.0, 0.4, 0.0]),
            ..sub.clone()
        };
        let xs = x.select(ndarray::Axis(1), &cols);
        let a = Reference::fit(x.view(), y.view(), 0, &full, false, "t").unwrap();
        let b = Reference::fit(xs.view(), y.view(), 0, &sub, false, "t").unwrap();
        let (pa, pb) = (a.mean_at_rows(x.view()), b.mean_at_rows(xs.view()));
        assert!(pa.iter().zip(&pb).all(|(u, v)| u.to_bits() == v.to_bits()));
        // Other values in the columns left out change nothing.
        let mut moved = x.clone();
        moved.column_mut(1).mapv_inplace(|v| 1.0 - v);
        moved.column_mut(3).fill(7.5);
        let pm = a.mean_at_rows(moved.view());
        assert!(pa.iter().zip(&pm).all(|(u, v)| u.to_bits() == v.to_bits()));
        assert_eq!(a.mean_at(&moved.row(5).to_vec()).to_bits(), pa[5].to_bits());
        assert_ne!(a.digest(), b.digest());
        let words = a.choice.describe();
        assert!(
            words
                .contains("on 2 of the table's inputs only (by position in its input order: 1, 3;"),
            "{words}"
        );
        assert!(
            words.contains("weight the inputs by [1.000, 0.400]"),
            "{words}"
        );
        // Refusals.
        for (cols, want) in [
            (vec![], "must name at least one input"),
            (vec![4], "names input 5 of a table with 4 inputs"),
            (vec![2, 0], "each input once"),
            (vec![1, 1], "each input once"),
        ] {
            let c = Choice {
                inputs: Some(cols),
                ..full.clone()
            };
            let e = Reference::fit(x.view(), y.view(), 0, &c, false, "t").unwrap_err();
            assert!(e.contains(want), "{e}");
        }
        let once = Choice {
            twice: false,
            ..full.clone()
        };
        let e = Reference::fit(x.view(), y.view(), 0, &once, true, "t").unwrap_err();
        assert!(e.contains("constant noise"), "{e}");
        let classes = Array1::from_shape_fn(n, |i| (i % 2) as f64);
        let knn = Choice {
            inputs: Some(vec![0]),
            ..Choice::knn(3, true)
        };
        let e = Reference::fit(x.view(), classes.view(), 2, &knn, false, "t").unwrap_err();
        assert!(e.contains("regression"), "{e}");
    }

    #[test]
    fn twicing_a_knn_reference_is_two_s_minus_s_squared() {
        // Distinct distances (irrational-ish spacing), so neighbour sets have no ties.
        let n = 40;
        let x = Array2::from_shape_fn((n, 2), |(i, c)| {
            ((i as f64 + 1.0) * if c == 0 { 0.618_034 } else { 0.414_214 }).fract()
        });
        let y: Array1<f64> = (0..n)
            .map(|i| (3.0 * x[[i, 0]]).sin() + x[[i, 1]] * x[[i, 1]] + 0.1 * (i % 3) as f64)
            .collect();
        let k = 4;
        let choice = Choice {
            twice: true,
            ..Choice::knn(k, false)
        };
        let r = Reference::fit(x.view(), y.view(), 0, &choice, false, "t").unwrap();
        assert!(r.choice.twice);
        let s = smoother(&x, &x, k);
        let once = s.dot(&y);
        let resid = &y - &once;
        // At the rows: (2S − S²) y; at new points q: S_q y + S_q (y − S y).
        let want = &once + &s.dot(&resid);
        for i in 0..n {
            let got = r.mean_at(&x.row(i).to_vec());
            assert!(
                (got - want[i]).abs() < 1e-12,
                "row {i}: {got} vs {}",
                want[i]
            );
        }
        let q = Array2::from_shape_fn((7, 2), |(i, c)| 0.05 + 0.13 * i as f64 + 0.02 * c as f64);
        let sq = smoother(&x, &q, k);
        let want_q = sq.dot(&y) + sq.dot(&resid);
        for i in 0..q.nrows() {
            let got = r.mean_at(&q.row(i).to_vec());
            assert!(
                (got - want_q[i]).abs() < 1e-12,
                "point {i}: {got} vs {}",
                want_q[i]
            );
        }
        // Twicing changes the fit (the residuals are not all zero) and the digest.
        let plain =
            Reference::fit(x.view(), y.view(), 0, &Choice::knn(k, false), false, "t").unwrap();
        assert!((0..n).any(|i| (plain.mean_at(&x.row(i).to_vec()) - want[i]).abs() > 1e-3));
        assert_ne!(plain.digest(), r.digest());
        // A blend with a forest part (not linear in the responses: its trees are refitted to the
        // residuals) is the definition too: the recipe once, plus the recipe on the residuals.
        let blend = Choice {
            ridge: None,
            inputs: None,
            tree: None,
            family: Candidate::Blend,
            standardize: true,
            k: Some(5),
            forest: Some(forest::ForestParams {
                trees: 10,
                min_leaf: 3,
                seed: 4,
            }),
            bandwidth: Some(0.5),
            // The polynomial part is linear in the responses too (a least-squares projection):
            // it rides in the one fit on y + r.
            degree: Some(2),
            weights: [0.2, 0.4, 0.2, 0.2],
            cv_r2: None,
            twice: false,
            // Weighted inputs ride along: the k-NN and local-linear parts carry them through
            // the twicing's one fit on y + r.
            metric: Some(vec![1.0, 0.6]),
        };
        let once = Reference::fit(x.view(), y.view(), 0, &blend, false, "t").unwrap();
        let r_once: Array1<f64> = (0..n)
            .map(|i| y[i] - once.mean_at(&x.row(i).to_vec()))
            .collect();
        let on_resid = Reference::fit(x.view(), r_once.view(), 0, &blend, false, "t").unwrap();
        let twiced = Reference::fit(
            x.view(),
            y.view(),
            0,
            &Choice {
                twice: true,
                ..blend.clone()
            },
            false,
            "t",
        )
        .unwrap();
        for i in 0..q.nrows() {
            let row = q.row(i).to_vec();
            let want = once.mean_at(&row) + on_resid.mean_at(&row);
            let got = twiced.mean_at(&row);
            assert!(
                (got - want).abs() < 1e-9 * (1.0 + want.abs()),
                "blend point {i}: {got} vs {want}"
            );
        }
        // Evaluated for many rows at once, the same bits as row by row.
        let all = twiced.mean_at_rows(q.view());
        for (i, v) in all.iter().enumerate() {
            assert_eq!(
                v.to_bits(),
                twiced.mean_at(&q.row(i).to_vec()).to_bits(),
                "row {i}"
            );
        }
        assert_ne!(twiced.digest(), once.digest());
        // Classification and varying noise refuse it.
        assert!(Reference::fit(x.view(), y.view(), 0, &choice, true, "t").is_err());
        let labels = y.mapv(|v| f64::from(u8::from(v > 1.0)));
        assert!(Reference::fit(x.view(), labels.view(), 2, &choice, false, "t").is_err());
        assert!(plain
            .twiced(x.view(), y.view())
            .unwrap()
            .twiced(x.view(), y.view())
            .is_err());
    }
}

#[cfg(test)]
mod twicing_check_tests {
    use super::select::{twicing_check, FOLDS};
    use super::*;
    use crate::rng::{fold_assignment, purpose, stream};
    use ndarray::{Array1, Array2, Axis};

    /// A smooth signal on 200 rows of 2 inputs with noise of sd `sd` (a fixed pseudo-random
    /// sequence, no engine stream).
    fn data(sd: f64) -> (Array2<f64>, Array1<f64>) {
        let n = 200;
        let u = |i: usize, a: f64| ((i as f64 + 1.0) * a).fract();
        let x = Array2::from_shape_fn((n, 2), |(i, c)| u(i, [0.618_034, 0.414_214][c]));
        let y = (0..n)
            .map(|i| {
                let e = (u(i, 0.754_877) - 0.5) * 3.46 * sd; // uniform with sd `sd`
                3.0 * (5.0 * x[[i, 0]]).sin() + 2.0 * x[[i, 1]] * x[[i, 1]] + e
            })
            .collect();
        (x, y)
    }

    #[test]
    fn the_check_scores_fold_refits_and_says_which_predicts_better() {
        let (x, y) = data(0.3);
        let seed = 9;
        // Independent recomputation of the once score with the same folds.
        let choice = Choice::knn(40, false);
        let c = twicing_check(x.view(), y.as_slice().unwrap(), seed, &choice).unwrap();
        let n = y.len();
        let fold = fold_assignment(n, FOLDS, &mut stream(seed, purpose::TWIN, 0));
        let mut sse = 0.0;
        for f in 0..FOLDS {
            let tr: Vec<usize> = (0..n).filter(|&i| fold[i] != f).collect();
            let xt = x.select(Axis(0), &tr);
            let yt = y.select(Axis(0), &tr);
            let r = Reference::fit(xt.view(), yt.view(), 0, &choice, false, "t").unwrap();
            for i in (0..n).filter(|&i| fold[i] == f) {
                sse += (y[i] - r.mean_at(&x.row(i).to_vec())).powi(2);
            }
        }
        let m = y.mean().unwrap();
        let var = y.iter().map(|v| (v - m) * (v - m)).sum::<f64>();
        assert!((c.once_r2 - (1.0 - sse / var)).abs() < 1e-12);
        // 40 neighbours of 160 training rows round the sine off: twicing predicts better.
        assert!(c.twice(), "{c:?}");
        // Three neighbours on noisy rows already follow the noise: twicing only adds more.
        let (x, y) = data(2.0);
        let c = twicing_check(
            x.view(),
            y.as_slice().unwrap(),
            seed,
            &Choice::knn(3, false),
        )
        .unwrap();
        assert!(!c.twice() && c.twice_r2 < c.once_r2 - 0.01, "{c:?}");
    }
}
