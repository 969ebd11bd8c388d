//! Comparing a result document with a baseline (`lossprism check`): refusal when the two are
//! not runs of the same scenario, "identical" when every number agrees bit for bit, otherwise a
//! statistical verdict per row (family, training size, knob value) and term. Pure: no I/O (the
//! caller reads and writes files).
//!
//! # The rule
//!
//! For every row and every compared term (squared loss: `expected_loss`, `bias_sq`, `variance`;
//! 0-1 loss: `expected_loss`, `bias`, `variance`, `net_variance`, `kohavi_wolpert.bias_sq`,
//! `kohavi_wolpert.variance`, `james.systematic_effect`, `james.variance_effect`; larger is worse
//! for all of them) let `d = new − base`, `se` the standard error of `d` (which depends on the
//! mode, below) and `z = d / se`. The term is
//!
//! - **worse** when `z > sigma` and `d > margin·|base|`,
//! - **better** when `z < −sigma` and `|d| > margin·|base|`,
//! - **unchanged** otherwise.
//!
//! `sigma` (default 4) bounds false alarms from Monte Carlo noise: under no change `z` is
//! approximately standard normal, so each term is flagged with probability about `1 − Φ(sigma)`
//! (3.2e-5 at 4). `margin` (default 2 %, per term overridable) ignores changes too small to
//! matter in practice, however precisely measured. When `se = 0` (a paired difference that no
//! block moves), `d = 0` is unchanged and any other `d` is judged by the margin alone.
//!
//! # Modes
//!
//! The mode is chosen from the documents and printed:
//!
//! - **identical**: every number equals the baseline's bit for bit.
//! - **paired**: same seed, replicates, blocks and evaluation points (equal fingerprints), so both
//!   runs saw the same training sets. Each document carries every term computed with each
//!   replicate block left out; the differences `D_(b) = new_(b) − base_(b)` give the delete-a-group
//!   jackknife standard error `se = √((B−1)/B · Σ_b (D_(b) − D̄)²)` (Efron & Tibshirani, *An
//!   Introduction to the Bootstrap*, 1993, eq. 11.5, applied to groups as in Shao & Tu, *The
//!   Jackknife and Bootstrap*, 1995, §2.3). Monte Carlo noise common to both runs cancels, so a
//!   change is detected with far fewer replicates than with independent runs.
//! - **unpaired, same evaluation points** (fingerprints equal, seeds or replicates differ): the
//!   runs are independent, `se = √(se_new² + se_base²)`. With the same seed and different
//!   replicates or blocks they share training sets, which makes this conservative.
//! - **unpaired, different evaluation points** (fingerprints differ): each term is an average over
//!   `m` evaluation points, so it also varies with the points: `se² = se_new² + se_base² +
//!   (point_sd_new² + point_sd_base²) / m`, where `point_sd²` is the variance of the per-point
//!   term across the points (the variance of a mean of `m` independent draws is the draws'
//!   variance over `m`). The per-point terms carry their own Monte Carlo noise, which `se`
//!   already counts; each document's `point_noise` (a jackknife over blocks, see
//!   [`crate::decompose::point_spread`]) is subtracted from `point_sd²` so it is not counted
//!   twice (without it the test is conservative). This assumes the points are independent draws
//!   from the same input distribution: a synthetic or twin source with a random design and fresh
//!   evaluation points. Evenly spaced inputs, a fixed design, evaluation at the design and tables
//!   are refused: their difference is not sampling noise.
//!
//! Documents written before the leave-one-block-out values and point spreads were recorded
//! (no `uncertainty` section) can only be found identical; otherwise they are refused with a
//! request to rerun the baseline.

use std::fmt;

use crate::decompose::{self, Shape};
use crate::fmt::{fmt_num, fmt_se, fmt_value};
use crate::report::{PointRow, ResultDoc, RowUncertainty, Uncertainty, FORMAT};

/// The terms a document's rows are compared on: those its term description gives a standard
/// error, except the direct cross-check, noise terms and the detail-only terms.
pub fn compared_terms(doc: &ResultDoc) -> Vec<String> {
    doc.term_docs()
        .into_iter()
        .filter(|t| t.stderr && t.role != "direct" && t.role != "noise" && t.group != "detail")
        .map(|t| t.key)
        .collect()
}

/// Every term name any loss can report (for `--margin-term`).
pub fn all_terms() -> Vec<&'static str> {
    let mut v: Vec<&'static str> = Vec::new();
    for loss in decompose::registry() {
        for observed in [false, true] {
            for (fits, ensemble) in [(1, false), (2, true)] {
                let shape = Shape {
                    grid: 1,
                    points: 1,
                    classes: 2,
                    fits,
                    all_points: !observed,
                    ensemble,
                };
                for t in loss.describe(&shape, observed) {
                    if !v.contains(&t.key) {
                        v.push(t.key);
                    }
                }
            }
        }
    }
    v
}

/// Thresholds of the comparison.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckOptions {
    /// Standard errors a change must exceed (default 4).
    pub sigma: f64,
    /// Relative practical margin a change must exceed (default 0.02 = 2 %).
    pub margin: f64,
    /// Per-term margins overriding `margin` (`("variance", 0.05)`).
    pub term_margins: Vec<(String, f64)>,
}

impl Default for CheckOptions {
    fn default() -> Self {
        CheckOptions {
            sigma: 4.0,
            margin: 0.02,
            term_margins: Vec::new(),
        }
    }
}

impl CheckOptions {
    /// The margin that applies to `term`.
    pub fn margin_for(&self, term: &str) -> f64 {
        self.term_margins
            .iter()
            .rev()
            .find(|(t, _)| t == term)
            .map_or(self.margin, |(_, m)| *m)
    }

    /// Checks the thresholds (finite, non-negative, known term names).
    pub fn validate(&self) -> Result<(), CheckError> {
        if !(self.sigma.is_finite() && self.sigma >= 0.0) {
            return Err(CheckError::Options(format!(
                "--sigma must be a non-negative number, got {}",
                self.sigma
            )));
        }
        if !(self.margin.is_finite() && self.margin >= 0.0) {
            return Err(CheckError::Options(format!(
                "--margin must be a non-negative fraction, got {}",
                self.margin
            )));
        }
        for (i, (t, m)) in self.term_margins.iter().enumerate() {
            if self.term_margins[..i].iter().any(|(u, _)| u == t) {
                return Err(CheckError::Options(format!(
                    "--margin-term: term `{t}` given twice; give each term one margin"
                )));
            }
            if !all_terms().contains(&t.as_str()) {
                return Err(CheckError::Options(format!(
                    "--margin-term: unknown term `{t}`; terms: {}",
                    all_terms().join(", ")
                )));
            }
            if !(m.is_finite() && *m >= 0.0) {
                return Err(CheckError::Options(format!(
                    "--margin-term {t}: margin must be non-negative, got {m}"
                )));
            }
        }
        Ok(())
    }
}

/// Refuses a `--margin-term` for a term `doc` is never compared on (the noise, the direct
/// check, a 0-1 term on a squared-loss result): it was echoed as if it applied.
pub fn margins_apply(opts: &CheckOptions, doc: &ResultDoc) -> Result<(), CheckError> {
    let terms = compared_terms(doc);
    match opts.term_margins.iter().find(|(t, _)| !terms.contains(t)) {
        Some((t, _)) => Err(CheckError::Options(format!(
            "--margin-term: `{t}` is not compared for this result ({} loss); compared terms: {}",
            doc.loss,
            terms.join(", ")
        ))),
        None => Ok(()),
    }
}

/// Parses a margin: `2%` (percent) or `0.02` (a fraction).
pub fn parse_margin(s: &str) -> Result<f64, String> {
    let t = s.trim();
    let (num, scale) = match t.strip_suffix('%') {
        Some(n) => (n.trim(), 0.01),
        None => (t, 1.0),
    };
    match num.parse::<f64>() {
        // `--margin 5` read as the fraction 5 let a term grow by 500% unflagged; a bare number
        // is a fraction below 1, and a larger margin is written as a percentage.
        Ok(v) if scale == 1.0 && v >= 1.0 && v.is_finite() => Err(format!(
            "`{t}` would be a fraction, {} of the baseline's value: write `{t}%` for {t} \
             percent, or `{}` if that much is meant",
            pct(v),
            pct(v)
        )),
        Ok(v) if v.is_finite() && v >= 0.0 => Ok(v * scale),
        Ok(v) if v < 0.0 => Err(format!(
            "`{s}`: a margin cannot be negative (it is how much a term may grow before it \
             counts); write a percentage like `2%` or a fraction like `0.02`, or `0` for none"
        )),
        _ => Err(format!(
            "`{s}` is not a margin: write a percentage like `2%` or a fraction like `0.02`"
        )),
    }
}

/// Parses `--sigma`: a finite number of standard errors, at least 0.
pub fn parse_sigma(s: &str) -> Result<f64, String> {
    match s.trim().parse::<f64>() {
        Ok(v) if v.is_finite() && v >= 0.0 => Ok(v),
        Ok(v) if v < 0.0 => Err(format!(
            "`{s}`: --sigma cannot be negative (it is how many standard errors a change must \
             exceed to count); write a number such as 4 (the default), or 0"
        )),
        _ => Err(format!(
            "`{s}` is not a number of standard errors; write a number such as 4 (the default)"
        )),
    }
}

/// Parses `TERM=MARGIN` (`variance=5%`).
pub fn parse_term_margin(s: &str) -> Result<(String, f64), String> {
    let Some((term, m)) = s.split_once('=') else {
        return Err(format!("`{s}`: expected TERM=MARGIN, e.g. variance=5%"));
    };
    let term = term.trim();
    if !all_terms().contains(&term) {
        return Err(format!(
            "unknown term `{term}`; terms: {}",
            all_terms().join(", ")
        ));
    }
    Ok((term.to_string(), parse_margin(m)?))
}

/// Why two documents cannot be compared.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum CheckError {
    /// Not runs of the same scenario (names what differs).
    #[error("cannot compare: {0}")]
    Mismatch(String),
    /// A standard error is missing, so no statistical verdict is possible.
    #[error("cannot judge: {0}")]
    MissingStderr(String),
    /// A document lacks what the comparison's mode needs (an old document without the
    /// `uncertainty` section, or one without point spreads).
    #[error("cannot judge: {0}")]
    MissingData(String),
    /// A document that is not a lossprism result.
    #[error("{0}")]
    BadDocument(String),
    /// Bad thresholds.
    #[error("{0}")]
    Options(String),
}

/// Parses a result document's JSON text; `what` names it in messages.
pub fn parse_result(text: &str, what: &str) -> Result<ResultDoc, CheckError> {
    let v: serde_json::Value = serde_json::from_str(text)
        .map_err(|e| CheckError::BadDocument(format!("{what}: not valid JSON: {e}")))?;
    match v.get("format").and_then(|f| f.as_str()) {
        Some(FORMAT) => {}
        Some(other) => {
            return Err(CheckError::BadDocument(format!(
                "{what}: {}",
                crate::report::format_refusal(
                    other,
                    v.get("checkpoint").and_then(|c| c.as_bool()) == Some(true)
                )
            )))
        }
        None => {
            return Err(CheckError::BadDocument(format!(
                "{what}: no `format` field; expected a result document written by `lossprism run --out`"
            )))
        }
    }
    drop(v);
    // Typed from the text, not from the value: a key given twice is refused, not read as its
    // last copy.
    let doc: ResultDoc = serde_json::from_str(text)
        .map_err(|e| CheckError::BadDocument(format!("{what}: malformed result document: {e}")))?;
    validate(&doc).map_err(|e| CheckError::BadDocument(format!("{what}: {e}")))?;
    Ok(doc)
}

/// Why a refused document cannot be a result as `run` wrote it.
const EDITED: &str = "`run` never writes that, so the document was edited or damaged";

/// The shape of the model of row `p` as its terms tell it (classes, fit seeds, ensemble).
fn row_shape(doc: &ResultDoc, p: &crate::report::PointRow, observed: bool) -> decompose::Shape {
    decompose::Shape {
        grid: 1,
        points: 0,
        classes: doc.scenario.labels.as_ref().map_or(0, Vec::len),
        fits: if p.has("variance_fit") { 2 } else { 1 },
        all_points: !observed,
        ensemble: p.has("diversity"),
    }
}

/// The selection audit's section: one count per candidate (every model's grid at the largest
/// size, end to end), adding up to the replicates, and every figure derived from the counts and
/// the rows as `run` derives it (`report::selection::selection`). `plot --selection` alone checked
/// the counts; `check` accepted an oracle share of 1.5.
fn validate_selection(
    doc: &ResultDoc,
    sel: &crate::report::selection::Selection,
    grids: &[(Option<&str>, &[f64])],
    largest: Option<u64>,
) -> Result<(), String> {
    use crate::scenario::audit::{AuditPlan, Rule};
    let rule = match sel.rule.as_str() {
        "min" => Rule::Min,
        "one_se" => Rule::OneSe,
        other => {
            return Err(format!(
                "`selection.rule` is `{}`, not `min` or `one_se`; {EDITED}",
                crate::fmt::clip(other, 40)
            ))
        }
    };
    let candidates: Vec<PointRow> = grids
        .iter()
        .flat_map(|(family, grid)| {
            grid.iter().filter_map(move |v| {
                doc.points.iter().find(|p| {
                    p.family.as_deref() == *family
                        && p.train_size == largest
                        && p.value.to_bits() == v.to_bits()
                })
            })
        })
        .cloned()
        .collect();
    let total: u64 = sel
        .chosen_counts
        .iter()
        .fold(0u64, |a, c| a.saturating_add(*c));
    if sel.chosen_counts.len() != candidates.len() || total != doc.replicates || sel.folds < 2 {
        return Err(format!(
            "`selection` has {} counts adding up to {total} over {} folds, for {} candidates and \
             {} replicates (each replicate chooses once); {EDITED}",
            sel.chosen_counts.len(),
            sel.folds,
            candidates.len(),
            doc.replicates
        ));
    }
    let audit = AuditPlan {
        folds: sel.folds,
        rule,
        larger_is_simpler: doc.larger_is_simpler,
    };
    let again = crate::report::selection::selection(
        &audit,
        &sel.chosen_counts,
        &candidates,
        &doc.best,
        &|_| "value",
    );
    let close =
        |a: f64, b: f64| a.to_bits() == b.to_bits() || (a - b).abs() <= 1e-12 * (a.abs() + b.abs());
    for (key, written, derived) in [
        ("oracle_best", sel.oracle_best, again.oracle_best),
        (
            "mean_excess_loss",
            sel.mean_excess_loss,
            again.mean_excess_loss,
        ),
        (
            "q90_excess_loss",
            sel.q90_excess_loss,
            again.q90_excess_loss,
        ),
        (
            "share_within_one_se",
            sel.share_within_one_se,
            again.share_within_one_se,
        ),
        ("share_oracle", sel.share_oracle, again.share_oracle),
    ] {
        if !close(written, derived) {
            return Err(format!(
                "`selection.{key}` is {}, but the counts and the rows give {}; {EDITED}",
                crate::fmt::fmt_exact(written),
                crate::fmt::fmt_exact(derived)
            ));
        }
    }
    if sel.candidates.len() != again.candidates.len()
        || sel
            .oracle_candidate
            .as_ref()
            .is_some_and(|o| !sel.candidates.contains(o))
    {
        return Err(format!(
            "`selection.candidates` do not name the {} candidates; {EDITED}",
            candidates.len()
        ));
    }
    Ok(())
}

/// Whether `version` (`major.minor.patch`) is before `than`; false when it cannot be read.
fn written_before(version: &str, than: (u64, u64, u64)) -> bool {
    let parts: Vec<u64> = version.split('.').map_while(|p| p.parse().ok()).collect();
    match parts.as_slice() {
        [a, b, c, ..] => (*a, *b, *c) < than,
        _ => false,
    }
}

/// Refuses a result document that `run` cannot have written, naming the first bad key (a JSON
/// path such as `points[3].stderr.variance`): a known loss; `points` without a repeated row
/// ([`ResultDoc::check_points`]), one row per grid value of every model (`models`, else the
/// scenario's `grid`) at every training size (`sizes`) and no other, each with the terms the
/// description (`terms`) gives every model (loss, bias, variance, noise, direct check) and
/// their standard errors, the same terms as the other rows of its model, and no standard error
/// of a term it lacks; `best` one of the rows (with its expected loss) and `within_one_se` rows
/// of its curve; `uncertainty` one entry per row, whose leave-one-block-out values decode to
/// `blocks` numbers of terms with a standard error, finite where the standard error is.
///
/// Every reader of result documents applies it: [`parse_result`] (so `check`, `plot` and
/// [`crate::harness::load_result`]) and [`compare`] (documents built in memory), so a picture is
/// never drawn from a document `check` would refuse.
pub fn validate(doc: &ResultDoc) -> Result<(), String> {
    // A document of another version may differ by what that version wrote (an interval not yet
    // widened to ± 2 SE in 0.3.3): its refusal says so rather than only "edited".
    validate_as_written(doc).map_err(|e| {
        let this = env!("CARGO_PKG_VERSION");
        if doc.version != this && e.contains(EDITED) {
            format!(
                "{e}, or written by another version (lossprism {}; this is {this}), whose \
                 documents this one does not read: rerun it with this version",
                crate::fmt::clip(&doc.version, 20)
            )
        } else {
            e
        }
    })
}

/// [`validate`]'s rules.
fn validate_as_written(doc: &ResultDoc) -> Result<(), String> {
    use std::collections::{HashMap, HashSet};
    if doc.format != FORMAT {
        return Err(format!(
            "`format` is `{}`, expected `{FORMAT}`",
            crate::fmt::clip(&doc.format, 40)
        ));
    }
    if decompose::by_name(&doc.loss).is_none() {
        let known: Vec<&str> = decompose::registry().iter().map(|l| l.name()).collect();
        return Err(format!(
            "`loss` is `{}`, which is not a loss (one of {}); {EDITED}",
            crate::fmt::clip(&doc.loss, 40),
            known.join(", ")
        ));
    }
    // A built-in family has its own knob (a tree result edited to `"knob": "k"` drew "Where k
    // balances bias against variance"): external and library-supplied families name theirs.
    // Nor does it choose which way is simpler (sweep 71: `larger_is_simpler` edited to false on a
    // k-NN result passed, and `plot` drew the curve's reading reversed).
    let named: Vec<(&str, &str, bool, String)> = if doc.models.is_empty() {
        vec![(
            doc.family.as_str(),
            doc.knob.as_str(),
            doc.larger_is_simpler,
            "larger_is_simpler".to_string(),
        )]
    } else {
        doc.models
            .iter()
            .enumerate()
            .map(|(i, m)| {
                (
                    m.family.as_str(),
                    m.knob.as_str(),
                    m.larger_is_simpler,
                    format!("models[{i}].larger_is_simpler"),
                )
            })
            .collect()
    };
    for (family, knob, simpler, key) in named {
        let Some(info) = crate::family::catalogue().iter().find(|f| f.name == family) else {
            continue;
        };
        if !info.owns_knob(knob) {
            return Err(format!(
                "`knob` is `{}`, but the `{family}` family's knob is {}; {EDITED}",
                crate::fmt::clip(knob, 40),
                info.knob_names()
            ));
        }
        if info.fixed_direction().is_some_and(|d| d != simpler) {
            return Err(format!(
                "`{key}` is {simpler}, but for the `{family}` family a larger `{knob}` is {}; \
                 {EDITED}",
                info.direction_words()
            ));
        }
    }
    // A study names its first model at the top (sweep 69: `models` cut to its second entry
    // drew the curves under the first model's knob); `models` is written only with two or more.
    if let Some(first) = doc.models.first() {
        if doc.models.len() < 2 {
            return Err(format!(
                "`models` lists one model, but it is written only for two or more; {EDITED}"
            ));
        }
        if first.family != doc.family || first.knob != doc.knob {
            return Err(format!(
                "`family` and `knob` are `{}` and `{}`, but the first of `models` is `{}` with \
                 `{}`; {EDITED}",
                crate::fmt::clip(&doc.family, 40),
                crate::fmt::clip(&doc.knob, 40),
                crate::fmt::clip(&first.family, 40),
                crate::fmt::clip(&first.knob, 40)
            ));
        }
        if first.larger_is_simpler != doc.larger_is_simpler {
            return Err(format!(
                "`larger_is_simpler` is {}, but the first of `models` says {}; {EDITED}",
                doc.larger_is_simpler, first.larger_is_simpler
            ));
        }
    }
    doc.check_points()?;
    let at = |i: usize| {
        format!(
            "`points[{i}]` ({})",
            crate::fmt::clip(&row_name(doc, &doc.points[i]), 80)
        )
    };

    // Rows: the grid of each model at each training size, once each (no repeats: check_points).
    let grids: Vec<(Option<&str>, &[f64])> = if doc.models.is_empty() {
        vec![(None, doc.scenario.grid.as_slice())]
    } else {
        doc.models
            .iter()
            .map(|m| (Some(m.id()), m.grid.as_slice()))
            .collect()
    };
    let sizes: Vec<Option<u64>> = if doc.sizes.is_empty() {
        vec![None]
    } else {
        doc.sizes.iter().map(|&n| Some(n as u64)).collect()
    };
    let largest = sizes.iter().copied().max().flatten();
    for (i, p) in doc.points.iter().enumerate() {
        let Some((_, grid)) = grids.iter().find(|(f, _)| *f == p.family.as_deref()) else {
            return Err(match &p.family {
                Some(f) if doc.models.is_empty() => format!(
                    "{}: `family` is `{}`, but the document has one model (no `models`); {EDITED}",
                    at(i),
                    crate::fmt::clip(f, 40)
                ),
                Some(f) => format!(
                    "{}: `family` `{}` is none of `models` ({}); {EDITED}",
                    at(i),
                    crate::fmt::clip(f, 40),
                    crate::fmt::clip(&doc.families().join(", "), 200)
                ),
                None => format!(
                    "{}: no `family`, but the document has several `models`; {EDITED}",
                    at(i)
                ),
            });
        };
        if !sizes.contains(&p.train_size) {
            return Err(match p.train_size {
                Some(n) if doc.sizes.is_empty() => format!(
                    "{}: `train_size` is {n}, but the document has one training size (no \
                     `sizes`); {EDITED}",
                    at(i)
                ),
                Some(n) => format!(
                    "{}: `train_size` {n} is none of `sizes` {:?}; {EDITED}",
                    at(i),
                    doc.sizes
                ),
                None => format!(
                    "{}: no `train_size`, but the document has several `sizes`; {EDITED}",
                    at(i)
                ),
            });
        }
        if !grid.contains(&p.value) {
            return Err(format!(
                "{}: `value` is not on the model's grid; {EDITED}",
                at(i)
            ));
        }
    }
    let have: HashSet<_> = doc.points.iter().map(row_key).collect();
    for (family, grid) in &grids {
        for &n in &sizes {
            if let Some(v) = grid
                .iter()
                .find(|v| !have.contains(&(*family, n, v.to_bits())))
            {
                // The knob of the row's own model (a study's second model has its own).
                let knob = family
                    .and_then(|f| doc.models.iter().find(|m| m.id() == f))
                    .map_or(doc.knob.as_str(), |m| m.knob.as_str());
                let mut row = format!("{knob} = {}", fmt_value(*v));
                if let Some(f) = family {
                    row = format!("{} {row}", crate::fmt::clip(f, 40));
                }
                if let Some(n) = n {
                    row.push_str(&format!(", n = {n}"));
                }
                return Err(format!("`points` have no row for {row}; {EDITED}"));
            }
        }
    }

    // Terms: those of every model in every row (with their standard errors), the same in every
    // row of a model; standard errors of the row's terms only.
    let described = doc.term_docs();
    // The terms `run` gives an interval (`interval95`): those whose standard error is a block
    // bootstrap's.
    let with_interval: Vec<&str> = described
        .iter()
        .filter(|t| t.stderr && t.bootstrap)
        .map(|t| t.key.as_str())
        .collect();
    let mut first: HashMap<Option<&str>, usize> = HashMap::new();
    for (i, p) in doc.points.iter().enumerate() {
        for t in described.iter().filter(|t| t.role != "other") {
            if !p.has(&t.key) {
                return Err(format!(
                    "{}: no `{}`, a term of the loss (`terms`); {EDITED}",
                    at(i),
                    t.key
                ));
            }
            if t.stderr && !p.stderr.iter().any(|(k, _)| *k == t.key) {
                return Err(format!(
                    "{}: no `stderr.{}`; {EDITED} (every term with a standard error has one; \
                     earlier versions wrote one that could not be computed as null)",
                    at(i),
                    t.key
                ));
            }
        }
        if let Some((k, _)) = p.stderr.iter().find(|(k, _)| !p.has(k)) {
            return Err(format!(
                "{}: `stderr.{k}` is the standard error of no term of the row; {EDITED}",
                at(i)
            ));
        }
        // The same keys as the model's first row (a model's terms follow its shape).
        let j = *first.entry(p.family.as_deref()).or_insert(i);
        let q = &doc.points[j];
        for (prefix, a, b) in [("", &p.terms, &q.terms), ("stderr.", &p.stderr, &q.stderr)] {
            let lacks = |x: &[(String, f64)], y: &[(String, f64)]| {
                x.iter()
                    .find(|(k, _)| !y.iter().any(|(l, _)| l == k))
                    .map(|(k, _)| k.clone())
            };
            let (has, lacking) = match (lacks(a, b), lacks(b, a)) {
                (Some(k), _) => ((i, k), j),
                (None, Some(k)) => ((j, k), i),
                (None, None) => continue,
            };
            return Err(format!(
                "{} has `{prefix}{}`, which {} of the same model lacks; {EDITED}",
                at(has.0),
                crate::fmt::clip(&has.1, 40),
                at(lacking)
            ));
        }
    }

    // What every run satisfies: at least MIN_REPLICATES replicates, a known noise term that is
    // not negative (a variance, an entropy, an expected deviance), and the exact identities the loss
    // declares (ESL eq. 7.9 and the others in `decompose`) to rounding in every row.
    if doc.replicates < crate::scenario::plan::MIN_REPLICATES {
        return Err(format!(
            "`replicates` is {}, but a run has at least {}; {EDITED}",
            doc.replicates,
            crate::scenario::plan::MIN_REPLICATES
        ));
    }
    let loss = decompose::by_name(&doc.loss).expect("checked above");
    let observed = doc.table.is_some();
    // A table's noise is an estimate, which can be below 0 by sampling, but `run` refuses one
    // more than two standard errors and a tenth of the responses' variance below 0.
    if let Some(n) = &doc.noise_estimate {
        if let Some(v) = n
            .response_variance
            .filter(|v| !(v.is_finite() && *v >= 0.0))
        {
            return Err(format!(
                "`noise_estimate.response_variance` is {}, which a variance cannot be; {EDITED}",
                crate::fmt::fmt_exact(v)
            ));
        }
        if crate::dataset::noise::clearly_negative(
            n.value,
            n.stderr.unwrap_or(f64::NAN),
            n.response_variance.unwrap_or(f64::NAN),
        ) {
            return Err(format!(
                "`noise_estimate.value` is {}, further below 0 than `run` allows (two standard \
                 errors, and a tenth of the responses' variance); {EDITED}",
                crate::fmt::fmt_exact(n.value)
            ));
        }
    }
    for (i, p) in doc.points.iter().enumerate() {
        if !observed && p.has("noise") && p.get("noise") < 0.0 {
            return Err(format!(
                "{}: `noise` is {}, and a noise term cannot be negative; {EDITED}",
                at(i),
                crate::fmt::fmt_exact(p.get("noise"))
            ));
        }
        // Each term within the range its definition allows (a negative variance, a share of
        // votes above 1, a fractional count were plotted and compared with exit 0).
        let scale = p.expected_loss().abs();
        for (k, v) in &p.terms {
            let (lo, hi) = loss.range(k);
            let tol = 1e-9 * (scale + v.abs()) + loss.identity_floor();
            if v.is_finite() && (*v < lo - tol || *v > hi + tol) {
                return Err(format!(
                    "{}: `{}` is {}, outside [{}, {}], where the {} loss's `{}` lies by its \
                     definition; {EDITED}",
                    at(i),
                    crate::fmt::clip(k, 40),
                    crate::fmt::fmt_exact(*v),
                    crate::fmt::fmt_exact(lo),
                    crate::fmt::fmt_exact(hi),
                    doc.loss,
                    crate::fmt::clip(k, 40)
                ));
            }
            if k == "unstable_points" && v.is_finite() && v.fract() != 0.0 {
                return Err(format!(
                    "{}: `unstable_points` is {}, and a count is a whole number; {EDITED}",
                    at(i),
                    crate::fmt::fmt_exact(*v)
                ));
            }
            // ... of evaluation points, so at most their number (1e9 of 200 was accepted).
            let points = doc.uncertainty.as_ref().map_or(0, |u| u.eval_points);
            if k == "unstable_points" && points > 0 && *v > points as f64 {
                return Err(format!(
                    "{}: `unstable_points` is {}, more than the {points} evaluation points; \
                     {EDITED}",
                    at(i),
                    crate::fmt::fmt_exact(*v)
                ));
            }
        }
        let se_of = |k: &str| p.se(k).unwrap_or(f64::NAN);
        // The noise of K classes is at most that of K equal shares (a Brier noise of 0.9 with
        // two classes was accepted).
        let classes = doc.scenario.labels.as_ref().map_or(0, Vec::len);
        if classes > 0 && p.has("noise") {
            let (v, max) = (p.get("noise"), loss.noise_max(classes));
            if v.is_finite() && v > max + 1e-9 * max + loss.identity_floor() {
                return Err(format!(
                    "{}: `noise` is {}, more than {} classes allow ({}, when every class is \
                     equally likely); {EDITED}",
                    at(i),
                    crate::fmt::fmt_exact(v),
                    classes,
                    crate::fmt::fmt_exact(max)
                ));
            }
        }
        // The standard error of a term bounded to a range of width w: each leave-one-block-out
        // estimate lies in the range, so their jackknife error is at most w·√(blocks − 1)/2, and a
        // bootstrap's at most w/2; w·√blocks leaves room for a second-order part (an edited 1e300
        // was accepted).
        let blocks = doc.scenario.blocks.max(1) as f64;
        for (k, se) in &p.stderr {
            let (lo, hi) = loss.range(k);
            let most = (hi - lo) * blocks.sqrt();
            if most.is_finite() && se.is_finite() && *se > most {
                return Err(format!(
                    "{}: `stderr.{}` is {}, more than a term within [{}, {}] can have over {} \
                     blocks; {EDITED}",
                    at(i),
                    crate::fmt::clip(k, 40),
                    crate::fmt::fmt_exact(*se),
                    crate::fmt::fmt_exact(lo),
                    crate::fmt::fmt_exact(hi),
                    doc.scenario.blocks
                ));
            }
        }
        // The direct check on a table is the same sum as the expected loss, to rounding (in the
        // responses' squared units for the squared loss: exact fits left 9e-33 against 7e-33).
        // With a known truth it is an independent estimate from fresh labels, which can miss a
        // rare event entirely, so it is held to its range only.
        if observed && p.has("expected_loss_direct") {
            let (d, el) = (p.get("expected_loss_direct"), p.expected_loss());
            let scale = doc
                .noise_estimate
                .as_ref()
                .and_then(|n| n.response_variance)
                .filter(|v| v.is_finite())
                .unwrap_or(0.0);
            let allowed = 1e-9 * (d.abs() + el.abs()) + loss.identity_floor().max(1e-12 * scale);
            if d.is_finite() && el.is_finite() && (d - el).abs() > allowed {
                return Err(format!(
                    "{}: `expected_loss_direct` is {} against an `expected_loss` of {}, but on a \
                     table they are the same sum; {EDITED}",
                    at(i),
                    crate::fmt::fmt_exact(d),
                    crate::fmt::fmt_exact(el)
                ));
            }
        }
        // `run` writes an interval for every term whose standard error is a block bootstrap's,
        // and for no other (sweep 71: one deleted, or added for `expected_loss`, passed).
        if let Some((k, _)) = p
            .interval
            .iter()
            .find(|(k, _)| !with_interval.contains(&k.as_str()))
        {
            return Err(format!(
                "{}: `interval95.{}` is written, but `run` gives intervals only to terms whose \
                 standard error is a bootstrap's; {EDITED}",
                at(i),
                crate::fmt::clip(k, 40)
            ));
        }
        if let Some(k) = with_interval
            .iter()
            .find(|k| p.interval.iter().all(|(have, _)| have != *k))
        {
            return Err(format!(
                "{}: no `interval95.{k}`, which `run` writes beside every bootstrap standard \
                 error; {EDITED}",
                at(i)
            ));
        }
        // An interval holds its own estimate: the bootstrap percentile interval widened to
        // ± 2 SE around it, then clipped to the term's bounds.
        for (k, (lo, hi)) in &p.interval {
            let v = p.get(k);
            let tol = 1e-9 * (v.abs() + lo.abs() + hi.abs()) + loss.identity_floor();
            // `run` clips an interval to the term's bounds (not to its wider range).
            let (min, max) = loss.bounds(k);
            let outside = *lo < min - tol || *hi > max + tol;
            let se = se_of(k);
            let narrow = se.is_finite()
                && (*lo > (v - 2.0 * se).max(min) + tol + 1e-9 * se
                    || *hi < (v + 2.0 * se).min(max) - tol - 1e-9 * se);
            if lo.is_finite()
                && hi.is_finite()
                && v.is_finite()
                && (outside || narrow || !(*lo - tol <= v && v <= *hi + tol))
            {
                return Err(format!(
                    "{}: `interval95.{}` is [{}, {}], which does not hold the row's estimate {} \
                     ± 2 standard errors ({}) within the term's range; {EDITED}",
                    at(i),
                    crate::fmt::clip(k, 40),
                    crate::fmt::fmt_exact(*lo),
                    crate::fmt::fmt_exact(*hi),
                    crate::fmt::fmt_exact(v),
                    crate::fmt::fmt_exact(se)
                ));
            }
        }
        let shape = row_shape(doc, p, observed);
        // A table's unknown noise is not reported (classification and count losses fold it into
        // the bias): it enters their identities as 0.
        let get = |k: &str| {
            if observed && k == "noise" && !p.has(k) {
                0.0
            } else {
                p.get(k)
            }
        };
        for id in loss.identities(&shape, observed) {
            let keys = std::iter::once(id.total).chain(id.parts.iter().map(|(k, _)| *k));
            if keys.clone().any(|k| !get(k).is_finite()) {
                continue;
            }
            let total = get(id.total);
            let sum: f64 = id.parts.iter().map(|(k, c)| c * get(k)).sum();
            let scale = total.abs()
                + id.parts
                    .iter()
                    .map(|(k, c)| (c * get(k)).abs())
                    .sum::<f64>();
            if !scale.is_finite() || (total - sum).abs() > 1e-9 * scale + loss.identity_floor() {
                return Err(format!(
                    "{}: `{}` is {} but its parts add up to {} ({}); {EDITED}",
                    at(i),
                    id.total,
                    crate::fmt::fmt_exact(total),
                    crate::fmt::fmt_exact(sum),
                    id.name
                ));
            }
        }
    }

    // The noise does not depend on the model or the training size: one number in every row (a
    // known truth's at the same evaluation points; a table's its estimate). An edited 4.4 in
    // one row was read as a regression.
    let noises: Vec<(usize, f64)> = doc
        .points
        .iter()
        .enumerate()
        .filter(|(_, p)| p.has("noise"))
        .map(|(i, p)| (i, p.get("noise")))
        .collect();
    if let Some(&(i0, n0)) = noises.first() {
        let close =
            |a: f64, b: f64| (a - b).abs() <= 1e-9 * (a.abs() + b.abs()) + loss.identity_floor();
        if let Some(&(i, n)) = noises.iter().find(|(_, n)| !close(*n, n0)) {
            return Err(format!(
                "{}: `noise` is {}, but {} has {}, and the noise is the same for every model and \
                 training size; {EDITED}",
                at(i),
                crate::fmt::fmt_exact(n),
                at(i0),
                crate::fmt::fmt_exact(n0)
            ));
        }
        if let Some(e) = doc.noise_estimate.as_ref().filter(|_| observed) {
            if !close(n0, e.value) {
                return Err(format!(
                    "{}: `noise` is {}, but `noise_estimate.value` is {}; {EDITED}",
                    at(i0),
                    crate::fmt::fmt_exact(n0),
                    crate::fmt::fmt_exact(e.value)
                ));
            }
        }
    }
    // The uncertainty section describes this run: its blocks, evaluation points and seed are the
    // scenario's (edited ones switched a paired comparison to an unpaired one, and turned the
    // bounded terms' rule off); per-point spreads are standard deviations and variances; each
    // leave-one-block-out value within its term's range.
    if let Some(u) = &doc.uncertainty {
        let seed_differs = doc.scenario.eval_seed.is_some_and(|s| s != u.eval_seed);
        if u.blocks != doc.scenario.blocks
            || u.blocks > doc.replicates
            || u.eval_points != doc.scenario.eval_size
            || seed_differs
        {
            return Err(format!(
                "`uncertainty` has {} blocks and {} evaluation points (seed {}), but the run has \
                 {} blocks of {} replicates and {} evaluation points{}; {EDITED}",
                u.blocks,
                u.eval_points,
                u.eval_seed,
                doc.scenario.blocks,
                doc.replicates,
                doc.scenario.eval_size,
                doc.scenario
                    .eval_seed
                    .map_or(String::new(), |s| format!(" (seed {s})"))
            ));
        }
        let b = usize::try_from(u.blocks).unwrap_or(0);
        for (i, r) in u.rows.iter().enumerate() {
            let spreads = r.point_sd.iter().chain(&r.point_noise);
            if let Some((k, v)) = spreads
                .clone()
                .find(|(_, v)| !(v.is_finite() && **v >= 0.0))
            {
                return Err(format!(
                    "`uncertainty.rows[{i}]`: the spread of `{}` across evaluation points is {}, \
                     not a finite number >= 0; {EDITED}",
                    crate::fmt::clip(k, 40),
                    crate::fmt::fmt_exact(*v)
                ));
            }
            // A term that is never negative at any point averages its per-point values into the
            // row, so their standard deviation is at most the row's value × √m (Σx² ≤ (Σx)² for
            // x ≥ 0, with m points or fewer): a baseline's spread edited to 10 beside a mean
            // of 0.12 over 20 points hid a regression in a comparison at other points.
            let m = u.eval_points as f64;
            for (k, sd) in &r.point_sd {
                let Some(p) = doc.points.get(i) else { break };
                if !loss.nonnegative_terms().contains(&k.as_str()) || !p.has(k) {
                    continue;
                }
                let most = p.get(k).abs() * m.sqrt();
                if *sd > most * (1.0 + 1e-9) + loss.identity_floor() {
                    return Err(format!(
                        "`uncertainty.rows[{i}]`: the spread of `{}` across evaluation points is \
                         {}, more than a term that is never negative can have with a mean of {} \
                         over {} points (at most {}); {EDITED}",
                        crate::fmt::clip(k, 40),
                        crate::fmt::fmt_exact(*sd),
                        crate::fmt::fmt_exact(p.get(k)),
                        u.eval_points,
                        crate::fmt::fmt_exact(most)
                    ));
                }
            }
            for k in r.leave_out.keys() {
                let (lo, hi) = loss.range(k);
                let Some(v) = r.leave_out_of(k, b) else {
                    continue;
                };
                let tol = |x: f64| 1e-9 * x.abs() + loss.identity_floor();
                if let Some(x) = v
                    .iter()
                    .find(|x| x.is_finite() && (**x < lo - tol(**x) || **x > hi + tol(**x)))
                {
                    return Err(format!(
                        "`uncertainty.rows[{i}].leave_out.{}` holds {}, outside [{}, {}], where \
                         the term lies by its definition; {EDITED}",
                        crate::fmt::clip(k, 40),
                        crate::fmt::fmt_exact(*x),
                        crate::fmt::fmt_exact(lo),
                        crate::fmt::fmt_exact(hi)
                    ));
                }
            }
        }
    }
    // A standard error is the jackknife of the row's own leave-one-block-out values, or at least
    // that where the loss adds a second-order or noise-estimate part
    // (`Loss::stderr_beyond_jackknife`): alternating leave-outs of ±1000 under a standard error
    // of 0.15 made a paired `check` call a regression better, and standard errors of 1e3 hid
    // one in an unpaired check.
    if let Some(u) = &doc.uncertainty {
        let b = usize::try_from(u.blocks).unwrap_or(0);
        // The document's largest value: the scale of its rounding.
        let largest = doc
            .points
            .iter()
            .flat_map(|p| p.terms.iter().map(|(_, v)| v.abs()))
            .filter(|v| v.is_finite())
            .fold(0.0, f64::max);
        for (i, (p, r)) in doc.points.iter().zip(&u.rows).enumerate() {
            for (k, se) in &p.stderr {
                let bootstrap = described.iter().any(|t| &t.key == k && t.bootstrap);
                let Some(v) = r.leave_out_of(k, b).filter(|_| b >= 2 && !bootstrap) else {
                    continue;
                };
                let jack = crate::decompose::jackknife_se(&v);
                let mean_term = doc.table.is_none() && MEAN_TERMS.contains(&k.as_str());
                if let Some(why) = mean_term
                    .then(|| off_its_leave_outs(p.get(k), &v, largest))
                    .flatten()
                {
                    return Err(format!(
                        "{}: `{}` is {}, {why}; {EDITED}",
                        at(i),
                        crate::fmt::clip(k, 40),
                        crate::fmt::fmt_exact(p.get(k))
                    ));
                }
                let tol = 1e-9 * se.abs().max(jack.abs()) + loss.identity_floor();
                let (low, high) = (*se < jack - tol, *se > jack + tol);
                let beyond = loss.stderr_beyond_jackknife(k);
                // A standard error written as null (not computable) beside leave-outs whose
                // jackknife is a number: `run` writes the number, unless the term adds an
                // estimate's error that could not be computed (a table's bias², beside a noise
                // estimate without a standard error).
                let estimated = described.iter().any(|t| &t.key == k && t.estimated);
                let hidden = se.is_nan() && jack.is_finite() && !(beyond && estimated);
                if hidden || (se.is_finite() && jack.is_finite() && (low || (high && !beyond))) {
                    return Err(format!(
                        "{}: `stderr.{}` is {}, {} the jackknife of its own leave-one-block-out \
                         values in `uncertainty` ({}); {EDITED}",
                        at(i),
                        crate::fmt::clip(k, 40),
                        // A standard error that is not a number was written as `null`.
                        if se.is_nan() {
                            "null".to_string()
                        } else {
                            crate::fmt::fmt_exact(*se)
                        },
                        if low { "below" } else { "not" },
                        crate::fmt::fmt_exact(jack)
                    ));
                }
            }
        }
    }
    // A twin's echoed record (what `twin` measured): consistent with itself, as the scenario
    // loader holds it, and its recommended picks those of its fidelity models (an edited share
    // of 7.5 and a recommended value of 1e308 were accepted and stored as a baseline).
    if let Some(tw) = &doc.scenario.twin {
        let bad = |key: String, why: String| Err(format!("`scenario.twin.{key}` {why}; {EDITED}"));
        if let Some((j, w)) = tw
            .input_weights
            .iter()
            .enumerate()
            .find(|(_, w)| !(w.is_finite() && **w >= 0.0))
        {
            return bad(
                format!("input_weights[{j}]"),
                format!("is {}, not a weight", crate::fmt::fmt_exact(*w)),
            );
        }
        if let Some(n) = tw
            .noise
            .as_ref()
            .filter(|n| n.stderr < 0.0 || n.stderr.is_nan())
        {
            return bad(
                "noise.stderr".into(),
                format!("is {}, below 0", crate::fmt::fmt_exact(n.stderr)),
            );
        }
        if let Some(f) = &tw.fidelity {
            let record = crate::dgp::twin::FidelityRecord::from(f);
            if let Some((k, why)) = record.problem() {
                return bad(format!("fidelity.{k}"), why);
            }
            // Results of twins written before the recommended picks were (lossprism 0.2.0)
            // carry a fidelity record and no `recommended`; they still read. From 0.3.0 on a
            // record always comes with its picks.
            let old = tw.recommended.is_empty() && written_before(&doc.version, (0, 3, 0));
            if !old && tw.recommended != crate::report::twin::recommended(&record) {
                return bad(
                    "recommended".into(),
                    "is not the picks of its fidelity models".into(),
                );
            }
        } else if !tw.recommended.is_empty() {
            return bad(
                "recommended".into(),
                "holds picks without a fidelity check".into(),
            );
        }
    }
    // A table's counts and shares.
    if let Some(se) = doc.noise_estimate.as_ref().and_then(|n| n.stderr) {
        if se < 0.0 || se.is_nan() {
            return Err(format!(
                "`noise_estimate.stderr` is {}, and a standard error is not negative; {EDITED}",
                crate::fmt::fmt_exact(se)
            ));
        }
    }
    if let Some(t) = &doc.table {
        let share_ok = (0.0..=1.0).contains(&t.held_out_share) || t.held_out_share.is_nan();
        if !share_ok
            || t.held_out_share_stderr
                .is_some_and(|s| s < 0.0 || s.is_nan())
        {
            return Err(format!(
                "`table.held_out_share` is {} ± {}, not a share in [0, 1] with a standard error; \
                 {EDITED}",
                crate::fmt::fmt_exact(t.held_out_share),
                crate::fmt::fmt_exact(t.held_out_share_stderr.unwrap_or(f64::NAN))
            ));
        }
    }
    if let Some(sel) = &doc.selection {
        validate_selection(doc, sel, &grids, largest)?;
    }
    for (r, rk) in doc.ranking.iter().enumerate() {
        for (k, c) in rk.candidates.iter().enumerate() {
            let bad = [c.stderr, c.difference_stderr, c.unpaired_stderr]
                .into_iter()
                .flatten()
                .any(|s| s < 0.0 || s.is_nan());
            if bad {
                return Err(format!(
                    "`ranking[{r}].candidates[{k}]` has a negative standard error; {EDITED}"
                ));
            }
        }
    }

    // `best`: a row of the document (the largest training size) and rows of its curve.
    let on_curve = |v: f64| {
        doc.points
            .iter()
            .find(|p| p.value == v && p.family == doc.best.family && p.train_size == largest)
    };
    match on_curve(doc.best.value) {
        None => {
            return Err(format!(
                "`best.value` {} is no row of `points`; {EDITED}",
                fmt_value(doc.best.value)
            ))
        }
        Some(p) if p.expected_loss().to_bits() != doc.best.expected_loss.to_bits() => {
            return Err(format!(
                "`best.expected_loss` is {}, but its row's is {}; {EDITED}",
                crate::fmt::fmt_exact(doc.best.expected_loss),
                crate::fmt::fmt_exact(p.expected_loss())
            ))
        }
        Some(p) => {
            // ... with its standard error (three times it widened the one-SE set, accepted).
            let se = p.se("expected_loss").unwrap_or(f64::NAN);
            let written = doc.best.stderr.unwrap_or(f64::NAN);
            if written.to_bits() != se.to_bits() && !(written.is_nan() && se.is_nan()) {
                return Err(format!(
                    "`best.stderr` is {}, but its row's `stderr.expected_loss` is {}; {EDITED}",
                    crate::fmt::fmt_exact(written),
                    crate::fmt::fmt_exact(se)
                ));
            }
        }
    }
    if let Some(v) = doc
        .best
        .within_one_se
        .iter()
        .find(|v| on_curve(**v).is_none())
    {
        return Err(format!(
            "`best.within_one_se` holds {}, no row of the best's curve; {EDITED}",
            fmt_value(*v)
        ));
    }
    // ... and the lowest expected loss at the largest size, with its one-SE set (an edited best
    // at the worst row was drawn as the best and compared as identical).
    let at_largest = || doc.points.iter().filter(|p| p.train_size == largest);
    if let Some(p) = at_largest().find(|p| p.expected_loss() < doc.best.expected_loss) {
        return Err(format!(
            "`best` is {} = {}, but {} has a lower expected loss; {EDITED}",
            doc.knob,
            fmt_value(doc.best.value),
            crate::fmt::clip(&row_name(doc, p), 80)
        ));
    }
    let set: Vec<f64> = at_largest()
        .filter(|p| p.family == doc.best.family && doc.best.admits(p.expected_loss()))
        .map(|p| p.value)
        .collect();
    if set.len() != doc.best.within_one_se.len()
        || set.iter().any(|v| !doc.best.within_one_se.contains(v))
    {
        return Err(format!(
            "`best.within_one_se` is not the set of the best curve's values within one standard \
             error of the best; {EDITED}"
        ));
    }

    // `terms`: the loss's own description of the first row's model (keys, roles, views and
    // flags); pictures and comparisons read the roles (an edited role made `plot` panic and
    // `check` call a document identical to a baseline it differs from).
    if let (false, Some(p)) = (doc.terms.is_empty(), doc.points.first()) {
        let shape = row_shape(doc, p, observed);
        let want: Vec<crate::report::TermDoc> = loss
            .describe(&shape, observed)
            .iter()
            .filter(|t| crate::report::reported(t, observed))
            .map(crate::report::TermDoc::from_info)
            .collect();
        let sig = |t: &crate::report::TermDoc| {
            (
                t.key.clone(),
                t.role.clone(),
                t.group.clone(),
                t.stderr,
                t.bootstrap,
                t.count,
            )
        };
        if let Some((i, _)) = (0..want.len().max(doc.terms.len())).find_map(|i| {
            let (a, b) = (doc.terms.get(i).map(sig), want.get(i).map(sig));
            (a != b).then_some((i, ()))
        }) {
            return Err(format!(
                "`terms[{i}]` is not the {} loss's own description of its terms{}; {EDITED}",
                doc.loss,
                want.get(i)
                    .map(|t| format!(" (there: `{}`, role `{}`)", t.key, t.role))
                    .unwrap_or_default()
            ));
        }
    }

    // Learning curves and rankings: rows of `points`, each the lowest of its curve (an edited
    // curve made `plot --learning` panic, and was drawn where it pointed).
    let row_of = |family: Option<&str>, n: usize, v: f64| {
        doc.points.iter().find(|p| {
            p.family.as_deref() == family
                && p.train_size.map_or(true, |m| m as usize == n)
                && p.value.to_bits() == v.to_bits()
        })
    };
    let family_of = |f: &str| (!doc.models.is_empty()).then(|| f.to_string());
    // A run with several training sizes writes one learning curve per model, and none
    // otherwise (sweep 69: a document whose `learning` was emptied drew "--learning needs a
    // result with several training sizes" beside its three sizes).
    let curves = if doc.sizes.len() > 1 {
        doc.models.len().max(1)
    } else {
        0
    };
    if doc.learning.len() != curves {
        return Err(format!(
            "`learning` holds {} curves, but a run with {} training size{} writes {curves}; \
             {EDITED}",
            doc.learning.len(),
            doc.sizes.len().max(1),
            if doc.sizes.len() > 1 { "s" } else { "" }
        ));
    }
    for (c, lc) in doc.learning.iter().enumerate() {
        let sizes: Vec<usize> = lc.sizes.iter().map(|s| s.train_size).collect();
        if sizes != doc.sizes {
            return Err(format!(
                "`learning[{c}].sizes` are at {sizes:?}, but the document's sizes are {:?}; \
                 {EDITED}",
                doc.sizes
            ));
        }
        let fam = family_of(&lc.family);
        for (k, sb) in lc.sizes.iter().enumerate() {
            let row = row_of(fam.as_deref(), sb.train_size, sb.value);
            let lowest = doc
                .points
                .iter()
                .filter(|p| {
                    p.family == fam && p.train_size.map_or(true, |m| m as usize == sb.train_size)
                })
                .map(|p| p.expected_loss())
                .fold(f64::INFINITY, f64::min);
            let p = match row {
                Some(p)
                    if p.expected_loss().to_bits() == sb.expected_loss.to_bits()
                        && sb.expected_loss <= lowest =>
                {
                    p
                }
                _ => {
                    return Err(format!(
                        "`learning[{c}].sizes[{k}]` is not the lowest expected loss of `{}` at \
                         n = {} in `points`; {EDITED}",
                        crate::fmt::clip(&lc.family, 40),
                        sb.train_size
                    ))
                }
            };
            // Its other numbers are its row's (a bias of 500 and a variance of −50 were drawn).
            let main = |role: &str| {
                described
                    .iter()
                    .find(|t| t.role == role && t.group == "main")
                    .map_or(f64::NAN, |t| p.get(&t.key))
            };
            let same = |a: f64, b: f64| a.to_bits() == b.to_bits() || (a.is_nan() && b.is_nan());
            let se = p.se("expected_loss").unwrap_or(f64::NAN);
            let copied = [
                ("bias", sb.bias, main("bias")),
                ("variance", sb.variance, main("variance")),
                ("stderr", sb.stderr.unwrap_or(f64::NAN), se),
                (
                    "noise",
                    sb.noise.unwrap_or(f64::NAN),
                    sb.noise.map_or(f64::NAN, |_| p.get("noise")),
                ),
            ];
            if let Some((key, ..)) = copied.iter().find(|(_, a, b)| !same(*a, *b)) {
                return Err(format!(
                    "`learning[{c}].sizes[{k}].{key}` is not its row's in `points`; {EDITED}"
                ));
            }
        }
        // The share of variance in what is left: variance over bias plus variance, each at 0
        // or above, 0 when neither is left (before 0.3.6 it was the variance over the loss
        // minus the noise, up to 8.3).
        if let (Some(g), Some(last)) = (&lc.gain, lc.sizes.last()) {
            if !written_before(&doc.version, (0, 3, 6)) {
                let (b, v) = (last.bias.max(0.0), last.variance.max(0.0));
                let share = if b + v > 0.0 { v / (b + v) } else { 0.0 };
                if (g.variance_share - share).abs() > 1e-12 || g.variance_share.is_nan() {
                    return Err(format!(
                        "`learning[{c}].gain.variance_share` is {}, but the largest size's \
                         variance over its bias plus variance is {}; {EDITED}",
                        crate::fmt::fmt_exact(g.variance_share),
                        crate::fmt::fmt_exact(share)
                    ));
                }
            }
        }
    }
    if let Some((c, g)) = doc
        .learning
        .iter()
        .enumerate()
        .find_map(|(c, lc)| lc.gain.as_ref().map(|g| (c, g)))
        .filter(|(_, g)| {
            let n = doc.sizes.len();
            n < 2 || g.from != doc.sizes[n - 2] || g.to != doc.sizes[n - 1]
        })
    {
        return Err(format!(
            "`learning[{c}].gain` runs from {} to {} rows, not between the two largest sizes; \
             {EDITED}",
            g.from, g.to
        ));
    }
    for (c, lc) in doc.learning.iter().enumerate() {
        let (Some(g), [.., a, b]) = (&lc.gain, lc.sizes.as_slice()) else {
            continue;
        };
        let d = a.expected_loss - b.expected_loss;
        if (g.drop - d).abs() > 1e-9 * (a.expected_loss.abs() + b.expected_loss.abs()) {
            return Err(format!(
                "`learning[{c}].gain.drop` is not the fall of the curve's lowest expected loss \
                 between its two largest sizes; {EDITED}"
            ));
        }
    }
    // A run of several models ranks them at every training size, and a run of one does not
    // (sweep 71: a study's `ranking` deleted passed as "identical").
    if (doc.models.len() > 1 || !doc.ranking.is_empty())
        && doc.ranking.len() != doc.sizes.len().max(1)
    {
        return Err(format!(
            "`ranking` has {} entries for {} training sizes; {EDITED}",
            doc.ranking.len(),
            doc.sizes.len().max(1)
        ));
    }
    for (r, rk) in doc.ranking.iter().enumerate() {
        let top = rk.candidates.first().map_or(0.0, |c| c.expected_loss);
        if let Some(k) = rk.candidates.iter().position(|c| {
            let d = c.expected_loss - top;
            (c.difference - d).abs() > 1e-9 * (c.expected_loss.abs() + top.abs())
        }) {
            return Err(format!(
                "`ranking[{r}].candidates[{k}].difference` is not its expected loss minus the \
                 best's; {EDITED}"
            ));
        }
        for (k, cand) in rk.candidates.iter().enumerate() {
            let fam = family_of(&cand.family);
            let ok = row_of(fam.as_deref(), rk.train_size, cand.value)
                .is_some_and(|p| p.expected_loss().to_bits() == cand.expected_loss.to_bits());
            let sorted = k == 0 || rk.candidates[k - 1].expected_loss <= cand.expected_loss;
            if !ok || !sorted {
                return Err(format!(
                    "`ranking[{r}].candidates[{k}]` is not a row of `points` in order of \
                     expected loss; {EDITED}"
                ));
            }
        }
    }

    // `uncertainty`: one entry per row; leave-one-block-out values that decode, finite where the
    // standard error is.
    if let Some(u) = &doc.uncertainty {
        if u.rows.len() != doc.points.len() {
            return Err(format!(
                "`uncertainty.rows` has {} entries for {} points; {EDITED}",
                u.rows.len(),
                doc.points.len()
            ));
        }
        let blocks = usize::try_from(u.blocks).unwrap_or(usize::MAX);
        // A run stores the leave-one-block-out values of every term with a standard error in
        // every row, or (no jackknife) of none: a term some row lacks while any row holds
        // values was deleted, from that row or from all of them.
        let stored = u.rows.iter().any(|r| !r.leave_out.is_empty());
        for (i, (row, p)) in u.rows.iter().zip(&doc.points).enumerate() {
            if let Some((k, _)) = p
                .stderr
                .iter()
                .find(|(k, _)| stored && !row.leave_out.contains_key(k))
            {
                return Err(format!(
                    "`uncertainty.rows[{i}].leave_out.{}` is missing (a run stores the \
                     leave-one-block-out values of every term with a standard error, and this \
                     document holds others); {EDITED}",
                    crate::fmt::clip(k, 40)
                ));
            }
        }
        for (i, (row, p)) in u.rows.iter().zip(&doc.points).enumerate() {
            for (k, packed) in &row.leave_out {
                let key = format!(
                    "`uncertainty.rows[{i}].leave_out.{}`",
                    crate::fmt::clip(k, 40)
                );
                let Some(&(_, se)) = p.stderr.iter().find(|(s, _)| s == k) else {
                    return Err(format!(
                        "{key} is of no term with a standard error in `points[{i}]`; {EDITED}"
                    ));
                };
                let values = crate::codec::unpack_floats(packed, blocks).map_err(|e| {
                    format!("{key}: {e} (`uncertainty.blocks` = {}); {EDITED}", u.blocks)
                })?;
                if se.is_finite() && values.iter().any(|v| !v.is_finite()) {
                    return Err(format!(
                        "{key} holds a number that is not finite although the standard error \
                         `points[{i}].stderr.{k}` is; {EDITED}"
                    ));
                }
            }
        }
    }
    Ok(())
}

/// Verdict on one term in one row.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Verdict {
    /// Larger by more than `sigma` standard errors and the margin.
    Worse,
    /// Smaller by more than `sigma` standard errors and the margin.
    Better,
    /// Neither.
    Unchanged,
}

impl Verdict {
    /// `worse`, `better` or `unchanged`.
    pub fn word(self) -> &'static str {
        match self {
            Verdict::Worse => "worse",
            Verdict::Better => "better",
            Verdict::Unchanged => "unchanged",
        }
    }
}

/// How the two documents are compared (see the [module documentation](self)).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mode {
    /// Every number equals the baseline's bit for bit.
    Identical,
    /// Same training sets and evaluation points: jackknife of the paired differences.
    Paired,
    /// Independent runs at the same evaluation points.
    SamePoints,
    /// Independent runs at different evaluation points (drawn from the same distribution).
    OtherPoints,
}

impl Mode {
    /// The mode's short name, as printed on every changed line.
    pub fn word(self) -> &'static str {
        match self {
            Mode::Identical => "identical",
            Mode::Paired => "paired",
            Mode::SamePoints => "unpaired, same points",
            Mode::OtherPoints => "unpaired, other points",
        }
    }
}

/// One term in one row.
#[derive(Debug, Clone, PartialEq)]
pub struct Comparison {
    /// The row's family (documents with several models).
    pub family: Option<String>,
    /// The row's training size (documents with several training sizes).
    pub train_size: Option<u64>,
    /// Knob value.
    pub value: f64,
    /// Term name (`variance`, `kohavi_wolpert.bias_sq`, ...).
    pub term: String,
    /// Baseline value.
    pub baseline: f64,
    /// New value.
    pub new: f64,
    /// `new − baseline`.
    pub diff: f64,
    /// Standard error of the difference in the report's mode (0 when identical).
    pub se: f64,
    /// `√(se_new² + se_base²)`, the standard error independent runs would give (for comparison
    /// with a paired `se`); `None` where a standard error is missing.
    pub unpaired_se: Option<f64>,
    /// The relative margin that applied to this term.
    pub margin: f64,
    /// The threshold `|z|` had to pass: the quantile of Student's t, at the degrees of freedom
    /// of `se` (the blocks' less one, paired; Welch–Satterthwaite's over both runs' blocks,
    /// unpaired), whose tail is that of a normal beyond `--sigma` ([`t_threshold`]).
    pub crit: f64,
    /// The verdict.
    pub verdict: Verdict,
}

impl Comparison {
    /// `diff / se` (±∞ when `se` is 0 and the values differ, 0 when they are equal).
    pub fn z(&self) -> f64 {
        if self.diff == 0.0 {
            0.0
        } else {
            self.diff / self.se
        }
    }

    /// Whether the verdict came from the margin alone (`se = 0`, values different).
    pub fn margin_only(&self) -> bool {
        self.se == 0.0 && self.diff != 0.0
    }

    /// The rule that produced the verdict, e.g. `z > 4 and d > 2% of |base|`.
    pub fn rule(&self, sigma: f64) -> String {
        let m = pct(self.margin);
        // `{sigma}` printed 1e308 digit by digit; the Student-t threshold to 3 digits.
        let sigma = crit_words(sigma, self.crit);
        match (self.verdict, self.margin_only()) {
            (Verdict::Worse, false) => format!("z > {sigma} and d > {m} of |base|"),
            (Verdict::Better, false) if sigma == "0" => format!("z < 0 and |d| > {m} of |base|"),
            (Verdict::Better, false) => format!("z < -{sigma} and |d| > {m} of |base|"),
            (Verdict::Worse, true) => format!("se = 0, so by the margin alone: d > {m} of |base|"),
            (Verdict::Better, true) => {
                format!("se = 0, so by the margin alone: |d| > {m} of |base|")
            }
            (Verdict::Unchanged, _) => format!("|z| <= {sigma} or |d| <= {m} of |base|"),
        }
    }
}

/// A fraction as a percentage without float noise (`0.07` → `7%`).
fn pct(f: f64) -> String {
    let s = format!("{:.4}", 100.0 * f);
    let s = s.trim_end_matches('0').trim_end_matches('.');
    format!("{s}%")
}

/// The outcome of a comparison.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckReport {
    /// Knob name (of the first model).
    pub knob: String,
    /// Knob name of each family (documents with several models).
    pub knobs: Vec<(String, String)>,
    /// Every term and standard error equals the baseline exactly.
    pub identical: bool,
    /// How the documents were compared.
    pub mode: Mode,
    /// The mode in words: why it applies and how `se` is computed.
    pub about: String,
    /// The thresholds used.
    pub options: CheckOptions,
    /// Every comparison, row by row in the result's order.
    pub comparisons: Vec<Comparison>,
    /// The heavy-tail sentences of the result and the baseline
    /// ([`crate::report::heavy_tail_words`]): rows whose standard errors, and so whose
    /// verdicts, are not reliable.
    pub tails: Vec<String>,
}

impl CheckReport {
    /// Whether any term got worse.
    pub fn regressed(&self) -> bool {
        self.comparisons.iter().any(|c| c.verdict == Verdict::Worse)
    }

    /// The terms that got worse.
    pub fn worse(&self) -> impl Iterator<Item = &Comparison> {
        self.comparisons
            .iter()
            .filter(|c| c.verdict == Verdict::Worse)
    }

    /// The terms that got better.
    pub fn better(&self) -> impl Iterator<Item = &Comparison> {
        self.comparisons
            .iter()
            .filter(|c| c.verdict == Verdict::Better)
    }

    /// Names of the terms that got worse (each once, in term order).
    pub fn worse_terms(&self) -> Vec<String> {
        let mut v: Vec<String> = Vec::new();
        for c in self.worse() {
            if !v.contains(&c.term) {
                v.push(c.term.clone());
            }
        }
        v
    }

    /// Median over the compared terms of `se / unpaired_se` (paired mode: how much pairing
    /// shrank the standard errors); `None` when no term has both.
    pub fn se_ratio(&self) -> Option<f64> {
        let mut r: Vec<f64> = self
            .comparisons
            .iter()
            .filter_map(|c| c.unpaired_se.filter(|u| *u > 0.0).map(|u| c.se / u))
            .filter(|x| x.is_finite())
            .collect();
        if r.is_empty() {
            return None;
        }
        r.sort_by(f64::total_cmp);
        let n = r.len();
        Some(if n % 2 == 1 {
            r[n / 2]
        } else {
            0.5 * (r[n / 2 - 1] + r[n / 2])
        })
    }

    /// The row of a comparison in words: `k = 5`, `knn k = 5, n = 100`.
    pub fn row_words(&self, c: &Comparison) -> String {
        let knob = c
            .family
            .as_ref()
            .and_then(|f| self.knobs.iter().find(|(fam, _)| fam == f))
            .map_or(self.knob.as_str(), |(_, k)| k.as_str());
        let mut s = match &c.family {
            Some(f) => format!("{f} {knob} = {}", fmt_value(c.value)),
            None => format!("{knob} = {}", fmt_value(c.value)),
        };
        if let Some(n) = c.train_size {
            s.push_str(&format!(", n = {n}"));
        }
        s
    }

    /// Exit code of `lossprism check`: 1 when something regressed, else 0.
    pub fn exit_code(&self) -> u8 {
        u8::from(self.regressed())
    }
}

impl fmt::Display for CheckReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let n = self.comparisons.len();
        if self.identical {
            return writeln!(
                f,
                "identical: all {n} terms and their standard errors equal the baseline exactly"
            );
        }
        writeln!(f, "mode: {}", self.about)?;
        for t in &self.tails {
            writeln!(f, "note: {t}")?;
        }
        let sigma = self.options.sigma;
        let moved: Vec<&Comparison> = self
            .comparisons
            .iter()
            .filter(|c| c.verdict != Verdict::Unchanged)
            .collect();
        if !moved.is_empty() {
            const COLS: usize = 7;
            let rows: Vec<[String; COLS]> = moved
                .iter()
                .map(|c| {
                    // Divided first: 100 × a difference near the largest float overflows.
                    let rel = c.diff / c.baseline.abs() * 100.0;
                    let rel = if c.baseline != 0.0 && rel.is_finite() {
                        format!(" ({}%)", signed_1(rel))
                    } else {
                        String::new()
                    };
                    let z = c.z();
                    [
                        c.verdict.word().to_string(),
                        self.row_words(c),
                        c.term.clone(),
                        format!("{} -> {}", fmt_num(c.baseline), fmt_num(c.new)),
                        format!(
                            "d = {}{}{rel} ± {}",
                            if c.diff > 0.0 { "+" } else { "" },
                            fmt_num(c.diff),
                            fmt_se(c.se)
                        ),
                        if z.is_finite() {
                            format!("z = {}", signed_1(z))
                        } else {
                            "z = n/a".to_string()
                        },
                        format!("[{}: {}]", self.mode.word(), c.rule(sigma)),
                    ]
                })
                .collect();
            let mut w = [0usize; COLS];
            for r in &rows {
                for (i, cell) in r.iter().enumerate() {
                    w[i] = w[i].max(cell.chars().count());
                }
            }
            for r in &rows {
                let mut s = String::new();
                for (i, cell) in r.iter().enumerate() {
                    let pad = " ".repeat(w[i] - cell.chars().count());
                    if i == 5 {
                        s.push_str(&pad);
                        s.push_str(cell);
                    } else {
                        s.push_str(cell);
                        s.push_str(&pad);
                    }
                    if i + 1 < COLS {
                        s.push_str("  ");
                    }
                }
                writeln!(f, "{}", s.trim_end())?;
            }
        }
        let worse = self.worse().count();
        let better = self.better().count();
        let unchanged = n - worse - better;
        let crits: Vec<f64> = self
            .comparisons
            .iter()
            .filter(|c| c.se > 0.0)
            .map(|c| c.crit)
            .collect();
        let (lo, hi) = crits
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &c| {
                (a.min(c), b.max(c))
            });
        let threshold = if crits.is_empty() || crit_words(sigma, hi) == fmt_value(sigma) {
            format!("z > {}", fmt_value(sigma))
        } else {
            let range = if crit_words(sigma, lo) == crit_words(sigma, hi) {
                crit_words(sigma, hi)
            } else {
                format!("{} to {}", crit_words(sigma, lo), crit_words(sigma, hi))
            };
            format!(
                "z > {range}, the Student t quantiles (over the blocks' degrees of freedom) of a \
                 normal's tail beyond {}",
                fmt_value(sigma)
            )
        };
        let mut rule = format!(
            "{}; worse when {threshold} and d > {} of |base|",
            self.mode.word(),
            pct(self.options.margin)
        );
        if !self.options.term_margins.is_empty() {
            let per: Vec<String> = self
                .options
                .term_margins
                .iter()
                .map(|(t, m)| format!("{t} {}", pct(*m)))
                .collect();
            rule.push_str(&format!(" (margins: {})", per.join(", ")));
        }
        if self.mode == Mode::Paired {
            if let Some(r) = self.se_ratio() {
                rule.push_str(&format!(
                    "; paired standard errors are {} of the unpaired ones (median)",
                    crate::fmt::fmt_num(r)
                ));
            }
        }
        if worse > 0 {
            writeln!(
                f,
                "REGRESSED: {worse} worse ({}), {better} better, {unchanged} unchanged of {n} terms ({rule})",
                self.worse_terms().join(", ")
            )
        } else {
            writeln!(
                f,
                "ok: {better} better, {unchanged} unchanged, none worse of {n} terms ({rule})"
            )
        }
    }
}

/// The threshold `z` must pass: 3 significant digits of the Student-t quantile `crit`, or
/// `sigma` as written when they agree to those digits (many degrees of freedom).
fn crit_words(sigma: f64, crit: f64) -> String {
    if crit.is_finite() && (crit - sigma).abs() <= 5e-4 * sigma.max(1.0) {
        fmt_value(sigma)
    } else if crit.is_finite() && crit < 1e3 {
        format!("{crit:.3}")
    } else if crit.is_finite() {
        crate::fmt::fmt_num(crit)
    } else {
        "infinity".into()
    }
}

/// The z threshold of `--sigma` at `df` degrees of freedom: the quantile of Student's t with
/// the same upper tail as a standard normal beyond `sigma`. A jackknife standard error over B
/// blocks is itself estimated from B values, so `d / se` follows t with about B − 1 degrees of
/// freedom rather than the normal (common practice for group jackknives; `docs/check-calibration.md`
/// measured the heavier tail at B = 32), and at 6 blocks `z > 4` was passed by genuine runs one
/// time in 15. `sigma` itself with infinitely many degrees of freedom; infinite when the
/// normal tail underflows (`sigma` beyond about 37).
pub fn t_threshold(sigma: f64, df: f64) -> f64 {
    if !(df.is_finite() && df < 1e7) || sigma <= 0.0 {
        return sigma;
    }
    let df = df.max(1.0);
    // In logarithms: the normal tail beyond 38 and the t quantiles beyond 1e12 (1e149 at one
    // degree of freedom and sigma 37) are out of reach of the plain numbers.
    let target = ln_normal_tail(sigma);
    let (mut lo, mut hi) = (sigma.ln(), 709.0f64);
    if ln_student_t_sf(hi, df) > target {
        return f64::INFINITY;
    }
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if ln_student_t_sf(mid, df) > target {
            lo = mid;
        } else {
            hi = mid;
        }
        if hi - lo <= 1e-14 * hi.abs().max(1.0) {
            break;
        }
    }
    hi.exp()
}

/// `ln P(Z > s)` for a standard normal: directly up to 30, then by the asymptotic series of
/// Mills' ratio, `φ(s)/s · (1 − 1/s² + 3/s⁴ − 15/s⁶)` (Abramowitz and Stegun 1964, 26.2.12;
/// from memory), whose error there is below 1e-9 of the tail.
fn ln_normal_tail(s: f64) -> f64 {
    if s < 30.0 {
        crate::decompose::zero_one::normal_cdf(-s).ln()
    } else {
        let s2 = s * s;
        -0.5 * s2 - s.ln() - 0.5 * (2.0 * std::f64::consts::PI).ln()
            + (1.0 - 1.0 / s2 + 3.0 / (s2 * s2) - 15.0 / (s2 * s2 * s2)).ln()
    }
}

/// `ln P(T > e^u)` for Student's t with `df` degrees of freedom ([`student_t_sf`] in logarithms,
/// so that `t` up to e^709 and tails far below 1e-308 keep their digits).
fn ln_student_t_sf(u: f64, df: f64) -> f64 {
    let (a, b) = (0.5 * df, 0.5);
    // x = df / (df + t²) and 1 − x, without forming t² (e^1418 overflows).
    let r = (df.ln() - 2.0 * u).exp(); // df / t²
    let ln_x = df.ln() - 2.0 * u - r.ln_1p();
    let ln_1mx = -r.ln_1p();
    let x = ln_x.exp();
    if x < (a + 1.0) / (a + b + 2.0) {
        let ln_front = ln_gamma(a + b) - ln_gamma(a) - ln_gamma(b) + a * ln_x + b * ln_1mx;
        0.5f64.ln() + ln_front + beta_fraction(x, a, b).ln() - a.ln()
    } else {
        student_t_sf(u.exp(), df).ln()
    }
}

/// `P(T > t)` for Student's t with `df` degrees of freedom, `t ≥ 0`: `½ I_{df/(df+t²)}(df/2,
/// 1/2)`, the regularized incomplete beta function (Abramowitz and Stegun 1964, 26.7.1 and
/// 26.5.1; from memory).
fn student_t_sf(t: f64, df: f64) -> f64 {
    0.5 * incomplete_beta(df / (df + t * t), 0.5 * df, 0.5)
}

/// The regularized incomplete beta function `I_x(a, b)`, by its continued fraction evaluated
/// with the modified Lentz method (Press, Teukolsky, Vetterling and Flannery, *Numerical
/// Recipes*, 3rd ed., 2007, §6.4; from memory).
fn incomplete_beta(x: f64, a: f64, b: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    if x >= 1.0 {
        return 1.0;
    }
    let front =
        (ln_gamma(a + b) - ln_gamma(a) - ln_gamma(b) + a * x.ln() + b * (1.0 - x).ln()).exp();
    if x < (a + 1.0) / (a + b + 2.0) {
        front * beta_fraction(x, a, b) / a
    } else {
        1.0 - front * beta_fraction(1.0 - x, b, a) / b
    }
}

/// The continued fraction of [`incomplete_beta`].
fn beta_fraction(x: f64, a: f64, b: f64) -> f64 {
    const TINY: f64 = 1e-300;
    let tiny = |v: f64| if v.abs() < TINY { TINY } else { v };
    let (qab, qap, qam) = (a + b, a + 1.0, a - 1.0);
    let mut c = 1.0;
    let mut d = 1.0 / tiny(1.0 - qab * x / qap);
    let mut h = d;
    for m in 1..=500 {
        let m = m as f64;
        let m2 = 2.0 * m;
        let aa = m * (b - m) * x / ((qam + m2) * (a + m2));
        d = 1.0 / tiny(1.0 + aa * d);
        c = tiny(1.0 + aa / c);
        h *= d * c;
        let aa = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2));
        d = 1.0 / tiny(1.0 + aa * d);
        c = tiny(1.0 + aa / c);
        let step = d * c;
        h *= step;
        if (step - 1.0).abs() < 1e-15 {
            break;
        }
    }
    h
}

/// `ln Γ(x)` for `x ≥ 1/2`: the Lanczos approximation with g = 7 and nine coefficients
/// (Lanczos 1964, *SIAM J. Numer. Anal.* B 1:86–96; the coefficients as commonly tabulated,
/// from memory), accurate to about 1e-15.
fn ln_gamma(x: f64) -> f64 {
    const G: f64 = 7.0;
    const C: [f64; 9] = [
        0.999_999_999_999_809_9,
        676.520_368_121_885_1,
        -1_259.139_216_722_402_8,
        771.323_428_777_653_1,
        -176.615_029_162_140_6,
        12.507_343_278_686_905,
        -0.138_571_095_265_720_12,
        9.984_369_578_019_572e-6,
        1.505_632_735_149_311_6e-7,
    ];
    let x = x - 1.0;
    let mut a = C[0];
    for (i, c) in C.iter().enumerate().skip(1) {
        a += c / (x + i as f64);
    }
    let t = x + G + 0.5;
    0.5 * (2.0 * std::f64::consts::PI).ln() + (x + 0.5) * t.ln() - t + a.ln()
}

/// Value and standard error of a term in a row. Outer `None`: the term is absent from the row.
fn term_of(row: &PointRow, term: &str) -> Option<(f64, Option<f64>)> {
    row.has(term).then(|| (row.get(term), row.se(term)))
}

/// A row's identity in words, for messages.
fn row_name(doc: &ResultDoc, p: &PointRow) -> String {
    let knob = p
        .family
        .as_deref()
        .map_or(doc.knob.as_str(), |f| doc.knob_of(f));
    let mut s = match &p.family {
        Some(f) => format!("{f} {knob} = {}", fmt_value(p.value)),
        None => format!("{knob} = {}", fmt_value(p.value)),
    };
    if let Some(n) = p.train_size {
        s.push_str(&format!(", n = {n}"));
    }
    s
}

/// The key rows are matched by: family, training size, knob value (bits).
fn row_key(p: &PointRow) -> (Option<&str>, Option<u64>, u64) {
    (p.family.as_deref(), p.train_size, p.value.to_bits())
}

/// For every row of `new`, the index of the baseline row with the same key; a mismatch names
/// the first row present in one document only.
fn match_rows(new: &ResultDoc, base: &ResultDoc) -> Result<Vec<usize>, String> {
    let index: std::collections::HashMap<_, usize> = base
        .points
        .iter()
        .enumerate()
        .map(|(j, p)| (row_key(p), j))
        .collect();
    let mut out = Vec::with_capacity(new.points.len());
    for p in &new.points {
        match index.get(&row_key(p)) {
            Some(&j) => out.push(j),
            None => {
                return Err(format!(
                    "the row {} is in the result but not in the baseline",
                    row_name(new, p)
                ))
            }
        }
    }
    if out.len() != base.points.len() {
        let have: std::collections::HashSet<usize> = out.iter().copied().collect();
        if let Some(p) = (0..base.points.len()).find(|j| !have.contains(j)) {
            return Err(format!(
                "the row {} is in the baseline but not in the result",
                row_name(base, &base.points[p])
            ));
        }
        return Err("the result repeats a row".into());
    }
    Ok(out)
}

/// The first difference that makes two documents incomparable, if any.
fn mismatch(new: &ResultDoc, base: &ResultDoc) -> Option<String> {
    let show = |v: &serde_json::Value| {
        let s = v.to_string();
        if s.chars().count() > 80 {
            format!("{}...", s.chars().take(80).collect::<String>())
        } else {
            s
        }
    };
    // The same models listed in another order (sweep 70: "family differs: `tree` in the result,
    // `knn` in the baseline", though both hold both).
    let names =
        |d: &ResultDoc| -> Vec<String> { d.models.iter().map(|m| m.id().to_string()).collect() };
    let (na, nb) = (names(new), names(base));
    if na != nb && na.len() > 1 {
        let (mut sa, mut sb) = (na.clone(), nb.clone());
        sa.sort();
        sb.sort();
        if sa == sb {
            return Some(format!(
                "the models are listed in another order: {} in the result, {} in the baseline; \
                 write the `[[model]]` tables in the baseline's order (the order is part of the \
                 scenario, and results are compared row by row)",
                na.join(", "),
                nb.join(", ")
            ));
        }
    }
    for (what, a, b) in [
        ("family", &new.family, &base.family),
        ("knob", &new.knob, &base.knob),
        ("loss", &new.loss, &base.loss),
    ] {
        if a != b {
            return Some(format!(
                "{what} differs: `{a}` in the result, `{b}` in the baseline"
            ));
        }
    }
    let mut ea = serde_json::to_value(&new.scenario).unwrap_or_default();
    let mut eb = serde_json::to_value(&base.scenario).unwrap_or_default();
    // A table's location is not part of the run (its content is compared below, and the table
    // section skips `path`), but the echo names it in each input's `distribution` and in
    // `truth`: a scenario moved to another folder, or given the table by an absolute path, was
    // refused ("scenario.inputs[0] differs: column of /ci/data/t.csv ... column of data/t.csv").
    for (e, d) in [(&mut ea, new), (&mut eb, base)] {
        if let Some(t) = d.table.as_ref().filter(|t| !t.path.is_empty()) {
            if let Some(inputs) = e.get_mut("inputs").and_then(|v| v.as_array_mut()) {
                for input in inputs {
                    if let Some(text) = input.get_mut("distribution") {
                        unname_table(text, &t.path);
                    }
                }
            }
            if let Some(truth) = e.get_mut("truth") {
                unname_table(truth, &t.path);
            }
        }
    }
    // A twin's fidelity record and the pick it recommends are what `twin` measured, not what the
    // run computes: the same twin written with `--fidelity 0` gave the same numbers and was
    // refused ("scenario.twin.fidelity differs").
    for e in [&mut ea, &mut eb] {
        if let Some(t) = e.get_mut("twin").and_then(|t| t.as_object_mut()) {
            t.remove("fidelity");
            t.remove("recommended");
        }
    }
    if let (Some(ma), Some(mb)) = (ea.as_object(), eb.as_object()) {
        let mut keys: Vec<&String> = ma.keys().chain(mb.keys()).collect();
        keys.sort();
        keys.dedup();
        // `grid` first: the most common reason.
        keys.sort_by_key(|k| k.as_str() != "grid");
        for k in keys {
            // The number of blocks is a precision setting, like the number of replicates; the
            // evaluation seed decides the mode (the points' fingerprints are compared there).
            // The scenario's name and description change no number: a baseline kept in CI
            // must survive a reworded `about` ("cannot compare: scenario.about differs").
            if k == "blocks" || k == "eval_seed" || k == "name" || k == "about" {
                continue;
            }
            let (va, vb) = (ma.get(k.as_str()), mb.get(k.as_str()));
            if va != vb {
                let null = serde_json::Value::Null;
                let what = if k == "grid" {
                    "grid".to_string()
                } else {
                    format!("scenario.{k}")
                };
                // A section (the twin's): name its first differing field, since the clipped
                // values often began alike (a field a newer version writes was not named).
                if let (Some(serde_json::Value::Object(oa)), Some(serde_json::Value::Object(ob))) =
                    (va, vb)
                {
                    let mut sub: Vec<&String> = oa.keys().chain(ob.keys()).collect();
                    sub.sort();
                    sub.dedup();
                    if let Some(f) = sub.into_iter().find(|f| oa.get(*f) != ob.get(*f)) {
                        return Some(format!(
                            "{what}.{f} differs: {} in the result, {} in the baseline",
                            show(oa.get(f).unwrap_or(&null)),
                            show(ob.get(f).unwrap_or(&null))
                        ));
                    }
                }
                // A list of the same length (the inputs): its first differing entry.
                if let (Some(serde_json::Value::Array(la)), Some(serde_json::Value::Array(lb))) =
                    (va, vb)
                {
                    if la.len() == lb.len() && k != "grid" {
                        if let Some(i) = (0..la.len()).find(|&i| la[i] != lb[i]) {
                            return Some(format!(
                                "{what}[{i}] differs: {} in the result, {} in the baseline",
                                show(&la[i]),
                                show(&lb[i])
                            ));
                        }
                    }
                }
                return Some(format!(
                    "{what} differs: {} in the result, {} in the baseline",
                    show(va.unwrap_or(&null)),
                    show(vb.unwrap_or(&null))
                ));
            }
        }
    }
    // Several models or training sizes: the same ones.
    let models = |d: &ResultDoc| {
        d.models
            .iter()
            .map(|m| {
                let grid: Vec<String> = m.grid.iter().map(|v| fmt_value(*v)).collect();
                format!(
                    "{} {} [{}] x{}",
                    m.family,
                    m.knob,
                    grid.join(", "),
                    m.fit_seeds
                )
            })
            .collect::<Vec<_>>()
    };
    // A single-model or single-size document lists none (its one model and size are the
    // scenario's): said as such, not as "[]".
    let one_model = |d: &ResultDoc| {
        let grid: Vec<String> = d.scenario.grid.iter().map(|v| fmt_value(*v)).collect();
        format!("one model ({} {} [{}])", d.family, d.knob, grid.join(", "))
    };
    let (ma, mb) = (models(new), models(base));
    if ma != mb {
        let say = |m: &[String], d: &ResultDoc| {
            if m.is_empty() {
                one_model(d)
            } else {
                format!("[{}]", m.join("; "))
            }
        };
        return Some(format!(
            "the models differ: {} in the result, {} in the baseline",
            say(&ma, new),
            say(&mb, base)
        ));
    }
    if new.sizes != base.sizes {
        let say = |d: &ResultDoc| {
            if d.sizes.is_empty() {
                format!("one size ({})", d.scenario.train_size)
            } else {
                format!("{:?}", d.sizes)
            }
        };
        return Some(format!(
            "the training sizes differ: {} in the result, {} in the baseline",
            say(new),
            say(base)
        ));
    }
    // A table source: the same data and resampling (Monte Carlo shares and the file's location
    // may differ).
    let ta = serde_json::to_value(&new.table).unwrap_or_default();
    let tb = serde_json::to_value(&base.table).unwrap_or_default();
    match (ta.as_object(), tb.as_object()) {
        (Some(ma), Some(mb)) => {
            // `repeats_dropped` is a count of what `rows` already holds (and absent from the
            // documents of versions before it).
            // `skipped_rows` (rows held out in fewer than 2 replicates, left out of the
            // averages) depends on the seed like the held-out share: a rerun with a fresh seed
            // skipped one row where the baseline skipped none and was refused (exit 2).
            let skip = [
                "path",
                "held_out_share",
                "held_out_share_stderr",
                "repeats_dropped",
                "skipped_rows",
            ];
            for (k, va) in ma.iter().filter(|(k, _)| !skip.contains(&k.as_str())) {
                if mb.get(k) != Some(va) {
                    let null = serde_json::Value::Null;
                    return Some(format!(
                        "table.{k} differs: {} in the result, {} in the baseline",
                        show(va),
                        show(mb.get(k).unwrap_or(&null))
                    ));
                }
            }
        }
        (None, None) => {}
        _ => return Some("one document comes from a table, the other does not".into()),
    }
    None
}

/// The terms that are means over replicates where the truth is known (synthetic and twin
/// sources): the expected loss and its direct check, each replicate's loss averaged. Such an
/// estimate is a weighted mean of its leave-one-block-out values with positive weights
/// (`Σ_b (N − n_b) θ_(b) = (B − 1) N θ`, `n_b` block b's replicates of `N`), so it lies between
/// the smallest and the largest of them. Terms that are not means (a variance, a bias², a vote
/// share's decomposition) and a table's out-of-bag averages (rows counted in some leave-outs
/// and not others) have no such bound: holding them to their leave-outs by a multiple of the
/// jackknife standard error refused genuine documents (plug-in bias terms of the Poisson and
/// log-loss over many points, Kohavi–Wolpert terms whose leave-outs all agree, a table's
/// log-loss bias).
pub const MEAN_TERMS: [&str; 2] = ["expected_loss", "expected_loss_direct"];

/// Why `value`, a term of [`MEAN_TERMS`], cannot be the estimate whose leave-one-block-out
/// values are `leave_out` (`largest`: the document's largest value, the scale of its
/// rounding), or `None` when it can: it must lie within their range, to rounding. A hand edit
/// that moved a row's terms together (one row raised by 1e13, or every row's bias² and expected
/// loss set to the baseline's) kept every identity and hid regressions from a paired check.
fn off_its_leave_outs(value: f64, leave_out: &[f64], largest: f64) -> Option<String> {
    let b = leave_out.len();
    if b < 2 || !value.is_finite() || leave_out.iter().any(|x| !x.is_finite()) {
        return None;
    }
    let lo = leave_out.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = leave_out.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    // Rounding: `run` computes the expected loss from the predictions' mean and spread, whose
    // rounding scales with the responses, not the loss: a truth of 1e10 with noise sd 1e-6 put a
    // genuine value 6e-7 of itself outside (a second reading). A ten-thousandth of the values
    // is far below any change `check` calls one at its default margin (2%).
    let tol = 1e-4 * lo.abs().max(hi.abs()) + 1e-12 * largest + 1e-14;
    (value < lo - tol || value > hi + tol).then(|| {
        format!(
            "outside the range of its {b} leave-one-block-out values in `uncertainty`, [{}, {}] \
             (a mean over replicates is a weighted mean of them; only rounding beyond double \
             precision, noise below about 1e-15 of the responses, puts it outside)",
            crate::fmt::fmt_exact(lo),
            crate::fmt::fmt_exact(hi)
        )
    })
}

/// A table echo's text (`column of <path>`, `unknown: observed `y` in <path>`) with the table's
/// recorded `path` at its end replaced by a placeholder.
fn unname_table(v: &mut serde_json::Value, path: &str) {
    if let serde_json::Value::String(s) = v {
        if let Some(head) = s.strip_suffix(path) {
            *s = format!("{head}<the table>");
        }
    }
}

/// The `uncertainty` sections of both documents, or why a verdict is impossible without them.
fn uncertainties<'a>(
    new: &'a ResultDoc,
    base: &'a ResultDoc,
) -> Result<(&'a Uncertainty, &'a Uncertainty), CheckError> {
    let get = |d: &'a ResultDoc, what: &str| -> Result<&'a Uncertainty, CheckError> {
        match &d.uncertainty {
            None => Err(CheckError::MissingData(format!(
                "the {what} has no `uncertainty` section (written by an older lossprism), so \
                 only an identical result can be judged against it; rerun the {what} with this \
                 version (a baseline: delete it and accept a new one with `check --update`)"
            ))),
            // One entry per row: `validate`, before any comparison.
            Some(u) => Ok(u),
        }
    };
    Ok((get(new, "result")?, get(base, "baseline")?))
}

/// Chooses the mode of two comparable, not identical documents and says why in words.
fn choose_mode(new: &ResultDoc, base: &ResultDoc) -> Result<(Mode, String), CheckError> {
    let (ua, ub) = uncertainties(new, base)?;
    if ua.eval_fingerprint == ub.eval_fingerprint {
        if new.seed == base.seed && new.replicates == base.replicates && ua.blocks == ub.blocks {
            return Ok((
                Mode::Paired,
                format!(
                    "paired (same seed {}, {} replicates, {} blocks and evaluation points: the \
                     same training sets); se of each difference = jackknife over the blocks of \
                     its leave-one-block-out differences",
                    new.seed, new.replicates, ua.blocks
                ),
            ));
        }
        let (sets, shared) = if new.seed == base.seed {
            (
                "training sets in part shared",
                " (same seed with different replicates or blocks: the runs share training sets, \
                 so this is conservative)",
            )
        } else {
            ("independent training sets", "")
        };
        // A table's rows held out in fewer than 2 replicates are left out of its averages, and
        // which they are depends on the seed: said, since the rows then differ by those few.
        let skipped = match (&new.table, &base.table) {
            (Some(a), Some(b)) if a.skipped_rows + b.skipped_rows > 0 => format!(
                " (apart from the rows each run skipped as held out in fewer than 2 \
                 replicates: {} in the result, {} in the baseline, of {})",
                a.skipped_rows, b.skipped_rows, a.working_rows
            ),
            _ => String::new(),
        };
        return Ok((
            Mode::SamePoints,
            format!(
                "unpaired, same evaluation points{skipped} (seed {} against {}: {sets}); \
                 se = sqrt(se_new² + se_base²){shared}",
                new.seed, base.seed
            ),
        ));
    }
    let (sa, sb) = (ua.eval_seed, ub.eval_seed);
    if sa == sb {
        // Another version may compute the same scenario's truth differently (a twin's bagged
        // trees moved by 1e-7 when tree ties changed in 0.3.5, and the message blamed the
        // scenario).
        let why = if new.version != base.version {
            format!(
                "the scenario's data changed, or lossprism {} computes them otherwise than {} \
                 did (a twin's reference, say): accept the new version's numbers with --update",
                new.version, base.version
            )
        } else {
            "the scenario's data changed".to_string()
        };
        return Err(CheckError::Mismatch(format!(
            "the evaluation points or the truth there differ although both use eval_seed {sa}: \
             {why}"
        )));
    }
    if let Some(why) = new
        .scenario
        .points_not_drawn()
        .or_else(|| base.scenario.points_not_drawn())
    {
        return Err(CheckError::Mismatch(format!(
            "the evaluation points differ (eval_seed {sa} in the result, {sb} in the baseline) \
             and {why}, so the difference is not sampling noise; rerun both with the same \
             eval_seed (runs without --eval-seed share it)"
        )));
    }
    Ok((
        Mode::OtherPoints,
        format!(
            "unpaired, different evaluation points (eval_seed {sa} against {sb}; m = {} and {}, \
             assumed independent draws from the same input distribution); se² = se_new² + \
             se_base² + (point_sd_new² + point_sd_base²)/m, per-point Monte Carlo noise taken out",
            ua.eval_points, ub.eval_points
        ),
    ))
}

/// The paired jackknife standard error of `term` between row `a` and row `b`: `None` when a
/// document lacks the leave-one-block-out values, NaN when they are not finite.
fn paired_se(a: &RowUncertainty, b: &RowUncertainty, term: &str, blocks: usize) -> Option<f64> {
    let la = a.leave_out_of(term, blocks)?;
    let lb = b.leave_out_of(term, blocks)?;
    let d: Vec<f64> = la.iter().zip(&lb).map(|(x, y)| x - y).collect();
    Some(decompose::jackknife_se(&d))
}

/// Compares `new` with `baseline`; see the [module documentation](self) for the modes and the
/// rule.
///
/// Errors: [`CheckError::Mismatch`] when the documents are not runs of the same scenario
/// (scenario, family, knob, models, sizes, grid or loss differ; replicates, blocks and seeds may
/// differ) or when their evaluation points differ and are not random draws,
/// [`CheckError::MissingData`] when a document that is not identical to the other lacks the
/// `uncertainty` section, [`CheckError::MissingStderr`] when a standard error needed for a
/// verdict cannot be computed (runs with a single replicate block), [`CheckError::Options`] for
/// bad thresholds.
pub fn compare(
    new: &ResultDoc,
    baseline: &ResultDoc,
    opts: &CheckOptions,
) -> Result<CheckReport, CheckError> {
    opts.validate()?;
    for (d, what) in [(new, "result"), (baseline, "baseline")] {
        validate(d).map_err(|e| CheckError::BadDocument(format!("the {what}: {e}")))?;
    }
    // Written by another version, a difference may be the version's (how a grid is rounded, a
    // field a table's echo gained): say so, and how to move the baseline on.
    let versions = |m: String| {
        if new.version == baseline.version {
            CheckError::Mismatch(m)
        } else {
            CheckError::Mismatch(format!(
                "{m} (the baseline was written by lossprism {}, the result by {}: if the \
                 scenario is the same, the difference is the version's; delete the baseline and \
                 accept the result with `check --update`)",
                crate::fmt::clip(&baseline.version, 20),
                crate::fmt::clip(&new.version, 20)
            ))
        }
    };
    if let Some(m) = mismatch(new, baseline) {
        return Err(versions(m));
    }
    let pairs = match_rows(new, baseline).map_err(versions)?;
    let terms = compared_terms(new);
    margins_apply(opts, new)?;
    let identical = pairs
        .iter()
        .enumerate()
        .all(|(i, &j)| new.points[i] == baseline.points[j]);
    let (mode, about) = if identical {
        (Mode::Identical, "identical".to_string())
    } else {
        choose_mode(new, baseline)?
    };
    let knobs = new
        .models
        .iter()
        .map(|m| (m.family.clone(), m.knob.clone()))
        .collect();
    // A curve's scale (one family at one training size): its largest expected loss in either
    // document, and a table's responses' variance. Per curve, so that one model's peak (a
    // minimum-norm fit at its interpolation threshold) does not raise another's floor.
    let scale_of = |p: &PointRow| {
        [new, baseline]
            .iter()
            .flat_map(|d| {
                d.points
                    .iter()
                    .filter(|q| q.family == p.family && q.train_size == p.train_size)
                    .map(|q| q.expected_loss())
                    .chain(d.noise_estimate.iter().filter_map(|n| n.response_variance))
            })
            .filter(|v| v.is_finite())
            .fold(0.0f64, |a, v| a.max(v.abs()))
    };
    let mut comparisons = Vec::new();
    for (i, &j) in pairs.iter().enumerate() {
        let (a, b) = (&new.points[i], &baseline.points[j]);
        let scale = scale_of(a);
        for term in &terms {
            let term = term.as_str();
            let at = || format!("`{term}` at {}", row_name(new, a));
            let ((va, sa), (vb, sb)) = match (term_of(a, term), term_of(b, term)) {
                (None, None) => continue,
                (Some(x), Some(y)) => (x, y),
                (x, _) => {
                    let which = if x.is_none() { "result" } else { "baseline" };
                    return Err(CheckError::BadDocument(format!(
                        "{} is missing from the {which}",
                        at()
                    )));
                }
            };
            let diff = va - vb;
            if !diff.is_finite() {
                return Err(CheckError::BadDocument(format!(
                    "{}: the difference of {va:e} (result) and {vb:e} (baseline) overflows the \
                     range of floating-point numbers",
                    at()
                )));
            }
            let unpaired_se = match (sa, sb) {
                (Some(x), Some(y)) => Some(x.hypot(y)),
                _ => None,
            };
            let margin = opts.margin_for(term);
            let mut c = Comparison {
                family: a.family.clone(),
                train_size: a.train_size,
                value: a.value,
                term: term.to_string(),
                baseline: vb,
                new: va,
                diff,
                se: 0.0,
                unpaired_se,
                margin,
                crit: opts.sigma,
                verdict: Verdict::Unchanged,
            };
            if mode == Mode::Identical {
                comparisons.push(c);
                continue;
            }
            let no_se = |which: &str| {
                CheckError::MissingStderr(format!(
                    "the standard error of {} is missing (null) in the {which}: standard errors \
                     need runs with at least 2 replicate blocks and at least 3 replicates (the \
                     jackknife leaves one block out and needs 2 replicates in the rest): rerun \
                     with `replicates` >= 3 and `blocks` >= 2",
                    at()
                ))
            };
            let unpaired = || match (sa, sb) {
                (Some(x), Some(y)) => Ok((x, y)),
                (None, _) => Err(no_se("result")),
                (_, None) => Err(no_se("baseline")),
            };
            // Degrees of freedom of a run's jackknife: its blocks less one.
            let dof = |d: &ResultDoc| {
                let b = d
                    .uncertainty
                    .as_ref()
                    .map_or(d.scenario.blocks, |u| u.blocks);
                (b.max(2) - 1) as f64
            };
            // Welch–Satterthwaite (Welch 1947, Biometrika 34:28–35): independent errors x and
            // y of `dof` each, plus a part treated as known (the evaluation points' spread, over
            // as many points as the run has, usually hundreds: its own error is not counted).
            // In shares of the total, so that errors near 1e±77 neither overflow nor underflow.
            let welch = |x: f64, y: f64, total: f64| {
                let den = (x / total).powi(4) / dof(new) + (y / total).powi(4) / dof(baseline);
                if total > 0.0 && den > 0.0 {
                    1.0 / den
                } else {
                    f64::INFINITY
                }
            };
            let mut df = f64::INFINITY;
            let se = match mode {
                Mode::Identical => 0.0,
                Mode::Paired => {
                    let (ua, ub) = uncertainties(new, baseline)?;
                    let blocks = usize::try_from(ua.blocks).unwrap_or(0);
                    df = blocks.max(2) as f64 - 1.0;
                    match paired_se(&ua.rows[i], &ub.rows[j], term, blocks) {
                        Some(s) if s.is_finite() => s,
                        _ => {
                            // Fewer than 2 blocks leave nothing out: the unpaired message says
                            // what to change.
                            unpaired()?;
                            return Err(CheckError::MissingStderr(format!(
                                "the leave-one-block-out values of {} are missing or not \
                                 finite, so the paired standard error cannot be computed",
                                at()
                            )));
                        }
                    }
                }
                Mode::SamePoints => {
                    let (x, y) = unpaired()?;
                    df = welch(x, y, x.hypot(y));
                    x.hypot(y)
                }
                Mode::OtherPoints => {
                    let (x, y) = unpaired()?;
                    let (ua, ub) = uncertainties(new, baseline)?;
                    let spread = |u: &Uncertainty, k: usize, which: &str| {
                        let row = &u.rows[k];
                        // The per-point terms' own Monte Carlo noise is already in se: take it
                        // out of their spread (documents without it: the raw spread,
                        // conservative).
                        let noise = row.point_noise.get(term).copied().unwrap_or(0.0);
                        match row.point_sd.get(term) {
                            Some(sd) if sd.is_finite() && u.eval_points > 0 => {
                                Ok((sd * sd - noise).max(0.0) / u.eval_points as f64)
                            }
                            _ => Err(CheckError::MissingData(format!(
                                "the {which} has no spread across evaluation points for {}, \
                                 needed to compare runs at different evaluation points; rerun \
                                 both with the same eval_seed",
                                at()
                            ))),
                        }
                    };
                    let pa = spread(ua, i, "result")?;
                    let pb = spread(ub, j, "baseline")?;
                    let total = x.hypot(y).hypot((pa + pb).sqrt());
                    df = welch(x, y, total);
                    total
                }
            };
            if !se.is_finite() {
                // An infinite error would make every z 0 and call any change unchanged.
                return Err(CheckError::BadDocument(format!(
                    "{}: the standard error of the difference overflows the range of \
                     floating-point numbers (the terms are near 1e300); rescale the response",
                    at()
                )));
            }
            c.se = se;
            c.crit = t_threshold(opts.sigma, df);
            // Rounding is no change: a Poisson bias of −5e-16 against +4e-16 read "+175%, z =
            // +10" (the loss's absolute floor), and, for every loss, nor is a change below 1e-12
            // of the curve's scale (for the squared loss, in the response's units, the only
            // floor: exact fits of 4e-31 and 2.2e-30 beside an underfit row read "+450%").
            let floor = crate::decompose::by_name(&new.loss)
                .map_or(0.0, |l| l.identity_floor())
                .max(1e-12 * scale);
            let m = (margin * vb.abs()).max(floor);
            c.verdict = if diff == 0.0 {
                Verdict::Unchanged
            } else if se == 0.0 {
                // Nothing moves the difference across blocks: only the margin can judge it.
                if diff > m {
                    Verdict::Worse
                } else if -diff > m {
                    Verdict::Better
                } else {
                    Verdict::Unchanged
                }
            } else if diff > c.crit * se && diff > m {
                Verdict::Worse
            } else if diff < -c.crit * se && diff.abs() > m {
                Verdict::Better
            } else {
                Verdict::Unchanged
            };
            comparisons.push(c);
        }
    }
    Ok(CheckReport {
        knob: new.knob.clone(),
        knobs,
        identical,
        mode,
        about,
        options: opts.clone(),
        comparisons,
        tails: [("the result", new), ("the baseline", baseline)]
            .into_iter()
            .filter_map(|(who, d)| {
                crate::report::heavy_tail_words(d)
                    .map(|w| format!("{who}: {w} Verdicts on those rows may be wrong either way."))
            })
            .collect(),
    })
}

/// A signed number with one decimal (`+24.0`), in exponent form from a million on (`+9.4e305`):
/// `{:+.1}` prints a hand-edited 1e300 digit by digit.
fn signed_1(v: f64) -> String {
    if v.abs() < 1e6 {
        format!("{v:+.1}")
    } else {
        format!("{v:+.1e}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::codec::pack_floats;
    use std::collections::BTreeMap;

    /// A row whose noise makes ESL eq. 7.9 hold exactly, as every run's rows do (`validate`
    /// refuses a row where it does not).
    fn row(value: f64, el: f64, b2: f64, var: f64, se: Option<f64>) -> serde_json::Value {
        serde_json::json!({
            "value": value, "expected_loss": el, "bias_sq": b2, "variance": var,
            "noise": el - b2 - var, "expected_loss_direct": el,
            "stderr": { "expected_loss": se, "bias_sq": se, "variance": se,
                        "expected_loss_direct": se }
        })
    }

    /// The same models in another order are said to be so (sweep 70: "family differs: `tree`
    /// in the result, `knn` in the baseline", though both held both); other model lists fall
    /// through to the first difference, as before.
    #[test]
    fn models_in_another_order_are_named_so() {
        let m = |f: &str| crate::report::ModelEcho {
            family: f.into(),
            label: None,
            knob: "k".into(),
            grid: vec![1.0],
            grid_kind: "list".into(),
            fit_seeds: 1,
            larger_is_simpler: false,
        };
        let mut a = doc(vec![row(1.0, 1.0, 0.2, 0.3, Some(0.1))]);
        let mut b = a.clone();
        a.models = vec![m("knn"), m("tree")];
        b.models = vec![m("tree"), m("knn")];
        b.family = "tree".into();
        let why = mismatch(&a, &b).expect("incomparable");
        assert!(
            why.contains(
                "listed in another order: knn, tree in the result, tree, knn in the baseline"
            ),
            "{why}"
        );
        b.models = vec![m("tree"), m("ridge")];
        let why = mismatch(&a, &b).expect("incomparable");
        assert!(why.starts_with("family differs"), "{why}");
        // A study names its first model at the top, and lists two or more (sweep 69: `models`
        // cut to its second entry drew the curves under the first model's knob).
        let mut d = doc(vec![row(1.0, 1.0, 0.2, 0.3, Some(0.1))]);
        d.family = "mine".into();
        d.models = vec![m("other"), m("mine")];
        let why = validate_as_written(&d).expect_err("refused");
        assert!(
            why.contains("but the first of `models` is `other`"),
            "{why}"
        );
        d.models = vec![m("mine")];
        let why = validate_as_written(&d).expect_err("refused");
        assert!(why.contains("`models` lists one model"), "{why}");
    }

    fn doc(points: Vec<serde_json::Value>) -> ResultDoc {
        let grid: Vec<serde_json::Value> = points.iter().map(|p| p["value"].clone()).collect();
        let v = serde_json::json!({
            "format": FORMAT, "version": "0",
            "scenario": {
                "name": "t", "about": "", "source": "synthetic", "train_size": 10,
                "eval_size": 5, "design": "random", "eval": "fresh",
                "inputs": [{ "name": "x", "distribution": "U" }],
                "truth": "x", "noise": "0.5", "grid": grid, "grid_kind": "list", "blocks": 4
            },
            "family": "f", "knob": "k", "loss": "squared", "replicates": 8, "seed": 1,
            "points": points,
            "best": { "value": 1.0, "expected_loss": 1.0, "stderr": null, "within_one_se": [] },
            "reading": ""
        });
        let mut d: ResultDoc = serde_json::from_value(v).expect("a valid result document");
        d.best = crate::report::best_of(&d.points);
        d
    }

    /// Adds an `uncertainty` section: every row gets the same leave-one-block-out values per
    /// term (4 blocks) and point spread.
    fn with_unc(
        mut d: ResultDoc,
        fingerprint: &str,
        eval_seed: u64,
        leave_out: &[(&str, [f64; 4])],
        point_sd: f64,
    ) -> ResultDoc {
        // A run stores every term with a standard error or none: terms the test does not give
        // get values whose jackknife is the row's standard error (v ± se/√3 over 4 blocks), as
        // `validate` holds a document to.
        let given: BTreeMap<String, String> = leave_out
            .iter()
            .map(|(t, v)| (t.to_string(), pack_floats(v)))
            .collect();
        // ... and a given term's standard error is the jackknife of its values (at least that
        // for bias², which may add a second-order part).
        for p in &mut d.points {
            for (k, se) in p.stderr.iter_mut() {
                if let Some((_, v)) = leave_out.iter().find(|(t, _)| t == k) {
                    let jack = decompose::jackknife_se(v);
                    if se.is_finite() && (k != "bias_sq" || *se < jack) {
                        *se = jack;
                    }
                }
            }
        }
        d.best = crate::report::best_of(&d.points);
        let rows: Vec<RowUncertainty> = d
            .points
            .iter()
            .map(|p| {
                let mut leave_out = given.clone();
                if !leave_out.is_empty() {
                    for (k, v) in &p.terms {
                        if let Some((_, se)) = p.stderr.iter().find(|(s, _)| s == k) {
                            let c = if se.is_finite() {
                                se / 3f64.sqrt()
                            } else {
                                0.0
                            };
                            leave_out
                                .entry(k.clone())
                                .or_insert_with(|| pack_floats(&[v + c, v - c, v + c, v - c]));
                        }
                    }
                }
                RowUncertainty {
                    leave_out,
                    point_sd: ["expected_loss", "bias_sq", "variance"]
                        .iter()
                        .map(|t| (t.to_string(), point_sd))
                        .collect::<BTreeMap<_, _>>(),
                    point_noise: BTreeMap::new(),
                }
            })
            .collect();
        d.uncertainty = Some(Uncertainty {
            eval_fingerprint: fingerprint.into(),
            eval_points: 5,
            eval_seed,
            blocks: 4,
            rows,
        });
        d
    }

    /// Sets term `key` of the first row (and its noise, so that ESL eq. 7.9 still holds, and
    /// `best` from the rows, as `run` would).
    fn set(d: &mut ResultDoc, key: &str, v: f64) {
        let p = &mut d.points[0];
        p.terms.iter_mut().find(|t| t.0 == key).unwrap().1 = v;
        let noise = p.get("expected_loss") - p.get("bias_sq") - p.get("variance");
        p.terms.iter_mut().find(|t| t.0 == "noise").unwrap().1 = noise;
        d.best = crate::report::best_of(&d.points);
    }

    fn verdicts(r: &CheckReport) -> Vec<(&str, Verdict)> {
        r.comparisons
            .iter()
            .map(|c| (c.term.as_str(), c.verdict))
            .collect()
    }

    // Hand-computed cases of the unpaired rule (different seeds, same points):
    // se = √(0.01² + 0.01²) = 0.014142; 4·se = 0.056569.
    /// A twin's echoed fidelity record is held to itself and its recommended picks (an edited
    /// share of 7.5 and a recommended 1e308 were accepted and stored as a baseline).
    #[test]
    fn a_twin_echo_is_held_to_its_fidelity_record() {
        use crate::report::twin::{FidelityEcho, FidelityModelEcho, RecommendedPick, TwinEcho};
        let model = FidelityModelEcho {
            family: "tree".into(),
            knob: "max_depth".into(),
            pick: 2.0,
            one_se: vec![2.0],
            picks: vec![2.0, 1.0],
            in_one_se: 0.5,
            curve_error: 0.05,
            corrected_pick: 2.0,
            grid: vec![1.0, 2.0],
            loss: vec![0.2, 0.1],
            corrected_loss: vec![0.2, 0.1],
        };
        let echo = TwinEcho {
            reference: "knn".into(),
            twice: false,
            input_weights: Vec::new(),
            inputs: Vec::new(),
            cv_r2: Vec::new(),
            sharpen: None,
            jitter: 0.0,
            jitter_variance: None,
            noise: None,
            varying_noise: false,
            fidelity: Some(FidelityEcho {
                tables: 2,
                replicates: 100,
                twin_replicates: Some(200),
                models: vec![model],
            }),
            recommended: vec![RecommendedPick {
                family: "tree".into(),
                knob: "max_depth".into(),
                value: 2.0,
                basis: "twin-lowest".into(),
                twin_lowest: 2.0,
                bias_corrected: Some(2.0),
            }],
        };
        let mut d = with_unc(
            doc(vec![row(1.0, 1.0, 0.5, 0.25, Some(0.01))]),
            "p",
            1,
            &[],
            0.1,
        );
        d.scenario.twin = Some(echo);
        validate(&d).unwrap();
        type Edit<'a> = (&'a dyn Fn(&mut TwinEcho), &'a str);
        let edits: [Edit; 4] = [
            (
                &|e| e.fidelity.as_mut().unwrap().models[0].in_one_se = 7.5,
                "`scenario.twin.fidelity.models[0].in_one_se` is 7.5, but 1 of the 2 picks",
            ),
            (
                &|e| e.recommended[0].value = 1e308,
                "`scenario.twin.recommended` is not the picks of its fidelity models",
            ),
            (
                &|e| e.fidelity.as_mut().unwrap().models[0].pick = 1.0,
                "`scenario.twin.fidelity.models[0].pick` is 1, not the grid value of the lowest",
            ),
            (
                &|e| e.input_weights = vec![-1.0],
                "`scenario.twin.input_weights[0]` is -1, not a weight",
            ),
        ];
        for (edit, needle) in edits {
            let mut e = d.clone();
            edit(e.scenario.twin.as_mut().unwrap());
            let msg = validate(&e).unwrap_err();
            assert!(msg.contains(needle), "{msg}");
        }
    }

    /// A document of another version that breaks a rule says it may be that version's, not
    /// only "edited" (0.3.3's intervals were not widened to ± 2 SE).
    #[test]
    fn refusals_of_other_versions_name_the_version() {
        let mut d = with_unc(
            doc(vec![row(1.0, 1.0, 0.5, 0.25, Some(0.01))]),
            "p",
            1,
            &[],
            0.1,
        );
        d.best.stderr = Some(0.5);
        let e = validate(&d).unwrap_err();
        assert!(
            e.contains("or written by another version (lossprism 0; this is "),
            "{e}"
        );
        d.version = env!("CARGO_PKG_VERSION").into();
        let e = validate(&d).unwrap_err();
        assert!(e.ends_with(EDITED), "{e}");
    }

    #[test]
    fn a_mean_over_replicates_lies_within_its_leave_outs() {
        // 32 blocks of 7 and 6 replicates: the estimate is the weighted mean of the leave-outs
        // (weights N − n_b), inside their range; one jackknife SE beyond the largest is not.
        let sizes: Vec<f64> = (0..32).map(|b| if b < 8 { 7.0 } else { 6.0 }).collect();
        let means: Vec<f64> = (0..32)
            .map(|b| 2.0 + 0.01 * ((b * 7 % 32) as f64 - 15.5))
            .collect();
        let n: f64 = sizes.iter().sum();
        let total = sizes.iter().zip(&means).map(|(s, m)| s * m).sum::<f64>() / n;
        let v: Vec<f64> = sizes
            .iter()
            .zip(&means)
            .map(|(s, m)| (n * total - s * m) / (n - s))
            .collect();
        assert!(off_its_leave_outs(total, &v, 2.0).is_none());
        let hi = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let jack = crate::decompose::jackknife_se(&v);
        let e = off_its_leave_outs(hi + jack, &v, 2.0).unwrap();
        assert!(e.contains("outside the range"), "{e}");
        assert!(off_its_leave_outs(1e13, &v, 2.0).is_some());
        // Rounding beside the document's largest value is not an edit.
        let flat = vec![1e-17; 32];
        assert!(off_its_leave_outs(3e-17, &flat, 1.0).is_none());
        // Nor the rounding of a loss computed from the predictions' mean and spread beside
        // responses of 1e10 (noise sd 1e-6; a second reading): 6e-7 of the value outside.
        let v3 = [1.9114589e-8, 1.9140e-8, 1.9158489e-8];
        assert!(off_its_leave_outs(1.9114578e-8, &v3, 1.9e-8).is_none());
    }

    /// Exact fits differ by rounding: beside an underfit row of expected loss 1, 4e-31 against
    /// 2.2e-30 is no change (it read "+450%, worse"); the same change on a row of 1 would be.
    #[test]
    fn squared_rounding_is_no_change_beside_the_curves_scale() {
        let make = |tiny: f64, seed: u64| {
            let mut d = with_unc(
                doc(vec![
                    row(1.0, 1.0, 0.5, 0.5, Some(0.01)),
                    row(2.0, tiny, tiny / 2.0, tiny / 2.0, Some(1e-32)),
                ]),
                "p",
                1,
                &[],
                0.1,
            );
            // The tiny row's spread across points on its own scale (a spread of 0.1 beside a
            // mean of 2.2e-30 is refused).
            for sd in d.uncertainty.as_mut().unwrap().rows[1]
                .point_sd
                .values_mut()
            {
                *sd = tiny / 4.0;
            }
            d.seed = seed;
            d
        };
        let r = compare(&make(2.2e-30, 2), &make(4e-31, 1), &CheckOptions::default()).unwrap();
        assert!(!r.regressed(), "{r}");
        assert!(
            r.comparisons
                .iter()
                .all(|c| c.verdict == Verdict::Unchanged),
            "{r}"
        );
        // Above the floor (1e-12 of the curve's scale) a change still counts.
        let r = compare(&make(0.5, 2), &make(0.25, 1), &CheckOptions::default()).unwrap();
        assert!(r.regressed(), "{r}");
    }

    /// Student's t against closed forms (1 degree of freedom is Cauchy: P(T > t) = ½ − atan(t)/π;
    /// 2: ½ (1 − t/√(2 + t²)); textbook identities) and printed tables (t₀.₉₇₅(10) = 2.228,
    /// t₀.₉₉₅(5) = 4.032, t₀.₉₇₅(30) = 2.042; from memory), and `--sigma`'s threshold.
    #[test]
    fn student_t_against_closed_forms_and_tables() {
        use std::f64::consts::PI;
        for t in [0.1f64, 0.5, 1.0, 3.0, 40.0, 1e4] {
            let cauchy = 0.5 - t.atan() / PI;
            assert!(
                (student_t_sf(t, 1.0) - cauchy).abs() < 1e-13 * cauchy.max(1e-3),
                "{t}"
            );
            let two = 0.5 * (1.0 - t / (2.0 + t * t).sqrt());
            assert!(
                (student_t_sf(t, 2.0) - two).abs() < 1e-12 * two.max(1e-3),
                "{t}"
            );
        }
        for (t, df, tail) in [
            (2.228, 10.0, 0.025),
            (4.032, 5.0, 0.005),
            (2.042, 30.0, 0.025),
        ] {
            assert!(
                (student_t_sf(t, df) - tail).abs() < 2e-4 * tail * 10.0,
                "{t} {df}"
            );
        }
        assert!((ln_gamma(5.0) - 24f64.ln()).abs() < 1e-13);
        assert!((ln_gamma(0.5) - PI.sqrt().ln()).abs() < 1e-13);
        // The threshold: sigma itself with many degrees of freedom, beyond it with few, with
        // the normal's tail.
        assert_eq!(t_threshold(4.0, f64::INFINITY), 4.0);
        assert_eq!(t_threshold(0.0, 5.0), 0.0);
        let p = crate::decompose::zero_one::normal_cdf(-4.0);
        let mut last = f64::INFINITY;
        for df in [1.0, 5.0, 31.0, 300.0, 1e6] {
            let c = t_threshold(4.0, df);
            assert!(c > 4.0 && c < last, "{df}: {c}");
            assert!((student_t_sf(c, df) / p - 1.0).abs() < 1e-8, "{df}");
            last = c;
        }
        assert!((t_threshold(4.0, 1e6) - 4.0).abs() < 1e-3);
        // Far tails, in logarithms: at one degree of freedom the quantile of a tail p is
        // cot(πp) ≈ 1/(πp) (Cauchy); it grows with sigma (it stopped near 1e12 and fell); sigma
        // 38 with 399 degrees of freedom is a number, not infinity.
        let mut last = 0.0;
        for sigma in [8.0, 10.0, 12.0, 20.0, 30.0, 37.0] {
            let c = t_threshold(sigma, 1.0);
            let p = ln_normal_tail(sigma).exp();
            assert!((c * PI * p - 1.0).abs() < 1e-6, "{sigma}: {c}");
            assert!(c > last, "{sigma}");
            last = c;
            assert!(t_threshold(sigma, 2.0) > t_threshold(sigma, 3.0));
        }
        let c = t_threshold(38.0, 399.0);
        assert!(c.is_finite() && c > 38.0 && c < 1000.0, "{c}");
        assert!((ln_normal_tail(29.999) - ln_normal_tail(30.0)).abs() < 0.05);
    }

    /// The `--sigma` whose Student-t threshold at `df` degrees of freedom is `crit`: the hand-made
    /// documents below have 4 blocks, and their arithmetic is written for a threshold of 4.
    fn sigma_at(crit: f64, df: f64) -> f64 {
        let (mut lo, mut hi) = (0.0, crit);
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if t_threshold(mid, df) < crit {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        0.5 * (lo + hi)
    }

    #[test]
    fn unpaired_rule_on_hand_made_numbers() {
        let base = with_unc(
            doc(vec![row(1.0, 1.0, 0.5, 0.25, Some(0.01))]),
            "p",
            1,
            &[],
            0.1,
        );
        // variance +0.06 > 0.0566 and > 2 % of 0.25: worse. bias² +0.05 < 4 se: unchanged.
        // expected loss −0.06: better (|d| > 4 se and > 2 % of 1).
        let mut new = with_unc(
            doc(vec![row(1.0, 0.94, 0.55, 0.31, Some(0.01))]),
            "p",
            1,
            &[],
            0.1,
        );
        new.seed = 2;
        // 4 blocks each: Welch's degrees of freedom (2·0.01²)² / (2·0.01⁴/3) = 6.
        let four = CheckOptions {
            sigma: sigma_at(4.0, 6.0),
            ..CheckOptions::default()
        };
        let r = compare(&new, &base, &four).unwrap();
        assert!((r.comparisons[2].crit - 4.0).abs() < 1e-9);
        assert_eq!(r.mode, Mode::SamePoints);
        assert_eq!(
            verdicts(&r),
            vec![
                ("expected_loss", Verdict::Better),
                ("bias_sq", Verdict::Unchanged),
                ("variance", Verdict::Worse)
            ]
        );
        assert!((r.comparisons[2].se - 0.01 * 2f64.sqrt()).abs() < 1e-15);
        assert!(r.regressed());
        assert_eq!(r.worse_terms(), vec!["variance"]);
        let text = r.to_string();
        assert!(
            text.starts_with("mode: unpaired, same evaluation points"),
            "{text}"
        );
        assert!(text.contains("REGRESSED: 1 worse (variance)"), "{text}");
        assert!(
            text.contains("[unpaired, same points: z > 4.000 and d > 2% of |base|]"),
            "{text}"
        );
        assert!(text.contains("worse   k = 1  variance"), "{text}");
        assert!(
            text.contains("0.2500 -> 0.3100  d = +0.06000 (+24.0%) ± 0.014"),
            "{text}"
        );
        assert!(
            !text.contains("bias_sq"),
            "unchanged terms are not listed: {text}"
        );
        // A 30 % margin on variance hides the +0.06 (24 %) change.
        let opts = CheckOptions {
            term_margins: vec![("variance".into(), 0.3)],
            ..four.clone()
        };
        assert!(!compare(&new, &base, &opts).unwrap().regressed());

        // Different evaluation points (random draws): se² = 2·0.01² + 2·0.1²/5 = 0.0042,
        // se = 0.064807, 4·se = 0.259: nothing is flagged any more.
        new.uncertainty.as_mut().unwrap().eval_fingerprint = "q".into();
        new.uncertainty.as_mut().unwrap().eval_seed = 7;
        let r = compare(&new, &base, &four).unwrap();
        assert_eq!(r.mode, Mode::OtherPoints);
        assert!((r.comparisons[2].se - 0.0042f64.sqrt()).abs() < 1e-15);
        assert!(r
            .comparisons
            .iter()
            .all(|c| c.verdict == Verdict::Unchanged));
        assert!(r.to_string().contains("eval_seed 7 against 1"), "{r}");
    }

    // Standard errors near 1e300 (a response of 1e152): the unpaired error √(a² + b²) was
    // infinite, every z 0 and a tripled variance read "unchanged" with exit 0 (a hostile-input
    // sweep). Now the error is computed without overflow (hypot), and one that is still infinite
    // is refused.
    #[test]
    fn unpaired_errors_near_the_float_range_do_not_hide_a_change() {
        let base = with_unc(
            doc(vec![row(1.0, 3e303, 1e303, 1e303, Some(1e302))]),
            "p",
            1,
            &[],
            0.1,
        );
        let mut new = with_unc(
            doc(vec![row(1.0, 6e303, 1e303, 4e303, Some(1e302))]),
            "p",
            1,
            &[],
            0.1,
        );
        new.seed = 2;
        let r = compare(&new, &base, &CheckOptions::default()).unwrap();
        assert!(r.regressed(), "{r}");
        assert!(r.worse_terms().iter().any(|t| t == "variance"), "{r}");
        // Two errors of 1.5e308: √(a² + b²) = 2.1e308 is past the largest float.
        let far = |el: f64, var: f64, seed: u64| {
            let mut d = with_unc(
                doc(vec![row(1.0, el, 1e303, var, Some(1.5e308))]),
                "p",
                1,
                &[],
                0.1,
            );
            d.seed = seed;
            d
        };
        let e = compare(
            &far(6e303, 4e303, 2),
            &far(3e303, 1e303, 1),
            &CheckOptions::default(),
        )
        .unwrap_err();
        assert!(e.to_string().contains("overflows"), "{e}");
    }

    // A hand-edited term of 1e300 printed its relative change and z digit by digit (hundreds of
    // characters on one line); from a million on they take the exponent form.
    #[test]
    fn huge_changes_print_compactly() {
        let base = with_unc(
            doc(vec![row(1.0, 1.0, 0.5, 0.25, Some(0.01))]),
            "p",
            1,
            &[],
            0.1,
        );
        let mut new = base.clone();
        new.seed = 2;
        // The expected loss grows with it (a run's rows satisfy ESL eq. 7.9).
        set(&mut new, "expected_loss", 1e300);
        set(&mut new, "variance", 1e300);
        let text = compare(&new, &base, &CheckOptions::default())
            .unwrap()
            .to_string();
        assert!(text.contains("(+4.0e302%)"), "{text}");
        assert!(text.contains("z = +7.1e301"), "{text}");
        assert!(text.lines().all(|l| l.len() < 300), "{text}");
    }

    // The paired jackknife by hand: D_(b) = [0.06, 0.05, 0.07, 0.06], mean 0.06,
    // Σ(D − D̄)² = 0.0002, se = √(3/4 · 0.0002) = 0.0122474 (Efron & Tibshirani 1993, eq. 11.5).
    #[test]
    fn paired_rule_on_hand_made_numbers() {
        let lo_base = [0.25, 0.26, 0.24, 0.25];
        let lo_new = [0.31, 0.31, 0.31, 0.31];
        let el = [1.0, 1.01, 0.99, 1.0];
        let base = with_unc(
            doc(vec![row(1.0, 1.0, 0.5, 0.25, Some(0.05))]),
            "p",
            1,
            &[
                ("variance", lo_base),
                ("expected_loss", el),
                ("bias_sq", el),
            ],
            0.1,
        );
        let new = with_unc(
            doc(vec![row(1.0, 1.0, 0.5, 0.31, Some(0.05))]),
            "p",
            1,
            &[("variance", lo_new), ("expected_loss", el), ("bias_sq", el)],
            0.1,
        );
        // 4 blocks: 3 degrees of freedom.
        let four = CheckOptions {
            sigma: sigma_at(4.0, 3.0),
            ..CheckOptions::default()
        };
        let r = compare(&new, &base, &four).unwrap();
        assert_eq!(r.mode, Mode::Paired);
        let v = &r.comparisons[2];
        assert_eq!(v.term, "variance");
        assert!((v.se - 0.00015f64.sqrt()).abs() < 1e-12, "{}", v.se);
        // Unpaired, the standard errors are the jackknifes of each side's own leave-outs (the
        // base's 0.0122, the new one's 0): the same change is 0.06 / 0.0122 = 4.9 of them.
        assert!((v.unpaired_se.unwrap() - 0.00015f64.sqrt()).abs() < 1e-12);
        assert_eq!(v.verdict, Verdict::Worse);
        assert!(
            (r.se_ratio().unwrap() - 0.0).abs() < 1e-12,
            "two terms have se 0"
        );
        // Equal terms with se 0: unchanged, not a division by zero.
        assert_eq!(r.comparisons[0].verdict, Verdict::Unchanged);
        assert_eq!(r.comparisons[0].z(), 0.0);
        let text = r.to_string();
        assert!(text.starts_with("mode: paired (same seed 1"), "{text}");
        assert!(
            text.contains("[paired: z > 4.000 and d > 2% of |base|]"),
            "{text}"
        );

        // A difference no block moves (se = 0) is judged by the margin alone: +0.005 on an
        // expected loss of 1 is below 2 %, +0.05 above it.
        for (shift, verdict) in [(0.005, Verdict::Unchanged), (0.05, Verdict::Worse)] {
            let mut n2 = new.clone();
            set(&mut n2, "expected_loss", 1.0 + shift);
            let u = n2.uncertainty.as_mut().unwrap();
            u.rows[0]
                .leave_out
                .insert("expected_loss".into(), pack_floats(&el.map(|x| x + shift)));
            let r = compare(&n2, &base, &CheckOptions::default()).unwrap();
            let c = &r.comparisons[0];
            assert_eq!((c.se, c.verdict), (0.0, verdict), "{r}");
            if verdict == Verdict::Worse {
                assert!(c.margin_only());
                assert!(
                    r.to_string()
                        .contains("se = 0, so by the margin alone: d > 2% of |base|"),
                    "{r}"
                );
            }
        }
    }

    #[test]
    fn refusals_by_mode() {
        let plain = doc(vec![row(1.0, 1.0, 0.5, 0.25, Some(0.01))]);
        let mut changed = plain.clone();
        set(&mut changed, "variance", 0.3);
        // Old documents (no uncertainty): identical is fine, anything else is refused.
        let r = compare(&plain, &plain, &CheckOptions::default()).unwrap();
        assert!(r.identical && r.mode == Mode::Identical);
        let e = compare(&changed, &plain, &CheckOptions::default()).unwrap_err();
        assert!(matches!(e, CheckError::MissingData(_)), "{e}");
        let msg = e.to_string();
        assert!(msg.contains("no `uncertainty` section"), "{msg}");
        assert!(
            msg.contains("rerun the result") || msg.contains("rerun the"),
            "{msg}"
        );
        let new = with_unc(changed.clone(), "p", 1, &[], 0.1);
        let e = compare(&new, &plain, &CheckOptions::default()).unwrap_err();
        assert!(
            e.to_string().contains("the baseline has no `uncertainty`"),
            "{e}"
        );

        // Different points on an evenly spaced input: refused, naming eval_seed.
        let mut even = plain.clone();
        even.scenario.inputs[0].distribution = "evenly spaced over [0, 1]".into();
        let mut even_new = changed.clone();
        even_new.scenario.inputs[0].distribution = "evenly spaced over [0, 1]".into();
        let base = with_unc(even, "p", 1, &[], 0.1);
        let new = with_unc(even_new, "q", 2, &[], 0.1);
        let e = compare(&new, &base, &CheckOptions::default()).unwrap_err();
        assert!(matches!(e, CheckError::Mismatch(_)), "{e}");
        let msg = e.to_string();
        assert!(
            msg.contains("eval_seed 2 in the result, 1 in the baseline"),
            "{msg}"
        );
        assert!(msg.contains("evenly spaced"), "{msg}");
        assert!(msg.contains("same eval_seed"), "{msg}");
        // A fixed design and tables likewise.
        for (key, value, why) in [
            ("design", "fixed", "fixed design"),
            ("eval", "design", "training design"),
            ("source", "table", "table"),
        ] {
            let mut b = plain.clone();
            let mut n = changed.clone();
            for d in [&mut b, &mut n] {
                match key {
                    "design" => d.scenario.design = value.into(),
                    "eval" => d.scenario.eval = value.into(),
                    _ => d.scenario.source = value.into(),
                }
            }
            let e = compare(
                &with_unc(n, "q", 2, &[], 0.1),
                &with_unc(b, "p", 1, &[], 0.1),
                &CheckOptions::default(),
            )
            .unwrap_err();
            assert!(e.to_string().contains(why), "{e}");
        }
        // Same eval_seed, different points: the data changed.
        let e = compare(
            &with_unc(changed.clone(), "q", 1, &[], 0.1),
            &with_unc(plain.clone(), "p", 1, &[], 0.1),
            &CheckOptions::default(),
        )
        .unwrap_err();
        assert!(e.to_string().contains("data changed"), "{e}");
        // Written by two versions: the message says either may be why.
        let mut older = plain.clone();
        older.version = "0.0.1".into();
        let e = compare(
            &with_unc(changed.clone(), "q", 1, &[], 0.1),
            &with_unc(older, "p", 1, &[], 0.1),
            &CheckOptions::default(),
        )
        .unwrap_err();
        assert!(
            e.to_string()
                .contains("computes them otherwise than 0.0.1 did"),
            "{e}"
        );
        // Paired without leave-one-block-out values (a single block): cannot judge.
        let mut one = plain.clone();
        one.points[0].stderr.iter_mut().for_each(|s| s.1 = f64::NAN);
        let mut one_new = changed.clone();
        one_new.points[0]
            .stderr
            .iter_mut()
            .for_each(|s| s.1 = f64::NAN);
        let e = compare(
            &with_unc(one_new, "p", 1, &[], 0.1),
            &with_unc(one, "p", 1, &[], 0.1),
            &CheckOptions::default(),
        )
        .unwrap_err();
        assert!(e.to_string().contains("at least 2 replicate blocks"), "{e}");
    }

    #[test]
    fn scenario_mismatches_and_rows() {
        let base = doc(vec![
            row(1.0, 1.0, 0.5, 0.25, None),
            row(2.0, 1.0, 0.5, 0.25, None),
        ]);
        let mut other = base.clone();
        other.scenario.name = "renamed".into();
        other.scenario.about = "reworded".into();
        let r = compare(&other, &base, &CheckOptions::default()).expect("comparable");
        assert!(r.identical, "a new name or description changes no number");
        let mut other = base.clone();
        other.scenario.train_size = 20;
        let e = compare(&other, &base, &CheckOptions::default()).unwrap_err();
        assert_eq!(
            e.to_string(),
            "cannot compare: scenario.train_size differs: 20 in the result, 10 in the baseline"
        );
        // A section names its first differing field (a twin baseline written before
        // `jitter_variance` was refused with two clipped values that began alike).
        let twin = |jv: Option<&str>| crate::report::twin::TwinEcho {
            reference: "blend".into(),
            twice: true,
            input_weights: Vec::new(),
            inputs: Vec::new(),
            cv_r2: Vec::new(),
            sharpen: None,
            jitter: 1.0,
            jitter_variance: jv.map(str::to_string),
            noise: None,
            varying_noise: false,
            fidelity: None,
            recommended: Vec::new(),
        };
        let (mut a, mut b) = (base.clone(), base.clone());
        a.scenario.twin = Some(twin(Some("table")));
        b.scenario.twin = Some(twin(None));
        let e = compare(&a, &b, &CheckOptions::default()).unwrap_err();
        assert!(
            e.to_string()
                .starts_with("cannot compare: scenario.twin.jitter_variance differs: "),
            "{e}"
        );
        // The recommended pick is what `twin` measured, not the run's: one written with
        // `--fidelity 0` (none) compares with one that has it.
        let (mut a, mut b) = (base.clone(), base.clone());
        a.scenario.twin = Some(twin(None));
        let mut with_pick = twin(None);
        with_pick.fidelity = Some(crate::report::twin::FidelityEcho {
            tables: 1,
            replicates: 10,
            twin_replicates: Some(200),
            models: vec![crate::report::twin::FidelityModelEcho {
                family: "tree".into(),
                knob: "max_depth".into(),
                pick: 3.0,
                one_se: vec![3.0],
                picks: vec![3.0],
                in_one_se: 1.0,
                curve_error: 0.1,
                corrected_pick: 3.0,
                grid: vec![3.0],
                loss: vec![0.5],
                corrected_loss: vec![0.5],
            }],
        });
        with_pick.recommended = vec![crate::report::twin::RecommendedPick {
            family: "tree".into(),
            knob: "max_depth".into(),
            value: 3.0,
            basis: "twin-lowest".into(),
            twin_lowest: 3.0,
            bias_corrected: Some(3.0),
        }];
        b.scenario.twin = Some(with_pick);
        assert!(compare(&a, &b, &CheckOptions::default()).unwrap().identical);
        // ... and a list its first differing entry (inputs whose descriptions begin alike).
        let (mut a, b) = (base.clone(), base.clone());
        a.scenario.inputs[0].distribution = "lognormal(meanlog 0, sdlog 1)".into();
        let e = compare(&a, &b, &CheckOptions::default()).unwrap_err();
        assert!(
            e.to_string()
                .starts_with("cannot compare: scenario.inputs[0] differs: "),
            "{e}"
        );
        let mut other = base.clone();
        other.scenario.grid = vec![1.0, 3.0];
        other.points[1].value = 3.0;
        other.best = crate::report::best_of(&other.points);
        let e = compare(&other, &base, &CheckOptions::default()).unwrap_err();
        assert!(
            e.to_string().starts_with("cannot compare: grid differs"),
            "{e}"
        );
        let mut other = base.clone();
        other.loss = "zero_one".into();
        // A loss edited alone leaves rows without the 0-1 loss's intervals, which is refused as
        // an edited document before the comparison; either way the two are not compared.
        let r = compare(&other, &base, &CheckOptions::default());
        assert!(
            matches!(
                r,
                Err(CheckError::Mismatch(_)) | Err(CheckError::BadDocument(_))
            ),
            "{r:?}"
        );
        // Replicates, blocks, seed and eval_seed may differ.
        let mut other = base.clone();
        other.replicates = 16;
        other.scenario.blocks = 8;
        other.scenario.eval_seed = Some(3);
        other.seed = 9;
        assert!(compare(&other, &base, &CheckOptions::default()).is_ok());
        // Rows are matched by (family, size, value), not by position.
        let mut swapped = base.clone();
        swapped.points.reverse();
        let r = compare(&swapped, &base, &CheckOptions::default()).unwrap();
        assert!(r.identical);
        // A row the document cannot hold is refused before rows are matched.
        let mut sized = base.clone();
        sized.version = env!("CARGO_PKG_VERSION").into();
        sized.points[1].train_size = Some(50);
        let e = compare(&sized, &base, &CheckOptions::default()).unwrap_err();
        assert_eq!(
            e.to_string(),
            format!(
                "the result: `points[1]` (k = 2, n = 50): `train_size` is 50, but the document \
                 has one training size (no `sizes`); {EDITED}"
            )
        );
    }

    /// `validate` (every reader's check) refuses documents `run` cannot have written, naming
    /// the key; `parse_result` and `compare` apply it.
    #[test]
    fn validate_names_the_first_bad_key() {
        let good = with_unc(
            doc(vec![
                row(1.0, 1.0, 0.5, 0.25, Some(0.01)),
                row(2.0, 0.9, 0.4, 0.25, Some(0.01)),
            ]),
            "p",
            1,
            &[("variance", [0.25; 4])],
            0.1,
        );
        validate(&good).unwrap();
        let text = serde_json::to_string(&good).unwrap();
        assert_eq!(parse_result(&text, "r.json").unwrap(), good);
        let refused = |f: &dyn Fn(&mut ResultDoc), needle: &str| {
            let mut d = good.clone();
            f(&mut d);
            let e = validate(&d).unwrap_err();
            assert!(e.contains(needle), "{e}");
            assert!(!e.contains('\n'), "{e}");
            let e = parse_result(&serde_json::to_string(&d).unwrap(), "r.json")
                .unwrap_err()
                .to_string();
            assert!(e.starts_with("r.json: ") && e.contains(needle), "{e}");
            let e = compare(&d, &good, &CheckOptions::default()).unwrap_err();
            assert!(e.to_string().contains(needle), "{e}");
        };
        refused(&|d| d.loss = "wobble".into(), "`loss` is `wobble`");
        refused(
            &|d| d.points[1].terms.retain(|t| t.0 != "bias_sq"),
            "`points[1]` (k = 2): no `bias_sq`",
        );
        refused(
            &|d| d.points[0].stderr.retain(|t| t.0 != "variance"),
            "`points[0]` (k = 1): no `stderr.variance`",
        );
        refused(
            &|d| d.points[0].family = Some("g".into()),
            "`points[0]` (g k = 1): `family` is `g`",
        );
        refused(
            &|d| d.scenario.grid = vec![1.0, 2.0, 3.0],
            "`points` have no row for k = 3",
        );
        refused(
            &|d| d.best.value = 1.0,
            "`best.expected_loss` is 0.9, but its row's is 1",
        );
        refused(
            &|d| d.best.within_one_se = vec![7.0],
            "`best.within_one_se` holds 7",
        );
        // Sweep 67: an edited spread hid a regression in a comparison at other points.
        refused(
            &|d| {
                d.uncertainty.as_mut().unwrap().rows[0]
                    .point_sd
                    .insert("variance".into(), 10.0);
            },
            "`uncertainty.rows[0]`: the spread of `variance` across evaluation points is 10, more \
             than a term that is never negative can have with a mean of 0.25 over 5 points (at \
             most 0.5590169943749475)",
        );
        refused(
            &|d| d.uncertainty.as_mut().unwrap().rows.truncate(1),
            "`uncertainty.rows` has 1 entries for 2 points",
        );
        refused(
            &|d| {
                d.uncertainty.as_mut().unwrap().rows[1].leave_out.insert(
                    "variance".into(),
                    pack_floats(&[0.1, f64::INFINITY, 0.1, 0.1]),
                );
            },
            "`uncertainty.rows[1].leave_out.variance` holds a number that is not finite",
        );
        refused(
            &|d| {
                d.uncertainty.as_mut().unwrap().rows[0]
                    .leave_out
                    .insert("noise".into(), pack_floats(&[0.25; 4]));
            },
            "`uncertainty.rows[0].leave_out.noise` is of no term with a standard error",
        );
        // A standard error that could not be computed (`null`, results of earlier versions)
        // still reads: its leave-one-block-out values need not be finite.
        let mut old = good.clone();
        old.points[1].stderr.iter_mut().for_each(|s| s.1 = f64::NAN);
        old.best = crate::report::best_of(&old.points);
        for t in [
            "variance",
            "expected_loss",
            "bias_sq",
            "expected_loss_direct",
        ] {
            old.uncertainty.as_mut().unwrap().rows[1]
                .leave_out
                .insert(t.into(), pack_floats(&[f64::NAN; 4]));
        }
        validate(&old).unwrap();
        // ... but a null beside leave-outs whose jackknife is a number is not what `run` writes.
        let mut hidden = good.clone();
        hidden.points[1]
            .stderr
            .iter_mut()
            .for_each(|s| s.1 = f64::NAN);
        hidden.best = crate::report::best_of(&hidden.points);
        let e = validate(&hidden).unwrap_err();
        assert!(e.contains("is null, not the jackknife"), "{e}");
    }

    #[test]
    fn margins_parse() {
        assert_eq!(parse_margin("2%").unwrap(), 0.02);
        assert_eq!(parse_margin("0.05").unwrap(), 0.05);
        assert!(parse_margin("-1%").unwrap_err().contains("negative"));
        assert!(parse_margin("abc").is_err());
        // A bare 5 was the fraction 5 (500%); it is refused with both readings named.
        let five = parse_margin("5").unwrap_err();
        assert!(five.contains("`5%`") && five.contains("`500%`"), "{five}");
        assert_eq!(parse_margin("500%").unwrap(), 5.0);
        assert_eq!(parse_margin("0.99").unwrap(), 0.99);
        assert_eq!(pct(0.07), "7%");
        assert_eq!(pct(0.005), "0.5%");
        assert_eq!(
            parse_term_margin("variance=5%").unwrap(),
            ("variance".to_string(), 0.05)
        );
        assert_eq!(
            parse_term_margin("kohavi_wolpert.bias_sq=1%").unwrap().0,
            "kohavi_wolpert.bias_sq"
        );
        assert!(parse_term_margin("varaince=5%")
            .unwrap_err()
            .contains("unknown term"));
        assert!(parse_term_margin("variance").is_err());
    }

    /// Documents of two versions that cannot be compared: the refusal says the difference may
    /// be the version's, and how to move the baseline on.
    #[test]
    fn a_mismatch_across_versions_says_how_to_move_on() {
        let base = doc(vec![row(1.0, 1.0, 0.5, 0.25, Some(0.01))]);
        let mut new = base.clone();
        new.knob = "k2".into();
        let same = compare(&new, &base, &CheckOptions::default()).unwrap_err();
        assert!(!same.to_string().contains("written by lossprism"), "{same}");
        new.version = "9.9.9".into();
        let other = compare(&new, &base, &CheckOptions::default())
            .unwrap_err()
            .to_string();
        assert!(other.contains("knob differs"), "{other}");
        assert!(
            other.contains("the baseline was written by lossprism 0, the result by 9.9.9"),
            "{other}"
        );
        assert!(other.contains("check --update"), "{other}");
    }

    #[test]
    fn documents_round_trip_through_json() {
        let d = with_unc(
            doc(vec![row(1.0, 1.0, 0.5, 0.25, Some(0.01))]),
            "p",
            1,
            &[("variance", [1.0, 2.0, 3.0, 4.0])],
            0.1,
        );
        let text = crate::report::to_json(&d);
        assert_eq!(parse_result(&text, "x").unwrap(), d);
        assert!(parse_result("{}", "x").is_err());
        assert!(parse_result("{\"format\": \"lossprism-part/1\"}", "x")
            .unwrap_err()
            .to_string()
            .contains("merge"));
    }
}
