//! Squared-loss accumulator (per grid value × evaluation point: count, mean and centred sum of
//! squares, merged with the pairwise update of Chan, Golub and LeVeque 1979) and the
//! decomposition with delete-a-block jackknife standard errors.

use ndarray::ArrayView2;

/// Streaming accumulator of one block of replicates. Memory: `3 × grid × points` floats,
/// independent of the number of replicates.
#[derive(Debug, Clone, PartialEq)]
pub struct SquaredAcc {
    /// Replicates absorbed.
    pub n: u64,
    /// Number of grid values.
    pub grid: usize,
    /// Number of evaluation points.
    pub points: usize,
    /// Mean prediction per cell (`g * points + e`).
    pub mean: Vec<f64>,
    /// Sum of squared deviations from the mean per cell.
    pub m2: Vec<f64>,
    /// Per grid value: sum over replicates of the mean (over points) squared error against
    /// fresh noisy responses (the direct cross-check).
    pub direct: Vec<f64>,
}

impl SquaredAcc {
    /// An empty accumulator.
    pub fn new(grid: usize, points: usize) -> Self {
        SquaredAcc {
            n: 0,
            grid,
            points,
            mean: vec![0.0; grid * points],
            m2: vec![0.0; grid * points],
            direct: vec![0.0; grid],
        }
    }

    /// Absorbs one replicate: `preds[[g, e]]` and, per grid value, its mean squared error
    /// against fresh responses.
    pub fn push(&mut self, preds: ArrayView2<'_, f64>, direct: &[f64]) {
        debug_assert_eq!(preds.dim(), (self.grid, self.points));
        self.n += 1;
        let inv = 1.0 / self.n as f64;
        for (g, row) in preds.rows().into_iter().enumerate() {
            let base = g * self.points;
            let mean = &mut self.mean[base..base + self.points];
            let m2 = &mut self.m2[base..base + self.points];
            for ((mu, s), &y) in mean.iter_mut().zip(m2.iter_mut()).zip(row.iter()) {
                let d = y - *mu;
                *mu += d * inv;
                *s += d * (y - *mu);
            }
            self.direct[g] += direct[g];
        }
    }

    /// Merges `other` into `self` (order matters for the last bits: merge in block order).
    pub fn merge(&mut self, other: &SquaredAcc) {
        if other.n == 0 {
            return;
        }
        if self.n == 0 {
            *self = other.clone();
            return;
        }
        let na = self.n as f64;
        let nb = other.n as f64;
        let n = na + nb;
        let (wb, wab) = (nb / n, na * nb / n);
        let cells = self
            .mean
            .iter_mut()
            .zip(self.m2.iter_mut())
            .zip(other.mean.iter().zip(&other.m2));
        for ((mu, s), (&om, &os)) in cells {
            let d = om - *mu;
            *mu += d * wb;
            *s += os + d * d * wab;
        }
        for (a, b) in self.direct.iter_mut().zip(&other.direct) {
            *a += b;
        }
        self.n += other.n;
    }

    /// Folds accumulators in the order given, skipping index `skip` if set.
    pub fn fold<'a>(
        parts: impl IntoIterator<Item = &'a SquaredAcc>,
        skip: Option<usize>,
    ) -> Option<SquaredAcc> {
        let mut out: Option<SquaredAcc> = None;
        for (i, p) in parts.into_iter().enumerate() {
            if Some(i) == skip {
                continue;
            }
            match &mut out {
                None => out = Some(p.clone()),
                Some(o) => o.merge(p),
            }
        }
        out
    }
}

/// Decomposition terms at one grid value, averaged over evaluation points.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct SquaredTerms {
    /// `noise + bias_sq + variance`.
    pub expected_loss: f64,
    /// Unbiased squared bias.
    pub bias_sq: f64,
    /// Unbiased variance.
    pub variance: f64,
    /// Known noise variance σ²(x), averaged.
    pub noise: f64,
    /// Mean squared error against fresh noisy responses (independent cross-check).
    pub expected_loss_direct: f64,
}

/// Terms at one evaluation point and grid value.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SquaredPoint {
    /// Mean prediction over replicates.
    pub mean_prediction: f64,
    /// Unbiased squared bias at the point.
    pub bias_sq: f64,
    /// Unbiased variance at the point.
    pub variance: f64,
}

/// Per-grid terms, their jackknife standard errors, and the folded accumulator.
#[derive(Debug, Clone)]
pub struct SquaredSummary {
    /// Terms per grid value.
    pub terms: Vec<SquaredTerms>,
    /// Standard errors per grid value (`noise` is known exactly: its error is 0). NaN when
    /// fewer than two blocks (or a block-deleted set with fewer than two replicates).
    pub stderr: Vec<SquaredTerms>,
    /// All blocks folded in order.
    pub total: SquaredAcc,
}

/// Computes the averaged terms from a folded accumulator. `truth[e]` is f at point e and
/// `noise_var[e]` is σ²(x_e).
pub fn terms(acc: &SquaredAcc, truth: &[f64], noise_var: &[f64]) -> Vec<SquaredTerms> {
    let m = acc.points as f64;
    let r = acc.n as f64;
    let noise = noise_var.iter().sum::<f64>() / m;
    (0..acc.grid)
        .map(|g| {
            let (mut b2, mut v) = (0.0, 0.0);
            for (e, &f) in truth.iter().enumerate().take(acc.points) {
                let p = point(acc, g, e, f);
                b2 += p.bias_sq;
                v += p.variance;
            }
            let (b2, v) = (b2 / m, v / m);
            SquaredTerms {
                expected_loss: noise + b2 + v,
                bias_sq: b2,
                variance: v,
                noise,
                expected_loss_direct: if acc.n > 0 {
                    acc.direct[g] / r
                } else {
                    f64::NAN
                },
            }
        })
        .collect()
}

/// Terms at one cell.
pub fn point(acc: &SquaredAcc, g: usize, e: usize, truth: f64) -> SquaredPoint {
    let i = g * acc.points + e;
    let r = acc.n as f64;
    let v = if acc.n >= 2 {
        acc.m2[i] / (r - 1.0)
    } else {
        f64::NAN
    };
    let d = acc.mean[i] - truth;
    SquaredPoint {
        mean_prediction: acc.mean[i],
        bias_sq: d * d - v / r,
        variance: v,
    }
}

/// Delete-one-group jackknife standard error: `sqrt((G-1)/G Σ (θ_(g) - θ̄)²)` (Efron and Tibshirani,
/// *An Introduction to the Bootstrap*, 1993, eq. 11.5, applied to groups of replicates).
pub fn jackknife_se(leave_out: &[f64]) -> f64 {
    let g = leave_out.len();
    if g < 2 || leave_out.iter().any(|x| !x.is_finite()) {
        return f64::NAN;
    }
    let gf = g as f64;
    let mean = leave_out.iter().sum::<f64>() / gf;
    let ss: f64 = leave_out.iter().map(|x| (x - mean) * (x - mean)).sum();
    let se = ((gf - 1.0) / gf * ss).sqrt();
    // A statistic that is the same in every block-deleted set (a share that no block moves)
    // differs across them only by rounding: report 0 rather than ~1e-16 of round-off.
    if se <= 1e-12 * mean.abs() {
        0.0
    } else {
        se
    }
}

/// Folds blocks in index order and computes terms with jackknife standard errors over blocks.
/// Returns `None` for an empty block list.
pub fn summarize(
    blocks: &[SquaredAcc],
    truth: &[f64],
    noise_var: &[f64],
) -> Option<SquaredSummary> {
    let total = SquaredAcc::fold(blocks, None)?;
    let full = terms(&total, truth, noise_var);
    let nb = blocks.len();
    let mut loo: Vec<Vec<SquaredTerms>> = Vec::with_capacity(nb);
    if nb >= 2 {
        // Leave-one-block-out folds, each in block order. The fold of the blocks before `b` is
        // shared (`prefix`), so only the blocks after `b` are merged per fold: the same merges
        // in the same order as `SquaredAcc::fold(blocks, Some(b))`, half the work.
        let mut prefix: Option<SquaredAcc> = None;
        for b in 0..nb {
            let mut acc = prefix.clone();
            for p in &blocks[b + 1..] {
                match &mut acc {
                    None => acc = Some(p.clone()),
                    Some(o) => o.merge(p),
                }
            }
            let acc = acc.expect("at least one block remains");
            loo.push(terms(&acc, truth, noise_var));
            match &mut prefix {
                None => prefix = Some(blocks[b].clone()),
                Some(o) => o.merge(&blocks[b]),
            }
        }
    }
    let stderr = (0..total.grid)
        .map(|g| {
            let se = |f: fn(&SquaredTerms) -> f64| {
                if loo.is_empty() {
                    f64::NAN
                } else {
                    jackknife_se(&loo.iter().map(|t| f(&t[g])).collect::<Vec<_>>())
                }
            };
            SquaredTerms {
                expected_loss: se(|t| t.expected_loss),
                bias_sq: se(|t| t.bias_sq),
                variance: se(|t| t.variance),
                noise: 0.0,
                expected_loss_direct: se(|t| t.expected_loss_direct),
            }
        })
        .collect();
    Some(SquaredSummary {
        terms: full,
        stderr,
        total,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    fn lcg(state: &mut u64) -> f64 {
        *state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (*state >> 11) as f64 / (1u64 << 53) as f64
    }

    #[test]
    fn exact_identity_mean_squared_error_equals_bias_sq_plus_variance() {
        // Exact algebraic identity: (1/R) Σ (ŷ_r - f)² = (m - f)² + V̂ (R-1)/R = B̂² + V̂.
        let (g, m, r) = (3, 7, 25);
        let mut s = 7u64;
        let truth: Vec<f64> = (0..m).map(|e| e as f64 * 0.3).collect();
        let mut acc = SquaredAcc::new(g, m);
        let mut preds = vec![Array2::<f64>::zeros((g, m)); r];
        for p in preds.iter_mut() {
            for v in p.iter_mut() {
                *v = 5.0 * lcg(&mut s) - 1.0;
            }
            acc.push(p.view(), &vec![0.0; g]);
        }
        for gi in 0..g {
            for e in 0..m {
                let direct: f64 = preds
                    .iter()
                    .map(|p| (p[[gi, e]] - truth[e]).powi(2))
                    .sum::<f64>()
                    / r as f64;
                let pt = point(&acc, gi, e, truth[e]);
                approx::assert_relative_eq!(direct, pt.bias_sq + pt.variance, max_relative = 1e-12);
            }
        }
    }

    #[test]
    fn merge_equals_sequential_within_rounding() {
        let (g, m) = (2, 4);
        let mut s = 3u64;
        let mut all = SquaredAcc::new(g, m);
        let mut a = SquaredAcc::new(g, m);
        let mut b = SquaredAcc::new(g, m);
        for i in 0..30 {
            let mut p = Array2::<f64>::zeros((g, m));
            p.iter_mut().for_each(|v| *v = lcg(&mut s) * 100.0);
            all.push(p.view(), &[1.0, 2.0]);
            if i < 11 {
                a.push(p.view(), &[1.0, 2.0])
            } else {
                b.push(p.view(), &[1.0, 2.0])
            }
        }
        a.merge(&b);
        assert_eq!(a.n, all.n);
        for i in 0..a.mean.len() {
            approx::assert_relative_eq!(a.mean[i], all.mean[i], max_relative = 1e-13);
            approx::assert_relative_eq!(a.m2[i], all.m2[i], max_relative = 1e-11);
        }
        assert_eq!(a.direct, all.direct);
    }

    #[test]
    fn jackknife_of_a_mean_equals_the_classical_standard_error() {
        // Exact identity: for the sample mean, the delete-one jackknife SE equals s/sqrt(n)
        // (Efron and Tibshirani 1993, §11.2).
        let x = [1.0, 4.0, 2.5, 7.0, 3.0, 9.5];
        let n = x.len() as f64;
        let mean = x.iter().sum::<f64>() / n;
        let s2 = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0);
        let loo: Vec<f64> = (0..x.len())
            .map(|i| (x.iter().sum::<f64>() - x[i]) / (n - 1.0))
            .collect();
        approx::assert_relative_eq!(jackknife_se(&loo), (s2 / n).sqrt(), max_relative = 1e-12);
    }
}
