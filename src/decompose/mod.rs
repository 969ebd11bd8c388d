//! Pure arithmetic of the decompositions: one accumulator skeleton ([`Acc`]: push, merge, fold
//! over blocks, delete-a-block jackknife with shared prefixes) and one [`Loss`] trait that each
//! loss implements in a file of its own, with a description of its terms ([`TermInfo`]) from
//! which every output (terminal table, JSON, CSV, `check`, plots, HTML) is derived. No I/O, no
//! randomness, no errors: everything here is a function of the predictions handed in.
//!
//! Losses: `squared` ([`squared`]), `zero_one` ([`zero_one`]), `log` (Heskes 1998, [`log_loss`]),
//! `brier` ([`brier`]) and `poisson` (deviance as a Bregman divergence, Pfau 2013, [`poisson`]).
//!
//! Squared loss (Hastie, Tibshirani, Friedman, *The Elements of Statistical Learning*, 2nd ed.,
//! §7.3, eq. 7.9): `E[(Y - f̂(x))²] = σ²(x) + bias²(x) + variance(x)`. Over R replicate
//! predictions ŷ_r with mean m, the unbiased variance is `V̂ = Σ(ŷ_r - m)²/(R-1)` and the unbiased
//! squared bias is `B̂² = (m - f)² - V̂/R` (the plain `(m - f)²` is biased up by V/R). The exact
//! identity `(1/R) Σ (ŷ_r - f)² = B̂² + V̂` holds to rounding.
//!
//! # Evaluation points and counts
//!
//! An accumulator covers `grid × points` cells. A replicate either evaluates every point
//! (synthetic and twin sources: the evaluation points are fixed) or only some of them (a table's
//! out-of-bag rows); [`Acc::count`] keeps, per point, the number of replicates that evaluated it.
//! Averages over points use the points evaluated at least twice, each with the same weight.

pub mod brier;
pub mod log_loss;
pub mod poisson;
pub mod squared;
pub mod zero_one;

use ndarray::{ArrayView3, ArrayView4};

use crate::family::Task;

/// The shape of one accumulator.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shape {
    /// Grid values.
    pub grid: usize,
    /// Evaluation points (a table's working rows).
    pub points: usize,
    /// Classes (0 for regression).
    pub classes: usize,
    /// Fits per replicate training set (`fit_seeds`, at least 1).
    pub fits: usize,
    /// `true` when every replicate evaluates every point (synthetic and twin sources).
    pub all_points: bool,
    /// `true` when the family is an ensemble that reports its diversity.
    pub ensemble: bool,
}

impl Shape {
    /// Cells: grid values × points.
    pub fn cells(&self) -> usize {
        self.grid * self.points
    }
}

/// Whether an array holds floats or counts.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// `f64` values (sums, means, centred sums of squares).
    Float,
    /// `u32` counts (votes).
    Count,
}

/// One array of an accumulator, as a loss lays it out.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ArraySpec {
    /// Name (used in part files).
    pub name: &'static str,
    /// Floats or counts.
    pub kind: Kind,
    /// Length.
    pub len: usize,
    /// Values must be non-negative (sums of squares, counts): checked when a part is loaded.
    pub non_negative: bool,
}

/// One block's accumulator: the replicates absorbed, per-point counts, and the arrays the loss
/// defines (floats and counts, in the order of [`Loss::layout`]). Memory is independent of the
/// number of replicates.
#[derive(Debug, Clone, PartialEq)]
pub struct Acc {
    /// Shape.
    pub shape: Shape,
    /// Replicates absorbed.
    pub replicates: u64,
    /// Per evaluation point: replicates that evaluated it.
    pub count: Vec<u64>,
    /// Float arrays, in layout order.
    pub floats: Vec<Vec<f64>>,
    /// Count arrays, in layout order.
    pub counts: Vec<Vec<u32>>,
}

/// One replicate's predictions at the points it evaluates, handed to [`Loss::push`].
#[derive(Debug, Clone, Copy)]
pub struct Batch<'a> {
    /// The evaluated point indices (`None`: every point, in order).
    pub held: Option<&'a [usize]>,
    /// `values[[s, g, j]]`: fit `s`, grid value `g`, `j`-th evaluated point (real predictions or
    /// class indices).
    pub values: ArrayView3<'a, f64>,
    /// `probs[[s, g, j, c]]` when the loss uses class probabilities.
    pub probs: Option<ArrayView4<'a, f64>>,
    /// `diversity[[s, g, j]]` for ensembles.
    pub diversity: Option<ArrayView3<'a, f64>>,
    /// The response seen at each evaluated point for the direct check: a fresh draw (synthetic)
    /// or the observed value (table).
    pub response: &'a [f64],
}

impl Batch<'_> {
    /// Index of the `j`-th evaluated point.
    #[inline]
    pub fn point(&self, j: usize) -> usize {
        match self.held {
            Some(h) => h[j],
            None => j,
        }
    }

    /// Number of evaluated points.
    pub fn len(&self) -> usize {
        self.values.dim().2
    }

    /// `true` when no point is evaluated.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// What the truth is at the evaluation points.
#[derive(Debug, Clone, Copy)]
pub enum Target<'a> {
    /// Synthetic and twin sources: the truth is known.
    Known {
        /// f(x) per point (regression); the Bayes class index (classification).
        truth: &'a [f64],
        /// σ²(x) per point (0 for classification).
        noise_var: &'a [f64],
        /// Class probabilities per point, row-major `points × K` (classification).
        probs: Option<&'a [f64]>,
    },
    /// A table: only the observed response at each point (noise folded into the bias).
    Observed {
        /// Observed response (class index when classifying) per point.
        y: &'a [f64],
        /// A noise-variance estimate (value, standard error) to split `bias² + noise`.
        noise: Option<(f64, f64)>,
    },
}

impl Target<'_> {
    /// `true` for a table's observed responses.
    pub fn observed(&self) -> bool {
        matches!(self, Target::Observed { .. })
    }
}

/// The part a term plays in the decomposition (plots and readings use it).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Role {
    /// The expected loss itself.
    Loss,
    /// A bias-type term (bias², Domingos bias, systematic effect).
    Bias,
    /// A variance-type term.
    Variance,
    /// The noise (irreducible) term.
    Noise,
    /// An independent cross-check of the expected loss.
    Direct,
    /// Anything else (a sub-term, a combined term, a diagnostic).
    Other,
}

/// Which view of the terminal table shows a term.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Group {
    /// The main view (every loss).
    Main,
    /// Kohavi–Wolpert (0-1 loss).
    KohaviWolpert,
    /// James (0-1 loss).
    James,
    /// Only in the JSON/CSV (and `--decomposition all`).
    Detail,
}

/// The description of one term: everything the outputs need to show it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TermInfo {
    /// JSON key; dotted for a nested field (`kohavi_wolpert.bias_sq`).
    pub key: &'static str,
    /// Column header.
    pub label: &'static str,
    /// One-line meaning (legend, report).
    pub meaning: &'static str,
    /// Its part in the decomposition.
    pub role: Role,
    /// Where the terminal table shows it.
    pub group: Group,
    /// `true` for an estimate (a table's noise and the bias² derived from it); `false` for a
    /// term known exactly or estimated from the replicates alone.
    pub estimated: bool,
    /// Whether a standard error is reported.
    pub stderr: bool,
    /// `true` when the term is not a smooth function of the vote shares (it depends on which
    /// class has the most votes, the main prediction): its standard error then comes from a
    /// bootstrap over replicate blocks ([`bootstrap_se`]) instead of the jackknife, which cannot
    /// see the jumps of such a statistic.
    pub bootstrap: bool,
    /// `true` for a count (of evaluation points, say): shown as a whole number.
    pub count: bool,
}

/// A term known exactly or estimated from the replicates alone (`estimated: false`), with a
/// jackknife standard error when `stderr`; the flags `bootstrap` and `count` off.
pub(crate) fn term(
    key: &'static str,
    label: &'static str,
    meaning: &'static str,
    role: Role,
    group: Group,
    stderr: bool,
) -> TermInfo {
    TermInfo {
        key,
        label,
        meaning,
        role,
        group,
        estimated: false,
        stderr,
        bootstrap: false,
        count: false,
    }
}

/// Number of bootstrap draws over replicate blocks behind the standard errors of the terms
/// marked [`TermInfo::bootstrap`] (Monte Carlo error of such a standard error: about
/// `1/√(2·200)` = 5 % relative, a common-practice figure for a bootstrap standard error).
pub const BOOTSTRAP_DRAWS: usize = 200;

/// An exact identity among a loss's terms: `total = Σ coefficient × part`, which holds at every
/// grid value to rounding (tests check it on every run).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Identity {
    /// What the identity is (with its source).
    pub name: &'static str,
    /// The key of the total.
    pub total: &'static str,
    /// The parts and their coefficients.
    pub parts: &'static [(&'static str, f64)],
}

/// Terms of one grid value: values in the order of the description.
pub type Row = Vec<f64>;

/// A loss: its accumulator arithmetic and the description of its terms. One file per loss;
/// registered in [`registry`].
pub trait Loss: Send + Sync {
    /// Name as written in scenario files and results (`squared`, `zero_one`, ...).
    fn name(&self) -> &'static str;

    /// Whether the loss applies to the task.
    fn supports(&self, task: Task) -> bool;

    /// How readings name the bias-type term (`Bias²`, `Bias (Domingos)`).
    fn bias_word(&self) -> &'static str;

    /// The sentence a reading adds on a table (what the bias means there).
    fn observed_note(&self) -> &'static str;

    /// On a table whose noise this loss folds into the bias (`bias+noise`), whether that term
    /// is at least the bias, so that variance above it is above the bias alone (log, Brier,
    /// Poisson: noise + bias in expectation). Not for Domingos' 0-1 terms: where the majority
    /// is wrong the folded term averages p(y*), below that point's bias of 1.
    fn folded_covers_bias(&self) -> bool {
        true
    }

    /// Whether the loss needs class probabilities from the family.
    fn needs_probs(&self) -> bool {
        false
    }

    /// Whether the loss scores non-negative count responses with positive predicted means
    /// (Poisson deviance): the plan then asks for count responses and for a family whose
    /// predictions are never negative ([`crate::family::Caps::positive`]).
    fn count_responses(&self) -> bool {
        false
    }

    /// Checks one prediction beyond what every loss requires (finite values, class indices,
    /// probability vectors), for example that a probability is not 0 where the loss would be
    /// infinite. Called for every prediction from `runner::check_predictions`; the message says
    /// what is wrong and how to fix it (the caller adds family, point and knob value).
    fn check_prediction(&self, _value: f64, _probs: Option<&[f64]>) -> Result<(), String> {
        Ok(())
    }

    /// Whether [`Loss::check_prediction`] checks anything (the engine skips the per-prediction
    /// call otherwise). Default: no.
    fn checks_predictions(&self) -> bool {
        false
    }

    /// The arrays of an accumulator of this shape (counts per point are kept by [`Acc`]).
    fn layout(&self, shape: &Shape) -> Vec<ArraySpec>;

    /// Absorbs one replicate. [`Acc::push`] has already incremented `replicates` and the counts
    /// of the evaluated points.
    fn push(&self, acc: &mut Acc, batch: &Batch<'_>);

    /// Merges `other` (the next block) into `acc`; both have replicates, and `acc.count`,
    /// `other.count` are the counts before merging.
    fn merge(&self, acc: &mut Acc, other: &Acc);

    /// The terms, in order; depends on the target kind and the shape.
    fn describe(&self, shape: &Shape, observed: bool) -> Vec<TermInfo>;

    /// The exact identities among the terms of this shape and target kind.
    fn identities(&self, shape: &Shape, observed: bool) -> Vec<Identity>;

    /// The terms per grid value from a folded accumulator, in the order of
    /// [`Loss::describe`]; NaN where a term cannot be computed.
    fn evaluate(&self, acc: &Acc, target: &Target<'_>) -> Vec<Row>;

    /// Per point, the first `terms` terms of `acc` at that point alone, written flat into `out`
    /// (`points × grid × terms`, point-major): bit for bit what [`Loss::evaluate`] gives on the
    /// accumulator restricted to each point, which is what the default computes. Called once per
    /// delete-a-block fold of an all-points run, so a loss may override it with a direct
    /// computation that allocates nothing per point.
    fn per_point(&self, acc: &Acc, target: &Target<'_>, terms: usize, out: &mut Vec<f64>) {
        per_point_generic(self, acc, target, terms, out);
    }

    /// The loss of one prediction against an observed response (the selection audit's
    /// cross-validation loss): `value` is a real prediction or class index, `probs` the class
    /// probabilities when the loss uses them.
    fn observed_loss(&self, value: f64, probs: Option<&[f64]>, y: f64) -> f64;

    /// Checks a decoded accumulator beyond array lengths and finiteness (for example that vote
    /// counts add up to the replicates). Default: nothing more.
    fn validate(&self, _acc: &Acc) -> Result<(), String> {
        Ok(())
    }

    /// Adjusts the standard errors after the jackknife (for example, adds the uncertainty of a
    /// noise estimate). Default: nothing.
    fn adjust_stderr(&self, _shape: &Shape, _target: &Target<'_>, _se: &mut [Row]) {}

    /// Adds to the jackknife's standard errors what it cannot see in the replicate blocks
    /// `blocks` (folded into `total`): for a term quadratic in the mean prediction, the
    /// second-order part of its sampling error. Default: nothing.
    fn second_order_stderr(
        &self,
        _blocks: &[&Acc],
        _total: &Acc,
        _target: &Target<'_>,
        _se: &mut [Row],
    ) {
    }

    /// Per-point columns for the per-point CSV: name, and whether the value is a class index to
    /// be written as its label.
    fn point_columns(&self, shape: &Shape, observed: bool) -> Vec<(&'static str, bool)>;

    /// The range term `key` cannot leave by its definition (a share of disagreeing votes lies
    /// in [0, 1]): its reported interval stops at these bounds where widening it to ± 2 SE
    /// would cross them (default: unbounded).
    fn bounds(&self, _key: &str) -> (f64, f64) {
        (f64::NEG_INFINITY, f64::INFINITY)
    }

    /// The terms that are never below 0 in any run, table sources included: means of squares,
    /// unbiased variances and divergences (an unbiased squared bias, `(m − f)² − V̂/R`, can be).
    /// Default: none.
    fn nonnegative_terms(&self) -> &'static [&'static str] {
        &[]
    }

    /// The range a reported term's value cannot leave in any run, which `check` holds edited
    /// result documents to. Default: `[0, ∞)` for [`Loss::nonnegative_terms`], else
    /// [`Loss::bounds`].
    fn range(&self, key: &str) -> (f64, f64) {
        if self.nonnegative_terms().contains(&key) {
            (0.0, f64::INFINITY)
        } else {
            self.bounds(key)
        }
    }

    /// Absolute rounding, in the loss's own units, that `check` allows a row's identities,
    /// ranges and comparisons beyond their relative tolerance. Default 1e-12: losses whose terms
    /// are differences of logarithms of order one (log-loss, Poisson deviance) or of shares carry
    /// about 1e-16 of absolute rounding however small the row's expected loss (a
    /// near-deterministic fit's expected log-loss of 5.4e-13 had parts adding up to 5.405e-13).
    /// The squared loss, in the response's own units, takes 0 (relative only).
    fn identity_floor(&self) -> f64 {
        1e-12
    }

    /// Whether the standard error of term `key` adds a part to the jackknife of its
    /// leave-one-block-out values ([`Loss::second_order_stderr`], [`Loss::adjust_stderr`]);
    /// every other jackknifed term's standard error is that jackknife exactly, which `check`
    /// holds documents to. Default: none.
    fn stderr_beyond_jackknife(&self, _key: &str) -> bool {
        false
    }

    /// The largest noise term `classes` classes allow: the noise of equal shares, where every
    /// class is as likely as the others (1 − 1/K for the 0-1 and Brier losses, ln K for the
    /// log-loss; textbook maxima of the Gini impurity and the entropy). `check` refuses a noise
    /// beyond it. Default: no bound (real responses, counts).
    fn noise_max(&self, _classes: usize) -> f64 {
        f64::INFINITY
    }

    /// Per-point values at grid value `g`, point `e` (same order as [`Loss::point_columns`]);
    /// label columns are written as class indices.
    fn point_values(&self, acc: &Acc, target: &Target<'_>, g: usize, e: usize) -> Vec<f64>;

    /// A sentence the reading adds about a finished decomposition (for example, how many points
    /// have an unstable main prediction at the best grid value `best`, whose knob reads
    /// `value`). Default: none.
    fn reading_note(
        &self,
        _s: &Summary,
        _knob: &str,
        _value: &str,
        _best: usize,
    ) -> Option<String> {
        None
    }
}

/// Means of squares and unbiased variances of the squared and Brier losses
/// ([`Loss::nonnegative_terms`]).
pub const MEAN_SQUARE_TERMS: [&str; 6] = [
    "expected_loss",
    "expected_loss_direct",
    "variance",
    "diversity",
    "member_variance",
    "member_loss",
];

/// Divergences of the log-loss and the Poisson deviance ([`Loss::nonnegative_terms`]).
pub const DIVERGENCE_TERMS: [&str; 4] =
    ["expected_loss", "expected_loss_direct", "variance", "bias"];

/// The built-in losses.
pub fn registry() -> Vec<&'static dyn Loss> {
    vec![
        &squared::Squared,
        &zero_one::ZeroOne,
        &log_loss::LogLoss,
        &brier::Brier,
        &poisson::Poisson,
    ]
}

/// The loss of a name.
pub fn by_name(name: &str) -> Option<&'static dyn Loss> {
    registry().into_iter().find(|l| l.name() == name)
}

impl Acc {
    /// An empty accumulator of `loss` for `shape`.
    pub fn new(loss: &dyn Loss, shape: Shape) -> Acc {
        let mut floats = Vec::new();
        let mut counts = Vec::new();
        for a in loss.layout(&shape) {
            match a.kind {
                Kind::Float => floats.push(vec![0.0; a.len]),
                Kind::Count => counts.push(vec![0; a.len]),
            }
        }
        Acc {
            shape,
            replicates: 0,
            count: vec![0; shape.points],
            floats,
            counts,
        }
    }

    /// Absorbs one replicate (see [`Batch`]).
    pub fn push(&mut self, loss: &dyn Loss, batch: &Batch<'_>) {
        self.replicates += 1;
        match batch.held {
            Some(h) => h.iter().for_each(|&i| self.count[i] += 1),
            None => self.count.iter_mut().for_each(|c| *c += 1),
        }
        loss.push(self, batch);
    }

    /// Merges `other` (the next block) into `self`; merge in block order for bit-identical
    /// results.
    pub fn merge(&mut self, loss: &dyn Loss, other: &Acc) {
        if other.replicates == 0 {
            return;
        }
        if self.replicates == 0 {
            *self = other.clone();
            return;
        }
        loss.merge(self, other);
        for (a, b) in self.count.iter_mut().zip(&other.count) {
            *a += b;
        }
        self.replicates += other.replicates;
    }

    /// Folds accumulators in the order given. `None` for an empty list.
    pub fn fold<'a>(loss: &dyn Loss, parts: impl IntoIterator<Item = &'a Acc>) -> Option<Acc> {
        let mut out: Option<Acc> = None;
        for p in parts {
            match &mut out {
                None => out = Some(p.clone()),
                Some(o) => o.merge(loss, p),
            }
        }
        out
    }

    /// Points evaluated in at least two replicates (the ones averages use).
    pub fn used_points(&self) -> usize {
        self.count.iter().filter(|&&c| c >= 2).count()
    }

    /// Checks a decoded accumulator: array lengths, finite non-negative values where the layout
    /// asks, counts no larger than the replicates. The message names the array.
    pub fn validate(&self, loss: &dyn Loss) -> Result<(), String> {
        let layout = loss.layout(&self.shape);
        let (mut fi, mut ci) = (0, 0);
        if self.count.len() != self.shape.points {
            return Err(format!(
                "count: expected {} values, found {}",
                self.shape.points,
                self.count.len()
            ));
        }
        if let Some(c) = self.count.iter().find(|&&c| c > self.replicates) {
            return Err(format!(
                "count: a point counts {c} replicates, more than the block's {}",
                self.replicates
            ));
        }
        if self.shape.all_points && self.count.iter().any(|&c| c != self.replicates) {
            return Err("count: every point must count every replicate".into());
        }
        for a in layout {
            match a.kind {
                Kind::Float => {
                    let v = self
                        .floats
                        .get(fi)
                        .ok_or_else(|| format!("{}: missing", a.name))?;
                    fi += 1;
                    if v.len() != a.len {
                        return Err(format!(
                            "{}: expected {} values, found {}",
                            a.name,
                            a.len,
                            v.len()
                        ));
                    }
                    if let Some((i, x)) = v.iter().enumerate().find(|(_, x)| !x.is_finite()) {
                        return Err(format!("{}: value {i} is {x}, not a finite number", a.name));
                    }
                    if a.non_negative {
                        if let Some((i, x)) = v.iter().enumerate().find(|(_, x)| **x < 0.0) {
                            return Err(format!(
                                "{}: value {i} is {x}, but a sum of squares cannot be negative",
                                a.name
                            ));
                        }
                    }
                }
                Kind::Count => {
                    let v = self
                        .counts
                        .get(ci)
                        .ok_or_else(|| format!("{}: missing", a.name))?;
                    ci += 1;
                    if v.len() != a.len {
                        return Err(format!(
                            "{}: expected {} values, found {}",
                            a.name,
                            a.len,
                            v.len()
                        ));
                    }
                }
            }
        }
        if fi != self.floats.len() || ci != self.counts.len() {
            return Err("more arrays than the loss defines".into());
        }
        Ok(())
    }
}

/// An unbiased estimate of `tr(C²)`, where `C` is the covariance of one replicate's values
/// across the evaluation points, from the blocks' mean values: `means[b]` holds block `b`'s
/// means over its `sizes[b]` replicates (every block evaluates every point) and `centre` the
/// means over all blocks. With `x_b = √n_b (m_b − m)` and `S = Σ_b x_b x_bᵀ / N` (`N` = blocks −
/// 1 degrees of freedom), `N² / ((N − 1)(N + 2)) · (tr S² − (tr S)² / N)` is unbiased for
/// `tr C²` under normality (Srivastava 2005, *Journal of the Japan Statistical Society* 35:
/// 251–272, from memory); it is computed from the blocks' Gram matrix, `tr S² = ‖G‖²/N²`,
/// `tr S = tr G / N`. `None` with fewer than 3 blocks (N − 1 = 0).
pub fn trace_cov_squared(means: &[&[f64]], sizes: &[f64], centre: &[f64]) -> Option<f64> {
    let b = means.len();
    if b < 3 || sizes.len() != b {
        return None;
    }
    let mut gram = Gram::new(sizes);
    gram.add(means, centre);
    gram.trace_cov_squared()
}

/// The blocks' Gram matrix of [`trace_cov_squared`] (`G_ij = Σ_e x_ie x_je`, upper triangle),
/// accumulated over the evaluation points a slice at a time: the per-block vectors of 250
/// classes × 2000 points were read whole for every block, and twice (256 MB for 32 blocks, the
/// largest allocation of such a run and not in its memory estimate). Every `G_ij` adds its
/// products in point order, as a sum over the whole vectors does: the same bits.
struct Gram {
    weights: Vec<f64>,
    g: Vec<f64>,
    x: Vec<f64>,
}

impl Gram {
    fn new(sizes: &[f64]) -> Gram {
        let b = sizes.len();
        Gram {
            weights: sizes.iter().map(|n| n.sqrt()).collect(),
            g: vec![0.0; b * b],
            x: Vec::new(),
        }
    }

    /// Adds the points of one slice: block `i`'s means `means[i]` and the overall `centre`.
    fn add(&mut self, means: &[&[f64]], centre: &[f64]) {
        let b = self.weights.len();
        let len = centre.len();
        // Point-major: x[e·b + i] = √n_i (m_ie − c_e).
        self.x.clear();
        self.x.resize(len * b, 0.0);
        for (i, (m, w)) in means.iter().zip(&self.weights).enumerate() {
            for (e, (a, c)) in m.iter().zip(centre).enumerate() {
                self.x[e * b + i] = w * (a - c);
            }
        }
        for xe in self.x.chunks_exact(b) {
            for i in 0..b {
                let row = &mut self.g[i * b..(i + 1) * b];
                for j in i..b {
                    row[j] += xe[i] * xe[j];
                }
            }
        }
    }

    /// `tr C²` from the accumulated matrix (see [`trace_cov_squared`]).
    fn trace_cov_squared(&self) -> Option<f64> {
        let b = self.weights.len();
        if b < 3 {
            return None;
        }
        let mut frob = 0.0;
        let mut trace = 0.0;
        for i in 0..b {
            for j in i..b {
                let g = self.g[i * b + j];
                if i == j {
                    trace += g;
                    frob += g * g;
                } else {
                    frob += 2.0 * g * g;
                }
            }
        }
        let n = (b - 1) as f64;
        let ts2 = frob / (n * n);
        let ts = trace / n;
        let est = n * n / ((n - 1.0) * (n + 2.0)) * (ts2 - ts * ts / n);
        est.is_finite().then_some(est.max(0.0))
    }
}

/// Points per slice of [`Gram::add`] in [`add_second_order`].
const GRAM_SLICE: usize = 4096;

/// The variance of the second-order part of a term `scale · mean_e Σ_c d²_{e,c}` (minus its
/// finite-R correction), where `d` are the errors of the mean over all replicates of the
/// per-replicate vectors (`points` evaluation points, `R` = `replicates` in all):
/// `2 scale² tr(C²) / (points² R²)` for Gaussian errors, with `tr C²` from the blocks' means
/// ([`trace_cov_squared`]); `None` when not finite.
fn second_order_var(tr: f64, points: usize, replicates: f64, scale: f64) -> Option<f64> {
    let e = points as f64;
    let v = 2.0 * scale * scale * tr / (e * e * replicates * replicates);
    v.is_finite().then_some(v)
}

/// Where [`add_second_order`] reads the per-block mean vectors: a float array of means, a
/// count array turned into shares of the block's replicates (vote shares), or a float array of
/// sums over every fit turned into means and weighted cell by cell.
#[derive(Debug, Clone, Copy)]
pub enum BlockMeans<'w> {
    /// `floats[i]`, already means.
    Floats(usize),
    /// `counts[i] / replicates`.
    Shares(usize),
    /// `w_c · floats[i][c] / (replicates × fits)` for every cell `c` (grid × points): the mean
    /// over the fits of a per-fit sum, times the square root of the cell's weight in a weighted
    /// quadratic form `mean_e ω_e d_e²` (`w_c = √ω_c`; the Poisson bias, whose weights are the
    /// central predictions), so that `tr((Ω^½ C Ω^½)²)` is estimated as `tr C²` is.
    WeightedSums(usize, &'w [f64]),
}

impl BlockMeans<'_> {
    fn read<'a>(self, a: &'a Acc, cells: std::ops::Range<usize>) -> std::borrow::Cow<'a, [f64]> {
        match self {
            BlockMeans::Floats(i) => std::borrow::Cow::Borrowed(&a.floats[i][cells]),
            BlockMeans::Shares(i) => {
                let n = a.replicates.max(1) as f64;
                a.counts[i][cells].iter().map(|&c| c as f64 / n).collect()
            }
            BlockMeans::WeightedSums(i, w) => {
                let n = (a.replicates.max(1) * a.shape.fits.max(1) as u64) as f64;
                a.floats[i][cells.clone()]
                    .iter()
                    .zip(&w[cells])
                    .map(|(s, w)| w * (s / n))
                    .collect()
            }
        }
    }
}

/// Adds to the standard error of each term of `keys` (of `loss`, at every grid value; terms
/// whose quadratic parts are the same form, so one variance serves them all) the second-order
/// variance of `second_order_var`: the term is `scale` times a mean over the points of
/// squared errors of per-replicate vectors, `width` values per grid value (the points, or
/// points × classes), whose block means `means` holds (a weighted mean of squared errors,
/// `mean_e ω_e d_e²`, reads its vectors scaled by `√ω_e`: [`BlockMeans::WeightedSums`]). Only
/// with a known truth and every point evaluated by every block (synthetic and twin sources); a
/// standard error that is not finite stays as it is.
#[allow(clippy::too_many_arguments)]
pub fn add_second_order(
    loss: &dyn Loss,
    keys: &[&str],
    blocks: &[&Acc],
    total: &Acc,
    target: &Target<'_>,
    se: &mut [Row],
    scale: f64,
    width: usize,
    means: BlockMeans<'_>,
) {
    let sh = total.shape;
    if target.observed() || !sh.all_points || sh.points == 0 {
        return;
    }
    let described = loss.describe(&sh, false);
    let columns: Vec<usize> = keys
        .iter()
        .filter_map(|k| described.iter().position(|i| i.key == *k))
        .collect();
    if columns.is_empty() {
        return;
    }
    let sizes: Vec<f64> = blocks.iter().map(|a| a.replicates as f64).collect();
    for (g, row) in se.iter_mut().enumerate() {
        let mut gram = Gram::new(&sizes);
        let mut at = g * width;
        while at < (g + 1) * width {
            let cells = at..(at + GRAM_SLICE).min((g + 1) * width);
            let per_block: Vec<std::borrow::Cow<'_, [f64]>> = blocks
                .iter()
                .map(|a| means.read(a, cells.clone()))
                .collect();
            let slices: Vec<&[f64]> = per_block.iter().map(|c| c.as_ref()).collect();
            gram.add(&slices, &means.read(total, cells.clone()));
            at = cells.end;
        }
        let var = gram
            .trace_cov_squared()
            .and_then(|tr| second_order_var(tr, sh.points, total.replicates as f64, scale));
        if let Some(v) = var {
            for &t in &columns {
                if row[t].is_finite() {
                    row[t] = (row[t] * row[t] + v).sqrt();
                }
            }
        }
    }
}

/// Delete-one-group jackknife standard error: `sqrt((G-1)/G Σ (θ_(g) - θ̄)²)` (Efron and Tibshirani,
/// *An Introduction to the Bootstrap*, 1993, eq. 11.5, applied to groups of replicates).
pub fn jackknife_se(leave_out: &[f64]) -> f64 {
    let g = leave_out.len();
    if g < 2 || leave_out.iter().any(|x| !x.is_finite()) {
        return f64::NAN;
    }
    let gf = g as f64;
    let mean = leave_out.iter().sum::<f64>() / gf;
    let ss: f64 = leave_out.iter().map(|x| (x - mean) * (x - mean)).sum();
    if !(mean.is_finite() && ss.is_finite()) {
        // Finite values whose sum or squared deviations overflow (terms beyond ~1e154): the
        // same formula on the values divided by their largest magnitude, scaled back (+inf only
        // when the standard error itself is beyond the float range).
        let scale = max_abs(leave_out);
        let scaled: Vec<f64> = leave_out.iter().map(|x| x / scale).collect();
        return scale * jackknife_se(&scaled);
    }
    let se = ((gf - 1.0) / gf * ss).sqrt();
    // A statistic that is the same in every block-deleted set (a share that no block moves)
    // differs across them only by rounding: report 0 rather than ~1e-16 of round-off.
    if se <= 1e-12 * mean.abs() {
        0.0
    } else {
        se
    }
}

/// The largest magnitude of finite values (the scale of the overflow-safe standard errors).
fn max_abs(v: &[f64]) -> f64 {
    v.iter().fold(0.0_f64, |a, x| a.max(x.abs()))
}

/// Bootstrap standard error from the terms of bootstrap draws over `blocks` replicate blocks:
/// the standard deviation of the draws times `√(G/(G−1))`, so that for a mean over blocks it
/// matches the delete-a-block jackknife (the plain bootstrap variance of a mean of G groups is
/// `(G−1)/G` times the usual `s²/G`; Efron and Tibshirani 1993, §11.5 and Problem 11.2 — the
/// factor is from memory). NaN with fewer than two draws or blocks, or a non-finite draw.
pub fn bootstrap_se(draws: &[f64], blocks: usize) -> f64 {
    let n = draws.len();
    if n < 2 || blocks < 2 || draws.iter().any(|x| !x.is_finite()) {
        return f64::NAN;
    }
    let nf = n as f64;
    let mean = draws.iter().sum::<f64>() / nf;
    let ss: f64 = draws.iter().map(|x| (x - mean) * (x - mean)).sum();
    if !(mean.is_finite() && ss.is_finite()) {
        // As in `jackknife_se`: scaled when the sums overflow.
        let scale = max_abs(draws);
        let scaled: Vec<f64> = draws.iter().map(|x| x / scale).collect();
        return scale * bootstrap_se(&scaled, blocks);
    }
    let g = blocks as f64;
    let se = (ss / (nf - 1.0) * g / (g - 1.0)).sqrt();
    if se <= 1e-12 * mean.abs() {
        0.0
    } else {
        se
    }
}

/// Bootstrap percentile interval, nominal 95 % (Efron and Tibshirani 1993, *An Introduction to
/// the Bootstrap*, ch. 13, from memory), from the terms of bootstrap draws over `blocks` replicate
/// blocks. The draws are sorted and the bounds are the order statistics of ranks `k` and `n − k`
/// (counted from 1), with `k = ⌊n/40⌋ = ⌊0.025·n⌋`: for the 200 draws of a run
/// ([`BOOTSTRAP_DRAWS`]) the 5th and the 195th smallest, the rule measured in
/// `docs/zero-one-finite-r.md`. `(NaN, NaN)` with fewer than 40 draws (then `k` would be 0),
/// fewer than two blocks, or a non-finite draw, as for [`bootstrap_se`]. A pure function of the
/// draws (sorted by value), so it does not depend on the order in which they were computed.
pub fn percentile_interval(draws: &[f64], blocks: usize) -> (f64, f64) {
    let n = draws.len();
    let k = n / 40;
    if k == 0 || blocks < 2 || draws.iter().any(|x| !x.is_finite()) {
        return (f64::NAN, f64::NAN);
    }
    let mut v = draws.to_vec();
    v.sort_by(f64::total_cmp);
    (v[k - 1], v[n - k - 1])
}

/// A finished decomposition: the folded accumulator, the terms per grid value, their jackknife
/// standard errors (NaN where not reported or not computable), the bootstrap percentile
/// intervals of the terms marked [`TermInfo::bootstrap`], and the leave-one-block-out terms
/// (blocks × grid × terms) that paired comparisons use.
#[derive(Debug, Clone)]
pub struct Summary {
    /// The terms' description.
    pub terms: Vec<TermInfo>,
    /// Values per grid value.
    pub values: Vec<Row>,
    /// Standard errors per grid value.
    pub stderr: Vec<Row>,
    /// Lower bounds of the 95 % interval per grid value: the bootstrap percentile interval
    /// ([`percentile_interval`], from the same draws as the bootstrap standard errors) widened
    /// to contain the value ± 2 standard errors, but not beyond the range a term cannot leave
    /// ([`Loss::bounds`], 0 and 1 for a share); NaN for the other terms and where it cannot be
    /// computed (no plans, fewer than two blocks, a non-finite draw).
    pub lower: Vec<Row>,
    /// Upper bounds, as [`Summary::lower`].
    pub upper: Vec<Row>,
    /// Terms of each leave-one-block-out fold (empty with fewer than two blocks).
    pub leave_out: Vec<Vec<Row>>,
    /// Per grid value and term, the Monte Carlo share of the variance of the per-point terms
    /// across the evaluation points (see [`point_noise`]); empty unless every replicate
    /// evaluates every point of a known truth and there are at least two blocks.
    pub point_noise: Vec<Row>,
    /// All blocks folded in order.
    pub total: Acc,
}

/// Folds blocks in index order and computes the terms with delete-a-block jackknife standard
/// errors. The leave-one-block-out folds share the fold of the blocks before the deleted one
/// (the same merges in the same order as folding without it, half the work). `None` for an
/// empty block list.
pub fn summarize(loss: &dyn Loss, blocks: &[Acc], target: &Target<'_>) -> Option<Summary> {
    summarize_with(loss, blocks, target, &[])
}

/// [`summarize`], with the terms marked [`TermInfo::bootstrap`] given bootstrap standard errors
/// over `plans` (each the multiplicities of the blocks in one draw, as made by
/// `rng::block_bootstrap`; no randomness is drawn here). A draw folds the blocks in index order,
/// block `b` merged `plan[b]` times, so the result depends only on the blocks and the plans.
/// With no plans (or fewer than two blocks) those terms keep the jackknife.
pub fn summarize_with<A: std::borrow::Borrow<Acc>>(
    loss: &dyn Loss,
    blocks: &[A],
    target: &Target<'_>,
    plans: &[Vec<u32>],
) -> Option<Summary> {
    summarize_par(loss, blocks, target, plans, &Serial)
}

/// Runs independent tasks `0..n`, possibly at the same time. Whatever the width, every task
/// does the same operations on the same numbers, so results never depend on it.
pub trait ParFor: Sync {
    /// How many tasks are worth running at once (1 = one after another).
    fn width(&self) -> usize;
    /// Calls `task(i)` once for every `i < n`, in any order and on any thread.
    fn run(&self, n: usize, task: &(dyn Fn(usize) + Sync));
}

/// Tasks one after another on the calling thread.
pub struct Serial;

impl ParFor for Serial {
    fn width(&self) -> usize {
        1
    }

    fn run(&self, n: usize, task: &(dyn Fn(usize) + Sync)) {
        (0..n).for_each(task);
    }
}

/// [`summarize_with`], with the leave-one-block-out folds and the bootstrap draws run as tasks
/// of `par` (the engine passes its worker pool). The folds are taken `par.width()` at a time:
/// the folds' starting prefixes are made one after another, each task finishes its own fold
/// (the same merges in the same order as alone), and the per-point noise takes the folds in
/// order, so the result is bit for bit the serial one, whatever the width.
pub fn summarize_par<A: std::borrow::Borrow<Acc>>(
    loss: &dyn Loss,
    blocks: &[A],
    target: &Target<'_>,
    plans: &[Vec<u32>],
    par: &dyn ParFor,
) -> Option<Summary> {
    let blocks: Vec<&Acc> = blocks.iter().map(|b| b.borrow()).collect();
    let blocks = &blocks[..];
    let nb = blocks.len();
    let first = *blocks.first()?;
    let terms = loss.describe(&first.shape, target.observed());
    let mut leave_out: Vec<Vec<Row>> = Vec::with_capacity(nb);
    let mut noise = (nb >= 2 && first.shape.all_points && !target.observed())
        .then(|| PointNoise::new(first.shape.points, first.shape.grid, terms.len()));
    let n_terms = terms.len();
    // The fold of the blocks before the current one; after the last block, all of them (the
    // same merges in the same order as `Acc::fold`).
    let mut prefix: Option<Acc> = None;
    let width = par.width().max(1);
    let mut b0 = 0;
    while b0 < nb {
        let b1 = nb.min(b0 + width);
        let mut starts: Vec<std::sync::Mutex<Option<Acc>>> = Vec::with_capacity(b1 - b0);
        for &block in &blocks[b0..b1] {
            starts.push(std::sync::Mutex::new(prefix.clone()));
            match &mut prefix {
                None => prefix = Some(block.clone()),
                Some(o) => o.merge(loss, block),
            }
        }
        if nb >= 2 {
            type Fold = (Vec<Row>, Vec<f64>, Vec<f64>);
            let done: Vec<std::sync::Mutex<Option<Fold>>> =
                (b0..b1).map(|_| std::sync::Mutex::new(None)).collect();
            let with_noise = noise.is_some();
            par.run(b1 - b0, &|j| {
                let b = b0 + j;
                let mut acc = starts[j].lock().unwrap_or_else(|e| e.into_inner()).take();
                for p in &blocks[b + 1..] {
                    match &mut acc {
                        None => acc = Some((*p).clone()),
                        Some(o) => o.merge(loss, p),
                    }
                }
                let acc = acc.expect("at least one block remains");
                let rows = loss.evaluate(&acc, target);
                let (mut flat, mut centre) = (Vec::new(), Vec::new());
                if with_noise {
                    loss.per_point(&acc, target, n_terms, &mut flat);
                    centre = fold_centres(&flat, acc.shape.grid * n_terms);
                }
                *done[j].lock().unwrap_or_else(|e| e.into_inner()) = Some((rows, flat, centre));
            });
            for slot in done {
                let (rows, flat, centre) = slot
                    .into_inner()
                    .unwrap_or_else(|e| e.into_inner())
                    .expect("every fold task ran");
                leave_out.push(rows);
                if let Some(n) = &mut noise {
                    n.push(&flat, &centre, par);
                }
            }
        }
        b0 = b1;
    }
    let total = prefix?;
    let values = loss.evaluate(&total, target);
    let mut stderr: Vec<Row> = (0..total.shape.grid)
        .map(|g| {
            terms
                .iter()
                .enumerate()
                .map(|(t, info)| {
                    if !info.stderr || leave_out.is_empty() {
                        f64::NAN
                    } else {
                        let v: Vec<f64> = leave_out.iter().map(|l| l[g][t]).collect();
                        jackknife_se(&v)
                    }
                })
                .collect()
        })
        .collect();
    let resampled: Vec<usize> = (0..terms.len())
        .filter(|&t| terms[t].stderr && terms[t].bootstrap)
        .collect();
    let mut lower: Vec<Row> = vec![vec![f64::NAN; terms.len()]; total.shape.grid];
    let mut upper = lower.clone();
    if nb >= 2 && plans.len() >= 2 && !resampled.is_empty() {
        let slots: Vec<std::sync::Mutex<Option<Vec<Row>>>> =
            plans.iter().map(|_| std::sync::Mutex::new(None)).collect();
        par.run(plans.len(), &|i| {
            let mut acc: Option<Acc> = None;
            for (b, &times) in blocks.iter().zip(&plans[i]) {
                for _ in 0..times {
                    match &mut acc {
                        None => acc = Some((*b).clone()),
                        Some(o) => o.merge(loss, b),
                    }
                }
            }
            *slots[i].lock().unwrap_or_else(|e| e.into_inner()) =
                acc.map(|a| loss.evaluate(&a, target));
        });
        let draws: Vec<Vec<Row>> = slots
            .into_iter()
            .filter_map(|s| s.into_inner().unwrap_or_else(|e| e.into_inner()))
            .collect();
        for (g, row) in stderr.iter_mut().enumerate() {
            for &t in &resampled {
                let v: Vec<f64> = draws.iter().map(|d| d[g][t]).collect();
                row[t] = bootstrap_se(&v, nb);
                (lower[g][t], upper[g][t]) = percentile_interval(&v, nb);
            }
        }
    }
    if nb >= 2 {
        loss.second_order_stderr(blocks, &total, target, &mut stderr);
    }
    loss.adjust_stderr(&total.shape, target, &mut stderr);
    // The reported interval is the percentile interval widened to cover ± 2 SE: the percentile
    // interval alone covered a small finite-R Domingos bias in 71% of runs where ± 2 SE covered
    // 91% (docs/zero-one-finite-r.md), and ± 2 SE alone under-covers where the draws are skewed.
    for (g, row) in stderr.iter().enumerate() {
        for &t in &resampled {
            let (v, se) = (values[g][t], row[t]);
            if lower[g][t].is_finite() && se.is_finite() {
                lower[g][t] = lower[g][t].min(v - 2.0 * se);
                upper[g][t] = upper[g][t].max(v + 2.0 * se);
                // The truth of a term lies in its range too, so the coverage is the same (it
                // printed `bias [-0.002094, 0.2100]`).
                let (lo, hi) = loss.bounds(terms[t].key);
                lower[g][t] = lower[g][t].max(lo);
                upper[g][t] = upper[g][t].min(hi);
            }
        }
    }
    Some(Summary {
        terms,
        values,
        stderr,
        lower,
        upper,
        leave_out,
        point_noise: noise.map(|n| n.finish()).unwrap_or_default(),
        total,
    })
}

/// Points per chunk of [`PointNoise`]'s state (the unit of its parallel update; fixed, so the
/// result does not depend on the number of workers).
const NOISE_CHUNK: usize = 256;

/// The centre of each (grid, term) column of a fold (`points × stride`, point-major): the mean of
/// its finite values, summed in point order; NaN for a column with none.
fn fold_centres(flat: &[f64], stride: usize) -> Vec<f64> {
    let mut sum = vec![0.0; stride];
    let mut count = vec![0u64; stride];
    for row in flat.chunks_exact(stride.max(1)) {
        let (sum, count, row) = (&mut sum[..stride], &mut count[..stride], &row[..stride]);
        for o in 0..stride {
            // Branch-free: a non-finite value adds −0.0, which leaves every sum as it is.
            let finite = row[o].is_finite();
            sum[o] += if finite { row[o] } else { -0.0 };
            count[o] += u64::from(finite);
        }
    }
    for (s, &c) in sum.iter_mut().zip(count.iter()) {
        *s = if c == 0 { f64::NAN } else { *s / c as f64 };
    }
    sum
}

/// Streaming state of [`point_noise`]: per point, grid value and term, Welford's running mean
/// and sum of squares over the leave-one-block-out folds of the point's term centred on the
/// fold's mean over points.
///
/// The state is point-major like the folds (`e * stride + o`, `stride = grid × terms`), cut
/// into chunks of [`NOISE_CHUNK`] points that are updated independently (in parallel when the
/// engine gives workers). A cell whose term is not finite in some fold is poisoned (its sum of
/// squares becomes NaN and stays NaN) instead of counted, and left out at the end: only cells
/// finite in every fold count, as the jackknife needs.
struct PointNoise {
    folds: u64,
    points: usize,
    grid: usize,
    terms: usize,
    /// Per chunk of points: the running means and sums of squares, point-major.
    chunks: Vec<std::sync::Mutex<(Vec<f64>, Vec<f64>)>>,
}

impl PointNoise {
    fn new(points: usize, grid: usize, terms: usize) -> PointNoise {
        let stride = grid * terms;
        let chunks = (0..points.div_ceil(NOISE_CHUNK))
            .map(|c| {
                let len = (points - c * NOISE_CHUNK).min(NOISE_CHUNK) * stride;
                std::sync::Mutex::new((vec![0.0; len], vec![0.0; len]))
            })
            .collect();
        PointNoise {
            folds: 0,
            points,
            grid,
            terms,
            chunks,
        }
    }

    /// Adds one fold's per-point terms (flat, `points × grid × terms`, point-major) with the
    /// fold's column centres ([`fold_centres`]).
    fn push(&mut self, flat: &[f64], centre: &[f64], par: &dyn ParFor) {
        self.folds += 1;
        let k = self.folds as f64;
        let stride = self.grid * self.terms;
        debug_assert_eq!(flat.len(), self.points * stride);
        debug_assert_eq!(centre.len(), stride);
        let chunks = &self.chunks;
        let centre = &centre[..stride];
        par.run(chunks.len(), &|c| {
            let mut state = chunks[c].lock().unwrap_or_else(|e| e.into_inner());
            let (mean, m2) = &mut *state;
            let rows = &flat[c * NOISE_CHUNK * stride..c * NOISE_CHUNK * stride + mean.len()];
            for ((mean, m2), row) in mean
                .chunks_exact_mut(stride)
                .zip(m2.chunks_exact_mut(stride))
                .zip(rows.chunks_exact(stride))
            {
                let (mean, m2, row) = (&mut mean[..stride], &mut m2[..stride], &row[..stride]);
                for o in 0..stride {
                    // A non-finite value or centre makes `m2` NaN for good (NaN and ∞ − ∞
                    // propagate).
                    let c = row[o] - centre[o];
                    let d = c - mean[o];
                    mean[o] += d / k;
                    m2[o] += d * (c - mean[o]);
                }
            }
        });
    }

    fn finish(self) -> Vec<Row> {
        let b = self.folds as f64;
        let stride = self.grid * self.terms;
        // Per (grid, term): the jackknife variances of the points finite in every fold, summed
        // in point order.
        let mut sum = vec![0.0; stride];
        let mut count = vec![0usize; stride];
        for chunk in self.chunks {
            let (_, m2) = chunk.into_inner().unwrap_or_else(|e| e.into_inner());
            for row in m2.chunks_exact(stride.max(1)) {
                for o in 0..stride {
                    if row[o].is_finite() && self.folds >= 2 {
                        // Delete-a-group jackknife variance (Efron and Tibshirani 1993, eq. 11.5)
                        // of the point's centred term.
                        sum[o] += (b - 1.0) / b * row[o];
                        count[o] += 1;
                    }
                }
            }
        }
        (0..self.grid)
            .map(|g| {
                (0..self.terms)
                    .map(|t| {
                        let o = g * self.terms + t;
                        if count[o] >= 2 {
                            sum[o] / (count[o] - 1) as f64
                        } else {
                            f64::NAN
                        }
                    })
                    .collect()
            })
            .collect()
    }
}

/// [`Loss::per_point`] by definition: `evaluate` on the accumulator restricted to each point,
/// flattened (`points × grid × terms`).
pub fn per_point_generic<L: Loss + ?Sized>(
    loss: &L,
    acc: &Acc,
    target: &Target<'_>,
    terms: usize,
    out: &mut Vec<f64>,
) {
    out.clear();
    // Exactly the size it ends at: grown by doubling it could reach twice that (the memory
    // estimate counts it once, `runner::memory`).
    out.reserve_exact(acc.shape.points * acc.shape.grid * terms);
    let k = acc.shape.classes;
    for e in 0..acc.shape.points {
        let one = one_point(acc, e);
        let t = match target {
            Target::Known {
                truth,
                noise_var,
                probs,
            } => Target::Known {
                truth: &truth[e..e + 1],
                noise_var: &noise_var[e..e + 1],
                probs: probs.map(|p| &p[e * k..(e + 1) * k]),
            },
            Target::Observed { y, noise } => Target::Observed {
                y: &y[e..e + 1],
                noise: *noise,
            },
        };
        for row in loss.evaluate(&one, &t) {
            out.extend_from_slice(&row[..terms]);
        }
    }
}

/// The accumulator restricted to evaluation point `e` (every array laid out per cell keeps that
/// point's cells; per-grid arrays are kept whole).
fn one_point(acc: &Acc, e: usize) -> Acc {
    let sh = acc.shape;
    let cells = sh.cells().max(1);
    let slice_f = |v: &Vec<f64>| -> Vec<f64> {
        if sh.points > 0 && v.len() % cells == 0 && v.len() >= cells && v.len() != sh.grid {
            let k = v.len() / cells;
            (0..sh.grid)
                .flat_map(|g| {
                    let i = (g * sh.points + e) * k;
                    v[i..i + k].iter().copied()
                })
                .collect()
        } else {
            v.clone()
        }
    };
    let slice_c = |v: &Vec<u32>| -> Vec<u32> {
        let k = v.len() / cells;
        (0..sh.grid)
            .flat_map(|g| {
                let i = (g * sh.points + e) * k;
                v[i..i + k].iter().copied()
            })
            .collect()
    };
    Acc {
        shape: Shape { points: 1, ..sh },
        replicates: acc.replicates,
        count: vec![acc.count[e]],
        floats: acc.floats.iter().map(slice_f).collect(),
        counts: acc.counts.iter().map(slice_c).collect(),
    }
}

/// The standard deviation, across evaluation points, of each per-point term (grid × terms):
/// the spread that makes a result's terms depend on which points were drawn (`check` adds
/// `sd²/m` to compare results with different evaluation points). NaN where fewer than two points
/// give a finite value.
///
/// The per-point terms are Monte Carlo estimates, so their spread also holds their own noise:
/// `E[sd²] = (spread of the true per-point terms) + (1/(m−1)) Σ_e Var(ε_e − ε̄)`, where `ε_e` is
/// point `e`'s Monte Carlo error. [`Summary::point_noise`] estimates the second part by the
/// jackknife over blocks of each point's term centred on the mean over points, so
/// `sd² − point_noise` estimates the first (the evaluation points' own sampling spread).
pub fn point_spread(loss: &dyn Loss, acc: &Acc, target: &Target<'_>) -> Vec<Row> {
    let sh = acc.shape;
    let n_terms = loss.describe(&sh, target.observed()).len();
    let stride = sh.grid * n_terms;
    let mut n = vec![0u64; stride];
    let mut mean = vec![0.0; stride];
    let mut m2 = vec![0.0; stride];
    // Each point's terms alone (`evaluate` on the point, bit for bit), point-major.
    let mut flat = Vec::new();
    loss.per_point(acc, target, n_terms, &mut flat);
    for point in flat.chunks_exact(stride.max(1)) {
        for (o, &v) in point.iter().enumerate() {
            if !v.is_finite() {
                continue;
            }
            n[o] += 1;
            let d = v - mean[o];
            mean[o] += d / n[o] as f64;
            m2[o] += d * (v - mean[o]);
        }
    }
    (0..sh.grid)
        .map(|g| {
            (0..n_terms)
                .map(|t| {
                    let o = g * n_terms + t;
                    if n[o] >= 2 {
                        (m2[o] / (n[o] - 1) as f64).sqrt()
                    } else {
                        f64::NAN
                    }
                })
                .collect()
        })
        .collect()
}

impl Summary {
    /// Index of the term with `key`.
    pub fn index(&self, key: &str) -> Option<usize> {
        self.terms.iter().position(|t| t.key == key)
    }

    /// Value of term `key` at grid index `g` (NaN when absent).
    pub fn value(&self, g: usize, key: &str) -> f64 {
        self.index(key).map_or(f64::NAN, |t| self.values[g][t])
    }

    /// Standard error of term `key` at grid index `g` (NaN when absent or not computable).
    pub fn se(&self, g: usize, key: &str) -> f64 {
        self.index(key).map_or(f64::NAN, |t| self.stderr[g][t])
    }

    /// The 95 % bootstrap percentile interval of term `key` at grid index `g`: `(NaN, NaN)` when
    /// absent, not a bootstrap term or not computable.
    pub fn interval(&self, g: usize, key: &str) -> (f64, f64) {
        self.index(key).map_or((f64::NAN, f64::NAN), |t| {
            (self.lower[g][t], self.upper[g][t])
        })
    }

    /// The terms at grid index `g` by key.
    pub fn named(&self, g: usize) -> std::collections::BTreeMap<&'static str, f64> {
        self.terms
            .iter()
            .zip(&self.values[g])
            .map(|(t, v)| (t.key, *v))
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_gram_matrix_over_slices_is_the_whole_ones_to_the_bit() {
        // 5 blocks of unequal sizes, 10 000 points: the Gram matrix added 4096 points at a time
        // (as `add_second_order` reads them) gives the bits of one pass over whole vectors, and
        // both equal the direct formula from the sample covariance (Srivastava 2005's
        // estimator, written out here).
        let (b, len) = (5, 10_000);
        let sizes = [7.0, 7.0, 6.0, 6.0, 6.0];
        let means: Vec<Vec<f64>> = (0..b)
            .map(|i| {
                (0..len)
                    .map(|e| ((e * 31 + i * 17) % 97) as f64 / 97.0 + 0.01 * i as f64)
                    .collect()
            })
            .collect();
        let centre: Vec<f64> = (0..len)
            .map(|e| (0..b).map(|i| sizes[i] * means[i][e]).sum::<f64>() / 32.0)
            .collect();
        let whole: Vec<&[f64]> = means.iter().map(|m| m.as_slice()).collect();
        let once = trace_cov_squared(&whole, &sizes, &centre).unwrap();
        let mut gram = Gram::new(&sizes);
        let mut at = 0;
        while at < len {
            let end = (at + GRAM_SLICE).min(len);
            let part: Vec<&[f64]> = means.iter().map(|m| &m[at..end]).collect();
            gram.add(&part, &centre[at..end]);
            at = end;
        }
        assert_eq!(gram.trace_cov_squared().unwrap().to_bits(), once.to_bits());
        // Direct: S = Σ_b x_b x_bᵀ / N over points, tr S² and tr S summed over point pairs.
        let n = (b - 1) as f64;
        let x: Vec<Vec<f64>> = (0..b)
            .map(|i| {
                (0..len)
                    .map(|e| sizes[i].sqrt() * (means[i][e] - centre[e]))
                    .collect()
            })
            .collect();
        let g = |i: usize, j: usize| -> f64 { (0..len).map(|e| x[i][e] * x[j][e]).sum() };
        let (mut ts2, mut ts) = (0.0, 0.0);
        for i in 0..b {
            ts += g(i, i) / n;
            for j in 0..b {
                ts2 += g(i, j) * g(i, j) / (n * n);
            }
        }
        let direct = n * n / ((n - 1.0) * (n + 2.0)) * (ts2 - ts * ts / n);
        assert!(
            (direct - once).abs() <= 1e-9 * direct.abs(),
            "{direct} vs {once}"
        );
    }

    #[test]
    fn the_percentile_interval_takes_the_ranks_of_its_rule() {
        // 200 draws 1..=200 in a scrambled order: ranks 5 and 195 (k = 200/40 = 5)
        let draws: Vec<f64> = (0..200).map(|i| f64::from((i * 77) % 200 + 1)).collect();
        assert_eq!(percentile_interval(&draws, 32), (5.0, 195.0));
        // 40 draws: k = 1, the smallest and the 39th
        let forty: Vec<f64> = (1..=40).rev().map(f64::from).collect();
        assert_eq!(percentile_interval(&forty, 8), (1.0, 39.0));
        // too few draws or blocks, or a non-finite draw: NaN, as bootstrap_se
        for (d, b) in [(&forty[..39], 8), (&forty[..], 1)] {
            let (lo, hi) = percentile_interval(d, b);
            assert!(lo.is_nan() && hi.is_nan(), "{} draws, {b} blocks", d.len());
        }
        let mut bad = draws.clone();
        bad[17] = f64::NAN;
        let (lo, hi) = percentile_interval(&bad, 32);
        assert!(lo.is_nan() && hi.is_nan() && bootstrap_se(&bad, 32).is_nan());
    }

    /// Exact identity: the standard errors are homogeneous of degree 1, so values whose squared
    /// deviations overflow get `scale × se(values / scale)` instead of +inf or 0.
    #[test]
    fn standard_errors_of_huge_values_scale_instead_of_overflowing() {
        let small = [1.0, 3.0, 2.5, 0.5];
        for k in [1e160, 1e300, -1e300] {
            let big: Vec<f64> = small.iter().map(|x| x * k).collect();
            let (a, b) = (jackknife_se(&small), jackknife_se(&big));
            assert!((b / (a * k.abs()) - 1.0).abs() < 1e-12, "{a} {b}");
            let (a, b) = (bootstrap_se(&small, 4), bootstrap_se(&big, 4));
            assert!((b / (a * k.abs()) - 1.0).abs() < 1e-12, "{a} {b}");
        }
        // Equal huge values: no spread, not an overflow.
        assert_eq!(jackknife_se(&[1e308, 1e308, 1e308]), 0.0);
        // A spread beyond the float range is +inf, which the runner refuses.
        assert_eq!(jackknife_se(&[-1.7e308, 1.7e308, 1.7e308]), f64::INFINITY);
    }

    /// The streaming per-point jackknife against its definition, computed in two passes:
    /// per point, `(B−1)/B · Σ_b (c_b − c̄)²` of the term centred on each fold's mean over the
    /// points finite in that fold, averaged over the points finite in every fold (divisor
    /// `k − 1`). A value that is NaN or infinite in one fold removes its point from that cell
    /// only; a column with no finite value at all is NaN.
    #[test]
    fn point_noise_matches_its_two_pass_definition() {
        // 600 points: three chunks of the state.
        let (points, grid, terms, folds) = (600, 2, 3, 5);
        let stride = grid * terms;
        let mut s = 0x9e37_79b9_7f4a_7c15u64;
        let mut next = || {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (s >> 11) as f64 / (1u64 << 53) as f64 * 4.0 - 2.0
        };
        let mut data: Vec<Vec<f64>> = (0..folds)
            .map(|_| (0..points * stride).map(|_| next()).collect())
            .collect();
        // Point 3, column 1 is NaN in fold 2 and point 5, column 4 infinite in fold 0; column 5
        // has no finite value in fold 1.
        data[2][3 * stride + 1] = f64::NAN;
        data[0][5 * stride + 4] = f64::INFINITY;
        for e in 0..points {
            data[1][e * stride + 5] = f64::NAN;
        }
        // Tasks in reverse order: the chunks are independent, so the order must not matter.
        struct Reversed;
        impl ParFor for Reversed {
            fn width(&self) -> usize {
                3
            }
            fn run(&self, n: usize, task: &(dyn Fn(usize) + Sync)) {
                (0..n).rev().for_each(task);
            }
        }
        let mut pn = PointNoise::new(points, grid, terms);
        let mut serial = PointNoise::new(points, grid, terms);
        for f in &data {
            pn.push(f, &fold_centres(f, stride), &Reversed);
            serial.push(f, &fold_centres(f, stride), &Serial);
        }
        let got = pn.finish();
        let serial = serial.finish();
        for (a, b) in got.iter().flatten().zip(serial.iter().flatten()) {
            assert_eq!(a.to_bits(), b.to_bits());
        }
        let b = folds as f64;
        for o in 0..stride {
            let centres: Vec<f64> = data
                .iter()
                .map(|f| {
                    let v: Vec<f64> = (0..points)
                        .map(|e| f[e * stride + o])
                        .filter(|v| v.is_finite())
                        .collect();
                    v.iter().sum::<f64>() / v.len() as f64
                })
                .collect();
            let mut per_point = Vec::new();
            for e in 0..points {
                let c: Vec<f64> = (0..folds)
                    .map(|f| data[f][e * stride + o] - centres[f])
                    .collect();
                if c.iter().all(|v| v.is_finite()) {
                    let m = c.iter().sum::<f64>() / b;
                    per_point
                        .push((b - 1.0) / b * c.iter().map(|v| (v - m) * (v - m)).sum::<f64>());
                }
            }
            let want = if per_point.len() >= 2 {
                per_point.iter().sum::<f64>() / (per_point.len() - 1) as f64
            } else {
                f64::NAN
            };
            let g = &got[o / terms][o % terms];
            match o {
                5 => assert!(g.is_nan(), "column 5 has no finite value in fold 1: {g}"),
                _ => approx::assert_relative_eq!(*g, want, max_relative = 1e-12),
            }
        }
    }
}
