//! What every data source gives the replicate loop: the fixed part of a run ([`Prepared`]:
//! evaluation points and the truth there) and, for replicate r, its training set and the points
//! it evaluates ([`Draw`]), drawn only from the streams of [`crate::rng`].
//!
//! - **Synthetic and twin**: evaluation points drawn once (`eval_seed`, purpose EVAL), a fixed
//!   design once (purpose DESIGN); replicate r draws its training set and fresh responses at
//!   every evaluation point from `(seed, REPLICATE, r)`.
//! - **Table**: the evaluation points are the working rows (the holdout excluded) with their
//!   observed responses; replicate r draws its training rows from `(seed, REPLICATE, r)` and
//!   evaluates the rows it held out.

use std::borrow::Cow;

use ndarray::{Array1, Array2, Axis};

use crate::dataset::noise::{self, NoiseEstimate};
use crate::dataset::{resample, Table};
use crate::decompose::Target;
use crate::dgp::draw_labels;
use crate::error::Error;
use crate::family::Task;
use crate::rng::{purpose, stream};
use crate::scenario::{Design, Plan, Source, SyntheticPlan};

/// Everything fixed across replicates.
#[derive(Debug, Clone)]
pub struct Prepared {
    /// Evaluation inputs `m × p` (a table's working rows).
    pub eval_x: Array2<f64>,
    /// Regression: f at the evaluation points (a table: the observed responses).
    /// Classification: the Bayes class index (a table: the observed label).
    pub eval_truth: Array1<f64>,
    /// σ at the evaluation points (0 for classification and tables).
    pub eval_sd: Array1<f64>,
    /// Classification: class probabilities at the evaluation points (`m × K`, row-major).
    pub eval_probs: Option<Array2<f64>>,
    /// Fixed design: training inputs, f and σ there (f = 0, σ = 0 for classification).
    pub fixed: Option<(Array2<f64>, Array1<f64>, Array1<f64>)>,
    /// Fixed design, classification: class probabilities at the training inputs.
    pub fixed_probs: Option<Array2<f64>>,
    /// Table source: the working rows and the noise estimate on them (regression).
    pub table: Option<TableRun>,
}

/// The table side of a prepared run.
#[derive(Debug, Clone)]
pub struct TableRun {
    /// The working rows (holdout excluded).
    pub work: Table,
    /// The noise-variance estimate on the working rows (regression only).
    pub noise: Option<NoiseEstimate>,
}

impl Prepared {
    /// σ² at the evaluation points.
    pub fn noise_var(&self) -> Vec<f64> {
        self.eval_sd.iter().map(|s| s * s).collect()
    }

    /// Number of evaluation points.
    pub fn points(&self) -> usize {
        self.eval_x.nrows()
    }

    /// The truth the decomposition compares with, borrowing `noise_var` (from
    /// [`Prepared::noise_var`]) and `probs` (the evaluation probabilities, flattened).
    pub fn target<'a>(&'a self, noise_var: &'a [f64], probs: &'a Option<Vec<f64>>) -> Target<'a> {
        match &self.table {
            Some(t) => Target::Observed {
                y: self.eval_truth.as_slice().expect("owned contiguous array"),
                noise: t.noise.map(|n| (n.value, n.stderr)),
            },
            None => Target::Known {
                truth: self.eval_truth.as_slice().expect("owned contiguous array"),
                noise_var,
                probs: probs.as_deref(),
            },
        }
    }

    /// The evaluation probabilities flattened row-major (classification).
    pub fn flat_probs(&self) -> Option<Vec<f64>> {
        self.eval_probs
            .as_ref()
            .map(|p| p.iter().copied().collect())
    }
}

/// Index of the largest value (first on ties).
fn argmax(row: ndarray::ArrayView1<'_, f64>) -> usize {
    let mut best = 0;
    for (i, &v) in row.iter().enumerate() {
        if v > row[best] {
            best = i;
        }
    }
    best
}

/// Prefixes a data error with the scenario file, so it names file and key, and the key's line
/// when the message starts with one (``key `data.truth.formula`: ...``) and the file can be
/// read again.
fn with_file(plan: &Plan, e: Error) -> Error {
    match e {
        Error::Data(m) => {
            let line = m
                .strip_prefix("key `")
                .and_then(|r| r.split_once('`'))
                .and_then(|(key, _)| {
                    // The key itself (`data.truth.formula`), else the table it is in.
                    let key = key.strip_prefix("data.")?;
                    let text = std::fs::read_to_string(&plan.file).ok()?;
                    crate::scenario::data_key_line(&text, key).or_else(|| {
                        let (table, _) = key.rsplit_once('.')?;
                        crate::scenario::data_key_line(&text, table)
                    })
                });
            match line {
                Some(l) => Error::Data(format!("{}:{l}: {m}", plan.file)),
                None => Error::Data(format!("{}: {m}", plan.file)),
            }
        }
        other => other,
    }
}

/// [`prepare`] for a run that fits (or `validate`): first every family's
/// [`crate::family::Family::check_ready`]. (`merge` prepares without it: it fits nothing, and
/// an external estimator's scripts may be absent where it runs.)
pub fn prepare_to_fit(plan: &Plan) -> Result<Prepared, Error> {
    for model in &plan.models {
        model.family.check_ready().map_err(|m| {
            Error::Usage(format!(
                "{}: [model] `{}`: {m}",
                plan.file,
                crate::fmt::clip(&model.label, 64)
            ))
        })?;
    }
    prepare(plan)
}

/// Draws the evaluation points (and a fixed design) of a plan; a table's working rows and
/// noise estimate.
pub fn prepare(plan: &Plan) -> Result<Prepared, Error> {
    let (prepared, far) = prepare_inner(plan).map_err(|e| with_file(plan, e))?;
    check_scale(plan, &prepared, far).map_err(|e| with_file(plan, e))?;
    Ok(prepared)
}

/// Every input draw of a synthetic run: each replicate's training draws at every size, and
/// the evaluation points.
fn input_draws(plan: &Plan, s: &SyntheticPlan) -> f64 {
    let sizes: f64 = s.sizes.iter().map(|&m| m as f64).sum();
    plan.replicates as f64 * sizes + s.eval_size as f64
}

/// Smallest largest magnitude of a regression's responses under the squared loss (truth or
/// noise sd at the evaluation points; a table's responses), and of a synthetic noise sd that is
/// not 0: the terms are squares, and their standard errors sum squares of terms, i.e. fourth
/// powers of the responses, which fall into the subnormal range below about 1e-77 (a hostile
/// sweep: responses of 1e-100 printed every standard error as 0.00, exit 0, and `check` then
/// called same-sized terms worse).
pub const RESPONSE_MIN: f64 = 1e-60;

/// Largest magnitude of a regression's responses under the squared loss: the fourth powers
/// behind the standard errors overflow a little above 1e76 (a hostile sweep: from 1e77 up the
/// bias²'s standard error lost its second-order part, 21–37 % too small, exit 0).
pub const RESPONSE_MAX: f64 = 1e60;

/// Largest magnitude of a table's input column that a fit or noise estimate standardizes: the
/// squares of the column, summed, overflow beyond about 1e154.
const COLUMN_MAX: f64 = 1e150;

/// Smallest largest mean count under the Poisson deviance: its standard errors are built from
/// squared deviances (of the counts' order), which underflow below about 1e-154.
const COUNT_MIN: f64 = 1e-150;

/// Refuses responses so small that every squared term underflows to 0 (the run would report a
/// decomposition of zeros, and a reading drawn from them, with exit 0), or so large that their
/// squares overflow (the run would do all its work and then refuse its non-finite terms).
/// `validate` runs it too, through [`prepare`].
/// `far`: the largest |truth| and sd at the inputs' far quantiles ([`crate::dgp::Synthetic::probe`]).
fn check_scale(plan: &Plan, p: &Prepared, far: (f64, f64)) -> Result<(), Error> {
    // A table's input columns: standardizing (k-NN, ridge, the noise estimators) squares and
    // sums them; beyond about 1e154 the sums overflow and a column was silently standardized to
    // zeros (a synthetic input is held to the same bound when it is planned).
    // Trees compare inputs and never square them: with only tree families and no noise
    // estimator (a classification table) a large column is fine.
    let squares = plan.models.iter().any(|m| m.family.squares_inputs())
        || (plan.task == Task::Regress && !plan.loss.count_responses());
    if let (Source::Table(t), true) = (&plan.source, squares) {
        for (col, name) in p.eval_x.columns().into_iter().zip(&t.table.names) {
            let big = col.iter().fold(0.0_f64, |a, v| a.max(v.abs()));
            if big > COLUMN_MAX {
                return Err(Error::Data(format!(
                    "column `{name}` of {} reaches {big:.1e}; the fits or the noise estimate \
                     square and sum the inputs, which overflows beyond about {COLUMN_MAX:.0e}; \
                     rescale the column (for example divide it by a power of ten)",
                    t.table.path.display()
                )));
            }
            let (lo, hi) = col
                .iter()
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
                    (lo.min(v), hi.max(v))
                });
            let spread = hi - lo;
            let standardizes = plan.models.iter().find(|m| m.family.standardizes_inputs());
            if let (Some(m), Some((sd, size))) =
                (standardizes, crate::scenario::plan::offset_hidden(col))
            {
                return Err(Error::Data(format!(
                    "column `{name}` of {} has a standard deviation of {sd:.2e} beside values of \
                     {size:.3e}, below {:e} of their size: `{}` standardizes its inputs and \
                     reads a training set whose spread falls below a tenth of that as rounding, \
                     i.e. as constant; subtract an offset from the column",
                    t.table.path.display(),
                    crate::scenario::plan::offset_share(),
                    m.family.name()
                )));
            }
            if spread > 0.0 && spread < crate::scenario::plan::INPUT_MIN_SPREAD {
                return Err(Error::Data(format!(
                    "column `{name}` of {} varies by only {spread:.1e}; the fits or the noise \
                     estimate square differences of inputs, which underflow to 0 below about \
                     1e-154, so the column would be read as constant; rescale it (for example \
                     multiply it by a power of ten)",
                    t.table.path.display()
                )));
            }
        }
    }
    if plan.task != Task::Regress {
        return Ok(());
    }
    if plan.loss.count_responses() {
        return check_count_scale(plan, p);
    }
    let big = p
        .eval_truth
        .iter()
        .chain(p.eval_sd.iter())
        .fold(0.0_f64, |a, v| a.max(v.abs()));
    if big > RESPONSE_MAX || !big.is_finite() {
        // A synthetic source names the key that makes them large (`sd = 1e152` named none).
        let truth_big = p.eval_truth.iter().fold(0.0_f64, |a, v| a.max(v.abs()));
        let twin = matches!(&plan.source, Source::Synthetic(s) if s.process.is_twin());
        let key = if (truth_big >= big || truth_big.is_nan()) && twin {
            // A twin's truth is its reference: a hand-edited blend weight or part made it
            // large (a hostile sweep found the message naming a [data.truth] a twin lacks).
            " (the twin's truth, its reference in [data.reference]: check its `weights` and \
             parts against what `lossprism twin` wrote)"
        } else if truth_big >= big || truth_big.is_nan() {
            " (the truth, [data.truth])"
        } else {
            " (the noise's standard deviation, [data.noise])"
        };
        let whose = target_column(plan).map_or(key.to_string(), |c| format!(" ({c})"));
        return Err(Error::Data(format!(
            "the responses{whose} reach {big:.1e} in size, above {RESPONSE_MAX:.0e}: the \
             standard errors sum fourth powers of the responses, which overflow beyond about \
             1e76 (their squares beyond 1e154); rescale the response (for example divide it by \
             a power of ten)"
        )));
    }
    // Training draws reach further into the inputs' tails than the evaluation points do.
    let (truth, sd) = far;
    if let (Source::Synthetic(s), true) = (&plan.source, truth.max(sd) > RESPONSE_MAX) {
        let draws = input_draws(plan, s);
        let what = if truth >= sd {
            "the truth, [data.truth]"
        } else {
            "the noise's standard deviation, [data.noise]"
        };
        return Err(Error::Data(format!(
            "the responses ({what}) reach {:.1e} in size at the inputs' far quantiles ({:.1e} \
             from either end, which a run of {draws:.0} input draws passes with probability \
             about 63 %), above {RESPONSE_MAX:.0e}: the standard errors sum fourth powers of \
             the responses, which overflow beyond about 1e76; rescale the response or narrow the \
             inputs' laws",
            truth.max(sd),
            1.0 / draws.max(2.0)
        )));
    }
    if big > 0.0 && big < RESPONSE_MIN {
        return Err(Error::Data(format!(
            "the responses{} are at most {big:.1e} in size, below {RESPONSE_MIN:.0e}: the \
             standard errors sum fourth powers of the responses, which lose their digits below \
             about 1e-77 (and underflow to 0); rescale the response (for example multiply it by \
             a power of ten)",
            target_column(plan).map_or(String::new(), |c| format!(" ({c})"))
        )));
    }
    // A tiny noise beside a truth of ordinary size: the fits' variances are of the noise's
    // order squared, and their standard errors of its fourth power.
    let sd_big = p.eval_sd.iter().fold(0.0_f64, |a, v| a.max(v.abs()));
    if sd_big > 0.0 && sd_big < RESPONSE_MIN {
        return Err(Error::Data(format!(
            "the noise's standard deviation ([data.noise]) is at most {sd_big:.1e}, below \
             {RESPONSE_MIN:.0e}: the variances are of its order squared and their standard \
             errors of its fourth power, which loses its digits below about 1e-77; give `sd = \
             0.0` for a noise-free process, or rescale the response"
        )));
    }
    Ok(())
}

/// A table's target in words (`column `y` of t.csv`); `None` for a synthetic source.
fn target_column(plan: &Plan) -> Option<String> {
    match &plan.source {
        Source::Table(t) => Some(format!(
            "column `{}` of {}",
            t.table.target,
            t.table.path.display()
        )),
        _ => None,
    }
}

/// Largest mean count the Poisson deviance's terms are computed for. Its terms (of order 1) are
/// differences of sums of numbers of order λ, so they keep about 16 − log10 λ digits: measured
/// with k-NN on a constant mean (`lossprism` itself, 400 replicates), the bias at k = n moved by
/// less than its standard error up to λ = 1e10, by ten of them at 1e11, and went negative at
/// 1e12. 1e8 keeps the rounding near 1e-7, far below any standard error a run can reach.
pub const COUNT_MAX: f64 = 1e8;

/// Refuses mean counts (a synthetic truth at the evaluation points, a table's counts) above
/// [`COUNT_MAX`] (the run would report rounding as bias and variance, with exit 0), or with
/// none above [`COUNT_MIN`] (every standard error would underflow to 0).
fn check_count_scale(plan: &Plan, p: &Prepared) -> Result<(), Error> {
    let big = p.eval_truth.iter().fold(0.0_f64, |a, v| a.max(v.abs()));
    if big > COUNT_MAX || !big.is_finite() {
        let whose = target_column(plan).map_or(
            "the mean count (the truth at the evaluation points) reaches".into(),
            |c| format!("the counts ({c}) reach"),
        );
        return Err(Error::Data(format!(
            "{whose} {big:.1e}, above {COUNT_MAX:.0e}: the Poisson deviance's terms there are \
             differences of numbers that large and lose their digits; counts this large are \
             nearly Gaussian, so score them with `kind = \"squared\"` in [loss]"
        )));
    }
    // The deviance scales with the counts, and its standard errors are built from its squares:
    // counts of 1e-200 printed every standard error as 0 with exit 0.
    if big > 0.0 && big < COUNT_MIN {
        let (whose, what) = match target_column(plan) {
            Some(c) => (format!("the counts ({c}) are"), "the column"),
            None => (
                "the mean counts (the truth at the evaluation points) are".to_string(),
                "the truth in [data.truth]",
            ),
        };
        return Err(Error::Data(format!(
            "{whose} at most {big:.1e} in size, so the squares behind the standard errors \
             underflow to 0; counts are whole numbers of events: rescale {what} (for example \
             multiply it by a power of ten)"
        )));
    }
    Ok(())
}

/// The prepared run, and the largest |truth| and sd at the inputs' far quantiles (`(0, 0)`
/// where they are not probed).
fn prepare_inner(plan: &Plan) -> Result<(Prepared, (f64, f64)), Error> {
    let s = match &plan.source {
        Source::Synthetic(s) => s,
        Source::Table(t) => {
            let work = t.work_table();
            let m = work.rows();
            // The Gaussian noise-variance estimate splits the squared loss's bias²+noise; a loss
            // on counts folds the noise into the bias instead.
            let noise = match plan.task {
                Task::Regress if !plan.loss.count_responses() => {
                    noise::estimate(t.noise_method, work.x.view(), work.y.view())
                }
                _ => None,
            };
            // A variance is never negative; the Gamma test's intercept can be. Within two
            // standard errors or a tenth of the responses' variance of 0 that is sampling (a
            // table with little or no noise: the estimate and its standard error are reported
            // as they are); further below, the
            // table is not a smooth function plus noise at the neighbours' scale (one mistyped
            // input value or repeated inputs do it), and the bias² it would give is not to be
            // believed.
            if let Some(n) = noise.as_ref() {
                if let Some(why) = noise::negative_refusal(n.method, n.value, n.stderr, &work) {
                    return Err(Error::Data(format!(
                        "{}: {why}; fix the table, or set `noise_estimator = \"nn\"` or \
                         `\"plane\"` in [data] (never negative)",
                        t.table.path.display()
                    )));
                }
            }
            return Ok((
                Prepared {
                    eval_x: work.x.clone(),
                    eval_truth: work.y.clone(),
                    eval_sd: Array1::zeros(m),
                    eval_probs: None,
                    fixed: None,
                    fixed_probs: None,
                    table: Some(TableRun { work, noise }),
                },
                (0.0, 0.0),
            ));
        }
    };
    // The formulas at many draws of the inputs (its own stream; about 2 million values at
    // most): a formula that is not finite only where some training draws land stopped the run
    // at its first such draw, after `validate` had passed the file.
    // A fixed design evaluates the formulas only at its own rows and the evaluation points,
    // both checked below.
    let far = if s.design != Design::Fixed {
        let p = s.process.inputs.len().max(1);
        let n = (2_000_000 / p).clamp(20, 10_000);
        let mut rng = stream(plan.seed, purpose::PROBE, 0);
        let mut sizes = s.sizes.clone();
        sizes.push(s.eval_size);
        s.process.probe(n, input_draws(plan, s), &sizes, &mut rng)?
    } else {
        (0.0, 0.0)
    };
    let classify = matches!(plan.task, Task::Classify { .. });
    let mut fixed_probs = None;
    let fixed = if s.design == Design::Fixed {
        let mut rng = stream(plan.eval_seed, purpose::DESIGN, 0);
        let x = s.process.draw_inputs(s.train_size, &mut rng);
        if classify {
            fixed_probs = Some(s.process.probs_at(x.view())?);
            let n = x.nrows();
            Some((x, Array1::zeros(n), Array1::zeros(n)))
        } else {
            let f = s.process.truth_at(x.view())?;
            let sd = s.process.sd_at(x.view())?;
            Some((x, f, sd))
        }
    } else {
        None
    };
    let eval_x = match (&fixed, s.eval_at_design) {
        (Some((x, _, _)), true) => x.clone(),
        _ => {
            let mut rng = stream(plan.eval_seed, purpose::EVAL, 0);
            s.process.draw_inputs(s.eval_size, &mut rng)
        }
    };
    let m = eval_x.nrows();
    if classify {
        let probs = s.process.probs_at(eval_x.view())?;
        let bayes = Array1::from_iter(probs.rows().into_iter().map(|r| argmax(r) as f64));
        Ok((
            Prepared {
                eval_x,
                eval_truth: bayes,
                eval_sd: Array1::zeros(m),
                eval_probs: Some(probs),
                fixed,
                fixed_probs,
                table: None,
            },
            far,
        ))
    } else {
        let eval_truth = s.process.truth_at(eval_x.view())?;
        let eval_sd = s.process.sd_at(eval_x.view())?;
        Ok((
            Prepared {
                eval_x,
                eval_truth,
                eval_sd,
                eval_probs: None,
                fixed,
                fixed_probs,
                table: None,
            },
            far,
        ))
    }
}

/// One replicate's training set (for the largest training size) and the points it evaluates. A
/// fixed design and the fixed evaluation points are borrowed, not copied. Smaller training sizes
/// use nested prefixes of it ([`Draw::size`]).
#[derive(Debug)]
pub struct Draw<'a> {
    /// Training inputs `n × p`.
    pub x: Cow<'a, Array2<f64>>,
    /// Training responses.
    pub y: Array1<f64>,
    /// The evaluated point indices (`None`: every evaluation point).
    pub held: Option<Vec<usize>>,
    /// Inputs of the evaluated points.
    pub eval: Cow<'a, Array2<f64>>,
    /// The response seen at each evaluated point: a fresh draw (synthetic) or the observed
    /// value (table).
    pub response: Array1<f64>,
    /// A table's learning curve: the random order of the working rows (size n trains on the
    /// first n and is evaluated on the rest).
    pub order: Option<Vec<usize>>,
}

/// The training set and evaluated points of one training size within a replicate's draw.
#[derive(Debug)]
pub struct SizeDraw<'d> {
    /// Training inputs.
    pub x: ndarray::ArrayView2<'d, f64>,
    /// Training responses.
    pub y: ndarray::ArrayView1<'d, f64>,
    /// The evaluated point indices (`None`: every evaluation point).
    pub held: Option<std::borrow::Cow<'d, [usize]>>,
    /// Inputs of the evaluated points.
    pub eval: std::borrow::Cow<'d, Array2<f64>>,
    /// Responses seen at the evaluated points.
    pub response: std::borrow::Cow<'d, Array1<f64>>,
}

impl<'a> Draw<'a> {
    /// The training set of size `n` (a nested prefix of the draw) and the points it evaluates.
    pub fn size<'d>(&'d self, n: usize, prep: &'d Prepared) -> SizeDraw<'d> {
        use ndarray::s;
        use std::borrow::Cow;
        match (&self.order, &prep.table) {
            (Some(order), Some(t)) => {
                let mut held: Vec<usize> = order[n..].to_vec();
                held.sort_unstable();
                SizeDraw {
                    x: self.x.slice(s![..n, ..]),
                    y: self.y.slice(s![..n]),
                    eval: Cow::Owned(t.work.x.select(Axis(0), &held)),
                    response: Cow::Owned(t.work.y.select(Axis(0), &held)),
                    held: Some(Cow::Owned(held)),
                }
            }
            _ => SizeDraw {
                x: self.x.slice(s![..n, ..]),
                y: self.y.slice(s![..n]),
                held: self.held.as_deref().map(Cow::Borrowed),
                eval: Cow::Borrowed(self.eval.as_ref()),
                response: Cow::Borrowed(&self.response),
            },
        }
    }
}

/// Replicate `r`'s draw.
pub fn draw<'a>(plan: &Plan, prep: &'a Prepared, r: u64) -> Result<Draw<'a>, Error> {
    draw_inner(plan, prep, r).map_err(|e| with_file(plan, e))
}

fn draw_inner<'a>(plan: &Plan, prep: &'a Prepared, r: u64) -> Result<Draw<'a>, Error> {
    let mut rng = stream(plan.seed, purpose::REPLICATE, r);
    let s = match &plan.source {
        Source::Synthetic(s) => s,
        Source::Table(tp) => {
            let work = &prep
                .table
                .as_ref()
                .expect("a table plan is prepared with its rows")
                .work;
            let n = work.rows();
            if tp.sizes.is_some() {
                // A learning curve: one random order of the rows; sizes take nested prefixes.
                let order = crate::rng::permutation(n, &mut rng);
                return Ok(Draw {
                    x: Cow::Owned(work.x.select(Axis(0), &order)),
                    y: work.y.select(Axis(0), &order),
                    eval: Cow::Owned(Array2::zeros((0, work.x.ncols()))),
                    response: Array1::zeros(0),
                    held: None,
                    order: Some(order),
                });
            }
            let (train, held) = resample::draw(tp.scheme, n, &mut rng);
            return Ok(Draw {
                x: Cow::Owned(work.x.select(Axis(0), &train)),
                y: work.y.select(Axis(0), &train),
                eval: Cow::Owned(work.x.select(Axis(0), &held)),
                response: work.y.select(Axis(0), &held),
                held: Some(held),
                order: None,
            });
        }
    };
    let eval = Cow::Borrowed(&prep.eval_x);
    match (&prep.eval_probs, &prep.fixed) {
        (None, Some((x, f, sd))) => {
            let y = s.process.respond(f, sd, &mut rng);
            let fresh = s.process.respond(&prep.eval_truth, &prep.eval_sd, &mut rng);
            Ok(Draw {
                x: Cow::Borrowed(x),
                y,
                held: None,
                eval,
                response: fresh,
                order: None,
            })
        }
        (None, None) => {
            let x = s.process.draw_inputs(s.train_size, &mut rng);
            let f = s.process.truth_at(x.view())?;
            let sd = s.process.sd_at(x.view())?;
            let y = s.process.respond(&f, &sd, &mut rng);
            let fresh = s.process.respond(&prep.eval_truth, &prep.eval_sd, &mut rng);
            Ok(Draw {
                x: Cow::Owned(x),
                y,
                held: None,
                eval,
                response: fresh,
                order: None,
            })
        }
        (Some(eval_probs), fixed) => {
            let (x, probs) = match (fixed, &prep.fixed_probs) {
                (Some((x, _, _)), Some(p)) => (Cow::Borrowed(x), Cow::Borrowed(p)),
                _ => {
                    let x = s.process.draw_inputs(s.train_size, &mut rng);
                    let p = s.process.probs_at(x.view())?;
                    (Cow::Owned(x), Cow::Owned(p))
                }
            };
            let y = draw_labels(&probs, &mut rng);
            let fresh = draw_labels(eval_probs, &mut rng);
            Ok(Draw {
                x,
                y,
                held: None,
                eval,
                response: fresh,
                order: None,
            })
        }
    }
}

/// Replicate `r`'s training set (inputs `n × p` and responses), re-drawn from its own stream:
/// exactly the data the run fitted for that replicate (the per-point picture shows it).
pub fn training_set(
    plan: &Plan,
    prep: &Prepared,
    r: u64,
) -> Result<(Array2<f64>, Array1<f64>), Error> {
    let d = draw(plan, prep, r)?;
    Ok((d.x.into_owned(), d.y))
}
