//! The replicate loop. The runner owns all randomness: each replicate r draws from its own
//! ChaCha8 stream derived from (master seed, purpose, r); evaluation points and a fixed design
//! come from their own streams. Replicates are grouped into blocks (contiguous index ranges);
//! each block is accumulated sequentially and blocks are folded in index order, so results are
//! bit-identical for any thread count, any shard split and after a resume.

use ndarray::{Array1, Array2};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use crate::decompose::{self, SquaredAcc, SquaredSummary};
use crate::dgp::add_noise;
use crate::error::Error;
use crate::family::FitInput;
use crate::scenario::{Design, Plan, Source};

/// Stream purposes (the high bits of the ChaCha stream number).
pub mod purpose {
    /// Evaluation inputs.
    pub const EVAL: u64 = 1;
    /// The training inputs of a fixed design.
    pub const DESIGN: u64 = 2;
    /// Replicate r's training set and fresh responses.
    pub const REPLICATE: u64 = 3;
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
    /// f at the evaluation points.
    pub eval_truth: Array1<f64>,
    /// σ at the evaluation points.
    pub eval_sd: Array1<f64>,
    /// Fixed design: training inputs, f and σ there.
    pub fixed: Option<(Array2<f64>, Array1<f64>, Array1<f64>)>,
}

impl Prepared {
    /// σ² at the evaluation points.
    pub fn noise_var(&self) -> Vec<f64> {
        self.eval_sd.iter().map(|s| s * s).collect()
    }
}

/// Draws the evaluation points (and a fixed design) for a plan.
pub fn prepare(plan: &Plan) -> Result<Prepared, Error> {
    let Source::Synthetic(s) = &plan.source;
    let fixed = if s.design == Design::Fixed {
        let mut rng = stream(plan.seed, purpose::DESIGN, 0);
        let x = s.process.draw_inputs(s.train_size, &mut rng);
        let f = s.process.truth_at(x.view())?;
        let sd = s.process.sd_at(x.view())?;
        Some((x, f, sd))
    } else {
        None
    };
    let eval_x = match (&fixed, s.eval_at_design) {
        (Some((x, _, _)), true) => x.clone(),
        _ => {
            let mut rng = stream(plan.seed, purpose::EVAL, 0);
            s.process.draw_inputs(s.eval_size, &mut rng)
        }
    };
    let eval_truth = s.process.truth_at(eval_x.view())?;
    let eval_sd = s.process.sd_at(eval_x.view())?;
    Ok(Prepared {
        eval_x,
        eval_truth,
        eval_sd,
        fixed,
    })
}

/// Runs the replicates of block `b` sequentially and returns its accumulator.
pub fn run_block(plan: &Plan, prep: &Prepared, b: u64) -> Result<SquaredAcc, Error> {
    let Source::Synthetic(s) = &plan.source;
    let (start, end) = plan.block_range(b);
    let g = plan.grid.len();
    let m = prep.eval_x.nrows();
    let mut acc = SquaredAcc::new(g, m);
    let mut preds = Array2::<f64>::zeros((g, m));
    let mut direct = vec![0.0; g];
    for r in start..end {
        let mut rng = stream(plan.seed, purpose::REPLICATE, r);
        let (x, y) = match &prep.fixed {
            Some((x, f, sd)) => (x.clone(), add_noise(f, sd, &mut rng)),
            None => {
                let x = s.process.draw_inputs(s.train_size, &mut rng);
                let f = s.process.truth_at(x.view())?;
                let sd = s.process.sd_at(x.view())?;
                let y = add_noise(&f, &sd, &mut rng);
                (x, y)
            }
        };
        let fresh = add_noise(&prep.eval_truth, &prep.eval_sd, &mut rng);
        let input = FitInput {
            x: x.view(),
            y: y.view(),
            eval: prep.eval_x.view(),
            task: plan.task,
        };
        preds.fill(0.0);
        plan.family
            .fit_predict(&input, &plan.grid, preds.view_mut())
            .map_err(|e| Error::Fit {
                replicate: r,
                family: plan.family.name().to_string(),
                message: e.0,
            })?;
        for (gi, row) in preds.rows().into_iter().enumerate() {
            let mut sse = 0.0;
            for (p, yf) in row.iter().zip(fresh.iter()) {
                sse += (p - yf) * (p - yf);
            }
            direct[gi] = sse / m as f64;
            if let Some(bad) = row.iter().find(|v| !v.is_finite()) {
                return Err(Error::Fit {
                    replicate: r,
                    family: plan.family.name().to_string(),
                    message: format!(
                        "prediction {bad} at {} = {}",
                        plan.family.knob(),
                        plan.grid[gi]
                    ),
                });
            }
        }
        acc.push(preds.view(), &direct);
    }
    Ok(acc)
}

/// Runs the given blocks on `threads` worker threads (0 = all cores) and returns their
/// accumulators in the order of `blocks`. The first error in block order wins.
pub fn run_blocks(
    plan: &Plan,
    prep: &Prepared,
    blocks: &[u64],
    threads: usize,
) -> Result<Vec<SquaredAcc>, Error> {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .map_err(|e| Error::Usage(format!("cannot start {threads} worker threads: {e}")))?;
    let results: Vec<Result<SquaredAcc, Error>> = pool.install(|| {
        blocks
            .par_iter()
            .map(|&b| run_block(plan, prep, b))
            .collect()
    });
    results.into_iter().collect()
}

/// A finished run.
#[derive(Debug, Clone)]
pub struct Outcome {
    /// Fixed inputs of the run.
    pub prepared: Prepared,
    /// Decomposition and standard errors.
    pub summary: SquaredSummary,
}

/// Runs a whole plan.
pub fn run(plan: &Plan, threads: usize) -> Result<Outcome, Error> {
    let prepared = prepare(plan)?;
    let ids: Vec<u64> = (0..plan.blocks).collect();
    let blocks = run_blocks(plan, &prepared, &ids, threads)?;
    let summary = decompose::squared::summarize(
        &blocks,
        prepared.eval_truth.as_slice().expect("contiguous"),
        &prepared.noise_var(),
    )
    .ok_or_else(|| Error::Usage("no replicates to run".into()))?;
    Ok(Outcome { prepared, summary })
}
