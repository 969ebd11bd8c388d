//! The result document of a table decomposition: the same `lossprism-result/1` types as a
//! synthetic run (see [`crate::report`]), with `bias_sq_plus_noise`, the noise estimate, `bias_sq`
//! flagged as estimated, the table's echo and the resampling scheme's known distortion.

use super::resample::TableOutcome;
use super::TablePlan;
use crate::decompose::table::TableTerms;
use crate::family::Task;
use crate::report::{
    best_of, reading, InputEcho, NoiseEstimateEcho, PointRow, ResultDoc, ScenarioEcho, Stderr,
    TableEcho, FORMAT,
};
use crate::scenario::{GridKind, LossKind, Plan};

fn opt(v: f64) -> Option<f64> {
    v.is_finite().then_some(v)
}

/// The resolved scenario of a table plan.
pub fn scenario_echo(plan: &Plan, t: &TablePlan) -> ScenarioEcho {
    let table = &t.table;
    let encoded: Vec<&str> = t
        .table
        .encodings
        .iter()
        .map(|e| e.column.as_str())
        .collect();
    ScenarioEcho {
        eval_seed: None,
        name: plan.name.clone(),
        about: plan.about.clone(),
        source: "table".into(),
        train_size: t.train_size(),
        eval_size: t.work.len(),
        design: t.scheme.name().into(),
        eval: match t.scheme {
            super::Scheme::Bootstrap => "out-of-bag",
            super::Scheme::Subsample { .. } => "held-out rows",
        }
        .into(),
        inputs: table
            .names
            .iter()
            .map(|n| InputEcho {
                name: n.clone(),
                distribution: match n.split_once('=') {
                    Some((col, level)) if encoded.contains(&col) => {
                        format!("indicator of `{col}` = \"{level}\" (one-hot)")
                    }
                    _ => format!("column of {}", table.path.display()),
                },
            })
            .collect(),
        truth: format!(
            "unknown: observed `{}` in {}",
            table.target,
            table.path.display()
        ),
        noise: match table.task {
            Task::Regress => format!("unknown; estimated by {}", t.noise_method.describe()),
            Task::Classify { .. } => {
                "unknown; folded into the bias against the observed labels".into()
            }
        },
        labels: match table.task {
            Task::Regress => None,
            Task::Classify { .. } => Some(table.labels.clone()),
        },
        grid: plan.grid.clone(),
        grid_kind: match plan.grid_kind {
            GridKind::List => "list",
            GridKind::Range => "range",
            GridKind::Log => "log",
        }
        .into(),
        blocks: plan.blocks,
    }
}

fn row(value: f64, t: &TableTerms, e: &TableTerms, loss: LossKind, noise: Option<f64>) -> PointRow {
    let (bias_sq, bias, noise_v) = match loss {
        LossKind::Squared => (
            noise.map(|n| t.bias_plus_noise - n),
            None,
            noise.unwrap_or(0.0),
        ),
        LossKind::ZeroOne => (None, Some(t.bias_plus_noise), 0.0),
    };
    let zo = loss == LossKind::ZeroOne;
    PointRow {
        value,
        expected_loss: t.expected_loss,
        bias_sq,
        bias,
        variance: t.variance,
        noise: noise_v,
        expected_loss_direct: t.expected_loss_direct,
        net_variance: zo.then_some(t.net_variance),
        unbiased_variance: zo.then_some(t.unbiased_variance),
        biased_variance: zo.then_some(t.biased_variance),
        kohavi_wolpert: None,
        james: None,
        bias_sq_plus_noise: (!zo).then_some(t.bias_plus_noise),
        estimated: Some(true),
        stderr: Stderr {
            expected_loss: opt(e.expected_loss),
            // The noise estimate is a constant across the grid; its own error is reported with it.
            bias_sq: (!zo && noise.is_some()).then(|| opt(e.bias_plus_noise)),
            bias: zo.then(|| opt(e.bias_plus_noise)),
            variance: opt(e.variance),
            expected_loss_direct: opt(e.expected_loss_direct),
            net_variance: zo.then(|| opt(e.net_variance)),
            unbiased_variance: zo.then(|| opt(e.unbiased_variance)),
            biased_variance: zo.then(|| opt(e.biased_variance)),
            kohavi_wolpert: None,
            james: None,
            bias_sq_plus_noise: (!zo).then(|| opt(e.bias_plus_noise)),
        },
    }
}

/// Builds the result document of a table decomposition.
pub fn build(plan: &Plan, out: &TableOutcome) -> ResultDoc {
    let tp = match &plan.source {
        crate::scenario::Source::Table(t) => t,
        _ => unreachable!("a table outcome comes from a table plan"),
    };
    let s = &out.summary;
    let noise = out.noise.map(|n| n.value);
    let points: Vec<PointRow> = plan
        .grid
        .iter()
        .enumerate()
        .map(|(g, &v)| row(v, &s.terms[g], &s.stderr[g], plan.loss, noise))
        .collect();
    let best = best_of(&points);
    let mut reading = reading(plan.family.knob(), plan.loss, &points, &best);
    reading.push_str(match plan.loss {
        LossKind::Squared => " (On a table, bias² is bias²+noise minus an estimated noise.)",
        LossKind::ZeroOne => {
            " (On a table, the bias is measured against the observed labels, noise included.)"
        }
    });
    let (share, share_se) = s.total.held_share();
    ResultDoc {
        format: FORMAT.into(),
        version: env!("CARGO_PKG_VERSION").into(),
        scenario: scenario_echo(plan, tp),
        family: plan.family.name().into(),
        knob: plan.family.knob().into(),
        loss: plan.loss.name().into(),
        replicates: plan.replicates,
        seed: plan.seed,
        points,
        best,
        reading,
        table: Some(TableEcho {
            path: tp.table.path.display().to_string(),
            target: tp.table.target.clone(),
            rows: tp.table.rows(),
            dropped_rows: tp.table.dropped_rows,
            holdout_rows: tp.holdout.len(),
            working_rows: tp.work.len(),
            skipped_rows: s.total.skipped_rows(),
            resample: tp.scheme.name().into(),
            train_size: tp.train_size(),
            held_out_share: share,
            held_out_share_stderr: opt(share_se),
            encodings: tp.table.encodings.iter().map(|e| e.describe()).collect(),
        }),
        noise_estimate: out.noise.map(|n| NoiseEstimateEcho {
            value: n.value,
            stderr: opt(n.stderr),
            method: n.method.name().into(),
            about: n.method.describe().into(),
        }),
        scheme_note: Some(tp.scheme.note(tp.work.len())),
        selection: None,
    }
}
