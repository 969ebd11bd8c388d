//! lossprism: a Monte Carlo bias-variance decomposition bench.
//!
//! For a model family with a complexity knob and a grid of knob values, lossprism draws many
//! replicate training sets from a data-generating process (a synthetic scenario, a simulated
//! twin of a table, or the table itself by resampling), fits the family once per replicate (one
//! "path fit" serves the whole grid), and splits the expected loss at fixed evaluation points
//! into noise, bias and variance (for squared loss: Hastie, Tibshirani, Friedman, *The Elements
//! of Statistical Learning*, 2nd ed., eq. 7.9), with jackknife standard errors.
//!
//! # Layers (dependencies point down only; `tests/layering.rs` enforces it)
//!
//! | layer | modules |
//! |---|---|
//! | leaves | [`error`], [`expr`], [`rng`], [`fmt`], [`codec`], [`output`], [`family`], [`decompose`] |
//! | data | [`dgp`] (synthetic processes, a twin's reference), [`dataset`] (the CSV source, noise estimators) |
//! | plan | [`scenario`] (spec → checked plan) |
//! | engine | [`runner`] (one replicate scheduler, one pool) |
//! | output | [`report`], [`check`], [`shard`] |
//! | front | [`harness`], [`commands`], [`progress`], [`cli`], `main` |
//!
//! ```no_run
//! use lossprism::{report, runner, scenario};
//! let plan = scenario::load_default(&Default::default()).unwrap();
//! let outcome = runner::run(&plan, 0).unwrap();
//! let doc = report::build(&plan, &outcome);
//! println!("{}", report::terminal::render(&doc));
//! ```

// Every public item says what it is (`cargo clippy -- -D warnings` turns a missing one into an
// error).
#![warn(missing_docs)]

pub mod check;
pub mod cli;
pub mod codec;
pub mod commands;
pub mod dataset;
pub mod decompose;
pub mod dgp;
pub mod error;
pub mod expr;
pub mod family;
pub mod fmt;
pub mod harness;
pub mod output;
pub mod progress;
pub mod report;
pub mod rng;
pub mod runner;
pub mod scenario;
pub mod shard;

pub use error::{Error, ScenarioError};
