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

use ndarray::{ArrayView1, ArrayView2};

/// Which estimator.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Method {
    /// Nearest-neighbour difference estimator (`nn`).
    NearestNeighbour,
    /// Gamma test (`gamma`).
    Gamma,
    /// Gasser–Sroka–Jennen-Steinmetz (`gsjs`), one input only.
    Gsjs,
}

impl Method {
    /// Name as written in scenario files (`noise_estimator`).
    pub fn name(self) -> &'static str {
        match self {
            Method::NearestNeighbour => "nn",
            Method::Gamma => "gamma",
            Method::Gsjs => "gsjs",
        }
    }

    /// Parses a scenario-file name.
    pub fn from_name(s: &str) -> Option<Method> {
        match s {
            "nn" => Some(Method::NearestNeighbour),
            "gamma" => Some(Method::Gamma),
            "gsjs" => Some(Method::Gsjs),
            _ => None,
        }
    }

    /// Full name with its source, for outputs.
    pub fn describe(self) -> &'static str {
        match self {
            Method::NearestNeighbour => {
                "nearest-neighbour difference estimator on standardized inputs (Devroye, Györfi, Lugosi, Walk 2018)"
            }
            Method::Gamma => "Gamma test, k = 1..10 (Stefánsson, Končar, Jones 1997)",
            Method::Gsjs => "Gasser-Sroka-Jennen-Steinmetz pseudo-residuals (1986)",
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

/// Runs the chosen estimator. Returns `None` when the data cannot support it (fewer than 3
/// rows; GSJS with more than one input; Gamma with fewer than 4 rows).
pub fn estimate(
    method: Method,
    x: ArrayView2<'_, f64>,
    y: ArrayView1<'_, f64>,
) -> Option<NoiseEstimate> {
    match method {
        Method::NearestNeighbour => nearest_neighbour(x, y),
        Method::Gamma => gamma_test(x, y),
        Method::Gsjs => {
            if x.ncols() != 1 {
                return None;
            }
            gsjs(x.column(0), y)
        }
    }
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
/// index), nearest first: `(index, squared distance)`. O(n² p).
pub fn nearest(z: ArrayView2<'_, f64>, k: usize) -> Vec<Vec<(usize, f64)>> {
    let n = z.nrows();
    let k = k.min(n.saturating_sub(1));
    let mut out = Vec::with_capacity(n);
    let mut d: Vec<(f64, usize)> = Vec::with_capacity(n);
    for i in 0..n {
        d.clear();
        let zi = z.row(i);
        for j in 0..n {
            if j == i {
                continue;
            }
            let dist: f64 = zi
                .iter()
                .zip(z.row(j).iter())
                .map(|(a, b)| (a - b) * (a - b))
                .sum();
            d.push((dist, j));
        }
        let cmp = |a: &(f64, usize), b: &(f64, usize)| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1));
        if k < d.len() {
            d.select_nth_unstable_by(k, cmp);
            d.truncate(k);
        }
        d.sort_by(cmp);
        out.push(d.iter().map(|&(dist, j)| (j, dist)).collect());
    }
    out
}

fn mean_se(t: &[f64]) -> (f64, f64) {
    let n = t.len() as f64;
    let mean = t.iter().sum::<f64>() / n;
    if t.len() < 2 {
        return (mean, f64::NAN);
    }
    let var = t.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1.0);
    (mean, (var / n).sqrt())
}

/// Nearest-neighbour difference estimator `σ̂² = (1/2n) Σ (y_i − y_{N(i)})²` on standardized
/// inputs (Devroye, Györfi, Lugosi, Walk 2018). Standard error: the sample standard deviation of
/// the terms `½(y_i − y_{N(i)})²` over √n; it ignores that mutual neighbours repeat a term, so it
/// can understate the error by up to a factor √2.
pub fn nearest_neighbour(x: ArrayView2<'_, f64>, y: ArrayView1<'_, f64>) -> Option<NoiseEstimate> {
    let n = y.len();
    if n < 3 || x.nrows() != n {
        return None;
    }
    let z = standardize(x);
    let nn = nearest(z.view(), 1);
    let t: Vec<f64> = (0..n)
        .map(|i| {
            let j = nn[i][0].0;
            0.5 * (y[i] - y[j]) * (y[i] - y[j])
        })
        .collect();
    let (value, stderr) = mean_se(&t);
    Some(NoiseEstimate {
        value,
        stderr,
        method: Method::NearestNeighbour,
    })
}

/// Number of neighbour orders in the Gamma test.
pub const GAMMA_K: usize = 10;

/// The Gamma test (Stefánsson, Končar, Jones 1997) on standardized inputs: least-squares line
/// through `(δ(k), γ(k))`, k = 1..min(10, n−1); the intercept estimates σ². Standard error: the
/// formal least-squares standard error of the intercept from the line's residuals (the points
/// are dependent, so treat it as indicative; NaN with fewer than 3 orders).
pub fn gamma_test(x: ArrayView2<'_, f64>, y: ArrayView1<'_, f64>) -> Option<NoiseEstimate> {
    let n = y.len();
    if n < 4 || x.nrows() != n {
        return None;
    }
    let z = standardize(x);
    let p = GAMMA_K.min(n - 1);
    let nn = nearest(z.view(), p);
    let mut delta = vec![0.0; p];
    let mut gamma = vec![0.0; p];
    for (i, list) in nn.iter().enumerate() {
        for (k, &(j, d2)) in list.iter().enumerate() {
            delta[k] += d2;
            gamma[k] += 0.5 * (y[j] - y[i]) * (y[j] - y[i]);
        }
    }
    delta.iter_mut().for_each(|d| *d /= n as f64);
    gamma.iter_mut().for_each(|g| *g /= n as f64);
    let (a, se) = line_intercept(&delta, &gamma);
    Some(NoiseEstimate {
        value: a,
        stderr: se,
        method: Method::Gamma,
    })
}

/// Ordinary least-squares intercept of `g` on `d`, and its formal standard error. When every
/// `d` is equal (all neighbours at the same distance) the intercept is the mean of `g`.
fn line_intercept(d: &[f64], g: &[f64]) -> (f64, f64) {
    let m = d.len() as f64;
    let dm = d.iter().sum::<f64>() / m;
    let gm = g.iter().sum::<f64>() / m;
    let sdd: f64 = d.iter().map(|v| (v - dm) * (v - dm)).sum();
    if sdd <= 0.0 || !sdd.is_finite() {
        return (gm, f64::NAN);
    }
    let sdg: f64 = d.iter().zip(g).map(|(a, b)| (a - dm) * (b - gm)).sum();
    let slope = sdg / sdd;
    let a = gm - slope * dm;
    if d.len() < 3 {
        return (a, f64::NAN);
    }
    let rss: f64 = d
        .iter()
        .zip(g)
        .map(|(x, y)| (y - a - slope * x).powi(2))
        .sum();
    let s2 = rss / (m - 2.0);
    (a, (s2 * (1.0 / m + dm * dm / sdd)).sqrt())
}

/// Gasser–Sroka–Jennen-Steinmetz estimator (1986) for one input. With the data sorted by x and
/// interior point i between i−1 and i+1: `a = (x_{i+1} − x_i)/(x_{i+1} − x_{i−1})`,
/// `b = 1 − a`, pseudo-residual `ε̃_i = a y_{i−1} + b y_{i+1} − y_i`, weight
/// `c_i² = 1/(a² + b² + 1)`, and `σ̂² = Σ c_i² ε̃_i² / (n − 2)`. Exactly unbiased when f is linear
/// (ε̃ then has no f part and E c²ε̃² = σ²). Where x_{i−1} = x_{i+1}, a = b = ½. Standard error:
/// the terms are 2-dependent (each uses three consecutive responses), so the variance of their
/// mean uses autocovariances up to lag 2.
pub fn gsjs(x: ArrayView1<'_, f64>, y: ArrayView1<'_, f64>) -> Option<NoiseEstimate> {
    let n = y.len();
    if n < 3 || x.len() != n {
        return None;
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| x[a].total_cmp(&x[b]).then(a.cmp(&b)));
    let xs: Vec<f64> = order.iter().map(|&i| x[i]).collect();
    let ys: Vec<f64> = order.iter().map(|&i| y[i]).collect();
    let t: Vec<f64> = (1..n - 1)
        .map(|i| {
            let span = xs[i + 1] - xs[i - 1];
            let a = if span > 0.0 {
                (xs[i + 1] - xs[i]) / span
            } else {
                0.5
            };
            let b = 1.0 - a;
            let e = a * ys[i - 1] + b * ys[i + 1] - ys[i];
            e * e / (a * a + b * b + 1.0)
        })
        .collect();
    let m = t.len() as f64;
    let mean = t.iter().sum::<f64>() / m;
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
    Some(NoiseEstimate {
        value: mean,
        stderr: if t.len() >= 3 {
            var_mean.sqrt()
        } else {
            f64::NAN
        },
        method: Method::Gsjs,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array1, Array2};

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
    fn gamma_intercept_of_an_exact_line_is_recovered() {
        // Exact: OLS through points on a line returns the line's intercept.
        let d = [0.1, 0.2, 0.4, 0.8];
        let g: Vec<f64> = d.iter().map(|v| 2.5 + 3.0 * v).collect();
        let (a, _) = line_intercept(&d, &g);
        approx::assert_relative_eq!(a, 2.5, max_relative = 1e-12);
    }
}
