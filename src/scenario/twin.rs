//! Planning a `source = "twin"` section: loads the table, refits the reference whose recipe
//! `reference` records (see [`crate::dgp::reference`]), fits the smoothed bootstrap of the rows
//! (`jitter`, see [`crate::dgp::twin`]) and builds the synthetic process whose inputs come from
//! the table's rows. [`build`] does the same for a table in memory (the fidelity check of
//! `lossprism twin` twins tables drawn from a twin).

use std::path::Path;
use std::sync::Arc;

use crate::dataset::{self, Missing, Table, TableOptions, TargetKind};
use crate::dgp::reference::{metric_problem, Candidate, Choice, ForestParams, Reference};
use crate::dgp::twin::{FidelityModel, FidelityRecord, FitReport, Jitter, NoiseRecord};
use crate::dgp::{
    standardized_residuals, ClassKind, ClassModel, Input, InputDist, Noise, NoiseShape, Response,
    Synthetic, Truth,
};
use crate::error::ScenarioError;
use crate::family::Task;
use crate::scenario::plan::{shape_choice, ShapeChoice};
use crate::scenario::spec::{DataSpec, FitReportSpec, ReferenceSpec};
use crate::scenario::{Design, SyntheticPlan};

/// Largest number of trees a reference forest may have.
pub const MAX_TREES: i64 = 10_000;

/// Largest jitter multiplier.
pub const MAX_JITTER: f64 = 10.0;

/// A twin's noise (regression).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum TwinNoise {
    /// A constant standard deviation (the noise's law is [`TwinSpec::shape`]).
    Constant(f64),
    /// σ²(x) from the reference's k-NN smoothed squared residuals.
    Varying {
        /// Neighbours σ²(x) averages (`smooth_k`; the recipe's k when `None`).
        smooth_k: Option<usize>,
        /// σ²(x)'s mean over the table's rows (`level`; unscaled when `None`).
        level: Option<f64>,
    },
}

/// Smallest temperature a classification twin's reference takes (`[data.classes]
/// temperature`): below it the shares are all but 0 or 1.
pub const TEMPERATURE_MIN: f64 = 0.05;

/// Everything a twin process needs besides its table.
#[derive(Debug, Clone)]
pub struct TwinSpec {
    /// The reference's recipe.
    pub choice: Choice,
    /// The smoothed bootstrap's multiplier c (0: rows as they are).
    pub jitter: f64,
    /// Each jittered column keeps the table's variance ([`Jitter::fit_keeping`]).
    pub keep_variance: bool,
    /// The noise (regression; `None` for classes).
    pub noise: Option<TwinNoise>,
    /// The law of the standardized noise (regression).
    pub shape: ShapeChoice,
    /// Training size n (the largest of `sizes`).
    pub train_size: usize,
    /// The training sizes of a learning curve (ascending; one entry for a single size).
    pub sizes: Vec<usize>,
    /// Evaluation points m.
    pub eval_size: usize,
    /// Random or fixed design.
    pub design: Design,
    /// Evaluate at the training inputs (fixed design only).
    pub eval_at_design: bool,
    /// Classes: the temperature that sharpens the reference's class shares (1: as they are).
    pub temperature: f64,
    /// What `lossprism twin` measured (echoed).
    pub report: Option<FitReport>,
    /// `--memory-limit` in bytes, if given: a reference larger than it is refused unfitted.
    pub memory_limit: Option<u64>,
}

/// Why [`build`] failed (one line each).
#[derive(Debug, Clone, PartialEq)]
pub enum BuildError {
    /// The reference: its recipe lacks a part it needs, or its fit failed.
    Reference(String),
    /// The pool of `shape = "residuals"` ([`residual_pool`]): the reference leaves no residual
    /// spread to resample.
    Shape(String),
    /// Varying noise's `smooth_k` or `level` ([`Reference::set_varying`]): say, a level on
    /// squared residuals that are all 0, or one that overflows.
    Noise(String),
}

impl BuildError {
    /// The message, whichever part failed.
    pub fn message(self) -> String {
        match self {
            BuildError::Reference(m) | BuildError::Shape(m) | BuildError::Noise(m) => m,
        }
    }
}

/// The largest sum of a blend's weights a twin file may hold (a sanity bound, no source:
/// `twin` writes weights summing to 1 since 0.3.9, and the free sums it wrote before came to
/// 0.05-1.10 on nine tables whose responses lie near 0; an edit that doubles the truth sums to
/// 2). Smaller sums are left alone, since files written before 0.3.9 hold them honestly.
pub const BLEND_SUM_MAX: f64 = 1.5;

/// Why a reference of `choice` on `rows` × `p` cannot be fitted: its
/// [`fitted_bytes`](crate::dgp::reference::fitted_bytes) above `limit` (`--memory-limit`, which
/// the whole run must also fit in, and which replaces the memory available), or else above half
/// of the `avail` bytes available (the run needs the rest), in words; `None` when it fits or
/// neither is known.
pub fn memory_problem(
    choice: &Choice,
    rows: usize,
    p: usize,
    classes: usize,
    avail: Option<u64>,
    limit: Option<u64>,
) -> Option<String> {
    let need = crate::dgp::reference::fitted_bytes(choice, rows, p, classes);
    if let Some(limit) = limit.filter(|&l| need > l as f64) {
        return Some(format!(
            "the reference would take about {} fitted on {rows} rows ({}), more than the \
             --memory-limit of {}: a recipe with fewer `trees` or a larger `min_leaf`, or a \
             larger limit, fits",
            crate::fmt::fmt_bytes(need),
            describe_size(choice),
            crate::fmt::fmt_bytes(limit as f64)
        ));
    }
    // A limit replaces the memory available, as it does for the whole run (to go ahead anyway).
    let avail = if limit.is_some() { None } else { avail }?;
    (need > avail as f64 / 2.0).then(|| {
        format!(
            "the reference would take about {} fitted on {rows} rows ({}), more than half of the \
             {} of memory available: a recipe with fewer `trees` or a larger `min_leaf` (or, for \
             `lossprism twin`, a smaller table or `--reference` of another candidate) fits",
            crate::fmt::fmt_bytes(need),
            describe_size(choice),
            crate::fmt::fmt_bytes(avail as f64)
        )
    })
}

/// The parts of a recipe that set its size, in words (`10000 trees, min_leaf = 1, twiced`).
fn describe_size(c: &Choice) -> String {
    let mut parts = Vec::new();
    if let Some(f) = c.forest.filter(|_| c.weights[1] > 0.0) {
        parts.push(format!("{} trees, min_leaf = {}", f.trees, f.min_leaf));
    }
    if let Some(t) = c.tree {
        parts.push(format!("a tree of depth {}", t.depth));
    }
    if c.twice {
        parts.push("twiced".into());
    }
    if parts.is_empty() {
        parts.push("its copies of the table".into());
    }
    parts.join(", ")
}

/// The twin process of table `t` (`shown`: the table's name in descriptions). Errors (one line)
/// when the recipe lacks a part it needs, or when resampled residuals have nothing to resample.
pub fn build(t: &Table, shown: &str, spec: &TwinSpec) -> Result<SyntheticPlan, BuildError> {
    let classes = match t.task {
        Task::Classify { classes } => classes,
        Task::Regress => 0,
    };
    let varying = matches!(spec.noise, Some(TwinNoise::Varying { .. }));
    // Before the fit allocates: a recipe (edited by hand, say, to 10 000 trees) must fit in the
    // memory available, with the run beside it.
    if let Some(m) = memory_problem(
        &spec.choice,
        t.rows(),
        t.x.ncols(),
        classes,
        crate::codec::available_memory(),
        spec.memory_limit,
    ) {
        return Err(BuildError::Reference(m));
    }
    let mut fitted_ref = Reference::fit(
        t.x.view(),
        t.y.view(),
        classes,
        &spec.choice,
        varying,
        shown,
    )
    .map_err(BuildError::Reference)?;
    if let Some(TwinNoise::Varying { smooth_k, level }) = spec.noise {
        if classes == 0 {
            fitted_ref
                .set_varying(t.x.view(), smooth_k, level)
                .map_err(BuildError::Noise)?;
        }
    }
    if classes > 0 {
        fitted_ref.temperature = spec.temperature;
    }
    fitted_ref.path = Some(t.path.clone());
    fitted_ref.report = spec.report.clone();
    fitted_ref.dropped_rows = t.dropped_rows;
    let fitted = Arc::new(fitted_ref);
    let rows_arc = Arc::new(t.x.clone());
    let jitter = (spec.jitter > 0.0).then(|| {
        Arc::new(Jitter::fit_keeping(
            t.x.view(),
            spec.jitter,
            spec.keep_variance,
        ))
    });
    let inputs: Vec<Input> = t
        .names
        .iter()
        .enumerate()
        .map(|(j, name)| Input {
            name: name.clone(),
            dist: InputDist::Empirical {
                rows: rows_arc.clone(),
                column: j,
                source: shown.to_string(),
                jitter: jitter.clone(),
            },
        })
        .collect();
    let response = if classes > 0 {
        Response::Classes(ClassModel {
            labels: t.labels.clone(),
            kind: ClassKind::Reference(fitted),
        })
    } else {
        let noise = match spec.noise {
            Some(TwinNoise::Constant(sd)) => Noise::Constant(sd),
            Some(TwinNoise::Varying { .. }) => Noise::Reference(fitted.clone()),
            None => {
                return Err(BuildError::Reference(
                    "a regression twin needs a noise".into(),
                ))
            }
        };
        let shape = match spec.shape {
            ShapeChoice::Gaussian => NoiseShape::Gaussian,
            ShapeChoice::Student(df) => NoiseShape::Student(df),
            ShapeChoice::Residuals => NoiseShape::Resampled(Arc::new(
                residual_pool(t, &fitted, &noise).map_err(BuildError::Shape)?,
            )),
        };
        Response::Regression {
            truth: Truth::Reference(fitted),
            noise,
            shape,
        }
    };
    Ok(SyntheticPlan {
        process: Synthetic { inputs, response },
        train_size: spec.train_size,
        sizes: spec.sizes.clone(),
        eval_size: spec.eval_size,
        design: spec.design,
        eval_at_design: spec.eval_at_design,
    })
}

/// The pool of a twin's resampled noise: the table's in-sample residuals under the reference
/// `r`, each divided by the noise's sd at its row (constant, or σ(x) of varying noise), then
/// centred and scaled to mean square 1 ([`standardized_residuals`]).
pub fn residual_pool(t: &Table, r: &Reference, noise: &Noise) -> Result<Vec<f64>, String> {
    let f = r.mean_at_rows(t.x.view());
    let s: Vec<f64> = match noise {
        Noise::Reference(r) => r.sd_at_rows(t.x.view()).to_vec(),
        _ => vec![1.0; t.y.len()],
    };
    let y = t.y.to_vec();
    standardized_residuals(&y, &f, &s).map_err(|m| format!("`shape = \"residuals\"`: {m}"))
}

/// The recipe written in `reference`, checked against a table of `rows` rows (`classes > 0`:
/// classification, whose reference is k-NN). Errors name the key.
fn choice_of(
    r: &ReferenceSpec,
    rows: usize,
    names: &[String],
    classes: usize,
    varying: bool,
    err: &dyn Fn(std::ops::Range<usize>, &str, String) -> ScenarioError,
) -> Result<Choice, ScenarioError> {
    let inputs = names.len();
    let fam_span = r.family.span();
    let Some(family) = Candidate::from_name(r.family.get_ref()) else {
        return Err(err(
            fam_span,
            "data.reference.family",
            format!(
                "unknown reference `{}`; expected `knn`, `forest`, `loclin`, `poly` or `blend` \
                 (a classification twin: `knn`, `logit` or `tree`)",
                r.family.get_ref()
            ),
        ));
    };
    if matches!(family, Candidate::Logit | Candidate::Tree) {
        if classes == 0 {
            return Err(err(
                fam_span,
                "data.reference.family",
                format!(
                    "`{}` is a classification reference; a regression twin's is `knn`, \
                     `forest`, `loclin`, `poly` or `blend`",
                    family.name()
                ),
            ));
        }
        return class_choice_of(r, family, rows, inputs, classes, err);
    }
    if classes > 0 && family != Candidate::Knn {
        return Err(err(
            fam_span,
            "data.reference.family",
            "a classification twin's reference is `knn` (neighbour shares), `logit` (logistic \
             polynomial) or `tree` (probability tree)"
                .into(),
        ));
    }
    for (span, key) in [
        (r.ridge.as_ref().map(|v| v.span()), "ridge"),
        (r.depth.as_ref().map(|v| v.span()), "depth"),
    ] {
        if let Some(span) = span {
            return Err(err(
                span,
                &format!("data.reference.{key}"),
                format!(
                    "belongs to a classification reference (`family = \"{}\"`), not `{}`: remove it",
                    if key == "ridge" { "logit" } else { "tree" },
                    family.name()
                ),
            ));
        }
    }
    let weights = match (&r.weights, family) {
        (Some(w), Candidate::Blend) => {
            let v = w.get_ref();
            if v.blend.is_some() {
                return Err(err(
                    w.span(),
                    "data.reference.weights",
                    "takes `knn`, `forest`, `loclin` and `poly`".into(),
                ));
            }
            let ws = [
                v.knn.unwrap_or(0.0),
                v.forest.unwrap_or(0.0),
                v.loclin.unwrap_or(0.0),
                v.poly.unwrap_or(0.0),
            ];
            if ws.iter().any(|x| !(x.is_finite() && *x >= 0.0)) || ws.iter().all(|x| *x == 0.0) {
                return Err(err(
                    w.span(),
                    "data.reference.weights",
                    "must be finite numbers >= 0, at least one of them > 0".into(),
                ));
            }
            // The blend is `Σ w_j p_j`: weights summing to 2 double the twin's truth. `twin`
            // writes shares summing to 1 since 0.3.9; before, free sums (0.05-1.10 measured on
            // responses near 0, within 0.002 of 1 on responses far from it), which still run.
            let sum: f64 = ws.iter().sum();
            if sum > BLEND_SUM_MAX {
                return Err(err(
                    w.span(),
                    "data.reference.weights",
                    format!(
                        "sum to {}, but a blend's weights are shares that sum to 1 (`twin` \
                         writes them so; before 0.3.9 they summed to at most about 1.1): the twin's \
                         truth would be scaled by that sum; write the twin again, or restore \
                         the weights it wrote",
                        crate::fmt::fmt_exact(sum)
                    ),
                ));
            }
            ws
        }
        (None, Candidate::Blend) => {
            return Err(err(
                fam_span,
                "data.reference.weights",
                "a blend needs `weights = { knn = .., forest = .., loclin = .., poly = .. }` (a missing one is 0)".into(),
            ))
        }
        (Some(w), _) => {
            return Err(err(
                w.span(),
                "data.reference.weights",
                format!("belongs to `family = \"blend\"`, not `{}`", family.name()),
            ))
        }
        (None, Candidate::Knn) => [1.0, 0.0, 0.0, 0.0],
        (None, Candidate::Forest) => [0.0, 1.0, 0.0, 0.0],
        (None, Candidate::LocLin) => [0.0, 0.0, 1.0, 0.0],
        (None, Candidate::Poly) => [0.0, 0.0, 0.0, 1.0],
        // Returned by `class_choice_of` above.
        (None, Candidate::Logit | Candidate::Tree) => [0.0; 4],
    };
    // `inputs`: feature names, turned into ascending column indices.
    let kept = match &r.inputs {
        None => None,
        Some(list) => {
            let span = list.span();
            let bad = |msg: String| err(span.clone(), "data.reference.inputs", msg);
            if varying {
                return Err(bad(
                    "applies to a twin with constant noise (`sd`): varying noise's smoother \
                     sees every input; remove it"
                        .into(),
                ));
            }
            let mut cols = Vec::new();
            for name in list.get_ref() {
                let Some(j) = names.iter().position(|n| n == name) else {
                    return Err(bad(format!(
                        "names `{}`, which is not one of the table's inputs ({})",
                        crate::fmt::clip(name, 40),
                        crate::fmt::clip(&names.join(", "), 120)
                    )));
                };
                if cols.contains(&j) {
                    return Err(bad(format!("names `{}` twice", crate::fmt::clip(name, 40))));
                }
                cols.push(j);
            }
            if cols.is_empty() {
                return Err(bad("must name at least one input".into()));
            }
            cols.sort_unstable();
            Some(cols)
        }
    };
    let used_inputs = kept.as_ref().map_or(inputs, |c| c.len());
    let need = |key: &str| needs_key(&fam_span, family, key, err);
    let whole =
        |v: &toml::Spanned<i64>, key: &str, lo: i64, hi: i64| whole_key(v, key, lo, hi, err);
    // A knob of a part the recipe gives no weight is never read: refused, as a hand edit that
    // would otherwise change nothing (a `degree` on a k-NN recipe was accepted).
    let unused = |given: Option<std::ops::Range<usize>>, key: &str, part: &str, w: f64| match given
    {
        Some(span) if w == 0.0 => Err(err(
            span,
            &format!("data.reference.{key}"),
            format!(
                "belongs to the {part} part, which this `family = \"{}\"` reference {}: \
                     remove it",
                family.name(),
                if family == Candidate::Blend {
                    "gives no weight"
                } else {
                    "does not have"
                }
            ),
        )),
        _ => Ok(()),
    };
    for (span, key) in [
        (r.trees.as_ref().map(|v| v.span()), "trees"),
        (r.min_leaf.as_ref().map(|v| v.span()), "min_leaf"),
        (r.seed.as_ref().map(|v| v.span()), "seed"),
    ] {
        unused(span, key, "forest", weights[1])?;
    }
    unused(
        r.bandwidth.as_ref().map(|v| v.span()),
        "bandwidth",
        "local-linear",
        weights[2],
    )?;
    unused(
        r.degree.as_ref().map(|v| v.span()),
        "degree",
        "polynomial",
        weights[3],
    )?;
    let k = match &r.k {
        Some(k) => Some(whole(k, "k", 1, rows as i64)? as usize),
        None if weights[0] > 0.0 || classes > 0 || varying => return Err(need("k")),
        None => None,
    };
    let forest = if weights[1] > 0.0 {
        let (Some(t), Some(l), Some(s)) = (&r.trees, &r.min_leaf, &r.seed) else {
            return Err(need(if r.trees.is_none() {
                "trees"
            } else if r.min_leaf.is_none() {
                "min_leaf"
            } else {
                "seed"
            }));
        };
        Some(ForestParams {
            trees: whole(t, "trees", 1, MAX_TREES)? as usize,
            min_leaf: whole(l, "min_leaf", 1, rows as i64)? as usize,
            seed: whole(s, "seed", 0, i64::MAX)? as u64,
        })
    } else {
        None
    };
    let bandwidth = if weights[2] > 0.0 {
        let Some(h) = &r.bandwidth else {
            return Err(need("bandwidth"));
        };
        let v = *h.get_ref();
        if !(v.is_finite() && v > 0.0) {
            return Err(err(
                h.span(),
                "data.reference.bandwidth",
                format!(
                    "must be a finite number > 0, got {}",
                    crate::fmt::fmt_exact(v)
                ),
            ));
        }
        Some(v)
    } else {
        None
    };
    let degree = if weights[3] > 0.0 {
        let Some(d) = &r.degree else {
            return Err(need("degree"));
        };
        let d = whole(d, "degree", 1, crate::family::poly::MAX_DEGREE as i64)? as usize;
        match crate::family::poly::n_basis(used_inputs, d) {
            Some(c) if c <= rows => Some(d),
            _ => {
                return Err(err(
                    r.degree.as_ref().map_or(fam_span.clone(), |s| s.span()),
                    "data.reference.degree",
                    format!(
                        "degree {d} needs more polynomial coefficients with {used_inputs} \
                         input(s) than the table's {rows} rows"
                    ),
                ))
            }
        }
    } else {
        None
    };
    let twice = r.twice.unwrap_or(false);
    if twice && (classes > 0 || varying) {
        return Err(err(
            fam_span,
            "data.reference.twice",
            "twicing applies to a regression twin with constant noise (`sd`)".into(),
        ));
    }
    if twice && family == Candidate::Poly {
        return Err(err(
            fam_span,
            "data.reference.twice",
            "a polynomial reference is a least-squares projection: twicing it gives back the \
             same fit, so `lossprism twin` never writes it; remove `twice`"
                .into(),
        ));
    }
    if let Some(c) = &r.cv_r2 {
        // A candidate that was not tried has no key; a value given must be a number (it is
        // echoed in results, where NaN would read as a candidate that was never scored).
        for (name, v) in [
            ("knn", c.knn),
            ("forest", c.forest),
            ("loclin", c.loclin),
            ("poly", c.poly),
            ("blend", c.blend),
        ] {
            if let Some(v) = v.filter(|v| !v.is_finite()) {
                return Err(err(
                    fam_span,
                    &format!("data.reference.cv_r2.{name}"),
                    format!(
                        "must be a finite number, got {v} (leave the key out for a candidate that was not tried)"
                    ),
                ));
            }
        }
    }
    let cv_r2 = r.cv_r2.as_ref().map(|c| {
        [
            c.knn.unwrap_or(f64::NAN),
            c.forest.unwrap_or(f64::NAN),
            c.loclin.unwrap_or(f64::NAN),
            c.poly.unwrap_or(f64::NAN),
            c.blend.unwrap_or(f64::NAN),
        ]
    });
    let standardize = r.standardize.unwrap_or(true);
    let metric = match &r.metric {
        None => None,
        Some(m) => {
            if let Some(msg) = metric_problem(m.get_ref(), inputs, standardize) {
                return Err(err(m.span(), "data.reference.metric", msg));
            }
            if let Some(c) = &kept {
                if let Some(j) = (0..inputs).find(|j| !c.contains(j) && m.get_ref()[*j] > 0.0) {
                    return Err(err(
                        m.span(),
                        "data.reference.metric",
                        format!(
                            "gives weight {} to `{}`, which `inputs` leaves out: the reference \
                             never sees it; write 0 there",
                            crate::fmt::fmt_exact(m.get_ref()[j]),
                            crate::fmt::clip(&names[j], 40)
                        ),
                    ));
                }
                if c.iter().all(|&j| m.get_ref()[j] == 0.0) {
                    return Err(err(
                        m.span(),
                        "data.reference.metric",
                        "gives weight 0 to every input named in `inputs`".into(),
                    ));
                }
            }
            Some(m.get_ref().clone())
        }
    };
    Ok(Choice {
        ridge: None,
        tree: None,
        inputs: kept,
        metric,
        family,
        standardize,
        k,
        forest,
        bandwidth,
        degree,
        weights,
        cv_r2,
        twice,
    })
}

/// The error for a recipe of `family` that lacks `data.reference.{key}`.
fn needs_key(
    fam_span: &std::ops::Range<usize>,
    family: Candidate,
    key: &str,
    err: &dyn Fn(std::ops::Range<usize>, &str, String) -> ScenarioError,
) -> ScenarioError {
    err(
        fam_span.clone(),
        &format!("data.reference.{key}"),
        format!("`family = \"{}\"` needs `{key}`", family.name()),
    )
}

/// `data.reference.{key}`'s whole number, held to `lo..=hi`.
fn whole_key(
    v: &toml::Spanned<i64>,
    key: &str,
    lo: i64,
    hi: i64,
    err: &dyn Fn(std::ops::Range<usize>, &str, String) -> ScenarioError,
) -> Result<i64, ScenarioError> {
    let x = *v.get_ref();
    if x < lo || x > hi {
        Err(err(
            v.span(),
            &format!("data.reference.{key}"),
            format!("must be between {lo} and {hi}, got {x}"),
        ))
    } else {
        Ok(x)
    }
}

/// The recipe of a classification reference other than k-NN (`logit`: `degree` and `ridge`;
/// `tree`: `depth`, `min_leaf` and `seed`; either: `metric`, whose inputs of positive weight are
/// the ones used), every other key refused. Errors name the key.
fn class_choice_of(
    r: &ReferenceSpec,
    family: Candidate,
    rows: usize,
    inputs: usize,
    classes: usize,
    err: &dyn Fn(std::ops::Range<usize>, &str, String) -> ScenarioError,
) -> Result<Choice, ScenarioError> {
    let fam_span = r.family.span();
    let logit = family == Candidate::Logit;
    let allowed: &[&str] = if logit {
        &["degree", "ridge", "metric"]
    } else {
        &["depth", "min_leaf", "seed", "metric"]
    };
    // Input weights: the logistic polynomial and the tree use the inputs of positive weight.
    let metric = match &r.metric {
        None => None,
        Some(m) => {
            if let Some(msg) = metric_problem(m.get_ref(), inputs, true) {
                return Err(err(m.span(), "data.reference.metric", msg));
            }
            Some(m.get_ref().clone())
        }
    };
    let used = metric
        .as_ref()
        .map_or(inputs, |w| crate::dgp::reference::positive_columns(w).len());
    let given = [
        ("k", r.k.as_ref().map(|v| v.span())),
        ("standardize", r.standardize.map(|_| fam_span.clone())),
        ("trees", r.trees.as_ref().map(|v| v.span())),
        ("min_leaf", r.min_leaf.as_ref().map(|v| v.span())),
        ("seed", r.seed.as_ref().map(|v| v.span())),
        ("bandwidth", r.bandwidth.as_ref().map(|v| v.span())),
        ("degree", r.degree.as_ref().map(|v| v.span())),
        ("weights", r.weights.as_ref().map(|v| v.span())),
        ("cv_r2", r.cv_r2.as_ref().map(|_| fam_span.clone())),
        ("twice", r.twice.map(|_| fam_span.clone())),
        ("metric", r.metric.as_ref().map(|v| v.span())),
        ("inputs", r.inputs.as_ref().map(|v| v.span())),
        ("ridge", r.ridge.as_ref().map(|v| v.span())),
        ("depth", r.depth.as_ref().map(|v| v.span())),
    ];
    for (key, span) in given {
        if let Some(span) = span {
            if !allowed.contains(&key) {
                return Err(err(
                    span,
                    &format!("data.reference.{key}"),
                    format!(
                        "`family = \"{}\"` takes {}: remove `{key}`",
                        family.name(),
                        allowed
                            .iter()
                            .map(|k| format!("`{k}`"))
                            .collect::<Vec<_>>()
                            .join(", ")
                    ),
                ));
            }
        }
    }
    let need = |key: &str| needs_key(&fam_span, family, key, err);
    let whole =
        |v: &toml::Spanned<i64>, key: &str, lo: i64, hi: i64| whole_key(v, key, lo, hi, err);
    if logit {
        let d = r.degree.as_ref().ok_or_else(|| need("degree"))?;
        let degree = whole(d, "degree", 1, crate::family::poly::MAX_DEGREE as i64)? as usize;
        let cols = crate::family::poly::n_basis(used, degree);
        let most = crate::dgp::reference::classes::MAX_LOGIT_PARAMS;
        if !cols.is_some_and(|c| c <= rows && c * classes <= most) {
            return Err(err(
                d.span(),
                "data.reference.degree",
                format!(
                    "degree {degree} with {used} input(s) and {classes} classes needs more \
                     coefficients than the table's {rows} rows or the {most} a logistic \
                     polynomial may have"
                ),
            ));
        }
        let rg = r.ridge.as_ref().ok_or_else(|| need("ridge"))?;
        let ridge = *rg.get_ref();
        if !(ridge.is_finite() && ridge > 0.0) {
            return Err(err(
                rg.span(),
                "data.reference.ridge",
                format!(
                    "must be a finite number > 0, got {}",
                    crate::fmt::fmt_exact(ridge)
                ),
            ));
        }
        return Ok(Choice {
            metric,
            ..Choice::logit(degree, ridge)
        });
    }
    let (Some(d), Some(l), Some(sd)) = (&r.depth, &r.min_leaf, &r.seed) else {
        return Err(need(if r.depth.is_none() {
            "depth"
        } else if r.min_leaf.is_none() {
            "min_leaf"
        } else {
            "seed"
        }));
    };
    Ok(Choice {
        metric,
        ..Choice::tree(crate::dgp::reference::TreeParams {
            depth: whole(d, "depth", 1, 64)? as usize,
            min_leaf: whole(l, "min_leaf", 1, rows.max(1) as i64)? as usize,
            seed: whole(sd, "seed", 0, i64::MAX)? as u64,
        })
    })
}

/// The first number of `[data.fit_report]` that is not finite, with its key (`noise.value`,
/// `fidelity.models[1].loss`): the record is echoed in results, where it would read `null`.
fn non_finite_in_report(r: &FitReportSpec) -> Option<(String, f64)> {
    let bad = |v: f64| (!v.is_finite()).then_some(v);
    if let Some(v) = r.sharpen.and_then(bad) {
        return Some(("sharpen".into(), v));
    }
    if let Some(n) = &r.noise {
        for (key, v) in [
            ("raw", n.raw),
            ("correction", n.correction),
            ("value", n.value),
            ("stderr", n.stderr),
        ] {
            if let Some(v) = bad(v) {
                return Some((format!("noise.{key}"), v));
            }
        }
    }
    for (i, m) in r.fidelity.iter().flat_map(|f| f.models.iter()).enumerate() {
        let scalars = [
            ("pick", m.pick),
            ("in_one_se", m.in_one_se),
            ("curve_error", m.curve_error),
            ("corrected_pick", m.corrected_pick),
        ];
        let lists = [
            ("one_se", &m.one_se),
            ("picks", &m.picks),
            ("grid", &m.grid),
            ("loss", &m.loss),
            ("corrected_loss", &m.corrected_loss),
        ];
        let found = scalars
            .into_iter()
            .find_map(|(k, v)| bad(v).map(|v| (k, v)))
            .or_else(|| {
                lists
                    .into_iter()
                    .find_map(|(k, l)| l.iter().find_map(|&v| bad(v)).map(|v| (k, v)))
            });
        if let Some((k, v)) = found {
            return Some((format!("fidelity.models[{i}].{k}"), v));
        }
    }
    None
}

/// The first statement of `[data.fit_report]` that contradicts itself or the scenario, with its
/// key: a noise record whose σ² is not the scenario's `sd` squared (`sd` is the square root of
/// the corrected value, 0 below 0), or a standard error below 0; a fidelity record whose pick
/// is not the lowest of its curve, whose one-SE set or picks leave its grid, whose share of
/// picks inside the set is not theirs, or whose lists differ in length (a hand-edited pick of 99
/// off the grid was printed as the recommended pick, and σ² = −3 beside an `sd` of 0.54).
fn inconsistent_report(r: &FitReportSpec, sd: Option<f64>) -> Option<(String, String)> {
    let num = crate::fmt::fmt_exact;
    if let Some(n) = &r.noise {
        if n.stderr < 0.0 {
            return Some((
                "noise.stderr".into(),
                format!("is {}, below 0", num(n.stderr)),
            ));
        }
        if let Some(sd) = sd {
            let written = n.value.max(0.0);
            if (sd * sd - written).abs() > 1e-9 * written.max(sd * sd) + 1e-300 {
                return Some((
                    "noise.value".into(),
                    format!(
                        "is {}, but the scenario's noise has sd = {} (σ² = {})",
                        num(n.value),
                        num(sd),
                        num(sd * sd)
                    ),
                ));
            }
        }
    }
    report_of(r)
        .fidelity
        .and_then(|f| f.problem())
        .map(|(k, why)| (format!("fidelity.{k}"), why))
}

/// The record of `[data.fit_report]`.
fn report_of(r: &FitReportSpec) -> FitReport {
    FitReport {
        sharpen: r.sharpen,
        noise: r.noise.as_ref().map(|n| NoiseRecord {
            method: n.method.clone(),
            raw: n.raw,
            correction: n.correction,
            value: n.value,
            stderr: n.stderr,
            tables: n.tables as usize,
            weighted: n.weighted,
            left_out: n.left_out as usize,
        }),
        fidelity: r.fidelity.as_ref().map(|f| FidelityRecord {
            tables: f.tables as usize,
            replicates: f.replicates as usize,
            twin_replicates: f.twin_replicates.map(|r| r as usize),
            models: f
                .models
                .iter()
                .map(|m| FidelityModel {
                    family: m.family.clone(),
                    knob: m.knob.clone(),
                    pick: m.pick,
                    one_se: m.one_se.clone(),
                    picks: m.picks.clone(),
                    in_one_se: m.in_one_se,
                    curve_error: m.curve_error,
                    corrected_pick: m.corrected_pick,
                    grid: m.grid.clone(),
                    loss: m.loss.clone(),
                    corrected_loss: m.corrected_loss.clone(),
                })
                .collect(),
        }),
    }
}

/// Builds the twin source of a scenario from its `[data]` section (`source = "twin"`): loads the
/// table (path relative to `base`), refits the reference named by `reference`, and returns the
/// synthetic process whose inputs are the table's rows. Errors name file, line and key.
pub fn from_spec(
    d: &DataSpec,
    src: &str,
    file: &str,
    base: &Path,
    memory_limit: Option<u64>,
) -> Result<SyntheticPlan, ScenarioError> {
    let line = |span: std::ops::Range<usize>| Some(crate::scenario::line_of(src, span.start));
    let err = |span: std::ops::Range<usize>, key: &str, m: String| ScenarioError {
        file: file.to_string(),
        line: line(span),
        key: Some(key.to_string()),
        message: m,
    };
    let at_source = d.source.span();
    let unused: [(Option<std::ops::Range<usize>>, &str); 6] = [
        (d.inputs.as_ref().map(|_| at_source.clone()), "inputs"),
        (d.truth.as_ref().map(|_| at_source.clone()), "truth"),
        (d.resample.as_ref().map(|s| s.span()), "resample"),
        (
            d.train_fraction.as_ref().map(|s| s.span()),
            "train_fraction",
        ),
        (d.holdout.as_ref().map(|s| s.span()), "holdout"),
        (
            d.noise_estimator.as_ref().map(|s| s.span()),
            "noise_estimator",
        ),
    ];
    for (span, key) in unused {
        if let Some(span) = span {
            return Err(crate::scenario::at_data_key(
                err(
                    span,
                    &format!("data.{key}"),
                    format!("a twin takes its inputs from the table and its truth from `reference`; remove `{key}`"),
                ),
                src,
                key,
            ));
        }
    }
    let Some(path) = &d.path else {
        return Err(err(
            at_source,
            "data.path",
            "a twin source needs `path` (the CSV file, relative to this scenario's folder)".into(),
        ));
    };
    if path.get_ref().trim().is_empty() {
        return Err(err(
            at_source,
            "data.path",
            "is empty; give the CSV file, relative to this scenario's folder".into(),
        ));
    }
    let Some(target) = &d.target else {
        return Err(err(
            at_source,
            "data.target",
            "a twin source needs `target` (the response column's name)".into(),
        ));
    };
    let Some(reference) = &d.reference else {
        return Err(err(
            at_source,
            "data.reference",
            "a twin source needs `reference = { family = .., ... }` (write one with `lossprism twin`)".into(),
        ));
    };
    let missing = match d.missing.as_ref().map(|s| s.get_ref().as_str()) {
        None | Some("error") => Missing::Error,
        Some("drop") => Missing::Drop,
        Some(other) => {
            return Err(err(
                d.missing.as_ref().map(|s| s.span()).unwrap_or(at_source),
                "data.missing",
                format!("unknown value `{other}`; expected `error` or `drop`"),
            ))
        }
    };
    let duplicates = crate::scenario::table::duplicates_of(d.duplicates.as_ref(), &|v, m| {
        err(
            v.map(|s| s.span()).unwrap_or_else(|| at_source.clone()),
            "data.duplicates",
            m,
        )
    })?;
    let classify = match d.task.as_ref().map(|s| s.get_ref().as_str()) {
        None => d.classes.is_some(),
        Some("classify") => true,
        Some("regress") if d.classes.is_none() => false,
        Some(other) => {
            return Err(err(
                d.task.as_ref().map(|s| s.span()).unwrap_or(at_source),
                "data.task",
                format!("`{other}` is not usable here; expected `regress` (without [data.classes]) or `classify`"),
            ))
        }
    };
    let target_kind = match (&d.classes, classify) {
        (Some(c), _) => {
            if let Some(t) = &c.temperature {
                let v = *t.get_ref();
                if !(v.is_finite() && (TEMPERATURE_MIN..=1.0).contains(&v)) {
                    return Err(err(
                        t.span(),
                        "data.classes.temperature",
                        format!(
                            "must be a number from {TEMPERATURE_MIN} to 1 (1: the reference's \
                             class shares as they are), got {}",
                            crate::fmt::fmt_exact(v)
                        ),
                    ));
                }
            }
            if c.probability.is_some() || c.logits.is_some() || c.rule.is_some() || c.flip.is_some()
            {
                return Err(err(
                    c.labels.span(),
                    "data.classes",
                    "a twin's class probabilities come from the reference: give only `labels`"
                        .into(),
                ));
            }
            // A label given twice: the table's rows were then refused under another label.
            let mut seen = std::collections::HashSet::new();
            if let Some(l) = c.labels.get_ref().iter().find(|l| !seen.insert(l.as_str())) {
                return Err(err(
                    c.labels.span(),
                    "data.classes.labels",
                    format!("label `{}` appears twice", crate::fmt::clip(l, 60)),
                ));
            }
            TargetKind::Classes(Some(c.labels.get_ref().clone()))
        }
        (None, true) => TargetKind::Classes(None),
        (None, false) => TargetKind::Numeric,
    };
    crate::scenario::table::check_features(d, target.get_ref(), src, file)?;
    let table_path = base.join(path.get_ref());
    let opts = TableOptions {
        target: target.get_ref().clone(),
        features: d.features.as_ref().map(|f| f.get_ref().clone()),
        missing,
        target_kind,
        min_rows: 5,
        duplicates,
    };
    let t = dataset::load_csv(&table_path, &opts).map_err(|e| {
        if e.line.is_none() && e.column.is_none() && e.message.starts_with("cannot read") {
            err(
                path.span(),
                "data.path",
                format!("{}: {}", table_path.display(), e.message),
            )
        } else {
            ScenarioError::from(e)
        }
    })?;
    // The table the twin was fitted to: a table changed since (rescaled, say) was refitted
    // by the reference while the noise stayed as measured on the old one, with exit 0.
    if let Some(want) = &d.table_digest {
        let have = t.digest();
        // Labels given in another order than the twin wrote them number the classes
        // differently, which changes the digest of the same file: say so, not "another table".
        let reordered = || {
            let TargetKind::Classes(Some(given)) = &opts.target_kind else {
                return None;
            };
            let plain = TableOptions {
                target_kind: TargetKind::Classes(None),
                ..opts.clone()
            };
            let t0 = dataset::load_csv(&table_path, &plain).ok()?;
            let own = t0.labels.clone();
            // A permutation of the table's own labels only (a label added or renamed is
            // another table's, or another refusal's).
            let (mut a, mut b) = (own.clone(), given.clone());
            a.sort();
            b.sort();
            (t0.digest() == *want.get_ref() && own != *given && a == b).then_some(own)
        };
        if want.get_ref() != &have {
            if let Some(own) = reordered() {
                return Err(err(
                    d.classes.as_ref().map_or(want.span(), |c| c.labels.span()),
                    "data.classes.labels",
                    format!(
                        "the labels are in another order than the twin wrote them ({}): the \
                         reference's class probabilities are in that order; restore it",
                        crate::fmt::clip(&format!("{own:?}"), 120)
                    ),
                ));
            }
            return Err(err(
                want.span(),
                "data.table_digest",
                format!(
                    "{} as this scenario reads it is not the table this twin was fitted to \
                     (digest {have}, the twin's {}; the digest covers the rows and the names of \
                     the target, the features and the labels, so an edited `target`, `features` \
                     or `labels` changes it too): the reference would be refitted to it while \
                     the noise and the recommended picks stay as measured on the old one; undo \
                     the edit, or run `lossprism twin` on the table again",
                    table_path.display(),
                    crate::fmt::clip(want.get_ref(), 40)
                ),
            ));
        }
    }
    let rows = t.rows();
    let classes = match t.task {
        Task::Classify { classes } => classes,
        Task::Regress => 0,
    };
    let varying = match d.noise.as_ref().and_then(|n| n.varying.as_ref()) {
        Some(v) => *v.get_ref(),
        None => false,
    };
    let choice = choice_of(
        reference,
        rows,
        &t.names,
        classes,
        varying && classes == 0,
        &err,
    )?;
    let jitter = match &d.jitter {
        None => 0.0,
        Some(j) => {
            let v = *j.get_ref();
            if !(v.is_finite() && (0.0..=MAX_JITTER).contains(&v)) {
                return Err(err(
                    j.span(),
                    "data.jitter",
                    format!(
                        "must be between 0 and {MAX_JITTER}, got {}",
                        crate::fmt::fmt_exact(v)
                    ),
                ));
            }
            v
        }
    };
    let keep_variance = match &d.jitter_variance {
        None => false,
        Some(s) if jitter == 0.0 => {
            return Err(err(
                s.span(),
                "data.jitter_variance",
                "shapes the jitter, and this twin has none (`jitter` is 0 or absent): remove \
                 it or set `jitter`"
                    .into(),
            ))
        }
        Some(s) => match s.get_ref().as_str() {
            "table" => true,
            "added" => false,
            other => {
                return Err(err(
                    s.span(),
                    "data.jitter_variance",
                    format!(
                        "unknown `{}`; expected \"table\" or \"added\"",
                        crate::fmt::clip(other, 40)
                    ),
                ))
            }
        },
    };
    let size = |v: &Option<toml::Spanned<i64>>, key: &str, min: i64| match v {
        None => Ok(rows),
        Some(s) if *s.get_ref() >= min && *s.get_ref() <= 10_000_000 => Ok(*s.get_ref() as usize),
        Some(s) => Err(err(
            s.span(),
            key,
            format!("must be between {min} and 10000000, got {}", s.get_ref()),
        )),
    };
    let sizes = match &d.train_size {
        Some(ts) => {
            let cx = crate::scenario::plan::Ctx { file, src };
            crate::scenario::plan::parse_sizes(&cx, ts, 10_000_000)?
        }
        None => vec![rows],
    };
    let train_size = *sizes.last().expect("at least one size");
    let design = match d.design.as_ref().map(|s| s.get_ref().as_str()) {
        None | Some("random") => Design::Random,
        Some("fixed") => Design::Fixed,
        Some(other) => {
            return Err(err(
                d.design.as_ref().map(|s| s.span()).unwrap_or(at_source),
                "data.design",
                format!("unknown design `{other}`; expected `random` or `fixed`"),
            ))
        }
    };
    let eval_at_design = match d.eval.as_ref().map(|s| s.get_ref().as_str()) {
        None | Some("fresh") => false,
        Some("design") if design == Design::Fixed => true,
        Some(other) => {
            return Err(err(
                d.eval.as_ref().map(|s| s.span()).unwrap_or(at_source),
                "data.eval",
                format!("`{other}` is not usable here; expected `fresh`, or `design` with `design = \"fixed\"`"),
            ))
        }
    };
    let eval_size = if eval_at_design {
        train_size
    } else {
        size(&d.eval_size, "data.eval_size", 1)?
    };
    let shown = path.get_ref().clone();
    let noise = if classes > 0 {
        if let Some(n) = &d.noise {
            let span =
                n.sd.as_ref()
                    .map(|s| s.span())
                    .unwrap_or_else(|| at_source.clone());
            return Err(err(
                span,
                "data.noise",
                "a classification twin has no [data.noise]: its label noise comes from the reference's class probabilities".into(),
            ));
        }
        None
    } else {
        Some(match &d.noise {
            None => {
                return Err(err(
                    at_source,
                    "data.noise",
                    "a regression twin needs [data.noise] with `sd` (or `varying = true`)".into(),
                ))
            }
            Some(n) => {
                if let Some(f) = &n.sd_formula {
                    return Err(err(
                        f.span(),
                        "data.noise.sd_formula",
                        "a twin's noise is `sd` (constant) or `varying = true`".into(),
                    ));
                }
                if let Some(p) = &n.poisson {
                    return Err(err(
                        p.span(),
                        "data.noise.poisson",
                        "belongs to a synthetic source; a twin's noise is `sd` (constant) or `varying = true`".into(),
                    ));
                }
                if !varying {
                    for (v, key) in [
                        (n.level.as_ref().map(|v| v.span()), "level"),
                        (n.smooth_k.as_ref().map(|v| v.span()), "smooth_k"),
                    ] {
                        if let Some(span) = v {
                            return Err(err(
                                span,
                                &format!("data.noise.{key}"),
                                "belongs to varying noise (`varying = true`)".into(),
                            ));
                        }
                    }
                }
                match (&n.sd, varying) {
                    (Some(sd), false) => {
                        let v = *sd.get_ref();
                        if !(v.is_finite() && v >= 0.0) {
                            return Err(err(
                                sd.span(),
                                "data.noise.sd",
                                format!(
                                    "must be a finite number >= 0, got {}",
                                    crate::fmt::fmt_exact(v)
                                ),
                            ));
                        }
                        TwinNoise::Constant(v)
                    }
                    (Some(sd), true) => {
                        // Ignored before: the level of varying noise is `level`.
                        return Err(err(
                            sd.span(),
                            "data.noise.sd",
                            "belongs to constant noise; varying noise (`varying = true`) takes \
                             its level from `level`: remove one of the two"
                                .into(),
                        ));
                    }
                    (None, true) => {
                        let k = choice.k.unwrap_or(rows);
                        if rows <= k {
                            return Err(err(
                                n.varying
                                    .as_ref()
                                    .map(|v| v.span())
                                    .unwrap_or(at_source.clone()),
                                "data.noise.varying",
                                format!("needs more than k = {k} rows"),
                            ));
                        }
                        let smooth_k = match &n.smooth_k {
                            None => None,
                            Some(v) if *v.get_ref() >= 1 && (*v.get_ref() as u64) < rows as u64 => {
                                Some(*v.get_ref() as usize)
                            }
                            Some(v) => {
                                return Err(err(
                                    v.span(),
                                    "data.noise.smooth_k",
                                    format!(
                                        "must be between 1 and {} (fewer than the table's rows), got {}",
                                        rows - 1,
                                        v.get_ref()
                                    ),
                                ))
                            }
                        };
                        let level = match &n.level {
                            None => None,
                            Some(v) if v.get_ref().is_finite() && *v.get_ref() > 0.0 => {
                                Some(*v.get_ref())
                            }
                            Some(v) => {
                                return Err(err(
                                    v.span(),
                                    "data.noise.level",
                                    format!(
                                        "must be a finite number > 0, got {}",
                                        crate::fmt::fmt_exact(*v.get_ref())
                                    ),
                                ))
                            }
                        };
                        TwinNoise::Varying { smooth_k, level }
                    }
                    (None, false) => {
                        return Err(err(
                            at_source,
                            "data.noise.sd",
                            "a twin's [data.noise] needs `sd` or `varying = true`".into(),
                        ))
                    }
                }
            }
        })
    };
    let shape = match d.noise.as_ref().filter(|_| classes == 0) {
        None => ShapeChoice::Gaussian,
        Some(n) => shape_choice(n, true).map_err(|(span, key, m)| err(span, key, m))?,
    };
    if let Some(r) = &d.fit_report {
        if let Some((key, v)) = non_finite_in_report(r.get_ref()) {
            return Err(err(
                r.span(),
                &format!("data.fit_report.{key}"),
                format!("must be a finite number, got {v} (the record `lossprism twin` wrote holds finite numbers only)"),
            ));
        }
        let sd = match &noise {
            Some(TwinNoise::Constant(sd)) => Some(*sd),
            _ => None,
        };
        // Varying noise's level is scaled so that the estimator, which weighs the rows unevenly,
        // reads the recorded σ̂²: it stays near that value (a level of 1e100 beside a recorded
        // 0.26 ran). A factor of 100 either way is a sanity bound (a rule of thumb, no source).
        if let (Some(TwinNoise::Varying { level: Some(l), .. }), Some(rec)) =
            (&noise, r.get_ref().noise.as_ref().filter(|n| n.value > 0.0))
        {
            if !(l / rec.value >= 0.01 && l / rec.value <= 100.0) {
                let span = d
                    .noise
                    .as_ref()
                    .and_then(|n| n.level.as_ref().map(|v| v.span()))
                    .unwrap_or(r.span());
                return Err(err(
                    span,
                    "data.noise.level",
                    format!(
                        "is {}, more than 100 times away from the noise `lossprism twin` recorded \
                         (σ̂² = {}), which the level is scaled to reproduce: remove \
                         [data.fit_report] if the scenario was changed on purpose",
                        crate::fmt::fmt_exact(*l),
                        crate::fmt::fmt_exact(rec.value)
                    ),
                ));
            }
        }
        if let Some((key, why)) = inconsistent_report(r.get_ref(), sd) {
            return Err(err(
                r.span(),
                &format!("data.fit_report.{key}"),
                format!(
                    "{why}: the record `lossprism twin` wrote does not say that (remove \
                     [data.fit_report] if the scenario was changed on purpose)"
                ),
            ));
        }
        if let Some(v) = r.get_ref().sharpen {
            if !(crate::dgp::twin::MIN_SHARPEN..=1.0).contains(&v) {
                return Err(err(
                    r.span(),
                    "data.fit_report.sharpen",
                    format!(
                        "must be between {} and 1 (the factors `lossprism twin --sharpen` takes), got {}",
                        crate::dgp::twin::MIN_SHARPEN,
                        crate::fmt::fmt_exact(v)
                    ),
                ));
            }
        }
    }
    let spec = TwinSpec {
        choice,
        jitter,
        keep_variance,
        noise,
        shape,
        train_size,
        sizes,
        eval_size,
        design,
        eval_at_design,
        report: d.fit_report.as_ref().map(|r| report_of(r.get_ref())),
        temperature: d
            .classes
            .as_ref()
            .and_then(|c| c.temperature.as_ref())
            .map_or(1.0, |t| *t.get_ref()),
        memory_limit,
    };
    build(&t, &shown, &spec).map_err(|e| match e {
        BuildError::Reference(m) => err(reference.family.span(), "data.reference", m),
        BuildError::Shape(m) => err(
            d.noise
                .as_ref()
                .and_then(|n| n.shape.as_ref())
                .map_or(reference.family.span(), |s| s.span()),
            "data.noise.shape",
            m,
        ),
        BuildError::Noise(m) => {
            // The key that set σ²(x): its level, else its smoother, else `varying` itself.
            let n = d.noise.as_ref();
            let (span, key) = match n {
                Some(n) if n.level.is_some() => {
                    (n.level.as_ref().map(|v| v.span()), "data.noise.level")
                }
                Some(n) if n.smooth_k.is_some() => {
                    (n.smooth_k.as_ref().map(|v| v.span()), "data.noise.smooth_k")
                }
                _ => (
                    n.and_then(|n| n.varying.as_ref()).map(|v| v.span()),
                    "data.noise.varying",
                ),
            };
            err(span.unwrap_or(at_source.clone()), key, m)
        }
    })
}
