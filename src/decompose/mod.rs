//! Pure arithmetic of the decompositions: streaming, mergeable accumulators and the estimators
//! built from them. No I/O, no randomness, no errors: everything here is a function of the
//! predictions handed in.
//!
//! Squared loss (Hastie, Tibshirani, Friedman, *The Elements of Statistical Learning*, 2nd ed.,
//! §7.3, eq. 7.9): `E[(Y - f̂(x))²] = σ²(x) + bias²(x) + variance(x)`. Over R replicate
//! predictions ŷ_r with mean m, the unbiased variance is `V̂ = Σ(ŷ_r - m)²/(R-1)` and the unbiased
//! squared bias is `B̂² = (m - f)² - V̂/R` (the plain `(m - f)²` is biased up by V/R). The exact
//! identity `(1/R) Σ (ŷ_r - f)² = B̂² + V̂` holds to rounding.

pub mod squared;
pub mod table;
pub mod zero_one;

pub use squared::{jackknife_se, SquaredAcc, SquaredPoint, SquaredSummary, SquaredTerms};
