//! The replicate loop. The runner owns all randomness: each replicate r draws from its own
//! ChaCha8 stream derived from (master seed, purpose, r); evaluation points and a fixed design
//! come from their own streams. Replicates are grouped into blocks (contiguous index ranges);
//! each block is accumulated sequentially and blocks are folded in index order, so results are
//! bit-identical for any thread count, any shard split and after a resume.

use std::borrow::Cow;

use ndarray::{Array1, Array2};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use crate::decompose::zero_one::{self, ZeroOneAcc, ZeroOneSummary};
use crate::decompose::{self, SquaredAcc, SquaredSummary};
use crate::dgp::{add_noise, draw_labels};
use crate::error::Error;
use crate::family::{FitInput, Task};
use crate::scenario::{Design, LossKind, Plan, Source};

/// Stream purposes (the high bits of the ChaCha stream number).
pub mod purpose {
    /// Evaluation inputs.
    pub const EVAL: u64 = 1;
    /// The training inputs of a fixed design.
    pub const DESIGN: u64 = 2;
    /// Replicate r's training set and fresh responses.
    pub const REPLICATE: u64 = 3;
    /// The locked holdout rows of a table (drawn once from the file's seed).
    pub const HOLDOUT: u64 = 4;
    /// Replicate r's cross-validation folds in the selection audit (`crate::audit`).
    pub const AUDIT: u64 = 5;
    /// The folds that choose a twin's reference k (`crate::twin`).
    pub const TWIN: u64 = 6;
}

/// The random stream for (seed, purpose, index): ChaCha8 keyed by the seed, with the stream
/// number `purpose << 48 | index`. Streams never overlap.
pub fn stream(seed: u64, purpose: u64, index: u64) -> ChaCha8Rng {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream((purpose << 48) | (index & ((1 << 48) - 1)));
    rng
}

/// Everything fixed across replicates: evaluation points, truth and noise there, and a fixed
/// design if any.
#[derive(Debug, Clone)]
pub struct Prepared {
    /// Evaluation inputs `m × p`.
    pub eval_x: Array2<f64>,
    /// Regression: f at the evaluation points. Classification: the Bayes class index.
    pub eval_truth: Array1<f64>,
    /// σ at the evaluation points (0 for classification).
    pub eval_sd: Array1<f64>,
    /// Classification: class probabilities at the evaluation points (`m × K`).
    pub eval_probs: Option<Array2<f64>>,
    /// Fixed design: training inputs, f and σ there (f = 0, σ = 0 for classification).
    pub fixed: Option<(Array2<f64>, Array1<f64>, Array1<f64>)>,
    /// Fixed design, classification: class probabilities at the training inputs.
    pub fixed_probs: Option<Array2<f64>>,
}

impl Prepared {
    /// σ² at the evaluation points.
    pub fn noise_var(&self) -> Vec<f64> {
        self.eval_sd.iter().map(|s| s * s).collect()
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

/// Draws the evaluation points (and a fixed design) for a plan.
pub fn prepare(plan: &Plan) -> Result<Prepared, Error> {
    prepare_inner(plan).map_err(|e| with_file(plan, e))
}

/// Prefixes a data error with the scenario file, so it names file and key.
fn with_file(plan: &Plan, e: Error) -> Error {
    match e {
        Error::Data(m) => Error::Data(format!("{}: {m}", plan.file)),
        other => other,
    }
}

fn prepare_inner(plan: &Plan) -> Result<Prepared, Error> {
    let s = match &plan.source {
        Source::Synthetic(s) => s,
        // A table's evaluation points are its working rows (observed responses as "truth");
        // its replicate loop lives in `crate::table::resample`.
        Source::Table(t) => {
            let w = t.work_table();
            let m = w.rows();
            return Ok(Prepared {
                eval_x: w.x,
                eval_truth: w.y,
                eval_sd: Array1::zeros(m),
                eval_probs: None,
                fixed: None,
                fixed_probs: None,
            });
        }
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
        Ok(Prepared {
            eval_x,
            eval_truth: bayes,
            eval_sd: Array1::zeros(m),
            eval_probs: Some(probs),
            fixed,
            fixed_probs,
        })
    } else {
        let eval_truth = s.process.truth_at(eval_x.view())?;
        let eval_sd = s.process.sd_at(eval_x.view())?;
        Ok(Prepared {
            eval_x,
            eval_truth,
            eval_sd,
            eval_probs: None,
            fixed,
            fixed_probs,
        })
    }
}

/// The accumulator of one block, by loss.
#[derive(Debug, Clone, PartialEq)]
pub enum BlockAcc {
    /// Squared loss.
    Squared(SquaredAcc),
    /// 0-1 loss.
    ZeroOne(ZeroOneAcc),
}

/// One replicate's training set and fresh responses at the evaluation points. A fixed design
/// is borrowed, not copied, in every replicate.
struct Draw<'a> {
    x: Cow<'a, Array2<f64>>,
    y: Array1<f64>,
    fresh: Array1<f64>,
}

fn draw_replicate<'a>(plan: &Plan, prep: &'a Prepared, r: u64) -> Result<Draw<'a>, Error> {
    draw_replicate_inner(plan, prep, r).map_err(|e| with_file(plan, e))
}

fn draw_replicate_inner<'a>(plan: &Plan, prep: &'a Prepared, r: u64) -> Result<Draw<'a>, Error> {
    let Source::Synthetic(s) = &plan.source else {
        return Err(Error::Usage(format!(
            "{}: table scenarios run whole (`lossprism run FILE`); --shard and --checkpoint do not support them yet",
            plan.file
        )));
    };
    let mut rng = stream(plan.seed, purpose::REPLICATE, r);
    match (&prep.eval_probs, &prep.fixed) {
        (None, Some((x, f, sd))) => {
            let y = add_noise(f, sd, &mut rng);
            let fresh = add_noise(&prep.eval_truth, &prep.eval_sd, &mut rng);
            Ok(Draw {
                x: Cow::Borrowed(x),
                y,
                fresh,
            })
        }
        (None, None) => {
            let x = s.process.draw_inputs(s.train_size, &mut rng);
            let f = s.process.truth_at(x.view())?;
            let sd = s.process.sd_at(x.view())?;
            let y = add_noise(&f, &sd, &mut rng);
            let fresh = add_noise(&prep.eval_truth, &prep.eval_sd, &mut rng);
            Ok(Draw {
                x: Cow::Owned(x),
                y,
                fresh,
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
            Ok(Draw { x, y, fresh })
        }
    }
}

/// Replicate `r`'s training set (inputs `n × p` and responses), re-drawn from its own stream:
/// exactly the data the run fitted for that replicate (used by the per-point picture).
pub fn training_set(
    plan: &Plan,
    prep: &Prepared,
    r: u64,
) -> Result<(Array2<f64>, Array1<f64>), Error> {
    let d = draw_replicate(plan, prep, r)?;
    Ok((d.x.into_owned(), d.y))
}

/// Runs the replicates of block `b` sequentially and returns its accumulator. Refuses a plan
/// with a selection audit (its counts would be lost): use [`run_block_audited`].
pub fn run_block(plan: &Plan, prep: &Prepared, b: u64) -> Result<BlockAcc, Error> {
    if plan.audit.is_some() {
        return Err(Error::Usage(format!(
            "{}: key `audit`: `run_block` would drop the selection audit's counts; call `run_block_audited`",
            plan.file
        )));
    }
    Ok(run_block_audited(plan, prep, b)?.0)
}

/// Runs the replicates of block `b` sequentially: its accumulator and, with `[audit]`, the
/// counts of the grid values cross-validation chose in its replicates.
pub fn run_block_audited(
    plan: &Plan,
    prep: &Prepared,
    b: u64,
) -> Result<(BlockAcc, Option<crate::audit::AuditAcc>), Error> {
    let (start, end) = plan.block_range(b);
    let mut audit = plan
        .audit
        .map(|_| crate::audit::AuditAcc::new(plan.grid.len()));
    let g = plan.grid.len();
    let m = prep.eval_x.nrows();
    let mut acc = match plan.task {
        Task::Regress => BlockAcc::Squared(SquaredAcc::new(g, m)),
        Task::Classify { classes } => BlockAcc::ZeroOne(ZeroOneAcc::new(g, m, classes)),
    };
    let mut preds = Array2::<f64>::zeros((g, m));
    let mut direct = vec![0.0; g];
    let fit_err = |r: u64, message: String| Error::Fit {
        replicate: r,
        family: plan.family.name().to_string(),
        message,
    };
    for r in start..end {
        let draw = draw_replicate(plan, prep, r)?;
        if let (Some(a), Some(counts)) = (&plan.audit, audit.as_mut()) {
            let g = crate::audit::choose(plan, a, draw.x.view(), draw.y.view(), r)?;
            counts.counts[g] += 1;
        }
        let input = FitInput {
            x: draw.x.view(),
            y: draw.y.view(),
            eval: prep.eval_x.view(),
            task: plan.task,
        };
        preds.fill(0.0);
        plan.family
            .fit_predict(&input, &plan.grid, preds.view_mut())
            .map_err(|e| fit_err(r, e.0))?;
        for (gi, row) in preds.rows().into_iter().enumerate() {
            let knob = || format!("{} = {}", plan.family.knob(), plan.grid[gi]);
            match plan.task {
                Task::Regress => {
                    if let Some(bad) = row.iter().find(|v| !v.is_finite()) {
                        return Err(fit_err(r, format!("prediction {bad} at {}", knob())));
                    }
                    let sse: f64 = row
                        .iter()
                        .zip(draw.fresh.iter())
                        .map(|(p, y)| (p - y) * (p - y))
                        .sum();
                    direct[gi] = sse / m as f64;
                }
                Task::Classify { classes } => {
                    if let Some(bad) = row
                        .iter()
                        .find(|v| !(v.fract() == 0.0 && **v >= 0.0 && **v < classes as f64))
                    {
                        return Err(fit_err(
                            r,
                            format!(
                                "predicted {bad}, not a class index 0..{classes}, at {}",
                                knob()
                            ),
                        ));
                    }
                    let wrong = row
                        .iter()
                        .zip(draw.fresh.iter())
                        .filter(|(p, y)| p != y)
                        .count();
                    direct[gi] = wrong as f64 / m as f64;
                }
            }
        }
        match &mut acc {
            BlockAcc::Squared(a) => a.push(preds.view(), &direct),
            BlockAcc::ZeroOne(a) => a.push(preds.view(), &direct),
        }
    }
    Ok((acc, audit))
}

/// Runs the given blocks on `threads` worker threads (0 = all cores) and returns their
/// accumulators in the order of `blocks`. The first error in block order wins.
pub fn run_blocks(
    plan: &Plan,
    prep: &Prepared,
    blocks: &[u64],
    threads: usize,
) -> Result<Vec<BlockAcc>, Error> {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .map_err(|e| Error::Usage(format!("cannot start {threads} worker threads: {e}")))?;
    let results: Vec<Result<BlockAcc, Error>> = pool.install(|| {
        blocks
            .par_iter()
            .map(|&b| run_block(plan, prep, b))
            .collect()
    });
    results.into_iter().collect()
}

/// Like [`run_blocks`], also returning each block's audit counts (with `[audit]`).
pub fn run_blocks_audited(
    plan: &Plan,
    prep: &Prepared,
    blocks: &[u64],
    threads: usize,
) -> Result<Vec<(BlockAcc, Option<crate::audit::AuditAcc>)>, Error> {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .map_err(|e| Error::Usage(format!("cannot start {threads} worker threads: {e}")))?;
    let results: Vec<Result<_, Error>> = pool.install(|| {
        blocks
            .par_iter()
            .map(|&b| run_block_audited(plan, prep, b))
            .collect()
    });
    results.into_iter().collect()
}

/// The decomposition of a finished run, by loss.
#[derive(Debug, Clone)]
pub enum Summary {
    /// Squared loss.
    Squared(SquaredSummary),
    /// 0-1 loss.
    ZeroOne(ZeroOneSummary),
    /// A table source: the out-of-bag decomposition (see [`crate::table::resample`]).
    Table(Box<crate::table::resample::TableOutcome>),
}

impl Summary {
    /// The squared-loss summary, if this is one.
    pub fn squared(&self) -> Option<&SquaredSummary> {
        match self {
            Summary::Squared(s) => Some(s),
            Summary::ZeroOne(_) | Summary::Table(_) => None,
        }
    }

    /// The 0-1 summary, if this is one.
    pub fn zero_one(&self) -> Option<&ZeroOneSummary> {
        match self {
            Summary::ZeroOne(s) => Some(s),
            Summary::Squared(_) | Summary::Table(_) => None,
        }
    }
}

/// Folds block accumulators (in the order given) into the decomposition.
pub fn summarize(plan: &Plan, prep: &Prepared, blocks: &[BlockAcc]) -> Result<Summary, Error> {
    let empty = || Error::Usage("no replicates to summarize".into());
    match plan.loss {
        LossKind::Squared => {
            let accs: Vec<SquaredAcc> = blocks
                .iter()
                .filter_map(|b| match b {
                    BlockAcc::Squared(a) => Some(a.clone()),
                    BlockAcc::ZeroOne(_) => None,
                })
                .collect();
            let truth = prep.eval_truth.to_vec();
            decompose::squared::summarize(&accs, &truth, &prep.noise_var())
                .map(Summary::Squared)
                .ok_or_else(empty)
        }
        LossKind::ZeroOne => {
            let accs: Vec<ZeroOneAcc> = blocks
                .iter()
                .filter_map(|b| match b {
                    BlockAcc::ZeroOne(a) => Some(a.clone()),
                    BlockAcc::Squared(_) => None,
                })
                .collect();
            let probs = prep
                .eval_probs
                .as_ref()
                .map(|p| p.iter().copied().collect::<Vec<f64>>())
                .ok_or_else(empty)?;
            zero_one::summarize(&accs, &probs)
                .map(Summary::ZeroOne)
                .ok_or_else(empty)
        }
    }
}

/// A finished run.
#[derive(Debug, Clone)]
pub struct Outcome {
    /// Fixed inputs of the run.
    pub prepared: Prepared,
    /// Decomposition and standard errors.
    pub summary: Summary,
    /// Selection audit counts summed over blocks (with `[audit]`).
    pub audit: Option<crate::audit::AuditAcc>,
}

/// Watches a run from outside (a progress display, an interruption); both methods default to
/// doing nothing.
pub trait Watch: Sync {
    /// Called after each finished block with the number of replicates it held.
    fn block_done(&self, _replicates: u64) {}
    /// Asked before each block starts; `true` skips it (the blocks in flight still finish).
    fn stop(&self) -> bool {
        false
    }
}

/// The watch that does nothing.
#[derive(Debug, Clone, Copy, Default)]
pub struct NoWatch;

impl Watch for NoWatch {}

/// How far a run stopped by its [`Watch`] got.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Stopped {
    /// Replicates in the blocks that finished.
    pub replicates_done: u64,
    /// Replicates of the whole run.
    pub replicates: u64,
}

/// Runs a whole plan.
pub fn run(plan: &Plan, threads: usize) -> Result<Outcome, Error> {
    run_watched(plan, threads, &NoWatch)?.map_err(|s| {
        Error::Usage(format!(
            "run stopped after {} of {} replicates",
            s.replicates_done, s.replicates
        ))
    })
}

/// Runs a whole plan under a [`Watch`]: `Ok(Err(Stopped))` when the watch stopped it (nothing
/// is summarized then).
pub fn run_watched(
    plan: &Plan,
    threads: usize,
    watch: &dyn Watch,
) -> Result<Result<Outcome, Stopped>, Error> {
    let prepared = prepare(plan)?;
    if matches!(plan.source, Source::Table(_)) {
        // Tables resample their rows; their blocks fold in `table::resample` (same block order).
        let t = crate::table::resample::run(plan, threads)?;
        return Ok(Ok(Outcome {
            prepared,
            summary: Summary::Table(Box::new(t)),
            audit: None,
        }));
    }
    let ids: Vec<u64> = (0..plan.blocks).collect();
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .map_err(|e| Error::Usage(format!("cannot start {threads} worker threads: {e}")))?;
    let results: Vec<Result<Option<_>, Error>> = pool.install(|| {
        ids.par_iter()
            .map(|&b| {
                if watch.stop() {
                    return Ok(None);
                }
                let out = run_block_audited(plan, &prepared, b)?;
                let (s, e) = plan.block_range(b);
                watch.block_done(e - s);
                Ok(Some(out))
            })
            .collect()
    });
    let results: Vec<Option<_>> = results.into_iter().collect::<Result<_, Error>>()?;
    if results.iter().any(Option::is_none) {
        let replicates_done = ids
            .iter()
            .zip(&results)
            .filter(|(_, r)| r.is_some())
            .map(|(&b, _)| {
                let (s, e) = plan.block_range(b);
                e - s
            })
            .sum();
        return Ok(Err(Stopped {
            replicates_done,
            replicates: plan.replicates,
        }));
    }
    let done: Vec<_> = results.into_iter().flatten().collect();
    let mut audit = plan
        .audit
        .map(|_| crate::audit::AuditAcc::new(plan.grid.len()));
    let mut blocks = Vec::with_capacity(done.len());
    for (acc, counts) in done {
        if let (Some(total), Some(c)) = (audit.as_mut(), counts.as_ref()) {
            total.merge(c);
        }
        blocks.push(acc);
    }
    let summary = summarize(plan, &prepared, &blocks)?;
    Ok(Ok(Outcome {
        prepared,
        summary,
        audit,
    }))
}
