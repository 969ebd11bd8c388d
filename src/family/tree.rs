//! The CART decision-tree family (knob `max_depth`): greedy binary splits on one input at a time,
//! grown once to the deepest grid depth and read at every shallower depth.
//!
//! # Splitting rule
//!
//! A node splits on input `j` at threshold `t`; a sample goes left when `x_j <= t`. Candidate
//! thresholds are the midpoints between consecutive distinct sorted values of `x_j` among the
//! node's samples. The split chosen maximises the impurity decrease:
//!
//! - regression: the decrease in the sum of squared errors about the node mean (variance
//!   reduction), found by maximising `s_l²/n_l + s_r²/n_r` where `s` are sums of the responses
//!   centred at the node mean;
//! - classification: the decrease in Gini impurity (default) or in entropy, weighted by the
//!   children's sizes.
//!
//! Node predictions are the mean response (regression) or the majority class, ties broken to the
//! smallest class index (classification).
//!
//! # Tie rule (random, from the fit's stream)
//!
//! For Gini the comparison is done in exact integer arithmetic on class counts (training sets up
//! to 2²¹ rows; above that, in `f64`), so mathematically equal decreases are recognised as ties.
//! Entropy is computed from integer counts through one table, so equal count splits give equal
//! values. For squared error the scores are compared in bins 1e-12 of the node's sum of squared
//! errors wide ([`tie_key`]): the same partition reached through two inputs that order the node's
//! samples in opposite directions is summed in opposite orders, and its two scores could differ
//! in the last bit, which then chose one input every time (an independent re-implementation found
//! it in 0.14–0.25 % of tied nodes); scores in one bin tie.
//!
//! Among the candidates (input, threshold) that tie for the best decrease, one is chosen
//! **uniformly at random** with the fit's own stream ([`TieBreak::Random`], the default). The scan
//! counts, per input, the candidates tied with the best score so far (the counts restart when a
//! strictly better candidate appears); at the end, if `c > 1` candidates tie, one number
//! `u ∈ {0, …, c−1}` is drawn and the input holding the `u`-th tied candidate (in scan order) is
//! scanned once more to find it. The cost stays linear (at most one extra scan of one input per
//! tied node), nothing is drawn unless there is a tie, and the scan loop itself never calls the
//! random stream. (Reservoir sampling inside the scan, replacing the incumbent with probability
//! `1/c` at the `c`-th tie, gives the same distribution but made fully grown trees about 20%
//! slower: ties are frequent in small nodes, and a call in the loop keeps the incumbent score out
//! of registers.) No input position is favoured, so the distribution of
//! the fitted tree does not depend on the order of the input columns; a fixed fit seed still gives
//! a bit-identical tree. Ties are common: in a node of two samples every input that separates them
//! gives the same split, and with discrete inputs or class labels equal counts abound. Because the
//! fit now depends on its seed, [`TreeFamily::caps`] says `stochastic`, and with `fit_seeds ≥ 2`
//! the engine's `variance_fit` is the share of the variance due to tie-breaking alone.
//!
//! [`TieBreak::LowestIndex`] keeps the earlier deterministic rule (lowest input index, then lowest
//! threshold; inputs scanned in index order, thresholds ascending, a candidate replacing the
//! incumbent only if strictly better). It is for library use (tests, reproducing older results):
//! with it a tree depends on the input column order (measured on Friedman #1, relevant inputs
//! first vs last: about 3% of expected loss at depths 8–12).
//!
//! Two things still depend on the column order, at rounding level only: a node's mean response is
//! summed in the sorted order of the first input, and so is the regression criterion's total.
//! They change last bits, which can only matter for candidates whose criteria differ in the last
//! bits anyway.
//!
//! # Inputs tried at a node, and repeated rows (ensembles)
//!
//! [`GrowOptions::max_features`] below the number of inputs makes each node search a random subset
//! of the inputs: inputs are drawn without replacement from the tree's stream until that many
//! inputs *not constant in the node* have been drawn (constant ones have no threshold, as in the
//! usual random-forest implementations). [`GrowOptions::counts`] grows the tree on a sample in
//! which training row `i` appears `counts[i]` times (a bootstrap sample, or a subsample with
//! counts 0/1); the sorted order is read from one [`Presorted`] of the training inputs, so no tree
//! sorts again. A repeated row counts as that many samples everywhere (node means, class counts,
//! `min_samples_leaf`).
//!
//! # When a node is a leaf
//!
//! A node is a leaf when it is at the depth limit, when all its responses are equal, when it holds
//! fewer than `2 × min_samples_leaf` samples, when no threshold leaves at least `min_samples_leaf`
//! samples on each side, or when the best decrease is not strictly positive. "Strictly positive"
//! allows for rounding noise: the decrease must exceed `1e-12 ×` the size of the quantities that
//! cancel in it — the node's sum of squared errors for regression, `n ln n` (the node's size times
//! the log of its size) for entropy. Gini decreases are exact integers and must simply be `> 0`.
//!
//! # Path fit
//!
//! CART's greedy choice at a node depends only on the samples in that node (and the random draws
//! it makes), never on the depth limit, so the tree grown to depth `D` and cut at depth `d < D` is
//! exactly the tree grown with `max_depth = d`, provided every internal node stores its own
//! prediction. The random draws keep this exact: nodes are grown breadth-first and draw from one
//! stream in that order, so the draws of the nodes above depth `d` are the same whatever the
//! depth limit. [`TreeFamily`] therefore
//! grows one tree to the largest grid depth and, for every evaluation point, walks down once,
//! recording the node prediction at every depth; grid value `d` reads the value at
//! `min(d, leaf depth)`.
//!
//! # Speed
//!
//! Each input's sample indices are sorted once at the root; at every split the sorted lists are
//! partitioned stably into the two children (no re-sorting). Nodes live in one flat arena, in
//! breadth-first order.

use std::borrow::Cow;
use std::cmp::Ordering;
use std::sync::Arc;

use ndarray::{ArrayView1, ArrayView2};
use rand::Rng;
use rand_chacha::ChaCha8Rng;

use super::{
    check_out, check_whole_grid, smoothed_shares, BuildContext, Caps, Family, FitError, FitInput,
    OptionError, Options, Out, Task,
};

/// Largest depth a grid may ask for.
const MAX_GRID_DEPTH: usize = 64;

/// Relative tolerance for "the decrease is strictly positive" (regression and entropy).
const REL_TOL: f64 = 1e-12;

/// Width of the bins in which regression split scores are compared, relative to the node's sum
/// of squared errors (see [`tie_key`]).
const TIE_REL: f64 = 1e-12;

/// `2^52 + 2^51`: adding and subtracting it rounds an `f64` below 2^51 in size to the nearest
/// integer (ties to even) in the default rounding mode, in two instructions.
const ROUND_MAGIC: f64 = 6_755_399_441_055_744.0;

/// The bin of a regression split score `score` (in units of the node's sum of squared errors
/// times [`TIE_REL`], `inv_width` being the inverse of that unit): candidates compare by bin, so
/// two splits whose scores are equal in exact arithmetic but differ in their last bits (the same
/// partition of the node reached through two inputs that order its samples in opposite
/// directions, summed in different orders) tie, and are broken at random as every exact tie is.
/// Scores are at most the node's sum of squared errors up to rounding, so the bins stay below
/// about 1e12, where the rounding trick is exact.
#[inline(always)]
fn tie_key(score: f64, inv_width: f64) -> f64 {
    (score * inv_width + ROUND_MAGIC) - ROUND_MAGIC
}

/// Largest training size for which Gini splits are compared in exact integer arithmetic
/// (`n³` must fit in a `u64`).
const EXACT_GINI_MAX_N: usize = 1 << 21;

/// Impurity measure for classification trees.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Criterion {
    /// Gini impurity `1 - Σ_c p_c²` (the default).
    #[default]
    Gini,
    /// Entropy `-Σ_c p_c ln p_c`.
    Entropy,
}

/// The CART decision-tree family; the knob is `max_depth` (whole numbers in `1..=64`, where
/// `max_depth = 1` means a single split).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TreeFamily {
    /// Minimum number of training samples in each child of a split (default 1; 0 acts as 1).
    pub min_samples_leaf: usize,
    /// Impurity measure used when classifying (ignored for regression).
    pub criterion: Criterion,
    /// Add-α smoothing of a node's class shares given as probabilities:
    /// `q_c = (count_c + α) / (n_node + K α)` (default 0: the plain shares).
    pub alpha: f64,
    /// How exactly tied best splits are resolved (default: at random with the fit's stream).
    pub tie_break: TieBreak,
}

/// How a tree resolves exactly tied best splits (see the module docs).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum TieBreak {
    /// Uniformly at random among all tied (input, threshold) candidates, drawn from the fit's
    /// own stream (the default): no input position is favoured.
    #[default]
    Random,
    /// The lowest input index, then the lowest threshold: deterministic, but the result depends
    /// on the order of the input columns. Library use only (for tests and for reproducing results
    /// from before random tie-breaks); scenario files cannot select it.
    LowestIndex,
}

impl Default for TreeFamily {
    fn default() -> Self {
        Self {
            min_samples_leaf: 1,
            criterion: Criterion::Gini,
            alpha: 0.0,
            tie_break: TieBreak::Random,
        }
    }
}

/// Builds `family = "tree"` from its options (`min_samples_leaf`, `criterion`, `alpha`).
pub fn build(opts: &mut Options, cx: &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError> {
    let mut t = TreeFamily::default();
    if let Some(l) = opts.int("min_samples_leaf", 1, 1_000_000_000)? {
        t.min_samples_leaf = l as usize;
    }
    if let Some(c) = opts.choice("criterion", &["gini", "entropy"])? {
        cx.classification_only("criterion", "it is the split criterion of class labels")?;
        t.criterion = if c == "gini" {
            Criterion::Gini
        } else {
            Criterion::Entropy
        };
    }
    if let Some(a) = opts.number("alpha", 0.0, 1e6)? {
        cx.probabilities_only("alpha", "it smooths the leaf class shares")?;
        t.alpha = a;
    }
    Ok(Arc::new(t))
}

/// One node of the flat arena. `left == 0` marks a leaf (the root is never a child); the right
/// child is always `left + 1`.
#[derive(Debug, Clone, Copy)]
struct Node {
    threshold: f64,
    value: f64,
    feature: u32,
    left: u32,
}

/// A fitted decision tree in which every node, internal or leaf, stores its own prediction.
#[derive(Debug, Clone)]
pub struct Tree {
    nodes: Vec<Node>,
    depth: usize,
    n_features: usize,
    /// Classification: class counts of every node's training samples (`node * classes + c`).
    counts: Vec<u32>,
    classes: usize,
}

impl Tree {
    /// Prediction for `row` from the tree cut at `depth` (root depth 0): walks down until a leaf
    /// or until `depth` splits have been taken, and returns that node's value. This equals the
    /// prediction of a tree grown with `max_depth = depth`.
    ///
    /// # Panics
    /// If `row` has fewer entries than the training inputs had columns (a programming error).
    pub fn predict_at_depth(&self, row: ArrayView1<f64>, depth: usize) -> f64 {
        assert!(
            row.len() >= self.n_features,
            "row has {} entries, the tree was grown on {} inputs",
            row.len(),
            self.n_features
        );
        self.walk(|f| row[f], depth)
    }

    /// The value of the node reached from the root by at most `depth` splits, reading input `f`
    /// of the row as `value(f)`.
    #[inline]
    fn walk(&self, value: impl Fn(usize) -> f64, depth: usize) -> f64 {
        let mut node = self.nodes[0];
        let mut d = 0;
        while node.left != 0 && d < depth {
            node =
                self.nodes[node.left as usize + right_offset(value(node.feature as usize), node)];
            d += 1;
        }
        node.value
    }

    /// Adds this tree's prediction, cut at `depth`, for every row of the row-major `rows` (`p`
    /// entries per row) to `acc` (one entry per row). The value added for a row is
    /// [`Tree::predict_at_depth`]'s, bit for bit; a batch keeps one tree's nodes in cache while
    /// all rows pass through it, which is what makes a forest's prediction at many rows fast.
    ///
    /// # Panics
    /// If `p` is smaller than the training inputs' count or `rows.len() != p * acc.len()` (a
    /// programming error).
    pub fn add_predictions(&self, rows: &[f64], p: usize, depth: usize, acc: &mut [f64]) {
        assert!(
            p >= self.n_features && rows.len() == p * acc.len(),
            "{} values for {} rows of {p} inputs, the tree was grown on {} inputs",
            rows.len(),
            acc.len(),
            self.n_features
        );
        let nodes = &self.nodes[..];
        let p = p.max(1);
        // Rows go down in groups of LANES in lock step, a fixed number of steps (the tree's depth
        // or `depth`, whichever is smaller): the lanes' node loads are independent, so the
        // processor overlaps them instead of waiting on one path at a time. A lane at a leaf
        // stays there (a leaf's `left` is 0 and its `feature` 0, a valid input), so every row
        // ends on the node the one-row walk reaches.
        const LANES: usize = 8;
        let steps = depth.min(self.depth);
        let mut groups = rows.chunks_exact(p * LANES);
        let mut sums = acc.chunks_exact_mut(LANES);
        for (group, a) in (&mut groups).zip(&mut sums) {
            let mut at = [0u32; LANES];
            for _ in 0..steps {
                for (l, i) in at.iter_mut().enumerate() {
                    let node = nodes[*i as usize];
                    let v = group[l * p + node.feature as usize];
                    let next = node.left + right_offset(v, node) as u32;
                    *i = if node.left != 0 { next } else { *i };
                }
            }
            for (s, &i) in a.iter_mut().zip(&at) {
                *s += nodes[i as usize].value;
            }
        }
        for (a, row) in sums
            .into_remainder()
            .iter_mut()
            .zip(groups.remainder().chunks_exact(p))
        {
            *a += self.walk(|f| row[f], depth);
        }
    }

    /// Number of nodes (internal and leaves).
    pub fn n_nodes(&self) -> usize {
        self.nodes.len()
    }

    /// Depth of the deepest leaf (0 for a tree that is a single leaf).
    pub fn depth(&self) -> usize {
        self.depth
    }

    /// Writes into `buf[0..=L]` the node indices along `row`'s path down to depth `max_depth`
    /// and returns `L`, the depth reached. `row` must hold at least `n_features` entries and `buf`
    /// at least `max_depth + 1`.
    #[inline]
    pub fn path_nodes(&self, row: &[f64], max_depth: usize, buf: &mut [u32]) -> usize {
        let nodes = &self.nodes[..];
        let mut node = nodes[0];
        buf[0] = 0;
        let mut d = 0;
        while node.left != 0 && d < max_depth {
            let at = node.left + right_offset(row[node.feature as usize], node) as u32;
            node = nodes[at as usize];
            d += 1;
            buf[d] = at;
        }
        d
    }

    /// Writes into `buf[0..=L]` the node values along `row`'s path down to depth `max_depth` and
    /// returns `L`, the depth reached (the fast path when no class probabilities are needed).
    #[inline]
    pub fn path_values(&self, row: &[f64], max_depth: usize, buf: &mut [f64]) -> usize {
        let nodes = &self.nodes[..];
        let mut node = nodes[0];
        buf[0] = node.value;
        let mut d = 0;
        while node.left != 0 && d < max_depth {
            node = nodes[node.left as usize + right_offset(row[node.feature as usize], node)];
            d += 1;
            buf[d] = node.value;
        }
        d
    }

    /// The prediction stored at node `i` (a mean response, or a majority class index).
    #[inline]
    pub fn node_value(&self, i: u32) -> f64 {
        self.nodes[i as usize].value
    }

    /// Classification: the class counts of node `i`'s training samples (empty for regression).
    #[inline]
    pub fn node_counts(&self, i: u32) -> &[u32] {
        let k = self.classes;
        &self.counts[i as usize * k..(i as usize + 1) * k]
    }

    /// Number of classes of a classification tree (0 for regression).
    pub fn classes(&self) -> usize {
        self.classes
    }
}

/// `y[i]` without a bounds check.
///
/// # Safety
///
/// `i < y.len()`. Holds for a sample id read from the sorted lists when `y.len() == n`: the
/// lists hold sample ids below `n` by construction (see `TreeFamily::grow_from`).
#[inline(always)]
unsafe fn response(y: &[f64], i: u32) -> f64 {
    debug_assert!((i as usize) < y.len());
    *y.get_unchecked(i as usize)
}

/// 0 if `v` goes to `node`'s left child (`v <= threshold`), 1 if right (NaN goes right).
#[inline]
fn right_offset(v: f64, node: Node) -> usize {
    1 - usize::from(v <= node.threshold)
}

/// The best split found at a node: input, number of samples going left, threshold.
#[derive(Debug, Clone, Copy)]
struct Split {
    feature: usize,
    n_left: usize,
    threshold: f64,
}

impl Split {
    /// The split sending the first `k + 1` samples of input `feature`'s sorted node list left,
    /// between the values `a < b`.
    #[inline]
    fn new(feature: usize, k: usize, a: f64, b: f64) -> Split {
        Split {
            feature,
            n_left: k + 1,
            threshold: midpoint(a, b),
        }
    }
}

/// Midpoint between consecutive distinct sorted values `a < b`, guaranteed to satisfy
/// `a <= t < b` so that `x <= t` separates them exactly even when they are adjacent floats.
#[inline]
fn midpoint(a: f64, b: f64) -> f64 {
    let m = 0.5 * a + 0.5 * b;
    if m < b && m >= a {
        m
    } else {
        a
    }
}

/// Order-preserving map from a finite `f64` to `u64` (with -0.0 identified with 0.0).
#[inline]
fn sort_key(v: f64) -> u64 {
    let bits = (v + 0.0).to_bits();
    if bits >> 63 == 1 {
        !bits
    } else {
        bits | (1 << 63)
    }
}

/// The inverse of [`sort_key`]: the value whose key is `key` (`-0.0` comes back as `0.0`).
#[inline]
fn from_sort_key(key: u64) -> f64 {
    f64::from_bits(if key >> 63 == 1 {
        key & !(1 << 63)
    } else {
        !key
    })
}

/// Sorts `pairs` by their `u64` key, stably (pairs with equal keys keep their order): a
/// least-significant-digit radix sort on bytes, skipping the bytes every key shares. `tmp` is
/// scratch of the same length. Linear in the length, where a comparison sort is not.
fn radix_sort_stable(pairs: &mut [(u64, u32)], tmp: &mut [(u64, u32)]) {
    let n = pairs.len();
    let mut hist = [[0usize; 256]; 8];
    for &(k, _) in pairs.iter() {
        for (b, h) in hist.iter_mut().enumerate() {
            h[((k >> (8 * b)) & 0xff) as usize] += 1;
        }
    }
    let mut in_pairs = true;
    for (b, h) in hist.iter_mut().enumerate() {
        if h.contains(&n) {
            continue;
        }
        let mut sum = 0;
        for c in h.iter_mut() {
            let t = *c;
            *c = sum;
            sum += t;
        }
        let scatter = |src: &[(u64, u32)], dst: &mut [(u64, u32)], h: &mut [usize; 256]| {
            for &e in src {
                let d = ((e.0 >> (8 * b)) & 0xff) as usize;
                dst[h[d]] = e;
                h[d] += 1;
            }
        };
        if in_pairs {
            scatter(pairs, tmp, h);
        } else {
            scatter(tmp, pairs, h);
        }
        in_pairs = !in_pairs;
    }
    if !in_pairs {
        pairs.copy_from_slice(&tmp[..n]);
    }
}

/// Responses in the form the split search needs.
enum Target<'a> {
    Regress(&'a [f64]),
    Classify {
        labels: &'a [u32],
        criterion: Criterion,
        /// `k ln k` for `k = 0..=n` (entropy only; empty for Gini).
        xlogx: &'a [f64],
    },
}

/// Training inputs sorted once per input column, shared by every tree grown on the same inputs
/// (the trees of a forest, the rounds of boosting). Growing a tree on a bootstrap sample or a
/// subsample reads the sorted order from here instead of sorting again.
#[derive(Debug, Clone)]
pub struct Presorted {
    n: usize,
    p: usize,
    /// `order[f*n + k]`: the training row at sorted position `k` of input `f` (equal values in
    /// row order).
    order: Vec<u32>,
    /// `val[f*n + k]`: the matching input value (`-0.0` stored as `0.0`).
    val: Vec<f64>,
}

impl Presorted {
    /// Sorts every column of `x` (`n × p`). Errors on an empty training set, non-finite inputs or
    /// more than `u32::MAX` rows or columns.
    pub fn new(x: ArrayView2<f64>) -> Result<Presorted, FitError> {
        let (n, p) = x.dim();
        if n == 0 {
            return Err(FitError("tree: the training set is empty".into()));
        }
        if n >= u32::MAX as usize || p >= u32::MAX as usize {
            return Err(FitError(format!(
                "tree: training set of {n} × {p} is too large"
            )));
        }
        if let Some(((i, j), &v)) = x.indexed_iter().find(|(_, v)| !v.is_finite()) {
            return Err(FitError(format!(
                "tree: input {} of {p} (in scenario or table order) is {v} at training row {i}, not a finite number",
                j + 1
            )));
        }
        let mut order = vec![0u32; n * p];
        let mut val = vec![0.0f64; n * p];
        let mut pairs: Vec<(u64, u32)> = Vec::with_capacity(n);
        let mut radix_tmp: Vec<(u64, u32)> = vec![(0, 0); n];
        for f in 0..p {
            pairs.clear();
            pairs.extend(
                x.column(f)
                    .iter()
                    .enumerate()
                    .map(|(i, &v)| (sort_key(v), i as u32)),
            );
            // Built in index order, so a stable sort by key is the sort by (key, index).
            radix_sort_stable(&mut pairs, &mut radix_tmp);
            // The value comes back from its key (the map is a bijection onto `v + 0.0`), so the
            // column is not read again in sorted, scattered order.
            let (order, val) = (&mut order[f * n..(f + 1) * n], &mut val[f * n..(f + 1) * n]);
            for ((o, v), &(key, i)) in order.iter_mut().zip(val.iter_mut()).zip(&pairs) {
                *o = i;
                *v = from_sort_key(key);
            }
        }
        Ok(Presorted { n, p, order, val })
    }

    /// Number of training rows.
    pub fn rows(&self) -> usize {
        self.n
    }

    /// Number of inputs.
    pub fn inputs(&self) -> usize {
        self.p
    }
}

/// How one tree is grown beyond the family's own settings; ensembles use the last two.
#[derive(Debug, Clone, Copy)]
pub struct GrowOptions<'a> {
    /// Depth limit (root depth 0, so 1 is a single split).
    pub max_depth: usize,
    /// Number of inputs tried at each node (see the module docs); `None`, or a number at least
    /// the number of inputs, tries every input and draws nothing.
    pub max_features: Option<usize>,
    /// How many times each training row enters the tree (a bootstrap sample, or 0/1 for a
    /// subsample); `None`: every row once. A row entered `c` times weighs as `c` rows everywhere,
    /// including `min_samples_leaf`.
    pub counts: Option<&'a [u32]>,
}

impl GrowOptions<'_> {
    /// Every input at every node, every row once, grown to `max_depth`.
    pub fn depth(max_depth: usize) -> GrowOptions<'static> {
        GrowOptions {
            max_depth,
            max_features: None,
            counts: None,
        }
    }
}

/// The candidates tied for the best split found so far at a node, as runs
/// `(position in the node's input list, number of tied candidates of that input)` in scan order.
/// At most one run per input, so the size is bounded by the number of inputs.
#[derive(Debug, Default)]
struct TieRuns {
    runs: Vec<(usize, u64)>,
}

impl TieRuns {
    fn clear(&mut self) {
        self.runs.clear();
    }

    /// A new best candidate (from input position `pos`): the only one so far.
    #[inline]
    fn reset(&mut self, pos: usize) {
        self.runs.clear();
        self.runs.push((pos, 1));
    }

    /// A new best from input position `pos`, attained by `count` of its candidates.
    #[inline]
    fn reset_to(&mut self, pos: usize, count: u64) {
        self.runs.clear();
        self.runs.push((pos, count));
    }

    /// `count` candidates of input position `pos` (a later input) equal to the best.
    #[inline]
    fn add_run(&mut self, pos: usize, count: u64) {
        self.runs.push((pos, count));
    }

    /// Another candidate equal to the best.
    #[inline]
    fn add(&mut self, pos: usize) {
        match self.runs.last_mut() {
            Some(run) if run.0 == pos => run.1 += 1,
            _ => self.runs.push((pos, 1)),
        }
    }

    fn total(&self) -> u64 {
        self.runs.iter().map(|r| r.1).sum()
    }

    /// The input position and rank within that input of tied candidate `pick` (scan order).
    fn locate(&self, mut pick: u64) -> (usize, u64) {
        for &(pos, count) in &self.runs {
            if pick < count {
                return (pos, pick);
            }
            pick -= count;
        }
        unreachable!("pick below the number of tied candidates")
    }
}

/// Scratch and sorted lists shared by the whole growth of one tree.
struct Grower<'a> {
    /// Number of samples (training rows counted with their multiplicity).
    n: usize,
    p: usize,
    /// `idx[f*n + k]`: sample index at sorted position `k` of input `f` (within the node's range).
    idx: Vec<u32>,
    /// `val[f*n + k]`: the matching input value.
    val: Vec<f64>,
    scratch_idx: Vec<u32>,
    scratch_val: Vec<f64>,
    goes_left: Vec<bool>,
    /// Class counts scratch: node counts, left counts.
    counts: Vec<u64>,
    left_counts: Vec<u64>,
    min_leaf: usize,
    target: Target<'a>,
    /// Inputs searched at the current node.
    feats: Vec<usize>,
    /// Inputs tried at each node (`p` = all, no draws).
    max_features: usize,
    /// Scratch permutation for drawing the node's inputs.
    perm: Vec<usize>,
    /// Break exact ties at random (else: lowest input, then lowest threshold).
    random_ties: bool,
    /// Where the candidates tied for the best split are (scratch).
    tie_runs: TieRuns,
    rng: &'a mut ChaCha8Rng,
}

impl TreeFamily {
    /// Grows one tree on `x` (`n × p`) and `y` to depth `max_depth` (root depth 0, so
    /// `max_depth = 1` is one split), breaking exact ties with `rng` (see the module docs; the
    /// family's fit passes its fit stream). Every node stores its prediction, so the result can
    /// be read at any shallower depth with [`Tree::predict_at_depth`].
    ///
    /// Errors on an empty training set, mismatched lengths, non-finite inputs or responses, labels
    /// that are not class indices `0..classes`, or more than `u32::MAX` rows.
    pub fn grow(
        &self,
        x: ArrayView2<f64>,
        y: ArrayView1<f64>,
        task: Task,
        max_depth: usize,
        rng: &mut ChaCha8Rng,
    ) -> Result<Tree, FitError> {
        let pre = Presorted::new(x)?;
        self.grow_from(
            Cow::Owned(pre),
            y,
            task,
            &GrowOptions::depth(max_depth),
            rng,
        )
    }

    /// Grows one tree on presorted inputs with the given [`GrowOptions`]; with
    /// `GrowOptions::depth(d)` this is [`TreeFamily::grow`]. `y` holds one response per training
    /// row. Draws from `rng`, in this order: the inputs tried at each node (only when
    /// `max_features` is below the number of inputs) and the exact ties, node by node in
    /// breadth-first order — so the tree grown to depth `D` and cut at `d` equals the tree grown
    /// to `d` with the same stream.
    pub fn grow_presorted(
        &self,
        pre: &Presorted,
        y: ArrayView1<f64>,
        task: Task,
        opts: &GrowOptions<'_>,
        rng: &mut ChaCha8Rng,
    ) -> Result<Tree, FitError> {
        self.grow_from(Cow::Borrowed(pre), y, task, opts, rng)
    }

    /// [`TreeFamily::grow_presorted`] on sorted lists it may own (then, without row counts, they
    /// become the tree's working lists without a copy).
    fn grow_from(
        &self,
        pre: Cow<'_, Presorted>,
        y: ArrayView1<f64>,
        task: Task,
        opts: &GrowOptions<'_>,
        rng: &mut ChaCha8Rng,
    ) -> Result<Tree, FitError> {
        let (rows, p) = (pre.n, pre.p);
        if y.len() != rows {
            return Err(FitError(format!(
                "tree: {} training rows but {} responses",
                rows,
                y.len()
            )));
        }
        if let Some((i, &v)) = y.iter().enumerate().find(|(_, v)| !v.is_finite()) {
            return Err(FitError(format!(
                "tree: response {v} at training row {i} is not a finite number"
            )));
        }
        if let Task::Classify { classes } = task {
            if classes == 0 || classes > u32::MAX as usize {
                return Err(FitError(format!(
                    "tree: invalid number of classes {classes}"
                )));
            }
            if let Some((i, &v)) = y
                .iter()
                .enumerate()
                .find(|(_, &v)| v < 0.0 || v.fract() != 0.0 || v >= classes as f64)
            {
                return Err(FitError(format!(
                    "tree: label {v} at training row {i} is not a class index 0 to {} ({classes} classes)",
                    classes - 1
                )));
            }
        }

        // Samples: every row once, or row i repeated counts[i] times (sample ids of a row are
        // consecutive and increase with the row, so the expanded sorted lists are sorted by
        // (value, sample id) exactly as if the repeated rows had been sorted afresh).
        let (n, idx, val, yv) = match opts.counts {
            None => {
                let pre = pre.into_owned();
                (rows, pre.order, pre.val, y.to_vec())
            }
            Some(counts) => {
                if counts.len() != rows {
                    return Err(FitError(format!(
                        "tree: {} row counts for {rows} training rows",
                        counts.len()
                    )));
                }
                let total: u64 = counts.iter().map(|&c| u64::from(c)).sum();
                if total == 0 {
                    return Err(FitError("tree: the training sample is empty".into()));
                }
                if total >= u64::from(u32::MAX) {
                    return Err(FitError(format!(
                        "tree: training sample of {total} rows is too large"
                    )));
                }
                let n = total as usize;
                let mut base = Vec::with_capacity(rows);
                let mut yv = Vec::with_capacity(n);
                let mut next = 0u32;
                for (i, &c) in counts.iter().enumerate() {
                    base.push(next);
                    next += c;
                    yv.extend(std::iter::repeat(y[i]).take(c as usize));
                }
                let mut idx = Vec::with_capacity(n * p);
                let mut val = Vec::with_capacity(n * p);
                for f in 0..p {
                    let order = &pre.order[f * rows..(f + 1) * rows];
                    let vals = &pre.val[f * rows..(f + 1) * rows];
                    for (&i, &v) in order.iter().zip(vals) {
                        let (b, c) = (base[i as usize], counts[i as usize]);
                        idx.extend(b..b + c);
                        val.extend(std::iter::repeat(v).take(c as usize));
                    }
                }
                (n, idx, val, yv)
            }
        };

        let labels: Vec<u32>;
        let xlogx: Vec<f64>;
        let target = match task {
            Task::Regress => Target::Regress(&yv),
            Task::Classify { .. } => {
                labels = yv.iter().map(|&v| v as u32).collect();
                xlogx = if self.criterion == Criterion::Entropy {
                    (0..=n)
                        .map(|k| {
                            let k = k as f64;
                            if k > 0.0 {
                                k * k.ln()
                            } else {
                                0.0
                            }
                        })
                        .collect()
                } else {
                    Vec::new()
                };
                Target::Classify {
                    labels: &labels,
                    criterion: self.criterion,
                    xlogx: &xlogx,
                }
            }
        };
        let classes = task.classes();
        let mut g = Grower {
            n,
            p,
            idx,
            val,
            scratch_idx: vec![0; n],
            scratch_val: vec![0.0; n],
            goes_left: vec![false; n],
            counts: vec![0; classes],
            left_counts: vec![0; classes],
            min_leaf: self.min_samples_leaf.max(1),
            target,
            feats: Vec::with_capacity(p),
            max_features: opts.max_features.map_or(p, |m| m.clamp(1, p.max(1))),
            perm: Vec::with_capacity(p),
            random_ties: self.tie_break == TieBreak::Random,
            tie_runs: TieRuns::default(),
            rng,
        };
        Ok(g.grow(opts.max_depth))
    }
}

impl Grower<'_> {
    fn grow(&mut self, max_depth: usize) -> Tree {
        let n = self.n;
        let mut nodes = Vec::with_capacity(64.min(2 * n));
        nodes.push(Node {
            threshold: 0.0,
            value: 0.0,
            feature: 0,
            left: 0,
        });
        let mut tree_depth = 0;
        let classes = self.counts.len();
        let mut counts: Vec<u32> = Vec::new();
        if self.p == 0 {
            // No inputs: a single leaf predicting from all samples.
            self.idx = (0..n as u32).collect();
            let (value, _) = self.node_summary(0, n);
            nodes[0].value = value;
            counts.extend(self.counts.iter().map(|&c| c as u32));
            return Tree {
                nodes,
                depth: 0,
                n_features: 0,
                counts,
                classes,
            };
        }
        // Breadth-first: nodes are processed in arena order, which is level order, so the random
        // draws of the nodes above depth d do not depend on the depth limit. ranges[node] =
        // (start, end, depth).
        let mut ranges: Vec<(u32, u32, u32)> = vec![(0, n as u32, 0)];
        let mut node = 0usize;
        while node < nodes.len() {
            let (start, end, depth) = ranges[node];
            let (start, end, depth) = (start as usize, end as usize, depth as usize);
            tree_depth = tree_depth.max(depth);
            let (value, splittable) = self.node_summary(start, end);
            nodes[node].value = value;
            if classes > 0 {
                let at = node * classes;
                if counts.len() < at + classes {
                    counts.resize(at + classes, 0);
                }
                for (c, &k) in counts[at..at + classes].iter_mut().zip(&self.counts) {
                    *c = k as u32;
                }
            }
            let this = node;
            node += 1;
            let len = end - start;
            let Some(stats) = splittable else { continue };
            if depth >= max_depth || len < 2 * self.min_leaf {
                continue;
            }
            self.choose_features(start, end);
            let Some(split) = self.best_split(start, end, stats) else {
                continue;
            };
            // Children that will not be split (at the depth limit, or too small to hold two
            // leaves) only read input 0's list (their summaries sum in its order): the other
            // lists need not be partitioned for them.
            let final_children = depth + 1 >= max_depth
                || (split.n_left < 2 * self.min_leaf && len - split.n_left < 2 * self.min_leaf);
            self.partition(start, end, split, final_children);
            let left = nodes.len() as u32;
            let blank = Node {
                threshold: 0.0,
                value: 0.0,
                feature: 0,
                left: 0,
            };
            nodes.push(blank);
            nodes.push(blank);
            let nd = &mut nodes[this];
            nd.feature = split.feature as u32;
            nd.threshold = split.threshold;
            nd.left = left;
            let mid = (start + split.n_left) as u32;
            let cd = (depth + 1) as u32;
            ranges.push((start as u32, mid, cd));
            ranges.push((mid, end as u32, cd));
        }
        counts.resize(nodes.len() * classes, 0);
        Tree {
            nodes,
            depth: tree_depth,
            n_features: self.p,
            counts,
            classes,
        }
    }

    /// Fills `self.feats` with the inputs searched at the node `start..end`: every input in index
    /// order when `max_features ≥ p` (no draws); otherwise inputs are drawn without replacement
    /// (a partial Fisher–Yates shuffle from the tree's stream) until `max_features` inputs that
    /// are not constant in the node have been drawn or none is left. Constant inputs have no
    /// threshold, so skipping them only avoids wasting the node's budget on them.
    fn choose_features(&mut self, start: usize, end: usize) {
        self.feats.clear();
        if self.max_features >= self.p {
            self.feats.extend(0..self.p);
            return;
        }
        let n = self.n;
        self.perm.clear();
        self.perm.extend(0..self.p);
        for i in 0..self.p {
            if self.feats.len() >= self.max_features {
                break;
            }
            let j = self.rng.gen_range(i..self.p);
            self.perm.swap(i, j);
            let f = self.perm[i];
            if self.val[f * n + start] != self.val[f * n + end - 1] {
                self.feats.push(f);
            }
        }
    }

    /// Prediction of the node holding sorted positions `start..end`, and `Some(stats)` if the
    /// node is not pure (responses not all equal).
    /// For regression `stats = (mean, sse)`; for classification the node's class counts are left
    /// in `self.counts` and `stats = (0, 0)`.
    fn node_summary(&mut self, start: usize, end: usize) -> (f64, Option<(f64, f64)>) {
        // Summed in input 0's sorted order, which depends only on the node's samples.
        let seg = &self.idx[start..end];
        let len = seg.len();
        match self.target {
            Target::Regress(y) => {
                assert_eq!(y.len(), self.n);
                let first = y[seg[0] as usize];
                let mut sum = 0.0;
                let mut all_equal = true;
                for &i in seg {
                    // SAFETY: `i` is a sample id and `y.len() == n` (asserted above).
                    let v = unsafe { response(y, i) };
                    sum += v;
                    all_equal &= v == first;
                }
                let mean = sum / len as f64;
                if all_equal {
                    return (mean, None);
                }
                let mut sse = 0.0;
                for &i in seg {
                    // SAFETY: as above.
                    let d = unsafe { response(y, i) } - mean;
                    sse += d * d;
                }
                (mean, Some((mean, sse)))
            }
            Target::Classify { labels, .. } => {
                self.counts.iter_mut().for_each(|c| *c = 0);
                for &i in seg {
                    self.counts[labels[i as usize] as usize] += 1;
                }
                let mut best = 0;
                for (c, &k) in self.counts.iter().enumerate() {
                    if k > self.counts[best] {
                        best = c;
                    }
                }
                let pure = self.counts[best] as usize == len;
                (best as f64, if pure { None } else { Some((0.0, 0.0)) })
            }
        }
    }

    fn best_split(&mut self, start: usize, end: usize, stats: (f64, f64)) -> Option<Split> {
        match self.target {
            Target::Regress(y) => self.best_split_regress(y, start, end, stats),
            Target::Classify {
                labels,
                criterion: Criterion::Gini,
                ..
            } => self.best_split_gini(labels, start, end),
            Target::Classify {
                labels,
                criterion: Criterion::Entropy,
                xlogx,
                ..
            } => self.best_split_entropy(labels, xlogx, start, end),
        }
    }

    /// The sorted lists of input `f` over the node's range.
    #[inline]
    fn lists(&self, f: usize, start: usize, end: usize) -> (&[u32], &[f64]) {
        let n = self.n;
        (
            &self.idx[f * n + start..f * n + end],
            &self.val[f * n + start..f * n + end],
        )
    }

    /// Among the candidates tied for the best score (recorded as `runs`), draws the one to keep:
    /// `Some((position in self.feats, rank among that input's tied candidates))`, or `None` when
    /// there is nothing to draw (a single best candidate, or the lowest-index rule, which keeps
    /// the first one found).
    fn draw_tie(&mut self, runs: &TieRuns) -> Option<(usize, u64)> {
        let ties = runs.total();
        if ties <= 1 || !self.random_ties {
            return None;
        }
        Some(runs.locate(self.rng.gen_range(0..ties)))
    }

    fn best_split_regress(
        &mut self,
        y: &[f64],
        start: usize,
        end: usize,
        (mean, sse): (f64, f64),
    ) -> Option<Split> {
        let (len, ml) = (end - start, self.min_leaf);
        // Total of the centred responses (zero up to rounding), in feature-0 order.
        let tc: f64 = self.idx[start..end]
            .iter()
            .map(|&i| y[i as usize] - mean)
            .sum();
        // The scan: the best bin of scores ([`tie_key`]), the first candidate in it, and where
        // the others are.
        // A node whose squared errors underflow (sse = 0 with unequal responses) puts every
        // candidate in one bin; its decrease then decides alone, as before.
        let inv_width = match 1.0 / (TIE_REL * sse) {
            w if w.is_finite() => w,
            _ => 0.0,
        };
        let (mut best_key, mut best_score) = (f64::NEG_INFINITY, f64::NEG_INFINITY);
        let mut best: Option<Split> = None;
        let mut runs = std::mem::take(&mut self.tie_runs);
        runs.clear();
        for (pos, &f) in self.feats.iter().enumerate() {
            let (idx, val) = self.lists(f, start, end);
            let r = scan_regress_running(idx, val, y, (mean, tc), ml, inv_width, best_key);
            if r.improved {
                (best_key, best_score) = (r.best, r.score);
                runs.reset_to(pos, r.count);
                best = Some(Split::new(f, r.k, val[r.k], val[r.k + 1]));
            } else if r.count > 0 {
                runs.add_run(pos, r.count);
            }
        }
        let decrease = best_score - tc * tc / len as f64;
        if decrease > REL_TOL * sse {
            // At a tie: rescan the one input holding the drawn candidate.
            if let Some((pos, rank)) = self.draw_tie(&runs) {
                let f = self.feats[pos];
                let (idx, val) = self.lists(f, start, end);
                let mut seen = 0u64;
                scan_regress(idx, val, y, mean, tc, ml, |k, score, a, b| {
                    if tie_key(score, inv_width) == best_key {
                        if seen == rank {
                            best = Some(Split::new(f, k, a, b));
                        }
                        seen += 1;
                    }
                });
            }
        } else {
            best = None;
        }
        self.tie_runs = runs;
        best
    }

    fn best_split_gini(&mut self, labels: &[u32], start: usize, end: usize) -> Option<Split> {
        let len = end - start;
        let exact = self.n <= EXACT_GINI_MAX_N;
        // Σ_c t_c² for the node.
        let st2: u64 = self.counts.iter().map(|&c| c * c).sum();
        // Incumbent score as a fraction num/den = (sl2·nr + sr2·nl)/(nl·nr) (exact) or as an f64;
        // start from the parent's Σt²/len so that only strictly positive decreases are accepted.
        let mut best_num = st2;
        let mut best_den = len as u64;
        let mut best_f = st2 as f64 / len as f64;
        let mut best: Option<Split> = None;
        let cmp = |num: u64, den: u64, s: f64, best_num: u64, best_den: u64, best_f: f64| {
            if exact {
                ((num as u128) * (best_den as u128)).cmp(&((best_num as u128) * (den as u128)))
            } else {
                s.partial_cmp(&best_f).unwrap_or(Ordering::Less)
            }
        };
        let mut lc = std::mem::take(&mut self.left_counts);
        let mut runs = std::mem::take(&mut self.tie_runs);
        runs.clear();
        let ml = self.min_leaf;
        for (pos, &f) in self.feats.iter().enumerate() {
            let (idx, val) = self.lists(f, start, end);
            scan_gini(
                idx,
                val,
                labels,
                &self.counts,
                &mut lc,
                st2,
                ml,
                |k, num, den, s, a, b| {
                    match cmp(num, den, s, best_num, best_den, best_f) {
                        Ordering::Greater => {
                            (best_num, best_den, best_f) = (num, den, s);
                            runs.reset(pos);
                            best = Some(Split::new(f, k, a, b));
                        }
                        // A candidate equal to the parent's score (best still None) is no decrease.
                        Ordering::Equal if best.is_some() => runs.add(pos),
                        _ => {}
                    }
                },
            );
        }
        if best.is_some() {
            if let Some((pos, rank)) = self.draw_tie(&runs) {
                let f = self.feats[pos];
                let (idx, val) = self.lists(f, start, end);
                let mut seen = 0u64;
                scan_gini(
                    idx,
                    val,
                    labels,
                    &self.counts,
                    &mut lc,
                    st2,
                    ml,
                    |k, num, den, s, a, b| {
                        if cmp(num, den, s, best_num, best_den, best_f).is_eq() {
                            if seen == rank {
                                best = Some(Split::new(f, k, a, b));
                            }
                            seen += 1;
                        }
                    },
                );
            }
        }
        self.left_counts = lc;
        self.tie_runs = runs;
        best
    }

    fn best_split_entropy(
        &mut self,
        labels: &[u32],
        xlogx: &[f64],
        start: usize,
        end: usize,
    ) -> Option<Split> {
        let len = end - start;
        // n·H = n ln n - Σ_c t_c ln t_c.
        let parent_cost = xlogx[len] - self.counts.iter().map(|&c| xlogx[c as usize]).sum::<f64>();
        let mut best_cost = f64::INFINITY;
        let mut best: Option<Split> = None;
        let mut lc = std::mem::take(&mut self.left_counts);
        let mut runs = std::mem::take(&mut self.tie_runs);
        runs.clear();
        let ml = self.min_leaf;
        for (pos, &f) in self.feats.iter().enumerate() {
            let (idx, val) = self.lists(f, start, end);
            scan_entropy(
                idx,
                val,
                labels,
                xlogx,
                &self.counts,
                &mut lc,
                ml,
                |k, cost, a, b| {
                    if cost < best_cost {
                        best_cost = cost;
                        runs.reset(pos);
                        best = Some(Split::new(f, k, a, b));
                    } else if cost == best_cost {
                        runs.add(pos);
                    }
                },
            );
        }
        if parent_cost - best_cost > REL_TOL * xlogx[len] {
            if let Some((pos, rank)) = self.draw_tie(&runs) {
                let f = self.feats[pos];
                let (idx, val) = self.lists(f, start, end);
                let mut seen = 0u64;
                scan_entropy(
                    idx,
                    val,
                    labels,
                    xlogx,
                    &self.counts,
                    &mut lc,
                    ml,
                    |k, cost, a, b| {
                        if cost == best_cost {
                            if seen == rank {
                                best = Some(Split::new(f, k, a, b));
                            }
                            seen += 1;
                        }
                    },
                );
            }
        } else {
            best = None;
        }
        self.left_counts = lc;
        self.tie_runs = runs;
        best
    }

    /// Stably partitions every input's sorted range `start..end` into the left child's samples
    /// followed by the right child's; with `only_first`, just input 0's (the children will not
    /// be split, and their summaries read only that list).
    fn partition(&mut self, start: usize, end: usize, split: Split, only_first: bool) {
        let n = self.n;
        let mid = start + split.n_left;
        let fs = split.feature;
        if only_first && fs == 0 {
            return;
        }
        for &i in &self.idx[fs * n + start..fs * n + mid] {
            self.goes_left[i as usize] = true;
        }
        for &i in &self.idx[fs * n + mid..fs * n + end] {
            self.goes_left[i as usize] = false;
        }
        let inputs = if only_first { 1 } else { self.p };
        let goes_left = &self.goes_left[..];
        let (sidx, sval) = (&mut self.scratch_idx[..], &mut self.scratch_val[..]);
        for f in 0..inputs {
            if f == fs {
                continue;
            }
            let idx = &mut self.idx[f * n + start..f * n + end];
            let val = &mut self.val[f * n + start..f * n + end];
            let len = idx.len();
            assert!(sidx.len() >= len && sval.len() >= len && val.len() == len);
            let mut w = 0;
            let mut r = 0;
            // Branch-free: write to both destinations, advance one (directions are unpredictable).
            for k in 0..len {
                // SAFETY: `w + r == k < len`, so `w < len` (the node lists' length) and
                // `r < len <= n` (the scratch length, checked above); every entry of the sorted
                // lists is a sample id below `n == goes_left.len()` by construction (see
                // `grow_from`).
                unsafe {
                    let i = *idx.get_unchecked(k);
                    let v = *val.get_unchecked(k);
                    debug_assert!((i as usize) < goes_left.len());
                    let l = usize::from(*goes_left.get_unchecked(i as usize));
                    *idx.get_unchecked_mut(w) = i;
                    *val.get_unchecked_mut(w) = v;
                    *sidx.get_unchecked_mut(r) = i;
                    *sval.get_unchecked_mut(r) = v;
                    w += l;
                    r += 1 - l;
                }
            }
            idx[w..].copy_from_slice(&sidx[..r]);
            val[w..].copy_from_slice(&sval[..r]);
        }
    }
}

/// Visits every candidate split of one input's sorted node lists for squared error:
/// `visit(k, score, a, b)` for "the first `k + 1` samples go left", with
/// `score = s_l²/n_l + s_r²/n_r` (centred sums) and `a < b` the values around the threshold.
#[inline(always)]
fn scan_regress(
    idx: &[u32],
    val: &[f64],
    y: &[f64],
    mean: f64,
    tc: f64,
    ml: usize,
    mut visit: impl FnMut(usize, f64, f64, f64),
) {
    let len = idx.len();
    let mut sl = 0.0;
    for &i in &idx[..ml - 1] {
        sl += y[i as usize] - mean;
    }
    assert!(val.len() == len && ml >= 1 && ml <= len);
    for k in (ml - 1)..(len - ml) {
        // SAFETY: `1 <= ml <= len`, so `k + 1 < len == idx.len() == val.len()`; the sorted lists hold
        // sample ids below `n == y.len()` by construction (see `grow_from`).
        let (yi, a, b) = unsafe {
            let i = *idx.get_unchecked(k) as usize;
            debug_assert!(i < y.len());
            (
                *y.get_unchecked(i),
                *val.get_unchecked(k),
                *val.get_unchecked(k + 1),
            )
        };
        sl += yi - mean;
        if a == b {
            continue;
        }
        let nl = (k + 1) as f64;
        let nr = (len - k - 1) as f64;
        let sr = tc - sl;
        visit(k, sl * sl / nl + sr * sr / nr, a, b);
    }
}

/// What one input's scan did to the running best bin (see [`scan_regress_running`]).
struct Running {
    /// The running best bin ([`tie_key`]) after the input.
    best: f64,
    /// The score of the first candidate in that bin (meaningful when `improved`).
    score: f64,
    /// Whether one of the input's candidates beat the running best it started from.
    improved: bool,
    /// The first of the input's candidates in bin `best` (meaningful when `improved`).
    k: usize,
    /// How many of the input's candidates fall in bin `best` (after its last improvement).
    count: u64,
}

/// [`scan_regress`] folded into the running best over the node's inputs, with the state in
/// the callee's locals (the visit closure captures nothing else, so after inlining the state
/// and the running sums stay in registers): starting from `best`, a candidate scoring higher
/// becomes the best (and the tie count restarts at 1), one scoring equal adds a tie. The
/// running best is carried across inputs, so after the first input a candidate rarely beats it
/// and the branch stays predictable.
#[inline(always)]
fn scan_regress_running(
    idx: &[u32],
    val: &[f64],
    y: &[f64],
    (mean, tc): (f64, f64),
    ml: usize,
    inv_width: f64,
    mut best: f64,
) -> Running {
    let (mut improved, mut bk, mut count, mut first) = (false, 0usize, 0u64, f64::NAN);
    // Only a score within a bin of the best can reach its bin: the gate keeps the rounding out
    // of the loop for the other candidates.
    let mut gate = (best - 1.0) / inv_width;
    scan_regress(idx, val, y, mean, tc, ml, |k, score, _, _| {
        if score >= gate {
            let key = tie_key(score, inv_width);
            if key > best {
                best = key;
                gate = (best - 1.0) / inv_width;
                first = score;
                improved = true;
                bk = k;
                count = 1;
            } else if key == best {
                count += 1;
            }
        }
    });
    Running {
        best,
        score: first,
        improved,
        k: bk,
        count,
    }
}

/// Visits every candidate split of one input for Gini: `visit(k, num, den, s, a, b)` with the
/// children's `Σ_c count_c²/size` summed as the exact fraction `num/den` and as the `f64` `s`.
/// `lc` is scratch for the left class counts; `tcnt` the node's class counts, `st2 = Σ tcnt²`.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn scan_gini(
    idx: &[u32],
    val: &[f64],
    labels: &[u32],
    tcnt: &[u64],
    lc: &mut [u64],
    st2: u64,
    ml: usize,
    mut visit: impl FnMut(usize, u64, u64, f64, f64, f64),
) {
    let len = idx.len();
    lc.iter_mut().for_each(|c| *c = 0);
    let mut sl2: u64 = 0;
    let mut sr2: u64 = st2;
    let mut step = |i: u32, sl2: &mut u64, sr2: &mut u64| {
        let c = labels[i as usize] as usize;
        let l = lc[c];
        let r = tcnt[c] - l;
        *sl2 += 2 * l + 1;
        *sr2 -= 2 * r - 1;
        lc[c] = l + 1;
    };
    for &i in &idx[..ml - 1] {
        step(i, &mut sl2, &mut sr2);
    }
    for k in (ml - 1)..(len - ml) {
        step(idx[k], &mut sl2, &mut sr2);
        let (a, b) = (val[k], val[k + 1]);
        if a == b {
            continue;
        }
        let nl = (k + 1) as u64;
        let nr = (len - k - 1) as u64;
        let s = sl2 as f64 / nl as f64 + sr2 as f64 / nr as f64;
        visit(k, sl2 * nr + sr2 * nl, nl * nr, s, a, b);
    }
}

/// Visits every candidate split of one input for entropy: `visit(k, cost, a, b)` with
/// `cost = Σ_children (n ln n − Σ_c count_c ln count_c)` from the `xlogx` table.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn scan_entropy(
    idx: &[u32],
    val: &[f64],
    labels: &[u32],
    xlogx: &[f64],
    tcnt: &[u64],
    lc: &mut [u64],
    ml: usize,
    mut visit: impl FnMut(usize, f64, f64, f64),
) {
    let len = idx.len();
    lc.iter_mut().for_each(|c| *c = 0);
    for &i in &idx[..ml - 1] {
        lc[labels[i as usize] as usize] += 1;
    }
    for k in (ml - 1)..(len - ml) {
        lc[labels[idx[k] as usize] as usize] += 1;
        let (a, b) = (val[k], val[k + 1]);
        if a == b {
            continue;
        }
        let nl = k + 1;
        let nr = len - nl;
        let mut cost = xlogx[nl] + xlogx[nr];
        for (&l, &t) in lc.iter().zip(tcnt) {
            cost -= xlogx[l as usize] + xlogx[(t - l) as usize];
        }
        visit(k, cost, a, b);
    }
}

/// Converts grid values to depths, rejecting anything that is not a whole number in `1..=64`.
fn grid_depths(grid: &[f64]) -> Result<Vec<usize>, FitError> {
    check_whole_grid(grid, "max_depth", 1.0, MAX_GRID_DEPTH as f64).map_err(FitError)?;
    Ok(grid.iter().map(|&g| g as usize).collect())
}

impl Family for TreeFamily {
    fn name(&self) -> &'static str {
        "tree"
    }

    fn squares_inputs(&self) -> bool {
        false
    }

    /// The default's three copies of the training set, and five more numbers per training row
    /// (sort orders, row indices, the path's split bookkeeping). Measured with `/usr/bin/time`
    /// (peak resident size; a hostile sweep, 2026-12-05): on 2 inputs the run grew by about
    /// 131 MiB per million training rows against 99 MiB estimated with the default alone.
    fn work_bytes(&self, n: usize, p: usize, m: usize, _grid: &[f64], _task: Task) -> f64 {
        8.0 * (3.0 * n as f64 * p as f64 + 6.0 * n as f64 + m as f64)
    }

    fn zero_probability_remedy(&self) -> &'static str {
        "smooth the class shares with add-α: set `alpha` in [model] (key `model.alpha`), or raise it, to 0.5 for example"
    }

    fn knob(&self) -> &'static str {
        "max_depth"
    }

    fn check_grid(&self, grid: &[f64], _n_train: usize, _n_inputs: usize) -> Result<(), String> {
        if grid.is_empty() {
            return Err("max_depth grid is empty".into());
        }
        check_whole_grid(grid, "max_depth", 1.0, MAX_GRID_DEPTH as f64)
    }

    fn supports(&self, _task: Task) -> bool {
        true
    }

    fn check_options(
        &self,
        n_train: usize,
        _n_inputs: usize,
    ) -> Result<(), (&'static str, String)> {
        super::check_leaf_size(self.min_samples_leaf, n_train, "training rows")
    }

    fn caps(&self, task: Task) -> Caps {
        Caps {
            probabilities: matches!(task, Task::Classify { .. }),
            // averages of training responses: never negative on counts
            positive: task == Task::Regress,
            stochastic: self.tie_break == TieBreak::Random,
            ..Caps::default()
        }
    }

    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        mut out: Out<'_>,
    ) -> Result<(), FitError> {
        let m = input.eval.nrows();
        let p = input.x.ncols();
        check_out("tree", &out, grid.len(), m, input.task)?;
        if input.eval.ncols() != p {
            return Err(FitError(format!(
                "tree: evaluation inputs have {} columns, training inputs {p}",
                input.eval.ncols()
            )));
        }
        let depths = grid_depths(grid)?;
        let Some(&deepest) = depths.iter().max() else {
            return Ok(());
        };
        if let Some(((e, j), &v)) = input.eval.indexed_iter().find(|(_, v)| v.is_nan()) {
            return Err(FitError(format!(
                "tree: evaluation input {v} at row {e}, column {j} is not a number"
            )));
        }
        let tree = self.grow(input.x, input.y, input.task, deepest, &mut input.seed.rng())?;
        let eval = input.eval.as_standard_layout();
        let rows = eval
            .as_slice()
            .ok_or_else(|| FitError("tree: evaluation inputs are not contiguous".into()))?;
        if out.probs.is_none() {
            let mut vals = [0.0f64; MAX_GRID_DEPTH + 1];
            for e in 0..m {
                let row = &rows[e * p..(e + 1) * p];
                let reached = tree.path_values(row, deepest, &mut vals);
                for (g, &d) in depths.iter().enumerate() {
                    out.values[[g, e]] = vals[d.min(reached)];
                }
            }
            return Ok(());
        }
        let mut buf = [0u32; MAX_GRID_DEPTH + 1];
        let k = tree.classes();
        let mut counts = vec![0.0; k];
        let mut shares = vec![0.0; k];
        for e in 0..m {
            let row = &rows[e * p..(e + 1) * p];
            let reached = tree.path_nodes(row, deepest, &mut buf);
            for (g, &d) in depths.iter().enumerate() {
                let node = buf[d.min(reached)];
                out.values[[g, e]] = tree.node_value(node);
                if let Some(pr) = out.probs.as_mut() {
                    for (c, &v) in counts.iter_mut().zip(tree.node_counts(node)) {
                        *c = f64::from(v);
                    }
                    smoothed_shares(&counts, self.alpha, &mut shares);
                    for (c, &q) in shares.iter().enumerate() {
                        pr[[g, e, c]] = q;
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
    use crate::rng::FitSeed;
    use ndarray::{Array1, Array2};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// The stream of `FitSeed::fixed(0)`, which the family's own fits use in these tests.
    fn seed0() -> ChaCha8Rng {
        FitSeed::fixed(0).rng()
    }

    fn random_x(rng: &mut ChaCha8Rng, n: usize, p: usize) -> Array2<f64> {
        Array2::from_shape_fn((n, p), |_| rng.gen::<f64>())
    }

    /// Regression responses with structure plus noise.
    fn regress_y(rng: &mut ChaCha8Rng, x: &Array2<f64>) -> Array1<f64> {
        Array1::from_shape_fn(x.nrows(), |i| {
            let r = x.row(i);
            (6.0 * r[0]).sin() + 2.0 * r[1] * r[2] + 0.3 * rng.gen::<f64>()
        })
    }

    /// Three classes by a noisy score.
    fn class_y(rng: &mut ChaCha8Rng, x: &Array2<f64>) -> Array1<f64> {
        Array1::from_shape_fn(x.nrows(), |i| {
            let r = x.row(i);
            let s = r[0] + 0.7 * r[1] - 0.5 * r[2] + 0.4 * rng.gen::<f64>();
            if s < 0.45 {
                0.0
            } else if s < 0.85 {
                1.0
            } else {
                2.0
            }
        })
    }

    #[test]
    fn sort_keys_invert_exactly_and_keep_the_order() {
        let vals = [
            f64::MIN,
            -1e300,
            -2.5,
            -1.0,
            -f64::MIN_POSITIVE,
            -5e-324,
            -0.0,
            0.0,
            5e-324,
            f64::MIN_POSITIVE,
            0.1,
            1.0,
            3.75,
            1e300,
            f64::MAX,
        ];
        for w in vals.windows(2) {
            assert!(sort_key(w[0]) <= sort_key(w[1]), "{} {}", w[0], w[1]);
        }
        for &v in &vals {
            assert_eq!(
                from_sort_key(sort_key(v)).to_bits(),
                (v + 0.0).to_bits(),
                "{v}"
            );
        }
    }

    #[test]
    fn path_property_holds_exactly() {
        // Exact identity: CART's greedy split at a node does not depend on the depth limit.
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let x = random_x(&mut rng, 300, 4);
        let eval = random_x(&mut rng, 200, 4);
        let yr = regress_y(&mut rng, &x);
        let yc = class_y(&mut rng, &x);
        let cases = [
            (TreeFamily::default(), yr.view(), Task::Regress),
            (
                TreeFamily::default(),
                yc.view(),
                Task::Classify { classes: 3 },
            ),
            (
                TreeFamily {
                    min_samples_leaf: 3,
                    criterion: Criterion::Entropy,
                    ..TreeFamily::default()
                },
                yc.view(),
                Task::Classify { classes: 3 },
            ),
        ];
        for (fam, y, task) in cases {
            let deep = fam.grow(x.view(), y, task, 8, &mut seed0()).unwrap();
            assert_eq!(deep.depth(), 8);
            for d in 1..=8 {
                let shallow = fam.grow(x.view(), y, task, d, &mut seed0()).unwrap();
                assert!(shallow.depth() <= d);
                for row in eval.rows() {
                    assert_eq!(
                        deep.predict_at_depth(row, d),
                        shallow.predict_at_depth(row, 64)
                    );
                }
            }
            // And through the Family interface, all depths at once.
            let grid: Vec<f64> = (1..=8).map(f64::from).collect();
            let mut out = Array2::zeros((8, 200));
            let input = FitInput {
                x: x.view(),
                y,
                eval: eval.view(),
                task,
                seed: crate::rng::FitSeed::fixed(0),
            };
            fam.fit_predict(&input, &grid, crate::family::Out::values(out.view_mut()))
                .unwrap();
            for d in 1..=8 {
                let shallow = fam.grow(x.view(), y, task, d, &mut seed0()).unwrap();
                for (e, row) in eval.rows().into_iter().enumerate() {
                    assert_eq!(out[[d - 1, e]], shallow.predict_at_depth(row, 64));
                }
            }
        }
    }

    #[test]
    fn batched_predictions_equal_the_one_row_walk() {
        // 203 rows: 25 groups of 8 lanes and a remainder of 3; depths below, at and above the
        // tree's own, and a tree with a single leaf.
        let mut rng = ChaCha8Rng::seed_from_u64(12);
        let x = random_x(&mut rng, 300, 4);
        let eval = random_x(&mut rng, 203, 4);
        let y = regress_y(&mut rng, &x);
        let fam = TreeFamily::default();
        for grown in [0, 3, 9] {
            let tree = fam
                .grow(x.view(), y.view(), Task::Regress, grown, &mut seed0())
                .unwrap();
            let rows: Vec<f64> = eval.iter().copied().collect();
            for depth in [0, 1, 2, 5, 9, 64] {
                let mut acc = vec![0.5; eval.nrows()];
                tree.add_predictions(&rows, 4, depth, &mut acc);
                for (e, row) in eval.rows().into_iter().enumerate() {
                    let want = 0.5 + tree.predict_at_depth(row, depth);
                    assert_eq!(acc[e].to_bits(), want.to_bits(), "row {e}, depth {depth}");
                }
            }
        }
    }

    #[test]
    fn step_function_hand_computed() {
        // Hand-computed: y = 1 if x1 > 0.3 else 5; x1 values around 0.3 are 0.25 and 0.35, so the
        // only zero-error split is at (0.25 + 0.35)/2 = 0.3 on feature 0; the second input is noise
        // that cannot separate the groups.
        let x1 = [0.05, 0.1, 0.25, 0.35, 0.6, 0.9, 0.7];
        let x2 = [0.9, 0.1, 0.5, 0.4, 0.8, 0.2, 0.3];
        let x = Array2::from_shape_fn((7, 2), |(i, j)| if j == 0 { x1[i] } else { x2[i] });
        let y = Array1::from_iter(x1.iter().map(|&v| if v <= 0.3 { 5.0 } else { 1.0 }));
        let fam = TreeFamily::default();
        let tree = fam
            .grow(x.view(), y.view(), Task::Regress, 1, &mut seed0())
            .unwrap();
        assert_eq!(tree.n_nodes(), 3);
        let root = tree.nodes[0];
        assert_eq!(root.feature, 0);
        assert_eq!(root.threshold, 0.5 * 0.25 + 0.5 * 0.35);
        assert_eq!(tree.nodes[root.left as usize].value, 5.0);
        assert_eq!(tree.nodes[root.left as usize + 1].value, 1.0);
        // Root stores the overall mean (3·5 + 4·1)/7.
        assert_eq!(root.value, 19.0 / 7.0);
        // Pure children stay leaves even when deeper growth is allowed.
        let deep = fam
            .grow(x.view(), y.view(), Task::Regress, 10, &mut seed0())
            .unwrap();
        assert_eq!(deep.n_nodes(), 3);
    }

    #[test]
    fn full_regression_tree_interpolates() {
        // Exact identity: with distinct inputs and min_samples_leaf 1 every leaf holds one sample.
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let x = random_x(&mut rng, 250, 3);
        let y = regress_y(&mut rng, &x);
        let tree = TreeFamily::default()
            .grow(x.view(), y.view(), Task::Regress, 64, &mut seed0())
            .unwrap();
        assert_eq!(tree.n_nodes(), 2 * 250 - 1);
        for (i, row) in x.rows().into_iter().enumerate() {
            assert_eq!(tree.predict_at_depth(row, 64), y[i]);
        }
    }

    #[test]
    fn min_samples_leaf_respected() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let x = random_x(&mut rng, 200, 3);
        let yr = regress_y(&mut rng, &x);
        let yc = class_y(&mut rng, &x);
        for ml in [1, 4, 9] {
            for criterion in [Criterion::Gini, Criterion::Entropy] {
                let fam = TreeFamily {
                    min_samples_leaf: ml,
                    criterion,
                    ..TreeFamily::default()
                };
                for (y, task) in [
                    (yr.view(), Task::Regress),
                    (yc.view(), Task::Classify { classes: 3 }),
                ] {
                    let tree = fam.grow(x.view(), y, task, 64, &mut seed0()).unwrap();
                    // Count training samples per leaf by routing them.
                    let mut per_leaf = vec![0usize; tree.n_nodes()];
                    for row in x.rows() {
                        let mut k = 0;
                        while tree.nodes[k].left != 0 {
                            let nd = tree.nodes[k];
                            k = nd.left as usize
                                + usize::from(row[nd.feature as usize] > nd.threshold);
                        }
                        per_leaf[k] += 1;
                    }
                    let leaves: Vec<usize> = (0..tree.n_nodes())
                        .filter(|&k| tree.nodes[k].left == 0)
                        .map(|k| per_leaf[k])
                        .collect();
                    assert!(leaves.iter().all(|&c| c >= ml), "ml={ml}: {leaves:?}");
                    if ml == 1 && task == Task::Regress {
                        assert!(leaves.iter().all(|&c| c == 1));
                    }
                    if ml > 1 {
                        assert!(leaves.contains(&ml) || leaves.iter().any(|&c| c < 2 * ml));
                    }
                }
            }
        }
    }

    #[test]
    fn bad_inputs_are_errors() {
        let fam = TreeFamily::default();
        let x = Array2::<f64>::zeros((0, 2));
        let y = Array1::<f64>::zeros(0);
        assert!(fam
            .grow(x.view(), y.view(), Task::Regress, 3, &mut seed0())
            .is_err());
        let mut x = Array2::<f64>::zeros((4, 2));
        let y = Array1::from(vec![0.0, 1.0, 0.0, 1.0]);
        x[[2, 1]] = f64::NAN;
        assert!(fam
            .grow(x.view(), y.view(), Task::Regress, 3, &mut seed0())
            .is_err());
        x[[2, 1]] = 0.0;
        let bad_y = Array1::from(vec![0.0, f64::NAN, 0.0, 1.0]);
        assert!(fam
            .grow(x.view(), bad_y.view(), Task::Regress, 3, &mut seed0())
            .is_err());
        let bad_lab = Array1::from(vec![0.0, 2.0, 0.0, 1.0]);
        let task = Task::Classify { classes: 2 };
        assert!(fam
            .grow(x.view(), bad_lab.view(), task, 3, &mut seed0())
            .is_err());
        assert!(fam.check_grid(&[1.0, 2.5], 10, 2).is_err());
        assert!(fam.check_grid(&[0.0], 10, 2).is_err());
        assert!(fam.check_grid(&[65.0], 10, 2).is_err());
        assert!(fam.check_grid(&[1.0, 64.0], 10, 2).is_ok());
        let eval = Array2::from_elem((1, 2), f64::NAN);
        let input = FitInput {
            x: x.view(),
            y: y.view(),
            eval: eval.view(),
            task: Task::Regress,
            seed: crate::rng::FitSeed::fixed(0),
        };
        let mut out = Array2::zeros((1, 1));
        assert!(fam
            .fit_predict(&input, &[2.0], crate::family::Out::values(out.view_mut()))
            .is_err());
    }

    #[test]
    fn lowest_index_rule_prefers_lower_feature_then_lower_threshold() {
        // Two identical inputs give identical splits, so the lower input index must win. y is
        // symmetric, so splitting off the first sample (threshold 0.15) or the last (0.35) gives
        // the same decrease, and the lower threshold must win.
        let v = [0.1, 0.2, 0.3, 0.4];
        let x = Array2::from_shape_fn((4, 2), |(i, _)| v[i]);
        let y = Array1::from(vec![1.0, 0.0, 0.0, 1.0]);
        let fam = TreeFamily {
            tie_break: TieBreak::LowestIndex,
            ..TreeFamily::default()
        };
        assert!(!fam.caps(Task::Regress).stochastic);
        for task in [Task::Regress, Task::Classify { classes: 2 }] {
            for s in 0..20 {
                let tree = fam
                    .grow(x.view(), y.view(), task, 1, &mut FitSeed::fixed(s).rng())
                    .unwrap();
                assert_eq!(tree.nodes[0].feature, 0);
                assert_eq!(tree.nodes[0].threshold, 0.5 * 0.1 + 0.5 * 0.2);
            }
        }
    }

    /// `|count − S·q| ≤ 4·sqrt(S·q·(1 − q))`: a Binomial(S, q) count within 4 standard deviations
    /// of its mean (two-sided normal tail 6e-5).
    fn within_binomial(count: usize, s: usize, q: f64) -> bool {
        let (s, c) = (s as f64, count as f64);
        (c - s * q).abs() <= 4.0 * (s * q * (1.0 - q)).sqrt()
    }

    #[test]
    fn random_ties_are_uniform_over_inputs_and_thresholds() {
        // Two identical inputs and a symmetric response: four candidates tie exactly at the root
        // (input 0 or 1, threshold 0.15 or 0.35), for squared error, Gini and entropy alike. Each
        // must be chosen with probability 1/4 over fit seeds (binomial bound, 4 SD).
        let v = [0.1, 0.2, 0.3, 0.4];
        let x = Array2::from_shape_fn((4, 2), |(i, _)| v[i]);
        let y = Array1::from(vec![1.0, 0.0, 0.0, 1.0]);
        let lo = 0.5 * 0.1 + 0.5 * 0.2;
        let hi = 0.5 * 0.3 + 0.5 * 0.4;
        let seeds = 4000usize;
        for (criterion, task) in [
            (Criterion::Gini, Task::Regress),
            (Criterion::Gini, Task::Classify { classes: 2 }),
            (Criterion::Entropy, Task::Classify { classes: 2 }),
        ] {
            let fam = TreeFamily {
                criterion,
                ..TreeFamily::default()
            };
            assert!(fam.caps(task).stochastic);
            let mut counts = [0usize; 4];
            for s in 0..seeds {
                let tree = fam
                    .grow(
                        x.view(),
                        y.view(),
                        task,
                        1,
                        &mut FitSeed::fixed(s as u64).rng(),
                    )
                    .unwrap();
                let root = tree.nodes[0];
                let t = if root.threshold == lo {
                    0
                } else {
                    assert_eq!(root.threshold, hi);
                    1
                };
                counts[2 * root.feature as usize + t] += 1;
            }
            for c in counts {
                assert!(
                    within_binomial(c, seeds, 0.25),
                    "{task:?} {criterion:?}: {counts:?}"
                );
            }
        }
    }

    #[test]
    fn swapped_columns_give_the_same_prediction_distribution() {
        // Inputs a and b order the training samples identically, so they tie at the root; they
        // disagree at the evaluation point (a = 0.2 is left of a's threshold, b = 3.5 right of
        // b's), so the prediction there is 0 or 1 depending on the input chosen. With random
        // ties the share of 0 is 1/2 in both column orders (binomial bound and a two-sample bound,
        // 4 SD); with the lowest-index rule the two orders disagree on every seed.
        let a = [0.1, 0.2, 0.3, 0.4];
        let b = [1.0, 2.0, 3.0, 4.0];
        let y = Array1::from(vec![0.0, 0.0, 1.0, 1.0]);
        let ab = Array2::from_shape_fn((4, 2), |(i, j)| if j == 0 { a[i] } else { b[i] });
        let ba = Array2::from_shape_fn((4, 2), |(i, j)| if j == 0 { b[i] } else { a[i] });
        let (eval_ab, eval_ba) = ([0.2, 3.5], [3.5, 0.2]);
        let seeds = 4000usize;
        for task in [Task::Regress, Task::Classify { classes: 2 }] {
            let share = |fam: &TreeFamily, x: &Array2<f64>, e: [f64; 2]| {
                let mut zeros = 0;
                for s in 0..seeds {
                    let t = fam
                        .grow(
                            x.view(),
                            y.view(),
                            task,
                            1,
                            &mut FitSeed::fixed(s as u64).rng(),
                        )
                        .unwrap();
                    zeros += usize::from(t.predict_at_depth(ndarray::aview1(&e), 1) == 0.0);
                }
                zeros
            };
            let fam = TreeFamily::default();
            let (z1, z2) = (share(&fam, &ab, eval_ab), share(&fam, &ba, eval_ba));
            assert!(within_binomial(z1, seeds, 0.5), "{task:?}: {z1}");
            assert!(within_binomial(z2, seeds, 0.5), "{task:?}: {z2}");
            let (p1, p2) = (z1 as f64 / seeds as f64, z2 as f64 / seeds as f64);
            let pooled = 0.5 * (p1 + p2);
            let se = (pooled * (1.0 - pooled) * 2.0 / seeds as f64).sqrt();
            assert!((p1 - p2).abs() <= 4.0 * se, "{task:?}: {p1} vs {p2}");
            let old = TreeFamily {
                tie_break: TieBreak::LowestIndex,
                ..TreeFamily::default()
            };
            assert_eq!(share(&old, &ab, eval_ab), seeds);
            assert_eq!(share(&old, &ba, eval_ba), 0);
        }
    }

    #[test]
    fn mirrored_inputs_tie_whatever_the_rounding_of_their_sums() {
        // Input b orders the samples in the opposite direction to input a, so every threshold
        // of one makes the same partition as a threshold of the other and the two tie exactly;
        // but their scores are summed in opposite orders and could differ in the last bit, which
        // then chose one input every time (an independent re-implementation found it: 0.14-0.25%
        // of tied nodes in fully grown trees). At the evaluation point (a = 0, b = 0) the
        // prediction is the left mean through a and the right one through b, so over fit seeds
        // each response vector must see both, about half the time each (binomial bound, 4 SD).
        let a = [0.0, 1.0, 2.0, 3.0, 4.0];
        let x = Array2::from_shape_fn((5, 2), |(i, j)| if j == 0 { a[i] } else { 4.0 - a[i] });
        let e = ndarray::aview1(&[0.0, 0.0]);
        let mut rng = ChaCha8Rng::seed_from_u64(77);
        let seeds = 400usize;
        for _ in 0..60 {
            let y = Array1::from_shape_fn(5, |_| rng.gen::<f64>() * 10.0 - 3.0);
            let fam = TreeFamily::default();
            let mut first = None;
            let mut same = 0usize;
            for s in 0..seeds {
                let t = fam
                    .grow(
                        x.view(),
                        y.view(),
                        Task::Regress,
                        1,
                        &mut FitSeed::fixed(s as u64).rng(),
                    )
                    .unwrap();
                let v = t.predict_at_depth(e, 1);
                let f = *first.get_or_insert(v);
                same += usize::from(v == f);
            }
            assert!(
                within_binomial(same, seeds, 0.5),
                "{y:?}: {same} of {seeds}"
            );
        }
    }

    /// Inputs with few distinct values and responses with few distinct values: exact ties at many
    /// nodes.
    fn tie_heavy(seed: u64, n: usize, p: usize) -> (Array2<f64>, Array1<f64>, Array1<f64>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let x = Array2::from_shape_fn((n, p), |_| f64::from(rng.gen_range(0..4u8)));
        let yr = Array1::from_shape_fn(n, |i| x[[i, 0]] + f64::from(rng.gen_range(0..2u8)));
        let yc = Array1::from_shape_fn(n, |i| {
            f64::from(u8::from(
                x[[i, 0]] + x[[i, 1]] + f64::from(rng.gen_range(0..3u8)) > 4.0,
            ))
        });
        (x, yr, yc)
    }

    #[test]
    fn path_property_and_determinism_with_random_ties() {
        // Exact identity: breadth-first growth makes the draws above depth d independent of the
        // depth limit, so the deep tree cut at d equals the tree grown to d with the same stream.
        // The data are tie-heavy, and another seed must change some prediction (else the check
        // would not involve the tie stream at all).
        let (x, yr, yc) = tie_heavy(41, 120, 4);
        let mut rng = ChaCha8Rng::seed_from_u64(42);
        let eval = Array2::from_shape_fn((60, 4), |_| rng.gen_range(-0.5..3.5));
        for (fam, y, task) in [
            (TreeFamily::default(), yr.view(), Task::Regress),
            (
                TreeFamily::default(),
                yc.view(),
                Task::Classify { classes: 2 },
            ),
            (
                TreeFamily {
                    criterion: Criterion::Entropy,
                    min_samples_leaf: 2,
                    ..TreeFamily::default()
                },
                yc.view(),
                Task::Classify { classes: 2 },
            ),
        ] {
            let seed = FitSeed {
                seed: 5,
                replicate: 3,
                fold: 0,
                copy: 0,
            };
            let deep = fam.grow(x.view(), y, task, 12, &mut seed.rng()).unwrap();
            let again = fam.grow(x.view(), y, task, 12, &mut seed.rng()).unwrap();
            let others: Vec<Tree> = (1..=8)
                .map(|copy| {
                    fam.grow(x.view(), y, task, 12, &mut FitSeed { copy, ..seed }.rng())
                        .unwrap()
                })
                .collect();
            let mut differs = false;
            for d in 1..=12 {
                let shallow = fam.grow(x.view(), y, task, d, &mut seed.rng()).unwrap();
                for row in eval.rows() {
                    let v = deep.predict_at_depth(row, d);
                    assert_eq!(v.to_bits(), shallow.predict_at_depth(row, 64).to_bits());
                    assert_eq!(v.to_bits(), again.predict_at_depth(row, d).to_bits());
                    differs |= others.iter().any(|o| v != o.predict_at_depth(row, d));
                }
            }
            assert!(differs, "{task:?}: other fit seeds changed nothing");
        }
    }

    #[test]
    fn repeated_rows_equal_counts() {
        // Exact identity: growing with row counts equals growing on the data with each row
        // repeated that many times (in row order), with the same stream; counts of all ones equal
        // no counts.
        let (x, yr, yc) = tie_heavy(43, 80, 3);
        let mut rng = ChaCha8Rng::seed_from_u64(44);
        let counts: Vec<u32> = (0..80).map(|_| rng.gen_range(0..3u32)).collect();
        let rows: Vec<usize> = (0..80)
            .flat_map(|i| std::iter::repeat(i).take(counts[i] as usize))
            .collect();
        let xr = x.select(ndarray::Axis(0), &rows);
        let eval = Array2::from_shape_fn((50, 3), |_| rng.gen_range(-0.5..3.5));
        let fam = TreeFamily {
            min_samples_leaf: 2,
            ..TreeFamily::default()
        };
        let pre = Presorted::new(x.view()).unwrap();
        for (y, task) in [(&yr, Task::Regress), (&yc, Task::Classify { classes: 2 })] {
            let yrep = y.select(ndarray::Axis(0), &rows);
            let opts = GrowOptions {
                counts: Some(&counts),
                ..GrowOptions::depth(10)
            };
            let a = fam
                .grow_presorted(&pre, y.view(), task, &opts, &mut seed0())
                .unwrap();
            let b = fam
                .grow(xr.view(), yrep.view(), task, 10, &mut seed0())
                .unwrap();
            let ones = vec![1u32; 80];
            let opts1 = GrowOptions {
                counts: Some(&ones),
                ..GrowOptions::depth(10)
            };
            let c = fam
                .grow_presorted(&pre, y.view(), task, &opts1, &mut seed0())
                .unwrap();
            let d = fam
                .grow(x.view(), y.view(), task, 10, &mut seed0())
                .unwrap();
            assert_eq!(a.n_nodes(), b.n_nodes());
            assert_eq!(c.n_nodes(), d.n_nodes());
            for row in eval.rows() {
                assert_eq!(
                    a.predict_at_depth(row, 10).to_bits(),
                    b.predict_at_depth(row, 10).to_bits()
                );
                assert_eq!(
                    c.predict_at_depth(row, 10).to_bits(),
                    d.predict_at_depth(row, 10).to_bits()
                );
            }
            for i in 0..a.n_nodes() as u32 {
                assert_eq!(a.node_counts(i), b.node_counts(i));
            }
        }
    }

    #[test]
    fn max_features_draws_uniformly_among_non_constant_inputs() {
        // With one input tried per node, the root splits on each of the three non-constant inputs
        // with probability 1/3 (binomial bound, 4 SD) and never on the constant one; with
        // max_features = p nothing is drawn, so the tree equals the plain one bit for bit.
        let mut rng = ChaCha8Rng::seed_from_u64(45);
        let x = Array2::from_shape_fn(
            (60, 4),
            |(_, j)| {
                if j == 2 {
                    1.0
                } else {
                    rng.gen::<f64>()
                }
            },
        );
        let y = Array1::from_shape_fn(60, |i| 3.0 * x[[i, 0]] + rng.gen::<f64>());
        let pre = Presorted::new(x.view()).unwrap();
        let fam = TreeFamily::default();
        let seeds = 3000;
        let mut by_input = [0usize; 4];
        for s in 0..seeds {
            let opts = GrowOptions {
                max_features: Some(1),
                ..GrowOptions::depth(1)
            };
            let t = fam
                .grow_presorted(
                    &pre,
                    y.view(),
                    Task::Regress,
                    &opts,
                    &mut FitSeed::fixed(s).rng(),
                )
                .unwrap();
            by_input[t.nodes[0].feature as usize] += 1;
        }
        assert_eq!(by_input[2], 0);
        for f in [0, 1, 3] {
            assert!(
                within_binomial(by_input[f], seeds as usize, 1.0 / 3.0),
                "{by_input:?}"
            );
        }
        let all = GrowOptions {
            max_features: Some(4),
            ..GrowOptions::depth(6)
        };
        let a = fam
            .grow_presorted(&pre, y.view(), Task::Regress, &all, &mut seed0())
            .unwrap();
        let b = fam
            .grow(x.view(), y.view(), Task::Regress, 6, &mut seed0())
            .unwrap();
        for row in x.rows() {
            assert_eq!(
                a.predict_at_depth(row, 6).to_bits(),
                b.predict_at_depth(row, 6).to_bits()
            );
        }
    }

    /// Number of leaves of `tree` cut at `depth` whose training class counts have a tied maximum.
    fn tied_leaves(
        tree: &Tree,
        x: &Array2<f64>,
        y: &Array1<f64>,
        classes: usize,
        depth: usize,
    ) -> usize {
        let mut counts = vec![vec![0usize; classes]; tree.n_nodes()];
        for (row, &label) in x.rows().into_iter().zip(y.iter()) {
            let (mut k, mut d) = (0, 0);
            while tree.nodes[k].left != 0 && d < depth {
                let nd = tree.nodes[k];
                k = nd.left as usize + usize::from(row[nd.feature as usize] > nd.threshold);
                d += 1;
            }
            counts[k][label as usize] += 1;
        }
        counts
            .iter()
            .filter(|c| {
                let top = c.iter().copied().max().unwrap_or(0);
                top > 0 && c.iter().filter(|&&v| v == top).count() > 1
            })
            .count()
    }

    #[test]
    fn agrees_with_linfa_trees() {
        // Reference library: linfa-trees 0.8 (`linfa_trees::DecisionTree`, Gini, same max_depth).
        // Known differences, which is why agreement is required on 99% of points, not all (all
        // of them were confirmed by comparing the two trees node by node):
        // - linfa computes impurities in f32, so near-tied splits may be resolved differently;
        // - linfa's threshold is the midpoint between the node's last left value and the next
        //   value of that input in the WHOLE training set (possibly a sample outside the node),
        //   ours is the midpoint to the next value inside the node. The training partitions (and
        //   so the predictions at training points) agree, but held-out points in the gap between
        //   the two thresholds fall on different sides. The gaps shrink like 1/n; on these data
        //   about 0.35·2^(d+1)/n of held-out points are affected at depth d (2.8% at n = 400,
        //   d = 4, measured), hence training sets of 2500-3500 rows;
        // - linfa treats consecutive sorted values closer than 1e-5 as equal and does not split
        //   between them, where "consecutive" is again in the whole training set; we split between
        //   any two distinct values. With ~3000 uniform values, a few percent of gaps are below
        //   1e-5, so linfa occasionally has to pick a different (worse) split;
        // - linfa breaks ties in the majority class by HashMap order (arbitrary, it varies from run
        //   to run), ours to the smallest class index. The data sets below were chosen so that no
        //   leaf has a tied majority (checked first), which keeps this test deterministic;
        // - linfa sends `x < t` left at prediction time (vs `<=`), which does not matter for
        //   continuous held-out points.
        // linfa requires a positive min_impurity_decrease; 1e-9 is below any real Gini decrease
        // at these sizes (the smallest is of order 1/n²) but above its f32 rounding of zero.
        use linfa::prelude::*;
        use linfa_trees::DecisionTree;
        let fam = TreeFamily::default();
        let mut total = 0usize;
        let mut agree = 0usize;
        for (seed, n, p) in [(23u64, 3000usize, 3usize), (22, 3500, 3), (24, 2500, 4)] {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            let x = random_x(&mut rng, n, p);
            let y = class_y(&mut rng, &x);
            let eval = random_x(&mut rng, 2000, p);
            let labels: Array1<usize> = y.mapv(|v| v as usize);
            let ds = Dataset::new(x.clone(), labels);
            for d in 1..=5 {
                let reference = DecisionTree::params()
                    .max_depth(Some(d))
                    .min_impurity_decrease(1e-9)
                    .fit(&ds)
                    .unwrap();
                let want = reference.predict(&eval);
                let tree = fam
                    .grow(
                        x.view(),
                        y.view(),
                        Task::Classify { classes: 3 },
                        d,
                        &mut seed0(),
                    )
                    .unwrap();
                assert_eq!(tied_leaves(&tree, &x, &y, 3, d), 0, "seed {seed} depth {d}");
                // Training points: the partitions agree except where linfa's 1e-5 rule removed the
                // split we chose (measured: 1 of 3500 points differs at seed 22, depth 4).
                let want_train = reference.predict(&x);
                let mut a = 0;
                for (row, &w) in x.rows().into_iter().zip(want_train.iter()) {
                    a += usize::from(tree.predict_at_depth(row, d) == w as f64);
                }
                assert!(
                    a as f64 >= 0.99 * n as f64,
                    "seed {seed} depth {d}: {a} of {n} training points agree"
                );
                let mut a = 0;
                for (row, &w) in eval.rows().into_iter().zip(want.iter()) {
                    a += usize::from(tree.predict_at_depth(row, d) == w as f64);
                }
                assert!(
                    a as f64 >= 0.99 * eval.nrows() as f64,
                    "seed {seed} depth {d}: {a} of {} agree",
                    eval.nrows()
                );
                agree += a;
                total += eval.nrows();
            }
        }
        assert!(agree as f64 >= 0.99 * total as f64);
    }
}
