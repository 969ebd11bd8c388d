//! Simulated twins of a table (`source = "twin"`, `lossprism twin`): a flexible reference fit of
//! E[y | x] (or of P(y = c | x)) on the table, a noise estimate, and the synthetic process built
//! from them, whose inputs are the table's rows resampled with replacement.
//!
//! **The reference** is k nearest neighbours on standardized inputs (each column centred by the
//! table's mean and divided by its standard deviation), with k chosen by 10-fold
//! cross-validation (folds from a seeded stream). Why k-NN: it is flexible (no functional form
//! is assumed), it has a single knob that cross-validation tunes reliably, and it is storable
//! without a model file: the reference *is* the table's rows plus k, so a twin scenario names the
//! CSV and `k`, and `run` refits it exactly at plan time. Its cost is O(N) per evaluation, which
//! is small next to the family fits of a run. Standardization keeps an input measured in large
//! units from dominating the distance. Ties in distance go to the lower row index.
//!
//! **The noise** (regression) is a constant σ² from the table noise estimators of
//! [`crate::table::noise`] (Gasser–Sroka–Jennen-Steinmetz with one input, the nearest-neighbour
//! difference estimator otherwise), with their standard error; these do not depend on the
//! reference, so a reference that is too smooth or too rough does not leak into σ². `lossprism
//! twin` also prints the reference's own cross-validated residual variance for comparison. With
//! `varying = true` in `[data.noise]`, σ²(x) is the k-NN average (same k, same standardization)
//! of the reference's leave-one-out squared residuals times k/(k+1), the factor that removes the
//! variance of the k-neighbour mean from a leave-one-out residual under constant noise
//! (E[(y_i − f̂_{−i}(x_i))²] = σ²(1 + 1/k) + bias²).
//!
//! **Classes**: the reference's class probabilities are the neighbour shares with add-one
//! smoothing, `(count_c + 1) / (k + K)`, so no probability is exactly 0 and the twin's labels
//! keep some noise everywhere; k is chosen by the cross-validated Brier score and the quality
//! printed is the cross-validated accuracy of the most probable class.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use ndarray::{Array2, ArrayView1, ArrayView2};
use rand::Rng;

use crate::dgp::{ClassKind, ClassModel, Input, InputDist, Noise, Response, Synthetic, Truth};
use crate::error::{Error, ScenarioError};
use crate::family::Task;
use crate::scenario::spec::DataSpec;
use crate::scenario::{Design, SyntheticPlan};
use crate::table::noise::{self, NoiseEstimate};
use crate::table::{self, Missing, Table, TableOptions, TargetKind};

/// Folds of the cross-validation that chooses the reference's k.
pub const CV_FOLDS: usize = 10;

/// Candidate k values tried by [`fit`] (those that fit in a training fold).
pub const K_CANDIDATES: [usize; 14] = [1, 2, 3, 4, 5, 7, 10, 15, 20, 30, 50, 75, 100, 150];

/// The reference fit: k nearest neighbours over the table's (standardized) rows.
pub struct Reference {
    /// The table file it was fitted on (for descriptions).
    pub source: String,
    /// Number of neighbours.
    pub k: usize,
    /// Inputs standardized with the table's mean and sd.
    pub standardize: bool,
    /// Number of classes (0 for regression).
    pub classes: usize,
    center: Vec<f64>,
    scale: Vec<f64>,
    z: Array2<f64>,
    y: Vec<f64>,
    /// Varying noise: k/(k+1) × squared leave-one-out residual per table row.
    sq_resid: Option<Vec<f64>>,
}

impl std::fmt::Debug for Reference {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Reference")
            .field("source", &self.source)
            .field("k", &self.k)
            .field("standardize", &self.standardize)
            .field("rows", &self.y.len())
            .field("classes", &self.classes)
            .finish()
    }
}

/// Column means and standard deviations (population sd; a constant column gets scale 1).
fn standardizer(x: ArrayView2<'_, f64>, on: bool) -> (Vec<f64>, Vec<f64>) {
    let p = x.ncols();
    if !on {
        return (vec![0.0; p], vec![1.0; p]);
    }
    let n = x.nrows() as f64;
    let mut c = Vec::with_capacity(p);
    let mut s = Vec::with_capacity(p);
    for col in x.columns() {
        let m = col.sum() / n;
        let v = col.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / n;
        c.push(m);
        s.push(if v > 0.0 { v.sqrt() } else { 1.0 });
    }
    (c, s)
}

fn scaled(x: ArrayView2<'_, f64>, c: &[f64], s: &[f64]) -> Array2<f64> {
    let mut z = x.to_owned();
    for mut row in z.rows_mut() {
        for (j, v) in row.iter_mut().enumerate() {
            *v = (*v - c[j]) / s[j];
        }
    }
    z
}

/// The `k` rows of `z` nearest to `q` (squared distance, ties to the lower index), nearest
/// first, skipping row `skip` and rows where `exclude` is true.
fn nearest_rows(
    z: ArrayView2<'_, f64>,
    q: &[f64],
    k: usize,
    exclude: impl Fn(usize) -> bool,
    buf: &mut Vec<(f64, usize)>,
) {
    buf.clear();
    for (j, row) in z.rows().into_iter().enumerate() {
        if exclude(j) {
            continue;
        }
        let d: f64 = row.iter().zip(q).map(|(a, b)| (a - b) * (a - b)).sum();
        buf.push((d, j));
    }
    let cmp = |a: &(f64, usize), b: &(f64, usize)| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1));
    if k < buf.len() {
        buf.select_nth_unstable_by(k, cmp);
        buf.truncate(k);
    }
    buf.sort_by(cmp);
}

impl Reference {
    /// Fits the reference on a table's inputs and response (class indices for `classes > 0`).
    /// With `varying`, also computes the smoothed squared residuals for σ²(x) (regression).
    pub fn fit(
        x: ArrayView2<'_, f64>,
        y: ArrayView1<'_, f64>,
        classes: usize,
        k: usize,
        standardize: bool,
        varying: bool,
        source: &str,
    ) -> Reference {
        let (center, scale) = standardizer(x, standardize);
        let z = scaled(x, &center, &scale);
        let mut r = Reference {
            source: source.to_string(),
            k: k.clamp(1, x.nrows().max(1)),
            standardize,
            classes,
            center,
            scale,
            z,
            y: y.to_vec(),
            sq_resid: None,
        };
        if varying && classes == 0 && x.nrows() > r.k {
            let k = r.k;
            let mut buf = Vec::new();
            let sq = (0..x.nrows())
                .map(|i| {
                    let q = r.z.row(i).to_vec();
                    nearest_rows(r.z.view(), &q, k, |j| j == i, &mut buf);
                    let m = buf.iter().map(|&(_, j)| r.y[j]).sum::<f64>() / k as f64;
                    (r.y[i] - m).powi(2) * k as f64 / (k as f64 + 1.0)
                })
                .collect();
            r.sq_resid = Some(sq);
        }
        r
    }

    fn neighbours(&self, row: &[f64], buf: &mut Vec<(f64, usize)>) {
        let q: Vec<f64> = row
            .iter()
            .enumerate()
            .map(|(j, v)| (v - self.center[j]) / self.scale[j])
            .collect();
        nearest_rows(self.z.view(), &q, self.k, |_| false, buf);
    }

    /// The reference's E[y | x] at one input row.
    pub fn mean_at(&self, row: &[f64]) -> f64 {
        let mut buf = Vec::with_capacity(self.y.len());
        self.neighbours(row, &mut buf);
        buf.iter().map(|&(_, j)| self.y[j]).sum::<f64>() / buf.len() as f64
    }

    /// Class probabilities at one input row: neighbour shares with add-one smoothing.
    pub fn probs_at(&self, row: &[f64], out: &mut [f64]) {
        let mut buf = Vec::with_capacity(self.y.len());
        self.neighbours(row, &mut buf);
        out.iter_mut().for_each(|p| *p = 1.0);
        for &(_, j) in &buf {
            if let Some(p) = out.get_mut(self.y[j] as usize) {
                *p += 1.0;
            }
        }
        let total = buf.len() as f64 + out.len() as f64;
        out.iter_mut().for_each(|p| *p /= total);
    }

    /// Varying noise: σ²(x), the k-NN average of the corrected squared leave-one-out residuals;
    /// `None` without varying noise.
    pub fn var_at(&self, row: &[f64]) -> Option<f64> {
        let sq = self.sq_resid.as_ref()?;
        let mut buf = Vec::with_capacity(self.y.len());
        self.neighbours(row, &mut buf);
        Some(buf.iter().map(|&(_, j)| sq[j]).sum::<f64>() / buf.len() as f64)
    }

    /// Human-readable form.
    pub fn describe(&self) -> String {
        format!(
            "k-NN reference (k = {}{}) fitted on the {} rows of {}",
            self.k,
            if self.standardize {
                ", standardized inputs"
            } else {
                ""
            },
            self.y.len(),
            self.source
        )
    }

    /// Human-readable form of the varying noise.
    pub fn describe_noise(&self) -> String {
        format!(
            "gaussian, sd(x)² = k-NN average (k = {}) of the reference's squared leave-one-out residuals × k/(k+1)",
            self.k
        )
    }
}

/// The result of fitting a twin on a table.
#[derive(Debug, Clone)]
pub struct TwinFit {
    /// The chosen k.
    pub k: usize,
    /// Cross-validated loss per tried k: mean squared error (regression) or Brier score (classes).
    pub cv_curve: Vec<(usize, f64)>,
    /// Cross-validated R² (regression) or accuracy (classes) at the chosen k.
    pub quality: f64,
    /// Its standard error (over rows).
    pub quality_stderr: f64,
    /// `R²` or `accuracy`.
    pub quality_name: &'static str,
    /// The noise estimate (regression).
    pub noise: Option<NoiseEstimate>,
    /// k/(k+1) × mean squared cross-validated residual at the chosen k (regression), shown for
    /// comparison with `noise`.
    pub cv_noise: Option<f64>,
}

/// Chooses the reference's k by `CV_FOLDS`-fold cross-validation (folds from
/// `runner::stream(seed, purpose::TWIN, 0)`) and estimates the noise. Errors when the table is
/// too small for cross-validation.
pub fn fit(t: &Table, seed: u64, standardize: bool) -> Result<TwinFit, Error> {
    let n = t.rows();
    let folds = CV_FOLDS.min(n);
    if n < 4 {
        return Err(Error::Usage(format!(
            "{}: {n} rows; a twin needs at least 4",
            t.path.display()
        )));
    }
    let mut rng = crate::runner::stream(seed, crate::runner::purpose::TWIN, 0);
    let fold = crate::audit::fold_assignment(n, folds, &mut rng);
    let min_train = (0..folds)
        .map(|f| fold.iter().filter(|&&g| g != f).count())
        .min()
        .unwrap_or(0);
    let ks: Vec<usize> = K_CANDIDATES
        .iter()
        .copied()
        .filter(|&k| k <= min_train)
        .collect();
    let kmax = *ks.last().unwrap_or(&1);
    let classes = match t.task {
        Task::Classify { classes } => classes,
        Task::Regress => 0,
    };
    let (c, s) = standardizer(t.x.view(), standardize);
    let z = scaled(t.x.view(), &c, &s);
    // Per row and candidate k: the cross-validated loss term.
    let mut loss = vec![vec![0.0; n]; ks.len()];
    let mut hit = vec![vec![0.0; n]; ks.len()];
    let mut buf = Vec::with_capacity(n);
    let mut counts = vec![0.0; classes];
    let mut probs = vec![0.0; classes];
    for i in 0..n {
        let q = z.row(i).to_vec();
        nearest_rows(z.view(), &q, kmax, |j| fold[j] == fold[i], &mut buf);
        let mut sum = 0.0;
        counts.iter_mut().for_each(|v| *v = 0.0);
        let mut next = 0;
        for (m, &(_, j)) in buf.iter().enumerate() {
            sum += t.y[j];
            if classes > 0 {
                counts[t.y[j] as usize] += 1.0;
            }
            while next < ks.len() && ks[next] == m + 1 {
                let k = ks[next] as f64;
                if classes == 0 {
                    let e = t.y[i] - sum / k;
                    loss[next][i] = e * e;
                } else {
                    for (p, cnt) in probs.iter_mut().zip(&counts) {
                        *p = (cnt + 1.0) / (k + classes as f64);
                    }
                    let yi = t.y[i] as usize;
                    loss[next][i] = probs
                        .iter()
                        .enumerate()
                        .map(|(cl, p)| (p - if cl == yi { 1.0 } else { 0.0 }).powi(2))
                        .sum();
                    let best =
                        (0..classes).fold(0, |b, cl| if probs[cl] > probs[b] { cl } else { b });
                    hit[next][i] = if best == yi { 1.0 } else { 0.0 };
                }
                next += 1;
            }
        }
    }
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let cv_curve: Vec<(usize, f64)> = ks.iter().zip(&loss).map(|(&k, l)| (k, mean(l))).collect();
    let bi = (0..cv_curve.len()).fold(0, |b, i| if cv_curve[i].1 < cv_curve[b].1 { i } else { b });
    let k = ks[bi];
    let se_of = |v: &[f64]| {
        let m = mean(v);
        (v.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / ((v.len() - 1) as f64 * v.len() as f64))
            .sqrt()
    };
    let (quality, quality_stderr, quality_name, noise_est, cv_noise) = if classes == 0 {
        let ym = mean(t.y.as_slice().unwrap_or(&t.y.to_vec()));
        let var = t.y.iter().map(|v| (v - ym) * (v - ym)).sum::<f64>() / n as f64;
        let mse = cv_curve[bi].1;
        let est = noise::estimate(
            if t.x.ncols() == 1 {
                noise::Method::Gsjs
            } else {
                noise::Method::NearestNeighbour
            },
            t.x.view(),
            t.y.view(),
        );
        (
            1.0 - mse / var,
            se_of(&loss[bi]) / var,
            "R²",
            est,
            Some(mse * k as f64 / (k as f64 + 1.0)),
        )
    } else {
        (mean(&hit[bi]), se_of(&hit[bi]), "accuracy", None, None)
    };
    Ok(TwinFit {
        k,
        cv_curve,
        quality,
        quality_stderr,
        quality_name,
        noise: noise_est,
        cv_noise,
    })
}

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
    let t = table::load_csv(&table_path, &opts).map_err(|e| {
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
    let train_size = size(&d.train_size, "data.train_size", 2)?;
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
    let fitted = Arc::new(Reference::fit(
        t.x.view(),
        t.y.view(),
        classes,
        k as usize,
        standardize,
        varying,
        &shown,
    ));
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
        eval_size,
        design,
        eval_at_design,
    })
}

/// Options of `lossprism twin`.
#[derive(Debug, Clone)]
pub struct TwinOptions {
    /// The CSV table.
    pub table: PathBuf,
    /// The response column.
    pub target: String,
    /// Feature columns (default: all others).
    pub features: Option<Vec<String>>,
    /// Classification (labels from the target's values).
    pub classes: bool,
    /// Where the scenario goes (its folder anchors the relative `path`).
    pub out: PathBuf,
    /// Seed of the cross-validation folds, also written as the scenario's seed.
    pub seed: u64,
    /// Write `varying = true` noise instead of a constant.
    pub varying: bool,
}

/// `path` relative to folder `from` when both resolve (through `..` if needed), else absolute.
pub fn relative_path(path: &Path, from: &Path) -> String {
    let abs = |p: &Path| std::fs::canonicalize(p).ok();
    let (Some(p), Some(f)) = (abs(path), abs(from)) else {
        return path.display().to_string();
    };
    let pc: Vec<_> = p.components().collect();
    let fc: Vec<_> = f.components().collect();
    let common = pc.iter().zip(&fc).take_while(|(a, b)| a == b).count();
    let mut out = PathBuf::new();
    for _ in common..fc.len() {
        out.push("..");
    }
    for c in &pc[common..] {
        out.push(c.as_os_str());
    }
    out.to_string_lossy().replace('\\', "/")
}

fn toml_str(s: &str) -> String {
    let mut out = String::from("\"");
    for ch in s.chars() {
        match ch {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            c if (c as u32) < 0x20 => out.push_str(&format!("\\u{:04x}", c as u32)),
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

/// The text of a twin scenario for a fitted table (`table_rel`: the CSV relative to the
/// scenario's folder).
pub fn scenario_text(o: &TwinOptions, t: &Table, f: &TwinFit, table_rel: &str) -> String {
    let stem = o
        .table
        .file_stem()
        .map(|s| s.to_string_lossy().to_string())
        .unwrap_or_else(|| "table".into());
    let mut s = String::new();
    s.push_str(&format!(
        "# Simulated twin of {}, written by `lossprism twin`.\n",
        o.table.display()
    ));
    s.push_str(&format!(
        "# Inputs: the table's {} rows resampled with replacement; truth: k-NN reference (k = {} by {}-fold\n",
        t.rows(),
        f.k,
        CV_FOLDS.min(t.rows())
    ));
    s.push_str(&format!(
        "# cross-validation, cross-validated {} = {:.4} ± {:.4}), refitted on the table at plan time.\n",
        f.quality_name, f.quality, f.quality_stderr
    ));
    if let Some(e) = &f.noise {
        s.push_str(&format!(
            "# Noise: σ² = {:.6} ± {:.6} ({}).\n",
            e.value,
            e.stderr,
            e.method.describe()
        ));
    }
    s.push_str("# Edit [model] to the family and grid you want to study.\n");
    s.push_str(&format!("name = {}\n", toml_str(&format!("{stem}-twin"))));
    s.push_str(&format!(
        "about = {}\n",
        toml_str(&format!(
            "Simulated twin of {}: target {}, known truth and noise by construction.",
            o.table
                .file_name()
                .map(|s| s.to_string_lossy().to_string())
                .unwrap_or_default(),
            t.target
        ))
    ));
    s.push_str(&format!("seed = {}\nreplicates = 200\n\n[data]\n", o.seed));
    s.push_str("source = \"twin\"\n");
    s.push_str(&format!("path = {}\n", toml_str(table_rel)));
    s.push_str(&format!("target = {}\n", toml_str(&t.target)));
    if let Some(fs) = &o.features {
        let list: Vec<String> = fs.iter().map(|f| toml_str(f)).collect();
        s.push_str(&format!("features = [{}]\n", list.join(", ")));
    }
    s.push_str(&format!("train_size = {}\n", t.rows()));
    s.push_str(&format!(
        "reference = {{ family = \"knn\", k = {}, standardize = true }}\n",
        f.k
    ));
    match t.task {
        Task::Classify { .. } => {
            let labels: Vec<String> = t.labels.iter().map(|l| toml_str(l)).collect();
            s.push_str(&format!(
                "\n[data.classes]\nlabels = [{}]\n",
                labels.join(", ")
            ));
        }
        Task::Regress => {
            s.push_str("\n[data.noise]\n");
            if o.varying {
                s.push_str("varying = true\n");
            } else {
                let v = f.noise.map(|e| e.value).unwrap_or(0.0).max(0.0);
                s.push_str(&format!("sd = {}\n", v.sqrt()));
            }
        }
    }
    s.push_str("\n[model]\nfamily = \"tree\"\ngrid = { from = 1, to = 8 }\n");
    s.push_str("\n[audit]\nfolds = 5\n");
    s
}

/// `lossprism twin`: loads the table, fits the twin, writes the scenario to `o.out` and returns
/// the lines to print (fit quality, noise estimate with its standard error, where it went).
pub fn command(o: &TwinOptions) -> Result<String, Error> {
    let opts = TableOptions {
        target: o.target.clone(),
        features: o.features.clone(),
        missing: Missing::Error,
        target_kind: if o.classes {
            TargetKind::Classes(None)
        } else {
            TargetKind::Numeric
        },
        min_rows: 5,
    };
    let t = table::load_csv(&o.table, &opts)?;
    let f = fit(&t, o.seed, true)?;
    let folder = match o.out.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let rel = relative_path(&o.table, &folder);
    let text = scenario_text(o, &t, &f, &rel);
    // Check the scenario plans before writing it.
    let spec = crate::scenario::parse(&text, &o.out.display().to_string())?;
    crate::scenario::Plan::from_spec(
        &spec,
        &text,
        &o.out.display().to_string(),
        &folder,
        &Default::default(),
    )?;
    crate::report::write_atomic(&o.out, text.as_bytes())?;
    let mut out = format!(
        "{}: {} rows, {} inputs ({})\n",
        o.table.display(),
        t.rows(),
        t.x.ncols(),
        t.names.join(", ")
    );
    for e in &t.encodings {
        out.push_str(&format!("  {}\n", e.describe()));
    }
    out.push_str(&format!(
        "reference: k-NN on standardized inputs, k = {} chosen by {}-fold cross-validation; cross-validated {} = {} ± {}\n",
        f.k,
        CV_FOLDS.min(t.rows()),
        f.quality_name,
        crate::report::fmt_num(f.quality),
        crate::report::fmt_se(f.quality_stderr)
    ));
    if let Some(e) = &f.noise {
        out.push_str(&format!(
            "noise: σ² = {} ± {} ({}); the reference's cross-validated residuals give {}\n",
            crate::report::fmt_num(e.value),
            crate::report::fmt_se(e.stderr),
            e.method.describe(),
            crate::report::fmt_num(f.cv_noise.unwrap_or(f64::NAN))
        ));
        if o.varying {
            out.push_str(
                "noise written as varying: σ²(x) smoothed from the reference's squared residuals\n",
            );
        }
    }
    out.push_str(&format!(
        "wrote {} (edit [model]; run it with `lossprism run {}`)\n",
        o.out.display(),
        o.out.display()
    ));
    Ok(out)
}

/// Draws `n` rows (with replacement) of `rows` into an `n × p` matrix, one uniform index per row
/// in order (the twin's input distribution).
pub fn resample_rows<R: Rng + ?Sized>(rows: &Array2<f64>, n: usize, rng: &mut R) -> Array2<f64> {
    let mut x = Array2::zeros((n, rows.ncols()));
    for i in 0..n {
        let r = rng.gen_range(0..rows.nrows());
        x.row_mut(i).assign(&rows.row(r));
    }
    x
}
