//! Choosing a twin's reference by cross-validation on the table: each candidate is tuned on the
//! table, a stacked blend of the three is built, and the candidate (blend included) with the
//! highest cross-validated R² is chosen.
//!
//! - **knn**: k nearest neighbours on standardized inputs, k from [`K_CANDIDATES`] (those that
//!   fit in a training fold) by K-fold cross-validation (one neighbour search per row serves
//!   every k);
//! - **forest**: bagged trees ([`super::forest`]), B = 100, leaf size from
//!   [`super::forest::LEAF_CANDIDATES`] by out-of-bag error;
//! - **loclin**: local-linear kernel regression ([`super::loclin`]), bandwidth from
//!   [`super::loclin::H_CANDIDATES`] by K-fold cross-validation (not tried on tables of more than
//!   [`LOCLIN_MAX_ROWS`] rows, where its O(n² p²) cost would dominate);
//! - **blend**: stacking (Wolpert 1992, "Stacked generalization", *Neural Networks* 5:241–259;
//!   Breiman 1996, "Stacked regressions", *Machine Learning* 24:49–64): non-negative weights,
//!   no intercept, minimizing `‖y − Σ_j w_j p_j‖²` over the candidates' held-out predictions
//!   p_j (k-NN and local-linear out-of-fold, forest out-of-bag), by exact non-negative least
//!   squares ([`nnls`]). The blend's own CV R² refits the weights without fold f and applies
//!   them to fold f; the level-one predictions are reused, a small optimism stated here.
//!
//! CV R² = 1 − (mean held-out squared error) / (population variance of y); its standard error
//! is the standard deviation of the held-out squared errors over √n, divided by the variance.
//! Folds: K = [`FOLDS`] from `rng::stream(seed, purpose::TWIN, 0)` (a random permutation,
//! position i → fold i mod K). The design and its measurements are in
//! `docs/twin-calibration.md`.

use ndarray::{ArrayView1, ArrayView2, Axis};

use super::forest::{self, ForestParams};
use super::loclin::{self, solve_spd};
use super::{Candidate, Choice, Reference};
use crate::family::neighbours::{NeighbourIndex, Scratch};
use crate::rng::{fold_assignment, purpose, stream};

/// Cross-validation folds of the reference choice.
pub const FOLDS: usize = 5;

/// Candidate k values of the k-NN candidate (those that fit in a training fold are tried).
pub const K_CANDIDATES: [usize; 15] = [1, 2, 3, 4, 5, 7, 10, 13, 16, 20, 25, 30, 40, 50, 75];

/// Largest table on which the local-linear candidate is tried.
pub const LOCLIN_MAX_ROWS: usize = 4000;

/// Which candidates may be chosen.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Rule {
    /// The highest cross-validated R² (blend included).
    Best,
    /// This candidate, whatever the scores (every candidate is still scored and printed).
    Only(Candidate),
}

/// One candidate's score.
#[derive(Debug, Clone, PartialEq)]
pub struct Score {
    /// The candidate.
    pub candidate: Candidate,
    /// Cross-validated R² (NaN when not tried).
    pub r2: f64,
    /// Its standard error.
    pub se: f64,
    /// The tuned knob in words (`k = 16`, `leaf 5, 100 trees`, `h = 0.5 sd`, weights).
    pub tuned: String,
}

/// What the choice measured, and the choice.
#[derive(Debug, Clone)]
pub struct Selection {
    /// The recipe of the chosen reference.
    pub choice: Choice,
    /// Scores of knn, forest, loclin, blend in that order.
    pub scores: Vec<Score>,
    /// Folds used.
    pub folds: usize,
}

fn mse(y: &[f64], p: &[f64]) -> f64 {
    y.iter().zip(p).map(|(a, b)| (a - b) * (a - b)).sum::<f64>() / y.len() as f64
}

fn argmin(v: &[f64]) -> usize {
    (0..v.len()).fold(0, |b, i| if v[i] < v[b] { i } else { b })
}

/// Cross-validated R² and its standard error of held-out predictions `pred`.
fn r2_se(y: &[f64], pred: &[f64]) -> (f64, f64) {
    let n = y.len() as f64;
    let ym = y.iter().sum::<f64>() / n;
    let var = y.iter().map(|v| (v - ym) * (v - ym)).sum::<f64>() / n;
    let e: Vec<f64> = y.iter().zip(pred).map(|(a, b)| (a - b) * (a - b)).collect();
    let m = e.iter().sum::<f64>() / n;
    let sd = (e.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / (n - 1.0)).sqrt();
    (1.0 - m / var, sd / n.sqrt() / var)
}

/// Non-negative least squares without intercept, `min ‖y − Σ_j w_j c_j‖²` subject to `w ≥ 0`,
/// for a few columns (`cols[j]` is column j, at most 8): exact, by solving the unconstrained
/// problem on every subset of columns and keeping the feasible solution with the smallest
/// residual (the NNLS solution is such a subset solution; Lawson and Hanson, *Solving Least
/// Squares Problems*, 1974, ch. 23, give the active-set algorithm that reaches the same point).
/// A ridge of `1e-10 ×` the mean diagonal keeps nearly collinear columns solvable. Ties keep the
/// subset enumerated first.
pub fn nnls(cols: &[Vec<f64>], y: &[f64]) -> Vec<f64> {
    let k = cols.len();
    assert!((1..=8).contains(&k), "nnls takes 1 to 8 columns");
    let mut best = (f64::INFINITY, vec![0.0; k]);
    for mask in 1u32..(1 << k) {
        let idx: Vec<usize> = (0..k).filter(|j| mask & (1 << j) != 0).collect();
        let q = idx.len();
        let mut a = vec![0.0; q * q];
        let mut b = vec![0.0; q];
        for (r, &i) in idx.iter().enumerate() {
            b[r] = cols[i].iter().zip(y).map(|(u, v)| u * v).sum();
            for (c, &j) in idx.iter().enumerate() {
                a[r * q + c] = cols[i].iter().zip(&cols[j]).map(|(u, v)| u * v).sum();
            }
        }
        let tr: f64 = (0..q).map(|r| a[r * q + r]).sum::<f64>() / q as f64;
        for r in 0..q {
            a[r * q + r] += 1e-10 * tr;
        }
        let Some(w) = solve_spd(&a, &b, q) else {
            continue;
        };
        if w.iter().any(|&v| v < 0.0 || !v.is_finite()) {
            continue;
        }
        let mut full = vec![0.0; k];
        for (r, &i) in idx.iter().enumerate() {
            full[i] = w[r];
        }
        let rss: f64 = (0..y.len())
            .map(|t| {
                let p: f64 = (0..k).map(|j| full[j] * cols[j][t]).sum();
                (y[t] - p) * (y[t] - p)
            })
            .sum();
        if rss < best.0 {
            best = (rss, full);
        }
    }
    best.1
}

/// Out-of-fold k-NN predictions for every tried k (`out[c][i]`), standardizing with the whole
/// table's statistics; returns the tried k values too.
fn knn_out_of_fold(
    x: ArrayView2<'_, f64>,
    y: &[f64],
    fold: &[usize],
    folds: usize,
) -> (Vec<usize>, Vec<Vec<f64>>) {
    let n = y.len();
    let min_train = (0..folds)
        .map(|f| fold.iter().filter(|&&g| g != f).count())
        .min()
        .unwrap_or(0);
    let mut ks: Vec<usize> = K_CANDIDATES
        .iter()
        .copied()
        .filter(|&k| k <= min_train)
        .collect();
    if ks.is_empty() {
        ks.push(1);
    }
    let kmax = *ks.last().unwrap_or(&1);
    let index = NeighbourIndex::new(x, true);
    let mut scratch = Scratch::default();
    let mut buf = Vec::with_capacity(kmax);
    let mut out = vec![vec![0.0; n]; ks.len()];
    for i in 0..n {
        let q = x.row(i).to_vec();
        index.nearest_excluding(&q, kmax, |j| fold[j] == fold[i], &mut scratch, &mut buf);
        let mut sum = 0.0;
        let mut next = 0;
        for (m, &j) in buf.iter().enumerate() {
            sum += y[j];
            while next < ks.len() && ks[next] == m + 1 {
                out[next][i] = sum / ks[next] as f64;
                next += 1;
            }
        }
        // Fewer rows than k left (tiny tables): the mean of all of them.
        while next < ks.len() {
            out[next][i] = sum / buf.len().max(1) as f64;
            next += 1;
        }
    }
    (ks, out)
}

/// Tunes every candidate on the table (rows `x`, responses `y`), builds the blend, and chooses
/// by `rule`. Deterministic given `seed`. The table needs at least [`FOLDS`] + 1 rows.
pub fn select(x: ArrayView2<'_, f64>, y: &[f64], seed: u64, rule: Rule) -> Selection {
    let n = y.len();
    let folds = FOLDS.min(n);
    let mut rng = stream(seed, purpose::TWIN, 0);
    let fold = fold_assignment(n, folds, &mut rng);
    let (ks, kp) = knn_out_of_fold(x, y, &fold, folds);
    let ki = argmin(&kp.iter().map(|p| mse(y, p)).collect::<Vec<_>>());
    let fp = forest::out_of_bag(x, y, forest::TREES, seed);
    let fi = argmin(&fp.iter().map(|p| mse(y, p)).collect::<Vec<_>>());
    let try_loclin = n <= LOCLIN_MAX_ROWS;
    let (li, lp) = if try_loclin {
        let lp = loclin::out_of_fold(x, y, &fold);
        (
            argmin(&lp.iter().map(|p| mse(y, p)).collect::<Vec<_>>()),
            lp,
        )
    } else {
        (0, Vec::new())
    };
    let mut level1 = vec![kp[ki].clone(), fp[fi].clone()];
    if try_loclin {
        level1.push(lp[li].clone());
    }
    let w = nnls(&level1, y);
    let mut blend_cv = vec![0.0; n];
    for f in 0..folds {
        let rows: Vec<usize> = (0..n).filter(|&i| fold[i] != f).collect();
        let cols: Vec<Vec<f64>> = level1
            .iter()
            .map(|c| rows.iter().map(|&i| c[i]).collect())
            .collect();
        let yy: Vec<f64> = rows.iter().map(|&i| y[i]).collect();
        let wf = nnls(&cols, &yy);
        for i in (0..n).filter(|&i| fold[i] == f) {
            blend_cv[i] = (0..level1.len()).map(|j| wf[j] * level1[j][i]).sum();
        }
    }
    let nan = (f64::NAN, f64::NAN);
    let r2 = [
        r2_se(y, &level1[0]),
        r2_se(y, &level1[1]),
        if try_loclin {
            r2_se(y, &level1[2])
        } else {
            nan
        },
        r2_se(y, &blend_cv),
    ];
    let weights = [w[0], w[1], if try_loclin { w[2] } else { 0.0 }];
    let forest_params = ForestParams {
        trees: forest::TREES,
        min_leaf: forest::LEAF_CANDIDATES[fi],
        seed,
    };
    let bandwidth = loclin::H_CANDIDATES[li];
    let fmt_w = |w: &[f64; 3]| {
        format!(
            "weights knn {:.3}, forest {:.3}, loclin {:.3}",
            w[0], w[1], w[2]
        )
    };
    let scores = vec![
        Score {
            candidate: Candidate::Knn,
            r2: r2[0].0,
            se: r2[0].1,
            tuned: format!("k = {}", ks[ki]),
        },
        Score {
            candidate: Candidate::Forest,
            r2: r2[1].0,
            se: r2[1].1,
            tuned: format!(
                "{} trees, min_leaf = {} (out-of-bag)",
                forest_params.trees, forest_params.min_leaf
            ),
        },
        Score {
            candidate: Candidate::LocLin,
            r2: r2[2].0,
            se: r2[2].1,
            tuned: if try_loclin {
                format!("bandwidth = {bandwidth} sd")
            } else {
                format!("not tried: more than {LOCLIN_MAX_ROWS} rows")
            },
        },
        Score {
            candidate: Candidate::Blend,
            r2: r2[3].0,
            se: r2[3].1,
            tuned: fmt_w(&weights),
        },
    ];
    let chosen = match rule {
        Rule::Only(c) => c,
        Rule::Best => {
            let order = [
                Candidate::Knn,
                Candidate::Forest,
                Candidate::LocLin,
                Candidate::Blend,
            ];
            let mut best = 0;
            for i in 1..4 {
                if r2[i].0 > r2[best].0 {
                    best = i;
                }
            }
            order[best]
        }
    };
    let chosen = if chosen == Candidate::LocLin && !try_loclin {
        Candidate::Blend
    } else {
        chosen
    };
    let weights = match chosen {
        Candidate::Knn => [1.0, 0.0, 0.0],
        Candidate::Forest => [0.0, 1.0, 0.0],
        Candidate::LocLin => [0.0, 0.0, 1.0],
        Candidate::Blend => weights,
    };
    let cv_r2 = [r2[0].0, r2[1].0, r2[2].0, r2[3].0];
    let choice = Choice {
        family: chosen,
        standardize: true,
        k: Some(ks[ki]),
        forest: (weights[1] > 0.0).then_some(forest_params),
        bandwidth: (weights[2] > 0.0).then_some(bandwidth),
        weights,
        cv_r2: Some(cv_r2),
        twice: false,
    };
    Selection {
        choice,
        scores,
        folds,
    }
}

/// Whether twicing the chosen recipe predicts better: the recipe refitted on every training fold
/// of the choice's own folds (the same `FOLDS`-fold assignment), once and twiced, and scored on
/// the held-out fold.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TwicingCheck {
    /// Cross-validated R² of the recipe fitted once.
    pub once_r2: f64,
    /// Cross-validated R² of the recipe twiced.
    pub twice_r2: f64,
}

impl TwicingCheck {
    /// Twice when twicing lowers the cross-validated squared error (ties: once).
    pub fn twice(&self) -> bool {
        self.twice_r2 > self.once_r2
    }
}

/// The twicing check of `choice` (a regression recipe, fitted once) on rows `x` and responses
/// `y`, with the folds of [`select`] for `seed`. A cross-validated smoother balances its
/// squared bias against its variance; where it rounds off curvature (wide neighbourhoods, as in
/// several inputs) twicing removes more bias than the variance it adds and predicts better,
/// and where the fit already follows the truth closely it only adds noise and predicts worse.
/// The held-out error tells the two apart on the table itself. `None` when a fold's fit fails.
pub fn twicing_check(
    x: ArrayView2<'_, f64>,
    y: &[f64],
    seed: u64,
    choice: &Choice,
) -> Option<TwicingCheck> {
    let n = y.len();
    let folds = FOLDS.min(n);
    let mut rng = stream(seed, purpose::TWIN, 0);
    let fold = fold_assignment(n, folds, &mut rng);
    let once = Choice {
        twice: false,
        ..choice.clone()
    };
    let mut p_once = vec![0.0; n];
    let mut p_twice = vec![0.0; n];
    for f in 0..folds {
        let train: Vec<usize> = (0..n).filter(|&i| fold[i] != f).collect();
        let test: Vec<usize> = (0..n).filter(|&i| fold[i] == f).collect();
        if train.is_empty() || test.is_empty() {
            continue;
        }
        let xt = x.select(Axis(0), &train);
        let yt: Vec<f64> = train.iter().map(|&i| y[i]).collect();
        let r = Reference::fit(xt.view(), ArrayView1::from(&yt), 0, &once, false, "a fold").ok()?;
        let xs = x.select(Axis(0), &test);
        for (&i, v) in test.iter().zip(r.mean_at_rows(xs.view())) {
            p_once[i] = v;
        }
        let r2 = r.twiced(xt.view(), ArrayView1::from(&yt)).ok()?;
        for (&i, v) in test.iter().zip(r2.mean_at_rows(xs.view())) {
            p_twice[i] = v;
        }
    }
    Some(TwicingCheck {
        once_r2: r2_se(y, &p_once).0,
        twice_r2: r2_se(y, &p_twice).0,
    })
}
