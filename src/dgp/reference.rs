//! The reference model of a simulated twin: a flexible fit of E[y | x] (or of P(y = c | x)) on a
//! table that serves as the twin's truth, its choice by cross-validation, and the noise estimate
//! that goes with it.
//!
//! **The reference** is k nearest neighbours on standardized inputs (each column centred by the
//! table's mean and divided by its standard deviation), with k chosen by 10-fold
//! cross-validation (folds from a seeded stream). Why k-NN: it is flexible (no functional form
//! is assumed), it has a single knob that cross-validation tunes reliably, and it is storable
//! without a model file: the reference *is* the table's rows plus k, so a twin scenario names the
//! CSV and `k`, and `run` refits it exactly at plan time. Its cost is O(N) per evaluation, which
//! is small next to the family fits of a run. Standardization keeps an input measured in large
//! units from dominating the distance. Ties in distance go to the lower row index.
//!
//! **The noise** (regression) is a constant σ² from the table noise estimators of
//! [`crate::dataset::noise`] (Gasser–Sroka–Jennen-Steinmetz with one input, the nearest-neighbour
//! difference estimator otherwise), with their standard error; these do not depend on the
//! reference, so a reference that is too smooth or too rough does not leak into σ². `lossprism
//! twin` also prints the reference's own cross-validated residual variance for comparison. With
//! `varying = true` in `[data.noise]`, σ²(x) is the k-NN average (same k, same standardization)
//! of the reference's leave-one-out squared residuals times k/(k+1), the factor that removes the
//! variance of the k-neighbour mean from a leave-one-out residual under constant noise
//! (E[(y_i − f̂_{−i}(x_i))²] = σ²(1 + 1/k) + bias²).
//!
//! **Classes**: the reference's class probabilities are the neighbour shares with add-one
//! smoothing, `(count_c + 1) / (k + K)`, so no probability is exactly 0 and the twin's labels
//! keep some noise everywhere; k is chosen by the cross-validated Brier score and the quality
//! printed is the cross-validated accuracy of the most probable class.

use std::sync::Arc;

use ndarray::{Array2, ArrayView1, ArrayView2};
use rand::Rng;

use crate::dataset::noise::{self, NoiseEstimate};
use crate::dataset::Table;
use crate::error::Error;
use crate::family::neighbours::{NeighbourIndex, Scratch};
use crate::family::Task;

/// Folds of the cross-validation that chooses the reference's k.
pub const CV_FOLDS: usize = 10;

/// Candidate k values tried by [`fit`] (those that fit in a training fold).
pub const K_CANDIDATES: [usize; 14] = [1, 2, 3, 4, 5, 7, 10, 15, 20, 30, 50, 75, 100, 150];

/// The reference fit: k nearest neighbours over the table's (standardized) rows.
pub struct Reference {
    /// The table file it was fitted on (for descriptions).
    pub source: String,
    /// The table file's path as resolved (an input of the run).
    pub path: Option<std::path::PathBuf>,
    /// Number of neighbours.
    pub k: usize,
    /// Inputs standardized with the table's mean and sd.
    pub standardize: bool,
    /// Number of classes (0 for regression).
    pub classes: usize,
    index: NeighbourIndex,
    y: Vec<f64>,
    /// Varying noise: k/(k+1) × squared leave-one-out residual per table row.
    sq_resid: Option<Vec<f64>>,
}

impl std::fmt::Debug for Reference {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Reference")
            .field("source", &self.source)
            .field("k", &self.k)
            .field("standardize", &self.standardize)
            .field("rows", &self.y.len())
            .field("classes", &self.classes)
            .finish()
    }
}

impl Reference {
    /// Fits the reference on a table's inputs and response (class indices for `classes > 0`).
    /// With `varying`, also computes the smoothed squared residuals for σ²(x) (regression).
    pub fn fit(
        x: ArrayView2<'_, f64>,
        y: ArrayView1<'_, f64>,
        classes: usize,
        k: usize,
        standardize: bool,
        varying: bool,
        source: &str,
    ) -> Reference {
        let index = NeighbourIndex::new(x, standardize);
        let mut r = Reference {
            source: source.to_string(),
            path: None,
            k: k.clamp(1, x.nrows().max(1)),
            standardize,
            classes,
            index,
            y: y.to_vec(),
            sq_resid: None,
        };
        if varying && classes == 0 && x.nrows() > r.k {
            let k = r.k;
            let mut scratch = Scratch::default();
            let mut buf = Vec::new();
            let sq = (0..x.nrows())
                .map(|i| {
                    let q = x.row(i).to_vec();
                    r.index
                        .nearest_excluding(&q, k, |j| j == i, &mut scratch, &mut buf);
                    let m = buf.iter().map(|&j| r.y[j]).sum::<f64>() / k as f64;
                    (r.y[i] - m).powi(2) * k as f64 / (k as f64 + 1.0)
                })
                .collect();
            r.sq_resid = Some(sq);
        }
        r
    }

    fn neighbours(&self, row: &[f64], buf: &mut Vec<usize>) {
        let mut scratch = Scratch::default();
        self.index.nearest(row, self.k, &mut scratch, buf);
    }

    /// The reference's E[y | x] at one input row.
    pub fn mean_at(&self, row: &[f64]) -> f64 {
        let mut buf = Vec::with_capacity(self.k);
        self.neighbours(row, &mut buf);
        buf.iter().map(|&j| self.y[j]).sum::<f64>() / buf.len() as f64
    }

    /// Class probabilities at one input row: neighbour shares with add-one smoothing.
    pub fn probs_at(&self, row: &[f64], out: &mut [f64]) {
        let mut buf = Vec::with_capacity(self.k);
        self.neighbours(row, &mut buf);
        out.iter_mut().for_each(|p| *p = 1.0);
        for &j in &buf {
            if let Some(p) = out.get_mut(self.y[j] as usize) {
                *p += 1.0;
            }
        }
        let total = buf.len() as f64 + out.len() as f64;
        out.iter_mut().for_each(|p| *p /= total);
    }

    /// Varying noise: σ²(x), the k-NN average of the corrected squared leave-one-out residuals;
    /// `None` without varying noise.
    pub fn var_at(&self, row: &[f64]) -> Option<f64> {
        let sq = self.sq_resid.as_ref()?;
        let mut buf = Vec::with_capacity(self.k);
        self.neighbours(row, &mut buf);
        Some(buf.iter().map(|&j| sq[j]).sum::<f64>() / buf.len() as f64)
    }

    /// FNV-1a of the reference's responses and settings (part of a run's fingerprint).
    pub fn digest(&self) -> u64 {
        let mut bytes = Vec::with_capacity(8 * self.y.len() + 16);
        bytes.extend_from_slice(&(self.k as u64).to_le_bytes());
        bytes.push(u8::from(self.standardize));
        for v in &self.y {
            bytes.extend_from_slice(&v.to_bits().to_le_bytes());
        }
        crate::codec::fnv1a64(&bytes)
    }

    /// Human-readable form.
    pub fn describe(&self) -> String {
        format!(
            "k-NN reference (k = {}{}) fitted on the {} rows of {}",
            self.k,
            if self.standardize {
                ", standardized inputs"
            } else {
                ""
            },
            self.y.len(),
            self.source
        )
    }

    /// Human-readable form of the varying noise.
    pub fn describe_noise(&self) -> String {
        format!(
            "gaussian, sd(x)² = k-NN average (k = {}) of the reference's squared leave-one-out residuals × k/(k+1)",
            self.k
        )
    }
}

/// The result of fitting a twin on a table.
#[derive(Debug, Clone)]
pub struct TwinFit {
    /// The chosen k.
    pub k: usize,
    /// Cross-validated loss per tried k: mean squared error (regression) or Brier score (classes).
    pub cv_curve: Vec<(usize, f64)>,
    /// Cross-validated R² (regression) or accuracy (classes) at the chosen k.
    pub quality: f64,
    /// Its standard error (over rows).
    pub quality_stderr: f64,
    /// `R²` or `accuracy`.
    pub quality_name: &'static str,
    /// The noise estimate (regression).
    pub noise: Option<NoiseEstimate>,
    /// k/(k+1) × mean squared cross-validated residual at the chosen k (regression), shown for
    /// comparison with `noise`.
    pub cv_noise: Option<f64>,
}

/// Chooses the reference's k by `CV_FOLDS`-fold cross-validation (folds from
/// `runner::stream(seed, purpose::TWIN, 0)`) and estimates the noise. Errors when the table is
/// too small for cross-validation.
pub fn fit(t: &Table, seed: u64, standardize: bool) -> Result<TwinFit, Error> {
    let n = t.rows();
    let folds = CV_FOLDS.min(n);
    if n < 4 {
        return Err(Error::Usage(format!(
            "{}: {n} rows; a twin needs at least 4",
            t.path.display()
        )));
    }
    let mut rng = crate::rng::stream(seed, crate::rng::purpose::TWIN, 0);
    let fold = crate::rng::fold_assignment(n, folds, &mut rng);
    let min_train = (0..folds)
        .map(|f| fold.iter().filter(|&&g| g != f).count())
        .min()
        .unwrap_or(0);
    let ks: Vec<usize> = K_CANDIDATES
        .iter()
        .copied()
        .filter(|&k| k <= min_train)
        .collect();
    let kmax = *ks.last().unwrap_or(&1);
    let classes = match t.task {
        Task::Classify { classes } => classes,
        Task::Regress => 0,
    };
    let index = NeighbourIndex::new(t.x.view(), standardize);
    let mut scratch = Scratch::default();
    // Per row and candidate k: the cross-validated loss term.
    let mut loss = vec![vec![0.0; n]; ks.len()];
    let mut hit = vec![vec![0.0; n]; ks.len()];
    let mut buf: Vec<usize> = Vec::with_capacity(n);
    let mut counts = vec![0.0; classes];
    let mut probs = vec![0.0; classes];
    for i in 0..n {
        let q = t.x.row(i).to_vec();
        index.nearest_excluding(&q, kmax, |j| fold[j] == fold[i], &mut scratch, &mut buf);
        let mut sum = 0.0;
        counts.iter_mut().for_each(|v| *v = 0.0);
        let mut next = 0;
        for (m, &j) in buf.iter().enumerate() {
            sum += t.y[j];
            if classes > 0 {
                counts[t.y[j] as usize] += 1.0;
            }
            while next < ks.len() && ks[next] == m + 1 {
                let k = ks[next] as f64;
                if classes == 0 {
                    let e = t.y[i] - sum / k;
                    loss[next][i] = e * e;
                } else {
                    for (p, cnt) in probs.iter_mut().zip(&counts) {
                        *p = (cnt + 1.0) / (k + classes as f64);
                    }
                    let yi = t.y[i] as usize;
                    loss[next][i] = probs
                        .iter()
                        .enumerate()
                        .map(|(cl, p)| (p - if cl == yi { 1.0 } else { 0.0 }).powi(2))
                        .sum();
                    let best =
                        (0..classes).fold(0, |b, cl| if probs[cl] > probs[b] { cl } else { b });
                    hit[next][i] = if best == yi { 1.0 } else { 0.0 };
                }
                next += 1;
            }
        }
    }
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let cv_curve: Vec<(usize, f64)> = ks.iter().zip(&loss).map(|(&k, l)| (k, mean(l))).collect();
    let bi = (0..cv_curve.len()).fold(0, |b, i| if cv_curve[i].1 < cv_curve[b].1 { i } else { b });
    let k = ks[bi];
    let se_of = |v: &[f64]| {
        let m = mean(v);
        (v.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / ((v.len() - 1) as f64 * v.len() as f64))
            .sqrt()
    };
    let (quality, quality_stderr, quality_name, noise_est, cv_noise) = if classes == 0 {
        let ym = mean(t.y.as_slice().unwrap_or(&t.y.to_vec()));
        let var = t.y.iter().map(|v| (v - ym) * (v - ym)).sum::<f64>() / n as f64;
        let mse = cv_curve[bi].1;
        let est = noise::estimate(
            if t.x.ncols() == 1 {
                noise::Method::Gsjs
            } else {
                noise::Method::NearestNeighbour
            },
            t.x.view(),
            t.y.view(),
        );
        (
            1.0 - mse / var,
            se_of(&loss[bi]) / var,
            "R²",
            est,
            Some(mse * k as f64 / (k as f64 + 1.0)),
        )
    } else {
        (mean(&hit[bi]), se_of(&hit[bi]), "accuracy", None, None)
    };
    Ok(TwinFit {
        k,
        cv_curve,
        quality,
        quality_stderr,
        quality_name,
        noise: noise_est,
        cv_noise,
    })
}

/// Draws `n` rows (with replacement) of `rows` into an `n × p` matrix, one uniform index per row
/// in order (the twin's input distribution).
pub fn resample_rows<R: Rng + ?Sized>(rows: &Array2<f64>, n: usize, rng: &mut R) -> Array2<f64> {
    let mut x = Array2::zeros((n, rows.ncols()));
    for i in 0..n {
        let r = rng.gen_range(0..rows.nrows());
        x.row_mut(i).assign(&rows.row(r));
    }
    x
}

/// The reference shared by a twin's truth and (varying) noise.
pub type SharedReference = Arc<Reference>;
