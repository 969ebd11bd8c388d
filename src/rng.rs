//! Random streams: the only place lossprism creates random numbers. Every stream is ChaCha8
//! keyed by the master seed, with a stream number that encodes its purpose and index, so streams
//! never overlap and a result depends only on (seed, purpose, index) — never on threads, shards,
//! the clock or the order in which work is scheduled.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Stream purposes (the high bits of the ChaCha stream number).
pub mod purpose {
    /// Evaluation inputs.
    pub const EVAL: u64 = 1;
    /// The training inputs of a fixed design.
    pub const DESIGN: u64 = 2;
    /// Replicate r's training set and fresh responses.
    pub const REPLICATE: u64 = 3;
    /// The locked holdout rows of a table (drawn once from the file's seed).
    pub const HOLDOUT: u64 = 4;
    /// Replicate r's cross-validation folds in the selection audit.
    pub const AUDIT: u64 = 5;
    /// The folds that choose a twin's reference model.
    pub const TWIN: u64 = 6;
    /// A fit's own randomness (see [`super::FitSeed`]); uses the top bits of the stream number.
    pub const FIT: u64 = 7;
    /// Draws of the twin's parametric bootstrap and fidelity study.
    pub const TWIN_BOOT: u64 = 8;
    /// Draws of the block bootstrap behind the standard errors of non-smooth terms (see
    /// [`super::block_bootstrap`]).
    pub const BLOCK_BOOT: u64 = 9;
    /// `validate`'s probe of the formulas at inputs drawn like the training inputs (no result
    /// depends on it).
    pub const PROBE: u64 = 10;
}

/// The random stream for (seed, purpose, index): ChaCha8 keyed by the seed, with the stream
/// number `purpose << 48 | index` (index below 2⁴⁸). Streams never overlap.
pub fn stream(seed: u64, purpose: u64, index: u64) -> ChaCha8Rng {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream((purpose << 48) | (index & ((1 << 48) - 1)));
    rng
}

/// Largest fold index a fit stream can carry (fold 0 is the replicate's main fit, folds
/// `1..=K` are the selection audit's cross-validation fits).
pub const MAX_FIT_FOLD: u32 = (1 << 10) - 1;
/// Largest fit-seed index a fit stream can carry (`fit_seeds` is at most this plus one).
pub const MAX_FIT_COPY: u32 = (1 << 10) - 1;
/// Largest replicate index a fit stream can carry.
pub const MAX_FIT_REPLICATE: u64 = (1 << 36) - 1;

/// 32-bit words of a fit stream reserved for each ensemble member (see [`FitSeed::member_rng`]).
pub const MEMBER_WORDS: u128 = 1 << 40;
/// Number of ensemble members a fit stream can carry (68-bit word positions / [`MEMBER_WORDS`]).
pub const MAX_MEMBERS: u64 = 1 << 28;

/// The identity of one fit's random stream: the master seed, the replicate, the fold (0 = the
/// main fit, `1..=K` = cross-validation fold fits of the selection audit) and the fit-seed index
/// (`0..fit_seeds`). A stochastic family draws only from [`FitSeed::rng`], so its predictions are
/// a pure function of (training set, evaluation inputs, fit seed).
///
/// Stream number: `FIT << 56 | replicate << 20 | fold << 10 | copy`, disjoint from every
/// `purpose << 48 | index` stream because those leave bits 56–63 clear.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct FitSeed {
    /// Master seed of the run.
    pub seed: u64,
    /// Replicate index.
    pub replicate: u64,
    /// 0 for the replicate's main fit, `f + 1` for the audit's cross-validation fold `f`.
    pub fold: u32,
    /// Fit-seed index `0..fit_seeds`.
    pub copy: u32,
}

impl FitSeed {
    /// The fit seed of a fit made outside a replicate loop (tests, a twin's reference, a
    /// holdout assessment): replicate 0, fold 0, copy 0 of `seed`.
    pub fn fixed(seed: u64) -> FitSeed {
        FitSeed {
            seed,
            replicate: 0,
            fold: 0,
            copy: 0,
        }
    }

    /// The ChaCha8 stream of this fit.
    pub fn rng(&self) -> ChaCha8Rng {
        let mut rng = ChaCha8Rng::seed_from_u64(self.seed);
        let r = self.replicate & MAX_FIT_REPLICATE;
        let f = u64::from(self.fold.min(MAX_FIT_FOLD));
        let c = u64::from(self.copy.min(MAX_FIT_COPY));
        rng.set_stream((purpose::FIT << 56) | (r << 20) | (f << 10) | c);
        rng
    }

    /// The stream of member `k` of an ensemble fit (a forest's tree `k`, a boosting round `k`):
    /// the fit stream started [`MEMBER_WORDS`]` × k` words in. Member 0's stream is
    /// [`FitSeed::rng`] itself, so a one-member ensemble draws exactly what a single fit draws;
    /// members never overlap while each draws fewer than 2⁴⁰ words (32-bit), and their streams
    /// do not depend on how many members are grown or in which order.
    ///
    /// # Panics
    /// If `k ≥ 2²⁸` (ChaCha's word position has 68 bits).
    pub fn member_rng(&self, k: u64) -> ChaCha8Rng {
        assert!(k < MAX_MEMBERS, "member index {k} is not below 2^28");
        let mut rng = self.rng();
        if k > 0 {
            rng.set_word_pos(u128::from(k) * MEMBER_WORDS);
        }
        rng
    }

    /// A 64-bit seed derived from the stream (the first word it yields), for estimators outside
    /// the process (the external protocol's `seed` line).
    pub fn as_u64(&self) -> u64 {
        use rand::RngCore;
        self.rng().next_u64()
    }
}

/// Resampling plans of a bootstrap over replicate blocks: `draws` vectors of length `blocks`,
/// each the multiplicities of drawing `blocks` blocks with replacement (they sum to `blocks`).
/// Draw `d` comes from its own stream `(seed, BLOCK_BOOT, d)`, so the plans depend only on the
/// master seed and the number of blocks — never on threads, shards or resume. Empty when
/// `blocks < 2`.
pub fn block_bootstrap(seed: u64, blocks: usize, draws: usize) -> Vec<Vec<u32>> {
    if blocks < 2 {
        return Vec::new();
    }
    (0..draws)
        .map(|d| {
            let mut rng = stream(seed, purpose::BLOCK_BOOT, d as u64);
            let mut m = vec![0u32; blocks];
            for _ in 0..blocks {
                m[rng.gen_range(0..blocks)] += 1;
            }
            m
        })
        .collect()
}

/// A uniformly random order of `0..n` (Fisher–Yates, Knuth's Algorithm P), from `rng`.
pub fn permutation<R: Rng + ?Sized>(n: usize, rng: &mut R) -> Vec<usize> {
    let mut perm: Vec<usize> = (0..n).collect();
    for i in (1..n).rev() {
        let j = rng.gen_range(0..=i);
        perm.swap(i, j);
    }
    perm
}

/// Fold of each of `n` rows: a random permutation from `rng`, position i → fold `i mod folds`.
pub fn fold_assignment<R: Rng + ?Sized>(n: usize, folds: usize, rng: &mut R) -> Vec<usize> {
    let mut perm: Vec<usize> = (0..n).collect();
    for i in (1..n).rev() {
        let j = rng.gen_range(0..=i);
        perm.swap(i, j);
    }
    let mut fold = vec![0; n];
    for (pos, &row) in perm.iter().enumerate() {
        fold[row] = pos % folds.max(1);
    }
    fold
}

/// Rows in the smallest training set of a fold assignment (`fold[i]` in `0..folds`): the rows
/// outside the largest fold.
pub fn smallest_training_fold(fold: &[usize], folds: usize) -> usize {
    (0..folds)
        .map(|f| fold.iter().filter(|&&g| g != f).count())
        .min()
        .unwrap_or(0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::RngCore;

    #[test]
    fn fit_streams_differ_by_every_coordinate_and_repeat_exactly() {
        let base = FitSeed {
            seed: 9,
            replicate: 5,
            fold: 0,
            copy: 0,
        };
        let a = base.rng().next_u64();
        assert_eq!(a, base.rng().next_u64());
        for other in [
            FitSeed { seed: 10, ..base },
            FitSeed {
                replicate: 6,
                ..base
            },
            FitSeed { fold: 1, ..base },
            FitSeed { copy: 1, ..base },
        ] {
            assert_ne!(a, other.rng().next_u64(), "{other:?}");
        }
        // Member 0 is the fit stream itself; other members start elsewhere in it.
        let mut m0 = base.member_rng(0);
        let mut fit = base.rng();
        for _ in 0..100 {
            assert_eq!(m0.next_u64(), fit.next_u64());
        }
        let mut m1 = base.member_rng(1);
        let mut skip = base.rng();
        skip.set_word_pos(MEMBER_WORDS);
        assert_eq!(m1.next_u64(), skip.next_u64());
        assert_ne!(base.member_rng(1).next_u64(), a);
        assert_ne!(base.member_rng(2).next_u64(), base.member_rng(1).next_u64());
        // A fit stream is not a replicate stream of the same seed.
        assert_ne!(a, stream(9, purpose::REPLICATE, 5).next_u64());
    }

    #[test]
    fn block_bootstrap_plans_repeat_and_draw_every_block_count() {
        let a = block_bootstrap(4, 7, 50);
        assert_eq!(a, block_bootstrap(4, 7, 50));
        assert_eq!(a[..20], block_bootstrap(4, 7, 20)[..]);
        assert_ne!(a, block_bootstrap(5, 7, 50));
        assert!(a.iter().all(|m| m.len() == 7 && m.iter().sum::<u32>() == 7));
        assert!(a.windows(2).any(|w| w[0] != w[1]));
        assert!(block_bootstrap(4, 1, 50).is_empty());
    }
}
