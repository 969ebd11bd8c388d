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

/// Fits minimum-norm least squares on the columns `0..p` of the column-major `n × width` design
/// `design` (with centring when `intercept`) and writes the predictions at the row-major
/// `m × width` evaluation design `eval_rows` into `out`. Shared with the random-features family.
pub(crate) fn fit_leading(
    design: &[f64],
    n: usize,
    p: usize,
    y: &[f64],
    eval_rows: &[f64],
    width: usize,
    intercept: bool,
    out: &mut [f64],
) {
    let mut a = design[..n * p].to_vec();
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
    fn name(&self) -> &'static str {
        "minnorm"
    }

    fn knob(&self) -> &'static str {
        "features"
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
            fit_leading(
                &design,
                n,
                p,
                &y,
                eval_rows,
                width,
                self.intercept,
                &mut pred,
            );
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
