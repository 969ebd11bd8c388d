//! The selection audit (`[audit] folds = K`): inside every replicate, K-fold cross-validation on
//! that replicate's training set across the grid, and the knob value it would choose; then, at
//! the end, how that choice compares with the oracle (the grid value of lowest expected loss).
//!
//! Fold assignment: a uniformly random permutation of the training rows drawn from the
//! replicate's own stream `runner::stream(seed, purpose::AUDIT, r)`; the row at permuted
//! position i goes to fold `i mod K`, so fold sizes differ by at most one. Each fold fit is one
//! path fit of the family (all grid values at once) on the other K−1 folds, predicting the
//! held-out fold. The cross-validated loss of grid value g is the mean loss over all held-out
//! rows; its standard error is the standard deviation of the K per-fold mean losses over √K
//! (Hastie, Tibshirani, Friedman, *Elements of Statistical Learning*, 2nd ed., §7.10, the
//! "one-standard-error rule"). Rules: `min` chooses the lowest cross-validated loss (the first
//! on exact ties); `one_se` the simplest value whose loss is within one standard error of the
//! lowest. "Simplest" is the smallest knob value, except for `k` (neighbours) and `penalty`
//! (ridge), where larger is simpler.
//!
//! Per block the audit keeps only integer counts of the chosen grid index ([`AuditAcc`]); they
//! add exactly across blocks, shards and checkpoints. The excess loss of choice g is
//! `EL(g) − min EL` with the run's final expected losses, so its mean and 90% quantile follow
//! from the counts ([`selection`]).

use ndarray::{Array1, Array2, ArrayView1, ArrayView2, Axis};
use rand::Rng;
use serde::{Deserialize, Serialize};

use crate::error::{Error, ScenarioError};
use crate::family::{FitInput, Task};
use crate::report::{Best, PointRow};
use crate::scenario::spec::AuditSpec;
use crate::scenario::Plan;

/// How the cross-validated loss curve becomes a choice.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Rule {
    /// Lowest cross-validated loss.
    Min,
    /// Simplest value within one standard error of the lowest.
    OneSe,
}

impl Rule {
    /// Name as written in scenario files.
    pub fn name(self) -> &'static str {
        match self {
            Rule::Min => "min",
            Rule::OneSe => "one_se",
        }
    }
}

/// A resolved `[audit]` section.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct AuditPlan {
    /// Number of folds K.
    pub folds: usize,
    /// Choice rule.
    pub rule: Rule,
    /// `true` when a larger knob value is the simpler model (k-NN `k`, ridge `penalty`).
    pub larger_is_simpler: bool,
}

/// Checks `[audit]`: K between 2 and the training size, the rule known, and the family able to
/// fit the whole grid on the smallest fold-training set (n − ⌈n/K⌉ rows).
pub fn from_spec(
    a: &AuditSpec,
    src: &str,
    file: &str,
    family: &dyn crate::family::Family,
    grid: &[f64],
    n_train: usize,
    n_inputs: usize,
) -> Result<AuditPlan, ScenarioError> {
    let err = |span: std::ops::Range<usize>, key: &str, m: String| ScenarioError {
        file: file.to_string(),
        line: Some(crate::scenario::line_of(src, span.start)),
        key: Some(key.to_string()),
        message: m,
    };
    let k = *a.folds.get_ref();
    if k < 2 || k as usize > n_train {
        return Err(err(
            a.folds.span(),
            "audit.folds",
            format!("must be between 2 and the training size {n_train}, got {k}"),
        ));
    }
    let folds = k as usize;
    let rule = match a.rule.as_ref().map(|r| r.get_ref().as_str()) {
        None | Some("min") => Rule::Min,
        Some("one_se") => Rule::OneSe,
        Some(other) => {
            return Err(err(
                a.rule.as_ref().map(|r| r.span()).unwrap_or(a.folds.span()),
                "audit.rule",
                format!("unknown rule `{other}`; expected `min` or `one_se`"),
            ))
        }
    };
    let smallest = n_train - n_train.div_ceil(folds);
    family.check_grid(grid, smallest, n_inputs).map_err(|m| {
        err(
            a.folds.span(),
            "audit.folds",
            format!(
                "with {folds} folds a fold fit trains on {smallest} of the {n_train} rows, too few for this grid: {m}"
            ),
        )
    })?;
    Ok(AuditPlan {
        folds,
        rule,
        larger_is_simpler: matches!(family.knob(), "k" | "penalty"),
    })
}

/// Fold of each of `n` rows: a random permutation from `rng`, position i → fold `i mod folds`.
pub fn fold_assignment<R: Rng + ?Sized>(n: usize, folds: usize, rng: &mut R) -> Vec<usize> {
    let mut perm: Vec<usize> = (0..n).collect();
    for i in (1..n).rev() {
        let j = rng.gen_range(0..=i);
        perm.swap(i, j);
    }
    let mut fold = vec![0; n];
    for (pos, &row) in perm.iter().enumerate() {
        fold[row] = pos % folds.max(1);
    }
    fold
}

/// Chooses a grid index from per-fold mean losses (`folds × grid`) and fold sizes: pooled
/// cross-validated loss per grid value, then the rule. Pure arithmetic.
pub fn pick(fold_loss: ArrayView2<'_, f64>, fold_rows: &[usize], plan: &AuditPlan) -> usize {
    let g = fold_loss.ncols();
    let total: f64 = fold_rows.iter().sum::<usize>() as f64;
    let k = fold_loss.nrows() as f64;
    let cv: Vec<f64> = (0..g)
        .map(|j| {
            fold_loss
                .column(j)
                .iter()
                .zip(fold_rows)
                .map(|(l, &m)| l * m as f64)
                .sum::<f64>()
                / total
        })
        .collect();
    let best = (0..g).fold(0, |b, j| if cv[j] < cv[b] { j } else { b });
    match plan.rule {
        Rule::Min => best,
        Rule::OneSe => {
            let col = fold_loss.column(best);
            let m = col.sum() / k;
            let var = col.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / (k - 1.0).max(1.0);
            let bound = cv[best] + (var / k).sqrt();
            let ok = |j: &usize| cv[*j] <= bound;
            if plan.larger_is_simpler {
                (0..g).rev().find(ok).unwrap_or(best)
            } else {
                (0..g).find(ok).unwrap_or(best)
            }
        }
    }
}

/// Runs the K fold fits of replicate `r` on its training set and returns the chosen grid index.
pub fn choose(
    plan: &Plan,
    audit: &AuditPlan,
    x: ArrayView2<'_, f64>,
    y: ArrayView1<'_, f64>,
    r: u64,
) -> Result<usize, Error> {
    let n = y.len();
    let g = plan.grid.len();
    let mut rng = crate::runner::stream(plan.seed, crate::runner::purpose::AUDIT, r);
    let fold = fold_assignment(n, audit.folds, &mut rng);
    let mut fold_loss = Array2::<f64>::zeros((audit.folds, g));
    let mut fold_rows = vec![0usize; audit.folds];
    for f in 0..audit.folds {
        let train: Vec<usize> = (0..n).filter(|&i| fold[i] != f).collect();
        let held: Vec<usize> = (0..n).filter(|&i| fold[i] == f).collect();
        fold_rows[f] = held.len();
        if held.is_empty() {
            continue;
        }
        let xt = x.select(Axis(0), &train);
        let yt: Array1<f64> = y.select(Axis(0), &train);
        let xe = x.select(Axis(0), &held);
        let mut preds = Array2::<f64>::zeros((g, held.len()));
        let input = FitInput {
            x: xt.view(),
            y: yt.view(),
            eval: xe.view(),
            task: plan.task,
        };
        plan.family
            .fit_predict(&input, &plan.grid, preds.view_mut())
            .map_err(|e| Error::Fit {
                replicate: r,
                family: plan.family.name().to_string(),
                message: format!("cross-validation fold {}: {}", f + 1, e.0),
            })?;
        for (gi, row) in preds.rows().into_iter().enumerate() {
            let mut sum = 0.0;
            for (p, &i) in row.iter().zip(&held) {
                sum += match plan.task {
                    Task::Regress => (p - y[i]) * (p - y[i]),
                    Task::Classify { .. } => {
                        if *p == y[i] {
                            0.0
                        } else {
                            1.0
                        }
                    }
                };
            }
            if !sum.is_finite() {
                return Err(Error::Fit {
                    replicate: r,
                    family: plan.family.name().to_string(),
                    message: format!(
                        "cross-validation fold {}: prediction not finite at {} = {}",
                        f + 1,
                        plan.family.knob(),
                        plan.grid[gi]
                    ),
                });
            }
            fold_loss[[f, gi]] = sum / held.len() as f64;
        }
    }
    Ok(pick(fold_loss.view(), &fold_rows, audit))
}

/// One block's audit: how many replicates chose each grid index. Merging adds counts exactly.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct AuditAcc {
    /// Count per grid index.
    pub counts: Vec<u64>,
}

impl AuditAcc {
    /// Empty counts for `grid` values.
    pub fn new(grid: usize) -> AuditAcc {
        AuditAcc {
            counts: vec![0; grid],
        }
    }

    /// Adds another block's counts.
    pub fn merge(&mut self, other: &AuditAcc) {
        for (a, b) in self.counts.iter_mut().zip(&other.counts) {
            *a += b;
        }
    }
}

/// The `selection` section of a result document.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Selection {
    /// Folds K.
    pub folds: usize,
    /// `min` or `one_se`.
    pub rule: String,
    /// Replicates choosing each grid value, in grid order.
    pub chosen_counts: Vec<u64>,
    /// The grid value of lowest expected loss (the oracle).
    pub oracle_best: f64,
    /// Mean over replicates of `EL(chosen) − EL(oracle)`.
    pub mean_excess_loss: f64,
    /// 90% quantile over replicates of the excess loss (lower quantile of the count
    /// distribution: the smallest excess e with at least 90% of replicates at or below e).
    pub q90_excess_loss: f64,
    /// Share of replicates whose choice has expected loss within one standard error of the
    /// oracle's (the result's `best.within_one_se`).
    pub share_within_one_se: f64,
    /// Share of replicates choosing the oracle value itself.
    pub share_oracle: f64,
}

/// Builds the selection section from the summed counts and the run's per-grid rows.
pub fn selection(audit: &AuditPlan, counts: &[u64], points: &[PointRow], best: &Best) -> Selection {
    let total: u64 = counts.iter().sum();
    let el: Vec<f64> = points.iter().map(|p| p.expected_loss).collect();
    let min = el.iter().cloned().fold(f64::INFINITY, f64::min);
    let excess: Vec<f64> = el.iter().map(|e| e - min).collect();
    let share = |c: u64| {
        if total == 0 {
            f64::NAN
        } else {
            c as f64 / total as f64
        }
    };
    let mean = if total == 0 {
        f64::NAN
    } else {
        counts
            .iter()
            .zip(&excess)
            .map(|(&c, e)| c as f64 * e)
            .sum::<f64>()
            / total as f64
    };
    let mut order: Vec<usize> = (0..counts.len()).collect();
    order.sort_by(|&a, &b| excess[a].total_cmp(&excess[b]).then(a.cmp(&b)));
    let mut q90 = f64::NAN;
    let mut acc = 0u64;
    for &g in &order {
        acc += counts[g];
        if total > 0 && acc * 10 >= total * 9 {
            q90 = excess[g];
            break;
        }
    }
    let within: u64 = points
        .iter()
        .zip(counts)
        .filter(|(p, _)| best.within_one_se.contains(&p.value))
        .map(|(_, &c)| c)
        .sum();
    let at_oracle: u64 = points
        .iter()
        .zip(counts)
        .filter(|(p, _)| p.value == best.value)
        .map(|(_, &c)| c)
        .sum();
    Selection {
        folds: audit.folds,
        rule: audit.rule.name().into(),
        chosen_counts: counts.to_vec(),
        oracle_best: best.value,
        mean_excess_loss: mean,
        q90_excess_loss: q90,
        share_within_one_se: share(within),
        share_oracle: share(at_oracle),
    }
}

/// One plain sentence for the table output.
pub fn sentence(s: &Selection, knob: &str, grid: &[f64]) -> String {
    use crate::report::{fmt_num, fmt_value};
    let total: u64 = s.chosen_counts.iter().sum();
    let mode = (0..s.chosen_counts.len()).fold(0, |b, j| {
        if s.chosen_counts[j] > s.chosen_counts[b] {
            j
        } else {
            b
        }
    });
    format!(
        "{}-fold cross-validation ({} rule) chose {knob} = {} most often ({} of {total} replicates); \
         the oracle best is {} (chosen in {:.0}%); {:.0}% of choices are within one standard error of it; \
         excess loss over the oracle: mean {}, 90% quantile {}.",
        s.folds,
        s.rule,
        grid.get(mode).map(|v| fmt_value(*v)).unwrap_or_default(),
        s.chosen_counts.get(mode).copied().unwrap_or(0),
        fmt_value(s.oracle_best),
        100.0 * s.share_oracle,
        100.0 * s.share_within_one_se,
        fmt_num(s.mean_excess_loss),
        fmt_num(s.q90_excess_loss)
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    fn plan(rule: Rule, larger: bool) -> AuditPlan {
        AuditPlan {
            folds: 3,
            rule,
            larger_is_simpler: larger,
        }
    }

    #[test]
    fn folds_are_balanced() {
        let mut rng = crate::runner::stream(1, crate::runner::purpose::AUDIT, 0);
        let f = fold_assignment(23, 5, &mut rng);
        for k in 0..5 {
            let c = f.iter().filter(|&&v| v == k).count();
            assert!(c == 4 || c == 5, "{c}");
        }
    }

    #[test]
    fn rules_pick_by_hand() {
        // Exact arithmetic: fold means (3 folds × 3 grid values), equal fold sizes.
        // CV = [1.0, 0.9, 0.95]; best index 1; its fold losses 0.8, 0.9, 1.0 have sd 0.1, SE
        // 0.1/√3 ≈ 0.0577, so the bound is 0.9577: index 2 (0.95) is within, index 0 is not.
        let l = array![[1.0, 0.8, 0.95], [1.0, 0.9, 0.95], [1.0, 1.0, 0.95]];
        let rows = [10, 10, 10];
        assert_eq!(pick(l.view(), &rows, &plan(Rule::Min, false)), 1);
        assert_eq!(pick(l.view(), &rows, &plan(Rule::OneSe, false)), 1);
        assert_eq!(pick(l.view(), &rows, &plan(Rule::OneSe, true)), 2);
    }
}
