//! Log-loss (cross-entropy) on class probabilities: the decomposition of Heskes (1998), "Bias/
//! Variance Decompositions for Likelihood-Based Estimators", *Neural Computation* 10(6):1425–1433.
//!
//! # Setting
//!
//! K classes. At evaluation point x the true class probabilities `p_c = P(Y = c | x)` are known;
//! over the replicate training sets D the family predicts a probability vector `q_D` (every
//! component positive: a zero probability makes the loss infinite, see below). The loss of a
//! prediction q against a label y is `−log q_y` (natural logarithm: nats).
//!
//! # Decomposition (exact)
//!
//! Let `ℓ_c = E_D[log q_{D,c}]` and let the **central prediction** be the normalized geometric
//! mean of the replicate probability vectors,
//!
//! `q̄_c = exp(ℓ_c) / Z`, `Z = Σ_c exp(ℓ_c)` (so `log q̄_c = ℓ_c − log Z`).
//!
//! Heskes' terms are
//!
//! - noise `N = −Σ_c p_c log p_c` (the entropy of p; `0 log 0 = 0`),
//! - bias `B = KL(p ‖ q̄) = Σ_c p_c (log p_c − log q̄_c)`,
//! - variance `V = E_D KL(q̄ ‖ q_D) = Σ_c q̄_c log q̄_c − Σ_c q̄_c ℓ_c`.
//!
//! Substituting `log q̄_c = ℓ_c − log Z` in the variance, `Σ_c q̄_c (ℓ_c − log Z) − Σ_c q̄_c ℓ_c =
//! −log Z` (because `Σ_c q̄_c = 1`): **the variance is `−log Σ_c exp(ℓ_c)`**, a function of the
//! per-class mean log-probabilities alone. It is non-negative: `exp(ℓ_c) ≤ E_D q_{D,c}` (Jensen),
//! so `Z ≤ 1`. And
//!
//! `N + B + V = −Σ_c p_c log p_c + Σ_c p_c log p_c − Σ_c p_c ℓ_c + log Z − log Z
//!            = −Σ_c p_c E_D[log q_{D,c}] = E_{D,Y}[−log q_{D,Y}]`,
//!
//! the expected log-loss (the label is drawn independently of the training set). The identity
//! is exact at every point, and it holds for the empirical distribution of R replicates too.
//!
//! # Accumulator and estimators
//!
//! Per cell (grid value × evaluation point) and class the **sum of log q over the replicate
//! fits** (`sum_log_q`); nothing else is needed, since every term is a function of the means
//! `ℓ̂_c = sum_log_q_c / n` (n = replicates × fit seeds evaluating the point). The expected loss
//! `−Σ_c p_c ℓ̂_c` is linear in `ℓ̂`, hence **unbiased** at any R. The variance `−log Σ_c exp ℓ̂_c`
//! and the bias are plug-in estimates: consistent, with a bias of order 1/R of opposite signs
//! in the two (they always add up to the unbiased `expected loss − noise`); a second-order
//! expansion gives `E[V̂] − V ≈ −(1/(2R)) [Σ_c q̄_c Var(log q_c) − Var(Σ_c q̄_c log q_c)]` ≤ 0.
//!
//! With `fit_seeds = S`, every fit counts as one prediction (the distribution is over training
//! set and fit seed together), as the 0-1 loss does with its votes.
//!
//! # Zero probabilities
//!
//! `−log 0 = ∞`: a family that gives a class probability 0 (an unsmoothed share of a pure tree
//! leaf or of a k-NN neighbourhood without that class; logistic for a class absent from the
//! training set) makes the expected loss infinite. Such a prediction is refused where every
//! prediction is checked ([`Loss::check_prediction`], called from
//! `runner::check_predictions`): the run stops (exit 2) and the message names the family and
//! its remedy (the family's `zero_probability_remedy`: add-α smoothing, `alpha = 0.5` in
//! `[model]`, for tree, k-NN and forest; fewer rounds or a smaller learning rate for boosting).
//! Nothing infinite is ever accumulated or written.
//!
//! # Tables (observed labels)
//!
//! On a table the observed label stands for p (a one-hot vector), so the noise is folded into
//! the bias: `bias+noise = −log q̄_y` and the expected loss is the out-of-bag log-loss
//! `−ℓ̂_y`; rows held out in fewer than two replicates are skipped.

use super::term as info;
use super::{
    Acc, ArraySpec, Batch, Group, Identity, Kind, Loss, Role, Row, Shape, Target, TermInfo,
};
use crate::family::Task;

/// The log-loss (cross-entropy) on class probabilities.
#[derive(Debug, Clone, Copy, Default)]
pub struct LogLoss;

/// Per cell and class: Σ over the replicate fits of log q.
const SUM_LOG: usize = 0;
/// Per grid value (every point evaluated): Σ over replicates of the mean log-loss against fresh
/// labels (averaged over the fit seeds).
const DIRECT: usize = 1;

/// `log Σ_c exp(v_c)`, computed without overflow.
pub fn log_sum_exp(v: &[f64]) -> f64 {
    let mx = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !mx.is_finite() {
        return mx;
    }
    mx + v.iter().map(|x| (x - mx).exp()).sum::<f64>().ln()
}

/// Heskes' terms at one point.
#[derive(Debug, Clone, PartialEq)]
pub struct LogPoint {
    /// `−Σ_c p_c ℓ̂_c`, the expected log-loss (unbiased).
    pub expected_loss: f64,
    /// Entropy of p (0 for a one-hot p).
    pub noise: f64,
    /// `KL(p ‖ q̄)`.
    pub bias: f64,
    /// `−log Σ_c exp ℓ̂_c = E KL(q̄ ‖ q)`.
    pub variance: f64,
    /// The central prediction q̄ (normalized geometric mean of the predicted probabilities).
    pub central: Vec<f64>,
}

/// Heskes' terms from the mean log-probabilities `mean_log` (ℓ̂, length K) and the true class
/// probabilities `p` (length K).
pub fn terms(mean_log: &[f64], p: &[f64]) -> LogPoint {
    let lse = log_sum_exp(mean_log);
    let mut expected_loss = 0.0;
    let mut noise = 0.0;
    let mut bias = 0.0;
    for (&l, &pc) in mean_log.iter().zip(p) {
        if pc > 0.0 {
            expected_loss -= pc * l;
            noise -= pc * pc.ln();
            bias += pc * (pc.ln() - (l - lse));
        }
    }
    // Both are ≥ 0 exactly (a KL divergence; Jensen: Σ_c exp ℓ̂_c ≤ Σ_c q̄_c = 1); rounding
    // alone can leave −1e-17, which would print as a negative variance.
    LogPoint {
        expected_loss,
        noise,
        bias: bias.max(0.0),
        variance: (-lse).max(0.0),
        central: mean_log.iter().map(|l| (l - lse).exp()).collect(),
    }
}

/// Index of the largest value, smallest index among exact ties.
fn argmax_first(xs: &[f64]) -> usize {
    let mut best = 0;
    for (i, &x) in xs.iter().enumerate() {
        if x > xs[best] {
            best = i;
        }
    }
    best
}

/// The class probabilities standing for the truth at point `e`: the known p, or the one-hot
/// vector of the observed label.
fn truth_probs(target: &Target<'_>, e: usize, k: usize) -> Vec<f64> {
    match target {
        Target::Known { probs: Some(p), .. } => p[e * k..(e + 1) * k].to_vec(),
        Target::Known { probs: None, .. } => vec![f64::NAN; k],
        Target::Observed { y, .. } => {
            let mut v = vec![0.0; k];
            let c = y[e] as usize;
            if c < k {
                v[c] = 1.0;
            }
            v
        }
    }
}

/// Terms at cell (g, e): `None` when the point was evaluated fewer than twice.
pub fn point(acc: &Acc, target: &Target<'_>, g: usize, e: usize) -> Option<LogPoint> {
    let sh = &acc.shape;
    let k = sh.classes;
    if acc.count[e] < 2 {
        return None;
    }
    let n = (acc.count[e] * sh.fits as u64) as f64;
    let i = (g * sh.points + e) * k;
    let mean_log: Vec<f64> = acc.floats[SUM_LOG][i..i + k]
        .iter()
        .map(|s| s / n)
        .collect();
    Some(terms(&mean_log, &truth_probs(target, e, k)))
}

impl Loss for LogLoss {
    fn nonnegative_terms(&self) -> &'static [&'static str] {
        &super::DIVERGENCE_TERMS
    }

    fn noise_max(&self, classes: usize) -> f64 {
        (classes.max(1) as f64).ln()
    }

    fn name(&self) -> &'static str {
        "log"
    }

    fn supports(&self, task: Task) -> bool {
        matches!(task, Task::Classify { .. })
    }

    fn bias_word(&self) -> &'static str {
        "Bias"
    }

    fn observed_note(&self) -> &'static str {
        " (On a table, the bias is measured against the observed labels, noise included.)"
    }

    fn needs_probs(&self) -> bool {
        true
    }

    fn layout(&self, shape: &Shape) -> Vec<ArraySpec> {
        let mut v = vec![ArraySpec {
            name: "sum_log_q",
            kind: Kind::Float,
            len: shape.cells() * shape.classes,
            non_negative: false,
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
        let probs = batch
            .probs
            .expect("the runner hands class probabilities to a loss that needs them");
        let s_fits = batch.values.dim().0;
        let m = batch.len();
        for g in 0..sh.grid {
            let mut direct_g = 0.0;
            for s in 0..s_fits {
                let mut sum = 0.0;
                for j in 0..m {
                    let base = (g * sh.points + batch.point(j)) * k;
                    for c in 0..k {
                        acc.floats[SUM_LOG][base + c] += probs[[s, g, j, c]].ln();
                    }
                    let y = batch.response[j] as usize;
                    sum -= if y < k {
                        probs[[s, g, j, y]].ln()
                    } else {
                        f64::NAN
                    };
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
                if observed {
                    "expected loss (OOB)"
                } else {
                    "expected loss"
                },
                if observed {
                    "mean out-of-bag log-loss −log q(observed label), in nats"
                } else {
                    "−Σ p_true·log q (nats) = noise + bias + variance, averaged over evaluation points"
                },
                Role::Loss,
                Main,
                true,
            ),
            info(
                "bias",
                if observed { "bias+noise" } else { "bias (KL)" },
                if observed {
                    "−log q̄(observed label), q̄ the normalized geometric mean of the out-of-bag probabilities (Heskes 1998, noise folded in); at finite R biased by order 1/R, opposite to the variance's bias (their sum is unbiased; ± covers the finite-R value)"
                } else {
                    "Heskes (1998): KL(p_true ‖ q̄), q̄ the normalized geometric mean of the predicted probabilities; at finite R biased by order 1/R, opposite to the variance's bias (their sum is unbiased; ± covers the finite-R value)"
                },
                Role::Bias,
                Main,
                true,
            ),
            info(
                "variance",
                "variance",
                "Heskes (1998): mean over training sets of KL(q̄ ‖ q) = −log Σ_c exp(mean log q_c); at finite R biased by order 1/R, opposite to the bias's bias (their sum is unbiased; ± covers the finite-R value)",
                Role::Variance,
                Main,
                true,
            ),
            info(
                "noise",
                if observed { "noise" } else { "noise (entropy)" },
                if observed {
                    "unknown on a table (folded into the bias)"
                } else {
                    "entropy of p_true, −Σ p log p (nats), known exactly from the scenario"
                },
                Role::Noise,
                if observed { Detail } else { Main },
                false,
            ),
            info(
                "expected_loss_direct",
                "direct check",
                if observed {
                    "mean out-of-bag log-loss summed directly (equals expected loss)"
                } else {
                    "log-loss −log q(y) against fresh labels, an independent estimate of the expected loss"
                },
                Role::Direct,
                if observed { Detail } else { Main },
                true,
            ),
        ]
    }

    fn identities(&self, _shape: &Shape, _observed: bool) -> Vec<Identity> {
        vec![Identity {
            name: "Heskes 1998: log-loss = noise (entropy) + bias (KL) + variance",
            total: "expected_loss",
            parts: &[("noise", 1.0), ("bias", 1.0), ("variance", 1.0)],
        }]
    }

    fn evaluate(&self, acc: &Acc, target: &Target<'_>) -> Vec<Row> {
        let sh = acc.shape;
        (0..sh.grid)
            .map(|g| {
                let (mut el, mut noise, mut bias, mut var) = (0.0, 0.0, 0.0, 0.0);
                let mut used = 0usize;
                for e in 0..sh.points {
                    let Some(p) = point(acc, target, g, e) else {
                        continue;
                    };
                    used += 1;
                    el += p.expected_loss;
                    noise += p.noise;
                    bias += p.bias;
                    var += p.variance;
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
                vec![el, bias / u, var / u, noise / u, direct]
            })
            .collect()
    }

    fn validate(&self, acc: &Acc) -> Result<(), String> {
        if let Some((i, v)) = acc.floats[SUM_LOG]
            .iter()
            .enumerate()
            .find(|(_, v)| **v > 0.0)
        {
            return Err(format!(
                "sum_log_q: value {i} is {v}, but a sum of log-probabilities cannot be positive"
            ));
        }
        Ok(())
    }

    fn checks_predictions(&self) -> bool {
        true
    }

    fn check_prediction(&self, _value: f64, probs: Option<&[f64]>) -> Result<(), String> {
        let Some(q) = probs else { return Ok(()) };
        match q.iter().position(|&v| v <= 0.0) {
            None => Ok(()),
            Some(c) => Err(format!(
                "class {c} has probability 0, and the log-loss of a zero probability is infinite"
            )),
        }
    }

    fn observed_loss(&self, _value: f64, probs: Option<&[f64]>, y: f64) -> f64 {
        match probs {
            Some(q) if (y as usize) < q.len() => -q[y as usize].ln(),
            _ => f64::NAN,
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
            ]
        } else {
            vec![
                ("bayes_class", true),
                ("main_prediction", true),
                ("expected_loss", false),
                ("noise", false),
                ("bias", false),
                ("variance", false),
            ]
        }
    }

    fn point_values(&self, acc: &Acc, target: &Target<'_>, g: usize, e: usize) -> Vec<f64> {
        let k = acc.shape.classes;
        let p = point(acc, target, g, e);
        let main = p
            .as_ref()
            .map_or(f64::NAN, |p| argmax_first(&p.central) as f64);
        let get = |f: fn(&LogPoint) -> f64| p.as_ref().map_or(f64::NAN, f);
        match target {
            Target::Observed { y, .. } => vec![
                y[e],
                acc.count[e] as f64,
                main,
                get(|p| p.bias),
                get(|p| p.variance),
            ],
            Target::Known { .. } => vec![
                argmax_first(&truth_probs(target, e, k)) as f64,
                main,
                get(|p| p.expected_loss),
                get(|p| p.noise),
                get(|p| p.bias),
                get(|p| p.variance),
            ],
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::decompose::{summarize, Acc};
    use ndarray::{Array3, Array4};

    fn lcg(state: &mut u64) -> f64 {
        *state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (*state >> 11) as f64 / (1u64 << 53) as f64
    }

    /// A random probability vector with every component at least 1e-3.
    fn simplex(state: &mut u64, k: usize) -> Vec<f64> {
        let v: Vec<f64> = (0..k).map(|_| lcg(state) + 1e-3).collect();
        let s: f64 = v.iter().sum();
        v.iter().map(|x| x / s).collect()
    }

    fn shape(g: usize, m: usize, k: usize, fits: usize) -> Shape {
        Shape {
            grid: g,
            points: m,
            classes: k,
            fits,
            all_points: true,
            ensemble: false,
        }
    }

    /// Pushes one replicate: `q[s][g][e]` probability vectors, fresh labels `y`.
    fn push(acc: &mut Acc, q: &[Vec<Vec<Vec<f64>>>], y: &[f64]) {
        let (s, g, m, k) = (q.len(), q[0].len(), q[0][0].len(), q[0][0][0].len());
        let mut probs = Array4::<f64>::zeros((s, g, m, k));
        for ((si, gi, e, c), v) in probs.indexed_iter_mut() {
            *v = q[si][gi][e][c];
        }
        let values = Array3::<f64>::zeros((s, g, m));
        let b = Batch {
            held: None,
            values: values.view(),
            probs: Some(probs.view()),
            diversity: None,
            response: y,
        };
        acc.push(&LogLoss, &b);
    }

    #[test]
    fn heskes_terms_add_up_to_the_mean_log_loss_of_the_replicates() {
        // Exact identity (Heskes 1998, and the module docs): noise + KL(p ‖ q̄) + E KL(q̄ ‖ q)
        // equals (1/R) Σ_r −Σ_c p_c log q_rc, computed here directly from the predictions; the
        // variance also equals the mean of KL(q̄ ‖ q_r) computed literally.
        let mut st = 5u64;
        for k in 2..=5 {
            for r in [2usize, 3, 7, 40] {
                let (g, m) = (2, 6);
                let p: Vec<Vec<f64>> = (0..m).map(|_| simplex(&mut st, k)).collect();
                let flat: Vec<f64> = p.iter().flatten().copied().collect();
                let mut acc = Acc::new(&LogLoss, shape(g, m, k, 1));
                let mut all = Vec::new();
                for _ in 0..r {
                    let q: Vec<Vec<Vec<f64>>> = (0..g)
                        .map(|_| (0..m).map(|_| simplex(&mut st, k)).collect())
                        .collect();
                    push(&mut acc, std::slice::from_ref(&q), &vec![0.0; m]);
                    all.push(q);
                }
                let zeros = vec![0.0; m];
                let target = Target::Known {
                    truth: &zeros,
                    noise_var: &zeros,
                    probs: Some(&flat),
                };
                for gi in 0..g {
                    for e in 0..m {
                        let t = point(&acc, &target, gi, e).unwrap();
                        let direct: f64 = all
                            .iter()
                            .map(|q| -(0..k).map(|c| p[e][c] * q[gi][e][c].ln()).sum::<f64>())
                            .sum::<f64>()
                            / r as f64;
                        let sum = t.noise + t.bias + t.variance;
                        assert!(
                            (sum - direct).abs() < 1e-12,
                            "k={k} r={r}: {sum} vs {direct}"
                        );
                        assert!((t.expected_loss - direct).abs() < 1e-12);
                        let kl_var: f64 = all
                            .iter()
                            .map(|q| {
                                (0..k)
                                    .map(|c| t.central[c] * (t.central[c] / q[gi][e][c]).ln())
                                    .sum::<f64>()
                            })
                            .sum::<f64>()
                            / r as f64;
                        assert!((kl_var - t.variance).abs() < 1e-12);
                        let kl_bias: f64 = (0..k)
                            .map(|c| p[e][c] * (p[e][c] / t.central[c]).ln())
                            .sum();
                        assert!((kl_bias - t.bias).abs() < 1e-12);
                        assert!(t.variance >= 0.0 && t.bias >= 0.0);
                        assert!((t.central.iter().sum::<f64>() - 1.0).abs() < 1e-12);
                    }
                }
            }
        }
    }

    #[test]
    fn a_constant_prediction_has_no_variance_and_its_bias_is_the_kl_divergence() {
        // Exact: every replicate predicts the same q, so q̄ = q, V = 0 and B = KL(p ‖ q).
        let q = vec![0.2, 0.3, 0.5];
        let p = vec![0.5, 0.25, 0.25];
        let mut acc = Acc::new(&LogLoss, shape(1, 1, 3, 1));
        for _ in 0..9 {
            push(&mut acc, &[vec![vec![q.clone()]]], &[2.0]);
        }
        let zeros = [0.0];
        let target = Target::Known {
            truth: &zeros,
            noise_var: &zeros,
            probs: Some(&p),
        };
        let t = point(&acc, &target, 0, 0).unwrap();
        let kl: f64 = (0..3).map(|c| p[c] * (p[c] / q[c]).ln()).sum();
        assert!(t.variance >= 0.0 && t.variance < 1e-15);
        assert!((t.bias - kl).abs() < 1e-14);
        // A constant prediction's log-sum-exp is 0 only up to rounding (it was −4e-17 for some
        // q): the variance is never printed below 0.
        let mut negative = 0;
        for i in 1..400 {
            let a = 0.001 + f64::from(i) / 401.0 * 0.5;
            let q = [a, 0.5 * (1.0 - a), 0.5 * (1.0 - a)];
            let logs: Vec<f64> = q.iter().map(|v: &f64| v.ln()).collect();
            negative += usize::from(-log_sum_exp(&logs) < 0.0);
            assert!(terms(&logs, &p).variance >= 0.0);
        }
        assert!(
            negative > 0,
            "no q tried rounds below 0: the check cannot fail"
        );
        let row = &LogLoss.evaluate(&acc, &target)[0];
        // direct: every fresh label is class 2: −log 0.5
        assert!((row[4] - (-(0.5f64).ln())).abs() < 1e-14);
    }

    #[test]
    fn fit_seeds_count_every_fit_and_blocks_merge_to_the_same_terms() {
        // Exact: with S fits per replicate the mean log q is over R·S fits; folding two blocks
        // gives the same sums as one accumulator (addition in the same order to rounding).
        let (k, m, s) = (3, 4, 2);
        let mut st = 9u64;
        let mut all = Acc::new(&LogLoss, shape(1, m, k, s));
        let mut a = all.clone();
        let mut b = all.clone();
        let mut logs = vec![vec![0.0; k]; m];
        for i in 0..10 {
            let q: Vec<Vec<Vec<Vec<f64>>>> = (0..s)
                .map(|_| vec![(0..m).map(|_| simplex(&mut st, k)).collect()])
                .collect();
            for fit in &q {
                for e in 0..m {
                    for c in 0..k {
                        logs[e][c] += fit[0][e][c].ln();
                    }
                }
            }
            push(&mut all, &q, &vec![1.0; m]);
            push(if i < 4 { &mut a } else { &mut b }, &q, &vec![1.0; m]);
        }
        a.merge(&LogLoss, &b);
        let p: Vec<f64> = (0..m).flat_map(|_| vec![1.0 / 3.0; 3]).collect();
        let zeros = vec![0.0; m];
        let target = Target::Known {
            truth: &zeros,
            noise_var: &zeros,
            probs: Some(&p),
        };
        for e in 0..m {
            let ta = point(&a, &target, 0, e).unwrap();
            let tall = point(&all, &target, 0, e).unwrap();
            let mean: Vec<f64> = logs[e].iter().map(|l| l / 20.0).collect();
            let direct = terms(&mean, &p[e * 3..e * 3 + 3]);
            assert!((ta.variance - direct.variance).abs() < 1e-12);
            assert!((tall.bias - direct.bias).abs() < 1e-12);
        }
        let one = summarize(&LogLoss, std::slice::from_ref(&all), &target).unwrap();
        assert!(one.values[0].iter().all(|v| v.is_finite()));
    }

    #[test]
    fn observed_labels_fold_the_noise_into_the_bias() {
        // Exact: p is the one-hot vector of the label, so noise 0, bias+noise = −log q̄_y and
        // the expected loss is the mean out-of-bag −log q_y.
        let sh = Shape {
            grid: 1,
            points: 2,
            classes: 2,
            fits: 1,
            all_points: false,
            ensemble: false,
        };
        let y = [1.0, 0.0];
        let mut acc = Acc::new(&LogLoss, sh);
        let preds = [[0.2, 0.8], [0.4, 0.6], [0.1, 0.9]];
        for q in preds {
            let held = [0usize];
            let mut probs = Array4::<f64>::zeros((1, 1, 1, 2));
            probs[[0, 0, 0, 0]] = q[0];
            probs[[0, 0, 0, 1]] = q[1];
            let values = Array3::<f64>::zeros((1, 1, 1));
            let b = Batch {
                held: Some(&held),
                values: values.view(),
                probs: Some(probs.view()),
                diversity: None,
                response: &y[..1],
            };
            acc.push(&LogLoss, &b);
        }
        let target = Target::Observed { y: &y, noise: None };
        let row = &LogLoss.evaluate(&acc, &target)[0];
        let el = -(0.8f64.ln() + 0.6f64.ln() + 0.9f64.ln()) / 3.0;
        assert!((row[0] - el).abs() < 1e-14);
        assert!((row[0] - row[1] - row[2]).abs() < 1e-14);
        assert_eq!(row[3], 0.0);
        assert_eq!(row[4], row[0]);
        assert!(LogLoss.check_prediction(1.0, Some(&[0.0, 1.0])).is_err());
        assert!(LogLoss.check_prediction(1.0, Some(&[0.1, 0.9])).is_ok());
        assert!((LogLoss.observed_loss(1.0, Some(&[0.2, 0.8]), 1.0) + 0.8f64.ln()).abs() < 1e-15);
    }
}
