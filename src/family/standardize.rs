//! The one standardizer: per input column, the training mean and population standard deviation
//! (divisor n), used by every family and estimator that standardizes (k-NN distances, ridge and
//! logistic penalties, a twin's reference, the noise estimators).
//!
//! Conventions (one for all users):
//! - mean and variance are summed left to right in row order;
//! - a column is **constant** when its standard deviation is not above `1e-12 ×` its largest
//!   absolute value (this includes exactly equal values); a constant column standardizes to 0
//!   everywhere, training and evaluation rows alike, so it never affects a distance or a fit;
//! - [`Standardizer::z`] divides by the standard deviation; [`Standardizer::z_mul`] multiplies by
//!   its reciprocal (the linear families use this form; the two differ only in the last bit).

use ndarray::{Array2, ArrayView2};

/// Relative size below which a column's standard deviation counts as zero.
pub const CONSTANT_RTOL: f64 = 1e-12;

/// Training mean and population standard deviation per input column.
#[derive(Debug, Clone, PartialEq)]
pub struct Standardizer {
    /// Mean per column.
    pub mean: Vec<f64>,
    /// Population standard deviation per column (1 for a constant column).
    pub sd: Vec<f64>,
    /// `1 / sd`, or 0 for a constant column.
    pub inv_sd: Vec<f64>,
    /// Whether each column is constant (see the module docs).
    pub constant: Vec<bool>,
}

impl Standardizer {
    /// Statistics of the columns of `x` (`n × p`, `n ≥ 1`).
    pub fn fit(x: ArrayView2<'_, f64>) -> Standardizer {
        let n = x.nrows() as f64;
        let p = x.ncols();
        let mut s = Standardizer {
            mean: Vec::with_capacity(p),
            sd: Vec::with_capacity(p),
            inv_sd: Vec::with_capacity(p),
            constant: Vec::with_capacity(p),
        };
        for c in x.columns() {
            let mu = c.iter().sum::<f64>() / n;
            let var = c.iter().map(|v| (v - mu) * (v - mu)).sum::<f64>() / n;
            let sd = var.sqrt();
            let big = c.iter().fold(0.0_f64, |a, v| a.max(v.abs()));
            let constant = !(sd > CONSTANT_RTOL * big && sd > 0.0 && sd.is_finite());
            s.mean.push(mu);
            s.sd.push(if constant { 1.0 } else { sd });
            s.inv_sd.push(if constant { 0.0 } else { 1.0 / sd });
            s.constant.push(constant);
        }
        s
    }

    /// An identity standardizer for `p` columns (mean 0, sd 1, nothing constant): used when
    /// standardization is switched off.
    pub fn identity(p: usize) -> Standardizer {
        Standardizer {
            mean: vec![0.0; p],
            sd: vec![1.0; p],
            inv_sd: vec![1.0; p],
            constant: vec![false; p],
        }
    }

    /// The same statistics with input j's standardized value multiplied by `w[j]`: `sd_j / w_j`
    /// as the divisor, and a column with `w[j] = 0` treated as constant (it drops out of every
    /// distance). Used by a twin's reference whose neighbour distances weight the inputs
    /// ([`crate::dgp::reference::Choice::metric`]). `w` must be finite and non-negative, one per
    /// column.
    pub fn weighted(&self, w: &[f64]) -> Standardizer {
        assert_eq!(w.len(), self.len(), "one weight per column");
        let mut s = self.clone();
        for (j, &wj) in w.iter().enumerate() {
            if s.constant[j] {
                continue;
            }
            let sd = s.sd[j] / wj;
            if wj > 0.0 && sd.is_finite() && sd > 0.0 {
                s.sd[j] = sd;
                s.inv_sd[j] = 1.0 / sd;
            } else {
                s.sd[j] = 1.0;
                s.inv_sd[j] = 0.0;
                s.constant[j] = true;
            }
        }
        s
    }

    /// Number of columns.
    pub fn len(&self) -> usize {
        self.mean.len()
    }

    /// `true` for zero columns.
    pub fn is_empty(&self) -> bool {
        self.mean.is_empty()
    }

    /// `(v − mean_j) / sd_j`, or 0 for a constant column.
    #[inline]
    pub fn z(&self, j: usize, v: f64) -> f64 {
        if self.constant[j] {
            0.0
        } else {
            (v - self.mean[j]) / self.sd[j]
        }
    }

    /// `(v − mean_j) × (1 / sd_j)`, or 0 for a constant column.
    #[inline(always)]
    pub fn z_mul(&self, j: usize, v: f64) -> f64 {
        (v - self.mean[j]) * self.inv_sd[j]
    }

    /// Standardized copy of `x` (row-major, same shape), by [`Standardizer::z`].
    pub fn apply(&self, x: ArrayView2<'_, f64>) -> Array2<f64> {
        Array2::from_shape_fn(x.dim(), |(i, j)| self.z(j, x[[i, j]]))
    }

    /// Column-major standardized copy of `x`, by [`Standardizer::z_mul`].
    pub fn col_major_mul(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let (n, p) = x.dim();
        let mut z = vec![0.0; n * p];
        for j in 0..p {
            for i in 0..n {
                z[j * n + i] = self.z_mul(j, x[[i, j]]);
            }
        }
        z
    }

    /// Row-major standardized copy of `x`, by [`Standardizer::z_mul`].
    pub fn row_major_mul(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let (m, p) = x.dim();
        let mut z = Vec::with_capacity(m * p);
        for row in x.rows() {
            for ((v, mu), inv) in row.iter().zip(&self.mean).zip(&self.inv_sd) {
                z.push((v - mu) * inv);
            }
        }
        z
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn weighted_inputs_scale_the_standardized_values_and_zero_drops_a_column() {
        let x = array![[1.0, 0.1, 5.0], [2.0, 0.1, 7.0], [4.0, 0.1, 6.0]];
        let s = Standardizer::fit(x.view());
        let w = s.weighted(&[0.5, 1.0, 0.0]);
        for i in 0..3 {
            let (a, b) = (w.z(0, x[[i, 0]]), 0.5 * s.z(0, x[[i, 0]]));
            assert!((a - b).abs() <= 1e-15 * b.abs().max(1.0), "{a} vs {b}");
            // Constant stays constant; a zero weight makes the column constant.
            assert_eq!(w.z(1, x[[i, 1]]), 0.0);
            assert_eq!(w.z(2, x[[i, 2]]), 0.0);
            assert_eq!(w.z_mul(2, x[[i, 2]]), 0.0);
        }
        assert!(w.constant[2] && !s.constant[2]);
        // Weights of 1 change nothing, bit for bit.
        assert_eq!(s.weighted(&[1.0, 1.0, 1.0]), s);
    }

    #[test]
    fn mean_zero_sd_one_and_constant_columns_vanish() {
        // Exact by construction: column 0 has mean 2 and population sd sqrt(2/3).
        let x = array![[1.0, 0.1], [2.0, 0.1], [3.0, 0.1]];
        let s = Standardizer::fit(x.view());
        assert_eq!(s.mean[0], 2.0);
        assert!((s.sd[0] - (2.0f64 / 3.0).sqrt()).abs() < 1e-15);
        assert!(s.constant[1] && !s.constant[0]);
        let z = s.apply(x.view());
        assert_eq!(z.column(1).to_vec(), vec![0.0; 3]);
        assert!((z.column(0).sum()).abs() < 1e-15);
        // An evaluation row off the constant value still standardizes to 0 there.
        assert_eq!(s.z(1, 7.0), 0.0);
        assert_eq!(s.z_mul(1, 7.0), 0.0);
    }
}
