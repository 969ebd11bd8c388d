//! Classification under 0-1 loss, whole pipeline (scenario text → plan → runner → Domingos,
//! Kohavi–Wolpert and James decompositions), checked against exact values that do not come from
//! the project's estimators: the exact vote distribution of a fixed-design k-NN classifier,
//! Cover & Hart's 1-NN risk, a classifier that ignores its input, the exact decomposition
//! identities, the fresh-label cross-check, a well-specified logistic model, and the command
//! line's answers to bad classification scenarios.
//!
//! Every Monte Carlo comparison uses a tolerance of 4 standard errors, taken from a
//! delete-a-block jackknife over the run's own replicate blocks; none is widened by hand. All
//! scenarios are invented and kept small, so the whole file runs in seconds in release mode.
//!
//! # Which estimates may be compared with exact values at finite R (test 1)
//!
//! With R replicates, `p̂_D(c) = n_c / R` is unbiased for `p_D(c)`. A term is compared with its
//! exact value only where its estimator is unbiased:
//! - the expected loss `1 − Σ p_t p̂_D` is linear in `p̂_D`: unbiased at every point;
//! - Kohavi–Wolpert bias² and variance use the corrected `Σ n_c(n_c − 1)/(R(R − 1))`, an
//!   unbiased estimator of `Σ p_D²` (a U-statistic): unbiased at every point;
//! - the Domingos terms (bias, variance, net / unbiased / biased variance, the noise term
//!   `c1·N`) and the James terms go through the **estimated** main prediction (the mode of the
//!   votes). Where two classes have nearly equal `p_D` the estimated mode flips between
//!   replicate sets and the plug-in is biased (the mode of a sample is not an unbiased estimate
//!   of the mode). They are therefore compared only on the points where the exact mode leads
//!   every other class by at least `6/√R` — more than 6 standard deviations of
//!   `p̂_D(a) − p̂_D(b)`, whose variance is at most `1/R` — so the estimated mode equals the exact
//!   one (asserted; the chance it does not is below 1e-9 per point and class). Given the mode,
//!   every such term is linear in `p̂_D` (for K > 2 and B = 1, `c2·V = −p̂_D(y*)`), hence
//!   unbiased, and bias and systematic effect are then exactly equal to their exact values.
//!   The averages over **all** points of these plug-in terms are not compared with exact values.

mod common;
use common::lossprism;
use std::collections::HashMap;
use std::fs;
use std::path::Path;

use lossprism::decompose::jackknife_se;
use lossprism::decompose::zero_one::{self, domingos_coefficients, ZeroOne, ZeroOneSummary};
use lossprism::decompose::Acc;
use lossprism::family::knn::neighbours;
use lossprism::runner::{self, Prepared};
use lossprism::scenario::{parse, Plan, PlanOptions};

/// Number of standard errors allowed in every Monte Carlo comparison.
const Z: f64 = 4.0;

/// Worker threads for the runs (results do not depend on it).
const THREADS: usize = 2;

/// Float tolerance of the exact identities.
const TOL: f64 = 1e-12;

/// A finished classification run, kept block by block for jackknife errors of any statistic.
struct Run {
    plan: Plan,
    prep: Prepared,
    blocks: Vec<Acc>,
    summary: ZeroOneSummary,
    /// `points × K` class probabilities at the evaluation points, row-major.
    probs: Vec<f64>,
}

impl Run {
    fn classes(&self) -> usize {
        self.summary.total.shape.classes
    }

    fn points(&self) -> usize {
        self.summary.total.shape.points
    }

    /// True class probabilities at evaluation point `e`.
    fn p_true(&self, e: usize) -> &[f64] {
        let k = self.classes();
        &self.probs[e * k..(e + 1) * k]
    }

    /// Delete-a-block jackknife standard error of any statistic of the folded accumulator.
    fn jackknife(&self, stat: impl Fn(&Acc) -> f64) -> f64 {
        let loo: Vec<f64> = (0..self.blocks.len())
            .map(|b| {
                let rest = self
                    .blocks
                    .iter()
                    .enumerate()
                    .filter(|(i, _)| *i != b)
                    .map(|(_, a)| a);
                stat(&Acc::fold(&ZeroOne, rest).expect("blocks remain"))
            })
            .collect();
        jackknife_se(&loo)
    }
}

/// Parses, plans and runs inline scenario text (0-1 loss), keeping the block accumulators.
fn run_text(src: &str) -> Run {
    let spec = parse(src, "inline.toml").expect("scenario parses");
    let plan = Plan::from_spec(
        &spec,
        src,
        "inline.toml",
        Path::new("."),
        &PlanOptions::default(),
    )
    .expect("plans");
    let prep = runner::prepare(&plan).expect("prepares");
    let ids: Vec<u64> = (0..plan.blocks).collect();
    let done = runner::schedule(&plan, &prep, &ids, THREADS, &runner::NoWatch, &|_, _| {
        Ok(true)
    })
    .expect("runs")
    .done;
    let blocks: Vec<Acc> = done.into_values().map(|b| b.accs[0].clone()).collect();
    let probs: Vec<f64> = prep
        .eval_probs
        .as_ref()
        .expect("class probabilities at the evaluation points")
        .iter()
        .copied()
        .collect();
    let summary = zero_one::summarize(&blocks, &probs).expect("summarizes");
    Run {
        plan,
        prep,
        blocks,
        summary,
        probs,
    }
}

/// Asserts `|estimate − exact| <= Z · se` with a readable message.
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
        "{what}: estimate {estimate:.6} vs exact {exact:.6}: |diff| = {dev:.3e} > {Z} SE = {:.3e}",
        Z * se
    );
}

/// Index of the largest value, smallest index among exact ties (the library's convention for
/// the Bayes class and the main prediction).
fn argmax_first(xs: &[f64]) -> usize {
    let mut best = 0;
    for (i, &x) in xs.iter().enumerate() {
        if x > xs[best] {
            best = i;
        }
    }
    best
}

// ---------------------------------------------------------------------------------------------
// Exact vote distribution of a k-NN classifier on a fixed design
// ---------------------------------------------------------------------------------------------

/// Exact distribution of the k-NN prediction when the labels of the k neighbours (nearest first)
/// are independent categorical draws with class probabilities `neigh[j]` (a fixed design: only
/// the labels are redrawn). The prediction is the class with the most votes; ties go to the class
/// of the nearest neighbour among the tied classes (the family's documented rule).
///
/// Dynamic programme over neighbours: the state is the vote vector together with the order in
/// which the classes were first seen (the tie rule needs nothing more), with its probability.
/// For two classes the vote count is Poisson-binomial (design §7).
fn exact_vote_distribution(neigh: &[&[f64]], k_classes: usize) -> Vec<f64> {
    const UNSEEN: u8 = u8::MAX;
    // key: counts[0..K] ++ first-seen rank[0..K]
    let mut states: HashMap<Vec<u8>, f64> = HashMap::new();
    let mut start = vec![0u8; k_classes];
    start.extend(std::iter::repeat(UNSEEN).take(k_classes));
    states.insert(start, 1.0);
    for p in neigh {
        let mut next: HashMap<Vec<u8>, f64> = HashMap::new();
        for (s, w) in &states {
            for (c, &pc) in p.iter().enumerate() {
                if pc == 0.0 {
                    continue;
                }
                let mut t = s.clone();
                t[c] += 1;
                if t[k_classes + c] == UNSEEN {
                    let seen = t[k_classes..].iter().filter(|&&r| r != UNSEEN).count();
                    t[k_classes + c] = seen as u8;
                }
                *next.entry(t).or_insert(0.0) += w * pc;
            }
        }
        states = next;
    }
    let mut pd = vec![0.0; k_classes];
    for (s, w) in states {
        let top = *s[..k_classes].iter().max().expect("classes");
        let winner = (0..k_classes)
            .filter(|&c| s[c] == top)
            .min_by_key(|&c| s[k_classes + c])
            .expect("a leader");
        pd[winner] += w;
    }
    pd
}

/// The same distribution by enumerating every label sequence (K^k of them), with the tie rule
/// applied literally: walk the neighbours nearest first and take the first whose class is tied.
fn enumerated_vote_distribution(neigh: &[&[f64]], k_classes: usize) -> Vec<f64> {
    let k = neigh.len();
    let total = k_classes.pow(k as u32);
    let mut pd = vec![0.0; k_classes];
    for code in 0..total {
        let mut labels = Vec::with_capacity(k);
        let mut rest = code;
        let mut w = 1.0;
        for p in neigh {
            let c = rest % k_classes;
            rest /= k_classes;
            labels.push(c);
            w *= p[c];
        }
        let mut counts = vec![0usize; k_classes];
        for &c in &labels {
            counts[c] += 1;
        }
        let top = *counts.iter().max().unwrap();
        let winner = labels
            .iter()
            .copied()
            .find(|&c| counts[c] == top)
            .expect("some neighbour is of a tied class");
        pd[winner] += w;
    }
    pd
}

#[test]
fn exact_vote_distribution_dynamic_programme_equals_enumeration() {
    // Self-check of the reference used below (exact identity: both sum the same finite
    // distribution, one by states, one by sequences).
    let mut s = 3u64;
    let mut unif = move || {
        s = s
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (s >> 11) as f64 / (1u64 << 53) as f64
    };
    for k_classes in 2..=4 {
        for k in 1..=6 {
            let rows: Vec<Vec<f64>> = (0..k)
                .map(|_| {
                    let v: Vec<f64> = (0..k_classes).map(|_| unif() + 0.05).collect();
                    let t: f64 = v.iter().sum();
                    v.iter().map(|x| x / t).collect()
                })
                .collect();
            let refs: Vec<&[f64]> = rows.iter().map(Vec::as_slice).collect();
            let a = exact_vote_distribution(&refs, k_classes);
            let b = enumerated_vote_distribution(&refs, k_classes);
            for c in 0..k_classes {
                assert!(
                    (a[c] - b[c]).abs() < TOL,
                    "K={k_classes} k={k}: {a:?} vs {b:?}"
                );
            }
            assert!((a.iter().sum::<f64>() - 1.0).abs() < TOL);
        }
    }
}

/// Exact 0-1 terms at one point from the true class probabilities `p` and the exact prediction
/// distribution `q` (Domingos' coefficients from the library's point-level function).
#[derive(Debug, Clone, Copy, Default)]
struct Exact {
    expected_loss: f64,
    bias: f64,
    variance: f64,
    net_variance: f64,
    unbiased_variance: f64,
    biased_variance: f64,
    c1_noise: f64,
    kw_bias_sq: f64,
    kw_variance: f64,
    james_systematic: f64,
    james_variance: f64,
}

fn exact_terms(p: &[f64], q: &[f64]) -> Exact {
    let bayes = argmax_first(p);
    let main = argmax_first(q);
    let agree: f64 = p.iter().zip(q).map(|(a, b)| a * b).sum();
    let noise = 1.0 - p[bayes];
    let bias = if main == bayes { 0.0 } else { 1.0 };
    let variance = 1.0 - q[main];
    // Domingos (2000), Theorems 1 and 2: E L = c1·N + B + c2·V.
    let (c1, c2) = domingos_coefficients(p, q, bayes, main);
    Exact {
        expected_loss: 1.0 - agree,
        bias,
        variance,
        net_variance: c2 * variance,
        unbiased_variance: (1.0 - bias) * variance,
        biased_variance: bias * variance,
        c1_noise: c1 * noise,
        // Kohavi & Wolpert (1996): ½Σ(p_t − p_D)², ½(1 − Σ p_D²) with the exact p_D.
        kw_bias_sq: 0.5 * p.iter().zip(q).map(|(a, b)| (a - b) * (a - b)).sum::<f64>(),
        kw_variance: 0.5 * (1.0 - q.iter().map(|v| v * v).sum::<f64>()),
        // James (2003): SE = p_t(y*) − p_t(y_m), VE = p_t(y_m) − Σ p_t p_D.
        james_systematic: p[bayes] - p[main],
        james_variance: p[main] - agree,
    }
}

/// Test 1 for one scenario: exact p_D at every design point and grid value from the vote
/// distribution of the neighbours' labels, compared with the run (see the module docs for which
/// comparisons are made and why).
fn check_fixed_design_knn(src: &str, what: &str) {
    let run = run_text(src);
    let (x, _, _) = run.prep.fixed.as_ref().expect("fixed design");
    let fixed_probs = run
        .prep
        .fixed_probs
        .as_ref()
        .expect("probabilities at the design");
    let k_classes = run.classes();
    let m = run.points();
    let r = run.summary.total.replicates as f64;
    let gap_needed = 6.0 / r.sqrt();
    // Clear points whose main prediction is not the Bayes class (the B = 1 branch of Domingos'
    // coefficients), over the whole grid: the scenario must have some.
    let mut biased_clear = 0usize;
    assert_eq!(m, x.nrows(), "evaluation at the design");

    for (g, &kf) in run.plan.model().grid.iter().enumerate() {
        let k = kf as usize;
        let at = format!("{what}, k = {k}");
        // Exact prediction distribution at every design point.
        let exact: Vec<(Vec<f64>, Exact)> = (0..m)
            .map(|e| {
                let nb = neighbours(x.view(), run.prep.eval_x.row(e), k);
                // The point itself is its own nearest neighbour (distance 0).
                assert_eq!(
                    nb[0], e,
                    "{at}: design point {e} is not its own first neighbour"
                );
                let rows: Vec<&[f64]> = nb
                    .iter()
                    .map(|&i| fixed_probs.row(i).to_slice().expect("standard layout"))
                    .collect();
                let q = exact_vote_distribution(&rows, k_classes);
                let t = exact_terms(run.p_true(e), &q);
                (q, t)
            })
            .collect();
        let mean = |f: fn(&Exact) -> f64| exact.iter().map(|(_, t)| f(t)).sum::<f64>() / m as f64;

        // Unbiased at every point: expected loss, Kohavi–Wolpert bias² and variance.
        let est = &run.summary.terms[g];
        let se = &run.summary.stderr[g];
        assert_within(
            &format!("{at}: expected loss"),
            est.expected_loss,
            mean(|t| t.expected_loss),
            se.expected_loss,
        );
        assert_within(
            &format!("{at}: Kohavi-Wolpert bias²"),
            est.kw_bias_sq,
            mean(|t| t.kw_bias_sq),
            se.kw_bias_sq,
        );
        assert_within(
            &format!("{at}: Kohavi-Wolpert variance"),
            est.kw_variance,
            mean(|t| t.kw_variance),
            se.kw_variance,
        );

        // Plug-in terms: only on points whose exact main prediction is clear.
        let clear: Vec<usize> = (0..m)
            .filter(|&e| {
                let q = &exact[e].0;
                let main = argmax_first(q);
                (0..k_classes)
                    .filter(|&c| c != main)
                    .all(|c| q[main] - q[c] >= gap_needed)
            })
            .collect();
        println!(
            "{at}: {} of {m} points have a clear main prediction",
            clear.len()
        );
        assert!(
            clear.len() * 4 >= m,
            "{at}: only {} of {m} points have a clear main prediction; the check needs more",
            clear.len()
        );
        for &e in &clear {
            let pt = zero_one::point(&run.summary.total, g, e, run.p_true(e));
            let q = &exact[e].0;
            assert_eq!(pt.main_prediction, argmax_first(q), "{at}, point {e}");
            // Given the mode these two are deterministic functions of it: exactly equal.
            assert_eq!(pt.terms.bias, exact[e].1.bias, "{at}, point {e}");
            assert_eq!(
                pt.terms.james_systematic, exact[e].1.james_systematic,
                "{at}, point {e}"
            );
            biased_clear += (exact[e].1.bias == 1.0) as usize;
        }
        // (name, the library's point value from (terms, c1, N), the exact value)
        type Pick = fn(&zero_one::ZeroOneTerms, f64, f64) -> f64;
        type ExactOf = fn(&Exact) -> f64;
        let terms: [(&str, Pick, ExactOf); 7] = [
            ("Domingos variance", |t, _, _| t.variance, |t| t.variance),
            (
                "Domingos net variance",
                |t, _, _| t.net_variance,
                |t| t.net_variance,
            ),
            (
                "Domingos unbiased variance",
                |t, _, _| t.unbiased_variance,
                |t| t.unbiased_variance,
            ),
            (
                "Domingos biased variance",
                |t, _, _| t.biased_variance,
                |t| t.biased_variance,
            ),
            ("Domingos c1·N", |_, c1, n| c1 * n, |t| t.c1_noise),
            ("Domingos bias", |t, _, _| t.bias, |t| t.bias),
            (
                "James variance effect",
                |t, _, _| t.james_variance,
                |t| t.james_variance,
            ),
        ];
        for (name, pick, exact_of) in terms {
            let subset_mean = |acc: &Acc| {
                clear
                    .iter()
                    .map(|&e| {
                        let pt = zero_one::point(acc, g, e, run.p_true(e));
                        pick(&pt.terms, pt.c1, pt.terms.noise)
                    })
                    .sum::<f64>()
                    / clear.len() as f64
            };
            let estimate = subset_mean(&run.summary.total);
            let se = run.jackknife(subset_mean);
            let truth =
                clear.iter().map(|&e| exact_of(&exact[e].1)).sum::<f64>() / clear.len() as f64;
            assert_within(&format!("{at}: {name} (clear points)"), estimate, truth, se);
        }
    }
    println!("{what}: {biased_clear} clear (point, k) cells with main prediction ≠ Bayes class");
    assert!(
        biased_clear > 0,
        "{what}: the biased branch is not exercised"
    );
}

#[test]
fn fixed_design_knn_two_classes_matches_the_exact_vote_distribution() {
    // Invented scenario: a sorting gate reads one position along a belt at 40 fixed, evenly
    // spaced places; parcels are diverted often beyond 0.7 and in a narrow band around 0.3, where
    // large k smooths the band away (points whose main prediction is clearly not the Bayes
    // class). Evenly spaced inputs make neighbours tie on distance (the row index decides, as in
    // the family), and even k makes vote ties (the nearest neighbour's class wins).
    // Source of the exact values: the vote count among the k neighbours is Poisson-binomial over
    // the neighbours' class probabilities (design §7), computed exactly by dynamic programming.
    let src = r#"
name = "sorting-gate-knn-exact"
seed = 17
replicates = 1000
blocks = 50
[data]
source = "synthetic"
train_size = 40
design = "fixed"
eval = "design"
[[data.inputs]]
name = "position"
even = [0.0, 1.0]
[data.classes]
labels = ["pass", "divert"]
probability = "0.1 + 0.55*(abs(position - 0.3) < 0.06) + 0.8*(position > 0.7)"
[model]
family = "knn"
grid = [1, 2, 3, 4, 5, 8, 9, 15]
[loss]
kind = "zero_one"
"#;
    check_fixed_design_knn(src, "two classes");
}

#[test]
fn fixed_design_knn_three_classes_matches_the_exact_vote_distribution() {
    // Invented scenario: a sensor line classifies three fault types from two fixed test
    // readings at 50 fixed settings; the true class probabilities are a softmax of the readings,
    // with a small island where the third fault is the most likely (large k votes it away:
    // points whose main prediction is clearly not the Bayes class).
    // Source of the exact values: the vote vector is a sum of independent categorical draws,
    // its distribution computed exactly by dynamic programming over the neighbours.
    let src = r#"
name = "fault-types-knn-exact"
seed = 23
replicates = 1000
blocks = 50
[data]
source = "synthetic"
train_size = 50
design = "fixed"
eval = "design"
[[data.inputs]]
name = "a"
uniform = [0.0, 1.0]
[[data.inputs]]
name = "b"
uniform = [0.0, 1.0]
[data.classes]
labels = ["seal", "bearing", "sensor"]
logits = ["0", "4*(a - 0.5)", "2 - 40*((a - 0.8)^2 + (b - 0.2)^2)"]
[model]
family = "knn"
grid = [1, 2, 3, 5, 7, 15]
[loss]
kind = "zero_one"
"#;
    check_fixed_design_knn(src, "three classes");
}

// ---------------------------------------------------------------------------------------------
// 1-NN: Cover & Hart
// ---------------------------------------------------------------------------------------------

#[test]
fn one_nn_expected_loss_is_cover_and_hart() {
    // Cover & Hart (1967), IEEE Trans. Inf. Theory 13:21–27: with labels drawn independently,
    // the 1-NN rule errs at x with probability p(1−q) + q(1−p), p and q the class-1
    // probabilities at x and at its nearest neighbour; at a design point the neighbour is the
    // point itself, giving 2p(1−p).
    // Invented scenario: a kiln inspection flags tiles as cracked from two readings.
    let base = r#"
name = "kiln-1nn"
seed = 5
replicates = 400
blocks = 40
[data]
source = "synthetic"
train_size = 60
design = "fixed"
EVAL
[[data.inputs]]
name = "heat"
uniform = [0.0, 1.0]
[[data.inputs]]
name = "time"
uniform = [0.0, 1.0]
[data.classes]
labels = ["sound", "cracked"]
probability = "logistic(4*heat - 3*time)"
[model]
family = "knn"
grid = [1]
[loss]
kind = "zero_one"
"#;
    // At the design points: 2p(1−p).
    let run = run_text(&base.replace("EVAL", "eval = \"design\""));
    let m = run.points();
    let exact = (0..m)
        .map(|e| {
            let p = run.p_true(e)[1];
            2.0 * p * (1.0 - p)
        })
        .sum::<f64>()
        / m as f64;
    assert_within(
        "1-NN at the design points: 2p(1-p)",
        run.summary.terms[0].expected_loss,
        exact,
        run.summary.stderr[0].expected_loss,
    );

    // At fresh evaluation points: p(1−q) + q(1−p) with q at the nearest design point.
    let run = run_text(&base.replace("EVAL", "eval_size = 200"));
    let (x, _, _) = run.prep.fixed.as_ref().expect("fixed design");
    let fixed_probs = run.prep.fixed_probs.as_ref().unwrap();
    let m = run.points();
    assert_eq!(m, 200);
    let exact = (0..m)
        .map(|e| {
            let nb = neighbours(x.view(), run.prep.eval_x.row(e), 1)[0];
            let p = run.p_true(e)[1];
            let q = fixed_probs[[nb, 1]];
            p * (1.0 - q) + q * (1.0 - p)
        })
        .sum::<f64>()
        / m as f64;
    assert_within(
        "1-NN at fresh points: p(1-q) + q(1-p)",
        run.summary.terms[0].expected_loss,
        exact,
        run.summary.stderr[0].expected_loss,
    );
}

// ---------------------------------------------------------------------------------------------
// A classifier that ignores its input
// ---------------------------------------------------------------------------------------------

/// k-NN with k = n on a fixed design: every evaluation point sees the whole training set, so
/// the prediction is the majority class of the replicate's labels (n odd, two classes: no tie).
fn constant_classifier_run(n: usize, probability: &str) -> Run {
    run_text(&format!(
        r#"
name = "hatchery-constant"
seed = 9
replicates = 100
blocks = 20
[data]
source = "synthetic"
train_size = {n}
design = "fixed"
eval = "design"
[[data.inputs]]
name = "age"
even = [0.0, 1.0]
[data.classes]
labels = ["reject", "keep"]
probability = "{probability}"
[model]
family = "knn"
grid = [{n}]
[loss]
kind = "zero_one"
"#
    ))
}

#[test]
fn a_constant_classifier_has_no_variance_and_bias_where_the_bayes_class_differs() {
    // Exact: with k = n every replicate predicts the majority class of its n labels at every
    // point. When P(keep) >= 0.9 everywhere (n = 41) a majority of rejects has probability below
    // 1e-9 per replicate, so every replicate predicts `keep`: p_D is a point mass, Domingos
    // variance, Kohavi–Wolpert variance and James' variance effect are exactly 0, and the bias is
    // exactly the share of points whose Bayes class is not `keep` (none). When the Bayes class
    // varies (P(keep) = 0.95 for age < 0.7, 0.2 above; n = 101, expected keeps 72.7, sd 2.9,
    // a reject majority needs 7.9 sd), the constant prediction `keep` is biased exactly at the
    // 31 points with age > 0.7: bias = 31/101.
    for (n, probability, wrong) in [
        (41usize, "0.9 + 0.08*age", 0usize),
        (101, "if(age < 0.7, 0.95, 0.2)", 31),
    ] {
        let run = constant_classifier_run(n, probability);
        let acc = &run.summary.total;
        let r = acc.replicates as u32;
        for e in 0..n {
            assert_eq!(
                zero_one::cell(acc, 0, e),
                &[0, r],
                "n = {n}, point {e}: not constant"
            );
        }
        let bayes_misses = (0..n).filter(|&e| argmax_first(run.p_true(e)) != 1).count();
        assert_eq!(bayes_misses, wrong, "n = {n}: the scenario's Bayes classes");
        let t = &run.summary.terms[0];
        assert_eq!(t.variance, 0.0, "n = {n}");
        assert_eq!(t.net_variance, 0.0, "n = {n}");
        assert_eq!(t.unbiased_variance, 0.0, "n = {n}");
        assert_eq!(t.biased_variance, 0.0, "n = {n}");
        assert_eq!(t.kw_variance, 0.0, "n = {n}");
        assert_eq!(t.james_variance, 0.0, "n = {n}");
        assert!(
            (t.bias - wrong as f64 / n as f64).abs() < TOL,
            "n = {n}: bias {}",
            t.bias
        );
        // Expected loss of always predicting `keep`: the mean of P(reject | x).
        let exact = (0..n).map(|e| run.p_true(e)[0]).sum::<f64>() / n as f64;
        assert!((t.expected_loss - exact).abs() < TOL, "n = {n}");
        assert_eq!(run.summary.stderr[0].variance, 0.0, "n = {n}");
    }
}

// ---------------------------------------------------------------------------------------------
// Exact identities in full runs, K = 2..5
// ---------------------------------------------------------------------------------------------

/// An invented K-class scenario on two uniform inputs: class c has logit
/// `3 (a cos θ_c + b sin θ_c)` with `θ_c = 2πc/K` (a colour wheel of K grades).
fn wheel_scenario(k_classes: usize, family: &str, grid: &str, r: u64, blocks: u64) -> String {
    let labels: Vec<String> = (0..k_classes).map(|c| format!("\"grade{c}\"")).collect();
    let logits: Vec<String> = (0..k_classes)
        .map(|c| {
            let th = 2.0 * std::f64::consts::PI * c as f64 / k_classes as f64;
            format!("\"{:.6}*a + {:.6}*b\"", 3.0 * th.cos(), 3.0 * th.sin())
        })
        .collect();
    format!(
        r#"
name = "colour-wheel-{k_classes}"
seed = {seed}
replicates = {r}
blocks = {blocks}
[data]
source = "synthetic"
train_size = 60
eval_size = 50
[[data.inputs]]
name = "a"
uniform = [-1.0, 1.0]
[[data.inputs]]
name = "b"
uniform = [-1.0, 1.0]
[data.classes]
labels = [{labels}]
logits = [{logits}]
[model]
family = "{family}"
grid = {grid}
[loss]
kind = "zero_one"
"#,
        seed = 100 + k_classes,
        labels = labels.join(", "),
        logits = logits.join(", "),
    )
}

#[test]
fn every_decomposition_sums_to_the_master_identity_in_full_runs() {
    // Exact identities (design §1): Kohavi & Wolpert (1996) noise + bias² + variance = E L (the
    // finite-R correction enters bias² and variance with opposite signs); James (2003) noise +
    // systematic effect + variance effect = E L (telescoping); Domingos (2000, Theorem 2)
    // E L = c1·N + B + c2·V at every point, so E L − bias − net variance equals the average of
    // c1·N computed point by point. R = 10 (even) makes vote ties common.
    let (mut ties, mut wrong_main, mut cells) = (0usize, 0usize, 0usize);
    for k_classes in 2..=5 {
        for (family, grid) in [("tree", "[1, 2, 3, 4, 6]"), ("knn", "[1, 2, 3, 4, 6, 10]")] {
            let run = run_text(&wheel_scenario(k_classes, family, grid, 10, 5));
            let what = format!("K = {k_classes}, {family}");
            let acc = &run.summary.total;
            for (g, t) in run.summary.terms.iter().enumerate() {
                let at = format!(
                    "{what}, {} = {}",
                    run.plan.model().family.knob(),
                    run.plan.model().grid[g]
                );
                let kw = t.kw_noise + t.kw_bias_sq + t.kw_variance;
                assert!(
                    (kw - t.expected_loss).abs() < TOL,
                    "{at}: KW {kw} vs {}",
                    t.expected_loss
                );
                let james = t.noise + t.james_systematic + t.james_variance;
                assert!((james - t.expected_loss).abs() < TOL, "{at}: James");
                let c1n = (0..run.points())
                    .map(|e| {
                        let pt = zero_one::point(acc, g, e, run.p_true(e));
                        let top = *zero_one::cell(acc, g, e).iter().max().unwrap();
                        ties += (zero_one::cell(acc, g, e)
                            .iter()
                            .filter(|&&c| c == top)
                            .count()
                            > 1) as usize;
                        wrong_main += (pt.main_prediction != pt.bayes_class) as usize;
                        cells += 1;
                        pt.c1 * pt.terms.noise
                    })
                    .sum::<f64>()
                    / run.points() as f64;
                assert!(
                    (t.noise_term - c1n).abs() < TOL,
                    "{at}: Domingos c1·N {} vs {c1n}",
                    t.noise_term
                );
                assert!((t.unbiased_variance + t.biased_variance - t.variance).abs() < TOL);
                if k_classes == 2 {
                    assert!(
                        (t.net_variance - (t.unbiased_variance - t.biased_variance)).abs() < TOL,
                        "{at}: two-class net variance"
                    );
                }
            }
        }
    }
    println!("{cells} cells: {ties} with a vote tie, {wrong_main} with main ≠ Bayes");
    assert!(
        ties > 100 && wrong_main > 100,
        "the hard cases must be exercised"
    );
}

// ---------------------------------------------------------------------------------------------
// Direct cross-check against fresh labels
// ---------------------------------------------------------------------------------------------

#[test]
fn direct_misclassification_agrees_with_the_master_identity() {
    // Both are unbiased for the same expected loss: the master identity averages
    // 1 − Σ p_t p_D exactly; the direct check counts misclassifications against a fresh label
    // drawn from p_t at every point (independent of the training set). Their difference has
    // mean 0; its standard error is the delete-a-block jackknife of the difference (the combined
    // error, which accounts for the positive correlation of the two through the shared
    // predictions).
    for (k_classes, family, grid) in [
        (2usize, "tree", "[1, 2, 4, 8]"),
        (3, "knn", "[1, 3, 9, 27]"),
        (4, "tree", "[1, 3, 6]"),
    ] {
        let run = run_text(&wheel_scenario(k_classes, family, grid, 200, 40));
        for g in 0..run.plan.model().grid.len() {
            let diff = |acc: &Acc| {
                let t = &zero_one::terms(acc, &run.probs)[g];
                t.expected_loss_direct - t.expected_loss
            };
            let se = run.jackknife(diff);
            assert_within(
                &format!(
                    "K = {k_classes}, {family} {} = {}: direct − master",
                    run.plan.model().family.knob(),
                    run.plan.model().grid[g]
                ),
                diff(&run.summary.total),
                0.0,
                se,
            );
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Logistic family on a logistic truth
// ---------------------------------------------------------------------------------------------

#[test]
fn logistic_on_a_logistic_truth_approaches_the_bayes_error() {
    // A well-specified model (P(y = 1 | x) = logistic(linear)) with n = 2000: as the penalty
    // weakens (C grows) the fit approaches the true model, so the expected 0-1 loss approaches
    // the Bayes error (the noise) and the main prediction is the Bayes class almost everywhere.
    // The excess loss of the estimated coefficients is of order p/n, not zero, so the check
    // allows 4 SE plus a margin of 0.005 (a common-practice allowance, no source), and a
    // Domingos bias of at most 0.02 (points within the estimation error of the boundary).
    // Invented scenario: a dairy flags milk batches from two sensor readings.
    let src = r#"
name = "dairy-logistic"
seed = 12
replicates = 50
blocks = 25
[data]
source = "synthetic"
train_size = 2000
eval_size = 500
[[data.inputs]]
name = "acidity"
normal = [0.0, 1.0]
[[data.inputs]]
name = "temperature"
normal = [0.0, 1.0]
[data.classes]
labels = ["ship", "hold"]
probability = "logistic(2*acidity - temperature + 0.5)"
[model]
family = "logistic"
grid = { log = [1e-5, 1e2], count = 8 }
[loss]
kind = "zero_one"
"#;
    let run = run_text(src);
    let terms = &run.summary.terms;
    let se = &run.summary.stderr;
    let best = (0..terms.len())
        .min_by(|&a, &b| terms[a].expected_loss.total_cmp(&terms[b].expected_loss))
        .unwrap();
    const MARGIN: f64 = 0.005;
    for g in [best, terms.len() - 1] {
        let t = &terms[g];
        let excess = t.expected_loss - t.noise;
        println!(
            "C = {}: expected loss {:.5}, Bayes error {:.5}, excess {:.5} ± {:.5}, bias {:.4}",
            run.plan.model().grid[g],
            t.expected_loss,
            t.noise,
            excess,
            se[g].expected_loss,
            t.bias
        );
        assert!(excess > -Z * se[g].expected_loss, "below the Bayes error");
        assert!(
            excess <= Z * se[g].expected_loss + MARGIN,
            "C = {}: excess {excess} over the Bayes error",
            run.plan.model().grid[g]
        );
        assert!(
            t.bias <= 0.02,
            "C = {}: Domingos bias {}",
            run.plan.model().grid[g],
            t.bias
        );
    }
    // The strongest penalty is visibly worse: it is the high-bias end of the curve.
    assert!(terms[0].expected_loss > terms[best].expected_loss + Z * se[0].expected_loss);
}

// ---------------------------------------------------------------------------------------------
// Bad classification scenarios on the command line
// ---------------------------------------------------------------------------------------------

/// A classification scenario with the `[data.classes]` body, family and loss given.
fn scenario_with(classes: &str, family: &str, loss: &str) -> String {
    format!(
        r#"name = "bad-classes"
seed = 1
replicates = 4
[data]
source = "synthetic"
train_size = 20
eval_size = 5
[[data.inputs]]
name = "ripeness"
uniform = [0.0, 1.0]
{classes}
[model]
family = "{family}"
grid = [1, 2]
[loss]
kind = "{loss}"
"#
    )
}

/// Runs `lossprism run` on `body` and checks: exit code 2, nothing on stdout, exactly one
/// stderr line starting with `error:` containing the file name and every needle, no panic.
fn assert_bad(body: &str, needles: &[&str]) {
    let dir = tempfile::tempdir().unwrap();
    fs::write(dir.path().join("bad.toml"), body).unwrap();
    let out = lossprism(
        dir.path(),
        &["run", "bad.toml", "--quiet", "--threads", "1"],
    );
    let err = String::from_utf8_lossy(&out.stderr).into_owned();
    let stdout = String::from_utf8_lossy(&out.stdout).into_owned();
    assert!(
        !err.contains("panicked") && !stdout.contains("panicked"),
        "panic:\n{err}"
    );
    assert_eq!(out.status.code(), Some(2), "exit code; stderr:\n{err}");
    assert!(stdout.is_empty(), "stdout on error:\n{stdout}");
    let lines: Vec<&str> = err.lines().collect();
    assert_eq!(lines.len(), 1, "one error line, got:\n{err}");
    assert!(lines[0].starts_with("error:"), "{}", lines[0]);
    for n in std::iter::once(&"bad.toml").chain(needles) {
        assert!(lines[0].contains(n), "`{n}` missing from: {}", lines[0]);
    }
}

#[test]
fn bad_classification_scenarios_exit_2_with_one_line_naming_the_key() {
    let two = "[data.classes]\nlabels = [\"green\", \"ripe\"]";
    // one label only
    assert_bad(
        &scenario_with(
            "[data.classes]\nlabels = [\"ripe\"]\nprobability = \"ripeness\"",
            "tree",
            "zero_one",
        ),
        &["data.classes.labels", "at least 2"],
    );
    // a probability outside [0, 1] at a drawn input: the formula and the input are named
    assert_bad(
        &scenario_with(
            &format!("{two}\nprobability = \"2*ripeness\""),
            "tree",
            "zero_one",
        ),
        &["data.classes.probability", "`2*ripeness`", "ripeness = "],
    );
    // a NaN probability at a drawn input
    assert_bad(
        &scenario_with(
            &format!("{two}\nprobability = \"sqrt(ripeness - 0.5)\""),
            "tree",
            "zero_one",
        ),
        &["data.classes.probability", "NaN", "ripeness = "],
    );
    // more logits than labels
    assert_bad(
        &scenario_with(
            &format!("{two}\nlogits = [\"0\", \"ripeness\", \"2*ripeness\"]"),
            "tree",
            "zero_one",
        ),
        &["data.classes.logits", "3 logits for 2 labels"],
    );
    // `probability` with three labels
    assert_bad(
        &scenario_with(
            "[data.classes]\nlabels = [\"a\", \"b\", \"c\"]\nprobability = \"ripeness\"",
            "tree",
            "zero_one",
        ),
        &["data.classes.probability", "logits"],
    );
    // regression families with classes
    for family in ["poly", "ridge"] {
        assert_bad(
            &scenario_with(
                &format!("{two}\nprobability = \"ripeness\""),
                family,
                "zero_one",
            ),
            &["model.family", family, "does not classify"],
        );
    }
    // squared loss with classes
    assert_bad(
        &scenario_with(
            &format!("{two}\nprobability = \"ripeness\""),
            "tree",
            "squared",
        ),
        &["loss.kind", "zero_one"],
    );
    // zero_one without classes
    assert_bad(
        &scenario_with(
            "[data.truth]\nformula = \"ripeness\"\n[data.noise]\nsd = 1",
            "tree",
            "zero_one",
        ),
        &["loss.kind", "[data.classes]"],
    );
    // `flip` without `rule`: with nothing else, the table lacks its probability model
    // (the message names `rule` and `flip`); beside `probability`, the key `flip` is named.
    assert_bad(
        &scenario_with(&format!("{two}\nflip = 0.1"), "tree", "zero_one"),
        &["data.classes", "`rule`", "`flip`"],
    );
    assert_bad(
        &scenario_with(
            &format!("{two}\nprobability = \"ripeness\"\nflip = 0.1"),
            "tree",
            "zero_one",
        ),
        &["data.classes.flip", "`rule`"],
    );
    // flip outside [0, 1)
    assert_bad(
        &scenario_with(
            &format!("{two}\nrule = \"ripeness > 0.5\"\nflip = 1.5"),
            "tree",
            "zero_one",
        ),
        &["data.classes.flip", "1.5"],
    );
}
