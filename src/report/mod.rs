//! The result document (`lossprism-result/2`) and its renderings: JSON (here), CSV
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

use crate::decompose::{self, Group, Role, Summary, TermInfo};
use crate::dgp::Response;
use crate::fmt::{fmt_num, fmt_se, fmt_value};
use crate::runner::Outcome;
use crate::scenario::{Design, Plan, Source};

pub use selection::Selection;

/// Identifier of the result format.
pub const FORMAT: &str = "lossprism-result/2";

/// The format tag of results written before study designs (one family, one training size, no
/// leave-one-block-out values): recognised only to say that they must be rerun.
pub const FORMAT_V1: &str = "lossprism-result/1";

/// Why a document with format tag `other` is not read as a result: an older result must be
/// rerun; shard parts must be merged first; a checkpoint (`checkpoint`: its `checkpoint` flag)
/// is finished by rerunning its run.
pub fn format_refusal(other: &str, checkpoint: bool) -> String {
    if other == FORMAT_V1 {
        format!(
            "format `{other}` was written by an earlier lossprism; this version reads `{FORMAT}` \
             (rows carry their training size and model, and the leave-one-block-out values that \
             paired comparisons need): rerun the scenario (a baseline: rerun it and accept it \
             with `check --update`)"
        )
    } else if checkpoint {
        format!(
            "is a checkpoint (format `{}`), the saved state of an unfinished run, not a result \
             document (`{FORMAT}`); rerun the command that wrote it (with the same \
             `--checkpoint`) and add `--out FILE.json` to write the result",
            crate::fmt::clip(other, 60)
        )
    } else {
        format!(
            "format `{}` is not a result document (`{FORMAT}`){}",
            crate::fmt::clip(other, 60),
            if other.contains("part") {
                "; merge shard parts with `lossprism merge` first"
            } else {
                ""
            }
        )
    }
}

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

/// The start of an evenly spaced input's description (`InputDist::Even`), recognised by
/// [`ScenarioEcho::points_not_drawn`].
const EVEN_DESCRIPTION: &str = "evenly spaced";

impl ScenarioEcho {
    /// Why the evaluation points of this scenario are *not* independent draws from the input
    /// distribution, or `None` when they are (a synthetic or twin source with a random design,
    /// fresh evaluation points and no evenly spaced input). `check` adds an evaluation-point
    /// sampling variance to runs with different points only when they are draws.
    pub fn points_not_drawn(&self) -> Option<String> {
        if self.source == "table" {
            return Some("a table's evaluation points are its rows".into());
        }
        if self.eval == "design" {
            return Some("the points are the training design".into());
        }
        if self.design == "fixed" {
            return Some(
                "the fixed design moves with them, which changes what is estimated".into(),
            );
        }
        self.inputs
            .iter()
            .find(|i| i.distribution.starts_with(EVEN_DESCRIPTION))
            .map(|i| format!("input `{}` is evenly spaced, not drawn", i.name))
    }
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
    /// Whether that standard error comes from the bootstrap over replicate blocks (terms that
    /// jump with the main prediction) rather than the jackknife. Absent when false.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub bootstrap: bool,
    /// Whether the term is a count (shown as a whole number).
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub count: bool,
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
            bootstrap: t.bootstrap,
            count: t.count,
        }
    }
}

/// One grid value's decomposition: the terms in the loss's order (JSON keys, dotted keys as
/// nested objects), then `estimated` on tables, then the standard errors of the terms that have
/// one (jackknife over replicate blocks; `null` where they cannot be computed), then — only when
/// some term's standard error comes from the block bootstrap — `interval95`, the 95 % bootstrap
/// percentile interval widened to contain ± 2 SE (not outside the range a term cannot
/// leave, 0 to 1 for a share), `[lower, upper]`, of each such term under the same nested keys (`null` where it
/// cannot be computed, as a standard error). Two rows are equal when every number is
/// the same bit for bit (so `null` equals `null`).
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
    /// The 95 % intervals (bootstrap percentile, widened to ± 2 SE, not outside the range a
    /// term cannot leave) of the terms marked `bootstrap`, in order: `(key, (lower, upper))`, NaN bounds written as `null`; empty (and absent from the JSON)
    /// when no term is a bootstrap term.
    pub interval: Vec<(String, (f64, f64))>,
}

impl PartialEq for PointRow {
    /// Keys are matched by name, not position: a document read back from JSON lists its terms
    /// in the order of the file's object (alphabetical), a fresh one in the loss's order, and
    /// the two were never `identical` (a library test comparing a fresh run with a saved one
    /// got `paired`).
    fn eq(&self, o: &Self) -> bool {
        fn same<T>(a: &[(String, T)], b: &[(String, T)], eq: impl Fn(&T, &T) -> bool) -> bool {
            // Each side's keys found on the other with equal values, and as many of each
            // (a row built in memory may repeat a key: [x, x] is not [x, y]).
            let count = |v: &[(String, T)], k: &str| v.iter().filter(|(l, _)| l == k).count();
            a.len() == b.len()
                && a.iter().all(|(k, x)| {
                    count(a, k) == count(b, k) && b.iter().any(|(l, y)| k == l && eq(x, y))
                })
        }
        let bits = |x: &f64, y: &f64| x.to_bits() == y.to_bits();
        self.value.to_bits() == o.value.to_bits()
            && self.family == o.family
            && self.train_size == o.train_size
            && self.estimated == o.estimated
            && same(&self.terms, &o.terms, bits)
            && same(&self.stderr, &o.stderr, bits)
            && same(&self.interval, &o.interval, |x, y| {
                bits(&x.0, &y.0) && bits(&x.1, &y.1)
            })
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

    /// The 95 % interval (bootstrap percentile, widened to ± 2 SE, not outside the range a
    /// term cannot leave) of term `key`: `None` when absent or not computable.
    pub fn interval(&self, key: &str) -> Option<(f64, f64)> {
        self.interval
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, v)| *v)
            .filter(|(lo, hi)| lo.is_finite() && hi.is_finite())
    }

    /// The expected loss.
    pub fn expected_loss(&self) -> f64 {
        self.get("expected_loss")
    }
}

/// A value of a [`Nested`] map: how it is written (non-finite numbers as `null`).
trait Leaf: Copy {
    /// The JSON form.
    type Out: Serialize;
    /// The value as written.
    fn out(self) -> Self::Out;
}

impl Leaf for f64 {
    type Out = Option<f64>;
    fn out(self) -> Option<f64> {
        finite(self)
    }
}

/// An interval `(lower, upper)`: `[lower, upper]`, or `null` unless both are finite.
impl Leaf for (f64, f64) {
    type Out = Option<[f64; 2]>;
    fn out(self) -> Option<[f64; 2]> {
        (self.0.is_finite() && self.1.is_finite()).then_some([self.0, self.1])
    }
}

/// Writes `(key, value)` pairs as a JSON map, grouping consecutive dotted keys with the same
/// prefix into nested objects.
struct Nested<'a, T>(&'a [(String, T)]);

impl<T: Leaf> Serialize for Nested<'_, T> {
    fn serialize<S: Serializer>(&self, ser: S) -> Result<S::Ok, S::Error> {
        let mut map = ser.serialize_map(None)?;
        let mut i = 0;
        let items = self.0;
        while i < items.len() {
            let (k, v) = &items[i];
            match k.split_once('.') {
                None => {
                    map.serialize_entry(k, &v.out())?;
                    i += 1;
                }
                Some((prefix, _)) => {
                    let mut j = i;
                    let mut inner: Vec<(String, T)> = Vec::new();
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
        if !self.interval.is_empty() {
            map.serialize_entry(INTERVAL_KEY, &Nested(&self.interval))?;
        }
        map.end()
    }
}

/// Flattens a JSON object into `(dotted key, leaf)` pairs in document order: nested objects are
/// walked, every other value is read by `leaf` (given its dotted key), whose error is returned.
fn flatten<T>(
    prefix: &str,
    obj: &serde_json::Map<String, serde_json::Value>,
    out: &mut Vec<(String, T)>,
    leaf: &dyn Fn(&str, &serde_json::Value) -> Result<T, String>,
) -> Result<(), String> {
    for (k, v) in obj {
        let key = if prefix.is_empty() {
            k.clone()
        } else {
            format!("{prefix}.{k}")
        };
        match v {
            serde_json::Value::Object(m) => flatten(&key, m, out, leaf)?,
            _ => {
                let x = leaf(&key, v)?;
                out.push((key, x));
            }
        }
    }
    Ok(())
}

/// Flattens a JSON object into `(dotted key, number)` pairs in document order; `null` becomes
/// NaN. Anything else is an error naming the key.
fn flatten_numbers(
    prefix: &str,
    obj: &serde_json::Map<String, serde_json::Value>,
    out: &mut Vec<(String, f64)>,
) -> Result<(), String> {
    flatten(prefix, obj, out, &|key, v| match v {
        serde_json::Value::Null => Ok(f64::NAN),
        _ => v.as_f64().ok_or_else(|| format!("`{key}` is not a number")),
    })
}

/// The key of a point's bootstrap percentile intervals in the JSON.
pub const INTERVAL_KEY: &str = "interval95";

/// Flattens a point's `interval95` object into `(dotted key, (lower, upper))` pairs in document
/// order: each leaf is `[lower, upper]` with finite bounds, lower ≤ upper, or `null` (not
/// computable, read as NaN bounds). Anything else is an error naming the key.
fn flatten_intervals(
    prefix: &str,
    obj: &serde_json::Map<String, serde_json::Value>,
    out: &mut Vec<(String, (f64, f64))>,
) -> Result<(), String> {
    flatten(prefix, obj, out, &|key, v| {
        let not_a_pair = || {
            format!("`{INTERVAL_KEY}.{key}` must be [lower, upper]: two finite numbers, or null")
        };
        match v {
            serde_json::Value::Null => Ok((f64::NAN, f64::NAN)),
            serde_json::Value::Array(a) => {
                let bounds: Vec<f64> = a.iter().filter_map(|b| b.as_f64()).collect();
                if a.len() != 2 || bounds.len() != 2 || bounds.iter().any(|b| !b.is_finite()) {
                    return Err(not_a_pair());
                }
                if bounds[0] > bounds[1] {
                    return Err(format!(
                        "`{INTERVAL_KEY}.{key}` has lower bound {} above upper bound {}",
                        bounds[0], bounds[1]
                    ));
                }
                Ok((bounds[0], bounds[1]))
            }
            _ => Err(not_a_pair()),
        }
    })
}

/// Reads a JSON object refusing a key given twice (a `serde_json::Map` keeps the last copy, and a
/// damaged document would then be compared by its last `bias_sq`).
struct UniqueKeys;

impl<'de> serde::de::Visitor<'de> for UniqueKeys {
    type Value = serde_json::Map<String, serde_json::Value>;

    fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("a JSON object")
    }

    fn visit_map<A: serde::de::MapAccess<'de>>(self, mut a: A) -> Result<Self::Value, A::Error> {
        let mut m = serde_json::Map::new();
        while let Some((k, v)) = a.next_entry::<String, serde_json::Value>()? {
            if m.contains_key(&k) {
                return Err(serde::de::Error::custom(format!(
                    "a point gives `{k}` twice"
                )));
            }
            m.insert(k, v);
        }
        Ok(m)
    }
}

impl<'de> Deserialize<'de> for PointRow {
    fn deserialize<D: Deserializer<'de>>(de: D) -> Result<Self, D::Error> {
        let obj = de.deserialize_map(UniqueKeys)?;
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
        let mut interval = Vec::new();
        for (k, v) in &obj {
            match k.as_str() {
                "value" | "family" | "train_size" | "estimated" => {}
                INTERVAL_KEY => {
                    let m = v.as_object().ok_or_else(|| {
                        D::Error::custom(format!("a point's `{INTERVAL_KEY}` is not an object"))
                    })?;
                    flatten_intervals("", m, &mut interval).map_err(D::Error::custom)?;
                }
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
        if let Some((k, _)) = terms.iter().find(|(_, v)| !v.is_finite()) {
            return Err(D::Error::custom(format!(
                "the term `{k}` at value {value} is not a finite number; `run` never writes one, \
                 so the document was edited or damaged"
            )));
        }
        if let Some((k, v)) = stderr.iter().find(|(_, v)| *v < 0.0) {
            return Err(D::Error::custom(format!(
                "the standard error of `{k}` is {v}; a standard error cannot be negative"
            )));
        }
        if let Some((k, _)) = interval
            .iter()
            .find(|(k, _)| !stderr.iter().any(|(s, _)| s == k))
        {
            return Err(D::Error::custom(format!(
                "`{INTERVAL_KEY}.{k}` names no term with a standard error"
            )));
        }
        Ok(PointRow {
            value,
            family,
            train_size,
            terms,
            estimated,
            stderr,
            interval,
        })
    }
}

/// The grid value with the lowest expected loss.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Best {
    /// The family of the best candidate (runs with several models).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub family: Option<String>,
    /// Knob value.
    pub value: f64,
    /// Its expected loss.
    pub expected_loss: f64,
    /// Its standard error.
    pub stderr: Option<f64>,
    /// Grid values whose expected loss is within one standard error of the best.
    pub within_one_se: Vec<f64>,
}

impl Best {
    /// An expected loss within one standard error of the best's (at most its expected loss plus
    /// its standard error): the one rule of `within_one_se` and of the selection audit's share.
    pub fn admits(&self, expected_loss: f64) -> bool {
        expected_loss <= self.expected_loss + self.stderr.unwrap_or(0.0)
    }
}

/// The result document (`lossprism-result/2`).
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
    /// The model sections, when there are several (`[[model]]`); rows then carry `family`.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub models: Vec<ModelEcho>,
    /// The training sizes, when there are several; rows then carry `train_size`.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub sizes: Vec<usize>,
    /// Several models: each family's best value ranked at every training size, with paired
    /// differences to the overall best.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub ranking: Vec<Ranking>,
    /// Several sizes: each family's learning curve.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub learning: Vec<LearningCurve>,
    /// What `check` needs for paired and unpaired comparisons.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub uncertainty: Option<Uncertainty>,
}

impl ResultDoc {
    /// Refuses a document whose `points` hold one grid value twice for the same family and
    /// training size (`run` writes each once; curves and comparisons would pick one silently).
    pub fn check_points(&self) -> Result<(), String> {
        let mut seen = std::collections::HashSet::new();
        for p in &self.points {
            if !seen.insert((p.family.clone(), p.train_size, p.value.to_bits())) {
                return Err(format!(
                    "`points` hold {} = {} twice{}{}; `run` writes each grid value once, so the \
                     document was edited or damaged",
                    self.knob,
                    crate::fmt::fmt_value(p.value),
                    p.family
                        .as_ref()
                        .map_or(String::new(), |f| format!(" for family {f}")),
                    p.train_size
                        .map_or(String::new(), |n| format!(" at training size {n}")),
                ));
            }
            // Under squared loss these two are means of squares (the variance an unbiased
            // sample variance over replicates): never negative, unlike the debiased bias².
            if self.loss == "squared" {
                for key in ["expected_loss", "variance"] {
                    let v = p.get(key);
                    if v < 0.0 {
                        return Err(format!(
                            "`{key}` is {} at {} = {}{}: under squared loss it is a mean of \
                             squares and cannot be negative, so the document was edited or damaged",
                            crate::fmt::fmt_exact(v),
                            self.knob,
                            crate::fmt::fmt_value(p.value),
                            p.family
                                .as_ref()
                                .map_or(String::new(), |f| format!(" (family {f})"))
                        ));
                    }
                }
            }
        }
        Ok(())
    }

    /// Whether the bias term holds the noise too: a table whose loss estimates no noise (the
    /// document's view of the rule `build` applies to a finished run).
    pub fn noise_folded(&self) -> bool {
        self.table.is_some() && !self.term_docs().iter().any(|t| t.role == "noise")
    }

    /// Several fits per training set: their number, and whether the variance is split into its
    /// data and fit parts (the squared loss) rather than the fits pooled (the others).
    pub fn fit_seeds_split(&self) -> Option<(usize, bool)> {
        let n = self.scenario.fit_seeds?;
        Some((n, self.term_docs().iter().any(|t| t.key == "variance_fit")))
    }

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

    /// The families of the document's models, in order (one unless `[[model]]` was used).
    pub fn families(&self) -> Vec<String> {
        if self.models.is_empty() {
            vec![self.family.clone()]
        } else {
            self.models.iter().map(|m| m.id().to_string()).collect()
        }
    }

    /// The largest training size's rows of `family` (the main curve of that family).
    pub fn curve(&self, family: &str) -> Vec<PointRow> {
        let largest = self.sizes.last().map(|&n| n as u64);
        self.points
            .iter()
            .filter(|p| p.family.as_deref().map_or(true, |f| f == family))
            .filter(|p| largest.is_none() || p.train_size == largest)
            .cloned()
            .collect()
    }

    /// The document of one family's curve at the largest training size, as a single-model,
    /// single-size run would write it (pictures and tables of several-model runs use it).
    pub fn single(&self, family: &str) -> ResultDoc {
        if self.models.is_empty() && self.sizes.is_empty() {
            return self.clone();
        }
        let mut d = self.clone();
        let mut points = self.curve(family);
        for p in &mut points {
            p.family = None;
            p.train_size = None;
        }
        if let Some(m) = self.models.iter().find(|m| m.id() == family) {
            d.family = m.family.clone();
            d.knob = m.knob.clone();
            d.larger_is_simpler = m.larger_is_simpler;
            d.scenario.grid = m.grid.clone();
            d.scenario.grid_kind = m.grid_kind.clone();
        }
        if let Some(&n) = self.sizes.last() {
            d.scenario.train_size = n;
        }
        d.best = best_of(&points);
        d.points = points;
        d.models.clear();
        d.sizes.clear();
        d.ranking.clear();
        d.learning.clear();
        d.uncertainty = None;
        d.selection = None;
        d
    }

    /// The main curve: the first model at the largest training size (every row of a
    /// single-model, single-size run).
    pub fn main_curve(&self) -> Vec<PointRow> {
        self.curve(&self.first_model())
    }

    /// The knob of the model rows name `id` ([`ModelEcho::id`]); the document's knob for a
    /// single model or an id no model has.
    pub fn knob_of(&self, id: &str) -> &str {
        self.models
            .iter()
            .find(|m| m.id() == id)
            .map_or(self.knob.as_str(), |m| m.knob.as_str())
    }

    /// The name rows give the first model: its label, else the family name.
    pub fn first_model(&self) -> String {
        self.models
            .first()
            .map_or(self.family.clone(), |m| m.id().to_string())
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
    /// The variance of the responses the estimate used (divisor n): the scale a negative
    /// estimate is judged against (`check` refuses what `run` would have refused). Absent
    /// from documents before version 0.3.1.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub response_variance: Option<f64>,
    /// Why the estimate may be far off, when an input value lies far out
    /// ([`crate::dataset::noise::far_input_warning`]); written only then (absent from earlier
    /// documents).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub warning: Option<String>,
}

/// `true` for 0 (a count written only when there is something to count).
fn is_zero(n: &usize) -> bool {
    *n == 0
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
    /// Rows left out as repeats of an earlier row under `duplicates = "drop"` (written only
    /// when some were).
    #[serde(default, skip_serializing_if = "is_zero")]
    pub repeats_dropped: usize,
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
    /// Class labels listed in `[data.classes]` that no row of the table holds (a typo there
    /// went unnoticed, and the losses still count them as possible classes); absent when every
    /// listed label occurs.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub absent_labels: Vec<String>,
}

impl TableEcho {
    /// The words on [`TableEcho::absent_labels`] shared by the terminal and the HTML report;
    /// `None` when every listed label occurs.
    pub fn absent_labels_note(&self) -> Option<String> {
        if self.absent_labels.is_empty() {
            return None;
        }
        let names: Vec<String> = self
            .absent_labels
            .iter()
            .map(|l| format!("`{}`", crate::fmt::clip(l, 40)))
            .collect();
        let one = names.len() == 1;
        Some(format!(
            "{} listed in [data.classes] but held by no row of the table: no model can learn {}, \
             yet the losses count {} (a smoothed probability goes to {}); remove {} from \
             `labels` if {} a typo",
            names.join(", "),
            if one { "it" } else { "them" },
            if one {
                "it as a possible class"
            } else {
                "them as possible classes"
            },
            if one { "it" } else { "each" },
            if one { "it" } else { "them" },
            if one { "it is" } else { "they are" },
        ))
    }
}

/// Resolved scenario echo of a plan.
pub fn scenario_echo(plan: &Plan) -> ScenarioEcho {
    let model = plan.model();
    let fit_seeds = (model.fit_seeds > 1).then_some(model.fit_seeds);
    let s = match &plan.source {
        Source::Synthetic(s) => s,
        Source::Table(t) => {
            let table = &t.table;
            let file = t.recorded_path();
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
                            _ => format!("column of {file}"),
                        },
                    })
                    .collect(),
                truth: format!("unknown: observed `{}` in {file}", table.target),
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
            Response::Regression { noise, shape, .. } => shape.describe(noise),
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

/// Whether a term has a value to report. A table's noise is unknown unless it is estimated
/// (the squared loss's `noise (est.)`): the classification and count losses fold it into the
/// bias, and their accumulators hold 0 for it, which is not a value to print as the noise.
pub(crate) fn reported(t: &TermInfo, observed: bool) -> bool {
    !(observed && t.role == Role::Noise && !t.estimated)
}

/// The rows of cell `c` (a training size and a model, see [`Plan::cell`]) of a finished run;
/// rows carry `family` when the run has several models and `train_size` when it has several
/// sizes.
pub fn rows(plan: &Plan, outcome: &Outcome, c: usize) -> Vec<PointRow> {
    let s = &outcome.summaries[c];
    let observed = outcome.prepared.table.is_some();
    let (si, mi) = (c / plan.models.len(), c % plan.models.len());
    let model = &plan.models[mi];
    let family = (plan.models.len() > 1).then(|| model.label.clone());
    let train_size = (plan.sizes.len() > 1).then_some(plan.sizes[si] as u64);
    model
        .grid
        .iter()
        .enumerate()
        .map(|(g, &value)| PointRow {
            value,
            family: family.clone(),
            train_size,
            terms: s
                .terms
                .iter()
                .zip(&s.values[g])
                .filter(|(t, _)| reported(t, observed))
                .map(|(t, v)| (t.key.to_string(), *v))
                .collect(),
            // True where a term depends on the estimated noise: a table under the squared loss
            // (the classification and count losses fold the noise into the bias, estimating none).
            estimated: observed
                .then(|| s.terms.iter().any(|t| t.estimated && reported(t, observed))),
            stderr: s
                .terms
                .iter()
                .zip(&s.stderr[g])
                .filter(|(t, _)| t.stderr)
                .map(|(t, v)| (t.key.to_string(), *v))
                .collect(),
            interval: s
                .terms
                .iter()
                .enumerate()
                .filter(|(_, t)| t.stderr && t.bootstrap)
                .map(|(i, t)| (t.key.to_string(), (s.lower[g][i], s.upper[g][i])))
                .collect(),
        })
        .collect()
}

/// One model section of a run with several (`models`).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct ModelEcho {
    /// Family name.
    pub family: String,
    /// The section's `label`, when it differs from the family name (rows, rankings and
    /// learning curves name the model by it).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub label: Option<String>,
    /// Knob name.
    pub knob: String,
    /// Grid values.
    pub grid: Vec<f64>,
    /// `list`, `range` or `log`.
    pub grid_kind: String,
    /// Fits per training set.
    pub fit_seeds: usize,
    /// Whether a larger knob value is the simpler model.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub larger_is_simpler: bool,
}

impl ModelEcho {
    /// The name rows give this model: its label, else the family name.
    pub fn id(&self) -> &str {
        self.label.as_deref().unwrap_or(&self.family)
    }
}

/// One candidate (family × knob value) in a ranking.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Candidate {
    /// Family name.
    pub family: String,
    /// Knob name.
    pub knob: String,
    /// The family's best knob value at this size.
    pub value: f64,
    /// Its expected loss.
    pub expected_loss: f64,
    /// Its standard error.
    pub stderr: Option<f64>,
    /// Expected loss minus the overall best's (0 for the best itself).
    pub difference: f64,
    /// Jackknife standard error of the paired difference over replicate blocks (both are
    /// estimated on the same training sets and evaluation points).
    pub difference_stderr: Option<f64>,
    /// The standard error the difference would have from two independent runs,
    /// `√(se_a² + se_b²)`, for comparison.
    pub unpaired_stderr: Option<f64>,
}

/// The candidates at one training size, best first.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Ranking {
    /// Training size.
    pub train_size: usize,
    /// Each family's best value, ranked by expected loss.
    pub candidates: Vec<Candidate>,
}

/// One family's best value at one training size.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct SizeBest {
    /// Training size.
    pub train_size: usize,
    /// The best knob value at this size.
    pub value: f64,
    /// Its expected loss and standard error.
    pub expected_loss: f64,
    /// Standard error of `expected_loss`.
    pub stderr: Option<f64>,
    /// The bias-type term at the best value.
    pub bias: f64,
    /// The variance term at the best value.
    pub variance: f64,
    /// The noise term at the best value; absent where it is unknown (a table scored by a
    /// classification or count loss, which folds it into the bias: such studies were refused
    /// when it was written as NaN).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub noise: Option<f64>,
}

/// What the largest size gained over the next one, paired over replicate blocks.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Gain {
    /// The smaller size.
    pub from: usize,
    /// The larger size.
    pub to: usize,
    /// Lowest expected loss at `from` minus lowest at `to`.
    pub drop: f64,
    /// Its jackknife standard error (paired: nested prefixes of the same draws).
    pub stderr: Option<f64>,
    /// Variance's share of bias plus variance at `to`, each taken at 0 or above (an unbiased
    /// bias² can fall below 0): for the additive losses its share of the reducible loss
    /// (expected loss minus noise), for the 0-1 loss of Domingos' bias and variance, which do not
    /// add up to it. 0 when neither is left.
    pub variance_share: f64,
    /// One sentence reading it.
    pub reading: String,
}

/// A family's learning curve: its best value and terms at each training size.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct LearningCurve {
    /// Family name.
    pub family: String,
    /// Knob name.
    pub knob: String,
    /// One entry per training size, ascending.
    pub sizes: Vec<SizeBest>,
    /// The gain from the second-largest to the largest size.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub gain: Option<Gain>,
}

/// What `check` needs to compare two results paired or unpaired (#13): the evaluation points'
/// fingerprint, the blocks, and per row the leave-one-block-out values of every term with a
/// standard error and the spread of the per-point terms across the evaluation points.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Uncertainty {
    /// FNV-1a of the evaluation points and the truth there (or of a table's working rows).
    pub eval_fingerprint: String,
    /// Number of evaluation points.
    pub eval_points: usize,
    /// The seed of the evaluation points.
    pub eval_seed: u64,
    /// Replicate blocks (the jackknife groups).
    pub blocks: u64,
    /// One entry per point row, in the order of `points`.
    pub rows: Vec<RowUncertainty>,
}

/// The uncertainty detail of one row.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct RowUncertainty {
    /// Per term: the term computed with each block left out (packed: base64 of the little-endian
    /// values, one per block).
    pub leave_out: std::collections::BTreeMap<String, String>,
    /// Per term: the standard deviation of the per-point term across the evaluation points.
    pub point_sd: std::collections::BTreeMap<String, f64>,
    /// Per term: the part of `point_sd²` that is the per-point terms' own Monte Carlo noise
    /// (jackknife over blocks; see [`decompose::point_spread`]), so that `point_sd² −
    /// point_noise` estimates the spread of the true per-point terms. Synthetic and twin sources
    /// with at least two blocks.
    #[serde(default, skip_serializing_if = "std::collections::BTreeMap::is_empty")]
    pub point_noise: std::collections::BTreeMap<String, f64>,
}

impl RowUncertainty {
    /// The leave-one-block-out values of `term`, unpacked (`blocks` values).
    pub fn leave_out_of(&self, term: &str, blocks: usize) -> Option<Vec<f64>> {
        let packed = self.leave_out.get(term)?;
        crate::codec::unpack_floats(packed, blocks).ok()
    }
}

/// The evaluation points' fingerprint of a prepared run.
pub fn eval_fingerprint(outcome: &Outcome) -> String {
    let p = &outcome.prepared;
    let mut bytes: Vec<u8> = Vec::with_capacity(8 * (p.eval_x.len() + 2 * p.eval_truth.len()));
    bytes.extend_from_slice(&(p.eval_x.nrows() as u64).to_le_bytes());
    bytes.extend_from_slice(&(p.eval_x.ncols() as u64).to_le_bytes());
    for v in p
        .eval_x
        .iter()
        .chain(p.eval_truth.iter())
        .chain(p.eval_sd.iter())
        .chain(p.eval_probs.iter().flat_map(|a| a.iter()))
    {
        bytes.extend_from_slice(&v.to_bits().to_le_bytes());
    }
    format!("fnv1a64:{:016x}", crate::codec::fnv1a64(&bytes))
}

fn uncertainty(plan: &Plan, outcome: &Outcome) -> Uncertainty {
    let noise_var = outcome.prepared.noise_var();
    let probs = outcome.prepared.flat_probs();
    let target = outcome.prepared.target(&noise_var, &probs);
    let mut rows_out = Vec::new();
    for c in 0..plan.cells() {
        let s = &outcome.summaries[c];
        let spread = decompose::point_spread(plan.loss, &s.total, &target);
        for g in 0..s.values.len() {
            let mut leave_out = std::collections::BTreeMap::new();
            let mut point_sd = std::collections::BTreeMap::new();
            let mut point_noise = std::collections::BTreeMap::new();
            for (t, info) in s.terms.iter().enumerate() {
                if !info.stderr {
                    continue;
                }
                if !s.leave_out.is_empty() {
                    let v: Vec<f64> = s.leave_out.iter().map(|l| l[g][t]).collect();
                    leave_out.insert(info.key.to_string(), crate::codec::pack_floats(&v));
                }
                let sd = spread[g][t];
                if sd.is_finite() {
                    point_sd.insert(info.key.to_string(), sd);
                }
                if let Some(v) = s.point_noise.get(g).map(|r| r[t]).filter(|v| v.is_finite()) {
                    point_noise.insert(info.key.to_string(), v);
                }
            }
            rows_out.push(RowUncertainty {
                leave_out,
                point_sd,
                point_noise,
            });
        }
    }
    Uncertainty {
        eval_fingerprint: eval_fingerprint(outcome),
        eval_points: outcome.prepared.points(),
        eval_seed: plan.eval_seed,
        blocks: plan.blocks,
        rows: rows_out,
    }
}

/// The jackknife standard error of the paired difference `a − b` of term `t` between grid value
/// `ga` of summary `a` and `gb` of summary `b` (same blocks).
fn paired_se(a: &Summary, ga: usize, b: &Summary, gb: usize, t: usize) -> Option<f64> {
    if a.leave_out.is_empty() || a.leave_out.len() != b.leave_out.len() {
        return None;
    }
    let d: Vec<f64> = a
        .leave_out
        .iter()
        .zip(&b.leave_out)
        .map(|(x, y)| x[ga][t] - y[gb][t])
        .collect();
    finite(decompose::jackknife_se(&d))
}

/// The grid index of the lowest expected loss of a summary (first on exact ties).
/// The grid index of a cell's lowest expected loss (the first on exact ties).
pub(crate) fn best_index(s: &Summary) -> usize {
    let el = s.index("expected_loss").unwrap_or(0);
    let mut bi = 0;
    for (g, row) in s.values.iter().enumerate() {
        if row[el] < s.values[bi][el] {
            bi = g;
        }
    }
    bi
}

/// The ranking of each family's best value at every training size, with paired differences.
fn rankings(plan: &Plan, outcome: &Outcome) -> Vec<Ranking> {
    let nm = plan.models.len();
    plan.sizes
        .iter()
        .enumerate()
        .map(|(si, &n)| {
            let cells: Vec<(usize, usize)> = (0..nm)
                .map(|i| {
                    let s = &outcome.summaries[plan.cell(si, i)];
                    (i, best_index(s))
                })
                .collect();
            let el_of = |i: usize, g: usize| {
                let s = &outcome.summaries[plan.cell(si, i)];
                s.value(g, "expected_loss")
            };
            let (bi, bg) = *cells
                .iter()
                .min_by(|a, b| el_of(a.0, a.1).total_cmp(&el_of(b.0, b.1)))
                .expect("at least one model");
            let best = &outcome.summaries[plan.cell(si, bi)];
            let t = best.index("expected_loss").unwrap_or(0);
            let mut cands: Vec<Candidate> = cells
                .iter()
                .map(|&(i, g)| {
                    let s = &outcome.summaries[plan.cell(si, i)];
                    let m = &plan.models[i];
                    let se = finite(s.se(g, "expected_loss"));
                    let se_best = finite(best.se(bg, "expected_loss"));
                    let is_best = i == bi;
                    Candidate {
                        family: m.label.clone(),
                        knob: m.family.knob().into(),
                        value: m.grid[g],
                        expected_loss: s.value(g, "expected_loss"),
                        stderr: se,
                        difference: s.value(g, "expected_loss") - best.value(bg, "expected_loss"),
                        difference_stderr: if is_best {
                            Some(0.0)
                        } else {
                            paired_se(s, g, best, bg, t)
                        },
                        unpaired_stderr: if is_best {
                            Some(0.0)
                        } else {
                            match (se, se_best) {
                                (Some(a), Some(b)) => Some((a * a + b * b).sqrt()),
                                _ => None,
                            }
                        },
                    }
                })
                .collect();
            cands.sort_by(|a, b| a.expected_loss.total_cmp(&b.expected_loss));
            Ranking {
                train_size: n,
                candidates: cands,
            }
        })
        .collect()
}

/// Each family's learning curve, with the gain of the largest size read in a sentence.
fn learning(plan: &Plan, outcome: &Outcome) -> Vec<LearningCurve> {
    let folded = noise_folded(plan, outcome);
    let nz = plan.sizes.len();
    // The responses' scale, squared (the truth or the observed responses at the evaluation
    // points): losses of fits exact to rounding are about 1e-32 of it.
    let t = &outcome.prepared.eval_truth;
    let truth_square = t
        .iter()
        .filter(|v| v.is_finite())
        .map(|v| v * v)
        .sum::<f64>()
        / t.len().max(1) as f64;
    let observed = outcome.prepared.table.is_some();
    plan.models
        .iter()
        .enumerate()
        .map(|(i, m)| {
            let pick = |s: &Summary, role: Role| {
                s.terms
                    .iter()
                    .position(|t| t.role == role && t.group == Group::Main)
            };
            let sizes: Vec<SizeBest> = plan
                .sizes
                .iter()
                .enumerate()
                .map(|(si, &n)| {
                    let s = &outcome.summaries[plan.cell(si, i)];
                    let g = best_index(s);
                    let at = |r: Role| pick(s, r).map_or(f64::NAN, |t| s.values[g][t]);
                    SizeBest {
                        train_size: n,
                        value: m.grid[g],
                        expected_loss: s.value(g, "expected_loss"),
                        stderr: finite(s.se(g, "expected_loss")),
                        bias: at(Role::Bias),
                        variance: at(Role::Variance),
                        noise: pick(s, Role::Noise)
                            .filter(|&t| reported(&s.terms[t], observed))
                            .map(|t| s.values[g][t]),
                    }
                })
                .collect();
            let gain = (nz >= 2).then(|| {
                let (a, b) = (
                    &outcome.summaries[plan.cell(nz - 2, i)],
                    &outcome.summaries[plan.cell(nz - 1, i)],
                );
                let (ga, gb) = (best_index(a), best_index(b));
                let t = a.index("expected_loss").unwrap_or(0);
                let drop = a.value(ga, "expected_loss") - b.value(gb, "expected_loss");
                let se = paired_se(a, ga, b, gb, t);
                let last = sizes.last().expect("a size");
                // Variance over bias plus variance: divided by the expected loss minus the noise,
                // a perfect best model made it 0/0 and the finished run was refused, the 0-1
                // loss's Domingos variance (not a part of that difference) read 140-769%, and an
                // unbiased bias² below 0 read 111%.
                let (bias, var) = (last.bias.max(0.0), last.variance.max(0.0));
                let left = bias + var;
                let share = if left > 0.0 { var / left } else { 0.0 };
                let (from, to) = (plan.sizes[nz - 2], plan.sizes[nz - 1]);
                // A change at the level of rounding is no change (a noise-free constant truth
                // read "rises by 7.889e-31 ± 0.00 ... beyond 2 standard errors").
                let rounding = 1e-9
                    * a.value(ga, "expected_loss")
                        .abs()
                        .max(b.value(gb, "expected_loss").abs())
                    + 1e-12 * truth_square;
                let clear = se.is_some_and(|s| drop > 2.0 * s && drop > rounding);
                let fam = m.label.as_str();
                let se_text = se.map(|s| format!(" ± {}", fmt_se(s))).unwrap_or_default();
                let (va, vb) = (m.grid[ga], m.grid[gb]);
                let knob = m.family.knob();
                let moved = if va == vb {
                    format!("its best {knob} stayed at {}", fmt_value(vb))
                } else {
                    format!("its best {knob} moved from {} to {}", fmt_value(va), fmt_value(vb))
                };
                let change = if drop >= 0.0 {
                    format!("falls by {}", fmt_num(drop))
                } else {
                    format!("rises by {}", fmt_num(-drop))
                };
                let mut reading = format!(
                    "From {from} to {to} rows the lowest expected loss of {fam} {change}{se_text} (paired over replicate blocks) and {moved}; "
                );
                // A rise beyond two standard errors is a finding too (it was read as "within 2
                // standard errors" at z = −2.25).
                let rose = se.is_some_and(|s| -drop > 2.0 * s && -drop > rounding);
                if left <= 0.0 {
                    reading.push_str(&format!(
                        "its best model has neither bias nor variance left at {to} rows: its loss is the noise alone, and more data cannot lower it."
                    ));
                } else if drop.abs() <= rounding {
                    reading.push_str(
                        "that change is at the level of rounding: the best model's loss does not move with more data.",
                    );
                } else if rose {
                    reading.push_str(&format!(
                        "that rise is beyond 2 standard errors: on this grid more data made the best of {fam} worse (learning curves can rise, near an interpolation threshold for one; a wider grid may hold a better {knob}).",
                    ));
                } else if !clear {
                    reading.push_str(&format!(
                        "that is within 2 standard errors, so no gain from more data is visible at this precision (variance is {} of {} plus variance at {to} rows).",
                        crate::fmt::fmt_percent(share),
                        if folded { "bias+noise" } else { "bias" }
                    ));
                } else if share >= 0.5 {
                    reading.push_str(&format!(
                        "variance is {} of {} plus variance at {to} rows, so more data should keep lowering it.",
                        crate::fmt::fmt_percent(share),
                        if folded { "bias+noise" } else { "bias" }
                    ));
                } else if folded {
                    // bias+noise: how much of it is bias, which a more flexible family or more
                    // data could remove, is not known on a table under this loss.
                    reading.push_str(&format!(
                        "bias+noise is {} of bias+noise plus variance at {to} rows; on a table the noise cannot be separated from the bias under this loss, so these numbers do not say whether a more flexible family would gain.",
                        crate::fmt::fmt_percent(1.0 - share)
                    ));
                } else if va != vb {
                    reading.push_str(&format!(
                        "bias is {} of bias plus variance at {to} rows: more data still helps, mostly by allowing a different {knob}.",
                        crate::fmt::fmt_percent(1.0 - share)
                    ));
                } else {
                    reading.push_str(&format!(
                        "bias is {} of bias plus variance at {to} rows and more data does not change the best {knob}, so a more flexible family would gain more than more data.",
                        crate::fmt::fmt_percent(1.0 - share)
                    ));
                }
                Gain {
                    from,
                    to,
                    drop,
                    stderr: se,
                    variance_share: share,
                    reading,
                }
            });
            LearningCurve {
                family: m.label.clone(),
                knob: m.family.knob().into(),
                sizes,
                gain,
            }
        })
        .collect()
}

/// Whether the bias term holds the noise too: a table under a loss whose noise is not
/// estimated (`bias+noise`: the 0-1, log, Brier and Poisson losses; the squared loss estimates
/// the noise and subtracts it).
fn noise_folded(plan: &Plan, outcome: &Outcome) -> bool {
    matches!(plan.source, Source::Table(_))
        && !outcome
            .summary()
            .terms
            .iter()
            .any(|t| t.role == Role::Noise && reported(t, true))
}

/// Builds the result document of a finished run.
pub fn build(plan: &Plan, outcome: &Outcome) -> ResultDoc {
    let model = plan.model();
    let nm = plan.models.len();
    let last = plan.sizes.len() - 1;
    let mut points: Vec<PointRow> = Vec::new();
    for c in 0..plan.cells() {
        points.extend(rows(plan, outcome, c));
    }
    // The curve read by `best` and the reading: the first model at the largest size.
    let main_rows = rows(plan, outcome, plan.cell(last, 0));
    let mut best = best_of(&main_rows);
    let bias_term = outcome
        .summary()
        .terms
        .iter()
        .find(|t| t.role == Role::Bias && t.group == Group::Main);
    let bias_key = bias_term.map(|t| t.key).unwrap_or("bias_sq");
    // By role, as the bias: a loss may key its variance otherwise (an added loss's `spread`
    // read "neither dominates anywhere" beside |bias| seven times its spread).
    let variance_key = outcome
        .summary()
        .terms
        .iter()
        .find(|t| t.role == Role::Variance && t.group == Group::Main)
        .map_or("variance", |t| t.key);
    // A table under a loss whose noise is not estimated: the bias term holds the noise too.
    let folded = noise_folded(plan, outcome);
    let mut reading = reading(
        model.family.knob(),
        match bias_term {
            Some(t) if folded => t.label,
            _ => plan.loss.bias_word(),
        },
        (bias_key, variance_key),
        Fold {
            folded,
            additive: plan.loss.folded_covers_bias(),
        },
        &main_rows,
        &best,
    );
    if let Some(more) = split_reading(model.family.knob(), &main_rows, &best) {
        reading.push(' ');
        reading.push_str(&more);
    }
    if let Some(g) = main_rows.iter().position(|p| p.value == best.value) {
        let s = &outcome.summaries[plan.cell(last, 0)];
        if let Some(note) = plan.loss.reading_note(
            s,
            model.family.knob(),
            &crate::fmt::fmt_value(best.value),
            g,
        ) {
            reading.push(' ');
            reading.push_str(&note);
        }
    }
    let ranking = (nm > 1).then(|| rankings(plan, outcome));
    if let Some(r) = ranking.as_ref().and_then(|r| r.last()) {
        let top = &r.candidates[0];
        best = Best {
            family: Some(top.family.clone()),
            value: top.value,
            expected_loss: top.expected_loss,
            stderr: top.stderr,
            within_one_se: Vec::new(),
        };
        best.within_one_se = points
            .iter()
            .filter(|p| {
                p.family.as_deref() == Some(top.family.as_str())
                    && p.train_size.map_or(true, |n| n as usize == r.train_size)
                    && best.admits(p.expected_loss())
            })
            .map(|p| p.value)
            .collect();
        reading = ranking_reading(r);
    }
    // A table whose noise estimate says almost nothing: its bias² split is not to be read
    // (sweep 70: the reading compared a bias² of -0.12 ± 0.55 with the variance). The same
    // words are the estimate's warning below.
    let weak_noise = outcome.prepared.table.as_ref().and_then(|run| {
        let n = run.noise.as_ref()?;
        crate::dataset::noise::uninformative_warning(n.value, n.stderr, &run.work)
    });
    if weak_noise.is_some() {
        reading.push_str(
            " But the noise estimate says almost nothing on this table (see the warning beside \
             it), so neither the bias² terms nor their comparison with the variance are to be \
             read; the expected loss and its lowest point stand.",
        );
    }
    let learning_curves = (plan.sizes.len() > 1).then(|| learning(plan, outcome));
    if let Some(curves) = &learning_curves {
        for c in curves {
            if let Some(g) = &c.gain {
                reading.push(' ');
                reading.push_str(&g.reading);
            }
        }
    }
    let selection = match (&plan.audit, &outcome.audit) {
        (Some(a), Some(c)) => {
            let candidates: Vec<PointRow> = (0..nm)
                .flat_map(|i| rows(plan, outcome, plan.cell(last, i)))
                .collect();
            // candidates named "label knob = value", as the ranking names them
            let knob_of = |label: &str| {
                plan.models
                    .iter()
                    .find(|m| m.label == label)
                    .map_or("value", |m| m.family.knob())
            };
            Some(selection::selection(
                a,
                &c.counts,
                &candidates,
                &best,
                &knob_of,
            ))
        }
        _ => None,
    };
    let (mut table, mut noise_estimate, mut scheme_note) = (None, None, None);
    if let (Source::Table(tp), Some(run)) = (&plan.source, &outcome.prepared.table) {
        // The folded reading says it itself; a study's ranking replaces it and does not.
        if !folded || nm > 1 {
            reading.push_str(plan.loss.observed_note());
        }
        let (share, share_se) = outcome.held_share.unwrap_or((f64::NAN, f64::NAN));
        table = Some(TableEcho {
            path: tp.recorded_path(),
            target: tp.table.target.clone(),
            rows: tp.table.rows(),
            dropped_rows: tp.table.dropped_rows,
            repeats_dropped: tp.table.repeats_dropped,
            holdout_rows: tp.holdout.len(),
            working_rows: tp.work.len(),
            skipped_rows: outcome
                .summary()
                .total
                .count
                .iter()
                .filter(|&&c| c < 2)
                .count(),
            resample: if tp.sizes.is_some() {
                "nested".into()
            } else {
                tp.scheme.name().into()
            },
            train_size: tp.train_size(),
            held_out_share: share,
            held_out_share_stderr: finite(share_se),
            encodings: tp.table.encodings.iter().map(|e| e.describe()).collect(),
            absent_labels: match tp.table.task {
                crate::family::Task::Classify { classes } => (0..classes)
                    .filter(|&c| !tp.table.y.iter().any(|&v| v as usize == c))
                    .map(|c| tp.table.labels.get(c).cloned().unwrap_or_default())
                    .collect(),
                crate::family::Task::Regress => Vec::new(),
            },
        });
        noise_estimate = run.noise.map(|n| NoiseEstimateEcho {
            value: n.value,
            stderr: finite(n.stderr),
            method: n.method.name().into(),
            about: n.method.describe().into(),
            response_variance: finite(crate::dataset::noise::response_variance(run.work.y.view())),
            warning: {
                let far = crate::dataset::noise::far_input_warning(n.method, &run.work);
                match (far, weak_noise) {
                    (Some(a), Some(b)) => Some(format!("{a}; and {b}")),
                    (a, b) => a.or(b),
                }
            },
        });
        scheme_note = Some(tp.note());
    }
    let models = if nm > 1 {
        plan.models
            .iter()
            .map(|m| ModelEcho {
                family: m.family.name().into(),
                label: (m.label != m.family.name()).then(|| m.label.clone()),
                knob: m.family.knob().into(),
                grid: m.grid.clone(),
                grid_kind: m.grid_kind.name().into(),
                fit_seeds: m.fit_seeds,
                larger_is_simpler: m.family.larger_is_simpler(),
            })
            .collect()
    } else {
        Vec::new()
    };
    let mut doc = ResultDoc {
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
            .filter(|t| reported(t, outcome.prepared.table.is_some()))
            .map(TermDoc::from_info)
            .collect(),
        larger_is_simpler: model.family.larger_is_simpler(),
        models,
        sizes: if plan.sizes.len() > 1 {
            plan.sizes.clone()
        } else {
            Vec::new()
        },
        ranking: ranking.unwrap_or_default(),
        learning: learning_curves.unwrap_or_default(),
        uncertainty: Some(uncertainty(plan, outcome)),
    };
    if let Some(w) = heavy_tail_words(&doc) {
        doc.reading.push(' ');
        doc.reading.push_str(&w);
    }
    if let Some(w) = few_held_out_words(&doc) {
        doc.reading.push(' ');
        doc.reading.push_str(&w);
    }
    if let Some(w) = few_rows_words(plan) {
        doc.reading.push(' ');
        doc.reading.push_str(&w);
    }
    if let Some(w) = threshold_words(plan) {
        doc.reading.push(' ');
        doc.reading.push_str(&w);
    }
    if let Some(w) = bayes_tie_words(plan, outcome) {
        doc.reading.push(' ');
        doc.reading.push_str(&w);
    }
    doc
}

/// A sentence for the reading of a 0-1 loss run whose true class probabilities tie exactly at
/// the top at some evaluation points (`probability = "0.5"`): the Bayes class there is the
/// first of the tied labels by convention, and the bias and variance split (and a reading of
/// which dominates) rests on it there; the expected loss does not.
fn bayes_tie_words(plan: &Plan, outcome: &Outcome) -> Option<String> {
    if plan.loss.name() != "zero_one" {
        return None;
    }
    let probs = outcome.prepared.eval_probs.as_ref()?;
    let m = probs.nrows();
    let tied = probs
        .rows()
        .into_iter()
        .filter(|r| {
            let top = r.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
            r.iter().filter(|&&v| v == top).count() > 1
        })
        .count();
    (tied > 0).then(|| {
        format!(
            "The true class probabilities tie at the top at {tied} of {m} evaluation points: \
             the Bayes class there is the first of the tied labels by convention, so the bias \
             and the variance there, and which dominates, rest on that convention; the expected \
             loss does not."
        )
    })
}

/// Training rows per least-squares coefficient below which the reading warns
/// ([`few_rows_words`]). A rule of thumb (common practice, no source): an independent check
/// found a cubic on 10 rows of one uniform input (2.5 rows per coefficient) with ± 2 SE
/// covering the variance in 40% of runs (docs/exact-checks.md, "Few rows per coefficient").
pub const ROWS_PER_COEFFICIENT: usize = 5;

/// The training rows a fit of `n` draws learns from, and their words: a bootstrap sample of a
/// table, or of a twin's rows drawn as they are (no jitter), holds fewer distinct rows than it
/// draws (about 63%), and those are what coefficients are fitted from.
fn distinct_rows(plan: &Plan, n: usize) -> (usize, String) {
    let pool = match &plan.source {
        Source::Table(t) if t.scheme == crate::dataset::Scheme::Bootstrap => Some(t.work.len()),
        Source::Synthetic(s) if s.process.jitter().map_or(true, |j| j.is_plain()) => {
            s.process.empirical_rows().map(|r| r.nrows())
        }
        _ => None,
    };
    match pool {
        Some(rows) => {
            let d = crate::dataset::distinct_share(n, rows) * n as f64;
            (
                d.round() as usize,
                format!("{n} training rows, about {} distinct", d.round()),
            )
        }
        _ => (n, format!("{n} training rows")),
    }
}

/// How close to the training rows a minimum-norm fit's coefficients come before
/// [`threshold_words`] speaks: the standard error of the variance needs the predictions' fourth
/// moment, which for Gaussian inputs involves the second moment of an inverse Wishart matrix,
/// finite only a few rows away from the threshold (a rule of thumb from that moment condition,
/// from memory; not measured here).
pub const THRESHOLD_NEAR: usize = 4;

/// A sentence for the reading when a minimum-norm family (`minnorm`, `random_features`) fits,
/// at some grid value and training size of a random design, a number of coefficients within
/// [`THRESHOLD_NEAR`] of the training rows: there its variance across training sets has a heavy
/// tail (for centred Gaussian inputs its mean is infinite within one row of the threshold:
/// Belkin, Hsu and Xu 2020, *SIAM J. Math. Data Sci.* 2(4), Theorem 1, from memory), and the
/// variance's standard error can be far too small.
fn threshold_words(plan: &Plan) -> Option<String> {
    // A fixed design fits the same inputs every time: a deterministic fit's predictions are then
    // linear in Gaussian noise, with no heavy tail; random features are still drawn anew in
    // every replicate (a width-20 variance of 4e6 ± 4e6 on 20 fixed rows went unremarked).
    let q = plan.n_inputs();
    let listed = flagged_values(
        plan,
        |m| m.family.caps(plan.task).stochastic,
        |m, rows, words, v| {
            let c = m.family.min_norm_coefficients(v, q)?;
            // Within half the rows at most (1 feature of 5 rows was flagged when any distance
            // up to 4 was); a quarter missed 4 features of 8 random rows, whose variance an
            // independent audit found covered in 87-89% of seeds. Closest first, so a long list
            // never hides the threshold itself in "and N more".
            let off = c.abs_diff(rows);
            (off <= THRESHOLD_NEAR.min(rows / 2).max(1)).then(|| {
                let s = if c == 1 { "" } else { "s" };
                (off, format!("{c} coefficient{s}, {words}"))
            })
        },
    )?;
    Some(format!(
        "Near the interpolation threshold at {listed}: a minimum-norm fit with about as many \
         coefficients as training rows has a variance with a heavy tail across training sets \
         (for Gaussian inputs its mean is infinite within one row of the threshold; Belkin, Hsu \
         and Xu 2020, Theorem 1), so its standard error can be far too small there: read the \
         variance there as a lower bound."
    ))
}

/// The grid values a reading flags, listed for its sentence: `flag(model, rows, words, value)`
/// gives, for each model, training size (its `rows` after [`distinct_rows`], in `words`) and
/// grid value, a rank and the words in brackets, or `None`. On a fixed design only models for
/// which `on_fixed` holds are looked at. The list reads "knob = v (words), ... and knob = w
/// (words)", lowest rank first (grid order among equals), at most four and "N more"; the model's
/// label leads each item when there are several. `None` when nothing is flagged.
fn flagged_values(
    plan: &Plan,
    on_fixed: impl Fn(&crate::scenario::ModelPlan) -> bool,
    flag: impl Fn(&crate::scenario::ModelPlan, usize, &str, f64) -> Option<(usize, String)>,
) -> Option<String> {
    let fixed = matches!(&plan.source, Source::Synthetic(s) if s.design == Design::Fixed);
    let several = plan.models.len() > 1;
    let mut hits: Vec<(usize, String)> = Vec::new();
    for m in plan.models.iter().filter(|m| !fixed || on_fixed(m)) {
        for &n in &plan.sizes {
            let (rows, words) = distinct_rows(plan, n);
            for &v in &m.grid {
                if let Some((rank, what)) = flag(m, rows, &words, v) {
                    let label = if several {
                        format!("{}: ", m.label)
                    } else {
                        String::new()
                    };
                    let knob = m.family.knob();
                    hits.push((rank, format!("{label}{knob} = {} ({what})", fmt_value(v))));
                }
            }
        }
    }
    if hits.is_empty() {
        return None;
    }
    hits.sort_by_key(|h| h.0);
    let hits: Vec<String> = hits.into_iter().map(|h| h.1).collect();
    let shown = hits.len().min(4);
    Some(if hits.len() > shown {
        format!(
            "{} and {} more",
            hits[..shown].join(", "),
            hits.len() - shown
        )
    } else if shown == 1 {
        hits[0].clone()
    } else {
        format!("{} and {}", hits[..shown - 1].join(", "), hits[shown - 1])
    })
}

/// A sentence for the reading when an unpenalized least-squares fit
/// ([`crate::family::Family::least_squares_coefficients`]) has fewer than
/// [`ROWS_PER_COEFFICIENT`] training rows per coefficient at some grid value and training
/// size of a random design (a table's resampled rows included; never a fixed design). Now and
/// then the training inputs bunch up or an evaluation point lies outside their range, and the
/// fit extrapolates wildly: its predictions across training sets have a heavy
/// tail (with one input and degree d, the chance that all n rows fall in a width ε falls like
/// ε^(n−1) while a degree-d extrapolation grows like ε^(−d), so the prediction's 4th moment,
/// which the variance's standard error needs, is infinite once n − 1 ≤ 4d; a derivation written
/// here), and the variance's standard error can be far too small. The block statistic of
/// [`heavy_tail_words`] sees only a share of such runs.
fn few_rows_words(plan: &Plan) -> Option<String> {
    let q = plan.n_inputs();
    let listed = flagged_values(
        plan,
        // A fixed design trains on the same inputs in every replicate: they never bunch up.
        |_| false,
        |m, rows, words, v| {
            let p = m.family.least_squares_coefficients(v, q)?;
            (p.saturating_mul(ROWS_PER_COEFFICIENT) > rows)
                .then(|| (0, format!("{p} coefficients from {words}")))
        },
    )?;
    Some(format!(
        "Few rows per coefficient at {listed}: fewer than {ROWS_PER_COEFFICIENT} training rows \
         per least-squares coefficient (a rule of thumb). There the fit extrapolates wildly \
         when the training inputs bunch up, its variance across training sets has a heavy \
         tail, and its standard error can be far too small (±2 SE covered 40% of runs for a \
         cubic on 10 rows; docs/exact-checks.md): read the variance there as a lower bound, \
         or raise the training size."
    ))
}

/// Fewest replicates that hold a table's row out, on average, below which the reading says the
/// standard errors run short ([`few_held_out_words`]).
pub const FEW_HELD_OUT: f64 = 40.0;

/// A sentence for the reading of a table run whose rows were each held out in few replicates
/// (fewer than [`FEW_HELD_OUT`] on average): each row's terms then average a handful of
/// out-of-bag predictions, a run whose draws came out low has a standard error as low, and the
/// ± runs short. Measured by an independent exact check (a 13-row table, k-NN with k = n, every
/// loss; 1000 seeds each): ±2 SE covered the truth in 88–92% of seeds at R = 50 (about 18
/// holds per row), 92.6–95.3% at R = 200 (about 74); `check` raised 2 false alarms in 300
/// unchanged pairs at R = 50, none at R = 200. The threshold lies between the two measured
/// values; it is not a general law. `None` for other sources.
pub fn few_held_out_words(doc: &ResultDoc) -> Option<String> {
    let t = doc.table.as_ref()?;
    let held = doc.replicates as f64 * t.held_out_share;
    (held.is_finite() && held < FEW_HELD_OUT).then(|| {
        format!(
            "Each row was held out in about {held:.0} replicates on average: with so few, the ± \
             of a table's terms runs short (on a small table it covered its truth in about 90% \
             of runs rather than 95%); raise `replicates` to at least {} before reading the ± \
             or comparing runs with `check`.",
            ((FEW_HELD_OUT / t.held_out_share.max(1e-9)).ceil() as u64)
                .div_ceil(10)
                .saturating_mul(10)
        )
    })
}

/// Fewest replicate blocks for [`heavy_tail_words`] to judge: with fewer, one block carries
/// most of the spread by chance too often (with 10 blocks of skewed but light-tailed values,
/// 9% of the time; measured by simulation, `docs/heavy-tails.md`).
pub const TAIL_MIN_BLOCKS: u64 = 20;

/// Fewest replicates per block on average for [`heavy_tail_words`] to judge.
pub const TAIL_MIN_PER_BLOCK: u64 = 3;

/// Share of its largest possible value, `(B − 1)/B`, above which one block's leave-one-out
/// deviation is said to carry the spread ([`heavy_tail_words`]).
pub const TAIL_SHARE: f64 = 0.9;

/// The roles of the main terms [`heavy_tail_words`] examines (by role, so a loss that keys
/// its terms otherwise is examined too).
const TAIL_ROLES: [&str; 3] = ["loss", "variance", "bias"];

/// A sentence for the reading when one replicate block carries nearly all of a term's standard
/// error: the largest squared deviation of the leave-one-block-out values from their mean is
/// more than [`TAIL_SHARE`] of its largest possible share of their sum (an outlier statistic of
/// Grubbs's kind over the blocks). A few replicates' predictions then dominate the term (a
/// model that extrapolates wildly now and then, such as least squares on nearly collinear
/// random ReLU features in few inputs, or minimum norm next to `p = n`), and its standard error is
/// not a reliable measure of its error at this R (nor at any R when the tail has no finite
/// variance). `None` with fewer than [`TAIL_MIN_BLOCKS`] blocks, fewer than
/// [`TAIL_MIN_PER_BLOCK`] replicates per block, or when no row shows it.
pub fn heavy_tail_words(doc: &ResultDoc) -> Option<String> {
    let u = doc.uncertainty.as_ref()?;
    // Blocks of one or two replicates are skewed enough to trip it by chance (a stump on a
    // flat truth at R = 64 in 32 blocks, once in 30 seeds).
    if u.blocks < TAIL_MIN_BLOCKS
        || doc.replicates < TAIL_MIN_PER_BLOCK * u.blocks
        || u.rows.len() != doc.points.len()
    {
        return None;
    }
    let b = usize::try_from(u.blocks).ok()?;
    let bound = TAIL_SHARE * (b - 1) as f64 / b as f64;
    let mut hits: Vec<String> = Vec::new();
    let mut worst = 0.0f64;
    for (p, r) in doc.points.iter().zip(&u.rows) {
        let mut terms = Vec::new();
        let tail_terms = doc
            .terms
            .iter()
            .filter(|t| t.group == "main" && TAIL_ROLES.contains(&t.role.as_str()))
            .map(|t| t.key.as_str());
        for t in tail_terms {
            let Some(v) = r.leave_out_of(t, b) else {
                continue;
            };
            if v.iter().any(|x| !x.is_finite()) {
                continue;
            }
            // Deviations scaled by the largest before squaring: terms near 1e155 and beyond,
            // the tails this is for, overflowed to inf / inf.
            let scale = v.iter().fold(0.0f64, |a, x| a.max(x.abs()));
            if scale == 0.0 {
                continue;
            }
            let mean = v.iter().map(|x| x / scale).sum::<f64>() / b as f64;
            let d: Vec<f64> = v
                .iter()
                .map(|x| (x / scale - mean) * (x / scale - mean))
                .collect();
            let sum: f64 = d.iter().sum();
            let max = d.iter().cloned().fold(0.0, f64::max);
            if sum > 0.0 && max / sum > bound {
                worst = worst.max(max / sum);
                terms.push(t.replace("_sq", "²").replace('_', " "));
            }
        }
        if !terms.is_empty() {
            let label = p.family.as_deref().unwrap_or(&doc.family);
            let model = if doc.models.is_empty() {
                String::new()
            } else {
                format!("{label} ")
            };
            let size = p
                .train_size
                .map(|n| format!(" at {n} rows"))
                .unwrap_or_default();
            hits.push(format!(
                "{model}{} = {}{size} ({})",
                doc.knob_of(label),
                fmt_value(p.value),
                terms.join(", ")
            ));
        }
    }
    if hits.is_empty() {
        return None;
    }
    let n = hits.len();
    let shown: Vec<String> = hits.into_iter().take(4).collect();
    let more = if n > shown.len() {
        format!(" and {} more", n - shown.len())
    } else {
        String::new()
    };
    Some(format!(
        "Heavy tail: at {}{more}, one of the {b} replicate blocks carries up to {} of the \
         spread behind the standard error, so a few replicates dominate those terms and their \
         standard errors are not reliable at this number of replicates (if the predictions' \
         tail has no finite variance, more replicates will not settle them).",
        shown.join("; "),
        crate::fmt::fmt_percent(worst)
    ))
}

/// The reading of a ranking: the best candidate, and how far each other family's best is behind
/// it (paired standard errors).
pub fn ranking_reading(r: &Ranking) -> String {
    let top = &r.candidates[0];
    let mut parts = vec![format!(
        "At {} training rows the best candidate is {} {} = {} (expected loss {}{}).",
        r.train_size,
        top.family,
        top.knob,
        fmt_value(top.value),
        fmt_num(top.expected_loss),
        top.stderr
            .map(|s| format!(" ± {}", fmt_se(s)))
            .unwrap_or_default()
    )];
    for c in &r.candidates[1..] {
        let se = c
            .difference_stderr
            .map(|s| format!(" ± {}", fmt_se(s)))
            .unwrap_or_default();
        let clear = c.difference_stderr.is_some_and(|s| c.difference > 2.0 * s);
        if c.difference == 0.0 {
            // An exact tie (sweep 69: "is 0.000 ± 0.00 worse").
            parts.push(format!(
                "{} {} = {} ties it exactly.",
                c.family,
                c.knob,
                fmt_value(c.value)
            ));
            continue;
        }
        parts.push(format!(
            "{} {} = {} is {}{se} worse{}.",
            c.family,
            c.knob,
            fmt_value(c.value),
            fmt_num(c.difference),
            if clear {
                ""
            } else {
                " (within two standard errors of the paired difference: not clearly worse)"
            }
        ));
    }
    parts.join(" ")
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
    let mut best = Best {
        family: b.family.clone(),
        value: b.value,
        expected_loss: b.expected_loss(),
        stderr: b.se("expected_loss"),
        within_one_se: Vec::new(),
    };
    best.within_one_se = points
        .iter()
        .filter(|p| best.admits(p.expected_loss()))
        .map(|p| p.value)
        .collect();
    best
}

/// The first number of `doc` that could not be computed (it would be written as `null`), named
/// so that a user can find it: the term, family, training size and knob value of a grid row, or
/// the JSON path elsewhere. `None` when every number is finite. A run refuses to write (or
/// print) such a result: non-finite numbers are errors, never `null` with exit 0.
pub fn first_missing(doc: &ResultDoc) -> Option<String> {
    for p in &doc.points {
        let bad = p
            .stderr
            .iter()
            .find(|(_, v)| !v.is_finite())
            .map(|(k, _)| format!("the standard error of `{k}`"))
            .or_else(|| {
                p.interval
                    .iter()
                    .find(|(_, (lo, hi))| !lo.is_finite() || !hi.is_finite())
                    .map(|(k, _)| format!("the 95 % interval of `{k}`"))
            });
        if let Some(what) = bad {
            let mut at = format!("{} = {}", doc.knob, fmt_value(p.value));
            if let Some(f) = &p.family {
                at = format!("{f}, {at}");
            }
            if let Some(n) = p.train_size {
                at = format!("{at}, n = {n}");
            }
            return Some(format!("{what} at {at}"));
        }
    }
    let v = serde_json::to_value(doc).ok()?;
    fn walk(v: &serde_json::Value, path: &str) -> Option<String> {
        match v {
            serde_json::Value::Null => Some(format!("`{path}`")),
            serde_json::Value::Array(a) => a
                .iter()
                .enumerate()
                .find_map(|(i, x)| walk(x, &format!("{path}[{i}]"))),
            serde_json::Value::Object(m) => m.iter().find_map(|(k, x)| {
                let p = if path.is_empty() {
                    k.clone()
                } else {
                    format!("{path}.{k}")
                };
                walk(x, &p)
            }),
            _ => None,
        }
    }
    walk(&v, "")
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

/// How a table's bias term holds the noise ([`reading`]).
#[derive(Debug, Clone, Copy)]
pub struct Fold {
    /// The bias term holds the noise too (a table under a loss whose noise is not estimated,
    /// `bias+noise`): the term above the variance says nothing of the bias, so no bias
    /// dominance is claimed (a 0-1 table whose noise made most of `bias+noise` was called
    /// bias-dominated).
    pub folded: bool,
    /// The folded term is at least the bias, so variance above it is above the bias alone
    /// ([`crate::decompose::Loss::folded_covers_bias`]).
    pub additive: bool,
}

/// One plain sentence (or two) reading the curve: where the bias-type term (`bias_key`,
/// called `bias_word`) dominates the variance-type term (`variance_key`), where the variance
/// does, and where the lowest expected loss lies. `fold`: see [`Fold`].
pub fn reading(
    knob: &str,
    bias_word: &str,
    (bias_key, variance_key): (&str, &str),
    fold: Fold,
    points: &[PointRow],
    best: &Best,
) -> String {
    let bias_dominates = |p: &PointRow| p.get(bias_key) > p.get(variance_key);
    let variance_dominates = |p: &PointRow| p.get(variance_key) > p.get(bias_key);
    let n_bias = points.iter().filter(|p| bias_dominates(p)).count();
    let n_var = points.iter().filter(|p| variance_dominates(p)).count();
    let n_tie = points.len() - n_bias - n_var;
    let mut out = if fold.folded {
        let cannot = "on a table the noise cannot be separated from the bias under this loss, so \
                      this does not show that the family underfits";
        if n_var == points.len() && fold.additive {
            format!(
                "Variance exceeds {bias_word} at every {knob} tried, so it exceeds the bias alone \
                 too: the whole grid lies on the variance-dominated side."
            )
        } else if n_var == points.len() {
            format!("Variance exceeds {bias_word} at every {knob} tried.")
        } else if n_var == 0 {
            format!(
                "{} is at least the variance at every {knob} tried; {cannot}.",
                upper_first(bias_word)
            )
        } else {
            format!(
                "Variance exceeds {bias_word} at {knob} {}{}; at {knob} {} {bias_word} is at \
                 least the variance, and {cannot}.",
                runs(points, variance_dominates),
                if fold.additive {
                    " (so the bias alone too: variance dominates there)"
                } else {
                    ""
                },
                runs(points, |p| !variance_dominates(p))
            )
        }
    } else if n_tie == points.len() {
        // Both exactly 0 (a model that reproduces a noiseless truth) or equal: neither side.
        format!(
            "{bias_word} and variance are equal at every {knob} tried: neither dominates anywhere."
        )
    } else if n_bias == points.len() {
        // Said of the grid, not the family: an exact model at the best value, with bias² 0 and
        // a little variance, was called overfitting.
        format!("{bias_word} exceeds variance at every {knob} tried: the whole grid lies on the bias-dominated side (no value tried lets variance dominate).")
    } else if n_var == points.len() {
        format!(
            "Variance exceeds {} at every {knob} tried: the whole grid lies on the variance-dominated side (no value tried lets {} dominate).",
            lower_first(bias_word),
            lower_first(bias_word)
        )
    } else {
        let side = |n: usize, who: &str, f: &dyn Fn(&PointRow) -> bool| {
            (n > 0).then(|| format!("{who} at {knob} {}", runs(points, f)))
        };
        let tie = |p: &PointRow| !bias_dominates(p) && !variance_dominates(p);
        let parts: Vec<String> = [
            side(n_bias, &format!("{bias_word} dominates"), &bias_dominates),
            side(n_var, "variance dominates", &variance_dominates),
            side(n_tie, "the two are equal", &tie),
        ]
        .into_iter()
        .flatten()
        .collect();
        let mut text = parts.join("; ");
        text.push('.');
        text
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
        out.push_str(&format!(" ({} of it).", within_words(knob, &others)));
    }
    out
}

/// `s` with its first letter in lower case (`Bias (Domingos)` → `bias (Domingos)`).
fn lower_first(s: &str) -> String {
    let mut c = s.chars();
    c.next()
        .map(|f| f.to_lowercase().chain(c).collect())
        .unwrap_or_default()
}

/// `s` with its first letter in upper case (`bias+noise` → `Bias+noise`).
fn upper_first(s: &str) -> String {
    let mut c = s.chars();
    c.next()
        .map(|f| f.to_uppercase().chain(c).collect())
        .unwrap_or_default()
}

/// Names the grid values within one standard error of the best without ambiguity:
/// "max_depth = 6 is within one standard error", "max_depth = 5 and 6 are within …".
pub fn within_words(knob: &str, others: &[String]) -> String {
    let list = match others {
        [] => return String::new(),
        [one] => one.clone(),
        [init @ .., last] => format!("{} and {last}", init.join(", ")),
    };
    format!(
        "{knob} = {list} {} within one standard error",
        if others.len() == 1 { "is" } else { "are" }
    )
}

/// What the variance is made of and what averaging saves, when the loss reports those terms:
/// with several fit seeds, the share of the variance that is the learner's own randomness
/// (`variance_fit`) or the training data (`variance_data`), at the simplest grid value and at the
/// lowest expected loss; for an ensemble, how much the members' diversity takes off the
/// average member's loss at the lowest expected loss (exact: `member_loss − diversity =
/// expected_loss`). `None` when neither is reported.
pub fn split_reading(knob: &str, points: &[PointRow], best: &Best) -> Option<String> {
    let bi = points.iter().position(|p| p.value == best.value)?;
    let mut parts: Vec<String> = Vec::new();
    let share = |p: &PointRow| -> Option<String> {
        if !p.has("variance_fit") || !p.has("variance_data") {
            return None;
        }
        let (vd, vf, v) = (
            p.get("variance_data"),
            p.get("variance_fit"),
            p.get("variance"),
        );
        if !(v > 0.0 && vd.is_finite() && vf.is_finite()) {
            return None;
        }
        let fit = (vf / v).clamp(0.0, 1.0);
        let pct = crate::fmt::fmt_percent;
        Some(if fit >= 0.5 {
            format!(
                "mostly the learner's own randomness ({} var (fit), the spread across fit seeds on one training set)",
                pct(fit)
            )
        } else {
            format!(
                "mostly the training data ({} var (data), the spread across training sets)",
                pct(1.0 - fit)
            )
        })
    };
    let at = |p: &PointRow| format!("{knob} = {}", fmt_value(p.value));
    let first = &points[0];
    let b = &points[bi];
    match (bi > 0).then(|| share(first)).flatten() {
        Some(s0) => {
            if let Some(sb) = share(b) {
                parts.push(format!(
                    "At {} the variance is {s0}; at {} (lowest expected loss) it is {sb}.",
                    at(first),
                    at(b)
                ));
            }
        }
        None => {
            if let Some(sb) = share(b) {
                parts.push(format!("At {} the variance is {sb}.", at(b)));
            }
        }
    }
    if b.has("diversity") && b.has("member_loss") {
        let (d, ml) = (b.get("diversity"), b.get("member_loss"));
        if d.is_finite() && ml.is_finite() && d > 0.0 {
            parts.push(format!(
                "At {} a single member would lose {} on average; the members' diversity ({}) is what averaging them takes off, leaving {}.",
                at(b),
                fmt_num(ml),
                fmt_num(d),
                fmt_num(b.expected_loss())
            ));
        }
    }
    (!parts.is_empty()).then(|| parts.join(" "))
}

#[cfg(test)]
mod tests {
    use super::*;

    // `points_not_drawn` recognises evenly spaced inputs by the start of their description.
    #[test]
    fn even_inputs_are_recognised_by_their_description() {
        let d = crate::dgp::InputDist::Even(0.0, 1.0).describe();
        assert!(d.starts_with(EVEN_DESCRIPTION), "{d}");
        let u = crate::dgp::InputDist::Uniform(0.0, 1.0).describe();
        assert!(!u.starts_with(EVEN_DESCRIPTION), "{u}");
    }

    /// An exact tie in a ranking is said as one (sweep 69: "is 0.000 ± 0.00 worse").
    #[test]
    fn a_ranking_says_an_exact_tie_as_a_tie() {
        let cand = |family: &str, value: f64, difference: f64| Candidate {
            family: family.into(),
            knob: if family == "tree" { "max_depth" } else { "k" }.into(),
            value,
            expected_loss: 0.5 + difference,
            stderr: Some(0.01),
            difference,
            difference_stderr: Some(0.0),
            unpaired_stderr: Some(0.014),
        };
        let r = Ranking {
            train_size: 3,
            candidates: vec![
                cand("tree", 2.0, 0.0),
                cand("knn", 1.0, 0.0),
                cand("ridge", 0.5, 0.1),
            ],
        };
        let text = ranking_reading(&r);
        assert!(text.contains("knn k = 1 ties it exactly."), "{text}");
        assert!(!text.contains("0.000"), "{text}");
        assert!(text.contains("is 0.1000 ± 0.00 worse"), "{text}");
    }

    /// The reading compares the bias-type and variance-type terms it is given, whatever their
    /// keys: a loss whose variance term is keyed `spread` read "neither dominates anywhere"
    /// beside |bias| 1.31 against a spread of 0.19.
    #[test]
    fn the_reading_compares_the_terms_it_is_given() {
        let row = |value: f64, bias: f64, spread: f64| PointRow {
            value,
            family: None,
            train_size: None,
            terms: vec![
                ("expected_loss".into(), bias + spread),
                ("bias".into(), bias),
                ("spread".into(), spread),
            ],
            estimated: None,
            stderr: vec![],
            interval: vec![],
        };
        let points = [row(0.1, 1.31, 0.19), row(0.3, 1.4, 0.1)];
        let best = Best {
            family: None,
            value: 0.1,
            expected_loss: 1.5,
            stderr: Some(0.01),
            within_one_se: vec![0.1],
        };
        let fold = Fold {
            folded: false,
            additive: false,
        };
        let r = reading(
            "bandwidth",
            "|bias|",
            ("bias", "spread"),
            fold,
            &points,
            &best,
        );
        assert!(r.contains("exceeds") || r.contains("bias-dominated"), "{r}");
        assert!(!r.contains("neither dominates"), "{r}");
    }
}
