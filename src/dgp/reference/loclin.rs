//! Local-linear kernel regression (Fan and Gijbels 1996, *Local Polynomial Modelling and Its
//! Applications*, ch. 3), a candidate reference of a twin, on inputs standardized by the
//! table's mean and population sd ([`crate::family::standardize::Standardizer`]) with a
//! Gaussian product kernel of one bandwidth `h` (in sd units):
//!
//! `f̂(x₀) = β̂₀` where `β̂ = argmin Σ_i w_i (y_i − β₀ − βᵀ(z_i − z₀))²`,
//! `w_i = exp(−‖z_i − z₀‖² / (2h²))`.
//!
//! A ridge `1e-3 · h² · Σw` on the slopes only (never the intercept) keeps the local system
//! solvable where few rows carry weight; wherever the local design is spread it is negligible
//! next to the data term. If the system still fails, the prediction is the kernel-weighted mean
//! (Nadaraya–Watson). Weights are taken relative to the nearest row,
//! `exp(−(d² − d²_min)/(2h²))`: a common factor that leaves β̂ unchanged and prevents underflow
//! far from the data. Cost: O(n p²) per prediction.

use ndarray::{Array2, ArrayView2};

use crate::family::linalg::solve_spd;
use crate::family::standardize::Standardizer;

/// Bandwidths tried by cross-validation (sd units of the standardized inputs).
pub const H_CANDIDATES: [f64; 10] = [0.06, 0.09, 0.13, 0.18, 0.25, 0.35, 0.5, 0.7, 1.0, 1.5];

/// Relative ridge on the slopes.
const SLOPE_RIDGE: f64 = 1e-3;

/// A fitted local-linear smoother (the standardized rows and the responses).
#[derive(Debug, Clone)]
pub struct LocLin {
    /// Bandwidth in sd units.
    pub h: f64,
    std: Standardizer,
    z: Array2<f64>,
    y: Vec<f64>,
}

/// Rows of `x` standardized by `std`.
fn standardized(x: ArrayView2<'_, f64>, std: &Standardizer) -> Array2<f64> {
    let mut z = x.to_owned();
    for mut row in z.rows_mut() {
        for (j, v) in row.iter_mut().enumerate() {
            *v = std.z(j, *v);
        }
    }
    z
}

/// Scratch of a prediction (reused across predictions on one thread).
#[derive(Debug, Default)]
pub struct Scratch {
    q: Vec<f64>,
    d2: Vec<(usize, f64)>,
    a: Vec<f64>,
    b: Vec<f64>,
    u: Vec<f64>,
}

/// Local-linear estimates at the standardized query `q` for every bandwidth of `hs`, from the
/// rows where `keep` is true, written into `out`.
fn at_point(
    z: ArrayView2<'_, f64>,
    y: &[f64],
    q: &[f64],
    hs: &[f64],
    keep: &dyn Fn(usize) -> bool,
    out: &mut [f64],
    s: &mut Scratch,
) {
    let p = z.ncols();
    let k = p + 1;
    s.d2.clear();
    let mut dmin = f64::INFINITY;
    for (j, row) in z.rows().into_iter().enumerate() {
        if !keep(j) {
            continue;
        }
        let d: f64 = row.iter().zip(q).map(|(a, b)| (a - b) * (a - b)).sum();
        dmin = dmin.min(d);
        s.d2.push((j, d));
    }
    s.a.resize(k * k, 0.0);
    s.b.resize(k, 0.0);
    s.u.resize(k, 0.0);
    for (o, &h) in out.iter_mut().zip(hs) {
        s.a.iter_mut().for_each(|v| *v = 0.0);
        s.b.iter_mut().for_each(|v| *v = 0.0);
        let inv = 1.0 / (2.0 * h * h);
        let (mut sw, mut swy) = (0.0, 0.0);
        for &(j, d) in &s.d2 {
            let w = (-(d - dmin) * inv).exp();
            if w < 1e-300 {
                continue;
            }
            s.u[0] = 1.0;
            let zr = z.row(j);
            for t in 0..p {
                s.u[t + 1] = zr[t] - q[t];
            }
            for r in 0..k {
                let wr = w * s.u[r];
                s.b[r] += wr * y[j];
                for c in 0..=r {
                    s.a[r * k + c] += wr * s.u[c];
                }
            }
            sw += w;
            swy += w * y[j];
        }
        for r in 0..k {
            for c in 0..r {
                s.a[c * k + r] = s.a[r * k + c];
            }
        }
        for r in 1..k {
            s.a[r * k + r] += SLOPE_RIDGE * h * h * sw;
        }
        *o = match solve_spd(&s.a, &s.b, k, 0.0) {
            Some(beta) if beta[0].is_finite() => beta[0],
            _ => swy / sw,
        };
    }
}

impl LocLin {
    /// Fits with bandwidth `h` (stores the standardized rows).
    pub fn fit(x: ArrayView2<'_, f64>, y: &[f64], h: f64) -> LocLin {
        LocLin::fit_with(x, y, h, Standardizer::fit(x))
    }

    /// [`LocLin::fit`] with inputs standardized by `std` (for example with weighted inputs,
    /// [`Standardizer::weighted`]).
    pub fn fit_with(x: ArrayView2<'_, f64>, y: &[f64], h: f64, std: Standardizer) -> LocLin {
        let z = standardized(x, &std);
        LocLin {
            h,
            std,
            z,
            y: y.to_vec(),
        }
    }

    /// The prediction at one input row.
    pub fn predict(&self, row: &[f64]) -> f64 {
        self.predict_with(row, &mut Scratch::default())
    }

    /// [`LocLin::predict`] with a reusable scratch.
    pub fn predict_with(&self, row: &[f64], s: &mut Scratch) -> f64 {
        let mut q = std::mem::take(&mut s.q);
        q.clear();
        q.extend(row.iter().enumerate().map(|(j, &v)| self.std.z(j, v)));
        let mut o = [0.0];
        at_point(self.z.view(), &self.y, &q, &[self.h], &|_| true, &mut o, s);
        s.q = q;
        o[0]
    }
}

/// Out-of-fold predictions for every bandwidth of [`H_CANDIDATES`] (`out[c][i]`: row i predicted
/// from the rows of the other folds), on inputs standardized by `std` (the whole table's
/// statistics, possibly with weighted inputs).
pub fn out_of_fold_with(
    x: ArrayView2<'_, f64>,
    y: &[f64],
    fold: &[usize],
    std: &Standardizer,
) -> Vec<Vec<f64>> {
    let n = y.len();
    let z = standardized(x, std);
    let mut out = vec![vec![0.0; n]; H_CANDIDATES.len()];
    let mut tmp = vec![0.0; H_CANDIDATES.len()];
    let mut s = Scratch::default();
    for i in 0..n {
        let q = z.row(i).to_vec();
        let fi = fold[i];
        at_point(
            z.view(),
            y,
            &q,
            &H_CANDIDATES,
            &|j| fold[j] != fi,
            &mut tmp,
            &mut s,
        );
        for (c, v) in tmp.iter().enumerate() {
            out[c][i] = *v;
        }
    }
    out
}
