//! Small statistics helpers for calibration tests: the normal tail and binomial quantiles.

/// Upper tail of the standard normal, `1 − Φ(z)`, from the complementary error function of
/// Abramowitz & Stegun, *Handbook of Mathematical Functions*, eq. 7.1.26 (absolute error of erf
/// below 1.5e-7).
pub fn normal_upper_tail(z: f64) -> f64 {
    if z < 0.0 {
        return 1.0 - normal_upper_tail(-z);
    }
    let x = z / std::f64::consts::SQRT_2;
    let t = 1.0 / (1.0 + 0.327_591_1 * x);
    let poly = t
        * (0.254_829_592
            + t * (-0.284_496_736
                + t * (1.421_413_741 + t * (-1.453_152_027 + t * 1.061_405_429))));
    0.5 * poly * (-x * x).exp()
}

/// The probability mass function of Binomial(n, p), built by the ratio recurrence.
pub fn binomial_pmf(n: usize, p: f64) -> Vec<f64> {
    let mut pmf = vec![0.0; n + 1];
    pmf[0] = (1.0 - p).powi(n as i32);
    for k in 0..n {
        pmf[k + 1] = pmf[k] * (n - k) as f64 / (k + 1) as f64 * p / (1.0 - p);
    }
    pmf
}

/// Smallest c with P(X ≥ c) < alpha for X ~ Binomial(n, p): a count of c or more has
/// probability below alpha, so a correct rule never reaches it except with that probability.
pub fn binomial_reject_at(n: usize, p: f64, alpha: f64) -> usize {
    let pmf = binomial_pmf(n, p);
    let mut tail = 0.0; // P(X ≥ c) for c from n down
    for c in (0..=n).rev() {
        tail += pmf[c];
        if tail >= alpha {
            return c + 1;
        }
    }
    0
}

/// Two-sided interval `[lo, hi]` with P(X < lo) < alpha/2 and P(X > hi) < alpha/2 for
/// X ~ Binomial(n, p).
pub fn binomial_interval(n: usize, p: f64, alpha: f64) -> (usize, usize) {
    let pmf = binomial_pmf(n, p);
    let mut lo = 0;
    let mut below = 0.0;
    while lo <= n && below + pmf[lo] < alpha / 2.0 {
        below += pmf[lo];
        lo += 1;
    }
    let mut hi = n;
    let mut above = 0.0;
    while hi > 0 && above + pmf[hi] < alpha / 2.0 {
        above += pmf[hi];
        hi -= 1;
    }
    (lo, hi)
}

/// Mean and sample standard deviation.
pub fn mean_sd(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let m = v.iter().sum::<f64>() / n;
    let s2 = v.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (n - 1.0);
    (m, s2.sqrt())
}
