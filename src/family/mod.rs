//! Model families: the trait every family implements, and the registry that builds one from a
//! scenario's `[model]` section.
//!
//! A family is fitted once per replicate training set and returns predictions at every
//! evaluation point for **every** grid value of its complexity knob ("path fit"): a tree grown to
//! the deepest grid depth is read at every shallower depth, k-NN sorts neighbours once for the
//! largest k, a polynomial is decomposed once for the highest degree, ridge once for every penalty.
//! A family that cannot share work across the grid loops over the grid inside `fit_predict`.

use ndarray::{ArrayView1, ArrayView2, ArrayViewMut2};

pub mod external;
pub mod knn;
pub mod logistic;
pub mod poly;
pub mod ridge;
pub mod tree;

/// What the family is asked to predict.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Task {
    /// Real-valued response; predictions are real numbers.
    Regress,
    /// Class labels `0..classes`, stored as `f64` in `y`; predictions are class indices as `f64`.
    Classify {
        /// Number of classes (at least 2).
        classes: usize,
    },
}

/// One training set and the evaluation inputs, as handed to a family.
#[derive(Debug, Clone, Copy)]
pub struct FitInput<'a> {
    /// Training inputs, `n × p`.
    pub x: ArrayView2<'a, f64>,
    /// Training responses, length `n` (class indices as `f64` when classifying).
    pub y: ArrayView1<'a, f64>,
    /// Evaluation inputs, `m × p`, fixed across replicates.
    pub eval: ArrayView2<'a, f64>,
    /// Regression or classification.
    pub task: Task,
}

/// A fit that could not be completed (for example a singular system). The runner reports it with
/// the replicate index; it is never caused by a panic.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{0}")]
pub struct FitError(pub String);

/// A model family with one complexity knob.
///
/// Implementations must be deterministic: the same inputs give bit-identical predictions.
/// They hold no randomness of their own (the runner owns all randomness).
pub trait Family: Send + Sync {
    /// Short family name as written in scenario files (`tree`, `knn`, ...).
    fn name(&self) -> &'static str;

    /// Name of the complexity knob (`max_depth`, `k`, `degree`, `penalty`, ...).
    fn knob(&self) -> &'static str;

    /// Checks a grid against the training size and the number of inputs before any fit.
    /// The message names the offending value; the caller adds file and key.
    fn check_grid(&self, grid: &[f64], n_train: usize, n_inputs: usize) -> Result<(), String>;

    /// Whether the family supports the task (regression, or classification with K classes).
    fn supports(&self, task: Task) -> bool;

    /// Fits on `input.x`, `input.y` and writes predictions at `input.eval` for each grid value:
    /// `out[[g, e]]` is the prediction for grid value `grid[g]` at evaluation point `e`.
    /// `out` has shape `(grid.len(), input.eval.nrows())`.
    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        out: ArrayViewMut2<'_, f64>,
    ) -> Result<(), FitError>;
}

/// Checks that every grid value is a whole number in `[lo, hi]`; used by integer knobs.
pub fn check_whole_grid(grid: &[f64], knob: &str, lo: f64, hi: f64) -> Result<(), String> {
    for &v in grid {
        if !v.is_finite() || v.fract() != 0.0 {
            return Err(format!("{knob} must be a whole number, got {v}"));
        }
        if v < lo || v > hi {
            return Err(format!(
                "{knob} = {v} is outside the allowed range {lo}..={hi}"
            ));
        }
    }
    Ok(())
}

/// What `lossprism families` prints about a family.
#[derive(Debug, Clone, Copy)]
pub struct FamilyInfo {
    /// Name in scenario files.
    pub name: &'static str,
    /// Knob name.
    pub knob: &'static str,
    /// What the knob means and which way is more complex.
    pub meaning: &'static str,
    /// Tasks supported.
    pub tasks: &'static str,
    /// Options accepted in `[model]`.
    pub options: &'static str,
}

/// The built-in families.
pub fn catalogue() -> &'static [FamilyInfo] {
    &[
        FamilyInfo {
            name: "tree",
            knob: "max_depth",
            meaning: "CART tree depth limit (splits on a root-to-leaf path); larger = more complex",
            tasks: "regression (squared-error splits), classification (gini or entropy)",
            options: "min_samples_leaf (default 1), criterion = \"gini\" | \"entropy\"",
        },
        FamilyInfo {
            name: "knn",
            knob: "k",
            meaning: "number of nearest neighbours averaged; smaller = more complex",
            tasks: "regression (mean), classification (majority vote)",
            options: "standardize = true | false (default false)",
        },
        FamilyInfo {
            name: "poly",
            knob: "degree",
            meaning: "total degree of a least-squares polynomial in the inputs; larger = more complex",
            tasks: "regression",
            options: "none",
        },
        FamilyInfo {
            name: "ridge",
            knob: "penalty",
            meaning: "ridge penalty λ on standardized inputs (sum-of-squares scale); smaller = more complex",
            tasks: "regression",
            options: "none",
        },
        FamilyInfo {
            name: "logistic",
            knob: "inverse_penalty",
            meaning: "C = 1/λ, inverse strength of an L2 penalty on standardized inputs; larger = more complex",
            tasks: "classification (two classes: logistic; K > 2: multinomial)",
            options: "none",
        },
        FamilyInfo {
            name: "external",
            knob: "(`knob`)",
            meaning: "an estimator in any language, run as a long-lived process speaking docs/external-protocol.md; the knob is whatever it names",
            tasks: "whatever the process implements",
            options: "command = [\"python3\", \"model.py\"], knob = \"name\", timeout_seconds (default 60)",
        },
        FamilyInfo {
            name: "custom",
            knob: "(the estimator's)",
            meaning: "a Rust estimator supplied through lossprism::harness (library use only; the command line refuses it)",
            tasks: "whatever the estimator supports",
            options: "none",
        },
    ]
}

/// Training mean and population sd per input (shared by the families that standardize); `inv_sd = 0` marks a constant column.
pub(crate) struct Standardizer {
    pub(crate) mean: Vec<f64>,
    pub(crate) inv_sd: Vec<f64>,
}

impl Standardizer {
    pub(crate) fn from_training(x: ArrayView2<'_, f64>) -> Self {
        let n = x.nrows() as f64;
        let mut mean = Vec::with_capacity(x.ncols());
        let mut inv_sd = Vec::with_capacity(x.ncols());
        for c in x.columns() {
            let mu = c.sum() / n;
            let var = c.iter().map(|v| (v - mu) * (v - mu)).sum::<f64>() / n;
            let sd = var.sqrt();
            let big = c.iter().fold(0.0_f64, |a, v| a.max(v.abs()));
            mean.push(mu);
            inv_sd.push(if sd > 1e-12 * big && sd > 0.0 {
                1.0 / sd
            } else {
                0.0
            });
        }
        Standardizer { mean, inv_sd }
    }

    /// Column-major standardized copy of `x`.
    pub(crate) fn apply(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let (n, p) = x.dim();
        let mut z = vec![0.0; n * p];
        for j in 0..p {
            for i in 0..n {
                z[j * n + i] = (x[[i, j]] - self.mean[j]) * self.inv_sd[j];
            }
        }
        z
    }

    /// Row-major standardized copy of `x`.
    pub(crate) fn apply_row_major(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let (m, p) = x.dim();
        let mut z = vec![0.0; m * p];
        for i in 0..m {
            for j in 0..p {
                z[i * p + j] = (x[[i, j]] - self.mean[j]) * self.inv_sd[j];
            }
        }
        z
    }
}
