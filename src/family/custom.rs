//! The stand-in of `family = "custom"`: a scenario for an estimator supplied from Rust through
//! [`crate::harness`] names this family; it accepts any finite grid and every task, and refuses
//! to fit (the harness replaces it with the real estimator; the command line refuses to run it).

use super::{Caps, Family, FitError, FitInput, Out, Task};

/// Why a `family = "custom"` scenario cannot run on its own.
pub const CLI_REFUSAL: &str = "family `custom` stands for an estimator supplied from Rust \
     (lossprism::harness::run_with_family); the command line cannot run it: use a built-in \
     family or `external`";

/// The stand-in family of `family = "custom"`.
#[derive(Debug, Clone, Copy, Default)]
pub struct Placeholder;

impl Family for Placeholder {
    fn name(&self) -> &'static str {
        "custom"
    }

    fn knob(&self) -> &'static str {
        "knob"
    }

    fn check_grid(&self, grid: &[f64], _n_train: usize, _n_inputs: usize) -> Result<(), String> {
        if grid.is_empty() {
            return Err("the grid is empty".into());
        }
        match grid.iter().find(|v| !v.is_finite()) {
            Some(v) => Err(format!("grid value {v} is not a finite number")),
            None => Ok(()),
        }
    }

    fn supports(&self, _task: Task) -> bool {
        true
    }

    fn caps(&self, _task: Task) -> Caps {
        Caps {
            probabilities: true,
            stochastic: true,
            ..Caps::default()
        }
    }

    fn fit_predict(
        &self,
        _input: &FitInput<'_>,
        _grid: &[f64],
        _out: Out<'_>,
    ) -> Result<(), FitError> {
        Err(FitError(CLI_REFUSAL.into()))
    }
}
