//! Planning a `source = "table"` section: checks its keys (errors name file, line and key),
//! resolves `path` against the scenario's folder, loads the table and locks the holdout.

use std::path::Path;

use crate::dataset::{
    noise, plan_table, Duplicates, Missing, Scheme, TableOptions, TablePlan, TableRequest,
    TargetKind,
};
use crate::error::ScenarioError;

fn spanned_err<T>(
    src: &str,
    file: &str,
    v: Option<&toml::Spanned<T>>,
    key: &str,
    message: impl Into<String>,
) -> ScenarioError {
    ScenarioError {
        file: file.to_string(),
        line: v.map(|s| crate::scenario::line_of(src, s.span().start)),
        key: Some(key.to_string()),
        message: message.into(),
    }
}

/// Refuses a `features` list that names the target or a column twice, at the scenario's line
/// and key (the table reader's refusal named the CSV file, whose header is not what is wrong).
pub fn check_features(
    d: &crate::scenario::spec::DataSpec,
    target: &str,
    src: &str,
    file: &str,
) -> Result<(), ScenarioError> {
    let Some(fs) = &d.features else {
        return Ok(());
    };
    let mut seen = std::collections::HashSet::new();
    let why = fs.get_ref().iter().find_map(|f| {
        if f == target {
            Some(format!(
                "`{}` is the target; it cannot also be a feature",
                crate::fmt::clip(f, 60)
            ))
        } else if !seen.insert(f.as_str()) {
            Some(format!("`{}` is listed twice", crate::fmt::clip(f, 60)))
        } else {
            None
        }
    });
    match why {
        Some(m) => Err(spanned_err(src, file, Some(fs), "data.features", m)),
        None => Ok(()),
    }
}

/// Refuses the keys of the file sources in a synthetic source (they would be ignored silently):
/// the table keys, and a twin's `jitter` and `[data.fit_report]`.
pub fn reject_table_keys(
    d: &crate::scenario::spec::DataSpec,
    src: &str,
    file: &str,
) -> Result<(), ScenarioError> {
    let source = d.source.get_ref();
    let check = |present: Option<std::ops::Range<usize>>, key: &str| match present {
        Some(span) => Err(ScenarioError {
            file: file.to_string(),
            line: Some(crate::scenario::line_of(src, span.start)),
            key: Some(format!("data.{key}")),
            message: format!("belongs to `source = \"table\"`; a {source} source does not use it"),
        }),
        None => Ok(()),
    };
    check(d.path.as_ref().map(|s| s.span()), "path")?;
    check(d.target.as_ref().map(|s| s.span()), "target")?;
    check(d.features.as_ref().map(|s| s.span()), "features")?;
    check(d.resample.as_ref().map(|s| s.span()), "resample")?;
    check(
        d.train_fraction.as_ref().map(|s| s.span()),
        "train_fraction",
    )?;
    check(d.holdout.as_ref().map(|s| s.span()), "holdout")?;
    check(d.missing.as_ref().map(|s| s.span()), "missing")?;
    check(d.duplicates.as_ref().map(|s| s.span()), "duplicates")?;
    check(d.task.as_ref().map(|s| s.span()), "task")?;
    check(
        d.noise_estimator.as_ref().map(|s| s.span()),
        "noise_estimator",
    )?;
    for (present, key) in [
        (d.jitter.as_ref().map(|s| s.span()), "jitter"),
        (
            d.jitter_variance.as_ref().map(|s| s.span()),
            "jitter_variance",
        ),
        (d.table_digest.as_ref().map(|s| s.span()), "table_digest"),
        (d.fit_report.as_ref().map(|s| s.span()), "fit_report"),
    ] {
        if let Some(span) = present {
            return Err(ScenarioError {
                file: file.to_string(),
                line: Some(crate::scenario::line_of(src, span.start)),
                key: Some(format!("data.{key}")),
                message: format!(
                    "belongs to `source = \"twin\"`; a {source} source does not use it"
                ),
            });
        }
    }
    Ok(())
}

/// Builds the table source of a scenario from its `[data]` section: checks the keys (errors name
/// file, line and key), resolves `path` against `base` (the scenario's folder), loads the table
/// and locks the holdout with `holdout_seed` (the file's seed, so that `--seed` does not move it).
pub fn from_spec(
    d: &crate::scenario::spec::DataSpec,
    src: &str,
    file: &str,
    base: &Path,
    holdout_seed: u64,
) -> Result<TablePlan, ScenarioError> {
    let e =
        |v: Option<&toml::Spanned<String>>, key: &str, m: String| spanned_err(src, file, v, key, m);
    let src_span = Some(&d.source);
    let unused: [(bool, &str); 10] = [
        (d.jitter.is_some(), "jitter"),
        (d.jitter_variance.is_some(), "jitter_variance"),
        (d.table_digest.is_some(), "table_digest"),
        (d.fit_report.is_some(), "fit_report"),
        (d.eval_size.is_some(), "eval_size"),
        (d.design.is_some(), "design"),
        (d.eval.is_some(), "eval"),
        (d.inputs.is_some(), "inputs"),
        (d.truth.is_some(), "truth"),
        (d.noise.is_some(), "noise"),
    ];
    for (present, key) in unused {
        if present {
            return Err(crate::scenario::at_data_key(
                e(
                    src_span,
                    &format!("data.{key}"),
                    format!("a table source takes its rows, inputs and responses from the file; remove `{key}`"),
                ),
                src,
                key,
            ));
        }
    }
    let Some(path) = &d.path else {
        return Err(e(
            src_span,
            "data.path",
            "a table source needs `path` (the CSV file, relative to this scenario's folder)".into(),
        ));
    };
    if path.get_ref().trim().is_empty() {
        return Err(e(
            src_span,
            "data.path",
            "is empty; give the CSV file, relative to this scenario's folder".into(),
        ));
    }
    let Some(target) = &d.target else {
        return Err(e(
            src_span,
            "data.target",
            "a table source needs `target` (the response column's name)".into(),
        ));
    };
    let missing = match d.missing.as_ref().map(|s| s.get_ref().as_str()) {
        None | Some("error") => Missing::Error,
        Some("drop") => Missing::Drop,
        Some(other) => {
            return Err(e(
                d.missing.as_ref(),
                "data.missing",
                format!("unknown value `{other}`; expected `error` or `drop`"),
            ))
        }
    };
    let duplicates = duplicates_of(d.duplicates.as_ref(), &|v, m| e(v, "data.duplicates", m))?;
    let classify = match d.task.as_ref().map(|s| s.get_ref().as_str()) {
        None => d.classes.is_some(),
        Some("classify") => true,
        Some("regress") => {
            if d.classes.is_some() {
                return Err(e(
                    d.task.as_ref(),
                    "data.task",
                    "`regress` contradicts [data.classes]".into(),
                ));
            }
            false
        }
        Some(other) => {
            return Err(e(
                d.task.as_ref(),
                "data.task",
                format!("unknown task `{other}`; expected `regress` or `classify`"),
            ))
        }
    };
    let target_kind = if classify {
        match &d.classes {
            Some(c) => {
                if c.probability.is_some()
                    || c.logits.is_some()
                    || c.rule.is_some()
                    || c.flip.is_some()
                    || c.temperature.is_some()
                {
                    return Err(spanned_err(
                        src,
                        file,
                        Some(&c.labels),
                        "data.classes",
                        "a table's classes come from the target column: give only `labels`",
                    ));
                }
                let labels = c.labels.get_ref().clone();
                if labels.len() < 2 {
                    return Err(spanned_err(
                        src,
                        file,
                        Some(&c.labels),
                        "data.classes.labels",
                        format!("needs at least 2 labels, got {}", labels.len()),
                    ));
                }
                // A label given twice was run as one more class (a log-loss of 0.636 for 0.619,
                // exit 0; a hostile-input sweep).
                let mut seen = std::collections::HashSet::new();
                if let Some(l) = labels.iter().find(|l| !seen.insert(l.as_str())) {
                    return Err(spanned_err(
                        src,
                        file,
                        Some(&c.labels),
                        "data.classes.labels",
                        format!("label `{l}` appears twice"),
                    ));
                }
                TargetKind::Classes(Some(labels))
            }
            None => TargetKind::Classes(None),
        }
    } else {
        TargetKind::Numeric
    };
    let scheme = match d.resample.as_ref().map(|s| s.get_ref().as_str()) {
        None | Some("bootstrap") => {
            if let Some(f) = &d.train_fraction {
                return Err(spanned_err(
                    src,
                    file,
                    Some(f),
                    "data.train_fraction",
                    "goes with `resample = \"half\"` (a bootstrap draws n rows with replacement)",
                ));
            }
            Scheme::Bootstrap
        }
        Some("half") => {
            let fraction = match &d.train_fraction {
                Some(f) => {
                    let v = *f.get_ref();
                    if !(v > 0.0 && v < 1.0) {
                        return Err(spanned_err(
                            src,
                            file,
                            Some(f),
                            "data.train_fraction",
                            format!("must be strictly between 0 and 1, got {v}"),
                        ));
                    }
                    v
                }
                None => 0.5,
            };
            Scheme::Subsample { fraction }
        }
        Some(other) => {
            return Err(e(
                d.resample.as_ref(),
                "data.resample",
                format!("unknown scheme `{other}`; expected `bootstrap` or `half`"),
            ))
        }
    };
    let holdout = match &d.holdout {
        Some(h) => {
            let v = *h.get_ref();
            if !(0.0..=0.9).contains(&v) {
                return Err(spanned_err(
                    src,
                    file,
                    Some(h),
                    "data.holdout",
                    format!("must be between 0 and 0.9, got {v}"),
                ));
            }
            v
        }
        None => 0.0,
    };
    let noise_method = match &d.noise_estimator {
        Some(s) => Some(noise::Method::from_name(s.get_ref()).ok_or_else(|| {
            e(
                Some(s),
                "data.noise_estimator",
                format!(
                    "unknown estimator `{}`; expected `nn`, `gamma`, `gsjs` or `plane`",
                    s.get_ref()
                ),
            )
        })?),
        None => None,
    };
    if noise_method.is_some() && classify {
        return Err(e(
            d.noise_estimator.as_ref(),
            "data.noise_estimator",
            "noise estimators apply to a numeric target; with classes the bias is measured against the observed labels (noise folded in)".into(),
        ));
    }
    check_features(d, target.get_ref(), src, file)?;
    let req = TableRequest {
        path: base.join(path.get_ref()),
        options: TableOptions {
            target: target.get_ref().clone(),
            features: d.features.as_ref().map(|f| f.get_ref().clone()),
            missing,
            target_kind,
            min_rows: 5,
            duplicates,
        },
        scheme,
        holdout,
        noise_method,
        holdout_seed,
    };
    let plan = plan_table(&req).map_err(|err| {
        // A missing file is the scenario's fault: point at `path`.
        if err.line.is_none() && err.column.is_none() && err.message.starts_with("cannot read") {
            e(
                Some(path),
                "data.path",
                format!("{}: {}", req.path.display(), err.message),
            )
        } else {
            err.into()
        }
    })?;
    let mut plan = plan;
    plan.written = Some(path.get_ref().clone());
    if let Some(h) = &d.holdout {
        let refuse = |locks: String| {
            spanned_err(
                src,
                file,
                Some(h),
                "data.holdout",
                format!(
                    "{} of the {} rows locks {locks}; raise it or remove `holdout`",
                    crate::fmt::fmt_exact(holdout),
                    plan.table.rows()
                ),
            )
        };
        // A single locked row has no spread: its assessment printed "± n/a" and was still
        // counted in the ledger.
        if plan.holdout.len() == 1 {
            return Err(refuse(
                "1 row, and a holdout loss needs at least 2 for its standard error".into(),
            ));
        }
        // A share that rounds to no row would run without a holdout, silently.
        if holdout > 0.0 && plan.holdout.is_empty() {
            return Err(refuse(format!(
                "no row (the share is rounded to whole rows{})",
                if classify { " of each class" } else { "" }
            )));
        }
    }
    if let Some(ts) = &d.train_size {
        if d.resample.is_some() || d.train_fraction.is_some() {
            return Err(spanned_err(
                src,
                file,
                Some(ts),
                "data.train_size",
                "on a table, `train_size` sets the training sizes of a learning curve (nested subsamples of the rows), which `resample` and `train_fraction` would set another way: remove them, or remove `train_size`",
            ));
        }
        let cx = crate::scenario::plan::Ctx { file, src };
        let max = plan.work.len().saturating_sub(1);
        plan.sizes = Some(crate::scenario::plan::parse_sizes(&cx, ts, max)?);
    }
    Ok(plan)
}

/// Parses `data.duplicates` (`keep`, the default, or `drop`); `err` builds the error at the key.
pub fn duplicates_of(
    v: Option<&toml::Spanned<String>>,
    err: &dyn Fn(Option<&toml::Spanned<String>>, String) -> ScenarioError,
) -> Result<Duplicates, ScenarioError> {
    match v {
        None => Ok(Duplicates::Keep),
        Some(s) => Duplicates::from_name(s.get_ref()).ok_or_else(|| {
            err(
                Some(s),
                format!("unknown value `{}`; expected `keep` or `drop`", s.get_ref()),
            )
        }),
    }
}
