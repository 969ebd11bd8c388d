//! Resampling decomposition of a table: replicate r draws a training set from the working rows
//! (not the holdout) with its own stream `runner::stream(seed, purpose::REPLICATE, r)`, fits the
//! family once for the whole grid, and predicts the rows it held out (out-of-bag for the
//! bootstrap). Replicates are grouped into the plan's blocks; each block is accumulated
//! sequentially into a [`TableAcc`] and blocks are folded in index order, so results are
//! bit-identical for any thread count.

use ndarray::{Array1, Array2, Axis};
use rand::Rng;
use rayon::prelude::*;

use super::noise::{self, NoiseEstimate};
use super::{Scheme, Table, TablePlan};
use crate::decompose::table::{self as dt, TableAcc, TableSummary};
use crate::error::Error;
use crate::family::{FitInput, Task};
use crate::runner::{purpose, stream};
use crate::scenario::{Plan, Source};

/// Draws one replicate's training rows (indices into `0..n`, with repeats for the bootstrap)
/// and the sorted rows it holds out.
pub fn draw<R: Rng>(scheme: Scheme, n: usize, rng: &mut R) -> (Vec<usize>, Vec<usize>) {
    let mut in_train = vec![false; n];
    let train: Vec<usize> = match scheme {
        Scheme::Bootstrap => (0..n)
            .map(|_| {
                let i = rng.gen_range(0..n);
                in_train[i] = true;
                i
            })
            .collect(),
        Scheme::Subsample { .. } => {
            let m = scheme.train_size(n);
            let mut idx: Vec<usize> = (0..n).collect();
            for j in 0..m {
                let k = rng.gen_range(j..n);
                idx.swap(j, k);
                in_train[idx[j]] = true;
            }
            idx.truncate(m);
            idx
        }
    };
    let held = (0..n).filter(|&i| !in_train[i]).collect();
    (train, held)
}

/// A finished table decomposition.
#[derive(Debug, Clone)]
pub struct TableOutcome {
    /// The working rows (holdout excluded) the decomposition used.
    pub work: Table,
    /// Terms, standard errors and the folded accumulator.
    pub summary: TableSummary,
    /// The noise estimate on the working rows (regression only).
    pub noise: Option<NoiseEstimate>,
}

fn table_plan(plan: &Plan) -> Result<&TablePlan, Error> {
    match &plan.source {
        Source::Table(t) => Ok(t),
        _ => Err(Error::Usage(format!(
            "{}: not a table scenario (source = \"table\")",
            plan.file
        ))),
    }
}

/// Runs the replicates of block `b` on the working table `work`.
pub fn run_block(plan: &Plan, tp: &TablePlan, work: &Table, b: u64) -> Result<TableAcc, Error> {
    let (start, end) = plan.block_range(b);
    let n = work.rows();
    let g = plan.grid.len();
    let classes = match plan.task {
        Task::Classify { classes } => classes,
        Task::Regress => 0,
    };
    let mut acc = TableAcc::new(g, n, classes);
    let y = work.y.as_slice().expect("owned contiguous array");
    for r in start..end {
        let mut rng = stream(plan.seed, purpose::REPLICATE, r);
        let (train, held) = draw(tp.scheme, n, &mut rng);
        if held.is_empty() {
            acc.push(&held, Array2::<f64>::zeros((g, 0)).view(), y);
            continue;
        }
        let x_train = work.x.select(Axis(0), &train);
        let y_train: Array1<f64> = work.y.select(Axis(0), &train);
        let eval = work.x.select(Axis(0), &held);
        let mut preds = Array2::<f64>::zeros((g, held.len()));
        let input = FitInput {
            x: x_train.view(),
            y: y_train.view(),
            eval: eval.view(),
            task: plan.task,
        };
        plan.family
            .fit_predict(&input, &plan.grid, preds.view_mut())
            .map_err(|e| Error::Fit {
                replicate: r,
                family: plan.family.name().to_string(),
                message: e.0,
            })?;
        if let Some(bad) = preds.iter().find(|v| !v.is_finite()) {
            return Err(Error::Fit {
                replicate: r,
                family: plan.family.name().to_string(),
                message: format!("prediction {bad}"),
            });
        }
        acc.push(&held, preds.view(), y);
    }
    Ok(acc)
}

/// Runs a table plan on `threads` worker threads (0 = all cores): every block, folded in order,
/// plus the noise estimate of the working rows.
pub fn run(plan: &Plan, threads: usize) -> Result<TableOutcome, Error> {
    let tp = table_plan(plan)?;
    let work = tp.work_table();
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .map_err(|e| Error::Usage(format!("cannot start {threads} worker threads: {e}")))?;
    let ids: Vec<u64> = (0..plan.blocks).collect();
    let results: Vec<Result<TableAcc, Error>> = pool.install(|| {
        ids.par_iter()
            .map(|&b| run_block(plan, tp, &work, b))
            .collect()
    });
    let blocks: Vec<TableAcc> = results.into_iter().collect::<Result<_, _>>()?;
    let y = work.y.to_vec();
    let summary = dt::summarize(&blocks, &y)
        .ok_or_else(|| Error::Usage("no replicates to summarize".into()))?;
    let noise = match plan.task {
        Task::Regress => noise::estimate(tp.noise_method, work.x.view(), work.y.view()),
        Task::Classify { .. } => None,
    };
    Ok(TableOutcome {
        work,
        summary,
        noise,
    })
}

/// One CSV row per (grid value, working row): the row's file line, its inputs, the observed
/// response, R_i, the mean (or main) held-out prediction, bias²+noise (or the 0-1 bias against
/// the observed label) and variance.
pub fn points_csv(plan: &Plan, out: &TableOutcome) -> String {
    let mut w = csv::Writer::from_writer(Vec::new());
    let mut header = vec!["value".to_string(), "line".to_string()];
    header.extend(out.work.names.iter().cloned());
    header.extend(
        [
            "observed",
            "held_out_replicates",
            "mean_prediction",
            "bias_sq_plus_noise",
            "variance",
        ]
        .map(String::from),
    );
    w.write_record(&header).expect("in-memory csv");
    let num = |v: f64| {
        if v.is_finite() {
            v.to_string()
        } else {
            String::new()
        }
    };
    for (g, &value) in plan.grid.iter().enumerate() {
        for i in 0..out.work.rows() {
            let yi = out.work.y[i];
            let r = dt::row(&out.summary.total, g, i, yi);
            let mut rec = vec![value.to_string(), out.work.lines[i].to_string()];
            rec.extend(out.work.x.row(i).iter().map(|v| v.to_string()));
            rec.push(match plan.task {
                Task::Classify { .. } => out.work.labels[yi as usize].clone(),
                Task::Regress => yi.to_string(),
            });
            rec.push(r.count.to_string());
            rec.extend([r.mean_prediction, r.bias_plus_noise, r.variance].map(num));
            w.write_record(&rec).expect("in-memory csv");
        }
    }
    String::from_utf8(w.into_inner().expect("in-memory csv")).expect("utf-8")
}
