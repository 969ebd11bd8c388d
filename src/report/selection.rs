//! The `selection` section of a result document: what the selection audit's cross-validation
//! chose across replicates, against the oracle best, and its excess loss.

use serde::{Deserialize, Serialize};

use crate::fmt::{fmt_num, fmt_value};
use crate::scenario::audit::AuditPlan;

use super::{Best, PointRow};

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
    /// oracle's (the result's `best.within_one_se`; with several models, a candidate of any
    /// model by the same rule).
    pub share_within_one_se: f64,
    /// Share of replicates choosing the oracle value itself.
    pub share_oracle: f64,
    /// Several models: the candidate of each count (`family knob = value`), in the order of
    /// `chosen_counts`.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub candidates: Vec<String>,
    /// Several models: the oracle's candidate (one of `candidates`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub oracle_candidate: Option<String>,
}

fn same_family(p: &PointRow, best: &Best) -> bool {
    match (&p.family, &best.family) {
        (Some(a), Some(b)) => a == b,
        _ => true,
    }
}

/// Builds the selection section from the summed counts and the rows of the candidates, in the
/// order of the counts (with several models: every model's grid at the largest size, end to end).
/// With several models each candidate is named `label knob = value`, the knob from `knob_of`.
pub fn selection(
    audit: &AuditPlan,
    counts: &[u64],
    points: &[PointRow],
    best: &Best,
    knob_of: &dyn Fn(&str) -> &'static str,
) -> Selection {
    let total: u64 = counts.iter().sum();
    let el: Vec<f64> = points.iter().map(|p| p.expected_loss()).collect();
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
    let several = points.iter().any(|p| p.family.is_some());
    // With several models a choice of another model can be within one standard error of the
    // oracle too: the rule of `best.within_one_se` (expected loss at most the best's plus its
    // standard error) over every candidate. Only the oracle's own model was counted (a tree
    // 3e-4 worse than the best k-NN, inside its 0.0014, was counted as outside).
    let within: u64 = points
        .iter()
        .zip(counts)
        .filter(|(p, _)| {
            if several {
                best.admits(p.expected_loss())
            } else {
                same_family(p, best) && best.within_one_se.contains(&p.value)
            }
        })
        .map(|(_, &c)| c)
        .sum();
    let at_oracle: u64 = points
        .iter()
        .zip(counts)
        .filter(|(p, _)| same_family(p, best) && p.value == best.value)
        .map(|(_, &c)| c)
        .sum();
    let name = |p: &PointRow| {
        let label = p.family.as_deref().unwrap_or("");
        format!("{label} {} = {}", knob_of(label), fmt_value(p.value))
    };
    Selection {
        folds: audit.folds,
        rule: audit.rule.name().into(),
        chosen_counts: counts.to_vec(),
        oracle_best: best.value,
        mean_excess_loss: mean,
        q90_excess_loss: q90,
        share_within_one_se: share(within),
        share_oracle: share(at_oracle),
        oracle_candidate: several
            .then(|| {
                points
                    .iter()
                    .find(|p| p.family == best.family && p.value == best.value)
                    .map(name)
            })
            .flatten(),
        candidates: if several {
            points.iter().map(name).collect()
        } else {
            Vec::new()
        },
    }
}

/// One plain sentence for the table output.
pub fn sentence(s: &Selection, knob: &str, grid: &[f64]) -> String {
    let total: u64 = s.chosen_counts.iter().sum();
    // Every candidate chosen as often as the most chosen one (a tie named one of two values).
    let top = s.chosen_counts.iter().copied().max().unwrap_or(0);
    let tied: Vec<usize> = (0..s.chosen_counts.len())
        .filter(|&j| s.chosen_counts[j] == top)
        .collect();
    let name = |j: usize| {
        if s.candidates.is_empty() {
            grid.get(j).map(|v| fmt_value(*v)).unwrap_or_default()
        } else {
            s.candidates.get(j).cloned().unwrap_or_default()
        }
    };
    let names: Vec<String> = tied.iter().map(|&j| name(j)).collect();
    let listed = match names.as_slice() {
        [one] => one.clone(),
        [rest @ .., last] => format!("{} and {last}", rest.join(", ")),
        [] => String::new(),
    };
    // With several models the candidates carry their own names ("knn k = 10"); the oracle is
    // the candidate of zero excess loss.
    let (chosen, oracle) = if s.candidates.is_empty() {
        (format!("{knob} = {listed}"), fmt_value(s.oracle_best))
    } else {
        let oracle = s
            .oracle_candidate
            .clone()
            .unwrap_or_else(|| fmt_value(s.oracle_best));
        (listed, oracle)
    };
    let each = if tied.len() > 1 { " each" } else { "" };
    format!(
        "{}-fold cross-validation ({} rule) chose {chosen} most often ({} of {total} replicates{each}); \
         the oracle best is {oracle} (chosen in {}); {} of choices are within one standard error of it; \
         excess loss over the oracle: mean {}, 90% quantile {}.",
        s.folds,
        s.rule,
        top,
        crate::fmt::fmt_percent(s.share_oracle),
        crate::fmt::fmt_percent(s.share_within_one_se),
        fmt_num(s.mean_excess_loss),
        fmt_num(s.q90_excess_loss)
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sel(counts: &[u64]) -> Selection {
        Selection {
            folds: 5,
            rule: "min".into(),
            chosen_counts: counts.to_vec(),
            oracle_best: 5.0,
            mean_excess_loss: 0.0,
            q90_excess_loss: 0.0,
            share_within_one_se: 1.0,
            share_oracle: 0.35,
            candidates: Vec::new(),
            oracle_candidate: None,
        }
    }

    #[test]
    fn a_tie_for_most_chosen_names_every_tied_value() {
        let grid = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0];
        let s = sentence(&sel(&[0, 0, 5, 7, 7, 1]), "max_depth", &grid);
        assert!(
            s.contains("chose max_depth = 4 and 5 most often (7 of 20 replicates each)"),
            "{s}"
        );
        let s = sentence(&sel(&[0, 0, 5, 8, 6, 1]), "max_depth", &grid);
        assert!(
            s.contains("chose max_depth = 4 most often (8 of 20 replicates);"),
            "{s}"
        );
    }
}
