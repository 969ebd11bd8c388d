//! Bagged regression trees (Breiman 1996, "Bagging predictors", *Machine Learning*
//! 24:123–140), a candidate reference of a twin, grown with the product's own CART
//! ([`crate::family::tree::TreeFamily`]).
//!
//! Tree `b` is grown without a practical depth limit ([`DEPTH`]) and with
//! `min_samples_leaf = L` on a bootstrap sample of the n rows: n uniform row indices drawn in
//! order from `rng::stream(seed, purpose::TWIN, FOREST_STREAM + b)`; its exact split ties are
//! broken by stream `TIE_STREAM + b` (see the tree family). The prediction is the mean
//! of the B trees. `L` is chosen by the out-of-bag error (each row predicted by the trees whose
//! sample left it out; Breiman 1996, §6), so the forest needs no cross-validation folds. There
//! is no per-split feature subsampling (the product's tree has none; with few inputs bagging and
//! a random forest differ little). A forest is a pure function of (rows, responses, B, L, seed),
//! so a twin scenario that records those refits it bit for bit.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2};
use rand::Rng;

use crate::family::tree::{Tree, TreeFamily};
use crate::family::Task;
use crate::rng::{purpose, stream};

/// Leaf sizes tried by the out-of-bag search.
pub const LEAF_CANDIDATES: [usize; 4] = [2, 5, 10, 20];
/// Trees per forest written by `lossprism twin`.
pub const TREES: usize = 100;
/// Depth the trees are grown to (in practice: until the leaf size stops them).
pub const DEPTH: usize = 64;
/// First index of the forest's bootstrap streams within purpose `TWIN` (index 0 holds the
/// cross-validation folds).
pub const FOREST_STREAM: u64 = 1 << 32;

/// The recipe of a forest.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ForestParams {
    /// Number of trees B.
    pub trees: usize,
    /// Minimum samples per leaf L.
    pub min_leaf: usize,
    /// Seed of the bootstrap samples.
    pub seed: u64,
}

/// A fitted bagged forest.
#[derive(Debug, Clone)]
pub struct Forest {
    trees: Vec<Tree>,
}

/// The bootstrap rows of tree `b`.
fn sample(seed: u64, b: usize, n: usize) -> Vec<usize> {
    let mut rng = stream(seed, purpose::TWIN, FOREST_STREAM + b as u64);
    (0..n).map(|_| rng.gen_range(0..n)).collect()
}

/// First index of the streams that break the trees' exact split ties (tree `b` uses
/// `TIE_STREAM + b`; disjoint from the bootstrap streams).
pub const TIE_STREAM: u64 = 3 << 32;

/// Tree `b` of a forest: grown on `rows` of (`x`, `y`) with leaves of at least `min_leaf`.
fn grow(
    x: ArrayView2<'_, f64>,
    y: &[f64],
    rows: &[usize],
    min_leaf: usize,
    seed: u64,
    b: usize,
) -> Tree {
    let p = x.ncols();
    let mut xb = Array2::zeros((rows.len(), p));
    let mut yb = Array1::zeros(rows.len());
    for (r, &i) in rows.iter().enumerate() {
        xb.row_mut(r).assign(&x.row(i));
        yb[r] = y[i];
    }
    TreeFamily {
        min_samples_leaf: min_leaf,
        ..Default::default()
    }
    .grow(
        xb.view(),
        yb.view(),
        Task::Regress,
        DEPTH,
        &mut stream(seed, purpose::TWIN, TIE_STREAM + b as u64),
    )
    .expect("a table's rows and responses are finite")
}

impl Forest {
    /// Nodes held by all its trees (what [`super::fitted_bytes`] bounds).
    pub fn nodes(&self) -> usize {
        self.trees.iter().map(Tree::n_nodes).sum()
    }

    /// Grows the forest of `params` on rows `x` and responses `y`.
    pub fn fit(x: ArrayView2<'_, f64>, y: &[f64], params: ForestParams) -> Forest {
        let n = y.len();
        let trees = (0..params.trees)
            .map(|b| {
                grow(
                    x,
                    y,
                    &sample(params.seed, b, n),
                    params.min_leaf,
                    params.seed,
                    b,
                )
            })
            .collect();
        Forest { trees }
    }

    /// The prediction at one input row (the mean over trees).
    pub fn predict(&self, row: ArrayView1<'_, f64>) -> f64 {
        let s: f64 = self
            .trees
            .iter()
            .map(|t| t.predict_at_depth(row, DEPTH))
            .sum();
        s / self.trees.len() as f64
    }

    /// The predictions at every row of `x`, equal bit for bit to [`Forest::predict`] row by
    /// row: each row's sum still runs over the trees in order from `-0.0` (the start of `f64`'s
    /// `Sum`), but the trees are the outer loop over blocks of [`ROW_BLOCK`] rows, so a tree's
    /// nodes stay in cache while the block passes through it.
    pub fn predict_rows(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let (n, p) = x.dim();
        let rows = crate::family::neighbours::contiguous(&x);
        let mut out = vec![-0.0f64; n];
        if p == 0 {
            // No inputs: every tree is a single leaf; the row-by-row path gives the same.
            return (0..n).map(|i| self.predict(x.row(i))).collect();
        }
        for (acc, block) in out.chunks_mut(ROW_BLOCK).zip(rows.chunks(ROW_BLOCK * p)) {
            for t in &self.trees {
                t.add_predictions(block, p, DEPTH, acc);
            }
        }
        let b = self.trees.len() as f64;
        out.iter_mut().for_each(|v| *v /= b);
        out
    }
}

/// Rows per block of [`Forest::predict_rows`]: small enough that a block's inputs and sums stay
/// in the first cache levels while every tree passes over them.
const ROW_BLOCK: usize = 512;

/// Out-of-bag predictions of a forest of `trees` trees for every leaf size of
/// [`LEAF_CANDIDATES`] (`out[c][i]`), on the same bootstrap samples (those of `seed`). A row that
/// no tree left out (probability about e^{−B}) gets the whole forest's prediction.
pub fn out_of_bag(x: ArrayView2<'_, f64>, y: &[f64], trees: usize, seed: u64) -> Vec<Vec<f64>> {
    let n = y.len();
    let samples: Vec<Vec<usize>> = (0..trees).map(|b| sample(seed, b, n)).collect();
    LEAF_CANDIDATES
        .iter()
        .map(|&leaf| {
            let mut sum = vec![0.0; n];
            let mut cnt = vec![0usize; n];
            let mut all = vec![0.0; n];
            let mut inbag = vec![false; n];
            for (b, s) in samples.iter().enumerate() {
                let t = grow(x, y, s, leaf, seed, b);
                inbag.iter_mut().for_each(|v| *v = false);
                s.iter().for_each(|&i| inbag[i] = true);
                for i in 0..n {
                    let v = t.predict_at_depth(x.row(i), DEPTH);
                    all[i] += v;
                    if !inbag[i] {
                        sum[i] += v;
                        cnt[i] += 1;
                    }
                }
            }
            (0..n)
                .map(|i| {
                    if cnt[i] > 0 {
                        sum[i] / cnt[i] as f64
                    } else {
                        all[i] / trees as f64
                    }
                })
                .collect()
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn predictions_at_many_rows_equal_the_row_by_row_mean_bit_for_bit() {
        // Trees outer, rows in blocks and lanes: each row's sum still runs over the trees in
        // order from -0.0, so every value equals `predict`'s. 1300 rows: more than two blocks
        // and a remainder of lanes; the table's own rows and points outside its range.
        let x = Array2::from_shape_fn((150, 3), |(i, c)| ((i * (5 + 2 * c)) % 37) as f64 / 37.0);
        let y: Vec<f64> = (0..150)
            .map(|i| (3.0 * x[[i, 0]]).sin() + x[[i, 1]] * x[[i, 2]] + 0.1 * (i % 4) as f64)
            .collect();
        let forest = Forest::fit(
            x.view(),
            &y,
            ForestParams {
                trees: 12,
                min_leaf: 2,
                seed: 9,
            },
        );
        let many = Array2::from_shape_fn((1300, 3), |(i, c)| {
            ((i * (7 + 3 * c)) % 113) as f64 / 100.0 - 0.05
        });
        for pts in [x.view(), many.view()] {
            let batch = forest.predict_rows(pts);
            for (i, row) in pts.rows().into_iter().enumerate() {
                assert_eq!(batch[i].to_bits(), forest.predict(row).to_bits(), "row {i}");
            }
        }
    }
}
