//! Brier score: the squared loss on probability vectors, `Σ_c (q_c − 1[y = c])²`, decomposed
//! like the squared loss of a K-vector (Brier 1950, *Monthly Weather Review* 78(1):1–3, for the
//! score; the split is Hastie, Tibshirani, Friedman, *The Elements of Statistical Learning*,
//! 2nd ed., eq. 7.9, applied to each class component and summed).
//!
//! # Decomposition (exact)
//!
//! At evaluation point x with true class probabilities p and predicted vectors q_D over the
//! training sets D, with a fresh label Y ~ p independent of D and `e_Y` its one-hot vector:
//!
//! `E‖q_D − e_Y‖² = Σ_c p_c (1 − p_c) + ‖p − q̄‖² + E_D‖q_D − q̄‖²`, `q̄ = E_D q_D`
//!
//! (`E_Y‖q − e_Y‖² = ‖q − p‖² + E‖e_Y − p‖²` and `E‖e_Y − p‖² = Σ_c p_c(1 − p_c) = 1 − Σ_c p_c²`;
//! then the usual bias-variance split of `E_D‖q_D − p‖²` around the arithmetic mean). Noise is
//! `1 − Σ p²`, bias² `‖p − q̄‖²`, variance `E‖q_D − q̄‖²`.
//!
//! # Accumulator and unbiased estimators
//!
//! Per cell and class the running mean of q (Welford), and per cell the centred sum of squares
//! `M2 = Σ_r ‖q_r − q̄‖²` summed over classes (the pairwise merge of Chan, Golub and LeVeque 1979
//! needs only `Σ_c d_c²` of the difference of the block means, so one M2 per cell suffices). As
//! for the squared loss: `V̂ = M2/(R − 1)` and `B̂² = ‖q̄ − p‖² − V̂/R` are unbiased at any R ≥ 2,
//! and `(1/R) Σ_r ‖q_r − p‖² = B̂² + V̂` exactly, so `noise + B̂² + V̂` is exactly the mean over
//! the replicates of the expected Brier score of each.
//!
//! **Several fits per training set** (`fit_seeds = S ≥ 2`) and **ensembles** follow
//! [`super::squared`] component-wise: the cell tracks the S-averaged vector and the sum over
//! replicates of the within-replicate sample variances `Σ_s ‖q_s − q̄_r‖²/(S − 1)`;
//! `variance_fit = mean of those`, `variance_data = Var_r(q̄_r) − variance_fit/S` (one-way random
//! effects, Searle, Casella, McCulloch 1992, §3.5), `variance = variance_data + variance_fit` is
//! the variance of one fit. An ensemble's diversity `(1/T) Σ_t ‖q_t − q̄‖²` (as the family
//! reports it) gives `member_variance = variance + diversity` and `member_loss = expected loss +
//! diversity` (Wood et al. 2023, *JMLR* 24(359)).
//!
//! # Tables (observed labels)
//!
//! The observed label's one-hot vector stands for p, so the noise is folded into the bias:
//! `bias²+noise = ‖q̄ − e_y‖² − V̂_i/R_i` per row, and `bias²+noise + V̂_i` is exactly the row's
//! mean out-of-bag Brier score; rows held out in fewer than two replicates are skipped.

use super::term as info;
use super::{
    Acc, ArraySpec, Batch, Group, Identity, Kind, Loss, Role, Row, Shape, Target, TermInfo,
};
use crate::family::Task;

/// The Brier score.
#[derive(Debug, Clone, Copy, Default)]
pub struct Brier;

/// Per cell and class: running mean of the (S-averaged) probability.
const MEAN: usize = 0;
/// Per cell: centred sum of squares summed over classes.
const M2: usize = 1;
/// Per grid value (every point evaluated): Σ_r of the mean Brier score against fresh labels.
const DIRECT: usize = 2;

fn direct_index(shape: &Shape) -> Option<usize> {
    shape.all_points.then_some(DIRECT)
}

fn within_index(shape: &Shape) -> Option<usize> {
    (shape.fits >= 2).then_some(2 + usize::from(shape.all_points))
}

fn div_index(shape: &Shape) -> Option<usize> {
    shape
        .ensemble
        .then_some(2 + usize::from(shape.all_points) + usize::from(shape.fits >= 2))
}

/// Terms at one point.
#[derive(Debug, Clone, PartialEq)]
pub struct BrierPoint {
    /// Mean predicted probability vector q̄.
    pub mean: Vec<f64>,
    /// `1 − Σ p²` (0 for a one-hot p).
    pub noise: f64,
    /// Unbiased `‖q̄ − p‖² − V̂/R`.
    pub bias_sq: f64,
    /// Unbiased variance of one fit.
    pub variance: f64,
    /// `Var_D E_s q` (several fits; NaN otherwise).
    pub variance_data: f64,
    /// `E_D Var_s q` (several fits; NaN otherwise).
    pub variance_fit: f64,
    /// Mean diversity (ensembles; NaN otherwise).
    pub diversity: f64,
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

/// Terms at cell (g, e) against the class probabilities `p`; `None` when the point was
/// evaluated fewer than twice.
pub fn point(acc: &Acc, g: usize, e: usize, p: &[f64]) -> Option<BrierPoint> {
    let sh = &acc.shape;
    let k = sh.classes;
    let r = acc.count[e];
    if r < 2 {
        return None;
    }
    let rf = r as f64;
    let cell = g * sh.points + e;
    let mean = acc.floats[MEAN][cell * k..(cell + 1) * k].to_vec();
    let v_avg = acc.floats[M2][cell] / (rf - 1.0);
    let d2: f64 = mean.iter().zip(p).map(|(q, t)| (q - t) * (q - t)).sum();
    let (variance, vd, vf) = match within_index(sh) {
        None => (v_avg, f64::NAN, f64::NAN),
        Some(w) => {
            let vf = acc.floats[w][cell] / rf;
            let vd = v_avg - vf / sh.fits as f64;
            (vd + vf, vd, vf)
        }
    };
    Some(BrierPoint {
        mean,
        noise: 1.0 - p.iter().map(|v| v * v).sum::<f64>(),
        bias_sq: d2 - v_avg / rf,
        variance,
        variance_data: vd,
        variance_fit: vf,
        diversity: div_index(sh).map_or(f64::NAN, |i| acc.floats[i][cell] / rf),
    })
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

impl Loss for Brier {
    fn nonnegative_terms(&self) -> &'static [&'static str] {
        &super::MEAN_SQUARE_TERMS
    }

    /// A squared distance between two probability vectors is at most 2; the noise `1 − Σ p²`
    /// and a variance of probability vectors (`E ‖q‖² − ‖E q‖² ≤ 1`) at most 1.
    fn range(&self, key: &str) -> (f64, f64) {
        let lo = if self.nonnegative_terms().contains(&key) {
            0.0
        } else {
            f64::NEG_INFINITY
        };
        match key {
            "expected_loss" | "expected_loss_direct" | "member_loss" | "bias_sq" => (lo, 2.0),
            "noise" => (0.0, 1.0),
            "variance" | "variance_data" | "variance_fit" | "member_variance" | "diversity" => {
                (lo, 1.0)
            }
            _ => self.bounds(key),
        }
    }

    /// The second-order part of `bias_sq` (and on a table the noise estimate's error).
    fn stderr_beyond_jackknife(&self, key: &str) -> bool {
        key == "bias_sq"
    }

    fn noise_max(&self, classes: usize) -> f64 {
        1.0 - 1.0 / classes.max(1) as f64
    }

    fn name(&self) -> &'static str {
        "brier"
    }

    fn supports(&self, task: Task) -> bool {
        matches!(task, Task::Classify { .. })
    }

    fn bias_word(&self) -> &'static str {
        "Bias²"
    }

    fn observed_note(&self) -> &'static str {
        " (On a table, the bias is measured against the observed labels, noise included.)"
    }

    fn needs_probs(&self) -> bool {
        true
    }

    fn layout(&self, shape: &Shape) -> Vec<ArraySpec> {
        let cells = shape.cells();
        let f = |name, len, non_negative| ArraySpec {
            name,
            kind: Kind::Float,
            len,
            non_negative,
        };
        let mut v = vec![f("mean", cells * shape.classes, true), f("m2", cells, true)];
        if direct_index(shape).is_some() {
            v.push(f("direct", shape.grid, true));
        }
        if within_index(shape).is_some() {
            v.push(f("within", cells, true));
        }
        if div_index(shape).is_some() {
            v.push(f("diversity", cells, true));
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
        let (within, div) = (within_index(&sh), div_index(&sh));
        let mut avg = vec![0.0; k];
        for g in 0..sh.grid {
            let mut direct_g = 0.0;
            for s in 0..s_fits {
                let mut sum = 0.0;
                for j in 0..m {
                    let y = batch.response[j];
                    for c in 0..k {
                        let t = if y == c as f64 { 1.0 } else { 0.0 };
                        let d = probs[[s, g, j, c]] - t;
                        sum += d * d;
                    }
                }
                direct_g += sum / m as f64;
            }
            if let Some(d) = direct_index(&sh) {
                acc.floats[d][g] += direct_g / s_fits as f64;
            }
            for j in 0..m {
                let e = batch.point(j);
                let cell = g * sh.points + e;
                let inv = 1.0 / acc.count[e] as f64;
                for (c, a) in avg.iter_mut().enumerate() {
                    *a = (0..s_fits).map(|s| probs[[s, g, j, c]]).sum::<f64>() / s_fits as f64;
                }
                let mut m2 = 0.0;
                for (c, &y) in avg.iter().enumerate() {
                    let mu = &mut acc.floats[MEAN][cell * k + c];
                    let dlt = y - *mu;
                    *mu += dlt * inv;
                    m2 += dlt * (y - *mu);
                }
                acc.floats[M2][cell] += m2;
                if let Some(w) = within {
                    let ss: f64 = (0..s_fits)
                        .map(|s| {
                            (0..k)
                                .map(|c| {
                                    let t = probs[[s, g, j, c]] - avg[c];
                                    t * t
                                })
                                .sum::<f64>()
                        })
                        .sum();
                    acc.floats[w][cell] += ss / (s_fits - 1) as f64;
                }
                if let (Some(dv), Some(bd)) = (div, batch.diversity.as_ref()) {
                    let sum: f64 = (0..s_fits).map(|s| bd[[s, g, j]]).sum();
                    acc.floats[dv][cell] += sum / s_fits as f64;
                }
            }
        }
    }

    fn merge(&self, acc: &mut Acc, other: &Acc) {
        let sh = acc.shape;
        let k = sh.classes;
        // Per point: the weights of the pairwise update (Chan, Golub, LeVeque 1979).
        let weights: Vec<Option<(f64, f64)>> = acc
            .count
            .iter()
            .zip(&other.count)
            .map(|(&a, &b)| {
                if b == 0 {
                    None
                } else {
                    let (na, nb) = (a as f64, b as f64);
                    let n = na + nb;
                    Some((nb / n, na * nb / n))
                }
            })
            .collect();
        for g in 0..sh.grid {
            for (e, w) in weights.iter().enumerate() {
                let Some((wb, wab)) = *w else { continue };
                let cell = g * sh.points + e;
                let mut d2 = 0.0;
                for c in 0..k {
                    let i = cell * k + c;
                    let d = other.floats[MEAN][i] - acc.floats[MEAN][i];
                    acc.floats[MEAN][i] += d * wb;
                    d2 += d * d;
                }
                acc.floats[M2][cell] += other.floats[M2][cell] + d2 * wab;
            }
        }
        for i in 2..acc.floats.len() {
            for (a, b) in acc.floats[i].iter_mut().zip(&other.floats[i]) {
                *a += b;
            }
        }
    }

    fn describe(&self, shape: &Shape, observed: bool) -> Vec<TermInfo> {
        use Group::{Detail, Main};
        let mut v = vec![
            info(
                "expected_loss",
                if observed {
                    "expected loss (OOB)"
                } else {
                    "expected loss"
                },
                if observed {
                    "mean out-of-bag Brier score Σ (q − onehot(observed))² = bias²+noise + variance exactly"
                } else {
                    "Brier score Σ_c (q_c − 1[y = c])² = noise + bias² + variance, averaged over evaluation points"
                },
                Role::Loss,
                Main,
                true,
            ),
            info(
                "bias_sq",
                if observed { "bias²+noise" } else { "bias²" },
                if observed {
                    "‖mean out-of-bag probabilities − onehot(observed)‖² − variance/R_i per row (noise folded in)"
                } else {
                    "‖mean predicted probabilities − p_true‖² − variance/R, unbiased"
                },
                Role::Bias,
                Main,
                true,
            ),
            info(
                "variance",
                "variance",
                "spread of the probability vectors over training sets, E‖q − q̄‖², unbiased",
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
                    "1 − Σ p_true², the Brier score of the true probabilities"
                },
                Role::Noise,
                if observed { Detail } else { Main },
                false,
            ),
            info(
                "expected_loss_direct",
                "direct check",
                if observed {
                    "mean out-of-bag Brier score summed directly (equals expected loss)"
                } else {
                    "Brier score against fresh labels, an independent estimate of the expected loss"
                },
                Role::Direct,
                if observed { Detail } else { Main },
                true,
            ),
        ];
        if shape.fits >= 2 {
            v.push(info(
                "variance_data",
                "var (data)",
                "Var over training sets of the probability vector averaged over fit seeds",
                Role::Other,
                Main,
                true,
            ));
            v.push(info(
                "variance_fit",
                "var (fit)",
                "mean over training sets of the variance across fit seeds: the learner's own randomness",
                Role::Other,
                Main,
                true,
            ));
        }
        if shape.ensemble {
            v.push(info(
                "diversity",
                "diversity",
                "mean spread of the ensemble's members around the ensemble, (1/T) Σ ‖q_t − q̄‖²",
                Role::Other,
                Main,
                true,
            ));
            v.push(info(
                "member_variance",
                "member var",
                "average member variance = variance + diversity (exchangeable members)",
                Role::Other,
                Detail,
                true,
            ));
            v.push(info(
                "member_loss",
                "avg member loss",
                "expected loss of a single member, averaged over the members = expected loss + diversity (what averaging saves)",
                Role::Other,
                Main,
                true,
            ));
        }
        v
    }

    fn identities(&self, shape: &Shape, observed: bool) -> Vec<Identity> {
        let mut v = vec![Identity {
            name: "Brier score = noise + bias² + variance (squared loss on probability vectors)",
            total: "expected_loss",
            parts: &[("noise", 1.0), ("bias_sq", 1.0), ("variance", 1.0)],
        }];
        if shape.fits >= 2 {
            v.push(Identity {
                name: "law of total variance: variance = variance_data + variance_fit",
                total: "variance",
                parts: &[("variance_data", 1.0), ("variance_fit", 1.0)],
            });
        }
        if shape.ensemble && !observed {
            v.push(Identity {
                name: "Wood et al. 2023: loss = noise + bias² + member variance − diversity",
                total: "expected_loss",
                parts: &[
                    ("noise", 1.0),
                    ("bias_sq", 1.0),
                    ("member_variance", 1.0),
                    ("diversity", -1.0),
                ],
            });
        }
        v
    }

    /// `bias_sq = mean_e ‖p̄_e − p_e‖² − V̂/R` is quadratic in the errors of the mean
    /// probability vectors: its second-order sampling variance is added to the jackknife's, as
    /// for the squared loss (`squared::Squared::second_order_stderr`), with the covariance of
    /// the points' probability vectors (points × classes). Known truths only.
    fn second_order_stderr(
        &self,
        blocks: &[&Acc],
        total: &Acc,
        target: &Target<'_>,
        se: &mut [Row],
    ) {
        let w = total.shape.points * total.shape.classes;
        let means = super::BlockMeans::Floats(MEAN);
        super::add_second_order(self, &["bias_sq"], blocks, total, target, se, 1.0, w, means);
    }

    fn evaluate(&self, acc: &Acc, target: &Target<'_>) -> Vec<Row> {
        let sh = acc.shape;
        let k = sh.classes;
        let n_terms = self.describe(&sh, target.observed()).len();
        (0..sh.grid)
            .map(|g| {
                let (mut noise, mut b2, mut v, mut vd, mut vf, mut dv) =
                    (0.0, 0.0, 0.0, 0.0, 0.0, 0.0);
                let mut used = 0usize;
                for e in 0..sh.points {
                    let Some(p) = point(acc, g, e, &truth_probs(target, e, k)) else {
                        continue;
                    };
                    used += 1;
                    noise += p.noise;
                    b2 += p.bias_sq;
                    v += p.variance;
                    vd += p.variance_data;
                    vf += p.variance_fit;
                    dv += p.diversity;
                }
                if used == 0 {
                    return vec![f64::NAN; n_terms];
                }
                let u = used as f64;
                let (noise, b2, v) = (noise / u, b2 / u, v / u);
                let el = noise + b2 + v;
                let direct = match direct_index(&sh) {
                    Some(d) => acc.floats[d][g] / acc.replicates as f64,
                    None => el,
                };
                let mut row = vec![el, b2, v, noise, direct];
                if sh.fits >= 2 {
                    row.push(vd / u);
                    row.push(vf / u);
                }
                if sh.ensemble {
                    let d = dv / u;
                    row.extend([d, v + d, el + d]);
                }
                row
            })
            .collect()
    }

    fn observed_loss(&self, _value: f64, probs: Option<&[f64]>, y: f64) -> f64 {
        match probs {
            Some(q) => q
                .iter()
                .enumerate()
                .map(|(c, v)| {
                    let t = if y == c as f64 { 1.0 } else { 0.0 };
                    (v - t) * (v - t)
                })
                .sum(),
            None => f64::NAN,
        }
    }

    fn point_columns(&self, shape: &Shape, observed: bool) -> Vec<(&'static str, bool)> {
        let mut v = if observed {
            vec![
                ("observed", true),
                ("held_out_replicates", false),
                ("main_prediction", true),
                ("bias_sq_plus_noise", false),
                ("variance", false),
            ]
        } else {
            vec![
                ("bayes_class", true),
                ("main_prediction", true),
                ("noise", false),
                ("bias_sq", false),
                ("variance", false),
            ]
        };
        if shape.fits >= 2 {
            v.push(("variance_data", false));
            v.push(("variance_fit", false));
        }
        if shape.ensemble {
            v.push(("diversity", false));
        }
        v
    }

    fn point_values(&self, acc: &Acc, target: &Target<'_>, g: usize, e: usize) -> Vec<f64> {
        let sh = &acc.shape;
        let p = truth_probs(target, e, sh.classes);
        let pt = point(acc, g, e, &p);
        let get = |f: fn(&BrierPoint) -> f64| pt.as_ref().map_or(f64::NAN, f);
        let main = pt
            .as_ref()
            .map_or(f64::NAN, |t| argmax_first(&t.mean) as f64);
        let mut v = match target {
            Target::Observed { y, .. } => vec![
                y[e],
                acc.count[e] as f64,
                main,
                get(|t| t.bias_sq),
                get(|t| t.variance),
            ],
            Target::Known { .. } => vec![
                argmax_first(&p) as f64,
                main,
                get(|t| t.noise),
                get(|t| t.bias_sq),
                get(|t| t.variance),
            ],
        };
        if sh.fits >= 2 {
            v.push(get(|t| t.variance_data));
            v.push(get(|t| t.variance_fit));
        }
        if sh.ensemble {
            v.push(get(|t| t.diversity));
        }
        v
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::decompose::summarize;
    use ndarray::{Array3, Array4};

    fn lcg(state: &mut u64) -> f64 {
        *state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (*state >> 11) as f64 / (1u64 << 53) as f64
    }

    fn simplex(state: &mut u64, k: usize) -> Vec<f64> {
        let v: Vec<f64> = (0..k).map(|_| lcg(state)).collect();
        let s: f64 = v.iter().sum();
        v.iter().map(|x| x / s).collect()
    }

    fn shape(m: usize, k: usize, fits: usize, ensemble: bool) -> Shape {
        Shape {
            grid: 1,
            points: m,
            classes: k,
            fits,
            all_points: true,
            ensemble,
        }
    }

    /// Pushes one replicate: `q[s][e]` probability vectors at grid value 0, diversity `div[s][e]`.
    fn push(acc: &mut Acc, q: &[Vec<Vec<f64>>], div: Option<&[Vec<f64>]>, y: &[f64]) {
        let (s, m, k) = (q.len(), q[0].len(), q[0][0].len());
        let mut probs = Array4::<f64>::zeros((s, 1, m, k));
        for ((si, _, e, c), v) in probs.indexed_iter_mut() {
            *v = q[si][e][c];
        }
        let values = Array3::<f64>::zeros((s, 1, m));
        let d = div.map(|d| {
            let mut a = Array3::<f64>::zeros((s, 1, m));
            for ((si, _, e), v) in a.indexed_iter_mut() {
                *v = d[si][e];
            }
            a
        });
        let b = Batch {
            held: None,
            values: values.view(),
            probs: Some(probs.view()),
            diversity: d.as_ref().map(|a| a.view()),
            response: y,
        };
        acc.push(&Brier, &b);
    }

    /// E_Y ‖q − e_Y‖² for Y ~ p, by enumerating the labels.
    fn expected_brier(q: &[f64], p: &[f64]) -> f64 {
        (0..p.len())
            .map(|y| {
                p[y] * q
                    .iter()
                    .enumerate()
                    .map(|(c, v)| {
                        let t = if c == y { 1.0 } else { 0.0 };
                        (v - t) * (v - t)
                    })
                    .sum::<f64>()
            })
            .sum()
    }

    #[test]
    fn terms_add_up_to_the_mean_expected_brier_score_of_the_replicates() {
        // Exact identity (module docs): noise + B̂² + V̂ = (1/R) Σ_r E_Y ‖q_r − e_Y‖², with the
        // expectation over the label enumerated; also after merging blocks of unequal sizes.
        let mut st = 3u64;
        for k in 2..=4 {
            for r in [2usize, 3, 11, 30] {
                let m = 5;
                let p: Vec<Vec<f64>> = (0..m).map(|_| simplex(&mut st, k)).collect();
                let mut a = Acc::new(&Brier, shape(m, k, 1, false));
                let mut b = a.clone();
                let mut all = Vec::new();
                for i in 0..r {
                    let q: Vec<Vec<f64>> = (0..m).map(|_| simplex(&mut st, k)).collect();
                    push(
                        if i < r / 2 { &mut a } else { &mut b },
                        std::slice::from_ref(&q),
                        None,
                        &vec![0.0; m],
                    );
                    all.push(q);
                }
                if a.replicates == 0 {
                    a = b.clone();
                } else {
                    a.merge(&Brier, &b);
                }
                for e in 0..m {
                    let t = point(&a, 0, e, &p[e]).unwrap();
                    let direct: f64 = all
                        .iter()
                        .map(|q| expected_brier(&q[e], &p[e]))
                        .sum::<f64>()
                        / r as f64;
                    let sum = t.noise + t.bias_sq + t.variance;
                    assert!(
                        (sum - direct).abs() < 1e-12,
                        "k={k} r={r}: {sum} vs {direct}"
                    );
                }
            }
        }
    }

    #[test]
    fn fit_seed_split_and_ensemble_terms_follow_the_squared_loss() {
        // Exact: variance_data + variance_fit = variance; with S = 2 fits and R replicates the
        // within term is the mean of ‖q_1 − q_2‖²/2, computed here by hand; member terms add
        // the diversity.
        let (m, k, s, r) = (3, 3, 2, 8);
        let mut st = 17u64;
        let mut acc = Acc::new(&Brier, shape(m, k, s, true));
        let mut within = vec![0.0; m];
        for _ in 0..r {
            let q: Vec<Vec<Vec<f64>>> = (0..s)
                .map(|_| (0..m).map(|_| simplex(&mut st, k)).collect())
                .collect();
            for e in 0..m {
                let d2: f64 = (0..k).map(|c| (q[0][e][c] - q[1][e][c]).powi(2)).sum();
                within[e] += d2 / 2.0;
            }
            let div: Vec<Vec<f64>> = vec![vec![0.25; m]; s];
            push(&mut acc, &q, Some(&div), &vec![1.0; m]);
        }
        let p: Vec<f64> = (0..m).flat_map(|_| vec![0.2, 0.3, 0.5]).collect();
        let zeros = vec![0.0; m];
        let target = Target::Known {
            truth: &zeros,
            noise_var: &zeros,
            probs: Some(&p),
        };
        for e in 0..m {
            let t = point(&acc, 0, e, &p[e * 3..e * 3 + 3]).unwrap();
            assert!((t.variance_data + t.variance_fit - t.variance).abs() < 1e-14);
            assert!((t.variance_fit - within[e] / r as f64).abs() < 1e-14);
            assert!((t.diversity - 0.25).abs() < 1e-15);
        }
        let sum = summarize(&Brier, std::slice::from_ref(&acc), &target).unwrap();
        let el = sum.value(0, "expected_loss");
        assert!((sum.value(0, "member_loss") - el - 0.25).abs() < 1e-14);
        assert!((sum.value(0, "member_variance") - sum.value(0, "variance") - 0.25).abs() < 1e-14);
        // noise 1 − (0.04 + 0.09 + 0.25) = 0.62 at every point
        assert!((sum.value(0, "noise") - 0.62).abs() < 1e-14);
    }

    #[test]
    fn observed_labels_give_the_out_of_bag_brier_score() {
        // Exact: rows evaluated at least twice; bias²+noise + variance is the mean out-of-bag
        // Brier score of the row.
        let sh = Shape {
            grid: 1,
            points: 2,
            classes: 2,
            fits: 1,
            all_points: false,
            ensemble: false,
        };
        let y = [1.0, 0.0];
        let mut acc = Acc::new(&Brier, sh);
        for q in [[0.2, 0.8], [0.4, 0.6], [0.1, 0.9]] {
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
            acc.push(&Brier, &b);
        }
        let target = Target::Observed { y: &y, noise: None };
        let row = &Brier.evaluate(&acc, &target)[0];
        let el = (2.0 * 0.04 + 2.0 * 0.16 + 2.0 * 0.01) / 3.0;
        assert!((row[0] - el).abs() < 1e-14);
        assert!((row[1] + row[2] - el).abs() < 1e-14);
        assert_eq!(row[3], 0.0);
        assert!((Brier.observed_loss(1.0, Some(&[0.2, 0.8]), 1.0) - 0.08).abs() < 1e-15);
    }
}
