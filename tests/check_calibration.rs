//! Calibration of `check`'s rule (issue #13): false alarms of an unchanged estimator rerun with
//! fresh seeds (same evaluation points, and different ones), the rate at sigma = 2 against the
//! nominal `2·(1 − Φ(2))`, and the power of paired comparisons against an estimator made worse
//! on purpose. The long study (`calibration_study`, ignored) measures the numbers written in
//! `docs/check-calibration.md`.

mod common;
use common::stats::{binomial_interval, binomial_reject_at, mean_sd, normal_upper_tail};

use std::path::Path;
use std::sync::Arc;

use lossprism::check::{self, CheckOptions, Mode, Verdict};
use lossprism::family::{Family, FitError, FitInput, Out, Task};
use lossprism::report::ResultDoc;
use lossprism::scenario::{self, Plan, PlanOptions};
use lossprism::{harness, report, runner};

#[path = "../examples/kernel_smoother.rs"]
#[allow(dead_code)]
mod kernel_smoother;

use kernel_smoother::NadarayaWatson;

/// A tiny invented k-NN scenario: n = 40, m = 50 evaluation points drawn uniformly, R = 32
/// (32 blocks of one replicate), k ∈ {1, 3, 9}. About 3 ms a run.
const KNN: &str = r#"
name = "tiny-knn"
seed = 3
replicates = 32

[data]
source = "synthetic"
train_size = 40
eval_size = 50

[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]

[data.truth]
formula = "sin(6 * x)"

[data.noise]
sd = 0.5

[model]
family = "knn"
grid = [1, 3, 9]
"#;

/// Compared terms × rows of [`KNN`]: expected loss, bias², variance at 3 values of k.
const TESTS_PER_RUN: usize = 9;

/// Runs [`KNN`] with a master seed and, optionally, an evaluation seed (one thread).
fn knn(seed: u64, eval_seed: Option<u64>) -> ResultDoc {
    let spec = scenario::parse(KNN, "tiny-knn.toml").expect("parses");
    let opts = PlanOptions {
        seed: Some(seed),
        replicates: None,
        eval_seed,
        memory_limit: None,
    };
    let plan = Plan::from_spec(&spec, KNN, "tiny-knn.toml", Path::new("."), &opts).expect("plans");
    let out = runner::run(&plan, 1).expect("runs");
    report::build(&plan, &out)
}

/// An invented smoothing scenario for the power test (the sensor line of
/// `examples/kernel_smoother.rs`): n = 100, m = 100 uniform points, R = 64.
const SMOOTH: &str = r#"
name = "probe-power"
seed = 5
replicates = 64

[data]
source = "synthetic"
train_size = 100
eval_size = 100

[[data.inputs]]
name = "hours"
uniform = [0.0, 10.0]

[data.truth]
formula = "0.5 * sin(hours) + 0.05 * hours"

[data.noise]
sd = 0.3

[model]
family = "custom"
grid = [0.3, 0.8, 2.0]
"#;

/// The Nadaraya–Watson smoother fitted on a fixed 80 % of its training rows: every row whose
/// index is `drop` modulo 5 is ignored. Training rows are independent draws, so which fifth is
/// dropped does not matter in distribution (`drop = 0` and `drop = 4` are equally good), while
/// fitting on 80 rows instead of 100 raises the variance (by about 100/80 for a kernel smoother,
/// whose variance is inversely proportional to the local number of rows).
#[derive(Debug, Clone, Copy)]
struct Subsampled {
    drop: usize,
}

impl Family for Subsampled {
    fn name(&self) -> &'static str {
        // The same name as the plain smoother: a new version of the same estimator.
        "nadaraya_watson"
    }
    fn knob(&self) -> &'static str {
        "bandwidth"
    }
    fn check_grid(&self, grid: &[f64], n: usize, p: usize) -> Result<(), String> {
        NadarayaWatson::default().check_grid(grid, n, p)
    }
    fn supports(&self, task: Task) -> bool {
        task == Task::Regress
    }
    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        out: Out<'_>,
    ) -> Result<(), FitError> {
        let keep: Vec<usize> = (0..input.x.nrows())
            .filter(|i| i % 5 != self.drop)
            .collect();
        let x = input.x.select(ndarray::Axis(0), &keep);
        let y = input.y.select(ndarray::Axis(0), &keep);
        let sub = FitInput {
            x: x.view(),
            y: y.view(),
            eval: input.eval.view(),
            task: input.task,
            seed: input.seed,
        };
        NadarayaWatson::default().fit_predict(&sub, grid, out)
    }
}

fn smooth(fam: Arc<dyn Family>, seed: u64) -> ResultDoc {
    smooth_text(SMOOTH, fam, seed)
}

fn smooth_text(text: &str, fam: Arc<dyn Family>, seed: u64) -> ResultDoc {
    let opts = PlanOptions {
        seed: Some(seed),
        ..PlanOptions::default()
    };
    harness::run_with_family_opts(text, fam, &opts, 1).expect("runs")
}

fn plain() -> Arc<dyn Family> {
    Arc::new(NadarayaWatson::default())
}

fn sub(drop: usize) -> Arc<dyn Family> {
    Arc::new(Subsampled { drop })
}

/// sigma only: margin 0 so the statistical rule is what is tested.
fn sigma_only(sigma: f64) -> CheckOptions {
    CheckOptions {
        sigma,
        margin: 0.0,
        term_margins: Vec::new(),
    }
}

// False alarms against one baseline, as in a project's CI: the baseline is run once, then 200
// reruns of the unchanged estimator with fresh seeds (`--seed`) are checked against it at the
// default sigma = 4 with margin 0.
//
// Bound. Under no change each of the T = 9 compared terms has z ≈ N(0, 1), so it is flagged
// worse with probability q = 1 − Φ(4) = 3.17e-5 (and better with the same q). A run is flagged
// worse when any term is: by Bonferroni's inequality with probability at most p = T·q = 2.9e-4.
// Over 200 runs the count of runs flagged worse is then stochastically below Binomial(200, p)
// (for runs independent given the baseline); the count c with P(X ≥ c) < 1e-6 is the bound, 4.
// Against one shared baseline the runs are not independent — they share its Monte Carlo error —
// so the bound holds for a baseline within a few standard errors of its expectation, which is
// the case for these fixed seeds (the test is deterministic).
//
// The first half keeps the evaluation points (the default: `--seed` does not move them, mode
// "unpaired, same points"); the second also varies `--eval-seed` (mode "unpaired, other
// points"), which exercises the evaluation-point sampling variance.
#[test]
fn fresh_seeds_rarely_flag_an_unchanged_estimator() {
    let runs = 200usize;
    let q = normal_upper_tail(4.0);
    assert!((q - 3.167e-5).abs() < 1e-7, "Φ table value at 4: {q}");
    let p = TESTS_PER_RUN as f64 * q;
    let bound = binomial_reject_at(runs, p, 1e-6);
    assert_eq!(bound, 4);
    let base = knn(3, None);
    let opts = sigma_only(4.0);
    for other_points in [false, true] {
        let (mut worse, mut better) = (0usize, 0usize);
        for i in 0..runs as u64 {
            let eval_seed = other_points.then_some(5_000 + i);
            let new = knn(1_000 + i, eval_seed);
            let r = check::compare(&new, &base, &opts).unwrap();
            let want = if other_points {
                Mode::OtherPoints
            } else {
                Mode::SamePoints
            };
            assert_eq!(r.mode, want);
            assert_eq!(r.comparisons.len(), TESTS_PER_RUN);
            worse += usize::from(r.regressed());
            better += usize::from(r.better().next().is_some());
        }
        println!(
            "other points {other_points}: {worse} of {runs} runs flagged worse, {better} better \
             (bound: fewer than {bound})"
        );
        assert!(worse < bound, "{worse} runs flagged worse");
        assert!(better < bound, "{better} runs claimed better");
    }
}

// The rate at sigma = 2, where it is large enough to measure, over independent pairs of runs
// (each pair has its own baseline, so pairs are independent). Nominal: a term is flagged (worse
// or better) with probability 2·(1 − Φ(2)) = 0.0455.
//
// Two checks per mode, both able to fail when the standard error is mis-calibrated:
// 1. One comparison per pair (the i-th pair uses comparison i mod 9), so the flags are
//    independent Bernoulli trials: their count lies in the two-sided binomial interval of
//    probability 1 − 1e-6 around the nominal rate.
// 2. All 9 comparisons per pair (correlated within a pair): the mean number flagged per pair is
//    within 4 standard errors (from the spread over pairs) of 9 · 0.0455.
// The jackknife overstates the standard error of bias² a little (the Efron–Stein inequality
// makes the jackknife variance conservative: Efron & Stein 1981, Ann. Statist. 9:586), so the
// pooled rate sits slightly below nominal; docs/check-calibration.md has the per-term numbers.
#[test]
fn rate_at_sigma_2_is_nominal_for_independent_pairs() {
    let pairs = 300usize;
    let nominal = 2.0 * normal_upper_tail(2.0);
    assert!((nominal - 0.0455).abs() < 1e-4);
    let opts = sigma_only(2.0);
    let (lo, hi) = binomial_interval(pairs, nominal, 1e-6);
    for other_points in [false, true] {
        let mut single = 0usize;
        let mut per_pair = Vec::with_capacity(pairs);
        for i in 0..pairs as u64 {
            let (ea, eb) = if other_points {
                (Some(20_000 + 2 * i), Some(20_001 + 2 * i))
            } else {
                (None, None)
            };
            let a = knn(10_000 + 2 * i, ea);
            let b = knn(10_001 + 2 * i, eb);
            let r = check::compare(&b, &a, &opts).unwrap();
            let flagged: Vec<bool> = r
                .comparisons
                .iter()
                .map(|c| c.verdict != Verdict::Unchanged)
                .collect();
            single += usize::from(flagged[i as usize % TESTS_PER_RUN]);
            per_pair.push(flagged.iter().filter(|f| **f).count() as f64);
        }
        let (mean, sd) = mean_sd(&per_pair);
        let se = sd / (pairs as f64).sqrt();
        let want = TESTS_PER_RUN as f64 * nominal;
        println!(
            "other points {other_points}: single comparisons flagged {single} of {pairs} \
             (interval [{lo}, {hi}]); per pair {mean:.3} ± {se:.3} flagged of 9 (nominal {want:.3})"
        );
        assert!(
            (lo..=hi).contains(&single),
            "{single} of {pairs} flagged at sigma 2, outside [{lo}, {hi}]"
        );
        assert!(
            (mean - want).abs() < 4.0 * se,
            "mean flagged per pair {mean:.3} vs nominal {want:.3} (se {se:.3})"
        );
    }
}

// Power of the paired mode. The same seed (so the same training sets and evaluation points) for
// baseline and new, over 20 seeds at R = 64: the smoother fitted on a fixed 80 % of its rows has
// about 25 % more variance and must be flagged worse (default sigma 4 and margin 2 %) in at
// least 95 % of the trials. Two equally good estimators (the subsample dropping a different
// fifth of the rows) must not be: each trial flags with probability at most 9·(1 − Φ(4)) =
// 2.9e-4 (Bonferroni), so 3 or more flagged trials of 20 would have probability < 1e-6.
#[test]
fn paired_comparisons_detect_a_worse_estimator_and_spare_an_equal_one() {
    let seeds = 20u64;
    let (mut detected, mut equal_flagged, mut unpaired_detected) = (0, 0, 0);
    let mut ratios = Vec::new();
    for s in 0..seeds {
        let seed = 100 + s;
        let base = smooth(plain(), seed);
        let worse = smooth(sub(4), seed);
        let r = check::compare(&worse, &base, &CheckOptions::default()).unwrap();
        assert_eq!(r.mode, Mode::Paired);
        detected += usize::from(r.regressed());
        ratios.push(r.se_ratio().unwrap());
        let equal = smooth(sub(0), seed);
        let base80 = smooth(sub(4), seed);
        let r = check::compare(&equal, &base80, &CheckOptions::default()).unwrap();
        assert_eq!(r.mode, Mode::Paired);
        equal_flagged += usize::from(r.regressed() || r.better().next().is_some());
        // The same question with independent runs (fresh seed for the new one).
        let fresh = smooth(sub(4), seed + 1_000);
        let r = check::compare(&fresh, &base, &CheckOptions::default()).unwrap();
        assert_eq!(r.mode, Mode::SamePoints);
        unpaired_detected += usize::from(r.regressed());
    }
    ratios.sort_by(f64::total_cmp);
    println!(
        "paired: worse estimator detected in {detected} of {seeds}; equal one flagged in \
         {equal_flagged}; unpaired (fresh seeds) detected {unpaired_detected}; median paired/\
         unpaired se ratio {:.3}",
        ratios[ratios.len() / 2]
    );
    assert!(detected >= 19, "detected in only {detected} of {seeds}");
    assert!(equal_flagged < binomial_reject_at(20, 9.0 * normal_upper_tail(4.0), 1e-6));
}

/// Per-term tallies of z over many comparisons.
#[derive(Default)]
struct Tally {
    z: Vec<f64>,
    worse4: usize,
    better4: usize,
    worse2: usize,
    better2: usize,
}

impl Tally {
    fn add(&mut self, z: f64) {
        self.z.push(z);
        self.worse4 += usize::from(z > 4.0);
        self.better4 += usize::from(z < -4.0);
        self.worse2 += usize::from(z > 2.0);
        self.better2 += usize::from(z < -2.0);
    }

    fn line(&self, what: &str) -> String {
        let n = self.z.len();
        let (m, sd) = mean_sd(&self.z);
        let cover = self.z.iter().filter(|z| z.abs() <= 1.96).count();
        format!(
            "| {what} | {n} | {m:+.3} | {sd:.3} | {:.3} | {} / {} | {} / {} |",
            cover as f64 / n as f64,
            self.worse2,
            self.better2,
            self.worse4,
            self.better4
        )
    }
}

/// Runs the comparisons of `pairs` and tallies z per term (pooled over the rows) and overall.
fn tally(pairs: impl Iterator<Item = (ResultDoc, ResultDoc)>, want: Mode) -> Vec<(String, Tally)> {
    let mut out: Vec<(String, Tally)> = Vec::new();
    for (new, base) in pairs {
        let r = check::compare(&new, &base, &sigma_only(4.0)).unwrap();
        assert_eq!(r.mode, want);
        for c in &r.comparisons {
            let z = if c.se > 0.0 { c.diff / c.se } else { 0.0 };
            for key in [c.term.as_str(), "all terms"] {
                match out.iter_mut().find(|(k, _)| k == key) {
                    Some((_, t)) => t.add(z),
                    None => {
                        let mut t = Tally::default();
                        t.add(z);
                        out.push((key.to_string(), t));
                    }
                }
            }
        }
    }
    out
}

// The calibration study of docs/check-calibration.md (about two minutes on 2 cores):
// `cargo test --release --test check_calibration -- --ignored --nocapture calibration_study`.
#[test]
#[ignore]
fn calibration_study() {
    let n = 500u64;
    let header = "| term | comparisons | mean z | sd z | share abs(z) <= 1.96 | z > 2 / z < -2 | z > 4 / z < -4 |\n|---|---|---|---|---|---|---|";
    println!(
        "Nominal under no change: mean 0, sd 1, share 0.95, each tail beyond 2: {:.4}, beyond 4: {:.2e}\n",
        normal_upper_tail(2.0),
        normal_upper_tail(4.0)
    );
    println!("### Unpaired, same evaluation points: {n} independent pairs of tiny-knn runs (fresh seeds)\n\n{header}");
    let t = tally(
        (0..n).map(|i| (knn(40_001 + 2 * i, None), knn(40_000 + 2 * i, None))),
        Mode::SamePoints,
    );
    for (k, v) in &t {
        println!("{}", v.line(k));
    }
    println!("\n### Unpaired, different evaluation points: {n} independent pairs (fresh seeds and eval seeds)\n\n{header}");
    let t = tally(
        (0..n).map(|i| {
            (
                knn(50_001 + 2 * i, Some(60_001 + 2 * i)),
                knn(50_000 + 2 * i, Some(60_000 + 2 * i)),
            )
        }),
        Mode::OtherPoints,
    );
    for (k, v) in &t {
        println!("{}", v.line(k));
    }
    println!("\n### Paired, equally good estimators: {n} seeds, smoother on rows 1-4 of 5 against rows 2-5 of 5, same seed\n\n{header}");
    let t = tally(
        (0..n).map(|i| (smooth(sub(0), 70_000 + i), smooth(sub(4), 70_000 + i))),
        Mode::Paired,
    );
    for (k, v) in &t {
        println!("{}", v.line(k));
    }
    // Power and the standard-error ratio.
    let (mut paired, mut unpaired) = (0usize, 0usize);
    let mut ratios = Vec::new();
    for i in 0..n {
        let seed = 80_000 + i;
        let base = smooth(plain(), seed);
        let r = check::compare(&smooth(sub(4), seed), &base, &CheckOptions::default()).unwrap();
        paired += usize::from(r.regressed());
        ratios.push(r.se_ratio().unwrap());
        let r = check::compare(
            &smooth(sub(4), seed + 1_000_000),
            &base,
            &CheckOptions::default(),
        )
        .unwrap();
        unpaired += usize::from(r.regressed());
    }
    ratios.sort_by(f64::total_cmp);
    println!(
        "\n### Power: smoother on 80 % of its rows against the full smoother, R = 64, default sigma 4 and margin 2 %\n\n\
         paired (same seed): detected in {paired} of {n} ({:.1} %); unpaired (fresh seed): {unpaired} of {n} ({:.1} %); \
         paired/unpaired standard error, median over runs of the per-run median: {:.3} (quartiles {:.3}, {:.3})",
        100.0 * paired as f64 / n as f64,
        100.0 * unpaired as f64 / n as f64,
        ratios[ratios.len() / 2],
        ratios[ratios.len() / 4],
        ratios[3 * ratios.len() / 4]
    );
    // The CI recipe: one baseline, many fresh-seed reruns, default sigma, margin 0.
    let base = knn(3, None);
    for other in [false, true] {
        let (mut worse, mut better) = (0usize, 0usize);
        for i in 0..n {
            let new = knn(90_000 + i, other.then_some(95_000 + i));
            let r = check::compare(&new, &base, &sigma_only(4.0)).unwrap();
            worse += usize::from(r.regressed());
            better += usize::from(r.better().next().is_some());
        }
        println!(
            "\none baseline, {n} fresh-seed reruns ({}): runs flagged worse {worse}, better {better} \
             (Bonferroni bound on the per-run rate: {:.1e})",
            if other { "eval seed varied too" } else { "same evaluation points" },
            TESTS_PER_RUN as f64 * normal_upper_tail(4.0)
        );
    }
}

// Paired comparisons where the bias is zero: the Nadaraya–Watson smoother is exactly unbiased
// for a constant truth (its weights sum to one), so bias² is estimated near 0, where the
// jackknife of a squared mean misses the second-order part of its spread
// (docs/bias-se-second-order.md). Equally good estimators (rows 1-4 of 5 against rows 2-5 of 5):
// `cargo test --release --test check_calibration -- --ignored --nocapture zero_bias_paired_study`.
#[test]
#[ignore]
fn zero_bias_paired_study() {
    let n: u64 = std::env::var("LOSSPRISM_CHECK_SEEDS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(300);
    let flat = SMOOTH.replace("0.5 * sin(hours) + 0.05 * hours", "1.0");
    let header = "| term | comparisons | mean z | sd z | share abs(z) <= 1.96 | z > 2 / z < -2 | z > 4 / z < -4 |\n|---|---|---|---|---|---|---|";
    println!("### Paired, equally good, constant truth (bias 0): {n} seeds\n\n{header}");
    let t = tally(
        (0..n).map(|i| {
            (
                smooth_text(&flat, sub(0), 90_000 + i),
                smooth_text(&flat, sub(4), 90_000 + i),
            )
        }),
        Mode::Paired,
    );
    for (k, v) in &t {
        println!("{}", v.line(k));
    }
}
