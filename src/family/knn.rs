//! The k-nearest-neighbour family (`knn`, knob `k`): exact Euclidean neighbour search, one sorted
//! neighbour list per evaluation point serving every `k` of the grid.
//!
//! # Prediction
//!
//! - **Regression**: the mean of the responses of the `k` nearest training rows.
//! - **Classification**: the class with the most votes among the `k` nearest training rows.
//!
//! # Distances
//!
//! Distances are Euclidean; squared distances are compared (the square root is never taken).
//! By default ([`KnnFamily::default`], `standardize = false`) they are computed on the raw inputs,
//! so an input measured on a larger scale weighs more. With `standardize = true` every input
//! column is centred and divided by its training mean and population standard deviation
//! (divisor `n`) before any distance is computed; the evaluation inputs are transformed with the
//! *training* statistics. A column that is constant in the training set is left unscaled.
//!
//! # Tie rules (deterministic results)
//!
//! - **Distance ties**: neighbours are ordered by the key (squared distance, training row index),
//!   so of two training rows at exactly the same distance the earlier row (smaller index) comes
//!   first, and it is the one kept when the tie straddles the `k`-th place.
//! - **Vote ties** (classification): among the classes tied for the most votes in the first `k`
//!   neighbours, the prediction is the class of the nearest neighbour (in the order above) that
//!   belongs to one of the tied classes.
//!
//! # Input order
//!
//! Permuting the input columns (of training and evaluation inputs alike) leaves the model
//! unchanged: distances and the standardization are per column and symmetric in the columns. Only
//! the order in which squared differences are summed changes, which moves distances by rounding;
//! that can reorder two neighbours only when their distances agree to the last bits. Exact distance
//! ties are broken by training **row**, never by column (checked in `tests/permutation.rs`).
//!
//! # Path fit
//!
//! For every evaluation point the `K = max(grid)` nearest neighbours are found once (exact search:
//! all squared distances, a linear-time selection of the `K` smallest keys above, a sort of those
//! `K`), then the prediction for every `k` of the grid is read off running sums (regression) or
//! running vote counts with a running leader (classification). The cost of the whole grid is that
//! of one fit at `K`.

use std::borrow::Cow;
use std::sync::Arc;

use super::neighbours::{contiguous, index_of, NeighbourIndex, Scratch};
use super::{
    check_out, check_whole_grid, smoothed_shares, BuildContext, Caps, Family, FitError, FitInput,
    OptionError, Options, Out, Task,
};

pub use super::neighbours::neighbours;

/// k-nearest-neighbour regression and classification, knob `k` (whole numbers `1..=n_train`).
///
/// See the [module documentation](self) for the distance, standardisation and tie rules.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct KnnFamily {
    /// Standardise each input by the training mean and population standard deviation before
    /// computing distances. Default `false`: distances on the raw inputs.
    pub standardize: bool,
    /// Add-α smoothing of the neighbour class shares given as probabilities:
    /// `q_c = (count_c + α) / (k + K α)` (default 0: the plain shares).
    pub alpha: f64,
}

/// Builds `family = "knn"` from its options (`standardize`, `alpha`).
pub fn build(opts: &mut Options, cx: &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError> {
    let mut k = KnnFamily::default();
    if let Some(s) = opts.boolean("standardize")? {
        k.standardize = s;
    }
    if let Some(a) = opts.number("alpha", 0.0, 1e6)? {
        cx.probabilities_only("alpha", "it smooths the neighbour class shares")?;
        k.alpha = a;
    }
    Ok(Arc::new(k))
}

/// Converts the grid to neighbour counts, checking each is a whole number in `1..=n`.
fn grid_ks(grid: &[f64], n: usize) -> Result<Vec<usize>, String> {
    check_k_values(grid, n)?;
    Ok(grid.iter().map(|&v| v as usize).collect())
}

/// Shared grid check: whole numbers, at least 1, at most the training size.
fn check_k_values(grid: &[f64], n_train: usize) -> Result<(), String> {
    if grid.is_empty() {
        return Err("the grid of k is empty".to_string());
    }
    for &v in grid {
        if v.is_finite() && v.fract() == 0.0 && v > n_train as f64 {
            return Err(format!("k = {v} exceeds the training size {n_train}"));
        }
        check_whole_grid(&[v], "k", 1.0, n_train as f64)?;
    }
    Ok(())
}

impl Family for KnnFamily {
    fn standardizes_inputs(&self) -> bool {
        self.standardize
    }

    fn name(&self) -> &'static str {
        "knn"
    }

    fn zero_probability_remedy(&self) -> &'static str {
        "smooth the class shares with add-α: set `alpha` in [model] (key `model.alpha`), or raise it, to 0.5 for example"
    }

    fn knob(&self) -> &'static str {
        "k"
    }

    fn check_grid(&self, grid: &[f64], n_train: usize, _n_inputs: usize) -> Result<(), String> {
        check_k_values(grid, n_train)
    }

    fn supports(&self, task: Task) -> bool {
        match task {
            Task::Regress => true,
            Task::Classify { classes } => classes >= 1,
        }
    }

    fn larger_is_simpler(&self) -> bool {
        true
    }

    /// The neighbour index (standardized rows, and its k-d tree when one may be built), a copy
    /// of the training rows while it is built, the standardized evaluation points, and the
    /// search's per-row scratch: distances, up to `2n + 1` keys of 16 bytes, bucket counts, and
    /// the responses or class labels.
    fn work_bytes(&self, n: usize, p: usize, m: usize, _grid: &[f64], _task: Task) -> f64 {
        let (n, p, m) = (n as f64, p as f64, m as f64);
        NeighbourIndex::bytes(n as usize, p as usize)
            + 8.0 * (n * p + m * p)
            + 8.0 * n
            + 16.0 * (2.0 * n + 1.0)
            + 8.0 * (n + 2.0)
            + 8.0 * n
    }

    fn caps(&self, task: Task) -> Caps {
        Caps {
            probabilities: matches!(task, Task::Classify { .. }),
            // averages of training responses: never negative on counts
            positive: task == Task::Regress,
            ..Caps::default()
        }
    }

    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        mut out: Out<'_>,
    ) -> Result<(), FitError> {
        let (n, p) = input.x.dim();
        let (m, pe) = input.eval.dim();
        if input.y.len() != n {
            return Err(FitError(format!(
                "knn: {} responses for {n} training rows",
                input.y.len()
            )));
        }
        if pe != p {
            return Err(FitError(format!(
                "knn: evaluation inputs have {pe} columns, training inputs {p}"
            )));
        }
        check_out("knn", &out, grid.len(), m, input.task)?;
        let ks = grid_ks(grid, n).map_err(|e| FitError(format!("knn: {e}")))?;
        if m == 0 {
            return Ok(());
        }
        let kmax = ks.iter().copied().max().unwrap_or(1);

        let finite =
            input.x.iter().all(|v| v.is_finite()) && input.eval.iter().all(|v| v.is_finite());
        if !finite {
            if let Some(((i, j), v)) = input.x.indexed_iter().find(|(_, v)| !v.is_finite()) {
                return Err(FitError(format!(
                    "knn: training input {v} at row {i}, column {j} is not a finite number"
                )));
            }
            if let Some(((i, j), v)) = input.eval.indexed_iter().find(|(_, v)| !v.is_finite()) {
                return Err(FitError(format!(
                    "knn: evaluation input {v} at row {i}, column {j} is not a finite number"
                )));
            }
        }
        // Class labels are validated up front; regression reads y directly.
        let labels: Option<(Vec<usize>, usize)> = match input.task {
            Task::Regress => None,
            Task::Classify { classes } => {
                if classes == 0 {
                    return Err(FitError(
                        "knn: classification needs at least one class".into(),
                    ));
                }
                let mut labels = Vec::with_capacity(n);
                for &c in input.y {
                    if !(c.fract() == 0.0 && c >= 0.0 && c < classes as f64) {
                        return Err(FitError(format!(
                            "knn: class label {c} is not one of the class indices 0 to {} ({classes} classes)",
                            classes - 1
                        )));
                    }
                    labels.push(c as usize);
                }
                Some((labels, classes))
            }
        };
        let y: Cow<'_, [f64]> = match input.y.as_slice() {
            Some(s) => Cow::Borrowed(s),
            None => Cow::Owned(input.y.to_vec()),
        };

        let index = NeighbourIndex::new(input.x, self.standardize);
        let mut eval = contiguous(&input.eval);
        if let Some(s) = index.standardizer() {
            let scaled = eval
                .iter()
                .enumerate()
                .map(|(i, &v)| s.z(i % p, v))
                .collect();
            eval = Cow::Owned(scaled);
        }

        // Scratch reused across evaluation points.
        let mut scratch = Scratch::default();
        // by_rank[j] = prediction using the first j + 1 neighbours.
        let mut by_rank = vec![0.0; kmax];
        let n_classes = labels.as_ref().map_or(0, |l| l.1);
        let mut counts = vec![0usize; n_classes];
        let mut first_seen = vec![0usize; n_classes];
        // Class counts after the first j + 1 neighbours, for probabilities.
        let want_probs = out.probs.is_some();
        let mut counts_by_rank = vec![0.0f64; if want_probs { kmax * n_classes } else { 0 }];
        let mut shares = vec![0.0; n_classes];

        for e in 0..m {
            let query = &eval[e * p..(e + 1) * p];
            let keys = index.nearest_keys(query, kmax, &mut scratch);
            match &labels {
                None => {
                    let mut sum = 0.0;
                    for (j, &kk) in keys.iter().enumerate() {
                        sum += y[index_of(kk)];
                        by_rank[j] = sum / (j + 1) as f64;
                    }
                }
                Some((labels, _)) => {
                    counts.iter_mut().for_each(|c| *c = 0);
                    let mut leader = labels[index_of(keys[0])];
                    for (j, &kk) in keys.iter().enumerate() {
                        let c = labels[index_of(kk)];
                        if counts[c] == 0 {
                            first_seen[c] = j;
                        }
                        counts[c] += 1;
                        // Only class c gained a vote, so the new leader is c or the old leader;
                        // ties go to the class seen first (its nearest neighbour is nearer).
                        if counts[c] > counts[leader]
                            || (counts[c] == counts[leader] && first_seen[c] < first_seen[leader])
                        {
                            leader = c;
                        }
                        by_rank[j] = leader as f64;
                        if want_probs {
                            for (dst, &src) in counts_by_rank[j * n_classes..(j + 1) * n_classes]
                                .iter_mut()
                                .zip(counts.iter())
                            {
                                *dst = src as f64;
                            }
                        }
                    }
                }
            }
            for (g, &k) in ks.iter().enumerate() {
                out.values[[g, e]] = by_rank[k - 1];
                if let Some(pr) = out.probs.as_mut() {
                    let c = &counts_by_rank[(k - 1) * n_classes..k * n_classes];
                    smoothed_shares(c, self.alpha, &mut shares);
                    for (cl, &q) in shares.iter().enumerate() {
                        pr[[g, e, cl]] = q;
                    }
                }
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array1, Array2, ArrayView1, Axis};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Brute-force neighbour order: every squared distance, full sort by (distance, index).
    fn brute_order(x: &Array2<f64>, q: ArrayView1<f64>) -> Vec<usize> {
        let mut d: Vec<(f64, usize)> = x
            .outer_iter()
            .enumerate()
            .map(|(i, r)| (r.iter().zip(q).map(|(a, b)| (a - b) * (a - b)).sum(), i))
            .collect();
        d.sort_by(|a, b| a.0.partial_cmp(&b.0).unwrap().then(a.1.cmp(&b.1)));
        d.into_iter().map(|(_, i)| i).collect()
    }

    /// Brute-force k-NN mean: average of the responses of the first k brute-force neighbours.
    fn brute_mean(x: &Array2<f64>, y: &Array1<f64>, q: ArrayView1<f64>, k: usize) -> f64 {
        let order = brute_order(x, q);
        order[..k].iter().map(|&i| y[i]).sum::<f64>() / k as f64
    }

    /// Brute-force vote: counts over the first k neighbours, ties to the class of the nearest
    /// neighbour among the tied classes.
    fn brute_vote(
        x: &Array2<f64>,
        y: &Array1<f64>,
        q: ArrayView1<f64>,
        k: usize,
        classes: usize,
    ) -> f64 {
        let order = brute_order(x, q);
        let mut counts = vec![0usize; classes];
        for &i in &order[..k] {
            counts[y[i] as usize] += 1;
        }
        let best = *counts.iter().max().unwrap();
        let winner = order[..k]
            .iter()
            .map(|&i| y[i] as usize)
            .find(|&c| counts[c] == best)
            .unwrap();
        winner as f64
    }

    fn run(
        fam: KnnFamily,
        x: &Array2<f64>,
        y: &Array1<f64>,
        eval: &Array2<f64>,
        task: Task,
        grid: &[f64],
    ) -> Array2<f64> {
        let mut out = Array2::zeros((grid.len(), eval.nrows()));
        let input = FitInput {
            x: x.view(),
            y: y.view(),
            eval: eval.view(),
            task,
            seed: crate::rng::FitSeed::fixed(0),
        };
        fam.fit_predict(&input, grid, crate::family::Out::values(out.view_mut()))
            .unwrap();
        out
    }

    fn full_grid(n: usize) -> Vec<f64> {
        (1..=n).map(|k| k as f64).collect()
    }

    /// Fixed-design regression data: y = f(x) + Gaussian-ish noise.
    fn noisy(x: &Array2<f64>, rng: &mut ChaCha8Rng) -> Array1<f64> {
        x.outer_iter()
            .map(|r| r.iter().map(|v| (0.7 * v).sin()).sum::<f64>() + rng.gen_range(-0.5..0.5))
            .collect()
    }

    // ESL 2nd ed. eq. 7.10 (fixed design, evaluation at the training inputs): the k-NN fit at x0
    // is the mean of y over the k nearest neighbours of x0. Checked against a brute-force full
    // sort, 1-D, evenly spaced inputs (exact distance ties), queries at the training points and
    // at midpoints (two neighbours at exactly the same distance).
    #[test]
    fn regression_1d_matches_brute_force_with_ties() {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let n = 21;
        let x = Array2::from_shape_fn((n, 1), |(i, _)| 0.25 * i as f64);
        let y = noisy(&x, &mut rng);
        let mut eval_rows: Vec<f64> = x.iter().copied().collect();
        eval_rows.extend([0.125, 1.375, 2.5 + 0.125, 4.875, -1.0, 6.0]);
        let eval = Array2::from_shape_vec((eval_rows.len(), 1), eval_rows).unwrap();
        let grid = full_grid(n);
        let out = run(KnnFamily::default(), &x, &y, &eval, Task::Regress, &grid);
        for (e, q) in eval.outer_iter().enumerate() {
            for k in 1..=n {
                let want = brute_mean(&x, &y, q, k);
                assert!((out[[k - 1, e]] - want).abs() <= 1e-12, "e={e} k={k}");
            }
        }
    }

    // Exact identity with the full sort by (distance, row): many interleaved, unequal but very
    // close distances share one fine bucket (the insertion sort runs out of budget and the
    // comparison sort finishes), next to exact ties and far rows.
    #[test]
    fn bucketed_search_matches_full_sort_on_near_ties() {
        // 150 rows at each of the two close distances, interleaved: about 150²/2 = 11 250 moves,
        // over the budget of 16 × 450 + 64 for the 450 candidates.
        let n = 600;
        let x = Array2::from_shape_fn((n, 1), |(i, _)| match i % 4 {
            0 => 1.0,
            1 => 1.0 + 1e-9,
            2 => 2.0,
            _ => 50.0 + i as f64,
        });
        let q = ndarray::arr1(&[0.0]);
        let full = brute_order(&x, q.view());
        for k in [1, 2, 50, 150, 300, 450, 600] {
            assert_eq!(
                neighbours(x.view(), q.view(), k),
                full[..k].to_vec(),
                "k={k}"
            );
        }
    }

    // ESL 2nd ed. eq. 7.10 again, 3-D inputs on an integer lattice (many exact distance ties),
    // queries at the training points and at half-integer points.
    #[test]
    fn regression_3d_matches_brute_force_with_ties() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let mut rows = Vec::new();
        for a in 0..3 {
            for b in 0..3 {
                for c in 0..3 {
                    rows.extend([a as f64, b as f64, c as f64]);
                }
            }
        }
        for _ in 0..13 {
            rows.extend((0..3).map(|_| rng.gen_range(0..4) as f64));
        }
        let n = rows.len() / 3;
        let x = Array2::from_shape_vec((n, 3), rows).unwrap();
        let y = noisy(&x, &mut rng);
        let mut eval = x.clone();
        let extra = Array2::from_shape_fn((10, 3), |_| rng.gen_range(0..7) as f64 * 0.5 - 0.5);
        eval.append(Axis(0), extra.view()).unwrap();
        let grid = full_grid(n);
        let out = run(KnnFamily::default(), &x, &y, &eval, Task::Regress, &grid);
        for (e, q) in eval.outer_iter().enumerate() {
            let order = brute_order(&x, q);
            assert_eq!(neighbours(x.view(), q, n), order, "neighbour order e={e}");
            for k in 1..=n {
                let want = brute_mean(&x, &y, q, k);
                assert!((out[[k - 1, e]] - want).abs() <= 1e-12, "e={e} k={k}");
            }
        }
    }

    // Exact identities: k = 1 at a (distinct) training point returns its own y; k = n returns
    // mean(y) at every evaluation point.
    #[test]
    fn k1_and_kn_identities() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let n = 40;
        let x = Array2::from_shape_fn((n, 2), |_| rng.gen_range(-1.0..1.0));
        let y = noisy(&x, &mut rng);
        let mut eval = x.clone();
        let extra = Array2::from_shape_fn((15, 2), |_| rng.gen_range(-2.0..2.0));
        eval.append(Axis(0), extra.view()).unwrap();
        let mean = y.sum() / n as f64;
        for standardize in [false, true] {
            let out = run(
                KnnFamily {
                    standardize,
                    alpha: 0.0,
                },
                &x,
                &y,
                &eval,
                Task::Regress,
                &[1.0, n as f64],
            );
            for i in 0..n {
                assert_eq!(out[[0, i]], y[i]);
            }
            for e in 0..eval.nrows() {
                assert!((out[[1, e]] - mean).abs() <= 1e-12);
            }
        }
    }

    // Hand-made vote ties showing both tie rules.
    #[test]
    fn vote_ties_go_to_the_nearest_neighbours_class() {
        // Query at 0: neighbours in order rows 0 (class 1), 1 (class 0), 2 (class 0), 3 (class 1).
        let x = Array2::from_shape_vec((4, 1), vec![0.0, 1.0, 2.0, 3.0]).unwrap();
        let y = Array1::from(vec![1.0, 0.0, 0.0, 1.0]);
        let eval = Array2::from_shape_vec((1, 1), vec![0.0]).unwrap();
        let task = Task::Classify { classes: 2 };
        let out = run(
            KnnFamily::default(),
            &x,
            &y,
            &eval,
            task,
            &[1.0, 2.0, 3.0, 4.0],
        );
        // k=2: 1-1 tie -> class of the nearest (1), not the smallest class index (0).
        // k=3: class 0 has 2 votes. k=4: 2-2 tie -> class 1 again.
        assert_eq!(out.column(0).to_vec(), vec![1.0, 1.0, 0.0, 1.0]);

        // Distance tie: query 1.5 is equidistant from rows 0 (x=2) and 1 (x=1); row 0 comes first.
        let x = Array2::from_shape_vec((3, 1), vec![2.0, 1.0, 5.0]).unwrap();
        let eval = Array2::from_shape_vec((1, 1), vec![1.5]).unwrap();
        assert_eq!(neighbours(x.view(), eval.row(0), 3), vec![0, 1, 2]);
        let y = Array1::from(vec![0.0, 1.0, 1.0]);
        let out = run(KnnFamily::default(), &x, &y, &eval, task, &[1.0, 2.0, 3.0]);
        assert_eq!(out.column(0).to_vec(), vec![0.0, 0.0, 1.0]);
        let y = Array1::from(vec![1.0, 0.0, 0.0]);
        let out = run(KnnFamily::default(), &x, &y, &eval, task, &[1.0, 2.0, 3.0]);
        assert_eq!(out.column(0).to_vec(), vec![1.0, 1.0, 0.0]);
    }

    // Votes against a brute-force full sort on random data (coordinates rounded to one decimal
    // so that distance and vote ties occur), every k in 1..=15.
    #[test]
    fn classification_matches_brute_force() {
        let mut rng = ChaCha8Rng::seed_from_u64(19);
        let (n, classes) = (60, 3);
        let x = Array2::from_shape_fn((n, 2), |_| {
            (rng.gen_range(0.0..1.0f64) * 10.0).round() / 10.0
        });
        let y: Array1<f64> = (0..n).map(|_| rng.gen_range(0..classes) as f64).collect();
        let eval = Array2::from_shape_fn((50, 2), |_| {
            (rng.gen_range(0.0..1.0f64) * 20.0).round() / 20.0
        });
        let grid = full_grid(15);
        let out = run(
            KnnFamily::default(),
            &x,
            &y,
            &eval,
            Task::Classify { classes },
            &grid,
        );
        for (e, q) in eval.outer_iter().enumerate() {
            for k in 1..=15 {
                assert_eq!(
                    out[[k - 1, e]],
                    brute_vote(&x, &y, q, k, classes),
                    "e={e} k={k}"
                );
            }
        }
    }

    // Path fit equals separate fits: the grid [1, 3, 5, 9] gives bit-identical predictions to four
    // single-value grids, for both tasks and both scalings; an unsorted grid gives the same rows.
    #[test]
    fn path_equals_fresh_fits() {
        let mut rng = ChaCha8Rng::seed_from_u64(23);
        let n = 30;
        let x = Array2::from_shape_fn((n, 3), |(_, j)| {
            rng.gen_range(0.0..1.0) * (1 + 10 * j) as f64
        });
        let yr = noisy(&x, &mut rng);
        let yc: Array1<f64> = (0..n).map(|_| rng.gen_range(0..4) as f64).collect();
        let eval = Array2::from_shape_fn((25, 3), |(_, j)| {
            rng.gen_range(0.0..1.0) * (1 + 10 * j) as f64
        });
        let grid = [1.0, 3.0, 5.0, 9.0];
        for standardize in [false, true] {
            let fam = KnnFamily {
                standardize,
                alpha: 0.0,
            };
            for (task, y) in [(Task::Regress, &yr), (Task::Classify { classes: 4 }, &yc)] {
                let path = run(fam, &x, y, &eval, task, &grid);
                for (g, &k) in grid.iter().enumerate() {
                    let fresh = run(fam, &x, y, &eval, task, &[k]);
                    assert_eq!(path.row(g), fresh.row(0));
                }
                let shuffled = run(fam, &x, y, &eval, task, &[5.0, 1.0, 9.0, 3.0]);
                assert_eq!(shuffled.row(0), path.row(2));
                assert_eq!(shuffled.row(3), path.row(1));
            }
        }
    }

    // Standardisation makes predictions invariant to rescaling a column; a constant column is
    // left unscaled (no division by zero) and does not change the neighbours.
    #[test]
    fn standardize_is_scale_invariant_and_handles_constant_columns() {
        let mut rng = ChaCha8Rng::seed_from_u64(29);
        let n = 50;
        let x = Array2::from_shape_fn((n, 2), |_| rng.gen_range(0.0..1.0));
        let y = noisy(&x, &mut rng);
        let eval = Array2::from_shape_fn((20, 2), |_| rng.gen_range(0.0..1.0));
        let mut x2 = x.clone();
        let mut eval2 = eval.clone();
        x2.column_mut(1).mapv_inplace(|v| 1000.0 * v + 5.0);
        eval2.column_mut(1).mapv_inplace(|v| 1000.0 * v + 5.0);
        let grid = [1.0, 4.0, 10.0];
        let fam = KnnFamily {
            standardize: true,
            alpha: 0.0,
        };
        let a = run(fam, &x, &y, &eval, Task::Regress, &grid);
        let b = run(fam, &x2, &y, &eval2, Task::Regress, &grid);
        for (u, v) in a.iter().zip(&b) {
            assert!((u - v).abs() <= 1e-12);
        }
        // The raw distance is dominated by the rescaled column, so results differ unstandardised.
        let raw = run(KnnFamily::default(), &x2, &y, &eval2, Task::Regress, &grid);
        assert_ne!(raw, a);

        let mut x3 = Array2::from_elem((n, 3), 0.1);
        x3.slice_mut(ndarray::s![.., ..2]).assign(&x);
        let mut eval3 = Array2::from_elem((20, 3), 0.7);
        eval3.slice_mut(ndarray::s![.., ..2]).assign(&eval);
        let c = run(fam, &x3, &y, &eval3, Task::Regress, &grid);
        for (u, v) in a.iter().zip(&c) {
            assert!((u - v).abs() <= 1e-12);
        }
    }

    // A non-standard-layout view (transposed storage) gives the same predictions.
    #[test]
    fn non_contiguous_views_match() {
        let mut rng = ChaCha8Rng::seed_from_u64(31);
        let x = Array2::from_shape_fn((20, 3), |_| rng.gen_range(0.0..1.0));
        let y = noisy(&x, &mut rng);
        let eval = Array2::from_shape_fn((8, 3), |_| rng.gen_range(0.0..1.0));
        let xt = x.t().to_owned();
        let et = eval.t().to_owned();
        let grid = [1.0, 2.0, 7.0];
        let a = run(KnnFamily::default(), &x, &y, &eval, Task::Regress, &grid);
        let mut b = Array2::zeros((3, 8));
        let input = FitInput {
            x: xt.t(),
            y: y.view(),
            eval: et.t(),
            task: Task::Regress,
            seed: crate::rng::FitSeed::fixed(0),
        };
        KnnFamily::default()
            .fit_predict(&input, &grid, crate::family::Out::values(b.view_mut()))
            .unwrap();
        assert_eq!(a, b);
    }

    #[test]
    fn grid_checks_and_errors() {
        let fam = KnnFamily::default();
        assert_eq!(fam.name(), "knn");
        assert_eq!(fam.knob(), "k");
        assert!(fam.check_grid(&[1.0, 5.0, 50.0], 50, 3).is_ok());
        assert_eq!(
            fam.check_grid(&[1.0, 60.0], 50, 3).unwrap_err(),
            "k = 60 exceeds the training size 50"
        );
        assert!(fam
            .check_grid(&[2.5], 50, 3)
            .unwrap_err()
            .contains("whole number"));
        assert!(fam.check_grid(&[0.0], 50, 3).unwrap_err().contains("k = 0"));
        assert!(fam.check_grid(&[f64::NAN], 50, 3).is_err());
        assert!(fam.check_grid(&[], 50, 3).is_err());

        let x = Array2::from_shape_fn((5, 1), |(i, _)| i as f64);
        let eval = x.clone();
        let mut out = Array2::zeros((1, 5));
        let bad = |y: Array1<f64>, task: Task, grid: &[f64], out: &mut Array2<f64>| {
            let input = FitInput {
                x: x.view(),
                y: y.view(),
                eval: eval.view(),
                task,
                seed: crate::rng::FitSeed::fixed(0),
            };
            fam.fit_predict(&input, grid, crate::family::Out::values(out.view_mut()))
                .unwrap_err()
        };
        let y = Array1::from(vec![0.0, 1.0, 2.0, 1.0, 0.0]);
        let two = Task::Classify { classes: 2 };
        assert!(bad(y.clone(), two, &[1.0], &mut out)
            .0
            .contains("class label 2"));
        assert!(bad(y.clone(), Task::Regress, &[6.0], &mut out)
            .0
            .contains("exceeds"));
        assert!(bad(y.clone(), Task::Regress, &[1.0, 2.0], &mut out)
            .0
            .contains("shape"));
        assert!(bad(Array1::zeros(4), Task::Regress, &[1.0], &mut out)
            .0
            .contains("responses"));
        let mut xn = x.clone();
        xn[[2, 0]] = f64::NAN;
        let input = FitInput {
            x: xn.view(),
            y: y.view(),
            eval: eval.view(),
            task: Task::Regress,
            seed: crate::rng::FitSeed::fixed(0),
        };
        assert!(fam
            .fit_predict(&input, &[1.0], crate::family::Out::values(out.view_mut()))
            .is_err());
    }
}
