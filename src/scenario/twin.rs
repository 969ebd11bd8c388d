//! Planning a `source = "twin"` section: loads the table, refits the reference named by
//! `reference` (see [`crate::dgp::reference`]), and builds the synthetic process whose inputs are
//! the table's rows.

use std::path::Path;
use std::sync::Arc;

use crate::dataset::{self, Missing, TableOptions, TargetKind};
use crate::dgp::reference::Reference;
use crate::dgp::{ClassKind, ClassModel, Input, InputDist, Noise, Response, Synthetic, Truth};
use crate::error::ScenarioError;
use crate::family::Task;
use crate::scenario::spec::DataSpec;
use crate::scenario::{Design, SyntheticPlan};

/// Builds the twin source of a scenario from its `[data]` section (`source = "twin"`): loads the
/// table (path relative to `base`), refits the reference named by `reference`, and returns the
/// synthetic process whose inputs are the table's rows. Errors name file, line and key.
pub fn from_spec(
    d: &DataSpec,
    src: &str,
    file: &str,
    base: &Path,
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
            return Err(err(
                span,
                &format!("data.{key}"),
                format!("a twin takes its inputs from the table and its truth from `reference`; remove `{key}`"),
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
            "a twin source needs `reference = { family = \"knn\", k = K }` (write one with `lossprism twin`)".into(),
        ));
    };
    if reference.family.get_ref() != "knn" {
        return Err(err(
            reference.family.span(),
            "data.reference.family",
            format!(
                "unknown reference `{}`; the only reference is `knn`",
                reference.family.get_ref()
            ),
        ));
    }
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
            if c.probability.is_some() || c.logits.is_some() || c.rule.is_some() || c.flip.is_some()
            {
                return Err(err(
                    c.labels.span(),
                    "data.classes",
                    "a twin's class probabilities come from the reference: give only `labels`"
                        .into(),
                ));
            }
            TargetKind::Classes(Some(c.labels.get_ref().clone()))
        }
        (None, true) => TargetKind::Classes(None),
        (None, false) => TargetKind::Numeric,
    };
    let table_path = base.join(path.get_ref());
    let opts = TableOptions {
        target: target.get_ref().clone(),
        features: d.features.as_ref().map(|f| f.get_ref().clone()),
        missing,
        target_kind,
        min_rows: 5,
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
    let rows = t.rows();
    let k = *reference.k.get_ref();
    if k < 1 || k as usize > rows {
        return Err(err(
            reference.k.span(),
            "data.reference.k",
            format!("must be between 1 and the table's {rows} rows, got {k}"),
        ));
    }
    let standardize = reference.standardize.unwrap_or(true);
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
    let classes = match t.task {
        Task::Classify { classes } => classes,
        Task::Regress => 0,
    };
    let varying = match d.noise.as_ref().and_then(|n| n.varying.as_ref()) {
        Some(v) => *v.get_ref(),
        None => false,
    };
    let mut fitted_ref = Reference::fit(
        t.x.view(),
        t.y.view(),
        classes,
        k as usize,
        standardize,
        varying,
        &shown,
    );
    fitted_ref.path = Some(t.path.clone());
    let fitted = Arc::new(fitted_ref);
    let rows_arc = Arc::new(t.x.clone());
    let inputs: Vec<Input> = t
        .names
        .iter()
        .enumerate()
        .map(|(j, name)| Input {
            name: name.clone(),
            dist: InputDist::Empirical {
                rows: rows_arc.clone(),
                column: j,
                source: shown.clone(),
            },
        })
        .collect();
    let response = if classes > 0 {
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
        Response::Classes(ClassModel {
            labels: t.labels.clone(),
            kind: ClassKind::Reference(fitted),
        })
    } else {
        let noise = match &d.noise {
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
                match (&n.sd, varying) {
                    (Some(sd), false) => {
                        let v = *sd.get_ref();
                        if !(v.is_finite() && v >= 0.0) {
                            return Err(err(
                                sd.span(),
                                "data.noise.sd",
                                format!("must be a finite number >= 0, got {v}"),
                            ));
                        }
                        Noise::Constant(v)
                    }
                    (_, true) => {
                        if rows <= k as usize {
                            return Err(err(
                                reference.k.span(),
                                "data.noise.varying",
                                format!("needs more than k = {k} rows"),
                            ));
                        }
                        Noise::Reference(fitted.clone())
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
        };
        Response::Regression {
            truth: Truth::Reference(fitted),
            noise,
        }
    };
    Ok(SyntheticPlan {
        process: Synthetic { inputs, response },
        train_size,
        sizes,
        eval_size,
        design,
        eval_at_design,
    })
}
