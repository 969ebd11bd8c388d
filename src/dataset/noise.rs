//! Noise-variance estimators for a table, where σ² = Var(Y | X) is unknown: pure functions of
//! (x, y) that return an estimate, a standard error and the method's name.
//!
//! - [`nearest_neighbour`]: the nearest-neighbour difference estimator on standardized inputs
//!   (Devroye, Györfi, Lugosi, Walk 2018, *Electron. J. Statist.* 12:1752–1778):
//!   `σ̂² = (1/2n) Σ (y_i − y_{N(i)})²`. Unbiased when f is constant; for smooth f its bias is
//!   `(1/2n) Σ (f(x_i) − f(x_{N(i)}))²`, which shrinks as the neighbours get closer.
//! - [`gamma_test`]: the Gamma test (Stefánsson, Končar, Jones 1997): regress
//!   `γ(k) = ½ mean (y_{N_k(i)} − y_i)²` on `δ(k) = mean ‖x_{N_k(i)} − x_i‖²` for k = 1..10; the
//!   intercept estimates σ².
//! - [`gsjs`]: Gasser, Sroka, Jennen-Steinmetz (1986, *Biometrika* 73:625–633), one input:
//!   pseudo-residuals from consecutive points in sorted x, exactly unbiased for linear f.
//! - [`plane`]: local-linear pseudo-residuals, GSJS's idea in any number of inputs: each row's
//!   response minus the least-squares plane through its [`PLANE_NEIGHBOURS_PER_PARAMETER`]·(p+1)
//!   nearest rows, evaluated at the row, scaled so that its noise part has variance σ². Exactly
//!   unbiased for a linear f (a difference-based estimator of the kind studied by Munk, Bissantz,
//!   Wagner and Freitag 2005, *JRSS B* 67:19–41, and Spokoiny 2002, *Annals of Statistics*
//!   30:1084–1116, both from memory; the construction here is written out in [`plane`]).
//!
//! Standard errors: each estimator's plug-in variance of its terms (with the covariances of
//! terms that share a response), never below the Gaussian floor `√(2 tr A²) σ̂²`, the exact
//! standard deviation of a Gaussian quadratic form whose truth it does not see
//! ([`Design::trace_of_square`]); measured in `docs/twin-calibration.md` §3.1.
//!
//! [`default_method`] picks the estimator by the number of inputs (GSJS with one, the Gamma
//! test otherwise). Every estimator here is a quadratic form `yᵀAy` with `tr A = 1` under
//! unit-variance noise, so given the inputs its expectation is `σ² + fᵀAf`: the bias is the
//! estimator applied to the noise-free truth, whatever σ² is (the twin's correction in
//! [`crate::dgp::twin`] uses this). [`Design`] prepares an estimator once for a set of inputs
//! so that many response vectors (a parametric bootstrap) are cheap.

use ndarray::{ArrayView1, ArrayView2};

use crate::family::linalg::solve_spd;
use crate::family::neighbours::{NeighbourIndex, Scratch};

/// Which estimator.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Method {
    /// Nearest-neighbour difference estimator (`nn`).
    NearestNeighbour,
    /// Gamma test (`gamma`).
    Gamma,
    /// Gasser–Sroka–Jennen-Steinmetz (`gsjs`), one input only.
    Gsjs,
    /// Local-linear pseudo-residuals (`plane`).
    Plane,
}

impl Method {
    /// Name as written in scenario files (`noise_estimator`).
    pub fn name(self) -> &'static str {
        match self {
            Method::NearestNeighbour => "nn",
            Method::Gamma => "gamma",
            Method::Gsjs => "gsjs",
            Method::Plane => "plane",
        }
    }

    /// Parses a scenario-file name.
    pub fn from_name(s: &str) -> Option<Method> {
        match s {
            "nn" => Some(Method::NearestNeighbour),
            "gamma" => Some(Method::Gamma),
            "gsjs" => Some(Method::Gsjs),
            "plane" => Some(Method::Plane),
            _ => None,
        }
    }

    /// Full name with its source, for outputs.
    pub fn describe(self) -> &'static str {
        match self {
            Method::NearestNeighbour => {
                "nearest-neighbour difference estimator on standardized inputs (Devroye, Györfi, Lugosi, Walk 2018)"
            }
            Method::Gamma => "Gamma test, k = 1..min(10, n − 1) (Stefánsson, Končar, Jones 1997)",
            Method::Gsjs => "Gasser-Sroka-Jennen-Steinmetz pseudo-residuals (1986)",
            Method::Plane => {
                "local-linear pseudo-residuals: each row against the least-squares plane through its nearest rows"
            }
        }
    }
}

/// A noise-variance estimate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NoiseEstimate {
    /// Estimated σ² (in squared units of the response).
    pub value: f64,
    /// Its standard error (see each estimator for how it is computed; NaN when undefined).
    pub stderr: f64,
    /// The estimator.
    pub method: Method,
}

/// How far below 0, as a share of the responses' variance, a noise-variance estimate must be
/// to be refused (with [`clearly_negative`]'s two standard errors). A rule of thumb measured
/// here, no published source: on 450 tables of 50 rows with no or little noise (y = a + 2b
/// exactly, with sd 0.02, and sin(3a) + b² with sd 0.05; 2 inputs) the Gamma test fell more
/// than two standard errors below 0 on 11 (its standard error is understated when nearly
/// every pair shares a response), but never below −3.6% of the responses' variance; one
/// mistyped input in a table of 40 rows gave −2.1 times it, one in the cold-store table
/// about −1 times it.
pub const NEGATIVE_SHARE: f64 = 0.1;

/// The variance of the responses (divisor n; NaN for no rows): the scale against which a
/// negative noise estimate is judged.
pub fn response_variance(y: ArrayView1<'_, f64>) -> f64 {
    let n = y.len() as f64;
    let mean = y.sum() / n;
    y.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n
}

/// A noise-variance estimate more than two standard errors below 0 (a standard error that is
/// not finite counts as none) and more than [`NEGATIVE_SHARE`] of the responses' variance
/// below 0 (a variance that is not finite, e.g. unknown in an older result document, leaves
/// the two standard errors alone). Closer to 0 a negative estimate is sampling (a table with
/// little or no noise) and is reported as it is.
pub fn clearly_negative(value: f64, stderr: f64, response_variance: f64) -> bool {
    value < 0.0
        && (!stderr.is_finite() || value + 2.0 * stderr < 0.0)
        && (!response_variance.is_finite() || value < -NEGATIVE_SHARE * response_variance)
}

/// The refusal of a clearly negative estimate ([`clearly_negative`]) in words, with its likely
/// causes ([`negative_estimate_causes`]) among `table`'s inputs, judged against its responses'
/// variance; `None` when the estimate is not clearly negative. The caller adds the file and the
/// way out (a scenario key or a flag).
pub fn negative_refusal(
    method: Method,
    value: f64,
    stderr: f64,
    table: &super::Table,
) -> Option<String> {
    let var = response_variance(table.y.view());
    if !clearly_negative(value, stderr, var) {
        return None;
    }
    let estimate = if stderr.is_finite() {
        format!(
            "{} ± {}, more than two standard errors and more than a tenth of the responses' \
             variance ({}) below 0",
            crate::fmt::fmt_num(value),
            crate::fmt::fmt_num(stderr),
            crate::fmt::fmt_num(var)
        )
    } else {
        format!(
            "{} (no standard error), more than a tenth of the responses' variance ({}) below 0",
            crate::fmt::fmt_num(value),
            crate::fmt::fmt_num(var)
        )
    };
    Some(format!(
        "the noise estimate ({}) is {estimate}, which a variance cannot be: the responses do not \
         change like a smooth function plus noise at the neighbours' scale{}",
        method.name(),
        negative_estimate_causes(table.x.view(), &table.names, Some(&table.lines))
    ))
}

/// A warning for a table run whose noise estimate `value ± stderr` says almost nothing: more
/// than twice the responses' own variance (which holds the noise and the signal both), or with
/// a standard error above that variance. `None` otherwise. Found by a hostile-input sweep (40
/// rows of pure noise on 300 inputs read σ̂² = 0.21 ± 0.55 against a variance of 0.074; the
/// table's bias² came out −0.12, and the reading compared it with the variance without a
/// word). Not a refusal: honest small tables with many inputs reach it too (30 rows of pure
/// noise on 10 inputs, 5 of 100 above twice the variance, measured by a second reader), and
/// their expected loss and variance do not depend on the noise. Twice the variance is the
/// twin's bar for the variance it holds (a rule of thumb, no source).
pub fn uninformative_warning(value: f64, stderr: f64, table: &super::Table) -> Option<String> {
    let var = response_variance(table.y.view());
    let what = if value > 2.0 * var {
        format!(
            "is {} ± {}, more than twice the responses' own variance {}, which holds the noise \
             and the signal both",
            crate::fmt::fmt_num(value),
            crate::fmt::fmt_num(stderr),
            crate::fmt::fmt_num(var)
        )
    } else if stderr > var {
        format!(
            "is {} ± {}, a standard error above the responses' own variance {}",
            crate::fmt::fmt_num(value),
            crate::fmt::fmt_num(stderr),
            crate::fmt::fmt_num(var)
        )
    } else {
        return None;
    };
    let p = table.x.ncols();
    Some(format!(
        "the noise estimate {what}: with {} rows for {} it says almost nothing, so the bias² \
         terms (expected loss minus variance minus this estimate) and any reading of bias² \
         against variance are not to be trusted; the expected loss and the variance do not \
         depend on it. {}`noise_estimator = \"nn\"` in [data] (never negative, biased up)",
        table.rows(),
        table.inputs_words(),
        if p > 1 {
            "Leave inputs out (`features` in [data]), add rows, or try "
        } else {
            "Add rows, or try "
        }
    ))
}

/// How far from its column's median, in robust spreads, an input value must lie for a table
/// run to warn about it ([`far_input_warning`]). A rule of thumb, no published source: Gaussian
/// inputs never come near it, a log-normal input (σ = 1) passes it with probability about
/// 6e-5 per value, and one value typed a thousand times too large in the invented cold-store
/// table lay about 1300 spreads out.
pub const FAR_WARNING: f64 = 50.0;

/// A warning for a table whose inputs hold a value more than [`FAR_WARNING`] robust spreads
/// from its column's median ([`far_input`]), naming the column, the value and its line: the
/// noise estimators scale each input by its standard deviation, which one such value inflates,
/// so the other rows look alike in that column and its effect on the response is read as
/// noise (measured on the invented cold-store table with one load typed a thousand times too
/// large: nearest-neighbour differences read 0.473 instead of 0.285, with a standard error of
/// 0.060). `None` when no value lies that far out, and for GSJS (one input, read in its order
/// only, which no scale changes).
pub fn far_input_warning(method: Method, table: &super::Table) -> Option<String> {
    if method == Method::Gsjs {
        return None;
    }
    let (z, j, i) = far_input(table.x.view())?;
    if z <= FAR_WARNING {
        return None;
    }
    let name = table.names.get(j).map_or("?", String::as_str);
    let at = table
        .lines
        .get(i)
        .map_or(format!("row {}", i + 1), |l| format!("line {l}"));
    Some(format!(
        "column `{name}` holds {} on {at}, {} robust spreads from its median: a mistyped value? \
         The noise estimate scales each input by its standard deviation, which such a value \
         inflates, so the other rows look alike in that column and what it explains is read as \
         noise; check the value, or leave the row out",
        crate::fmt::fmt_exact(table.x[[i, j]]),
        crate::fmt::fmt_num(z)
    ))
}

/// The input value furthest from its column's median in robust spreads, when it is more than 10
/// of them away: (robust distance, column, row). The spread is `1.4826 × MAD` (a
/// normal-consistent scale; common practice), or, when more than half the column is one value,
/// the range of the other values without the furthest one.
pub fn far_input(x: ArrayView2<'_, f64>) -> Option<(f64, usize, usize)> {
    let dev_of = |a: f64, med: f64| (a - med).abs();
    let median = |v: &mut Vec<f64>| -> f64 {
        v.sort_by(f64::total_cmp);
        let n = v.len();
        if n % 2 == 1 {
            v[n / 2]
        } else {
            0.5 * (v[n / 2 - 1] + v[n / 2])
        }
    };
    let mut worst: Option<(f64, usize, usize)> = None;
    for (j, col) in x.columns().into_iter().enumerate() {
        if col.is_empty() {
            continue;
        }
        let mut v: Vec<f64> = col.to_vec();
        let med = median(&mut v);
        let mut dev: Vec<f64> = col.iter().map(|a| (a - med).abs()).collect();
        let mut scale = 1.4826 * median(&mut dev);
        if scale.is_nan() {
            continue;
        }
        if scale <= 0.0 {
            // More than half the column is one value (a 0/1 indicator, say): the spread of the
            // other values stands in, without the furthest one (a 0/1 column with one 100
            // was skipped, so its typo read as a lattice).
            let far =
                (0..col.len()).max_by(|&a, &b| dev_of(col[a], med).total_cmp(&dev_of(col[b], med)));
            let Some(far) = far else { continue };
            let (lo, hi) = col
                .iter()
                .enumerate()
                .filter(|&(i, _)| i != far)
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), (_, &a)| {
                    (lo.min(a), hi.max(a))
                });
            scale = hi - lo;
            if !(scale > 0.0 && scale.is_finite()) {
                continue;
            }
        }
        for (i, a) in col.iter().enumerate() {
            let z = (a - med).abs() / scale;
            if z > 10.0 && worst.map_or(true, |w| z > w.0) {
                worst = Some((z, j, i));
            }
        }
    }
    worst
}

/// Why a table's noise estimate came out negative (only the Gamma test's intercept can), in words
/// to add to the refusal: the input value furthest from its column's median ([`far_input`]),
/// with its line (`lines`, 1-based, when known), or else that lattices and few groups do it; and
/// how many rows repeat another row's inputs.
pub fn negative_estimate_causes(
    x: ArrayView2<'_, f64>,
    names: &[String],
    lines: Option<&[usize]>,
) -> String {
    let worst = far_input(x);
    let mut causes = Vec::new();
    if let Some((z, j, i)) = worst {
        let name = names.get(j).map_or("?", String::as_str);
        let at = lines
            .and_then(|l| l.get(i))
            .map_or(format!("row {}", i + 1), |l| format!("line {l}"));
        causes.push(format!(
            "column `{name}` holds {} on {at}, {} robust spreads from its median: a mistyped \
             value?",
            crate::fmt::fmt_exact(x[[i, j]]),
            crate::fmt::fmt_num(z)
        ));
    }
    let mut seen = std::collections::HashSet::new();
    let repeats = x
        .rows()
        .into_iter()
        .filter(|r| !seen.insert(r.iter().map(|v| v.to_bits()).collect::<Vec<u64>>()))
        .count();
    if repeats > 0 {
        causes.push(format!(
            "{repeats} {} another row's inputs",
            if repeats == 1 {
                "row repeats"
            } else {
                "rows repeat"
            }
        ));
    }
    if worst.is_none() {
        // Nothing far out: lattice designs and few groups do it (up to -52% of the responses'
        // variance on 40 points of a two-level design of 6 inputs, with little noise).
        causes.push(
            "no input value lies far out: inputs on a lattice or in a few groups make the Gamma \
             test fall below 0 on tables with little noise, where `nn` or `plane` estimate it"
                .into(),
        );
    }
    if causes.is_empty() {
        String::new()
    } else {
        format!(" ({})", causes.join("; "))
    }
}

/// The default estimator for a table with `p` inputs: the one with the smallest measured bias
/// for that dimension (`docs/twin-calibration.md`, noise study): GSJS with one input (exactly
/// unbiased for a linear truth), the Gamma test otherwise (its intercept removes the first-order
/// roughness term that biases the nearest-neighbour difference upwards in 2 and 3 inputs).
pub fn default_method(p: usize) -> Method {
    if p == 1 {
        Method::Gsjs
    } else {
        Method::Gamma
    }
}

/// Runs the chosen estimator. Returns `None` when the data cannot support it (fewer than 3
/// rows; GSJS with more than one input; Gamma with fewer than 4 rows; the plane with fewer than
/// 4 rows or more than [`PLANE_MAX_INPUTS`] inputs).
pub fn estimate(
    method: Method,
    x: ArrayView2<'_, f64>,
    y: ArrayView1<'_, f64>,
) -> Option<NoiseEstimate> {
    if x.nrows() != y.len() {
        return None;
    }
    Design::new(method, x)?.estimate(y)
}

/// An estimator prepared for one set of inputs: everything that depends only on x (the
/// neighbour lists and distances, or the sort order and weights of GSJS) is computed once, so
/// the estimate for many response vectors on the same rows (a parametric bootstrap) costs O(n)
/// each. `Design::new(m, x)?.estimate(y)` equals `estimate(m, x, y)` bit for bit.
#[derive(Debug, Clone)]
pub struct Design {
    method: Method,
    n: usize,
    kind: DesignKind,
}

#[derive(Debug, Clone)]
enum DesignKind {
    /// Nearest neighbour of each row.
    Nn(Vec<usize>),
    /// The `p` nearest neighbours of each row with squared distances, and the mean squared
    /// distance per order.
    Gamma {
        nn: Vec<Vec<(usize, f64)>>,
        delta: Vec<f64>,
    },
    /// Rows in sorted-x order and the weights `a` of the interior points.
    Gsjs { order: Vec<usize>, a: Vec<f64> },
    /// Each query row's neighbours with the weights of the plane's value at the row
    /// (`Σ_j w_j y_j`), and the row's scale `c = 1/(1 + Σ w_j²)`; an empty list is a left-out
    /// row.
    Plane {
        w: Vec<Vec<(usize, f64)>>,
        c: Vec<f64>,
    },
}

impl Design {
    /// Prepares `method` for the rows of `x`; `None` when the estimator cannot run on them.
    pub fn new(method: Method, x: ArrayView2<'_, f64>) -> Option<Design> {
        Design::weighted(method, x, None)
    }

    /// [`Design::new`] with the standardized inputs scaled by `weights` (one per column) before
    /// any neighbour distance, so that the neighbours are near in the directions given weight;
    /// GSJS (one input) ignores them.
    pub fn weighted(
        method: Method,
        x: ArrayView2<'_, f64>,
        weights: Option<&[f64]>,
    ) -> Option<Design> {
        let n = x.nrows();
        let standardize = |x: ArrayView2<'_, f64>| {
            let mut z = standardize(x);
            if let Some(w) = weights {
                for (mut col, &wj) in z.columns_mut().into_iter().zip(w) {
                    col.mapv_inplace(|v| v * wj);
                }
            }
            z
        };
        let kind = match method {
            Method::NearestNeighbour => {
                if n < 3 {
                    return None;
                }
                let z = standardize(x);
                DesignKind::Nn(nearest(z.view(), 1).iter().map(|l| l[0].0).collect())
            }
            Method::Gamma => {
                if n < 4 {
                    return None;
                }
                let z = standardize(x);
                let p = GAMMA_K.min(n - 1);
                let nn = nearest(z.view(), p);
                let mut delta = vec![0.0; p];
                for list in &nn {
                    for (k, &(_, d2)) in list.iter().enumerate() {
                        delta[k] += d2;
                    }
                }
                delta.iter_mut().for_each(|d| *d /= n as f64);
                DesignKind::Gamma { nn, delta }
            }
            Method::Gsjs => {
                if n < 3 || x.ncols() != 1 {
                    return None;
                }
                let x = x.column(0);
                let mut order: Vec<usize> = (0..n).collect();
                order.sort_by(|&a, &b| x[a].total_cmp(&x[b]).then(a.cmp(&b)));
                let xs: Vec<f64> = order.iter().map(|&i| x[i]).collect();
                let a = (1..n - 1)
                    .map(|i| {
                        let span = xs[i + 1] - xs[i - 1];
                        if span > 0.0 {
                            (xs[i + 1] - xs[i]) / span
                        } else {
                            0.5
                        }
                    })
                    .collect();
                DesignKind::Gsjs { order, a }
            }
            Method::Plane => {
                let p = x.ncols();
                let m = PLANE_NEIGHBOURS_PER_PARAMETER * (p + 1);
                if n < 4 || p > PLANE_MAX_INPUTS {
                    return None;
                }
                let z = standardize(x);
                let nn = nearest(z.view(), m.min(n - 1));
                let w: Vec<Vec<(usize, f64)>> = nn
                    .iter()
                    .enumerate()
                    .map(|(i, l)| plane_weights(z.view(), i, l))
                    .collect();
                let c = w
                    .iter()
                    .map(|l| 1.0 / (1.0 + l.iter().map(|&(_, a)| a * a).sum::<f64>()))
                    .collect();
                DesignKind::Plane { w, c }
            }
        };
        Some(Design { method, n, kind })
    }

    /// The Gamma or plane design with the share `share` of its rows left out as query rows: those whose
    /// reference values `f` (one per row, such as a twin's fit at the rows) change most over
    /// their neighbours, measured by `Σ_k (f_{N_k(i)} − f_i)²` (ties to the lower row index).
    /// The rows still serve as neighbours of the others. Where f changes faster than the
    /// neighbour distance can follow — a step — the difference estimators read the change as
    /// noise, and a reference chosen by cross-validation rounds the step off, so subtracting its
    /// roughness does not remove it (`docs/twin-calibration.md` §2); the rows around such a
    /// change are those where the reference changes most, so leaving them out removes most of
    /// the step's share at the cost of fewer terms. The result is still a quadratic form with
    /// `tr A = 1` given the rows and the left-out set. Rows where `f` does not change at all are
    /// never left out (at most those where it does). The other estimators, a `share` outside
    /// `(0, 1)`, an `f` of another length or with non-finite values, or a cut that would keep
    /// fewer than 4 query rows return the design unchanged.
    pub fn trimmed(&self, f: &[f64], share: f64) -> Design {
        let lists: Vec<Vec<usize>> = match &self.kind {
            DesignKind::Gamma { nn, .. } => nn
                .iter()
                .map(|l| l.iter().map(|&(j, _)| j).collect())
                .collect(),
            DesignKind::Plane { w, .. } => w
                .iter()
                .map(|l| l.iter().map(|&(j, _)| j).collect())
                .collect(),
            _ => return self.clone(),
        };
        let n = lists.len();
        let drop = (share * n as f64).floor() as usize;
        if !(share > 0.0 && share < 1.0) || f.len() != n || drop == 0 || n - drop < 4 {
            return self.clone();
        }
        let change: Vec<f64> = lists
            .iter()
            .enumerate()
            .map(|(i, l)| l.iter().map(|&j| (f[j] - f[i]).powi(2)).sum::<f64>())
            .collect();
        if change.iter().any(|c| !c.is_finite()) {
            return self.clone();
        }
        // Only rows where the reference changes at all: on a flat stretch the order would be
        // the rows' order in the file, which must not decide anything.
        let drop = drop.min(change.iter().filter(|&&c| c > 0.0).count());
        if drop == 0 {
            return self.clone();
        }
        let mut order: Vec<usize> = (0..n).collect();
        order.sort_by(|&a, &b| change[b].total_cmp(&change[a]).then(a.cmp(&b)));
        let left_out = &order[..drop];
        let kind = match &self.kind {
            DesignKind::Gamma { nn, .. } => {
                let mut nn = nn.clone();
                for &i in left_out {
                    nn[i].clear();
                }
                let p = nn.iter().map(Vec::len).max().unwrap_or(0);
                let mut delta = vec![0.0; p];
                for list in &nn {
                    for (k, &(_, d2)) in list.iter().enumerate() {
                        delta[k] += d2;
                    }
                }
                delta.iter_mut().for_each(|d| *d /= (n - drop) as f64);
                DesignKind::Gamma { nn, delta }
            }
            DesignKind::Plane { w, c } => {
                let mut w = w.clone();
                for &i in left_out {
                    w[i].clear();
                }
                DesignKind::Plane { w, c: c.clone() }
            }
            _ => unreachable!("only the Gamma and plane designs are trimmed"),
        };
        Design {
            method: self.method,
            n: self.n,
            kind,
        }
    }

    /// Query rows the estimate averages over (fewer than the rows after [`Design::trimmed`]).
    pub fn query_rows(&self) -> usize {
        match &self.kind {
            DesignKind::Gamma { nn, .. } => query_rows_of(nn),
            DesignKind::Plane { w, .. } => query_rows_of(w),
            _ => self.n,
        }
    }

    /// The estimator.
    pub fn method(&self) -> Method {
        self.method
    }

    /// The estimate for responses `y` at the prepared rows (`None` when `y` has another length).
    pub fn estimate(&self, y: ArrayView1<'_, f64>) -> Option<NoiseEstimate> {
        if y.len() != self.n {
            return None;
        }
        Some(self.run(y, true))
    }

    fn run(&self, y: ArrayView1<'_, f64>, with_se: bool) -> NoiseEstimate {
        let mut e = match &self.kind {
            DesignKind::Nn(nb) => nn_estimate(nb, y, with_se),
            DesignKind::Gamma { nn, delta } => gamma_estimate(nn, delta, y, with_se),
            DesignKind::Gsjs { order, a } => gsjs_estimate(order, a, y, with_se),
            DesignKind::Plane { w, c } => plane_estimate(w, c, y, with_se),
        };
        if with_se {
            // The Gaussian floor (see `trace_of_square`): the sum over dependent pairs centres
            // on the estimate and so loses most of the covariance when nearly every pair of a
            // small table shares a response.
            let floor = (2.0 * self.trace_of_square()).sqrt() * e.value.max(0.0);
            if floor.is_finite() && (e.stderr.is_nan() || e.stderr < floor) {
                e.stderr = floor;
            }
        }
        e
    }

    /// `tr(A²)` of the estimator's quadratic form `σ̂² = yᵀAy` (A symmetric): for Gaussian noise
    /// and a truth the form does not see (`Af = 0`: a constant, and for GSJS a line),
    /// `Var(σ̂²) = 2σ⁴ tr(A²)` exactly (the variance of a Gaussian quadratic form, a textbook
    /// identity for quadratic forms in normal variables, from memory); heavier-tailed noise adds
    /// `(μ₄ − 3σ⁴) Σ A_ii²`. So `√(2 tr A²) σ̂²` is a floor under the standard error of
    /// Gaussian or heavier-tailed noise, computed from the design alone. Every estimator here
    /// is a sum of weighted squared contrasts `w_t (b_tᵀy)²`; `A = Σ_t w_t b_t b_tᵀ` is summed
    /// entry by entry without storing it (neighbour pairs met from both ends are added once).
    pub fn trace_of_square(&self) -> f64 {
        match &self.kind {
            DesignKind::Nn(nb) => {
                let w = 0.5 / self.n as f64;
                pair_trace_of_square(nb.len(), |i, out| out.push((nb[i], w)))
            }
            DesignKind::Gamma { nn, delta } => {
                let c = intercept_weights(delta);
                let used = query_rows_of(nn).max(1) as f64;
                pair_trace_of_square(nn.len(), |i, out| {
                    out.extend(
                        nn[i]
                            .iter()
                            .zip(&c)
                            .map(|(&(j, _), ck)| (j, ck / (2.0 * used))),
                    )
                })
            }
            DesignKind::Gsjs { a, .. } => {
                // Contrast t (sorted positions t−1, t, t+1) with coefficients (a, −1, 1 − a) and
                // weight 1/((a² + b² + 1)(n − 2)): A is a band of width 2 in sorted order.
                let n = self.n;
                if n < 3 {
                    return f64::NAN;
                }
                let (mut d, mut o1, mut o2) = (vec![0.0; n], vec![0.0; n], vec![0.0; n]);
                for t in 1..n - 1 {
                    let a = a[t - 1];
                    let b = 1.0 - a;
                    let w = 1.0 / ((a * a + b * b + 1.0) * (n - 2) as f64);
                    d[t - 1] += w * a * a;
                    d[t] += w;
                    d[t + 1] += w * b * b;
                    o1[t - 1] -= w * a;
                    o1[t] -= w * b;
                    o2[t - 1] += w * a * b;
                }
                let sq = |v: &[f64]| v.iter().map(|x| x * x).sum::<f64>();
                sq(&d) + 2.0 * sq(&o1) + 2.0 * sq(&o2)
            }
            DesignKind::Plane { w, c } => plane_trace_of_square(w, c, self.n),
        }
    }

    /// The diagonal of the estimator's quadratic form `σ̂² = yᵀAy` over the rows (it sums to 1):
    /// with noise whose variance σ²_r varies from row to row, the noise's part of the estimate
    /// is `Σ_r A_rr σ²_r` in expectation, so these are the weights with which each row's noise
    /// variance enters it (rows a trimmed design left out count only as neighbours).
    pub fn noise_weights(&self) -> Vec<f64> {
        let mut d = vec![0.0; self.n];
        match &self.kind {
            DesignKind::Nn(nb) => {
                let w = 0.5 / self.n as f64;
                for (i, &j) in nb.iter().enumerate() {
                    d[i] += w;
                    d[j] += w;
                }
            }
            DesignKind::Gamma { nn, delta } => {
                let c = intercept_weights(delta);
                let used = query_rows_of(nn).max(1) as f64;
                for (i, list) in nn.iter().enumerate() {
                    for (&(j, _), ck) in list.iter().zip(&c) {
                        let w = ck / (2.0 * used);
                        d[i] += w;
                        d[j] += w;
                    }
                }
            }
            DesignKind::Gsjs { order, a } => {
                let n = self.n;
                if n >= 3 {
                    for t in 1..n - 1 {
                        let a = a[t - 1];
                        let b = 1.0 - a;
                        let w = 1.0 / ((a * a + b * b + 1.0) * (n - 2) as f64);
                        d[order[t - 1]] += w * a * a;
                        d[order[t]] += w;
                        d[order[t + 1]] += w * b * b;
                    }
                }
            }
            DesignKind::Plane { w, c } => {
                let used = query_rows_of(w).max(1) as f64;
                for (i, (list, ci)) in w.iter().zip(c).enumerate() {
                    if list.is_empty() {
                        continue;
                    }
                    let s = ci / used;
                    d[i] += s;
                    for &(j, a) in list {
                        d[j] += s * a * a;
                    }
                }
            }
        }
        d
    }

    /// The estimate alone (NaN when `y` has another length): the fast path of a bootstrap. The
    /// same value as [`Design::estimate`], bit for bit, without the standard error (whose
    /// dependency-graph sum cost several times the estimate itself).
    pub fn value(&self, y: ArrayView1<'_, f64>) -> f64 {
        if y.len() != self.n {
            return f64::NAN;
        }
        self.run(y, false).value
    }
}

/// `tr(A²)` of `A = Σ_i Σ_{(j, w) ∈ list(i)} w (e_i − e_j)(e_i − e_j)ᵀ` over `n` rows, where
/// `list(i, out)` appends row i's pairs (distinct rows other than i): `A_ii` sums the weights of
/// the pairs that touch i, and `A_ij = −(w_{i→j} + w_{j→i})` over the two directions a pair
/// may be listed in. O(Σ |list|²) time and two lists of scratch, nothing of size n × list.
fn pair_trace_of_square(n: usize, list: impl Fn(usize, &mut Vec<(usize, f64)>)) -> f64 {
    let mut diag = vec![0.0; n];
    let mut off = 0.0;
    let (mut l, mut other) = (Vec::new(), Vec::new());
    for i in 0..n {
        l.clear();
        list(i, &mut l);
        for &(j, w) in &l {
            diag[i] += w;
            diag[j] += w;
            other.clear();
            list(j, &mut other);
            let back = other.iter().find(|&&(k, _)| k == i).map(|&(_, v)| v);
            match back {
                // A mutual pair: counted once, from its lower row.
                Some(v) if i < j => off += 2.0 * (w + v) * (w + v),
                Some(_) => {}
                None => off += 2.0 * w * w,
            }
        }
    }
    diag.iter().map(|d| d * d).sum::<f64>() + off
}

/// Inputs standardized column by column (mean 0, sd 1; constant columns become 0).
pub fn standardize(x: ArrayView2<'_, f64>) -> ndarray::Array2<f64> {
    let mut z = x.to_owned();
    let n = x.nrows() as f64;
    for mut col in z.columns_mut() {
        let mean = col.sum() / n;
        let var = col.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n;
        let sd = var.sqrt();
        col.mapv_inplace(|v| if sd > 0.0 { (v - mean) / sd } else { 0.0 });
    }
    z
}

/// For each row, its `k` nearest other rows (squared Euclidean distance; ties to the lower
/// index), nearest first: `(index, squared distance)`. The search is the product's one exact
/// neighbour search ([`NeighbourIndex`], unstandardized: `z` is standardized already).
pub fn nearest(z: ArrayView2<'_, f64>, k: usize) -> Vec<Vec<(usize, f64)>> {
    let n = z.nrows();
    let k = k.min(n.saturating_sub(1));
    let index = NeighbourIndex::new(z, false);
    let mut scratch = Scratch::default();
    let mut buf = Vec::with_capacity(k);
    let mut row = Vec::with_capacity(z.ncols());
    (0..n)
        .map(|i| {
            row.clear();
            row.extend(z.row(i).iter().copied());
            index.nearest_excluding(&row, k, |j| j == i, &mut scratch, &mut buf);
            buf.iter()
                .map(|&j| (j, index.squared_distance(j, &row)))
                .collect()
        })
        .collect()
}

/// The mean of `t` and its standard error (sample variance, divisor n − 1, over n; NaN with
/// fewer than two terms).
pub(crate) fn mean_se(t: &[f64]) -> (f64, f64) {
    let n = t.len() as f64;
    let mean = t.iter().sum::<f64>() / n;
    if t.len() < 2 {
        return (mean, f64::NAN);
    }
    let var = t.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1.0);
    (mean, (var / n).sqrt())
}

/// Variance of the mean of `t` when term i and term j are dependent exactly when they share a
/// response (`uses(i)` lists the responses term i reads): with independent noise across rows,
/// `Var(mean t) = (1/m²) Σ_i Σ_{j ~ i} Cov(t_i, t_j)`, estimated by the plug-in
/// `(1/(m(m−1))) Σ_i Σ_{j ~ i} (t_i − t̄)(t_j − t̄)` — the dependency-graph form of the lag
/// window GSJS uses below — and never below the independent-terms value
/// `Σ (t_i − t̄)² / (m(m−1))`. Pairs that share a response (mutual neighbours, a common
/// neighbour) are positively correlated, which the independent-terms value ignores; that is why
/// the plain standard errors understated the spread (measured in `docs/twin-calibration.md`).
fn dependent_var_of_mean(t: &[f64], uses: &[Vec<usize>], responses: usize) -> f64 {
    let m = t.len();
    if m < 2 {
        return f64::NAN;
    }
    let mean = t.iter().sum::<f64>() / m as f64;
    let mut users: Vec<Vec<usize>> = vec![Vec::new(); responses];
    for (i, u) in uses.iter().enumerate() {
        for &r in u {
            users[r].push(i);
        }
    }
    let mut stamp = vec![usize::MAX; m];
    let (mut graph, mut diag) = (0.0, 0.0);
    for i in 0..m {
        let di = t[i] - mean;
        diag += di * di;
        for &r in &uses[i] {
            for &j in &users[r] {
                if stamp[j] != i {
                    stamp[j] = i;
                    graph += di * (t[j] - mean);
                }
            }
        }
    }
    graph.max(diag) / (m as f64 * (m as f64 - 1.0))
}

/// Nearest-neighbour difference estimator `σ̂² = (1/2n) Σ (y_i − y_{N(i)})²` on standardized
/// inputs (Devroye, Györfi, Lugosi, Walk 2018). Standard error: the terms `½(y_i − y_{N(i)})²`
/// of two rows that share a response (mutual neighbours, a common neighbour) are dependent, so
/// the variance of their mean sums the plug-in covariances over those pairs (see
/// `dependent_var_of_mean`).
pub fn nearest_neighbour(x: ArrayView2<'_, f64>, y: ArrayView1<'_, f64>) -> Option<NoiseEstimate> {
    estimate(Method::NearestNeighbour, x, y)
}

fn nn_estimate(nb: &[usize], y: ArrayView1<'_, f64>, with_se: bool) -> NoiseEstimate {
    let n = y.len();
    let t: Vec<f64> = (0..n)
        .map(|i| {
            let j = nb[i];
            0.5 * (y[i] - y[j]) * (y[i] - y[j])
        })
        .collect();
    let (value, _) = mean_se(&t);
    let stderr = if with_se {
        let uses: Vec<Vec<usize>> = (0..n).map(|i| vec![i, nb[i]]).collect();
        dependent_var_of_mean(&t, &uses, n).sqrt()
    } else {
        f64::NAN
    };
    NoiseEstimate {
        value,
        stderr,
        method: Method::NearestNeighbour,
    }
}

/// Number of neighbour orders in the Gamma test.
pub const GAMMA_K: usize = 10;

/// The Gamma test (Stefánsson, Končar, Jones 1997) on standardized inputs: least-squares line
/// through `(δ(k), γ(k))`, k = 1..min(10, n−1); the intercept estimates σ². The intercept is a
/// fixed linear combination `Σ_k c_k γ(k)` (weights from the δ(k) alone, summing to 1), so
/// `σ̂² = (1/n) Σ_i u_i` with `u_i = Σ_k c_k · ½(y_{N_k(i)} − y_i)²`; standard error: the
/// variance of that mean over rows, with the covariances of rows that share a response
/// (see `dependent_var_of_mean`), never below the Gaussian floor `√(2 tr A²) σ̂²`
/// ([`Design::trace_of_square`]; on small tables nearly every pair of rows shares a response and
/// the plug-in sum, centred on the estimate, loses most of the covariance). (The least-squares
/// standard error of the intercept treats the ten dependent points of the line as independent
/// and understated the spread.)
pub fn gamma_test(x: ArrayView2<'_, f64>, y: ArrayView1<'_, f64>) -> Option<NoiseEstimate> {
    estimate(Method::Gamma, x, y)
}

/// Query rows of a design with one neighbour list per row (Gamma, plane): every row, or those
/// a trimmed design kept (an empty list is a left-out row).
fn query_rows_of(nn: &[Vec<(usize, f64)>]) -> usize {
    nn.iter().filter(|l| !l.is_empty()).count()
}

/// The responses each kept query row's term reads (the row and its neighbours), for
/// `dependent_var_of_mean`.
fn uses_of(lists: &[Vec<(usize, f64)>]) -> Vec<Vec<usize>> {
    lists
        .iter()
        .enumerate()
        .filter(|(_, l)| !l.is_empty())
        .map(|(i, l)| {
            std::iter::once(i)
                .chain(l.iter().map(|&(j, _)| j))
                .collect()
        })
        .collect()
}

fn gamma_estimate(
    nn: &[Vec<(usize, f64)>],
    delta: &[f64],
    y: ArrayView1<'_, f64>,
    with_se: bool,
) -> NoiseEstimate {
    let n = y.len();
    let p = delta.len();
    let mut gamma = vec![0.0; p];
    for (i, list) in nn.iter().enumerate() {
        for (k, &(j, _)) in list.iter().enumerate() {
            gamma[k] += 0.5 * (y[j] - y[i]) * (y[j] - y[i]);
        }
    }
    let used = query_rows_of(nn).max(1);
    gamma.iter_mut().for_each(|g| *g /= used as f64);
    let a = line_intercept(delta, &gamma);
    if !with_se {
        return NoiseEstimate {
            value: a,
            stderr: f64::NAN,
            method: Method::Gamma,
        };
    }
    let c = intercept_weights(delta);
    let rows = || nn.iter().enumerate().filter(|(_, l)| !l.is_empty());
    let u: Vec<f64> = rows()
        .map(|(i, list)| {
            list.iter()
                .zip(&c)
                .map(|(&(j, _), ck)| ck * 0.5 * (y[j] - y[i]) * (y[j] - y[i]))
                .sum()
        })
        .collect();
    NoiseEstimate {
        value: a,
        stderr: dependent_var_of_mean(&u, &uses_of(nn), n).sqrt(),
        method: Method::Gamma,
    }
}

/// The weights `c_k` with `intercept = Σ_k c_k g_k` for the least-squares line of `g` on `d`:
/// `c_k = 1/m − d̄ (d_k − d̄) / Σ (d − d̄)²`, or `1/m` when every `d` is equal.
fn intercept_weights(d: &[f64]) -> Vec<f64> {
    let m = d.len() as f64;
    let dm = d.iter().sum::<f64>() / m;
    let sdd: f64 = d.iter().map(|v| (v - dm) * (v - dm)).sum();
    if sdd <= 0.0 || !sdd.is_finite() {
        return vec![1.0 / m; d.len()];
    }
    d.iter().map(|v| 1.0 / m - dm * (v - dm) / sdd).collect()
}

/// Ordinary least-squares intercept of `g` on `d`. When every `d` is equal (all neighbours at
/// the same distance) the intercept is the mean of `g`.
fn line_intercept(d: &[f64], g: &[f64]) -> f64 {
    let m = d.len() as f64;
    let dm = d.iter().sum::<f64>() / m;
    let gm = g.iter().sum::<f64>() / m;
    let sdd: f64 = d.iter().map(|v| (v - dm) * (v - dm)).sum();
    if sdd <= 0.0 || !sdd.is_finite() {
        return gm;
    }
    let sdg: f64 = d.iter().zip(g).map(|(a, b)| (a - dm) * (b - gm)).sum();
    let slope = sdg / sdd;
    gm - slope * dm
}

/// Neighbours per parameter of the plane estimator: the plane through a row's neighbours has
/// p + 1 parameters (an intercept and one slope per input) and is fitted to twice as many rows.
/// Fewer make the pseudo-residual's weights larger (more spread); more reach farther, where f
/// curves (more bias). Two is a rule of thumb set on the invented processes of
/// `docs/twin-calibration.md` §2.11 (no source).
pub const PLANE_NEIGHBOURS_PER_PARAMETER: usize = 2;

/// Widest table (in inputs) the plane estimator runs on: each row solves a p × p system over
/// 2(p + 1) neighbours, O(p³) per row, and past a few dozen inputs the nearest rows of a table
/// are no longer near (a limit of the product, no source). [`Design::new`] returns `None` beyond.
pub const PLANE_MAX_INPUTS: usize = 30;

/// The weights `w_j` over row i's neighbours `l` (inputs `z`) such that `Σ_j w_j y_j` is the
/// value at `z_i` of the least-squares plane through the neighbours' `(z_j, y_j)`. With the
/// neighbours' inputs centred, `u_j = z_j − z_i − ū`, the plane's value at z_i is
/// `ȳ − ūᵀb` with `b = (UᵀU + λI)⁻¹ Uᵀy`, so `w = 1/m − U (UᵀU + λI)⁻¹ ū`. The weights sum to 1
/// whatever λ (a constant f leaves no residual). An input on which every neighbour has the same
/// value (copies of one row, an indicator that only the row itself has) says nothing about the
/// plane's slope along it: its column of U is set to exactly 0 and left out of ū, since the
/// rounding left by centring would otherwise be read as a direction and make the weights huge.
/// λ is 0 unless UᵀU is singular to working precision (neighbours on a line), and then the
/// smallest multiple of `10⁻¹² tr(UᵀU)` (times ten each try) that makes it positive definite,
/// so the plane is still defined and the estimator exact for the directions the neighbours
/// span. Finally the weights are shifted equally so that they sum to 1 in floating point too,
/// and when they are not finite or their squares sum past 10¹² the neighbours' plain mean is
/// used instead (a plane so ill-determined reads nothing useful).
fn plane_weights(z: ArrayView2<'_, f64>, i: usize, l: &[(usize, f64)]) -> Vec<(usize, f64)> {
    let m = l.len();
    let p = z.ncols();
    if m == 0 {
        return Vec::new();
    }
    let mf = m as f64;
    let mut ubar = vec![0.0; p];
    for &(j, _) in l {
        for (c, u) in ubar.iter_mut().enumerate() {
            *u += z[[j, c]] - z[[i, c]];
        }
    }
    ubar.iter_mut().for_each(|u| *u /= mf);
    // Inputs on which every neighbour agrees: no slope along them can be fitted.
    let shared: Vec<bool> = (0..p)
        .map(|c| l.iter().all(|&(j, _)| z[[j, c]] == z[[l[0].0, c]]))
        .collect();
    for (u, &sh) in ubar.iter_mut().zip(&shared) {
        if sh {
            *u = 0.0;
        }
    }
    let u: Vec<Vec<f64>> = l
        .iter()
        .map(|&(j, _)| {
            (0..p)
                .map(|c| {
                    if shared[c] {
                        0.0
                    } else {
                        z[[j, c]] - z[[i, c]] - ubar[c]
                    }
                })
                .collect()
        })
        .collect();
    let mut g = vec![0.0; p * p];
    for r in &u {
        for a in 0..p {
            for b in 0..p {
                g[a * p + b] += r[a] * r[b];
            }
        }
    }
    let trace: f64 = (0..p).map(|a| g[a * p + a]).sum();
    // v = (UᵀU + λI)⁻¹ ū by Cholesky, λ raised until it succeeds.
    let mut lambda = 0.0;
    let v = loop {
        if let Some(v) = ridge_solve(&g, lambda, &ubar, p) {
            break v;
        }
        lambda = if lambda == 0.0 {
            1e-12 * trace.max(f64::MIN_POSITIVE)
        } else {
            lambda * 10.0
        };
        if !lambda.is_finite() {
            break vec![0.0; p];
        }
    };
    let mut w: Vec<(usize, f64)> = l
        .iter()
        .zip(&u)
        .map(|(&(j, _), r)| {
            (
                j,
                1.0 / mf - r.iter().zip(&v).map(|(a, b)| a * b).sum::<f64>(),
            )
        })
        .collect();
    let shift = (1.0 - w.iter().map(|&(_, a)| a).sum::<f64>()) / mf;
    w.iter_mut().for_each(|(_, a)| *a += shift);
    let sq: f64 = w.iter().map(|&(_, a)| a * a).sum();
    if !(sq.is_finite() && sq <= PLANE_MAX_SQUARED_WEIGHTS) {
        w.iter_mut().for_each(|(_, a)| *a = 1.0 / mf);
    }
    w
}

/// Largest sum of squared weights a row's plane may have before [`plane_weights`] falls back to
/// the neighbours' plain mean (a pseudo-residual whose noise variance is 10¹² times σ² carries
/// no information, and its square would swamp the sum in rounding).
const PLANE_MAX_SQUARED_WEIGHTS: f64 = 1e12;

/// Solves `(G + λI) v = b` for a symmetric p × p `G` (row-major) by Cholesky
/// ([`solve_spd`]); `None` when `G + λI` is not positive definite to working precision (a
/// pivot at or below `10⁻¹⁰` of the largest diagonal entry) or the solution is not finite.
fn ridge_solve(g: &[f64], lambda: f64, b: &[f64], p: usize) -> Option<Vec<f64>> {
    if p == 0 {
        return Some(Vec::new());
    }
    let mut a: Vec<f64> = g.to_vec();
    for k in 0..p {
        a[k * p + k] += lambda;
    }
    let scale = (0..p).map(|k| a[k * p + k]).fold(0.0f64, f64::max);
    if !(scale > 0.0 && scale.is_finite()) {
        return None;
    }
    solve_spd(&a, b, p, 1e-10 * scale).filter(|v| v.iter().all(|x| x.is_finite()))
}

/// `σ̂² = (1/m) Σ_i c_i (y_i − Σ_j w_ij y_j)²` over the m query rows; standard error as the
/// other estimators' (terms that share a response are dependent).
fn plane_estimate(
    w: &[Vec<(usize, f64)>],
    c: &[f64],
    y: ArrayView1<'_, f64>,
    with_se: bool,
) -> NoiseEstimate {
    let rows = || {
        w.iter()
            .zip(c)
            .enumerate()
            .filter(|(_, (l, _))| !l.is_empty())
    };
    let term = |i: usize, l: &[(usize, f64)], ci: f64| {
        let fit: f64 = l.iter().map(|&(j, a)| a * y[j]).sum();
        ci * (y[i] - fit) * (y[i] - fit)
    };
    let used = query_rows_of(w).max(1) as f64;
    let value = rows().map(|(i, (l, &ci))| term(i, l, ci)).sum::<f64>() / used;
    if !with_se {
        return NoiseEstimate {
            value,
            stderr: f64::NAN,
            method: Method::Plane,
        };
    }
    let u: Vec<f64> = rows().map(|(i, (l, &ci))| term(i, l, ci)).collect();
    NoiseEstimate {
        value,
        stderr: dependent_var_of_mean(&u, &uses_of(w), y.len()).sqrt(),
        method: Method::Plane,
    }
}

/// `tr(A²)` of the plane estimator's `A = (1/m) Σ_i c_i b_i b_iᵀ` with `b_i = e_i − Σ_j w_ij e_j`:
/// `Σ_r ‖A_r‖²`, each row `A_r = (1/m) Σ_{i : r ∈ b_i} c_i b_i[r] b_i` summed from the contrasts
/// that touch r. The cost is `Σ_i |b_i|²`, linear in the rows whatever the inputs (summing over
/// pairs of contrasts that share a row was quadratic where thousands of rows share a few
/// distinct inputs).
fn plane_trace_of_square(w: &[Vec<(usize, f64)>], c: &[f64], n: usize) -> f64 {
    let contrast = |i: usize| std::iter::once((i, 1.0)).chain(w[i].iter().map(|&(j, a)| (j, -a)));
    // users[r]: (contrast i, b_i[r]) for every contrast that touches row r.
    let mut users: Vec<Vec<(usize, f64)>> = vec![Vec::new(); n];
    for (i, wi) in w.iter().enumerate() {
        if wi.is_empty() {
            continue;
        }
        for (r, v) in contrast(i) {
            users[r].push((i, v));
        }
    }
    let used = query_rows_of(w).max(1) as f64;
    let mut dense = vec![0.0; n];
    let mut touched: Vec<usize> = Vec::new();
    let mut total = 0.0;
    for user in &users {
        for &(i, vr) in user {
            let scale = c[i] * vr;
            for (q, v) in contrast(i) {
                if dense[q] == 0.0 {
                    touched.push(q);
                }
                dense[q] += scale * v;
            }
        }
        for &q in &touched {
            total += dense[q] * dense[q];
            dense[q] = 0.0;
        }
        touched.clear();
    }
    total / (used * used)
}

/// Local-linear pseudo-residual estimator on standardized inputs, any number of inputs (see the
/// module docs): with `w_ij` the weights that give the least-squares plane through row i's
/// [`PLANE_NEIGHBOURS_PER_PARAMETER`]·(p+1) nearest rows at `x_i` (`plane_weights`), the
/// pseudo-residual `y_i − Σ_j w_ij y_j` has no f part when f is linear and noise variance
/// `σ²(1 + Σ_j w_ij²)`, so `σ̂² = (1/n) Σ_i (y_i − Σ_j w_ij y_j)² / (1 + Σ_j w_ij²)` is exactly
/// unbiased for a linear f (GSJS is the one-input case with the line through the two rows on
/// either side of x_i; here the neighbours are the nearest rows, on whichever side). For curved f its bias is the estimator applied to f, of the order of f's
/// curvature times the squared neighbour distance (a difference of first order in the Gamma
/// test). Standard error as the other estimators'.
pub fn plane(x: ArrayView2<'_, f64>, y: ArrayView1<'_, f64>) -> Option<NoiseEstimate> {
    estimate(Method::Plane, x, y)
}

/// Gasser–Sroka–Jennen-Steinmetz estimator (1986) for one input. With the data sorted by x and
/// interior point i between i−1 and i+1: `a = (x_{i+1} − x_i)/(x_{i+1} − x_{i−1})`,
/// `b = 1 − a`, pseudo-residual `ε̃_i = a y_{i−1} + b y_{i+1} − y_i`, weight
/// `c_i² = 1/(a² + b² + 1)`, and `σ̂² = Σ c_i² ε̃_i² / (n − 2)`. Exactly unbiased when f is linear
/// (ε̃ then has no f part and E c²ε̃² = σ²). Where x_{i−1} = x_{i+1}, a = b = ½. Standard error:
/// the terms are 2-dependent (each uses three consecutive responses), so the variance of their
/// mean uses autocovariances up to lag 2.
pub fn gsjs(x: ArrayView1<'_, f64>, y: ArrayView1<'_, f64>) -> Option<NoiseEstimate> {
    if x.len() != y.len() {
        return None;
    }
    estimate(Method::Gsjs, x.insert_axis(ndarray::Axis(1)), y)
}

fn gsjs_estimate(
    order: &[usize],
    a: &[f64],
    y: ArrayView1<'_, f64>,
    with_se: bool,
) -> NoiseEstimate {
    let n = y.len();
    let ys: Vec<f64> = order.iter().map(|&i| y[i]).collect();
    let t: Vec<f64> = (1..n - 1)
        .map(|i| {
            let a = a[i - 1];
            let b = 1.0 - a;
            let e = a * ys[i - 1] + b * ys[i + 1] - ys[i];
            e * e / (a * a + b * b + 1.0)
        })
        .collect();
    let m = t.len() as f64;
    let mean = t.iter().sum::<f64>() / m;
    if !with_se {
        return NoiseEstimate {
            value: mean,
            stderr: f64::NAN,
            method: Method::Gsjs,
        };
    }
    let acov = |lag: usize| -> f64 {
        if lag >= t.len() {
            return 0.0;
        }
        t.iter()
            .zip(&t[lag..])
            .map(|(a, b)| (a - mean) * (b - mean))
            .sum::<f64>()
            / m
    };
    let var_mean = (acov(0) + 2.0 * acov(1) + 2.0 * acov(2)).max(acov(0)) / m;
    NoiseEstimate {
        value: mean,
        stderr: if t.len() >= 3 {
            var_mean.sqrt()
        } else {
            f64::NAN
        },
        method: Method::Gsjs,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array1, Array2};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, StandardNormal};

    #[test]
    fn noise_weights_are_the_quadratic_forms_diagonal() {
        // Each estimator is σ̂² = yᵀAy, so with y the unit vector of row r it returns A_rr
        // exactly: the weights must match the estimator run on those vectors (an identity of
        // quadratic forms), sum to 1 (a constant noise variance σ² gives E σ̂² = σ² for f = 0),
        // and a trimmed Gamma design must count a left-out row only as a neighbour.
        let n = 40;
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let x1 = Array2::from_shape_fn((n, 1), |_| rng.gen::<f64>());
        let x3 = Array2::from_shape_fn((n, 3), |_| rng.gen::<f64>());
        let f: Vec<f64> = x3
            .rows()
            .into_iter()
            .map(|r| 3.0 * r[0] * r[1] + r[2])
            .collect();
        let gamma = Design::new(Method::Gamma, x3.view()).unwrap();
        let trimmed = gamma.trimmed(&f, 0.2);
        assert!(trimmed.query_rows() < n);
        let plane = Design::new(Method::Plane, x3.view()).unwrap();
        let plane_trimmed = plane.trimmed(&f, 0.2);
        assert!(plane_trimmed.query_rows() < n);
        for d in [
            Design::new(Method::Gsjs, x1.view()).unwrap(),
            Design::new(Method::NearestNeighbour, x3.view()).unwrap(),
            gamma,
            trimmed,
            plane,
            plane_trimmed,
        ] {
            let w = d.noise_weights();
            assert!(
                (w.iter().sum::<f64>() - 1.0).abs() < 1e-12,
                "{:?}",
                d.method()
            );
            for (r, wr) in w.iter().enumerate() {
                let e = Array1::from_shape_fn(n, |i| f64::from(u8::from(i == r)));
                let v = d.value(e.view());
                assert!(
                    (v - wr).abs() < 1e-12,
                    "{:?} row {r}: {v} vs {wr}",
                    d.method()
                );
            }
        }
    }

    #[test]
    fn the_bootstrap_fast_path_gives_the_estimate_bit_for_bit() {
        // `value` skips the standard error; the value itself must not move.
        let n = 60;
        let x1 = Array2::from_shape_fn((n, 1), |(i, _)| ((i * 37) % n) as f64 / n as f64);
        let x2 = Array2::from_shape_fn((n, 2), |(i, j)| ((i * (7 + 4 * j)) % 23) as f64);
        let y = Array1::from_shape_fn(n, |i| ((i * 13) % 17) as f64 * 0.37 - (i as f64).sin());
        for (m, x) in [
            (Method::Gsjs, &x1),
            (Method::Gamma, &x2),
            (Method::NearestNeighbour, &x2),
            (Method::Plane, &x2),
        ] {
            let d = Design::new(m, x.view()).unwrap();
            let e = d.estimate(y.view()).unwrap();
            assert_eq!(
                d.value(y.view()).to_bits(),
                e.value.to_bits(),
                "{}",
                m.name()
            );
            assert!(e.stderr.is_finite(), "{}", m.name());
        }
        let d = Design::new(Method::Gamma, x2.view()).unwrap();
        assert!(d.value(y.slice(ndarray::s![..10])).is_nan());
    }

    #[test]
    fn nearest_equals_a_plain_all_pairs_search() {
        // The all-pairs search this function used to be, written out: every other row's squared
        // distance summed over the inputs, then (distance, index) order. Inputs on a coarse grid
        // (many ties, repeated rows) and continuous ones.
        let brute = |z: ArrayView2<'_, f64>, k: usize| -> Vec<Vec<(usize, f64)>> {
            let n = z.nrows();
            (0..n)
                .map(|i| {
                    let mut d: Vec<(f64, usize)> = (0..n)
                        .filter(|&j| j != i)
                        .map(|j| {
                            let s: f64 = z
                                .row(i)
                                .iter()
                                .zip(z.row(j).iter())
                                .map(|(a, b)| (a - b) * (a - b))
                                .sum();
                            (s, j)
                        })
                        .collect();
                    d.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
                    d.truncate(k);
                    d.into_iter().map(|(s, j)| (j, s)).collect()
                })
                .collect()
        };
        for (n, p, grid) in [
            (1, 2, 0.0),
            (2, 1, 0.0),
            (40, 1, 3.0),
            (200, 3, 4.0),
            (150, 2, 0.0),
        ] {
            let x = ndarray::Array2::from_shape_fn((n, p), |(i, c)| {
                let u = ((i * 37 + c * 11) % 97) as f64 / 97.0 + 0.003 * (i % 5) as f64;
                if grid > 0.0 {
                    (u * grid).floor()
                } else {
                    u
                }
            });
            let z = standardize(x.view());
            for k in [1, 3, 10, 500] {
                let got = nearest(z.view(), k);
                let want = brute(z.view(), k);
                assert_eq!(got.len(), want.len());
                for (g, w) in got.iter().zip(&want) {
                    assert_eq!(g.len(), w.len());
                    for (a, b) in g.iter().zip(w) {
                        assert_eq!(
                            (a.0, a.1.to_bits()),
                            (b.0, b.1.to_bits()),
                            "n {n} p {p} k {k}"
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn gsjs_is_zero_on_an_exact_line() {
        // Exact: pseudo-residuals of a linear f vanish (Gasser, Sroka, Jennen-Steinmetz 1986).
        let x = Array1::from(vec![0.3, 0.1, 0.9, 0.5, 0.55, 2.0]);
        let y = x.mapv(|v| 3.0 - 2.0 * v);
        let e = gsjs(x.view(), y.view()).unwrap();
        assert!(e.value.abs() < 1e-24, "{}", e.value);
    }

    #[test]
    fn nn_matches_hand_computation() {
        // Exact: x = 0, 1, 3 (standardizing keeps the order of distances); neighbours 0↔1, 1→0,
        // 2→1; σ̂² = ((1-4)² + (4-1)² + (4-9)²) / (2·3) = 43/6.
        let x = Array2::from_shape_vec((3, 1), vec![0.0, 1.0, 3.0]).unwrap();
        let y = Array1::from(vec![1.0, 4.0, 9.0]);
        let e = nearest_neighbour(x.view(), y.view()).unwrap();
        approx::assert_relative_eq!(e.value, 43.0 / 6.0, max_relative = 1e-14);
    }

    #[test]
    fn a_trimmed_gamma_design_is_a_quadratic_form_of_trace_one() {
        // E[est(ε)] = σ² tr A for noise ε of variance σ²; the estimator is unbiased on pure noise
        // only when tr A = 1, and tr A = Σ_i est(e_i) over the unit vectors (est(v) = vᵀAv).
        // Exact identity, checked for the full and the trimmed design.
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        let n = 60;
        let x = Array2::from_shape_fn((n, 2), |_| rng.gen::<f64>());
        let f: Vec<f64> = x
            .rows()
            .into_iter()
            .map(|r| if r[0] + r[1] > 1.0 { 2.0 } else { 0.0 })
            .collect();
        let full = Design::new(Method::Gamma, x.view()).unwrap();
        let cut = full.trimmed(&f, 0.2);
        assert_eq!((full.query_rows(), cut.query_rows()), (n, n - 12));
        for d in [&full, &cut] {
            let trace: f64 = (0..n)
                .map(|i| {
                    let mut e = Array1::zeros(n);
                    e[i] = 1.0;
                    d.value(e.view())
                })
                .sum();
            assert!((trace - 1.0).abs() < 1e-9, "tr A = {trace}");
        }
        // The step's share: the rows around it are where f changes most between neighbours.
        let fv = ArrayView1::from(&f);
        let (a, b) = (full.value(fv), cut.value(fv));
        assert!(
            a > 0.05 && b < 0.2 * a,
            "step share {a} untrimmed, {b} trimmed"
        );
        // Nothing to leave out: the design unchanged, bit for bit (a flat f changes nowhere).
        let y = Array1::from_shape_fn(n, |_| rng.gen::<f64>());
        let flat = vec![1.5; n];
        for same in [
            full.trimmed(&f, 0.0),
            full.trimmed(&f[1..], 0.2),
            full.trimmed(&f, 0.99),
            full.trimmed(&flat, 0.2),
        ] {
            assert_eq!(
                same.value(y.view()).to_bits(),
                full.value(y.view()).to_bits()
            );
            assert_eq!(same.query_rows(), n);
        }
    }

    #[test]
    fn trace_of_square_equals_the_dense_form_built_from_the_estimator() {
        // Exact: σ̂² = yᵀAy, so A_ii = est(e_i) and A_ij = (est(e_i + e_j) − A_ii − A_jj) / 2;
        // tr(A²) = Σ_ij A_ij². Checked for every estimator, the trimmed Gamma design, and tables
        // with mutual and one-way neighbours and tied inputs.
        let mut rng = ChaCha8Rng::seed_from_u64(12);
        let n = 23;
        let x2 =
            Array2::from_shape_fn((n, 2), |(i, _)| if i == 5 { 0.5 } else { rng.gen::<f64>() });
        let mut x1 = Array2::from_shape_fn((n, 1), |_| rng.gen::<f64>());
        x1[[3, 0]] = x1[[4, 0]];
        let f: Vec<f64> = (0..n).map(|i| (i % 5) as f64).collect();
        let gamma = Design::new(Method::Gamma, x2.view()).unwrap();
        let plane = Design::new(Method::Plane, x2.view()).unwrap();
        let designs = [
            Design::new(Method::NearestNeighbour, x2.view()).unwrap(),
            gamma.trimmed(&f, 0.2),
            gamma,
            Design::new(Method::Gsjs, x1.view()).unwrap(),
            plane.trimmed(&f, 0.2),
            plane,
        ];
        for d in &designs {
            let unit = |i: usize| {
                let mut e = Array1::zeros(n);
                e[i] = 1.0;
                e
            };
            let diag: Vec<f64> = (0..n).map(|i| d.value(unit(i).view())).collect();
            let mut dense = 0.0;
            for i in 0..n {
                for j in 0..n {
                    let a = if i == j {
                        diag[i]
                    } else {
                        (d.value((unit(i) + unit(j)).view()) - diag[i] - diag[j]) / 2.0
                    };
                    dense += a * a;
                }
            }
            let got = d.trace_of_square();
            assert!(
                (got - dense).abs() <= 1e-12 * dense,
                "{:?}: {got} against {dense}",
                d.method()
            );
        }
    }

    #[test]
    fn the_plane_reads_no_noise_in_an_exact_plane_and_none_is_lost_with_a_constant_input() {
        // Exact (the construction in `plane`): the least-squares plane through points of a plane
        // passes through every one of them, so each pseudo-residual of a linear truth is 0, in
        // 1, 2 and 3 inputs, with inputs on a coarse grid (tied distances) and with an input
        // that never changes (its column standardizes to 0 and the plane's Gram matrix is
        // singular: the ridge path). A constant truth gives 0 whatever λ.
        let mut rng = ChaCha8Rng::seed_from_u64(31);
        for p in 1..=3 {
            let n = 80;
            let x = Array2::from_shape_fn((n, p), |(_, j)| {
                if j == 1 {
                    (rng.gen_range(0..6) as f64) * 0.2
                } else {
                    rng.gen::<f64>()
                }
            });
            let f = Array1::from_shape_fn(n, |i| {
                2.0 - 3.0 * x[[i, 0]] + (1..p).map(|j| (j as f64 + 0.5) * x[[i, j]]).sum::<f64>()
            });
            let d = Design::new(Method::Plane, x.view()).unwrap();
            let scale = f.iter().map(|v| v * v).sum::<f64>() / n as f64;
            assert!(d.value(f.view()).abs() < 1e-12 * scale, "p = {p}");
            let mut xc = x.clone();
            xc.column_mut(0).fill(0.25);
            let dc = Design::new(Method::Plane, xc.view()).unwrap();
            let fc = Array1::from_shape_fn(n, |i| 1.5 + (1..p).map(|j| xc[[i, j]]).sum::<f64>());
            let v = dc.value(fc.view());
            assert!(v.is_finite() && v.abs() < 1e-10, "p = {p}: {v}");
            assert!(dc.value(Array1::from_elem(n, 7.0).view()).abs() < 1e-20);
        }
    }

    #[test]
    fn the_plane_cancels_a_large_constant_when_neighbours_share_an_input_the_row_lacks() {
        // Found by a second reading: when every neighbour of a row has the same value on an
        // input the row does not (an indicator only the row has; copies of one other point),
        // centring left rounding in that column, the ridge read it as a direction and the
        // weights stopped summing to 1, so a response level of 1000 leaked into σ̂² (a twin
        // wrote sd 49 for a true 0.1). Exact: the weights sum to 1, so a constant, however
        // large, gives 0; and a response linear in the other input too.
        let mut rng = ChaCha8Rng::seed_from_u64(17);
        // Whether the rounding appears depends on the indicator's standardized values, so on
        // the table's size: every size from 300 to 311 (the bug showed at 4 of these 12).
        for n in 300..312 {
            let x = Array2::from_shape_fn((n, 2), |(i, j)| {
                if j == 0 {
                    rng.gen::<f64>()
                } else {
                    f64::from(u8::from(i == 0))
                }
            });
            let d = Design::new(Method::Plane, x.view()).unwrap();
            let level = Array1::from_elem(n, 1000.0);
            let v = d.value(level.view());
            assert!(v.abs() < 1e-16, "n = {n}: {v}");
        }
        let n = 310;
        let x = Array2::from_shape_fn((n, 2), |(i, j)| {
            if j == 0 {
                rng.gen::<f64>()
            } else {
                f64::from(u8::from(i == 7))
            }
        });
        // Ten points written twelve times each, and forty single rows near them.
        let mut dup = Array2::zeros((160, 2));
        for r in 0..160 {
            let (a, b) = if r < 120 {
                ((r % 10) as f64 * 0.1, (r % 10) as f64 * 0.07)
            } else {
                let k = r % 10;
                (
                    k as f64 * 0.1 + 0.01 * rng.gen::<f64>(),
                    k as f64 * 0.07 + 0.01,
                )
            };
            dup[[r, 0]] = a;
            dup[[r, 1]] = b;
        }
        for x in [&x, &dup] {
            let d = Design::new(Method::Plane, x.view()).unwrap();
            let m = x.nrows();
            let level = Array1::from_elem(m, 1000.0);
            assert!(
                d.value(level.view()).abs() < 1e-16,
                "{}",
                d.value(level.view())
            );
            let line = Array1::from_shape_fn(m, |i| 1000.0 + 3.0 * x[[i, 0]]);
            let v = d.value(line.view());
            assert!(v.abs() < 1e-3 * 9.0 / m as f64, "{v}");
            let noisy = Array1::from_shape_fn(m, |i| {
                let z: f64 = StandardNormal.sample(&mut rng);
                line[i] + 0.01 * z
            });
            let v = d.value(noisy.view());
            assert!(v > 0.5e-4 && v < 2e-4, "σ̂² {v} against 1e-4");
        }
    }

    #[test]
    fn the_plane_is_unbiased_for_pure_noise_and_its_spread_is_the_gaussian_form() {
        // Monte Carlo against two exact facts about a quadratic form σ̂² = εᵀAε with tr A = 1
        // and Gaussian ε (a textbook identity, from memory): E σ̂² = σ², Var σ̂² = 2σ⁴ tr(A²).
        // 400 noise vectors on fixed inputs; tolerances 4 standard errors of the Monte Carlo
        // mean and of the sample variance (its SE for Gaussian-like draws, √(2/(R−1)) of it).
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let n = 150;
        let x = Array2::from_shape_fn((n, 3), |_| rng.gen::<f64>());
        let d = Design::new(Method::Plane, x.view()).unwrap();
        let sigma2: f64 = 2.0;
        let reps = 400;
        let draws: Vec<f64> = (0..reps)
            .map(|_| {
                let e = Array1::from_shape_fn(n, |_| {
                    let z: f64 = StandardNormal.sample(&mut rng);
                    z * sigma2.sqrt()
                });
                d.value(e.view())
            })
            .collect();
        let (mean, se) = mean_se(&draws);
        assert!((mean - sigma2).abs() < 4.0 * se, "{mean} ± {se}");
        let var = se * se * reps as f64;
        let exact = 2.0 * sigma2 * sigma2 * d.trace_of_square();
        let var_se = exact * (2.0 / (reps as f64 - 1.0)).sqrt();
        assert!((var - exact).abs() < 4.0 * var_se, "{var} against {exact}");
    }

    #[test]
    fn gamma_intercept_of_an_exact_line_is_recovered() {
        // Exact: OLS through points on a line returns the line's intercept.
        let d = [0.1, 0.2, 0.4, 0.8];
        let g: Vec<f64> = d.iter().map(|v| 2.5 + 3.0 * v).collect();
        let a = line_intercept(&d, &g);
        approx::assert_relative_eq!(a, 2.5, max_relative = 1e-12);
    }
}
