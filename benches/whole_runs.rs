//! Whole runs: `lossprism run` on shipped scenarios at R = 200, through the library (scenario
//! file -> plan -> replicate loop -> decomposition), on 1 and on 2 worker threads. The scenarios:
//! `friedman1-tree` (regression tree, depth 1..12, n = 500, 1000 evaluation points),
//! `friedman1-knn` (k in 1..50, same data) and `packing-line-tree` (two-class tree, depth 1..10,
//! n = 400, 0-1 loss). docs/performance.md records the numbers; the 2-thread / 1-thread ratio is
//! the thread-scaling target (at least 1.8×).

use std::path::Path;

use criterion::{black_box, criterion_group, criterion_main, Criterion};

use lossprism::runner;
use lossprism::scenario::{self, PlanOptions};

const SCENARIOS: [&str; 3] = ["friedman1-tree", "friedman1-knn", "packing-line-tree"];

fn whole_runs(c: &mut Criterion) {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios");
    for name in SCENARIOS {
        let opts = PlanOptions {
            replicates: Some(200),
            ..PlanOptions::default()
        };
        let plan = scenario::load(&dir.join(format!("{name}.toml")), &opts)
            .unwrap_or_else(|e| panic!("scenario {name}: {e}"));
        let mut group = c.benchmark_group(format!("{name} R=200"));
        for threads in [1, 2] {
            group.bench_function(format!("{threads} thread(s)"), |b| {
                b.iter(|| runner::run(black_box(&plan), threads).expect("run"))
            });
        }
        group.finish();
    }
}

criterion_group! {
    name = benches;
    config = Criterion::default().sample_size(10).measurement_time(std::time::Duration::from_secs(5));
    targets = whole_runs
}
criterion_main!(benches);
