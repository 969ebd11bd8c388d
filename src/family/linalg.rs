//! Small dense linear algebra shared by the linear families (pure Rust, no BLAS/LAPACK):
//! a left-looking Householder QR with optional dropping of dependent columns (poly; minnorm and
//! ridge without dropping), a one-sided Jacobi SVD (ridge, minnorm), and a Cholesky solve of a
//! small symmetric positive definite system ([`solve_spd`]: the twin's local-linear reference and
//! the plane noise estimator).

/// Solves the symmetric positive definite `k × k` system `a w = b` (row-major `a`) by Cholesky;
/// `None` when a squared pivot is at or below `min_pivot` (0: not positive) or NaN. Shared by
/// the local-linear reference and the plane noise estimator.
pub fn solve_spd(a: &[f64], b: &[f64], k: usize, min_pivot: f64) -> Option<Vec<f64>> {
    let mut l = vec![0.0; k * k];
    for i in 0..k {
        for j in 0..=i {
            let mut s = a[i * k + j];
            for m in 0..j {
                s -= l[i * k + m] * l[j * k + m];
            }
            if i == j {
                if s.is_nan() || s <= min_pivot {
                    return None;
                }
                l[i * k + i] = s.sqrt();
            } else {
                l[i * k + j] = s / l[j * k + j];
            }
        }
    }
    let mut z = vec![0.0; k];
    for i in 0..k {
        let mut s = b[i];
        for m in 0..i {
            s -= l[i * k + m] * z[m];
        }
        z[i] = s / l[i * k + i];
    }
    let mut w = vec![0.0; k];
    for i in (0..k).rev() {
        let mut s = z[i];
        for m in i + 1..k {
            s -= l[m * k + i] * w[m];
        }
        w[i] = s / l[i * k + i];
    }
    Some(w)
}

/// Left-looking Householder QR of a column-major `rows × cols` matrix, optionally dropping
/// (numerically) dependent columns.
///
/// After [`HouseholderQr::factor`], column `j` of the matrix holds the `R` entries of that column
/// in rows `0..=pos[j]` (or `0..rank_before_j` for a dropped column); entries below are scratch.
#[derive(Debug, Clone)]
pub struct HouseholderQr {
    rows: usize,
    /// Reflector `k` acts on rows `k..rows`: `H = I - beta v vᵀ`, `v` stored with length `rows - k`.
    refl: Vec<(Vec<f64>, f64)>,
    /// Row of `R` that column `j` is pivotal for, or `None` if the column was dropped.
    pub pos: Vec<Option<usize>>,
}

impl HouseholderQr {
    /// Factors `a` (column-major, `rows × cols`) in place.
    ///
    /// With `drop_rtol = Some(t)`, a column whose residual norm is `<= t ×` its original norm is
    /// dropped; with `None` every column gets a reflector while rows remain (an exactly zero
    /// residual gives the identity reflector and a zero diagonal). Columns beyond `rows` are
    /// always dropped.
    pub fn factor(a: &mut [f64], rows: usize, cols: usize, drop_rtol: Option<f64>) -> Self {
        debug_assert_eq!(a.len(), rows * cols);
        let mut refl: Vec<(Vec<f64>, f64)> = Vec::with_capacity(cols.min(rows));
        let mut pos = Vec::with_capacity(cols);
        for j in 0..cols {
            let col = &mut a[j * rows..(j + 1) * rows];
            let orig = norm(col);
            for (k, (v, beta)) in refl.iter().enumerate() {
                reflect(v, *beta, &mut col[k..]);
            }
            let k = refl.len();
            if k >= rows {
                pos.push(None);
                continue;
            }
            let tail = &mut col[k..];
            let r = norm(tail);
            if let Some(t) = drop_rtol {
                if r <= t * orig {
                    pos.push(None);
                    continue;
                }
            }
            let alpha = if tail[0] >= 0.0 { -r } else { r };
            let mut v = tail.to_vec();
            v[0] -= alpha;
            let vtv: f64 = v.iter().map(|z| z * z).sum();
            let beta = if vtv > 0.0 { 2.0 / vtv } else { 0.0 };
            tail[0] = if vtv > 0.0 { alpha } else { 0.0 };
            for z in tail[1..].iter_mut() {
                *z = 0.0;
            }
            refl.push((v, beta));
            pos.push(Some(k));
        }
        HouseholderQr { rows, refl, pos }
    }

    /// Number of reflectors (the numerical rank when dropping is enabled).
    pub fn rank(&self) -> usize {
        self.refl.len()
    }

    /// Replaces `y` (length `rows`) by `Qᵀ y`.
    pub fn apply_qt(&self, y: &mut [f64]) {
        debug_assert_eq!(y.len(), self.rows);
        for (k, (v, beta)) in self.refl.iter().enumerate() {
            reflect(v, *beta, &mut y[k..]);
        }
    }

    /// Replaces `z` (length `rows`) by `Q z` (the reflectors applied in reverse order).
    pub fn apply_q(&self, z: &mut [f64]) {
        debug_assert_eq!(z.len(), self.rows);
        for (k, (v, beta)) in self.refl.iter().enumerate().rev() {
            reflect(v, *beta, &mut z[k..]);
        }
    }

    /// Solves the triangular system of the accepted columns among the leading `lead` columns of
    /// the factored matrix `a` against `qty = Qᵀy`. Writes the coefficients into `coef` and returns
    /// the indices of the columns they belong to (dropped columns have coefficient zero).
    pub fn solve_leading(
        &self,
        a: &[f64],
        qty: &[f64],
        lead: usize,
        coef: &mut Vec<f64>,
    ) -> Vec<usize> {
        let used: Vec<usize> = (0..lead.min(self.pos.len()))
            .filter(|&j| self.pos[j].is_some())
            .collect();
        let r = used.len();
        coef.clear();
        coef.resize(r, 0.0);
        // Accepted column used[b] is pivotal for row b of R.
        for b in (0..r).rev() {
            let mut s = qty[b];
            for c in (b + 1)..r {
                s -= a[used[c] * self.rows + b] * coef[c];
            }
            let diag = a[used[b] * self.rows + b];
            coef[b] = if diag != 0.0 { s / diag } else { 0.0 };
        }
        used
    }
}

/// Euclidean norm (plain sum of squares; callers keep values moderate).
pub fn norm(v: &[f64]) -> f64 {
    v.iter().map(|z| z * z).sum::<f64>().sqrt()
}

/// Applies `I - beta v vᵀ` to `x` (same length as `v`).
fn reflect(v: &[f64], beta: f64, x: &mut [f64]) {
    if beta == 0.0 {
        return;
    }
    let dot: f64 = v.iter().zip(x.iter()).map(|(a, b)| a * b).sum();
    let f = beta * dot;
    for (xi, vi) in x.iter_mut().zip(v) {
        *xi -= f * vi;
    }
}

/// One-sided (Hestenes) Jacobi SVD of a column-major `rows × cols` matrix `w`, in place.
///
/// On return `w = A V` has mutually orthogonal columns (`‖w_j‖` are the singular values, not
/// sorted) and `v` (column-major `cols × cols`) is orthogonal, so `A = W Vᵀ`.
pub fn jacobi_svd(w: &mut [f64], rows: usize, cols: usize) -> Vec<f64> {
    let mut v = vec![0.0; cols * cols];
    for j in 0..cols {
        v[j * cols + j] = 1.0;
    }
    let tol = f64::EPSILON * (rows.max(1) as f64);
    for _sweep in 0..80 {
        let mut rotated = false;
        for i in 0..cols {
            for j in (i + 1)..cols {
                let (ci, cj) = two_cols(w, rows, i, j);
                let alpha: f64 = ci.iter().map(|z| z * z).sum();
                let beta: f64 = cj.iter().map(|z| z * z).sum();
                let gamma: f64 = ci.iter().zip(cj.iter()).map(|(a, b)| a * b).sum();
                if alpha == 0.0 || beta == 0.0 || gamma.abs() <= tol * (alpha * beta).sqrt() {
                    continue;
                }
                rotated = true;
                let zeta = (beta - alpha) / (2.0 * gamma);
                let t = if zeta.abs() > 1e150 {
                    0.5 / zeta
                } else {
                    zeta.signum() / (zeta.abs() + (1.0 + zeta * zeta).sqrt())
                };
                let c = 1.0 / (1.0 + t * t).sqrt();
                let s = c * t;
                rotate(ci, cj, c, s);
                let (vi, vj) = two_cols(&mut v, cols, i, j);
                rotate(vi, vj, c, s);
            }
        }
        if !rotated {
            break;
        }
    }
    v
}

/// Mutable views of columns `i < j` of a column-major matrix with `rows` rows.
fn two_cols(a: &mut [f64], rows: usize, i: usize, j: usize) -> (&mut [f64], &mut [f64]) {
    let (left, right) = a.split_at_mut(j * rows);
    (&mut left[i * rows..(i + 1) * rows], &mut right[..rows])
}

/// `(x, y) <- (c x - s y, s x + c y)`.
fn rotate(x: &mut [f64], y: &mut [f64], c: f64, s: f64) {
    for (a, b) in x.iter_mut().zip(y.iter_mut()) {
        let (p, q) = (*a, *b);
        *a = c * p - s * q;
        *b = s * p + c * q;
    }
}
