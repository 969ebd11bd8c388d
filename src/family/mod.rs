//! Model families: the trait every family implements, what a fit receives and writes, each
//! family's checked options, and the catalogue that builds a family from a scenario's `[model]`
//! section.
//!
//! A family is fitted once per replicate training set and returns predictions at every
//! evaluation point for **every** grid value of its complexity knob ("path fit"): a tree grown to
//! the deepest grid depth is read at every shallower depth, k-NN sorts neighbours once for the
//! largest k, a polynomial is decomposed once for the highest degree, ridge once for every penalty.
//! A family that cannot share work across the grid loops over the grid inside `fit_predict`.
//!
//! A fit is a pure function of (training set, evaluation inputs, fit seed): a stochastic family
//! (a forest, subsampled boosting, random features, random tie-breaks) draws only from
//! [`FitInput::seed`]'s stream, which the engine derives from (master seed, replicate, fold,
//! fit-seed index). Predictions are real values (regression) or class labels (classification),
//! and, when asked, class-probability vectors and an ensemble's diversity.

use std::path::Path;
use std::sync::Arc;

use ndarray::{ArrayView1, ArrayView2, ArrayViewMut2, ArrayViewMut3};

pub use crate::rng::FitSeed;

pub mod boost;
pub mod custom;
pub mod external;
pub mod forest;
pub mod knn;
pub mod linalg;
pub mod logistic;
pub mod minnorm;
pub mod neighbours;
pub mod options;
pub mod poly;
pub mod random_features;
pub mod ridge;
pub mod standardize;
pub mod tree;

pub use options::{OptionError, Options};

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

impl Task {
    /// Number of classes (0 for regression).
    pub fn classes(self) -> usize {
        match self {
            Task::Regress => 0,
            Task::Classify { classes } => classes,
        }
    }

    /// The task in words (`regression`, `classification with 3 classes`).
    pub fn describe(self) -> String {
        match self {
            Task::Regress => "regression".into(),
            Task::Classify { classes } => format!("classification with {classes} classes"),
        }
    }
}

/// One training set and the evaluation inputs, as handed to a family.
#[derive(Debug, Clone, Copy)]
pub struct FitInput<'a> {
    /// Training inputs, `n × p`.
    pub x: ArrayView2<'a, f64>,
    /// Training responses, length `n` (class indices as `f64` when classifying).
    pub y: ArrayView1<'a, f64>,
    /// Evaluation inputs, `m × p`.
    pub eval: ArrayView2<'a, f64>,
    /// Regression or classification.
    pub task: Task,
    /// The fit's own random stream; a deterministic family ignores it.
    pub seed: FitSeed,
}

/// Where a fit writes its predictions. `values` is always filled; `probs` and `diversity` are
/// present only when the caller asked for them (and the family declared it can fill them, see
/// [`Caps`]).
#[derive(Debug)]
pub struct Out<'a> {
    /// `values[[g, e]]`: the prediction for grid value `g` at evaluation point `e` — a real value
    /// (regression) or a class index stored as `f64` (classification). Shape `(grid, m)`.
    pub values: ArrayViewMut2<'a, f64>,
    /// `probs[[g, e, c]]`: the predicted probability of class `c` (classification). Each vector
    /// sums to 1. Shape `(grid, m, K)`.
    pub probs: Option<ArrayViewMut3<'a, f64>>,
    /// `diversity[[g, e]]`: an ensemble's member spread around its prediction,
    /// `(1/T) Σ_t (h_t − h̄)²` for regression and `(1/T) Σ_t ‖q_t − q̄‖²` over class-probability
    /// vectors for classification (ensemble families only). Shape `(grid, m)`.
    pub diversity: Option<ArrayViewMut2<'a, f64>>,
}

impl<'a> Out<'a> {
    /// An output holding only values.
    pub fn values(values: ArrayViewMut2<'a, f64>) -> Self {
        Out {
            values,
            probs: None,
            diversity: None,
        }
    }
}

/// A fit that could not be completed (for example a singular system). The runner reports it with
/// the replicate index; it is never caused by a panic.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{0}")]
pub struct FitError(pub String);

/// What a family can do beyond point predictions, for a given task.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Caps {
    /// Fills [`Out::probs`] (classification).
    pub probabilities: bool,
    /// Draws from the fit seed: refitting the same training set with another seed can change
    /// the predictions.
    pub stochastic: bool,
    /// An average of members: fills [`Out::diversity`].
    pub ensemble: bool,
    /// Regression predictions are never negative when the training responses are not (an
    /// average of training responses, as tree leaves and k-NN give), so the Poisson deviance can
    /// score them; a loss on positive means refuses a family without it at plan time, and a
    /// mean of exactly 0 at run time ([`crate::decompose::Loss::check_prediction`]).
    pub positive: bool,
}

/// A model family with one complexity knob.
///
/// Implementations must be pure functions of their inputs and [`FitInput::seed`]: the same
/// inputs and seed give bit-identical predictions, on any thread.
pub trait Family: Send + Sync {
    /// Short family name as written in scenario files (`tree`, `knn`, ...).
    fn name(&self) -> &'static str;

    /// Name of the complexity knob (`max_depth`, `k`, `degree`, `penalty`, ...).
    fn knob(&self) -> &'static str;

    /// `true` when a larger knob value gives a simpler model (k-NN `k`, ridge `penalty`); used by
    /// the one-standard-error rule and by readings of the curve.
    fn larger_is_simpler(&self) -> bool {
        false
    }

    /// The number of least-squares coefficients a fit estimates at knob value `value` with
    /// `n_inputs` inputs, for a family whose fit is unpenalized least squares (`None`, the
    /// default, for the others). With few training rows per coefficient the predictions have a
    /// heavy tail across training sets, and the run's reading says so.
    fn least_squares_coefficients(&self, _value: f64, _n_inputs: usize) -> Option<usize> {
        None
    }

    /// For a family whose fit is the minimum-norm least-squares solution (`minnorm`,
    /// `random_features`): the number of coefficients it fits at knob value `value`, the
    /// intercept of a centred fit included (`None`, the default, for the others). Where that
    /// number is close to the training rows the fit is near its interpolation threshold, its
    /// variance across training sets has a heavy tail, and the run's reading says so.
    fn min_norm_coefficients(&self, _value: f64, _n_inputs: usize) -> Option<usize> {
        None
    }

    /// Checks a grid against the training size and the number of inputs before any fit.
    /// The message names the offending value; the caller adds file and key.
    fn check_grid(&self, grid: &[f64], n_train: usize, n_inputs: usize) -> Result<(), String>;

    /// Checks the family's options against the smallest training size and the number of inputs
    /// the model sees (after one-hot expansion), so that no option is silently without effect:
    /// an error names the option's key (within `[model]`) and says why.
    fn check_options(
        &self,
        _n_train: usize,
        _n_inputs: usize,
    ) -> Result<(), (&'static str, String)> {
        Ok(())
    }

    /// Whether the family supports the task (regression, or classification with K classes).
    fn supports(&self, task: Task) -> bool;

    /// Whether a fit scales its inputs by their training standard deviations
    /// ([`standardize::Standardizer`]), which reads a column whose spread is below
    /// [`standardize::CONSTANT_RTOL`] of its magnitude as constant (default: false).
    fn standardizes_inputs(&self) -> bool {
        false
    }

    /// Whether a fit squares and sums its inputs (a standardization, a distance, a design
    /// matrix), so that inputs beyond about 1e154 overflow; trees only compare them (default:
    /// true).
    fn squares_inputs(&self) -> bool {
        true
    }

    /// What to change when the family gives a class probability of exactly 0, which the
    /// log-loss cannot score (added to the run's message; default: another loss).
    fn zero_probability_remedy(&self) -> &'static str {
        "score with a loss that accepts a probability of 0 (`kind = \"brier\"` or `\"zero_one\"` in [loss])"
    }

    /// What the family can fill beyond values for `task` (default: values only).
    fn caps(&self, _task: Task) -> Caps {
        Caps::default()
    }

    /// Files the family reads while it runs (an external estimator's script or program), so
    /// that no output of the run may replace them (default: none).
    fn input_files(&self) -> Vec<std::path::PathBuf> {
        Vec::new()
    }

    /// [`Family::input_files`] as they would be if the scenario's folder were `folder` (`merge`
    /// finds the scenario by its text beside the parts, which may have been run from another
    /// folder than the one it runs in; default: none).
    fn input_files_in(&self, _folder: &std::path::Path) -> Vec<std::path::PathBuf> {
        Vec::new()
    }

    /// Bytes one fit holds beyond its training set and the prediction buffers (the path fit's
    /// work: standardized copies, sort orders, design matrices, neighbour lists) for `n`
    /// training rows, `p` inputs, `m` evaluation points and the grid; the engine adds it per
    /// worker thread when it estimates a run's memory before starting
    /// ([`crate::runner`]'s memory estimate). The default, three copies of the training set plus
    /// a number per row and point, suits families that work on the training set in place
    /// (trees, neighbours, linear models on the inputs).
    fn work_bytes(&self, n: usize, p: usize, m: usize, _grid: &[f64], _task: Task) -> f64 {
        8.0 * (3.0 * n as f64 * p as f64 + n as f64 + m as f64)
    }

    /// Fits on `input.x`, `input.y` and writes predictions at `input.eval` for each grid value
    /// into `out` (see [`Out`]).
    fn fit_predict(&self, input: &FitInput<'_>, grid: &[f64], out: Out<'_>)
        -> Result<(), FitError>;

    /// Checks, before a run or `validate`, what the family needs from outside the scenario
    /// (an external estimator's script files); the message names the key. Default: nothing.
    fn check_ready(&self) -> Result<(), String> {
        Ok(())
    }

    /// How an error about this estimator's answers names it beyond its family name (an
    /// external process: its command line). Default: `None`, the family name says it.
    fn answered_by(&self) -> Option<String> {
        None
    }

    /// Called once when the scheduler has run its blocks: releases what the fits held and
    /// reports what could only be seen at the end (an external process that wrote more than
    /// its answers). Default: nothing to do.
    fn finish(&self) -> Result<(), FitError> {
        Ok(())
    }
}

/// Checks that every grid value is a whole number in `[lo, hi]`; used by integer knobs.
pub fn check_whole_grid(grid: &[f64], knob: &str, lo: f64, hi: f64) -> Result<(), String> {
    for &v in grid {
        let shown = crate::fmt::fmt_exact(v);
        if !v.is_finite() || v.fract() != 0.0 {
            return Err(format!("{knob} must be a whole number, got {shown}"));
        }
        if v < lo || v > hi {
            return Err(format!(
                "{knob} = {shown} is outside the allowed range {lo}..={hi}"
            ));
        }
    }
    Ok(())
}

/// Checks the shape of `out` against the grid, the evaluation points and (for probabilities) the
/// classes; `who` prefixes the message.
pub fn check_out(
    who: &str,
    out: &Out<'_>,
    grid: usize,
    m: usize,
    task: Task,
) -> Result<(), FitError> {
    if out.values.dim() != (grid, m) {
        return Err(FitError(format!(
            "{who}: output has shape {:?}, expected ({grid}, {m})",
            out.values.dim()
        )));
    }
    if let Some(p) = &out.probs {
        if p.dim() != (grid, m, task.classes()) {
            return Err(FitError(format!(
                "{who}: probability output has shape {:?}, expected ({grid}, {m}, {})",
                p.dim(),
                task.classes()
            )));
        }
    }
    if let Some(d) = &out.diversity {
        if d.dim() != (grid, m) {
            return Err(FitError(format!(
                "{who}: diversity output has shape {:?}, expected ({grid}, {m})",
                d.dim()
            )));
        }
    }
    Ok(())
}

/// What building a family may need besides its options.
#[derive(Debug, Clone, Copy)]
pub struct BuildContext<'a> {
    /// Folder that relative paths (an external estimator's program) resolve against.
    pub base: &'a Path,
    /// The scenario's task: options that only classification reads are refused on regression.
    pub task: Task,
    /// The loss reads predicted labels only (the 0-1 loss), not class probabilities: options
    /// that only shape the probabilities are refused.
    pub labels_only: bool,
}

impl BuildContext<'_> {
    /// Refuses option `key`, which only a classification task reads (`what` says what it does),
    /// in a regression section: it would be accepted and silently ignored.
    pub fn classification_only(&self, key: &str, what: &str) -> Result<(), OptionError> {
        if self.task == Task::Regress {
            return Err(OptionError {
                key: key.to_string(),
                message: format!(
                    "{what}, which only classification uses; this scenario is a regression: \
                     remove `{key}`"
                ),
            });
        }
        Ok(())
    }

    /// Refuses option `key`, which only shapes class probabilities (`what` says how), where no
    /// probability is read: a regression, or the 0-1 loss, which takes the most likely class
    /// (`alpha` under the 0-1 loss changed no number and was accepted).
    pub fn probabilities_only(&self, key: &str, what: &str) -> Result<(), OptionError> {
        self.classification_only(key, what)?;
        if self.labels_only {
            return Err(OptionError {
                key: key.to_string(),
                message: format!(
                    "{what}, which the 0-1 loss never reads (it scores the most likely class, \
                     which `{key}` does not change): remove `{key}`, or use `kind = \"log\"` or \
                     `\"brier\"`"
                ),
            });
        }
        Ok(())
    }
}

/// Builds a family from the options of its `[model]` section; every option it reads is taken
/// from `opts`, and the caller refuses whatever is left.
pub type Builder = fn(&mut Options, &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError>;

/// A built-in family: what `lossprism families` prints about it, and how to build it.
#[derive(Debug, Clone, Copy)]
pub struct FamilyInfo {
    /// Name in scenario files.
    pub name: &'static str,
    /// Knob name.
    pub knob: &'static str,
    /// A second knob the family can vary instead (`knob = "..."` in `[model]`): the forest's
    /// `max_depth`.
    pub other_knob: Option<&'static str>,
    /// Whether a larger knob value is the simpler model ([`Family::larger_is_simpler`] of the
    /// built family; a unit test holds the two equal). `external` and `custom` say it in their
    /// own options, so theirs is not fixed here.
    pub larger_is_simpler: bool,
    /// What the knob means and which way is more complex.
    pub meaning: &'static str,
    /// Tasks supported.
    pub tasks: &'static str,
    /// Options accepted in `[model]`.
    pub options: &'static str,
    /// Builds the family; `None` for `custom`, which only the library harness can supply.
    pub build: Option<Builder>,
}

impl FamilyInfo {
    /// Whether a result of this family may name `knob` as its knob: its own knob, its
    /// [`FamilyInfo::other_knob`], or anything for a family that lets the estimator name its
    /// knob (`external`, `custom`).
    pub fn owns_knob(&self, knob: &str) -> bool {
        self.knob.starts_with('(') || knob == self.knob || self.other_knob == Some(knob)
    }

    /// [`FamilyInfo::larger_is_simpler`] where the family fixes it; `None` for a family that
    /// lets the estimator say (`external`, `custom`).
    pub fn fixed_direction(&self) -> Option<bool> {
        (!self.knob.starts_with('(')).then_some(self.larger_is_simpler)
    }

    /// Which way a larger knob value goes, in words for messages: "simpler" or "more complex".
    pub fn direction_words(&self) -> &'static str {
        if self.larger_is_simpler {
            "simpler"
        } else {
            "more complex"
        }
    }

    /// The knob names [`FamilyInfo::owns_knob`] accepts, for messages: "`max_depth`", or
    /// "`trees` or `max_depth`".
    pub fn knob_names(&self) -> String {
        match self.other_knob {
            Some(o) => format!("`{}` or `{o}`", self.knob),
            None => format!("`{}`", self.knob),
        }
    }
}

/// The built-in families, in the order `lossprism families` lists them.
pub fn catalogue() -> &'static [FamilyInfo] {
    &[
        FamilyInfo {
            name: "tree",
            knob: "max_depth",
            other_knob: None,
            larger_is_simpler: false,
            meaning: "CART tree depth limit (splits on a root-to-leaf path); larger = more complex; exact ties between splits are broken at random with the fit seed",
            tasks: "regression (squared-error splits; leaf means of counts suit the poisson loss), classification (gini or entropy)",
            options: "min_samples_leaf (default 1), criterion = \"gini\" | \"entropy\", alpha (add-alpha smoothing of leaf class shares, default 0; the log loss needs alpha > 0, for example 0.5, since a pure leaf gives a class probability 0)",
            build: Some(tree::build),
        },
        FamilyInfo {
            name: "forest",
            knob: "trees",
            other_knob: Some("max_depth"),
            larger_is_simpler: false,
            meaning: "number of bagged CART trees averaged (or, with knob = \"max_depth\", their depth limit); larger = more complex",
            tasks: "regression (mean of trees), classification (majority vote; probabilities = mean leaf class shares)",
            options: "knob = \"trees\" | \"max_depth\" (default trees), max_depth (knob trees; default 64) or trees (knob max_depth; default 100), max_features = whole number | \"sqrt\" | \"third\" | \"all\" (default p/3 regression, sqrt(p) classification), bootstrap = true | false (default true), min_samples_leaf (default 1), criterion = \"gini\" | \"entropy\", alpha (default 0)",
            build: Some(forest::build),
        },
        FamilyInfo {
            name: "boost",
            knob: "rounds",
            other_knob: None,
            larger_is_simpler: false,
            meaning: "boosting rounds of small regression trees (staged predictions; 0 = the constant start); larger = more complex",
            tasks: "regression (squared loss), classification with two classes (log-loss)",
            options: "learning_rate (in (0, 1], default 0.1), max_depth (default 3), subsample (share of rows per round, default 1), min_samples_leaf (default 1)",
            build: Some(boost::build),
        },
        FamilyInfo {
            name: "knn",
            knob: "k",
            other_knob: None,
            larger_is_simpler: true,
            meaning: "number of nearest neighbours averaged; smaller = more complex",
            tasks: "regression (mean; means of counts suit the poisson loss), classification (majority vote)",
            options: "standardize = true | false (default false), alpha (add-alpha smoothing of neighbour class shares, default 0; the log loss needs alpha > 0, for example 0.5, since a neighbourhood without a class gives it probability 0)",
            build: Some(knn::build),
        },
        FamilyInfo {
            name: "poly",
            knob: "degree",
            other_knob: None,
            larger_is_simpler: false,
            meaning: "total degree of a least-squares polynomial in the inputs; larger = more complex",
            tasks: "regression",
            options: "none",
            build: Some(poly::build),
        },
        FamilyInfo {
            name: "ridge",
            knob: "penalty",
            other_knob: None,
            larger_is_simpler: true,
            meaning: "ridge penalty λ on standardized inputs (sum-of-squares scale); smaller = more complex",
            tasks: "regression",
            options: "none",
            build: Some(ridge::build),
        },
        FamilyInfo {
            name: "minnorm",
            knob: "features",
            other_knob: None,
            larger_is_simpler: false,
            meaning: "minimum-norm least squares on the first p inputs (pseudo-inverse; interpolates when p > n); larger = more complex",
            tasks: "regression",
            options: "intercept = true | false (default false)",
            build: Some(minnorm::build),
        },
        FamilyInfo {
            name: "random_features",
            knob: "width",
            other_knob: None,
            larger_is_simpler: false,
            meaning: "minimum-norm least squares on the first `width` random ReLU features of the standardized inputs (drawn from the fit seed); larger = more complex",
            tasks: "regression",
            options: "intercept = true | false (default true)",
            build: Some(random_features::build),
        },
        FamilyInfo {
            name: "logistic",
            knob: "inverse_penalty",
            other_knob: None,
            larger_is_simpler: false,
            meaning: "C = 1/λ, inverse strength of an L2 penalty on standardized inputs; larger = more complex",
            tasks: "classification (two classes: logistic; K > 2: multinomial)",
            options: "none",
            build: Some(logistic::build),
        },
        FamilyInfo {
            name: "external",
            knob: "(`knob`)",
            other_knob: None,
            larger_is_simpler: false,
            meaning: "an estimator in any language, run as a long-lived process speaking docs/external-protocol.md; the knob is whatever it names",
            tasks: "whatever the process implements",
            options: "command = [\"python3\", \"model.py\"], knob = \"name\", timeout_seconds (default 60), larger_is_simpler (default false)",
            build: Some(external::build),
        },
        FamilyInfo {
            name: "custom",
            knob: "(the estimator's)",
            other_knob: None,
            larger_is_simpler: false,
            meaning: "a Rust estimator supplied through lossprism::harness (library use only; the command line refuses it)",
            tasks: "whatever the estimator supports",
            options: "none",
            build: None,
        },
    ]
}

/// The catalogue entry of a family name.
pub fn info(name: &str) -> Option<&'static FamilyInfo> {
    catalogue().iter().find(|f| f.name == name)
}

/// Fills probability rows from class counts with add-α smoothing:
/// `q_c = (count_c + α) / (total + K α)`. With `α = 0` and `total = 0` (no counts) every class
/// gets `1/K`.
pub fn smoothed_shares(counts: &[f64], alpha: f64, out: &mut [f64]) {
    let k = counts.len() as f64;
    let total: f64 = counts.iter().sum::<f64>() + k * alpha;
    if total > 0.0 {
        for (o, c) in out.iter_mut().zip(counts) {
            *o = (c + alpha) / total;
        }
    } else {
        out.iter_mut().for_each(|o| *o = 1.0 / k);
    }
}

/// Refuses a `min_samples_leaf` that leaves no split possible on `rows` training rows (a split
/// needs `2 × min_samples_leaf`): every knob value would then fit the same constant model.
pub fn check_leaf_size(
    min_samples_leaf: usize,
    rows: usize,
    what: &str,
) -> Result<(), (&'static str, String)> {
    if min_samples_leaf.saturating_mul(2) > rows {
        return Err((
            "min_samples_leaf",
            format!(
                "min_samples_leaf = {min_samples_leaf} leaves no split possible on {rows} \
                 {what}: a split needs 2 × min_samples_leaf rows, so every grid value would fit \
                 the same constant; at most {}",
                (rows / 2).max(1)
            ),
        ));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// [`FamilyInfo::larger_is_simpler`] is what the built family says (`check` holds a result's
    /// `larger_is_simpler` to it).
    #[test]
    fn the_catalogue_says_which_way_is_simpler_as_the_families_do() {
        let mut built = 0;
        for info in catalogue() {
            let (Some(build), Some(fixed)) = (info.build, info.fixed_direction()) else {
                continue;
            };
            let family = [Task::Regress, Task::Classify { classes: 2 }]
                .into_iter()
                .find_map(|task| {
                    let cx = BuildContext {
                        base: Path::new("."),
                        task,
                        labels_only: false,
                    };
                    build(&mut Options::new(info.name, Vec::new()), &cx).ok()
                })
                .unwrap_or_else(|| panic!("{} builds with its default options", info.name));
            assert_eq!(family.larger_is_simpler(), fixed, "{}", info.name);
            built += 1;
        }
        assert_eq!(built, 9);
    }
}
