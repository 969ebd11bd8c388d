//! Log-loss, Brier score and Poisson deviance through the whole pipeline (scenario text → plan →
//! runner → decomposition), checked against values that do not come from the project's
//! estimators:
//!
//! - exact closed forms for a k-NN family on a fixed design evaluated at the design points, where
//!   only the responses are redrawn: for two classes the count of class-1 labels among the k
//!   neighbours is Poisson-binomial (computed exactly by dynamic programming over the
//!   neighbours), for Poisson counts the sum of the k neighbours' counts is Poisson with the sum
//!   of their means (the sum of independent Poisson variables is Poisson);
//! - the exact decomposition identities on the run's own output;
//! - scikit-learn's `LogisticRegression` probabilities (committed fixture, made by
//!   `tests/fixtures/make_logistic_fixtures.py`);
//! - the refusals: zero probabilities under the log-loss, negative-capable families and
//!   non-count responses under the Poisson deviance.
//!
//! Every Monte Carlo comparison uses 4 standard errors from the run's own delete-a-block
//! jackknife; none is widened by hand. The scenarios are invented and small.
//!
//! # Finite-R offsets of the plug-in terms
//!
//! The expected losses (log, Brier, Poisson) and the Brier bias² and variance are unbiased at any
//! R, and are compared with their exact values directly. The log-loss and Poisson bias and
//! variance go through a nonlinear function of replicate means (the normalized geometric mean,
//! the geometric mean), so their expectation at R replicates differs from the exact value by a
//! term of order 1/R (module docs of `decompose::log_loss` and `decompose::poisson`). The test
//! adds that leading term, computed exactly from the enumerated distribution, to the exact value
//! (second-order expansion, remainder of order 1/R²):
//!
//! - log-loss: `E[V̂] − V ≈ −(1/(2R)) [Σ_c q̄_c Var(log q_c) − Var(Σ_c q̄_c log q_c)]`, the bias
//!   moving by the opposite amount (their sum is unbiased);
//! - Poisson: `E[exp ℓ̂] ≈ μ̃ (1 + Var(log μ)/(2R))`, so the variance moves by `−μ̃ Var(log μ)/R`
//!   and the bias by `+μ̃ Var(log μ)/R`.
//!
//! Each offset is printed beside its standard error.

use std::path::Path;
use std::process::Command;

use lossprism::decompose::Summary;
use lossprism::family::knn::neighbours;
use lossprism::family::logistic::LogisticFamily;
use lossprism::family::{Family, FitInput, FitSeed, Out, Task};
use lossprism::runner::{run, Outcome};
use lossprism::scenario::{parse, Plan, PlanOptions};
use ndarray::{Array1, Array2, Array3};
use serde::Deserialize;

/// Number of standard errors allowed in every Monte Carlo comparison.
const Z: f64 = 4.0;

/// Worker threads for the runs (results do not depend on it).
const THREADS: usize = 2;

/// Parses and plans inline scenario text.
fn plan_text(src: &str) -> Result<Plan, String> {
    let spec = parse(src, "inline.toml").map_err(|e| e.to_string())?;
    Plan::from_spec(
        &spec,
        src,
        "inline.toml",
        Path::new("."),
        &PlanOptions::default(),
    )
    .map_err(|e| e.to_string())
}

/// Plans and runs inline scenario text.
fn run_text(src: &str) -> (Plan, Outcome) {
    let plan = plan_text(src).expect("plans");
    let outcome = run(&plan, THREADS).expect("runs");
    (plan, outcome)
}

/// Asserts `|estimate − exact| <= Z · se` with a readable message, printing the z-score.
fn assert_within(what: &str, estimate: f64, exact: f64, se: f64) {
    assert!(
        se.is_finite() && se > 0.0,
        "{what}: standard error {se} is not usable"
    );
    let dev = (estimate - exact).abs();
    println!(
        "{what}: estimate {estimate:.6e}, exact {exact:.6e}, SE {se:.3e}, z = {:+.2}",
        (estimate - exact) / se
    );
    assert!(
        dev <= Z * se,
        "{what}: estimate {estimate:.6} vs exact {exact:.6}: |diff| = {dev:.3e} > {Z} SE = {:.3e}",
        Z * se
    );
}

/// Mean and its standard error (sample sd / √n) of values over seeds.
fn mean_and_se(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let m = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0);
    (m, (var / n).sqrt())
}

/// Value and standard error of term `key` at grid index `g`.
fn term(s: &Summary, g: usize, key: &str) -> (f64, f64) {
    let i = s.index(key).unwrap_or_else(|| panic!("term {key}"));
    (s.values[g][i], s.stderr[g][i])
}

/// Exact identity on the run's own output: expected loss = noise + bias + variance at every
/// grid value, to rounding.
fn assert_identity(s: &Summary, bias_key: &str) -> f64 {
    let mut worst = 0.0f64;
    for g in 0..s.values.len() {
        let el = term(s, g, "expected_loss").0;
        let sum = term(s, g, "noise").0 + term(s, g, bias_key).0 + term(s, g, "variance").0;
        let r = (el - sum).abs();
        assert!(r <= 1e-12 * el.abs().max(1.0), "g={g}: {el} vs {sum}");
        worst = worst.max(r);
    }
    println!("identity residual (max over the grid): {worst:.1e}");
    worst
}

/// Poisson-binomial pmf of the number of successes among independent trials with success
/// probabilities `p` (dynamic programme over the trials).
fn poisson_binomial(p: &[f64]) -> Vec<f64> {
    let mut pmf = vec![1.0];
    for &pj in p {
        let mut next = vec![0.0; pmf.len() + 1];
        for (n, &w) in pmf.iter().enumerate() {
            next[n] += w * (1.0 - pj);
            next[n + 1] += w * pj;
        }
        pmf = next;
    }
    pmf
}

/// The neighbours (nearest first) of every design point among the design points, for `k`.
fn design_neighbours(x: &Array2<f64>, k: usize) -> Vec<Vec<usize>> {
    (0..x.nrows())
        .map(|e| neighbours(x.view(), x.row(e), k))
        .collect()
}

// ---------------------------------------------------------------------------------------------
// Two classes, k-NN with add-α shares on a fixed design: log-loss and Brier score
// ---------------------------------------------------------------------------------------------

/// Invented scenario: a seed-sorting belt labels kernels sound or split from one reading along
/// the belt; P(split | position) rises along it. Fixed design, evaluated at the design points.
fn sorter_scenario(loss: &str, alpha: f64) -> String {
    format!(
        r#"
name = "kernel-sorter-{loss}"
seed = 29
replicates = 4000
blocks = 40
[data]
source = "synthetic"
train_size = 50
design = "fixed"
eval = "design"
[[data.inputs]]
name = "position"
uniform = [0.0, 1.0]
[data.classes]
labels = ["sound", "split"]
probability = "0.1 + 0.6*position + 0.25*(position > 0.6)"
[model]
family = "knn"
grid = [1, 3, 7, 15]
alpha = {alpha}
[loss]
kind = "{loss}"
"#
    )
}

/// Exact per-point quantities of the add-α k-NN class-1 share `q1(n) = (n + α)/(k + 2α)`.
struct ShareLaw {
    /// pmf of the class-1 count n among the k neighbours.
    pmf: Vec<f64>,
    k: usize,
    alpha: f64,
}

impl ShareLaw {
    fn q(&self, n: usize, c: usize) -> f64 {
        let k = self.k as f64;
        let n1 = n as f64;
        let count = if c == 1 { n1 } else { k - n1 };
        (count + self.alpha) / (k + 2.0 * self.alpha)
    }

    /// E f(n).
    fn mean(&self, f: impl Fn(usize) -> f64) -> f64 {
        self.pmf.iter().enumerate().map(|(n, w)| w * f(n)).sum()
    }
}

fn share_laws(out: &Outcome, k: usize, alpha: f64) -> Vec<ShareLaw> {
    let (x, _, _) = out.prepared.fixed.as_ref().expect("fixed design");
    let probs = out
        .prepared
        .fixed_probs
        .as_ref()
        .expect("design probabilities");
    design_neighbours(x, k)
        .into_iter()
        .map(|nb| ShareLaw {
            pmf: poisson_binomial(&nb.iter().map(|&j| probs[[j, 1]]).collect::<Vec<_>>()),
            k,
            alpha,
        })
        .collect()
}

#[test]
fn log_loss_of_knn_shares_matches_the_exact_poisson_binomial_decomposition() {
    // Source of the exact values: Heskes (1998) terms of the exact distribution of the add-α
    // class shares; the class-1 count among the k neighbours is Poisson-binomial over the
    // neighbours' P(split) (fixed design: only labels are redrawn).
    let alpha = 0.5;
    let (plan, out) = run_text(&sorter_scenario("log", alpha));
    let s = out.summary();
    let r = plan.replicates as f64;
    let p_eval = out.prepared.eval_probs.as_ref().expect("probabilities");
    assert_identity(s, "bias");
    for (g, &kv) in plan.model().grid.iter().enumerate() {
        let k = kv as usize;
        let laws = share_laws(&out, k, alpha);
        let m = laws.len() as f64;
        let (mut el, mut noise, mut bias, mut var, mut offset) = (0.0, 0.0, 0.0, 0.0, 0.0);
        for (e, law) in laws.iter().enumerate() {
            let p = [p_eval[[e, 0]], p_eval[[e, 1]]];
            let l: Vec<f64> = (0..2).map(|c| law.mean(|n| law.q(n, c).ln())).collect();
            let lz = (l[0].exp() + l[1].exp()).ln();
            let central = [(l[0] - lz).exp(), (l[1] - lz).exp()];
            el -= p[0] * l[0] + p[1] * l[1];
            noise -= p[0] * p[0].ln() + p[1] * p[1].ln();
            bias += (0..2).map(|c| p[c] * (p[c] / central[c]).ln()).sum::<f64>();
            var -= lz;
            // second-order finite-R offset of the plug-in variance (module docs)
            let cov = |a: usize, b: usize| {
                law.mean(|n| law.q(n, a).ln() * law.q(n, b).ln()) - l[a] * l[b]
            };
            let weighted = central[0] * cov(0, 0) + central[1] * cov(1, 1);
            let quad = (0..2)
                .flat_map(|a| (0..2).map(move |b| (a, b)))
                .map(|(a, b)| central[a] * central[b] * cov(a, b))
                .sum::<f64>();
            offset -= (weighted - quad) / (2.0 * r);
        }
        let (el, noise, bias, var, offset) = (el / m, noise / m, bias / m, var / m, offset / m);
        let (n_run, _) = term(s, g, "noise");
        assert!((n_run - noise).abs() < 1e-12, "noise {n_run} vs {noise}");
        let (v, v_se) = term(s, g, "variance");
        println!(
            "k = {k}: variance offset {offset:.2e} = {:.2} SE",
            offset / v_se
        );
        assert_within(
            &format!("log k={k} expected loss"),
            term(s, g, "expected_loss").0,
            el,
            term(s, g, "expected_loss").1,
        );
        assert_within(
            &format!("log k={k} bias"),
            term(s, g, "bias").0,
            bias - offset,
            term(s, g, "bias").1,
        );
        assert_within(&format!("log k={k} variance"), v, var + offset, v_se);
        let (d, d_se) = term(s, g, "expected_loss_direct");
        assert_within(&format!("log k={k} direct check"), d, el, d_se);
    }
}

#[test]
fn brier_score_of_knn_shares_matches_the_exact_poisson_binomial_decomposition() {
    // Source of the exact values: noise 1 − Σ p², bias² 2(E q1 − p1)², variance 2 Var(q1) of
    // the exact distribution of the add-α share (Poisson-binomial count, as above). The Brier
    // estimators are unbiased at any R: no offset.
    let alpha = 1.0;
    let (plan, out) = run_text(&sorter_scenario("brier", alpha));
    let s = out.summary();
    let p_eval = out.prepared.eval_probs.as_ref().expect("probabilities");
    assert_identity(s, "bias_sq");
    for (g, &kv) in plan.model().grid.iter().enumerate() {
        let k = kv as usize;
        let laws = share_laws(&out, k, alpha);
        let m = laws.len() as f64;
        let (mut noise, mut b2, mut var) = (0.0, 0.0, 0.0);
        for (e, law) in laws.iter().enumerate() {
            let p1 = p_eval[[e, 1]];
            let mean = law.mean(|n| law.q(n, 1));
            let sq = law.mean(|n| law.q(n, 1) * law.q(n, 1));
            noise += 2.0 * p1 * (1.0 - p1);
            b2 += 2.0 * (mean - p1) * (mean - p1);
            var += 2.0 * (sq - mean * mean);
        }
        let (noise, b2, var) = (noise / m, b2 / m, var / m);
        let el = noise + b2 + var;
        let (n_run, _) = term(s, g, "noise");
        assert!((n_run - noise).abs() < 1e-12, "noise {n_run} vs {noise}");
        for (key, exact) in [
            ("expected_loss", el),
            ("bias_sq", b2),
            ("variance", var),
            ("expected_loss_direct", el),
        ] {
            let (v, se) = term(s, g, key);
            assert_within(&format!("brier k={k} {key}"), v, exact, se);
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Poisson counts, k-NN means on a fixed design
// ---------------------------------------------------------------------------------------------

/// `D(y, μ) = 2[y log(y/μ) − (y − μ)]`, written out here (not the library's).
fn dev(y: f64, mu: f64) -> f64 {
    let t = if y == 0.0 { 0.0 } else { y * (y / mu).ln() };
    2.0 * (t - (y - mu))
}

/// Poisson(λ) pmf over `0..len`, computed in log space with a running log-factorial.
fn poisson_pmf(lambda: f64, len: usize) -> Vec<f64> {
    let mut out = Vec::with_capacity(len);
    let mut log_fact = 0.0;
    for y in 0..len {
        if y > 0 {
            log_fact += (y as f64).ln();
        }
        out.push((-lambda + y as f64 * lambda.ln() - log_fact).exp());
    }
    out
}

#[test]
fn poisson_deviance_of_knn_means_matches_the_exact_decomposition() {
    // Source of the exact values: the k-NN mean is S/k with S ~ Poisson(Λ), Λ the sum of the
    // neighbours' means (sum of independent Poisson variables). E log(S/k) and Var log(S/k) by
    // summing its pmf (Λ ≥ 40 here, so P(S = 0) = e^{−Λ} < 5e-18 is below rounding and left
    // out); the noise E D(Y, λ) by summing the Poisson pmf; terms of Pfau (2013) around the
    // geometric mean.
    // Invented scenario: hourly counts of bees leaving a hive entrance along the day; the mean
    // count rises with the temperature index t.
    let src = r#"
name = "hive-counts-knn"
seed = 41
replicates = 4000
blocks = 40
[data]
source = "synthetic"
train_size = 60
design = "fixed"
eval = "design"
[[data.inputs]]
name = "t"
uniform = [0.0, 1.0]
[data.truth]
formula = "40 + 50*t*t"
[data.noise]
poisson = true
[model]
family = "knn"
grid = [1, 3, 8, 20]
[loss]
kind = "poisson"
"#;
    let (plan, out) = run_text(src);
    let s = out.summary();
    let r = plan.replicates as f64;
    let (x, lam, _) = out.prepared.fixed.as_ref().expect("fixed design");
    assert_identity(s, "bias");
    // noise: E D(Y, λ) by a plain pmf sum from 0
    let noise_at = |l: f64| {
        let len = (l + 20.0 * l.sqrt() + 60.0) as usize;
        poisson_pmf(l, len)
            .iter()
            .enumerate()
            .map(|(y, w)| w * dev(y as f64, l))
            .sum::<f64>()
    };
    let noise = lam.iter().map(|&l| noise_at(l)).sum::<f64>() / lam.len() as f64;
    for (g, &kv) in plan.model().grid.iter().enumerate() {
        let k = kv as usize;
        let (mut bias, mut var, mut offset) = (0.0, 0.0, 0.0);
        for (e, nb) in design_neighbours(x, k).iter().enumerate() {
            let big: f64 = nb.iter().map(|&j| lam[j]).sum();
            assert!(big >= 40.0);
            let kf = k as f64;
            let len = (big + 20.0 * big.sqrt() + 60.0) as usize;
            let pmf = poisson_pmf(big, len);
            let el: f64 = pmf
                .iter()
                .enumerate()
                .skip(1)
                .map(|(s, w)| w * (s as f64 / kf).ln())
                .sum();
            let el2: f64 = pmf
                .iter()
                .enumerate()
                .skip(1)
                .map(|(s, w)| w * (s as f64 / kf).ln().powi(2))
                .sum();
            let central = el.exp();
            bias += dev(lam[e], central);
            var += 2.0 * (big / kf - central);
            offset += central * (el2 - el * el) / r;
        }
        let m = lam.len() as f64;
        let (bias, var, offset) = (bias / m, var / m, offset / m);
        let el = noise + bias + var;
        let (n_run, _) = term(s, g, "noise");
        assert!((n_run - noise).abs() < 1e-10, "noise {n_run} vs {noise}");
        let (v, v_se) = term(s, g, "variance");
        println!(
            "k = {k}: variance offset {:.2e} = {:.2} SE",
            -offset,
            offset / v_se
        );
        let (l, l_se) = term(s, g, "expected_loss");
        assert_within(&format!("poisson k={k} expected loss"), l, el, l_se);
        let (b, b_se) = term(s, g, "bias");
        assert_within(&format!("poisson k={k} bias"), b, bias + offset, b_se);
        assert_within(&format!("poisson k={k} variance"), v, var - offset, v_se);
        let (d, d_se) = term(s, g, "expected_loss_direct");
        assert_within(&format!("poisson k={k} direct check"), d, el, d_se);
    }
}

/// A depth-1 regression tree on 20 fixed, evenly spaced inputs with Poisson counts of mean 2
/// below x = 0.5 and 200 above (an independent auditor's case): every leaf of 10 rows predicts
/// its leaf mean at its 10 evaluation points, so the errors of the central prediction are one
/// number per leaf (C of rank two).
const POISSON_STUMP: &str = r#"
name = "aud-pois-stump200"
seed = 1
replicates = 100
[data]
source = "synthetic"
train_size = 20
design = "fixed"
eval = "design"
[[data.inputs]]
name = "x"
even = [0.0, 1.0]
[data.truth]
formula = "2 + 198*(x >= 0.5)"
[data.noise]
poisson = true
[model]
family = "tree"
grid = [1]
[loss]
kind = "poisson"
"#;

/// Exact values of [`POISSON_STUMP`] at R replicates: `(E bias, floor²)`. A leaf's mean is
/// `μ̂ = S/10` with `S ~ Poisson(10λ)` (a sum of independent Poisson counts; `P(S = 0) ≤ e^{−20}`,
/// left out), the same at its 10 points. The central prediction from R replicates is
/// `exp ℓ̂`, `ℓ̂` the mean of R independent `log μ̂`, so `E exp ℓ̂ = (E μ̂^{1/R})^R` and
/// `E bias = mean over leaves of 2[λ log λ − λ E log μ̂ − λ + (E μ̂^{1/R})^R]` (Pfau 2013's bias,
/// exact at finite R; the auditor's `pstump200.py`). `floor²` is the variance of the bias's
/// second-order part for Gaussian errors, `2 tr((Ω^½ C Ω^½)²) / (E² R²)` with `C` the covariance
/// of one replicate's log-predictions over the E = 20 points and `Ω = diag μ̃` (the variance of a
/// Gaussian quadratic form, `Var(dᵀAd) = 2 tr((AΣ)²)`): each leaf adds `(10 μ̃ Var log μ̂)²`.
fn poisson_stump_exact(r: f64) -> (f64, f64) {
    let (mut bias, mut tr) = (0.0, 0.0);
    for lambda in [2.0f64, 200.0] {
        let big = 10.0 * lambda;
        let len = (big + 20.0 * big.sqrt() + 60.0) as usize;
        let pmf = poisson_pmf(big, len);
        let moment = |f: &dyn Fn(f64) -> f64| -> f64 {
            pmf.iter()
                .enumerate()
                .skip(1)
                .map(|(s, w)| w * f(s as f64 / 10.0))
                .sum()
        };
        let el = moment(&|m| m.ln());
        let el2 = moment(&|m| m.ln().powi(2));
        let root = moment(&|m| m.powf(1.0 / r));
        bias += 2.0 * (lambda * lambda.ln() - lambda * el - lambda + root.powf(r)) / 2.0;
        tr += (10.0 * el.exp() * (el2 - el * el)).powi(2);
    }
    (bias, 2.0 * tr / (20.0f64 * 20.0 * r * r))
}

/// One run of [`POISSON_STUMP`]: (bias, its standard error, the jackknife of its
/// leave-one-block-out values alone).
fn poisson_stump_run(seed: u64, replicates: u64) -> (f64, f64, f64) {
    let spec = parse(POISSON_STUMP, "inline.toml").expect("parses");
    let opts = PlanOptions {
        seed: Some(seed),
        replicates: Some(replicates),
        eval_seed: None,
        memory_limit: None,
    };
    let plan =
        Plan::from_spec(&spec, POISSON_STUMP, "inline.toml", Path::new("."), &opts).expect("plans");
    let out = run(&plan, THREADS).expect("runs");
    let s = out.summary();
    let (b, se) = term(s, 0, "bias");
    let t = s.index("bias").expect("bias");
    let leave: Vec<f64> = s.leave_out.iter().map(|rows| rows[0][t]).collect();
    (b, se, lossprism::decompose::jackknife_se(&leave))
}

/// The Poisson bias's standard error keeps its second-order part
/// (`docs/bias-se-second-order.md`, "Poisson deviance"): on a depth-1 tree, whose errors are one
/// number per leaf, the jackknife alone covered the exact bias in 86% of 1000 seeds (worst z
/// −11.5). What the standard error adds beyond the jackknife, `se² − jackknife²`, estimates the
/// exact second-order variance `floor²` without bias (Srivastava's estimate of the trace, for
/// Gaussian errors): its mean over seeds is within 4 SE (from the spread over seeds) of
/// `floor²`. Without the part it is 0 on every seed. The bias itself is unbiased over seeds for
/// its exact finite-R expectation.
#[test]
fn poisson_bias_standard_error_keeps_its_second_order_part_for_a_stump() {
    let r = 100u64;
    let (exact, floor2) = poisson_stump_exact(r as f64);
    let (mut errors, mut added) = (Vec::new(), Vec::new());
    for seed in 1..=100 {
        let (b, se, jack) = poisson_stump_run(seed, r);
        errors.push(b - exact);
        added.push(se * se - jack * jack);
    }
    let (m, se) = mean_and_se(&added);
    assert!(
        se > 0.0,
        "the bias's standard error adds nothing to the jackknife (mean {m:.3e}, floor² {floor2:.3e})"
    );
    assert_within(
        "mean over seeds of se² − jackknife² (second-order variance)",
        m,
        floor2,
        se,
    );
    let (m, se) = mean_and_se(&errors);
    assert_within("mean over seeds of bias − exact", m, 0.0, se);
}

/// The coverage of the Poisson bias's standard error on [`POISSON_STUMP`] (a calibration study;
/// results in `docs/bias-se-second-order.md`). Seeds from `LOSSPRISM_BIAS_SEEDS` (default
/// 1000, seeds 20001 on, as the auditor's), replicates from `LOSSPRISM_BIAS_R` (default 100).
#[test]
#[ignore]
fn poisson_bias_standard_error_coverage_for_a_stump() {
    let env = |k: &str, d: u64| {
        std::env::var(k)
            .ok()
            .and_then(|v| v.parse().ok())
            .unwrap_or(d)
    };
    let (seeds, r) = (
        env("LOSSPRISM_BIAS_SEEDS", 1000),
        env("LOSSPRISM_BIAS_R", 100),
    );
    let (exact, _) = poisson_stump_exact(r as f64);
    let (mut covered, mut low, mut worst) = (0, 0, 0.0f64);
    for seed in 20001..20001 + seeds {
        let (b, se, _) = poisson_stump_run(seed, r);
        let z = (b - exact) / se;
        covered += usize::from(z.abs() <= 2.0);
        low += usize::from(z < -2.0);
        if z.abs() > worst.abs() {
            worst = z;
        }
    }
    println!(
        "Poisson stump, R = {r}: ±2 SE covered the exact bias {exact:.7} in {covered} of {seeds} \
         seeds ({:.1}%), {low} misses below; worst z {worst:+.2}",
        100.0 * covered as f64 / seeds as f64
    );
}

// ---------------------------------------------------------------------------------------------
// Refusals
// ---------------------------------------------------------------------------------------------

#[test]
fn a_zero_probability_under_the_log_loss_stops_the_run_naming_family_and_alpha() {
    // Unsmoothed tree leaves (alpha = 0, the default) are pure at depth 6 on 40 rows: a class
    // probability 0, an infinite log-loss. The run must stop (exit 2), name the family and the
    // option, and write nothing.
    let dir = tempfile::tempdir().expect("temp dir");
    let scenario = dir.path().join("leaves.toml");
    std::fs::write(
        &scenario,
        r#"
name = "pure-leaves"
seed = 3
replicates = 10
[data]
source = "synthetic"
train_size = 40
eval_size = 20
[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]
[data.classes]
labels = ["a", "b"]
probability = "0.2 + 0.6*x"
[model]
family = "tree"
grid = [1, 6]
[loss]
kind = "log"
"#,
    )
    .expect("writes");
    let out_json = dir.path().join("r.json");
    let o = Command::new(env!("CARGO_BIN_EXE_lossprism"))
        .env_remove("RUST_BACKTRACE")
        .args(["run", "--quiet", "--out"])
        .arg(&out_json)
        .arg(&scenario)
        .output()
        .expect("runs the binary");
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "stderr: {err}");
    assert!(err.contains("tree"), "{err}");
    assert!(err.contains("model.alpha"), "{err}");
    assert!(err.contains("probability 0"), "{err}");
    // never an infinite or undefined number written out
    let words: Vec<&str> = err.split(|c: char| !c.is_alphanumeric()).collect();
    assert!(!words.contains(&"inf") && !words.contains(&"NaN"), "{err}");
    assert!(!out_json.exists());
    // The same scenario with alpha = 0.5 runs, and every term is finite.
    let fixed = std::fs::read_to_string(&scenario)
        .unwrap()
        .replace("grid = [1, 6]", "grid = [1, 6]\nalpha = 0.5");
    let (_, out) = run_text(&fixed);
    assert!(out.summary().values.iter().flatten().all(|v| v.is_finite()));
}

#[test]
fn the_poisson_loss_refuses_negative_capable_families_and_non_count_responses() {
    let base = r#"
name = "counts"
seed = 1
replicates = 10
[data]
source = "synthetic"
train_size = 30
eval_size = 10
[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]
[data.truth]
formula = "5 + x"
[data.noise]
NOISE
[model]
family = "FAMILY"
grid = [GRID]
[loss]
kind = "poisson"
"#;
    let make = |noise: &str, family: &str, grid: &str| {
        base.replace("NOISE", noise)
            .replace("FAMILY", family)
            .replace("GRID", grid)
    };
    assert!(plan_text(&make("poisson = true", "knn", "3")).is_ok());
    assert!(plan_text(&make("poisson = true", "tree", "2")).is_ok());
    let e = plan_text(&make("poisson = true", "poly", "1")).unwrap_err();
    assert!(
        e.contains("model.family") && e.contains("poly") && e.contains("negative"),
        "{e}"
    );
    let e = plan_text(&make("poisson = true", "ridge", "1")).unwrap_err();
    assert!(e.contains("ridge"), "{e}");
    let e = plan_text(&make("sd = 1", "knn", "3")).unwrap_err();
    assert!(
        e.contains("loss.kind") && e.contains("poisson = true"),
        "{e}"
    );
    let e = plan_text(&make("poisson = true\nsd = 1", "knn", "3")).unwrap_err();
    assert!(e.contains("not both"), "{e}");
    // a truth that is not a positive mean is refused when the data are drawn
    let bad = make("poisson = true", "knn", "3").replace("5 + x", "x - 0.5");
    let plan = plan_text(&bad).expect("plans");
    let e = run(&plan, 1).unwrap_err().to_string();
    assert!(e.contains("must be > 0"), "{e}");
    // a zero mean at run time: counts with mean 0.01 make all-zero neighbourhoods
    let zero = make("poisson = true", "knn", "1").replace("5 + x", "0.01");
    let plan = plan_text(&zero).expect("plans");
    let e = run(&plan, 1).unwrap_err().to_string();
    assert!(e.contains("knn") && e.contains("positive mean"), "{e}");
    // squared loss on Poisson counts: noise variance = the mean
    let sq = make("poisson = true", "knn", "3").replace("kind = \"poisson\"", "kind = \"squared\"");
    let (_, out) = run_text(&sq);
    let s = out.summary();
    let mean_lambda: f64 =
        out.prepared.eval_truth.iter().sum::<f64>() / out.prepared.eval_truth.len() as f64;
    assert!((term(s, 0, "noise").0 - mean_lambda).abs() < 1e-12);
}

#[test]
fn the_shipped_demo_scenarios_validate_and_run() {
    for (file, loss) in [
        ("scenarios/kernel-sorter-log.toml", "log"),
        ("scenarios/kernel-sorter-brier.toml", "brier"),
        ("scenarios/hive-counts-poisson.toml", "poisson"),
    ] {
        let src = std::fs::read_to_string(file).expect("scenario file");
        assert!(src.contains("Invented scenario"), "{file}");
        let spec = parse(&src, file).expect("parses");
        let opts = PlanOptions {
            replicates: Some(40),
            ..PlanOptions::default()
        };
        let plan =
            Plan::from_spec(&spec, &src, file, Path::new("scenarios"), &opts).expect("plans");
        assert_eq!(plan.loss.name(), loss);
        let out = run(&plan, THREADS).expect("runs");
        let bias = if loss == "brier" { "bias_sq" } else { "bias" };
        assert_identity(out.summary(), bias);
    }
}

// ---------------------------------------------------------------------------------------------
// Logistic probabilities against scikit-learn
// ---------------------------------------------------------------------------------------------

#[derive(Debug, Deserialize)]
struct LogisticFixture {
    meta: serde_json::Value,
    datasets: Vec<LogisticData>,
}

#[derive(Debug, Deserialize)]
struct LogisticData {
    name: String,
    classes: usize,
    x: Vec<Vec<String>>,
    y: Vec<u32>,
    eval: Vec<Vec<String>>,
    eval_norms: Vec<String>,
    fits: Vec<LogisticFit>,
}

#[derive(Debug, Deserialize)]
struct LogisticFit {
    c: f64,
    probs: Vec<Vec<String>>,
    grad_norm: f64,
    h_min: f64,
}

/// Parses a `float.hex` string (`0x1.8p+1`, `-0x0.0p+0`).
fn from_hex(s: &str) -> f64 {
    let (neg, t) = match s.strip_prefix('-') {
        Some(r) => (true, r),
        None => (false, s),
    };
    if t == "inf" {
        return if neg {
            f64::NEG_INFINITY
        } else {
            f64::INFINITY
        };
    }
    let t = t.strip_prefix("0x").expect("hex float");
    let (mant, exp) = t.split_once('p').expect("exponent");
    let (int, frac) = mant.split_once('.').unwrap_or((mant, ""));
    let mut v = u64::from_str_radix(int, 16).expect("hex digits") as f64;
    let mut scale = 1.0 / 16.0;
    for ch in frac.chars() {
        v += ch.to_digit(16).expect("hex digit") as f64 * scale;
        scale /= 16.0;
    }
    let v = v * 2f64.powi(exp.parse::<i32>().expect("exponent"));
    if neg {
        -v
    } else {
        v
    }
}

fn matrix(rows: &[Vec<String>]) -> Array2<f64> {
    let (n, p) = (rows.len(), rows[0].len());
    Array2::from_shape_fn((n, p), |(i, j)| from_hex(&rows[i][j]))
}

/// lossprism's documented gradient stopping rule: norm at most 1e-8 per training row
/// (`GRAD_TOL_PER_ROW` in src/family/logistic.rs).
const OUR_GRAD_PER_ROW: f64 = 1e-8;

#[test]
fn logistic_probabilities_match_scikit_learn() {
    // Source: scikit-learn LogisticRegression (version in the fixture's meta) with the same
    // objective (lossprism's C is scikit-learn's C: C·Σ log-loss + ½‖W‖², intercepts
    // unpenalized, on inputs standardized with the population sd). Tolerance at point e:
    // c/h_min · |(1, z_e)| · (|g_sklearn| + 1e-8 n), c = 1/4 (two classes) or 1/2 (softmax):
    // the parameter distance of two near-optimal points of a strongly convex objective, carried
    // to the probabilities (derivation in the fixture script's docstring).
    let text = std::fs::read_to_string("tests/fixtures/sklearn-logistic.json").expect("fixture");
    let fx: LogisticFixture = serde_json::from_str(&text).expect("fixture parses");
    println!("fixture made with scikit-learn {}", fx.meta["sklearn"]);
    let mut worst_ratio = 0.0f64;
    for d in &fx.datasets {
        let x = matrix(&d.x);
        let xe = matrix(&d.eval);
        let y = Array1::from_iter(d.y.iter().map(|&v| f64::from(v)));
        let grid: Vec<f64> = d.fits.iter().map(|f| f.c).collect();
        let task = Task::Classify { classes: d.classes };
        let m = xe.nrows();
        let mut values = Array2::<f64>::zeros((grid.len(), m));
        let mut probs = Array3::<f64>::zeros((grid.len(), m, d.classes));
        let input = FitInput {
            x: x.view(),
            y: y.view(),
            eval: xe.view(),
            task,
            seed: FitSeed::fixed(1),
        };
        LogisticFamily
            .fit_predict(
                &input,
                &grid,
                Out {
                    values: values.view_mut(),
                    probs: Some(probs.view_mut()),
                    diversity: None,
                },
            )
            .expect("fits");
        let c_factor = if d.classes == 2 { 0.25 } else { 0.5 };
        let n = x.nrows() as f64;
        for (g, fit) in d.fits.iter().enumerate() {
            let reference = matrix(&fit.probs);
            let mut max_diff = 0.0f64;
            for e in 0..m {
                let tol = c_factor / fit.h_min
                    * from_hex(&d.eval_norms[e])
                    * (fit.grad_norm + OUR_GRAD_PER_ROW * n);
                for c in 0..d.classes {
                    let diff = (probs[[g, e, c]] - reference[[e, c]]).abs();
                    assert!(
                        diff <= tol,
                        "{} C={}: point {e} class {c}: {} vs scikit-learn {} (tolerance {tol:.2e})",
                        d.name,
                        fit.c,
                        probs[[g, e, c]],
                        reference[[e, c]]
                    );
                    max_diff = max_diff.max(diff);
                    worst_ratio = worst_ratio.max(diff / tol);
                }
            }
            println!("{} C = {}: max |Δp| = {max_diff:.2e}", d.name, fit.c);
        }
    }
    println!("largest difference / tolerance: {worst_ratio:.2e}");
}
