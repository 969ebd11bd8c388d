//! The result document and its renderings (JSON, CSV, per-point CSV, terminal table). These are
//! the only types that derive `Serialize`; CSV rows and JSON come from the same structs.

pub mod table;

use std::io::Write;
use std::path::Path;

use serde::Serialize;

use crate::dgp::Response;
use crate::error::Error;
use crate::runner::Outcome;
use crate::scenario::{Design, GridKind, Plan, Source};

/// Identifier of the result format.
pub const FORMAT: &str = "lossprism-result/1";

/// One input as resolved.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct InputEcho {
    /// Name.
    pub name: String,
    /// Distribution in words.
    pub distribution: String,
}

/// The scenario as resolved (defaults filled, grid expanded).
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ScenarioEcho {
    /// Name.
    pub name: String,
    /// Description.
    pub about: String,
    /// Data source kind.
    pub source: String,
    /// Training size n.
    pub train_size: usize,
    /// Evaluation points m.
    pub eval_size: usize,
    /// `random` or `fixed`.
    pub design: String,
    /// `fresh` or `design`.
    pub eval: String,
    /// Inputs.
    pub inputs: Vec<InputEcho>,
    /// Truth in words.
    pub truth: String,
    /// Noise in words.
    pub noise: String,
    /// Class labels (classification only).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub labels: Option<Vec<String>>,
    /// Grid values.
    pub grid: Vec<f64>,
    /// `list`, `range` or `log`.
    pub grid_kind: String,
    /// Number of replicate blocks.
    pub blocks: u64,
}

/// Standard errors of the averaged terms.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Stderr {
    /// Of `expected_loss`.
    pub expected_loss: Option<f64>,
    /// Of `bias_sq`.
    pub bias_sq: Option<f64>,
    /// Of `variance`.
    pub variance: Option<f64>,
    /// Of `expected_loss_direct`.
    pub expected_loss_direct: Option<f64>,
}

/// One grid value's decomposition.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct PointRow {
    /// Knob value.
    pub value: f64,
    /// `noise + bias_sq + variance`.
    pub expected_loss: f64,
    /// Unbiased squared bias, averaged over evaluation points.
    pub bias_sq: f64,
    /// Unbiased variance, averaged.
    pub variance: f64,
    /// Known noise variance, averaged.
    pub noise: f64,
    /// Mean squared error against fresh noisy responses (cross-check of `expected_loss`).
    pub expected_loss_direct: f64,
    /// Jackknife standard errors over replicate blocks.
    pub stderr: Stderr,
}

/// The grid value with the lowest expected loss.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Best {
    /// Knob value.
    pub value: f64,
    /// Its expected loss.
    pub expected_loss: f64,
    /// Its standard error.
    pub stderr: Option<f64>,
    /// Grid values whose expected loss is within one standard error of the best.
    pub within_one_se: Vec<f64>,
}

/// The result document (`lossprism-result/1`).
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ResultDoc {
    /// Always [`FORMAT`].
    pub format: String,
    /// lossprism version that wrote it.
    pub version: String,
    /// The resolved scenario.
    pub scenario: ScenarioEcho,
    /// Family name.
    pub family: String,
    /// Knob name.
    pub knob: String,
    /// Loss name.
    pub loss: String,
    /// Replicates R.
    pub replicates: u64,
    /// Master seed.
    pub seed: u64,
    /// One row per grid value, ascending.
    pub points: Vec<PointRow>,
    /// The best grid value.
    pub best: Best,
    /// One plain sentence reading the curve.
    pub reading: String,
}

/// One row of the per-evaluation-point CSV.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct PointDetail {
    /// Knob value.
    pub value: f64,
    /// Evaluation point index.
    pub point: usize,
    /// f at the point.
    pub truth: f64,
    /// Noise variance at the point.
    pub noise: f64,
    /// Mean prediction.
    pub mean_prediction: f64,
    /// Unbiased squared bias.
    pub bias_sq: f64,
    /// Unbiased variance.
    pub variance: f64,
}

fn opt(v: f64) -> Option<f64> {
    v.is_finite().then_some(v)
}

/// Resolved scenario echo of a plan.
pub fn scenario_echo(plan: &Plan) -> ScenarioEcho {
    let Source::Synthetic(s) = &plan.source;
    ScenarioEcho {
        name: plan.name.clone(),
        about: plan.about.clone(),
        source: "synthetic".into(),
        train_size: s.train_size,
        eval_size: s.eval_size,
        design: match s.design {
            Design::Random => "random",
            Design::Fixed => "fixed",
        }
        .into(),
        eval: if s.eval_at_design { "design" } else { "fresh" }.into(),
        inputs: s
            .process
            .inputs
            .iter()
            .map(|i| InputEcho {
                name: i.name.clone(),
                distribution: i.dist.describe(),
            })
            .collect(),
        truth: match &s.process.response {
            Response::Regression { truth, .. } => truth.describe(),
            Response::Classes(m) => m.describe(),
        },
        noise: match &s.process.response {
            Response::Regression { noise, .. } => noise.describe(),
            Response::Classes(_) => "label noise from the class probabilities".into(),
        },
        labels: match &s.process.response {
            Response::Regression { .. } => None,
            Response::Classes(m) => Some(m.labels.clone()),
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

/// Builds the result document of a finished run.
pub fn build(plan: &Plan, outcome: &Outcome) -> ResultDoc {
    let s = &outcome.summary;
    let points: Vec<PointRow> = plan
        .grid
        .iter()
        .enumerate()
        .map(|(g, &value)| {
            let t = s.terms[g];
            let e = s.stderr[g];
            PointRow {
                value,
                expected_loss: t.expected_loss,
                bias_sq: t.bias_sq,
                variance: t.variance,
                noise: t.noise,
                expected_loss_direct: t.expected_loss_direct,
                stderr: Stderr {
                    expected_loss: opt(e.expected_loss),
                    bias_sq: opt(e.bias_sq),
                    variance: opt(e.variance),
                    expected_loss_direct: opt(e.expected_loss_direct),
                },
            }
        })
        .collect();
    let best = best_of(&points);
    let reading = reading(plan.family.knob(), &points, &best);
    ResultDoc {
        format: FORMAT.into(),
        version: env!("CARGO_PKG_VERSION").into(),
        scenario: scenario_echo(plan),
        family: plan.family.name().into(),
        knob: plan.family.knob().into(),
        loss: plan.loss.name().into(),
        replicates: plan.replicates,
        seed: plan.seed,
        points,
        best,
        reading,
    }
}

/// The lowest expected loss (first one on exact ties) and the values within one SE of it.
pub fn best_of(points: &[PointRow]) -> Best {
    let mut bi = 0;
    for (i, p) in points.iter().enumerate() {
        if p.expected_loss < points[bi].expected_loss {
            bi = i;
        }
    }
    let b = &points[bi];
    let se = b.stderr.expected_loss;
    let within = points
        .iter()
        .filter(|p| p.expected_loss <= b.expected_loss + se.unwrap_or(0.0))
        .map(|p| p.value)
        .collect();
    Best {
        value: b.value,
        expected_loss: b.expected_loss,
        stderr: se,
        within_one_se: within,
    }
}

/// Formats a knob value compactly (`3`, `0.01`, `1e-4`).
pub fn fmt_value(v: f64) -> String {
    if v.fract() == 0.0 && v.abs() < 1e9 {
        format!("{}", v as i64)
    } else if v != 0.0 && (v.abs() < 1e-3 || v.abs() >= 1e6) {
        format!("{v:.3e}")
    } else {
        // Four significant digits, trailing zeros dropped (3.162, 31.62, 0.01).
        let digits = (3 - v.abs().log10().floor() as i32).clamp(0, 6) as usize;
        let s = format!("{v:.digits$}");
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    }
}

/// Formats a standard error with two significant digits.
pub fn fmt_se(v: f64) -> String {
    if !v.is_finite() {
        return "n/a".into();
    }
    let a = v.abs();
    if a != 0.0 && (a < 1e-3 || a >= 1e6) {
        format!("{v:.1e}")
    } else {
        let digits = if a == 0.0 {
            2
        } else {
            (1 - a.log10().floor() as i32).clamp(0, 6) as usize
        };
        format!("{v:.digits$}")
    }
}

/// Formats a number with 4 significant digits.
pub fn fmt_num(v: f64) -> String {
    if !v.is_finite() {
        return "n/a".into();
    }
    let a = v.abs();
    if a != 0.0 && (a < 1e-3 || a >= 1e6) {
        format!("{v:.3e}")
    } else {
        let digits = if a == 0.0 {
            3
        } else {
            (3 - a.log10().floor() as i32).clamp(0, 6) as usize
        };
        format!("{v:.digits$}")
    }
}

/// Describes the grid values where `pick` holds as runs of consecutive grid values
/// (`1 to 3 and 8`).
fn runs(points: &[PointRow], pick: impl Fn(&PointRow) -> bool) -> String {
    let mut parts: Vec<String> = Vec::new();
    let mut i = 0;
    while i < points.len() {
        if !pick(&points[i]) {
            i += 1;
            continue;
        }
        let start = i;
        while i + 1 < points.len() && pick(&points[i + 1]) {
            i += 1;
        }
        parts.push(if start == i {
            fmt_value(points[i].value)
        } else {
            format!(
                "{} to {}",
                fmt_value(points[start].value),
                fmt_value(points[i].value)
            )
        });
        i += 1;
    }
    match parts.len() {
        0 => String::new(),
        1 => parts.remove(0),
        _ => {
            let last = parts.pop().unwrap_or_default();
            format!("{} and {last}", parts.join(", "))
        }
    }
}

/// One plain sentence (or two) reading the curve: where bias² dominates, where variance does,
/// and where the lowest expected loss lies.
pub fn reading(knob: &str, points: &[PointRow], best: &Best) -> String {
    let bias_dominates = |p: &PointRow| p.bias_sq > p.variance;
    let n_bias = points.iter().filter(|p| bias_dominates(p)).count();
    let mut out = if n_bias == points.len() {
        format!("Bias² exceeds variance at every {knob} tried: the family underfits across the whole grid.")
    } else if n_bias == 0 {
        format!("Variance exceeds bias² at every {knob} tried: the family overfits across the whole grid.")
    } else {
        format!(
            "Bias² dominates at {knob} {}; variance dominates at {knob} {}.",
            runs(points, bias_dominates),
            runs(points, |p| !bias_dominates(p))
        )
    };
    let se = best
        .stderr
        .map(|s| format!(" ± {}", fmt_se(s)))
        .unwrap_or_default();
    out.push_str(&format!(
        " Lowest expected loss at {knob} = {}: {}{se}",
        fmt_value(best.value),
        fmt_num(best.expected_loss)
    ));
    let others: Vec<String> = best
        .within_one_se
        .iter()
        .filter(|v| **v != best.value)
        .map(|v| fmt_value(*v))
        .collect();
    if others.is_empty() {
        out.push('.');
    } else {
        out.push_str(&format!(
            " ({} within one standard error).",
            others.join(", ")
        ));
    }
    out
}

/// Per-evaluation-point rows.
pub fn point_details(plan: &Plan, outcome: &Outcome) -> Vec<PointDetail> {
    let total = &outcome.summary.total;
    let truth = &outcome.prepared.eval_truth;
    let nv = outcome.prepared.noise_var();
    let mut rows = Vec::with_capacity(total.grid * total.points);
    for (g, &value) in plan.grid.iter().enumerate() {
        for e in 0..total.points {
            let p = crate::decompose::squared::point(total, g, e, truth[e]);
            rows.push(PointDetail {
                value,
                point: e,
                truth: truth[e],
                noise: nv[e],
                mean_prediction: p.mean_prediction,
                bias_sq: p.bias_sq,
                variance: p.variance,
            });
        }
    }
    rows
}

/// Writes `bytes` to `path` atomically: a temporary file in the same folder, then a rename.
/// `-` writes to standard output.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), Error> {
    if path.as_os_str() == "-" {
        let mut out = std::io::stdout().lock();
        return out
            .write_all(bytes)
            .and_then(|_| out.flush())
            .map_err(|e| Error::io(path, &e));
    }
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => std::path::PathBuf::from("."),
    };
    let file_name = path
        .file_name()
        .ok_or_else(|| Error::Usage(format!("{}: not a file name", path.display())))?;
    let tmp = dir.join(format!(
        ".{}.{}.tmp",
        file_name.to_string_lossy(),
        std::process::id()
    ));
    let res = std::fs::write(&tmp, bytes).and_then(|_| std::fs::rename(&tmp, path));
    if let Err(e) = res {
        let _ = std::fs::remove_file(&tmp);
        return Err(Error::io(path, &e));
    }
    Ok(())
}

/// The JSON text of a result (pretty, newline-terminated).
pub fn to_json(doc: &ResultDoc) -> String {
    let mut s = serde_json::to_string_pretty(doc).expect("result types serialize");
    s.push('\n');
    s
}

/// CSV of the per-grid rows (one header, one row per grid value; stderr columns flattened).
pub fn to_csv(doc: &ResultDoc) -> String {
    #[derive(Serialize)]
    struct Row<'a> {
        #[serde(rename = "knob")]
        knob: &'a str,
        value: f64,
        expected_loss: f64,
        bias_sq: f64,
        variance: f64,
        noise: f64,
        expected_loss_direct: f64,
        se_expected_loss: Option<f64>,
        se_bias_sq: Option<f64>,
        se_variance: Option<f64>,
        se_expected_loss_direct: Option<f64>,
    }
    let mut w = csv::Writer::from_writer(Vec::new());
    for p in &doc.points {
        w.serialize(Row {
            knob: &doc.knob,
            value: p.value,
            expected_loss: p.expected_loss,
            bias_sq: p.bias_sq,
            variance: p.variance,
            noise: p.noise,
            expected_loss_direct: p.expected_loss_direct,
            se_expected_loss: p.stderr.expected_loss,
            se_bias_sq: p.stderr.bias_sq,
            se_variance: p.stderr.variance,
            se_expected_loss_direct: p.stderr.expected_loss_direct,
        })
        .expect("in-memory csv");
    }
    String::from_utf8(w.into_inner().expect("in-memory csv")).expect("utf-8")
}

/// CSV of the per-point rows, with the evaluation inputs as leading columns.
pub fn points_csv(plan: &Plan, outcome: &Outcome) -> String {
    let Source::Synthetic(s) = &plan.source;
    let names: Vec<String> = s.process.inputs.iter().map(|i| i.name.clone()).collect();
    let mut w = csv::Writer::from_writer(Vec::new());
    let mut header = vec!["value".to_string(), "point".to_string()];
    header.extend(names.iter().cloned());
    header.extend(["truth", "noise", "mean_prediction", "bias_sq", "variance"].map(String::from));
    w.write_record(&header).expect("in-memory csv");
    for d in point_details(plan, outcome) {
        let mut rec = vec![d.value.to_string(), d.point.to_string()];
        rec.extend(
            outcome
                .prepared
                .eval_x
                .row(d.point)
                .iter()
                .map(|v| v.to_string()),
        );
        rec.extend(
            [d.truth, d.noise, d.mean_prediction, d.bias_sq, d.variance].map(|v| v.to_string()),
        );
        w.write_record(&rec).expect("in-memory csv");
    }
    String::from_utf8(w.into_inner().expect("in-memory csv")).expect("utf-8")
}
