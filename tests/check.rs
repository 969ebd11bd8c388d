//! Regression-testing estimators: the library API (`harness::run_with_family`,
//! `check::compare`) on the example Nadaraya–Watson smoother and deliberately changed variants,
//! the `lossprism check` command line (exit codes, `--update`, refusals), and the false alarm
//! rate of the statistical rule over many independent pairs of runs.

mod common;
use common::run3;
use std::sync::Arc;

use lossprism::check::{self, CheckError, CheckOptions, Verdict};
use lossprism::harness;
use lossprism::scenario::PlanOptions;

#[path = "../examples/kernel_smoother.rs"]
#[allow(dead_code)]
mod kernel_smoother;

use kernel_smoother::NadarayaWatson;

/// A small invented scenario (a sensor line's drift), cheap enough to run many times. Inputs are
/// `even` (evenly spaced, the same for every seed) so that runs with different seeds estimate
/// the same quantities at the same evaluation points.
const SMALL: &str = r#"
name = "probe-small"
seed = 5
replicates = 64

[data]
source = "synthetic"
train_size = 40
eval_size = 20

[[data.inputs]]
name = "hours"
even = [0.0, 10.0]

[data.truth]
formula = "0.5 * sin(hours) + 0.05 * hours"

[data.noise]
sd = 0.3

[model]
family = "custom"
grid = [0.3, 0.8, 2.0]
"#;

fn run(fam: NadarayaWatson, text: &str, seed: Option<u64>) -> lossprism::report::ResultDoc {
    let opts = PlanOptions {
        seed,
        replicates: None,
        eval_seed: None,
    };
    harness::run_with_family_opts(text, Arc::new(fam), &opts, 2).expect("run succeeds")
}

fn noisy() -> NadarayaWatson {
    NadarayaWatson {
        jitter: 0.3,
        ..NadarayaWatson::default()
    }
}

#[test]
fn same_estimator_same_seed_is_identical() {
    let a = run(NadarayaWatson::default(), SMALL, None);
    let b = run(NadarayaWatson::default(), SMALL, None);
    let r = check::compare(&b, &a, &CheckOptions::default()).unwrap();
    assert!(r.identical);
    assert!(!r.regressed());
    assert_eq!(r.comparisons.len(), 9);
    assert!(r.to_string().starts_with("identical"), "{r}");
}

#[test]
fn noisier_variant_regresses_with_variance_named() {
    let base = run(NadarayaWatson::default(), SMALL, None);
    let new = run(noisy(), SMALL, None);
    let r = check::compare(&new, &base, &CheckOptions::default()).unwrap();
    println!("{r}");
    assert!(!r.identical);
    assert!(r.regressed());
    // Jitter uniform on [-0.3, 0.3] adds 0.3²/3 = 0.03 of variance at every bandwidth.
    let worse = r.worse_terms();
    assert!(worse.iter().any(|t| t == "variance"), "{r}");
    assert!(worse.iter().any(|t| t == "expected_loss"), "{r}");
    for c in r.worse().filter(|c| c.term == "variance") {
        assert!(c.diff > 0.02 && c.diff < 0.04, "{c:?}");
    }
    let text = r.to_string();
    assert!(text.contains("REGRESSED"), "{text}");
    assert!(text.contains("variance"), "{text}");
}

#[test]
fn improved_variant_is_better_and_not_regressed() {
    let base = run(noisy(), SMALL, None);
    let new = run(NadarayaWatson::default(), SMALL, None);
    let r = check::compare(&new, &base, &CheckOptions::default()).unwrap();
    println!("{r}");
    assert!(!r.regressed(), "{r}");
    assert!(r.better().any(|c| c.term == "variance"), "{r}");
    assert!(r.to_string().contains("better"));
}

#[test]
fn mismatched_scenario_is_refused() {
    let base = run(NadarayaWatson::default(), SMALL, None);
    let other = SMALL.replace("train_size = 40", "train_size = 50");
    let new = run(NadarayaWatson::default(), &other, None);
    let e = check::compare(&new, &base, &CheckOptions::default()).unwrap_err();
    assert!(matches!(e, CheckError::Mismatch(_)), "{e}");
    assert!(e.to_string().contains("train_size"), "{e}");
    let other = SMALL.replace("[0.3, 0.8, 2.0]", "[0.3, 0.8, 2.5]");
    let new = run(NadarayaWatson::default(), &other, None);
    let e = check::compare(&new, &base, &CheckOptions::default()).unwrap_err();
    assert!(e.to_string().contains("grid differs"), "{e}");
}

#[test]
fn custom_family_must_accept_the_grid() {
    let bad = SMALL.replace("[0.3, 0.8, 2.0]", "[0.3, -1]");
    let e = harness::run_with_family(&bad, Arc::new(NadarayaWatson::default())).unwrap_err();
    assert!(e.to_string().contains("bandwidth = -1"), "{e}");
}

#[test]
fn command_line_check() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let save = |name: &str, doc: &lossprism::report::ResultDoc| {
        harness::save_result(&d.join(name), doc).unwrap();
    };
    let plain = run(NadarayaWatson::default(), SMALL, None);
    save("base.json", &plain);
    save("same.json", &plain);
    save("noisy.json", &run(noisy(), SMALL, None));
    let other = SMALL.replace("train_size = 40", "train_size = 50");
    save("other.json", &run(NadarayaWatson::default(), &other, None));
    let one_block = SMALL.replace("replicates = 64", "replicates = 64\nblocks = 1");
    save(
        "one-a.json",
        &run(NadarayaWatson::default(), &one_block, None),
    );
    save("one-b.json", &run(noisy(), &one_block, None));

    let (code, out, _) = run3(d, &["check", "same.json", "--baseline", "base.json"]);
    assert_eq!(code, 0);
    assert!(out.starts_with("identical"), "{out}");

    let (code, out, _) = run3(d, &["check", "noisy.json", "--baseline", "base.json"]);
    assert_eq!(code, 1, "{out}");
    assert!(
        out.contains("REGRESSED") && out.contains("variance"),
        "{out}"
    );

    // A 1000 % margin on every term hides the change; per-term margins override it.
    let (code, _, _) = run3(
        d,
        &[
            "check",
            "noisy.json",
            "--baseline",
            "base.json",
            "--margin",
            "1000%",
        ],
    );
    assert_eq!(code, 0);
    let (code, _, _) = run3(
        d,
        &[
            "check",
            "noisy.json",
            "--baseline",
            "base.json",
            "--margin",
            "1000%",
            "--margin-term",
            "variance=1%",
        ],
    );
    assert_eq!(code, 1);

    let (code, out, _) = run3(d, &["check", "base.json", "--baseline", "noisy.json"]);
    assert_eq!(code, 0, "{out}");
    assert!(out.contains("better"), "{out}");

    let (code, _, err) = run3(d, &["check", "other.json", "--baseline", "base.json"]);
    assert_eq!(code, 2);
    assert_eq!(err.lines().count(), 1, "{err}");
    assert!(err.contains("scenario.train_size differs"), "{err}");

    let (code, _, err) = run3(d, &["check", "one-b.json", "--baseline", "one-a.json"]);
    assert_eq!(code, 2);
    assert!(err.contains("at least 2 replicate blocks"), "{err}");

    let (code, _, err) = run3(
        d,
        &[
            "check",
            "noisy.json",
            "--baseline",
            "base.json",
            "--margin-term",
            "varience=1%",
        ],
    );
    assert_eq!(code, 2);
    assert!(err.contains("unknown term"), "{err}");

    // --update accepts the new result: the baseline becomes its exact bytes.
    let (code, _, _) = run3(
        d,
        &["check", "noisy.json", "--baseline", "base.json", "--update"],
    );
    assert_eq!(code, 0);
    assert_eq!(
        std::fs::read(d.join("base.json")).unwrap(),
        std::fs::read(d.join("noisy.json")).unwrap()
    );
    // ... and creates a missing baseline; without --update a missing baseline is an error.
    let (code, _, err) = run3(d, &["check", "same.json", "--baseline", "new.json"]);
    assert_eq!(code, 2);
    assert!(err.contains("--update"), "{err}");
    let (code, _, _) = run3(
        d,
        &["check", "same.json", "--baseline", "new.json", "--update"],
    );
    assert_eq!(code, 0);
    assert!(d.join("new.json").exists());
}

#[test]
fn command_line_refuses_custom_family() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("c.toml"), SMALL).unwrap();
    for args in [&["run", "c.toml"][..], &["validate", "c.toml"][..]] {
        let (code, _, err) = run3(dir.path(), args);
        assert_eq!(code, 2, "{args:?}");
        assert_eq!(err.lines().count(), 1, "{err}");
        assert!(err.contains("family `custom`"), "{err}");
    }
}

/// Upper tail of the standard normal, `1 − Φ(z)`, from the complementary error function of
/// Abramowitz & Stegun, *Handbook of Mathematical Functions*, eq. 7.1.26 (absolute error of erf
/// below 1.5e-7).
fn normal_upper_tail(z: f64) -> f64 {
    let x = z / std::f64::consts::SQRT_2;
    let t = 1.0 / (1.0 + 0.327_591_1 * x);
    let poly = t
        * (0.254_829_592
            + t * (-0.284_496_736
                + t * (1.421_413_741 + t * (-1.453_152_027 + t * 1.061_405_429))));
    0.5 * poly * (-x * x).exp()
}

/// Smallest k with P(X > k) ≤ alpha for X ~ Binomial(n, p), by summing the probability mass
/// function (built by the ratio recurrence) from the top.
fn binomial_upper_quantile(n: usize, p: f64, alpha: f64) -> usize {
    let mut pmf = vec![0.0; n + 1];
    pmf[0] = (1.0 - p).powi(n as i32);
    for k in 0..n {
        pmf[k + 1] = pmf[k] * (n - k) as f64 / (k + 1) as f64 * p / (1.0 - p);
    }
    let mut tail = 0.0; // P(X > k)
    for k in (0..=n).rev() {
        if tail > alpha {
            return k + 1;
        }
        tail += pmf[k];
    }
    0
}

// The statistical rule's false alarm rate. 60 pairs of runs of the same estimator with
// independent seeds; each pair gives 3 grid values × 3 terms = 9 one-sided tests at
// sigma = 2 (margin 0, so only the statistical rule acts). Under the null each test flags
// "worse" with probability p = 1 − Φ(2) ≈ 0.02275 (one-sided normal tail; no Bonferroni
// correction: this is the per-term rate). The count of false flags is asserted below the
// 1 − 1e-6 quantile of Binomial(540, p); the runs use fixed seeds, so the test is deterministic.
#[test]
fn false_alarm_rate_is_at_most_nominal() {
    let pairs = 60u64;
    let sigma = 2.0;
    let opts = CheckOptions {
        sigma,
        margin: 0.0,
        term_margins: Vec::new(),
    };
    let mut tests = 0usize;
    let mut worse = 0usize;
    let mut better = 0usize;
    for i in 0..pairs {
        let a = run(NadarayaWatson::default(), SMALL, Some(1000 + 2 * i));
        let b = run(NadarayaWatson::default(), SMALL, Some(1001 + 2 * i));
        let r = check::compare(&b, &a, &opts).unwrap();
        assert!(!r.identical);
        tests += r.comparisons.len();
        worse += r.worse().count();
        better += r
            .comparisons
            .iter()
            .filter(|c| c.verdict == Verdict::Better)
            .count();
    }
    let p = normal_upper_tail(sigma);
    assert!((p - 0.022_750_13).abs() < 1e-6, "Φ table value at 2: {p}");
    let bound = binomial_upper_quantile(tests, p, 1e-6);
    println!(
        "false alarms: {worse} worse and {better} better of {tests} tests; nominal rate {p:.4} \
         (expected {:.1}), bound {bound}",
        tests as f64 * p
    );
    assert!(worse <= bound, "{worse} false 'worse' flags > {bound}");
    assert!(better <= bound, "{better} false 'better' flags > {bound}");
}
