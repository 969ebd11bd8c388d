//! The result document (`lossprism-result/1`) and its renderings: JSON (here), CSV
//! ([`csv`]), the terminal table ([`terminal`]), pictures ([`plot`]), the HTML report
//! ([`html`]); part files of shards and checkpoints ([`part`]). The rows of a result are built
//! from the loss's description of its terms ([`crate::decompose::TermInfo`]), which the document
//! also carries (`terms`), so every rendering — and `check` — is derived from that description,
//! never from the loss's name.

pub mod csv;
pub mod html;
pub mod part;
pub mod plot;
pub mod selection;
pub mod terminal;
pub mod twin;

use serde::de::Error as _;
use serde::ser::SerializeMap;
use serde::{Deserialize, Deserializer, Serialize, Serializer};

use crate::decompose::{self, Group, Role, TermInfo};
use crate::dgp::Response;
use crate::fmt::{fmt_num, fmt_se, fmt_value};
use crate::runner::Outcome;
use crate::scenario::{Design, Plan, Source};

pub use selection::Selection;

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
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub labels: Option<Vec<String>>,
    /// Grid values.
    pub grid: Vec<f64>,
    /// `list`, `range` or `log`.
    pub grid_kind: String,
    /// Number of replicate blocks.
    pub blocks: u64,
    /// Fits per training set (`fit_seeds`; absent when 1).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub fit_seeds: Option<usize>,
    /// A twin source: its reference, inputs, noise correction and fidelity check
    /// ([`twin::TwinEcho`]; absent for other sources).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub twin: Option<twin::TwinEcho>,
}

/// How a term is described in a result document (the loss's [`TermInfo`], owned).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq, Eq)]
pub struct TermDoc {
    /// JSON key (dotted for a nested field).
    pub key: String,
    /// Column header.
    pub label: String,
    /// One-line meaning.
    pub meaning: String,
    /// `loss`, `bias`, `variance`, `noise`, `direct` or `other`.
    pub role: String,
    /// `main`, `kohavi_wolpert`, `james` or `detail`: which terminal view shows it.
    pub group: String,
    /// An estimate that depends on an estimated noise (tables).
    pub estimated: bool,
    /// Whether a standard error is reported.
    pub stderr: bool,
}

impl TermDoc {
    /// The owned form of a loss's term description.
    pub fn from_info(t: &TermInfo) -> TermDoc {
        TermDoc {
            key: t.key.into(),
            label: t.label.into(),
            meaning: t.meaning.into(),
            role: match t.role {
                Role::Loss => "loss",
                Role::Bias => "bias",
                Role::Variance => "variance",
                Role::Noise => "noise",
                Role::Direct => "direct",
                Role::Other => "other",
            }
            .into(),
            group: match t.group {
                Group::Main => "main",
                Group::KohaviWolpert => "kohavi_wolpert",
                Group::James => "james",
                Group::Detail => "detail",
            }
            .into(),
            estimated: t.estimated,
            stderr: t.stderr,
        }
    }
}

/// One grid value's decomposition: the terms in the loss's order (JSON keys, dotted keys as
/// nested objects), then `estimated` on tables, then the standard errors of the terms that have
/// one (jackknife over replicate blocks; `null` where they cannot be computed). Two rows are
/// equal when every number is the same bit for bit (so `null` equals `null`).
#[derive(Debug, Clone)]
pub struct PointRow {
    /// Knob value.
    pub value: f64,
    /// Family name (scenarios with several models).
    pub family: Option<String>,
    /// Training size (scenarios with several training sizes).
    pub train_size: Option<u64>,
    /// Term values in order: `(key, value)`.
    pub terms: Vec<(String, f64)>,
    /// `true` when some terms are estimates (a table source).
    pub estimated: Option<bool>,
    /// Standard errors in order: `(key, value)`, NaN written as `null`.
    pub stderr: Vec<(String, f64)>,
}

impl PartialEq for PointRow {
    fn eq(&self, o: &Self) -> bool {
        let same = |a: &[(String, f64)], b: &[(String, f64)]| {
            a.len() == b.len()
                && a.iter()
                    .zip(b)
                    .all(|(x, y)| x.0 == y.0 && x.1.to_bits() == y.1.to_bits())
        };
        self.value.to_bits() == o.value.to_bits()
            && self.family == o.family
            && self.train_size == o.train_size
            && self.estimated == o.estimated
            && same(&self.terms, &o.terms)
            && same(&self.stderr, &o.stderr)
    }
}

impl PointRow {
    /// The value of term `key` (NaN when absent).
    pub fn get(&self, key: &str) -> f64 {
        self.terms
            .iter()
            .find(|(k, _)| k == key)
            .map_or(f64::NAN, |(_, v)| *v)
    }

    /// Whether the row has term `key`.
    pub fn has(&self, key: &str) -> bool {
        self.terms.iter().any(|(k, _)| k == key)
    }

    /// The standard error of term `key`: `None` when absent or not computable.
    pub fn se(&self, key: &str) -> Option<f64> {
        self.stderr
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, v)| *v)
            .filter(|v| v.is_finite())
    }

    /// The expected loss.
    pub fn expected_loss(&self) -> f64 {
        self.get("expected_loss")
    }
}

/// Writes `(key, value)` pairs as a JSON map, grouping consecutive dotted keys with the same
/// prefix into nested objects.
struct Nested<'a>(&'a [(String, f64)]);

impl Serialize for Nested<'_> {
    fn serialize<S: Serializer>(&self, ser: S) -> Result<S::Ok, S::Error> {
        let mut map = ser.serialize_map(None)?;
        let mut i = 0;
        let items = self.0;
        while i < items.len() {
            let (k, v) = &items[i];
            match k.split_once('.') {
                None => {
                    map.serialize_entry(k, &finite(*v))?;
                    i += 1;
                }
                Some((prefix, _)) => {
                    let mut j = i;
                    let mut inner: Vec<(String, f64)> = Vec::new();
                    while j < items.len() {
                        match items[j].0.split_once('.') {
                            Some((p, rest)) if p == prefix => {
                                inner.push((rest.to_string(), items[j].1));
                                j += 1;
                            }
                            _ => break,
                        }
                    }
                    map.serialize_entry(prefix, &Nested(&inner))?;
                    i = j;
                }
            }
        }
        map.end()
    }
}

fn finite(v: f64) -> Option<f64> {
    v.is_finite().then_some(v)
}

impl Serialize for PointRow {
    fn serialize<S: Serializer>(&self, ser: S) -> Result<S::Ok, S::Error> {
        let mut map = ser.serialize_map(None)?;
        map.serialize_entry("value", &self.value)?;
        if let Some(f) = &self.family {
            map.serialize_entry("family", f)?;
        }
        if let Some(n) = self.train_size {
            map.serialize_entry("train_size", &n)?;
        }
        // Terms, nested by their dotted keys.
        let mut i = 0;
        let items = &self.terms;
        while i < items.len() {
            let (k, v) = &items[i];
            match k.split_once('.') {
                None => {
                    map.serialize_entry(k, &finite(*v))?;
                    i += 1;
                }
                Some((prefix, _)) => {
                    let mut j = i;
                    let mut inner = Vec::new();
                    while j < items.len() {
                        match items[j].0.split_once('.') {
                            Some((p, rest)) if p == prefix => {
                                inner.push((rest.to_string(), items[j].1));
                                j += 1;
                            }
                            _ => break,
                        }
                    }
                    map.serialize_entry(prefix, &Nested(&inner))?;
                    i = j;
                }
            }
        }
        if let Some(e) = self.estimated {
            map.serialize_entry("estimated", &e)?;
        }
        map.serialize_entry("stderr", &Nested(&self.stderr))?;
        map.end()
    }
}

/// Flattens a JSON object into `(dotted key, number)` pairs in document order; `null` becomes
/// NaN. Anything else is an error naming the key.
fn flatten_numbers(
    prefix: &str,
    obj: &serde_json::Map<String, serde_json::Value>,
    out: &mut Vec<(String, f64)>,
) -> Result<(), String> {
    for (k, v) in obj {
        let key = if prefix.is_empty() {
            k.clone()
        } else {
            format!("{prefix}.{k}")
        };
        match v {
            serde_json::Value::Null => out.push((key, f64::NAN)),
            serde_json::Value::Number(n) => out.push((
                key.clone(),
                n.as_f64()
                    .ok_or_else(|| format!("`{key}` is not a number"))?,
            )),
            serde_json::Value::Object(m) => flatten_numbers(&key, m, out)?,
            _ => return Err(format!("`{key}` is not a number")),
        }
    }
    Ok(())
}

impl<'de> Deserialize<'de> for PointRow {
    fn deserialize<D: Deserializer<'de>>(de: D) -> Result<Self, D::Error> {
        let obj = serde_json::Map::<String, serde_json::Value>::deserialize(de)?;
        let value = obj
            .get("value")
            .and_then(|v| v.as_f64())
            .ok_or_else(|| D::Error::custom("a point has no numeric `value`"))?;
        let family = match obj.get("family") {
            None => None,
            Some(serde_json::Value::String(s)) => Some(s.clone()),
            Some(_) => return Err(D::Error::custom("a point's `family` is not a string")),
        };
        let train_size = match obj.get("train_size") {
            None => None,
            Some(v) => Some(
                v.as_u64()
                    .ok_or_else(|| D::Error::custom("a point's `train_size` is not a count"))?,
            ),
        };
        let estimated = match obj.get("estimated") {
            None => None,
            Some(serde_json::Value::Bool(b)) => Some(*b),
            Some(_) => return Err(D::Error::custom("a point's `estimated` is not true/false")),
        };
        let mut terms = Vec::new();
        let mut stderr = Vec::new();
        for (k, v) in &obj {
            match k.as_str() {
                "value" | "family" | "train_size" | "estimated" => {}
                "stderr" => {
                    let m = v
                        .as_object()
                        .ok_or_else(|| D::Error::custom("a point's `stderr` is not an object"))?;
                    flatten_numbers("", m, &mut stderr).map_err(D::Error::custom)?;
                }
                _ => {
                    let mut one = serde_json::Map::new();
                    one.insert(k.clone(), v.clone());
                    flatten_numbers("", &one, &mut terms).map_err(D::Error::custom)?;
                }
            }
        }
        if let Some((k, v)) = stderr.iter().find(|(_, v)| *v < 0.0) {
            return Err(D::Error::custom(format!(
                "the standard error of `{k}` is {v}; a standard error cannot be negative"
            )));
        }
        Ok(PointRow {
            value,
            family,
            train_size,
            terms,
            estimated,
            stderr,
        })
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
    pub selection: Option<Selection>,
    /// The description of the terms of `points`, in order.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub terms: Vec<TermDoc>,
    /// Whether a larger knob value is the simpler model (k-NN `k`, ridge `penalty`).
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub larger_is_simpler: bool,
}

impl ResultDoc {
    /// The description of the terms: the document's own, or (documents written before it was
    /// recorded) the loss's.
    pub fn term_docs(&self) -> Vec<TermDoc> {
        if !self.terms.is_empty() {
            return self.terms.clone();
        }
        let Some(loss) = decompose::by_name(&self.loss) else {
            return Vec::new();
        };
        let observed = self.table.is_some();
        let first = self.points.first();
        let shape = decompose::Shape {
            grid: self.points.len(),
            points: 0,
            classes: self.scenario.labels.as_ref().map_or(0, Vec::len),
            fits: if first.is_some_and(|p| p.has("variance_fit")) {
                2
            } else {
                1
            },
            all_points: !observed,
            ensemble: first.is_some_and(|p| p.has("diversity")),
        };
        loss.describe(&shape, observed)
            .iter()
            .map(TermDoc::from_info)
            .filter(|t| first.map_or(true, |p| p.has(&t.key)))
            .collect()
    }

    /// The key of the first term with `role` in the main group (`bias_sq`, `bias`, ...).
    pub fn key_of(&self, role: &str) -> Option<String> {
        self.term_docs()
            .into_iter()
            .find(|t| t.role == role && t.group == "main")
            .map(|t| t.key)
    }
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

/// Resolved scenario echo of a plan.
pub fn scenario_echo(plan: &Plan) -> ScenarioEcho {
    let model = plan.model();
    let fit_seeds = (model.fit_seeds > 1).then_some(model.fit_seeds);
    let s = match &plan.source {
        Source::Synthetic(s) => s,
        Source::Table(t) => {
            let table = &t.table;
            let encoded: Vec<&str> = table.encodings.iter().map(|e| e.column.as_str()).collect();
            return ScenarioEcho {
                eval_seed: None,
                name: plan.name.clone(),
                about: plan.about.clone(),
                source: "table".into(),
                train_size: t.train_size(),
                eval_size: t.work.len(),
                design: t.scheme.name().into(),
                eval: match t.scheme {
                    crate::dataset::Scheme::Bootstrap => "out-of-bag",
                    crate::dataset::Scheme::Subsample { .. } => "held-out rows",
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
                noise: match plan.task {
                    crate::family::Task::Regress if plan.loss.count_responses() => {
                        "unknown; folded into the bias against the observed counts".into()
                    }
                    crate::family::Task::Regress => {
                        format!("unknown; estimated by {}", t.noise_method.describe())
                    }
                    crate::family::Task::Classify { .. } => {
                        "unknown; folded into the bias against the observed labels".into()
                    }
                },
                labels: match plan.task {
                    crate::family::Task::Regress => None,
                    crate::family::Task::Classify { .. } => Some(table.labels.clone()),
                },
                grid: model.grid.clone(),
                grid_kind: model.grid_kind.name().into(),
                blocks: plan.blocks,
                fit_seeds,
                twin: None,
            };
        }
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
        grid: model.grid.clone(),
        grid_kind: model.grid_kind.name().into(),
        blocks: plan.blocks,
        fit_seeds,
        twin: twin::echo(&s.process),
    }
}

/// The rows of model `i` of a finished run.
pub fn rows(plan: &Plan, outcome: &Outcome, i: usize) -> Vec<PointRow> {
    let s = &outcome.summaries[i];
    let observed = outcome.prepared.table.is_some();
    plan.models[i]
        .grid
        .iter()
        .enumerate()
        .map(|(g, &value)| PointRow {
            value,
            family: None,
            train_size: None,
            terms: s
                .terms
                .iter()
                .zip(&s.values[g])
                .map(|(t, v)| (t.key.to_string(), *v))
                .collect(),
            estimated: observed.then_some(true),
            stderr: s
                .terms
                .iter()
                .zip(&s.stderr[g])
                .filter(|(t, _)| t.stderr)
                .map(|(t, v)| (t.key.to_string(), *v))
                .collect(),
        })
        .collect()
}

/// Builds the result document of a finished run.
pub fn build(plan: &Plan, outcome: &Outcome) -> ResultDoc {
    let model = plan.model();
    let points = rows(plan, outcome, 0);
    let best = best_of(&points);
    let bias_key = outcome
        .summary()
        .terms
        .iter()
        .find(|t| t.role == Role::Bias && t.group == Group::Main)
        .map(|t| t.key)
        .unwrap_or("bias_sq");
    let mut reading = reading(
        model.family.knob(),
        plan.loss.bias_word(),
        bias_key,
        &points,
        &best,
    );
    let selection = match (&plan.audit, &outcome.audit) {
        (Some(a), Some(c)) => Some(selection::selection(a, &c.counts, &points, &best)),
        _ => None,
    };
    let (mut table, mut noise_estimate, mut scheme_note) = (None, None, None);
    if let (Source::Table(tp), Some(run)) = (&plan.source, &outcome.prepared.table) {
        reading.push_str(plan.loss.observed_note());
        let (share, share_se) = outcome.held_share.unwrap_or((f64::NAN, f64::NAN));
        table = Some(TableEcho {
            path: tp.table.path.display().to_string(),
            target: tp.table.target.clone(),
            rows: tp.table.rows(),
            dropped_rows: tp.table.dropped_rows,
            holdout_rows: tp.holdout.len(),
            working_rows: tp.work.len(),
            skipped_rows: outcome
                .summary()
                .total
                .count
                .iter()
                .filter(|&&c| c < 2)
                .count(),
            resample: tp.scheme.name().into(),
            train_size: tp.train_size(),
            held_out_share: share,
            held_out_share_stderr: finite(share_se),
            encodings: tp.table.encodings.iter().map(|e| e.describe()).collect(),
        });
        noise_estimate = run.noise.map(|n| NoiseEstimateEcho {
            value: n.value,
            stderr: finite(n.stderr),
            method: n.method.name().into(),
            about: n.method.describe().into(),
        });
        scheme_note = Some(tp.scheme.note(tp.work.len()));
    }
    ResultDoc {
        format: FORMAT.into(),
        version: env!("CARGO_PKG_VERSION").into(),
        scenario: scenario_echo(plan),
        family: model.family.name().into(),
        knob: model.family.knob().into(),
        loss: plan.loss.name().into(),
        replicates: plan.replicates,
        seed: plan.seed,
        points,
        best,
        reading,
        table,
        noise_estimate,
        scheme_note,
        selection,
        terms: outcome
            .summary()
            .terms
            .iter()
            .map(TermDoc::from_info)
            .collect(),
        larger_is_simpler: model.family.larger_is_simpler(),
    }
}

/// The lowest expected loss (first one on exact ties) and the values within one SE of it.
pub fn best_of(points: &[PointRow]) -> Best {
    let mut bi = 0;
    for (i, p) in points.iter().enumerate() {
        if p.expected_loss() < points[bi].expected_loss() {
            bi = i;
        }
    }
    let b = &points[bi];
    let se = b.se("expected_loss");
    let within = points
        .iter()
        .filter(|p| p.expected_loss() <= b.expected_loss() + se.unwrap_or(0.0))
        .map(|p| p.value)
        .collect();
    Best {
        value: b.value,
        expected_loss: b.expected_loss(),
        stderr: se,
        within_one_se: within,
    }
}

/// The JSON text of a result (pretty, newline-terminated).
pub fn to_json(doc: &ResultDoc) -> String {
    let mut s = serde_json::to_string_pretty(doc).expect("result types serialize");
    s.push('\n');
    s
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

/// One plain sentence (or two) reading the curve: where the bias-type term (`bias_key`,
/// called `bias_word`) dominates the variance, where the variance does, and where the lowest
/// expected loss lies.
pub fn reading(
    knob: &str,
    bias_word: &str,
    bias_key: &str,
    points: &[PointRow],
    best: &Best,
) -> String {
    let bias_dominates = |p: &PointRow| p.get(bias_key) > p.get("variance");
    let n_bias = points.iter().filter(|p| bias_dominates(p)).count();
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
