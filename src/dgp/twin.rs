//! The parts of a simulated twin besides its reference ([`super::reference`]): the inputs
//! (a smoothed bootstrap of the table's rows), the noise (an estimate corrected by a parametric
//! bootstrap from the twin itself), and the record of what `lossprism twin` measured (echoed in
//! results). Everything is deterministic given the seed; streams come from [`crate::rng`].
//!
//! **Inputs** ([`Jitter`]): a smoothed bootstrap (Silverman 1986, *Density Estimation for
//! Statistics and Data Analysis*, §6.4): draw a row uniformly (one index per drawn row, shared
//! by all columns, so the dependence between columns is kept), then add `h_j ε_j`, ε ~ N(0, 1),
//! to each continuous column j, with Silverman's normal-reference rule for a d-dimensional
//! Gaussian kernel (ch. 4) and his robust spread (ch. 3):
//!
//! `h_j = c · min(sd_j, IQR_j / 1.349) · (4 / ((d + 2) n))^{1/(d+4)}`,
//!
//! d = number of continuous columns, n = rows, c = `jitter` (1 by default, 0 = rows as they
//! are). A value that leaves the column's observed range is reflected back into it (Silverman
//! 1986, ch. 2). Columns whose values are all whole numbers (one-hot indicators, counts, codes)
//! or that have at most 10 distinct values stay on their levels. Training inputs and the
//! evaluation points (drawn once) both come from this law, so an evaluation point is never a
//! copy of a training row — resampled rows would put the same rows on both sides and make
//! complex models look better than on new inputs.
//!
//! **Noise** ([`correct_noise`]): the raw estimate of a table estimator
//! ([`crate::dataset::noise`], [`twin_noise_method`] by default; its neighbour distances
//! weight the inputs as the reference's kept metric does, [`correct_noise_weighted`], so inputs
//! the response barely depends on do not spread the neighbours) carries a roughness bias.
//! Every estimator there is a quadratic form with `E[σ̂² | x] = σ² + est(x, f)`, so applying
//! the estimator to tables `y* = f̂(x_i) + σ ε` drawn from the twin at the table's own rows (a
//! parametric bootstrap; the design is held fixed because the bias depends on the neighbour
//! geometry) gives the bias `est(x, f̂)` — exactly, whatever σ: that limit of the bootstrap mean
//! is what [`correct_noise`] subtracts (`corrected = raw − est(x, f̂)`, floored at 5% of raw).
//! f̂ is the reference's in-sample fit at the rows (held-out predictions put neighbouring rows
//! under different fold models, adding roughness at the very scale the estimators difference
//! over).
//!
//! **The reference's error** (the sharp pilot): the Gamma test's intercept removes roughness
//! that grows like the squared neighbour distance, so what is left of `est(x, f)` comes from
//! changes of f at the neighbour scale — a step. A reference chosen by cross-validation is
//! smooth at that scale and gives `est(x, f̂)` near zero even where f has a step, so the
//! corrected σ̂² stays high there (`docs/twin-calibration.md` §2). [`correct_noise`] therefore
//! also measures the bias with a pilot that keeps a step a step: one regression tree grown
//! without pruning ([`PILOT_MIN_LEAF`] rows per leaf), T(v) its in-sample fit to responses v.
//! Its own roughness (noisy leaf means) is estimated on the same bootstrap tables,
//!
//! `pilot correction = est(x, T(y)) − (mean_b est(x, T(y*_b)) − est(x, T(f̂)))`,
//!
//! and its excess over the reference's correction is counted in the standard error,
//! `se = sqrt(sampling_se² + max(excess, 0)²)`, where `sampling_se` is the spread of the
//! estimator over the [`NOISE_TABLES`] bootstrap tables at the corrected σ², or the estimator's
//! own standard error on the table when that is larger: the bootstrap draws Gaussian noise, so
//! its spread misses the extra variance of heavier-tailed noise, which the estimator's plug-in
//! variance of its terms sees (measured with Student-t noise: coverage 20–26/30 with the
//! bootstrap spread alone, `docs/twin-calibration.md` §2.7). The pilot is not
//! used for the value: measured on invented processes, subtracting its correction brought the
//! two step processes from +6% and +10% to +5% but over-corrected smooth ones and had a larger
//! spread than the bootstrap reports, so ±2 SE coverage fell to 25/30; as an error term it keeps
//! coverage at 28/30 or more and says when the reference may have rounded a step off
//! ([`NoiseCorrection::flagged`], which also fires on some smooth tables: it is a warning, not a
//! test).
//!
//! **Rows left out** ([`TRIM_SHARE`], up to [`TRIM_MAX_INPUTS`] inputs): the Gamma test and
//! the plane ([`twin_noise_method`]) average over the table's rows but the fifth where the reference fitted once changes most
//! between neighbours ([`noise::Design::trimmed`]). A step the reference rounds off still makes
//! the reference change fastest there, so those rows hold most of the step's share of the raw
//! estimate; the same rows are left out of the correction and of every bootstrap table, so the
//! estimator stays one quadratic form and the correction stays exact. Measured on invented
//! processes (`docs/twin-calibration.md` §2.6): the 2- and 3-input step processes from +5.9%
//! and +10.6% to +2.6% and +4.8%, the other processes within ±5%, pure noise unchanged (−0.2%
//! and −0.6% over 60 tables), and the spread up by about 10% where nothing needed removing.
//! The plane, the default on 2 and 3 inputs when the reference explains most of the response
//! (§2.11), leaves out the same share.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2};
use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

use super::reference::select::{self, Rule, Selection};
use super::reference::{Choice, Reference};
use crate::dataset::noise::{self, Method};
use crate::family::tree::{GrowOptions, Presorted, TreeFamily};
use crate::family::Task;
use crate::rng::{purpose, stream};

/// Evaluation points of a twin written by `lossprism twin` (drawn once from the smoothed
/// bootstrap).
pub const EVAL_SIZE: usize = 1000;

/// Default number of tables of `lossprism twin`'s fidelity check (here, below the command line
/// that shows it as a default).
pub const FIDELITY_TABLES: usize = 5;
/// Default replicates of every run of a twin of the twin in the fidelity check.
pub const FIDELITY_REPLICATES: usize = 100;

/// Parametric-bootstrap tables behind the noise's standard error.
pub const NOISE_TABLES: usize = 200;

/// First index, within purpose `TWIN_BOOT`, of the streams of the tables drawn from a twin to
/// measure its fidelity (the noise bootstrap uses indices `0..NOISE_TABLES`).
pub const FIDELITY_STREAM: u64 = 1 << 32;

/// Rows per leaf of the sharp pilot tree that checks the noise correction (see the module
/// docs).
pub const PILOT_MIN_LEAF: usize = 5;

/// Index, within purpose `TWIN_BOOT`, of the stream that breaks the pilot tree's exact split
/// ties (every growth of the pilot starts this stream afresh; disjoint from the bootstrap
/// tables' `0..NOISE_TABLES` and from the fidelity check's streams).
pub const PILOT_STREAM: u64 = 1 << 40;

/// Columns with at most this many distinct values stay on their levels.
pub const DISCRETE_LEVELS: usize = 10;

/// The smoothed bootstrap of a table's rows.
#[derive(Debug, Clone, PartialEq)]
pub struct Jitter {
    /// Bandwidth per column (0 for a column kept on its levels).
    pub h: Vec<f64>,
    /// Smallest observed value per column.
    pub lo: Vec<f64>,
    /// Largest observed value per column.
    pub hi: Vec<f64>,
    /// The multiplier c on Silverman's rule.
    pub scale: f64,
    /// Column means of the table (the centre of [`Jitter::shrink`]).
    pub center: Vec<f64>,
    /// Factor per column that brings a jittered value back toward the column's mean so the
    /// drawn column keeps the table's variance (1: not shrunk, as for a column on its levels,
    /// or when the variance is not kept; see [`Jitter::fit_keeping`]).
    pub shrink: Vec<f64>,
    /// The mode it was fitted in: `true` for `jitter_variance = "table"` (shrunk where the
    /// jitter would add variance), `false` for `"added"`.
    pub table_variance: bool,
}

/// Standard-normal nodes and weights on [−8, 8] (801 points, trapezoid, weights summing to 1)
/// for the jittered law's second moment near a bound, where reflection folds the kernel.
fn normal_nodes() -> (Vec<f64>, Vec<f64>) {
    let m = 801;
    let step = 16.0 / (m - 1) as f64;
    let e: Vec<f64> = (0..m).map(|i| -8.0 + step * i as f64).collect();
    let w: Vec<f64> = e.iter().map(|v| (-0.5 * v * v).exp()).collect();
    let total: f64 = w.iter().sum();
    (e, w.into_iter().map(|v| v / total).collect())
}

/// `v` reflected into `[a, b]` (as many times as needed, then clamped).
fn reflect(mut v: f64, a: f64, b: f64) -> f64 {
    for _ in 0..64 {
        if v < a {
            v = 2.0 * a - v;
        } else if v > b {
            v = 2.0 * b - v;
        } else {
            break;
        }
    }
    v.clamp(a, b)
}

/// Linear-interpolation quantile of sorted values (NaN for none).
fn quantile(sorted: &[f64], q: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let pos = q * (sorted.len() - 1) as f64;
    let i = pos.floor() as usize;
    let f = pos - i as f64;
    if i + 1 < sorted.len() {
        sorted[i] * (1.0 - f) + sorted[i + 1] * f
    } else {
        sorted[i]
    }
}

impl Jitter {
    /// Bandwidths from the rows of `x` (at least one row) with multiplier `scale` ≥ 0; the
    /// jitter adds its variance to the table's (the plain smoothed bootstrap, the form of
    /// twins written before `jitter_variance`).
    pub fn fit(x: ArrayView2<'_, f64>, scale: f64) -> Jitter {
        Jitter::fit_keeping(x, scale, false)
    }

    /// [`Jitter::fit`], and with `keep_variance` each jittered column is shrunk toward its
    /// mean after the reflection, `x̄ + c (v − x̄)`, with `c = min(1, s / s_L)`: s² the table
    /// column's variance (divisor n, the plain bootstrap's) and s_L² the jittered, reflected
    /// law's second moment about x̄, computed exactly from the table (rows within 8 h of a
    /// bound by quadrature over the kernel, the others as `(x_i − x̄)² + h²`). This is the
    /// variance-corrected smoothed bootstrap (Silverman 1986, *Density Estimation for
    /// Statistics and Data Analysis*, §6.4.1, from memory), with the reflection counted. The
    /// plain smoothed bootstrap widens an unbounded column's variance by `1 + h²/s²` (1.18 on
    /// 3 inputs at n = 300, 1.38 on 10 at n = 400); reflection takes that back only on a flat,
    /// bounded column. Deterministic: `run` refits the same factors from the same table.
    pub fn fit_keeping(x: ArrayView2<'_, f64>, scale: f64, keep_variance: bool) -> Jitter {
        let n = x.nrows();
        let mut cont = Vec::new();
        let mut center = Vec::new();
        let mut spread = Vec::new();
        let (mut lo, mut hi) = (Vec::new(), Vec::new());
        for col in x.columns() {
            let mut v: Vec<f64> = col.to_vec();
            v.sort_by(f64::total_cmp);
            lo.push(v[0]);
            hi.push(v[n - 1]);
            let mut distinct = v.clone();
            distinct.dedup();
            // Every float beyond 2^53 is a whole number: such a column is measured, not
            // counted (one of size 1e140 was resampled without jitter).
            let whole = v
                .iter()
                .all(|a| a.fract() == 0.0 && a.abs() < 9_007_199_254_740_992.0);
            cont.push(!(whole || distinct.len() <= DISCRETE_LEVELS));
            // In the column's own order (the centre of the shrink, as `run` refits it).
            center.push(col.iter().sum::<f64>() / n as f64);
            let m = v.iter().sum::<f64>() / n as f64;
            let sd = if n > 1 {
                (v.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / (n as f64 - 1.0)).sqrt()
            } else {
                0.0
            };
            let iqr = quantile(&v, 0.75) - quantile(&v, 0.25);
            spread.push(if iqr > 0.0 { sd.min(iqr / 1.349) } else { sd });
        }
        let d = cont.iter().filter(|&&c| c).count().max(1) as f64;
        let factor = (4.0 / ((d + 2.0) * n as f64)).powf(1.0 / (d + 4.0));
        let h: Vec<f64> = cont
            .iter()
            .zip(&spread)
            .map(|(&c, &s)| if c { scale * s * factor } else { 0.0 })
            .collect();
        let mut shrink = vec![1.0; h.len()];
        if keep_variance {
            let (e, w) = normal_nodes();
            for (j, col) in x.columns().into_iter().enumerate() {
                let hj = h[j];
                if hj <= 0.0 {
                    continue;
                }
                let (m, a, b) = (center[j], lo[j], hi[j]);
                let table: f64 = col.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / n as f64;
                let law: f64 = col
                    .iter()
                    .map(|&v| {
                        if v - a > 8.0 * hj && b - v > 8.0 * hj {
                            (v - m) * (v - m) + hj * hj
                        } else {
                            e.iter()
                                .zip(&w)
                                .map(|(ei, wi)| {
                                    let r = reflect(v + hj * ei, a, b) - m;
                                    wi * r * r
                                })
                                .sum()
                        }
                    })
                    .sum::<f64>()
                    / n as f64;
                if law > table && law.is_finite() && table.is_finite() {
                    shrink[j] = (table / law).sqrt();
                }
            }
        }
        Jitter {
            h,
            lo,
            hi,
            scale,
            center,
            shrink,
            table_variance: keep_variance,
        }
    }

    /// Whether some column is shrunk to keep the table's variance.
    pub fn keeps_variance(&self) -> bool {
        self.shrink.iter().any(|c| *c != 1.0)
    }

    /// `true` when no column is jittered (the draws are then plain resampled rows).
    pub fn is_plain(&self) -> bool {
        self.h.iter().all(|h| *h == 0.0)
    }

    /// Column `j` of a drawn row starting from the table value `v`: `v + h_j ε` reflected into
    /// the observed range (one normal draw from `rng` when `h_j > 0`, none otherwise).
    pub fn perturb<R: Rng + ?Sized>(&self, j: usize, v: f64, rng: &mut R) -> f64 {
        if self.h[j] <= 0.0 {
            return v;
        }
        let e: f64 = StandardNormal.sample(rng);
        let (a, b) = (self.lo[j], self.hi[j]);
        let v = reflect(v + self.h[j] * e, a, b);
        let c = self.shrink[j];
        if c == 1.0 {
            v
        } else {
            let m = self.center[j];
            (m + c * (v - m)).clamp(a, b)
        }
    }

    /// Draws `m` rows: a uniform row of `rows` (one index per drawn row), then each column
    /// perturbed in order. With every bandwidth 0 this is exactly
    /// [`super::reference::resample_rows`].
    pub fn draw<R: Rng + ?Sized>(&self, rows: &Array2<f64>, m: usize, rng: &mut R) -> Array2<f64> {
        let p = rows.ncols();
        let mut out = Array2::zeros((m, p));
        for i in 0..m {
            let r = rng.gen_range(0..rows.nrows());
            for j in 0..p {
                out[[i, j]] = self.perturb(j, rows[[r, j]], rng);
            }
        }
        out
    }

    /// Column `j` in words.
    pub fn describe_column(&self, j: usize) -> String {
        if self.h[j] > 0.0 {
            let kept = if self.shrink[j] != 1.0 {
                format!(
                    ", then shrunk toward the mean by {} so its variance is the table's",
                    crate::fmt::fmt_num(self.shrink[j])
                )
            } else {
                String::new()
            };
            format!(
                "plus N(0, h²) kernel jitter, h = {} ({} × Silverman's rule), reflected into [{}, {}]{kept}",
                crate::fmt::fmt_num(self.h[j]),
                self.scale,
                self.lo[j],
                self.hi[j]
            )
        } else {
            "kept on its levels".into()
        }
    }
}

/// A noise estimate corrected for its roughness bias (see the module docs).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NoiseCorrection {
    /// The estimator.
    pub method: Method,
    /// The raw estimate on the table.
    pub raw: f64,
    /// The raw estimate's own standard error.
    pub raw_se: f64,
    /// The bias subtracted: the estimator applied to the reference at the rows, `est(x, f̂)`
    /// (the parametric bootstrap's mean minus its σ², exactly).
    pub correction: f64,
    /// `raw − correction`, at least 5% of `raw`.
    pub value: f64,
    /// Standard error: `sqrt(sampling_se² + max(pilot_excess, 0)²)`.
    pub se: f64,
    /// The estimator's spread over the bootstrap tables at `value`, or its own standard error on
    /// the table when that is larger (heavy-tailed noise; see the module docs): the standard
    /// error before the reference's error is counted.
    pub sampling_se: f64,
    /// The estimator's spread over the bootstrap tables alone (Gaussian noise at `value`).
    pub bootstrap_se: f64,
    /// The bias the sharp pilot measures, `est(x, T(y)) − pilot noise` (NaN when the pilot
    /// cannot be grown).
    pub pilot_correction: f64,
    /// `pilot_correction − correction`: roughness the pilot sees and the reference does not
    /// (NaN when the pilot cannot be grown).
    pub pilot_excess: f64,
    /// Bootstrap tables behind `sampling_se` and the pilot's noise.
    pub tables: usize,
    /// `true` when the floor (5% of raw) replaced `raw − correction`.
    pub floored: bool,
    /// `true` when the estimator's neighbour distances weighted the inputs.
    pub weighted: bool,
    /// Table rows left out as query rows ([`noise::Design::trimmed`]; 0 when none).
    pub left_out: usize,
    /// The bootstrap tables resampled the standardized residuals instead of Gaussian noise.
    pub resampled: bool,
}

impl NoiseCorrection {
    /// `true` when the sharp pilot finds more roughness than the reference by more than the
    /// sampling standard error: the reference may have rounded off a step, and σ̂² may be high
    /// by up to `pilot_excess` (it is counted in `se`).
    pub fn flagged(&self) -> bool {
        self.pilot_excess > self.sampling_se
    }
}

/// The sharp pilot of the noise check: one regression tree, [`PILOT_MIN_LEAF`] rows per leaf,
/// grown without a depth limit ([`super::reference::forest::DEPTH`]) on responses at fixed rows
/// and read at those rows; exact split ties broken by stream `(seed, TWIN_BOOT, PILOT_STREAM)`,
/// started afresh for every growth, so the pilot is a function of the responses alone.
struct Pilot {
    pre: Presorted,
    x: ndarray::Array2<f64>,
    seed: u64,
}

impl Pilot {
    fn new(x: ArrayView2<'_, f64>, seed: u64) -> Option<Pilot> {
        Some(Pilot {
            pre: Presorted::new(x).ok()?,
            x: x.to_owned(),
            seed,
        })
    }

    /// The pilot tree grown on responses `v`, at the rows (`None` when it cannot be grown, for
    /// example on non-finite responses).
    fn fit(&self, v: &[f64]) -> Option<Array1<f64>> {
        let tree = TreeFamily {
            min_samples_leaf: PILOT_MIN_LEAF,
            ..Default::default()
        }
        .grow_presorted(
            &self.pre,
            ArrayView1::from(v),
            Task::Regress,
            &GrowOptions::depth(super::reference::forest::DEPTH),
            &mut stream(self.seed, purpose::TWIN_BOOT, PILOT_STREAM),
        )
        .ok()?;
        Some(
            self.x
                .rows()
                .into_iter()
                .map(|r| tree.predict_at_depth(r, super::reference::forest::DEPTH))
                .collect(),
        )
    }
}

fn spread(draws: &[f64]) -> f64 {
    if draws.len() < 2 {
        return f64::NAN;
    }
    let m = draws.iter().sum::<f64>() / draws.len() as f64;
    (draws.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / (draws.len() as f64 - 1.0)).sqrt()
}

/// Responses `f + σ ε` at the rows for bootstrap table `b` (stream `(seed, TWIN_BOOT, b)`).
pub fn bootstrap_responses(f_rows: &[f64], sigma: f64, seed: u64, b: u64) -> Array1<f64> {
    bootstrap_responses_from(f_rows, sigma, None, seed, b)
}

/// [`bootstrap_responses`] with the standardized noise drawn with replacement from `pool`
/// (mean 0, mean square 1; [`crate::dgp::standardized_residuals`]) when given, else Gaussian.
pub fn bootstrap_responses_from(
    f_rows: &[f64],
    sigma: f64,
    pool: Option<&[f64]>,
    seed: u64,
    b: u64,
) -> Array1<f64> {
    let mut rng = stream(seed, purpose::TWIN_BOOT, b);
    f_rows
        .iter()
        .map(|v| {
            let e: f64 = match pool {
                Some(p) => p[rng.gen_range(0..p.len())],
                None => StandardNormal.sample(&mut rng),
            };
            v + sigma * e
        })
        .collect()
}

/// The raw estimate of `method` on (x, y), its bias correction with the reference's in-sample
/// fit `f_rows` at the rows, the sharp pilot's check, and the standard error, from `tables`
/// parametric-bootstrap tables (streams `(seed, TWIN_BOOT, 0..tables)`; see the module docs).
/// `None` when the estimator cannot run on the rows. When the pilot cannot be grown
/// (non-finite values) or `tables` is 0, the pilot's fields are NaN and `se` is the sampling
/// standard error alone.
pub fn correct_noise(
    method: Method,
    x: ArrayView2<'_, f64>,
    y: &[f64],
    f_rows: &[f64],
    tables: usize,
    seed: u64,
) -> Option<NoiseCorrection> {
    correct_noise_weighted(method, x, None, y, f_rows, tables, seed, None)
}

/// [`correct_noise`] with the estimator's inputs weighted ([`noise::Design::weighted`]), and
/// the bootstrap's noise resampled from `pool` when given ([`correct_noise_on`]).
#[allow(clippy::too_many_arguments)]
pub fn correct_noise_weighted(
    method: Method,
    x: ArrayView2<'_, f64>,
    weights: Option<&[f64]>,
    y: &[f64],
    f_rows: &[f64],
    tables: usize,
    seed: u64,
    pool: Option<&[f64]>,
) -> Option<NoiseCorrection> {
    let design = noise_design(method, x, weights, f_rows)?;
    // GSJS orders one input and ignores weights.
    let weighted = weights.is_some() && method != Method::Gsjs;
    correct_noise_on(&design, x, y, f_rows, tables, seed, weighted, pool)
}

/// The estimator a twin's noise correction runs: `method` on the rows `x` with the inputs
/// weighted by `weights` ([`noise::Design::weighted`]) and, on up to [`TRIM_MAX_INPUTS`]
/// inputs, the rows where the reference's fit `f_rows` changes most left out
/// ([`noise::Design::trimmed`]). `None` when the estimator cannot run on the rows.
pub fn noise_design(
    method: Method,
    x: ArrayView2<'_, f64>,
    weights: Option<&[f64]>,
    f_rows: &[f64],
) -> Option<noise::Design> {
    let design = noise::Design::weighted(method, x, weights)?;
    Some(
        if x.ncols() <= TRIM_MAX_INPUTS && matches!(method, Method::Gamma | Method::Plane) {
            design.trimmed(f_rows, TRIM_SHARE)
        } else {
            design
        },
    )
}

/// The level of a twin's varying noise: σ²(x)'s mean over the table's rows `x` such that the
/// noise estimate, which weighs row r's noise variance by `weights[r]`
/// ([`noise::Design::noise_weights`]), would see the corrected value `corrected`:
/// `corrected · mean_r v_r / Σ_r weights_r v_r`, with `v` the reference's σ²(x) at the rows as
/// it stands. The estimator leaves some rows out and counts others more often as neighbours;
/// with noise that varies, the corrected value is the noise variance averaged under those
/// weights, not over the rows (measured: docs/twin-calibration.md §2.10). `None` without
/// varying noise, for weights of another length, or when the weighted sum is not positive.
pub fn varying_level(
    r: &Reference,
    x: ArrayView2<'_, f64>,
    corrected: f64,
    weights: &[f64],
) -> Option<f64> {
    if weights.len() != x.nrows() || x.nrows() == 0 || !(corrected.is_finite() && corrected > 0.0) {
        return None;
    }
    let mut row = vec![0.0; x.ncols()];
    let (mut plain, mut weighted) = (0.0, 0.0);
    for (xr, w) in x.rows().into_iter().zip(weights) {
        row.iter_mut().zip(xr.iter()).for_each(|(b, v)| *b = *v);
        let v = r.var_at(&row)? / r.level_factor();
        plain += v;
        weighted += w * v;
    }
    let level = corrected * (plain / x.nrows() as f64) / weighted;
    (weighted > 0.0 && level.is_finite() && level > 0.0).then_some(level)
}

/// [`correct_noise_weighted`] on a prepared estimator `design` of the rows `x` (the twin's
/// choice of weights and left-out rows already made; `weighted` is recorded as given). The
/// bootstrap tables' noise is resampled from `pool` (the standardized residuals of a twin whose
/// noise is `shape = "residuals"`) when given, so that the spread also sees the table's noise
/// shape; Gaussian otherwise.
#[allow(clippy::too_many_arguments)]
pub fn correct_noise_on(
    design: &noise::Design,
    x: ArrayView2<'_, f64>,
    y: &[f64],
    f_rows: &[f64],
    tables: usize,
    seed: u64,
    weighted: bool,
    pool: Option<&[f64]>,
) -> Option<NoiseCorrection> {
    let method = design.method();
    let raw_est = design.estimate(ArrayView1::from(y))?;
    let raw = raw_est.value;
    let est = |v: ArrayView1<'_, f64>| design.value(v);
    let correction = est(ArrayView1::from(f_rows));
    let floor = 0.05 * raw.max(0.0);
    let diff = raw - correction;
    let floored = diff.is_nan() || diff < floor;
    let value = if floored { floor } else { diff };
    let sigma = value.max(0.0).sqrt();
    let pilot = Pilot::new(x, seed).filter(|_| tables > 0);
    let mut draws = Vec::with_capacity(tables);
    let mut pilot_sum = Some(0.0);
    for b in 0..tables {
        let ys = bootstrap_responses_from(f_rows, sigma, pool, seed, b as u64);
        draws.push(est(ys.view()));
        pilot_sum = match (pilot_sum, &pilot) {
            (Some(acc), Some(p)) => ys
                .as_slice()
                .and_then(|v| p.fit(v))
                .map(|t| acc + est(t.view())),
            _ => None,
        };
    }
    let pilot_correction = match (&pilot, pilot_sum) {
        (Some(p), Some(sum)) => match (p.fit(y), p.fit(f_rows)) {
            (Some(on_table), Some(on_truth)) => {
                let noise = sum / tables as f64 - est(on_truth.view());
                est(on_table.view()) - noise
            }
            _ => f64::NAN,
        },
        _ => f64::NAN,
    };
    let pilot_excess = pilot_correction - correction;
    // `max` keeps the bootstrap spread when the estimator gives no standard error (NaN).
    let bootstrap_se = spread(&draws);
    let sampling_se = bootstrap_se.max(raw_est.stderr);
    let se = if pilot_excess > 0.0 {
        sampling_se.hypot(pilot_excess)
    } else {
        sampling_se
    };
    Some(NoiseCorrection {
        method,
        raw,
        raw_se: raw_est.stderr,
        correction,
        value,
        se,
        sampling_se,
        bootstrap_se,
        pilot_correction,
        pilot_excess,
        tables,
        floored,
        weighted,
        left_out: y.len() - design.query_rows(),
        resampled: pool.is_some(),
    })
}

/// The shape of a table's residuals `y − f̂` under its reference: sample skewness and excess
/// kurtosis, each beside its standard error under Gaussian noise, `√(6/n)` and `√(24/n)` (the
/// large-sample SEs behind the Jarque–Bera test; Jarque and Bera 1980, from memory).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ResidualShape {
    /// Rows.
    pub n: usize,
    /// Sample skewness `m₃ / m₂^{3/2}`.
    pub skewness: f64,
    /// Sample excess kurtosis `m₄ / m₂² − 3`.
    pub excess_kurtosis: f64,
}

/// How many Gaussian-noise standard errors a residual shape must be from 0 to be called
/// non-Gaussian ([`ResidualShape::non_gaussian`]): 4, so that a Gaussian table is called so
/// rarely (a rule of thumb, no source; its rate is measured in `docs/twin-calibration.md` §2.9).
pub const SHAPE_Z: f64 = 4.0;

impl ResidualShape {
    /// The shape of residuals `y − f` (`None` with fewer than 8 rows or no spread).
    pub fn of(y: &[f64], f: &[f64]) -> Option<ResidualShape> {
        let n = y.len();
        if n < 8 || f.len() != n {
            return None;
        }
        let r: Vec<f64> = y.iter().zip(f).map(|(a, b)| a - b).collect();
        let nf = n as f64;
        let mean = r.iter().sum::<f64>() / nf;
        let moment = |k: i32| r.iter().map(|v| (v - mean).powi(k)).sum::<f64>() / nf;
        let m2 = moment(2);
        if !(m2.is_finite() && m2 > 0.0) {
            return None;
        }
        Some(ResidualShape {
            n,
            skewness: moment(3) / m2.powf(1.5),
            excess_kurtosis: moment(4) / (m2 * m2) - 3.0,
        })
    }

    /// Standard error of the skewness under Gaussian noise, `√(6/n)`.
    pub fn skewness_se(&self) -> f64 {
        (6.0 / self.n as f64).sqrt()
    }

    /// Standard error of the excess kurtosis under Gaussian noise, `√(24/n)`.
    pub fn kurtosis_se(&self) -> f64 {
        (24.0 / self.n as f64).sqrt()
    }

    /// Skewed or heavy-tailed beyond [`SHAPE_Z`] of those standard errors (light tails, a
    /// negative excess kurtosis, are not flagged: Gaussian noise then overstates the tails).
    pub fn non_gaussian(&self) -> bool {
        self.skewness.abs() > SHAPE_Z * self.skewness_se()
            || self.excess_kurtosis > SHAPE_Z * self.kurtosis_se()
    }
}

/// The spread test's z ([`Reference::spread_test`]) beyond which `twin` says the noise's
/// variance changes with x and suggests `--varying`: a rule of thumb (no source), set at 4 so
/// that tables whose noise is constant rarely trip it (measured: docs/twin-calibration.md
/// §2.10).
pub const SPREAD_Z: f64 = 4.0;

/// Cross-validated R² of the reference at or above which a twin of 2 or 3 inputs measures its
/// noise with the plane ([`twin_noise_method`]): 0.7, a rule of thumb (no source) set on the
/// invented processes of docs/twin-calibration.md §2.11, between their unit-noise tables (R² at
/// most 0.57 on 3 inputs at n = 400), where the two estimators agree on the noise and the Gamma
/// test's curves were a little closer, and the same truths with half the noise (0.71–0.79 on the
/// smooth and the step process), where the Gamma test starts to read curvature as noise (+5%).
pub const PLANE_FROM_R2: f64 = 0.7;

/// A regression twin's default noise estimator for a table of `p` inputs whose chosen reference
/// has cross-validated R² `cv_r2`: GSJS with one input; with 2 to [`TRIM_MAX_INPUTS`],
/// local-linear pseudo-residuals ([`Method::Plane`]) when `cv_r2 ≥` [`PLANE_FROM_R2`] and the
/// Gamma test otherwise; the Gamma test with more inputs. The plane is exactly unbiased for a
/// linear truth, where the Gamma test's line removes the first-order roughness only on average:
/// on a table with little noise next to a curved truth the Gamma test read the curvature as
/// noise (+22% on a smooth 3-input process at a quarter of the unit noise, the plane +4.6%);
/// with unit noise the two agree on the noise and the Gamma test's curves were a little closer
/// (measured: docs/twin-calibration.md §2.11). Wider tables keep the Gamma test (the plane was
/// measured there on one process only).
pub fn twin_noise_method(p: usize, cv_r2: f64) -> Method {
    match p {
        1 => Method::Gsjs,
        p if p <= TRIM_MAX_INPUTS && cv_r2 >= PLANE_FROM_R2 => Method::Plane,
        _ => Method::Gamma,
    }
}

/// Cross-validated R² of the reference `selection` chose (NaN when it was not scored).
pub fn chosen_r2(selection: &Selection) -> f64 {
    selection
        .scores
        .iter()
        .find(|s| s.candidate == selection.choice.family)
        .map_or(f64::NAN, |s| s.r2)
}

/// Share of the table's rows the Gamma test leaves out as query rows: those where the
/// reference fitted once changes most between neighbours ([`noise::Design::trimmed`]). A rule of
/// thumb with no source, set on the invented processes of `docs/twin-calibration.md` §2.6: with
/// 10% the 3-input step was still +7% high, with 30% the smooth and kinked processes fell to
/// −5%; 20% kept all seven within ±5% and left pure noise unbiased.
pub const TRIM_SHARE: f64 = 0.2;

/// Widest table (in inputs) whose noise estimate leaves rows out ([`TRIM_SHARE`]). On the 6- and
/// 10-input processes measured the effect was mixed (one step process closer, the others a
/// little further off, and ±2 SE coverage 26/30 on one), so wider twins keep every row.
pub const TRIM_MAX_INPUTS: usize = 3;

/// Default kernel jitter of the smoothed bootstrap of `lossprism twin` (a multiple of
/// Silverman's bandwidth, [`Jitter`]).
pub const DEFAULT_JITTER: f64 = 1.0;

/// Whether a regression twin's reference is twiced ([`crate::dgp::reference::Choice::twice`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Twicing {
    /// Twice on tables of [`TWICE_FROM_INPUTS`] or more inputs; on fewer, twice when it lowers
    /// the cross-validated error of the chosen recipe ([`select::twicing_check`]).
    #[default]
    Auto,
    /// Always twice.
    On,
    /// Fit once.
    Off,
}

impl Twicing {
    /// Parses `auto`, `on`, `off`.
    pub fn from_name(s: &str) -> Option<Twicing> {
        match s {
            "auto" => Some(Twicing::Auto),
            "on" => Some(Twicing::On),
            "off" => Some(Twicing::Off),
            _ => None,
        }
    }
}

/// Inputs from which [`Twicing::Auto`] always twices. With several inputs a cross-validated
/// smoother has to average over wide neighbourhoods and rounds off the curvature the families'
/// bias comes from; on invented 3-input processes twicing raised the twin's picks inside the
/// true one-SE set from 15 to 28 of 30 (one seed; 76 of 90 over three), while the check of
/// held-out error would have twiced only 7 of 15 tables there and reached 20 of 30. With one or
/// two inputs, always twicing lost picks (18 of 30 against 23 of 30) and the check kept them
/// (`docs/twin-calibration.md` §0). A threshold measured on invented processes, not a theorem.
pub const TWICE_FROM_INPUTS: usize = 3;

/// The factor [`fit_regression`] scales the reference's smoothing by after cross-validation
/// chose it ([`Choice::sharpened`]: k, leaf size and bandwidth times 0.85). Cross-validation
/// tunes a smoother to predict; a twin's truth should instead keep the curvature the families'
/// bias comes from, which the predicting optimum rounds off (an estimate of a function's
/// roughness wants less smoothing than an estimate of the function: common knowledge of
/// smoothing, no single source). On the invented 3-input processes of
/// `docs/twin-calibration.md` §0.5 (sixteen seeds) this raised the twin's k-NN picks inside
/// the true one-SE set from 166 to 193 of 240 with the curve error unchanged (8.02% against
/// 7.99%, paired +0.03 ± 0.09 points), while 0.7 overshot (curve error +0.9 points on four
/// seeds). A rule of thumb measured on invented processes.
pub const SHARPEN: f64 = 0.85;

/// Smallest sharpening factor `lossprism twin --sharpen` accepts (a rule of thumb: at a quarter
/// a k of 4 is already 1; nothing below 0.7 was measured).
pub const MIN_SHARPEN: f64 = 0.25;

/// A regression twin fitted on a table: the reference's choice, the reference, its in-sample
/// fit at the rows and the corrected noise.
#[derive(Debug)]
pub struct RegressionFit {
    /// What the cross-validation measured, and the recipe.
    pub selection: Selection,
    /// The reference fitted on the whole table.
    pub reference: Reference,
    /// f̂ at the table's rows (in-sample; the twiced fit with twicing).
    pub f_rows: Vec<f64>,
    /// The corrected noise (`None` when the estimator cannot run on the rows).
    pub noise: Option<NoiseCorrection>,
    /// The weight of each row's noise variance in the noise estimate
    /// ([`noise::Design::noise_weights`]; empty without an estimate): what sets the level of
    /// varying noise ([`varying_level`]).
    pub noise_weights: Vec<f64>,
    /// The twicing check ([`Twicing::Auto`] on fewer than [`TWICE_FROM_INPUTS`] inputs).
    pub twicing: Option<select::TwicingCheck>,
    /// The twicing asked for.
    pub twicing_mode: Twicing,
    /// The recipe cross-validation chose, before [`SHARPEN`]ing (`selection.choice` is the
    /// sharpened recipe the scenario records; the noise's correction uses this one).
    pub cv_choice: Choice,
    /// The sharpening factor applied (1: none).
    pub sharpen: f64,
}

/// Fits a regression twin on rows `x` and responses `y`: chooses the reference by `rule`
/// ([`select`]), fits it, and corrects the noise estimate of `method` (default
/// [`twin_noise_method`]; distances under the choice's input weights, when it kept some)
/// with [`NOISE_TABLES`] bootstrap tables, using the fit made once.
/// When `twicing` says so, the twin's truth is the twiced fit ([`Reference::twiced`]): a
/// cross-validated smoother can round off the curvature a family's bias comes from, and
/// twicing gives much of it back; [`Twicing::Auto`] twices on [`TWICE_FROM_INPUTS`] or more
/// inputs and, with fewer, when that predicts better on the table's folds (measured in
/// `docs/twin-calibration.md` §0). Deterministic given `seed`.
/// Errors when the table has fewer than 6 rows.
pub fn fit_regression(
    x: ArrayView2<'_, f64>,
    y: &[f64],
    seed: u64,
    rule: Rule,
    method: Option<Method>,
    twicing: Twicing,
    source: &str,
) -> Result<RegressionFit, String> {
    fit_regression_shaped(
        x,
        y,
        seed,
        rule,
        method,
        twicing,
        NoiseFit::default(),
        SHARPEN,
        source,
    )
}

/// How [`fit_regression_shaped`] measures the noise.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct NoiseFit {
    /// The noise's bootstrap tables draw from the standardized residuals (a twin whose noise is
    /// `shape = "residuals"`).
    pub resample: bool,
    /// Every row is a query row of the estimator: none of the rows where the reference changes
    /// most is left out ([`noise_design`]). For varying noise, whose largest values often sit
    /// exactly there (the reference follows noise where there is most of it), so that leaving
    /// them out would hide them (measured: docs/twin-calibration.md §2.10).
    pub all_rows: bool,
}

/// [`fit_regression`] with the noise measured as `how` says. For a twin whose noise is
/// resampled from its residuals (`how.resample`) the noise's bootstrap tables draw their noise
/// from the standardized residuals of the fit made once ([`crate::dgp::standardized_residuals`])
/// instead of a Gaussian, so that its spread sees the table's noise shape (heavy tails; measured
/// in `docs/twin-calibration.md` §2.8); for varying noise (`how.all_rows`) no row is left out
/// of the estimator. The twin's truth is then the recipe [`Choice::sharpened`] by `sharpen`
/// ([`SHARPEN`] in [`fit_regression`]; 1 keeps the cross-validated tuning), after the noise
/// was measured with the cross-validated one. Errors as [`fit_regression`] does, and when the
/// residuals have no spread.
#[allow(clippy::too_many_arguments)]
pub fn fit_regression_shaped(
    x: ArrayView2<'_, f64>,
    y: &[f64],
    seed: u64,
    rule: Rule,
    method: Option<Method>,
    twicing: Twicing,
    how: NoiseFit,
    sharpen: f64,
    source: &str,
) -> Result<RegressionFit, String> {
    if y.len() < select::FOLDS + 1 {
        return Err(format!(
            "{} rows; a regression twin needs at least {}",
            y.len(),
            select::FOLDS + 1
        ));
    }
    // Varying noise keeps every input: its σ²(x) smoother is not measured on inputs left out.
    let mut selection = select::select(x, y, seed, rule, !how.all_rows);
    let at_rows = |r: &Reference| -> Vec<f64> { r.mean_at_rows(x) };
    let once = Reference::fit(x, ArrayView1::from(y), 0, &selection.choice, false, source)?;
    let once_rows = at_rows(&once);
    // The noise's correction is measured with the fit made once: the twiced fit carries more of
    // the table's noise, whose roughness the correction would count as the truth's and subtract
    // (measured: docs/twin-calibration.md §0).
    // With inputs left out ([`Choice::inputs`]) the noise is measured on the inputs kept, as on
    // a table of those columns alone: the estimator, its design and its correction never see
    // the others (measured: docs/twin-calibration.md §0.13).
    let x_full = x;
    let cut = selection
        .choice
        .inputs
        .as_ref()
        .map(|c| super::reference::columns(x, c));
    let x = cut.as_ref().map_or(x.view(), |c| c.view());
    let kept_metric = selection.choice.on_kept_inputs().metric;
    let method = method.unwrap_or(twin_noise_method(x.ncols(), chosen_r2(&selection)));
    // The estimator measures distance as the reference does: with the input weights the
    // choice kept, inputs the response barely depends on no longer spread the neighbours
    // (measured: docs/twin-calibration.md §0.2).
    let pool = if how.resample {
        Some(crate::dgp::standardized_residuals(
            y,
            &once_rows,
            &vec![1.0; y.len()],
        )?)
    } else {
        None
    };
    let metric = kept_metric.as_deref();
    // GSJS orders one input and ignores weights.
    let weighted = metric.is_some() && method != Method::Gsjs;
    let design = if how.all_rows {
        noise::Design::weighted(method, x, metric)
    } else {
        noise_design(method, x, metric, &once_rows)
    };
    let noise = design.as_ref().and_then(|d| {
        correct_noise_on(
            d,
            x,
            y,
            &once_rows,
            NOISE_TABLES,
            seed,
            weighted,
            pool.as_deref(),
        )
    });
    let noise_weights = match (&design, &noise) {
        (Some(d), Some(_)) => d.noise_weights(),
        _ => Vec::new(),
    };
    let check = match twicing {
        Twicing::Auto if x.ncols() < TWICE_FROM_INPUTS => {
            select::twicing_check(x_full, y, seed, &selection.choice)
        }
        _ => None,
    };
    // A polynomial reference is a least-squares projection: twicing it gives back the same
    // fit, so it is left once whatever `--twicing` says (`on` wrote `twice = true` and said it
    // "gives back curvature", to no effect; the scenario reader refuses that recipe).
    let projection = selection.choice.family == super::reference::Candidate::Poly;
    let twice = match twicing {
        Twicing::On => !projection,
        Twicing::Off => false,
        Twicing::Auto => {
            !projection && (x.ncols() >= TWICE_FROM_INPUTS || check.is_some_and(|c| c.twice()))
        }
    };
    // The twin's truth is sharpened after the noise was measured and the twicing decided,
    // both with the cross-validated recipe (measured so: docs/twin-calibration.md §0.5).
    let mut cv_choice = selection.choice.clone();
    let (once, once_rows) = if sharpen != 1.0 {
        selection.choice = cv_choice.sharpened(sharpen);
        let r = Reference::fit(
            x_full,
            ArrayView1::from(y),
            0,
            &selection.choice,
            false,
            source,
        )?;
        let rows = at_rows(&r);
        (r, rows)
    } else {
        (once, once_rows)
    };
    let (reference, f_rows) = if twice {
        let r = once.twiced_with_fit(x_full, ArrayView1::from(y), &once_rows)?;
        selection.choice.twice = true;
        cv_choice.twice = true;
        let rows = at_rows(&r);
        (r, rows)
    } else {
        (once, once_rows)
    };
    Ok(RegressionFit {
        selection,
        reference,
        f_rows,
        noise,
        noise_weights,
        twicing: check,
        twicing_mode: twicing,
        cv_choice,
        sharpen,
    })
}

/// What `lossprism twin` measured when it wrote a twin scenario (`[data.fit_report]`),
/// informational: `run` echoes it in the result (`scenario.twin`) and the HTML report, and
/// nothing in the run depends on it.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct FitReport {
    /// The factor the reference's smoothing was sharpened by ([`SHARPEN`]; `None`: not
    /// sharpened, or a twin written before the sharpening).
    pub sharpen: Option<f64>,
    /// The noise estimate and its correction.
    pub noise: Option<NoiseRecord>,
    /// The fidelity check.
    pub fidelity: Option<FidelityRecord>,
}

/// The noise as `lossprism twin` estimated it.
#[derive(Debug, Clone, PartialEq)]
pub struct NoiseRecord {
    /// Estimator name (`gsjs`, `gamma`, `nn`).
    pub method: String,
    /// Raw estimate.
    pub raw: f64,
    /// Bias subtracted.
    pub correction: f64,
    /// Corrected σ² (the scenario's `sd` squared).
    pub value: f64,
    /// Its standard error.
    pub stderr: f64,
    /// Bootstrap tables behind the standard error.
    pub tables: usize,
    /// Whether the estimator's neighbour distances weighted the inputs as the reference does
    /// (`weighted = true`; absent in twins written before, which did not).
    pub weighted: bool,
    /// Table rows the estimator left out as query rows (`left_out`; absent: none).
    pub left_out: usize,
}

impl From<&NoiseCorrection> for NoiseRecord {
    fn from(c: &NoiseCorrection) -> NoiseRecord {
        NoiseRecord {
            method: c.method.name().into(),
            raw: c.raw,
            correction: c.correction,
            value: c.value,
            stderr: c.se,
            tables: c.tables,
            weighted: c.weighted,
            left_out: c.left_out,
        }
    }
}

/// The fidelity check: tables drawn from the twin, each twinned again, each family run on the
/// twin of the twin and compared with its run on the twin.
#[derive(Debug, Clone, PartialEq)]
pub struct FidelityRecord {
    /// Tables drawn from the twin.
    pub tables: usize,
    /// Replicates of every run of a twin of the twin.
    pub replicates: usize,
    /// Replicates of the twin's own run (the scenario's; `None` in scenarios written before the
    /// twin's own pick became the recommended one, whose twin run had `replicates` and whose
    /// recommendation was the bias-corrected pick).
    pub twin_replicates: Option<usize>,
    /// One entry per family checked.
    pub models: Vec<FidelityModel>,
}

/// One family's fidelity.
#[derive(Debug, Clone, PartialEq)]
pub struct FidelityModel {
    /// Family name.
    pub family: String,
    /// Knob name.
    pub knob: String,
    /// The knob value with the lowest expected loss on the twin.
    pub pick: f64,
    /// The twin's one-standard-error set.
    pub one_se: Vec<f64>,
    /// The pick of each twin of a twin.
    pub picks: Vec<f64>,
    /// Share of those picks inside `one_se`.
    pub in_one_se: f64,
    /// Mean over tables of the mean |EL*(g)/EL(g) − 1| over the grid.
    pub curve_error: f64,
    /// The pick of the bias-corrected curve (the lowest of `corrected_loss`).
    pub corrected_pick: f64,
    /// The grid.
    pub grid: Vec<f64>,
    /// The expected loss on the twin per grid value (the fidelity check's run).
    pub loss: Vec<f64>,
    /// The bias-corrected expected loss `2·EL(g) − mean_t EL*_t(g)` (the bootstrap bias
    /// correction of Efron and Tibshirani, *An Introduction to the Bootstrap*, 1993, ch. 10,
    /// applied per grid value, with the twins of the twin as the bootstrap worlds).
    pub corrected_loss: Vec<f64>,
}

impl FidelityModel {
    /// The pick `lossprism twin` recommends for this family: the twin's own lowest expected
    /// loss (`pick`, from a run at the scenario's replicates, so `run` marks the same value).
    /// With the twiced reference it was inside the true one-SE set more often than the
    /// bias-corrected pick (`corrected_pick`, still reported beside it) and had the smaller
    /// regret (`docs/twin-calibration.md` §0); with the reference fitted once it was the other
    /// way round.
    pub fn headline_pick(&self) -> f64 {
        self.pick
    }
}

impl FidelityModel {
    /// The first field that contradicts the others (with `tables` tables drawn), and why: lists
    /// of different lengths, a pick that is not the lowest of its curve or off the grid, a
    /// one-SE set without the pick, picks off the grid or not one per table, a share of picks
    /// inside the set that is not theirs, a negative curve distance ([`FidelityRecord::problem`]).
    pub fn problem(&self, tables: usize) -> Option<(&'static str, String)> {
        let num = crate::fmt::fmt_exact;
        let n = self.grid.len();
        if n == 0 || self.loss.len() != n || self.corrected_loss.len() != n {
            return Some((
                "loss",
                format!(
                    "has {} values and `corrected_loss` {} for a grid of {n}",
                    self.loss.len(),
                    self.corrected_loss.len()
                ),
            ));
        }
        let on_grid = |v: f64| self.grid.contains(&v);
        let lowest = |l: &[f64]| l.iter().copied().fold(f64::INFINITY, f64::min);
        let at = |v: f64, l: &[f64]| self.grid.iter().position(|g| *g == v).map(|j| l[j]);
        if at(self.pick, &self.loss) != Some(lowest(&self.loss)) {
            return Some((
                "pick",
                format!(
                    "is {}, not the grid value of the lowest `loss`",
                    num(self.pick)
                ),
            ));
        }
        if at(self.corrected_pick, &self.corrected_loss) != Some(lowest(&self.corrected_loss)) {
            return Some((
                "corrected_pick",
                format!(
                    "is {}, not the grid value of the lowest `corrected_loss`",
                    num(self.corrected_pick)
                ),
            ));
        }
        if !self.one_se.contains(&self.pick) || !self.one_se.iter().all(|v| on_grid(*v)) {
            return Some((
                "one_se",
                "does not hold the pick, or holds a value off the grid".into(),
            ));
        }
        if self.picks.len() != tables || !self.picks.iter().all(|v| on_grid(*v)) {
            return Some((
                "picks",
                format!(
                    "has {} values for {tables} tables, or a value off the grid",
                    self.picks.len()
                ),
            ));
        }
        let inside = self
            .picks
            .iter()
            .filter(|p| self.one_se.contains(p))
            .count();
        let share = inside as f64 / self.picks.len().max(1) as f64;
        if (self.in_one_se - share).abs() > 1e-12 {
            return Some((
                "in_one_se",
                format!(
                    "is {}, but {inside} of the {} picks are in `one_se`",
                    num(self.in_one_se),
                    self.picks.len()
                ),
            ));
        }
        if self.curve_error < 0.0 || self.curve_error.is_nan() {
            return Some((
                "curve_error",
                format!("is {}, below 0", num(self.curve_error)),
            ));
        }
        None
    }
}

impl FidelityRecord {
    /// The first statement of the record that contradicts itself, with its key (`replicates`,
    /// `models[1].pick`) and why: fewer than 2 replicates or no table, or a model's
    /// [`FidelityModel::problem`]. Read by the scenario loader (`[data.fit_report.fidelity]`)
    /// and by `check` (a result's `scenario.twin.fidelity`), so a hand-edited record is refused
    /// wherever it is read (a pick of 99 off the grid was printed as the twin's recommendation).
    pub fn problem(&self) -> Option<(String, String)> {
        if self.replicates < 2 || self.tables < 1 {
            return Some((
                "replicates".into(),
                format!(
                    "is {} over {} tables: a fidelity check draws at least 1 table and runs at \
                     least 2 replicates",
                    self.replicates, self.tables
                ),
            ));
        }
        self.models.iter().enumerate().find_map(|(i, m)| {
            m.problem(self.tables)
                .map(|(k, why)| (format!("models[{i}].{k}"), why))
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    /// A measured column beyond 2^53 (every float there is whole) is jittered, and a column of
    /// a few whole levels is not.
    #[test]
    fn huge_measured_columns_are_jittered_and_counts_are_not() {
        let n = 60;
        let huge = Array2::from_shape_fn((n, 1), |(i, _)| 1e140 * ((i * 37 % 61) as f64 / 61.0));
        assert!(!Jitter::fit(huge.view(), 1.0).is_plain());
        let levels = Array2::from_shape_fn((n, 1), |(i, _)| (i % 4) as f64);
        assert!(Jitter::fit(levels.view(), 1.0).is_plain());
    }

    #[test]
    fn the_varying_level_undoes_the_estimators_row_weights() {
        // σ²(x) = c·v(x): the level is the row mean of c·v with c chosen so that Σ_r w_r c v_r
        // is the corrected estimate. Uniform weights give the estimate itself; weights on the
        // rows where v is largest give a lower level, on the smallest a higher one.
        let n = 80;
        let x = Array2::from_shape_fn((n, 1), |(i, _)| (i as f64 * 0.618034).fract());
        let y: Vec<f64> = (0..n)
            .map(|i| x[[i, 0]] * ((i * 37 % 29) as f64 / 14.0 - 1.0) * 3.0)
            .collect();
        let r = Reference::fit(
            x.view(),
            ArrayView1::from(&y),
            0,
            &crate::dgp::reference::Choice::knn(4, false),
            true,
            "t",
        )
        .unwrap();
        let uniform = vec![1.0 / n as f64; n];
        let l = varying_level(&r, x.view(), 0.8, &uniform).unwrap();
        assert!((l - 0.8).abs() < 1e-12, "{l}");
        let v: Vec<f64> = (0..n).map(|i| r.var_at(&[x[[i, 0]]]).unwrap()).collect();
        let mid = {
            let mut s = v.clone();
            s.sort_by(f64::total_cmp);
            s[n / 2]
        };
        let on = |high: bool| -> Vec<f64> {
            let w: Vec<f64> = v
                .iter()
                .map(|&a| f64::from(u8::from((a > mid) == high)))
                .collect();
            let t: f64 = w.iter().sum();
            w.iter().map(|a| a / t).collect()
        };
        assert!(varying_level(&r, x.view(), 0.8, &on(true)).unwrap() < 0.8);
        assert!(varying_level(&r, x.view(), 0.8, &on(false)).unwrap() > 0.8);
        assert!(varying_level(&r, x.view(), 0.8, &uniform[1..]).is_none());
        assert!(varying_level(&r, x.view(), -1.0, &uniform).is_none());
    }

    #[test]
    fn kept_variance_draws_match_the_table_and_the_factor_is_exact() {
        // Three columns of 300 rows: normal (no bound near the data), uniform (reflection at
        // both ends) and a 0/1 indicator (on its levels). With the variance kept, the drawn
        // columns' variance about the table mean is the table's (the factor is computed
        // exactly, so only the draws' sampling error remains: 400 000 draws, relative SE of a
        // variance about 0.2–0.3%, so 1.5% is five or more SEs); without it the normal column
        // gains most of h² (11% of its variance here) and the uniform one almost nothing.
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(9);
        let n = 300;
        let x = Array2::from_shape_fn((n, 3), |(i, j)| match j {
            0 => StandardNormal.sample(&mut rng),
            1 => rng.gen::<f64>(),
            _ => f64::from(u8::from(i % 3 == 0)),
        });
        let moments = |j: &Jitter, rng: &mut rand_chacha::ChaCha8Rng| -> Vec<f64> {
            let d = j.draw(&x, 400_000, rng);
            (0..3)
                .map(|c| {
                    let m = x.column(c).sum() / n as f64;
                    let t = x.column(c).iter().map(|v| (v - m).powi(2)).sum::<f64>() / n as f64;
                    let v =
                        d.column(c).iter().map(|v| (v - m).powi(2)).sum::<f64>() / d.nrows() as f64;
                    v / t
                })
                .collect()
        };
        let kept = Jitter::fit_keeping(x.view(), 1.0, true);
        assert!(kept.keeps_variance());
        // The normal column is shrunk; the uniform one hardly (the reflection at its bounds
        // already keeps its variance); the indicator stays on its levels.
        assert!(kept.shrink[0] < 0.95 && kept.shrink[1] > 0.98 && kept.shrink[2] == 1.0);
        let r = moments(&kept, &mut rng);
        for (c, v) in r.iter().enumerate() {
            assert!((v - 1.0).abs() < 0.015, "column {c}: variance ratio {v}");
        }
        let plain = Jitter::fit(x.view(), 1.0);
        assert!(!plain.keeps_variance());
        let r = moments(&plain, &mut rng);
        // The plain law widens the normal column (by h² ≈ 15% of its variance before the
        // reflection at the sample's extremes takes part of it back; 11% here).
        let h2 = (plain.h[0] / x.column(0).std(0.0)).powi(2);
        assert!(h2 > 0.1, "{h2}");
        assert!(
            r[0] > 1.05 && r[0] < 1.0 + h2 + 0.015,
            "{} against 1 + {h2}",
            r[0]
        );
        // Drawn values stay in the observed range either way.
        let d = kept.draw(&x, 10_000, &mut rng);
        for c in 0..2 {
            assert!(d
                .column(c)
                .iter()
                .all(|v| *v >= kept.lo[c] && *v <= kept.hi[c]));
        }
    }

    #[test]
    fn discrete_columns_stay_on_their_levels_and_draws_stay_in_range() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(1);
        let x = Array2::from_shape_fn((200, 3), |(i, j)| match j {
            0 => (i % 2) as f64,
            1 => (i % 7) as f64 * 0.5,
            _ => (i as f64 * 0.37).sin(),
        });
        let jit = Jitter::fit(x.view(), 1.0);
        assert_eq!((jit.h[0], jit.h[1]), (0.0, 0.0));
        assert!(jit.h[2] > 0.0);
        let d = jit.draw(&x, 500, &mut rng);
        assert!(d.column(0).iter().all(|v| *v == 0.0 || *v == 1.0));
        assert!(d.column(1).iter().all(|v| (v * 2.0).fract() == 0.0));
        assert!(d
            .column(2)
            .iter()
            .all(|v| *v >= jit.lo[2] && *v <= jit.hi[2]));
        // Silverman's rule with d = 1 continuous column: h = min(sd, IQR/1.349)·(4/(3n))^{1/5}.
        let mut v: Vec<f64> = x.column(2).to_vec();
        v.sort_by(f64::total_cmp);
        let m = v.iter().sum::<f64>() / 200.0;
        let sd = (v.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / 199.0).sqrt();
        let iqr = quantile(&v, 0.75) - quantile(&v, 0.25);
        let h = sd.min(iqr / 1.349) * (4.0f64 / 600.0).powf(0.2);
        assert!((jit.h[2] - h).abs() < 1e-15, "{} vs {h}", jit.h[2]);
    }

    #[test]
    fn plain_jitter_draws_the_resampled_rows() {
        let x = Array2::from_shape_fn((30, 2), |(i, j)| (i * (j + 1)) as f64);
        let jit = Jitter::fit(x.view(), 1.0);
        assert!(jit.is_plain());
        let mut a = rand_chacha::ChaCha8Rng::seed_from_u64(4);
        let mut b = rand_chacha::ChaCha8Rng::seed_from_u64(4);
        assert_eq!(
            jit.draw(&x, 50, &mut a),
            super::super::reference::resample_rows(&x, 50, &mut b)
        );
    }

    #[test]
    fn the_pilot_keeps_a_step_a_step() {
        // Exact: a noise-free step along x1 (two levels, at least PILOT_MIN_LEAF rows on each
        // side, a gap between them) is fitted exactly by one regression tree, so the pilot's
        // roughness on it is the estimator on the step itself; a smooth reference is not.
        let n = 60;
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2);
        let x = Array2::from_shape_fn((n, 2), |(i, j)| {
            if j == 0 {
                (i as f64 + 0.5) / n as f64
            } else {
                rng.gen::<f64>()
            }
        });
        let y: Vec<f64> = (0..n).map(|i| if i < n / 2 { 0.0 } else { 2.0 }).collect();
        let pilot = Pilot::new(x.view(), 9).unwrap();
        assert_eq!(pilot.fit(&y).unwrap().to_vec(), y);
    }

    /// `n` rows of x ~ U[0, 1]², the step f = `height` · [x₁ + x₂ > 1], y = f + `sd` · ε (all
    /// inputs drawn first, then the noise, in row order).
    fn step_table(
        rng: &mut rand_chacha::ChaCha8Rng,
        n: usize,
        height: f64,
        sd: f64,
    ) -> (Array2<f64>, Vec<f64>, Vec<f64>) {
        let x = Array2::from_shape_fn((n, 2), |_| rng.gen::<f64>());
        let f: Vec<f64> = x
            .rows()
            .into_iter()
            .map(|r| if r[0] + r[1] > 1.0 { height } else { 0.0 })
            .collect();
        let y = f
            .iter()
            .map(|v| {
                let e: f64 = StandardNormal.sample(rng);
                v + sd * e
            })
            .collect();
        (x, f, y)
    }

    /// The step of [`step_table`] rounded off by a logistic ramp of width `w`: a smooth
    /// reference that misses it.
    fn rounded_step(x: &Array2<f64>, height: f64, w: f64) -> Vec<f64> {
        x.rows()
            .into_iter()
            .map(|r| height / (1.0 + (-(r[0] + r[1] - 1.0) / w).exp()))
            .collect()
    }

    #[test]
    fn the_noise_check_scales_with_the_response_and_its_se_counts_the_excess() {
        // Exact: regression trees split the same way on 2y as on y and every estimator is a
        // quadratic form, so every variance (raw, corrections, the pilot's excess and both
        // standard errors) is multiplied by exactly 4 when the responses and the reference are
        // doubled (the bootstrap draws the same ε). The SE is sqrt(sampling_se² + excess⁺²).
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(6);
        let (x, _, y) = step_table(&mut rng, 120, 1.5, 0.5);
        // A smooth reference: the step rounded off.
        let fh = rounded_step(&x, 1.5, 0.15);
        let a = correct_noise(Method::Gamma, x.view(), &y, &fh, 30, 4).unwrap();
        let twice = |v: &[f64]| v.iter().map(|t| 2.0 * t).collect::<Vec<_>>();
        let b = correct_noise(Method::Gamma, x.view(), &twice(&y), &twice(&fh), 30, 4).unwrap();
        for (u, v) in [
            (a.raw, b.raw),
            (a.correction, b.correction),
            (a.value, b.value),
            (a.pilot_correction, b.pilot_correction),
            (a.pilot_excess, b.pilot_excess),
            (a.sampling_se, b.sampling_se),
            (a.se, b.se),
        ] {
            assert!(
                (4.0 * u - v).abs() <= 1e-12 * v.abs().max(1e-3),
                "{u} vs {v}"
            );
        }
        let excess = a.pilot_excess.max(0.0);
        assert!((a.se - (a.sampling_se.powi(2) + excess * excess).sqrt()).abs() < 1e-15);
        assert_eq!(a.flagged(), a.pilot_excess > a.sampling_se);
    }

    #[test]
    fn the_pilot_sees_a_step_that_the_smooth_reference_misses() {
        // A 2-D step of height 3 (noise sd 1, n = 300) with a reference that rounds it off: the
        // reference's correction is below half of est(x, f) (exact, no noise involved), and over
        // 48 tables the mean of the pilot's excess over it is positive by more than 4 of its
        // standard errors (sd over tables / √48). Measured when written: the pilot recovers
        // about 40% of est(x, f) here (mean excess 0.05, est(x, f) 0.13); with a smooth pilot the
        // excess is about zero (docs/twin-calibration.md §2), so this can fail.
        let n = 300;
        let tables = 48;
        let mut excess = Vec::new();
        for t in 0..tables as u64 {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(100 + t);
            let (x, f, y) = step_table(&mut rng, n, 3.0, 1.0);
            let fh = rounded_step(&x, 3.0, 0.1);
            // Every row kept (the twin keeps every row above TRIM_MAX_INPUTS inputs; with two
            // it leaves out the rows around the step, and with them the step's share:
            // `a_left_out_step_leaves_the_estimate_nothing_to_miss`).
            let design = noise::Design::new(Method::Gamma, x.view()).unwrap();
            let c = correct_noise_on(&design, x.view(), &y, &fh, 40, t, false, None).unwrap();
            assert_eq!(c.left_out, 0);
            let truth = design.value(ArrayView1::from(&f[..]));
            assert!(c.correction < 0.5 * truth, "{} vs {truth}", c.correction);
            excess.push(c.pilot_excess);
        }
        let m = excess.iter().sum::<f64>() / tables as f64;
        let sd =
            (excess.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / (tables as f64 - 1.0)).sqrt();
        let se = sd / (tables as f64).sqrt();
        assert!(m > 4.0 * se, "excess {m} ± {se}");
    }

    #[test]
    fn a_left_out_step_leaves_the_estimate_nothing_to_miss() {
        // The same 2-D step and rounded reference, on the design the twin uses: the rows where
        // the reference changes most are left out, and with them most of the step's share of
        // the estimate: est(x, f) on the kept rows, averaged over the tables, is below half its
        // average on every row (no noise involved; about a fifth when written). Over 48 tables
        // the corrected σ̂² is then within 4 standard errors (sd over tables / √48) of the true
        // σ² = 1 (known by construction), where keeping every row leaves it high by more than
        // that.
        let n = 300;
        let tables = 48;
        let (mut kept, mut all) = (Vec::new(), Vec::new());
        let mut shares = (0.0, 0.0);
        for t in 0..tables as u64 {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(100 + t);
            let (x, f, y) = step_table(&mut rng, n, 3.0, 1.0);
            let fh = rounded_step(&x, 3.0, 0.1);
            let c = correct_noise(Method::Gamma, x.view(), &y, &fh, 0, t).unwrap();
            assert_eq!(c.left_out, n / 5);
            let every = noise::Design::new(Method::Gamma, x.view()).unwrap();
            let cut = every.trimmed(&fh, TRIM_SHARE);
            let (share_all, share_cut) = (
                every.value(ArrayView1::from(&f[..])),
                cut.value(ArrayView1::from(&f[..])),
            );
            shares.0 += share_all / tables as f64;
            shares.1 += share_cut / tables as f64;
            kept.push(c.value);
            all.push(
                correct_noise_on(&every, x.view(), &y, &fh, 0, t, false, None)
                    .unwrap()
                    .value,
            );
        }
        let mean_se = |v: &[f64]| {
            let m = v.iter().sum::<f64>() / v.len() as f64;
            let sd =
                (v.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / (v.len() as f64 - 1.0)).sqrt();
            (m, sd / (v.len() as f64).sqrt())
        };
        assert!(shares.1 < 0.5 * shares.0, "step share {shares:?}");
        let ((mk, sk), (ma, sa)) = (mean_se(&kept), mean_se(&all));
        assert!((mk - 1.0).abs() < 4.0 * sk, "rows left out: {mk} ± {sk}");
        assert!(ma - 1.0 > 4.0 * sa, "every row: {ma} ± {sa}");
    }

    /// The twin's noise estimator measures distance as its reference does: with the input
    /// weights the choice kept (one input of four matters much, the others a little, so weights
    /// are kept and no input is left out), with plain inputs when none are kept (a forced
    /// forest tunes no weights), and on the inputs kept alone when the others are left out
    /// (then exactly the estimate on a table of those columns).
    #[test]
    fn the_twin_noise_uses_the_kept_input_weights() {
        use crate::dgp::reference::Choice;
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(12);
        let n = 300;
        let x = Array2::from_shape_fn((n, 4), |_| rng.gen::<f64>());
        let z: Vec<f64> = (0..n).map(|_| StandardNormal.sample(&mut rng)).collect();
        // Only the first input matters: the other three are left out.
        let y: Vec<f64> = (0..n)
            .map(|i| 2.0 * (6.0 * x[[i, 0]]).sin() + 0.3 * z[i])
            .collect();
        let fit = fit_regression(x.view(), &y, 3, Rule::Best, None, Twicing::Auto, "t").unwrap();
        assert_eq!(fit.selection.choice.inputs, Some(vec![0]));
        let x1 = x.select(ndarray::Axis(1), &[0]);
        let alone = fit_regression(x1.view(), &y, 3, Rule::Best, None, Twicing::Auto, "t").unwrap();
        assert_eq!(fit.noise, alone.noise);
        assert_eq!(fit.noise_weights, alone.noise_weights);
        assert_eq!(
            fit.reference.mean_at_rows(x.view()),
            alone.reference.mean_at_rows(x1.view())
        );
        // Every input matters, the first most: weights are kept, nothing is left out.
        let y: Vec<f64> = (0..n)
            .map(|i| {
                2.0 * (6.0 * x[[i, 0]]).sin()
                    + 0.8 * x[[i, 1]]
                    + 0.6 * x[[i, 2]]
                    + 0.5 * x[[i, 3]]
                    + 0.3 * z[i]
            })
            .collect();
        let fit = fit_regression(x.view(), &y, 3, Rule::Best, None, Twicing::Auto, "t").unwrap();
        assert_eq!(
            fit.selection.choice.inputs, None,
            "{:?}",
            fit.selection.inputs
        );
        let w = fit.selection.choice.metric.clone().expect("weights kept");
        // The noise is measured with the cross-validated recipe, before the sharpening.
        assert_eq!(fit.selection.choice, fit.cv_choice.sharpened(SHARPEN));
        let once = Choice {
            twice: false,
            ..fit.cv_choice.clone()
        };
        let f = Reference::fit(x.view(), ArrayView1::from(&y[..]), 0, &once, false, "t")
            .unwrap()
            .mean_at_rows(x.view());
        let noise = fit.noise.unwrap();
        assert!(noise.weighted);
        let m = Method::Gamma;
        let by_hand = correct_noise_weighted(m, x.view(), Some(&w), &y, &f, NOISE_TABLES, 3, None);
        assert_eq!(Some(noise), by_hand);
        let plain = correct_noise(m, x.view(), &y, &f, NOISE_TABLES, 3).unwrap();
        assert_ne!(noise.raw, plain.raw);
        let forest = Rule::Only(crate::dgp::reference::Candidate::Forest);
        let fit = fit_regression(x.view(), &y, 3, forest, None, Twicing::Auto, "t").unwrap();
        assert!(fit.selection.choice.metric.is_none());
        // Four inputs: above TRIM_MAX_INPUTS, so every row is kept.
        let kept = fit.noise.unwrap();
        assert!(!kept.weighted);
        assert_eq!(kept.left_out, 0);
    }

    #[test]
    fn gradient_weights_find_the_input_the_reference_uses() {
        // y = 3·x1 exactly, x2 and x3 unused: a k-NN reference on the three standardized inputs
        // changes mostly along x1 (weight 1 by construction), far less along the others (about
        // 0.35 when written: a neighbour set also moves along unused inputs).
        // Weights of 1 leave the noise estimator as it was, bit for bit.
        use crate::dgp::reference::{Choice, Reference};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let n = 200;
        let x = Array2::from_shape_fn((n, 3), |_| rng.gen::<f64>());
        let y: Array1<f64> = x.column(0).mapv(|v| 3.0 * v);
        let r = Reference::fit(x.view(), y.view(), 0, &Choice::knn(5, true), false, "t").unwrap();
        let w = select::gradient_weights(x.view(), &r);
        assert_eq!(w[0], 1.0);
        assert!(w[1] < 0.5 && w[2] < 0.5, "{w:?}");
        let yv = y.to_vec();
        let f = r.mean_at_rows(x.view());
        let plain = correct_noise(Method::Gamma, x.view(), &yv, &f, 10, 1).unwrap();
        let ones = correct_noise_weighted(
            Method::Gamma,
            x.view(),
            Some(&[1.0; 3]),
            &yv,
            &f,
            10,
            1,
            None,
        )
        .unwrap();
        assert!(ones.weighted && !plain.weighted);
        assert_eq!(
            plain,
            NoiseCorrection {
                weighted: false,
                ..ones
            }
        );
        let weighted =
            correct_noise_weighted(Method::Gamma, x.view(), Some(&w), &yv, &f, 10, 1, None)
                .unwrap();
        assert_ne!(weighted.raw, plain.raw);
    }

    #[test]
    fn residual_shape_moments_and_verdicts() {
        // By hand: residuals 0,0,0,0,0,0,0,8 (n = 8): mean 1, m2 = (7·1 + 49)/8 = 7,
        // m3 = (7·(−1) + 343)/8 = 42, m4 = (7 + 2401)/8 = 301.
        let y = [0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 8.0];
        let s = ResidualShape::of(&y, &[0.0; 8]).unwrap();
        assert!((s.skewness - 42.0 / 7f64.powf(1.5)).abs() < 1e-12);
        assert!((s.excess_kurtosis - (301.0 / 49.0 - 3.0)).abs() < 1e-12);
        assert!((s.skewness_se() - (6.0f64 / 8.0).sqrt()).abs() < 1e-15);
        assert!(ResidualShape::of(&[1.0; 8], &[0.0; 8]).is_none());
        assert!(ResidualShape::of(&y[..7], &[0.0; 7]).is_none());
        // Gaussian noise is not called non-Gaussian; Exponential − 1 noise (skewness 2, excess
        // kurtosis 6) is, at n = 400, on every one of 20 seeds.
        let mut gaussian = 0;
        let mut skewed = 0;
        for seed in 0..20 {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
            let g: Vec<f64> = (0..400).map(|_| StandardNormal.sample(&mut rng)).collect();
            let e: Vec<f64> = (0..400)
                .map(|_| -(1.0 - rng.gen::<f64>()).ln() - 1.0)
                .collect();
            gaussian += ResidualShape::of(&g, &[0.0; 400]).unwrap().non_gaussian() as usize;
            skewed += ResidualShape::of(&e, &[0.0; 400]).unwrap().non_gaussian() as usize;
        }
        assert_eq!((gaussian, skewed), (0, 20));
    }

    #[test]
    fn the_correction_is_the_bootstrap_mean_bias_in_the_limit() {
        // Exact identity (quadratic forms, see the module docs): the mean over bootstrap tables
        // of est(f̂ + σε) − σ² converges to est(x, f̂); checked within 4 Monte Carlo standard
        // errors over 400 tables, for each estimator.
        let n = 150;
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(8);
        for (p, method) in [
            (1, Method::Gsjs),
            (2, Method::Gamma),
            (2, Method::NearestNeighbour),
            (2, Method::Plane),
            (3, Method::Plane),
        ] {
            let x = Array2::from_shape_fn((n, p), |_| rng.gen::<f64>());
            let f: Vec<f64> = x
                .rows()
                .into_iter()
                .map(|r| (6.0 * r[0]).sin() + r.iter().sum::<f64>())
                .collect();
            let y: Vec<f64> = f.iter().map(|v| v + 0.3 * rng.gen::<f64>()).collect();
            let c = correct_noise(method, x.view(), &y, &f, 20, 5).unwrap();
            // The design the twin uses: with at most TRIM_MAX_INPUTS inputs the Gamma test
            // leaves out the rows where f̂ changes most, and the identity holds for it too.
            let design = noise::Design::new(method, x.view())
                .unwrap()
                .trimmed(&f, TRIM_SHARE);
            let trims = matches!(method, Method::Gamma | Method::Plane);
            assert_eq!(c.left_out, if trims { n / 5 } else { 0 });
            let s2: f64 = 0.25;
            // The mean bias over 400 bootstrap tables must lie within 4 of its standard
            // errors of the exact correction.
            let check = |pool: Option<&[f64]>, what: &str| {
                let d: Vec<f64> = (0..400)
                    .map(|b| {
                        let ys = bootstrap_responses_from(&f, s2.sqrt(), pool, 11, b);
                        design.value(ys.view()) - s2
                    })
                    .collect();
                let m = d.iter().sum::<f64>() / d.len() as f64;
                let sd = (d.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / 399.0).sqrt();
                let se = sd / 20.0;
                assert!(
                    (m - c.correction).abs() < 4.0 * se,
                    "{method:?}{what}: bootstrap bias {m} ± {se}, exact {}",
                    c.correction
                );
            };
            check(None, "");
            assert!(c.correction > 0.0 || method == Method::Gamma);
            // The identity needs only i.i.d. noise of mean 0 and variance σ²: it holds for
            // resampled skewed residuals (Exponential − 1, standardized) too.
            let e: Vec<f64> = (0..n)
                .map(|_| -(1.0 - rng.gen::<f64>()).ln() - 1.0)
                .collect();
            let pool =
                crate::dgp::standardized_residuals(&e, &vec![0.0; n], &vec![1.0; n]).unwrap();
            check(Some(&pool), ", resampled");
        }
    }
}
