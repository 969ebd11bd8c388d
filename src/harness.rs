//! Running a scenario with an estimator supplied from Rust, for regression tests in other
//! crates: plan the scenario text, put the estimator in place of its family, run, and compare
//! the result document with a stored baseline through [`crate::check`].
//!
//! A scenario for a Rust estimator names `family = "custom"` (a stand-in, [`Placeholder`],
//! that accepts any finite grid; the command line refuses to run it). The estimator implements
//! [`Family`]: fit on a training set, predict at the evaluation points for every knob value of
//! the grid (a family that cannot share work across the grid simply fits once per value).
//!
//! # Example: a regression test in your own crate
//!
//! ```
//! use std::sync::Arc;
//! use lossprism::family::{Family, FitError, FitInput, Out, Task};
//! use lossprism::{check, harness};
//!
//! /// Shrinks the training mean towards zero by the knob `shrink` (an invented toy estimator).
//! struct ShrunkMean;
//!
//! impl Family for ShrunkMean {
//!     fn name(&self) -> &'static str { "shrunk_mean" }
//!     fn knob(&self) -> &'static str { "shrink" }
//!     fn check_grid(&self, grid: &[f64], _n: usize, _p: usize) -> Result<(), String> {
//!         match grid.iter().find(|s| !(0.0..=1.0).contains(*s)) {
//!             Some(s) => Err(format!("shrink = {s} is outside [0, 1]")),
//!             None => Ok(()),
//!         }
//!     }
//!     fn supports(&self, task: Task) -> bool { task == Task::Regress }
//!     fn fit_predict(&self, input: &FitInput<'_>, grid: &[f64], mut out: Out<'_>)
//!         -> Result<(), FitError> {
//!         let mean = input.y.sum() / input.y.len() as f64;
//!         for (g, s) in grid.iter().enumerate() {
//!             out.values.row_mut(g).fill((1.0 - s) * mean);
//!         }
//!         Ok(())
//!     }
//! }
//!
//! // An invented scenario: a cold-store temperature reading against door openings.
//! const SCENARIO: &str = r#"
//! name = "cold-store-mean"
//! seed = 7
//! replicates = 40
//! [data]
//! source = "synthetic"
//! train_size = 30
//! eval_size = 10
//! [[data.inputs]]
//! name = "openings"
//! uniform = [0, 10]
//! [data.truth]
//! formula = "2 + 0.1 * openings"
//! [data.noise]
//! sd = 0.5
//! [model]
//! family = "custom"
//! grid = [0, 0.1, 0.5]
//! "#;
//!
//! let new = harness::run_with_family(SCENARIO, Arc::new(ShrunkMean)).unwrap();
//! // In a real test the baseline is a committed file:
//! //     let baseline = harness::load_result("tests/baselines/shrunk-mean.json".as_ref()).unwrap();
//! // and is (re)written deliberately with `harness::save_result` or `lossprism check --update`.
//! let baseline = new.clone();
//! let report = check::compare(&new, &baseline, &check::CheckOptions::default()).unwrap();
//! assert!(report.identical); // same seed, same replicates, same estimator: bit-identical
//! assert!(!report.regressed(), "{report}");
//! ```

use std::path::Path;
use std::sync::Arc;

use crate::error::Error;
use crate::family::Family;
use crate::report::{self, ResultDoc};
use crate::scenario::{self, Plan, PlanOptions};

/// Name used in messages for scenario text given to the harness.
pub const SCENARIO_NAME: &str = "<harness scenario>";

pub use crate::family::custom::{Placeholder, CLI_REFUSAL};

/// Plans scenario text with `family` in place of the file's family (normally `custom`),
/// checking that the family supports the task and accepts the grid.
pub fn plan_with_family(
    scenario_text: &str,
    family: Arc<dyn Family>,
    opts: &PlanOptions,
) -> Result<Plan, Error> {
    let spec = scenario::parse(scenario_text, SCENARIO_NAME)?;
    let plan = Plan::from_spec(&spec, scenario_text, SCENARIO_NAME, Path::new(""), opts)?;
    Ok(plan.with_family(family)?)
}

/// Runs scenario text with `family` on all cores and returns the result document.
pub fn run_with_family(scenario_text: &str, family: Arc<dyn Family>) -> Result<ResultDoc, Error> {
    run_with_family_opts(scenario_text, family, &PlanOptions::default(), 0)
}

/// [`run_with_family`] with seed/replicate overrides and a thread count (0 = all cores; the
/// result does not depend on it).
pub fn run_with_family_opts(
    scenario_text: &str,
    family: Arc<dyn Family>,
    opts: &PlanOptions,
    threads: usize,
) -> Result<ResultDoc, Error> {
    let plan = plan_with_family(scenario_text, family, opts)?;
    let outcome = crate::runner::run(&plan, threads)?;
    Ok(report::build(&plan, &outcome))
}

/// Reads a result document (`lossprism run --out FILE.json`, or [`save_result`]).
pub fn load_result(path: &Path) -> Result<ResultDoc, Error> {
    let text = crate::codec::read_document(
        path,
        1 << 30,
        "lossprism result document",
        &crate::codec::json_object,
    )?;
    crate::check::parse_result(&text, &path.display().to_string())
        .map_err(|e| Error::Usage(e.to_string()))
}

/// Writes a result document atomically (the same JSON as `lossprism run --out`).
pub fn save_result(path: &Path, doc: &ResultDoc) -> Result<(), Error> {
    crate::output::write_one("baseline", path, &[], report::to_json(doc).as_bytes())
}
