//! The scenario file exactly as the user wrote it (TOML, deserialized with serde). Nothing here
//! is validated beyond types and unknown keys; `plan` turns a spec into a checked plan.
//! Only this module's types and the result document types in `report` derive `Deserialize`.

use serde::Deserialize;
use toml::Spanned;

/// Top level of a scenario file.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ScenarioSpec {
    /// Short name, used in outputs (required; missing is reported by the planner).
    #[serde(default)]
    pub name: Option<Spanned<String>>,
    /// One or two sentences saying what the scenario represents.
    #[serde(default)]
    pub about: Option<String>,
    /// Master seed; every random stream derives from it.
    #[serde(default)]
    pub seed: Option<u64>,
    /// Seed of the evaluation points and of a fixed design (default: `seed`). Fixing it keeps
    /// the evaluation points in place when `seed` changes, so runs with fresh seeds compare the
    /// same points (see `lossprism check`).
    #[serde(default)]
    pub eval_seed: Option<u64>,
    /// Number of replicate training sets R (at least 3).
    #[serde(default)]
    pub replicates: Option<Spanned<i64>>,
    /// Number of replicate blocks (the unit of parallel work, shards, checkpoints and the
    /// jackknife); default `min(R, 32)`; at least 2, at most R (more is refused, never lowered),
    /// and leaving the largest out must keep 2 replicates.
    #[serde(default)]
    pub blocks: Option<Spanned<i64>>,
    /// Where training sets come from (required; missing is reported by the planner).
    #[serde(default)]
    pub data: Option<DataSpec>,
    /// The model family and its complexity grid: one `[model]` table, or several `[[model]]`
    /// tables compared on the same draws. Each holds `family`, `grid`, optionally `fit_seeds`,
    /// and the family's own options, which the family's builder checks (see
    /// [`crate::family::Options`]).
    #[serde(default)]
    pub model: Option<Spanned<toml::Value>>,
    /// The loss to decompose.
    #[serde(default)]
    pub loss: Option<LossSpec>,
    /// Selection audit: k-fold cross-validation inside every replicate (see [`crate::audit`]).
    #[serde(default)]
    pub audit: Option<AuditSpec>,
}

/// `[audit]`: run k-fold cross-validation on every replicate's training set and record the knob
/// it would choose.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AuditSpec {
    /// Number of folds k (at least 2).
    pub folds: Spanned<i64>,
    /// `min` (default: the lowest cross-validated loss) or `one_se` (the simplest value within
    /// one standard error of the lowest).
    #[serde(default)]
    pub rule: Option<Spanned<String>>,
}

/// `reference = { family = "forest", k = 16, trees = 100, min_leaf = 5, seed = 7, ... }` of a
/// twin source: the recipe of the flexible fit of E[y | x] refitted on the table at plan time
/// (see [`crate::dgp::reference`]). `lossprism twin` writes it; the older form
/// `{ family = "knn", k = 7, standardize = true }` is the k-NN reference alone.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ReferenceSpec {
    /// `knn`, `forest`, `loclin`, `poly` or `blend`; classes: `knn`, `logit` or `tree`.
    pub family: Spanned<String>,
    /// Number of neighbours of the k-NN part (knn, a blend with a k-NN weight, classes, varying
    /// noise).
    #[serde(default)]
    pub k: Option<Spanned<i64>>,
    /// Standardize the k-NN inputs with the table's mean and sd (default true).
    #[serde(default)]
    pub standardize: Option<bool>,
    /// Trees of the forest part.
    #[serde(default)]
    pub trees: Option<Spanned<i64>>,
    /// Minimum samples per leaf of the forest's trees.
    #[serde(default)]
    pub min_leaf: Option<Spanned<i64>>,
    /// Seed of the forest's bootstrap samples.
    #[serde(default)]
    pub seed: Option<Spanned<i64>>,
    /// Bandwidth of the local-linear part (sd units of the standardized inputs).
    #[serde(default)]
    pub bandwidth: Option<Spanned<f64>>,
    /// The polynomial part's total degree (family `poly`, or a blend with a `poly` weight).
    #[serde(default)]
    pub degree: Option<Spanned<i64>>,
    /// Weights of a blend (non-negative, at least one positive).
    #[serde(default)]
    pub weights: Option<Spanned<CandidateNumbers>>,
    /// Cross-validated R² of each candidate when the choice was made (informational).
    #[serde(default)]
    pub cv_r2: Option<CandidateNumbers>,
    /// Twicing: refit the recipe to its own in-sample residuals and add (regression).
    #[serde(default)]
    pub twice: Option<bool>,
    /// Input weights of the k-NN and local-linear parts, one per input (standardized inputs
    /// multiplied by them before any distance).
    #[serde(default)]
    pub metric: Option<Spanned<Vec<f64>>>,
    /// Regression: the inputs (feature names) the reference is fitted on, when `lossprism
    /// twin` left the others out.
    #[serde(default)]
    pub inputs: Option<Spanned<Vec<String>>>,
    /// Classes, `family = "logit"`: the ridge penalty (its degree is `degree`).
    #[serde(default)]
    pub ridge: Option<Spanned<f64>>,
    /// Classes, `family = "tree"`: the probability tree's depth (with `min_leaf` and `seed`).
    #[serde(default)]
    pub depth: Option<Spanned<i64>>,
}

/// One number per reference candidate (`{ knn = .., forest = .., loclin = .., blend = .. }`).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CandidateNumbers {
    /// k nearest neighbours.
    #[serde(default)]
    pub knn: Option<f64>,
    /// Bagged trees.
    #[serde(default)]
    pub forest: Option<f64>,
    /// Local-linear.
    #[serde(default)]
    pub loclin: Option<f64>,
    /// Polynomial least squares.
    #[serde(default)]
    pub poly: Option<f64>,
    /// The blend.
    #[serde(default)]
    pub blend: Option<f64>,
}

/// `[data.fit_report]` of a twin: what `lossprism twin` measured when it wrote the file
/// (informational; `run` echoes it in the result's `scenario.twin`, nothing in the run depends
/// on it).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FitReportSpec {
    /// The factor the reference's smoothing was sharpened by after cross-validation (absent:
    /// none, as in twins written before the sharpening).
    #[serde(default)]
    pub sharpen: Option<f64>,
    /// The noise estimate and its correction.
    #[serde(default)]
    pub noise: Option<NoiseRecordSpec>,
    /// The fidelity check.
    #[serde(default)]
    pub fidelity: Option<FidelitySpec>,
}

/// `noise = { method, raw, correction, value, stderr, tables, weighted, left_out }` of
/// `[data.fit_report]`.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NoiseRecordSpec {
    /// Estimator name.
    pub method: String,
    /// Raw estimate.
    pub raw: f64,
    /// Bias subtracted.
    pub correction: f64,
    /// Corrected σ².
    pub value: f64,
    /// Its standard error.
    pub stderr: f64,
    /// Bootstrap tables behind the standard error.
    pub tables: u64,
    /// Whether the estimator's distances weighted the inputs (absent: no).
    #[serde(default)]
    pub weighted: bool,
    /// Table rows the estimator left out as query rows (absent: none).
    #[serde(default)]
    pub left_out: u64,
}

/// `[data.fit_report.fidelity]`.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FidelitySpec {
    /// Tables drawn from the twin.
    pub tables: u64,
    /// Replicates of every run of a twin of the twin.
    pub replicates: u64,
    /// Replicates of the twin's own run (absent in scenarios whose recommendation was the
    /// bias-corrected pick).
    #[serde(default)]
    pub twin_replicates: Option<u64>,
    /// One entry per family checked.
    pub models: Vec<FidelityModelSpec>,
}

/// One family of `[data.fit_report.fidelity]`.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FidelityModelSpec {
    /// Family name.
    pub family: String,
    /// Knob name.
    pub knob: String,
    /// The twin's pick.
    pub pick: f64,
    /// The twin's one-standard-error set.
    pub one_se: Vec<f64>,
    /// The pick of each twin of a twin.
    pub picks: Vec<f64>,
    /// Share of those picks inside `one_se`.
    pub in_one_se: f64,
    /// Mean relative curve distance.
    pub curve_error: f64,
    /// The pick of the bias-corrected curve.
    pub corrected_pick: f64,
    /// The grid.
    pub grid: Vec<f64>,
    /// Expected loss on the twin per grid value.
    pub loss: Vec<f64>,
    /// Bias-corrected expected loss per grid value.
    pub corrected_loss: Vec<f64>,
}

/// One training size or several.
#[derive(Debug, Clone)]
pub enum Sizes {
    /// One size.
    One(i64),
    /// Several sizes (a learning curve).
    Many(Vec<i64>),
}

impl<'de> Deserialize<'de> for Sizes {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Sizes, D::Error> {
        struct V;
        impl<'de> serde::de::Visitor<'de> for V {
            type Value = Sizes;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("a whole number of rows, or a list of them like [100, 200, 400]")
            }
            fn visit_i64<E: serde::de::Error>(self, v: i64) -> Result<Sizes, E> {
                Ok(Sizes::One(v))
            }
            fn visit_u64<E: serde::de::Error>(self, v: u64) -> Result<Sizes, E> {
                Ok(Sizes::One(i64::try_from(v).unwrap_or(i64::MAX)))
            }
            fn visit_seq<A: serde::de::SeqAccess<'de>>(
                self,
                mut seq: A,
            ) -> Result<Sizes, A::Error> {
                let mut v = Vec::new();
                while let Some(Rows(n)) = seq.next_element::<Rows>()? {
                    v.push(n);
                }
                Ok(Sizes::Many(v))
            }
        }
        d.deserialize_any(V)
    }
}

/// One entry of a list of training sizes: a whole number of rows.
struct Rows(i64);

impl<'de> Deserialize<'de> for Rows {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Rows, D::Error> {
        struct V;
        impl serde::de::Visitor<'_> for V {
            type Value = Rows;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("a whole number of rows")
            }
            fn visit_i64<E: serde::de::Error>(self, v: i64) -> Result<Rows, E> {
                Ok(Rows(v))
            }
            fn visit_u64<E: serde::de::Error>(self, v: u64) -> Result<Rows, E> {
                Ok(Rows(i64::try_from(v).unwrap_or(i64::MAX)))
            }
        }
        d.deserialize_any(V)
    }
}

impl Sizes {
    /// The sizes as written.
    pub fn values(&self) -> Vec<i64> {
        match self {
            Sizes::One(n) => vec![*n],
            Sizes::Many(v) => v.clone(),
        }
    }
}

/// `[data]`: the data-generating process.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DataSpec {
    /// `synthetic` (other sources arrive with later versions).
    pub source: Spanned<String>,
    /// Training set size n, or several sizes (`[100, 200, 400]`: a learning curve, fitted on
    /// nested prefixes of one draw per replicate).
    #[serde(default)]
    pub train_size: Option<Spanned<Sizes>>,
    /// Number of evaluation points m.
    #[serde(default)]
    pub eval_size: Option<Spanned<i64>>,
    /// `random` (fresh inputs every replicate) or `fixed` (inputs drawn once, noise redrawn).
    #[serde(default)]
    pub design: Option<Spanned<String>>,
    /// `design` evaluates at the training inputs (fixed design only); `fresh` (default) draws
    /// evaluation inputs from the input distribution.
    #[serde(default)]
    pub eval: Option<Spanned<String>>,
    /// Inputs, in order; names are the formula's variables.
    #[serde(default)]
    pub inputs: Option<Vec<InputSpec>>,
    /// The regression function f(x).
    #[serde(default)]
    pub truth: Option<TruthSpec>,
    /// The noise model.
    #[serde(default)]
    pub noise: Option<NoiseSpec>,
    /// Classification instead of truth/noise.
    #[serde(default)]
    pub classes: Option<ClassesSpec>,
    /// Table: the CSV file, relative to the scenario file's folder.
    #[serde(default)]
    pub path: Option<Spanned<String>>,
    /// Table: the response column.
    #[serde(default)]
    pub target: Option<Spanned<String>>,
    /// Table: feature columns (default: every column but the target).
    #[serde(default)]
    pub features: Option<Spanned<Vec<String>>>,
    /// Table: `bootstrap` (default; evaluation out-of-bag) or `half` (evaluation on the rest).
    #[serde(default)]
    pub resample: Option<Spanned<String>>,
    /// Table: training fraction of a subsample without replacement (default 0.5 with `half`).
    #[serde(default)]
    pub train_fraction: Option<Spanned<f64>>,
    /// Table: fraction of rows locked away as a holdout (default 0).
    #[serde(default)]
    pub holdout: Option<Spanned<f64>>,
    /// Table: `error` (default) or `drop` for missing or non-numeric cells.
    #[serde(default)]
    pub missing: Option<Spanned<String>>,
    /// Table: `keep` (default) or `drop` for rows repeating an earlier row exactly.
    #[serde(default)]
    pub duplicates: Option<Spanned<String>>,
    /// Table: `regress` (default) or `classify` (labels from the target's values).
    #[serde(default)]
    pub task: Option<Spanned<String>>,
    /// Table: `nn`, `gamma` or `gsjs` (default: `gsjs` with one input, else `gamma`).
    #[serde(default)]
    pub noise_estimator: Option<Spanned<String>>,
    /// Twin: the reference fit that serves as the truth.
    #[serde(default)]
    pub reference: Option<ReferenceSpec>,
    /// Twin: the bandwidth multiplier c of the smoothed bootstrap of the rows (Silverman's rule
    /// × c; default 0: rows resampled as they are).
    #[serde(default)]
    pub jitter: Option<Spanned<f64>>,
    /// Twin: `table` (each jittered column shrunk toward its mean to keep the table's
    /// variance) or `added` (the plain smoothed bootstrap; the default, as twins written before
    /// this key).
    #[serde(default)]
    pub jitter_variance: Option<Spanned<String>>,
    /// Twin: the digest of the table the twin was fitted to ([`crate::dataset::Table::digest`]);
    /// `run` refuses the twin when the table no longer gives it.
    #[serde(default)]
    pub table_digest: Option<Spanned<String>>,
    /// Twin: what `lossprism twin` measured (informational, echoed in results).
    #[serde(default)]
    pub fit_report: Option<Spanned<FitReportSpec>>,
}

/// `[data.classes]`: labels and the true class probabilities P(Y = c | x).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ClassesSpec {
    /// Class labels (at least 2), in order; class c is `labels[c]`.
    pub labels: Spanned<Vec<String>>,
    /// Two classes: P(second label | x) as a formula.
    #[serde(default)]
    pub probability: Option<Spanned<String>>,
    /// K formulas, one per label: class probabilities are their softmax.
    #[serde(default)]
    pub logits: Option<Spanned<Vec<String>>>,
    /// A deterministic rule giving the class index (0-based; for two classes a condition that
    /// is 1 for the second label), used with `flip`.
    #[serde(default)]
    pub rule: Option<Spanned<String>>,
    /// Label-flip noise on top of `rule`: with this probability the label is replaced by one of
    /// the other classes, chosen uniformly.
    #[serde(default)]
    pub flip: Option<Spanned<f64>>,
    /// A twin's reference only: the temperature τ in (0, 1] that sharpens its class shares,
    /// `p_c ∝ p_c^(1/τ)` (`lossprism twin` calibrates it; 1 or absent: the shares as they are).
    #[serde(default)]
    pub temperature: Option<Spanned<f64>>,
}

/// `[[data.inputs]]`: one input and its distribution (exactly one of the distribution keys).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InputSpec {
    /// Variable name.
    pub name: Spanned<String>,
    /// `[lo, hi]`: uniform on the interval.
    #[serde(default)]
    pub uniform: Option<Spanned<Vec<f64>>>,
    /// `[mean, sd]`: Gaussian.
    #[serde(default)]
    pub normal: Option<Spanned<Vec<f64>>>,
    /// `[lo, hi]`: evenly spaced over the sample (point i of n at lo + (hi-lo)·i/(n-1)).
    #[serde(default)]
    pub even: Option<Spanned<Vec<f64>>>,
    /// `[meanlog, sdlog]`: lognormal, `exp(meanlog + sdlog·z)` with z standard normal.
    #[serde(default)]
    pub lognormal: Option<Spanned<Vec<f64>>>,
    /// `rate`: exponential with that rate (mean 1/rate).
    #[serde(default)]
    pub exponential: Option<Spanned<f64>>,
}

/// `[data.truth]`: a formula or a built-in published test function.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TruthSpec {
    /// Formula over the input names.
    #[serde(default)]
    pub formula: Option<Spanned<String>>,
    /// `friedman1`, `friedman2` or `friedman3` (Friedman 1991).
    #[serde(default)]
    pub builtin: Option<Spanned<String>>,
}

/// `[data.noise]`: additive noise with a constant or input-dependent standard deviation and a
/// shape (Gaussian by default, Student's t, or a twin's resampled residuals), or Poisson counts
/// with the truth as their mean.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NoiseSpec {
    /// Synthetic source: responses are counts drawn Poisson with mean f(x) (> 0), instead of
    /// `f(x)` plus additive noise.
    #[serde(default)]
    pub poisson: Option<Spanned<bool>>,
    /// Constant standard deviation.
    #[serde(default)]
    pub sd: Option<Spanned<f64>>,
    /// Standard deviation as a formula over the inputs.
    #[serde(default)]
    pub sd_formula: Option<Spanned<String>>,
    /// Twin: σ²(x) from the reference's smoothed squared residuals instead of a constant.
    #[serde(default)]
    pub varying: Option<Spanned<bool>>,
    /// Twin, varying noise: σ²(x)'s mean over the table's rows (the corrected noise estimate
    /// `lossprism twin` measured); without it σ²(x) is the smoothed residuals as they are.
    #[serde(default)]
    pub level: Option<Spanned<f64>>,
    /// Twin, varying noise: the neighbours σ²(x) averages (the reference's `k` when absent).
    #[serde(default)]
    pub smooth_k: Option<Spanned<i64>>,
    /// The law of the standardized noise: `gaussian` (default), `student` (with `df`) or, in a
    /// twin, `residuals` (the table's standardized residuals resampled).
    #[serde(default)]
    pub shape: Option<Spanned<String>>,
    /// Degrees of freedom of `shape = "student"` (> 4, so that the noise's fourth moment, and
    /// with it every standard error, is finite).
    #[serde(default)]
    pub df: Option<Spanned<f64>>,
}

/// `[loss]`.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LossSpec {
    /// `squared` (default for regression), `zero_one` (default for classification), `log`,
    /// `brier` (classification with class probabilities) or `poisson` (count responses).
    pub kind: Spanned<String>,
}
