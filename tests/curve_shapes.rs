//! The shapes three shipped demo scenarios are there to show, checked on their own runs (each
//! file's seed and R) with margins of four standard errors taken from the run itself (jackknife
//! over replicate blocks):
//!
//! - `bakery-forest-size` (forest, knob `trees`, two fit seeds): the variance and its fit part
//!   fall with the number of trees, while bias² and `var (data)` do not depend on it (for
//!   exchangeable trees both are the same for any number of trees: Wood et al. 2023, *JMLR*
//!   24(359), and the law of total variance);
//! - `kiln-boost-rounds` (boost, knob `rounds`): the expected loss falls, then rises — its
//!   minimum is inside the grid and the last round is worse than the minimum;
//! - `roastery-double-descent` (minnorm, knob `features`): the expected loss peaks at p ≈ n, the
//!   interpolation threshold (Belkin, Hsu and Xu 2020, *SIAM J. Math. Data Sci.* 2(4), Theorem 1:
//!   for Gaussian inputs the risk is unbounded as p → n from either side), and falls on both
//!   sides of it.
//!
//! A difference between two grid values is judged against `sqrt(se_a² + se_b²)`. The values of
//! one curve share training sets and are positively correlated, so this overstates the standard
//! error of the difference: "exceeds by more than 4 of these" is conservative, and "within 4 of
//! these" is the corresponding check that two values agree.

use std::path::PathBuf;

use lossprism::report::{self, PointRow, ResultDoc};
use lossprism::runner;
use lossprism::scenario::{self, Plan, PlanOptions};

fn run(file: &str) -> (Plan, ResultDoc) {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("scenarios")
        .join(file);
    let plan = scenario::load(&path, &PlanOptions::default()).expect("shipped scenario plans");
    let outcome = runner::run(&plan, 2).expect("shipped scenario runs");
    let doc = report::build(&plan, &outcome);
    (plan, doc)
}

fn se(p: &PointRow, key: &str) -> f64 {
    let s = p
        .se(key)
        .unwrap_or_else(|| panic!("{key} has no standard error"));
    assert!(s.is_finite() && s >= 0.0, "{key}: se {s}");
    s
}

/// `(a − b) / sqrt(se_a² + se_b²)` for term `key` at two grid values.
fn z(a: &PointRow, b: &PointRow, key: &str) -> f64 {
    (a.get(key) - b.get(key)) / se(a, key).hypot(se(b, key))
}

#[test]
fn forest_variance_falls_with_trees_and_bias_stays() {
    let (_, doc) = run("bakery-forest-size.toml");
    let pts = &doc.points;
    let (first, last) = (&pts[0], &pts[pts.len() - 1]);
    let zv = z(first, last, "variance");
    let zf = z(first, last, "variance_fit");
    let zb = z(first, last, "bias_sq");
    let zd = z(first, last, "variance_data");
    println!(
        "forest: variance {:.3} -> {:.3} (z {zv:.1}); var (fit) {:.3} -> {:.3} (z {zf:.1}); \
         bias² {:.3} -> {:.3} (z {zb:.2}); var (data) {:.3} -> {:.3} (z {zd:.2})",
        first.get("variance"),
        last.get("variance"),
        first.get("variance_fit"),
        last.get("variance_fit"),
        first.get("bias_sq"),
        last.get("bias_sq"),
        first.get("variance_data"),
        last.get("variance_data"),
    );
    assert!(zv > 4.0, "variance does not fall clearly: z = {zv}");
    assert!(zf > 4.0, "var (fit) does not fall clearly: z = {zf}");
    assert!(
        zb.abs() < 4.0,
        "bias² moves with the number of trees: z = {zb}"
    );
    assert!(
        zd.abs() < 4.0,
        "var (data) moves with the number of trees: z = {zd}"
    );
    // The prefix averages of one forest make neighbouring values strongly correlated: the
    // variance curve itself falls at every step.
    for w in pts.windows(2) {
        assert!(
            w[1].get("variance") < w[0].get("variance"),
            "variance rises from {} to {} trees",
            w[0].value,
            w[1].value
        );
    }
    // The reading says what the variance is made of at both ends.
    assert!(
        doc.reading
            .contains("At trees = 1 the variance is mostly the learner's own randomness"),
        "{}",
        doc.reading
    );
    assert!(
        doc.reading.contains("it is mostly the training data"),
        "{}",
        doc.reading
    );
    assert!(doc.reading.contains("diversity"), "{}", doc.reading);
}

#[test]
fn boosting_rounds_overfit() {
    let (_, doc) = run("kiln-boost-rounds.toml");
    let pts = &doc.points;
    let imin = (0..pts.len())
        .min_by(|&a, &b| pts[a].expected_loss().total_cmp(&pts[b].expected_loss()))
        .unwrap();
    let last = &pts[pts.len() - 1];
    let z_last = z(last, &pts[imin], "expected_loss");
    let z_first = z(&pts[0], &pts[imin], "expected_loss");
    println!(
        "boost: minimum {:.4} ± {:.4} at {} rounds; {} rounds: {:.4} ± {:.4} (z {z_last:.1}); \
         0 rounds: {:.4} (z {z_first:.1})",
        pts[imin].expected_loss(),
        se(&pts[imin], "expected_loss"),
        pts[imin].value,
        last.value,
        last.expected_loss(),
        se(last, "expected_loss"),
        pts[0].expected_loss(),
    );
    assert!(
        imin > 0 && imin + 1 < pts.len(),
        "minimum at the edge of the grid"
    );
    assert!(
        z_last > 4.0,
        "the last round is not clearly worse: z = {z_last}"
    );
    assert!(z_first > 4.0, "round 0 is not clearly worse: z = {z_first}");
}

#[test]
fn minnorm_peaks_at_the_interpolation_threshold() {
    let (plan, doc) = run("roastery-double-descent.toml");
    let n = plan.sizes[plan.sizes.len() - 1] as f64;
    let pts = &doc.points;
    let imax = (0..pts.len())
        .max_by(|&a, &b| pts[a].expected_loss().total_cmp(&pts[b].expected_loss()))
        .unwrap();
    let peak = pts[imax].value;
    println!(
        "minnorm: n = {n}, peak at p = {peak} (expected loss {:.4})",
        pts[imax].expected_loss()
    );
    assert!((peak - n).abs() <= 2.0, "peak at p = {peak}, n = {n}");
    // Either side of the peak, at p = n ∓ 4: the loss (whose variance is finite there for
    // Gaussian inputs, unlike at |p − n| ≤ 3, so the standard error means something) is clearly
    // above the lowest loss on that side, i.e. the curve climbs towards n and descends after it.
    let at = |p: f64| {
        pts.iter()
            .find(|r| r.value == p)
            .unwrap_or_else(|| panic!("p = {p} not on the grid"))
    };
    let (below, above) = (at(n - 4.0), at(n + 4.0));
    let lowest = |side: &dyn Fn(f64) -> bool| {
        pts.iter()
            .filter(|r| side(r.value))
            .min_by(|a, b| a.expected_loss().total_cmp(&b.expected_loss()))
            .unwrap()
    };
    let (left, right) = (lowest(&|p| p < n - 4.0), lowest(&|p| p > n + 4.0));
    let z_left = z(below, left, "expected_loss");
    let z_right = z(above, right, "expected_loss");
    println!(
        "minnorm: p = {}: {:.4} vs lowest left {:.4} at p = {} (z {z_left:.1}); p = {}: {:.4} vs \
         lowest right {:.4} at p = {} (z {z_right:.1})",
        below.value,
        below.expected_loss(),
        left.expected_loss(),
        left.value,
        above.value,
        above.expected_loss(),
        right.expected_loss(),
        right.value
    );
    assert!(z_left > 4.0, "no clear rise before the peak: z = {z_left}");
    assert!(z_right > 4.0, "no clear second descent: z = {z_right}");
}
