//! Ridge regression family (`ridge`, knob `penalty`) on standardized inputs, with the whole
//! penalty path served by one singular value decomposition; plus [`effective_df`].
//!
//! # Exact objective
//!
//! Each input column is standardized with the **training** mean and the training population
//! standard deviation (divide by `n`): `z_ij = (x_ij - x̄_j) / s_j`. A column whose sd is at most
//! `1e-12 ×` its largest absolute value (a constant column) becomes a zero column and gets a zero
//! coefficient. With `Z` the standardized `n × p` design, the fit minimises
//!
//! `Σ_i (y_i - b0 - z_iᵀβ)² + λ ‖β‖²`
//!
//! (Hastie, Tibshirani, Friedman, *ESL* 2nd ed., eq. 3.41): `λ` is on the **sum-of-squares** scale
//! (not divided by `n`), the intercept is not penalized, and its solution is `b0 = ȳ`. The
//! evaluation inputs are standardized with the same training mean and sd.
//!
//! # Input order
//!
//! Standardization is per column and the penalty `‖β‖²` is symmetric in the coefficients, so
//! permuting the inputs permutes `β` and leaves the predictions unchanged up to rounding (checked
//! in `tests/permutation.rs`).
//!
//! # Path fit
//!
//! `Z = U S Vᵀ` is computed once (Householder QR of `Z` when `n ≥ p`, then a one-sided Jacobi SVD
//! of the `p × p` triangle; one-sided Jacobi on `Z` itself when `n < p`). For every penalty
//! `β(λ) = V diag(s_j / (s_j² + λ)) Uᵀ (y - ȳ)` (ESL eq. 3.47), which costs `O(p²)` per grid value
//! plus `O(m p)` for the predictions. Working on `Z` rather than on `ZᵀZ` keeps the singular
//! values accurate to about machine precision relative to the largest.
//!
//! # Singular designs
//!
//! Singular values at most `max(n, p) · ε · s_max` are treated as exact zeros: their directions
//! contribute nothing to `β` for any `λ`. At `λ = 0` this gives the **minimum-norm** least-squares
//! solution (pseudo-inverse), also when `p > n`.

use std::sync::Arc;

use super::linalg::{jacobi_svd, norm, HouseholderQr};
use super::poly::check_shapes;
use super::standardize::Standardizer;
use super::{BuildContext, Family, FitError, FitInput, OptionError, Options, Out, Task};
use ndarray::ArrayView2;

/// Builds `family = "ridge"` (no options).
pub fn build(_opts: &mut Options, _cx: &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError> {
    Ok(Arc::new(RidgeFamily))
}

/// Ridge regression on standardized inputs with an unpenalized intercept; knob `penalty` (λ).
#[derive(Debug, Clone, Copy, Default)]
pub struct RidgeFamily;

impl Family for RidgeFamily {
    fn standardizes_inputs(&self) -> bool {
        true
    }

    fn name(&self) -> &'static str {
        "ridge"
    }

    fn knob(&self) -> &'static str {
        "penalty"
    }

    fn larger_is_simpler(&self) -> bool {
        true
    }

    fn check_grid(&self, grid: &[f64], n_train: usize, _n_inputs: usize) -> Result<(), String> {
        for &l in grid {
            if !l.is_finite() || l < 0.0 {
                return Err(format!(
                    "penalty must be finite and >= 0, got {}",
                    crate::fmt::fmt_exact(l)
                ));
            }
        }
        if n_train == 0 {
            return Err("ridge needs at least one training row".into());
        }
        Ok(())
    }

    fn supports(&self, task: Task) -> bool {
        matches!(task, Task::Regress)
    }

    /// The standardized copy of the design and its factor (`n × p`), and the right singular
    /// vectors and their rotation: `p × p` when `n ≥ p`, `p × n` and `n × n` when the wide path
    /// factors `Zᵀ` (a `p × p` term refused a 200-row table with 57 000 one-hot inputs as 98 GiB;
    /// it runs in 1 GiB), on top of the default.
    fn work_bytes(&self, n: usize, p: usize, m: usize, grid: &[f64], _task: Task) -> f64 {
        let k = n.min(p) as f64;
        let (n, p) = (n as f64, p as f64);
        8.0 * (5.0 * n * p + 2.0 * p * k + m as f64 * grid.len() as f64)
    }

    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        out: Out<'_>,
    ) -> Result<(), FitError> {
        if !matches!(input.task, Task::Regress) {
            return Err(FitError("ridge supports regression only".into()));
        }
        let mut out = out.values;
        check_shapes(input, grid.len(), out.dim())?;
        if let Some(&l) = grid.iter().find(|l| !l.is_finite() || **l < 0.0) {
            return Err(FitError(format!(
                "ridge: penalty must be finite and >= 0, got {}",
                crate::fmt::fmt_exact(l)
            )));
        }
        let (n, p) = input.x.dim();
        if n == 0 {
            return Err(FitError("ridge: the training set is empty".into()));
        }
        let m = input.eval.nrows();
        let ybar = input.y.sum() / n as f64;
        let yc: Vec<f64> = input.y.iter().map(|v| v - ybar).collect();
        let std = Standardizer::fit(input.x);
        let spec = Spectrum::new(std.col_major_mul(input.x), n, p, &yc);
        // Standardized evaluation design, row-major m × p.
        let ze = std.row_major_mul(input.eval);

        let mut w = vec![0.0; p];
        let mut beta = vec![0.0; p];
        for (g, &lambda) in grid.iter().enumerate() {
            spec.coefficients(lambda, &mut w, &mut beta);
            let mut row = out.row_mut(g);
            for e in 0..m {
                let z = &ze[e * p..(e + 1) * p];
                let s: f64 = z.iter().zip(&beta).map(|(a, b)| a * b).sum();
                let pred = ybar + s;
                if !pred.is_finite() {
                    return Err(FitError(format!(
                        "ridge: penalty = {lambda} gave a non-finite prediction at evaluation \
                         point {e}"
                    )));
                }
                row[e] = pred;
            }
        }
        Ok(())
    }
}

/// Effective degrees of freedom of ridge at `penalty` on the standardized design of `x`
/// (same standardization as the family): `df(λ) = Σ_j s_j² / (s_j² + λ)` over the singular values
/// `s_j` of the standardized design (ESL eq. 3.50). Singular values treated as zero (see the
/// module docs) contribute 0, so `df(0)` is the numerical rank. The intercept is not counted.
/// Returns NaN if `penalty` is negative or not finite, or if `x` holds a non-finite value.
pub fn effective_df(x: ArrayView2<'_, f64>, penalty: f64) -> f64 {
    if !penalty.is_finite() || penalty < 0.0 || x.iter().any(|v| !v.is_finite()) {
        return f64::NAN;
    }
    let (n, p) = x.dim();
    if n == 0 || p == 0 {
        return 0.0;
    }
    let std = Standardizer::fit(x);
    let spec = Spectrum::new(std.col_major_mul(x), n, p, &vec![0.0; n]);
    spec.s2
        .iter()
        .map(|&d| if d > 0.0 { d / (d + penalty) } else { 0.0 })
        .sum()
}

/// Singular values at or below this are null directions: `max(n, p) · ε · s_max`.
fn rank_cut(s: &[f64], n: usize, p: usize) -> f64 {
    let s_max = s.iter().copied().fold(0.0_f64, f64::max);
    (n.max(p) as f64) * f64::EPSILON * s_max
}

/// `Z V = W` with orthogonal columns: `s2[j] = ‖w_j‖²` (0 for null directions),
/// `g[j] = w_jᵀ (y - ȳ)` (0 for null directions), `v` column-major `p × k` (the k = min(n, p)
/// directions, or all p when n ≥ p).
struct Spectrum {
    p: usize,
    s2: Vec<f64>,
    g: Vec<f64>,
    v: Vec<f64>,
}

impl Spectrum {
    fn new(z: Vec<f64>, n: usize, p: usize, yc: &[f64]) -> Self {
        if n < p {
            return Spectrum::wide(z, n, p, yc);
        }
        Spectrum::tall(z, n, p, yc)
    }

    /// More inputs than rows: the one-sided Jacobi SVD of `Zᵀ` (n columns of length p, work
    /// O(n² p) per sweep, where `Z` itself would take O(p² n) and a p × p `V`). `Zᵀ Ṽ = W̃`
    /// gives `Z = Ṽ W̃ᵀ`: the singular values `s_j = ‖w̃_j‖`, the right singular vectors
    /// `v_j = w̃_j / s_j` and `g_j = s_j ṽ_jᵀ (y − ȳ)`, the same quantities as [`Spectrum::tall`]
    /// up to rounding.
    fn wide(z: Vec<f64>, n: usize, p: usize, yc: &[f64]) -> Self {
        let mut zt = vec![0.0; n * p];
        for j in 0..p {
            for i in 0..n {
                zt[i * p + j] = z[j * n + i];
            }
        }
        let vt = jacobi_svd(&mut zt, p, n);
        let s: Vec<f64> = (0..n).map(|j| norm(&zt[j * p..(j + 1) * p])).collect();
        let cut = rank_cut(&s, n, p);
        let mut s2 = Vec::with_capacity(n);
        let mut g = Vec::with_capacity(n);
        let mut v = vec![0.0; p * n];
        for (j, &sj) in s.iter().enumerate() {
            if sj > cut && sj > 0.0 {
                s2.push(sj * sj);
                let u = &vt[j * n..(j + 1) * n];
                g.push(sj * u.iter().zip(yc).map(|(a, b)| a * b).sum::<f64>());
                for (vk, wk) in v[j * p..(j + 1) * p]
                    .iter_mut()
                    .zip(&zt[j * p..(j + 1) * p])
                {
                    *vk = wk / sj;
                }
            } else {
                s2.push(0.0);
                g.push(0.0);
            }
        }
        Spectrum { p, s2, g, v }
    }

    /// At least as many rows as inputs: reduced to the p × p triangle first, `Z = Q [R; 0]`, so
    /// `Z V = Q [R V; 0]`, then the one-sided Jacobi SVD of R.
    fn tall(mut z: Vec<f64>, n: usize, p: usize, yc: &[f64]) -> Self {
        let mut rhs = yc.to_vec();
        let qr = HouseholderQr::factor(&mut z, n, p, None);
        qr.apply_qt(&mut rhs);
        let mut w = vec![0.0; p * p];
        for j in 0..p {
            let top = (j + 1).min(qr.rank());
            w[j * p..j * p + top].copy_from_slice(&z[j * n..j * n + top]);
        }
        rhs.truncate(p);
        let rows = p;
        let v = jacobi_svd(&mut w, rows, p);
        let s: Vec<f64> = (0..p).map(|j| norm(&w[j * rows..(j + 1) * rows])).collect();
        let cut = rank_cut(&s, n, p);
        let mut s2 = Vec::with_capacity(p);
        let mut g = Vec::with_capacity(p);
        for (j, &sj) in s.iter().enumerate() {
            if sj > cut && sj > 0.0 {
                s2.push(sj * sj);
                let col = &w[j * rows..(j + 1) * rows];
                g.push(col.iter().zip(&rhs).map(|(a, b)| a * b).sum());
            } else {
                s2.push(0.0);
                g.push(0.0);
            }
        }
        Spectrum { p, s2, g, v }
    }

    /// `β(λ) = V diag(1 / (s_j² + λ)) g` into `beta`; `w` is scratch of length `p` (only the
    /// first k = `s2.len()` are used).
    fn coefficients(&self, lambda: f64, w: &mut [f64], beta: &mut [f64]) {
        for ((wj, &d), &gj) in w.iter_mut().zip(&self.s2).zip(&self.g) {
            *wj = if d > 0.0 { gj / (d + lambda) } else { 0.0 };
        }
        beta.fill(0.0);
        for (k, &wk) in w.iter().take(self.s2.len()).enumerate() {
            if wk == 0.0 {
                continue;
            }
            let col = &self.v[k * self.p..(k + 1) * self.p];
            for (b, &vk) in beta.iter_mut().zip(col) {
                *b += vk * wk;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array1, Array2};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn the_work_estimate_of_a_wide_design_has_no_p_by_p_term() {
        let f = RidgeFamily;
        let tall = f.work_bytes(1000, 50, 100, &[1.0], Task::Regress);
        assert_eq!(
            tall,
            8.0 * (5.0 * 1000.0 * 50.0 + 2.0 * 50.0 * 50.0 + 100.0)
        );
        // 200 rows × 57 000 inputs: about 0.6 GB, not the 52 GB a p × p matrix would take.
        let wide = f.work_bytes(200, 57_000, 200, &[1.0, 2.0], Task::Regress);
        assert!(wide < 1e9, "{wide}");
    }

    fn fit(x: &Array2<f64>, y: &Array1<f64>, eval: &Array2<f64>, grid: &[f64]) -> Array2<f64> {
        let mut out = Array2::zeros((grid.len(), eval.nrows()));
        let input = FitInput {
            x: x.view(),
            y: y.view(),
            eval: eval.view(),
            task: Task::Regress,
            seed: crate::rng::FitSeed::fixed(0),
        };
        RidgeFamily
            .fit_predict(&input, grid, crate::family::Out::values(out.view_mut()))
            .expect("fit");
        out
    }

    fn data(seed: u64, n: usize, p: usize) -> (Array2<f64>, Array1<f64>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let x = Array2::from_shape_fn((n, p), |(_, j)| {
            rng.gen_range(-1.0..1.0) * (j as f64 + 1.0) + j as f64
        });
        let y = x
            .rows()
            .into_iter()
            .map(|r| {
                r.iter()
                    .enumerate()
                    .map(|(j, v)| v * (j as f64 - 1.5))
                    .sum::<f64>()
                    + rng.gen_range(-0.5..0.5)
            })
            .collect();
        (x, y)
    }

    /// Standardized design (population sd), as the family documents it.
    fn standardize(x: &Array2<f64>) -> Array2<f64> {
        let mut z = x.clone();
        for mut c in z.columns_mut() {
            let mu = c.mean().unwrap();
            let sd = (c.iter().map(|v| (v - mu).powi(2)).sum::<f64>() / c.len() as f64).sqrt();
            c.mapv_inplace(|v| (v - mu) / sd);
        }
        z
    }

    /// Solves `a x = b` by Gaussian elimination with partial pivoting (test-only reference).
    fn gauss_solve(mut a: Array2<f64>, mut b: Array2<f64>) -> Array2<f64> {
        let n = a.nrows();
        for k in 0..n {
            let piv = (k..n)
                .max_by(|&i, &j| a[[i, k]].abs().total_cmp(&a[[j, k]].abs()))
                .unwrap();
            for c in 0..n {
                a.swap([k, c], [piv, c]);
            }
            for c in 0..b.ncols() {
                b.swap([k, c], [piv, c]);
            }
            for i in (k + 1)..n {
                let f = a[[i, k]] / a[[k, k]];
                for c in k..n {
                    a[[i, c]] -= f * a[[k, c]];
                }
                for c in 0..b.ncols() {
                    b[[i, c]] -= f * b[[k, c]];
                }
            }
        }
        for k in (0..n).rev() {
            for c in 0..b.ncols() {
                let mut s = b[[k, c]];
                for j in (k + 1)..n {
                    s -= a[[k, j]] * b[[j, c]];
                }
                b[[k, c]] = s / a[[k, k]];
            }
        }
        b
    }

    #[test]
    fn grid_checks() {
        let f = RidgeFamily;
        assert!(f.check_grid(&[0.0, 0.5, 1e6], 10, 3).is_ok());
        assert!(f.check_grid(&[-1.0], 10, 3).is_err());
        assert!(f.check_grid(&[f64::INFINITY], 10, 3).is_err());
        assert!(f.check_grid(&[f64::NAN], 10, 3).is_err());
        assert!(!f.supports(Task::Classify { classes: 3 }));
        let (x, y) = data(1, 5, 2);
        let mut out = Array2::zeros((1, 5));
        let input = FitInput {
            x: x.view(),
            y: y.view(),
            eval: x.view(),
            task: Task::Regress,
            seed: crate::rng::FitSeed::fixed(0),
        };
        assert!(RidgeFamily
            .fit_predict(&input, &[-2.0], crate::family::Out::values(out.view_mut()))
            .is_err());
    }

    #[test]
    fn zero_penalty_is_ols_like_linfa() {
        // Reference library: linfa-linear 0.8 `LinearRegression` (OLS with intercept) on the raw
        // inputs; OLS predictions do not depend on the affine standardization.
        use linfa::prelude::*;
        use linfa_linear::LinearRegression;
        let (x, y) = data(2, 40, 4);
        let (eval, _) = data(3, 9, 4);
        let model = LinearRegression::new()
            .fit(&Dataset::new(x.clone(), y.clone()))
            .expect("linfa fit");
        let want = model.predict(&eval);
        let out = fit(&x, &y, &eval, &[0.0]);
        for e in 0..eval.nrows() {
            assert!(
                (out[[0, e]] - want[e]).abs() < 1e-9,
                "{} vs {}",
                out[[0, e]],
                want[e]
            );
        }
    }

    #[test]
    fn fitted_values_match_the_hat_matrix() {
        // ESL eq. 3.47: fitted = ȳ + Z (ZᵀZ + λI)⁻¹ Zᵀ (y - ȳ), solved here directly by Gaussian
        // elimination on the normal equations.
        let (x, y) = data(4, 12, 3);
        let z = standardize(&x);
        let ybar = y.mean().unwrap();
        let yc = (&y - ybar).insert_axis(ndarray::Axis(1));
        let grid = [0.0, 0.1, 1.0, 7.5, 100.0];
        let out = fit(&x, &y, &x, &grid);
        for (g, &lambda) in grid.iter().enumerate() {
            let mut a = z.t().dot(&z);
            for j in 0..3 {
                a[[j, j]] += lambda;
            }
            let beta = gauss_solve(a, z.t().dot(&yc));
            let fitted = z.dot(&beta);
            for i in 0..12 {
                let want = ybar + fitted[[i, 0]];
                assert!((out[[g, i]] - want).abs() < 1e-9, "λ={lambda} i={i}");
            }
        }
    }

    #[test]
    fn wide_design_predictions_match_the_dual_form() {
        // p > n (the transposed SVD): ridge equals its dual (kernel) form,
        // β = Zᵀ (Z Zᵀ + λI)⁻¹ (y − ȳ), from (ZᵀZ + λI)⁻¹ Zᵀ = Zᵀ (Z Zᵀ + λI)⁻¹ (Hastie,
        // Tibshirani and Friedman 2009, §18.3.5, from memory), solved here by Gaussian
        // elimination on the n × n system, at new points.
        let (x, y) = data(8, 9, 25);
        let (eval, _) = data(9, 7, 25);
        let z = standardize(&x);
        let ybar = y.mean().unwrap();
        let yc = (&y - ybar).insert_axis(ndarray::Axis(1));
        let grid = [0.05, 1.0, 30.0];
        let out = fit(&x, &y, &eval, &grid);
        // The evaluation points standardized by the training columns (population sd).
        let mut ze = eval.clone();
        for (j, mut c) in ze.columns_mut().into_iter().enumerate() {
            let col = x.column(j);
            let mu = col.mean().unwrap();
            let sd = (col.iter().map(|v| (v - mu).powi(2)).sum::<f64>() / col.len() as f64).sqrt();
            c.mapv_inplace(|v| (v - mu) / sd);
        }
        for (g, &lambda) in grid.iter().enumerate() {
            let mut k = z.dot(&z.t());
            for i in 0..9 {
                k[[i, i]] += lambda;
            }
            let alpha = gauss_solve(k, yc.clone());
            let beta = z.t().dot(&alpha);
            let pred = ze.dot(&beta);
            for i in 0..7 {
                let want = ybar + pred[[i, 0]];
                assert!(
                    (out[[g, i]] - want).abs() < 1e-9 * (1.0 + want.abs()),
                    "λ={lambda} i={i}: {} vs {want}",
                    out[[g, i]]
                );
            }
        }
    }

    #[test]
    fn wide_design_at_zero_penalty_interpolates_with_minimum_norm() {
        // p > n: the centered design has rank n - 1, which spans every centered response, so the
        // minimum-norm solution interpolates the training data (exact identity), and it is the
        // λ → 0 limit of the ridge path (ESL §3.4.1).
        let (x, y) = data(5, 6, 10);
        let out = fit(&x, &y, &x, &[0.0]);
        for i in 0..6 {
            assert!((out[[0, i]] - y[i]).abs() < 1e-9);
        }
        let tiny = fit(&x, &y, &x, &[1e-9]);
        for i in 0..6 {
            assert!((tiny[[0, i]] - out[[0, i]]).abs() < 1e-6);
        }
    }

    #[test]
    fn duplicated_column_gives_minimum_norm_ols() {
        // Exact identity: with x3 = x1 the minimum-norm solution splits x1's coefficient evenly,
        // so its predictions equal OLS on (x1, x2) alone, also at new points.
        let (x, y) = data(12, 20, 2);
        let (eval, _) = data(13, 6, 2);
        let dup = |a: &Array2<f64>| {
            Array2::from_shape_fn((a.nrows(), 3), |(i, j)| a[[i, if j == 2 { 0 } else { j }]])
        };
        let a = fit(&x, &y, &eval, &[0.0]);
        let b = fit(&dup(&x), &y, &dup(&eval), &[0.0]);
        for (u, v) in a.iter().zip(b.iter()) {
            assert!((u - v).abs() < 1e-9, "{u} vs {v}");
        }
    }

    #[test]
    fn large_penalty_gives_the_mean() {
        let (x, y) = data(6, 30, 3);
        let (eval, _) = data(7, 5, 3);
        let out = fit(&x, &y, &eval, &[1e12]);
        let ybar = y.mean().unwrap();
        for e in 0..5 {
            // |β| ≤ ‖Zᵀ(y-ȳ)‖/λ, so the deviation is below 1e-8 here.
            assert!((out[[0, e]] - ybar).abs() < 1e-8);
        }
    }

    #[test]
    fn constant_column_is_ignored() {
        let (x, y) = data(8, 25, 2);
        let mut x3 = Array2::from_elem((25, 3), 4.0);
        x3.column_mut(0).assign(&x.column(0));
        x3.column_mut(2).assign(&x.column(1));
        let a = fit(&x, &y, &x, &[0.0, 2.0]);
        let mut e3 = Array2::from_elem((25, 3), 4.0);
        e3.column_mut(0).assign(&x.column(0));
        e3.column_mut(2).assign(&x.column(1));
        let b = fit(&x3, &y, &e3, &[0.0, 2.0]);
        for (u, v) in a.iter().zip(b.iter()) {
            assert!((u - v).abs() < 1e-10);
        }
    }

    #[test]
    fn path_equals_single_penalty_fits() {
        let (x, y) = data(9, 20, 5);
        let (eval, _) = data(10, 7, 5);
        let grid = [0.0, 0.3, 3.0, 30.0];
        let path = fit(&x, &y, &eval, &grid);
        for (g, &l) in grid.iter().enumerate() {
            assert_eq!(path.row(g), fit(&x, &y, &eval, &[l]).row(0));
        }
    }

    #[test]
    fn effective_df_runs_from_p_to_zero() {
        // ESL eq. 3.50: df(0) = p for a full-rank design, decreasing to 0 as λ → ∞.
        let (x, _) = data(11, 30, 4);
        let z = standardize(&x);
        let mut last = effective_df(x.view(), 0.0);
        assert!((last - 4.0).abs() < 1e-12);
        for &l in &[0.01, 0.1, 1.0, 10.0, 100.0, 1e4, 1e8] {
            let d = effective_df(x.view(), l);
            assert!(d < last, "df({l}) = {d} not below {last}");
            // Cross-check against trace of the hat matrix Z (ZᵀZ + λI)⁻¹ Zᵀ (ESL §3.4.1).
            let mut a = z.t().dot(&z);
            for j in 0..4 {
                a[[j, j]] += l;
            }
            let inv_zt = gauss_solve(a, z.t().to_owned());
            let tr: f64 = z.dot(&inv_zt).diag().sum();
            assert!((d - tr).abs() < 1e-9 * tr.max(1.0), "λ={l}: {d} vs {tr}");
            last = d;
        }
        // df(λ) ≤ Σ s_j² / λ = tr(ZᵀZ) / λ = n p / λ for standardized columns (exact identity).
        assert!(last > 0.0 && last <= 30.0 * 4.0 / 1e8);
        assert!(effective_df(x.view(), -1.0).is_nan());
    }
}
