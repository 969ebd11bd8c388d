//! A validated, expanded scenario: every default filled, the grid expanded and sorted, the
//! family built, formulas compiled. Building a plan is the only place scenario semantics are
//! checked; every error names the file, the line and the key.

use std::ops::Range;
use std::path::Path;
use std::sync::Arc;

use toml::Spanned;

use super::spec::{ClassesSpec, DataSpec, InputSpec, ModelSpec, ScenarioSpec};
use crate::dgp::{
    Builtin, ClassKind, ClassModel, Input, InputDist, Noise, Response, Synthetic, Truth,
};
use crate::error::ScenarioError;
use crate::expr::Formula;
use crate::family::{self, Family, Task};

/// Default number of replicates when the file gives none.
pub const DEFAULT_REPLICATES: u64 = 200;
/// Default master seed when the file gives none.
pub const DEFAULT_SEED: u64 = 1;
/// Default number of blocks is `min(R, DEFAULT_MAX_BLOCKS)`.
pub const DEFAULT_MAX_BLOCKS: u64 = 32;

/// Command-line overrides applied on top of the file.
#[derive(Debug, Clone, Default)]
pub struct PlanOptions {
    /// Replaces `replicates`.
    pub replicates: Option<u64>,
    /// Replaces `seed`.
    pub seed: Option<u64>,
}

/// Training-input design.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Design {
    /// Fresh inputs every replicate.
    Random,
    /// Inputs drawn once; only the noise is redrawn (the setting of the closed forms).
    Fixed,
}

/// How the grid was written (the plot uses a log axis for `Log`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GridKind {
    /// An explicit list.
    List,
    /// `{ from, to, step }`.
    Range,
    /// `{ log = [lo, hi], count }`.
    Log,
}

/// The loss being decomposed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LossKind {
    /// Squared error.
    Squared,
    /// 0-1 loss (misclassification).
    ZeroOne,
}

impl LossKind {
    /// Name as written in files and results.
    pub fn name(self) -> &'static str {
        match self {
            LossKind::Squared => "squared",
            LossKind::ZeroOne => "zero_one",
        }
    }
}

/// A synthetic source, resolved.
#[derive(Debug, Clone)]
pub struct SyntheticPlan {
    /// The process.
    pub process: Synthetic,
    /// Training set size n.
    pub train_size: usize,
    /// Number of evaluation points m (equals n when evaluating at the design).
    pub eval_size: usize,
    /// Random or fixed design.
    pub design: Design,
    /// Evaluate at the training inputs (fixed design only).
    pub eval_at_design: bool,
}

/// Where training sets come from.
#[derive(Debug, Clone)]
pub enum Source {
    /// A known generating process.
    Synthetic(SyntheticPlan),
    /// A CSV table, decomposed by resampling its rows (see [`crate::table`]).
    Table(Box<crate::table::TablePlan>),
}

/// A scenario ready to run.
#[derive(Clone)]
pub struct Plan {
    /// File name as given (for messages).
    pub file: String,
    /// Scenario name.
    pub name: String,
    /// Description.
    pub about: String,
    /// Master seed.
    pub seed: u64,
    /// Seed of the evaluation points and of a fixed design (the file's `eval_seed`, else `seed`).
    pub eval_seed: u64,
    /// Whether the file set `eval_seed` explicitly.
    pub eval_seed_explicit: bool,
    /// Replicates R.
    pub replicates: u64,
    /// Number of replicate blocks.
    pub blocks: u64,
    /// Data source.
    pub source: Source,
    /// The family.
    pub family: Arc<dyn Family>,
    /// Grid values, ascending, distinct.
    pub grid: Vec<f64>,
    /// How the grid was written.
    pub grid_kind: GridKind,
    /// Loss.
    pub loss: LossKind,
    /// Regression or classification.
    pub task: Task,
    /// The selection audit (`[audit]`), if any.
    pub audit: Option<crate::audit::AuditPlan>,
}

impl std::fmt::Debug for Plan {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Plan")
            .field("name", &self.name)
            .field("seed", &self.seed)
            .field("replicates", &self.replicates)
            .field("family", &self.family.name())
            .field("grid", &self.grid)
            .finish()
    }
}

struct Ctx<'a> {
    file: &'a str,
    src: &'a str,
}

impl Ctx<'_> {
    fn err(
        &self,
        span: Option<Range<usize>>,
        key: &str,
        message: impl Into<String>,
    ) -> ScenarioError {
        ScenarioError {
            file: self.file.to_string(),
            line: span.map(|s| super::line_of(self.src, s.start)),
            key: Some(key.to_string()),
            message: message.into(),
        }
    }

    fn positive<T: Copy + Into<i64>>(
        &self,
        v: &Spanned<T>,
        key: &str,
        min: i64,
    ) -> Result<u64, ScenarioError> {
        let x: i64 = (*v.get_ref()).into();
        if x < min {
            return Err(self.err(
                Some(v.span()),
                key,
                format!("must be at least {min}, got {x}"),
            ));
        }
        let max = upper_limit(key);
        if x > max {
            return Err(self.err(
                Some(v.span()),
                key,
                format!("{x} is more than this tool accepts (at most {max})"),
            ));
        }
        Ok(x as u64)
    }
}

impl Plan {
    /// Validates a spec. `src` is the file text (for line numbers), `base` the folder that
    /// relative paths in the file are resolved against.
    pub fn from_spec(
        spec: &ScenarioSpec,
        src: &str,
        file: &str,
        base: &Path,
        opts: &PlanOptions,
    ) -> Result<Plan, ScenarioError> {
        let cx = Ctx { file, src };
        let name = spec.name.get_ref().trim().to_string();
        if name.is_empty() {
            return Err(cx.err(Some(spec.name.span()), "name", "must not be empty"));
        }
        let replicates = match (opts.replicates, &spec.replicates) {
            (Some(r), _) => {
                if r > upper_limit("--replicates") as u64 {
                    return Err(ScenarioError {
                        file: file.to_string(),
                        line: None,
                        key: Some("--replicates".into()),
                        message: format!(
                            "{r} is more than this tool accepts (at most {})",
                            upper_limit("--replicates")
                        ),
                    });
                }
                if r < 2 {
                    return Err(ScenarioError {
                        file: file.to_string(),
                        line: None,
                        key: Some("--replicates".into()),
                        message: format!("must be at least 2, got {r}"),
                    });
                }
                r
            }
            (None, Some(r)) => cx.positive(r, "replicates", 2)?,
            (None, None) => DEFAULT_REPLICATES,
        };
        let blocks = match &spec.blocks {
            Some(b) => {
                let b = cx.positive(b, "blocks", 1)?;
                b.min(replicates)
            }
            None => replicates.min(DEFAULT_MAX_BLOCKS),
        };
        let seed = opts.seed.or(spec.seed).unwrap_or(DEFAULT_SEED);
        let eval_seed = spec.eval_seed.unwrap_or(seed);

        let source_name = spec.data.source.get_ref().as_str();
        let source = match source_name {
            "synthetic" => {
                crate::table::reject_table_keys(&spec.data, src, file)?;
                reject_twin_keys(&cx, &spec.data)?;
                Source::Synthetic(synthetic(&cx, &spec.data)?)
            }
            "twin" => Source::Synthetic(crate::twin::from_spec(&spec.data, src, file, base)?),
            "table" if spec.data.reference.is_some() || spec.audit.is_some() => {
                return Err(cx.err(
                    Some(spec.data.source.span()),
                    if spec.audit.is_some() {
                        "audit"
                    } else {
                        "data.reference"
                    },
                    "belongs to a synthetic or twin source, not to `source = \"table\"`",
                ))
            }
            "table" => Source::Table(Box::new(crate::table::from_spec(
                &spec.data,
                src,
                file,
                base,
                spec.seed.unwrap_or(DEFAULT_SEED),
            )?)),
            other => {
                return Err(cx.err(
                    Some(spec.data.source.span()),
                    "data.source",
                    format!("unknown source `{other}`; expected `synthetic`, `table` or `twin`"),
                ))
            }
        };

        let classes = match &source {
            Source::Synthetic(s) => match &s.process.response {
                Response::Classes(m) => Some(m.labels.len()),
                Response::Regression { .. } => None,
            },
            Source::Table(t) => match t.table.task {
                Task::Classify { classes } => Some(classes),
                Task::Regress => None,
            },
        };
        let loss = match (&spec.loss, classes) {
            (None, None) => LossKind::Squared,
            (None, Some(_)) => LossKind::ZeroOne,
            (Some(l), _) => match (l.kind.get_ref().as_str(), classes) {
                ("squared", None) => LossKind::Squared,
                ("zero_one", Some(_)) => LossKind::ZeroOne,
                ("zero_one", None) => {
                    return Err(cx.err(
                        Some(l.kind.span()),
                        "loss.kind",
                        "`zero_one` needs a classification scenario: add [data.classes] (or use `squared`)",
                    ))
                }
                ("squared", Some(_)) => {
                    return Err(cx.err(
                        Some(l.kind.span()),
                        "loss.kind",
                        "a classification scenario ([data.classes]) is decomposed under `zero_one` loss",
                    ))
                }
                (other, _) => {
                    return Err(cx.err(
                        Some(l.kind.span()),
                        "loss.kind",
                        format!("unknown loss `{other}`; expected `squared` or `zero_one`"),
                    ))
                }
            },
        };
        let task = match classes {
            Some(k) => Task::Classify { classes: k },
            None => Task::Regress,
        };

        let (n_train, n_inputs) = match &source {
            Source::Synthetic(s) => (s.train_size, s.process.inputs.len()),
            Source::Table(t) => (t.train_size(), t.table.x.ncols()),
        };
        let fam = build_family(&cx, &spec.model, base)?;
        if !fam.supports(task) {
            return Err(cx.err(
                Some(spec.model.family.span()),
                "model.family",
                match task {
                    Task::Regress => format!("family `{}` does not do regression", fam.name()),
                    Task::Classify { .. } => format!(
                        "family `{}` does not classify; with [data.classes] use one of: {}",
                        fam.name(),
                        family::catalogue()
                            .iter()
                            .filter(|f| f.tasks.contains("classification"))
                            .map(|f| f.name)
                            .collect::<Vec<_>>()
                            .join(", ")
                    ),
                },
            ));
        }
        let (grid, grid_kind) = expand_grid(&cx, &spec.model.grid)?;
        fam.check_grid(&grid, n_train, n_inputs)
            .map_err(|m| cx.err(Some(spec.model.grid.span()), "model.grid", m))?;
        let audit = match &spec.audit {
            Some(a) => Some(crate::audit::from_spec(
                a,
                src,
                file,
                fam.as_ref(),
                &grid,
                n_train,
                n_inputs,
            )?),
            None => None,
        };
        let n_eval = match &source {
            Source::Synthetic(s) => s.eval_size,
            Source::Table(t) => t.table.x.nrows(),
        };
        let bytes = accumulator_bytes(blocks, grid.len(), n_eval, task);
        if bytes > MAX_ACCUMULATOR_BYTES {
            return Err(cx.err(
                Some(spec.model.grid.span()),
                "model.grid",
                format!(
                    "{} blocks × {} grid values × {n_eval} evaluation points need {:.1} GiB of accumulators (at most 8); lower `blocks`, the grid or `eval_size`",
                    blocks,
                    grid.len(),
                    bytes / 1024f64.powi(3)
                ),
            ));
        }

        Ok(Plan {
            file: file.to_string(),
            name,
            about: spec.about.clone().unwrap_or_default(),
            seed,
            eval_seed,
            eval_seed_explicit: spec.eval_seed.is_some(),
            replicates,
            blocks,
            source,
            family: fam,
            grid,
            grid_kind,
            loss,
            task,
            audit,
        })
    }

    /// Number of training rows per replicate.
    pub fn train_size(&self) -> usize {
        match &self.source {
            Source::Synthetic(s) => s.train_size,
            Source::Table(t) => t.train_size(),
        }
    }

    /// Replaces the family (for estimators supplied from Rust, see [`crate::harness`]),
    /// checking that it supports the task and accepts the grid, as planning a file would.
    pub fn with_family(mut self, family: Arc<dyn Family>) -> Result<Plan, ScenarioError> {
        let n_inputs = match &self.source {
            Source::Synthetic(s) => s.process.inputs.len(),
            Source::Table(t) => t.table.x.ncols(),
        };
        let err = |key: &str, message: String| ScenarioError {
            file: self.file.clone(),
            line: None,
            key: Some(key.to_string()),
            message,
        };
        if !family.supports(self.task) {
            let what = match self.task {
                Task::Regress => "regression".to_string(),
                Task::Classify { classes } => format!("classification with {classes} classes"),
            };
            return Err(err(
                "model.family",
                format!("family `{}` does not support {what}", family.name()),
            ));
        }
        family
            .check_grid(&self.grid, self.train_size(), n_inputs)
            .map_err(|m| err("model.grid", m))?;
        self.family = family;
        Ok(self)
    }

    /// Replicate index range `[start, end)` of block `b` (blocks differ in size by at most one).
    pub fn block_range(&self, b: u64) -> (u64, u64) {
        let r = self.replicates;
        let nb = self.blocks;
        (b * r / nb, (b + 1) * r / nb)
    }
}

/// Upper limits on sizes, so that an absurd value is a clear error rather than an allocation
/// failure. Generous for a laptop or a cluster node.
fn upper_limit(key: &str) -> i64 {
    match key {
        "data.train_size" => 10_000_000,
        "data.eval_size" => 1_000_000,
        "replicates" | "--replicates" => 1_000_000_000,
        "blocks" => 100_000,
        _ => 1_000_000_000,
    }
}

/// Bytes the block accumulators of a run hold at the end (all blocks are kept for the jackknife).
fn accumulator_bytes(blocks: u64, grid: usize, eval: usize, task: Task) -> f64 {
    let per_cell = match task {
        Task::Regress => 16.0,
        Task::Classify { classes } => 4.0 * classes as f64,
    };
    blocks as f64 * grid as f64 * eval as f64 * per_cell
}

/// Largest accumulator memory accepted (8 GiB).
const MAX_ACCUMULATOR_BYTES: f64 = 8.0 * 1024.0 * 1024.0 * 1024.0;

fn build_family(
    cx: &Ctx<'_>,
    m: &ModelSpec,
    base: &Path,
) -> Result<Arc<dyn Family>, ScenarioError> {
    let name = m.family.get_ref().as_str();
    let reject =
        |present: bool, key: &str, span: Option<Range<usize>>| -> Result<(), ScenarioError> {
            if present {
                Err(cx.err(
                    span,
                    &format!("model.{key}"),
                    format!("not an option of family `{name}`"),
                ))
            } else {
                Ok(())
            }
        };
    if name != "external" {
        let span = |s: Option<Range<usize>>| s.or_else(|| Some(m.family.span()));
        reject(
            m.command.is_some(),
            "command",
            span(m.command.as_ref().map(|s| s.span())),
        )?;
        reject(
            m.knob.is_some(),
            "knob",
            span(m.knob.as_ref().map(|s| s.span())),
        )?;
        let timeout = m.timeout_seconds.as_ref().map(|s| s.span());
        reject(
            m.timeout_seconds.is_some(),
            "timeout_seconds",
            span(timeout),
        )?;
    }
    let fam: Arc<dyn Family> = match name {
        "tree" => {
            reject(
                m.standardize.is_some(),
                "standardize",
                Some(m.family.span()),
            )?;
            let mut t = family::tree::TreeFamily::default();
            if let Some(l) = &m.min_samples_leaf {
                t.min_samples_leaf = cx.positive(l, "model.min_samples_leaf", 1)? as usize;
            }
            if let Some(c) = &m.criterion {
                t.criterion = match c.get_ref().as_str() {
                    "gini" => family::tree::Criterion::Gini,
                    "entropy" => family::tree::Criterion::Entropy,
                    other => {
                        return Err(cx.err(
                            Some(c.span()),
                            "model.criterion",
                            format!("unknown criterion `{other}`; expected `gini` or `entropy`"),
                        ))
                    }
                };
            }
            Arc::new(t)
        }
        "knn" => {
            reject(
                m.min_samples_leaf.is_some(),
                "min_samples_leaf",
                m.min_samples_leaf.as_ref().map(|s| s.span()),
            )?;
            reject(
                m.criterion.is_some(),
                "criterion",
                m.criterion.as_ref().map(|s| s.span()),
            )?;
            let mut k = family::knn::KnnFamily::default();
            if let Some(s) = m.standardize {
                k.standardize = s;
            }
            Arc::new(k)
        }
        "poly" | "ridge" => {
            reject(
                m.min_samples_leaf.is_some(),
                "min_samples_leaf",
                m.min_samples_leaf.as_ref().map(|s| s.span()),
            )?;
            reject(
                m.criterion.is_some(),
                "criterion",
                m.criterion.as_ref().map(|s| s.span()),
            )?;
            reject(
                m.standardize.is_some(),
                "standardize",
                Some(m.family.span()),
            )?;
            if name == "poly" {
                Arc::new(family::poly::PolyFamily)
            } else {
                Arc::new(family::ridge::RidgeFamily)
            }
        }
        "logistic" => {
            reject(
                m.min_samples_leaf.is_some(),
                "min_samples_leaf",
                m.min_samples_leaf.as_ref().map(|s| s.span()),
            )?;
            reject(
                m.criterion.is_some(),
                "criterion",
                m.criterion.as_ref().map(|s| s.span()),
            )?;
            reject(
                m.standardize.is_some(),
                "standardize",
                Some(m.family.span()),
            )?;
            Arc::new(family::logistic::LogisticFamily)
        }
        "external" | "custom" => {
            let span = |s: Option<Range<usize>>| s.or_else(|| Some(m.family.span()));
            let leaf = m.min_samples_leaf.as_ref().map(|s| s.span());
            reject(m.min_samples_leaf.is_some(), "min_samples_leaf", span(leaf))?;
            let criterion = m.criterion.as_ref().map(|s| s.span());
            reject(m.criterion.is_some(), "criterion", span(criterion))?;
            reject(m.standardize.is_some(), "standardize", span(None))?;
            if name == "custom" {
                Arc::new(crate::harness::Placeholder)
            } else {
                external_family(cx, m, base)?
            }
        }
        other => {
            let known: Vec<&str> = family::catalogue().iter().map(|f| f.name).collect();
            return Err(cx.err(
                Some(m.family.span()),
                "model.family",
                format!("unknown family `{other}`; known: {}", known.join(", ")),
            ));
        }
    };
    Ok(fam)
}

/// Builds `family = "external"` from `command`, `knob` and `timeout_seconds`.
fn external_family(
    cx: &Ctx<'_>,
    m: &ModelSpec,
    base: &Path,
) -> Result<Arc<dyn Family>, ScenarioError> {
    use family::external::{ExternalFamily, DEFAULT_TIMEOUT_SECONDS};
    let Some(command) = &m.command else {
        return Err(cx.err(
            Some(m.family.span()),
            "model.command",
            "family `external` needs `command`, e.g. command = [\"python3\", \"my_model.py\"]",
        ));
    };
    let Some(knob) = &m.knob else {
        return Err(cx.err(
            Some(m.family.span()),
            "model.knob",
            "family `external` needs `knob`, the name of the knob the grid sets",
        ));
    };
    let timeout = match &m.timeout_seconds {
        Some(t) => *t.get_ref(),
        None => DEFAULT_TIMEOUT_SECONDS,
    };
    let fam =
        ExternalFamily::new(command.get_ref(), knob.get_ref(), timeout, base).map_err(|e| {
            let (key, span) = match e.key {
                "knob" => ("model.knob", knob.span()),
                "timeout_seconds" => (
                    "model.timeout_seconds",
                    m.timeout_seconds
                        .as_ref()
                        .map_or(m.family.span(), |t| t.span()),
                ),
                _ => ("model.command", command.span()),
            };
            cx.err(Some(span), key, e.message)
        })?;
    Ok(Arc::new(fam))
}

fn number(v: &toml::Value) -> Option<f64> {
    match v {
        toml::Value::Integer(i) => Some(*i as f64),
        toml::Value::Float(f) => Some(*f),
        _ => None,
    }
}

fn expand_grid(
    cx: &Ctx<'_>,
    g: &Spanned<toml::Value>,
) -> Result<(Vec<f64>, GridKind), ScenarioError> {
    let span = Some(g.span());
    let e = |m: String| cx.err(span.clone(), "model.grid", m);
    let (mut vals, kind) = match g.get_ref() {
        toml::Value::Array(a) => {
            let mut out = Vec::with_capacity(a.len());
            for (i, v) in a.iter().enumerate() {
                match number(v) {
                    Some(x) if x.is_finite() => out.push(x),
                    _ => return Err(e(format!("entry {} is not a finite number", i + 1))),
                }
            }
            (out, GridKind::List)
        }
        toml::Value::Table(t) => {
            for k in t.keys() {
                if !["from", "to", "step", "log", "count"].contains(&k.as_str()) {
                    return Err(e(format!(
                        "unknown grid key `{k}`; use `{{ from, to, step }}` or `{{ log = [lo, hi], count }}`"
                    )));
                }
            }
            if let Some(lg) = t.get("log") {
                let pair: Vec<f64> = lg
                    .as_array()
                    .map(|a| a.iter().filter_map(number).collect())
                    .unwrap_or_default();
                if pair.len() != 2 || !(pair[0] > 0.0 && pair[1] > pair[0] && pair[1].is_finite()) {
                    return Err(e("`log` must be [lo, hi] with 0 < lo < hi".into()));
                }
                let count = t.get("count").and_then(|c| c.as_integer()).unwrap_or(0);
                if !(2..=10_000).contains(&count) {
                    return Err(e("`count` must be a whole number from 2 to 10000".into()));
                }
                if t.contains_key("from") || t.contains_key("to") || t.contains_key("step") {
                    return Err(e(
                        "mix of `log` with `from`/`to`/`step`; use one form".into()
                    ));
                }
                let (a, b) = (pair[0].ln(), pair[1].ln());
                let n = count as usize;
                let v = (0..n)
                    .map(|i| {
                        if i == 0 {
                            pair[0]
                        } else if i == n - 1 {
                            pair[1]
                        } else {
                            // Twelve significant digits, so that decades print as 10, not
                            // 9.999999999999993.
                            let v = (a + (b - a) * i as f64 / (n - 1) as f64).exp();
                            format!("{v:.11e}").parse::<f64>().unwrap_or(v)
                        }
                    })
                    .collect();
                (v, GridKind::Log)
            } else {
                let from = t.get("from").and_then(number);
                let to = t.get("to").and_then(number);
                let step = t.get("step").map(number).unwrap_or(Some(1.0));
                let (Some(from), Some(to), Some(step)) = (from, to, step) else {
                    return Err(e(
                        "a range grid needs numbers `from` and `to` (and optionally `step`)".into(),
                    ));
                };
                if t.contains_key("count") {
                    return Err(e("`count` goes with `log`; a range uses `step`".into()));
                }
                if step.is_nan() || step <= 0.0 || !from.is_finite() || !to.is_finite() || to < from
                {
                    return Err(e(format!(
                        "range from {from} to {to} step {step} is empty or invalid"
                    )));
                }
                let n = ((to - from) / step + 1e-9).floor() as usize + 1;
                if n > 10_000 {
                    return Err(e(format!("range has {n} values; at most 10000")));
                }
                (
                    (0..n).map(|i| from + step * i as f64).collect(),
                    GridKind::Range,
                )
            }
        }
        _ => {
            return Err(e(
                "must be a list of numbers, `{ from, to, step }` or `{ log = [lo, hi], count }`"
                    .into(),
            ))
        }
    };
    if vals.is_empty() {
        return Err(e("is empty; give at least one value".into()));
    }
    vals.sort_by(|a, b| a.total_cmp(b));
    for w in vals.windows(2) {
        if w[0] == w[1] {
            return Err(e(format!("value {} appears twice", w[0])));
        }
    }
    Ok((vals, kind))
}

fn pair(cx: &Ctx<'_>, v: &Spanned<Vec<f64>>, key: &str) -> Result<(f64, f64), ScenarioError> {
    let a = v.get_ref();
    if a.len() != 2 || !a[0].is_finite() || !a[1].is_finite() {
        return Err(cx.err(Some(v.span()), key, "must be two finite numbers [a, b]"));
    }
    Ok((a[0], a[1]))
}

fn input(cx: &Ctx<'_>, i: usize, s: &InputSpec) -> Result<Input, ScenarioError> {
    let key = format!("data.inputs[{i}]");
    let name = s.name.get_ref().clone();
    let valid_name = name
        .chars()
        .next()
        .is_some_and(|c| c.is_ascii_alphabetic() || c == '_')
        && name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_');
    if !valid_name || name == "pi" || name == "e" {
        return Err(cx.err(
            Some(s.name.span()),
            &format!("{key}.name"),
            format!("`{name}` is not a usable variable name (letters, digits, _; not `pi` or `e`)"),
        ));
    }
    let given = [s.uniform.is_some(), s.normal.is_some(), s.even.is_some()]
        .iter()
        .filter(|&&b| b)
        .count();
    if given != 1 {
        return Err(cx.err(
            Some(s.name.span()),
            &key,
            format!("input `{name}` needs exactly one of `uniform`, `normal`, `even`"),
        ));
    }
    let dist = if let Some(u) = &s.uniform {
        let (a, b) = pair(cx, u, &format!("{key}.uniform"))?;
        if b <= a {
            return Err(cx.err(Some(u.span()), &format!("{key}.uniform"), "needs lo < hi"));
        }
        InputDist::Uniform(a, b)
    } else if let Some(n) = &s.normal {
        let (m, sd) = pair(cx, n, &format!("{key}.normal"))?;
        if sd <= 0.0 {
            return Err(cx.err(Some(n.span()), &format!("{key}.normal"), "sd must be > 0"));
        }
        InputDist::Normal(m, sd)
    } else if let Some(ev) = &s.even {
        let (a, b) = pair(cx, ev, &format!("{key}.even"))?;
        if b <= a {
            return Err(cx.err(Some(ev.span()), &format!("{key}.even"), "needs lo < hi"));
        }
        InputDist::Even(a, b)
    } else {
        unreachable!("exactly one distribution checked above")
    };
    Ok(Input { name, dist })
}

fn formula(
    cx: &Ctx<'_>,
    f: &Spanned<String>,
    key: &str,
    names: &[&str],
) -> Result<Formula, ScenarioError> {
    Formula::parse(f.get_ref(), names)
        .map_err(|e| cx.err(Some(f.span()), key, format!("in `{}`: {e}", f.get_ref())))
}

/// Refuses the twin-only keys (`reference`, `noise.varying`) in a synthetic source.
fn reject_twin_keys(cx: &Ctx<'_>, d: &DataSpec) -> Result<(), ScenarioError> {
    if d.reference.is_some() {
        return Err(cx.err(
            Some(d.source.span()),
            "data.reference",
            "belongs to `source = \"twin\"`; a synthetic source uses [data.truth]",
        ));
    }
    if let Some(v) = d.noise.as_ref().and_then(|n| n.varying.as_ref()) {
        return Err(cx.err(
            Some(v.span()),
            "data.noise.varying",
            "belongs to `source = \"twin\"`; a synthetic source uses `sd_formula`",
        ));
    }
    Ok(())
}

fn synthetic(cx: &Ctx<'_>, d: &DataSpec) -> Result<SyntheticPlan, ScenarioError> {
    let train_size = match &d.train_size {
        Some(n) => cx.positive(n, "data.train_size", 2)? as usize,
        None => {
            return Err(cx.err(
                Some(d.source.span()),
                "data.train_size",
                "is required for a synthetic source",
            ))
        }
    };
    let design = match d.design.as_ref().map(|s| s.get_ref().as_str()) {
        None | Some("random") => Design::Random,
        Some("fixed") => Design::Fixed,
        Some(other) => {
            return Err(cx.err(
                d.design.as_ref().map(|s| s.span()),
                "data.design",
                format!("unknown design `{other}`; expected `random` or `fixed`"),
            ))
        }
    };
    let eval_at_design = match d.eval.as_ref().map(|s| s.get_ref().as_str()) {
        None | Some("fresh") => false,
        Some("design") => {
            if design != Design::Fixed {
                return Err(cx.err(
                    d.eval.as_ref().map(|s| s.span()),
                    "data.eval",
                    "`design` evaluation needs `design = \"fixed\"` (random designs change the inputs every replicate)",
                ));
            }
            true
        }
        Some(other) => {
            return Err(cx.err(
                d.eval.as_ref().map(|s| s.span()),
                "data.eval",
                format!("unknown value `{other}`; expected `fresh` or `design`"),
            ))
        }
    };
    let eval_size = if eval_at_design {
        if let Some(m) = &d.eval_size {
            if m.get_ref() != &(train_size as i64) {
                return Err(cx.err(
                    Some(m.span()),
                    "data.eval_size",
                    "with `eval = \"design\"` the evaluation points are the training inputs; drop eval_size or set it to train_size",
                ));
            }
        }
        train_size
    } else {
        match &d.eval_size {
            Some(m) => cx.positive(m, "data.eval_size", 1)? as usize,
            None => 1000,
        }
    };

    if d.classes.is_some() && (d.truth.is_some() || d.noise.is_some()) {
        return Err(cx.err(
            Some(d.source.span()),
            "data.classes",
            "give either [data.classes] (classification) or [data.truth] and [data.noise] (regression), not both",
        ));
    }
    let builtin = match d.truth.as_ref().and_then(|t| t.builtin.as_ref()) {
        Some(b) => Some(Builtin::from_name(b.get_ref()).ok_or_else(|| {
            cx.err(
                Some(b.span()),
                "data.truth.builtin",
                format!(
                    "unknown builtin `{}`; expected friedman1, friedman2 or friedman3",
                    b.get_ref()
                ),
            )
        })?),
        None => None,
    };
    let inputs: Vec<Input> = match (&d.inputs, builtin) {
        (Some(list), _) => list
            .iter()
            .enumerate()
            .map(|(i, s)| input(cx, i, s))
            .collect::<Result<_, _>>()?,
        (None, Some(b)) => b.default_inputs(),
        (None, None) => {
            return Err(cx.err(
                Some(d.source.span()),
                "data.inputs",
                "a synthetic source needs at least one [[data.inputs]]",
            ))
        }
    };
    if inputs.is_empty() {
        return Err(cx.err(
            Some(d.source.span()),
            "data.inputs",
            "needs at least one input",
        ));
    }
    for (i, a) in inputs.iter().enumerate() {
        if inputs[..i].iter().any(|b| b.name == a.name) {
            let span = d
                .inputs
                .as_ref()
                .and_then(|l| l.get(i))
                .map(|s| s.name.span());
            return Err(cx.err(
                span,
                &format!("data.inputs[{i}].name"),
                format!("input `{}` is defined twice", a.name),
            ));
        }
    }
    let names: Vec<&str> = inputs.iter().map(|i| i.name.as_str()).collect();
    if let Some(c) = &d.classes {
        let model = class_model(cx, c, &names)?;
        return Ok(SyntheticPlan {
            process: Synthetic {
                inputs,
                response: Response::Classes(model),
            },
            train_size,
            eval_size,
            design,
            eval_at_design,
        });
    }
    let Some(truth_spec) = &d.truth else {
        return Err(cx.err(
            Some(d.source.span()),
            "data.truth",
            "a synthetic source needs [data.truth] (regression) or [data.classes] (classification)",
        ));
    };
    let truth = match (&truth_spec.formula, builtin) {
        (Some(_), Some(_)) => {
            return Err(cx.err(
                truth_spec.formula.as_ref().map(|s| s.span()),
                "data.truth",
                "give either `formula` or `builtin`, not both",
            ))
        }
        (Some(f), None) => Truth::Formula(formula(cx, f, "data.truth.formula", &names)?),
        (None, Some(b)) => {
            if inputs.len() < b.min_inputs() {
                return Err(cx.err(
                    truth_spec.builtin.as_ref().map(|s| s.span()),
                    "data.inputs",
                    format!(
                        "{} reads {} inputs; only {} given",
                        b.name(),
                        b.min_inputs(),
                        inputs.len()
                    ),
                ));
            }
            Truth::Builtin(b)
        }
        (None, None) => {
            return Err(cx.err(
                Some(d.source.span()),
                "data.truth",
                "needs `formula` or `builtin`",
            ))
        }
    };
    let noise = match &d.noise {
        None => match builtin {
            Some(b) => Noise::Constant(b.default_sd()),
            None => {
                return Err(cx.err(
                    Some(d.source.span()),
                    "data.noise",
                    "a formula truth needs [data.noise] with `sd` or `sd_formula`",
                ))
            }
        },
        Some(n) => match (&n.sd, &n.sd_formula) {
            (Some(sd), None) => {
                let v = *sd.get_ref();
                if !(v.is_finite() && v >= 0.0) {
                    return Err(cx.err(
                        Some(sd.span()),
                        "data.noise.sd",
                        format!("must be a finite number >= 0, got {v}"),
                    ));
                }
                Noise::Constant(v)
            }
            (None, Some(f)) => Noise::Formula(formula(cx, f, "data.noise.sd_formula", &names)?),
            (Some(sd), Some(_)) => {
                return Err(cx.err(
                    Some(sd.span()),
                    "data.noise",
                    "give either `sd` or `sd_formula`, not both",
                ))
            }
            (None, None) => match builtin {
                Some(b) => Noise::Constant(b.default_sd()),
                None => {
                    return Err(cx.err(
                        Some(d.source.span()),
                        "data.noise",
                        "needs `sd` or `sd_formula`",
                    ))
                }
            },
        },
    };
    Ok(SyntheticPlan {
        process: Synthetic {
            inputs,
            response: Response::Regression { truth, noise },
        },
        train_size,
        eval_size,
        design,
        eval_at_design,
    })
}

fn class_model(cx: &Ctx<'_>, c: &ClassesSpec, names: &[&str]) -> Result<ClassModel, ScenarioError> {
    let labels: Vec<String> = c.labels.get_ref().clone();
    if labels.len() < 2 {
        return Err(cx.err(
            Some(c.labels.span()),
            "data.classes.labels",
            format!("needs at least 2 labels, got {}", labels.len()),
        ));
    }
    for (i, l) in labels.iter().enumerate() {
        if labels[..i].contains(l) {
            return Err(cx.err(
                Some(c.labels.span()),
                "data.classes.labels",
                format!("label `{l}` appears twice"),
            ));
        }
    }
    let k = labels.len();
    if c.flip.is_some() && c.rule.is_none() {
        let span = c.flip.as_ref().map(|f| f.span());
        return Err(cx.err(span, "data.classes.flip", "`flip` goes with `rule`"));
    }
    let given = [
        c.probability.is_some(),
        c.logits.is_some(),
        c.rule.is_some(),
    ]
    .iter()
    .filter(|&&b| b)
    .count();
    if given != 1 {
        return Err(cx.err(
            Some(c.labels.span()),
            "data.classes",
            "give exactly one of `probability` (two classes), `logits` (one per label) or `rule` (with `flip`)",
        ));
    }
    let kind = if let Some(p) = &c.probability {
        if k != 2 {
            return Err(cx.err(
                Some(p.span()),
                "data.classes.probability",
                format!("`probability` describes two classes; with {k} labels use `logits`"),
            ));
        }
        ClassKind::Probability(formula(cx, p, "data.classes.probability", names)?)
    } else if let Some(ls) = &c.logits {
        if ls.get_ref().len() != k {
            return Err(cx.err(
                Some(ls.span()),
                "data.classes.logits",
                format!(
                    "{} logits for {k} labels; give exactly one logit per label",
                    ls.get_ref().len()
                ),
            ));
        }
        let fs = ls
            .get_ref()
            .iter()
            .map(|src| {
                Formula::parse(src, names).map_err(|e| {
                    cx.err(
                        Some(ls.span()),
                        "data.classes.logits",
                        format!("in `{src}`: {e}"),
                    )
                })
            })
            .collect::<Result<Vec<_>, _>>()?;
        ClassKind::Logits(fs)
    } else {
        let rule = c.rule.as_ref().expect("checked above");
        let flip = match &c.flip {
            Some(f) => {
                let v = *f.get_ref();
                if !(0.0..1.0).contains(&v) {
                    return Err(cx.err(
                        Some(f.span()),
                        "data.classes.flip",
                        format!("must be in [0, 1), got {v}"),
                    ));
                }
                v
            }
            None => 0.0,
        };
        ClassKind::Flip {
            rule: formula(cx, rule, "data.classes.rule", names)?,
            flip,
        }
    };
    Ok(ClassModel { labels, kind })
}
