//! Whole-pipeline checks (scenario text → plan → runner → decomposition) against closed forms
//! that do not come from the project: ESL's fixed-design formulas for k-NN, least squares and
//! ridge, the exact moments of Friedman #1 under the sample-mean predictor, the unbiasedness of
//! the squared-bias estimator, the direct fresh-response cross-check, and the finite-sample
//! Wishart moments of least squares and minimum-norm least squares under a random Gaussian
//! design, on both sides of the interpolation threshold.
//!
//! Every Monte Carlo comparison uses a tolerance of 4 standard errors, taken from the run's own
//! delete-a-block jackknife standard errors or from the spread across seeds; none is widened by
//! hand. All scenarios are invented (sensor lines, cold stores, greenhouses) or published test
//! functions, kept small so that the whole file runs in seconds in release mode.

use std::path::Path;

use lossprism::decompose::squared::{self, point, SquaredSummary};
use lossprism::family::knn::neighbours;
use lossprism::runner::{run, Outcome};
use lossprism::scenario::{parse, Plan, PlanOptions};
use ndarray::{Array1, Array2};

/// Number of standard errors allowed in every Monte Carlo comparison.
const Z: f64 = 4.0;

/// Worker threads for the runs (results do not depend on it).
const THREADS: usize = 2;

/// Parses and plans inline scenario text, runs it, and returns both.
fn run_text(src: &str, opts: &PlanOptions) -> (Plan, Outcome) {
    let spec = parse(src, "inline.toml").expect("scenario parses");
    let plan = Plan::from_spec(&spec, src, "inline.toml", Path::new("."), opts).expect("plans");
    let outcome = run(&plan, THREADS).expect("runs");
    (plan, outcome)
}

/// The fixed design (training inputs and f there) of a fixed-design run.
fn fixed_design(out: &Outcome) -> (Array2<f64>, Array1<f64>) {
    let (x, f, _) = out.prepared.fixed.as_ref().expect("fixed design");
    (x.clone(), f.clone())
}

/// The squared-loss summary of a run (every scenario here is a regression).
fn sq(out: &Outcome) -> SquaredSummary {
    squared::view(out.summary()).expect("squared-loss summary")
}

/// Asserts `|estimate - exact| <= Z * se` with a readable message.
fn assert_within(what: &str, estimate: f64, exact: f64, se: f64) {
    assert!(
        se.is_finite() && se >= 0.0,
        "{what}: standard error {se} is not usable"
    );
    let dev = (estimate - exact).abs();
    // Shown with `--nocapture`: every comparison and its z-score.
    println!(
        "{what}: estimate {estimate:.6e}, exact {exact:.6e}, SE {se:.3e}, z = {:+.2}",
        (estimate - exact) / se
    );
    assert!(
        dev <= Z * se,
        "{what}: estimate {estimate:.6} vs exact {exact:.6}: |diff| = {dev:.3e} > {Z} SE = {:.3e} \
         ({:.2} SE)",
        Z * se,
        dev / se
    );
}

/// Solves `A X = B` (A `p × p`, B `p × q`, both row-major) by Gaussian elimination with partial
/// pivoting. Written here so the ridge check does not reuse the library's linear algebra.
fn solve(mut a: Vec<Vec<f64>>, mut b: Vec<Vec<f64>>) -> Vec<Vec<f64>> {
    let p = a.len();
    for col in 0..p {
        let piv = (col..p)
            .max_by(|&i, &j| a[i][col].abs().total_cmp(&a[j][col].abs()))
            .expect("non-empty");
        a.swap(col, piv);
        b.swap(col, piv);
        let d = a[col][col];
        assert!(d.abs() > 1e-300, "singular system");
        for row in col + 1..p {
            let factor = a[row][col] / d;
            if factor == 0.0 {
                continue;
            }
            let (top, bottom) = a.split_at_mut(row);
            for (v, &w) in bottom[0][col..].iter_mut().zip(&top[col][col..]) {
                *v -= factor * w;
            }
            let (top, bottom) = b.split_at_mut(row);
            for (v, &w) in bottom[0].iter_mut().zip(&top[col]) {
                *v -= factor * w;
            }
        }
    }
    let q = b[0].len();
    let mut x = vec![vec![0.0; q]; p];
    for row in (0..p).rev() {
        for k in 0..q {
            let mut s = b[row][k];
            for j in row + 1..p {
                s -= a[row][j] * x[j][k];
            }
            x[row][k] = s / a[row][row];
        }
    }
    x
}

/// Hat matrix `H = B (BᵀB)⁻¹ Bᵀ` of an `n × q` basis matrix (rows), via [`solve`].
fn hat_matrix(basis: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let n = basis.len();
    let q = basis[0].len();
    let btb: Vec<Vec<f64>> = (0..q)
        .map(|a| {
            (0..q)
                .map(|b| (0..n).map(|i| basis[i][a] * basis[i][b]).sum())
                .collect()
        })
        .collect();
    let bt: Vec<Vec<f64>> = (0..q)
        .map(|a| (0..n).map(|i| basis[i][a]).collect())
        .collect();
    let coef = solve(btb, bt); // (BᵀB)⁻¹ Bᵀ, q × n
    (0..n)
        .map(|i| {
            (0..n)
                .map(|j| (0..q).map(|a| basis[i][a] * coef[a][j]).sum())
                .collect()
        })
        .collect()
}

/// Checks a fixed-design k-NN run evaluated at the design against ESL eq. 7.10.
fn check_knn_fixed(label: &str, plan: &Plan, out: &Outcome, sigma: f64) {
    let (x, f) = fixed_design(out);
    let n = x.nrows();
    assert_eq!(
        out.prepared.eval_x, x,
        "eval = design evaluates at the design"
    );
    for (g, &kf) in plan.model().grid.iter().enumerate() {
        let k = kf as usize;
        // ESL eq. 7.10: at a fixed design the k-NN fit at x0 has variance σ²/k and bias
        // f(x0) - (1/k) Σ_{l ∈ N_k(x0)} f(x_l).
        let exact_var = sigma * sigma / k as f64;
        let exact_b2 = (0..n)
            .map(|i| {
                let nb = neighbours(x.view(), x.row(i), k);
                assert_eq!(nb.len(), k);
                let fbar = nb.iter().map(|&l| f[l]).sum::<f64>() / k as f64;
                (f[i] - fbar).powi(2)
            })
            .sum::<f64>()
            / n as f64;
        let t = &sq(out).terms[g];
        let se = &sq(out).stderr[g];
        assert_within(
            &format!("{label} k = {k} variance"),
            t.variance,
            exact_var,
            se.variance,
        );
        assert_within(
            &format!("{label} k = {k} bias_sq"),
            t.bias_sq,
            exact_b2,
            se.bias_sq,
        );
        assert!((t.noise - sigma * sigma).abs() < 1e-12);
    }
}

/// The scenario of tests 1a and 1c: k-NN on an evenly spaced one-input fixed design (an
/// invented sensor line), with `noise` as its `[data.noise]` body.
fn sensor_line(name: &str, seed: u64, noise: &str) -> String {
    format!(
        r#"
# Invented scenario: a sensor reads a smooth temperature bump at 120 fixed positions.
name = "{name}"
seed = {seed}
replicates = 320

[data]
source = "synthetic"
train_size = 120
design = "fixed"
eval = "design"

[[data.inputs]]
name = "position"
even = [0.0, 1.0]

[data.truth]
formula = "20 + 6*exp(-((position - 0.4)/0.12)^2) + 2*position"

[data.noise]
{noise}

[model]
family = "knn"
grid = [1, 2, 3, 5, 8, 13, 21, 34]
"#
    )
}

/// Test 1a: k-NN on an evenly spaced one-input fixed design (invented sensor line).
#[test]
fn knn_fixed_design_one_input_matches_esl_7_10() {
    let src = sensor_line("closed-form-knn-1d", 7, "sd = 0.8");
    let (plan, out) = run_text(&src, &PlanOptions::default());
    check_knn_fixed("1 input", &plan, &out, 0.8);
}

/// Test 1c: the same closed form with heavy-tailed noise (Student's t, 5 degrees of freedom,
/// scaled to sd 0.8; the sensor line with occasional large reading errors). ESL eq. 7.10 needs
/// only the noise's variance, so the exact terms are the Gaussian case's; the replicates'
/// spread, and so the standard errors, see the tails.
#[test]
fn knn_fixed_design_with_student_noise_matches_esl_7_10() {
    let src = sensor_line(
        "closed-form-knn-1d-student",
        17,
        "sd = 0.8\nshape = \"student\"\ndf = 5",
    );
    let (plan, out) = run_text(&src, &PlanOptions::default());
    check_knn_fixed("1 input, student noise", &plan, &out, 0.8);
}

/// Test 1b: k-NN on a two-input fixed design drawn once from uniforms (invented).
#[test]
fn knn_fixed_design_two_inputs_matches_esl_7_10() {
    let src = r#"
# Invented scenario: soil moisture on a field measured at 90 fixed probe sites.
name = "closed-form-knn-2d"
seed = 31
replicates = 320

[data]
source = "synthetic"
train_size = 90
design = "fixed"
eval = "design"

[[data.inputs]]
name = "a"
uniform = [0.0, 1.0]
[[data.inputs]]
name = "b"
uniform = [0.0, 2.0]

[data.truth]
formula = "3*sin(3*a) + b^2 - a*b"

[data.noise]
sd = 0.5

[model]
family = "knn"
grid = [1, 2, 4, 7, 12, 20]
"#;
    let (plan, out) = run_text(src, &PlanOptions::default());
    check_knn_fixed("2 inputs", &plan, &out, 0.5);
}

/// Checks a fixed-design least-squares scenario whose truth lies inside the model space
/// (ESL eq. 7.11–7.12): the in-sample average variance is σ² q / N with q the number of
/// coefficients, and the bias is exactly zero.
///
/// The variance is checked on one run (the file's seed) against its jackknife SE. The zero bias
/// is checked on the mean over `BIAS_SEEDS` independent runs, with the SE from the spread across
/// seeds: at zero bias the reported B̂² is a centred quadratic form in the mean noise
/// ((σ²/(N R))(χ²_q - q) in distribution), and the block jackknife, which linearises around
/// m - f ≈ 0, gives an SE proportional to |m - f| that collapses in the lower tail. Across 300
/// seeds of the two-input case below, B̂²/SE_jackknife reached -4.85 (seed 12, the file's seed)
/// although the mean predictions had exactly the χ²_q law (mean 9.83, var 21.2 for q = 10), so a
/// jackknife tolerance is not a valid 4-SE test there.
fn check_poly_fixed(label: &str, src: &str, sigma: f64, coefs: &dyn Fn(usize) -> usize) {
    const BIAS_SEEDS: u64 = 60;
    const BIAS_R: u64 = 64;
    let (plan, out) = run_text(src, &PlanOptions::default());
    let n = out.prepared.eval_x.nrows() as f64;
    for (g, &d) in plan.model().grid.iter().enumerate() {
        let q = coefs(d as usize) as f64;
        let t = &sq(&out).terms[g];
        let se = &sq(&out).stderr[g];
        // ESL eq. 7.12: (1/N) Σ_i Var f̂(x_i) = σ² p / N for a linear fit with p parameters.
        assert_within(
            &format!("{label} degree {d} variance"),
            t.variance,
            sigma * sigma * q / n,
            se.variance,
        );
    }
    let mut b2 = vec![Vec::new(); plan.model().grid.len()];
    for s in 0..BIAS_SEEDS {
        let opts = PlanOptions {
            seed: Some(plan.seed + 1 + s),
            replicates: Some(BIAS_R),
            eval_seed: None,
            memory_limit: None,
        };
        let (_, o) = run_text(src, &opts);
        for (g, v) in b2.iter_mut().enumerate() {
            v.push(sq(&o).terms[g].bias_sq);
        }
    }
    for (g, &d) in plan.model().grid.iter().enumerate() {
        let (mean, se) = mean_and_se(&b2[g]);
        // The truth lies in the column space: exact bias 0 (least squares reproduces f).
        assert_within(
            &format!("{label} degree {d} bias_sq (mean over seeds)"),
            mean,
            0.0,
            se,
        );
    }
}

/// Mean of independent values and its standard error `s / sqrt(k)`.
fn mean_and_se(v: &[f64]) -> (f64, f64) {
    let k = v.len() as f64;
    let m = v.iter().sum::<f64>() / k;
    let s2 = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (k - 1.0);
    (m, (s2 / k).sqrt())
}

/// Test 2a: polynomial least squares, one input, cubic truth, degrees 3..6 (q = d + 1).
#[test]
fn poly_fixed_design_one_input_matches_esl_7_12() {
    let src = r#"
# Invented scenario: a cold-store probe logs 40 evenly spaced readings along a shelf.
name = "closed-form-poly-1d"
seed = 11
replicates = 320

[data]
source = "synthetic"
train_size = 40
design = "fixed"
eval = "design"

[[data.inputs]]
name = "shelf"
even = [0.0, 3.0]

[data.truth]
formula = "2 - 1.5*shelf + 0.8*shelf^2 - 0.2*shelf^3"

[data.noise]
sd = 0.6

[model]
family = "poly"
grid = [3, 4, 5, 6]
"#;
    check_poly_fixed("1 input", src, 0.6, &|d| d + 1);
}

/// Test 2b: polynomial least squares, two inputs, total degree 2 truth, degrees 2 and 3
/// (q = C(d + 2, 2) monomials: 6 and 10).
#[test]
fn poly_fixed_design_two_inputs_matches_esl_7_12() {
    let src = r#"
# Invented scenario: a greenhouse bench with 60 fixed pots at random spots.
name = "closed-form-poly-2d"
seed = 12
replicates = 320

[data]
source = "synthetic"
train_size = 60
design = "fixed"
eval = "design"

[[data.inputs]]
name = "a"
uniform = [-1.0, 1.0]
[[data.inputs]]
name = "b"
uniform = [0.0, 2.0]

[data.truth]
formula = "1 + a - 2*b + 0.5*a*b + a^2 - 0.3*b^2"

[data.noise]
sd = 0.7

[model]
family = "poly"
grid = [2, 3]
"#;
    check_poly_fixed("2 inputs", src, 0.7, &|d| (d + 1) * (d + 2) / 2);
}

/// The ridge smoother matrix at a fixed design, computed independently of the library:
/// S = (1/n) 11ᵀ + Z (ZᵀZ + λI)⁻¹ Zᵀ (I - (1/n) 11ᵀ), Z standardized with the training mean and
/// the population sd (ESL eq. 3.41/3.47; linear smoother, ESL §7.6).
fn ridge_smoother(x: &Array2<f64>, lambda: f64) -> Vec<Vec<f64>> {
    let (n, p) = x.dim();
    let nf = n as f64;
    let mut z = vec![vec![0.0; p]; n];
    for j in 0..p {
        let mean = (0..n).map(|i| x[[i, j]]).sum::<f64>() / nf;
        let sd = ((0..n).map(|i| (x[[i, j]] - mean).powi(2)).sum::<f64>() / nf).sqrt();
        for i in 0..n {
            z[i][j] = (x[[i, j]] - mean) / sd;
        }
    }
    let a: Vec<Vec<f64>> = (0..p)
        .map(|r| {
            (0..p)
                .map(|c| {
                    (0..n).map(|i| z[i][r] * z[i][c]).sum::<f64>()
                        + if r == c { lambda } else { 0.0 }
                })
                .collect()
        })
        .collect();
    // Zᵀ (I - J/n): column i of Zᵀ minus the column mean of Zᵀ.
    let mut rhs: Vec<Vec<f64>> = (0..p).map(|r| (0..n).map(|i| z[i][r]).collect()).collect();
    for row in rhs.iter_mut() {
        let m = row.iter().sum::<f64>() / nf;
        row.iter_mut().for_each(|v| *v -= m);
    }
    let w = solve(a, rhs); // p × n
    (0..n)
        .map(|i| {
            (0..n)
                .map(|j| 1.0 / nf + (0..p).map(|r| z[i][r] * w[r][j]).sum::<f64>())
                .collect()
        })
        .collect()
}

/// Test 3: ridge at a fixed design against the exact linear-smoother variance σ² Σ_j S_ij² and
/// bias (S f - f)_i (ESL eq. 3.47 and §7.6), for p = 3, 4, 5 inputs and a log grid of penalties.
#[test]
fn ridge_fixed_design_matches_linear_smoother_closed_form() {
    for p in 3..=5usize {
        let names: Vec<String> = (1..=p).map(|j| format!("s{j}")).collect();
        let mut src = format!(
            r#"
# Invented scenario: greenhouse output from {p} sensor readings on 30 fixed days.
name = "closed-form-ridge-{p}"
seed = {seed}
replicates = 320

[data]
source = "synthetic"
train_size = 30
design = "fixed"
eval = "design"
"#,
            seed = 100 + p
        );
        for (j, nm) in names.iter().enumerate() {
            src.push_str(&format!(
                "[[data.inputs]]\nname = \"{nm}\"\nnormal = [{}, {}]\n",
                j as f64 * 0.5,
                1.0 + 0.5 * j as f64
            ));
        }
        // A linear part (shrinkage bias) plus a nonlinear part (approximation bias).
        let truth = format!("5 + 2*s1 - s2 + 0.5*s3 + 0.4*s1*s2 + 0.3*s{p}^2");
        src.push_str(&format!(
            r#"
[data.truth]
formula = "{truth}"

[data.noise]
sd = 1.5

[model]
family = "ridge"
grid = {{ log = [0.01, 100.0], count = 5 }}
"#
        ));
        let (plan, out) = run_text(&src, &PlanOptions::default());
        let (x, f) = fixed_design(&out);
        let n = x.nrows();
        let sigma2 = 1.5f64 * 1.5;
        for (g, &lambda) in plan.model().grid.iter().enumerate() {
            let s = ridge_smoother(&x, lambda);
            let exact_var = (0..n)
                .map(|i| sigma2 * s[i].iter().map(|v| v * v).sum::<f64>())
                .sum::<f64>()
                / n as f64;
            let exact_b2 = (0..n)
                .map(|i| {
                    let sf: f64 = (0..n).map(|j| s[i][j] * f[j]).sum();
                    (sf - f[i]).powi(2)
                })
                .sum::<f64>()
                / n as f64;
            let t = &sq(&out).terms[g];
            let se = &sq(&out).stderr[g];
            assert_within(
                &format!("ridge p = {p} λ = {lambda} variance"),
                t.variance,
                exact_var,
                se.variance,
            );
            assert_within(
                &format!("ridge p = {p} λ = {lambda} bias_sq"),
                t.bias_sq,
                exact_b2,
                se.bias_sq,
            );
        }
    }
}

/// Exact moments of Friedman #1 with x ~ U[0,1]^10 (Friedman 1991, Annals of Statistics
/// 19:1-67; values from the function's definition: E f = 10 Cin(π)/π + 20/12 + 5 + 2.5 and
/// Var f = Var(10 sin(π x1 x2)) + 400/180 + 100/12 + 25/12).
const FRIEDMAN1_MEAN: f64 = 14.41330;
/// See [`FRIEDMAN1_MEAN`].
const FRIEDMAN1_VAR: f64 = 23.82646;

/// Independent check of the two constants above by a 2-D composite Simpson rule for the only
/// non-elementary term, E and E² of 10 sin(π x1 x2) (exact identity up to quadrature error).
#[test]
fn friedman1_moments_match_quadrature() {
    let m = 400; // even number of intervals per axis
    let h = 1.0 / m as f64;
    let w = |i: usize| {
        if i == 0 || i == m {
            1.0
        } else if i % 2 == 1 {
            4.0
        } else {
            2.0
        }
    };
    let (mut s1, mut s2) = (0.0, 0.0);
    for i in 0..=m {
        for j in 0..=m {
            let v = 10.0 * (std::f64::consts::PI * i as f64 * h * j as f64 * h).sin();
            let wt = w(i) * w(j);
            s1 += wt * v;
            s2 += wt * v * v;
        }
    }
    let scale = h * h / 9.0;
    let (e1, e2) = (s1 * scale, s2 * scale);
    let mean = e1 + 20.0 / 12.0 + 5.0 + 2.5;
    let var = (e2 - e1 * e1) + 400.0 / 180.0 + 100.0 / 12.0 + 25.0 / 12.0;
    assert!((mean - FRIEDMAN1_MEAN).abs() < 1e-5, "mean {mean}");
    assert!((var - FRIEDMAN1_VAR).abs() < 1e-5, "var {var}");
}

/// Scenario text for the sample-mean predictor (polynomial degree 0) on Friedman #1.
fn friedman1_mean_scenario(n: usize, m: usize, seed: u64, replicates: u64) -> String {
    format!(
        r#"
# Published test function Friedman #1 (Friedman 1991), noise sd 1; degree-0 polynomial = the
# training mean.
name = "closed-form-friedman1-mean"
seed = {seed}
replicates = {replicates}

[data]
source = "synthetic"
train_size = {n}
eval_size = {m}
design = "random"

[data.truth]
builtin = "friedman1"

[model]
family = "poly"
grid = [0]
"#
    )
}

/// Test 4a: random design, sample-mean predictor, conditional on the drawn evaluation points:
/// variance = (Var f(X) + σ²)/n and bias²(x_e) = (f(x_e) - E f(X))² (exact, since the mean of
/// n iid responses has mean E f(X) and variance (Var f + σ²)/n).
#[test]
fn sample_mean_on_friedman1_conditional_terms() {
    let n = 25;
    let src = friedman1_mean_scenario(n, 200, 2024, 320);
    let (_, out) = run_text(&src, &PlanOptions::default());
    let t = &sq(&out).terms[0];
    let se = &sq(&out).stderr[0];
    let exact_var = (FRIEDMAN1_VAR + 1.0) / n as f64;
    let f = &out.prepared.eval_truth;
    let exact_b2 = f.iter().map(|v| (v - FRIEDMAN1_MEAN).powi(2)).sum::<f64>() / f.len() as f64;
    assert_within(
        "friedman1 mean variance",
        t.variance,
        exact_var,
        se.variance,
    );
    assert_within("friedman1 mean bias_sq", t.bias_sq, exact_b2, se.bias_sq);
    assert!((t.noise - 1.0).abs() < 1e-12);
}

/// Test 4b: the expected loss averaged over the input distribution, E Err =
/// (Var f(X) + σ²)(1 + 1/n) (exact for the sample mean under random design). The run averages
/// over m evaluation points drawn once, so besides the Monte Carlo error (jackknife) the
/// tolerance includes the evaluation-point sampling error, estimated as the sample variance of
/// the per-point expected loss over the evaluation points divided by m.
#[test]
fn sample_mean_on_friedman1_expected_loss_over_inputs() {
    let n = 20;
    let m = 20_000;
    let src = friedman1_mean_scenario(n, m, 99, 240);
    let (_, out) = run_text(&src, &PlanOptions::default());
    let t = &sq(&out).terms[0];
    let se_mc = sq(&out).stderr[0].expected_loss;
    let per_point: Vec<f64> = (0..m)
        .map(|e| {
            let p = point(&sq(&out).total, 0, e, out.prepared.eval_truth[e]);
            out.prepared.eval_sd[e].powi(2) + p.bias_sq + p.variance
        })
        .collect();
    let mean_pp = per_point.iter().sum::<f64>() / m as f64;
    assert!((mean_pp - t.expected_loss).abs() < 1e-9 * t.expected_loss);
    let var_pp = per_point.iter().map(|v| (v - mean_pp).powi(2)).sum::<f64>() / (m as f64 - 1.0);
    let se_eval = (var_pp / m as f64).sqrt();
    let se = (se_mc * se_mc + se_eval * se_eval).sqrt();
    let exact = (FRIEDMAN1_VAR + 1.0) * (1.0 + 1.0 / n as f64);
    assert_within(
        "friedman1 mean E Err over inputs",
        t.expected_loss,
        exact,
        se,
    );
}

/// Exact average squared bias of a degree-1 least-squares fit to the quadratic truth
/// `f = 1 + x + 2 x²` at `n` evenly spaced points on [0, 1] (hat matrix of the noiseless fit).
fn linear_fit_bias_sq(n: usize) -> (f64, f64) {
    let xs: Vec<f64> = (0..n).map(|i| i as f64 / (n - 1) as f64).collect();
    let f: Vec<f64> = xs.iter().map(|x| 1.0 + x + 2.0 * x * x).collect();
    let basis: Vec<Vec<f64>> = xs.iter().map(|&x| vec![1.0, x]).collect();
    let h = hat_matrix(&basis);
    let b2 = (0..n)
        .map(|i| {
            let hf: f64 = (0..n).map(|j| h[i][j] * f[j]).sum();
            (hf - f[i]).powi(2)
        })
        .sum::<f64>()
        / n as f64;
    let trace: f64 = (0..n).map(|i| h[i][i]).sum();
    (b2, trace / n as f64)
}

/// Test 5: the reported squared bias is unbiased (design.md §1: B̂² = (m - f)² - V̂/R), while the
/// plain (m - f)² = B̂² + V̂/R is biased up by V/R. With R = 3 replicates per run, repeated over
/// 300 seeds; SE from the spread across seeds.
#[test]
fn bias_sq_estimator_is_unbiased_and_plain_is_not() {
    let n = 20;
    let sigma: f64 = 1.0;
    let r = 3u64;
    let seeds = 300u64;
    let src = format!(
        r#"
# Invented scenario: a straight line fitted to a curved calibration profile at {n} fixed points.
name = "closed-form-unbiased"
replicates = 3

[data]
source = "synthetic"
train_size = {n}
design = "fixed"
eval = "design"

[[data.inputs]]
name = "x"
even = [0.0, 1.0]

[data.truth]
formula = "1 + x + 2*x^2"

[data.noise]
sd = {sigma}

[model]
family = "poly"
grid = [1]
"#
    );
    let spec = parse(&src, "inline.toml").expect("parses");
    let (mut reported, mut plain) = (Vec::new(), Vec::new());
    for s in 0..seeds {
        let opts = PlanOptions {
            seed: Some(1000 + s),
            replicates: Some(r),
            eval_seed: None,
            memory_limit: None,
        };
        let plan =
            Plan::from_spec(&spec, &src, "inline.toml", Path::new("."), &opts).expect("plans");
        let out = run(&plan, 1).expect("runs");
        let t = &sq(&out).terms[0];
        reported.push(t.bias_sq);
        plain.push(t.bias_sq + t.variance / r as f64);
    }
    // Exact bias² from the hat matrix of the noiseless fit; exact average variance σ² tr(H)/N
    // (ESL eq. 7.12, here 2σ²/N).
    let (exact_b2, mean_leverage) = linear_fit_bias_sq(n);
    let v = sigma * sigma * mean_leverage;
    assert!((mean_leverage - 2.0 / n as f64).abs() < 1e-12);
    let (m_rep, se_rep) = mean_and_se(&reported);
    let (m_plain, se_plain) = mean_and_se(&plain);
    assert_within("mean over seeds of bias_sq", m_rep, exact_b2, se_rep);
    // The plain estimator is off by V/R: by clearly more than 4 SE from the exact bias², and
    // consistent with exact bias² + V/R.
    let off = (m_plain - exact_b2).abs();
    assert!(
        off > Z * se_plain,
        "plain (m-f)² mean {m_plain:.5} should be biased away from {exact_b2:.5} (SE {se_plain:.2e})"
    );
    assert_within(
        "mean over seeds of plain (m-f)²",
        m_plain,
        exact_b2 + v / r as f64,
        se_plain,
    );
}

/// The training mean on a random design (`poly` of degree 0; invented: a heat profile 3x² over
/// a unit bar): every replicate's prediction is one number, so the errors of the mean prediction
/// move together across the points. Its exact bias² at the run's evaluation points is
/// `mean_e (E ŷ − f(x_e))²` with `E ŷ = E f(X) = ∫₀¹ 3x² dx = 1`. Returns (bias², SE,
/// variance, exact bias²) for `seed`.
fn training_mean_run(seed: u64, replicates: u64) -> (f64, f64, f64, f64) {
    let src = r#"
name = "closed-form-training-mean"
replicates = 100

[data]
source = "synthetic"
train_size = 20
eval_size = 200

[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]

[data.truth]
formula = "3*x^2"

[data.noise]
sd = 0.5

[model]
family = "poly"
grid = [0]
"#;
    let opts = PlanOptions {
        seed: Some(seed),
        replicates: Some(replicates),
        eval_seed: None,
        memory_limit: None,
    };
    let (_, out) = run_text(src, &opts);
    let t = &sq(&out).terms[0];
    let se = out.summary().stderr[0][out
        .summary()
        .terms
        .iter()
        .position(|t| t.key == "bias_sq")
        .unwrap()];
    let x = &out.prepared.eval_x;
    let exact = x
        .column(0)
        .iter()
        .map(|&v| (1.0 - 3.0 * v * v).powi(2))
        .sum::<f64>()
        / x.nrows() as f64;
    (t.bias_sq, se, t.variance, exact)
}

/// The standard error of bias² keeps its second-order part (`docs/bias-se-second-order.md`):
/// for a prediction that is one number, `tr(C²)/E² = V²`, so it is at least about `√2 V/R`
/// whatever the jackknife says. Before, the jackknife alone fell to a few percent of that on
/// seeds whose mean prediction landed near the evaluation points' mean of f (0.8002 ± 0.0003
/// against an exact 0.806 at R = 100). The estimator is unbiased over seeds (its mean within 4 SE
/// of the exact mean).
#[test]
fn bias_sq_standard_error_keeps_its_second_order_part_for_a_constant_fit() {
    let r = 100u64;
    let (mut errors, mut ratios) = (Vec::new(), Vec::new());
    for seed in 1..=100 {
        let (b2, se, v, exact) = training_mean_run(seed, r);
        let floor = 2f64.sqrt() * v / r as f64;
        ratios.push(se / floor);
        errors.push(b2 - exact);
    }
    let lowest = ratios.iter().copied().fold(f64::INFINITY, f64::min);
    // The blocks' estimate of tr C² has 31 degrees of freedom: 0.5 of the floor is far below
    // its sampling spread (the squared ratio, about a chi-square with 31 df over 31, falls below
    // 0.25 with probability under 1e-6). Without the second-order part seed 83 gives 0.40.
    assert!(
        lowest > 0.5,
        "the bias² SE fell to {lowest:.3} of its second-order floor √2·V/R"
    );
    let (m, se) = mean_and_se(&errors);
    assert_within("mean over seeds of bias_sq − exact", m, 0.0, se);
}

/// The Kohavi–Wolpert variance's standard error keeps its second-order part
/// (`docs/bias-se-second-order.md`, "Kohavi–Wolpert variance"): with k = n and labels that are
/// a fair coin everywhere (invented: a hatchery's sex ratio), every point's vote is the majority
/// of n = 41 labels, one Bernoulli(½) for all points, so the exact variance `½ (1 − Σ_c p_c²)` is
/// ¼ (Kohavi and Wolpert 1996's definition). Its slope in the vote share is 0 there, so the
/// jackknife's first-order error collapses near p̂ = ½ (an independent check found ±2 SE
/// covering in 83% of seeds on a 1-D k-NN), while the estimate moves by `(p̂ − ½)²`, whose
/// standard deviation is `√2 / (4R)` for a binomial share (its variance `2 (1/(4R))²`, the
/// chi-square with one degree of freedom). The standard error stays above half of that on
/// every seed, and the estimate is unbiased over seeds.
#[test]
fn kohavi_wolpert_variance_standard_error_keeps_its_second_order_part_at_a_fair_coin() {
    let src = r#"
name = "closed-form-fair-coin"
replicates = 100
blocks = 20
[data]
source = "synthetic"
train_size = 41
design = "fixed"
eval = "design"
[[data.inputs]]
name = "age"
even = [0.0, 1.0]
[data.classes]
labels = ["hen", "cock"]
probability = "0.5"
[model]
family = "knn"
grid = [41]
[loss]
kind = "zero_one"
"#;
    let r = 100u64;
    let floor = 2f64.sqrt() / (4.0 * r as f64);
    let (mut errors, mut ratios) = (Vec::new(), Vec::new());
    for seed in 1..=100 {
        let opts = PlanOptions {
            seed: Some(seed),
            replicates: Some(r),
            eval_seed: None,
            memory_limit: None,
        };
        let (_, out) = run_text(src, &opts);
        let s = out.summary();
        let t = s
            .terms
            .iter()
            .position(|t| t.key == "kohavi_wolpert.variance")
            .expect("the Kohavi–Wolpert variance");
        ratios.push(s.stderr[0][t] / floor);
        errors.push(s.values[0][t] - 0.25);
    }
    let lowest = ratios.iter().copied().fold(f64::INFINITY, f64::min);
    // The blocks' estimate of tr C² has 19 degrees of freedom: its squared ratio falls below
    // 0.25 with probability about 1e-4 per seed. Without the second-order part the standard
    // error is the jackknife's, a few percent of the floor on seeds with p̂ near ½.
    assert!(
        lowest > 0.5,
        "the Kohavi–Wolpert variance's SE fell to {lowest:.3} of its second-order floor √2/(4R)"
    );
    let (m, se) = mean_and_se(&errors);
    assert_within("mean over seeds of kw variance − ¼", m, 0.0, se);
}

/// The coverage of the bias² standard error for the training mean over 200 seeds (a calibration
/// study; results in `docs/bias-se-second-order.md`).
#[test]
#[ignore]
fn bias_sq_standard_error_coverage_for_a_constant_fit() {
    let seeds = std::env::var("LOSSPRISM_BIAS_SEEDS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(200u64);
    let (mut covered, mut worst) = (0, 0.0f64);
    for seed in 1..=seeds {
        let (b2, se, _, exact) = training_mean_run(seed, 100);
        let z = (b2 - exact) / se;
        covered += usize::from(z.abs() <= 2.0);
        if z.abs() > worst.abs() {
            worst = z;
        }
    }
    println!(
        "training mean, R = 100: ±2 SE covered the exact bias² in {covered} of {seeds} seeds \
         ({:.1}%); worst z {worst:+.2}",
        100.0 * covered as f64 / seeds as f64
    );
}

/// Test 6: the direct fresh-response loss agrees with noise + bias² + variance (both estimate the
/// same expected loss at the evaluation points; ESL eq. 7.9) within 4 combined SE.
#[test]
fn direct_cross_check_agrees_with_decomposition() {
    let src = r#"
# Published test function Friedman #1 (Friedman 1991), k-NN on 100 random training points.
name = "closed-form-direct"
seed = 3
replicates = 320

[data]
source = "synthetic"
train_size = 100
eval_size = 200
design = "random"

[data.truth]
builtin = "friedman1"

[model]
family = "knn"
grid = [1, 5, 20]
"#;
    let (plan, out) = run_text(src, &PlanOptions::default());
    for (g, &k) in plan.model().grid.iter().enumerate() {
        let t = &sq(&out).terms[g];
        let se = &sq(&out).stderr[g];
        let combined = (se.expected_loss.powi(2) + se.expected_loss_direct.powi(2)).sqrt();
        assert_within(
            &format!("k = {k} direct vs decomposed"),
            t.expected_loss_direct,
            t.expected_loss,
            combined,
        );
    }
}

/// Exact finite-sample terms of least squares (p < n − 1) and minimum-norm least squares
/// (p > n + 1) on the first p of `beta.len()` independent N(0, 1) inputs, linear truth, at the
/// evaluation point `x0`: `(bias², variance)`. Least squares: `Cov b = σ_e² I/(n − p − 1)`, the
/// inverse-Wishart mean (Anderson, *An Introduction to Multivariate Statistical Analysis*;
/// Breiman and Freedman 1983, *JASA* 78:131–136; from memory), with `σ_e² = σ² + |β_omitted|²`.
/// Minimum norm: `b = P β_p + X⁺ e`, P the projection on the row space of X (uniformly random of
/// rank n): `E b = (n/p) β_p` and `Cov b = (a − n²/p²) β_p β_pᵀ + (g |β_p|² + σ_e² n/(p(p − n −
/// 1))) I`, with `g = n(p − n)/(p(p + 2)(p − 1))` and `a = n(n + 2)/(p(p + 2)) − g` from
/// `P₁₁ ~ Beta(n/2, (p − n)/2)`; derived for `scripts/exact-checks/case6_minnorm.py`.
fn minnorm_exact(x0: &[f64], beta: &[f64], p: usize, n: usize, sigma: f64) -> (f64, f64) {
    let (bp, bo) = beta.split_at(p);
    let s2e = sigma * sigma + bo.iter().map(|b| b * b).sum::<f64>();
    let lin: f64 = bp.iter().zip(x0).map(|(b, x)| b * x).sum();
    let omit: f64 = bo.iter().zip(&x0[p..]).map(|(b, x)| b * x).sum();
    let nx2: f64 = x0[..p].iter().map(|x| x * x).sum();
    let nb2: f64 = bp.iter().map(|b| b * b).sum();
    let (pf, nf) = (p as f64, n as f64);
    let (mean, var) = if p + 1 < n {
        (lin, s2e * nx2 / (nf - pf - 1.0))
    } else {
        assert!(p > n + 1, "p too close to n");
        let g = nf * (pf - nf) / (pf * (pf + 2.0) * (pf - 1.0));
        let a = nf * (nf + 2.0) / (pf * (pf + 2.0)) - g;
        let r = nf / pf;
        (
            r * lin,
            (a - r * r) * lin * lin + g * nb2 * nx2 + s2e * nf / (pf * (pf - nf - 1.0)) * nx2,
        )
    };
    let f = lin + omit;
    ((mean - f) * (mean - f), var)
}

#[test]
fn minnorm_random_gaussian_design_matches_the_wishart_moments() {
    // Invented: 30 independent standard normal inputs, coefficients 1/j, noise sd 0.5, n = 20;
    // p on both sides of the interpolation threshold (not within 1 of n, where the moments are
    // infinite, nor next to it, where the variance's standard error runs short:
    // docs/exact-checks.md, case 6).
    let (inputs, n, sigma) = (30usize, 20usize, 0.5);
    let beta: Vec<f64> = (1..=inputs).map(|j| 1.0 / j as f64).collect();
    let mut src = format!(
        "name = \"minnorm-exact\"\nseed = 5\neval_seed = 9\nreplicates = 2000\n[data]\nsource = \
         \"synthetic\"\ntrain_size = {n}\neval_size = 150\ndesign = \"random\"\n"
    );
    for j in 1..=inputs {
        src.push_str(&format!(
            "[[data.inputs]]\nname = \"x{j}\"\nnormal = [0.0, 1.0]\n"
        ));
    }
    let formula: Vec<String> = (1..=inputs).map(|j| format!("x{j}/{j}")).collect();
    src.push_str(&format!(
        "[data.truth]\nformula = \"{}\"\n[data.noise]\nsd = {sigma}\n[model]\nfamily = \
         \"minnorm\"\ngrid = [3, 10, 26, 30]\n",
        formula.join(" + ")
    ));
    let (plan, out) = run_text(&src, &PlanOptions::default());
    let s = sq(&out);
    let x = &out.prepared.eval_x;
    for (g, &p) in plan.model().grid.iter().enumerate() {
        let p = p as usize;
        let (mut b2, mut var) = (0.0, 0.0);
        for row in x.rows() {
            let (b, v) = minnorm_exact(&row.to_vec(), &beta, p, n, sigma);
            b2 += b;
            var += v;
        }
        let m = x.nrows() as f64;
        let (b2, var) = (b2 / m, var / m);
        let (t, e) = (&s.terms[g], &s.stderr[g]);
        assert_within(&format!("p = {p}: bias²"), t.bias_sq, b2, e.bias_sq);
        assert_within(&format!("p = {p}: variance"), t.variance, var, e.variance);
        assert_within(
            &format!("p = {p}: expected loss"),
            t.expected_loss,
            sigma * sigma + b2 + var,
            e.expected_loss,
        );
    }
}
