//! The one exact neighbour search, shared by the k-NN family, a twin's k-NN reference and the
//! nearest-neighbour noise estimators.
//!
//! Neighbours are ordered by the key (squared Euclidean distance, training row index): of two
//! rows at exactly the same distance the earlier row (smaller index) comes first, and it is the
//! one kept when the tie straddles the `k`-th place. Squared distances are summed over the inputs
//! left to right from 0.0, so a distance does not depend on how the search is blocked or which
//! search finds it.
//!
//! Two searches return the same keys, bit for bit:
//! - **brute force**, a few linear passes per query: all squared distances in blocks of rows, a
//!   coarse bucketing that bounds the `k`-th distance, and a counting sort of the few candidates
//!   (see `bucket_nearest`); when the distances are not all finite and distinct in range, a
//!   linear-time selection over all keys does the same job;
//! - a **k-d tree** (`KdTree`), built by [`NeighbourIndex::new`] when the table has at most
//!   `TREE_MAX_INPUTS` inputs, at least `TREE_MIN_ROWS` rows and only finite (standardized)
//!   values, and used for a query when the query is finite and `k` is small against the rows
//!   (`tree_pays`). A query then visits the leaves near it and skips every node whose
//!   box is provably farther than the current `k`-th nearest row: on a few thousand rows and
//!   three inputs a query reads a few dozen rows instead of all of them (see the neighbour bench
//!   in `benches/neighbours.rs`). The box bound is computed with the same floating-point
//!   operations as a distance, so it never exceeds the computed distance of a row inside (see
//!   `KdTree::bound`), and a node is skipped only when its bound is strictly above the `k`-th
//!   distance: the tree finds exactly the `k` smallest keys.
//!
//! Everything else (non-finite values, many inputs, small tables, large `k`) takes brute force;
//! the thresholds choose only the speed, never the result.

use std::borrow::Cow;
use std::collections::BinaryHeap;

use ndarray::{ArrayView1, ArrayView2};

use super::standardize::Standardizer;

/// Ordering key of a training row: squared distance in the high 64 bits, row index in the low
/// 64 bits. For non-negative (or infinite) squared distances the IEEE-754 bit pattern orders like
/// the value, so integer comparison of keys is exactly the (distance, index) order; a NaN
/// distance (possible only from non-finite inputs) sorts after every number.
#[inline]
fn key(d2: f64, index: usize) -> u128 {
    (u128::from(d2.to_bits()) << 64) | index as u128
}

/// Training row index stored in a key.
#[inline]
fn key_index(key: u128) -> usize {
    (key & u128::from(u64::MAX)) as usize
}

/// Transposes a row-major `n × p` buffer into column-major order (column `j` occupies
/// `[j * n, (j + 1) * n)`), standardizing by [`Standardizer::z`] when a standardizer is given.
fn column_major(rows: &[f64], n: usize, p: usize, std: Option<&Standardizer>) -> Vec<f64> {
    let mut cols = vec![0.0; n * p];
    for j in 0..p {
        for (i, c) in cols[j * n..(j + 1) * n].iter_mut().enumerate() {
            let v = rows[i * p + j];
            *c = match std {
                Some(s) => s.z(j, v),
                None => v,
            };
        }
    }
    cols
}

/// Training rows per distance block: the partial sums of a block stay in registers while the
/// inputs are scanned.
const DIST_BLOCK: usize = 8;

/// Squared Euclidean distances from `query` to every training row (`cols` column-major, `n`
/// rows), written into `dist`. For every row the sum runs over the inputs left to right starting
/// from 0.0, so the value does not depend on the blocking.
fn distances_into(cols: &[f64], n: usize, query: &[f64], dist: &mut [f64]) {
    let mut chunks = dist.chunks_exact_mut(DIST_BLOCK);
    let mut i0 = 0;
    for chunk in &mut chunks {
        let mut acc = [0.0f64; DIST_BLOCK];
        for (j, &q) in query.iter().enumerate() {
            let c = &cols[j * n + i0..j * n + i0 + DIST_BLOCK];
            for (a, &x) in acc.iter_mut().zip(c) {
                let t = x - q;
                *a += t * t;
            }
        }
        chunk.copy_from_slice(&acc);
        i0 += DIST_BLOCK;
    }
    for (l, d) in chunks.into_remainder().iter_mut().enumerate() {
        let i = i0 + l;
        let mut a = 0.0;
        for (j, &q) in query.iter().enumerate() {
            let t = cols[j * n + i] - q;
            a += t * t;
        }
        *d = a;
    }
}

/// Coarse buckets over the distance range, used to bound the `kmax`-th distance.
const COARSE_BUCKETS: usize = 64;

/// `2^52`: for `0 <= x < 2^52`, the low 52 bits of `x + 2^52` are `x` rounded to the nearest
/// whole number, a monotone map to integers that needs no float-to-integer conversion.
const ROUND_MAGIC: f64 = 4_503_599_627_370_496.0;

/// `x` (finite, `0 <= x < 2^52`) rounded to a whole number, monotone in `x`.
#[inline]
fn round_index(x: f64) -> usize {
    ((x + ROUND_MAGIC).to_bits() & ((1 << 52) - 1)) as usize
}

/// Finds the `kmax` nearest training rows to `query` and leaves their keys, sorted ascending, in
/// `keys[..kmax]`. `cols` holds the training inputs column-major (`n` rows, `query.len()`
/// columns); `dist` (length `n`), `keys` and `counts` are scratch reused across queries;
/// `1 <= kmax <= n`.
///
/// Squared distances are computed in blocks of training rows (see [`distances_into`]); the
/// `kmax` smallest keys are then found by bucketing ([`bucket_nearest`]), or, when the distances
/// are not all finite and distinct in range, by a linear-time selection over all keys.
fn nearest_into(
    cols: &[f64],
    n: usize,
    query: &[f64],
    kmax: usize,
    dist: &mut [f64],
    keys: &mut Vec<u128>,
    counts: &mut Vec<usize>,
) {
    distances_into(cols, n, query, dist);
    if !bucket_nearest(dist, kmax, keys, counts) {
        keys.clear();
        keys.extend(dist.iter().enumerate().map(|(i, &d)| key(d, i)));
        if kmax < keys.len() {
            keys.select_nth_unstable(kmax - 1);
        }
        keys.truncate(kmax);
        keys.sort_unstable();
    }
}

/// Exact `kmax` smallest keys by bucketing, sorted, in `keys[..kmax]`; `false` (and nothing
/// useful in `keys`) when the distances are not all finite or all equal.
///
/// Any map `d -> round((d - lo) × s)` with `s > 0`, computed in floating point, is monotone (each
/// rounding step is), so a row in a higher bucket is strictly farther than every row in a lower
/// one. Step 1 counts rows in [`COARSE_BUCKETS`] buckets over `[min, max]` and keeps, as
/// candidates, the rows of the lowest buckets that together hold at least `kmax` rows: no other
/// row can be among the `kmax` nearest. Step 2 orders the candidates by a counting sort into as
/// many finer buckets as there are candidates, scattering them in row order, so that only rows
/// sharing a fine bucket can be out of (distance, row) order; an insertion sort on the full keys
/// fixes those. The cost is a few linear passes over the distances plus work proportional to the
/// candidates, instead of a selection over all rows and a comparison sort.
fn bucket_nearest(
    dist: &[f64],
    kmax: usize,
    keys: &mut Vec<u128>,
    counts: &mut Vec<usize>,
) -> bool {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    let mut finite = true;
    for &d in dist {
        lo = if d < lo { d } else { lo };
        hi = if d > hi { d } else { hi };
        finite &= d.is_finite();
    }
    let scale = COARSE_BUCKETS as f64 / (hi - lo);
    // `hi > lo` is false for equal distances (and never NaN here: the distances are finite).
    if !finite || hi <= lo || !scale.is_finite() {
        return false;
    }
    // (d - lo) × scale lies in [0, COARSE_BUCKETS] up to rounding: bucket indices 0..=COARSE_BUCKETS.
    let coarse = |d: f64| round_index((d - lo) * scale).min(COARSE_BUCKETS);
    let mut hist = [0usize; COARSE_BUCKETS + 1];
    for &d in dist {
        hist[coarse(d)] += 1;
    }
    let (mut c, mut last) = (0, COARSE_BUCKETS);
    for (b, &h) in hist.iter().enumerate() {
        c += h;
        if c >= kmax {
            last = b;
            break;
        }
    }
    // Candidates, in row order, into keys[..c] (branch-free: always write, advance on a hit);
    // keys[c..2c] receives them sorted.
    keys.clear();
    keys.resize(2 * c + 1, 0);
    let mut w = 0;
    for (i, &d) in dist.iter().enumerate() {
        keys[w] = key(d, i);
        w += usize::from(coarse(d) <= last);
    }
    debug_assert_eq!(w, c);
    let (cand, sorted) = keys.split_at_mut(c);
    let sorted = &mut sorted[..c];
    let cmax = cand.iter().map(|&k| key_distance(k)).fold(lo, f64::max);
    let fine_scale = c as f64 / (cmax - lo);
    if cmax > lo && fine_scale.is_finite() {
        let fine = |d: f64| round_index((d - lo) * fine_scale).min(c);
        counts.clear();
        counts.resize(c + 2, 0);
        for &k in cand.iter() {
            counts[fine(key_distance(k)) + 1] += 1;
        }
        for b in 1..=c + 1 {
            counts[b] += counts[b - 1];
        }
        for &k in cand.iter() {
            let b = fine(key_distance(k));
            sorted[counts[b]] = k;
            counts[b] += 1;
        }
    } else {
        sorted.copy_from_slice(cand);
    }
    // Insertion sort: linear when only rows sharing a fine bucket are out of order. Many close
    // but unequal distances in one bucket could make it quadratic: past a budget of moves, a
    // comparison sort finishes the job (same result, the keys are distinct).
    let mut budget = 16 * c + 64;
    for i in 1..c {
        let x = sorted[i];
        let mut j = i;
        while j > 0 && sorted[j - 1] > x {
            sorted[j] = sorted[j - 1];
            j -= 1;
        }
        sorted[j] = x;
        budget = budget.saturating_sub(i - j);
        if budget == 0 {
            sorted.sort_unstable();
            break;
        }
    }
    keys.copy_within(c..c + kmax, 0);
    keys.truncate(kmax);
    true
}

/// Most inputs for which [`NeighbourIndex::new`] builds a k-d tree: with more, boxes rarely
/// exclude anything and brute force is faster.
const TREE_MAX_INPUTS: usize = 8;

/// Fewest rows for which [`NeighbourIndex::new`] builds a k-d tree.
const TREE_MIN_ROWS: usize = 256;

/// Whether the tree pays for a query of `k` neighbours among `n` rows with `p` inputs: when
/// `2 · 2^p · k <= n`. A query visits roughly the leaves whose boxes meet the ball of its `k`
/// nearest rows, a number that grows like `2^p` and with `k`; measured (`benches/neighbours.rs`,
/// docs/performance.md) the tree wins from about that size on (at n = 1000, p = 5, k = 50 it is
/// 2.5× slower than brute force; at n = 5000 it is 1.4× faster).
fn tree_pays(n: usize, p: usize, k: usize) -> bool {
    p < usize::BITS as usize - 2 && k.saturating_mul(2 << p) <= n
}

/// Most rows in a k-d tree leaf.
const LEAF_SIZE: usize = 12;

/// Squared distance of the row-major point `x` to `q`: over the inputs left to right from 0.0,
/// `t = x - q; a += t * t` (exactly the operations of [`distances_into`]).
#[inline]
fn squared_distance_to(x: &[f64], q: &[f64]) -> f64 {
    let mut a = 0.0;
    for (&x, &q) in x.iter().zip(q) {
        let t = x - q;
        a += t * t;
    }
    a
}

/// Squared distance of a key.
#[inline]
fn key_distance(key: u128) -> f64 {
    f64::from_bits((key >> 64) as u64)
}

/// A node of a [`KdTree`]: the rows at tree positions `start..end`; `left == 0` marks a leaf
/// (the root, node 0, is nobody's child).
#[derive(Debug, Clone, Copy)]
struct Node {
    start: usize,
    end: usize,
    left: usize,
    right: usize,
}

/// An exact k-d tree over the (standardized) rows of a [`NeighbourIndex`], all finite.
///
/// Nodes split their rows in two halves at the median of the input with the widest spread; each
/// node keeps the actual bounding box of its rows. The rows are stored again in tree order,
/// row-major, so that a leaf's rows are contiguous.
#[derive(Debug, Clone)]
struct KdTree {
    p: usize,
    /// Rows in tree order, row-major (`pts[pos * p + j]`), the same values as the index's.
    pts: Vec<f64>,
    /// Training row index at each tree position.
    order: Vec<usize>,
    nodes: Vec<Node>,
    /// Node `i`'s box: lower corner at `[2p·i, 2p·i + p)`, upper corner at `[2p·i + p, 2p·(i+1))`.
    boxes: Vec<f64>,
}

impl KdTree {
    /// Builds the tree over `n` rows stored column-major in `cols` (all finite, `n, p >= 1`).
    fn build(cols: &[f64], n: usize, p: usize) -> KdTree {
        let mut t = KdTree {
            p,
            pts: Vec::with_capacity(n * p),
            order: (0..n).collect(),
            nodes: Vec::with_capacity(2 * n / LEAF_SIZE + 1),
            boxes: Vec::with_capacity(2 * p * (2 * n / LEAF_SIZE + 1)),
        };
        let mut perm = std::mem::take(&mut t.order);
        t.node(cols, n, &mut perm, 0, n);
        for &i in &perm {
            t.pts.extend((0..p).map(|j| cols[j * n + i]));
        }
        t.order = perm;
        t
    }

    /// Adds the node of tree positions `start..end` (and its subtree); returns its number.
    fn node(
        &mut self,
        cols: &[f64],
        n: usize,
        perm: &mut [usize],
        start: usize,
        end: usize,
    ) -> usize {
        let p = self.p;
        let id = self.nodes.len();
        self.nodes.push(Node {
            start,
            end,
            left: 0,
            right: 0,
        });
        let b0 = self.boxes.len();
        self.boxes.resize(b0 + 2 * p, 0.0);
        let (mut widest, mut spread) = (0, 0.0);
        for j in 0..p {
            let c = &cols[j * n..(j + 1) * n];
            let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
            for &i in &perm[start..end] {
                lo = lo.min(c[i]);
                hi = hi.max(c[i]);
            }
            self.boxes[b0 + j] = lo;
            self.boxes[b0 + p + j] = hi;
            if hi - lo > spread {
                (widest, spread) = (j, hi - lo);
            }
        }
        // A node of identical rows (no spread) stays one leaf whatever its size.
        if end - start <= LEAF_SIZE || spread <= 0.0 {
            return id;
        }
        let mid = start + (end - start) / 2;
        let c = &cols[widest * n..(widest + 1) * n];
        perm[start..end]
            .select_nth_unstable_by(mid - start, |&a, &b| c[a].total_cmp(&c[b]).then(a.cmp(&b)));
        let left = self.node(cols, n, perm, start, mid);
        let right = self.node(cols, n, perm, mid, end);
        self.nodes[id].left = left;
        self.nodes[id].right = right;
        id
    }

    /// Bytes the tree holds for `n` rows and `p` inputs (an upper estimate).
    fn bytes(n: usize, p: usize) -> f64 {
        let nodes = (2 * n / LEAF_SIZE + 2) as f64;
        8.0 * (n as f64 * (p as f64 + 1.0)) + nodes * (32.0 + 16.0 * p as f64)
    }

    /// Lower bound of the computed squared distance from `q` to any row in node `id`: over the
    /// inputs left to right from 0.0, `a += g * g` with `g` the gap between `q` and the box
    /// (`lo - q` below it, `q - hi` above it, 0 inside).
    ///
    /// Why it never exceeds a row's computed distance: for a row value `x` in `[lo, hi]` and
    /// `q < lo`, rounding is monotone so `fl(lo - q) <= fl(x - q)`; for `q > hi`,
    /// `fl(q - hi) <= fl(q - x) = |fl(x - q)|` (rounding is symmetric); inside, `0 <= t²`. So
    /// each computed `g²` is at most the row's computed `t²`, and since a rounded sum is
    /// monotone in both terms, every partial sum of the bound is at most the row's.
    #[inline]
    fn bound(&self, id: usize, q: &[f64]) -> f64 {
        let p = self.p;
        let b = &self.boxes[2 * p * id..2 * p * (id + 1)];
        let (lo, hi) = b.split_at(p);
        let mut a = 0.0;
        for ((&q, &lo), &hi) in q.iter().zip(lo).zip(hi) {
            let g = if q < lo {
                lo - q
            } else if q > hi {
                q - hi
            } else {
                0.0
            };
            a += g * g;
        }
        a
    }

    /// The `k` smallest keys (`k >= 1`) among the rows not `exclude`d, sorted, into `keys`
    /// (fewer when fewer rows remain). `q` is finite and standardized like the rows.
    ///
    /// Depth first, nearer child first; a node is skipped when `k` candidates are held and its
    /// bound is strictly greater than the distance of the worst of them: every row in it then
    /// has a greater key than the `k` held. On equal distance it is visited, since a row of
    /// lower index could enter.
    fn nearest(
        &self,
        q: &[f64],
        k: usize,
        exclude: impl Fn(usize) -> bool,
        heap: &mut BinaryHeap<u128>,
        stack: &mut Vec<(usize, f64)>,
        keys: &mut Vec<u128>,
    ) {
        let p = self.p;
        heap.clear();
        stack.clear();
        stack.push((0, self.bound(0, q)));
        while let Some((id, b)) = stack.pop() {
            if heap.len() == k && heap.peek().is_some_and(|&w| b > key_distance(w)) {
                continue;
            }
            let node = self.nodes[id];
            if node.left == 0 {
                let pts = &self.pts[node.start * p..node.end * p];
                for (x, &i) in pts.chunks_exact(p).zip(&self.order[node.start..node.end]) {
                    if exclude(i) {
                        continue;
                    }
                    let kk = key(squared_distance_to(x, q), i);
                    if heap.len() < k {
                        heap.push(kk);
                    } else if let Some(mut top) = heap.peek_mut() {
                        if kk < *top {
                            *top = kk;
                        }
                    }
                }
            } else {
                let (bl, br) = (self.bound(node.left, q), self.bound(node.right, q));
                if bl <= br {
                    stack.push((node.right, br));
                    stack.push((node.left, bl));
                } else {
                    stack.push((node.left, bl));
                    stack.push((node.right, br));
                }
            }
        }
        keys.clear();
        keys.extend(heap.drain());
        keys.sort_unstable();
    }
}

/// Which search a [`NeighbourIndex`] uses. Both return the same neighbours bit for bit; tests
/// and benches force one to compare them.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Search {
    /// The k-d tree when it pays (see the module docs), brute force otherwise.
    Auto,
    /// Always brute force (no tree is built).
    Brute,
    /// The k-d tree whenever the values and the query are finite, whatever the sizes.
    Tree,
}

/// Returns the rows of an `n × p` view as one contiguous row-major slice, borrowing when the view
/// is already in standard layout and copying once otherwise.
pub(crate) fn contiguous<'a>(a: &'a ArrayView2<'_, f64>) -> Cow<'a, [f64]> {
    match a.as_slice() {
        Some(s) => Cow::Borrowed(s),
        None => Cow::Owned(a.iter().copied().collect()),
    }
}

/// A training set prepared for neighbour queries: its rows column-major, optionally
/// standardized, and for few inputs and enough finite rows a k-d tree over them (see the module
/// docs). Immutable and shareable across threads; each thread brings its own [`Scratch`].
#[derive(Debug, Clone)]
pub struct NeighbourIndex {
    cols: Vec<f64>,
    n: usize,
    p: usize,
    std: Option<Standardizer>,
    tree: Option<KdTree>,
    search: Search,
}

/// Per-thread scratch of neighbour queries (distances, keys, bucket counts, the tree search's
/// candidates and stack).
#[derive(Debug, Clone, Default)]
pub struct Scratch {
    dist: Vec<f64>,
    keys: Vec<u128>,
    counts: Vec<usize>,
    query: Vec<f64>,
    heap: BinaryHeap<u128>,
    stack: Vec<(usize, f64)>,
}

impl NeighbourIndex {
    /// Indexes the rows of `x` (`n × p`). With `standardize`, inputs are standardized by the
    /// training mean and sd ([`Standardizer`]) before any distance, and queries by the same
    /// statistics. Builds a k-d tree when it pays (see the module docs).
    pub fn new(x: ArrayView2<'_, f64>, standardize: bool) -> NeighbourIndex {
        NeighbourIndex::with_search(x, standardize, Search::Auto)
    }

    /// [`NeighbourIndex::new`] with the search chosen ([`Search::Auto`] is what `new` does;
    /// tests and benches force one of the two).
    pub fn with_search(
        x: ArrayView2<'_, f64>,
        standardize: bool,
        search: Search,
    ) -> NeighbourIndex {
        let std = standardize.then(|| Standardizer::fit(x));
        NeighbourIndex::build(x, std, search)
    }

    /// Indexes the rows of `x` with inputs standardized by a given standardizer (for example the
    /// table's statistics with weighted inputs, [`Standardizer::weighted`]); queries use the same.
    pub fn with_standardizer(x: ArrayView2<'_, f64>, std: Standardizer) -> NeighbourIndex {
        assert_eq!(std.len(), x.ncols(), "one standardizer column per input");
        NeighbourIndex::build(x, Some(std), Search::Auto)
    }

    fn build(x: ArrayView2<'_, f64>, std: Option<Standardizer>, search: Search) -> NeighbourIndex {
        let (n, p) = x.dim();
        let rows = contiguous(&x);
        let cols = column_major(&rows, n, p, std.as_ref());
        let wanted = match search {
            Search::Auto => p <= TREE_MAX_INPUTS && n >= TREE_MIN_ROWS,
            Search::Brute => false,
            Search::Tree => true,
        };
        let tree = (wanted && n >= 1 && p >= 1 && cols.iter().all(|v| v.is_finite()))
            .then(|| KdTree::build(&cols, n, p));
        NeighbourIndex {
            cols,
            n,
            p,
            std,
            tree,
            search,
        }
    }

    /// Bytes a [`NeighbourIndex`] over `n` rows and `p` inputs holds (an upper estimate: the
    /// standardized rows, and the k-d tree when one may be built).
    pub fn bytes(n: usize, p: usize) -> f64 {
        let tree = if p <= TREE_MAX_INPUTS && n >= TREE_MIN_ROWS {
            KdTree::bytes(n, p)
        } else {
            0.0
        };
        8.0 * (n * p) as f64 + tree
    }

    /// Number of indexed rows.
    pub fn rows(&self) -> usize {
        self.n
    }

    /// The standardizer in use, if any.
    pub fn standardizer(&self) -> Option<&Standardizer> {
        self.std.as_ref()
    }

    /// The tree, when it serves a query for `k` neighbours at the (standardized) `query`.
    fn tree_for(&self, query: &[f64], k: usize) -> Option<&KdTree> {
        let tree = self.tree.as_ref()?;
        let sized = self.search == Search::Tree || tree_pays(self.n, self.p, k);
        (sized && query.iter().all(|v| v.is_finite())).then_some(tree)
    }

    fn prepare_query(&self, row: &[f64], scratch: &mut Scratch) {
        scratch.query.clear();
        match &self.std {
            Some(s) => scratch
                .query
                .extend(row.iter().enumerate().map(|(j, &v)| s.z(j, v))),
            None => scratch.query.extend_from_slice(row),
        }
    }

    /// The `min(k, n)` nearest rows to `row` (raw, unstandardized input values), nearest first,
    /// as row indices written into `out`.
    pub fn nearest(&self, row: &[f64], k: usize, scratch: &mut Scratch, out: &mut Vec<usize>) {
        out.clear();
        let k = k.min(self.n);
        if k == 0 {
            return;
        }
        self.prepare_query(row, scratch);
        let q = std::mem::take(&mut scratch.query);
        self.nearest_keys(&q, k, scratch);
        scratch.query = q;
        out.extend(scratch.keys[..k].iter().map(|&kk| key_index(kk)));
    }

    /// Like [`NeighbourIndex::nearest`], ignoring the rows for which `exclude` is true (for
    /// example the query row itself, or the rows of a cross-validation fold). Returns fewer than
    /// `k` rows when fewer remain.
    pub fn nearest_excluding(
        &self,
        row: &[f64],
        k: usize,
        exclude: impl Fn(usize) -> bool,
        scratch: &mut Scratch,
        out: &mut Vec<usize>,
    ) {
        out.clear();
        self.prepare_query(row, scratch);
        let k = k.min(self.n);
        if k == 0 {
            return;
        }
        if let Some(tree) = self.tree_for(&scratch.query, k) {
            tree.nearest(
                &scratch.query,
                k,
                exclude,
                &mut scratch.heap,
                &mut scratch.stack,
                &mut scratch.keys,
            );
            out.extend(scratch.keys.iter().map(|&kk| key_index(kk)));
            return;
        }
        scratch.dist.resize(self.n, 0.0);
        distances_into(&self.cols, self.n, &scratch.query, &mut scratch.dist);
        scratch.keys.clear();
        scratch.keys.extend(
            scratch
                .dist
                .iter()
                .enumerate()
                .filter(|(i, _)| !exclude(*i))
                .map(|(i, &d)| key(d, i)),
        );
        let k = k.min(scratch.keys.len());
        if k == 0 {
            return;
        }
        if k < scratch.keys.len() {
            scratch.keys.select_nth_unstable(k - 1);
        }
        scratch.keys.truncate(k);
        scratch.keys.sort_unstable();
        out.extend(scratch.keys.iter().map(|&kk| key_index(kk)));
    }

    /// Squared distance (in the index's standardized space) between row `i` of the index and the
    /// raw input `row`.
    pub fn squared_distance(&self, i: usize, row: &[f64]) -> f64 {
        let mut a = 0.0;
        for (j, &v) in row.iter().enumerate().take(self.p) {
            let q = match &self.std {
                Some(s) => s.z(j, v),
                None => v,
            };
            let t = self.cols[j * self.n + i] - q;
            a += t * t;
        }
        a
    }

    /// Raw query loop used by the k-NN family: the sorted keys of the `kmax` nearest rows to an
    /// already-standardized query (`1 <= kmax <= n`).
    pub(crate) fn nearest_keys<'s>(
        &self,
        query: &[f64],
        kmax: usize,
        scratch: &'s mut Scratch,
    ) -> &'s [u128] {
        if let Some(tree) = self.tree_for(query, kmax) {
            tree.nearest(
                query,
                kmax,
                |_| false,
                &mut scratch.heap,
                &mut scratch.stack,
                &mut scratch.keys,
            );
            return &scratch.keys[..kmax];
        }
        scratch.dist.resize(self.n, 0.0);
        nearest_into(
            &self.cols,
            self.n,
            query,
            kmax,
            &mut scratch.dist,
            &mut scratch.keys,
            &mut scratch.counts,
        );
        &scratch.keys[..kmax]
    }
}

/// Training row index stored in a neighbour key.
#[inline]
pub(crate) fn index_of(k: u128) -> usize {
    key_index(k)
}

/// Indices of the `k` nearest rows of `train` to `query`, nearest first, ordered by
/// (squared Euclidean distance, row index): of two rows at the same distance the earlier row comes
/// first. Distances are on the values as given (no standardisation). Returns `min(k, n)` indices.
///
/// # Panics
///
/// If `query.len() != train.ncols()` (a programming error, not a user input).
pub fn neighbours(train: ArrayView2<f64>, query: ArrayView1<f64>, k: usize) -> Vec<usize> {
    assert_eq!(
        query.len(),
        train.ncols(),
        "query length must equal the number of training columns"
    );
    let (n, p) = train.dim();
    let k = k.min(n);
    if k == 0 {
        return Vec::new();
    }
    let cols = column_major(&contiguous(&train), n, p, None);
    let q: Vec<f64> = query.iter().copied().collect();
    let mut dist = vec![0.0; n];
    let mut keys = Vec::with_capacity(n);
    let mut counts = Vec::new();
    nearest_into(&cols, n, &q, k, &mut dist, &mut keys, &mut counts);
    keys[..k].iter().map(|&kk| key_index(kk)).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn exclusion_skips_rows_and_keeps_the_distance_order() {
        // Points on a line at 0, 1, 2, 3, 4: from 2.1 the order is 2, 3, 1, 4, 0.
        let x = Array2::from_shape_fn((5, 1), |(i, _)| i as f64);
        let idx = NeighbourIndex::new(x.view(), false);
        let mut s = Scratch::default();
        let mut out = Vec::new();
        idx.nearest(&[2.1], 5, &mut s, &mut out);
        assert_eq!(out, vec![2, 3, 1, 4, 0]);
        idx.nearest_excluding(&[2.1], 3, |i| i == 2 || i == 1, &mut s, &mut out);
        assert_eq!(out, vec![3, 4, 0]);
        idx.nearest_excluding(&[2.1], 9, |i| i != 0, &mut s, &mut out);
        assert_eq!(out, vec![0]);
        // Ties go to the lower index: 1.5 is equally far from rows 1 and 2.
        idx.nearest(&[1.5], 1, &mut s, &mut out);
        assert_eq!(out, vec![1]);
    }
    /// Every key of `x` (standardized like `idx`) from the raw query `row`, sorted, with the
    /// excluded rows left out: the plain definition the searches must match.
    fn oracle(
        idx: &NeighbourIndex,
        row: &[f64],
        k: usize,
        exclude: &dyn Fn(usize) -> bool,
    ) -> Vec<u128> {
        let mut keys: Vec<u128> = (0..idx.n)
            .filter(|&i| !exclude(i))
            .map(|i| key(idx.squared_distance(i, row), i))
            .collect();
        keys.sort_unstable();
        keys.truncate(k);
        keys
    }

    /// A random table of one of several kinds, most of them full of exact ties.
    fn table(rng: &mut ChaCha8Rng, n: usize, p: usize, kind: usize) -> Array2<f64> {
        let grid = rng.gen_range(1..=6) as f64;
        let scales: Vec<f64> = (0..p)
            .map(|_| [1.0, 1.0, 1e-3, 1e4][rng.gen_range(0..4)])
            .collect();
        let mut x = Array2::from_shape_fn((n, p), |(_, j)| match kind {
            // Integer grid: many rows at equal distances, many duplicates.
            0 => rng.gen_range(0..=grid as i64) as f64,
            // Continuous, columns on different scales.
            1 => rng.gen::<f64>() * scales[j],
            // Half-integer grid shifted away from zero.
            _ => 10.0 + 0.5 * rng.gen_range(0..=grid as i64) as f64,
        });
        match rng.gen_range(0..5) {
            // Duplicated rows: every row a copy of one of a few distinct rows.
            0 => {
                let distinct = rng.gen_range(1..=n.min(20));
                for i in distinct..n {
                    let src = rng.gen_range(0..distinct);
                    let r = x.row(src).to_owned();
                    x.row_mut(i).assign(&r);
                }
            }
            // Constant columns.
            1 => {
                for j in 0..p {
                    if rng.gen_bool(0.4) {
                        x.column_mut(j).fill(3.25);
                    }
                }
            }
            // All rows identical.
            2 => {
                let r = x.row(0).to_owned();
                for i in 1..n {
                    x.row_mut(i).assign(&r);
                }
            }
            _ => {}
        }
        x
    }

    /// A query: a table row, a random point of the table's kind, or a point outside the range.
    fn query(rng: &mut ChaCha8Rng, x: &Array2<f64>) -> (Vec<f64>, Option<usize>) {
        let (n, p) = x.dim();
        let r = rng.gen_range(0..n);
        match rng.gen_range(0..4) {
            0 | 1 => (x.row(r).to_vec(), Some(r)),
            2 => {
                // A table row with some inputs moved to another row's value or half-way.
                let s = rng.gen_range(0..n);
                let q = (0..p)
                    .map(|j| match rng.gen_range(0..3) {
                        0 => x[[r, j]],
                        1 => x[[s, j]],
                        _ => 0.5 * (x[[r, j]] + x[[s, j]]),
                    })
                    .collect();
                (q, None)
            }
            _ => {
                let q = (0..p)
                    .map(|j| {
                        let c = x.column(j);
                        let lo = c.iter().copied().fold(f64::INFINITY, f64::min);
                        let hi = c.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                        let w = (hi - lo).max(1.0);
                        lo - 0.5 * w + 2.0 * w * rng.gen::<f64>()
                    })
                    .collect();
                (q, None)
            }
        }
    }

    /// Runs one query through the brute-force and tree indexes (and the default one) with `k`
    /// neighbours and the exclusion `exclude`, and checks that the neighbour lists and keys are
    /// equal to each other and to the plain definition.
    fn check_query(
        idx: [&NeighbourIndex; 3],
        s: &mut [Scratch; 3],
        row: &[f64],
        k: usize,
        exclude: Option<&dyn Fn(usize) -> bool>,
        what: &str,
    ) {
        let none = |_: usize| false;
        let ex: &dyn Fn(usize) -> bool = exclude.unwrap_or(&none);
        let want = oracle(idx[0], row, k, ex);
        let want_rows: Vec<usize> = want.iter().map(|&kk| key_index(kk)).collect();
        for (m, ix) in idx.iter().enumerate() {
            let mut out = Vec::new();
            match exclude {
                None => {
                    ix.nearest(row, k, &mut s[m], &mut out);
                    assert_eq!(out, want_rows, "{what}: nearest, search {m}");
                    let kk = want.len();
                    if kk > 0 {
                        let q: Vec<f64> = match ix.standardizer() {
                            Some(st) => row.iter().enumerate().map(|(j, &v)| st.z(j, v)).collect(),
                            None => row.to_vec(),
                        };
                        let keys = ix.nearest_keys(&q, kk, &mut s[m]);
                        assert_eq!(keys, &want[..], "{what}: nearest_keys, search {m}");
                    }
                }
                Some(e) => {
                    ix.nearest_excluding(row, k, e, &mut s[m], &mut out);
                    assert_eq!(out, want_rows, "{what}: nearest_excluding, search {m}");
                    if !want.is_empty() {
                        assert_eq!(s[m].keys, want, "{what}: excluding keys, search {m}");
                    }
                }
            }
        }
    }

    #[test]
    fn tree_and_brute_force_return_the_same_neighbours_bit_for_bit() {
        let mut rng = ChaCha8Rng::seed_from_u64(0x6b64_7472_6565);
        let mut trees = 0;
        let mut deep = 0;
        for case in 0..600 {
            // n log-uniform in 1..=3000, with the extremes drawn on purpose.
            let n = match case % 13 {
                0 => 1,
                1 => 2,
                2 => rng.gen_range(2900..=3000),
                _ => (3000f64.powf(rng.gen::<f64>())).round().max(1.0) as usize,
            };
            let p = rng.gen_range(1..=8);
            let kind = rng.gen_range(0..3);
            let standardize = rng.gen_bool(0.5);
            let x = table(&mut rng, n, p, kind);
            let brute = NeighbourIndex::with_search(x.view(), standardize, Search::Brute);
            let tree = NeighbourIndex::with_search(x.view(), standardize, Search::Tree);
            let auto = NeighbourIndex::new(x.view(), standardize);
            assert!(brute.tree.is_none());
            let t = tree.tree.as_ref().expect("finite table: the tree is built");
            trees += 1;
            deep += usize::from(t.nodes.len() > 15);
            let idx = [&brute, &tree, &auto];
            let mut s: [Scratch; 3] = Default::default();
            let fold: Vec<usize> = (0..n).map(|_| rng.gen_range(0..5)).collect();
            let queries = if n > 1000 { 6 } else { 12 };
            for qn in 0..queries {
                let (row, at) = query(&mut rng, &x);
                let r = at.unwrap_or_else(|| rng.gen_range(0..n));
                let f = fold[r];
                let keep = rng.gen_range(0..n);
                let ks = [
                    1,
                    rng.gen_range(1..=n + 5),
                    rng.gen_range(1..=n.min(60)),
                    n,
                    n + 5,
                ];
                let k = ks[qn % ks.len()];
                let what = format!(
                    "case {case} (n {n}, p {p}, kind {kind}, std {standardize}), query {qn}, k {k}"
                );
                check_query(idx, &mut s, &row, k, None, &what);
                let self_ex = move |j: usize| j == r;
                let fold_ex = |j: usize| fold[j] == f;
                let all_but_one = move |j: usize| j != keep;
                let all = |_: usize| true;
                let exclusions: [&dyn Fn(usize) -> bool; 4] =
                    [&self_ex, &fold_ex, &all_but_one, &all];
                for (e, ex) in exclusions.into_iter().enumerate() {
                    check_query(
                        idx,
                        &mut s,
                        &row,
                        k,
                        Some(ex),
                        &format!("{what}, exclusion {e}"),
                    );
                }
            }
        }
        assert_eq!(trees, 600);
        assert!(deep > 120, "only {deep} deep trees");
    }

    #[test]
    fn non_finite_values_and_queries_take_brute_force_with_the_same_result() {
        let mut rng = ChaCha8Rng::seed_from_u64(17);
        for case in 0..40 {
            let n = rng.gen_range(300..700);
            let p = rng.gen_range(1..=4);
            let mut x = table(&mut rng, n, p, case % 3);
            let bad = [f64::NAN, f64::INFINITY, f64::NEG_INFINITY, 1e300];
            if case % 2 == 0 {
                for _ in 0..rng.gen_range(1..4) {
                    let (i, j) = (rng.gen_range(0..n), rng.gen_range(0..p));
                    x[[i, j]] = bad[rng.gen_range(0..4)];
                }
            }
            let standardize = rng.gen_bool(0.5);
            let brute = NeighbourIndex::with_search(x.view(), standardize, Search::Brute);
            let tree = NeighbourIndex::with_search(x.view(), standardize, Search::Tree);
            let auto = NeighbourIndex::new(x.view(), standardize);
            let mut s: [Scratch; 3] = Default::default();
            for qn in 0..10 {
                let (mut row, _) = query(&mut rng, &x);
                if qn % 2 == 0 {
                    row[rng.gen_range(0..p)] = bad[rng.gen_range(0..4)];
                }
                for k in [1, 7, n] {
                    let idx = [&brute, &tree, &auto];
                    let mut want = Vec::new();
                    brute.nearest(&row, k, &mut s[0], &mut want);
                    for (m, ix) in idx.iter().enumerate().skip(1) {
                        let mut out = Vec::new();
                        ix.nearest(&row, k, &mut s[m], &mut out);
                        assert_eq!(out, want, "case {case} query {qn} k {k} search {m}");
                    }
                    brute.nearest_excluding(&row, k, |j| j % 3 == 0, &mut s[0], &mut want);
                    for (m, ix) in idx.iter().enumerate().skip(1) {
                        let mut out = Vec::new();
                        ix.nearest_excluding(&row, k, |j| j % 3 == 0, &mut s[m], &mut out);
                        assert_eq!(
                            out, want,
                            "case {case} query {qn} k {k} search {m} (excluding)"
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn overflowing_distances_stay_exact_in_the_tree() {
        // Finite values whose squared differences overflow to infinity: the tree is still
        // built (every value is finite) and must agree with brute force on the infinite keys.
        let mut rng = ChaCha8Rng::seed_from_u64(99);
        let x = Array2::from_shape_fn((600, 2), |_| {
            [-1e200, 1e200, 0.0, 1.0][rng.gen_range(0..4)] * rng.gen_range(1..4) as f64
        });
        let brute = NeighbourIndex::with_search(x.view(), false, Search::Brute);
        let tree = NeighbourIndex::with_search(x.view(), false, Search::Tree);
        assert!(tree.tree.is_some());
        let mut s: [Scratch; 2] = Default::default();
        for qn in 0..30 {
            let row = x.row(qn * 7).to_vec();
            for k in [1, 5, 150, 600] {
                let (mut a, mut b) = (Vec::new(), Vec::new());
                brute.nearest(&row, k, &mut s[0], &mut a);
                tree.nearest(&row, k, &mut s[1], &mut b);
                assert_eq!(a, b, "query {qn} k {k}");
            }
        }
    }
}
