//! A validated, expanded scenario: every default filled, grids expanded and sorted, families
//! built (each from its own checked options), formulas compiled, the loss resolved. Building a
//! plan is the only place scenario semantics are checked; every error names the file, the line
//! and the key.

use std::ops::Range;
use std::path::Path;
use std::sync::Arc;

use toml::Spanned;

use super::audit::AuditPlan;
use super::spec::{ClassesSpec, DataSpec, InputSpec, ScenarioSpec};
use crate::dataset::TablePlan;
use crate::decompose::{self, Loss, Shape};
use crate::dgp::{
    Builtin, ClassKind, ClassModel, Input, InputDist, Noise, NoiseShape, Response, Synthetic, Truth,
};
use crate::error::ScenarioError;
use crate::expr::Formula;
use crate::family::{self, BuildContext, Family, Options, Task};

/// Default number of replicates when the file gives none.
pub const DEFAULT_REPLICATES: u64 = 200;
/// Default master seed when the file gives none.
pub const DEFAULT_SEED: u64 = 1;
/// Fewest replicates a run accepts: every standard error is a jackknife that leaves one block of
/// replicates out and needs 2 replicates in the rest, so R = 2 (or one block) could only write
/// results without standard errors, which are refused (never `null` with exit 0).
pub const MIN_REPLICATES: u64 = 3;
/// Why, in the words of the refusal.
const WHY_MIN: &str =
    "every standard error leaves one block of replicates out and needs 2 in the rest";

/// Default number of blocks is `min(R, DEFAULT_MAX_BLOCKS)`.
pub const DEFAULT_MAX_BLOCKS: u64 = 32;
/// Most fits per training set (`fit_seeds`).
pub const MAX_FIT_SEEDS: usize = 1024;

/// Command-line overrides applied on top of the file.
#[derive(Debug, Clone, Default)]
pub struct PlanOptions {
    /// Replaces `replicates`.
    pub replicates: Option<u64>,
    /// Replaces `seed`.
    pub seed: Option<u64>,
    /// Replaces `eval_seed` (`run --eval-seed`): moves the evaluation points and a fixed design.
    pub eval_seed: Option<u64>,
    /// `--memory-limit` in bytes: a twin's reference that alone would take more is refused
    /// before it is fitted (the whole run is held to the limit once planned).
    pub memory_limit: Option<u64>,
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

impl GridKind {
    /// Name as written in results (`list`, `range`, `log`).
    pub fn name(self) -> &'static str {
        match self {
            GridKind::List => "list",
            GridKind::Range => "range",
            GridKind::Log => "log",
        }
    }
}

/// A synthetic source, resolved.
#[derive(Debug, Clone)]
pub struct SyntheticPlan {
    /// The process.
    pub process: Synthetic,
    /// Training set size n (the largest of `sizes`).
    pub train_size: usize,
    /// Every training size, ascending (one value unless a learning curve).
    pub sizes: Vec<usize>,
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
    /// A known generating process (a synthetic scenario or a twin).
    Synthetic(SyntheticPlan),
    /// A CSV table, decomposed by resampling its rows (see [`crate::dataset`]).
    Table(Box<TablePlan>),
}

/// One model section: a family, its grid and its fits per training set.
#[derive(Clone)]
pub struct ModelPlan {
    /// The family.
    pub family: Arc<dyn Family>,
    /// Grid values, ascending, distinct.
    pub grid: Vec<f64>,
    /// How the grid was written.
    pub grid_kind: GridKind,
    /// Fits per replicate training set (`fit_seeds`, default 1).
    pub fit_seeds: usize,
    /// The model's name in results: its `label`, else the family name. Distinct across the
    /// model sections.
    pub label: String,
}

impl std::fmt::Debug for ModelPlan {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ModelPlan")
            .field("family", &self.family.name())
            .field("label", &self.label)
            .field("grid", &self.grid)
            .field("fit_seeds", &self.fit_seeds)
            .finish()
    }
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
    /// Seed of the evaluation points and of a fixed design: `--eval-seed`, else the file's
    /// `eval_seed`, else the file's `seed`, else [`DEFAULT_SEED`]. `--seed` never moves it, so
    /// runs with fresh seeds estimate the same quantities at the same points.
    pub eval_seed: u64,
    /// Whether `eval_seed` was set explicitly (by the file or by `--eval-seed`).
    pub eval_seed_explicit: bool,
    /// Replicates R.
    pub replicates: u64,
    /// Number of replicate blocks.
    pub blocks: u64,
    /// Data source.
    pub source: Source,
    /// The model sections (at least one), all fitted on the same training sets.
    pub models: Vec<ModelPlan>,
    /// Training sizes, ascending: one, or several for a learning curve (every size is fitted on
    /// a nested prefix of one draw per replicate).
    pub sizes: Vec<usize>,
    /// The loss.
    pub loss: &'static dyn Loss,
    /// Regression or classification.
    pub task: Task,
    /// The selection audit (`[audit]`), if any.
    pub audit: Option<AuditPlan>,
}

impl std::fmt::Debug for Plan {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Plan")
            .field("name", &self.name)
            .field("seed", &self.seed)
            .field("replicates", &self.replicates)
            .field("models", &self.models)
            .field("loss", &self.loss.name())
            .finish()
    }
}

pub(crate) struct Ctx<'a> {
    pub(crate) file: &'a str,
    pub(crate) src: &'a str,
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

    fn err_line(
        &self,
        line: Option<usize>,
        key: &str,
        message: impl Into<String>,
    ) -> ScenarioError {
        ScenarioError {
            file: self.file.to_string(),
            line,
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

/// The lines of `src` where each `[model]` / `[[model]]` section starts (in order), and where each
/// ends (the next table header, or the end).
fn model_sections(src: &str) -> Vec<(usize, usize)> {
    let lines: Vec<&str> = src.lines().collect();
    let mut starts = Vec::new();
    for (i, l) in lines.iter().enumerate() {
        let t = l.trim();
        if t == "[model]"
            || t == "[[model]]"
            || t.starts_with("[model]")
            || t.starts_with("[[model]]")
        {
            starts.push(i);
        }
    }
    starts
        .iter()
        .map(|&s| {
            let end = (s + 1..lines.len())
                .find(|&j| lines[j].trim_start().starts_with('['))
                .unwrap_or(lines.len());
            (s, end)
        })
        .collect()
}

/// 1-based line of `key = ...` within section `(start, end)` of `src`, else the section's header.
fn key_line(src: &str, section: Option<(usize, usize)>, key: &str) -> Option<usize> {
    let (start, end) = section?;
    let found = src
        .lines()
        .enumerate()
        .skip(start)
        .take(end - start)
        .find(|(_, l)| {
            l.split_once('=')
                .is_some_and(|(k, _)| k.trim().trim_matches('"') == key)
        });
    Some(found.map_or(start, |(i, _)| i) + 1)
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
        let Some(name_spec) = &spec.name else {
            return Err(cx.err_line(
                None,
                "name",
                "is missing: every scenario starts with `name = \"...\"` (a short name used in outputs)",
            ));
        };
        let Some(data) = &spec.data else {
            return Err(cx.err_line(
                None,
                "data",
                "is missing: add a [data] section saying where training sets come from (source = \"synthetic\", \"table\" or \"twin\")",
            ));
        };
        let Some(model_spec) = &spec.model else {
            return Err(cx.err_line(
                None,
                "model",
                "is missing: add a [model] section with `family` and `grid` (`lossprism families` lists them)",
            ));
        };
        let name = name_spec.get_ref().trim().to_string();
        if name.is_empty() {
            return Err(cx.err(Some(name_spec.span()), "name", "must not be empty"));
        }
        let chars = name.chars().count();
        if chars > 200 {
            return Err(cx.err(
                Some(name_spec.span()),
                "name",
                format!("must be at most 200 characters; it has {chars}"),
            ));
        }
        // Control characters, and the marks that reorder text on a terminal (a name with
        // U+202E printed backwards in every report).
        if let Some(c) = name
            .chars()
            .find(|&c| c.is_control() || crate::fmt::reorders(c))
        {
            return Err(cx.err(
                Some(name_spec.span()),
                "name",
                format!(
                    "holds the control character U+{:04X}; a name is one line of printable text",
                    c as u32
                ),
            ));
        }
        // The description may run over lines; other controls and reordering marks reached the
        // HTML report and the terminal raw.
        if let Some(c) = spec.about.as_deref().and_then(|a| {
            a.chars()
                .find(|&c| (c.is_control() && !matches!(c, '\n' | '\t')) || crate::fmt::reorders(c))
        }) {
            let line = src
                .lines()
                .take_while(|l| !l.trim_start().starts_with('['))
                .position(|l| l.split_once('=').is_some_and(|(k, _)| k.trim() == "about"))
                .map(|i| i + 1);
            return Err(cx.err_line(
                line,
                "about",
                format!(
                    "holds the control character U+{:04X}; a description is printable text \
                     (lines and tabs are kept)",
                    c as u32
                ),
            ));
        }
        let replicates = match (opts.replicates, &spec.replicates) {
            (Some(r), _) => {
                if r > upper_limit("--replicates") as u64 {
                    return Err(cx.err_line(
                        None,
                        "--replicates",
                        format!(
                            "{r} is more than this tool accepts (at most {})",
                            upper_limit("--replicates")
                        ),
                    ));
                }
                if r < MIN_REPLICATES {
                    return Err(cx.err_line(
                        None,
                        "--replicates",
                        format!("must be at least {MIN_REPLICATES}, got {r} ({WHY_MIN})"),
                    ));
                }
                r
            }
            (None, Some(r)) => {
                if *r.get_ref() < MIN_REPLICATES as i64 {
                    return Err(cx.err(
                        Some(r.span()),
                        "replicates",
                        format!(
                            "must be at least {MIN_REPLICATES}, got {} ({WHY_MIN})",
                            r.get_ref()
                        ),
                    ));
                }
                cx.positive(r, "replicates", MIN_REPLICATES as i64)?
            }
            (None, None) => DEFAULT_REPLICATES,
        };
        let blocks = match &spec.blocks {
            Some(bs) => {
                let b = cx.positive(bs, "blocks", 2)?;
                // A block holds at least one replicate; a larger `blocks` is refused, never
                // lowered (it enters the shard fingerprint and the shard count).
                if b > replicates {
                    let from = match (opts.replicates, &spec.replicates) {
                        (Some(_), _) => format!("--replicates {replicates}"),
                        (None, Some(_)) => format!("`replicates = {replicates}`"),
                        (None, None) => "the default".to_string(),
                    };
                    return Err(cx.err(
                        Some(bs.span()),
                        "blocks",
                        format!(
                            "{b} blocks for {replicates} replicates ({from}): a block holds at \
                             least one replicate, so `blocks` can be at most {replicates}"
                        ),
                    ));
                }
                // The largest block left out must leave 2 replicates for a standard error.
                let largest = replicates.div_ceil(b);
                if replicates - largest < 2 {
                    return Err(cx.err(
                        Some(bs.span()),
                        "blocks",
                        format!(
                            "{replicates} replicates in {b} blocks leave {} when the largest \
                             block is left out, and a standard error needs 2; use `blocks = \
                             {replicates}` or more replicates",
                            replicates - largest
                        ),
                    ));
                }
                b
            }
            None => replicates.min(DEFAULT_MAX_BLOCKS),
        };
        let seed = opts.seed.or(spec.seed).unwrap_or(DEFAULT_SEED);
        // The evaluation points (and a fixed design) follow the file, not `--seed`: fresh seeds
        // redraw only the training sets (issue #13).
        let eval_seed = opts
            .eval_seed
            .or(spec.eval_seed)
            .or(spec.seed)
            .unwrap_or(DEFAULT_SEED);

        let source_name = data.source.get_ref().as_str();
        let source = match source_name {
            "synthetic" => {
                super::table::reject_table_keys(data, src, file)?;
                reject_twin_keys(&cx, data)?;
                Source::Synthetic(synthetic(&cx, data)?)
            }
            "twin" => Source::Synthetic(super::twin::from_spec(
                data,
                src,
                file,
                base,
                opts.memory_limit,
            )?),
            "table" if data.reference.is_some() || spec.audit.is_some() => {
                // At the key's own line (sweep 67: both were reported at `source`).
                let (span, key) = match (&spec.audit, &data.reference) {
                    (Some(a), _) => (a.folds.span(), "audit"),
                    (None, Some(r)) => (r.family.span(), "data.reference"),
                    (None, None) => (data.source.span(), "data.source"),
                };
                return Err(cx.err(
                    Some(span),
                    key,
                    "belongs to a synthetic or twin source, not to `source = \"table\"`",
                ));
            }
            "table" => Source::Table(Box::new(super::table::from_spec(
                data,
                src,
                file,
                base,
                spec.seed.unwrap_or(DEFAULT_SEED),
            )?)),
            other => {
                return Err(cx.err(
                    Some(data.source.span()),
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
        let task = match classes {
            Some(k) => Task::Classify { classes: k },
            None => Task::Regress,
        };
        let loss = resolve_loss(&cx, spec, task)?;
        if loss.count_responses() {
            check_counts(&cx, spec, &source, loss)?;
        }

        let (n_train, n_inputs) = match &source {
            Source::Synthetic(s) => (s.train_size, s.process.inputs.len()),
            Source::Table(t) => (t.train_size(), t.table.x.ncols()),
        };
        let sizes = match &source {
            Source::Synthetic(s) => s.sizes.clone(),
            Source::Table(t) => t.sizes.clone().unwrap_or_else(|| vec![t.train_size()]),
        };
        let smallest = sizes[0];
        let models = build_models(&cx, model_spec, base, task, loss, smallest, n_inputs)?;
        if let (Source::Synthetic(s), Some(m)) = (
            &source,
            models.iter().find(|m| m.family.standardizes_inputs()),
        ) {
            offset_inputs(&cx, data, s, m.family.name())?;
        }
        let audit = match &spec.audit {
            Some(a) => Some(super::audit::from_spec(
                a,
                src,
                file,
                models[0].family.as_ref(),
                // Its own grid: every other model's is checked against its own family below
                // (the grids of all models against the first's family refused a tree beside a
                // boost whose grid holds 0 rounds).
                &models[0].grid,
                n_train,
                n_inputs,
            )?),
            None => None,
        };
        if let Some(a) = &audit {
            for m in &models[1..] {
                let smallest = n_train - n_train.div_ceil(a.folds);
                super::audit::check_fold_fits(m.family.as_ref(), &m.grid, smallest, n_inputs)
                    .map_err(|msg| {
                    cx.err_line(
                        None,
                        "audit.folds",
                        format!(
                            "with {} folds a fold fit trains on {smallest} of the {n_train} rows, too few for family `{}`: {msg}",
                            a.folds,
                            m.family.name()
                        ),
                    )
                })?;
            }
        }
        let n_eval = match &source {
            Source::Synthetic(s) => s.eval_size,
            Source::Table(t) => t.table.x.nrows(),
        };
        let mut bytes = 0.0;
        for m in models.iter().flat_map(|m| sizes.iter().map(move |_| m)) {
            let shape = Shape {
                grid: m.grid.len(),
                points: n_eval,
                classes: task.classes(),
                fits: m.fit_seeds,
                all_points: matches!(source, Source::Synthetic(_)),
                ensemble: m.family.caps(task).ensemble,
            };
            bytes += accumulator_bytes(blocks, loss, &shape);
        }
        if bytes > MAX_ACCUMULATOR_BYTES {
            // A `blocks` above the default of at most 32 is named: it, not the grid, made the
            // accumulators large (the grid's line was named for `blocks = 100000`).
            let (line, key) = match &spec.blocks {
                Some(bs) if blocks > 32 => (Some(super::line_of(src, bs.span().start)), "blocks"),
                _ => (
                    key_line(src, model_sections(src).first().copied(), "grid"),
                    "model.grid",
                ),
            };
            return Err(cx.err_line(
                line,
                key,
                format!(
                    "{blocks} blocks × the grid × {n_eval} evaluation points need {:.1} GiB of accumulators (at most 8); lower `blocks`, the grid or `eval_size`",
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
            eval_seed_explicit: opts.eval_seed.is_some() || spec.eval_seed.is_some(),
            replicates,
            blocks,
            source,
            models,
            sizes,
            loss,
            task,
            audit,
        })
    }

    /// The first (or only) model section.
    pub fn model(&self) -> &ModelPlan {
        &self.models[0]
    }

    /// Number of training rows per replicate (the largest training size).
    pub fn train_size(&self) -> usize {
        match &self.source {
            Source::Synthetic(s) => s.train_size,
            Source::Table(t) => t.train_size(),
        }
    }

    /// Number of input columns.
    pub fn n_inputs(&self) -> usize {
        match &self.source {
            Source::Synthetic(s) => s.process.inputs.len(),
            Source::Table(t) => t.table.x.ncols(),
        }
    }

    /// Number of (training size, model) cells: one accumulator each per block.
    pub fn cells(&self) -> usize {
        self.sizes.len() * self.models.len()
    }

    /// The index of (size `s`, model `i`) among the cells.
    pub fn cell(&self, s: usize, i: usize) -> usize {
        s * self.models.len() + i
    }

    /// Number of evaluation points (a table's working rows: its holdout is never evaluated).
    pub fn eval_size(&self) -> usize {
        match &self.source {
            Source::Synthetic(s) => s.eval_size,
            Source::Table(t) => t.work.len(),
        }
    }

    /// Bytes the block accumulators of every (training size, model) cell hold at the end of a run (all blocks are
    /// kept for the jackknife), as the plan's size check counts them.
    pub fn accumulator_bytes(&self) -> f64 {
        let points = self.eval_size();
        (0..self.cells())
            .map(|c| {
                let i = c % self.models.len();
                accumulator_bytes(self.blocks, self.loss, &self.shape(i, points))
            })
            .sum()
    }

    /// The accumulator shape of model `i` with `points` evaluation points.
    pub fn shape(&self, i: usize, points: usize) -> Shape {
        let m = &self.models[i];
        Shape {
            grid: m.grid.len(),
            points,
            classes: self.task.classes(),
            fits: m.fit_seeds,
            all_points: matches!(self.source, Source::Synthetic(_)),
            ensemble: m.family.caps(self.task).ensemble,
        }
    }

    /// Replaces the family of the first model (for estimators supplied from Rust, see
    /// [`crate::harness`]), checking that it supports the task and accepts the grid, as planning
    /// a file would.
    pub fn with_family(mut self, family: Arc<dyn Family>) -> Result<Plan, ScenarioError> {
        let err = |key: &str, message: String| ScenarioError {
            file: self.file.clone(),
            line: None,
            key: Some(key.to_string()),
            message,
        };
        // A result names its family and knob; `check` and `plot` hold a built-in family's name to
        // its own knob (an edited knob is refused there), so an estimator named like a built-in
        // family with another knob would write a document they refuse. Refuse it here instead.
        if let Some(info) = crate::family::catalogue()
            .iter()
            .find(|f| f.name == family.name() && !f.owns_knob(family.knob()))
        {
            return Err(err(
                "model.family",
                format!(
                    "the estimator is named `{}`, a built-in family whose knob is {}, but its knob \
                     is `{}`; give it a name of its own",
                    family.name(),
                    info.knob_names(),
                    crate::fmt::clip(family.knob(), 40)
                ),
            ));
        }
        // Nor which way is simpler (`check` holds a built-in family's name to its direction).
        if let Some(info) = crate::family::catalogue().iter().find(|f| {
            f.name == family.name()
                && f.fixed_direction()
                    .is_some_and(|d| d != family.larger_is_simpler())
        }) {
            return Err(err(
                "model.family",
                format!(
                    "the estimator is named `{}`, a built-in family whose larger `{}` is {}, but \
                     its `larger_is_simpler` says otherwise; give it a name of its own",
                    family.name(),
                    info.knob,
                    info.direction_words()
                ),
            ));
        }
        if !family.supports(self.task) {
            return Err(err(
                "model.family",
                format!(
                    "family `{}` does not support {}",
                    family.name(),
                    self.task.describe()
                ),
            ));
        }
        if self.loss.needs_probs() && !family.caps(self.task).probabilities {
            return Err(err(
                "model.family",
                format!(
                    "family `{}` gives no class probabilities, which the {} loss needs",
                    family.name(),
                    self.loss.name()
                ),
            ));
        }
        if self.loss.count_responses() && !family.caps(self.task).positive {
            return Err(err(
                "model.family",
                not_positive(family.name(), self.loss.name()),
            ));
        }
        family
            .check_grid(&self.models[0].grid, self.sizes[0], self.n_inputs())
            .map_err(|m| err("model.grid", m))?;
        self.models[0].family = family;
        Ok(self)
    }

    /// Replicate index range `[start, end)` of block `b` (blocks differ in size by at most one).
    pub fn block_range(&self, b: u64) -> (u64, u64) {
        let r = self.replicates as u128;
        let nb = self.blocks as u128;
        let b = b as u128;
        ((b * r / nb) as u64, ((b + 1) * r / nb) as u64)
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

/// Bytes the block accumulators of one model hold at the end (all blocks are kept for the
/// jackknife).
fn accumulator_bytes(blocks: u64, loss: &dyn Loss, shape: &Shape) -> f64 {
    let per_block: f64 = loss
        .layout(shape)
        .iter()
        .map(|a| {
            a.len as f64
                * match a.kind {
                    decompose::Kind::Float => 8.0,
                    decompose::Kind::Count => 4.0,
                }
        })
        .sum::<f64>()
        + 8.0 * shape.points as f64;
    blocks as f64 * per_block
}

/// Largest accumulator memory accepted (8 GiB).
const MAX_ACCUMULATOR_BYTES: f64 = 8.0 * 1024.0 * 1024.0 * 1024.0;

/// The loss: `[loss] kind`, else squared for regression and 0-1 for classification; checked
/// against the task.
fn resolve_loss(
    cx: &Ctx<'_>,
    spec: &ScenarioSpec,
    task: Task,
) -> Result<&'static dyn Loss, ScenarioError> {
    let Some(l) = &spec.loss else {
        return Ok(match task {
            Task::Regress => &decompose::squared::Squared,
            Task::Classify { .. } => &decompose::zero_one::ZeroOne,
        });
    };
    let name = l.kind.get_ref().as_str();
    let Some(loss) = decompose::by_name(name) else {
        let known: Vec<&str> = decompose::registry().iter().map(|l| l.name()).collect();
        return Err(cx.err(
            Some(l.kind.span()),
            "loss.kind",
            format!(
                "unknown loss `{name}`; expected one of {}",
                known.join(", ")
            ),
        ));
    };
    if !loss.supports(task) {
        let fitting: Vec<&str> = decompose::registry()
            .iter()
            .filter(|l| l.supports(task))
            .map(|l| l.name())
            .collect();
        let what = match task {
            Task::Regress => "a regression (a numeric response; add [data.classes] to classify)",
            Task::Classify { .. } => "a classification ([data.classes] or `task = \"classify\"`)",
        };
        return Err(cx.err(
            Some(l.kind.span()),
            "loss.kind",
            format!(
                "the `{name}` loss does not apply to {what}; use {}",
                fitting.join(" or ")
            ),
        ));
    }
    Ok(loss)
}

/// Why a family cannot serve a loss on positive means (Poisson deviance).
fn not_positive(family: &str, loss: &str) -> String {
    format!(
        "family `{family}` can predict negative means, which the {loss} loss cannot score (the deviance needs a positive mean); use `tree` or `knn`, whose predictions are averages of the counts"
    )
}

/// The noise shape a scenario asks for in `[data.noise]` (`shape`, `df`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ShapeChoice {
    /// Standard normal (the default).
    Gaussian,
    /// Student's t with this many degrees of freedom, scaled to variance 1.
    Student(f64),
    /// A twin's standardized residuals, resampled (built from the table when the twin is).
    Residuals,
}

/// Largest `df` of `shape = "student"` (beyond it the law is Gaussian to working precision).
pub const MAX_STUDENT_DF: f64 = 1e6;

/// `df` of `shape = "student"` must exceed this. At 4 or fewer the noise's fourth moment is
/// infinite, so the spread of a variance over replicates is too, and the jackknife standard
/// errors of the variance and loss terms lose their meaning. Measured with k-NN (k = 1, 5, 21)
/// at a fixed design (the scenario of `tests/closed_forms.rs` test 1c, R = 320, 40 seeds;
/// z = (variance − σ²/k, ESL eq. 7.10) / its standard error): at df 4.2, 4.5 and 5 the z-scores
/// had mean −0.4 to 0 and sd 0.9 to 1.25; at df 3 mean −0.6 (least −3.9); at df 2.5 mean −2.0
/// to −2.2, sd 2.4 to 2.7, least −9.9 (16 of 40 beyond ±2).
pub const MIN_STUDENT_DF: f64 = 4.0;

/// The shape of `[data.noise]` `n` (`twin`: the source is a twin, which also allows
/// `residuals`). An error carries the span, the key and the message.
pub fn shape_choice(
    n: &super::spec::NoiseSpec,
    twin: bool,
) -> Result<ShapeChoice, (Range<usize>, &'static str, String)> {
    let df = n.df.as_ref();
    let Some(shape) = n.shape.as_ref() else {
        return match df {
            Some(d) => Err((
                d.span(),
                "data.noise.df",
                "belongs to `shape = \"student\"`; add that key or remove `df`".into(),
            )),
            None => Ok(ShapeChoice::Gaussian),
        };
    };
    if n.poisson.as_ref().is_some_and(|p| *p.get_ref()) {
        return Err((
            shape.span(),
            "data.noise.shape",
            "Poisson counts have no noise shape; remove `shape` or `poisson`".into(),
        ));
    }
    let choice = match shape.get_ref().as_str() {
        "gaussian" => ShapeChoice::Gaussian,
        "student" => {
            let Some(d) = df else {
                return Err((
                    shape.span(),
                    "data.noise.df",
                    "`shape = \"student\"` needs `df`, its degrees of freedom (a number > 4)".into(),
                ));
            };
            let v = *d.get_ref();
            if !(v.is_finite() && v > MIN_STUDENT_DF && v <= MAX_STUDENT_DF) {
                return Err((
                    d.span(),
                    "data.noise.df",
                    format!(
                        "must be a number in ({MIN_STUDENT_DF}, {MAX_STUDENT_DF:e}] (at 4 or fewer the noise's fourth moment is infinite, and the standard errors with it), got {}",
                        crate::fmt::fmt_exact(v)
                    ),
                ));
            }
            return Ok(ShapeChoice::Student(v));
        }
        "residuals" if twin => ShapeChoice::Residuals,
        "residuals" => {
            return Err((
                shape.span(),
                "data.noise.shape",
                "`residuals` resamples a twin's table residuals; a synthetic source uses `gaussian` or `student`".into(),
            ))
        }
        other => {
            return Err((
                shape.span(),
                "data.noise.shape",
                format!(
                    "unknown shape `{}`; use {}",
                    crate::fmt::clip(other, 40),
                    if twin {
                        "`gaussian`, `student` or `residuals`"
                    } else {
                        "`gaussian` or `student`"
                    }
                ),
            ))
        }
    };
    match df {
        Some(d) => Err((
            d.span(),
            "data.noise.df",
            "belongs to `shape = \"student\"`; remove `df`".into(),
        )),
        None => Ok(choice),
    }
}

/// A loss on counts ([`Loss::count_responses`]) needs non-negative responses: Poisson counts
/// from a synthetic source (`[data.noise] poisson = true`), or a table whose target is never
/// negative. A twin's noise is continuous, so it is refused.
fn check_counts(
    cx: &Ctx<'_>,
    spec: &ScenarioSpec,
    source: &Source,
    loss: &dyn Loss,
) -> Result<(), ScenarioError> {
    let span = spec.loss.as_ref().map(|l| l.kind.span());
    let name = loss.name();
    match source {
        Source::Synthetic(s) => match &s.process.response {
            Response::Regression {
                noise: Noise::Poisson,
                ..
            } => Ok(()),
            _ if s.process.is_twin() => Err(cx.err(
                span,
                "loss.kind",
                format!("the `{name}` loss needs count responses, and a twin's noise is continuous; use a synthetic source with `poisson = true` in [data.noise], or the table itself"),
            )),
            _ => Err(cx.err(
                span,
                "loss.kind",
                format!("the `{name}` loss needs count responses: add `poisson = true` to [data.noise] (counts drawn Poisson with the truth as their mean) in place of `sd`"),
            )),
        },
        Source::Table(t) => {
            let table = &t.table;
            match table.y.iter().enumerate().find(|(_, v)| !(v.is_finite() && **v >= 0.0)) {
                None => Ok(()),
                Some((i, v)) => Err(cx.err(
                    span,
                    "loss.kind",
                    format!(
                        "the `{name}` loss needs non-negative responses (counts), but `{}` is {v} on line {} of {}",
                        table.target,
                        table.lines.get(i).copied().unwrap_or(i + 2),
                        table.path.display()
                    ),
                )),
            }
        }
    }
}

/// Builds every model section: `family`, `grid`, `fit_seeds`, and the family's own options
/// (taken by its builder; what is left is refused).
fn build_models(
    cx: &Ctx<'_>,
    model: &Spanned<toml::Value>,
    base: &Path,
    task: Task,
    loss: &'static dyn Loss,
    n_train: usize,
    n_inputs: usize,
) -> Result<Vec<ModelPlan>, ScenarioError> {
    let sections = model_sections(cx.src);
    let tables: Vec<&toml::Table> = match model.get_ref() {
        toml::Value::Table(t) => vec![t],
        toml::Value::Array(a) => {
            let mut v = Vec::with_capacity(a.len());
            for item in a {
                match item {
                    toml::Value::Table(t) => v.push(t),
                    _ => {
                        return Err(cx.err(
                            Some(model.span()),
                            "model",
                            "must be a [model] table or [[model]] tables",
                        ))
                    }
                }
            }
            v
        }
        _ => {
            return Err(cx.err(
                Some(model.span()),
                "model",
                "must be a [model] table or [[model]] tables",
            ))
        }
    };
    if tables.is_empty() {
        return Err(cx.err(
            Some(model.span()),
            "model",
            "needs at least one model section",
        ));
    }
    if tables.len() > 64 {
        return Err(cx.err(
            Some(model.span()),
            "model",
            format!("{} model sections; at most 64", tables.len()),
        ));
    }
    let mut out = Vec::with_capacity(tables.len());
    for (i, t) in tables.iter().enumerate() {
        let section = sections.get(i).copied();
        let line = |key: &str| key_line(cx.src, section, key);
        let prefix = if tables.len() > 1 {
            format!("model[{i}]")
        } else {
            "model".to_string()
        };
        let key = |k: &str| format!("{prefix}.{k}");
        let family_name = match t.get("family") {
            Some(toml::Value::String(s)) => s.clone(),
            Some(_) => {
                return Err(cx.err_line(
                    line("family"),
                    &key("family"),
                    "must be a family name (a string)",
                ))
            }
            None => {
                return Err(cx.err_line(
                    section.map(|s| s.0 + 1),
                    &key("family"),
                    "is missing: name the family (`lossprism families` lists them)",
                ))
            }
        };
        let Some(grid_value) = t.get("grid") else {
            return Err(cx.err_line(
                section.map(|s| s.0 + 1),
                &key("grid"),
                "is missing: give the knob values, e.g. grid = [1, 2, 4, 8]",
            ));
        };
        let fit_seeds = match t.get("fit_seeds") {
            None => 1,
            Some(toml::Value::Integer(s)) if (1..=MAX_FIT_SEEDS as i64).contains(s) => *s as usize,
            Some(v) => {
                return Err(cx.err_line(
                    line("fit_seeds"),
                    &key("fit_seeds"),
                    format!("must be a whole number from 1 to {MAX_FIT_SEEDS}, got {v}"),
                ))
            }
        };
        let Some(info) = family::info(&family_name) else {
            let known: Vec<&str> = family::catalogue().iter().map(|f| f.name).collect();
            return Err(cx.err_line(
                line("family"),
                &key("family"),
                format!(
                    "unknown family `{family_name}`; known: {}",
                    known.join(", ")
                ),
            ));
        };
        let label = match t.get("label") {
            None => family_name.clone(),
            Some(toml::Value::String(s))
                if !s.trim().is_empty()
                    && s.len() <= 64
                    && s.chars().all(|c| c.is_ascii_graphic() || c == ' ') =>
            {
                s.trim().to_string()
            }
            Some(_) => {
                return Err(cx.err_line(
                    line("label"),
                    &key("label"),
                    "must be a short printable name (1 to 64 ASCII characters)",
                ))
            }
        };
        if let Some(j) = out.iter().position(|m: &ModelPlan| m.label == label) {
            return Err(cx.err_line(
                line("label").or(section.map(|s| s.0 + 1)),
                &key("label"),
                format!(
                    "model sections {j} and {i} are both named `{label}`; give each a distinct `label = \"...\"`"
                ),
            ));
        }
        let entries: Vec<(String, toml::Value)> = t
            .iter()
            .filter(|(k, _)| !matches!(k.as_str(), "family" | "grid" | "fit_seeds" | "label"))
            .map(|(k, v)| (k.clone(), v.clone()))
            .collect();
        let mut opts = Options::new(&family_name, entries);
        let fam: Arc<dyn Family> = match info.build {
            Some(build) => {
                let cx_build = BuildContext {
                    base,
                    task,
                    // A loss that reads no class probability scores labels only.
                    labels_only: !loss.needs_probs(),
                };
                let built = build(&mut opts, &cx_build);
                let fam = built.map_err(|e| cx.err_line(line(&e.key), &key(&e.key), e.message))?;
                opts.finish()
                    .map_err(|e| cx.err_line(line(&e.key), &key(&e.key), e.message))?;
                fam
            }
            None => {
                opts.finish()
                    .map_err(|e| cx.err_line(line(&e.key), &key(&e.key), e.message))?;
                Arc::new(family::custom::Placeholder)
            }
        };
        if !fam.supports(task) {
            return Err(cx.err_line(
                line("family"),
                &key("family"),
                match task {
                    Task::Regress => format!("family `{}` does not do regression", fam.name()),
                    Task::Classify { classes } => format!(
                        "family `{}` does not classify {classes} classes; with [data.classes] \
                         use one of: {}",
                        fam.name(),
                        family::catalogue()
                            .iter()
                            .filter(|f| f.tasks.contains("classification")
                                && (classes <= 2
                                    || !f.tasks.contains("classification with two classes")))
                            .map(|f| f.name)
                            .collect::<Vec<_>>()
                            .join(", ")
                    ),
                },
            ));
        }
        if loss.needs_probs() && fam.name() != "custom" && !fam.caps(task).probabilities {
            return Err(cx.err_line(
                line("family"),
                &key("family"),
                format!(
                    "family `{}` gives no class probabilities, which the {} loss needs",
                    fam.name(),
                    loss.name()
                ),
            ));
        }
        if loss.count_responses() && fam.name() != "custom" && !fam.caps(task).positive {
            return Err(cx.err_line(
                line("family"),
                &key("family"),
                not_positive(fam.name(), loss.name()),
            ));
        }
        let spanned_grid = Spanned::new(model.span(), grid_value.clone());
        let grid_line = line("grid");
        let (grid, grid_kind) = expand_grid(cx, &spanned_grid).map_err(|e| ScenarioError {
            line: grid_line,
            key: Some(key("grid")),
            ..e
        })?;
        fam.check_grid(&grid, n_train, n_inputs)
            .map_err(|m| cx.err_line(grid_line, &key("grid"), m))?;
        fam.check_options(n_train, n_inputs)
            .map_err(|(k, m)| cx.err_line(line(k), &key(k), m))?;
        if fit_seeds > 1
            && !fam.caps(task).stochastic
            && fam.name() != "custom"
            && fam.name() != "external"
        {
            return Err(cx.err_line(
                line("fit_seeds"),
                &key("fit_seeds"),
                format!(
                    "family `{}` is deterministic: refitting a training set gives the same predictions, so `fit_seeds` must be 1",
                    fam.name()
                ),
            ));
        }
        out.push(ModelPlan {
            family: fam,
            grid,
            grid_kind,
            fit_seeds,
            label,
        });
    }
    Ok(out)
}

/// A whole number beyond 2^53 that no f64 holds exactly, in words (sweep 68:
/// 9007199254740993 ran as 9007199254740992); `None` for anything else.
fn inexact_whole(v: &toml::Value) -> Option<String> {
    match v {
        toml::Value::Integer(w) if (*w as f64) as i128 != *w as i128 => Some(format!(
            "{w}, a whole number a 64-bit float cannot hold exactly (it would run as {}); use \
             one of at most 2^53",
            *w as f64
        )),
        _ => None,
    }
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
                if let Some(m) = inexact_whole(v) {
                    return Err(e(format!("entry {} is {m}", i + 1)));
                }
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
                if t.contains_key("from") || t.contains_key("to") || t.contains_key("step") {
                    return Err(e(
                        "mix of `log` with `from`/`to`/`step`; use one form".into()
                    ));
                }
                let count = t.get("count").and_then(|c| c.as_integer()).unwrap_or(0);
                if !(2..=10_000).contains(&count) {
                    return Err(e("`count` must be a whole number from 2 to 10000".into()));
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
                            twelve_digits((a + (b - a) * i as f64 / (n - 1) as f64).exp())
                        }
                    })
                    .collect();
                (v, GridKind::Log)
            } else {
                for key in ["from", "to", "step"] {
                    if let Some(m) = t.get(key).and_then(inexact_whole) {
                        return Err(e(format!("`{key}` is {m}")));
                    }
                }
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
                        "range from {} to {} step {} is empty or invalid",
                        crate::fmt::fmt_exact(from),
                        crate::fmt::fmt_exact(to),
                        crate::fmt::fmt_exact(step)
                    )));
                }
                // Counted in floating point first: a span of 2e308 is +inf, and `as usize` of
                // it saturates, so `+ 1` wrapped to an empty grid ("is empty").
                let span = ((to - from) / step + 1e-9).floor();
                if span.is_nan() || span >= 10_000.0 {
                    return Err(e(format!(
                        "range from {} to {} step {} has more than 10000 values; at most 10000",
                        crate::fmt::fmt_exact(from),
                        crate::fmt::fmt_exact(to),
                        crate::fmt::fmt_exact(step)
                    )));
                }
                let n = span as usize + 1;
                (
                    (0..n)
                        .map(|i| {
                            // After `from` (kept as written), 0 itself (from −0.3 by 0.1
                            // reached 5.55e-17) and twelve significant digits when that is only
                            // a rounding away: 0.1 steps give 0.3, not 0.30000000000000004.
                            let v = from + step * i as f64;
                            let tol = 1e-9 * step;
                            if i == 0 {
                                v
                            } else if v.abs() <= tol {
                                0.0
                            } else {
                                Some(twelve_digits(v))
                                    .filter(|r| (r - v).abs() <= tol)
                                    .unwrap_or(v)
                            }
                        })
                        .collect(),
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
    // -0 is 0: written as `-0` in the outputs it would read as another value.
    for v in vals.iter_mut() {
        *v += 0.0;
    }
    vals.sort_by(|a, b| a.total_cmp(b));
    for w in vals.windows(2) {
        if w[0] == w[1] {
            return Err(e(format!(
                "value {} appears twice",
                crate::fmt::fmt_exact(w[0])
            )));
        }
        // Every table, picture and reading names a grid value with four significant digits:
        // two values that agree to them printed as two rows of `0.5` and a reading naming the
        // same value twice (a hostile sweep).
        let (a, b) = (crate::fmt::fmt_value(w[0]), crate::fmt::fmt_value(w[1]));
        if a == b {
            return Err(e(format!(
                "values {} and {} both print as {a} (tables, pictures and readings show four \
                 significant digits): give grid values that differ in them",
                crate::fmt::fmt_exact(w[0]),
                crate::fmt::fmt_exact(w[1])
            )));
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
            format!(
                "`{}` is not a usable variable name: names are ASCII, a letter or _ then letters, \
                 digits or _ (not `pi` or `e`)",
                crate::fmt::clip(&name, 60)
            ),
        ));
    }
    let given = [
        s.uniform.is_some(),
        s.normal.is_some(),
        s.even.is_some(),
        s.lognormal.is_some(),
        s.exponential.is_some(),
    ]
    .iter()
    .filter(|&&b| b)
    .count();
    if given != 1 {
        return Err(cx.err(
            Some(s.name.span()),
            &key,
            format!(
                "input `{name}` needs exactly one of `uniform`, `normal`, `even`, `lognormal`, \
                 `exponential`"
            ),
        ));
    }
    let dist = if let Some(u) = &s.uniform {
        let (a, b) = pair(cx, u, &format!("{key}.uniform"))?;
        if b <= a {
            return Err(cx.err(Some(u.span()), &format!("{key}.uniform"), "needs lo < hi"));
        }
        overflowing_range(cx, u, &format!("{key}.uniform"), a, b)?;
        InputDist::Uniform(a, b)
    } else if let Some(n) = &s.normal {
        let (m, sd) = pair(cx, n, &format!("{key}.normal"))?;
        if sd <= 0.0 {
            return Err(cx.err(Some(n.span()), &format!("{key}.normal"), "sd must be > 0"));
        }
        if sd < INPUT_MIN_SPREAD {
            return Err(cx.err(
                Some(n.span()),
                &format!("{key}.normal"),
                format!(
                    "sd {sd:.1e} is so small that the squares of differences of the draws \
                     underflow to 0 once the inputs are scaled, and the input would be read as \
                     constant; rescale the input (multiply it by a power of ten)"
                ),
            ));
        }
        // Draws reach about 10 standard deviations; beyond INPUT_MAX their squares overflow.
        if m.abs() + 10.0 * sd > INPUT_MAX {
            return Err(cx.err(
                Some(n.span()),
                &format!("{key}.normal"),
                format!(
                    "mean {} and sd {} give draws beyond ±{INPUT_MAX:e}, which overflow \
                     (to infinity) once the inputs are scaled or squared; rescale the input",
                    crate::fmt::fmt_exact(m),
                    crate::fmt::fmt_exact(sd)
                ),
            ));
        }
        InputDist::Normal(m, sd)
    } else if let Some(ev) = &s.even {
        let (a, b) = pair(cx, ev, &format!("{key}.even"))?;
        if b <= a {
            return Err(cx.err(Some(ev.span()), &format!("{key}.even"), "needs lo < hi"));
        }
        overflowing_range(cx, ev, &format!("{key}.even"), a, b)?;
        InputDist::Even(a, b)
    } else if let Some(l) = &s.lognormal {
        let k = format!("{key}.lognormal");
        let (m, sd) = pair(cx, l, &k)?;
        if sd <= 0.0 {
            return Err(cx.err(Some(l.span()), &k, "sdlog must be > 0"));
        }
        // Draws reach about exp(meanlog + 10 sdlog); beyond INPUT_MAX their squares overflow.
        if m + 10.0 * sd > INPUT_MAX.ln() {
            return Err(cx.err(
                Some(l.span()),
                &k,
                format!(
                    "meanlog {} and sdlog {} give draws beyond {INPUT_MAX:e} (exp(meanlog + 10 \
                     sdlog)), which overflow once the inputs are scaled or squared; lower them",
                    crate::fmt::fmt_exact(m),
                    crate::fmt::fmt_exact(sd)
                ),
            ));
        }
        // Centring draws spread over more than about 20 orders of magnitude loses the bulk's
        // digits (its values vanish beside the mean of the rare huge ones), and a standardizing
        // family then reads them as one value; the median must also stay clear of underflow
        // (a law judged by its overall sd, the rare huge draws', passed with its bulk at 1e-260,
        // and k-NN ignored the input with exit 0).
        if sd > LOGNORMAL_MAX_SDLOG {
            return Err(cx.err(
                Some(l.span()),
                &k,
                format!(
                    "sdlog {} spreads the draws over more than {:.0} orders of magnitude: \
                     centring and scaling them (as standardizing families do) loses the digits \
                     of most of them; draw the log as a normal input and write the formula with \
                     exp() of it, or keep sdlog at most {LOGNORMAL_MAX_SDLOG}",
                    crate::fmt::fmt_exact(sd),
                    8.0 * LOGNORMAL_MAX_SDLOG / std::f64::consts::LN_10
                ),
            ));
        }
        if m.exp() < INPUT_MIN_SPREAD || lognormal_sd(m, sd) < INPUT_MIN_SPREAD {
            return Err(cx.err(
                Some(l.span()),
                &k,
                "its draws are so small or so close together that the squares of their \
                 differences underflow to 0 once the inputs are scaled; raise meanlog or sdlog",
            ));
        }
        InputDist::LogNormal(m, sd)
    } else if let Some(r) = &s.exponential {
        let k = format!("{key}.exponential");
        let rate = *r.get_ref();
        if !(rate.is_finite() && rate > 0.0) {
            return Err(cx.err(
                Some(r.span()),
                &k,
                format!(
                    "the rate must be a finite number > 0, got {}",
                    crate::fmt::fmt_exact(rate)
                ),
            ));
        }
        // Draws reach about 40/rate (a chance of e^-40 beyond); the sd is 1/rate.
        if 40.0 / rate > INPUT_MAX || 1.0 / rate < INPUT_MIN_SPREAD {
            return Err(cx.err(
                Some(r.span()),
                &k,
                format!(
                    "rate {} gives draws of mean 1/rate, whose squares overflow or underflow \
                     once the inputs are scaled; rescale the input",
                    crate::fmt::fmt_exact(rate)
                ),
            ));
        }
        InputDist::Exponential(rate)
    } else {
        unreachable!("exactly one distribution checked above")
    };
    Ok(Input { name, dist })
}

/// Largest `sdlog` of a lognormal input: the mean of its draws is exp(sdlog²/2) times their
/// median (e^12.5 ≈ 3e5 at 5), so centring them keeps about 10 of a median draw's 16 digits.
/// A bound set by that arithmetic; real skewed quantities rarely exceed sdlog 2 (common
/// practice, no source).
pub const LOGNORMAL_MAX_SDLOG: f64 = 5.0;

/// Standard deviation of a lognormal input, `exp(m + s²/2)·√(exp(s²) − 1)` (a textbook
/// moment, from memory), computed so that a tiny `s` does not round to 0.
fn lognormal_sd(m: f64, s: f64) -> f64 {
    (m + 0.5 * s * s).exp() * (s * s).exp_m1().sqrt()
}

/// `v` to twelve significant digits (a grid value as written, not its rounding error).
fn twelve_digits(v: f64) -> f64 {
    format!("{v:.11e}").parse::<f64>().unwrap_or(v)
}

/// Most labels of a synthetic classification scenario (a rule of thumb, no source: far above
/// any class count measured here, 1000 classes ran; checks over the labels stay fast).
const MAX_LABELS: usize = 10_000;

/// Largest input magnitude accepted: beyond it a square overflows (a little above 1.3e154), and
/// with it a standardization, a ridge or k-NN distance, which then ignore the input and give
/// wrong numbers with no error (found by a hostile-input sweep at ±1e160); 1e150 leaves room for
/// sums of squares, as a twin's columns do (`commands::twin::TWIN_VALUE_MAX`).
const INPUT_MAX: f64 = 1e150;

/// Smallest spread of an input accepted (a uniform or even range's width, a normal sd): below
/// about 1e-154 the squares of differences underflow, and a standardization (ridge, k-NN, the
/// noise estimators) read the input as constant with no error (found by a hostile-input sweep:
/// an input on [0, 1e-200] was ignored, exit 0). The mirror of [`INPUT_MAX`].
pub const INPUT_MIN_SPREAD: f64 = 1e-150;

/// How many times [`crate::family::standardize::CONSTANT_RTOL`] an input's standard deviation
/// must be, as a share of its magnitude, when a family standardizes its inputs: a training set's
/// spread varies around the law's, and ten times keeps it clear of the line.
pub const OFFSET_MARGIN: f64 = 10.0;

/// The share of its magnitude below which an input's spread reads as rounding to a family that
/// standardizes its inputs ([`OFFSET_MARGIN`] times the standardizer's own line).
pub fn offset_share() -> f64 {
    OFFSET_MARGIN * crate::family::standardize::CONSTANT_RTOL
}

/// A table column whose spread an offset hides: more than rounding (a spread above 1e-13 of
/// its largest magnitude, about 450 units in the last place), a spread below 1e-10 of it (a
/// constant column with one value off is not an offset: its sd shrinks like 1/√rows while its
/// spread stays), and a standard deviation (divisor n) below [`offset_share`] of it. Returns
/// `(sd, size)` for the refusal's words.
pub fn offset_hidden(col: ndarray::ArrayView1<'_, f64>) -> Option<(f64, f64)> {
    let (lo, hi) = col
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
            (lo.min(v), hi.max(v))
        });
    let (spread, size) = (hi - lo, lo.abs().max(hi.abs()));
    if !(spread > 1e-13 * size && spread < 1e-10 * size) {
        return None;
    }
    let n = col.len() as f64;
    let mean = col.sum() / n;
    let sd = (col.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n).sqrt();
    (sd < offset_share() * size).then_some((sd, size))
}

/// Refuses a synthetic input whose standard deviation is below [`offset_share`] of its
/// magnitude when `family` standardizes its inputs: the fit would read it as rounding, i.e. as
/// constant, and ignore it (found by a hostile-input sweep: an input uniform on
/// [4e11, 4e11 + 1] was dropped by ridge and standardized k-NN, which fitted a constant, exit 0).
fn offset_inputs(
    cx: &Ctx<'_>,
    data: &DataSpec,
    s: &SyntheticPlan,
    family: &str,
) -> Result<(), ScenarioError> {
    for (i, inp) in s.process.inputs.iter().enumerate() {
        let (sd, size, law) = match inp.dist {
            InputDist::Uniform(a, b) => ((b - a) / 12f64.sqrt(), a.abs().max(b.abs()), "uniform"),
            InputDist::Even(a, b) => ((b - a) / 12f64.sqrt(), a.abs().max(b.abs()), "even"),
            InputDist::Normal(m, sd) => (sd, m.abs(), "normal"),
            InputDist::LogNormal(m, s) => (lognormal_sd(m, s), m.exp(), "lognormal"),
            // Its spread is its mean: never an offset.
            InputDist::Exponential(_) => continue,
            InputDist::Empirical { .. } => continue,
        };
        if sd >= offset_share() * size {
            continue;
        }
        let span = data
            .inputs
            .as_ref()
            .and_then(|v| v.get(i))
            .and_then(|spec| match law {
                "uniform" => spec.uniform.as_ref().map(|v| v.span()),
                "even" => spec.even.as_ref().map(|v| v.span()),
                "lognormal" => spec.lognormal.as_ref().map(|v| v.span()),
                _ => spec.normal.as_ref().map(|v| v.span()),
            });
        return Err(cx.err_line(
            span.map(|sp| crate::scenario::line_of(cx.src, sp.start)),
            &format!("data.inputs[{i}].{law}"),
            format!(
                "input `{}` has a standard deviation of {sd:.2e} beside values of {size:.3e}, \
                 below {:e} of their size: `{family}` standardizes its inputs and reads a \
                 training set whose spread falls below {:e} of its size as rounding, i.e. as \
                 constant, and this input's training sets come within ten times of that line; \
                 {}",
                inp.name,
                offset_share(),
                crate::family::standardize::CONSTANT_RTOL,
                match inp.dist {
                    // A lognormal law has no offset to subtract: its logarithm is normal.
                    InputDist::LogNormal(m, s) => format!(
                        "draw its logarithm minus meanlog instead (`normal = [0, {s:e}]`) and \
                         write the formulas with `{:.6e} * exp({})`",
                        m.exp(),
                        inp.name
                    ),
                    _ => format!(
                        "subtract an offset (draw the input minus {size:.3e} and write the \
                         formulas with it)"
                    ),
                }
            ),
        ));
    }
    Ok(())
}

/// Refuses an input range whose ends or width overflow, or whose width underflows (`uniform = [-1e308, 1e308]` is 2e308
/// wide: every draw would be infinite).
fn overflowing_range(
    cx: &Ctx<'_>,
    v: &Spanned<Vec<f64>>,
    key: &str,
    a: f64,
    b: f64,
) -> Result<(), ScenarioError> {
    if b - a < INPUT_MIN_SPREAD {
        return Err(cx.err(
            Some(v.span()),
            key,
            format!(
                "[{a:e}, {b:e}] is only {:.1e} wide: the squares of differences of such draws \
                 (a standardization, a distance, a ridge fit) underflow to 0, and the input \
                 would be read as constant; rescale the input (multiply it by a power of ten)",
                b - a
            ),
        ));
    }
    if a.abs() > INPUT_MAX || b.abs() > INPUT_MAX || !(b - a).is_finite() {
        return Err(cx.err(
            Some(v.span()),
            key,
            format!(
                "[{a:e}, {b:e}] reaches beyond ±{INPUT_MAX:e}: the draws' squares (a \
                 standardization, a distance, a ridge fit) would overflow to infinity; rescale \
                 the input"
            ),
        ));
    }
    Ok(())
}

fn formula(
    cx: &Ctx<'_>,
    f: &Spanned<String>,
    key: &str,
    names: &[&str],
) -> Result<Formula, ScenarioError> {
    Formula::parse(f.get_ref(), names).map_err(|e| {
        cx.err(
            Some(f.span()),
            key,
            format!("in `{}`: {e}", crate::fmt::clip(f.get_ref(), 80)),
        )
    })
}

/// Refuses the twin-only keys (`reference`, `noise.varying`, `noise.level`, `noise.smooth_k`)
/// in a synthetic source.
fn reject_twin_keys(cx: &Ctx<'_>, d: &DataSpec) -> Result<(), ScenarioError> {
    if d.reference.is_some() {
        return Err(super::at_data_key(
            cx.err(
                Some(d.source.span()),
                "data.reference",
                "belongs to `source = \"twin\"`; a synthetic source uses [data.truth]",
            ),
            cx.src,
            "reference",
        ));
    }
    if let Some(v) = d.noise.as_ref().and_then(|n| n.varying.as_ref()) {
        return Err(cx.err(
            Some(v.span()),
            "data.noise.varying",
            "belongs to `source = \"twin\"`; a synthetic source uses `sd_formula`",
        ));
    }
    if let Some(n) = &d.noise {
        for (span, key) in [
            (n.level.as_ref().map(|v| v.span()), "level"),
            (n.smooth_k.as_ref().map(|v| v.span()), "smooth_k"),
        ] {
            if let Some(span) = span {
                return Err(cx.err(
                    Some(span),
                    &format!("data.noise.{key}"),
                    "belongs to a twin's varying noise (`source = \"twin\"`, `varying = true`)",
                ));
            }
        }
    }
    Ok(())
}

fn synthetic(cx: &Ctx<'_>, d: &DataSpec) -> Result<SyntheticPlan, ScenarioError> {
    let sizes = match &d.train_size {
        Some(n) => parse_sizes(cx, n, usize::MAX)?,
        None => {
            return Err(cx.err(
                Some(d.source.span()),
                "data.train_size",
                "is required for a synthetic source",
            ))
        }
    };
    let train_size = *sizes.last().expect("at least one size");
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
    if eval_at_design && sizes.len() > 1 {
        return Err(cx.err(
            d.eval.as_ref().map(|s| s.span()),
            "data.eval",
            "`design` evaluation needs one training size (the design is the training inputs); use `fresh` with several sizes",
        ));
    }
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
    // A set, not a scan of the earlier names: a file may declare 100 000 inputs.
    // Where input `i`'s name is written, for messages about it.
    let name_span = |i: usize| {
        d.inputs
            .as_ref()
            .and_then(|l| l.get(i))
            .map(|s| s.name.span())
    };
    let mut seen = std::collections::HashSet::with_capacity(inputs.len());
    for (i, a) in inputs.iter().enumerate() {
        if !seen.insert(a.name.as_str()) {
            return Err(cx.err(
                name_span(i),
                &format!("data.inputs[{i}].name"),
                format!("input `{}` is defined twice", a.name),
            ));
        }
    }
    if sizes.len() > 1 {
        // Smaller sizes train on nested prefixes of the largest draw; the prefix of an even
        // grid covers only the low end of the range, so it is not a design of that size.
        if let Some(i) = inputs
            .iter()
            .position(|a| matches!(a.dist, InputDist::Even(..)))
        {
            let span = d
                .inputs
                .as_ref()
                .and_then(|l| l.get(i))
                .map(|s| s.name.span());
            return Err(cx.err(
                span,
                &format!("data.inputs[{i}]"),
                "an `even` input lays one grid for one training size; with several sizes use `uniform` or `normal`",
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
            sizes,
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
            // The function reads its inputs by position: inputs declared in another order,
            // or under other names, changed the process silently and labelled the columns of
            // `--points` wrongly.
            if let Some(i) = (0..b.min_inputs()).find(|&i| inputs[i].name != format!("x{}", i + 1))
            {
                return Err(cx.err(
                    name_span(i),
                    &format!("data.inputs[{i}].name"),
                    format!(
                        "{} reads its inputs by position as x1 … x{}, so they must come first \
                         and in that order: input {} is `{}`, not `x{}` (or write the function \
                         as a `formula` over your own names)",
                        b.name(),
                        b.min_inputs(),
                        i + 1,
                        crate::fmt::clip(&inputs[i].name, 60),
                        i + 1
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
    let poisson = d
        .noise
        .as_ref()
        .and_then(|n| n.poisson.as_ref())
        .filter(|p| *p.get_ref());
    let noise = match &d.noise {
        None => match builtin {
            Some(b) => Noise::Constant(b.default_sd()),
            None => return Err(cx.err(
                Some(d.source.span()),
                "data.noise",
                "a formula truth needs [data.noise] with `sd`, `sd_formula` or `poisson = true`",
            )),
        },
        Some(n) if poisson.is_some() => {
            if let Some(span) =
                n.sd.as_ref()
                    .map(|s| s.span())
                    .or_else(|| n.sd_formula.as_ref().map(|s| s.span()))
            {
                return Err(cx.err(
                    Some(span),
                    "data.noise",
                    "give either `poisson = true` (counts with the truth as their mean, variance equal to the mean) or `sd` / `sd_formula`, not both",
                ));
            }
            Noise::Poisson
        }
        Some(n) => match (&n.sd, &n.sd_formula) {
            (Some(sd), None) => {
                let v = *sd.get_ref();
                if !(v.is_finite() && v >= 0.0) {
                    return Err(cx.err(
                        Some(sd.span()),
                        "data.noise.sd",
                        format!(
                            "must be a finite number >= 0, got {}",
                            crate::fmt::fmt_exact(v)
                        ),
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
                    // The `[data.noise]` header's line (an inline `noise = {...}` in `[data]`:
                    // that key's line), not the `source` line.
                    let line = super::data_key_line(cx.src, "noise")
                        .unwrap_or_else(|| super::line_of(cx.src, d.source.span().start));
                    return Err(cx.err_line(
                        Some(line),
                        "data.noise",
                        "needs `sd` or `sd_formula`",
                    ));
                }
            },
        },
    };
    let shape = match d.noise.as_ref().map(|n| shape_choice(n, false)) {
        None | Some(Ok(ShapeChoice::Gaussian)) => NoiseShape::Gaussian,
        Some(Ok(ShapeChoice::Student(df))) => NoiseShape::Student(df),
        Some(Ok(ShapeChoice::Residuals)) => {
            return Err(cx.err(
                Some(d.source.span()),
                "data.noise.shape",
                "`residuals` needs a twin source",
            ))
        }
        Some(Err((span, key, m))) => return Err(cx.err(Some(span), key, m)),
    };
    Ok(SyntheticPlan {
        process: Synthetic {
            inputs,
            response: Response::Regression {
                truth,
                noise,
                shape,
            },
        },
        train_size,
        sizes,
        eval_size,
        design,
        eval_at_design,
    })
}

/// Parses `train_size`: a whole number, or a list of distinct whole numbers (sorted ascending),
/// each at least 2 and at most `max` (a table's working rows less one).
pub(crate) fn parse_sizes(
    cx: &Ctx<'_>,
    v: &Spanned<super::spec::Sizes>,
    max: usize,
) -> Result<Vec<usize>, ScenarioError> {
    let key = "data.train_size";
    let limit = (upper_limit(key) as usize).min(max);
    let mut out = Vec::new();
    let written = v.get_ref().values();
    if written.is_empty() {
        return Err(cx.err(Some(v.span()), key, "is empty; give at least one size"));
    }
    if written.len() > 64 {
        return Err(cx.err(
            Some(v.span()),
            key,
            format!("{} sizes; at most 64", written.len()),
        ));
    }
    for n in written {
        if n < 2 || n as u128 > limit as u128 {
            return Err(cx.err(
                Some(v.span()),
                key,
                format!("{n} is not a usable training size: each must be between 2 and {limit}"),
            ));
        }
        out.push(n as usize);
    }
    out.sort_unstable();
    if let Some(w) = out.windows(2).find(|w| w[0] == w[1]) {
        return Err(cx.err(Some(v.span()), key, format!("size {} appears twice", w[0])));
    }
    Ok(out)
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
    if labels.len() > MAX_LABELS {
        return Err(cx.err(
            Some(c.labels.span()),
            "data.classes.labels",
            format!(
                "{} labels; at most {MAX_LABELS} classes (every evaluation point keeps a \
                 probability per class)",
                labels.len()
            ),
        ));
    }
    let mut seen = std::collections::HashSet::new();
    for (i, l) in labels.iter().enumerate() {
        if l.trim().is_empty() {
            return Err(cx.err(
                Some(c.labels.span()),
                "data.classes.labels",
                format!(
                    "label {} is empty; labels name the classes in every output",
                    i + 1
                ),
            ));
        }
        if !seen.insert(l.as_str()) {
            return Err(cx.err(
                Some(c.labels.span()),
                "data.classes.labels",
                format!("label `{l}` appears twice"),
            ));
        }
    }
    let k = labels.len();
    if let Some(t) = &c.temperature {
        return Err(cx.err(
            Some(t.span()),
            "data.classes.temperature",
            "belongs to a twin's reference (`source = \"twin\"`), whose class shares it sharpens; \
             a synthetic process states its probabilities itself",
        ));
    }
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
                        format!("in `{}`: {e}", crate::fmt::clip(src, 80)),
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
                        format!("must be in [0, 1), got {}", crate::fmt::fmt_exact(v)),
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
