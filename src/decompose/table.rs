//! Out-of-bag accumulator of a table decomposition and its terms. Per (grid value, row): the
//! number of replicates R_i in which the row was held out, and the running mean and centred sum
//! of squares of its held-out predictions (classification: vote counts per class). Accumulators
//! of consecutive replicate blocks merge in block order, like [`super::SquaredAcc`].
//!
//! Squared loss, row i with observed y_i and R_i ≥ 2 held-out predictions of mean m_i:
//! `V_i = M2_i/(R_i − 1)` and `bias_sq_plus_noise_i = (m_i − y_i)² − V_i/R_i`, so that
//! `bias_sq_plus_noise_i + V_i = (1/R_i) Σ_r (ŷ_ri − y_i)²` exactly (the out-of-bag squared error).
//! Averages are over rows with R_i ≥ 2 (each row weighs the same); rows with fewer are skipped and
//! counted. 0-1 loss: main prediction = the most voted class, variance (Domingos 2000)
//! `V_i = 1 − p_D(main)`, bias against the *observed* label `B_i = 1[main ≠ y_i]` (noise folded
//! in), expected loss = out-of-bag error `1 − p_D(y_i)`.

use ndarray::ArrayView2;

use super::squared::jackknife_se;

/// Streaming out-of-bag accumulator of one block of replicates.
#[derive(Debug, Clone, PartialEq)]
pub struct TableAcc {
    /// Replicates absorbed.
    pub replicates: u64,
    /// Number of grid values.
    pub grid: usize,
    /// Number of table rows.
    pub rows: usize,
    /// Classes (0 for regression).
    pub classes: usize,
    /// Per row: replicates in which it was held out.
    pub count: Vec<u64>,
    /// Regression: mean held-out prediction per cell (`g * rows + i`).
    pub mean: Vec<f64>,
    /// Regression: centred sum of squares per cell.
    pub m2: Vec<f64>,
    /// Regression: sum of squared errors against the observed response per cell (the direct
    /// out-of-bag loss, kept separately as a cross-check of the identity).
    pub sse: Vec<f64>,
    /// Classification: votes per cell and class (`(g * rows + i) * classes + c`).
    pub votes: Vec<u32>,
    /// Sum over replicates of the share of rows held out.
    pub held_share_sum: f64,
    /// Sum over replicates of the squared share of rows held out.
    pub held_share_sq: f64,
}

impl TableAcc {
    /// An empty accumulator (`classes = 0` for regression).
    pub fn new(grid: usize, rows: usize, classes: usize) -> Self {
        let cells = if classes == 0 { grid * rows } else { 0 };
        TableAcc {
            replicates: 0,
            grid,
            rows,
            classes,
            count: vec![0; rows],
            mean: vec![0.0; cells],
            m2: vec![0.0; cells],
            sse: vec![0.0; cells],
            votes: vec![
                0;
                if classes == 0 {
                    0
                } else {
                    grid * rows * classes
                }
            ],
            held_share_sum: 0.0,
            held_share_sq: 0.0,
        }
    }

    /// Absorbs one replicate: `held[j]` is the row of column j of `preds` (`grid × held.len()`);
    /// `y` holds the observed responses of all rows (class indices when classifying).
    pub fn push(&mut self, held: &[usize], preds: ArrayView2<'_, f64>, y: &[f64]) {
        debug_assert_eq!(preds.dim(), (self.grid, held.len()));
        self.replicates += 1;
        let share = held.len() as f64 / self.rows as f64;
        self.held_share_sum += share;
        self.held_share_sq += share * share;
        for &i in held {
            self.count[i] += 1;
        }
        for (g, row) in preds.rows().into_iter().enumerate() {
            for (&i, &p) in held.iter().zip(row.iter()) {
                let cell = g * self.rows + i;
                if self.classes == 0 {
                    let inv = 1.0 / self.count[i] as f64;
                    let d = p - self.mean[cell];
                    self.mean[cell] += d * inv;
                    self.m2[cell] += d * (p - self.mean[cell]);
                    self.sse[cell] += (p - y[i]) * (p - y[i]);
                } else {
                    let c = (p as usize).min(self.classes - 1);
                    self.votes[cell * self.classes + c] += 1;
                }
            }
        }
    }

    /// Merges `other` (the next block) into `self`.
    pub fn merge(&mut self, other: &TableAcc) {
        if other.replicates == 0 {
            return;
        }
        if self.replicates == 0 {
            *self = other.clone();
            return;
        }
        for g in 0..self.grid {
            for i in 0..self.rows {
                let (na, nb) = (self.count[i] as f64, other.count[i] as f64);
                let cell = g * self.rows + i;
                if self.classes == 0 {
                    if nb == 0.0 {
                        continue;
                    }
                    let n = na + nb;
                    let d = other.mean[cell] - self.mean[cell];
                    self.mean[cell] += d * (nb / n);
                    self.m2[cell] += other.m2[cell] + d * d * (na * nb / n);
                    self.sse[cell] += other.sse[cell];
                }
            }
        }
        for (a, b) in self.votes.iter_mut().zip(&other.votes) {
            *a += b;
        }
        for (a, b) in self.count.iter_mut().zip(&other.count) {
            *a += b;
        }
        self.replicates += other.replicates;
        self.held_share_sum += other.held_share_sum;
        self.held_share_sq += other.held_share_sq;
    }

    /// Folds accumulators in order, skipping index `skip` if set.
    pub fn fold<'a>(
        parts: impl IntoIterator<Item = &'a TableAcc>,
        skip: Option<usize>,
    ) -> Option<TableAcc> {
        let mut out: Option<TableAcc> = None;
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

    /// Rows held out in fewer than two replicates (skipped by the decomposition).
    pub fn skipped_rows(&self) -> usize {
        self.count.iter().filter(|&&c| c < 2).count()
    }

    /// Mean share of rows held out per replicate, and its standard error over replicates.
    pub fn held_share(&self) -> (f64, f64) {
        let r = self.replicates as f64;
        let mean = self.held_share_sum / r;
        let var = (self.held_share_sq / r - mean * mean).max(0.0) * r / (r - 1.0);
        (mean, (var / r).sqrt())
    }
}

/// Table decomposition terms at one grid value, averaged over rows with R_i ≥ 2.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct TableTerms {
    /// Out-of-bag loss: `bias_plus_noise + variance` (squared) or `1 − p_D(y)` (0-1).
    pub expected_loss: f64,
    /// Squared: `(m_i − y_i)² − V_i/R_i` averaged. 0-1: share of rows whose main prediction is
    /// not the observed label.
    pub bias_plus_noise: f64,
    /// Squared: `M2_i/(R_i − 1)` averaged. 0-1: Domingos variance `1 − p_D(main)` averaged.
    pub variance: f64,
    /// 0-1 only: net variance `expected_loss − bias_plus_noise` (Domingos' `c2·V` averaged).
    pub net_variance: f64,
    /// 0-1 only: variance on rows with main = observed label, averaged over all used rows.
    pub unbiased_variance: f64,
    /// 0-1 only: variance on rows with main ≠ observed label, averaged over all used rows.
    pub biased_variance: f64,
    /// Squared: `(1/R_i) Σ (ŷ − y_i)²` averaged from the separately kept sums (equals
    /// `expected_loss` to rounding). 0-1: equals `expected_loss`.
    pub expected_loss_direct: f64,
}

/// Per-row terms (squared loss).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TableRow {
    /// Held-out replicates R_i.
    pub count: u64,
    /// Mean held-out prediction (squared) or main prediction (0-1).
    pub mean_prediction: f64,
    /// `(m_i − y_i)² − V_i/R_i` (squared) or `1[main ≠ y_i]` (0-1); NaN when R_i < 2.
    pub bias_plus_noise: f64,
    /// `V_i` (NaN when R_i < 2).
    pub variance: f64,
}

/// Terms at one (grid value, row).
pub fn row(acc: &TableAcc, g: usize, i: usize, y: f64) -> TableRow {
    let r = acc.count[i];
    let cell = g * acc.rows + i;
    if acc.classes == 0 {
        let rf = r as f64;
        let v = if r >= 2 {
            acc.m2[cell] / (rf - 1.0)
        } else {
            f64::NAN
        };
        let d = acc.mean[cell] - y;
        TableRow {
            count: r,
            mean_prediction: if r >= 1 { acc.mean[cell] } else { f64::NAN },
            bias_plus_noise: d * d - v / rf,
            variance: v,
        }
    } else {
        let k = acc.classes;
        let votes = &acc.votes[cell * k..(cell + 1) * k];
        let mut main = 0;
        for c in 1..k {
            if votes[c] > votes[main] {
                main = c;
            }
        }
        let ok = r >= 2;
        TableRow {
            count: r,
            mean_prediction: main as f64,
            bias_plus_noise: if ok {
                (main as f64 != y) as u8 as f64
            } else {
                f64::NAN
            },
            variance: if ok {
                1.0 - votes[main] as f64 / r as f64
            } else {
                f64::NAN
            },
        }
    }
}

/// Terms per grid value from a folded accumulator; `y` holds the observed responses.
pub fn terms(acc: &TableAcc, y: &[f64]) -> Vec<TableTerms> {
    (0..acc.grid)
        .map(|g| {
            let mut t = TableTerms::default();
            let mut used = 0usize;
            for (i, &yi) in y.iter().enumerate().take(acc.rows) {
                let r = acc.count[i];
                if r < 2 {
                    continue;
                }
                used += 1;
                let rw = row(acc, g, i, yi);
                t.bias_plus_noise += rw.bias_plus_noise;
                t.variance += rw.variance;
                if acc.classes == 0 {
                    t.expected_loss_direct += acc.sse[g * acc.rows + i] / r as f64;
                } else {
                    let cell = g * acc.rows + i;
                    let yi_votes = acc.votes[cell * acc.classes + yi as usize];
                    let loss = 1.0 - yi_votes as f64 / r as f64;
                    t.expected_loss_direct += loss;
                    if rw.bias_plus_noise > 0.0 {
                        t.biased_variance += rw.variance;
                    } else {
                        t.unbiased_variance += rw.variance;
                    }
                }
            }
            if used == 0 {
                return TableTerms {
                    expected_loss: f64::NAN,
                    bias_plus_noise: f64::NAN,
                    variance: f64::NAN,
                    net_variance: f64::NAN,
                    unbiased_variance: f64::NAN,
                    biased_variance: f64::NAN,
                    expected_loss_direct: f64::NAN,
                };
            }
            let u = used as f64;
            t.bias_plus_noise /= u;
            t.variance /= u;
            t.expected_loss_direct /= u;
            t.unbiased_variance /= u;
            t.biased_variance /= u;
            if acc.classes == 0 {
                t.expected_loss = t.bias_plus_noise + t.variance;
                t.net_variance = f64::NAN;
                t.unbiased_variance = f64::NAN;
                t.biased_variance = f64::NAN;
            } else {
                t.expected_loss = t.expected_loss_direct;
                t.net_variance = t.expected_loss - t.bias_plus_noise;
            }
            t
        })
        .collect()
}

/// A finished table decomposition: terms, jackknife standard errors over blocks, and the folded
/// accumulator.
#[derive(Debug, Clone)]
pub struct TableSummary {
    /// Terms per grid value.
    pub terms: Vec<TableTerms>,
    /// Delete-a-block jackknife standard errors per grid value (NaN with fewer than 2 blocks).
    pub stderr: Vec<TableTerms>,
    /// All blocks folded in order.
    pub total: TableAcc,
}

/// Folds blocks in index order and computes terms with jackknife standard errors over blocks.
pub fn summarize(blocks: &[TableAcc], y: &[f64]) -> Option<TableSummary> {
    let total = TableAcc::fold(blocks, None)?;
    let full = terms(&total, y);
    let nb = blocks.len();
    let loo: Vec<Vec<TableTerms>> = if nb >= 2 {
        (0..nb)
            .map(|b| {
                terms(
                    &TableAcc::fold(blocks, Some(b)).expect("a block remains"),
                    y,
                )
            })
            .collect()
    } else {
        Vec::new()
    };
    let stderr = (0..total.grid)
        .map(|g| {
            let se = |f: fn(&TableTerms) -> f64| {
                if loo.is_empty() {
                    f64::NAN
                } else {
                    jackknife_se(&loo.iter().map(|t| f(&t[g])).collect::<Vec<_>>())
                }
            };
            TableTerms {
                expected_loss: se(|t| t.expected_loss),
                bias_plus_noise: se(|t| t.bias_plus_noise),
                variance: se(|t| t.variance),
                net_variance: se(|t| t.net_variance),
                unbiased_variance: se(|t| t.unbiased_variance),
                biased_variance: se(|t| t.biased_variance),
                expected_loss_direct: se(|t| t.expected_loss_direct),
            }
        })
        .collect();
    Some(TableSummary {
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

    /// Random held-out sets and predictions for `reps` replicates.
    fn feed(accs: &mut [TableAcc], reps: usize, split: usize, s: &mut u64, y: &[f64]) {
        let (g, n) = (accs[0].grid, accs[0].rows);
        for r in 0..reps {
            let held: Vec<usize> = (0..n).filter(|_| lcg(s) < 0.4).collect();
            let mut p = Array2::<f64>::zeros((g, held.len()));
            p.iter_mut().for_each(|v| *v = 3.0 * lcg(s) - 1.0);
            let a = if r < split { 0 } else { 1 };
            accs[a].push(&held, p.view(), y);
            accs[2].push(&held, p.view(), y);
        }
    }

    #[test]
    fn exact_identity_bias_plus_noise_plus_variance_is_the_oob_squared_error() {
        // Exact identity per row: (m − y)² − V/R + V = (1/R) Σ (ŷ_r − y)², hence for the averages.
        let (g, n) = (3, 17);
        let mut s = 11u64;
        let y: Vec<f64> = (0..n).map(|i| (i as f64 * 0.37).sin()).collect();
        let mut accs = vec![TableAcc::new(g, n, 0); 3];
        feed(&mut accs, 40, 15, &mut s, &y);
        for t in terms(&accs[2], &y) {
            approx::assert_relative_eq!(
                t.expected_loss,
                t.expected_loss_direct,
                max_relative = 1e-12
            );
            approx::assert_relative_eq!(
                t.bias_plus_noise + t.variance,
                t.expected_loss_direct,
                max_relative = 1e-12
            );
        }
    }

    #[test]
    fn merge_in_block_order_equals_one_sequential_pass() {
        let (g, n) = (2, 9);
        let mut s = 5u64;
        let y: Vec<f64> = (0..n).map(|i| i as f64).collect();
        let mut accs = vec![TableAcc::new(g, n, 0); 3];
        feed(&mut accs, 30, 13, &mut s, &y);
        let mut merged = accs[0].clone();
        merged.merge(&accs[1]);
        assert_eq!(merged.count, accs[2].count);
        assert_eq!(merged.replicates, accs[2].replicates);
        for i in 0..merged.mean.len() {
            approx::assert_relative_eq!(merged.mean[i], accs[2].mean[i], max_relative = 1e-12);
            approx::assert_relative_eq!(merged.m2[i], accs[2].m2[i], max_relative = 1e-10);
        }
    }

    #[test]
    fn zero_one_loss_is_bias_plus_net_variance_and_matches_votes() {
        // Exact (Domingos 2000 with the observed label in place of the Bayes class):
        // loss_i = 1 − p_D(y_i) and loss = B + c2·V.
        let (g, n, k) = (1, 3, 3);
        let y = [0.0, 1.0, 2.0];
        let mut acc = TableAcc::new(g, n, k);
        let votes = [
            [0.0, 0.0, 1.0],
            [0.0, 1.0, 1.0],
            [2.0, 1.0, 0.0],
            [0.0, 1.0, 2.0],
        ];
        for v in votes {
            let p = Array2::from_shape_vec((1, 3), v.to_vec()).unwrap();
            acc.push(&[0, 1, 2], p.view(), &y);
        }
        let t = terms(&acc, &y)[0];
        // Row 0: predictions 0,0,2,0 → main 0 = y, loss 1/4, V 1/4. Row 1: 0,1,1,1 → main 1 = y,
        // loss 1/4, V 1/4. Row 2: 1,1,0,2 → main 1 ≠ y = 2, B = 1, loss 3/4, V 1/2, c2·V = −1/4.
        approx::assert_relative_eq!(t.expected_loss, 1.25 / 3.0, max_relative = 1e-14);
        approx::assert_relative_eq!(t.bias_plus_noise, 1.0 / 3.0, max_relative = 1e-14);
        approx::assert_relative_eq!(t.variance, 1.0 / 3.0, max_relative = 1e-14);
        approx::assert_relative_eq!(t.net_variance, 0.25 / 3.0, max_relative = 1e-12);
        approx::assert_relative_eq!(t.biased_variance, 0.5 / 3.0, max_relative = 1e-14);
    }
}
