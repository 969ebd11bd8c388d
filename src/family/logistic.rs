//! Regularized logistic regression family (`logistic`, knob `inverse_penalty` C): binary logistic
//! for two classes, multinomial (softmax) for more, fitted along the whole grid by warm-started
//! Newton iterations; plus [`fit_probabilities`].
//!
//! # Exact objective
//!
//! Each input column is standardized with the **training** mean and the training population
//! standard deviation (divide by `n`): `z_ij = (x_ij - x̄_j) / s_j`. A column whose sd is at most
//! `1e-12 ×` its largest absolute value (a constant column) becomes a zero column and gets a zero
//! weight. The evaluation inputs are standardized with the same training mean and sd.
//!
//! For every grid value `C > 0` the fit minimises
//!
//! `F(b, W) = Σ_i −log p(y_i | x_i) + (1/(2C)) ‖W‖²`
//!
//! where `‖W‖²` is the sum of squares of all weights and the intercept(s) are **not** penalized.
//! This is the scale of sklearn-style `C`: the penalty is `λ = 1/C` on the **summed** (not
//! averaged) log-loss; equivalently the fit minimises `C · Σ_i −log p(y_i | x_i) + ½ ‖W‖²`.
//! Larger `C` means a weaker penalty and a more complex model.
//!
//! - **Two classes** (`Task::Classify { classes: 2 }`): one intercept `b` and one weight vector
//!   `w`, `η_i = b + z_iᵀw`, `p(1 | x_i) = σ(η_i) = 1 / (1 + e^{−η_i})`, so the loss term is
//!   `log(1 + e^{η_i}) − y_i η_i`.
//! - **K > 2 classes**: one intercept `b_c` and weight vector `w_c` per class,
//!   `η_ic = b_c + z_iᵀw_c`, `p(c | x_i) = e^{η_ic} / Σ_k e^{η_ik}` (softmax), penalty
//!   `(1/(2C)) Σ_c ‖w_c‖²`. The softmax is unchanged when the same constant is added to every
//!   `b_c` (or the same vector to every `w_c`). The penalty removes the weight invariance — the
//!   objective is strictly convex in `W` and at the optimum `Σ_c w_c = 0` — but the intercepts are
//!   unpenalized, so we **fix the intercept of the smallest class label present in the training
//!   set to 0**. This changes no probability and makes the minimiser unique.
//!
//! # Classes absent from a training set
//!
//! If a class has no training row its probability can be driven to 0 (its intercept to −∞) at no
//! cost, so the objective has no minimiser, only an infimum. We return that limit exactly: absent
//! classes get probability 0 and are never predicted, and the softmax above is fitted over the
//! present classes only (for a K > 2 task with exactly two classes present this is the symmetric
//! two-block softmax, which equals binary logistic at `2C`). If only one class is present every
//! prediction is that class, with probability 1.
//!
//! # Prediction
//!
//! The predicted class is the argmax of the class probabilities (equivalently of `η`); ties go to
//! the smallest class index (two classes: class 1 only when `η > 0`).
//!
//! # Input order
//!
//! Standardization is per column and the penalty is symmetric in the weights, so permuting the
//! inputs permutes the optimal weights and leaves the probabilities unchanged; the solver stops at
//! a gradient tolerance, so two column orders agree to about that tolerance (checked in
//! `tests/permutation.rs`).
//!
//! # Solver and path fit
//!
//! The grid is visited in ascending order of `C` (strongest penalty first). The first value starts
//! from zero weights and the intercepts of the `C → 0` limit (log class-share ratios), each later
//! value from the previous solution (warm start), so the whole grid costs a few Newton steps per
//! value beyond the first fit. Newton's method with the exact Hessian, solved by a dense Cholesky
//! factorisation, and a backtracking (Armijo) line search on the objective; if the Hessian is not
//! numerically positive definite a growing multiple of the identity is added. When the number of
//! parameters exceeds [`NEWTON_MAX_PARAMS`] (`K·(p+1)`, or `p+1` for two classes), L-BFGS with
//! the same line search replaces Newton. Log-sum-exp and a two-sided sigmoid keep every `exp`
//! from overflowing, also on separable data at huge `C`.
//!
//! Stopping: Euclidean norm of the gradient `≤ 1e-8 · n`, or (Newton only) a full Newton step
//! whose relative decrease of the objective is `< 1e-10`; at most [`MAX_NEWTON_ITER`] Newton or
//! [`MAX_LBFGS_ITER`] L-BFGS iterations. If the iteration cap is reached, or the line search can
//! no longer decrease the objective (rounding level), the **last iterate** is used. A non-finite
//! objective or coefficient is a [`FitError`].

use std::sync::Arc;

use super::linalg::norm;
use super::poly::check_shapes;
use super::standardize::Standardizer;
use super::{BuildContext, Caps, Family, FitError, FitInput, OptionError, Options, Out, Task};
use ndarray::Array3;

/// Builds `family = "logistic"` (no options).
pub fn build(_opts: &mut Options, _cx: &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError> {
    Ok(Arc::new(LogisticFamily))
}
use std::collections::VecDeque;

/// Largest number of parameters fitted by full Newton; above it L-BFGS is used.
pub const NEWTON_MAX_PARAMS: usize = 300;
/// Iteration cap of the Newton solver per grid value.
pub const MAX_NEWTON_ITER: usize = 100;
/// Iteration cap of the L-BFGS solver per grid value.
pub const MAX_LBFGS_ITER: usize = 2000;
/// Relative objective decrease below which a full Newton step ends the iteration.
const REL_OBJ_TOL: f64 = 1e-10;
/// Gradient-norm tolerance per training row.
const GRAD_TOL_PER_ROW: f64 = 1e-8;
/// Armijo sufficient-decrease constant.
const ARMIJO: f64 = 1e-4;
/// Step halvings tried by the line search.
const MAX_HALVINGS: usize = 60;
/// Pairs kept by L-BFGS.
const LBFGS_MEMORY: usize = 10;

/// L2-regularized logistic regression on standardized inputs with unpenalized intercepts; knob
/// `inverse_penalty` (C). Binary for two classes, multinomial (softmax) for more; classification
/// only. See the module docs for the exact objective.
#[derive(Debug, Clone, Copy, Default)]
pub struct LogisticFamily;

impl Family for LogisticFamily {
    fn standardizes_inputs(&self) -> bool {
        true
    }

    fn name(&self) -> &'static str {
        "logistic"
    }

    fn zero_probability_remedy(&self) -> &'static str {
        "the logistic family gives 0 to a class absent from a training set (a class on very few \
         rows of a table is absent whenever they are held out: merge or drop it, or score with \
         `kind = \"brier\"`; a small `train_size` does it too), or when a weak penalty lets it \
         separate the classes and a probability underflows (smaller `inverse_penalty` values in \
         the grid)"
    }

    fn knob(&self) -> &'static str {
        "inverse_penalty"
    }

    fn check_grid(&self, grid: &[f64], n_train: usize, _n_inputs: usize) -> Result<(), String> {
        if let Some(c) = bad_c(grid) {
            return Err(format!(
                "inverse_penalty must be finite and at least 2.2250738585072014e-308 (the \
                 smallest normal number; below it the penalty 1/C overflows), got {}",
                crate::fmt::fmt_exact(c)
            ));
        }
        if n_train == 0 {
            return Err("logistic needs at least one training row".into());
        }
        Ok(())
    }

    fn supports(&self, task: Task) -> bool {
        matches!(task, Task::Classify { .. })
    }

    /// Newton's gradient, Hessian and its working copy over `(K − 1)(p + 1)` coefficients (or,
    /// above [`NEWTON_MAX_PARAMS`], L-BFGS's [`LBFGS_MEMORY`] pairs and a few vectors: a `d × d`
    /// term there refused a 200-row table with 57 000 one-hot inputs as 97 GiB), and one
    /// coefficient vector per grid value, on top of the default.
    fn work_bytes(&self, n: usize, p: usize, m: usize, grid: &[f64], task: Task) -> f64 {
        let d = (task.classes().max(2) - 1) as f64 * (p as f64 + 1.0);
        let solver = if d <= NEWTON_MAX_PARAMS as f64 {
            2.0 * d * d
        } else {
            (2.0 * LBFGS_MEMORY as f64 + 5.0) * d
        };
        8.0 * (3.0 * n as f64 * p as f64 + (n + m) as f64 + solver + grid.len() as f64 * d)
    }

    fn caps(&self, task: Task) -> Caps {
        Caps {
            probabilities: matches!(task, Task::Classify { .. }),
            ..Caps::default()
        }
    }

    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        mut out: Out<'_>,
    ) -> Result<(), FitError> {
        check_shapes(input, grid.len(), out.values.dim()).map_err(prefix)?;
        super::check_out("logistic", &out, grid.len(), input.eval.nrows(), input.task)?;
        let fit = fit_path(input, grid)?;
        let p = input.x.ncols();
        let ze = fit.std.row_major_mul(input.eval);
        let mut probs = vec![0.0; fit.classes];
        for g in 0..grid.len() {
            for e in 0..input.eval.nrows() {
                let z = &ze[e * p..(e + 1) * p];
                out.values[[g, e]] = fit.predict(g, z) as f64;
                if let Some(pr) = out.probs.as_mut() {
                    fit.probabilities(g, z, &mut probs);
                    for (c, &v) in probs.iter().enumerate() {
                        pr[[g, e, c]] = v;
                    }
                }
            }
        }
        Ok(())
    }
}

/// Class probabilities of the fitted model at the evaluation points for every grid value:
/// element `[g, e, c]` is `p(c | eval row e)` under `C = grid[g]` (grid in the order given).
/// Same fit, validation and errors as [`LogisticFamily::fit_predict`]; the prediction there is the
/// argmax of these probabilities (ties to the smallest class). Shape `(grid.len(), m, K)`.
pub fn fit_probabilities(input: &FitInput<'_>, grid: &[f64]) -> Result<Array3<f64>, FitError> {
    let m = input.eval.nrows();
    check_shapes(input, grid.len(), (grid.len(), m)).map_err(prefix)?;
    let fit = fit_path(input, grid)?;
    let p = input.x.ncols();
    let ze = fit.std.row_major_mul(input.eval);
    let mut out = Array3::zeros((grid.len(), m, fit.classes));
    let mut probs = vec![0.0; fit.classes];
    for g in 0..grid.len() {
        for e in 0..m {
            fit.probabilities(g, &ze[e * p..(e + 1) * p], &mut probs);
            for (c, &v) in probs.iter().enumerate() {
                out[[g, e, c]] = v;
            }
        }
    }
    Ok(out)
}

fn prefix(e: FitError) -> FitError {
    FitError(format!("logistic: {}", e.0))
}

/// First grid value that is not a finite positive number.
/// The first grid value that is not a usable inverse penalty: not finite, not above 0, or
/// subnormal (below `f64::MIN_POSITIVE`, where the penalty 1/C overflows to infinity and the
/// objective to NaN; 5e-324 passed `validate` and failed every fit).
fn bad_c(grid: &[f64]) -> Option<f64> {
    grid.iter()
        .copied()
        .find(|c| !c.is_finite() || *c < f64::MIN_POSITIVE)
}

/// What the training labels call for.
#[derive(Debug, Clone, PartialEq)]
enum Shape {
    /// Only this class appears in the training labels.
    Single(usize),
    /// Two-class task with both classes present: `η` is the log-odds of class 1.
    Binary,
    /// K > 2 task: one block per present class (ascending labels).
    Multinomial { present: Vec<usize> },
}

/// How a grid value's iteration ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Status {
    /// Gradient or relative-change criterion met (or nothing to fit).
    Converged,
    /// The line search could not decrease the objective any more (rounding level).
    Stalled,
    /// Iteration cap reached; the last iterate is used.
    MaxIter,
}

/// Coefficients for every grid value (grid order), in the standardized scale.
struct PathFit {
    std: Standardizer,
    shape: Shape,
    classes: usize,
    p: usize,
    /// Per grid value: blocks of `[b, w_1..w_p]`, one block (binary) or one per present class.
    thetas: Vec<Vec<f64>>,
    #[cfg_attr(not(test), allow(dead_code))]
    status: Vec<Status>,
}

impl PathFit {
    /// Linear predictors of the blocks at standardized point `z`.
    fn etas(&self, g: usize, z: &[f64], eta: &mut Vec<f64>) {
        let q = self.p + 1;
        eta.clear();
        for t in self.thetas[g].chunks_exact(q) {
            eta.push(t[0] + dot(&t[1..], z));
        }
    }

    fn probabilities(&self, g: usize, z: &[f64], out: &mut [f64]) {
        out.fill(0.0);
        let mut eta = Vec::new();
        match &self.shape {
            Shape::Single(c) => out[*c] = 1.0,
            Shape::Binary => {
                self.etas(g, z, &mut eta);
                out[0] = sigmoid(-eta[0]);
                out[1] = sigmoid(eta[0]);
            }
            Shape::Multinomial { present } => {
                self.etas(g, z, &mut eta);
                let lse = log_sum_exp(&eta);
                for (&c, &e) in present.iter().zip(&eta) {
                    out[c] = (e - lse).exp();
                }
            }
        }
    }

    fn predict(&self, g: usize, z: &[f64]) -> usize {
        let mut eta = Vec::new();
        match &self.shape {
            Shape::Single(c) => *c,
            Shape::Binary => {
                self.etas(g, z, &mut eta);
                usize::from(eta[0] > 0.0)
            }
            Shape::Multinomial { present } => {
                self.etas(g, z, &mut eta);
                let mut best = 0;
                for (k, &e) in eta.iter().enumerate() {
                    if e > eta[best] {
                        best = k;
                    }
                }
                present[best]
            }
        }
    }
}

/// Validates the task, labels and grid, then fits every grid value (ascending C, warm starts).
/// Shapes and finiteness of the data are checked by the caller.
fn fit_path(input: &FitInput<'_>, grid: &[f64]) -> Result<PathFit, FitError> {
    let classes = match input.task {
        Task::Classify { classes } => classes,
        Task::Regress => return Err(FitError("logistic supports classification only".into())),
    };
    if classes == 0 {
        return Err(FitError(
            "logistic: classification needs at least one class".into(),
        ));
    }
    if let Some(c) = bad_c(grid) {
        return Err(FitError(format!(
            "logistic: inverse_penalty must be finite and > 0, got {}",
            crate::fmt::fmt_exact(c)
        )));
    }
    let (n, p) = input.x.dim();
    if n == 0 {
        return Err(FitError("logistic: the training set is empty".into()));
    }
    let mut counts = vec![0usize; classes];
    let mut raw = Vec::with_capacity(n);
    for &v in input.y {
        if !(v.fract() == 0.0 && v >= 0.0 && v < classes as f64) {
            return Err(FitError(format!(
                "logistic: class label {v} is not one of the class indices 0 to {} ({classes} classes)", classes - 1
            )));
        }
        let c = v as usize;
        counts[c] += 1;
        raw.push(c);
    }
    let present: Vec<usize> = (0..classes).filter(|&c| counts[c] > 0).collect();
    let std = Standardizer::fit(input.x);
    let q = p + 1;
    let (shape, labels, theta0) = if present.len() == 1 {
        (Shape::Single(present[0]), Vec::new(), Vec::new())
    } else if classes == 2 {
        let mut t = vec![0.0; q];
        t[0] = (counts[1] as f64 / counts[0] as f64).ln();
        (Shape::Binary, raw, t)
    } else {
        let mut index = vec![usize::MAX; classes];
        for (k, &c) in present.iter().enumerate() {
            index[c] = k;
        }
        let labels = raw.iter().map(|&c| index[c]).collect();
        let mut t = vec![0.0; present.len() * q];
        let n_ref = counts[present[0]] as f64;
        for (k, &c) in present.iter().enumerate() {
            t[k * q] = (counts[c] as f64 / n_ref).ln();
        }
        (Shape::Multinomial { present }, labels, t)
    };

    let mut thetas = vec![Vec::new(); grid.len()];
    let mut status = vec![Status::Converged; grid.len()];
    if !matches!(shape, Shape::Single(_)) {
        let z = std.row_major_mul(input.x);
        let mut prob = Problem {
            z: &z,
            n,
            p,
            blocks: theta0.len() / q,
            binary: shape == Shape::Binary,
            labels: &labels,
            inv_c: 0.0,
        };
        let mut order: Vec<usize> = (0..grid.len()).collect();
        order.sort_by(|&a, &b| grid[a].total_cmp(&grid[b]));
        let mut theta = theta0;
        for g in order {
            prob.inv_c = 1.0 / grid[g];
            let st = if theta.len() <= NEWTON_MAX_PARAMS {
                newton(&prob, &mut theta)
            } else {
                lbfgs(&prob, &mut theta)
            };
            let st = st.ok_or_else(|| {
                FitError(format!(
                    "logistic: inverse_penalty = {}: the objective became non-finite",
                    grid[g]
                ))
            })?;
            if theta.iter().any(|v| !v.is_finite()) {
                return Err(FitError(format!(
                    "logistic: inverse_penalty = {}: a coefficient became non-finite",
                    grid[g]
                )));
            }
            thetas[g] = theta.clone();
            status[g] = st;
        }
    }
    Ok(PathFit {
        std,
        shape,
        classes,
        p,
        thetas,
        status,
    })
}

/// The penalized negative log-likelihood on standardized inputs for one value of `1/C`.
/// Parameters: `blocks` blocks of `[b, w_1..w_p]`; in the multinomial case block 0's intercept
/// is held at 0 (its gradient entry and Hessian row/column are replaced by a unit pivot).
struct Problem<'a> {
    /// Row-major `n × p` standardized training inputs.
    z: &'a [f64],
    n: usize,
    p: usize,
    blocks: usize,
    binary: bool,
    /// Block index of each training row's class (binary: 0 or 1 = the response).
    labels: &'a [usize],
    inv_c: f64,
}

impl Problem<'_> {
    fn dim(&self) -> usize {
        self.blocks * (self.p + 1)
    }

    /// Objective at `theta`; fills the gradient and the full (symmetric, row-major) Hessian when
    /// asked.
    fn evaluate(
        &self,
        theta: &[f64],
        mut grad: Option<&mut [f64]>,
        mut hess: Option<&mut [f64]>,
    ) -> f64 {
        let (p, k) = (self.p, self.blocks);
        let q = p + 1;
        let d = self.dim();
        if let Some(g) = grad.as_mut() {
            g.fill(0.0);
        }
        if let Some(h) = hess.as_mut() {
            h.fill(0.0);
        }
        let mut eta = vec![0.0; k];
        let mut resid = vec![0.0; k];
        let mut curv = vec![0.0; k * k];
        let mut xt = vec![1.0; q];
        let mut loss = 0.0;
        for i in 0..self.n {
            xt[1..].copy_from_slice(&self.z[i * p..(i + 1) * p]);
            for (c, e) in eta.iter_mut().enumerate() {
                *e = dot(&theta[c * q..(c + 1) * q], &xt);
            }
            let yi = self.labels[i];
            if self.binary {
                let (e, y) = (eta[0], yi as f64);
                loss += softplus(e) - y * e;
                let (s1, s0) = (sigmoid(e), sigmoid(-e));
                resid[0] = s1 - y;
                curv[0] = s1 * s0;
            } else {
                let lse = log_sum_exp(&eta);
                loss += lse - eta[yi];
                if grad.is_some() || hess.is_some() {
                    for (r, e) in resid.iter_mut().zip(&eta) {
                        *r = (e - lse).exp();
                    }
                    for c in 0..k {
                        for c2 in c..k {
                            let delta = if c == c2 { 1.0 } else { 0.0 };
                            curv[c * k + c2] = resid[c] * (delta - resid[c2]);
                        }
                    }
                    resid[yi] -= 1.0;
                }
            }
            if let Some(g) = grad.as_mut() {
                for c in 0..k {
                    for (gv, x) in g[c * q..(c + 1) * q].iter_mut().zip(&xt) {
                        *gv += resid[c] * x;
                    }
                }
            }
            if let Some(h) = hess.as_mut() {
                for c in 0..k {
                    for c2 in c..k {
                        let wc = curv[c * k + c2];
                        if wc == 0.0 {
                            continue;
                        }
                        for a in 0..q {
                            let wa = wc * xt[a];
                            let start = if c2 == c { a } else { 0 };
                            let row = (c * q + a) * d + c2 * q;
                            for (hv, x) in h[row + start..row + q].iter_mut().zip(&xt[start..]) {
                                *hv += wa * x;
                            }
                        }
                    }
                }
            }
        }
        let mut pen = 0.0;
        for c in 0..k {
            for j in 1..q {
                let v = theta[c * q + j];
                pen += v * v;
            }
        }
        if let Some(g) = grad.as_mut() {
            for c in 0..k {
                for j in 1..q {
                    g[c * q + j] += self.inv_c * theta[c * q + j];
                }
            }
            if !self.binary {
                g[0] = 0.0;
            }
        }
        if let Some(h) = hess.as_mut() {
            for c in 0..k {
                for j in 1..q {
                    let r = c * q + j;
                    h[r * d + r] += self.inv_c;
                }
            }
            for r in 0..d {
                for s in 0..r {
                    h[r * d + s] = h[s * d + r];
                }
            }
            if !self.binary {
                for s in 0..d {
                    h[s] = 0.0;
                    h[s * d] = 0.0;
                }
                h[0] = 1.0;
            }
        }
        loss + 0.5 * self.inv_c * pen
    }

    fn value(&self, theta: &[f64]) -> f64 {
        self.evaluate(theta, None, None)
    }

    fn grad_tol(&self) -> f64 {
        GRAD_TOL_PER_ROW * self.n as f64
    }
}

/// Backtracking (Armijo) line search from `theta` along `dir`; on success `trial` holds the
/// accepted point and the result is `(objective, step)`.
fn line_search(
    prob: &Problem<'_>,
    theta: &[f64],
    f: f64,
    grad: &[f64],
    dir: &[f64],
    trial: &mut [f64],
) -> Option<(f64, f64)> {
    let gd = dot(grad, dir);
    if gd.is_nan() || gd >= 0.0 {
        return None;
    }
    let mut t = 1.0;
    for _ in 0..MAX_HALVINGS {
        for ((tr, th), di) in trial.iter_mut().zip(theta).zip(dir) {
            *tr = th + t * di;
        }
        let ft = prob.value(trial);
        if ft.is_finite() && ft <= f + ARMIJO * t * gd {
            return Some((ft, t));
        }
        t *= 0.5;
    }
    None
}

/// Damped Newton with line search; `None` if the objective is non-finite at an iterate.
fn newton(prob: &Problem<'_>, theta: &mut [f64]) -> Option<Status> {
    let d = prob.dim();
    let mut grad = vec![0.0; d];
    let mut hess = vec![0.0; d * d];
    let mut work = vec![0.0; d * d];
    let mut dir = vec![0.0; d];
    let mut trial = vec![0.0; d];
    for _ in 0..MAX_NEWTON_ITER {
        let f = prob.evaluate(theta, Some(&mut grad), Some(&mut hess));
        if !f.is_finite() {
            return None;
        }
        if norm(&grad) <= prob.grad_tol() {
            return Some(Status::Converged);
        }
        newton_direction(&hess, &grad, d, &mut work, &mut dir);
        match line_search(prob, theta, f, &grad, &dir, &mut trial) {
            None => return Some(Status::Stalled),
            Some((ft, t)) => {
                theta.copy_from_slice(&trial);
                if t == 1.0 && f - ft < REL_OBJ_TOL * ft.abs().max(f64::MIN_POSITIVE) {
                    return Some(Status::Converged);
                }
            }
        }
    }
    Some(Status::MaxIter)
}

/// Solves `H dir = −grad` by Cholesky, adding `τ · max diag(H) · I` with growing `τ` while `H`
/// is not numerically positive definite; falls back to steepest descent.
fn newton_direction(hess: &[f64], grad: &[f64], d: usize, work: &mut [f64], dir: &mut [f64]) {
    let scale = (0..d).fold(1e-300_f64, |a, r| a.max(hess[r * d + r].abs()));
    for tau in [0.0, 1e-12, 1e-9, 1e-6, 1e-3, 1.0] {
        work.copy_from_slice(hess);
        for r in 0..d {
            work[r * d + r] += tau * scale;
        }
        if cholesky(work, d) {
            for (di, g) in dir.iter_mut().zip(grad) {
                *di = -g;
            }
            cholesky_solve(work, d, dir);
            if dir.iter().all(|v| v.is_finite()) && dot(grad, dir) < 0.0 {
                return;
            }
        }
    }
    for (di, g) in dir.iter_mut().zip(grad) {
        *di = -g;
    }
}

/// L-BFGS with the Armijo line search; `None` if the objective is non-finite at an iterate.
fn lbfgs(prob: &Problem<'_>, theta: &mut [f64]) -> Option<Status> {
    let d = prob.dim();
    let mut grad = vec![0.0; d];
    let mut grad_new = vec![0.0; d];
    let mut dir = vec![0.0; d];
    let mut trial = vec![0.0; d];
    let mut hist: VecDeque<(Vec<f64>, Vec<f64>, f64)> = VecDeque::new();
    let mut alpha = [0.0; LBFGS_MEMORY];
    // Initial inverse-curvature scale: standardized columns (and the intercept's column of ones)
    // have mean square at most 1 and p(1 − p) ≤ 1/4, so each diagonal entry of the loss Hessian
    // is at most n/4.
    let gamma0 = 1.0 / (0.25 * prob.n as f64 + prob.inv_c);
    let mut f = prob.evaluate(theta, Some(&mut grad), None);
    if !f.is_finite() {
        return None;
    }
    for _ in 0..MAX_LBFGS_ITER {
        if norm(&grad) <= prob.grad_tol() {
            return Some(Status::Converged);
        }
        // Two-loop recursion: dir = −H_k grad.
        dir.copy_from_slice(&grad);
        for (k, (s, y, rho)) in hist.iter().enumerate().rev() {
            let a = rho * dot(s, &dir);
            alpha[k] = a;
            for (v, yv) in dir.iter_mut().zip(y) {
                *v -= a * yv;
            }
        }
        let gamma = match hist.back() {
            Some((s, y, _)) => dot(s, y) / dot(y, y),
            None => gamma0,
        };
        for v in dir.iter_mut() {
            *v *= gamma;
        }
        for (k, (s, y, rho)) in hist.iter().enumerate() {
            let b = rho * dot(y, &dir);
            for (v, sv) in dir.iter_mut().zip(s) {
                *v += (alpha[k] - b) * sv;
            }
        }
        for v in dir.iter_mut() {
            *v = -*v;
        }
        let mut step = line_search(prob, theta, f, &grad, &dir, &mut trial);
        if step.is_none() && !hist.is_empty() {
            hist.clear();
            for (di, g) in dir.iter_mut().zip(&grad) {
                *di = -gamma0 * g;
            }
            step = line_search(prob, theta, f, &grad, &dir, &mut trial);
        }
        if step.is_none() {
            return Some(Status::Stalled);
        }
        let f_new = prob.evaluate(&trial, Some(&mut grad_new), None);
        if !f_new.is_finite() {
            return None;
        }
        let s: Vec<f64> = trial.iter().zip(theta.iter()).map(|(a, b)| a - b).collect();
        let y: Vec<f64> = grad_new.iter().zip(&grad).map(|(a, b)| a - b).collect();
        let sy = dot(&s, &y);
        if sy > 1e-12 * norm(&s) * norm(&y) && sy > 0.0 {
            if hist.len() == LBFGS_MEMORY {
                hist.pop_front();
            }
            hist.push_back((s, y, 1.0 / sy));
        }
        theta.copy_from_slice(&trial);
        grad.copy_from_slice(&grad_new);
        f = f_new;
    }
    Some(Status::MaxIter)
}

/// In-place lower Cholesky factor of the row-major `d × d` matrix `a`; false if a pivot is not
/// positive and finite.
fn cholesky(a: &mut [f64], d: usize) -> bool {
    for j in 0..d {
        let mut s = a[j * d + j];
        for k in 0..j {
            s -= a[j * d + k] * a[j * d + k];
        }
        if !(s > 0.0 && s.is_finite()) {
            return false;
        }
        let ljj = s.sqrt();
        a[j * d + j] = ljj;
        for i in j + 1..d {
            let mut s = a[i * d + j];
            for k in 0..j {
                s -= a[i * d + k] * a[j * d + k];
            }
            a[i * d + j] = s / ljj;
        }
    }
    true
}

/// Solves `L Lᵀ x = b` in place, with `L` the lower triangle of `l`.
fn cholesky_solve(l: &[f64], d: usize, b: &mut [f64]) {
    for i in 0..d {
        let mut s = b[i];
        for k in 0..i {
            s -= l[i * d + k] * b[k];
        }
        b[i] = s / l[i * d + i];
    }
    for i in (0..d).rev() {
        let mut s = b[i];
        for k in i + 1..d {
            s -= l[k * d + i] * b[k];
        }
        b[i] = s / l[i * d + i];
    }
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// `1 / (1 + e^{−x})` without overflow.
fn sigmoid(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

/// `log(1 + e^x)` without overflow.
fn softplus(x: f64) -> f64 {
    x.max(0.0) + (-x.abs()).exp().ln_1p()
}

/// `log Σ e^{v_k}` without overflow.
fn log_sum_exp(v: &[f64]) -> f64 {
    let m = v.iter().fold(f64::NEG_INFINITY, |a, &b| a.max(b));
    if !m.is_finite() {
        return m;
    }
    m + v.iter().map(|&x| (x - m).exp()).sum::<f64>().ln()
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array1, Array2};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn the_work_estimate_counts_the_solver_that_runs() {
        let f = LogisticFamily;
        let two = Task::Classify { classes: 2 };
        // Newton at 51 parameters: its Hessian and working copy.
        let newton = f.work_bytes(100, 50, 10, &[1.0], two);
        assert_eq!(
            newton,
            8.0 * (3.0 * 5000.0 + 110.0 + 2.0 * 51.0 * 51.0 + 51.0)
        );
        // L-BFGS at 57 001 parameters: no d × d term (it was 52 GB).
        let lbfgs = f.work_bytes(200, 57_000, 200, &[1.0, 2.0], two);
        assert!(lbfgs < 1e9, "{lbfgs}");
    }

    /// Invented scenario: a grading station on a fruit-sorting line records `p` readings on
    /// different scales and offsets; the grade (one of `k`) is drawn from a softmax of linear
    /// scores, so the classes overlap (not separable).
    fn data(seed: u64, n: usize, p: usize, k: usize) -> (Array2<f64>, Array1<f64>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let x = Array2::from_shape_fn((n, p), |(_, j)| {
            rng.gen_range(-1.0..1.0) * (j as f64 + 1.0) + 3.0 * j as f64
        });
        let coef: Vec<Vec<f64>> = (0..k)
            .map(|_| (0..p).map(|_| rng.gen_range(-1.5..1.5)).collect())
            .collect();
        let y = x
            .rows()
            .into_iter()
            .map(|r| {
                let s: Vec<f64> = coef
                    .iter()
                    .map(|cf| {
                        cf.iter()
                            .enumerate()
                            .map(|(j, b)| b * (r[j] - 3.0 * j as f64) / (j as f64 + 1.0))
                            .sum::<f64>()
                    })
                    .collect();
                let tot: f64 = s.iter().map(|v| v.exp()).sum();
                let mut u = rng.gen_range(0.0..tot);
                let mut cls = k - 1;
                for (c, v) in s.iter().enumerate() {
                    if u < v.exp() {
                        cls = c;
                        break;
                    }
                    u -= v.exp();
                }
                cls as f64
            })
            .collect();
        (x, y)
    }

    fn input<'a>(
        x: &'a Array2<f64>,
        y: &'a Array1<f64>,
        eval: &'a Array2<f64>,
        k: usize,
    ) -> FitInput<'a> {
        FitInput {
            x: x.view(),
            y: y.view(),
            eval: eval.view(),
            task: Task::Classify { classes: k },
            seed: crate::rng::FitSeed::fixed(0),
        }
    }

    fn predict(inp: &FitInput<'_>, grid: &[f64]) -> Array2<f64> {
        let mut out = Array2::zeros((grid.len(), inp.eval.nrows()));
        LogisticFamily
            .fit_predict(inp, grid, crate::family::Out::values(out.view_mut()))
            .expect("fit");
        out
    }

    /// Standardization written out independently: training mean, population sd, constant → 0.
    fn standardize(x: &Array2<f64>) -> Array2<f64> {
        let (n, p) = x.dim();
        let mut z = Array2::zeros((n, p));
        for j in 0..p {
            let c = x.column(j);
            let mu = c.sum() / n as f64;
            let sd = (c.iter().map(|v| (v - mu).powi(2)).sum::<f64>() / n as f64).sqrt();
            let big = c.iter().fold(0.0_f64, |a, v| a.max(v.abs()));
            for i in 0..n {
                z[[i, j]] = if sd > 1e-12 * big {
                    (x[[i, j]] - mu) / sd
                } else {
                    0.0
                };
            }
        }
        z
    }

    /// The stated objective and its gradient over **all** parameters (reference intercept
    /// included), written directly from the formulas in the module docs, without the solver's
    /// code. `blocks == 1` is binary (labels 0/1), otherwise softmax over `blocks` classes.
    fn direct(
        z: &Array2<f64>,
        lab: &[usize],
        blocks: usize,
        c: f64,
        theta: &[f64],
    ) -> (f64, Vec<f64>) {
        let (n, p) = z.dim();
        let q = p + 1;
        let mut grad = vec![0.0; theta.len()];
        let mut f = 0.0;
        for i in 0..n {
            let eta: Vec<f64> = (0..blocks)
                .map(|b| {
                    theta[b * q]
                        + (0..p)
                            .map(|j| theta[b * q + 1 + j] * z[[i, j]])
                            .sum::<f64>()
                })
                .collect();
            let resid: Vec<f64> = if blocks == 1 {
                let pr = 1.0 / (1.0 + (-eta[0]).exp());
                let y = lab[i] as f64;
                f -= y * pr.ln() + (1.0 - y) * (1.0 - pr).ln();
                vec![pr - y]
            } else {
                let tot: f64 = eta.iter().map(|e| e.exp()).sum();
                f -= (eta[lab[i]].exp() / tot).ln();
                (0..blocks)
                    .map(|b| eta[b].exp() / tot - if b == lab[i] { 1.0 } else { 0.0 })
                    .collect()
            };
            for b in 0..blocks {
                grad[b * q] += resid[b];
                for j in 0..p {
                    grad[b * q + 1 + j] += resid[b] * z[[i, j]];
                }
            }
        }
        for b in 0..blocks {
            for j in 0..p {
                let w = theta[b * q + 1 + j];
                f += w * w / (2.0 * c);
                grad[b * q + 1 + j] += w / c;
            }
        }
        (f, grad)
    }

    fn labels(y: &Array1<f64>) -> Vec<usize> {
        y.iter().map(|&v| v as usize).collect()
    }

    fn max_abs_diff(a: &[f64], b: &[f64]) -> f64 {
        a.iter().zip(b).fold(0.0, |m, (x, y)| m.max((x - y).abs()))
    }

    #[test]
    fn gradient_of_stated_objective_vanishes_binary_and_three_class() {
        // Independent check: the objective is strictly convex, so its minimiser is the unique
        // point where the gradient is zero (KKT conditions, no constraints); the gradient is
        // recomputed by `direct`, not by the solver.
        let grid = [0.01, 0.3, 1.0, 10.0, 1000.0];
        for (k, seed) in [(2usize, 11u64), (3, 12), (4, 13)] {
            let (x, y) = data(seed, 150, 3, k);
            let fit = fit_path(&input(&x, &y, &x, k), &grid).expect("fit");
            let z = standardize(&x);
            let lab = labels(&y);
            let blocks = if k == 2 { 1 } else { k };
            assert_eq!(fit.thetas[0].len(), blocks * 4);
            let scale = norm(&direct(&z, &lab, blocks, 1.0, &vec![0.0; blocks * 4]).1);
            for (g, &c) in grid.iter().enumerate() {
                assert_eq!(fit.status[g], Status::Converged, "k={k}, C={c}");
                let th = &fit.thetas[g];
                let (_, grad) = direct(&z, &lab, blocks, c, th);
                let rel = norm(&grad) / scale;
                assert!(rel < 1e-6, "k={k}, C={c}: relative gradient {rel}");
                if blocks > 1 {
                    // Exact identity of the optimum: the loss is invariant to adding one vector
                    // to every w_c, so the penalty's gradient Σ_c w_c / C must vanish.
                    let wmax = th.iter().fold(0.0_f64, |a, v| a.max(v.abs()));
                    for j in 1..4 {
                        let s: f64 = (0..blocks).map(|b| th[b * 4 + j]).sum();
                        assert!(s.abs() <= 1e-6 * wmax.max(1.0), "k={k}, C={c}: Σ w = {s}");
                    }
                    assert_eq!(th[0], 0.0, "reference intercept is held at 0");
                }
            }
        }
    }

    #[test]
    fn tiny_c_gives_zero_weights_and_logit_of_class_share() {
        // Exact limit: as C → 0 the weights are forced to 0 and the intercept-only logistic MLE
        // has σ(b) = class share, i.e. b = log(n1 / n0); softmax: b_c − b_ref = log(n_c / n_ref).
        let (x, mut y) = data(21, 120, 3, 2);
        for (i, v) in y.iter_mut().enumerate() {
            if i % 3 == 0 {
                *v = 1.0; // push the share of class 1 well above 1/2
            }
        }
        let n1 = y.sum();
        let n0 = y.len() as f64 - n1;
        assert!(n1 > n0);
        let c = [1e-9];
        let fit = fit_path(&input(&x, &y, &x, 2), &c).expect("fit");
        let th = &fit.thetas[0];
        assert!((th[0] - (n1 / n0).ln()).abs() < 1e-6, "b = {}", th[0]);
        assert!(th[1..].iter().all(|w| w.abs() < 1e-6), "{th:?}");
        let pred = predict(&input(&x, &y, &x, 2), &c);
        assert!(pred.iter().all(|&v| v == 1.0), "majority class is 1");

        let (x3, y3) = data(22, 150, 2, 3);
        let counts: Vec<f64> = (0..3)
            .map(|c| y3.iter().filter(|&&v| v == c as f64).count() as f64)
            .collect();
        let fit = fit_path(&input(&x3, &y3, &x3, 3), &c).expect("fit");
        let th = &fit.thetas[0];
        for b in 0..3 {
            let want = (counts[b] / counts[0]).ln();
            assert!(
                (th[b * 3] - want).abs() < 1e-6,
                "class {b}: {} vs {want}",
                th[b * 3]
            );
            assert!(th[b * 3 + 1].abs() < 1e-6 && th[b * 3 + 2].abs() < 1e-6);
        }
        let major = (0..3).fold(0, |m, c| if counts[c] > counts[m] { c } else { m });
        let pred = predict(&input(&x3, &y3, &x3, 3), &c);
        assert!(pred.iter().all(|&v| v == major as f64));
    }

    #[test]
    fn warm_started_path_equals_cold_single_fits() {
        // Exact identity: the minimiser is unique, so the starting point cannot matter beyond
        // solver tolerance. The grid is given unsorted on purpose.
        let grid = [100.0, 0.01, 1.0, 0.1, 10.0];
        for (k, seed) in [(2usize, 31u64), (3, 32)] {
            let (x, y) = data(seed, 140, 3, k);
            let (eval, _) = data(seed + 100, 40, 3, k);
            let inp = input(&x, &y, &eval, k);
            let path = fit_probabilities(&inp, &grid).expect("path");
            let path_pred = predict(&inp, &grid);
            for (g, &c) in grid.iter().enumerate() {
                let cold = fit_probabilities(&inp, &[c]).expect("cold");
                let a: Vec<f64> = path
                    .index_axis(ndarray::Axis(0), g)
                    .iter()
                    .copied()
                    .collect();
                let b: Vec<f64> = cold.iter().copied().collect();
                let d = max_abs_diff(&a, &b);
                assert!(d < 1e-8, "k={k}, C={c}: probabilities differ by {d}");
                let cold_pred = predict(&inp, &[c]);
                assert_eq!(path_pred.row(g), cold_pred.row(0), "k={k}, C={c}");
                // Probabilities are a distribution and the prediction is their argmax.
                for e in 0..eval.nrows() {
                    let pr: Vec<f64> = (0..k).map(|c| path[[g, e, c]]).collect();
                    assert!((pr.iter().sum::<f64>() - 1.0).abs() < 1e-12);
                    let arg = (0..k).fold(0, |m, c| if pr[c] > pr[m] { c } else { m });
                    assert_eq!(path_pred[[g, e]], arg as f64);
                }
            }
        }
    }

    #[test]
    fn binary_matches_independent_gradient_descent() {
        // Reference: plain gradient descent on the stated objective (written in this test, step
        // 1/L with L = ¼‖[1 Z]‖_F² + 1/C ≥ the Hessian's largest eigenvalue), run to a gradient
        // norm of 1e-12; the error bound is ‖∇F‖/μ with μ ≥ the Hessian's smallest eigenvalue.
        let (x, y) = data(41, 60, 2, 2);
        let z = standardize(&x);
        let lab = labels(&y);
        for c in [0.5, 2.0] {
            let fit = fit_path(&input(&x, &y, &x, 2), &[c]).expect("fit");
            let lip = 0.25 * (z.len() + z.nrows()) as f64 + 1.0 / c;
            let mut th = vec![0.0; 3];
            for _ in 0..500_000 {
                let (_, g) = direct(&z, &lab, 1, c, &th);
                if norm(&g) < 1e-12 {
                    break;
                }
                for (t, gv) in th.iter_mut().zip(&g) {
                    *t -= gv / lip;
                }
            }
            let d = max_abs_diff(&th, &fit.thetas[0]);
            assert!(
                d < 1e-5,
                "C={c}: coefficients differ by {d}: {th:?} vs {:?}",
                fit.thetas[0]
            );
        }
    }

    /// Invented scenario: a cold store's door sensor; readings below a threshold are "closed"
    /// (0), above it "open" (1), with a wide gap, so the classes are linearly separable.
    fn separable(n: usize, k: usize) -> (Array2<f64>, Array1<f64>) {
        let mut rng = ChaCha8Rng::seed_from_u64(51);
        let mut x = Array2::zeros((n, 2));
        let mut y = Array1::zeros(n);
        for i in 0..n {
            let c = i % k;
            x[[i, 0]] = 10.0 * c as f64 + rng.gen_range(-1.0..1.0);
            x[[i, 1]] = rng.gen_range(-5.0..5.0);
            y[i] = c as f64;
        }
        (x, y)
    }

    #[test]
    fn separable_data_at_huge_c_fits_training_set_perfectly() {
        for k in [2, 3] {
            let (x, y) = separable(60, k);
            let grid = [1.0, 1e3, 1e6];
            let inp = input(&x, &y, &x, k);
            let pred = predict(&inp, &grid);
            for (g, c) in grid.iter().enumerate() {
                assert_eq!(pred.row(g), y.view(), "k={k}, C={c}");
            }
            let pr = fit_probabilities(&inp, &grid).expect("probabilities");
            assert!(pr.iter().all(|v| v.is_finite() && (0.0..=1.0).contains(v)));
        }
    }

    #[test]
    fn absent_class_gets_zero_probability_and_two_present_equal_binary_at_twice_c() {
        // Exact identity (module docs): with two classes present, the optimum of the two-block
        // softmax has w_1 = −w_0, so it is binary logistic with v = 2 w_1 and C' = 2C.
        let (x, y2) = data(61, 100, 3, 2);
        let y3 = y2.mapv(|v| 2.0 * v); // labels 0 and 2 in a three-class task
        let (eval, _) = data(62, 30, 3, 2);
        for c in [0.05, 1.0, 20.0] {
            let p3 = fit_probabilities(&input(&x, &y3, &eval, 3), &[c]).expect("3");
            let p2 = fit_probabilities(&input(&x, &y2, &eval, 2), &[2.0 * c]).expect("2");
            for e in 0..eval.nrows() {
                assert_eq!(p3[[0, e, 1]], 0.0);
                assert!((p3[[0, e, 0]] - p2[[0, e, 0]]).abs() < 1e-8, "C={c}");
                assert!((p3[[0, e, 2]] - p2[[0, e, 1]]).abs() < 1e-8, "C={c}");
            }
            let pred = predict(&input(&x, &y3, &eval, 3), &[c]);
            assert!(pred.iter().all(|&v| v == 0.0 || v == 2.0));
        }
    }

    #[test]
    fn single_class_present_is_predicted_everywhere() {
        let (x, _) = data(71, 20, 2, 2);
        let y = Array1::from_elem(20, 1.0);
        for k in [2, 4] {
            let inp = input(&x, &y, &x, k);
            let pred = predict(&inp, &[0.1, 10.0]);
            assert!(pred.iter().all(|&v| v == 1.0));
            let pr = fit_probabilities(&inp, &[0.1]).expect("p");
            assert!((0..20).all(|e| pr[[0, e, 1]] == 1.0));
        }
    }

    #[test]
    fn constant_column_gets_zero_weight() {
        let (mut x, y) = data(81, 80, 3, 3);
        x.column_mut(1).fill(4.25);
        let fit = fit_path(&input(&x, &y, &x, 3), &[1.0, 50.0]).expect("fit");
        for th in &fit.thetas {
            for b in 0..3 {
                assert_eq!(th[b * 4 + 2], 0.0);
            }
        }
    }

    #[test]
    fn many_parameters_use_lbfgs_and_still_reach_the_optimum() {
        // 3 classes × (100 + 1) = 303 > NEWTON_MAX_PARAMS, so L-BFGS runs; same independent
        // gradient check as for Newton.
        let (x, y) = data(91, 200, 100, 3);
        let grid = [0.1, 1.0];
        let fit = fit_path(&input(&x, &y, &x, 3), &grid).expect("fit");
        assert!(fit.thetas[0].len() > NEWTON_MAX_PARAMS);
        let z = standardize(&x);
        let lab = labels(&y);
        let scale = norm(&direct(&z, &lab, 3, 1.0, &vec![0.0; 303]).1);
        for (g, &c) in grid.iter().enumerate() {
            assert_eq!(fit.status[g], Status::Converged, "C={c}");
            let rel = norm(&direct(&z, &lab, 3, c, &fit.thetas[g]).1) / scale;
            assert!(rel < 1e-6, "C={c}: relative gradient {rel}");
        }
    }

    #[test]
    fn deterministic_bit_for_bit() {
        let (x, y) = data(95, 90, 3, 3);
        let inp = input(&x, &y, &x, 3);
        let a = fit_probabilities(&inp, &[0.2, 5.0]).expect("a");
        let b = fit_probabilities(&inp, &[0.2, 5.0]).expect("b");
        assert!(a
            .iter()
            .zip(b.iter())
            .all(|(u, v)| u.to_bits() == v.to_bits()));
    }

    #[test]
    fn bad_grids_labels_and_tasks_are_errors_not_panics() {
        let fam = LogisticFamily;
        assert_eq!(fam.name(), "logistic");
        assert_eq!(fam.knob(), "inverse_penalty");
        assert!(fam.supports(Task::Classify { classes: 2 }));
        assert!(fam.supports(Task::Classify { classes: 5 }));
        assert!(!fam.supports(Task::Regress));
        assert!(fam.check_grid(&[0.1, 1.0, 1e6], 10, 2).is_ok());
        for bad in [0.0, -1.0, f64::NAN, f64::INFINITY] {
            let e = fam.check_grid(&[1.0, bad], 10, 2).unwrap_err();
            assert!(e.contains(&format!("{bad}")), "{e}");
        }
        assert!(fam.check_grid(&[1.0], 0, 2).is_err());

        let (x, y) = data(99, 30, 2, 2);
        let mut out = Array2::zeros((1, 30));
        let e = fam
            .fit_predict(
                &input(&x, &y, &x, 2),
                &[0.0],
                crate::family::Out::values(out.view_mut()),
            )
            .unwrap_err();
        assert!(e.0.contains("inverse_penalty"), "{}", e.0);
        let reg = FitInput {
            task: Task::Regress,
            ..input(&x, &y, &x, 2)
        };
        assert!(fam
            .fit_predict(&reg, &[1.0], crate::family::Out::values(out.view_mut()))
            .is_err());
        for bad in [2.0, 0.5, -1.0] {
            let mut yb = y.clone();
            yb[3] = bad;
            let e = fam
                .fit_predict(
                    &input(&x, &yb, &x, 2),
                    &[1.0],
                    crate::family::Out::values(out.view_mut()),
                )
                .unwrap_err();
            assert!(e.0.contains(&format!("{bad}")), "{}", e.0);
        }
        assert!(fam
            .fit_predict(
                &input(&x, &y, &x, 0),
                &[1.0],
                crate::family::Out::values(out.view_mut())
            )
            .is_err());
        let mut wrong = Array2::zeros((2, 30));
        assert!(fam
            .fit_predict(
                &input(&x, &y, &x, 2),
                &[1.0],
                crate::family::Out::values(wrong.view_mut())
            )
            .is_err());
    }
}
