//! Planning the selection audit (`[audit] folds = K`, `rule`): what cross-validation inside each
//! replicate will do (the engine runs it, see [`crate::runner::audit`]).

use crate::error::ScenarioError;
use crate::family::Family;
use crate::scenario::spec::AuditSpec;

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
    family: &dyn Family,
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
    check_fold_fits(family, grid, smallest, n_inputs).map_err(|m| {
            err(
                a.folds.span(),
                "audit.folds",
                format!(
                    "with {folds} folds a fold fit trains on {smallest} of the {n_train} rows, too few for this model ({m}); use fewer folds or a larger `train_size`"
                ),
            )
        })?;
    Ok(AuditPlan {
        folds,
        rule,
        larger_is_simpler: family.larger_is_simpler(),
    })
}

/// Checks that a fold fit of `rows` training rows can fit `family` across `grid`: the grid
/// ([`Family::check_grid`]) and the family's options ([`Family::check_options`]: a leaf size or
/// a subsample that splits nothing on the fold's rows).
pub fn check_fold_fits(
    family: &dyn Family,
    grid: &[f64],
    rows: usize,
    n_inputs: usize,
) -> Result<(), String> {
    family.check_grid(grid, rows, n_inputs)?;
    family.check_options(rows, n_inputs).map_err(|(_, m)| m)
}
