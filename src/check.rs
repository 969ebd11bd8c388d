//! Comparing a result document with a baseline (`lossprism check`): refusal when the two are
//! not runs of the same scenario, "identical" when every number agrees bit for bit, otherwise a
//! statistical verdict per grid value and term. Pure: no I/O (the caller reads and writes files).
//!
//! # The rule
//!
//! For every grid value and every term (squared loss: `expected_loss`, `bias_sq`, `variance`;
//! 0-1 loss: `expected_loss`, `bias`, `variance`, `net_variance`, `kohavi_wolpert.bias_sq`,
//! `kohavi_wolpert.variance`, `james.systematic_effect`, `james.variance_effect`; larger is worse
//! for all of them) let `d = new − base` and `se = √(se_new² + se_base²)`, the standard error of
//! a difference of two independent estimates. The term is
//!
//! - **worse** when `d > sigma·se` and `d > margin·|base|`,
//! - **better** when `d < −sigma·se` and `|d| > margin·|base|`,
//! - **unchanged** otherwise.
//!
//! `sigma` (default 4) bounds false alarms from Monte Carlo noise: under no change, `d/se` is
//! approximately standard normal, so each term is flagged with probability about `1 − Φ(sigma)`
//! (3.2e-5 at 4). `margin` (default 2 %, per term overridable) ignores changes too small to
//! matter in practice, however precisely measured.
//!
//! # Same seed or fresh seeds
//!
//! Two runs with the same seed and replicates draw the same training sets, so an unchanged
//! estimator gives bit-identical documents and the check says "identical": any change at all in
//! the estimator's output shows. The independence formula for `se` then ignores the positive
//! correlation that common training sets induce between the two runs (the variance of `d` is
//! `se_new² + se_base² − 2·cov`, with `cov > 0` for estimators that respond alike to the same
//! data), so the standard error is overstated and the test is conservative: fewer false alarms,
//! less power. With fresh seeds the runs are independent and the rule has its nominal level.

use std::fmt;

use crate::decompose::{self, Shape};
use crate::fmt::{fmt_num, fmt_se, fmt_value};
use crate::report::{PointRow, ResultDoc, FORMAT};

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
        for (t, m) in &self.term_margins {
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

/// Parses a margin: `2%` (percent) or `0.02` (a fraction).
pub fn parse_margin(s: &str) -> Result<f64, String> {
    let t = s.trim();
    let (num, scale) = match t.strip_suffix('%') {
        Some(n) => (n.trim(), 0.01),
        None => (t, 1.0),
    };
    match num.parse::<f64>() {
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
                "{what}: format `{other}` is not a result document (`{FORMAT}`){}",
                if other.contains("part") {
                    "; merge shard parts with `lossprism merge` first"
                } else {
                    ""
                }
            )))
        }
        None => {
            return Err(CheckError::BadDocument(format!(
                "{what}: no `format` field; expected a result document written by `lossprism run --out`"
            )))
        }
    }
    serde_json::from_value(v)
        .map_err(|e| CheckError::BadDocument(format!("{what}: malformed result document: {e}")))
}

/// Verdict on one term at one grid value.
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

/// One term at one grid value.
#[derive(Debug, Clone, PartialEq)]
pub struct Comparison {
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
    /// Standard error of the difference, `√(se_new² + se_base²)` (0 when identical).
    pub se: f64,
    /// The verdict.
    pub verdict: Verdict,
}

impl Comparison {
    /// `diff / se` (±∞ when `se` is 0 and the values differ).
    pub fn z(&self) -> f64 {
        if self.diff == 0.0 {
            0.0
        } else {
            self.diff / self.se
        }
    }
}

/// The outcome of a comparison.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckReport {
    /// Knob name.
    pub knob: String,
    /// Every term and standard error equals the baseline exactly.
    pub identical: bool,
    /// The thresholds used.
    pub options: CheckOptions,
    /// Every comparison, grid value by grid value.
    pub comparisons: Vec<Comparison>,
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
        let moved: Vec<&Comparison> = self
            .comparisons
            .iter()
            .filter(|c| c.verdict != Verdict::Unchanged)
            .collect();
        if !moved.is_empty() {
            let header = [
                self.knob.clone(),
                "term".into(),
                "baseline".into(),
                "new".into(),
                "change".into(),
                "se".into(),
                "z".into(),
                "verdict".into(),
            ];
            let rows: Vec<[String; 8]> = moved
                .iter()
                .map(|c| {
                    let rel = if c.baseline != 0.0 {
                        format!(" ({:+.1}%)", 100.0 * c.diff / c.baseline.abs())
                    } else {
                        String::new()
                    };
                    [
                        fmt_value(c.value),
                        c.term.to_string(),
                        fmt_num(c.baseline),
                        fmt_num(c.new),
                        format!(
                            "{}{}{rel}",
                            if c.diff > 0.0 { "+" } else { "" },
                            fmt_num(c.diff)
                        ),
                        fmt_se(c.se),
                        format!("{:+.1}", c.z()),
                        c.verdict.word().to_string(),
                    ]
                })
                .collect();
            let mut w = [0usize; 8];
            for r in std::iter::once(&header).chain(rows.iter()) {
                for (i, cell) in r.iter().enumerate() {
                    w[i] = w[i].max(cell.chars().count());
                }
            }
            let line = |f: &mut fmt::Formatter<'_>, r: &[String; 8]| -> fmt::Result {
                let mut s = String::new();
                for (i, cell) in r.iter().enumerate() {
                    let pad = w[i] - cell.chars().count();
                    if i == 0 || i == 1 || i == 7 {
                        s.push_str(cell);
                        s.push_str(&" ".repeat(pad));
                    } else {
                        s.push_str(&" ".repeat(pad));
                        s.push_str(cell);
                    }
                    if i < 7 {
                        s.push_str("  ");
                    }
                }
                writeln!(f, "{}", s.trim_end())
            };
            line(f, &header)?;
            for r in &rows {
                line(f, r)?;
            }
        }
        let worse = self.worse().count();
        let better = self.better().count();
        let unchanged = n - worse - better;
        let rule = format!(
            "sigma = {}, margin = {}%",
            self.options.sigma,
            100.0 * self.options.margin
        );
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

/// Value and standard error of a term in a row. Outer `None`: the term is absent from the row.
fn term_of(row: &PointRow, term: &str) -> Option<(f64, Option<f64>)> {
    row.has(term).then(|| (row.get(term), row.se(term)))
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
    let ea = serde_json::to_value(&new.scenario).unwrap_or_default();
    let eb = serde_json::to_value(&base.scenario).unwrap_or_default();
    if let (Some(ma), Some(mb)) = (ea.as_object(), eb.as_object()) {
        let mut keys: Vec<&String> = ma.keys().chain(mb.keys()).collect();
        keys.sort();
        keys.dedup();
        // `grid` first: the most common reason.
        keys.sort_by_key(|k| k.as_str() != "grid");
        for k in keys {
            // The number of blocks is a precision setting, like the number of replicates.
            if k == "blocks" {
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
                return Some(format!(
                    "{what} differs: {} in the result, {} in the baseline",
                    show(va.unwrap_or(&null)),
                    show(vb.unwrap_or(&null))
                ));
            }
        }
    }
    // A table source: the same data and resampling (Monte Carlo shares and the file's location
    // may differ).
    let ta = serde_json::to_value(&new.table).unwrap_or_default();
    let tb = serde_json::to_value(&base.table).unwrap_or_default();
    match (ta.as_object(), tb.as_object()) {
        (Some(ma), Some(mb)) => {
            let skip = ["path", "held_out_share", "held_out_share_stderr"];
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
    if new.points.len() != base.points.len()
        || new
            .points
            .iter()
            .zip(&base.points)
            .any(|(a, b)| a.value != b.value)
    {
        return Some("the grid values of the rows differ".into());
    }
    None
}

/// Compares `new` with `baseline`; see the [module documentation](self) for the rule.
///
/// Errors: [`CheckError::Mismatch`] when the documents are not runs of the same scenario
/// (scenario, family, knob, grid or loss differ; replicates, blocks and seed may differ),
/// [`CheckError::MissingStderr`] when a standard error needed for a verdict is `null` (runs
/// with a single replicate block), [`CheckError::Options`] for bad thresholds.
pub fn compare(
    new: &ResultDoc,
    baseline: &ResultDoc,
    opts: &CheckOptions,
) -> Result<CheckReport, CheckError> {
    opts.validate()?;
    for (d, what) in [(new, "result"), (baseline, "baseline")] {
        if d.format != FORMAT {
            return Err(CheckError::BadDocument(format!(
                "the {what} has format `{}`, expected `{FORMAT}`",
                d.format
            )));
        }
    }
    if let Some(m) = mismatch(new, baseline) {
        return Err(CheckError::Mismatch(m));
    }
    if decompose::by_name(&new.loss).is_none() {
        return Err(CheckError::BadDocument(format!(
            "unknown loss `{}` in the result",
            new.loss
        )));
    }
    let terms = compared_terms(new);
    let identical = new.points == baseline.points;
    let mut comparisons = Vec::new();
    for (a, b) in new.points.iter().zip(&baseline.points) {
        for term in &terms {
            let term = term.as_str();
            let at = || format!("`{term}` at {} = {}", new.knob, fmt_value(a.value));
            let (ta, tb) = (term_of(a, term), term_of(b, term));
            let ((va, sa), (vb, sb)) = match (ta, tb) {
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
            if identical {
                comparisons.push(Comparison {
                    value: a.value,
                    term: term.to_string(),
                    baseline: vb,
                    new: va,
                    diff,
                    se: 0.0,
                    verdict: Verdict::Unchanged,
                });
                continue;
            }
            let (sa, sb) = match (sa, sb) {
                (Some(x), Some(y)) => (x, y),
                (x, _) => {
                    let which = if x.is_none() { "result" } else { "baseline" };
                    return Err(CheckError::MissingStderr(format!(
                        "the standard error of {} is missing (null) in the {which}: \
                         standard errors need runs with at least 2 replicate blocks and at \
                         least 3 replicates (the jackknife leaves one block out and needs 2 \
                         replicates in the rest): rerun with `replicates` >= 3 and `blocks` >= 2",
                        at()
                    )));
                }
            };
            let se = (sa * sa + sb * sb).sqrt();
            let margin = opts.margin_for(term) * vb.abs();
            let verdict = if diff > opts.sigma * se && diff > margin {
                Verdict::Worse
            } else if diff < -opts.sigma * se && diff.abs() > margin {
                Verdict::Better
            } else {
                Verdict::Unchanged
            };
            comparisons.push(Comparison {
                value: a.value,
                term: term.to_string(),
                baseline: vb,
                new: va,
                diff,
                se,
                verdict,
            });
        }
    }
    Ok(CheckReport {
        knob: new.knob.clone(),
        identical,
        options: opts.clone(),
        comparisons,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(value: f64, el: f64, b2: f64, var: f64, se: Option<f64>) -> serde_json::Value {
        serde_json::json!({
            "value": value, "expected_loss": el, "bias_sq": b2, "variance": var,
            "noise": 0.25, "expected_loss_direct": el,
            "stderr": { "expected_loss": se, "bias_sq": se, "variance": se,
                        "expected_loss_direct": se }
        })
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
        serde_json::from_value(v).expect("a valid result document")
    }

    // Hand-computed cases of the rule: se = √(0.01² + 0.01²) = 0.014142; 4·se = 0.056569.
    #[test]
    fn rule_on_hand_made_numbers() {
        let base = doc(vec![row(1.0, 1.0, 0.5, 0.25, Some(0.01))]);
        // variance +0.06 > 0.0566 and > 2 % of 0.25: worse. bias² +0.05 < 4 se: unchanged.
        // expected loss −0.06: better (|d| > 4 se and > 2 % of 1).
        let new = doc(vec![row(1.0, 0.94, 0.55, 0.31, Some(0.01))]);
        let r = compare(&new, &base, &CheckOptions::default()).unwrap();
        let v: Vec<_> = r
            .comparisons
            .iter()
            .map(|c| (c.term.as_str(), c.verdict))
            .collect();
        assert_eq!(
            v,
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
        assert!(text.contains("REGRESSED: 1 worse (variance)"), "{text}");
        assert!(
            !text.contains("bias_sq"),
            "unchanged terms are not listed: {text}"
        );
        // A 30 % margin on variance hides the +0.06 (24 %) change.
        let opts = CheckOptions {
            term_margins: vec![("variance".into(), 0.3)],
            ..CheckOptions::default()
        };
        assert!(!compare(&new, &base, &opts).unwrap().regressed());
    }

    #[test]
    fn identical_refusals_and_missing_stderr() {
        let base = doc(vec![
            row(1.0, 1.0, 0.5, 0.25, None),
            row(2.0, 1.0, 0.5, 0.25, None),
        ]);
        let r = compare(&base, &base, &CheckOptions::default()).unwrap();
        assert!(r.identical && !r.regressed());
        assert!(r.to_string().starts_with("identical"));
        // Null standard errors: identical documents are fine, different ones cannot be judged.
        let mut new = base.clone();
        new.points[0].terms[2].1 = 0.3;
        let e = compare(&new, &base, &CheckOptions::default()).unwrap_err();
        assert!(matches!(e, CheckError::MissingStderr(_)), "{e}");
        assert!(e.to_string().contains("at least 2 replicate blocks"));

        let mut other = base.clone();
        other.scenario.train_size = 20;
        let e = compare(&other, &base, &CheckOptions::default()).unwrap_err();
        assert_eq!(
            e.to_string(),
            "cannot compare: scenario.train_size differs: 20 in the result, 10 in the baseline"
        );
        let mut other = base.clone();
        other.scenario.grid = vec![1.0, 3.0];
        let e = compare(&other, &base, &CheckOptions::default()).unwrap_err();
        assert!(
            e.to_string().starts_with("cannot compare: grid differs"),
            "{e}"
        );
        let mut other = base.clone();
        other.loss = "zero_one".into();
        assert!(matches!(
            compare(&other, &base, &CheckOptions::default()),
            Err(CheckError::Mismatch(_))
        ));
        // Replicates, blocks and seed may differ.
        let mut other = base.clone();
        other.replicates = 16;
        other.scenario.blocks = 8;
        other.seed = 9;
        assert!(compare(&other, &base, &CheckOptions::default()).is_ok());
    }

    #[test]
    fn margins_parse() {
        assert_eq!(parse_margin("2%").unwrap(), 0.02);
        assert_eq!(parse_margin("0.05").unwrap(), 0.05);
        assert!(parse_margin("-1%").is_err());
        assert!(parse_margin("abc").is_err());
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

    #[test]
    fn documents_round_trip_through_json() {
        let d = doc(vec![row(1.0, 1.0, 0.5, 0.25, Some(0.01))]);
        let text = crate::report::to_json(&d);
        assert_eq!(parse_result(&text, "x").unwrap(), d);
        assert!(parse_result("{}", "x").is_err());
        assert!(parse_result("{\"format\": \"lossprism-part/1\"}", "x")
            .unwrap_err()
            .to_string()
            .contains("merge"));
    }
}
