//! The engine: one replicate scheduler for every source (synthetic, twin, table) and every
//! consumer (the decomposition of each model, the selection audit, shards, checkpoints,
//! progress, Ctrl-C).
//!
//! - [`run_block`] is the only replicate loop: replicate r draws its data
//!   ([`source::draw`]), every model is fitted `fit_seeds` times with its own fit streams
//!   ([`crate::rng::FitSeed`]), every prediction is checked in one place
//!   ([`check_predictions`]), and the block's accumulators absorb it.
//! - [`schedule`] is the only thread pool: it runs a set of blocks, tells a [`Watch`] of each
//!   finished block and hands each to a sink (a checkpoint writer), and stops early on request.
//! - [`summarize`] folds the blocks of each model in index order into the decomposition.
//!
//! Replicates are grouped into blocks (contiguous index ranges); each block is accumulated
//! sequentially and blocks are folded in index order, so results are bit-identical for any
//! thread count, any shard split and after a resume.

pub mod audit;
pub mod memory;
pub mod source;

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Mutex;

use ndarray::{ArrayView2, ArrayView3, ArrayViewMut3, ArrayViewMut4, Axis};
use rayon::prelude::*;

pub use source::{draw, prepare, prepare_to_fit, training_set, Draw, Prepared};

use crate::decompose::{self, Acc, Batch, Summary};
use crate::error::Error;
use crate::family::{FitInput, FitSeed, Out, Task};
use crate::fmt::fmt_value;
use crate::scenario::{ModelPlan, Plan, Source};
use audit::AuditAcc;

/// Most worker threads accepted (more only slows the start-up).
pub const MAX_THREADS: usize = 512;

/// A finished block: one accumulator per model, the audit's counts, and (tables) the sum and
/// sum of squares of the share of rows each replicate held out.
#[derive(Debug, Clone, PartialEq)]
pub struct BlockResult {
    /// Accumulators, one per model, in model order.
    pub accs: Vec<Acc>,
    /// Selection audit counts per candidate (plans with `[audit]` only).
    pub audit: Option<AuditAcc>,
    /// Table sources: Σ and Σ² over replicates of the held-out share of the working rows.
    pub held_share: Option<(f64, f64)>,
}

/// Checks one fit's predictions: finite real values (regression), class indices `0..K`
/// (classification), probability vectors of non-negative finite values summing to 1, and what
/// the loss itself needs ([`crate::decompose::Loss::check_prediction`]: no zero probability for
/// the log-loss, positive means for the Poisson deviance). The message names the offending
/// value and the knob value.
pub fn check_predictions(
    plan: &Plan,
    model: &ModelPlan,
    values: ArrayView2<'_, f64>,
    probs: Option<ArrayView3<'_, f64>>,
    point: &dyn Fn(usize) -> String,
) -> Result<(), String> {
    let knob = |g: usize| format!("{} = {}", model.family.knob(), fmt_value(model.grid[g]));
    for (g, row) in values.rows().into_iter().enumerate() {
        match plan.task {
            Task::Regress => {
                if row.iter().all(|v| v.is_finite()) {
                    continue;
                }
                if let Some((e, bad)) = row.iter().enumerate().find(|(_, v)| !v.is_finite()) {
                    return Err(format!(
                        "prediction {} at {}, {}: not a finite number (are \
                         the responses too large? rescale them, for example divide by a power \
                         of ten)",
                        crate::fmt::fmt_exact(*bad),
                        point(e),
                        knob(g)
                    ));
                }
            }
            Task::Classify { classes } => {
                if let Some((e, bad)) = row
                    .iter()
                    .enumerate()
                    .find(|(_, v)| !(v.fract() == 0.0 && **v >= 0.0 && **v < classes as f64))
                {
                    return Err(format!(
                        "predicted {} at {}, {}: not a class index 0 to {} ({classes} classes)",
                        crate::fmt::fmt_exact(*bad),
                        point(e),
                        knob(g),
                        classes - 1
                    ));
                }
            }
        }
    }
    if let Some(p) = probs {
        for ((g, e), _) in values.indexed_iter() {
            let q = p.slice(ndarray::s![g, e, ..]);
            let sum: f64 = q.iter().sum();
            let bad = q
                .iter()
                .find(|v| !(v.is_finite() && **v >= 0.0 && **v <= 1.0));
            if bad.is_some() || (sum - 1.0).abs() > 1e-9 * q.len() as f64 {
                return Err(format!(
                    "class probabilities {:?} at {}, {}: not a probability vector (values in [0, 1] adding up to 1)",
                    q.to_vec(),
                    point(e),
                    knob(g)
                ));
            }
        }
    }
    // What the loss itself needs (a positive probability, a positive mean).
    if !plan.loss.checks_predictions() {
        return Ok(());
    }
    let mut buf = Vec::new();
    for ((g, e), &v) in values.indexed_iter() {
        let q = match probs {
            Some(p) => {
                buf.clear();
                buf.extend(p.slice(ndarray::s![g, e, ..]).iter());
                Some(buf.as_slice())
            }
            None => None,
        };
        plan.loss.check_prediction(v, q).map_err(|m| {
            format!(
                "at {}, {}: {}",
                point(e),
                knob(g),
                with_remedy(plan, model, m)
            )
        })?;
    }
    Ok(())
}

/// Adds the family's remedy to a loss's refusal of a zero class probability (the loss knows the
/// problem, the family knows what to change).
pub fn with_remedy(plan: &Plan, model: &ModelPlan, message: String) -> String {
    if plan.loss.needs_probs() {
        let remedy = model.family.zero_probability_remedy();
        // A run of several models names the section as the scenario's errors do (`model[2]`).
        let i = plan.models.iter().position(|m| std::ptr::eq(m, model));
        match i.filter(|_| plan.models.len() > 1) {
            Some(i) => format!("{message}; {}", in_section(remedy, i)),
            None => format!("{message}; {remedy}"),
        }
    } else {
        message
    }
}

/// `text` (a family's remedy) with its `[model]` key named as the key of the scenario's `i`-th
/// `[[model]]` section: `model.alpha` → `model[i].alpha`.
pub fn in_section(text: &str, i: usize) -> String {
    text.replace(
        "in [model] (key `model.",
        &format!("in its [[model]] section (key `model[{i}]."),
    )
}

/// Runs the replicates of block `b` sequentially: the replicate loop of every source. Each
/// replicate draws its data once (for the largest training size); every (training size, model)
/// cell fits a nested prefix of it, `fit_seeds` times.
pub fn run_block(plan: &Plan, prep: &Prepared, b: u64) -> Result<BlockResult, Error> {
    let (start, end) = plan.block_range(b);
    let points = prep.points();
    let k = plan.task.classes();
    let needs_probs = plan.loss.needs_probs();
    let mut accs: Vec<Acc> = (0..plan.cells())
        .map(|c| Acc::new(plan.loss, plan.shape(c % plan.models.len(), points)))
        .collect();
    let mut audit_acc = plan
        .audit
        .as_ref()
        .map(|_| AuditAcc::new(plan.models.iter().map(|m| m.grid.len()).sum()));
    let mut held_share = matches!(plan.source, Source::Table(_)).then_some((0.0, 0.0));
    // Prediction buffers reused by every replicate and model of the block (cleared to zeros
    // before each fit, as fresh arrays would be): allocating them per replicate made the
    // allocator hand the pages back and fault them in again every time.
    let (mut vbuf, mut pbuf, mut dbuf): (Vec<f64>, Vec<f64>, Vec<f64>) =
        (Vec::new(), Vec::new(), Vec::new());
    for r in start..end {
        let d = draw(plan, prep, r)?;
        if let (Some(a), Some(counts)) = (&plan.audit, audit_acc.as_mut()) {
            let c = audit::choose(plan, a, d.x.view(), d.y.view(), r)?;
            counts.counts[c] += 1;
        }
        for (si, &n) in plan.sizes.iter().enumerate() {
            let sd = d.size(n, prep);
            // A refused prediction names its point as the messages about the table do: by the
            // row's line in the CSV file.
            let point = |e: usize| match &prep.table {
                Some(t) => {
                    let row = sd.held.as_deref().map_or(e, |h| h[e]);
                    format!("the row on line {} of the table", t.work.lines[row])
                }
                None => format!("evaluation point {e}"),
            };
            if si + 1 == plan.sizes.len() {
                if let (Some((s, s2)), Some(h)) = (held_share.as_mut(), &sd.held) {
                    let share = h.len() as f64 / points as f64;
                    *s += share;
                    *s2 += share * share;
                }
            }
            let m = sd.eval.nrows();
            for (i, model) in plan.models.iter().enumerate() {
                let g = model.grid.len();
                let fits = model.fit_seeds;
                let caps = model.family.caps(plan.task);
                let pk = if needs_probs { k } else { 0 };
                let dm = if caps.ensemble { m } else { 0 };
                let zeroed = |buf: &mut Vec<f64>, len: usize| {
                    buf.clear();
                    buf.resize(len, 0.0);
                };
                zeroed(&mut vbuf, fits * g * m);
                zeroed(&mut pbuf, fits * g * m * pk);
                zeroed(&mut dbuf, fits * g * dm);
                let mut values = ArrayViewMut3::from_shape((fits, g, m), &mut vbuf[..])
                    .expect("buffer sized to the shape");
                let mut probs = ArrayViewMut4::from_shape((fits, g, m, pk), &mut pbuf[..])
                    .expect("buffer sized to the shape");
                let mut diversity = ArrayViewMut3::from_shape((fits, g, dm), &mut dbuf[..])
                    .expect("buffer sized to the shape");
                if m > 0 {
                    for s in 0..fits {
                        let input = FitInput {
                            x: sd.x,
                            y: sd.y,
                            eval: sd.eval.view(),
                            task: plan.task,
                            seed: FitSeed {
                                seed: plan.seed,
                                replicate: r,
                                fold: 0,
                                copy: s as u32,
                            },
                        };
                        let fit_err = |message: String| Error::Fit {
                            file: plan.file.to_string(),
                            replicate: r,
                            family: model.family.name().to_string(),
                            message,
                        };
                        let out = Out {
                            values: values.index_axis_mut(Axis(0), s),
                            probs: needs_probs.then(|| probs.index_axis_mut(Axis(0), s)),
                            diversity: caps.ensemble.then(|| diversity.index_axis_mut(Axis(0), s)),
                        };
                        model
                            .family
                            .fit_predict(&input, &model.grid, out)
                            .map_err(|e| fit_err(e.0))?;
                        check_predictions(
                            plan,
                            model,
                            values.index_axis(Axis(0), s),
                            needs_probs.then(|| probs.index_axis(Axis(0), s)),
                            &point,
                        )
                        .map_err(|m| {
                            // Sweep 68: a class index out of range from an external process
                            // named neither the process nor its command line.
                            fit_err(match model.family.answered_by() {
                                Some(who) => format!("{who} answered: {m}"),
                                None => m,
                            })
                        })?;
                    }
                }
                let batch = Batch {
                    held: sd.held.as_deref(),
                    values: values.view(),
                    probs: needs_probs.then(|| probs.view()),
                    diversity: caps.ensemble.then(|| diversity.view()),
                    response: sd.response.as_slice().expect("owned contiguous array"),
                };
                accs[plan.cell(si, i)].push(plan.loss, &batch);
            }
        }
    }
    Ok(BlockResult {
        accs,
        audit: audit_acc,
        held_share,
    })
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

/// Checks a thread count before any work: at most [`MAX_THREADS`] (0 = one per core).
pub fn pool_check(threads: usize) -> Result<(), Error> {
    if threads > MAX_THREADS {
        let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
        return Err(Error::Usage(format!(
            "--threads {threads}: at most {MAX_THREADS} worker threads (this machine has {cores} cores; 0 uses one per core)"
        )));
    }
    Ok(())
}

/// Builds the worker pool: `threads` workers (0 = one per core), at most [`MAX_THREADS`].
pub fn pool(threads: usize) -> Result<rayon::ThreadPool, Error> {
    pool_check(threads)?;
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .map_err(|e| Error::Usage(format!("cannot start {threads} worker threads: {e}")))
}

/// How a scheduled set of blocks ended.
#[derive(Debug, Clone)]
pub struct Scheduled {
    /// The blocks that finished, by index.
    pub done: BTreeMap<u64, BlockResult>,
    /// Whether the watch asked to stop (an interruption).
    pub interrupted: bool,
    /// Whether the sink asked to stop.
    pub halted: bool,
}

/// Runs `blocks` of `plan` on a pool of `threads` workers (0 = one per core). Each finished
/// block is told to `watch` and handed to `sink` (one call at a time, in completion order); the
/// sink returns `false` to stop after the blocks in flight. Blocks not started when the watch or
/// the sink asks to stop are left out of the result. The first error in block order wins.
pub fn schedule(
    plan: &Plan,
    prep: &Prepared,
    blocks: &[u64],
    threads: usize,
    watch: &dyn Watch,
    sink: &(dyn Fn(u64, &BlockResult) -> Result<bool, Error> + Sync),
) -> Result<Scheduled, Error> {
    if blocks.is_empty() {
        return Ok(Scheduled {
            done: BTreeMap::new(),
            interrupted: false,
            halted: false,
        });
    }
    schedule_on(&pool(threads)?, plan, prep, blocks, watch, sink)
}

/// [`schedule`] on an existing pool.
fn schedule_on(
    pool: &rayon::ThreadPool,
    plan: &Plan,
    prep: &Prepared,
    blocks: &[u64],
    watch: &dyn Watch,
    sink: &(dyn Fn(u64, &BlockResult) -> Result<bool, Error> + Sync),
) -> Result<Scheduled, Error> {
    let done = Mutex::new(BTreeMap::new());
    let interrupted = AtomicBool::new(false);
    let halted = AtomicBool::new(false);
    let results: Vec<Result<(), Error>> = pool.install(|| {
        blocks
            .par_iter()
            .map(|&b| {
                if halted.load(Ordering::SeqCst) {
                    return Ok(());
                }
                if watch.stop() {
                    interrupted.store(true, Ordering::SeqCst);
                    return Ok(());
                }
                let result = run_block(plan, prep, b)?;
                let mut d = done.lock().unwrap_or_else(|e| e.into_inner());
                if halted.load(Ordering::SeqCst) {
                    return Ok(());
                }
                match sink(b, &result) {
                    Ok(true) => {}
                    Ok(false) => halted.store(true, Ordering::SeqCst),
                    Err(e) => {
                        // A refused block stops the other workers too.
                        halted.store(true, Ordering::SeqCst);
                        return Err(e);
                    }
                }
                let (s, e) = plan.block_range(b);
                d.insert(b, result);
                drop(d);
                watch.block_done(e - s);
                Ok(())
            })
            .collect()
    });
    let finished = finish_families(plan);
    results.into_iter().collect::<Result<(), Error>>()?;
    finished?;
    Ok(Scheduled {
        done: done.into_inner().unwrap_or_else(|e| e.into_inner()),
        interrupted: interrupted.load(Ordering::SeqCst),
        halted: halted.load(Ordering::SeqCst),
    })
}

/// Tells every model's family that the scheduler is done ([`crate::family::Family::finish`]);
/// the first failure in model order wins.
fn finish_families(plan: &Plan) -> Result<(), Error> {
    let mut first = Ok(());
    for model in &plan.models {
        if let Err(e) = model.family.finish() {
            if first.is_ok() {
                first = Err(Error::Data(format!(
                    "{}: {} fits: {}",
                    plan.file,
                    model.family.name(),
                    e.0
                )));
            }
        }
    }
    first
}

/// A finished run.
#[derive(Debug, Clone)]
pub struct Outcome {
    /// Fixed inputs of the run.
    pub prepared: Prepared,
    /// The decomposition of each (training size, model) cell, in the order of
    /// [`Plan::cell`] (sizes outer, models inner).
    pub summaries: Vec<Summary>,
    /// Selection audit counts summed over blocks (with `[audit]`).
    pub audit: Option<AuditAcc>,
    /// Table sources: the mean share of working rows held out per replicate, and its standard
    /// error over replicates.
    pub held_share: Option<(f64, f64)>,
    /// Number of models (the stride of `summaries`).
    pub models: usize,
}

impl Outcome {
    /// The decomposition of the first model at the largest training size (the only one of a
    /// single-model, single-size run).
    pub fn summary(&self) -> &Summary {
        &self.summaries[self.summaries.len() - self.models]
    }
}

/// The worker pool as the summary's [`decompose::ParFor`]: the leave-one-block-out folds and
/// bootstrap draws of a cell run on the same workers as the replicates did.
struct PoolPar<'a>(&'a rayon::ThreadPool);

impl decompose::ParFor for PoolPar<'_> {
    fn width(&self) -> usize {
        self.0.current_num_threads()
    }

    fn run(&self, n: usize, task: &(dyn Fn(usize) + Sync)) {
        self.0.install(|| (0..n).into_par_iter().for_each(task));
    }
}

/// Folds every block of a plan (all of them, in index order) into the run's outcome, on
/// `threads` workers (0 = one per core; the result does not depend on it). A term that is not
/// a finite number is an error naming the term, the knob value and the likely cause.
pub fn summarize(
    plan: &Plan,
    prepared: Prepared,
    blocks: &BTreeMap<u64, BlockResult>,
    threads: usize,
) -> Result<Outcome, Error> {
    let pool = if threads == 1 {
        None
    } else {
        Some(pool(threads)?)
    };
    summarize_on(plan, prepared, blocks, pool.as_ref())
}

/// [`summarize`] on an existing pool (`None`: on the calling thread).
fn summarize_on(
    plan: &Plan,
    prepared: Prepared,
    blocks: &BTreeMap<u64, BlockResult>,
    pool: Option<&rayon::ThreadPool>,
) -> Result<Outcome, Error> {
    // Inside the pool, the summary's many small parallel steps start from a worker, with no
    // hand-over from an outside thread for each of them.
    match pool {
        Some(p) => p.install(|| summarize_in(plan, prepared, blocks, pool)),
        None => summarize_in(plan, prepared, blocks, None),
    }
}

/// The body of [`summarize_on`].
fn summarize_in(
    plan: &Plan,
    prepared: Prepared,
    blocks: &BTreeMap<u64, BlockResult>,
    pool: Option<&rayon::ThreadPool>,
) -> Result<Outcome, Error> {
    if blocks.len() as u64 != plan.blocks || blocks.keys().copied().ne(0..plan.blocks) {
        return Err(Error::Usage(format!(
            "{} of {} blocks available; cannot summarize a partial run",
            blocks.len(),
            plan.blocks
        )));
    }
    let noise_var = prepared.noise_var();
    let probs = prepared.flat_probs();
    let target = prepared.target(&noise_var, &probs);
    let mut summaries = Vec::with_capacity(plan.cells());
    for c in 0..plan.cells() {
        let model = &plan.models[c % plan.models.len()];
        let accs: Vec<&Acc> = blocks.values().map(|b| &b.accs[c]).collect();
        // Terms that jump with the main prediction get a bootstrap over the blocks; its plans
        // come from the master seed only (the same for every cell), so results stay identical
        // across threads, shards and resume.
        let resampled = accs.first().is_some_and(|a| {
            plan.loss
                .describe(&a.shape, target.observed())
                .iter()
                .any(|t| t.bootstrap)
        });
        let plans = if resampled {
            crate::rng::block_bootstrap(plan.seed, accs.len(), decompose::BOOTSTRAP_DRAWS)
        } else {
            Vec::new()
        };
        let s = match pool {
            Some(p) => decompose::summarize_par(plan.loss, &accs, &target, &plans, &PoolPar(p)),
            None => decompose::summarize_par(plan.loss, &accs, &target, &plans, &decompose::Serial),
        }
        .ok_or_else(|| Error::Usage("no replicates to summarize".into()))?;
        for (g, row) in s.values.iter().enumerate() {
            for (t, &v) in row.iter().enumerate() {
                // A term must be finite. NaN marks a standard error that is not reported or not
                // computable; an infinite one overflowed and would be written as `null`.
                let se = s.stderr[g][t];
                let bad = if !v.is_finite() {
                    Some(("the term", v))
                } else if se.is_infinite() {
                    Some(("the standard error of the term", se))
                } else {
                    None
                };
                if let Some((what, x)) = bad {
                    // Which model and training size, where there are several (sweep 69: a
                    // learning curve's refusal named neither).
                    let of = if plan.models.len() > 1 {
                        format!(" of model `{}`", model.label)
                    } else {
                        String::new()
                    };
                    let size = if plan.sizes.len() > 1 {
                        format!("training size {}, ", plan.sizes[c / plan.models.len()])
                    } else {
                        String::new()
                    };
                    return Err(Error::Data(format!(
                        "{}: {what} `{}`{of} at {size}{} = {} is {x}: {}",
                        plan.file,
                        s.terms[t].key,
                        model.family.knob(),
                        fmt_value(model.grid[g]),
                        not_finite_cause(plan, &prepared, &s.total)
                    )));
                }
            }
        }
        summaries.push(s);
    }
    let mut audit = plan
        .audit
        .as_ref()
        .map(|_| AuditAcc::new(plan.models.iter().map(|m| m.grid.len()).sum()));
    let mut held: Option<(f64, f64)> = None;
    for b in blocks.values() {
        if let (Some(total), Some(c)) = (audit.as_mut(), b.audit.as_ref()) {
            total.merge(c);
        }
        if let Some((s, s2)) = b.held_share {
            let h = held.get_or_insert((0.0, 0.0));
            h.0 += s;
            h.1 += s2;
        }
    }
    let held_share = held.map(|(sum, sq)| {
        let r = plan.replicates as f64;
        let mean = sum / r;
        let var = (sq / r - mean * mean).max(0.0) * r / (r - 1.0);
        (mean, (var / r).sqrt())
    });
    Ok(Outcome {
        prepared,
        summaries,
        audit,
        held_share,
        models: plan.models.len(),
    })
}

/// Refuses a finished block whose sums are not all finite, before a checkpoint or a shard part
/// records it: its own reader would refuse the file, and the message would blame the file
/// instead of the cause. The message names the model and the likely cause
/// ([`not_finite_cause`]).
pub fn check_block(plan: &Plan, prep: &Prepared, b: u64, block: &BlockResult) -> Result<(), Error> {
    for (acc, model) in block.accs.iter().zip(&plan.models) {
        if acc.floats.iter().flatten().any(|v| !v.is_finite()) {
            return Err(Error::Data(format!(
                "{}: block {b} of model `{}`: the decomposition's sums are not finite numbers: {}",
                plan.file,
                model.family.name(),
                not_finite_cause(plan, prep, acc)
            )));
        }
    }
    Ok(())
}

/// The likely cause of a non-finite term, in words (`total`: all blocks folded).
fn not_finite_cause(plan: &Plan, prep: &Prepared, total: &Acc) -> String {
    if !total.count.is_empty() && total.count.iter().all(|&c| c < 2) {
        // Out-of-bag evaluation (a table): the terms average over rows held out in at least
        // two replicates, and there were none.
        let fraction = match &plan.source {
            Source::Table(tp) => match tp.scheme {
                crate::dataset::Scheme::Subsample { .. } => " (or lower `train_fraction`)",
                crate::dataset::Scheme::Bootstrap => "",
            },
            _ => "",
        };
        return format!(
            "no row was held out in 2 or more of the {} replicates, and a row's spread needs 2; \
             raise `replicates`{fraction}",
            plan.replicates
        );
    }
    let big = prep
        .eval_truth
        .iter()
        .chain(prep.eval_sd.iter())
        .fold(0.0_f64, |a, v| a.max(v.abs()));
    if big > 1e150 || !big.is_finite() {
        format!(
            "the responses reach {big:e}, so their squares overflow; rescale the response (for example divide it by a power of ten)"
        )
    } else if plan.replicates < 4 {
        "too few replicates per block to estimate it; raise `replicates`".into()
    } else {
        // The responses are in range (above): the fits' predictions are what overflowed (an
        // external estimator answering 1e154 next to responses of order 1 was told to rescale
        // the response).
        format!(
            "the predictions overflow the range of floating-point numbers while the responses \
             are at most {big:.1e} in size: a fit extrapolates far past them (check the grid \
             value named, or an external estimator's answers)"
        )
    }
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

/// How far a run stopped by its [`Watch`] got.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Stopped {
    /// Replicates in the blocks that finished.
    pub replicates_done: u64,
    /// Replicates of the whole run.
    pub replicates: u64,
}

/// Runs a whole plan under a [`Watch`]: `Ok(Err(Stopped))` when the watch stopped it (nothing
/// is summarized then).
pub fn run_watched(
    plan: &Plan,
    threads: usize,
    watch: &dyn Watch,
) -> Result<Result<Outcome, Stopped>, Error> {
    let prepared = prepare_to_fit(plan)?;
    let ids: Vec<u64> = (0..plan.blocks).collect();
    // One pool for the replicates and the summary.
    let pool = pool(threads)?;
    let s = schedule_on(&pool, plan, &prepared, &ids, watch, &|_, _| Ok(true))?;
    if s.done.len() as u64 != plan.blocks {
        let replicates_done = s
            .done
            .keys()
            .map(|&b| {
                let (s, e) = plan.block_range(b);
                e - s
            })
            .sum();
        return Ok(Err(Stopped {
            replicates_done,
            replicates: plan.replicates,
        }));
    }
    summarize_on(plan, prepared, &s.done, (threads != 1).then_some(&pool)).map(Ok)
}
