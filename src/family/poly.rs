//! Polynomial least-squares family (`poly`, knob `degree`), fitted by the Householder QR of
//! [`super::linalg`].
//!
//! # Basis
//!
//! Each input is first mapped to `[-1, 1]` with the **training** minimum and maximum
//! (`u = 2 (x - min) / (max - min) - 1`; a constant training column maps to `u = 0`). Evaluation
//! points use the same map, so they may fall outside `[-1, 1]`.
//!
//! The basis is the tensor-product Legendre basis `P_{a_1}(u_1) ⋯ P_{a_p}(u_p)` over all exponent
//! vectors with total degree `a_1 + ⋯ + a_p ≤ d`. It spans exactly the same space as all monomials
//! of total degree at most `d` (intercept included), so the fitted values are those of ordinary
//! polynomial least squares; Legendre polynomials only make the design far better conditioned
//! than raw powers. With one input this is `1, u, …, u^d`. There are `C(p + d, d)` columns
//! ([`n_basis`]).
//!
//! # Input order
//!
//! Permuting the inputs permutes the basis columns within each degree block and so spans the same
//! space at every degree: the least-squares predictions are unchanged up to rounding (checked in
//! `tests/permutation.rs`). The one exception is a rank-deficient design, where *which* of several
//! dependent columns is dropped follows the column order; the fitted values at the training points
//! are the least-squares fit either way.
//!
//! # Path fit
//!
//! The columns are graded by total degree (all of degree 0, then all of degree 1, …), so the
//! design for degree `d` is the leading `C(p + d, d)` columns of the design for the largest degree
//! in the grid. One Householder QR of the largest design serves every degree: the fit at degree
//! `d` solves `R[:p_d, :p_d] β = (Qᵀy)[:p_d]`. The QR is left-looking (column `j` only ever sees
//! columns `< j`), so the predictions for a degree are bit-identical whether it is fitted alone or
//! as part of a longer grid.
//!
//! # Rank deficiency
//!
//! A column whose residual, after removing its projection on the earlier accepted columns, has
//! norm at most `1e-9` times its own norm is **dropped** (its coefficient is zero), instead of
//! failing the fit. This happens with repeated or discrete inputs (for example a two-valued input,
//! where `P_2(u) = 1` repeats the intercept, or a bootstrap sample with fewer distinct points than
//! coefficients). Fitted values at the training points are then still a least-squares fit; the
//! coefficients are the basic solution that keeps the earliest (lowest-degree) columns, not the
//! minimum-norm one.

use std::sync::Arc;

use super::linalg::HouseholderQr;
use super::{
    check_whole_grid, BuildContext, Family, FitError, FitInput, OptionError, Options, Out, Task,
};
use ndarray::ArrayView2;

/// Builds `family = "poly"` (no options).
pub fn build(_opts: &mut Options, _cx: &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError> {
    Ok(Arc::new(PolyFamily))
}

/// Largest polynomial degree accepted on the grid.
pub const MAX_DEGREE: usize = 20;

/// Relative tolerance below which a basis column is treated as a linear combination of the
/// earlier ones and dropped (see the module docs).
pub const DROP_RTOL: f64 = 1e-9;

/// Polynomial least squares in the training-scaled inputs; knob `degree` (total degree).
#[derive(Debug, Clone, Copy, Default)]
pub struct PolyFamily;

/// Number of basis columns (monomials of total degree at most `degree` in `n_inputs` variables,
/// intercept included), `C(n_inputs + degree, degree)`; `None` if it does not fit in `usize`.
pub fn n_basis(n_inputs: usize, degree: usize) -> Option<usize> {
    // C(p + i, i) = C(p + i - 1, i - 1) * (p + i) / i, exact at every step.
    let mut c: u128 = 1;
    for i in 1..=degree as u128 {
        c = c.checked_mul(n_inputs as u128 + i)? / i;
    }
    usize::try_from(c).ok()
}

impl Family for PolyFamily {
    fn name(&self) -> &'static str {
        "poly"
    }

    fn knob(&self) -> &'static str {
        "degree"
    }

    fn least_squares_coefficients(&self, value: f64, n_inputs: usize) -> Option<usize> {
        n_basis(n_inputs, value as usize)
    }

    fn check_grid(&self, grid: &[f64], n_train: usize, n_inputs: usize) -> Result<(), String> {
        check_whole_grid(grid, "degree", 0.0, MAX_DEGREE as f64)?;
        for &d in grid {
            let cols = n_basis(n_inputs, d as usize);
            if cols.map_or(true, |c| c > n_train) {
                let cols = cols.map_or_else(|| "too many".to_string(), |c| c.to_string());
                return Err(format!(
                    "degree = {d} needs {cols} polynomial coefficients with {n_inputs} input(s), \
                     more than the {n_train} training rows"
                ));
            }
        }
        Ok(())
    }

    fn supports(&self, task: Task) -> bool {
        matches!(task, Task::Regress)
    }

    /// The training and evaluation designs of the largest degree (one column per basis
    /// function) with the QR's working copy, and the triangular factor, on top of the default.
    /// Measured: 20 000 rows, 20 inputs, degree 2 peak at 153 MiB on 2 threads; the estimate is
    /// 200 MiB.
    fn work_bytes(&self, n: usize, p: usize, m: usize, grid: &[f64], _task: Task) -> f64 {
        // A degree beyond the largest allowed is refused by `check_grid`; capped here, since
        // the memory estimate can come first (`run --assess 1e300` counted 1e300 basis steps).
        let d = grid
            .iter()
            .fold(0.0_f64, |a, &b| a.max(b))
            .min(MAX_DEGREE as f64);
        let cols = n_basis(p, d as usize).unwrap_or(n).min(n.max(1)) as f64;
        8.0 * (2.0 * (n + m) as f64 * cols + cols * cols + 3.0 * n as f64 * p as f64)
    }

    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        out: Out<'_>,
    ) -> Result<(), FitError> {
        if !matches!(input.task, Task::Regress) {
            return Err(FitError("poly supports regression only".into()));
        }
        let mut out = out.values;
        let (n, p) = input.x.dim();
        let m = input.eval.nrows();
        check_shapes(input, grid.len(), out.dim())?;
        if n == 0 {
            return Err(FitError("poly: the training set is empty".into()));
        }
        let mut degrees = Vec::with_capacity(grid.len());
        for &g in grid {
            if !g.is_finite() || g.fract() != 0.0 || g < 0.0 || g > MAX_DEGREE as f64 {
                return Err(FitError(format!(
                    "poly: degree = {g} is not a whole number in 0..={MAX_DEGREE}"
                )));
            }
            degrees.push(g as usize);
        }
        let Some(&d_max) = degrees.iter().max() else {
            return Ok(());
        };
        let cols = match n_basis(p, d_max) {
            Some(c) if c <= n => c,
            _ => {
                return Err(FitError(format!(
                    "poly: degree = {d_max} needs more coefficients than the {n} training rows"
                )))
            }
        };

        let exps = graded_exponents(p, d_max);
        debug_assert_eq!(exps.len(), cols);
        let scaler = Scaler::from_training(input.x);
        let mut design = basis_matrix(input.x, &scaler, &exps, d_max);
        let eval_basis = basis_matrix(input.eval, &scaler, &exps, d_max);
        let mut qty: Vec<f64> = input.y.to_vec();
        let qr = HouseholderQr::factor(&mut design, n, cols, Some(DROP_RTOL));
        qr.apply_qt(&mut qty);

        let mut coef = Vec::with_capacity(cols);
        for (g, &d) in degrees.iter().enumerate() {
            let p_d = n_basis(p, d).unwrap_or(cols).min(cols);
            let used = qr.solve_leading(&design, &qty, p_d, &mut coef);
            let mut row = out.row_mut(g);
            for e in 0..m {
                let mut s = 0.0;
                for (&j, &b) in used.iter().zip(&coef) {
                    s += b * eval_basis[j * m + e];
                }
                if !s.is_finite() {
                    return Err(FitError(format!(
                        "poly: degree = {d} gave a non-finite prediction at evaluation point {e}"
                    )));
                }
                row[e] = s;
            }
        }
        Ok(())
    }
}

/// A polynomial least-squares fit of one degree, kept for predictions at any rows (a twin's
/// reference part, [`crate::dgp::reference`]): the same basis, scaling and dropping of
/// dependent columns as the family, so its predictions at a query are those the family gives
/// for that degree.
#[derive(Debug, Clone)]
pub struct PolyFit {
    degree: usize,
    scaler: Scaler,
    exps: Vec<Vec<u8>>,
    used: Vec<usize>,
    coef: Vec<f64>,
}

impl PolyFit {
    /// Fits total degree `degree` on rows `x` and responses `y` (finite; as many basis columns
    /// as rows at most).
    pub fn fit(x: ArrayView2<'_, f64>, y: &[f64], degree: usize) -> Result<PolyFit, String> {
        let (n, p) = x.dim();
        if degree > MAX_DEGREE {
            return Err(format!("degree = {degree} is above {MAX_DEGREE}"));
        }
        let cols = match n_basis(p, degree) {
            Some(c) if c <= n && y.len() == n => c,
            _ => {
                return Err(format!(
                    "degree = {degree} needs more coefficients than the {n} rows"
                ))
            }
        };
        let exps = graded_exponents(p, degree);
        let scaler = Scaler::from_training(x);
        let mut design = basis_matrix(x, &scaler, &exps, degree);
        let mut qty = y.to_vec();
        let qr = HouseholderQr::factor(&mut design, n, cols, Some(DROP_RTOL));
        qr.apply_qt(&mut qty);
        let mut coef = Vec::with_capacity(cols);
        let used = qr.solve_leading(&design, &qty, cols, &mut coef);
        if coef.iter().any(|c| !c.is_finite()) {
            return Err(format!("degree = {degree} gave a non-finite coefficient"));
        }
        Ok(PolyFit {
            degree,
            scaler,
            exps,
            used,
            coef,
        })
    }

    /// The fitted polynomial at every row of `x`.
    pub fn predict(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let m = x.nrows();
        let basis = basis_matrix(x, &self.scaler, &self.exps, self.degree);
        (0..m)
            .map(|e| {
                self.used
                    .iter()
                    .zip(&self.coef)
                    .map(|(&j, &b)| b * basis[j * m + e])
                    .sum()
            })
            .collect()
    }
}

/// The family's polynomial basis of total degree `degree`, scaled on the rows it was built
/// from (each input mapped to [-1, 1] by its range there; tensor-product Legendre
/// polynomials), for fits other than least squares: the logistic-polynomial reference of
/// classification twins ([`crate::dgp::reference::classes`]). Column 0 is the constant.
#[derive(Debug, Clone)]
pub struct Basis {
    degree: usize,
    scaler: Scaler,
    exps: Vec<Vec<u8>>,
}

impl Basis {
    /// The basis of total degree `degree` (at most [`MAX_DEGREE`]) scaled on rows `x`.
    pub fn on(x: ArrayView2<'_, f64>, degree: usize) -> Basis {
        let degree = degree.min(MAX_DEGREE);
        Basis {
            degree,
            scaler: Scaler::from_training(x),
            exps: graded_exponents(x.ncols(), degree),
        }
    }

    /// Number of basis columns (the constant included).
    pub fn len(&self) -> usize {
        self.exps.len()
    }

    /// Whether the basis has no column (never: the constant is always there).
    pub fn is_empty(&self) -> bool {
        self.exps.is_empty()
    }

    /// The basis at every row of `x`, column-major (`rows × len`).
    pub fn matrix(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        basis_matrix(x, &self.scaler, &self.exps, self.degree)
    }
}

/// Out-of-fold predictions of polynomial least squares at every degree of `degrees`
/// (ascending), one path fit per fold (`fold[i]` in `0..folds`): `out[g][i]` is row i's
/// prediction by degree `degrees[g]` fitted on the other folds. A degree with more basis
/// columns than some fold's training rows is left out (`None`).
pub fn out_of_fold(
    x: ArrayView2<'_, f64>,
    y: &[f64],
    fold: &[usize],
    folds: usize,
    degrees: &[usize],
) -> Vec<Option<Vec<f64>>> {
    let (n, p) = x.dim();
    let smallest = crate::rng::smallest_training_fold(fold, folds);
    let ok: Vec<usize> = degrees
        .iter()
        .copied()
        .filter(|&d| n_basis(p, d).is_some_and(|c| c <= smallest))
        .collect();
    let mut out: Vec<Option<Vec<f64>>> = degrees
        .iter()
        .map(|d| ok.contains(d).then(|| vec![0.0; n]))
        .collect();
    if ok.is_empty() {
        return out;
    }
    let grid: Vec<f64> = ok.iter().map(|&d| d as f64).collect();
    for f in 0..folds {
        let train: Vec<usize> = (0..n).filter(|&i| fold[i] != f).collect();
        let held: Vec<usize> = (0..n).filter(|&i| fold[i] == f).collect();
        if held.is_empty() {
            continue;
        }
        let xt = x.select(ndarray::Axis(0), &train);
        let yt = ndarray::Array1::from_iter(train.iter().map(|&i| y[i]));
        let xe = x.select(ndarray::Axis(0), &held);
        let mut pred = ndarray::Array2::zeros((grid.len(), held.len()));
        let input = FitInput {
            x: xt.view(),
            y: yt.view(),
            eval: xe.view(),
            task: Task::Regress,
            seed: crate::rng::FitSeed::fixed(0),
        };
        if PolyFamily
            .fit_predict(&input, &grid, Out::values(pred.view_mut()))
            .is_err()
        {
            for (g, d) in degrees.iter().enumerate() {
                if ok.contains(d) {
                    out[g] = None;
                }
            }
            return out;
        }
        let mut row = 0;
        for (g, d) in degrees.iter().enumerate() {
            if let (true, Some(o)) = (ok.contains(d), out[g].as_mut()) {
                for (e, &i) in held.iter().enumerate() {
                    o[i] = pred[[row, e]];
                }
                row += 1;
            }
        }
    }
    out
}

/// Checks the shapes shared by the linear families; also rejects non-finite data, naming the
/// row and column.
pub fn check_shapes(
    input: &FitInput<'_>,
    grid_len: usize,
    out_dim: (usize, usize),
) -> Result<(), FitError> {
    let (n, p) = input.x.dim();
    if input.y.len() != n {
        return Err(FitError(format!(
            "training inputs have {n} rows but the response has {} values",
            input.y.len()
        )));
    }
    if input.eval.ncols() != p {
        return Err(FitError(format!(
            "training inputs have {p} columns but evaluation inputs have {}",
            input.eval.ncols()
        )));
    }
    if out_dim != (grid_len, input.eval.nrows()) {
        return Err(FitError(format!(
            "output has shape {out_dim:?}, expected ({grid_len}, {})",
            input.eval.nrows()
        )));
    }
    let all_finite = input.x.iter().all(|v| v.is_finite())
        && input.y.iter().all(|v| v.is_finite())
        && input.eval.iter().all(|v| v.is_finite());
    if all_finite {
        return Ok(());
    }
    if let Some(((i, j), v)) = input.x.indexed_iter().find(|(_, v)| !v.is_finite()) {
        return Err(FitError(format!(
            "training input {v} at row {i}, column {j} is not a finite number"
        )));
    }
    if let Some((i, v)) = input.y.iter().enumerate().find(|(_, v)| !v.is_finite()) {
        return Err(FitError(format!(
            "training response {v} at row {i} is not a finite number"
        )));
    }
    if let Some(((i, j), v)) = input.eval.indexed_iter().find(|(_, v)| !v.is_finite()) {
        return Err(FitError(format!(
            "evaluation input {v} at row {i}, column {j} is not a finite number"
        )));
    }
    Ok(())
}

/// Affine map of each input to `[-1, 1]` from its training range.
#[derive(Debug, Clone)]
struct Scaler {
    /// `(offset, factor)`: `u = (x - offset) * factor - 1`; factor 0 for a constant column
    /// (then `u` is forced to 0).
    maps: Vec<(f64, f64)>,
}

impl Scaler {
    fn from_training(x: ArrayView2<'_, f64>) -> Self {
        let maps = x
            .columns()
            .into_iter()
            .map(|c| {
                let lo = c.iter().copied().fold(f64::INFINITY, f64::min);
                let hi = c.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                let range = hi - lo;
                if range > 0.0 && range.is_finite() {
                    (lo, 2.0 / range)
                } else {
                    (lo, 0.0)
                }
            })
            .collect();
        Scaler { maps }
    }

    fn scale(&self, j: usize, v: f64) -> f64 {
        let (lo, f) = self.maps[j];
        if f == 0.0 {
            0.0
        } else {
            (v - lo) * f - 1.0
        }
    }
}

/// All exponent vectors of length `p` with total degree `<= d`, graded by total degree; within a
/// degree, lexicographically descending (`x1^2, x1 x2, x2^2`).
fn graded_exponents(p: usize, d: usize) -> Vec<Vec<u8>> {
    fn rec(p: usize, left: usize, cur: &mut Vec<u8>, out: &mut Vec<Vec<u8>>) {
        if cur.len() + 1 == p {
            cur.push(left as u8);
            out.push(cur.clone());
            cur.pop();
            return;
        }
        for a in (0..=left).rev() {
            cur.push(a as u8);
            rec(p, left - a, cur, out);
            cur.pop();
        }
    }
    let mut out = Vec::new();
    if p == 0 {
        out.push(Vec::new());
        return out;
    }
    let mut cur = Vec::with_capacity(p);
    for t in 0..=d {
        rec(p, t, &mut cur, &mut out);
    }
    out
}

/// Column-major `rows × exps.len()` matrix of tensor-product Legendre values at the scaled rows.
fn basis_matrix(x: ArrayView2<'_, f64>, scaler: &Scaler, exps: &[Vec<u8>], d: usize) -> Vec<f64> {
    let (rows, p) = x.dim();
    let k = d + 1;
    // leg[(i * p + j) * k + a] = P_a(u_ij)
    let mut leg = vec![0.0; rows * p * k];
    for i in 0..rows {
        for j in 0..p {
            let u = scaler.scale(j, x[[i, j]]);
            let base = (i * p + j) * k;
            leg[base] = 1.0;
            if d >= 1 {
                leg[base + 1] = u;
            }
            // Bonnet's recursion: (a + 1) P_{a+1} = (2a + 1) u P_a - a P_{a-1}.
            for a in 1..d {
                let af = a as f64;
                leg[base + a + 1] =
                    ((2.0 * af + 1.0) * u * leg[base + a] - af * leg[base + a - 1]) / (af + 1.0);
            }
        }
    }
    let mut m = vec![0.0; rows * exps.len()];
    for (c, e) in exps.iter().enumerate() {
        let col = &mut m[c * rows..(c + 1) * rows];
        for (i, v) in col.iter_mut().enumerate() {
            let mut prod = 1.0;
            for (j, &a) in e.iter().enumerate() {
                if a > 0 {
                    prod *= leg[(i * p + j) * k + a as usize];
                }
            }
            *v = prod;
        }
    }
    m
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::family::linalg::jacobi_svd;
    use ndarray::{array, Array1, Array2};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn fit(x: &Array2<f64>, y: &Array1<f64>, eval: &Array2<f64>, grid: &[f64]) -> Array2<f64> {
        let mut out = Array2::zeros((grid.len(), eval.nrows()));
        let input = FitInput {
            x: x.view(),
            y: y.view(),
            eval: eval.view(),
            task: Task::Regress,
            seed: crate::rng::FitSeed::fixed(0),
        };
        PolyFamily
            .fit_predict(&input, grid, crate::family::Out::values(out.view_mut()))
            .expect("fit");
        out
    }

    fn uniform(rng: &mut ChaCha8Rng, n: usize, p: usize, lo: f64, hi: f64) -> Array2<f64> {
        Array2::from_shape_fn((n, p), |_| rng.gen_range(lo..hi))
    }

    fn cubic(x: f64) -> f64 {
        1.0 - 2.0 * x + 3.0 * x * x - 0.5 * x * x * x
    }

    #[test]
    fn a_kept_fit_predicts_what_the_family_predicts() {
        // `PolyFit` (a twin's reference part) against the family's own path fit, degree by
        // degree, on 3 inputs with a dependent column (x3 = 2 x1 - 1, dropped alike), bit for
        // bit; and the out-of-fold predictions equal fits on the other folds.
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let mut x = uniform(&mut rng, 60, 3, -2.0, 3.0);
        for i in 0..60 {
            x[[i, 2]] = 2.0 * x[[i, 0]] - 1.0;
        }
        let y = Array1::from_shape_fn(60, |i| cubic(x[[i, 0]]) * x[[i, 1]] + rng.gen::<f64>());
        let eval = uniform(&mut rng, 9, 3, -2.0, 3.0);
        let grid = [0.0, 1.0, 2.0, 3.0];
        let fam = fit(&x, &y, &eval, &grid);
        for (g, d) in grid.iter().enumerate() {
            let kept = PolyFit::fit(x.view(), y.as_slice().unwrap(), *d as usize).unwrap();
            let p = kept.predict(eval.view());
            for e in 0..9 {
                assert_eq!(
                    p[e].to_bits(),
                    fam[[g, e]].to_bits(),
                    "degree {d}, point {e}"
                );
            }
        }
        let fold: Vec<usize> = (0..60).map(|i| i % 4).collect();
        let oof = out_of_fold(x.view(), y.as_slice().unwrap(), &fold, 4, &[2, 9]);
        assert!(oof[1].is_none(), "degree 9 has more columns than 45 rows");
        let o2 = oof[0].as_ref().unwrap();
        let train: Vec<usize> = (0..60).filter(|i| i % 4 != 1).collect();
        let xt = x.select(ndarray::Axis(0), &train);
        let yt: Vec<f64> = train.iter().map(|&i| y[i]).collect();
        let held = x.select(ndarray::Axis(0), &[1, 5]);
        let p = PolyFit::fit(xt.view(), &yt, 2)
            .unwrap()
            .predict(held.view());
        assert_eq!(p[0].to_bits(), o2[1].to_bits());
        assert_eq!(p[1].to_bits(), o2[5].to_bits());
        assert!(PolyFit::fit(x.view(), y.as_slice().unwrap(), 21).is_err());
    }

    #[test]
    fn basis_sizes_and_order() {
        assert_eq!(n_basis(1, 3), Some(4));
        assert_eq!(n_basis(2, 2), Some(6));
        assert_eq!(n_basis(3, 0), Some(1));
        assert_eq!(n_basis(10, 3), Some(286));
        let e = graded_exponents(2, 2);
        let want: Vec<Vec<u8>> = vec![
            vec![0, 0],
            vec![1, 0],
            vec![0, 1],
            vec![2, 0],
            vec![1, 1],
            vec![0, 2],
        ];
        assert_eq!(e, want);
        assert_eq!(graded_exponents(4, 3).len(), n_basis(4, 3).unwrap());
    }

    #[test]
    fn check_grid_rejects_bad_degrees() {
        let f = PolyFamily;
        assert!(f.check_grid(&[0.0, 1.0, 5.0], 10, 1).is_ok());
        assert!(f.check_grid(&[1.5], 10, 1).is_err());
        assert!(f.check_grid(&[21.0], 100, 1).is_err());
        assert!(f.check_grid(&[-1.0], 100, 1).is_err());
        // degree 3 with 2 inputs needs C(5,3) = 10 columns.
        assert!(f.check_grid(&[3.0], 10, 2).is_ok());
        let msg = f.check_grid(&[3.0], 9, 2).unwrap_err();
        assert!(msg.contains("degree = 3"), "{msg}");
        assert!(!f.supports(Task::Classify { classes: 2 }));
        assert!(f.supports(Task::Regress));
    }

    #[test]
    fn recovers_noiseless_cubic() {
        // Exact identity: a cubic is reproduced exactly by a degree-3 least-squares fit.
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let x = uniform(&mut rng, 30, 1, -2.0, 3.0);
        let y = x.column(0).mapv(cubic);
        let eval = array![[-2.5], [-1.0], [0.0], [0.37], [2.9], [3.5]];
        let out = fit(&x, &y, &eval, &[3.0]);
        for (e, &xe) in eval.column(0).iter().enumerate() {
            assert!((out[[0, e]] - cubic(xe)).abs() < 1e-9, "at {xe}");
        }
    }

    #[test]
    fn high_degree_stays_accurate() {
        // Exact identity: a degree-10 polynomial is reproduced by the degree-12 fit.
        let q = |x: f64| {
            (0..=10)
                .map(|k| x.powi(k) * (1.0 - 0.15 * k as f64))
                .sum::<f64>()
        };
        let x = Array2::from_shape_fn((40, 1), |(i, _)| 3.0 + 0.05 * i as f64);
        let y = x.column(0).mapv(q);
        let eval = array![[3.01], [4.0], [4.93]];
        let out = fit(&x, &y, &eval, &[10.0, 12.0]);
        for (e, &xe) in eval.column(0).iter().enumerate() {
            let rel = |v: f64| (v - q(xe)).abs() / q(xe).abs();
            assert!(
                rel(out[[0, e]]) < 1e-9 && rel(out[[1, e]]) < 1e-9,
                "at {xe}"
            );
        }
    }

    #[test]
    fn degree_one_is_the_least_squares_line() {
        // Closed form simple regression: slope = Sxy / Sxx, intercept = ȳ - slope x̄.
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        let x = uniform(&mut rng, 25, 1, -2.0, 3.0);
        let y = x.column(0).mapv(cubic);
        let xm = x.column(0).mean().unwrap();
        let ym = y.mean().unwrap();
        let sxy: f64 = x
            .column(0)
            .iter()
            .zip(&y)
            .map(|(a, b)| (a - xm) * (b - ym))
            .sum();
        let sxx: f64 = x.column(0).iter().map(|a| (a - xm) * (a - xm)).sum();
        let slope = sxy / sxx;
        let icpt = ym - slope * xm;
        let eval = array![[-3.0], [0.0], [1.25], [4.0]];
        let out = fit(&x, &y, &eval, &[0.0, 1.0]);
        for (e, &xe) in eval.column(0).iter().enumerate() {
            assert!((out[[1, e]] - (icpt + slope * xe)).abs() < 1e-10);
            // degree 0 is the training mean (exact identity).
            assert!((out[[0, e]] - ym).abs() < 1e-12);
        }
    }

    #[test]
    fn recovers_two_input_quadratic_surface() {
        // Exact identity: a total-degree-2 surface lies in the degree-2 basis.
        let f = |a: f64, b: f64| 0.5 + a - 2.0 * b + 0.75 * a * a - 1.5 * a * b + 2.0 * b * b;
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let x = uniform(&mut rng, 40, 2, -1.0, 4.0);
        let y: Array1<f64> = x.rows().into_iter().map(|r| f(r[0], r[1])).collect();
        let eval = uniform(&mut rng, 12, 2, -2.0, 5.0);
        let out = fit(&x, &y, &eval, &[1.0, 2.0, 3.0]);
        for (e, r) in eval.rows().into_iter().enumerate() {
            assert!((out[[1, e]] - f(r[0], r[1])).abs() < 1e-9);
            assert!((out[[2, e]] - f(r[0], r[1])).abs() < 1e-9);
        }
    }

    #[test]
    fn path_equals_single_degree_fits() {
        let mut rng = ChaCha8Rng::seed_from_u64(10);
        let x = uniform(&mut rng, 60, 2, 0.0, 10.0);
        let y: Array1<f64> = x
            .rows()
            .into_iter()
            .map(|r| (r[0] * 0.7).sin() + r[1].sqrt() + rng.gen_range(-0.3..0.3))
            .collect();
        let eval = uniform(&mut rng, 15, 2, 0.0, 10.0);
        let grid = [0.0, 1.0, 2.0, 4.0, 6.0];
        let path = fit(&x, &y, &eval, &grid);
        for (g, &d) in grid.iter().enumerate() {
            let single = fit(&x, &y, &eval, &[d]);
            assert_eq!(path.row(g), single.row(0), "degree {d}");
        }
    }

    #[test]
    fn matches_linfa_linear_on_hand_built_quadratic_design() {
        // Reference library: linfa-linear 0.8 `LinearRegression` (least squares with intercept)
        // on the raw degree-2 design [x1, x2, x1², x1 x2, x2²].
        use linfa::prelude::*;
        use linfa_linear::LinearRegression;
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let x = uniform(&mut rng, 50, 2, -1.0, 2.0);
        let y: Array1<f64> = x
            .rows()
            .into_iter()
            .map(|r| (r[0] * r[1]).cos() + r[0].powi(3) + rng.gen_range(-0.2..0.2))
            .collect();
        let eval = uniform(&mut rng, 10, 2, -1.0, 2.0);
        let quad = |a: &Array2<f64>| {
            Array2::from_shape_fn((a.nrows(), 5), |(i, c)| {
                let (u, v) = (a[[i, 0]], a[[i, 1]]);
                [u, v, u * u, u * v, v * v][c]
            })
        };
        let model = LinearRegression::new()
            .fit(&Dataset::new(quad(&x), y.clone()))
            .expect("linfa fit");
        let want = model.predict(&quad(&eval));
        let out = fit(&x, &y, &eval, &[2.0]);
        for e in 0..eval.nrows() {
            assert!(
                (out[[0, e]] - want[e]).abs() < 1e-8,
                "{} vs {}",
                out[[0, e]],
                want[e]
            );
        }
    }

    #[test]
    fn rank_deficiency_drops_columns_instead_of_failing() {
        // Two-valued second input: u2² repeats the intercept, so degree 2 is rank deficient.
        let mut rng = ChaCha8Rng::seed_from_u64(12);
        let x = Array2::from_shape_fn((30, 2), |(_, j)| {
            if j == 0 {
                rng.gen_range(0.0..1.0)
            } else {
                f64::from(rng.gen_range(0..2u8))
            }
        });
        let f = |a: f64, b: f64| 1.0 + 2.0 * a + 3.0 * b - a * a + a * b;
        let y: Array1<f64> = x.rows().into_iter().map(|r| f(r[0], r[1])).collect();
        let eval = array![[0.1, 0.0], [0.5, 1.0], [0.9, 1.0]];
        let out = fit(&x, &y, &eval, &[2.0]);
        for (e, r) in eval.rows().into_iter().enumerate() {
            // Exact identity: the truth lies in the span of the kept columns.
            assert!((out[[0, e]] - f(r[0], r[1])).abs() < 1e-9);
        }
        // A constant input and repeated points: degree 3 on 4 distinct x values of 12 rows.
        let x = Array2::from_shape_fn((12, 2), |(i, j)| if j == 0 { (i % 4) as f64 } else { 5.0 });
        let y: Array1<f64> = x.column(0).mapv(cubic);
        let out = fit(&x, &y, &x, &[3.0]);
        for i in 0..12 {
            assert!((out[[0, i]] - y[i]).abs() < 1e-9);
        }
    }

    #[test]
    fn bad_inputs_are_errors_not_panics() {
        let x = array![[0.0], [1.0], [2.0]];
        let y = array![1.0, 2.0, f64::NAN];
        let mut out = Array2::zeros((1, 3));
        let input = FitInput {
            x: x.view(),
            y: y.view(),
            eval: x.view(),
            task: Task::Regress,
            seed: crate::rng::FitSeed::fixed(0),
        };
        assert!(PolyFamily
            .fit_predict(&input, &[1.0], crate::family::Out::values(out.view_mut()))
            .is_err());
        let y = array![1.0, 2.0, 3.0];
        let input = FitInput {
            y: y.view(),
            ..input
        };
        assert!(PolyFamily
            .fit_predict(&input, &[3.0], crate::family::Out::values(out.view_mut()))
            .is_err());
        assert!(PolyFamily
            .fit_predict(&input, &[0.5], crate::family::Out::values(out.view_mut()))
            .is_err());
        let classify = FitInput {
            task: Task::Classify { classes: 2 },
            ..input
        };
        assert!(PolyFamily
            .fit_predict(
                &classify,
                &[1.0],
                crate::family::Out::values(out.view_mut())
            )
            .is_err());
        assert!(PolyFamily
            .fit_predict(
                &input,
                &[1.0, 2.0],
                crate::family::Out::values(out.view_mut())
            )
            .is_err());
    }

    #[test]
    fn jacobi_svd_reconstructs() {
        // Exact identity: A = W Vᵀ with VᵀV = I and orthogonal columns of W.
        let mut rng = ChaCha8Rng::seed_from_u64(13);
        let (r, c) = (7, 4);
        let a: Vec<f64> = (0..r * c).map(|_| rng.gen_range(-1.0..1.0)).collect();
        let mut w = a.clone();
        let v = jacobi_svd(&mut w, r, c);
        for i in 0..r {
            for j in 0..c {
                let s: f64 = (0..c).map(|k| w[k * r + i] * v[k * c + j]).sum();
                assert!((s - a[j * r + i]).abs() < 1e-12);
            }
        }
        for i in 0..c {
            for j in (i + 1)..c {
                let d: f64 = (0..r).map(|k| w[i * r + k] * w[j * r + k]).sum();
                assert!(d.abs() < 1e-12);
            }
        }
    }
}
