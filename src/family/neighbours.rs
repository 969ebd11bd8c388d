//! The one exact neighbour search, shared by the k-NN family, a twin's k-NN reference and the
//! nearest-neighbour noise estimators.
//!
//! Neighbours are ordered by the key (squared Euclidean distance, training row index): of two
//! rows at exactly the same distance the earlier row (smaller index) comes first, and it is the
//! one kept when the tie straddles the `k`-th place. Squared distances are summed over the inputs
//! left to right from 0.0, so a distance does not depend on how the search is blocked.
//!
//! Finding the `k` nearest of `n` rows costs a few linear passes: all squared distances in
//! blocks of rows, a coarse bucketing that bounds the `k`-th distance, and a counting sort of the
//! few candidates (see `bucket_nearest`); when the distances are not all finite and distinct in
//! range, a linear-time selection over all keys does the same job.

use std::borrow::Cow;

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
    let dist_of = |k: u128| f64::from_bits((k >> 64) as u64);
    let cmax = cand.iter().map(|&k| dist_of(k)).fold(lo, f64::max);
    let fine_scale = c as f64 / (cmax - lo);
    if cmax > lo && fine_scale.is_finite() {
        let fine = |d: f64| round_index((d - lo) * fine_scale).min(c);
        counts.clear();
        counts.resize(c + 2, 0);
        for &k in cand.iter() {
            counts[fine(dist_of(k)) + 1] += 1;
        }
        for b in 1..=c + 1 {
            counts[b] += counts[b - 1];
        }
        for &k in cand.iter() {
            let b = fine(dist_of(k));
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

/// Returns the rows of an `n × p` view as one contiguous row-major slice, borrowing when the view
/// is already in standard layout and copying once otherwise.
pub(crate) fn contiguous<'a>(a: &'a ArrayView2<'_, f64>) -> Cow<'a, [f64]> {
    match a.as_slice() {
        Some(s) => Cow::Borrowed(s),
        None => Cow::Owned(a.iter().copied().collect()),
    }
}

/// A training set prepared for neighbour queries: its rows column-major, optionally
/// standardized. Immutable and shareable across threads; each thread brings its own [`Scratch`].
#[derive(Debug, Clone)]
pub struct NeighbourIndex {
    cols: Vec<f64>,
    n: usize,
    p: usize,
    std: Option<Standardizer>,
}

/// Per-thread scratch of neighbour queries (distances, keys, bucket counts).
#[derive(Debug, Clone, Default)]
pub struct Scratch {
    dist: Vec<f64>,
    keys: Vec<u128>,
    counts: Vec<usize>,
    query: Vec<f64>,
}

impl NeighbourIndex {
    /// Indexes the rows of `x` (`n × p`). With `standardize`, inputs are standardized by the
    /// training mean and sd ([`Standardizer`]) before any distance, and queries by the same
    /// statistics.
    pub fn new(x: ArrayView2<'_, f64>, standardize: bool) -> NeighbourIndex {
        let (n, p) = x.dim();
        let rows = contiguous(&x);
        let std = standardize.then(|| Standardizer::fit(x));
        let cols = column_major(&rows, n, p, std.as_ref());
        NeighbourIndex { cols, n, p, std }
    }

    /// Number of indexed rows.
    pub fn rows(&self) -> usize {
        self.n
    }

    /// The standardizer in use, if any.
    pub fn standardizer(&self) -> Option<&Standardizer> {
        self.std.as_ref()
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
        scratch.dist.resize(self.n, 0.0);
        let q = std::mem::take(&mut scratch.query);
        nearest_into(
            &self.cols,
            self.n,
            &q,
            k,
            &mut scratch.dist,
            &mut scratch.keys,
            &mut scratch.counts,
        );
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
    /// already-standardized query.
    pub(crate) fn nearest_keys<'s>(
        &self,
        query: &[f64],
        kmax: usize,
        scratch: &'s mut Scratch,
    ) -> &'s [u128] {
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
}
