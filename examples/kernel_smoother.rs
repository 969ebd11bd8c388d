//! A custom estimator run through the library API: a Nadaraya–Watson smoother with a Gaussian
//! kernel and a `bandwidth` knob, implementing [`Family`], decomposed on an invented scenario
//! (a temperature probe on a sensor line drifting with the hours since calibration).
//!
//! Run with `cargo run --release --example kernel_smoother`.
//!
//! `tests/check.rs` includes this file as a module and regression-tests the smoother with
//! `lossprism::check`.

use std::sync::Arc;

use lossprism::family::{Family, FitError, FitInput, Out, Task};
use lossprism::{check, harness, report};

/// Nadaraya–Watson kernel regression (Nadaraya 1964; Watson 1964): the prediction at `x0` is
/// `Σ K(‖xᵢ − x0‖ / h) yᵢ / Σ K(‖xᵢ − x0‖ / h)` with the Gaussian kernel `K(u) = exp(−u²/2)`
/// and bandwidth `h` (the knob `bandwidth`; smaller = more complex).
///
/// Work shared across the grid: the squared distances from each evaluation point to the
/// training rows are computed once; the weighted average is then recomputed for every
/// bandwidth, so the cost grows with the grid length (one fit per bandwidth, no path fit).
///
/// `scale` and `jitter` exist to build deliberately changed variants for the regression test:
/// `scale` multiplies every bandwidth, `jitter` adds a deterministic pseudo-random perturbation,
/// uniform on `[−jitter, jitter]` and derived from the training responses, to every prediction
/// (pure extra variance, `jitter²/3`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NadarayaWatson {
    /// Multiplies every bandwidth (1 for the plain smoother).
    pub scale: f64,
    /// Half-width of the prediction perturbation (0 for the plain smoother).
    pub jitter: f64,
}

impl Default for NadarayaWatson {
    fn default() -> Self {
        NadarayaWatson {
            scale: 1.0,
            jitter: 0.0,
        }
    }
}

/// SplitMix64 step (Steele, Lea, Flood 2014): a well-mixed 64-bit hash.
fn splitmix(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

impl Family for NadarayaWatson {
    fn name(&self) -> &'static str {
        "nadaraya_watson"
    }

    fn knob(&self) -> &'static str {
        "bandwidth"
    }

    fn check_grid(&self, grid: &[f64], _n_train: usize, _n_inputs: usize) -> Result<(), String> {
        if grid.is_empty() {
            return Err("the grid of bandwidth is empty".into());
        }
        match grid.iter().find(|h| !(h.is_finite() && **h > 0.0)) {
            Some(h) => Err(format!("bandwidth = {h} must be a positive number")),
            None => Ok(()),
        }
    }

    fn supports(&self, task: Task) -> bool {
        task == Task::Regress
    }

    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        mut out: Out<'_>,
    ) -> Result<(), FitError> {
        let n = input.x.nrows();
        if n == 0 || input.y.len() != n {
            return Err(FitError(format!(
                "{} responses for {n} training rows",
                input.y.len()
            )));
        }
        let seed = input.y.iter().fold(0u64, |h, v| splitmix(h ^ v.to_bits()));
        let mut d2 = vec![0.0; n];
        for (e, q) in input.eval.rows().into_iter().enumerate() {
            for (i, x) in input.x.rows().into_iter().enumerate() {
                d2[i] = x.iter().zip(q.iter()).map(|(a, b)| (a - b) * (a - b)).sum();
            }
            // Weights relative to the nearest row (largest weight exactly 1): no underflow to 0/0.
            let dmin = d2.iter().copied().fold(f64::INFINITY, f64::min);
            for (g, &h) in grid.iter().enumerate() {
                let h = h * self.scale;
                let (mut num, mut den) = (0.0, 0.0);
                for (d, y) in d2.iter().zip(input.y.iter()) {
                    let w = (-(d - dmin) / (2.0 * h * h)).exp();
                    num += w * y;
                    den += w;
                }
                let mut pred = num / den;
                if self.jitter != 0.0 {
                    let r = splitmix(seed ^ ((g as u64) << 32 | e as u64));
                    let u = (r >> 11) as f64 / (1u64 << 53) as f64; // [0, 1)
                    pred += self.jitter * (2.0 * u - 1.0);
                }
                out.values[[g, e]] = pred;
            }
        }
        Ok(())
    }
}

/// The invented scenario: a probe's temperature offset against hours since calibration.
pub const SCENARIO: &str = r#"
name = "sensor-probe-drift"
about = "Invented: a temperature probe's offset drifts with the hours since calibration; a kernel smoother reads it off noisy logs."
seed = 11
replicates = 200

[data]
source = "synthetic"
train_size = 80
eval_size = 60

[[data.inputs]]
name = "hours"
uniform = [0.0, 10.0]

[data.truth]
formula = "0.5 * sin(hours) + 0.05 * hours"

[data.noise]
sd = 0.3

[model]
family = "custom"
grid = { log = [0.05, 3.0], count = 8 }
"#;

#[allow(dead_code)]
fn main() {
    let doc = match harness::run_with_family(SCENARIO, Arc::new(NadarayaWatson::default())) {
        Ok(d) => d,
        Err(e) => {
            eprintln!("error: {e}");
            std::process::exit(2);
        }
    };
    print!("{}", report::terminal::render(&doc));
    // The same estimator, seed and replicates again: bit-identical, so `check` says "identical".
    let again = harness::run_with_family(SCENARIO, Arc::new(NadarayaWatson::default()))
        .expect("the same run succeeds twice");
    let rep = check::compare(&again, &doc, &check::CheckOptions::default()).expect("same scenario");
    print!("\ncheck against itself: {rep}");
}
