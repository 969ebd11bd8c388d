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
//! # Tie rule (deterministic)
//!
//! Splits are compared exactly (no tolerance): among splits with equal impurity decrease the
//! lower input index wins, then the lower threshold. Inputs are scanned in index order and
//! thresholds in ascending order, and a candidate replaces the incumbent only if it is strictly
//! better. For Gini the comparison is done in exact integer arithmetic on class counts (training
//! sets up to 2²¹ rows; above that, in `f64`), so mathematically equal decreases are recognised as
//! ties. For squared error and entropy the comparison is on the computed `f64` criterion.
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
//! CART's greedy choice at a node depends only on the samples in that node, never on the depth
//! limit, so the tree grown to depth `D` and cut at depth `d < D` is exactly the tree grown with
//! `max_depth = d`, provided every internal node stores its own prediction. [`TreeFamily`] therefore
//! grows one tree to the largest grid depth and, for every evaluation point, walks down once,
//! recording the node prediction at every depth; grid value `d` reads the value at
//! `min(d, leaf depth)`.
//!
//! # Speed
//!
//! Each input's sample indices are sorted once at the root; at every split the sorted lists are
//! partitioned stably into the two children (no re-sorting). Nodes live in one flat arena and are
//! grown depth-first with an explicit stack.

use std::sync::Arc;

use ndarray::{ArrayView1, ArrayView2};

use super::{
    check_out, check_whole_grid, smoothed_shares, BuildContext, Caps, Family, FitError, FitInput,
    OptionError, Options, Out, Task,
};

/// Largest depth a grid may ask for.
const MAX_GRID_DEPTH: usize = 64;

/// Relative tolerance for "the decrease is strictly positive" (regression and entropy).
const REL_TOL: f64 = 1e-12;

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
}

impl Default for TreeFamily {
    fn default() -> Self {
        Self {
            min_samples_leaf: 1,
            criterion: Criterion::Gini,
            alpha: 0.0,
        }
    }
}

/// Builds `family = "tree"` from its options (`min_samples_leaf`, `criterion`, `alpha`).
pub fn build(opts: &mut Options, _cx: &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError> {
    let mut t = TreeFamily::default();
    if let Some(l) = opts.int("min_samples_leaf", 1, 1_000_000_000)? {
        t.min_samples_leaf = l as usize;
    }
    if let Some(c) = opts.choice("criterion", &["gini", "entropy"])? {
        t.criterion = if c == "gini" {
            Criterion::Gini
        } else {
            Criterion::Entropy
        };
    }
    if let Some(a) = opts.number("alpha", 0.0, 1e6)? {
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
        let mut node = self.nodes[0];
        let mut d = 0;
        while node.left != 0 && d < depth {
            node = self.nodes[node.left as usize + right_offset(row[node.feature as usize], node)];
            d += 1;
        }
        node.value
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
        classes: usize,
        criterion: Criterion,
        /// `k ln k` for `k = 0..=n` (entropy only; empty for Gini).
        xlogx: &'a [f64],
    },
}

/// Scratch and sorted lists shared by the whole growth of one tree.
struct Grower<'a> {
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
}

impl TreeFamily {
    /// Grows one tree on `x` (`n × p`) and `y` to depth `max_depth` (root depth 0, so
    /// `max_depth = 1` is one split). Every node stores its prediction, so the result can be read
    /// at any shallower depth with [`Tree::predict_at_depth`].
    ///
    /// Errors on an empty training set, mismatched lengths, non-finite inputs or responses, labels
    /// that are not class indices `0..classes`, or more than `u32::MAX` rows.
    pub fn grow(
        &self,
        x: ArrayView2<f64>,
        y: ArrayView1<f64>,
        task: Task,
        max_depth: usize,
    ) -> Result<Tree, FitError> {
        let (n, p) = x.dim();
        if n == 0 {
            return Err(FitError("tree: the training set is empty".into()));
        }
        if y.len() != n {
            return Err(FitError(format!(
                "tree: {} training rows but {} responses",
                n,
                y.len()
            )));
        }
        if n >= u32::MAX as usize || p >= u32::MAX as usize {
            return Err(FitError(format!(
                "tree: training set of {n} × {p} is too large"
            )));
        }
        if let Some((i, &v)) = y.iter().enumerate().find(|(_, v)| !v.is_finite()) {
            return Err(FitError(format!(
                "tree: response {v} at training row {i} is not a finite number"
            )));
        }
        if let Some(((i, j), &v)) = x.indexed_iter().find(|(_, v)| !v.is_finite()) {
            return Err(FitError(format!(
                "tree: input {} of {p} (in scenario or table order) is {v} at training row {i}, not a finite number", j + 1
            )));
        }

        let yv: Vec<f64> = y.iter().copied().collect();
        let labels: Vec<u32>;
        let xlogx: Vec<f64>;
        let target = match task {
            Task::Regress => Target::Regress(&yv),
            Task::Classify { classes } => {
                if classes == 0 || classes > u32::MAX as usize {
                    return Err(FitError(format!(
                        "tree: invalid number of classes {classes}"
                    )));
                }
                let mut l = Vec::with_capacity(n);
                for (i, &v) in yv.iter().enumerate() {
                    if v < 0.0 || v.fract() != 0.0 || v >= classes as f64 {
                        return Err(FitError(format!(
                            "tree: label {v} at training row {i} is not a class index 0 to {} ({classes} classes)", classes - 1
                        )));
                    }
                    l.push(v as u32);
                }
                labels = l;
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
                    classes,
                    criterion: self.criterion,
                    xlogx: &xlogx,
                }
            }
        };

        // Presort every input once.
        let mut idx = vec![0u32; n * p];
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
            let col = x.column(f);
            for (k, &(_, i)) in pairs.iter().enumerate() {
                idx[f * n + k] = i;
                val[f * n + k] = col[i as usize] + 0.0;
            }
        }
        let classes = match task {
            Task::Classify { classes } => classes,
            Task::Regress => 0,
        };
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
        };
        Ok(g.grow(max_depth))
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
        // (node, start, end, depth)
        let mut stack: Vec<(u32, u32, u32, u32)> = vec![(0, 0, n as u32, 0)];
        while let Some((node, start, end, depth)) = stack.pop() {
            let (start, end, depth) = (start as usize, end as usize, depth as usize);
            tree_depth = tree_depth.max(depth);
            let (value, splittable) = self.node_summary(start, end);
            nodes[node as usize].value = value;
            if classes > 0 {
                let at = node as usize * classes;
                if counts.len() < at + classes {
                    counts.resize(at + classes, 0);
                }
                for (c, &k) in counts[at..at + classes].iter_mut().zip(&self.counts) {
                    *c = k as u32;
                }
            }
            let len = end - start;
            let Some(stats) = splittable else { continue };
            if depth >= max_depth || len < 2 * self.min_leaf {
                continue;
            }
            let Some(split) = self.best_split(start, end, stats) else {
                continue;
            };
            self.partition(start, end, split);
            let left = nodes.len() as u32;
            let blank = Node {
                threshold: 0.0,
                value: 0.0,
                feature: 0,
                left: 0,
            };
            nodes.push(blank);
            nodes.push(blank);
            let nd = &mut nodes[node as usize];
            nd.feature = split.feature as u32;
            nd.threshold = split.threshold;
            nd.left = left;
            let mid = start + split.n_left;
            let cd = (depth + 1) as u32;
            stack.push((left + 1, mid as u32, end as u32, cd));
            stack.push((left, start as u32, mid as u32, cd));
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
                let first = y[seg[0] as usize];
                let mut sum = 0.0;
                let mut all_equal = true;
                for &i in seg {
                    let v = y[i as usize];
                    sum += v;
                    all_equal &= v == first;
                }
                let mean = sum / len as f64;
                if all_equal {
                    return (mean, None);
                }
                let mut sse = 0.0;
                for &i in seg {
                    let d = y[i as usize] - mean;
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
                classes,
                criterion: Criterion::Gini,
                ..
            } => self.best_split_gini(labels, classes, start, end),
            Target::Classify {
                labels,
                classes,
                criterion: Criterion::Entropy,
                xlogx,
            } => self.best_split_entropy(labels, classes, xlogx, start, end),
        }
    }

    fn best_split_regress(
        &self,
        y: &[f64],
        start: usize,
        end: usize,
        (mean, sse): (f64, f64),
    ) -> Option<Split> {
        let (n, len, ml) = (self.n, end - start, self.min_leaf);
        // Total of the centred responses (zero up to rounding), in feature-0 order.
        let tc: f64 = self.idx[start..end]
            .iter()
            .map(|&i| y[i as usize] - mean)
            .sum();
        let mut best_score = f64::NEG_INFINITY;
        let mut best: Option<Split> = None;
        for f in 0..self.p {
            let idx = &self.idx[f * n + start..f * n + end];
            let val = &self.val[f * n + start..f * n + end];
            let mut sl = 0.0;
            for &i in &idx[..ml - 1] {
                sl += y[i as usize] - mean;
            }
            // Candidate: first nl = k + 1 samples go left.
            for k in (ml - 1)..(len - ml) {
                sl += y[idx[k] as usize] - mean;
                let (a, b) = (val[k], val[k + 1]);
                if a == b {
                    continue;
                }
                let nl = (k + 1) as f64;
                let nr = (len - k - 1) as f64;
                let sr = tc - sl;
                let score = sl * sl / nl + sr * sr / nr;
                if score > best_score {
                    best_score = score;
                    best = Some(Split {
                        feature: f,
                        n_left: k + 1,
                        threshold: midpoint(a, b),
                    });
                }
            }
        }
        let decrease = best_score - tc * tc / len as f64;
        if decrease > REL_TOL * sse {
            best
        } else {
            None
        }
    }

    fn best_split_gini(
        &mut self,
        labels: &[u32],
        classes: usize,
        start: usize,
        end: usize,
    ) -> Option<Split> {
        let (n, len, ml) = (self.n, end - start, self.min_leaf);
        let exact = n <= EXACT_GINI_MAX_N;
        // Σ_c t_c² for the node.
        let st2: u64 = self.counts.iter().map(|&c| c * c).sum();
        // Incumbent score as a fraction num/den = (sl2·nr + sr2·nl)/(nl·nr); start from the
        // parent's Σt²/len so that only strictly positive decreases are accepted.
        let mut best_num = st2;
        let mut best_den = len as u64;
        let mut best_f = st2 as f64 / len as f64;
        let mut best: Option<Split> = None;
        for f in 0..self.p {
            let idx = &self.idx[f * n + start..f * n + end];
            let val = &self.val[f * n + start..f * n + end];
            self.left_counts[..classes].iter_mut().for_each(|c| *c = 0);
            let lc = &mut self.left_counts;
            let tcnt = &self.counts;
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
                let better = if exact {
                    let num = sl2 * nr + sr2 * nl;
                    let den = nl * nr;
                    if (num as u128) * (best_den as u128) > (best_num as u128) * (den as u128) {
                        best_num = num;
                        best_den = den;
                        true
                    } else {
                        false
                    }
                } else {
                    let s = sl2 as f64 / nl as f64 + sr2 as f64 / nr as f64;
                    if s > best_f {
                        best_f = s;
                        true
                    } else {
                        false
                    }
                };
                if better {
                    best = Some(Split {
                        feature: f,
                        n_left: k + 1,
                        threshold: midpoint(a, b),
                    });
                }
            }
        }
        best
    }

    fn best_split_entropy(
        &mut self,
        labels: &[u32],
        classes: usize,
        xlogx: &[f64],
        start: usize,
        end: usize,
    ) -> Option<Split> {
        let (n, len, ml) = (self.n, end - start, self.min_leaf);
        // n·H = n ln n - Σ_c t_c ln t_c.
        let parent_cost = xlogx[len] - self.counts.iter().map(|&c| xlogx[c as usize]).sum::<f64>();
        let mut best_cost = f64::INFINITY;
        let mut best: Option<Split> = None;
        for f in 0..self.p {
            let idx = &self.idx[f * n + start..f * n + end];
            let val = &self.val[f * n + start..f * n + end];
            self.left_counts[..classes].iter_mut().for_each(|c| *c = 0);
            for &i in &idx[..ml - 1] {
                self.left_counts[labels[i as usize] as usize] += 1;
            }
            for k in (ml - 1)..(len - ml) {
                self.left_counts[labels[idx[k] as usize] as usize] += 1;
                let (a, b) = (val[k], val[k + 1]);
                if a == b {
                    continue;
                }
                let nl = k + 1;
                let nr = len - nl;
                let mut cost = xlogx[nl] + xlogx[nr];
                for (&l, &t) in self.left_counts.iter().zip(self.counts.iter()) {
                    cost -= xlogx[l as usize] + xlogx[(t - l) as usize];
                }
                if cost < best_cost {
                    best_cost = cost;
                    best = Some(Split {
                        feature: f,
                        n_left: nl,
                        threshold: midpoint(a, b),
                    });
                }
            }
        }
        if parent_cost - best_cost > REL_TOL * xlogx[len] {
            best
        } else {
            None
        }
    }

    /// Stably partitions every input's sorted range `start..end` into the left child's samples
    /// followed by the right child's.
    fn partition(&mut self, start: usize, end: usize, split: Split) {
        let n = self.n;
        let mid = start + split.n_left;
        let fs = split.feature;
        for &i in &self.idx[fs * n + start..fs * n + mid] {
            self.goes_left[i as usize] = true;
        }
        for &i in &self.idx[fs * n + mid..fs * n + end] {
            self.goes_left[i as usize] = false;
        }
        for f in 0..self.p {
            if f == fs {
                continue;
            }
            let idx = &mut self.idx[f * n + start..f * n + end];
            let val = &mut self.val[f * n + start..f * n + end];
            let mut w = 0;
            let mut r = 0;
            // Branch-free: write to both destinations, advance one (directions are unpredictable).
            let (sidx, sval) = (&mut self.scratch_idx, &mut self.scratch_val);
            for k in 0..idx.len() {
                let (i, v) = (idx[k], val[k]);
                let l = usize::from(self.goes_left[i as usize]);
                idx[w] = i;
                val[w] = v;
                sidx[r] = i;
                sval[r] = v;
                w += l;
                r += 1 - l;
            }
            idx[w..].copy_from_slice(&self.scratch_idx[..r]);
            val[w..].copy_from_slice(&self.scratch_val[..r]);
        }
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
        let tree = self.grow(input.x, input.y, input.task, deepest)?;
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
    use ndarray::{Array1, Array2};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

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
                    alpha: 0.0,
                    min_samples_leaf: 3,
                    criterion: Criterion::Entropy,
                },
                yc.view(),
                Task::Classify { classes: 3 },
            ),
        ];
        for (fam, y, task) in cases {
            let deep = fam.grow(x.view(), y, task, 8).unwrap();
            assert_eq!(deep.depth(), 8);
            for d in 1..=8 {
                let shallow = fam.grow(x.view(), y, task, d).unwrap();
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
                let shallow = fam.grow(x.view(), y, task, d).unwrap();
                for (e, row) in eval.rows().into_iter().enumerate() {
                    assert_eq!(out[[d - 1, e]], shallow.predict_at_depth(row, 64));
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
        let tree = fam.grow(x.view(), y.view(), Task::Regress, 1).unwrap();
        assert_eq!(tree.n_nodes(), 3);
        let root = tree.nodes[0];
        assert_eq!(root.feature, 0);
        assert_eq!(root.threshold, 0.5 * 0.25 + 0.5 * 0.35);
        assert_eq!(tree.nodes[root.left as usize].value, 5.0);
        assert_eq!(tree.nodes[root.left as usize + 1].value, 1.0);
        // Root stores the overall mean (3·5 + 4·1)/7.
        assert_eq!(root.value, 19.0 / 7.0);
        // Pure children stay leaves even when deeper growth is allowed.
        let deep = fam.grow(x.view(), y.view(), Task::Regress, 10).unwrap();
        assert_eq!(deep.n_nodes(), 3);
    }

    #[test]
    fn full_regression_tree_interpolates() {
        // Exact identity: with distinct inputs and min_samples_leaf 1 every leaf holds one sample.
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let x = random_x(&mut rng, 250, 3);
        let y = regress_y(&mut rng, &x);
        let tree = TreeFamily::default()
            .grow(x.view(), y.view(), Task::Regress, 64)
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
                    alpha: 0.0,
                    min_samples_leaf: ml,
                    criterion,
                };
                for (y, task) in [
                    (yr.view(), Task::Regress),
                    (yc.view(), Task::Classify { classes: 3 }),
                ] {
                    let tree = fam.grow(x.view(), y, task, 64).unwrap();
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
        assert!(fam.grow(x.view(), y.view(), Task::Regress, 3).is_err());
        let mut x = Array2::<f64>::zeros((4, 2));
        let y = Array1::from(vec![0.0, 1.0, 0.0, 1.0]);
        x[[2, 1]] = f64::NAN;
        assert!(fam.grow(x.view(), y.view(), Task::Regress, 3).is_err());
        x[[2, 1]] = 0.0;
        let bad_y = Array1::from(vec![0.0, f64::NAN, 0.0, 1.0]);
        assert!(fam.grow(x.view(), bad_y.view(), Task::Regress, 3).is_err());
        let bad_lab = Array1::from(vec![0.0, 2.0, 0.0, 1.0]);
        let task = Task::Classify { classes: 2 };
        assert!(fam.grow(x.view(), bad_lab.view(), task, 3).is_err());
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
    fn ties_prefer_lower_feature_then_lower_threshold() {
        // Two identical inputs give identical splits, so the lower input index must win. y is
        // symmetric, so splitting off the first sample (threshold 0.15) or the last (0.35) gives
        // the same decrease, and the lower threshold must win.
        let v = [0.1, 0.2, 0.3, 0.4];
        let x = Array2::from_shape_fn((4, 2), |(i, _)| v[i]);
        let y = Array1::from(vec![1.0, 0.0, 0.0, 1.0]);
        for task in [Task::Regress, Task::Classify { classes: 2 }] {
            let tree = TreeFamily::default()
                .grow(x.view(), y.view(), task, 1)
                .unwrap();
            assert_eq!(tree.nodes[0].feature, 0);
            assert_eq!(tree.nodes[0].threshold, 0.5 * 0.1 + 0.5 * 0.2);
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
                    .grow(x.view(), y.view(), Task::Classify { classes: 3 }, d)
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
