//! Synthetic data-generating processes: input distributions, the truth f(x) (a formula or a
//! published test function) and the noise model; a simulated twin's reference model
//! ([`reference`]) and its inputs, noise correction and fit record ([`twin`]). Everything here is
//! deterministic given the random stream handed in; the runner owns the streams.

pub mod reference;
pub mod twin;

use ndarray::{Array1, Array2, ArrayView1, ArrayView2};
use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

use crate::error::Error;
use crate::expr::Formula;

/// Distribution of one input variable.
#[derive(Debug, Clone, PartialEq)]
pub enum InputDist {
    /// Uniform on `[lo, hi]`.
    Uniform(f64, f64),
    /// Gaussian with mean and standard deviation.
    Normal(f64, f64),
    /// Evenly spaced over the sample: point i of n sits at `lo + (hi-lo)·i/(n-1)`.
    Even(f64, f64),
    /// Lognormal: `exp(meanlog + sdlog·z)`, z standard normal.
    LogNormal(f64, f64),
    /// Exponential with rate λ (mean 1/λ), by inversion: `−ln(1 − u)/λ`, u uniform on [0, 1).
    Exponential(f64),
    /// Column `column` of a table's rows (a twin, see [`twin`]). When every input is
    /// empirical, whole rows are drawn with replacement, so the columns keep their joint law;
    /// with `jitter`, each drawn row is then smoothed ([`twin::Jitter`]).
    Empirical {
        /// The table's input rows.
        rows: std::sync::Arc<ndarray::Array2<f64>>,
        /// Which column.
        column: usize,
        /// The table file, for descriptions.
        source: String,
        /// The smoothed bootstrap shared by all columns (`None`: rows as they are).
        jitter: Option<std::sync::Arc<twin::Jitter>>,
    },
}

impl InputDist {
    /// Human-readable form, e.g. `uniform(0, 1)`.
    pub fn describe(&self) -> String {
        match self {
            InputDist::Uniform(a, b) => format!("uniform({a}, {b})"),
            InputDist::Normal(m, s) => format!("normal(mean {m}, sd {s})"),
            InputDist::Even(a, b) => format!("evenly spaced over [{a}, {b}]"),
            InputDist::LogNormal(m, s) => format!("lognormal(meanlog {m}, sdlog {s})"),
            InputDist::Exponential(r) => format!("exponential(rate {r})"),
            InputDist::Empirical {
                rows,
                source,
                jitter,
                column,
            } => match jitter.as_deref().filter(|j| !j.is_plain()) {
                None => format!("the {} rows of {source}, resampled", rows.nrows()),
                Some(j) => format!(
                    "the {} rows of {source}, resampled, {}",
                    rows.nrows(),
                    j.describe_column(*column)
                ),
            },
        }
    }
}

/// A named input.
#[derive(Debug, Clone, PartialEq)]
pub struct Input {
    /// Variable name.
    pub name: String,
    /// Its distribution.
    pub dist: InputDist,
}

/// Published regression test functions (Friedman 1991, *Annals of Statistics* 19:1–67, §4.3,
/// the three functions later called "Friedman #1–#3").
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Builtin {
    /// `10 sin(π x1 x2) + 20 (x3 - 0.5)² + 10 x4 + 5 x5`, x ~ U[0,1]^p (p ≥ 5, default 10), noise sd 1.
    Friedman1,
    /// `sqrt(x1² + (x2 x3 - 1/(x2 x4))²)`, noise sd 125.
    Friedman2,
    /// `atan((x2 x3 - 1/(x2 x4)) / x1)`, noise sd 0.1.
    Friedman3,
}

impl Builtin {
    /// Parses a builtin name.
    pub fn from_name(name: &str) -> Option<Builtin> {
        match name {
            "friedman1" => Some(Builtin::Friedman1),
            "friedman2" => Some(Builtin::Friedman2),
            "friedman3" => Some(Builtin::Friedman3),
            _ => None,
        }
    }

    /// The name as written in scenario files.
    pub fn name(self) -> &'static str {
        match self {
            Builtin::Friedman1 => "friedman1",
            Builtin::Friedman2 => "friedman2",
            Builtin::Friedman3 => "friedman3",
        }
    }

    /// The published input distributions (x1..x10 for #1, x1..x4 for #2 and #3).
    pub fn default_inputs(self) -> Vec<Input> {
        let u = |name: &str, a: f64, b: f64| Input {
            name: name.to_string(),
            dist: InputDist::Uniform(a, b),
        };
        match self {
            Builtin::Friedman1 => (1..=10).map(|i| u(&format!("x{i}"), 0.0, 1.0)).collect(),
            Builtin::Friedman2 | Builtin::Friedman3 => vec![
                u("x1", 0.0, 100.0),
                u(
                    "x2",
                    40.0 * std::f64::consts::PI,
                    560.0 * std::f64::consts::PI,
                ),
                u("x3", 0.0, 1.0),
                u("x4", 1.0, 11.0),
            ],
        }
    }

    /// Minimum number of inputs the function reads.
    pub fn min_inputs(self) -> usize {
        match self {
            Builtin::Friedman1 => 5,
            _ => 4,
        }
    }

    /// The published noise standard deviation (used when the file gives none).
    pub fn default_sd(self) -> f64 {
        match self {
            Builtin::Friedman1 => 1.0,
            Builtin::Friedman2 => 125.0,
            Builtin::Friedman3 => 0.1,
        }
    }

    /// Evaluates the function at one input row.
    pub fn eval(self, x: &[f64]) -> f64 {
        use std::f64::consts::PI;
        match self {
            Builtin::Friedman1 => {
                10.0 * (PI * x[0] * x[1]).sin()
                    + 20.0 * (x[2] - 0.5).powi(2)
                    + 10.0 * x[3]
                    + 5.0 * x[4]
            }
            Builtin::Friedman2 => {
                let t = x[1] * x[2] - 1.0 / (x[1] * x[3]);
                (x[0] * x[0] + t * t).sqrt()
            }
            Builtin::Friedman3 => ((x[1] * x[2] - 1.0 / (x[1] * x[3])) / x[0]).atan(),
        }
    }
}

/// The regression function f(x).
#[derive(Debug, Clone)]
pub enum Truth {
    /// A user formula over the input names.
    Formula(Formula),
    /// A published test function.
    Builtin(Builtin),
    /// A twin's reference fit on a table.
    Reference(std::sync::Arc<reference::Reference>),
}

impl Truth {
    /// Human-readable form.
    pub fn describe(&self) -> String {
        match self {
            Truth::Formula(f) => f.source().to_string(),
            Truth::Builtin(b) => b.name().to_string(),
            Truth::Reference(r) => r.describe(),
        }
    }

    fn eval_row(&self, row: &[f64]) -> f64 {
        match self {
            Truth::Formula(f) => f.eval(row),
            Truth::Builtin(b) => b.eval(row),
            Truth::Reference(r) => r.mean_at(row),
        }
    }
}

/// The noise: the standard deviation σ(x) of additive noise (Gaussian unless its [`NoiseShape`]
/// says otherwise), or Poisson counts.
#[derive(Debug, Clone)]
pub enum Noise {
    /// Counts: `y ~ Poisson(f(x))`, so the truth is the mean (it must be > 0) and the noise
    /// variance is `σ²(x) = f(x)`.
    Poisson,
    /// Constant σ.
    Constant(f64),
    /// σ(x) as a formula over the inputs.
    Formula(Formula),
    /// A twin's varying noise: σ²(x) from the reference's smoothed squared residuals.
    Reference(std::sync::Arc<reference::Reference>),
}

impl Noise {
    /// Human-readable form.
    pub fn describe(&self) -> String {
        match self {
            Noise::Poisson => "poisson counts with mean f(x) (variance f(x))".into(),
            Noise::Constant(s) => format!("gaussian, sd {s}"),
            Noise::Formula(f) => format!("gaussian, sd = {}", f.source()),
            Noise::Reference(r) => r.describe_noise(),
        }
    }
}

/// The law of the standardized noise z in `y = f(x) + σ(x) z` (mean 0, variance 1, so σ(x)² is
/// the noise variance whatever the shape; the squared loss's noise term needs nothing else).
#[derive(Debug, Clone, Default, PartialEq)]
pub enum NoiseShape {
    /// Standard normal.
    #[default]
    Gaussian,
    /// Student's t with `df` degrees of freedom scaled to variance 1, `z = t·√((df − 2)/df)`
    /// (heavier tails: excess kurtosis 6/(df − 4)). Scenarios ask for df > 4 (`MIN_STUDENT_DF`
    /// in `scenario::plan`: a finite fourth moment, which the standard errors need); the draw
    /// itself needs df > 2 (a finite variance).
    Student(f64),
    /// Drawn with replacement from a pool of standardized residuals (mean 0, mean square 1; see
    /// [`standardized_residuals`]): the residual bootstrap, which keeps the table's noise shape.
    Resampled(std::sync::Arc<Vec<f64>>),
}

impl NoiseShape {
    /// Human-readable form of noise `noise` with this shape (Poisson counts have none).
    pub fn describe(&self, noise: &Noise) -> String {
        let base = noise.describe();
        let rest = match base.strip_prefix("gaussian") {
            Some(rest) => rest,
            None => return base,
        };
        match self {
            NoiseShape::Gaussian => base,
            NoiseShape::Student(df) => format!("student t ({df} degrees of freedom, scaled to variance 1){rest}"),
            NoiseShape::Resampled(pool) => format!(
                "resampled residuals (the {} standardized in-sample residuals of the reference, drawn with replacement){rest}",
                pool.len()
            ),
        }
    }

    /// One standardized noise draw from `rng`.
    fn draw<R: Rng + ?Sized>(&self, rng: &mut R) -> f64 {
        match self {
            NoiseShape::Gaussian => StandardNormal.sample(rng),
            NoiseShape::Student(df) => {
                let t: f64 = rand_distr::StudentT::new(*df)
                    .map(|d| d.sample(rng))
                    .unwrap_or(0.0);
                t * ((df - 2.0) / df).sqrt()
            }
            NoiseShape::Resampled(pool) => pool[rng.gen_range(0..pool.len())],
        }
    }
}

/// The residuals `(y_i − f_i) / s_i` of the rows with `s_i > 0`, centred and scaled to mean
/// square 1: the pool of [`NoiseShape::Resampled`]. Errors (one line) when fewer than 2 rows have
/// `s_i > 0`, or when the residuals are all equal (a fit through every point leaves no shape to
/// resample) or not finite.
pub fn standardized_residuals(y: &[f64], f: &[f64], s: &[f64]) -> Result<Vec<f64>, String> {
    let mut z: Vec<f64> = y
        .iter()
        .zip(f)
        .zip(s)
        .filter(|(_, s)| **s > 0.0)
        .map(|((y, f), s)| (y - f) / s)
        .collect();
    if z.len() < 2 {
        return Err(format!(
            "{} rows with noise; resampled residuals need at least 2",
            z.len()
        ));
    }
    let n = z.len() as f64;
    let mean = z.iter().sum::<f64>() / n;
    z.iter_mut().for_each(|v| *v -= mean);
    let ms = z.iter().map(|v| v * v).sum::<f64>() / n;
    if !(ms.is_finite() && ms > 0.0) {
        return Err(format!(
            "the reference's residuals have mean square {ms}; resampled residuals need a finite spread (use the Gaussian shape)"
        ));
    }
    let scale = ms.sqrt();
    z.iter_mut().for_each(|v| *v /= scale);
    Ok(z)
}

/// How the true class probabilities are given.
#[derive(Debug, Clone)]
pub enum ClassKind {
    /// Two classes: P(second label | x).
    Probability(Formula),
    /// K logits, class probabilities by softmax.
    Logits(Vec<Formula>),
    /// A deterministic rule (class index, or a 0/1 condition for two classes) with label-flip
    /// noise: the label is replaced with probability `flip` by one of the other K-1 classes,
    /// uniformly.
    Flip {
        /// The rule.
        rule: Formula,
        /// Flip probability.
        flip: f64,
    },
    /// A twin's reference fit: k-NN shares with add-one smoothing, a logistic polynomial or a
    /// probability tree ([`reference::Reference::probs_at`]).
    Reference(std::sync::Arc<reference::Reference>),
}

/// A classification response: labels and P(Y = c | x).
#[derive(Debug, Clone)]
pub struct ClassModel {
    /// Labels; class c is `labels[c]`.
    pub labels: Vec<String>,
    /// The probability model.
    pub kind: ClassKind,
}

impl ClassModel {
    /// Human-readable form.
    pub fn describe(&self) -> String {
        match &self.kind {
            ClassKind::Probability(f) => format!("P({} | x) = {}", self.labels[1], f.source()),
            ClassKind::Logits(fs) => format!(
                "softmax of logits [{}]",
                fs.iter().map(|f| f.source()).collect::<Vec<_>>().join(", ")
            ),
            ClassKind::Flip { rule, flip } => {
                format!(
                    "rule {} with labels flipped with probability {flip}",
                    rule.source()
                )
            }
            ClassKind::Reference(r) => {
                let what = match r.choice.family {
                    reference::Candidate::Knn => "class shares (add-one smoothed)",
                    reference::Candidate::Tree => "leaf class shares (add-one smoothed)",
                    _ => "class probabilities",
                };
                let temp = if r.temperature != 1.0 {
                    format!(
                        ", sharpened at temperature {}",
                        crate::fmt::fmt_exact(r.temperature)
                    )
                } else {
                    String::new()
                };
                format!("{what} of the {}{temp}", r.describe())
            }
        }
    }
}

/// What is observed at an input: a noisy real response or a class label.
#[derive(Debug, Clone)]
pub enum Response {
    /// `y = f(x) + σ(x) z`, or `y ~ Poisson(f(x))` with [`Noise::Poisson`].
    Regression {
        /// f(x).
        truth: Truth,
        /// σ(x).
        noise: Noise,
        /// The law of z (Gaussian unless the scenario says otherwise; ignored by Poisson counts).
        shape: NoiseShape,
    },
    /// `y ~ Categorical(p(x))`.
    Classes(ClassModel),
}

/// A synthetic process: inputs and a response model.
#[derive(Debug, Clone)]
pub struct Synthetic {
    /// Inputs in column order.
    pub inputs: Vec<Input>,
    /// The response model.
    pub response: Response,
}

fn describe_row(inputs: &[Input], row: &[f64]) -> String {
    // At most a few inputs: a message stays one readable line with 100 000 inputs.
    const SHOWN: usize = 8;
    let mut s = inputs
        .iter()
        .zip(row)
        .take(SHOWN)
        .map(|(i, v)| format!("{} = {v}", crate::fmt::clip(&i.name, 40)))
        .collect::<Vec<_>>()
        .join(", ");
    if inputs.len() > SHOWN {
        s.push_str(&format!(", … ({} inputs)", inputs.len()));
    }
    s
}

impl Synthetic {
    /// Draws `n` input rows from the input distributions.
    pub fn draw_inputs<R: Rng + ?Sized>(&self, n: usize, rng: &mut R) -> Array2<f64> {
        let p = self.inputs.len();
        if let Some(rows) = self.empirical_rows() {
            return match self.jitter() {
                Some(j) => j.draw(rows, n, rng),
                None => reference::resample_rows(rows, n, rng),
            };
        }
        let mut x = Array2::<f64>::zeros((n, p));
        // Column by column so that each input's draws do not depend on the other inputs' kinds.
        for (j, input) in self.inputs.iter().enumerate() {
            for i in 0..n {
                x[[i, j]] = match input.dist {
                    InputDist::Uniform(a, b) => a + (b - a) * rng.gen::<f64>(),
                    InputDist::Normal(m, s) => {
                        let z: f64 = StandardNormal.sample(rng);
                        m + s * z
                    }
                    InputDist::LogNormal(m, s) => {
                        let z: f64 = StandardNormal.sample(rng);
                        (m + s * z).exp()
                    }
                    InputDist::Exponential(r) => -(1.0 - rng.gen::<f64>()).ln() / r,
                    // Mixed with other kinds (not produced by a plan): one row per value.
                    InputDist::Empirical {
                        ref rows,
                        column,
                        ref jitter,
                        ..
                    } => {
                        let v = rows[[rng.gen_range(0..rows.nrows()), column]];
                        match jitter {
                            Some(j) => j.perturb(column, v, rng),
                            None => v,
                        }
                    }
                    InputDist::Even(a, b) => {
                        if n == 1 {
                            0.5 * (a + b)
                        } else {
                            a + (b - a) * i as f64 / (n - 1) as f64
                        }
                    }
                };
            }
        }
        x
    }

    /// The shared table rows when every input is an empirical column `0..p` of the same rows
    /// in order (a twin), else `None`.
    pub fn empirical_rows(&self) -> Option<&ndarray::Array2<f64>> {
        let InputDist::Empirical { rows, .. } = &self.inputs.first()?.dist else {
            return None;
        };
        let all = self.inputs.iter().enumerate().all(|(j, i)| {
            matches!(&i.dist, InputDist::Empirical { rows: r, column, .. }
                if std::sync::Arc::ptr_eq(r, rows) && *column == j)
        }) && rows.ncols() == self.inputs.len();
        all.then_some(rows.as_ref())
    }

    /// The smoothed bootstrap of a twin's inputs, when some column is jittered.
    pub fn jitter(&self) -> Option<&twin::Jitter> {
        match &self.inputs.first()?.dist {
            InputDist::Empirical {
                jitter: Some(j), ..
            } if !j.is_plain() => Some(j.as_ref()),
            _ => None,
        }
    }

    /// The twin's reference (regression truth or class model), `None` for any other process.
    pub fn reference(&self) -> Option<&reference::Reference> {
        match &self.response {
            Response::Regression {
                truth: Truth::Reference(r),
                ..
            } => Some(r),
            Response::Classes(ClassModel {
                kind: ClassKind::Reference(r),
                ..
            }) => Some(r),
            _ => None,
        }
    }

    /// A digest of the data behind a twin's reference (its responses bit for bit, its recipe and
    /// the inputs' jitter); 0 for any other process.
    pub fn reference_digest(&self) -> u64 {
        let Some(r) = self.reference() else {
            return 0;
        };
        match self.jitter() {
            None => r.digest(),
            Some(j) => {
                // The smoothed bootstrap changes every draw: its bandwidths join the digest.
                let mut bytes = r.digest().to_le_bytes().to_vec();
                for v in j.h.iter().chain(&j.lo).chain(&j.hi) {
                    bytes.extend_from_slice(&v.to_bits().to_le_bytes());
                }
                crate::codec::fnv1a64(&bytes)
            }
        }
    }

    /// The table file a twin's reference was fitted on (an input of the run); `None` for any
    /// other process.
    pub fn source_file(&self) -> Option<std::path::PathBuf> {
        self.reference().and_then(|r| r.path.clone())
    }

    /// `true` for a twin (inputs resampled from a table's rows).
    pub fn is_twin(&self) -> bool {
        self.empirical_rows().is_some()
    }

    /// Evaluates the process's formulas (truth and sd, or class probabilities) at `n` inputs
    /// drawn from `rng`, so that `validate` and `run` find, before any work, a formula that is
    /// not finite somewhere the training draws may reach (the run stopped at its first such
    /// draw; `validate` passed the file). A twin's reference is not probed (it is finite where
    /// it was fitted), nor evenly spaced inputs (the same points in every draw of a size). The
    /// error is the one a draw gives.
    ///
    /// Beside the random draws it evaluates the inputs' far quantiles, `1/draws` from each end
    /// (`draws`: the run's input draws), which a run reaches with probability about 63 %, and
    /// returns the largest |truth| and sd there (`(0, 0)` for classes, a twin, or a process
    /// without such rows): training draws reach further into the tails than the evaluation
    /// points, and the run holds them to the responses' range too (`exp(15 x)` of an
    /// exponential input reached 1e86 there, and a run reported an expected loss of 3e162).
    ///
    /// With evenly spaced inputs it evaluates instead the draws of each size in `sizes` (the
    /// training sizes and the evaluation points), whose evenly spaced values are the very points
    /// a run uses (`sin(a)/a` on an odd number of points of [-1, 1] passed `validate`).
    pub fn probe<R: Rng + ?Sized>(
        &self,
        n: usize,
        draws: f64,
        sizes: &[usize],
        rng: &mut R,
    ) -> Result<(f64, f64), Error> {
        // A twin's reference (regression or classes) is finite where it was fitted.
        if self.reference().is_some() {
            return Ok((0.0, 0.0));
        }
        // Evenly spaced inputs are the same points in every draw of a size, so 10 000 of them
        // are points no run uses: random draws only without them (their ends are probed below).
        let p = self.inputs.len().max(1);
        if !self
            .inputs
            .iter()
            .any(|i| matches!(i.dist, InputDist::Even(..)))
        {
            let x = self.draw_inputs(n, rng);
            self.formulas_at(x.view())?;
        } else {
            for &m in sizes.iter().filter(|&&m| m.saturating_mul(p) <= 2_000_000) {
                let x = self.draw_inputs(m, rng);
                self.formulas_at(x.view())?;
            }
        }
        // The laws' far quantiles, which `n` random draws seldom reach but a run's `draws` do
        // (a lognormal input's rare large draw overflowed `exp(x) / 1e100` in the run only).
        let q = 1.0 / draws.max(2.0);
        let x = self.extreme_rows(q);
        if x.nrows() == 0 {
            return Ok((0.0, 0.0));
        }
        let far = |e: Error| {
            Error::Data(format!(
                "{e}: the inputs' far quantiles ({q:.1e} from either end), which a run of \
                 {draws:.0} input draws passes with probability about 63 %"
            ))
        };
        let largest = |a: Array1<f64>| a.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
        match &self.response {
            Response::Regression { .. } => Ok((
                largest(self.truth_at(x.view()).map_err(far)?),
                largest(self.sd_at(x.view()).map_err(far)?),
            )),
            Response::Classes(_) => {
                self.probs_at(x.view()).map_err(far)?;
                Ok((0.0, 0.0))
            }
        }
    }

    /// The truth and sd, or the class probabilities, at the rows of `x` (errors as a draw's).
    fn formulas_at(&self, x: ArrayView2<'_, f64>) -> Result<(), Error> {
        match &self.response {
            Response::Regression { .. } => {
                self.truth_at(x)?;
                self.sd_at(x)?;
            }
            Response::Classes(_) => {
                self.probs_at(x)?;
            }
        }
        Ok(())
    }

    /// Rows at the inputs' `q` and `1 − q` quantiles: each input alone low or high with the
    /// others at [`OTHERS_QUANTILE`] (2p rows; none beyond [`EXTREME_EACH_MAX`] inputs, or when some
    /// input's law has no quantiles here, a table's rows). Not every input at once: that corner
    /// has probability about q^p per draw, and `ln(a + b)` of two normal inputs far from 0 was
    /// refused where a run would meet a negative sum once in 2000 runs (a second sweep).
    fn extreme_rows(&self, q: f64) -> Array2<f64> {
        let p = self.inputs.len();
        let each = if p <= EXTREME_EACH_MAX { p } else { 0 };
        let at = |d: &InputDist, q: f64| -> Option<f64> {
            match *d {
                InputDist::Uniform(a, b) => Some(a + (b - a) * q),
                InputDist::Normal(m, s) => Some(m + s * normal_quantile(q)),
                InputDist::LogNormal(m, s) => Some((m + s * normal_quantile(q)).exp()),
                InputDist::Exponential(r) => Some(-(-q).ln_1p() / r),
                // Its ends are points of every draw: the range itself.
                InputDist::Even(a, b) => Some(if q < 0.01 {
                    a
                } else if q > 0.99 {
                    b
                } else {
                    a + (b - a) * q
                }),
                InputDist::Empirical { .. } => None,
            }
        };
        // The others sit at a quantile off the middle: a symmetric law's median is often
        // exactly 0, where `sin(a)/a` is 0/0 although no draw ever lands (a second sweep).
        let (Some(lo), Some(mid), Some(hi)) = (
            self.inputs
                .iter()
                .map(|i| at(&i.dist, q))
                .collect::<Option<Vec<f64>>>(),
            self.inputs
                .iter()
                .map(|i| at(&i.dist, OTHERS_QUANTILE))
                .collect::<Option<Vec<f64>>>(),
            self.inputs
                .iter()
                .map(|i| at(&i.dist, 1.0 - q))
                .collect::<Option<Vec<f64>>>(),
        ) else {
            return Array2::zeros((0, p));
        };
        let mut x = Array2::zeros((2 * each, p));
        for j in 0..each {
            for (r, ends) in [(2 * j, &lo), (2 * j + 1, &hi)] {
                for (k, v) in mid.iter().enumerate() {
                    x[[r, k]] = if k == j { ends[j] } else { *v };
                }
            }
        }
        x
    }

    /// f at each row (regression); an error names the formula and the input values where it is
    /// not finite.
    pub fn truth_at(&self, x: ArrayView2<'_, f64>) -> Result<Array1<f64>, Error> {
        let Response::Regression { truth, .. } = &self.response else {
            return Err(Error::Data(
                "a classification process has no regression truth".into(),
            ));
        };
        let mut out = Array1::zeros(x.nrows());
        let mut buf = vec![0.0; x.ncols()];
        // A reference is evaluated for all rows at once (its forest part is much faster so).
        let batch = match truth {
            Truth::Reference(r) => Some(r.mean_at_rows(x)),
            _ => None,
        };
        for (i, row) in x.rows().into_iter().enumerate() {
            copy_row(row, &mut buf);
            let v = match &batch {
                Some(b) => b[i],
                None => truth.eval_row(&buf),
            };
            if !v.is_finite() {
                return Err(Error::Data(format!(
                    "key `{}`: `{}` gives {v} at {}",
                    match truth {
                        Truth::Builtin(_) => "data.truth.builtin",
                        Truth::Formula(_) => "data.truth.formula",
                        Truth::Reference(_) => "data.reference",
                    },
                    crate::fmt::clip(&truth.describe(), 80),
                    describe_row(&self.inputs, &buf)
                )));
            }
            out[i] = v;
        }
        Ok(out)
    }

    /// Class probabilities at each row (`n × K`, rows sum to 1). An error names the formula and
    /// the inputs where a probability is outside [0, 1] or not finite.
    pub fn probs_at(&self, x: ArrayView2<'_, f64>) -> Result<Array2<f64>, Error> {
        let Response::Classes(model) = &self.response else {
            return Err(Error::Data(
                "a regression process has no class probabilities".into(),
            ));
        };
        let k = model.labels.len();
        // A twin's reference answers for all rows at once (its logistic polynomial builds its
        // basis once), bit for bit as row by row.
        if let ClassKind::Reference(r) = &model.kind {
            if r.classes != k {
                return Err(Error::Data(format!(
                    "the twin's reference gives {} classes for {k} labels",
                    r.classes
                )));
            }
            return Ok(r.probs_rows(x));
        }
        let mut out = Array2::zeros((x.nrows(), k));
        let mut buf = vec![0.0; x.ncols()];
        let mut logits = vec![0.0; k];
        for (i, row) in x.rows().into_iter().enumerate() {
            copy_row(row, &mut buf);
            let at = || describe_row(&self.inputs, &buf);
            match &model.kind {
                ClassKind::Probability(f) => {
                    let p = f.eval(&buf);
                    if !(0.0..=1.0).contains(&p) {
                        return Err(Error::Data(format!(
                            "key `data.classes.probability`: `{}` gives {p} at {} (must be within [0, 1])",
                            crate::fmt::clip(f.source(), 80),
                            at()
                        )));
                    }
                    out[[i, 0]] = 1.0 - p;
                    out[[i, 1]] = p;
                }
                ClassKind::Logits(fs) => {
                    for (c, f) in fs.iter().enumerate() {
                        let v = f.eval(&buf);
                        if !v.is_finite() {
                            return Err(Error::Data(format!(
                                "key `data.classes.logits`: `{}` gives {v} at {}",
                                crate::fmt::clip(f.source(), 80),
                                at()
                            )));
                        }
                        logits[c] = v;
                    }
                    let mx = logits.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
                    let z: f64 = logits.iter().map(|l| (l - mx).exp()).sum();
                    for c in 0..k {
                        out[[i, c]] = (logits[c] - mx).exp() / z;
                    }
                }
                ClassKind::Flip { rule, flip } => {
                    let v = rule.eval(&buf);
                    if !(v.is_finite() && v >= 0.0 && v.fract() == 0.0 && (v as usize) < k) {
                        return Err(Error::Data(format!(
                            "key `data.classes.rule`: `{}` gives {} at {} (must be a class index 0 to {}, {k} classes)",
                            crate::fmt::clip(rule.source(), 80),
                            crate::fmt::fmt_exact(v),
                            at(),
                            k - 1
                        )));
                    }
                    let other = flip / (k - 1) as f64;
                    for c in 0..k {
                        out[[i, c]] = other;
                    }
                    out[[i, v as usize]] = 1.0 - flip;
                }
                ClassKind::Reference(_) => unreachable!("a reference answers above, for all rows"),
            }
        }
        Ok(out)
    }

    /// σ(x) at each row; an error names the formula and inputs where it is negative or not finite.
    /// A classification process has σ = 0; Poisson counts have `σ = √f(x)`, and an error names
    /// the truth and inputs where the mean `f(x)` is not a finite number > 0.
    pub fn sd_at(&self, x: ArrayView2<'_, f64>) -> Result<Array1<f64>, Error> {
        let noise = match &self.response {
            Response::Regression { noise, .. } => noise,
            Response::Classes(_) => return Ok(Array1::zeros(x.nrows())),
        };
        match noise {
            Noise::Poisson => {
                let f = self.truth_at(x)?;
                if let Some((i, v)) = f
                    .iter()
                    .enumerate()
                    .find(|(_, v)| !(v.is_finite() && **v > 0.0))
                {
                    let Response::Regression { truth, .. } = &self.response else {
                        unreachable!("matched a regression above")
                    };
                    let row: Vec<f64> = x.row(i).to_vec();
                    return Err(Error::Data(format!(
                        "key `data.truth`: `{}` gives {v} at {}, but with `poisson = true` the truth is the mean count and must be > 0",
                        crate::fmt::clip(&truth.describe(), 80),
                        describe_row(&self.inputs, &row)
                    )));
                }
                Ok(f.mapv(f64::sqrt))
            }
            Noise::Constant(s) => Ok(Array1::from_elem(x.nrows(), *s)),
            Noise::Reference(r) => Ok(r.sd_at_rows(x)),
            Noise::Formula(f) => {
                let mut out = Array1::zeros(x.nrows());
                let mut buf = vec![0.0; x.ncols()];
                for (i, row) in x.rows().into_iter().enumerate() {
                    copy_row(row, &mut buf);
                    let v = f.eval(&buf);
                    if !v.is_finite() || v < 0.0 {
                        return Err(Error::Data(format!(
                            "key `data.noise.sd_formula`: `{}` gives {v} at {} (must be a finite number >= 0)",
                            crate::fmt::clip(f.source(), 80),
                            describe_row(&self.inputs, &buf)
                        )));
                    }
                    out[i] = v;
                }
                Ok(out)
            }
        }
    }
}

fn copy_row(row: ArrayView1<'_, f64>, buf: &mut [f64]) {
    for (b, v) in buf.iter_mut().zip(row.iter()) {
        *b = *v;
    }
}

/// Draws one label per row from the class probabilities (`n × K`) by inverse CDF with one
/// uniform draw per row, in row order. Labels are class indices stored as `f64`.
pub fn draw_labels<R: Rng + ?Sized>(probs: &Array2<f64>, rng: &mut R) -> Array1<f64> {
    let k = probs.ncols();
    let mut y = Array1::zeros(probs.nrows());
    for (i, row) in probs.rows().into_iter().enumerate() {
        let u: f64 = rng.gen();
        let mut acc = 0.0;
        let mut label = k - 1;
        for (c, p) in row.iter().enumerate() {
            acc += p;
            if u < acc {
                label = c;
                break;
            }
        }
        y[i] = label as f64;
    }
    y
}

impl Synthetic {
    /// Responses at rows with truth `f` and noise sd `sd` (from [`Synthetic::sd_at`]): Poisson
    /// counts with mean `f` for [`Noise::Poisson`] ([`draw_counts`]), else `f` plus Gaussian
    /// noise ([`add_noise`]) or noise of the process's [`NoiseShape`] ([`add_shaped_noise`]).
    pub fn respond<R: Rng + ?Sized>(
        &self,
        f: &Array1<f64>,
        sd: &Array1<f64>,
        rng: &mut R,
    ) -> Array1<f64> {
        match &self.response {
            Response::Regression {
                noise: Noise::Poisson,
                ..
            } => draw_counts(f, rng),
            Response::Regression { shape, .. } if *shape != NoiseShape::Gaussian => {
                add_shaped_noise(f, sd, shape, rng)
            }
            _ => add_noise(f, sd, rng),
        }
    }
}

/// Means below this are drawn by inversion as 0 or 1 ([`draw_counts`]).
pub const TINY_POISSON_MEAN: f64 = 1e-12;

/// Draws one Poisson count per mean, `y_i ~ Poisson(λ_i)`, from `rng` in index order (the
/// sampler of `rand_distr`; a mean that is not a finite number > 0 gives 0, but the plan has
/// refused such a truth through [`Synthetic::sd_at`]). Below [`TINY_POISSON_MEAN`] that sampler
/// returns −1 once `exp(−λ)` rounds to 1 (measured at λ = 1e-17), so such a mean is drawn by
/// inversion: 1 with probability `1 − exp(−λ)`, else 0 (a count of 2 or more has probability
/// below λ²/2 < 1e-24 there).
pub fn draw_counts<R: Rng + ?Sized>(lambda: &Array1<f64>, rng: &mut R) -> Array1<f64> {
    lambda.mapv(|l| {
        if l > 0.0 && l < TINY_POISSON_MEAN {
            let u: f64 = rng.gen();
            return if u < -(-l).exp_m1() { 1.0 } else { 0.0 };
        }
        match rand_distr::Poisson::new(l) {
            Ok(d) => d.sample(rng),
            Err(_) => 0.0,
        }
    })
}

/// Adds Gaussian noise: `y_i = f_i + σ_i z_i` with z drawn from `rng` in index order.
pub fn add_noise<R: Rng + ?Sized>(f: &Array1<f64>, sd: &Array1<f64>, rng: &mut R) -> Array1<f64> {
    let mut y = f.clone();
    for (yi, s) in y.iter_mut().zip(sd.iter()) {
        let z: f64 = StandardNormal.sample(rng);
        *yi += s * z;
    }
    y
}

/// Adds noise of shape `shape`: `y_i = f_i + σ_i z_i` with z drawn from `rng` in index order
/// ([`add_noise`] draws the same Gaussian stream).
pub fn add_shaped_noise<R: Rng + ?Sized>(
    f: &Array1<f64>,
    sd: &Array1<f64>,
    shape: &NoiseShape,
    rng: &mut R,
) -> Array1<f64> {
    let mut y = f.clone();
    for (yi, s) in y.iter_mut().zip(sd.iter()) {
        *yi += s * shape.draw(rng);
    }
    y
}

/// The quantile at which [`Synthetic::probe`] holds the other inputs while it moves one to
/// its far quantiles: off the middle (an arbitrary value, no source), where a symmetric law's
/// median would be exactly 0.
const OTHERS_QUANTILE: f64 = 0.5377;

/// Inputs up to which [`Synthetic::probe`] also moves each input alone to its far quantiles
/// (2p rows of p values: about 2 million values at this bound).
const EXTREME_EACH_MAX: usize = 1000;

/// The standard normal quantile at `q` in (0, 1), by bisection on [`normal_cdf`] (its relative
/// error below 1.2e-7 in the tails moves the quantile by less than 1e-6 there).
///
/// [`normal_cdf`]: crate::decompose::zero_one::normal_cdf
fn normal_quantile(q: f64) -> f64 {
    let upper = q > 0.5;
    // Φ(−z) = q for the lower tail; the upper by symmetry.
    let tail = if upper { 1.0 - q } else { q };
    let (mut a, mut b) = (0.0_f64, 40.0_f64);
    for _ in 0..100 {
        let z = 0.5 * (a + b);
        if crate::decompose::zero_one::normal_cdf(-z) > tail {
            a = z;
        } else {
            b = z;
        }
    }
    let z = 0.5 * (a + b);
    if upper {
        z
    } else {
        -z
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn normal_quantiles_match_tabulated_values() {
        // Standard normal quantiles as tabulated (Abramowitz and Stegun 1964, table 26.5;
        // from memory): 1.959964 at 0.975, 3.090232 at 0.999, 4.753424 at 1 − 1e-6.
        for (q, z) in [(0.975, 1.959964), (0.999, 3.090232), (1.0 - 1e-6, 4.753424)] {
            assert!((super::normal_quantile(q) - z).abs() < 1e-5, "{q}");
            assert!((super::normal_quantile(1.0 - q) + z).abs() < 1e-5, "{q}");
        }
        assert!(super::normal_quantile(0.5).abs() < 1e-6);
    }

    #[test]
    fn tiny_poisson_means_give_counts_never_minus_one() {
        use rand::SeedableRng;
        let lambda = ndarray::Array1::from(vec![1e-17, 1e-300, 5e-13, 1e-12, 0.5]);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        for _ in 0..2000 {
            let y = super::draw_counts(&lambda, &mut rng);
            assert!(y.iter().all(|v| *v >= 0.0 && v.fract() == 0.0), "{y}");
            assert_eq!(
                y[0] + y[1],
                0.0,
                "a count at a mean of 1e-17 is 0 but for 1e-17 odds"
            );
        }
    }

    use super::*;

    #[test]
    fn friedman1_at_known_points() {
        // Friedman (1991), Annals of Statistics 19:1-67, test function 1, evaluated by hand:
        // at x = (0.5, 0.5, 0.5, 0.5, 0.5): 10 sin(pi/4) + 0 + 5 + 2.5.
        let v = Builtin::Friedman1.eval(&[0.5; 10]);
        let expect = 10.0 * (std::f64::consts::PI / 4.0).sin() + 7.5;
        assert!((v - expect).abs() < 1e-12);
    }

    #[test]
    fn even_inputs_are_evenly_spaced() {
        let s = Synthetic {
            inputs: vec![Input {
                name: "t".into(),
                dist: InputDist::Even(0.0, 1.0),
            }],
            response: Response::Regression {
                truth: Truth::Builtin(Builtin::Friedman1),
                noise: Noise::Constant(1.0),
                shape: NoiseShape::Gaussian,
            },
        };
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(1);
        let x = s.draw_inputs(5, &mut rng);
        assert_eq!(x.column(0).to_vec(), vec![0.0, 0.25, 0.5, 0.75, 1.0]);
    }

    use rand::SeedableRng;
}
