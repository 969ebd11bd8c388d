//! Zero-one loss: the vote counts per grid value × evaluation point × class, and the
//! decompositions of Domingos (2000), Kohavi and Wolpert (1996) and James (2003).
//!
//! # Setting
//!
//! K classes, labelled `0..K`. At evaluation point x the true class probabilities
//! `p_t(c) = P(Y = c | x)` are known. Over R replicate training sets the classifier predicts a class
//! ŷ_r(x) at every grid value; `p_D(c) = n_c / R` is the share of replicates predicting c.
//!
//! # Master identity (exact)
//!
//! Given x, a fresh label t and the prediction ŷ are independent (the label is drawn independently
//! of the training set), so
//!
//! `E L(x) = P(t ≠ ŷ) = 1 − Σ_c p_t(c) p_D(c)`.
//!
//! With the empirical `p_D` this is the exact mean, over the R replicates, of the expected loss of
//! each replicate (`1 − p_t(ŷ_r)`), hence unbiased for the expected loss. Every decomposition below
//! reproduces it exactly at every point (to rounding).
//!
//! # Domingos (2000, "A Unified Bias-Variance Decomposition and its Applications", ICML)
//!
//! - Bayes class `y* = argmax_c p_t(c)`; ties go to the smallest class index (exact float
//!   comparison).
//! - Main prediction `y_m = argmax_c n_c` (the mode of the votes); ties go to the smallest class
//!   index (vote counts are integers, so ties are exact).
//! - Noise `N = 1 − p_t(y*)` (the Bayes error), bias `B = 1[y_m ≠ y*]`, variance
//!   `V = P_D(ŷ ≠ y_m) = 1 − p_D(y_m)`.
//! - `E L = c1·N + B + c2·V` with (Domingos' Theorem 2, multi-class)
//!   `c1 = P_D(ŷ = y*) − P_D(ŷ ≠ y*) · P_t(t = ŷ | t ≠ y*)` (the last factor averaged over ŷ ~ D
//!   restricted to ŷ ≠ y*), i.e. `c1 = p_D(y*) − Σ_{c ≠ y*} p_D(c) p_t(c) / N`, and
//!   `c2 = 1` if `B = 0`, else `c2 = −P_D(ŷ = y* | ŷ ≠ y_m) = −p_D(y*) / V`.
//!   For two classes these reduce to `c1 = 2 P_D(ŷ = y*) − 1` and `c2 = ±1` (Domingos' Theorem 1).
//!   The proof is written beside [`domingos_coefficients`].
//! - Aggregates follow Domingos' normalisation over **all** points: unbiased variance
//!   `V_u = E_x[(1 − B(x)) V(x)]`, biased variance `V_b = E_x[B(x) V(x)]`, net variance
//!   `E_x[c2(x) V(x)]` (for two classes `V_u − V_b`). The averaged noise term as it enters the loss,
//!   `E_x[c1 N]`, is the term `noise_term`.
//! - These are plug-in estimates (the mode of the empirical votes): they converge as R grows, but
//!   unlike the master identity they are not unbiased at finite R.
//!
//! # Finite R: unstable main predictions
//!
//! The main prediction is the mode of R votes. Where a point's vote share is near a tie, the mode
//! of a fresh set of R replicates would differ with a sizable probability, and every term that
//! uses the main prediction (Domingos' bias, variance, net, unbiased and biased variance; James'
//! systematic and variance effects) jumps with it. Two consequences, measured in
//! `docs/zero-one-finite-r.md`: these plug-in terms are biased at finite R, and the
//! delete-a-block jackknife — built for smooth statistics — misses the jumps (its standard error
//! is often exactly 0). So these terms are marked [`TermInfo::bootstrap`]: their standard errors
//! come from a bootstrap over replicate blocks. Per point, [`flip_probability`] is the
//! probability that the main prediction of a fresh set of votes differs from the one observed
//! (normal approximation to the vote margin), and the term `unstable_points` counts the points
//! where it exceeds [`UNSTABLE_FLIP`].
//!
//! # Kohavi and Wolpert (1996, ICML, "Bias plus variance decomposition for zero-one loss functions")
//!
//! `noise = ½(1 − Σ p_t²)`, `bias² = ½ Σ (p_t − p_D)²`, `variance = ½(1 − Σ p_D²)`. Finite-R
//! correction: `Σ p_D²` is biased up (it includes each replicate paired with itself), so it is
//! replaced in both bias² and variance by the unbiased `S = Σ_c n_c (n_c − 1) / (R (R − 1))` (the
//! chance that two distinct replicates agree). The three still sum exactly to `1 − Σ p_t p_D`,
//! because `S` enters bias² with `+½` and variance with `−½`. With the correction bias² can be
//! slightly negative by chance; with R < 2 it is undefined (NaN).
//!
//! # James (2003, *Machine Learning* 51:115–135)
//!
//! With S the mode operator (`S Y = y*`, `S ŷ = y_m`): systematic effect
//! `SE = P(Y ≠ Sŷ) − P(Y ≠ SY) = p_t(y*) − p_t(y_m)`, variance effect
//! `VE = P(Y ≠ ŷ) − P(Y ≠ Sŷ) = (1 − Σ p_t p_D) − (1 − p_t(y_m))`, noise `P(Y ≠ SY) = 1 − p_t(y*)`.
//! The sum telescopes exactly to `1 − Σ p_t p_D`.
//!
//! # Tables (observed labels)
//!
//! On a table the true class probabilities are unknown: each row's observed label stands in for
//! them (`p_t` = the one-hot vector of the label), so the noise is folded into the bias — Domingos'
//! bias is then the share of rows whose main out-of-bag prediction is not the observed label, and
//! the expected loss is the out-of-bag misclassification rate `1 − p_D(y_i)`. Rows held out in
//! fewer than two replicates are skipped.
//!
//! # Several fits per training set
//!
//! With `fit_seeds = S`, every fit votes: `p_D` is the share over the R·S fits.

use super::term as info;
use super::{
    Acc, ArraySpec, Batch, Group, Identity, Kind, Loss, Role, Row, Shape, Summary, Target, TermInfo,
};
use crate::family::Task;

/// The 0-1 loss.
#[derive(Debug, Clone, Copy, Default)]
pub struct ZeroOne;

const VOTES: usize = 0;

/// A point's main prediction is called unstable when a fresh set of as many votes would pick
/// another class with probability above this (5 %, a common-practice threshold, no source).
pub const UNSTABLE_FLIP: f64 = 0.05;

/// `erfc(x)`: the Chebyshev fit of Press et al., *Numerical Recipes in C*, 2nd ed., §6.2 (`erfcc`,
/// fractional error below 1.2e-7 everywhere; coefficients written from memory and checked in
/// the tests against tabulated normal quantiles).
fn erfc(x: f64) -> f64 {
    let z = x.abs();
    let t = 1.0 / (1.0 + 0.5 * z);
    let poly = -1.26551223
        + t * (1.00002368
            + t * (0.37409196
                + t * (0.09678418
                    + t * (-0.18628806
                        + t * (0.27886807
                            + t * (-1.13520398
                                + t * (1.48851587 + t * (-0.82215223 + t * 0.17087277))))))));
    let ans = t * (-z * z + poly).exp();
    if x >= 0.0 {
        ans
    } else {
        2.0 - ans
    }
}

/// The standard normal distribution function `Φ(z) = ½ erfc(−z/√2)`.
pub fn normal_cdf(z: f64) -> f64 {
    0.5 * erfc(-z / std::f64::consts::SQRT_2)
}

/// The probability that the main prediction (mode, smallest class index among ties) of a fresh
/// set of `Σ counts` votes, drawn with the observed shares `p_c = n_c / n`, differs from the main
/// prediction of `counts`: the largest over rival classes c of `Φ(−d / s)`, with
/// `d = p_m − p_c` and `s² = (p_m + p_c − d²) / n` the multinomial variance of the difference of
/// two shares (normal approximation; exact enough for the 5 % flag, and ½ at an exact tie).
/// 0 when every vote agrees or there are no votes.
pub fn flip_probability(counts: &[u32]) -> f64 {
    let n: u64 = counts.iter().map(|&c| u64::from(c)).sum();
    if n == 0 {
        return 0.0;
    }
    let nf = n as f64;
    let main = argmax_first(counts.iter().copied());
    let pm = counts[main] as f64 / nf;
    let mut worst = 0.0f64;
    for (c, &nc) in counts.iter().enumerate() {
        if c == main || nc == 0 {
            continue;
        }
        let pc = nc as f64 / nf;
        let d = pm - pc;
        let var = (pm + pc - d * d) / nf;
        let p = if d <= 0.0 {
            0.5
        } else if var > 0.0 {
            normal_cdf(-d / var.sqrt())
        } else {
            0.0
        };
        worst = worst.max(p);
    }
    worst
}
/// Per grid value (every point evaluated): Σ_r of the share of points misclassified against
/// fresh labels.
const DIRECT: usize = 0;

/// Index of the largest value, smallest index among exact ties (0 for an empty list).
fn argmax_first<T: PartialOrd + Copy>(xs: impl IntoIterator<Item = T>) -> usize {
    let mut it = xs.into_iter().enumerate();
    let Some((mut best_i, mut best)) = it.next() else {
        return 0;
    };
    for (i, x) in it {
        // strict: a later equal value never replaces the first
        if x > best {
            best_i = i;
            best = x;
        }
    }
    best_i
}

/// Domingos' coefficients `(c1, c2)` at a point, for class probabilities `p_true` (length K),
/// prediction shares `p_d` (length K), Bayes class `bayes` and main prediction `main`, such that
/// `1 − Σ_c p_t(c) p_D(c) = c1·N + B + c2·V` with `N = 1 − p_t(bayes)`, `B = 1[main ≠ bayes]`,
/// `V = 1 − p_D(main)` (Domingos 2000, Theorems 1 and 2).
///
/// Conventions where Domingos' conditional probabilities are undefined (the product with N or V
/// is then 0, so the identity holds whatever is chosen; these keep the two-class formulas
/// `c1 = 2 p_D(y*) − 1`, `c2 = ±1` for K = 2):
/// - `N = 0`: `P_t(t = ŷ | t ≠ y*)` is taken as uniform, `1/(K − 1)`.
/// - `B = 1` and `V = 0`: `P_D(ŷ = y* | ŷ ≠ y_m)` is taken as uniform, `1/(K − 1)`.
pub fn domingos_coefficients(p_true: &[f64], p_d: &[f64], bayes: usize, main: usize) -> (f64, f64) {
    coefficients_with(p_true, |c| p_d[c], bayes, main)
}

// Proof of the coefficients (Domingos 2000, Theorem 2, written out for this code).
//
// Step 1 (noise). Fix a prediction y and average the loss over the label t ~ p_t:
//   - y = y*:  E_t L(t, y) = 1 − p_t(y*) = N            = L(y*, y) + 1·N        (L(y*, y) = 0)
//   - y ≠ y*:  E_t L(t, y) = 1 − p_t(y)                 = L(y*, y) − p_t(y)     (L(y*, y) = 1)
//              and p_t(y) = N · P_t(t = y | t ≠ y*) because y ≠ y* (needs N > 0).
// Averaging over y ~ p_D:
//   E L = E_D L(y*, ŷ) + N · [p_D(y*) − Σ_{c≠y*} p_D(c) p_t(c)/N]
// so c1 = p_D(y*) − Σ_{c≠y*} p_D(c) P_t(t = c | t ≠ y*)
//       = P_D(ŷ = y*) − P_D(ŷ ≠ y*) · E_{ŷ ~ D | ŷ ≠ y*}[P_t(t = ŷ | t ≠ y*)].
// Algebraically c1·N = p_D(y*)(1 − p_t(y*)) − Σ_{c≠y*} p_D(c) p_t(c), so
//   c1·N + (1 − p_D(y*)) = 1 − Σ_c p_t(c) p_D(c)  exactly (no use of Σ p_t = 1).
// For K = 2 the only c ≠ y* has P_t(t = c | t ≠ y*) = 1, giving c1 = 2 p_D(y*) − 1.
//
// Step 2 (bias and variance). E_D L(y*, ŷ) = 1 − p_D(y*):
//   - B = 0 (y_m = y*): 1 − p_D(y*) = 1 − p_D(y_m) = V, so c2 = 1.
//   - B = 1: want 1 − p_D(y*) = 1 + c2·V, so c2 = −p_D(y*)/V = −P_D(ŷ = y* | ŷ ≠ y_m)
//     (y* ≠ y_m, so {ŷ = y*} ⊂ {ŷ ≠ y_m}; needs V > 0; V = 0 forces p_D(y*) = 0).
// For K = 2 and B = 1, ŷ ≠ y_m means ŷ = y*, so c2 = −1.
fn coefficients_with(
    p_true: &[f64],
    q: impl Fn(usize) -> f64,
    bayes: usize,
    main: usize,
) -> (f64, f64) {
    let k = p_true.len();
    let noise = 1.0 - p_true[bayes];
    let q_star = q(bayes);
    // Σ_{c ≠ y*} p_D(c) · P_t(t = c | t ≠ y*)
    let others: f64 = (0..k)
        .filter(|&c| c != bayes)
        .map(|c| {
            let cond = if noise > 0.0 {
                p_true[c] / noise
            } else {
                1.0 / (k - 1) as f64
            };
            q(c) * cond
        })
        .sum();
    let c1 = q_star - others;
    let c2 = if main == bayes {
        1.0
    } else {
        let v = 1.0 - q(main);
        if v > 0.0 {
            -q_star / v
        } else {
            -1.0 / (k - 1) as f64
        }
    };
    (c1, c2)
}

/// Zero-one decomposition terms at one point (or averaged over points).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct ZeroOneTerms {
    /// Master identity `1 − Σ_c p_t(c) p_D(c)`.
    pub expected_loss: f64,
    /// Direct cross-check (not tracked per point: NaN there).
    pub expected_loss_direct: f64,
    /// Bayes error `1 − max_c p_t(c)` (Domingos' N; also James' noise).
    pub noise: f64,
    /// Domingos: 1 when the main prediction differs from the Bayes class.
    pub bias: f64,
    /// Domingos: `V = P_D(ŷ ≠ main prediction)`.
    pub variance: f64,
    /// Domingos: `(1 − B) V`.
    pub unbiased_variance: f64,
    /// Domingos: `B V`.
    pub biased_variance: f64,
    /// Domingos: `c2 V`.
    pub net_variance: f64,
    /// Domingos: `c1 N`, the noise as it enters the loss.
    pub noise_term: f64,
    /// Kohavi–Wolpert noise `½(1 − Σ p_t²)`.
    pub kw_noise: f64,
    /// Kohavi–Wolpert bias² with the finite-R corrected `Σ p_D²` (NaN if fewer than 2 votes).
    pub kw_bias_sq: f64,
    /// Kohavi–Wolpert variance with the finite-R corrected `Σ p_D²` (NaN if fewer than 2 votes).
    pub kw_variance: f64,
    /// James systematic effect `p_t(y*) − p_t(y_m)`.
    pub james_systematic: f64,
    /// James variance effect `p_t(y_m) − Σ p_t p_D`.
    pub james_variance: f64,
    /// Points whose main prediction is unstable ([`flip_probability`] above [`UNSTABLE_FLIP`]):
    /// 0 or 1 at a point, a count (not an average) over points.
    pub unstable_points: f64,
}

/// Terms at one evaluation point and grid value (for a per-point CSV).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ZeroOnePoint {
    /// Mode of the votes (smallest class index among ties).
    pub main_prediction: usize,
    /// `argmax_c p_t(c)` (smallest class index among ties).
    pub bayes_class: usize,
    /// Domingos' c1 at the point.
    pub c1: f64,
    /// Domingos' c2 at the point.
    pub c2: f64,
    /// Probability that a fresh set of as many votes has another main prediction
    /// ([`flip_probability`]).
    pub flip_probability: f64,
    /// The terms at this point (`expected_loss_direct` is NaN: not tracked per point).
    pub terms: ZeroOneTerms,
}

/// Vote counts of cell (g, e), one per class.
pub fn cell(acc: &Acc, g: usize, e: usize) -> &[u32] {
    let k = acc.shape.classes;
    let i = (g * acc.shape.points + e) * k;
    &acc.counts[VOTES][i..i + k]
}

/// The 0-1 terms of evaluation point `e` at grid value `g` from its vote counts, with
/// `p_true` the true class probabilities there (known truths; a table passes the observed
/// class as a probability of 1).
pub fn point(acc: &Acc, g: usize, e: usize, p_true: &[f64]) -> ZeroOnePoint {
    debug_assert_eq!(p_true.len(), acc.shape.classes);
    let counts = cell(acc, g, e);
    let votes = acc.count[e] * acc.shape.fits as u64;
    let r = votes as f64;
    let q = |c: usize| counts[c] as f64 / r;

    let bayes = argmax_first(p_true.iter().copied());
    let main = argmax_first(counts.iter().copied());
    let noise = 1.0 - p_true[bayes];
    let sum_pt2: f64 = p_true.iter().map(|p| p * p).sum();
    let kw_noise = 0.5 * (1.0 - sum_pt2);

    if votes == 0 {
        let nan = f64::NAN;
        return ZeroOnePoint {
            main_prediction: main,
            bayes_class: bayes,
            c1: nan,
            c2: nan,
            flip_probability: nan,
            terms: ZeroOneTerms {
                expected_loss: nan,
                expected_loss_direct: nan,
                noise,
                bias: nan,
                variance: nan,
                unbiased_variance: nan,
                biased_variance: nan,
                net_variance: nan,
                noise_term: nan,
                kw_noise,
                kw_bias_sq: nan,
                kw_variance: nan,
                james_systematic: nan,
                james_variance: nan,
                unstable_points: 0.0,
            },
        };
    }

    // Master identity: label and prediction are independent given x.
    let agree: f64 = (0..acc.shape.classes).map(|c| p_true[c] * q(c)).sum();
    let expected_loss = 1.0 - agree;

    // Domingos (2000).
    let bias = if main == bayes { 0.0 } else { 1.0 };
    let variance = 1.0 - q(main);
    let (c1, c2) = coefficients_with(p_true, q, bayes, main);

    // Kohavi & Wolpert (1996) with the unbiased Σ p_D² = Σ n_c(n_c − 1)/(R(R − 1)).
    let (kw_bias_sq, kw_variance) = if votes >= 2 {
        let s: f64 = counts
            .iter()
            .map(|&n| {
                let n = n as f64;
                n * (n - 1.0)
            })
            .sum::<f64>()
            / (r * (r - 1.0));
        (0.5 * (sum_pt2 - 2.0 * agree + s), 0.5 * (1.0 - s))
    } else {
        (f64::NAN, f64::NAN)
    };

    // James (2003): SE = p_t(y*) − p_t(y_m), VE = p_t(y_m) − Σ p_t p_D.
    let james_systematic = p_true[bayes] - p_true[main];
    let james_variance = p_true[main] - agree;
    let flip = flip_probability(counts);

    ZeroOnePoint {
        main_prediction: main,
        bayes_class: bayes,
        c1,
        c2,
        flip_probability: flip,
        terms: ZeroOneTerms {
            expected_loss,
            expected_loss_direct: f64::NAN,
            noise,
            bias,
            variance,
            unbiased_variance: (1.0 - bias) * variance,
            biased_variance: bias * variance,
            net_variance: c2 * variance,
            noise_term: c1 * noise,
            kw_noise,
            kw_bias_sq,
            kw_variance,
            james_systematic,
            james_variance,
            unstable_points: if flip > UNSTABLE_FLIP { 1.0 } else { 0.0 },
        },
    }
}

/// The class probabilities standing for the truth at point `e`: the known `p_t`, or the one-hot
/// vector of the observed label.
fn truth_probs<'a>(target: &'a Target<'_>, e: usize, k: usize, buf: &'a mut Vec<f64>) -> &'a [f64] {
    match target {
        Target::Known { probs, .. } => match probs {
            Some(p) => &p[e * k..(e + 1) * k],
            None => {
                buf.clear();
                buf.resize(k, f64::NAN);
                buf
            }
        },
        Target::Observed { y, .. } => {
            buf.clear();
            buf.resize(k, 0.0);
            let c = y[e] as usize;
            if c < k {
                buf[c] = 1.0;
            }
            buf
        }
    }
}

/// Averages of the point terms at grid value `g` over the used points (every point with a vote
/// for a known truth; points held out at least twice for observed labels).
fn averages(acc: &Acc, target: &Target<'_>, g: usize) -> (ZeroOneTerms, usize) {
    let k = acc.shape.classes;
    let min = if target.observed() { 2 } else { 1 };
    let mut t = ZeroOneTerms::default();
    let mut used = 0usize;
    let mut buf = Vec::with_capacity(k);
    for e in 0..acc.shape.points {
        if acc.count[e] < min {
            continue;
        }
        used += 1;
        let pt = truth_probs(target, e, k, &mut buf);
        let p = point(acc, g, e, pt).terms;
        t.expected_loss += p.expected_loss;
        t.noise += p.noise;
        t.bias += p.bias;
        t.variance += p.variance;
        t.unbiased_variance += p.unbiased_variance;
        t.biased_variance += p.biased_variance;
        t.net_variance += p.net_variance;
        t.noise_term += p.noise_term;
        t.kw_noise += p.kw_noise;
        t.kw_bias_sq += p.kw_bias_sq;
        t.kw_variance += p.kw_variance;
        t.james_systematic += p.james_systematic;
        t.james_variance += p.james_variance;
        t.unstable_points += p.unstable_points;
    }
    let m = if acc.shape.all_points && !target.observed() {
        acc.shape.points as f64
    } else {
        used as f64
    };
    for v in [
        &mut t.expected_loss,
        &mut t.noise,
        &mut t.bias,
        &mut t.variance,
        &mut t.unbiased_variance,
        &mut t.biased_variance,
        &mut t.net_variance,
        &mut t.noise_term,
        &mut t.kw_noise,
        &mut t.kw_bias_sq,
        &mut t.kw_variance,
        &mut t.james_systematic,
        &mut t.james_variance,
    ] {
        *v /= m;
    }
    t.expected_loss_direct = if acc.shape.all_points {
        acc.floats[DIRECT][g] / acc.replicates as f64
    } else {
        t.expected_loss
    };
    (t, used)
}

/// The terms that use the main prediction: not smooth in the vote shares, so their standard
/// errors come from the block bootstrap ([`TermInfo::bootstrap`]).
const BOOTSTRAP_KEYS: &[&str] = &[
    "bias",
    "variance",
    "net_variance",
    "unbiased_variance",
    "biased_variance",
    "james.systematic_effect",
    "james.variance_effect",
];

/// The terms whose standard error adds a second-order part to the jackknife's
/// ([`Loss::second_order_stderr`]): quadratic in the errors of the vote shares.
const SECOND_ORDER_TERMS: [&str; 2] = ["kohavi_wolpert.bias_sq", "kohavi_wolpert.variance"];

impl Loss for ZeroOne {
    /// The second-order part of the Kohavi–Wolpert bias² and variance ([`SECOND_ORDER_TERMS`]).
    fn stderr_beyond_jackknife(&self, key: &str) -> bool {
        SECOND_ORDER_TERMS.contains(&key)
    }

    fn noise_max(&self, classes: usize) -> f64 {
        1.0 - 1.0 / classes.max(1) as f64
    }

    fn name(&self) -> &'static str {
        "zero_one"
    }

    fn supports(&self, task: Task) -> bool {
        matches!(task, Task::Classify { .. })
    }

    fn bias_word(&self) -> &'static str {
        "Bias (Domingos)"
    }

    fn folded_covers_bias(&self) -> bool {
        false
    }

    fn observed_note(&self) -> &'static str {
        " (On a table, the bias is measured against the observed labels, noise included.)"
    }

    fn layout(&self, shape: &Shape) -> Vec<ArraySpec> {
        let mut v = vec![ArraySpec {
            name: "votes",
            kind: Kind::Count,
            len: shape.cells() * shape.classes,
            non_negative: true,
        }];
        if shape.all_points {
            v.push(ArraySpec {
                name: "direct",
                kind: Kind::Float,
                len: shape.grid,
                non_negative: true,
            });
        }
        v
    }

    fn push(&self, acc: &mut Acc, batch: &Batch<'_>) {
        let sh = acc.shape;
        let k = sh.classes;
        let s_fits = batch.values.dim().0;
        let m = batch.len() as f64;
        for g in 0..sh.grid {
            let mut direct_g = 0.0;
            for s in 0..s_fits {
                let row = batch.values.slice(ndarray::s![s, g, ..]);
                let mut wrong = 0usize;
                for (j, &y) in row.iter().enumerate() {
                    let e = batch.point(j);
                    let c = y as usize;
                    debug_assert!(y >= 0.0 && y.fract() == 0.0 && c < k, "bad class {y}");
                    acc.counts[VOTES][(g * sh.points + e) * k + c] += 1;
                    wrong += usize::from(y != batch.response[j]);
                }
                direct_g += wrong as f64 / m;
            }
            if s_fits > 1 {
                direct_g /= s_fits as f64;
            }
            if sh.all_points {
                acc.floats[DIRECT][g] += direct_g;
            }
        }
    }

    fn merge(&self, acc: &mut Acc, other: &Acc) {
        for (a, b) in acc.counts[VOTES].iter_mut().zip(&other.counts[VOTES]) {
            *a += b;
        }
        if acc.shape.all_points {
            for (a, b) in acc.floats[DIRECT].iter_mut().zip(&other.floats[DIRECT]) {
                *a += b;
            }
        }
    }

    fn describe(&self, _shape: &Shape, observed: bool) -> Vec<TermInfo> {
        use Group::{Detail, James, KohaviWolpert, Main};
        let mut v = vec![
            info(
                "expected_loss",
                if observed {
                    "expected loss (OOB)"
                } else {
                    "expected loss"
                },
                if observed {
                    "out-of-bag misclassification rate 1 − p_D(observed label)"
                } else {
                    "misclassification rate 1 − Σ p_true·p_predicted, averaged over evaluation points"
                },
                Role::Loss,
                Main,
                true,
            ),
            info(
                "bias",
                if observed { "bias+noise" } else { "bias" },
                if observed {
                    "share of rows whose majority out-of-bag prediction is not the observed label (Domingos 2000, noise folded in)"
                } else {
                    "Domingos (2000): share of points whose majority prediction is not the Bayes class"
                },
                Role::Bias,
                Main,
                true,
            ),
            info(
                "variance",
                "variance",
                "Domingos: share of predictions differing from the majority prediction",
                Role::Variance,
                Main,
                true,
            ),
            info(
                "noise",
                if observed { "noise" } else { "noise (Bayes)" },
                if observed {
                    "unknown on a table (folded into the bias)"
                } else {
                    "Bayes error 1 − max p_true"
                },
                Role::Noise,
                if observed { Detail } else { Main },
                false,
            ),
            info(
                "expected_loss_direct",
                "direct check",
                if observed {
                    "mean out-of-bag misclassification rate summed directly (equals expected loss)"
                } else {
                    "misclassification rate against fresh labels, an independent estimate of the expected loss"
                },
                Role::Direct,
                if observed { Detail } else { Main },
                true,
            ),
            info(
                "net_variance",
                "net variance",
                "Domingos: c2·variance averaged (unbiased minus biased variance for two classes)",
                Role::Other,
                Main,
                true,
            ),
            info(
                "unbiased_variance",
                "unbiased var",
                "Domingos: variance where the majority prediction is right",
                Role::Other,
                Detail,
                true,
            ),
            info(
                "biased_variance",
                "biased var",
                "Domingos: variance where the majority prediction is wrong",
                Role::Other,
                Detail,
                true,
            ),
        ];
        if !observed {
            v.extend([
                info(
                    "kohavi_wolpert.noise",
                    "KW noise",
                    "Kohavi-Wolpert (1996): ½(1 − Σ p_true²)",
                    Role::Noise,
                    KohaviWolpert,
                    true,
                ),
                info(
                    "kohavi_wolpert.bias_sq",
                    "KW bias²",
                    "Kohavi-Wolpert: ½ Σ (p_true − p_predicted)², finite-R corrected",
                    Role::Bias,
                    KohaviWolpert,
                    true,
                ),
                info(
                    "kohavi_wolpert.variance",
                    "KW variance",
                    "Kohavi-Wolpert: ½(1 − Σ p_predicted²), finite-R corrected",
                    Role::Variance,
                    KohaviWolpert,
                    true,
                ),
                info(
                    "james.systematic_effect",
                    "systematic effect",
                    "James (2003): p_true(Bayes class) − p_true(majority prediction)",
                    Role::Bias,
                    James,
                    true,
                ),
                info(
                    "james.variance_effect",
                    "variance effect",
                    "James (2003): p_true(majority prediction) − Σ p_true·p_predicted",
                    Role::Variance,
                    James,
                    true,
                ),
                info(
                    "noise_term",
                    "c1·noise",
                    "Domingos: the noise as it enters the loss, c1·noise averaged, so that expected loss = c1·noise + bias + net variance",
                    Role::Other,
                    Main,
                    true,
                ),
            ]);
        }
        v.push(info(
            "unstable_points",
            "unstable main",
            "points whose main (majority) prediction a fresh set of as many replicates would change with probability above 5 %; the terms that use the main prediction are biased there at this R",
            Role::Other,
            Detail,
            false,
        ));
        for t in &mut v {
            t.bootstrap = BOOTSTRAP_KEYS.contains(&t.key);
            t.count = t.key == "unstable_points";
        }
        v
    }

    fn identities(&self, _shape: &Shape, observed: bool) -> Vec<Identity> {
        let mut v = vec![Identity {
            name: "Domingos 2000, Theorems 1-2: loss = c1·noise + bias + net variance",
            total: "expected_loss",
            parts: &[("bias", 1.0), ("net_variance", 1.0)],
        }];
        if !observed {
            v[0].parts = &[("noise_term", 1.0), ("bias", 1.0), ("net_variance", 1.0)];
            v.push(Identity {
                name: "Kohavi and Wolpert 1996: loss = noise + bias² + variance",
                total: "expected_loss",
                parts: &[
                    ("kohavi_wolpert.noise", 1.0),
                    ("kohavi_wolpert.bias_sq", 1.0),
                    ("kohavi_wolpert.variance", 1.0),
                ],
            });
            v.push(Identity {
                name: "James 2003: loss = noise + systematic effect + variance effect",
                total: "expected_loss",
                parts: &[
                    ("noise", 1.0),
                    ("james.systematic_effect", 1.0),
                    ("james.variance_effect", 1.0),
                ],
            });
        }
        v.push(Identity {
            name: "Domingos: variance = unbiased + biased variance",
            total: "variance",
            parts: &[("unbiased_variance", 1.0), ("biased_variance", 1.0)],
        });
        v
    }

    /// Kohavi–Wolpert bias² `= ½ mean_e Σ_c (p_t − p̂_c)² − correction` and variance are
    /// quadratic in the errors of the vote shares: their second-order sampling variance
    /// (scale ½) is added to the jackknife's, as for the squared loss
    /// (`squared::Squared::second_order_stderr`), with the covariance of the points' one-hot
    /// votes. An independent check found 0.019 ± 0.0029 for an exact 0.041 of the bias² (k-NN
    /// with k = n, whose votes are one label for every point). Known truths and one fit per
    /// training set only (several fits' votes are not independent).
    fn second_order_stderr(
        &self,
        blocks: &[&Acc],
        total: &Acc,
        target: &Target<'_>,
        se: &mut [Row],
    ) {
        if total.shape.fits != 1 {
            return;
        }
        let w = total.shape.points * total.shape.classes;
        // The variance `½ (1 − Σ_c p̂_c²)` (its unbiased form) has the same quadratic part with
        // the opposite sign, so the same second-order variance. It matters most there: with
        // two classes and vote shares near ½ its slope is 0 and the jackknife's first-order
        // error collapses (an independent check: ±2 SE covered the exact value in 82.8% of
        // 1200 seeds at R = 101 for a 1-D k-NN with k = 9, z up to 10.8).
        let means = super::BlockMeans::Shares(VOTES);
        super::add_second_order(
            self,
            &SECOND_ORDER_TERMS,
            blocks,
            total,
            target,
            se,
            0.5,
            w,
            means,
        );
    }

    fn evaluate(&self, acc: &Acc, target: &Target<'_>) -> Vec<Row> {
        let observed = target.observed();
        (0..acc.shape.grid)
            .map(|g| {
                let (t, used) = averages(acc, target, g);
                let mut row = vec![
                    t.expected_loss,
                    t.bias,
                    t.variance,
                    t.noise,
                    t.expected_loss_direct,
                    t.net_variance,
                    t.unbiased_variance,
                    t.biased_variance,
                ];
                if !observed {
                    row.extend([
                        t.kw_noise,
                        t.kw_bias_sq,
                        t.kw_variance,
                        t.james_systematic,
                        t.james_variance,
                        t.noise_term,
                    ]);
                }
                row.push(t.unstable_points);
                if used == 0 {
                    row.iter_mut().for_each(|v| *v = f64::NAN);
                }
                row
            })
            .collect()
    }

    fn validate(&self, acc: &Acc) -> Result<(), String> {
        let k = acc.shape.classes.max(1);
        for (cell, votes) in acc.counts[VOTES].chunks(k).enumerate() {
            let e = cell % acc.shape.points.max(1);
            let want = acc.count[e] * acc.shape.fits as u64;
            if votes.iter().map(|&v| u64::from(v)).sum::<u64>() != want {
                return Err(format!(
                    "votes: the counts of cell {cell} do not add up to {want}"
                ));
            }
        }
        Ok(())
    }

    fn reading_note(&self, s: &Summary, knob: &str, value: &str, best: usize) -> Option<String> {
        let n = s.value(best, "unstable_points");
        if n.is_nan() || n < 1.0 {
            return None;
        }
        let m = if s.total.shape.all_points {
            s.total.shape.points
        } else {
            s.total.used_points()
        };
        Some(format!(
            "{n} of {m} evaluation points {has} a main prediction that flips with probability above 5 % at {knob} = {value}: there the {which} carry a finite-R bias (docs/zero-one-finite-r.md).",
            which = if s.terms.iter().any(|t| t.key.starts_with("james")) {
                "Domingos and James terms"
            } else {
                "Domingos terms"
            },
            n = n as u64,
            has = if n == 1.0 { "has" } else { "have" }
        ))
    }

    fn observed_loss(&self, value: f64, _probs: Option<&[f64]>, y: f64) -> f64 {
        if value == y {
            0.0
        } else {
            1.0
        }
    }

    fn point_columns(&self, _shape: &Shape, observed: bool) -> Vec<(&'static str, bool)> {
        if observed {
            vec![
                ("observed", true),
                ("held_out_replicates", false),
                ("main_prediction", true),
                ("bias_plus_noise", false),
                ("variance", false),
                ("flip_probability", false),
            ]
        } else {
            vec![
                ("bayes_class", true),
                ("main_prediction", true),
                ("expected_loss", false),
                ("noise", false),
                ("bias", false),
                ("variance", false),
                ("c1", false),
                ("c2", false),
                ("kw_bias_sq", false),
                ("kw_variance", false),
                ("james_systematic_effect", false),
                ("james_variance_effect", false),
                ("flip_probability", false),
            ]
        }
    }

    /// Shares, losses and the Kohavi–Wolpert noise and variance lie in [0, 1] (its squared bias,
    /// corrected by the unbiased sum of squared vote shares, can be below 0); the unstable points
    /// are a count (checked as such by `check`).
    fn range(&self, key: &str) -> (f64, f64) {
        match key {
            "expected_loss"
            | "expected_loss_direct"
            | "noise"
            | "kohavi_wolpert.noise"
            | "kohavi_wolpert.variance" => (0.0, 1.0),
            "unstable_points" => (0.0, f64::INFINITY),
            _ => self.bounds(key),
        }
    }

    /// Domingos' bias (a share of points), the variances (shares of disagreeing votes) and
    /// James' systematic effect (the Bayes class's probability minus the main prediction's) lie
    /// in [0, 1]; the net variance and James' variance effect (differences of two shares) in
    /// [−1, 1].
    fn bounds(&self, key: &str) -> (f64, f64) {
        match key {
            "bias"
            | "variance"
            | "unbiased_variance"
            | "biased_variance"
            | "james.systematic_effect" => (0.0, 1.0),
            "net_variance" | "james.variance_effect" => (-1.0, 1.0),
            _ => (f64::NEG_INFINITY, f64::INFINITY),
        }
    }

    fn point_values(&self, acc: &Acc, target: &Target<'_>, g: usize, e: usize) -> Vec<f64> {
        let k = acc.shape.classes;
        let mut buf = Vec::with_capacity(k);
        let pt = truth_probs(target, e, k, &mut buf).to_vec();
        let p = point(acc, g, e, &pt);
        let t = &p.terms;
        match target {
            Target::Observed { y, .. } => {
                let ok = acc.count[e] >= 2;
                vec![
                    y[e],
                    acc.count[e] as f64,
                    p.main_prediction as f64,
                    if ok { t.bias } else { f64::NAN },
                    if ok { t.variance } else { f64::NAN },
                    if ok { p.flip_probability } else { f64::NAN },
                ]
            }
            Target::Known { .. } => vec![
                p.bayes_class as f64,
                p.main_prediction as f64,
                t.expected_loss,
                t.noise,
                t.bias,
                t.variance,
                p.c1,
                p.c2,
                t.kw_bias_sq,
                t.kw_variance,
                t.james_systematic,
                t.james_variance,
                p.flip_probability,
            ],
        }
    }
}

/// A typed view of a 0-1 [`Summary`] (known truth): every term per grid value as named fields,
/// their standard errors, and the folded accumulator.
#[derive(Debug, Clone)]
pub struct ZeroOneSummary {
    /// Terms per grid value.
    pub terms: Vec<ZeroOneTerms>,
    /// Standard errors per grid value (NaN where not reported).
    pub stderr: Vec<ZeroOneTerms>,
    /// Lower bounds of the 95 % interval (bootstrap percentile, widened to ± 2 SE, not outside
    /// the range a term cannot leave) per grid value (NaN but for the terms that use the
    /// main prediction, and without bootstrap plans).
    pub lower: Vec<ZeroOneTerms>,
    /// Upper bounds, as `lower`.
    pub upper: Vec<ZeroOneTerms>,
    /// All blocks folded in order.
    pub total: Acc,
}

fn from_row(r: &Row) -> ZeroOneTerms {
    // a known truth's row has 15 terms, an observed one 9 (no Kohavi–Wolpert, James, c1·noise)
    let known = |i: usize| {
        if r.len() > 13 {
            r[i]
        } else {
            f64::NAN
        }
    };
    ZeroOneTerms {
        expected_loss: r[0],
        bias: r[1],
        variance: r[2],
        noise: r[3],
        expected_loss_direct: r[4],
        net_variance: r[5],
        unbiased_variance: r[6],
        biased_variance: r[7],
        kw_noise: known(8),
        kw_bias_sq: known(9),
        kw_variance: known(10),
        james_systematic: known(11),
        james_variance: known(12),
        noise_term: known(13),
        unstable_points: r[r.len() - 1],
    }
}

/// The typed view of a 0-1 summary; `None` for another loss.
pub fn view(s: &Summary) -> Option<ZeroOneSummary> {
    if s.index("net_variance") != Some(5) {
        return None;
    }
    Some(ZeroOneSummary {
        terms: s.values.iter().map(from_row).collect(),
        stderr: s.stderr.iter().map(from_row).collect(),
        lower: s.lower.iter().map(from_row).collect(),
        upper: s.upper.iter().map(from_row).collect(),
        total: s.total.clone(),
    })
}

/// The terms per grid value, averaged over evaluation points, against known class probabilities
/// `p_true` (`points × K`, row-major).
pub fn terms(acc: &Acc, p_true: &[f64]) -> Vec<ZeroOneTerms> {
    let zeros = vec![0.0; acc.shape.points];
    let target = Target::Known {
        truth: &zeros,
        noise_var: &zeros,
        probs: Some(p_true),
    };
    ZeroOne
        .evaluate(acc, &target)
        .iter()
        .map(from_row)
        .collect()
}

/// Folds blocks and computes the terms with jackknife standard errors against known class
/// probabilities `p_true`; `None` for an empty block list.
pub fn summarize(blocks: &[Acc], p_true: &[f64]) -> Option<ZeroOneSummary> {
    let zeros = vec![0.0; blocks.first()?.shape.points];
    let target = Target::Known {
        truth: &zeros,
        noise_var: &zeros,
        probs: Some(p_true),
    };
    view(&super::summarize(&ZeroOne, blocks, &target)?)
}

/// [`summarize`] with the bootstrap standard errors of the terms that use the main prediction,
/// over the resampling `plans` (made by `rng::block_bootstrap`, as a run does).
pub fn summarize_with(
    blocks: &[Acc],
    p_true: &[f64],
    plans: &[Vec<u32>],
) -> Option<ZeroOneSummary> {
    let zeros = vec![0.0; blocks.first()?.shape.points];
    let target = Target::Known {
        truth: &zeros,
        noise_var: &zeros,
        probs: Some(p_true),
    };
    view(&super::summarize_with(&ZeroOne, blocks, &target, plans)?)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::decompose::{summarize, Acc};
    use ndarray::{Array2, Array3};

    fn shape(g: usize, m: usize, k: usize) -> Shape {
        Shape {
            grid: g,
            points: m,
            classes: k,
            fits: 1,
            all_points: true,
            ensemble: false,
        }
    }

    fn new_acc(g: usize, m: usize, k: usize) -> Acc {
        Acc::new(&ZeroOne, shape(g, m, k))
    }

    /// Pushes one replicate's predictions (`g × m`) against fresh labels `response`.
    fn push(acc: &mut Acc, preds: &Array2<f64>, response: &[f64]) {
        let (g, m) = preds.dim();
        let v = Array3::from_shape_vec((1, g, m), preds.iter().copied().collect()).unwrap();
        let b = Batch {
            held: None,
            values: v.view(),
            probs: None,
            diversity: None,
            response,
        };
        acc.push(&ZeroOne, &b);
    }

    fn known<'a>(p: &'a [f64], noise: &'a [f64]) -> Target<'a> {
        Target::Known {
            truth: noise,
            noise_var: noise,
            probs: Some(p),
        }
    }

    const TOL: f64 = 1e-12;

    fn lcg(state: &mut u64) -> f64 {
        *state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (*state >> 11) as f64 / (1u64 << 53) as f64
    }

    fn below(state: &mut u64, n: usize) -> usize {
        ((lcg(state) * n as f64) as usize).min(n - 1)
    }

    /// A random point of the simplex; one time in four two classes share the largest mass
    /// exactly (a Bayes tie), one time in eight a class has all the mass (N = 0).
    fn simplex(state: &mut u64, k: usize) -> Vec<f64> {
        let u = lcg(state);
        if u < 0.125 {
            let mut p = vec![0.0; k];
            p[below(state, k)] = 1.0;
            return p;
        }
        let mut p: Vec<f64> = (0..k).map(|_| lcg(state) + 1e-3).collect();
        if u < 0.375 {
            let mx = p.iter().cloned().fold(f64::MIN, f64::max);
            let j = below(state, k);
            p[j] = mx;
        }
        let s: f64 = p.iter().sum();
        p.iter().map(|v| v / s).collect()
    }

    /// Random vote counts over K classes summing to r; small r makes vote ties common.
    fn votes(state: &mut u64, k: usize, r: usize) -> Vec<u32> {
        // a skewed class distribution so that the mode is often not the Bayes class
        let w = simplex(state, k);
        let mut n = vec![0u32; k];
        for _ in 0..r {
            let u = lcg(state);
            let mut acc = 0.0;
            let mut c = k - 1;
            for (j, wj) in w.iter().enumerate() {
                acc += wj;
                if u < acc {
                    c = j;
                    break;
                }
            }
            n[c] += 1;
        }
        n
    }

    /// One grid value, one point per count vector.
    fn acc_from(counts: &[Vec<u32>], k: usize, r: u64) -> Acc {
        let mut acc = new_acc(1, counts.len(), k);
        acc.replicates = r;
        acc.count.iter_mut().for_each(|c| *c = r);
        for (e, c) in counts.iter().enumerate() {
            acc.counts[0][e * k..(e + 1) * k].copy_from_slice(c);
        }
        acc
    }

    /// E L by enumerating (label t, prediction ŷ) pairs: Σ_t Σ_ŷ p_t(t) p_D(ŷ) 1[t ≠ ŷ].
    fn enumerate_loss(p: &[f64], q: &[f64]) -> f64 {
        let mut l = 0.0;
        for (t, pt) in p.iter().enumerate() {
            for (y, qy) in q.iter().enumerate() {
                if t != y {
                    l += pt * qy;
                }
            }
        }
        l
    }

    #[test]
    fn every_decomposition_reproduces_the_master_identity_at_every_point() {
        // Exact identities (module docs): Domingos 2000 Theorem 2 `c1 N + B + c2 V`, Kohavi and
        // Wolpert 1996 `noise + bias² + variance` (with the corrected Σ p_D²), James 2003
        // `noise + SE + VE`, each equal to 1 − Σ p_t p_D (itself checked against enumeration).
        let mut s = 11u64;
        let (mut vote_ties, mut wrong_main, mut bayes_ties, mut zero_noise) = (0, 0, 0, 0);
        for k in 2..=5 {
            for r in [1usize, 2, 3, 4, 6, 9, 25] {
                let p: Vec<Vec<f64>> = (0..60).map(|_| simplex(&mut s, k)).collect();
                let n: Vec<Vec<u32>> = (0..60).map(|_| votes(&mut s, k, r)).collect();
                let acc = acc_from(&n, k, r as u64);
                for e in 0..60 {
                    let pt = point(&acc, 0, e, &p[e]);
                    let t = pt.terms;
                    let q: Vec<f64> = n[e].iter().map(|&c| c as f64 / r as f64).collect();
                    let el = enumerate_loss(&p[e], &q);
                    assert!((t.expected_loss - el).abs() < TOL);
                    // Domingos
                    let dom = pt.c1 * t.noise + t.bias + pt.c2 * t.variance;
                    assert!((dom - t.expected_loss).abs() < TOL, "k={k} r={r} e={e}");
                    assert!((t.noise_term - pt.c1 * t.noise).abs() < TOL);
                    assert!((t.expected_loss - t.noise_term - t.bias - t.net_variance).abs() < TOL);
                    assert_eq!(t.unbiased_variance + t.biased_variance, t.variance);
                    if k == 2 {
                        assert!(
                            (t.net_variance - (t.unbiased_variance - t.biased_variance)).abs()
                                < TOL
                        );
                    }
                    // Kohavi & Wolpert (undefined for R = 1)
                    if r >= 2 {
                        let kw = t.kw_noise + t.kw_bias_sq + t.kw_variance;
                        assert!((kw - t.expected_loss).abs() < TOL);
                    } else {
                        assert!(t.kw_bias_sq.is_nan() && t.kw_variance.is_nan());
                    }
                    // James
                    let james = t.noise + t.james_systematic + t.james_variance;
                    assert!((james - t.expected_loss).abs() < TOL);
                    // bookkeeping of the hard cases
                    let mx = *n[e].iter().max().unwrap();
                    vote_ties += (n[e].iter().filter(|&&c| c == mx).count() > 1) as usize;
                    wrong_main += (pt.main_prediction != pt.bayes_class) as usize;
                    let pm = p[e].iter().cloned().fold(f64::MIN, f64::max);
                    bayes_ties += (p[e].iter().filter(|&&v| v == pm).count() > 1) as usize;
                    zero_noise += (t.noise == 0.0) as usize;
                }
            }
        }
        assert!(vote_ties > 50 && wrong_main > 50 && bayes_ties > 50 && zero_noise > 20);
    }

    #[test]
    fn tie_rules_take_the_smallest_class_index() {
        let acc = acc_from(&[vec![1, 3, 3, 0]], 4, 7);
        let pt = point(&acc, 0, 0, &[0.1, 0.2, 0.35, 0.35]);
        assert_eq!(pt.main_prediction, 1);
        assert_eq!(pt.bayes_class, 2);
        assert_eq!(pt.terms.bias, 1.0);
        assert!((pt.terms.variance - 4.0 / 7.0).abs() < TOL);
    }

    #[test]
    fn domingos_coefficients_match_enumeration_of_label_prediction_pairs() {
        // Source: Domingos 2000, Theorem 2. The loss is enumerated over (t, ŷ) pairs and split
        // into E_D L(y*, ŷ) (must equal B + c2 V) and the remainder (must equal c1 N); c1 is also
        // recomputed literally as P_D(ŷ = y*) − P_D(ŷ ≠ y*) · E_{ŷ ~ D | ŷ ≠ y*} P_t(t = ŷ | t ≠ y*).
        let mut s = 5u64;
        for k in 2..=5 {
            for _ in 0..300 {
                let p = simplex(&mut s, k);
                let q = simplex(&mut s, k);
                let bayes = argmax_first(p.iter().copied());
                let main = argmax_first(q.iter().copied());
                let (c1, c2) = domingos_coefficients(&p, &q, bayes, main);
                let n = 1.0 - p[bayes];
                let b = if main == bayes { 0.0 } else { 1.0 };
                let v = 1.0 - q[main];

                let total = enumerate_loss(&p, &q);
                let vs_bayes: f64 = (0..k).filter(|&y| y != bayes).map(|y| q[y]).sum();
                assert!((vs_bayes - (b + c2 * v)).abs() < TOL);
                assert!((total - vs_bayes - c1 * n).abs() < TOL);
                assert!((c1 * n + b + c2 * v - total).abs() < TOL);

                if n > 0.0 && q[bayes] < 1.0 {
                    let off = 1.0 - q[bayes];
                    let avg: f64 = (0..k)
                        .filter(|&y| y != bayes)
                        .map(|y| (q[y] / off) * (p[y] / n))
                        .sum();
                    assert!((c1 - (q[bayes] - off * avg)).abs() < TOL);
                }
                if b == 1.0 && v > 0.0 {
                    // −P_D(ŷ = y* | ŷ ≠ y_m)
                    assert!((c2 + q[bayes] / v).abs() < TOL);
                }
            }
        }
    }

    #[test]
    fn multi_class_coefficients_coincide_with_the_two_class_ones_for_two_classes() {
        // Domingos 2000, Theorem 1 (two classes): c1 = 2 P_D(ŷ = y*) − 1, c2 = 1 if B = 0 else −1,
        // including the edge cases N = 0 and V = 0 covered by the documented conventions.
        let mut s = 9u64;
        let mut cases: Vec<(Vec<f64>, Vec<f64>)> = (0..200)
            .map(|_| (simplex(&mut s, 2), simplex(&mut s, 2)))
            .collect();
        cases.push((vec![1.0, 0.0], vec![0.3, 0.7]));
        cases.push((vec![0.2, 0.8], vec![1.0, 0.0]));
        cases.push((vec![0.0, 1.0], vec![1.0, 0.0]));
        cases.push((vec![0.5, 0.5], vec![0.5, 0.5]));
        for (p, q) in cases {
            let bayes = argmax_first(p.iter().copied());
            let main = argmax_first(q.iter().copied());
            let (c1, c2) = domingos_coefficients(&p, &q, bayes, main);
            assert!((c1 - (2.0 * q[bayes] - 1.0)).abs() < TOL, "{p:?} {q:?}");
            // c2 = −p_D(y*)/(1 − p_D(y_m)) is ±1 up to the rounding of 1 − p_D(y_m)
            assert!((c2 - if main == bayes { 1.0 } else { -1.0 }).abs() < TOL);
        }
    }

    #[test]
    fn a_constant_classifier_has_no_variance_and_bias_exactly_where_it_misses_bayes() {
        // Exact: every replicate predicts class 1, so p_D is a point mass; V = 0, Σ n(n−1)/(R(R−1))
        // = 1 so the KW variance is 0, and James' VE = p_t(1) − p_t(1) = 0.
        let (k, m, r) = (3, 40, 12);
        let mut s = 21u64;
        let p: Vec<f64> = (0..m).flat_map(|_| simplex(&mut s, k)).collect();
        let mut acc = new_acc(2, m, k);
        let preds = Array2::<f64>::from_elem((2, m), 1.0);
        // Fresh labels: class 1 at a quarter of the points, so a quarter is right.
        let fresh: Vec<f64> = (0..m).map(|e| if e % 4 == 0 { 1.0 } else { 0.0 }).collect();
        for _ in 0..r {
            push(&mut acc, &preds, &fresh);
        }
        let mut misses = 0;
        for e in 0..m {
            let pt = point(&acc, 1, e, &p[e * k..(e + 1) * k]);
            let t = pt.terms;
            assert_eq!(pt.main_prediction, 1);
            assert_eq!(t.variance, 0.0);
            assert_eq!(t.kw_variance, 0.0);
            assert_eq!(t.james_variance, 0.0);
            assert_eq!(t.net_variance, 0.0);
            let expect_bias = if pt.bayes_class != 1 { 1.0 } else { 0.0 };
            assert_eq!(t.bias, expect_bias);
            misses += expect_bias as usize;
        }
        assert!(misses > 0 && misses < m);
        let zeros = vec![0.0; m];
        let tt = ZeroOne.evaluate(&acc, &known(&p, &zeros));
        let d = ZeroOne.describe(&acc.shape, false);
        let at = |k: &str| d.iter().position(|t| t.key == k).unwrap();
        assert_eq!(tt[0][at("variance")], 0.0);
        assert_eq!(tt[0][at("kohavi_wolpert.variance")], 0.0);
        assert_eq!(tt[0][at("james.variance_effect")], 0.0);
        assert_eq!(tt[0][at("bias")], misses as f64 / m as f64);
        assert_eq!(tt[0][at("expected_loss_direct")], 0.75);
        assert_eq!(tt[1][at("expected_loss_direct")], 0.75);
    }

    #[test]
    fn corrected_agreement_is_the_share_of_agreeing_distinct_replicate_pairs() {
        // Exact identity behind the Kohavi–Wolpert finite-R correction: Σ_c n_c(n_c − 1)/(R(R − 1))
        // equals the share of ordered pairs r ≠ s with ŷ_r = ŷ_s.
        let (k, r) = (4, 9);
        let mut s = 33u64;
        let labels: Vec<usize> = (0..r).map(|_| below(&mut s, k)).collect();
        let mut acc = new_acc(1, 1, k);
        for &c in &labels {
            push(&mut acc, &Array2::from_elem((1, 1), c as f64), &[0.0]);
        }
        let mut agree = 0usize;
        for a in 0..r {
            for b in 0..r {
                agree += (a != b && labels[a] == labels[b]) as usize;
            }
        }
        let pair_share = agree as f64 / (r * (r - 1)) as f64;
        let t = point(&acc, 0, 0, &[0.25; 4]).terms;
        assert!((t.kw_variance - 0.5 * (1.0 - pair_share)).abs() < TOL);
    }

    fn random_blocks(sizes: &[usize]) -> (Vec<Acc>, Acc) {
        let (g, m, k) = (3, 8, 3);
        let mut s = 77u64;
        let mut all = new_acc(g, m, k);
        let mut blocks = Vec::new();
        for &size in sizes {
            let mut b = new_acc(g, m, k);
            for _ in 0..size {
                let mut p = Array2::<f64>::zeros((g, m));
                // grid value g leans towards class g so the terms differ across the grid
                for ((gi, _), v) in p.indexed_iter_mut() {
                    *v = if lcg(&mut s) < 0.6 {
                        gi as f64
                    } else {
                        below(&mut s, k) as f64
                    };
                }
                // m = 8 points: dyadic direct shares, so sums are exact in any order
                let d: Vec<f64> = (0..m).map(|_| below(&mut s, k) as f64).collect();
                push(&mut all, &p, &d);
                push(&mut b, &p, &d);
            }
            blocks.push(b);
        }
        (blocks, all)
    }

    #[test]
    fn merged_blocks_equal_one_accumulator_over_all_replicates() {
        let (blocks, all) = random_blocks(&[7, 5, 9, 1]);
        let folded = Acc::fold(&ZeroOne, &blocks).unwrap();
        assert_eq!(folded, all);
        let mut skipped = Acc::fold(&ZeroOne, [&blocks[0], &blocks[2], &blocks[3]]).unwrap();
        assert_eq!(skipped.replicates, 17);
        skipped.merge(&ZeroOne, &new_acc(3, 8, 3));
        assert_eq!(skipped.replicates, 17);
        assert!(Acc::fold(&ZeroOne, &[]).is_none());
    }

    #[test]
    fn jackknife_errors_are_nan_for_one_block_and_finite_for_several() {
        let mut s = 2u64;
        let p: Vec<f64> = (0..8).flat_map(|_| simplex(&mut s, 3)).collect();
        let zeros = vec![0.0; 8];
        let (blocks, all) = random_blocks(&[10, 10, 10, 10, 10]);
        let target = known(&p, &zeros);

        let one = summarize(&ZeroOne, std::slice::from_ref(&all), &target).unwrap();
        assert!(one.stderr.iter().all(|r| r.iter().all(|v| v.is_nan())));

        let several = summarize(&ZeroOne, &blocks, &target).unwrap();
        assert_eq!(several.total, all);
        assert_eq!(several.values, one.values);
        let noise = several.index("noise").unwrap();
        let kw_noise = several.index("kohavi_wolpert.noise").unwrap();
        let unstable = several.index("unstable_points").unwrap();
        for r in &several.stderr {
            for (i, v) in r.iter().enumerate() {
                if i == noise || i == unstable {
                    assert!(v.is_nan(), "noise has no standard error");
                } else if i == kw_noise {
                    assert_eq!(*v, 0.0, "a known term does not move");
                } else {
                    assert!(v.is_finite() && *v >= 0.0, "term {i}: {v}");
                }
            }
            assert!(r[0] > 0.0);
        }
        assert!(summarize(&ZeroOne, &[], &target).is_none());
    }

    #[test]
    fn an_empty_accumulator_gives_nan_estimates_and_the_known_noise() {
        let acc = new_acc(1, 1, 2);
        let t = point(&acc, 0, 0, &[0.3, 0.7]).terms;
        assert!(t.expected_loss.is_nan() && t.expected_loss_direct.is_nan());
        assert!((t.noise - 0.3).abs() < TOL);
        // Kohavi–Wolpert noise ½(1 − Σ p_t²) = ½(1 − 0.58) = 0.21
        assert!((t.kw_noise - 0.21).abs() < TOL);
    }

    #[test]
    fn observed_labels_give_the_out_of_bag_error_and_domingos_against_the_label() {
        // Exact (Domingos 2000 with the observed label in place of the Bayes class):
        // loss_i = 1 − p_D(y_i) and loss = B + c2·V.
        let sh = Shape {
            grid: 1,
            points: 3,
            classes: 3,
            fits: 1,
            all_points: false,
            ensemble: false,
        };
        let y = [0.0, 1.0, 2.0];
        let mut acc = Acc::new(&ZeroOne, sh);
        for v in [
            [0.0, 0.0, 1.0],
            [0.0, 1.0, 1.0],
            [2.0, 1.0, 0.0],
            [0.0, 1.0, 2.0],
        ] {
            let p = Array3::from_shape_vec((1, 1, 3), v.to_vec()).unwrap();
            let held = [0usize, 1, 2];
            let b = Batch {
                held: Some(&held),
                values: p.view(),
                probs: None,
                diversity: None,
                response: &y,
            };
            acc.push(&ZeroOne, &b);
        }
        let target = Target::Observed { y: &y, noise: None };
        let r = &ZeroOne.evaluate(&acc, &target)[0];
        // Row 0: predictions 0,0,2,0 → main 0 = y, loss 1/4, V 1/4. Row 1: 0,1,1,1 → main 1 = y,
        // loss 1/4, V 1/4. Row 2: 1,1,0,2 → main 1 ≠ y = 2, B = 1, loss 3/4, V 1/2, c2·V = −1/4.
        approx::assert_relative_eq!(r[0], 1.25 / 3.0, max_relative = 1e-14);
        approx::assert_relative_eq!(r[1], 1.0 / 3.0, max_relative = 1e-14);
        approx::assert_relative_eq!(r[2], 1.0 / 3.0, max_relative = 1e-14);
        approx::assert_relative_eq!(r[5], 0.25 / 3.0, max_relative = 1e-12);
        approx::assert_relative_eq!(r[7], 0.5 / 3.0, max_relative = 1e-14);
    }
}
