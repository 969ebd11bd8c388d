//! Neighbour queries: brute force beside the k-d tree of [`NeighbourIndex`], on uniform random
//! tables (n = 1000, 5000, 20000 rows; p = 2, 3, 5, 10 inputs; standardized like a twin's k-NN
//! reference) and 100 uniform random query points, for k = 1 and k = 50. Both searches return
//! the same neighbours bit for bit (tested in `family::neighbours`); the bench times them. Each
//! measurement is one batch of 100 queries. At p = 10 the default search is brute force (more
//! than 8 inputs); the forced tree is timed there to show why.

use criterion::{black_box, criterion_group, criterion_main, BenchmarkId, Criterion};
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use lossprism::family::neighbours::{NeighbourIndex, Scratch, Search};

fn bench_queries(c: &mut Criterion) {
    for &n in &[1000usize, 5000, 20000] {
        for &p in &[2usize, 3, 5, 10] {
            let mut rng = ChaCha8Rng::seed_from_u64(2024 + (n * 16 + p) as u64);
            let x = Array2::from_shape_fn((n, p), |_| rng.gen::<f64>());
            let queries: Vec<Vec<f64>> = (0..100)
                .map(|_| (0..p).map(|_| rng.gen::<f64>()).collect())
                .collect();
            let mut group = c.benchmark_group(format!("neighbours/n{n}/p{p}"));
            for (label, search) in [("brute", Search::Brute), ("tree", Search::Tree)] {
                let index = NeighbourIndex::with_search(x.view(), true, search);
                for &k in &[1usize, 50] {
                    let mut scratch = Scratch::default();
                    let mut out = Vec::with_capacity(k);
                    group.bench_function(BenchmarkId::new(label, format!("k{k}")), |b| {
                        b.iter(|| {
                            let mut sum = 0;
                            for q in &queries {
                                index.nearest(black_box(q), k, &mut scratch, &mut out);
                                sum += out[0];
                            }
                            sum
                        })
                    });
                }
            }
            group.finish();
        }
    }
}

criterion_group! {
    name = benches;
    config = Criterion::default()
        .sample_size(10)
        .warm_up_time(std::time::Duration::from_millis(300))
        .measurement_time(std::time::Duration::from_secs(1));
    targets = bench_queries
}
criterion_main!(benches);
