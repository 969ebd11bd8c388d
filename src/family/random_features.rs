//! Minimum-norm least squares on random ReLU features of the inputs (`random_features`, knob
//! `width`): the second classic setting of "double descent", where the number of parameters
//! crosses the training size.
//!
//! # Features
//!
//! The inputs are first standardized with the training mean and population standard deviation
//! (the shared [`super::standardize::Standardizer`]; a constant column becomes 0). Feature `k`
//! (`k = 0, 1, …`) is `φ_k(x) = max(0, w_kᵀ z(x) + b_k)`, with the entries of `w_k` independent
//! `N(0, 1/p)` (so `w_kᵀ z` has variance about 1) and `b_k ~ N(0, 1)`. These scales are this
//! family's own choice, not taken from a source. The weights are drawn from the fit's own stream,
//! feature after feature (`p` normals for `w_k`, then `b_k`), so the family is stochastic: with
//! `fit_seeds ≥ 2` the engine separates the variance due to the features from the variance due to
//! the training set.
//!
//! # Fit
//!
//! Minimum-norm least squares ([`super::minnorm::min_norm_solve`]) on the first `width` features:
//! the least-squares fit while `width < n`, the smallest-norm interpolant beyond. With
//! `intercept = true` (the default here, since ReLU features have a positive mean) the features
//! and the response are centred at their training means first and the intercept is not
//! penalised; `intercept = false` fits the features alone.
//!
//! # Input order
//!
//! Permuting the inputs changes which weight multiplies which input for a given seed, but the
//! weights are independent and identically distributed, so the distribution of the fitted model
//! does not change (checked in distribution in `tests/permutation.rs`).
//!
//! # Path fit
//!
//! Features are drawn once up to the largest width of the grid; width `W` uses the first `W`, which
//! are the same draws whatever the grid, so a grid fit equals single-width fits with the same seed.
//! The least-squares solve is repeated for every grid value (as in `minnorm`).

use std::sync::Arc;

use rand::Rng;
use rand_distr::StandardNormal;

use super::minnorm::{fit_leading, Design};
use super::poly::check_shapes;
use super::standardize::Standardizer;
use super::{
    check_whole_grid, BuildContext, Caps, Family, FitError, FitInput, OptionError, Options, Out,
    Task,
};

/// Largest width a grid may ask for.
pub const MAX_WIDTH: usize = 100_000;

/// Minimum-norm least squares on random ReLU features; knob `width`. See the
/// [module documentation](self).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RandomFeaturesFamily {
    /// Centre features and response and add an unpenalised intercept (default true).
    pub intercept: bool,
}

impl Default for RandomFeaturesFamily {
    fn default() -> Self {
        RandomFeaturesFamily { intercept: true }
    }
}

/// Builds `family = "random_features"` from its options (`intercept`).
pub fn build(opts: &mut Options, _cx: &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError> {
    let mut f = RandomFeaturesFamily::default();
    if let Some(b) = opts.boolean("intercept")? {
        f.intercept = b;
    }
    Ok(Arc::new(f))
}

impl Family for RandomFeaturesFamily {
    fn standardizes_inputs(&self) -> bool {
        true
    }

    /// The random features of the training and evaluation points, the feature weights and a Gram
    /// matrix of the smaller side with its factorization, for the widest grid value. At the
    /// peak of the least-squares solve four training-sized feature arrays are alive (the
    /// features, the solver's working copy, its transpose and the stored reflectors): measured
    /// with `/usr/bin/time` (a hostile sweep, 2026-12-05; n = 600, one point, width 20 000),
    /// the fit held about 3.8 n·w numbers, where this had counted 2 (n + m) w.
    fn work_bytes(&self, n: usize, p: usize, m: usize, grid: &[f64], _task: Task) -> f64 {
        let w = grid.iter().fold(0.0_f64, |a, &b| a.max(b));
        let (n, p, m) = (n as f64, p as f64, m as f64);
        8.0 * ((4.0 * n + 2.0 * m) * w + w * (p + 1.0) + 3.0 * n.min(w).powi(2) + n + m)
    }

    fn name(&self) -> &'static str {
        "random_features"
    }

    fn knob(&self) -> &'static str {
        "width"
    }

    fn min_norm_coefficients(&self, value: f64, _n_inputs: usize) -> Option<usize> {
        Some(value as usize + usize::from(self.intercept))
    }

    fn check_grid(&self, grid: &[f64], n_train: usize, _n_inputs: usize) -> Result<(), String> {
        if grid.is_empty() {
            return Err("width grid is empty".into());
        }
        if n_train == 0 {
            return Err("random_features needs at least one training row".into());
        }
        check_whole_grid(grid, "width", 1.0, MAX_WIDTH as f64)
    }

    fn supports(&self, task: Task) -> bool {
        matches!(task, Task::Regress)
    }

    fn caps(&self, _task: Task) -> Caps {
        Caps {
            stochastic: true,
            ..Caps::default()
        }
    }

    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        out: Out<'_>,
    ) -> Result<(), FitError> {
        if !matches!(input.task, Task::Regress) {
            return Err(FitError("random_features supports regression only".into()));
        }
        let mut out = out.values;
        check_shapes(input, grid.len(), out.dim())?;
        let (n, p) = input.x.dim();
        if n == 0 {
            return Err(FitError(
                "random_features: the training set is empty".into(),
            ));
        }
        check_whole_grid(grid, "width", 1.0, MAX_WIDTH as f64)
            .map_err(|e| FitError(format!("random_features: {e}")))?;
        let widest = grid.iter().fold(0.0_f64, |a, &b| a.max(b)) as usize;
        let m = input.eval.nrows();
        let std = Standardizer::fit(input.x);
        let zx = std.row_major_mul(input.x);
        let ze = std.row_major_mul(input.eval);
        // Weights of feature k: w[k*p..(k+1)*p], then bias[k].
        let mut rng = input.seed.rng();
        let scale = 1.0 / (p.max(1) as f64).sqrt();
        let mut w = vec![0.0; widest * p];
        let mut bias = vec![0.0; widest];
        for k in 0..widest {
            for v in &mut w[k * p..(k + 1) * p] {
                *v = scale * rng.sample::<f64, _>(StandardNormal);
            }
            bias[k] = rng.sample(StandardNormal);
        }
        let relu = |z: &[f64], k: usize| -> f64 {
            let s: f64 = z
                .iter()
                .zip(&w[k * p..(k + 1) * p])
                .map(|(a, b)| a * b)
                .sum();
            (s + bias[k]).max(0.0)
        };
        // Training features column-major (n × widest), evaluation features row-major.
        let mut train = vec![0.0; n * widest];
        for k in 0..widest {
            for i in 0..n {
                train[k * n + i] = relu(&zx[i * p..(i + 1) * p], k);
            }
        }
        let mut eval = vec![0.0; m * widest];
        for e in 0..m {
            for k in 0..widest {
                eval[e * widest + k] = relu(&ze[e * p..(e + 1) * p], k);
            }
        }
        let design = Design {
            cols: &train,
            rows: n,
            width: widest,
        };
        let y = input.y.to_vec();
        let mut pred = vec![0.0; m];
        for (g, &v) in grid.iter().enumerate() {
            let width = v as usize;
            fit_leading(&design, width, &y, &eval, self.intercept, &mut pred);
            if let Some(e) = pred.iter().position(|v| !v.is_finite()) {
                return Err(FitError(format!(
                    "random_features: width = {width} gave a non-finite prediction at evaluation point {e}"
                )));
            }
            out.row_mut(g)
                .iter_mut()
                .zip(&pred)
                .for_each(|(o, &v)| *o = v);
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::family::forest::fit_all;
    use crate::rng::FitSeed;
    use ndarray::{Array1, Array2};
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    fn data(seed: u64, n: usize) -> (Array2<f64>, Array1<f64>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let x: Array2<f64> = Array2::from_shape_fn((n, 3), |_| rng.gen_range(-1.0..1.0));
        let y = Array1::from_shape_fn(n, |i| {
            (3.0 * x[[i, 0]]).sin() + x[[i, 1]] * x[[i, 2]] + 0.1 * rng.gen_range(-1.0..1.0)
        });
        (x, y)
    }

    const SEED: FitSeed = FitSeed {
        seed: 12,
        replicate: 1,
        fold: 0,
        copy: 0,
    };

    #[test]
    fn grid_fit_equals_single_widths_and_is_seeded() {
        // Exact identity (design): width W reads the first W feature draws.
        let (x, y) = data(1, 40);
        let (eval, _) = data(2, 25);
        let fam = RandomFeaturesFamily::default();
        let grid = [60.0, 5.0, 40.0, 39.0];
        let (v, _, _) = fit_all(
            &fam,
            x.view(),
            y.view(),
            eval.view(),
            Task::Regress,
            SEED,
            &grid,
        );
        for (g, &w) in grid.iter().enumerate() {
            let (v1, _, _) = fit_all(
                &fam,
                x.view(),
                y.view(),
                eval.view(),
                Task::Regress,
                SEED,
                &[w],
            );
            for e in 0..25 {
                assert_eq!(v1[[0, e]].to_bits(), v[[g, e]].to_bits());
            }
        }
        let other = FitSeed { copy: 1, ..SEED };
        let (o, _, _) = fit_all(
            &fam,
            x.view(),
            y.view(),
            eval.view(),
            Task::Regress,
            other,
            &grid,
        );
        assert!(o.iter().zip(v.iter()).any(|(a, b)| a != b));
    }

    #[test]
    fn wide_models_interpolate_and_narrow_ones_are_least_squares() {
        // Beyond n features the fit interpolates the training responses (minimum-norm solution of
        // an underdetermined system of full row rank); one feature with an intercept is the
        // simple regression of y on that feature.
        let (x, y) = data(3, 30);
        let fam = RandomFeaturesFamily::default();
        let (v, _, _) = fit_all(
            &fam,
            x.view(),
            y.view(),
            x.view(),
            Task::Regress,
            SEED,
            &[80.0],
        );
        for i in 0..30 {
            assert!((v[[0, i]] - y[i]).abs() < 1e-8, "{} vs {}", v[[0, i]], y[i]);
        }
        let (v1, _, _) = fit_all(
            &fam,
            x.view(),
            y.view(),
            x.view(),
            Task::Regress,
            SEED,
            &[1.0],
        );
        // Residuals of a least-squares fit with intercept sum to zero.
        let resid: f64 = (0..30).map(|i| y[i] - v1[[0, i]]).sum();
        assert!(resid.abs() < 1e-10);
        assert!(fam.check_grid(&[0.0], 30, 3).is_err());
        assert!(fam.caps(Task::Regress).stochastic);
    }
}
