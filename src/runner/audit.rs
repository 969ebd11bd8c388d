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

use crate::error::Error;
use crate::family::{FitInput, FitSeed, Out};
use crate::rng::{fold_assignment, purpose, stream};
use crate::scenario::audit::{AuditPlan, Rule};
use crate::scenario::{ModelPlan, Plan};

/// Chooses a grid index from per-fold mean losses (`folds × grid`) and fold sizes: pooled
/// cross-validated loss per grid value, then the rule. Pure arithmetic.
pub fn pick(
    fold_loss: ArrayView2<'_, f64>,
    fold_rows: &[usize],
    plan: &AuditPlan,
    models: &[ModelPlan],
) -> usize {
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
            // "Simplest" is judged within the best candidate's own family.
            let (mut lo, mut larger_is_simpler) = (0, plan.larger_is_simpler);
            let mut hi = g;
            let mut start = 0;
            for m in models {
                let end = start + m.grid.len();
                if (start..end).contains(&best) {
                    lo = start;
                    hi = end;
                    larger_is_simpler = m.family.larger_is_simpler();
                }
                start = end;
            }
            if larger_is_simpler {
                (lo..hi).rev().find(ok).unwrap_or(best)
            } else {
                (lo..hi).find(ok).unwrap_or(best)
            }
        }
    }
}

/// Runs the K fold fits of replicate `r` on its training set, for every model of the plan,
/// and returns the chosen candidate: an index into the models' grids laid end to end (model 0's
/// grid values first). Every fold fit draws from its own fit stream (fold `f + 1`), and its
/// predictions pass the same checks as the main fits ([`super::check_predictions`]).
pub fn choose(
    plan: &Plan,
    audit: &AuditPlan,
    x: ArrayView2<'_, f64>,
    y: ArrayView1<'_, f64>,
    r: u64,
) -> Result<usize, Error> {
    let n = y.len();
    let total: usize = plan.models.iter().map(|m| m.grid.len()).sum();
    let mut rng = stream(plan.seed, purpose::AUDIT, r);
    let fold = fold_assignment(n, audit.folds, &mut rng);
    let mut fold_loss = Array2::<f64>::zeros((audit.folds, total));
    let mut fold_rows = vec![0usize; audit.folds];
    let k = plan.task.classes();
    let needs_probs = plan.loss.needs_probs();
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
        let mut offset = 0;
        for model in &plan.models {
            let g = model.grid.len();
            let mut preds = Array2::<f64>::zeros((g, held.len()));
            let mut probs =
                ndarray::Array3::<f64>::zeros((g, held.len(), if needs_probs { k } else { 0 }));
            let input = FitInput {
                x: xt.view(),
                y: yt.view(),
                eval: xe.view(),
                task: plan.task,
                seed: FitSeed {
                    seed: plan.seed,
                    replicate: r,
                    fold: f as u32 + 1,
                    copy: 0,
                },
            };
            let out = Out {
                values: preds.view_mut(),
                probs: needs_probs.then(|| probs.view_mut()),
                diversity: None,
            };
            let fit_err = |message: String| Error::Fit {
                file: plan.file.to_string(),
                replicate: r,
                family: model.family.name().to_string(),
                message: format!("cross-validation fold {}: {message}", f + 1),
            };
            model
                .family
                .fit_predict(&input, &model.grid, out)
                .map_err(|e| fit_err(e.0))?;
            let point = |e: usize| format!("held-out row {} of the fold", e + 1);
            super::check_predictions(
                plan,
                model,
                preds.view(),
                needs_probs.then(|| probs.view()),
                &point,
            )
            .map_err(fit_err)?;
            for gi in 0..g {
                let mut sum = 0.0;
                for (j, &i) in held.iter().enumerate() {
                    let q = needs_probs.then(|| probs.slice(ndarray::s![gi, j, ..]).to_vec());
                    sum += plan.loss.observed_loss(preds[[gi, j]], q.as_deref(), y[i]);
                }
                if !sum.is_finite() {
                    let big = y.iter().fold(0.0_f64, |a, v| a.max(v.abs()));
                    if big > 1e150 || !big.is_finite() {
                        // The same words as the run's own check of its sums.
                        return Err(Error::Usage(format!(
                            "{}: the audit's cross-validation: the responses reach {big:e}, so \
                             their squares overflow; rescale the response (for example divide it \
                             by a power of ten)",
                            plan.file
                        )));
                    }
                    return Err(fit_err(format!(
                        "the {} loss is not finite at {} = {}",
                        plan.loss.name(),
                        model.family.knob(),
                        model.grid[gi]
                    )));
                }
                fold_loss[[f, offset + gi]] = sum / held.len() as f64;
            }
            offset += g;
        }
    }
    Ok(pick(fold_loss.view(), &fold_rows, audit, &plan.models))
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
        let mut rng = crate::rng::stream(1, crate::rng::purpose::AUDIT, 0);
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
        assert_eq!(pick(l.view(), &rows, &plan(Rule::Min, false), &[]), 1);
        assert_eq!(pick(l.view(), &rows, &plan(Rule::OneSe, false), &[]), 1);
        assert_eq!(pick(l.view(), &rows, &plan(Rule::OneSe, true), &[]), 2);
    }
}
