//! Noise shapes (`[data.noise] shape`): Student's t noise has the variance the scenario states
//! and the tails of its law (checked against the closed-form t CDF), and a scenario that asks for
//! a shape wrongly gets one line naming its key. The twin's resampled residuals are checked in
//! `tests/twin.rs`; the k-NN closed form under Student noise in `tests/closed_forms.rs`.

use std::path::Path;

use lossprism::dgp::{add_shaped_noise, standardized_residuals, NoiseShape};
use lossprism::scenario::{parse, Plan, PlanOptions};
use ndarray::Array1;
use rand::SeedableRng;

/// The CDF of Student's t with 5 degrees of freedom at `t`: for odd ν the closed form
/// `F(t) = 1/2 + (θ + sin θ cos θ (1 + (2/3) cos² θ)) / π` with `θ = atan(t/√5)`
/// (Abramowitz and Stegun 1964, eq. 26.7.3; from memory, so it is checked below against
/// values of the t table).
fn t5_cdf(t: f64) -> f64 {
    let th = (t / 5f64.sqrt()).atan();
    let c = th.cos();
    0.5 + (th + th.sin() * c * (1.0 + 2.0 / 3.0 * c * c)) / std::f64::consts::PI
}

#[test]
fn the_t5_cdf_matches_the_t_table() {
    // Upper quantiles of t with 5 degrees of freedom, as printed in any t table (from memory):
    // 0.95 → 2.015, 0.975 → 2.571, 0.99 → 3.365, 0.995 → 4.032.
    for (q, t) in [(0.95, 2.015), (0.975, 2.571), (0.99, 3.365), (0.995, 4.032)] {
        assert!(
            (t5_cdf(t) - q).abs() < 2e-4,
            "F({t}) = {} vs {q}",
            t5_cdf(t)
        );
    }
    assert!((t5_cdf(0.0) - 0.5).abs() < 1e-15);
}

#[test]
fn student_noise_has_the_stated_variance_and_t_tails() {
    let n = 400_000;
    let sd = 2.0;
    let f = Array1::zeros(n);
    let s = Array1::from_elem(n, sd);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
    let y = add_shaped_noise(&f, &s, &NoiseShape::Student(5.0), &mut rng);
    let nf = n as f64;
    let mean = y.sum() / nf;
    let var = y.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (nf - 1.0);
    let m4 = y.iter().map(|v| (v - mean).powi(4)).sum::<f64>() / nf;
    // SE of the sample variance: sqrt((m4 − var²)/n) (large-sample form).
    let var_se = ((m4 - var * var) / nf).sqrt();
    assert!(
        (var - sd * sd).abs() < 4.0 * var_se,
        "variance {var} vs {} (SE {var_se})",
        sd * sd
    );
    assert!(mean.abs() < 4.0 * sd / nf.sqrt(), "mean {mean}");
    // Tail share beyond 3 sd: the scaled t's is P(|T5| > 3·√(5/3)); a binomial SE.
    let cut = 3.0 * (5.0f64 / 3.0).sqrt();
    let exact = 2.0 * (1.0 - t5_cdf(cut));
    let share = y.iter().filter(|v| v.abs() > 3.0 * sd).count() as f64 / nf;
    let se = (exact * (1.0 - exact) / nf).sqrt();
    assert!(
        (share - exact).abs() < 4.0 * se,
        "tail share {share} vs {exact} (SE {se})"
    );
    // A Gaussian's share there is 0.0027: the t's (about 0.0117) is far from it.
    assert!(exact > 0.01, "{exact}");
}

#[test]
fn resampled_noise_draws_only_pool_values_and_the_pool_is_standardized() {
    let y = [3.0, 1.0, 4.0, 1.0, 5.0, 9.0, 2.0, 6.0];
    let f = [2.0; 8];
    let pool = standardized_residuals(&y, &f, &[1.0; 8]).unwrap();
    let n = pool.len() as f64;
    let mean = pool.iter().sum::<f64>() / n;
    let ms = pool.iter().map(|v| v * v).sum::<f64>() / n;
    assert!(
        mean.abs() < 1e-15 && (ms - 1.0).abs() < 1e-14,
        "{mean} {ms}"
    );
    // Rows with no noise (s = 0) are left out; a divided residual keeps its standardized value.
    let some = standardized_residuals(&[1.0, 5.0, 3.0], &[0.0; 3], &[1.0, 0.0, 1.0]).unwrap();
    assert_eq!(some, vec![-1.0, 1.0]);
    let shape = NoiseShape::Resampled(std::sync::Arc::new(pool.clone()));
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(1);
    let out = add_shaped_noise(
        &Array1::zeros(2000),
        &Array1::from_elem(2000, 1.0),
        &shape,
        &mut rng,
    );
    assert!(out.iter().all(|v| pool.contains(v)));
    // Every pool value is drawn (each has probability 1/8 per draw).
    assert!(pool.iter().all(|p| out.iter().any(|v| v == p)));
    // No spread, or fewer than two rows with noise: refused.
    assert!(standardized_residuals(&[2.0; 4], &[1.0; 4], &[1.0; 4]).is_err());
    assert!(standardized_residuals(&[2.0, 3.0], &[1.0; 2], &[1.0, 0.0]).is_err());
}

const BASE: &str = r#"
name = "shape-errors"
seed = 1
replicates = 10
[data]
source = "synthetic"
train_size = 40
eval_size = 20
[[data.inputs]]
name = "a"
uniform = [0.0, 1.0]
[data.truth]
formula = "2*a"
[data.noise]
"#;

fn plan_error(noise: &str) -> String {
    let src = format!("{BASE}{noise}\n[model]\nfamily = \"knn\"\ngrid = [1, 3]\n");
    let spec = match parse(&src, "s.toml") {
        Ok(s) => s,
        Err(e) => return e.to_string(),
    };
    match Plan::from_spec(
        &spec,
        &src,
        "s.toml",
        Path::new("."),
        &PlanOptions::default(),
    ) {
        Ok(_) => String::new(),
        Err(e) => e.to_string(),
    }
}

#[test]
fn wrong_shapes_are_refused_at_their_key() {
    for (noise, key, needle) in [
        (
            "sd = 1\nshape = \"cauchy\"",
            "data.noise.shape",
            "unknown shape `cauchy`",
        ),
        ("sd = 1\nshape = \"student\"", "data.noise.df", "needs `df`"),
        (
            "sd = 1\nshape = \"student\"\ndf = 2",
            "data.noise.df",
            "fourth moment is infinite",
        ),
        // A finite variance but an infinite fourth moment: the standard errors undercover.
        (
            "sd = 1\nshape = \"student\"\ndf = 3",
            "data.noise.df",
            "must be a number in (4, 1e6]",
        ),
        (
            "sd = 1\nshape = \"student\"\ndf = nan",
            "data.noise.df",
            "got NaN",
        ),
        (
            "sd = 1\ndf = 4",
            "data.noise.df",
            "belongs to `shape = \"student\"`",
        ),
        (
            "sd = 1\nshape = \"gaussian\"\ndf = 4",
            "data.noise.df",
            "remove `df`",
        ),
        ("sd = 1\nshape = \"residuals\"", "data.noise.shape", "twin"),
        (
            "poisson = true\nshape = \"student\"\ndf = 5",
            "data.noise.shape",
            "Poisson",
        ),
    ] {
        let e = plan_error(noise);
        assert!(e.contains(key) && e.contains(needle), "{noise}: {e}");
        assert!(e.contains("s.toml") && !e.contains('\n'), "{noise}: {e}");
    }
    // Accepted: a Student shape with a finite-variance df, and an explicit Gaussian.
    assert_eq!(plan_error("sd = 1\nshape = \"student\"\ndf = 4.5"), "");
    assert_eq!(plan_error("sd = 1\nshape = \"gaussian\""), "");
}
