//! Minimum-norm least squares on the first `p` inputs (`minnorm`, knob `features` = `p`): the
//! family in which "double descent" is usually shown.
//!
//! # Estimator
//!
//! With `X_p` the `n × p` matrix of the first `p` training inputs (in column order), the fit is
//! `β̂ = X_p⁺ y`, the Moore–Penrose pseudo-inverse solution: the least-squares solution when
//! `p ≤ n` and `X_p` has full column rank, and among all solutions that interpolate the training
//! responses the one of smallest Euclidean norm when `p > n` (and, generally, the minimum-norm
//! least-squares solution whatever the rank). The prediction at `x` is `x_{1..p}ᵀ β̂`.
//!
//! **No intercept by default** (`intercept = false`): the estimator is the one whose risk has a
//! closed form for centred Gaussian inputs (Belkin, Hsu and Xu 2020, "Two models of double
//! descent for weak features", *SIAM J. Math. Data Sci.* 2(4), Theorem 1; checked in this
//! module's tests). With `intercept = true` the first `p` inputs and the response are centred at
//! their training means, the minimum-norm solution is computed on the centred data, and the
//! unpenalised intercept `ȳ − x̄ᵀβ̂` is added.
//!
//! # Input order
//!
//! The knob selects inputs **by position**: `features = p` uses the first `p` columns of the
//! scenario's inputs. Reordering the inputs therefore changes the model at `p` below the number of
//! inputs, by design (it is the model of the cited paper, in which the analyst observes a fixed
//! subset of the features). At `p` = all inputs, and under any reordering within the first `p`
//! inputs, the predictions are unchanged up to rounding.
//!
//! # Computation
//!
//! Pure Rust ([`super::linalg`]): when `n ≥ p`, a Householder QR `X_p = Q R` and a one-sided
//! Jacobi SVD of the `p × p` triangle `R`; when `n < p`, a Householder QR of `X_pᵀ = Q R` and a
//! Jacobi SVD of the `n × n` triangle `Rᵀ`, so that `β̂ = Q (Rᵀ)⁺ y`. Singular values at most
//! `max(n, p) · ε · s_max` count as zero (the pseudo-inverse ignores their directions), so
//! `p ≈ n`, rank-deficient designs and repeated inputs are handled without failing.
//!
//! # Path fit
//!
//! There is no shared decomposition: every grid value is fitted on its own (the family loops over
//! the grid), at a cost of `O(max(n, p) · min(n, p)²)` per value. A left-looking QR could share the
//! `p ≤ n` part of the grid and a row-updated QR of `X_pᵀ` the `p > n` part, but the loop keeps the
//! pseudo-inverse exact whatever the rank, and the sizes of double-descent studies are small.

use std::sync::Arc;

use ndarray::ArrayView2;

use super::linalg::{jacobi_svd, norm, HouseholderQr};
use super::poly::check_shapes;
use super::{
    check_whole_grid, BuildContext, Family, FitError, FitInput, OptionError, Options, Out, Task,
};

/// Minimum-norm least squares on the first `p` inputs; knob `features`. See the
/// [module documentation](self).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct MinNormFamily {
    /// Centre inputs and response and add an unpenalised intercept (default false).
    pub intercept: bool,
}

/// Builds `family = "minnorm"` from its options (`intercept`).
pub fn build(opts: &mut Options, _cx: &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError> {
    let mut f = MinNormFamily::default();
    if let Some(b) = opts.boolean("intercept")? {
        f.intercept = b;
    }
    Ok(Arc::new(f))
}

/// The minimum-norm least-squares solution `β = A⁺ y` of the column-major `n × p` matrix `a`
/// (overwritten as scratch). See the module docs for the method and the rank cut-off.
pub fn min_norm_solve(a: &mut [f64], n: usize, p: usize, y: &[f64]) -> Vec<f64> {
    debug_assert_eq!(a.len(), n * p);
    debug_assert_eq!(y.len(), n);
    if n == 0 || p == 0 {
        return vec![0.0; p];
    }
    if n >= p {
        // A = Q [R; 0]; A⁺ y = R⁺ (Qᵀy)[..p].
        let mut qty = y.to_vec();
        let qr = HouseholderQr::factor(a, n, p, None);
        qr.apply_qt(&mut qty);
        let mut r = vec![0.0; p * p];
        for j in 0..p {
            let top = (j + 1).min(qr.rank());
            r[j * p..j * p + top].copy_from_slice(&a[j * n..j * n + top]);
        }
        pinv_square(&mut r, p, &qty[..p], n.max(p))
    } else {
        // Aᵀ = Q R (p × n, R n × n); A = Rᵀ Qᵀ and A⁺ y = Q (Rᵀ)⁺ y.
        let mut at = vec![0.0; p * n];
        for i in 0..n {
            for j in 0..p {
                at[i * p + j] = a[j * n + i];
            }
        }
        let qr = HouseholderQr::factor(&mut at, p, n, None);
        let mut rt = vec![0.0; n * n];
        for j in 0..n {
            let top = (j + 1).min(qr.rank());
            for i in 0..top {
                // R[i, j] → Rᵀ[j, i], column-major (row j, column i).
                rt[i * n + j] = at[j * p + i];
            }
        }
        let c = pinv_square(&mut rt, n, y, n.max(p));
        let mut beta = vec![0.0; p];
        beta[..n].copy_from_slice(&c);
        qr.apply_q(&mut beta);
        beta
    }
}

/// `M⁺ b` for the column-major `k × k` matrix `m` (overwritten), through its one-sided Jacobi SVD
/// `M V = W` (`M⁺ = V diag(1/‖w_j‖²) Wᵀ`); singular values at most `size · ε · s_max` count as 0.
fn pinv_square(m: &mut [f64], k: usize, b: &[f64], size: usize) -> Vec<f64> {
    let v = jacobi_svd(m, k, k);
    let s: Vec<f64> = (0..k).map(|j| norm(&m[j * k..(j + 1) * k])).collect();
    let s_max = s.iter().copied().fold(0.0_f64, f64::max);
    let cut = size as f64 * f64::EPSILON * s_max;
    let mut out = vec![0.0; k];
    for (j, &sj) in s.iter().enumerate() {
        if sj <= cut || sj == 0.0 {
            continue;
        }
        let w = &m[j * k..(j + 1) * k];
        let g = w.iter().zip(b).map(|(a, c)| a * c).sum::<f64>() / (sj * sj);
        for (o, &vj) in out.iter_mut().zip(&v[j * k..(j + 1) * k]) {
            *o += vj * g;
        }
    }
    out
}

/// A training design: `rows × width`, column-major.
pub(crate) struct Design<'a> {
    /// The entries, column after column.
    pub cols: &'a [f64],
    /// Number of rows (training rows).
    pub rows: usize,
    /// Number of columns.
    pub width: usize,
}

/// Fits minimum-norm least squares on the columns `0..p` of `train` (with centring when
/// `intercept`) and writes the predictions at the row-major `m × train.width` evaluation design
/// `eval_rows` into `out` (length `m`).
pub(crate) fn fit_leading(
    train: &Design<'_>,
    p: usize,
    y: &[f64],
    eval_rows: &[f64],
    intercept: bool,
    out: &mut [f64],
) {
    let (n, width) = (train.rows, train.width);
    let mut a = train.cols[..n * p].to_vec();
    let mut means = vec![0.0; p];
    let mut ybar = 0.0;
    let mut yc = y.to_vec();
    if intercept {
        for (j, mean) in means.iter_mut().enumerate() {
            let col = &mut a[j * n..(j + 1) * n];
            *mean = col.iter().sum::<f64>() / n as f64;
            col.iter_mut().for_each(|v| *v -= *mean);
        }
        ybar = y.iter().sum::<f64>() / n as f64;
        yc.iter_mut().for_each(|v| *v -= ybar);
    }
    let beta = min_norm_solve(&mut a, n, p, &yc);
    for (e, o) in out.iter_mut().enumerate() {
        let row = &eval_rows[e * width..e * width + p];
        let s: f64 = row
            .iter()
            .zip(&means)
            .zip(&beta)
            .map(|((x, mu), b)| (x - mu) * b)
            .sum();
        *o = ybar + s;
    }
}

impl Family for MinNormFamily {
    /// The training and evaluation inputs, a Gram matrix of the smaller side and its
    /// factorization, for the largest feature count in the grid.
    fn work_bytes(&self, n: usize, p: usize, m: usize, grid: &[f64], _task: Task) -> f64 {
        let q = grid.iter().fold(0.0_f64, |a, &b| a.max(b)).min(p as f64);
        let (n, m) = (n as f64, m as f64);
        // Four training-sized arrays at the solve's peak, as for `random_features` (the same
        // solver; measured there).
        8.0 * ((4.0 * n + 2.0 * m) * q + 3.0 * n.min(q).powi(2) + n + m)
    }

    fn name(&self) -> &'static str {
        "minnorm"
    }

    fn knob(&self) -> &'static str {
        "features"
    }

    fn min_norm_coefficients(&self, value: f64, n_inputs: usize) -> Option<usize> {
        Some((value as usize).min(n_inputs) + usize::from(self.intercept))
    }

    fn check_grid(&self, grid: &[f64], n_train: usize, n_inputs: usize) -> Result<(), String> {
        if grid.is_empty() {
            return Err("features grid is empty".into());
        }
        if n_train == 0 {
            return Err("minnorm needs at least one training row".into());
        }
        check_whole_grid(grid, "features", 1.0, n_inputs as f64).map_err(|e| {
            format!("{e} (features counts the first inputs used; there are {n_inputs})")
        })
    }

    fn supports(&self, task: Task) -> bool {
        matches!(task, Task::Regress)
    }

    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        out: Out<'_>,
    ) -> Result<(), FitError> {
        if !matches!(input.task, Task::Regress) {
            return Err(FitError("minnorm supports regression only".into()));
        }
        let mut out = out.values;
        check_shapes(input, grid.len(), out.dim())?;
        let (n, width) = input.x.dim();
        if n == 0 {
            return Err(FitError("minnorm: the training set is empty".into()));
        }
        check_whole_grid(grid, "features", 1.0, width as f64)
            .map_err(|e| FitError(format!("minnorm: {e}")))?;
        let design = col_major(input.x);
        let eval = input.eval.as_standard_layout();
        let eval_rows = eval
            .as_slice()
            .ok_or_else(|| FitError("minnorm: evaluation inputs are not contiguous".into()))?;
        let y = input.y.to_vec();
        let m = input.eval.nrows();
        let mut pred = vec![0.0; m];
        for (g, &v) in grid.iter().enumerate() {
            let p = v as usize;
            let train = Design {
                cols: &design,
                rows: n,
                width,
            };
            fit_leading(&train, p, &y, eval_rows, self.intercept, &mut pred);
            if let Some(e) = pred.iter().position(|v| !v.is_finite()) {
                return Err(FitError(format!(
                    "minnorm: features = {p} gave a non-finite prediction at evaluation point {e}"
                )));
            }
            out.row_mut(g)
                .iter_mut()
                .zip(&pred)
                .for_each(|(o, &v)| *o = v);
        }
        Ok(())
    }
}

/// The column-major copy of `x`.
pub(crate) fn col_major(x: ArrayView2<f64>) -> Vec<f64> {
    x.t().iter().copied().collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::FitSeed;
    use ndarray::{Array1, Array2};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;
    use rand_distr::StandardNormal;

    fn fit(
        fam: &MinNormFamily,
        x: &Array2<f64>,
        y: &Array1<f64>,
        eval: &Array2<f64>,
        grid: &[f64],
    ) -> Array2<f64> {
        let mut out = Array2::zeros((grid.len(), eval.nrows()));
        let input = FitInput {
            x: x.view(),
            y: y.view(),
            eval: eval.view(),
            task: Task::Regress,
            seed: FitSeed::fixed(0),
        };
        fam.fit_predict(&input, grid, Out::values(out.view_mut()))
            .expect("fit");
        out
    }

    fn gaussian(rng: &mut ChaCha8Rng, rows: usize, cols: usize) -> Array2<f64> {
        Array2::from_shape_fn((rows, cols), |_| rng.sample(StandardNormal))
    }

    /// Solves the square system `a z = b` by Gaussian elimination with partial pivoting (an
    /// independent check of the QR/SVD route).
    fn solve(mut a: Array2<f64>, mut b: Array1<f64>) -> Array1<f64> {
        let k = b.len();
        for c in 0..k {
            let piv = (c..k)
                .max_by(|&i, &j| a[[i, c]].abs().total_cmp(&a[[j, c]].abs()))
                .unwrap();
            for j in 0..k {
                a.swap([c, j], [piv, j]);
            }
            b.swap(c, piv);
            for r in c + 1..k {
                let f = a[[r, c]] / a[[c, c]];
                for j in c..k {
                    a[[r, j]] -= f * a[[c, j]];
                }
                b[r] -= f * b[c];
            }
        }
        let mut z = Array1::zeros(k);
        for r in (0..k).rev() {
            let s: f64 = (r + 1..k).map(|j| a[[r, j]] * z[j]).sum();
            z[r] = (b[r] - s) / a[[r, r]];
        }
        z
    }

    /// Coefficients read off predictions at the unit vectors (no intercept).
    fn coefficients(
        fam: &MinNormFamily,
        x: &Array2<f64>,
        y: &Array1<f64>,
        p: usize,
    ) -> Array1<f64> {
        let d = x.ncols();
        let eye = Array2::from_shape_fn((d, d), |(i, j)| f64::from(u8::from(i == j)));
        fit(fam, x, y, &eye, &[p as f64]).row(0).to_owned()
    }

    #[test]
    fn matches_normal_equations_and_interpolates_with_minimum_norm() {
        // Independent checks: p < n gives the normal-equation solution (XᵀX)⁻¹Xᵀy; p > n gives
        // β = Xᵀ(XXᵀ)⁻¹y (interpolating, in the row space: the minimum-norm solution).
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let (n, d) = (12, 20);
        let x = gaussian(&mut rng, n, d);
        let y = Array1::from_shape_fn(n, |_| rng.sample::<f64, _>(StandardNormal));
        let fam = MinNormFamily::default();
        for p in [1, 5, 11, 12, 13, 20] {
            let beta = coefficients(&fam, &x, &y, p);
            assert!(beta.iter().skip(p).all(|&b| b == 0.0));
            let xp = x.slice(ndarray::s![.., ..p]).to_owned();
            let want = if p <= n {
                solve(xp.t().dot(&xp), xp.t().dot(&y))
            } else {
                xp.t().dot(&solve(xp.dot(&xp.t()), y.clone()))
            };
            for j in 0..p {
                assert!(
                    (beta[j] - want[j]).abs() <= 1e-8 * (1.0 + want[j].abs()),
                    "p = {p}, j = {j}: {} vs {}",
                    beta[j],
                    want[j]
                );
            }
            if p >= n {
                let fitted = fit(&fam, &x, &y, &x, &[p as f64]);
                for i in 0..n {
                    assert!((fitted[[0, i]] - y[i]).abs() < 1e-9);
                }
            }
        }
    }

    #[test]
    fn repeated_inputs_share_the_coefficient() {
        // Minimum norm by hand: with column 1 a copy of column 0, every split b₀ + b₁ = b fits
        // equally well and the smallest norm is b₀ = b₁ = b/2; y = 3 x₀ exactly gives b = 3.
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        let c = gaussian(&mut rng, 10, 1);
        let x = Array2::from_shape_fn((10, 2), |(i, _)| c[[i, 0]]);
        let y = Array1::from_shape_fn(10, |i| 3.0 * c[[i, 0]]);
        let beta = coefficients(&MinNormFamily::default(), &x, &y, 2);
        assert!(
            (beta[0] - 1.5).abs() < 1e-12 && (beta[1] - 1.5).abs() < 1e-12,
            "{beta}"
        );
    }

    #[test]
    fn intercept_centres_and_interpolates() {
        // With an intercept: p + 1 ≤ n recovers an exact affine function; p ≥ n interpolates.
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let x = gaussian(&mut rng, 8, 12);
        let y = Array1::from_shape_fn(8, |i| 4.0 + 2.0 * x[[i, 0]] - x[[i, 1]]);
        let fam = MinNormFamily { intercept: true };
        let eval = gaussian(&mut rng, 5, 12);
        let out = fit(&fam, &x, &y, &eval, &[2.0]);
        for e in 0..5 {
            let want = 4.0 + 2.0 * eval[[e, 0]] - eval[[e, 1]];
            assert!((out[[0, e]] - want).abs() < 1e-10);
        }
        let noisy = Array1::from_shape_fn(8, |_| rng.sample::<f64, _>(StandardNormal));
        let fitted = fit(&fam, &x, &noisy, &x, &[10.0]);
        for i in 0..8 {
            assert!((fitted[[0, i]] - noisy[i]).abs() < 1e-9);
        }
    }

    #[test]
    fn grid_is_checked_against_the_inputs() {
        let fam = MinNormFamily::default();
        assert!(fam.check_grid(&[1.0, 5.0], 10, 5).is_ok());
        assert!(fam.check_grid(&[6.0], 10, 5).is_err());
        assert!(fam.check_grid(&[0.0], 10, 5).is_err());
        assert!(fam.check_grid(&[2.5], 10, 5).is_err());
        assert!(!fam.supports(Task::Classify { classes: 2 }));
    }

    /// Belkin, Hsu and Xu (2020), "Two models of double descent for weak features", SIAM J. Math.
    /// Data Sci. 2(4), Theorem 1: x ~ N(0, I_D), y = xᵀβ + σε, minimum-norm least squares on the
    /// first p coordinates T has expected squared loss at a fresh (x, y)
    /// `(‖β_Tᶜ‖² + σ²)(1 + p/(n − p − 1))` for p ≤ n − 2 and
    /// `‖β_T‖²(1 − n/p) + (‖β_Tᶜ‖² + σ²)(1 + n/(p − n − 1))` for p ≥ n + 2.
    fn closed_form(p: usize, n: usize, beta: &[f64], sigma: f64) -> f64 {
        let inside: f64 = beta[..p].iter().map(|b| b * b).sum();
        let outside: f64 = beta[p..].iter().map(|b| b * b).sum();
        let (p, n) = (p as f64, n as f64);
        if p <= n - 2.0 {
            (outside + sigma * sigma) * (1.0 + p / (n - p - 1.0))
        } else {
            assert!(p >= n + 2.0);
            inside * (1.0 - n / p) + (outside + sigma * sigma) * (1.0 + n / (p - n - 1.0))
        }
    }

    #[test]
    fn double_descent_matches_belkin_hsu_xu_theorem_1() {
        // Monte Carlo over training sets. Per replicate the loss at a fresh (x, y) is computed
        // exactly from the fitted coefficients (read off predictions at the unit vectors):
        // E[(y − xᵀβ̂)²] = ‖β − β̂‖² + σ² for x ~ N(0, I). The replicate mean must be within
        // 4 SE (SE from the spread over replicates) of the theorem's value. The p values keep the
        // loss's fourth moment finite (|n − p| ≥ 6), so the SE itself is reliable.
        let (d, n, sigma) = (60usize, 30usize, 0.5);
        let beta: Vec<f64> = (0..d)
            .map(|j| 0.25 * (1.0 + (j % 3) as f64) / 2.0)
            .collect();
        let ps = [3usize, 12, 20, 24, 36, 45, 60];
        let grid: Vec<f64> = ps.iter().map(|&p| p as f64).collect();
        let fam = MinNormFamily::default();
        let eye = Array2::from_shape_fn((d, d), |(i, j)| f64::from(u8::from(i == j)));
        let reps = 2500;
        let mut sum = vec![0.0; ps.len()];
        let mut sum2 = vec![0.0; ps.len()];
        let mut rng = ChaCha8Rng::seed_from_u64(2020);
        for _ in 0..reps {
            let x = gaussian(&mut rng, n, d);
            let y = Array1::from_shape_fn(n, |i| {
                let s: f64 = (0..d).map(|j| x[[i, j]] * beta[j]).sum();
                s + sigma * rng.sample::<f64, _>(StandardNormal)
            });
            let coef = fit(&fam, &x, &y, &eye, &grid);
            for (g, _) in ps.iter().enumerate() {
                let err: f64 = (0..d).map(|j| (beta[j] - coef[[g, j]]).powi(2)).sum();
                let loss = err + sigma * sigma;
                sum[g] += loss;
                sum2[g] += loss * loss;
            }
        }
        let r = reps as f64;
        for (g, &p) in ps.iter().enumerate() {
            let mean = sum[g] / r;
            let var = (sum2[g] - r * mean * mean) / (r - 1.0);
            let se = (var / r).sqrt();
            let want = closed_form(p, n, &beta, sigma);
            let z = (mean - want) / se;
            eprintln!("p = {p}: MC {mean:.4} ± {se:.4}, theorem {want:.4}, z = {z:.2}");
            assert!(z.abs() < 4.0, "p = {p}: MC {mean} ± {se}, theorem {want}");
        }
    }
}
