//! lossprism: a Monte Carlo bias-variance decomposition bench.
//!
//! For a model family with a complexity knob and a grid of knob values, lossprism draws many
//! replicate training sets from a data-generating process, fits the family once per replicate
//! (one "path fit" serves the whole grid), and splits the expected squared loss at fixed
//! evaluation points into noise, bias² and variance (Hastie, Tibshirani, Friedman, *The
//! Elements of Statistical Learning*, 2nd ed., eq. 7.9), with jackknife standard errors.
//!
//! The pipeline: [`scenario`] (file → validated plan) → [`runner`] (replicate loop, all
//! randomness) → [`decompose`] (pure arithmetic) → [`report`] (result document and renderings).
//! [`family`] holds the model families, [`dgp`] the synthetic processes, [`expr`] the formula
//! language of scenario files.
//!
//! ```no_run
//! use lossprism::{report, runner, scenario};
//! let plan = scenario::load_default(&Default::default()).unwrap();
//! let outcome = runner::run(&plan, 0).unwrap();
//! let doc = report::build(&plan, &outcome);
//! println!("{}", report::table::render(&doc));
//! ```

pub mod audit;
pub mod check;
pub mod cli;
pub mod decompose;
pub mod dgp;
pub mod error;
pub mod expr;
pub mod family;
pub mod harness;
pub mod progress;
pub mod report;
pub mod runner;
pub mod scenario;
pub mod shard;
pub mod table;
pub mod twin;

pub use error::{Error, ScenarioError};
