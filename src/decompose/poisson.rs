//! Poisson deviance for count responses, decomposed as a Bregman divergence around the dual
//! ("central") prediction (Pfau 2013, "A Generalized Bias-Variance Decomposition for Bregman
//! Divergences", unpublished note, Theorem 0.1).
//!
//! # Loss
//!
//! For a count (or any non-negative response) y and a predicted mean μ > 0 the deviance is
//!
//! `D(y, μ) = 2 [y log(y/μ) − (y − μ)]`, with `0 log 0 = 0`, so `D(0, μ) = 2μ`.
//!
//! It is the Bregman divergence of the convex generator `φ(t) = 2(t log t − t)`:
//! `φ(y) − φ(μ) − φ'(μ)(y − μ)` with `φ'(μ) = 2 log μ` expands to the line above.
//!
//! # Decomposition (exact)
//!
//! At an evaluation point the response is `Y ~ Poisson(λ)` (λ = the truth formula, > 0), drawn
//! independently of the training set D that gives the predicted mean `μ_D`. For a Bregman
//! divergence the central prediction is the point whose gradient is the mean gradient,
//! `φ'(μ̃) = E_D φ'(μ_D)`; here `log μ̃ = E_D log μ_D`: **μ̃ is the geometric mean** of the
//! predicted means. Pfau's identity reads
//!
//! `E D(Y, μ_D) = E D(Y, λ) + D(λ, μ̃) + E_D D(μ̃, μ_D)`
//!
//! - noise `N = E D(Y, λ) = 2 (E[Y log Y] − λ log λ)`,
//! - bias `B = D(λ, μ̃) = 2 [λ log(λ/μ̃) − λ + μ̃]`,
//! - variance `V = E_D D(μ̃, μ_D) = 2 [μ̃ log μ̃ − μ̃ E log μ_D − μ̃ + E μ_D] = 2 (E μ_D − μ̃)`:
//!   twice the arithmetic minus the geometric mean of the predicted means (≥ 0).
//!
//! Check: `N + B + V = 2 E[Y log Y] − 2λ E log μ_D − 2λ + 2 E μ_D`, which is `E D(Y, μ_D)`
//! expanded with `E Y = λ` and Y independent of μ_D. The identity holds for the empirical
//! distribution of R replicates too (it is an algebraic identity in `E log μ` and `E μ`).
//!
//! # Noise term
//!
//! `E D(Y, λ) = Σ_y P(Y = y) D(y, λ)`, summed over the Poisson probability mass function over
//! `y ∈ [mode − w, mode + w]`, `w = ⌈8√λ⌉ + 30`, the masses obtained by ratios
//! `P(y+1)/P(y) = λ/(y+1)` from the mode and normalized over the window (no overflow for large λ;
//! the mass left out is below 1e-14). Summing `P(y)·D(y, λ)` (terms of order one) rather than
//! `E[Y log Y] − λ log λ` (a difference of two large numbers) keeps full precision. For
//! `λ > 10⁴` the asymptotic expansion `1 + 1/(6λ) + 1/(6λ²)` is used (its next term is of order
//! λ⁻³ < 1e-12; the expansion is checked against the sum in the tests).
//!
//! # Accumulator and estimators
//!
//! Per cell the sum over the replicate fits of `log μ` (`sum_log_mu`) and of `μ` (`sum_mu`).
//! With the means `ℓ̂` and `m̂`: `μ̃ = exp ℓ̂`, the expected loss
//! `N + 2[λ(log λ − ℓ̂) − λ + m̂]` is linear in (ℓ̂, m̂), hence **unbiased** at any R; the bias and
//! the variance are plug-in estimates through `exp ℓ̂` (consistent; `E exp ℓ̂ ≈ μ̃ (1 +
//! Var(log μ)/(2R))`, so the variance is biased down and the bias up by that order-1/R amount;
//! they always add up to the unbiased `expected loss − noise`). With `fit_seeds = S` every fit
//! counts as one prediction.
//!
//! # Standard errors
//!
//! Delete-a-block jackknife for every term; the bias adds in quadrature the variance of its
//! second-order part, `mean_e μ̃_e d_e²` in the errors `d_e` of `ℓ̂_e`, which the jackknife
//! misses when the errors move together across the points (a tree's leaf):
//! [`Loss::second_order_stderr`] below, `docs/bias-se-second-order.md` ("Poisson deviance").
//! Known truths only; on a table the jackknife alone.
//!
//! # Positive means
//!
//! The deviance needs `μ > 0`: a mean of 0 gives an infinite deviance wherever a count is
//! positive, and a negative mean has none. Families that can predict negative values (poly,
//! ridge, ...) are refused at plan time unless they declare [`crate::family::Caps::positive`];
//! tree and k-NN predict averages of training counts, never negative, and a mean of exactly 0
//! (every count averaged is 0) stops the run where every prediction is checked
//! ([`Loss::check_prediction`]) with a message naming the remedy (average more counts).
//!
//! # Precision
//!
//! The terms are of order 1 but are computed from sums of `μ` and `log μ`, numbers of order λ:
//! they keep about `16 − log10 λ` digits. Measured on a constant mean with k-NN (400 replicates)
//! the terms held to well within their standard errors up to λ = 1e10, the bias moved by ten
//! standard errors at 1e11 and went negative at 1e12. Runs with mean counts above 1e8 are
//! refused before they start (`runner`'s `COUNT_MAX`), with the squared loss as the advice.
//!
//! # Tables (observed counts)
//!
//! The observed count stands for λ and the noise is folded into the bias: `bias+noise =
//! D(y, μ̃)`, and the expected loss is the out-of-bag mean deviance
//! `2[y(log y − ℓ̂) − y + m̂]`; rows held out in fewer than two replicates are skipped.

use super::term as info;
use super::{
    Acc, ArraySpec, Batch, Group, Identity, Kind, Loss, Role, Row, Shape, Target, TermInfo,
};
use crate::family::Task;

/// The Poisson deviance.
#[derive(Debug, Clone, Copy, Default)]
pub struct Poisson;

/// Per cell: Σ over the replicate fits of log μ.
const SUM_LOG: usize = 0;
/// Per cell: Σ over the replicate fits of μ.
const SUM_MU: usize = 1;
/// Per grid value (every point evaluated): Σ_r of the mean deviance against fresh counts.
const DIRECT: usize = 2;

/// Above this mean the noise term uses the asymptotic expansion.
pub const EXPANSION_FROM: f64 = 1e4;

/// `y log(y/μ)` with `0 log 0 = 0`.
fn xlogx_over(y: f64, mu: f64) -> f64 {
    if y == 0.0 {
        0.0
    } else {
        y * (y / mu).ln()
    }
}

/// The Poisson deviance `D(y, μ) = 2 [y log(y/μ) − (y − μ)]`.
pub fn deviance(y: f64, mu: f64) -> f64 {
    2.0 * (xlogx_over(y, mu) - (y - mu))
}

/// `E D(Y, λ)` for `Y ~ Poisson(λ)`: the noise term (see the module docs). NaN unless λ is a
/// finite number > 0.
pub fn expected_deviance(lambda: f64) -> f64 {
    if !(lambda.is_finite() && lambda > 0.0) {
        return f64::NAN;
    }
    if lambda > EXPANSION_FROM {
        return 1.0 + 1.0 / (6.0 * lambda) + 1.0 / (6.0 * lambda * lambda);
    }
    let mode = lambda.floor();
    let w = (8.0 * lambda.sqrt()).ceil() + 30.0;
    let (mut mass, mut sum) = (1.0, deviance(mode, lambda));
    // upwards from the mode
    let mut p = 1.0;
    let mut y = mode;
    while y < mode + w {
        p *= lambda / (y + 1.0);
        y += 1.0;
        mass += p;
        sum += p * deviance(y, lambda);
    }
    // downwards from the mode
    let mut p = 1.0;
    let mut y = mode;
    while y > 0.0 && y > mode - w {
        p *= y / lambda;
        y -= 1.0;
        mass += p;
        sum += p * deviance(y, lambda);
    }
    sum / mass
}

/// Terms at one point.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PoissonPoint {
    /// Geometric mean of the predicted means, `exp ℓ̂` (the central prediction).
    pub central: f64,
    /// Arithmetic mean of the predicted means.
    pub mean: f64,
    /// Unbiased expected deviance.
    pub expected_loss: f64,
    /// `E D(Y, λ)` (0 against an observed count).
    pub noise: f64,
    /// `D(λ, μ̃)`.
    pub bias: f64,
    /// `2 (m̂ − μ̃)`.
    pub variance: f64,
}

/// The terms from the mean log-mean `mean_log`, the mean mean `mean_mu`, the truth `lambda` and
/// the noise `noise` (pass 0 to fold the noise into the bias against an observed count).
pub fn terms(mean_log: f64, mean_mu: f64, lambda: f64, noise: f64) -> PoissonPoint {
    let central = mean_log.exp();
    let lin = if lambda == 0.0 {
        0.0
    } else {
        lambda * (lambda.ln() - mean_log)
    };
    // Both are ≥ 0 exactly (a deviance; the arithmetic mean is at least the geometric one),
    // but when every prediction is the same they are differences of equal numbers, and rounding
    // left −1.6e-16 (−1e-9 at counts near 1e6), which `check` then refused as a negative
    // variance. A term clamped at 0 makes the expected loss their sum, so the identity holds
    // exactly there; elsewhere nothing changes.
    let bias = 2.0 * (lin - lambda + central);
    let variance = 2.0 * (mean_mu - central);
    let expected_loss = noise + 2.0 * (lin - lambda + mean_mu);
    let (b, v) = (bias.max(0.0), variance.max(0.0));
    PoissonPoint {
        central,
        mean: mean_mu,
        expected_loss: if b != bias || v != variance {
            noise + b + v
        } else {
            expected_loss
        },
        noise,
        bias: b,
        variance: v,
    }
}

/// Terms at cell (g, e); `None` when the point was evaluated fewer than twice. `noise` is the
/// point's noise term (see [`expected_deviance`]), 0 on a table.
pub fn point(
    acc: &Acc,
    target: &Target<'_>,
    g: usize,
    e: usize,
    noise: f64,
) -> Option<PoissonPoint> {
    let sh = &acc.shape;
    if acc.count[e] < 2 {
        return None;
    }
    let n = (acc.count[e] * sh.fits as u64) as f64;
    let cell = g * sh.points + e;
    let lambda = match target {
        Target::Known { truth, .. } => truth[e],
        Target::Observed { y, .. } => y[e],
    };
    Some(terms(
        acc.floats[SUM_LOG][cell] / n,
        acc.floats[SUM_MU][cell] / n,
        lambda,
        noise,
    ))
}

/// The noise term at every point: `E D(Y, λ)` for a known λ, 0 for an observed count.
fn noise_terms(target: &Target<'_>, points: usize) -> Vec<f64> {
    match target {
        Target::Known { truth, .. } => truth.iter().map(|&l| expected_deviance(l)).collect(),
        Target::Observed { .. } => vec![0.0; points],
    }
}

impl Loss for Poisson {
    fn nonnegative_terms(&self) -> &'static [&'static str] {
        &super::DIVERGENCE_TERMS
    }

    fn name(&self) -> &'static str {
        "poisson"
    }

    fn supports(&self, task: Task) -> bool {
        task == Task::Regress
    }

    fn bias_word(&self) -> &'static str {
        "Bias"
    }

    fn observed_note(&self) -> &'static str {
        " (On a table, the bias is measured against the observed counts, noise included.)"
    }

    fn count_responses(&self) -> bool {
        true
    }

    /// The second-order part of `bias` (see [`Loss::second_order_stderr`]).
    fn stderr_beyond_jackknife(&self, key: &str) -> bool {
        key == "bias"
    }

    /// `bias = mean_e D(λ_e, exp ℓ̂_e)` is, to second order, quadratic in the errors `d_e =
    /// ℓ̂_e − E ℓ̂_e` of the mean log-predictions:
    /// `D(λ, μ̃ e^d) = D(λ, μ̃) + 2(μ̃ − λ) d + μ̃ d² + O(d³)`
    /// (`∂²/∂ℓ² 2[λ log λ − λℓ − λ + e^ℓ] = 2e^ℓ`). The jackknife sees the linear part
    /// at the estimated `μ̃`; the quadratic part `mean_e μ̃_e d_e²` has variance
    /// `2 tr((Ω^½ C Ω^½)²) / (E² R²)` for Gaussian errors (`C` the covariance of one replicate's
    /// log-predictions over the `E` points, `Ω = diag μ̃_e`), added in quadrature as for the
    /// squared loss's bias² (`squared::Squared::second_order_stderr`), with the blocks' mean
    /// log-predictions scaled by `√μ̃_e = exp(ℓ̂_e / 2)` (`docs/bias-se-second-order.md`,
    /// "Poisson deviance"). An independent check found coverage of 86% for a depth-1 tree, whose
    /// errors are one number per leaf. Known truths only (synthetic and twin sources).
    fn second_order_stderr(
        &self,
        blocks: &[&Acc],
        total: &Acc,
        target: &Target<'_>,
        se: &mut [Row],
    ) {
        let n = (total.replicates.max(1) * total.shape.fits.max(1) as u64) as f64;
        let root: Vec<f64> = total.floats[SUM_LOG]
            .iter()
            .map(|s| (0.5 * (s / n)).exp())
            .collect();
        let (e, means) = (
            total.shape.points,
            super::BlockMeans::WeightedSums(SUM_LOG, &root),
        );
        super::add_second_order(self, &["bias"], blocks, total, target, se, 1.0, e, means);
    }

    fn layout(&self, shape: &Shape) -> Vec<ArraySpec> {
        let cells = shape.cells();
        let f = |name, len, non_negative| ArraySpec {
            name,
            kind: Kind::Float,
            len,
            non_negative,
        };
        let mut v = vec![f("sum_log_mu", cells, false), f("sum_mu", cells, true)];
        if shape.all_points {
            v.push(f("direct", shape.grid, true));
        }
        v
    }

    fn push(&self, acc: &mut Acc, batch: &Batch<'_>) {
        let sh = acc.shape;
        let s_fits = batch.values.dim().0;
        let m = batch.len();
        for g in 0..sh.grid {
            let mut direct_g = 0.0;
            for s in 0..s_fits {
                let mut sum = 0.0;
                for j in 0..m {
                    let mu = batch.values[[s, g, j]];
                    let cell = g * sh.points + batch.point(j);
                    acc.floats[SUM_LOG][cell] += mu.ln();
                    acc.floats[SUM_MU][cell] += mu;
                    sum += deviance(batch.response[j], mu);
                }
                direct_g += sum / m as f64;
            }
            if sh.all_points {
                acc.floats[DIRECT][g] += direct_g / s_fits as f64;
            }
        }
    }

    fn merge(&self, acc: &mut Acc, other: &Acc) {
        for (a, b) in acc.floats.iter_mut().zip(&other.floats) {
            for (x, y) in a.iter_mut().zip(b) {
                *x += y;
            }
        }
    }

    fn describe(&self, _shape: &Shape, observed: bool) -> Vec<TermInfo> {
        use Group::{Detail, Main};
        vec![
            info(
                "expected_loss",
                if observed { "expected loss (OOB)" } else { "expected loss" },
                if observed {
                    "mean out-of-bag Poisson deviance 2[y log(y/μ) − (y − μ)] against the observed count"
                } else {
                    "Poisson deviance 2[y log(y/μ) − (y − μ)] = noise + bias + variance, averaged over evaluation points"
                },
                Role::Loss,
                Main,
                true,
            ),
            info(
                "bias",
                if observed { "bias+noise" } else { "bias" },
                if observed {
                    "D(observed count, μ̃), μ̃ the geometric mean of the out-of-bag predicted means (noise folded in); at finite R biased by order 1/R, opposite to the variance's bias (their sum is unbiased; ± covers the finite-R value)"
                } else {
                    "Pfau (2013): D(λ, μ̃), μ̃ the geometric mean of the predicted means (the Bregman central prediction); at finite R biased by order 1/R, opposite to the variance's bias (their sum is unbiased; ± covers the finite-R value)"
                },
                Role::Bias,
                Main,
                true,
            ),
            info(
                "variance",
                "variance",
                "Pfau (2013): mean over training sets of D(μ̃, μ) = 2 (arithmetic − geometric mean of the predicted means); at finite R biased by order 1/R, opposite to the bias's bias (their sum is unbiased; ± covers the finite-R value)",
                Role::Variance,
                Main,
                true,
            ),
            info(
                "noise",
                "noise",
                if observed {
                    "unknown on a table (folded into the bias)"
                } else {
                    "E D(Y, λ) for Y ~ Poisson(λ), summed over the probability mass function"
                },
                Role::Noise,
                if observed { Detail } else { Main },
                false,
            ),
            info(
                "expected_loss_direct",
                "direct check",
                if observed {
                    "mean out-of-bag deviance summed directly (equals expected loss)"
                } else {
                    "deviance against fresh Poisson counts, an independent estimate of the expected loss"
                },
                Role::Direct,
                if observed { Detail } else { Main },
                true,
            ),
        ]
    }

    fn identities(&self, _shape: &Shape, _observed: bool) -> Vec<Identity> {
        vec![Identity {
            name:
                "Pfau 2013 (Bregman): deviance = noise + bias + variance around the geometric mean",
            total: "expected_loss",
            parts: &[("noise", 1.0), ("bias", 1.0), ("variance", 1.0)],
        }]
    }

    fn evaluate(&self, acc: &Acc, target: &Target<'_>) -> Vec<Row> {
        let sh = acc.shape;
        let noise = noise_terms(target, sh.points);
        (0..sh.grid)
            .map(|g| {
                let (mut el, mut ns, mut b, mut v) = (0.0, 0.0, 0.0, 0.0);
                let mut used = 0usize;
                for (e, &n) in noise.iter().enumerate() {
                    let Some(p) = point(acc, target, g, e, n) else {
                        continue;
                    };
                    used += 1;
                    el += p.expected_loss;
                    ns += p.noise;
                    b += p.bias;
                    v += p.variance;
                }
                if used == 0 {
                    return vec![f64::NAN; 5];
                }
                let u = used as f64;
                let el = el / u;
                let direct = if sh.all_points {
                    acc.floats[DIRECT][g] / acc.replicates as f64
                } else {
                    el
                };
                vec![el, b / u, v / u, ns / u, direct]
            })
            .collect()
    }

    fn checks_predictions(&self) -> bool {
        true
    }

    fn check_prediction(&self, value: f64, _probs: Option<&[f64]>) -> Result<(), String> {
        if value > 0.0 {
            Ok(())
        } else {
            Err(format!(
                "predicted mean {value}: the Poisson deviance needs a positive mean (a mean of 0 \
                 gives an infinite deviance wherever a count is positive); an average of counts \
                 is 0 only when every count it averages is 0: average more counts (a larger \
                 smallest `k`, or `min_samples_leaf` for trees) or raise the counts"
            ))
        }
    }

    fn observed_loss(&self, value: f64, _probs: Option<&[f64]>, y: f64) -> f64 {
        deviance(y, value)
    }

    fn point_columns(&self, _shape: &Shape, observed: bool) -> Vec<(&'static str, bool)> {
        if observed {
            vec![
                ("observed", false),
                ("held_out_replicates", false),
                ("central_prediction", false),
                ("bias_plus_noise", false),
                ("variance", false),
            ]
        } else {
            vec![
                ("truth", false),
                ("noise", false),
                ("central_prediction", false),
                ("mean_prediction", false),
                ("bias", false),
                ("variance", false),
            ]
        }
    }

    fn point_values(&self, acc: &Acc, target: &Target<'_>, g: usize, e: usize) -> Vec<f64> {
        let nan = f64::NAN;
        match target {
            Target::Observed { y, .. } => {
                let p = point(acc, target, g, e, 0.0);
                vec![
                    y[e],
                    acc.count[e] as f64,
                    p.map_or(nan, |p| p.central),
                    p.map_or(nan, |p| p.bias),
                    p.map_or(nan, |p| p.variance),
                ]
            }
            Target::Known { truth, .. } => {
                let n = expected_deviance(truth[e]);
                let p = point(acc, target, g, e, n);
                vec![
                    truth[e],
                    n,
                    p.map_or(nan, |p| p.central),
                    p.map_or(nan, |p| p.mean),
                    p.map_or(nan, |p| p.bias),
                    p.map_or(nan, |p| p.variance),
                ]
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::decompose::summarize;
    use ndarray::Array3;

    fn lcg(state: &mut u64) -> f64 {
        *state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (*state >> 11) as f64 / (1u64 << 53) as f64
    }

    fn shape(m: usize, fits: usize) -> Shape {
        Shape {
            grid: 1,
            points: m,
            classes: 0,
            fits,
            all_points: true,
            ensemble: false,
        }
    }

    fn push(acc: &mut Acc, mu: &[Vec<f64>], y: &[f64]) {
        let (s, m) = (mu.len(), mu[0].len());
        let mut v = Array3::<f64>::zeros((s, 1, m));
        for ((si, _, e), x) in v.indexed_iter_mut() {
            *x = mu[si][e];
        }
        let b = Batch {
            held: None,
            values: v.view(),
            probs: None,
            diversity: None,
            response: y,
        };
        acc.push(&Poisson, &b);
    }

    /// `E D(Y, μ)` for `Y ~ Poisson(λ)` by a plain pmf sum from 0 (log-space masses; for the
    /// small λ of these tests the tail beyond 200 is far below rounding).
    fn expected_dev_at(lambda: f64, mu: f64) -> f64 {
        let mut s = 0.0;
        let mut log_fact = 0.0;
        for y in 0..400 {
            let yf = y as f64;
            if y > 0 {
                log_fact += yf.ln();
            }
            let lp = -lambda + yf * lambda.ln() - log_fact;
            s += lp.exp() * deviance(yf, mu);
        }
        s
    }

    #[test]
    fn bregman_terms_add_up_to_the_mean_expected_deviance_of_the_replicates() {
        // Exact identity (Pfau 2013, Theorem 0.1; module docs): noise + D(λ, μ̃) + E D(μ̃, μ)
        // equals (1/R) Σ_r E_Y D(Y, μ_r), the expectation over Y summed over the pmf here; the
        // variance equals the literal mean of D(μ̃, μ_r).
        let mut st = 21u64;
        for r in [2usize, 3, 9, 50] {
            let m = 6;
            let lambda: Vec<f64> = (0..m).map(|_| 0.2 + 12.0 * lcg(&mut st)).collect();
            let mut acc = Acc::new(&Poisson, shape(m, 1));
            let mut all = Vec::new();
            for _ in 0..r {
                let mu: Vec<f64> = (0..m).map(|_| 0.05 + 15.0 * lcg(&mut st)).collect();
                push(&mut acc, std::slice::from_ref(&mu), &vec![1.0; m]);
                all.push(mu);
            }
            let sd: Vec<f64> = lambda.iter().map(|l| l.sqrt()).collect();
            let target = Target::Known {
                truth: &lambda,
                noise_var: &sd,
                probs: None,
            };
            for e in 0..m {
                let t = point(&acc, &target, 0, e, expected_deviance(lambda[e])).unwrap();
                let direct: f64 = all
                    .iter()
                    .map(|mu| expected_dev_at(lambda[e], mu[e]))
                    .sum::<f64>()
                    / r as f64;
                let sum = t.noise + t.bias + t.variance;
                assert!((sum - direct).abs() < 1e-11, "r={r}: {sum} vs {direct}");
                assert!((t.expected_loss - direct).abs() < 1e-11);
                let lit: f64 =
                    all.iter().map(|mu| deviance(t.central, mu[e])).sum::<f64>() / r as f64;
                assert!((lit - t.variance).abs() < 1e-12);
                assert!(t.variance >= 0.0 && t.bias >= 0.0);
            }
        }
    }

    #[test]
    fn noise_term_matches_a_plain_sum_and_the_expansion_where_they_meet() {
        // E D(Y, λ): the windowed ratio sum against a plain log-space pmf sum from 0 (small λ);
        // against the asymptotic expansion 1 + 1/(6λ) + 1/(6λ²) at λ where the expansion's
        // next term (order λ⁻³) is negligible; and the known value at λ → 0: E D ≈ 2λ log(1/λ)…
        // checked only through the plain sum.
        for lambda in [0.01, 0.3, 1.0, 2.5, 7.0, 30.0, 80.0] {
            let a = expected_deviance(lambda);
            let b = expected_dev_at(lambda, lambda);
            assert!((a - b).abs() < 1e-12, "λ={lambda}: {a} vs {b}");
        }
        for lambda in [2000.0, 5000.0, 9999.0] {
            let a = expected_deviance(lambda);
            let b = 1.0 + 1.0 / (6.0 * lambda) + 1.0 / (6.0 * lambda * lambda);
            assert!((a - b).abs() < 1e-10, "λ={lambda}: {a} vs {b}");
        }
        assert!(expected_deviance(0.0).is_nan());
    }

    #[test]
    fn deviance_is_the_bregman_divergence_of_its_generator() {
        // Exact: φ(t) = 2(t log t − t), D(y, μ) = φ(y) − φ(μ) − φ'(μ)(y − μ).
        let phi = |t: f64| {
            if t == 0.0 {
                0.0
            } else {
                2.0 * (t * t.ln() - t)
            }
        };
        for (y, mu) in [(0.0, 1.5), (3.0, 2.0), (7.0, 7.0), (1.0, 0.25)] {
            let b = phi(y) - phi(mu) - 2.0 * mu.ln() * (y - mu);
            assert!((deviance(y, mu) - b).abs() < 1e-13);
        }
        assert_eq!(deviance(4.0, 4.0), 0.0);
        assert!(Poisson.check_prediction(0.0, None).is_err());
        assert!(Poisson.check_prediction(0.5, None).is_ok());
    }

    #[test]
    fn the_bias_standard_error_adds_the_weighted_second_order_part() {
        // Exact (the definition, written out): with every point evaluated, the bias's standard
        // error is √(jackknife² + 2 tr((Ω^½ C Ω^½)²)/(E² R²)), the trace estimated from the
        // blocks' mean log-predictions scaled by √μ̃ (`trace_cov_squared`), at each grid value
        // with its own weights; two fits per training set count as one replicate's mean.
        let (grid, m, fits, nb) = (2, 3, 2, 5);
        let sh = Shape {
            grid,
            points: m,
            classes: 0,
            fits,
            all_points: true,
            ensemble: false,
        };
        let mut st = 5u64;
        let y = vec![1.0; m];
        let blocks: Vec<Acc> = (0..nb)
            .map(|b| {
                let mut acc = Acc::new(&Poisson, sh);
                for _ in 0..(3 + b % 2) {
                    let mut v = Array3::<f64>::zeros((fits, grid, m));
                    for ((_, g, e), x) in v.indexed_iter_mut() {
                        *x = (1.0 + 5.0 * g as f64 + e as f64) * (0.5 + lcg(&mut st));
                    }
                    let batch = Batch {
                        held: None,
                        values: v.view(),
                        probs: None,
                        diversity: None,
                        response: &y,
                    };
                    acc.push(&Poisson, &batch);
                }
                acc
            })
            .collect();
        let lambda = [2.0, 3.0, 4.0];
        let target = Target::Known {
            truth: &lambda,
            noise_var: &lambda,
            probs: None,
        };
        let sum = summarize(&Poisson, &blocks, &target).unwrap();
        let t = sum.index("bias").unwrap();
        let r = sum.total.replicates as f64;
        let per = |a: &Acc, c: usize| a.floats[SUM_LOG][c] / (a.replicates * fits as u64) as f64;
        for g in 0..grid {
            let cells: Vec<usize> = (g * m..(g + 1) * m).collect();
            let w: Vec<f64> = cells
                .iter()
                .map(|&c| per(&sum.total, c).exp().sqrt())
                .collect();
            let means: Vec<Vec<f64>> = blocks
                .iter()
                .map(|a| cells.iter().zip(&w).map(|(&c, w)| w * per(a, c)).collect())
                .collect();
            let centre: Vec<f64> = cells
                .iter()
                .zip(&w)
                .map(|(&c, w)| w * per(&sum.total, c))
                .collect();
            let slices: Vec<&[f64]> = means.iter().map(|v| v.as_slice()).collect();
            let sizes: Vec<f64> = blocks.iter().map(|a| a.replicates as f64).collect();
            let tr = crate::decompose::trace_cov_squared(&slices, &sizes, &centre).unwrap();
            assert!(tr > 0.0);
            let leave: Vec<f64> = sum.leave_out.iter().map(|rows| rows[g][t]).collect();
            let jack = crate::decompose::jackknife_se(&leave);
            let want = (jack * jack + 2.0 * tr / ((m * m) as f64 * r * r)).sqrt();
            let got = sum.stderr[g][t];
            assert!((got - want).abs() <= 1e-12 * want, "g {g}: {got} vs {want}");
            assert!(got > jack, "g {g}: {got} vs the jackknife {jack}");
            // Every other term keeps its jackknife.
            let v = sum.index("variance").unwrap();
            let leave: Vec<f64> = sum.leave_out.iter().map(|rows| rows[g][v]).collect();
            let jv = crate::decompose::jackknife_se(&leave);
            assert_eq!(sum.stderr[g][v].to_bits(), jv.to_bits());
        }
    }

    #[test]
    fn fit_seeds_and_tables() {
        // Exact: with S fits every fit counts; on a table the observed count stands for λ and
        // bias+noise + variance is the row's mean out-of-bag deviance.
        let mut acc = Acc::new(&Poisson, shape(1, 2));
        push(&mut acc, &[vec![2.0], vec![8.0]], &[3.0]);
        push(&mut acc, &[vec![4.0], vec![1.0]], &[3.0]);
        let lambda = [4.0];
        let target = Target::Known {
            truth: &lambda,
            noise_var: &lambda,
            probs: None,
        };
        let t = point(&acc, &target, 0, 0, 0.0).unwrap();
        assert!((t.central - 64f64.powf(0.25)).abs() < 1e-12);
        assert!((t.mean - 3.75).abs() < 1e-15);
        let sum = summarize(&Poisson, std::slice::from_ref(&acc), &target).unwrap();
        let direct = [2.0, 8.0, 4.0, 1.0]
            .iter()
            .map(|&m| deviance(3.0, m))
            .sum::<f64>()
            / 4.0;
        assert!((sum.value(0, "expected_loss_direct") - direct).abs() < 1e-13);

        let sh = Shape {
            grid: 1,
            points: 1,
            classes: 0,
            fits: 1,
            all_points: false,
            ensemble: false,
        };
        let y = [5.0];
        let mut acc = Acc::new(&Poisson, sh);
        for mu in [3.0, 6.0, 4.5] {
            let v = Array3::from_elem((1, 1, 1), mu);
            let held = [0usize];
            let b = Batch {
                held: Some(&held),
                values: v.view(),
                probs: None,
                diversity: None,
                response: &y,
            };
            acc.push(&Poisson, &b);
        }
        let target = Target::Observed { y: &y, noise: None };
        let row = &Poisson.evaluate(&acc, &target)[0];
        let el = [3.0, 6.0, 4.5]
            .iter()
            .map(|&m| deviance(5.0, m))
            .sum::<f64>()
            / 3.0;
        assert!((row[0] - el).abs() < 1e-13);
        assert!((row[1] + row[2] - el).abs() < 1e-13);
        assert_eq!(row[3], 0.0);
    }
}
