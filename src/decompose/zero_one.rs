//! Zero-one loss: the vote-count accumulator (per grid value × evaluation point × class) and the
//! decompositions of Domingos (2000), Kohavi and Wolpert (1996) and James (2003), with
//! delete-a-block jackknife standard errors.
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
//!   `E_x[c1 N]`, is [`ZeroOneTerms::domingos_noise_term`].
//! - These are plug-in estimates (the mode of the empirical votes): they converge as R grows, but
//!   unlike the master identity they are not unbiased at finite R.
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

use ndarray::ArrayView2;

use super::squared::jackknife_se;

/// Streaming accumulator of one block of replicates: vote counts per grid value, evaluation point
/// and class. Memory: `grid × points × classes` counters, independent of the number of replicates.
/// Merging is exact (integer counts).
#[derive(Debug, Clone, PartialEq)]
pub struct ZeroOneAcc {
    /// Replicates absorbed.
    pub n: u64,
    /// Number of grid values.
    pub grid: usize,
    /// Number of evaluation points.
    pub points: usize,
    /// Number of classes K.
    pub classes: usize,
    /// `counts[(g * points + e) * classes + c]` = replicates predicting class c.
    pub counts: Vec<u32>,
    /// Per grid value: sum over replicates of the share of evaluation points where the prediction
    /// differs from a fresh label drawn from p_t (direct cross-check).
    pub direct: Vec<f64>,
}

impl ZeroOneAcc {
    /// An empty accumulator.
    pub fn new(grid: usize, points: usize, classes: usize) -> Self {
        ZeroOneAcc {
            n: 0,
            grid,
            points,
            classes,
            counts: vec![0; grid * points * classes],
            direct: vec![0.0; grid],
        }
    }

    /// Absorbs one replicate: `preds[[g, e]]` is the predicted class index stored as f64, and
    /// `direct[g]` the share of points misclassified against fresh labels at grid value g.
    ///
    /// The runner validates predictions before they get here; an index outside `0..classes`
    /// is a programming error (it panics on the out-of-range count).
    pub fn push(&mut self, preds: ArrayView2<'_, f64>, direct: &[f64]) {
        debug_assert_eq!(preds.dim(), (self.grid, self.points));
        debug_assert_eq!(direct.len(), self.grid);
        self.n += 1;
        let k = self.classes;
        for (g, row) in preds.rows().into_iter().enumerate() {
            let base = g * self.points;
            for (e, &y) in row.iter().enumerate() {
                let c = y as usize;
                debug_assert!(y >= 0.0 && y.fract() == 0.0 && c < k, "bad class {y}");
                self.counts[(base + e) * k + c] += 1;
            }
            self.direct[g] += direct[g];
        }
    }

    /// Merges `other` into `self`. Counts merge exactly; the direct sums are added (merge in
    /// block order for bit-identical results).
    pub fn merge(&mut self, other: &ZeroOneAcc) {
        if other.n == 0 {
            return;
        }
        if self.n == 0 {
            *self = other.clone();
            return;
        }
        debug_assert_eq!(self.counts.len(), other.counts.len());
        for (a, b) in self.counts.iter_mut().zip(&other.counts) {
            *a += b;
        }
        for (a, b) in self.direct.iter_mut().zip(&other.direct) {
            *a += b;
        }
        self.n += other.n;
    }

    /// Folds accumulators in the order given, skipping index `skip` if set. `None` when nothing
    /// is left to fold.
    pub fn fold<'a>(
        parts: impl IntoIterator<Item = &'a ZeroOneAcc>,
        skip: Option<usize>,
    ) -> Option<ZeroOneAcc> {
        let mut out: Option<ZeroOneAcc> = None;
        for (i, p) in parts.into_iter().enumerate() {
            if Some(i) == skip {
                continue;
            }
            match &mut out {
                None => out = Some(p.clone()),
                Some(o) => o.merge(p),
            }
        }
        out
    }

    /// Vote counts of one cell (grid value g, evaluation point e), one per class.
    pub fn cell(&self, g: usize, e: usize) -> &[u32] {
        let i = (g * self.points + e) * self.classes;
        &self.counts[i..i + self.classes]
    }
}

/// Zero-one decomposition terms; in [`terms`] they are averages over evaluation points at one grid
/// value, in [`point`] the values at one point.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct ZeroOneTerms {
    /// Master identity `1 − Σ_c p_t(c) p_D(c)`, averaged (exact, unbiased).
    pub expected_loss: f64,
    /// Direct cross-check: misclassification share against fresh labels, summed over replicates
    /// and divided by R. Not tracked per point (NaN there).
    pub expected_loss_direct: f64,
    /// Bayes error `1 − max_c p_t(c)` (Domingos' N; also James' noise).
    pub noise: f64,
    /// Domingos: share of points where the main prediction differs from the Bayes class.
    pub bias: f64,
    /// Domingos: mean of `V = P_D(ŷ ≠ main prediction)`.
    pub variance: f64,
    /// Domingos: `E_x[(1 − B) V]`, averaged over **all** points (Domingos 2000's normalisation,
    /// not conditional on the unbiased points).
    pub unbiased_variance: f64,
    /// Domingos: `E_x[B V]`, averaged over all points.
    pub biased_variance: f64,
    /// Domingos: `E_x[c2 V]`; for two classes `unbiased_variance − biased_variance`.
    pub net_variance: f64,
    /// Kohavi–Wolpert noise `½(1 − Σ p_t²)`.
    pub kw_noise: f64,
    /// Kohavi–Wolpert bias² `½ Σ (p_t − p_D)²` with the finite-R corrected `Σ p_D²` (NaN if R < 2).
    pub kw_bias_sq: f64,
    /// Kohavi–Wolpert variance `½(1 − Σ p_D²)` with the finite-R corrected `Σ p_D²` (NaN if R < 2).
    pub kw_variance: f64,
    /// James systematic effect `p_t(y*) − p_t(y_m)`.
    pub james_systematic: f64,
    /// James variance effect `p_t(y_m) − Σ p_t p_D`.
    pub james_variance: f64,
}

impl ZeroOneTerms {
    /// Domingos' noise term as it enters the loss, `E_x[c1 N]`: the remainder
    /// `expected_loss − bias − net_variance` (exact, since `E L = c1 N + B + c2 V` holds at every
    /// point and averaging is linear).
    pub fn domingos_noise_term(&self) -> f64 {
        self.expected_loss - self.bias - self.net_variance
    }
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
    /// The terms at this point (`expected_loss_direct` is NaN: not tracked per point).
    pub terms: ZeroOneTerms,
}

/// Per-grid terms, their jackknife standard errors, and the folded accumulator.
#[derive(Debug, Clone)]
pub struct ZeroOneSummary {
    /// Terms per grid value.
    pub terms: Vec<ZeroOneTerms>,
    /// Delete-a-block jackknife standard errors per grid value. `noise` and `kw_noise` are known
    /// exactly (error 0). NaN with fewer than two blocks. The bias-type terms (Domingos bias,
    /// James systematic effect) jump when a vote tie flips; the jackknife is unreliable for such
    /// non-smooth statistics (Efron and Tibshirani 1993, §11.6, the median), so read their errors
    /// as indicative only.
    pub stderr: Vec<ZeroOneTerms>,
    /// All blocks folded in order.
    pub total: ZeroOneAcc,
}

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

/// Terms at one cell (grid value g, evaluation point e); `p_true` holds the K class
/// probabilities at point e. With no replicates every estimated term is NaN.
pub fn point(acc: &ZeroOneAcc, g: usize, e: usize, p_true: &[f64]) -> ZeroOnePoint {
    debug_assert_eq!(p_true.len(), acc.classes);
    let counts = acc.cell(g, e);
    let r = acc.n as f64;
    let q = |c: usize| counts[c] as f64 / r;

    let bayes = argmax_first(p_true.iter().copied());
    let main = argmax_first(counts.iter().copied());
    let noise = 1.0 - p_true[bayes];
    let sum_pt2: f64 = p_true.iter().map(|p| p * p).sum();
    let kw_noise = 0.5 * (1.0 - sum_pt2);

    if acc.n == 0 {
        let nan = f64::NAN;
        return ZeroOnePoint {
            main_prediction: main,
            bayes_class: bayes,
            c1: nan,
            c2: nan,
            terms: ZeroOneTerms {
                expected_loss: nan,
                expected_loss_direct: nan,
                noise,
                bias: nan,
                variance: nan,
                unbiased_variance: nan,
                biased_variance: nan,
                net_variance: nan,
                kw_noise,
                kw_bias_sq: nan,
                kw_variance: nan,
                james_systematic: nan,
                james_variance: nan,
            },
        };
    }

    // Master identity: label and prediction are independent given x.
    let agree: f64 = (0..acc.classes).map(|c| p_true[c] * q(c)).sum();
    let expected_loss = 1.0 - agree;

    // Domingos (2000).
    let bias = if main == bayes { 0.0 } else { 1.0 };
    let variance = 1.0 - q(main);
    let (c1, c2) = coefficients_with(p_true, q, bayes, main);

    // Kohavi & Wolpert (1996) with the unbiased Σ p_D² = Σ n_c(n_c − 1)/(R(R − 1)).
    let (kw_bias_sq, kw_variance) = if acc.n >= 2 {
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

    ZeroOnePoint {
        main_prediction: main,
        bayes_class: bayes,
        c1,
        c2,
        terms: ZeroOneTerms {
            expected_loss,
            expected_loss_direct: f64::NAN,
            noise,
            bias,
            variance,
            unbiased_variance: (1.0 - bias) * variance,
            biased_variance: bias * variance,
            net_variance: c2 * variance,
            kw_noise,
            kw_bias_sq,
            kw_variance,
            james_systematic,
            james_variance,
        },
    }
}

/// Computes the terms per grid value, averaged over evaluation points, from a folded accumulator.
/// `p_true` is `points × K` row-major (the class probabilities at each evaluation point).
pub fn terms(acc: &ZeroOneAcc, p_true: &[f64]) -> Vec<ZeroOneTerms> {
    let k = acc.classes;
    debug_assert_eq!(p_true.len(), acc.points * k);
    let m = acc.points as f64;
    (0..acc.grid)
        .map(|g| {
            let mut t = ZeroOneTerms::default();
            for e in 0..acc.points {
                let p = point(acc, g, e, &p_true[e * k..(e + 1) * k]).terms;
                t.expected_loss += p.expected_loss;
                t.noise += p.noise;
                t.bias += p.bias;
                t.variance += p.variance;
                t.unbiased_variance += p.unbiased_variance;
                t.biased_variance += p.biased_variance;
                t.net_variance += p.net_variance;
                t.kw_noise += p.kw_noise;
                t.kw_bias_sq += p.kw_bias_sq;
                t.kw_variance += p.kw_variance;
                t.james_systematic += p.james_systematic;
                t.james_variance += p.james_variance;
            }
            for v in [
                &mut t.expected_loss,
                &mut t.noise,
                &mut t.bias,
                &mut t.variance,
                &mut t.unbiased_variance,
                &mut t.biased_variance,
                &mut t.net_variance,
                &mut t.kw_noise,
                &mut t.kw_bias_sq,
                &mut t.kw_variance,
                &mut t.james_systematic,
                &mut t.james_variance,
            ] {
                *v /= m;
            }
            t.expected_loss_direct = if acc.n > 0 {
                acc.direct[g] / acc.n as f64
            } else {
                f64::NAN
            };
            t
        })
        .collect()
}

/// Folds blocks in index order and computes terms with delete-a-block jackknife standard errors
/// (via [`jackknife_se`]). Returns `None` for an empty block list.
pub fn summarize(blocks: &[ZeroOneAcc], p_true: &[f64]) -> Option<ZeroOneSummary> {
    let total = ZeroOneAcc::fold(blocks, None)?;
    let full = terms(&total, p_true);
    let nb = blocks.len();
    let mut loo: Vec<Vec<ZeroOneTerms>> = Vec::with_capacity(nb);
    if nb >= 2 {
        for b in 0..nb {
            let acc = ZeroOneAcc::fold(blocks, Some(b)).expect("at least one block remains");
            loo.push(terms(&acc, p_true));
        }
    }
    let stderr = (0..total.grid)
        .map(|g| {
            let se = |f: fn(&ZeroOneTerms) -> f64| {
                if loo.is_empty() {
                    f64::NAN
                } else {
                    jackknife_se(&loo.iter().map(|t| f(&t[g])).collect::<Vec<_>>())
                }
            };
            ZeroOneTerms {
                expected_loss: se(|t| t.expected_loss),
                expected_loss_direct: se(|t| t.expected_loss_direct),
                noise: 0.0,
                bias: se(|t| t.bias),
                variance: se(|t| t.variance),
                unbiased_variance: se(|t| t.unbiased_variance),
                biased_variance: se(|t| t.biased_variance),
                net_variance: se(|t| t.net_variance),
                kw_noise: 0.0,
                kw_bias_sq: se(|t| t.kw_bias_sq),
                kw_variance: se(|t| t.kw_variance),
                james_systematic: se(|t| t.james_systematic),
                james_variance: se(|t| t.james_variance),
            }
        })
        .collect();
    Some(ZeroOneSummary {
        terms: full,
        stderr,
        total,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

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
    fn acc_from(counts: &[Vec<u32>], k: usize, r: u64) -> ZeroOneAcc {
        let mut acc = ZeroOneAcc::new(1, counts.len(), k);
        acc.n = r;
        for (e, c) in counts.iter().enumerate() {
            acc.counts[e * k..(e + 1) * k].copy_from_slice(c);
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
                    assert!((t.domingos_noise_term() - pt.c1 * t.noise).abs() < TOL);
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
        let mut acc = ZeroOneAcc::new(2, m, k);
        let preds = Array2::<f64>::from_elem((2, m), 1.0);
        for _ in 0..r {
            acc.push(preds.view(), &[0.25, 0.5]);
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
        let tt = terms(&acc, &p);
        assert_eq!(tt[0].variance, 0.0);
        assert_eq!(tt[0].kw_variance, 0.0);
        assert_eq!(tt[0].james_variance, 0.0);
        assert_eq!(tt[0].bias, misses as f64 / m as f64);
        assert_eq!(tt[0].expected_loss_direct, 0.25);
        assert_eq!(tt[1].expected_loss_direct, 0.5);
    }

    #[test]
    fn corrected_agreement_is_the_share_of_agreeing_distinct_replicate_pairs() {
        // Exact identity behind the Kohavi–Wolpert finite-R correction: Σ_c n_c(n_c − 1)/(R(R − 1))
        // equals the share of ordered pairs r ≠ s with ŷ_r = ŷ_s.
        let (k, r) = (4, 9);
        let mut s = 33u64;
        let labels: Vec<usize> = (0..r).map(|_| below(&mut s, k)).collect();
        let mut acc = ZeroOneAcc::new(1, 1, k);
        for &c in &labels {
            acc.push(Array2::from_elem((1, 1), c as f64).view(), &[0.0]);
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

    fn random_blocks(sizes: &[usize]) -> (Vec<ZeroOneAcc>, ZeroOneAcc) {
        let (g, m, k) = (3, 8, 3);
        let mut s = 77u64;
        let mut all = ZeroOneAcc::new(g, m, k);
        let mut blocks = Vec::new();
        for &size in sizes {
            let mut b = ZeroOneAcc::new(g, m, k);
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
                // dyadic direct shares: sums are exact in any order
                let d: Vec<f64> = (0..g).map(|_| below(&mut s, 8) as f64 / 8.0).collect();
                all.push(p.view(), &d);
                b.push(p.view(), &d);
            }
            blocks.push(b);
        }
        (blocks, all)
    }

    #[test]
    fn merged_blocks_equal_one_accumulator_over_all_replicates() {
        let (blocks, all) = random_blocks(&[7, 5, 9, 1]);
        let folded = ZeroOneAcc::fold(&blocks, None).unwrap();
        assert_eq!(folded, all);
        let mut skipped = ZeroOneAcc::fold(&blocks, Some(1)).unwrap();
        assert_eq!(skipped.n, 17);
        skipped.merge(&ZeroOneAcc::new(3, 8, 3));
        assert_eq!(skipped.n, 17);
        assert!(ZeroOneAcc::fold(&[], None).is_none());
    }

    #[test]
    fn jackknife_errors_are_nan_for_one_block_and_finite_for_several() {
        let mut s = 2u64;
        let p: Vec<f64> = (0..8).flat_map(|_| simplex(&mut s, 3)).collect();
        let (blocks, all) = random_blocks(&[10, 10, 10, 10, 10]);

        let one = summarize(std::slice::from_ref(&all), &p).unwrap();
        assert!(one.stderr.iter().all(|t| t.expected_loss.is_nan()
            && t.variance.is_nan()
            && t.kw_variance.is_nan()
            && t.james_variance.is_nan()));
        assert!(one
            .stderr
            .iter()
            .all(|t| t.noise == 0.0 && t.kw_noise == 0.0));

        let several = summarize(&blocks, &p).unwrap();
        assert_eq!(several.total, all);
        assert_eq!(several.terms, one.terms);
        for t in &several.stderr {
            for v in [
                t.expected_loss,
                t.expected_loss_direct,
                t.bias,
                t.variance,
                t.unbiased_variance,
                t.biased_variance,
                t.net_variance,
                t.kw_bias_sq,
                t.kw_variance,
                t.james_systematic,
                t.james_variance,
            ] {
                assert!(v.is_finite() && v >= 0.0);
            }
            assert!(t.expected_loss > 0.0);
        }
        assert!(summarize(&[], &p).is_none());
    }

    #[test]
    fn an_empty_accumulator_gives_nan_estimates_and_the_known_noise() {
        let acc = ZeroOneAcc::new(1, 1, 2);
        let t = terms(&acc, &[0.3, 0.7]);
        assert!(t[0].expected_loss.is_nan() && t[0].expected_loss_direct.is_nan());
        assert!((t[0].noise - 0.3).abs() < TOL);
        // Kohavi–Wolpert noise ½(1 − Σ p_t²) = ½(1 − 0.58) = 0.21
        assert!((t[0].kw_noise - 0.21).abs() < TOL);
    }
}
