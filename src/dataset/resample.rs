//! Resampling a table's working rows: replicate r's training rows and the rows it holds out
//! (out-of-bag for the bootstrap), drawn from the replicate's own stream by the engine.

use rand::Rng;

use super::Scheme;

/// Draws one replicate's training rows (indices into `0..n`, with repeats for the bootstrap)
/// and the sorted rows it holds out.
pub fn draw<R: Rng>(scheme: Scheme, n: usize, rng: &mut R) -> (Vec<usize>, Vec<usize>) {
    let mut in_train = vec![false; n];
    let train: Vec<usize> = match scheme {
        Scheme::Bootstrap => (0..n)
            .map(|_| {
                let i = rng.gen_range(0..n);
                in_train[i] = true;
                i
            })
            .collect(),
        Scheme::Subsample { .. } => {
            let m = scheme.train_size(n);
            let mut idx: Vec<usize> = (0..n).collect();
            for j in 0..m {
                let k = rng.gen_range(j..n);
                idx.swap(j, k);
                in_train[idx[j]] = true;
            }
            idx.truncate(m);
            idx
        }
    };
    let held = (0..n).filter(|&i| !in_train[i]).collect();
    (train, held)
}
