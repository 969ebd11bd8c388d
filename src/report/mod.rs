//! The result document and its renderings (JSON, CSV, per-point CSV, terminal table). These are
//! the only types that derive `Serialize`; CSV rows and JSON come from the same structs. The
//! result document types also derive `Deserialize` (read back by `check`).

pub mod html;
pub mod part;
pub mod plot;
pub mod table;

use std::io::Write;
use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::decompose::zero_one::ZeroOneTerms;
use crate::decompose::SquaredTerms;
use crate::dgp::Response;
use crate::error::Error;
use crate::runner::{Outcome, Summary};
use crate::scenario::{Design, GridKind, LossKind, Plan, Source};

/// Identifier of the result format.
pub const FORMAT: &str = "lossprism-result/1";

/// One input as resolved.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct InputEcho {
    /// Name.
    pub name: String,
    /// Distribution in words.
    pub distribution: String,
}

/// The scenario as resolved (defaults filled, grid expanded).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
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
    /// The scenario's explicit `eval_seed` (absent when the evaluation points follow `seed`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub eval_seed: Option<u64>,
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

/// Kohavi–Wolpert terms (0-1 loss).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct KohaviWolpert {
    /// `½(1 − Σ p_t²)`.
    pub noise: Option<f64>,
    /// `½ Σ (p_t − p_D)²`, finite-R corrected.
    pub bias_sq: Option<f64>,
    /// `½(1 − Σ p_D²)`, finite-R corrected.
    pub variance: Option<f64>,
}

/// James (2003) terms (0-1 loss).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct James {
    /// Systematic effect.
    pub systematic_effect: Option<f64>,
    /// Variance effect.
    pub variance_effect: Option<f64>,
}

/// Standard errors of the averaged terms (jackknife over replicate blocks); `null` where they
/// cannot be computed (fewer than two blocks). Fields that do not apply to the loss are absent.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Stderr {
    /// Of `expected_loss`.
    pub expected_loss: Option<f64>,
    /// Of `bias_sq` (squared loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bias_sq: Option<Option<f64>>,
    /// Of `bias` (0-1 loss, Domingos).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bias: Option<Option<f64>>,
    /// Of `variance`.
    pub variance: Option<f64>,
    /// Of `expected_loss_direct`.
    pub expected_loss_direct: Option<f64>,
    /// Of `net_variance` (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub net_variance: Option<Option<f64>>,
    /// Of `unbiased_variance` (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unbiased_variance: Option<Option<f64>>,
    /// Of `biased_variance` (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub biased_variance: Option<Option<f64>>,
    /// Of the Kohavi–Wolpert terms (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub kohavi_wolpert: Option<KohaviWolpert>,
    /// Of the James terms (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub james: Option<James>,
    /// Of `bias_sq_plus_noise` (table source, squared loss).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bias_sq_plus_noise: Option<Option<f64>>,
}

/// One grid value's decomposition. Squared loss fills `bias_sq`; 0-1 loss fills `bias` (Domingos)
/// and the 0-1 fields. `variance` is the squared-loss variance or Domingos' variance.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct PointRow {
    /// Knob value.
    pub value: f64,
    /// Expected loss: `noise + bias_sq + variance` (squared); `1 − Σ p_t p_D` (0-1).
    pub expected_loss: f64,
    /// Unbiased squared bias, averaged over evaluation points (squared loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bias_sq: Option<f64>,
    /// Domingos bias: share of points whose main prediction is not the Bayes class (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bias: Option<f64>,
    /// Variance, averaged.
    pub variance: f64,
    /// Known noise: σ² (squared) or the Bayes error (0-1), averaged.
    pub noise: f64,
    /// Loss against fresh responses (independent cross-check of `expected_loss`).
    pub expected_loss_direct: f64,
    /// Domingos net variance `E[c2 V]` (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub net_variance: Option<f64>,
    /// Domingos unbiased variance `E[(1 − B) V]` (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unbiased_variance: Option<f64>,
    /// Domingos biased variance `E[B V]` (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub biased_variance: Option<f64>,
    /// Kohavi–Wolpert decomposition (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub kohavi_wolpert: Option<KohaviWolpert>,
    /// James decomposition (0-1 loss).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub james: Option<James>,
    /// Table source, squared loss: `(mean − y)² − V/R` per row, averaged (bias² and noise
    /// together, since the noise of observed responses is unknown).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bias_sq_plus_noise: Option<f64>,
    /// `true` when `bias_sq` and `noise` are estimates (table source: `noise` is the noise
    /// estimate and `bias_sq = bias_sq_plus_noise − noise`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub estimated: Option<bool>,
    /// Jackknife standard errors over replicate blocks.
    pub stderr: Stderr,
}

impl PointRow {
    /// The bias-type term shown against variance: bias² (squared) or Domingos bias (0-1).
    pub fn bias_term(&self) -> f64 {
        self.bias_sq.or(self.bias).unwrap_or(f64::NAN)
    }
}

/// The grid value with the lowest expected loss.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
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
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
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
    /// Table source: the file, rows used and held out, encodings, resampling.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub table: Option<TableEcho>,
    /// Table source, squared loss: the noise-variance estimate.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub noise_estimate: Option<NoiseEstimateEcho>,
    /// Table source: the known distortion of the resampling scheme.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub scheme_note: Option<String>,
    /// The selection audit (`[audit]`): what cross-validation chose in each replicate.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub selection: Option<crate::audit::Selection>,
}

/// A noise-variance estimate on a table (`noise_estimate`).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct NoiseEstimateEcho {
    /// Estimated σ².
    pub value: f64,
    /// Its standard error.
    pub stderr: Option<f64>,
    /// `nn`, `gamma` or `gsjs`.
    pub method: String,
    /// The method in words, with its source.
    pub about: String,
}

/// How a table was read and resampled (`table`).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct TableEcho {
    /// The CSV file.
    pub path: String,
    /// The target column.
    pub target: String,
    /// Rows read (after dropping).
    pub rows: usize,
    /// Rows dropped under `missing = "drop"`.
    pub dropped_rows: usize,
    /// Rows locked in the holdout (never used by the decomposition).
    pub holdout_rows: usize,
    /// Rows the decomposition resamples.
    pub working_rows: usize,
    /// Working rows held out in fewer than 2 replicates, skipped by the averages.
    pub skipped_rows: usize,
    /// `bootstrap`, `half` or `subsample`.
    pub resample: String,
    /// Training rows per replicate.
    pub train_size: usize,
    /// Mean share of working rows held out per replicate.
    pub held_out_share: f64,
    /// Its standard error over replicates.
    pub held_out_share_stderr: Option<f64>,
    /// One line per one-hot encoded text column.
    pub encodings: Vec<String>,
}

fn opt(v: f64) -> Option<f64> {
    v.is_finite().then_some(v)
}

/// Resolved scenario echo of a plan.
pub fn scenario_echo(plan: &Plan) -> ScenarioEcho {
    let s = match &plan.source {
        Source::Synthetic(s) => s,
        Source::Table(t) => return crate::table::report::scenario_echo(plan, t),
    };
    ScenarioEcho {
        eval_seed: plan.eval_seed_explicit.then_some(plan.eval_seed),
        name: plan.name.clone(),
        about: plan.about.clone(),
        source: if s.process.is_twin() {
            "twin"
        } else {
            "synthetic"
        }
        .into(),
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

fn squared_row(value: f64, t: &SquaredTerms, e: &SquaredTerms) -> PointRow {
    PointRow {
        value,
        expected_loss: t.expected_loss,
        bias_sq: Some(t.bias_sq),
        bias: None,
        variance: t.variance,
        noise: t.noise,
        expected_loss_direct: t.expected_loss_direct,
        net_variance: None,
        unbiased_variance: None,
        biased_variance: None,
        kohavi_wolpert: None,
        james: None,
        bias_sq_plus_noise: None,
        estimated: None,
        stderr: Stderr {
            expected_loss: opt(e.expected_loss),
            bias_sq: Some(opt(e.bias_sq)),
            bias: None,
            variance: opt(e.variance),
            expected_loss_direct: opt(e.expected_loss_direct),
            net_variance: None,
            unbiased_variance: None,
            biased_variance: None,
            kohavi_wolpert: None,
            james: None,
            bias_sq_plus_noise: None,
        },
    }
}

fn zero_one_row(value: f64, t: &ZeroOneTerms, e: &ZeroOneTerms) -> PointRow {
    PointRow {
        value,
        expected_loss: t.expected_loss,
        bias_sq: None,
        bias: Some(t.bias),
        variance: t.variance,
        noise: t.noise,
        expected_loss_direct: t.expected_loss_direct,
        net_variance: Some(t.net_variance),
        unbiased_variance: Some(t.unbiased_variance),
        biased_variance: Some(t.biased_variance),
        kohavi_wolpert: Some(KohaviWolpert {
            noise: opt(t.kw_noise),
            bias_sq: opt(t.kw_bias_sq),
            variance: opt(t.kw_variance),
        }),
        james: Some(James {
            systematic_effect: opt(t.james_systematic),
            variance_effect: opt(t.james_variance),
        }),
        bias_sq_plus_noise: None,
        estimated: None,
        stderr: Stderr {
            expected_loss: opt(e.expected_loss),
            bias_sq: None,
            bias: Some(opt(e.bias)),
            variance: opt(e.variance),
            expected_loss_direct: opt(e.expected_loss_direct),
            net_variance: Some(opt(e.net_variance)),
            unbiased_variance: Some(opt(e.unbiased_variance)),
            biased_variance: Some(opt(e.biased_variance)),
            kohavi_wolpert: Some(KohaviWolpert {
                noise: opt(e.kw_noise),
                bias_sq: opt(e.kw_bias_sq),
                variance: opt(e.kw_variance),
            }),
            james: Some(James {
                systematic_effect: opt(e.james_systematic),
                variance_effect: opt(e.james_variance),
            }),
            bias_sq_plus_noise: None,
        },
    }
}

/// Builds the result document of a finished run.
pub fn build(plan: &Plan, outcome: &Outcome) -> ResultDoc {
    let points: Vec<PointRow> = match &outcome.summary {
        Summary::Table(t) => return crate::table::report::build(plan, t),
        Summary::Squared(s) => plan
            .grid
            .iter()
            .enumerate()
            .map(|(g, &v)| squared_row(v, &s.terms[g], &s.stderr[g]))
            .collect(),
        Summary::ZeroOne(s) => plan
            .grid
            .iter()
            .enumerate()
            .map(|(g, &v)| zero_one_row(v, &s.terms[g], &s.stderr[g]))
            .collect(),
    };
    let best = best_of(&points);
    let reading = reading(plan.family.knob(), plan.loss, &points, &best);
    let selection = match (&plan.audit, &outcome.audit) {
        (Some(a), Some(c)) => Some(crate::audit::selection(a, &c.counts, &points, &best)),
        _ => None,
    };
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
        table: None,
        noise_estimate: None,
        scheme_note: None,
        selection,
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
    if a != 0.0 && !(1e-3..1e6).contains(&a) {
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
    if a != 0.0 && !(1e-3..1e6).contains(&a) {
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
pub fn reading(knob: &str, loss: LossKind, points: &[PointRow], best: &Best) -> String {
    let bias_dominates = |p: &PointRow| p.bias_term() > p.variance;
    let n_bias = points.iter().filter(|p| bias_dominates(p)).count();
    let bias_word = match loss {
        LossKind::Squared => "Bias²",
        LossKind::ZeroOne => "Bias (Domingos)",
    };
    let mut out = if n_bias == points.len() {
        format!("{bias_word} exceeds variance at every {knob} tried: the family underfits across the whole grid.")
    } else if n_bias == 0 {
        format!(
            "Variance exceeds {} at every {knob} tried: the family overfits across the whole grid.",
            bias_word.to_lowercase()
        )
    } else {
        format!(
            "{bias_word} dominates at {knob} {}; variance dominates at {knob} {}.",
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

/// Writes several files so that either all of them appear or none does: every file is first
/// written to a temporary file beside its destination, then all are renamed. `-` entries are
/// written to standard output after the renames.
pub fn write_all_atomic(files: &[(&Path, Vec<u8>)]) -> Result<(), Error> {
    let mut staged: Vec<(std::path::PathBuf, &Path)> = Vec::new();
    let cleanup = |staged: &[(std::path::PathBuf, &Path)]| {
        for (tmp, _) in staged {
            let _ = std::fs::remove_file(tmp);
        }
    };
    for (path, bytes) in files {
        if path.as_os_str() == "-" {
            continue;
        }
        let tmp = temp_name(path)?;
        if let Err(e) = std::fs::write(&tmp, bytes) {
            let _ = std::fs::remove_file(&tmp);
            cleanup(&staged);
            return Err(Error::io(*path, &e));
        }
        staged.push((tmp, path));
    }
    for (i, (tmp, path)) in staged.iter().enumerate() {
        if let Err(e) = std::fs::rename(tmp, path) {
            cleanup(&staged[i..]);
            return Err(Error::io(*path, &e));
        }
    }
    for (path, bytes) in files {
        if path.as_os_str() == "-" {
            write_atomic(path, bytes)?;
        }
    }
    Ok(())
}

fn temp_name(path: &Path) -> Result<std::path::PathBuf, Error> {
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => std::path::PathBuf::from("."),
    };
    let file_name = path
        .file_name()
        .ok_or_else(|| Error::Usage(format!("{}: not a file name", path.display())))?;
    Ok(dir.join(format!(
        ".{}.{}.tmp",
        file_name.to_string_lossy(),
        std::process::id()
    )))
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
    let tmp = temp_name(path)?;
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

/// Flattens a JSON object into `(column, value)` pairs, nested keys joined with `_`
/// (`stderr_expected_loss`, `kohavi_wolpert_bias_sq`).
fn flatten(prefix: &str, v: &serde_json::Value, out: &mut Vec<(String, String)>) {
    match v {
        serde_json::Value::Object(map) => {
            for (k, v) in map {
                let key = if prefix.is_empty() {
                    k.clone()
                } else {
                    format!("{prefix}_{k}")
                };
                flatten(&key, v, out);
            }
        }
        serde_json::Value::Null => out.push((prefix.to_string(), String::new())),
        serde_json::Value::String(s) => out.push((prefix.to_string(), s.clone())),
        other => out.push((prefix.to_string(), other.to_string())),
    }
}

/// CSV of the per-grid rows: the same `PointRow` values as the JSON, nested fields flattened
/// (`stderr_bias_sq`), one header and one row per grid value; the first column names the knob.
pub fn to_csv(doc: &ResultDoc) -> String {
    let mut w = csv::Writer::from_writer(Vec::new());
    for (i, p) in doc.points.iter().enumerate() {
        let mut cells = vec![("knob".to_string(), doc.knob.clone())];
        let v = serde_json::to_value(p).expect("result types serialize");
        flatten("", &v, &mut cells);
        if i == 0 {
            w.write_record(cells.iter().map(|c| c.0.as_str()))
                .expect("in-memory csv");
        }
        w.write_record(cells.iter().map(|c| c.1.as_str()))
            .expect("in-memory csv");
    }
    String::from_utf8(w.into_inner().expect("in-memory csv")).expect("utf-8")
}

/// CSV with one row per evaluation point and grid value: the inputs, then the per-point terms.
pub fn points_csv(plan: &Plan, outcome: &Outcome) -> String {
    let Source::Synthetic(s) = &plan.source else {
        return match &outcome.summary {
            Summary::Table(t) => crate::table::resample::points_csv(plan, t),
            _ => String::new(),
        };
    };
    let prep = &outcome.prepared;
    let mut w = csv::Writer::from_writer(Vec::new());
    let mut header = vec!["value".to_string(), "point".to_string()];
    header.extend(s.process.inputs.iter().map(|i| i.name.clone()));
    let num = |v: f64| {
        if v.is_finite() {
            v.to_string()
        } else {
            String::new()
        }
    };
    match &outcome.summary {
        Summary::Squared(sum) => {
            header.extend(
                ["truth", "noise", "mean_prediction", "bias_sq", "variance"].map(String::from),
            );
            w.write_record(&header).expect("in-memory csv");
            let nv = prep.noise_var();
            for (g, &value) in plan.grid.iter().enumerate() {
                for (e, &noise_e) in nv.iter().enumerate().take(sum.total.points) {
                    let t = prep.eval_truth[e];
                    let p = crate::decompose::squared::point(&sum.total, g, e, t);
                    let mut rec = vec![value.to_string(), e.to_string()];
                    rec.extend(prep.eval_x.row(e).iter().map(|v| v.to_string()));
                    rec.extend([t, noise_e, p.mean_prediction, p.bias_sq, p.variance].map(num));
                    w.write_record(&rec).expect("in-memory csv");
                }
            }
        }
        Summary::Table(_) => {}
        Summary::ZeroOne(sum) => {
            let labels = match &s.process.response {
                Response::Classes(m) => m.labels.clone(),
                Response::Regression { .. } => Vec::new(),
            };
            header.extend(
                [
                    "bayes_class",
                    "main_prediction",
                    "expected_loss",
                    "noise",
                    "bias",
                    "variance",
                    "c1",
                    "c2",
                    "kw_bias_sq",
                    "kw_variance",
                    "james_systematic_effect",
                    "james_variance_effect",
                ]
                .map(String::from),
            );
            w.write_record(&header).expect("in-memory csv");
            let probs = prep
                .eval_probs
                .as_ref()
                .expect("classification has probabilities");
            for (g, &value) in plan.grid.iter().enumerate() {
                for e in 0..sum.total.points {
                    let pt: Vec<f64> = probs.row(e).to_vec();
                    let p = crate::decompose::zero_one::point(&sum.total, g, e, &pt);
                    let label = |c: usize| labels.get(c).cloned().unwrap_or_else(|| c.to_string());
                    let mut rec = vec![value.to_string(), e.to_string()];
                    rec.extend(prep.eval_x.row(e).iter().map(|v| v.to_string()));
                    rec.push(label(p.bayes_class));
                    rec.push(label(p.main_prediction));
                    let t = &p.terms;
                    rec.extend(
                        [
                            t.expected_loss,
                            t.noise,
                            t.bias,
                            t.variance,
                            p.c1,
                            p.c2,
                            t.kw_bias_sq,
                            t.kw_variance,
                            t.james_systematic,
                            t.james_variance,
                        ]
                        .map(num),
                    );
                    w.write_record(&rec).expect("in-memory csv");
                }
            }
        }
    }
    String::from_utf8(w.into_inner().expect("in-memory csv")).expect("utf-8")
}
