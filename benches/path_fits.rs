//! Path fits: one replicate's fit + prediction over the whole complexity grid, beside a single
//! fit at the most complex grid value only. The goal is a whole-grid cost of at most 1.3× the
//! single most complex fit. Data: Friedman #1 inputs (n = 500, p = 10), 1000 evaluation points,
//! fixed seeds; the classification groups label a row 1 when its Friedman #1 response exceeds
//! 14.4 (about the mean, so the classes are balanced).
//!
//! `python3 benches/compare/ratios.py` prints the whole-grid / most-complex ratios from
//! criterion's estimates after `cargo bench --bench path_fits`; docs/performance.md records them.

use criterion::{black_box, criterion_group, criterion_main, Criterion};
use ndarray::{Array1, Array2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use lossprism::dgp::Builtin;
use lossprism::family::knn::KnnFamily;
use lossprism::family::logistic::LogisticFamily;
use lossprism::family::poly::PolyFamily;
use lossprism::family::ridge::RidgeFamily;
use lossprism::family::tree::TreeFamily;
use lossprism::family::{Family, FitInput, Out, Task};

fn data(n: usize, m: usize, p: usize) -> (Array2<f64>, Array1<f64>, Array2<f64>) {
    let mut rng = ChaCha8Rng::seed_from_u64(12345);
    let x = Array2::from_shape_fn((n, p), |_| rng.gen::<f64>());
    let y = Array1::from_shape_fn(n, |i| {
        let row: Vec<f64> = x.row(i).to_vec();
        Builtin::Friedman1.eval(&row) + rng.gen::<f64>() - 0.5
    });
    let eval = Array2::from_shape_fn((m, p), |_| rng.gen::<f64>());
    (x, y, eval)
}

/// The same data with two classes: 1 where the response exceeds 14.4, else 0.
fn two_class(y: &Array1<f64>) -> Array1<f64> {
    y.mapv(|v| f64::from(u8::from(v > 14.4)))
}

fn bench_family(c: &mut Criterion, label: &str, fam: &dyn Family, grid: &[f64], single: &[f64]) {
    bench_task(c, label, fam, grid, single, Task::Regress);
}

fn bench_task(
    c: &mut Criterion,
    label: &str,
    fam: &dyn Family,
    grid: &[f64],
    single: &[f64],
    task: Task,
) {
    let (x, y, eval) = data(500, 1000, 10);
    let y = match task {
        Task::Regress => y,
        Task::Classify { .. } => two_class(&y),
    };
    let input = FitInput {
        x: x.view(),
        y: y.view(),
        eval: eval.view(),
        task,
        seed: lossprism::family::FitSeed::fixed(1),
    };
    let mut group = c.benchmark_group(label);
    let mut out = Array2::<f64>::zeros((grid.len(), eval.nrows()));
    group.bench_function("whole grid", |b| {
        b.iter(|| {
            fam.fit_predict(black_box(&input), grid, Out::values(out.view_mut()))
                .expect("fit");
        })
    });
    let mut out1 = Array2::<f64>::zeros((single.len(), eval.nrows()));
    group.bench_function("most complex only", |b| {
        b.iter(|| {
            fam.fit_predict(black_box(&input), single, Out::values(out1.view_mut()))
                .expect("fit");
        })
    });
    group.finish();
}

fn path_fits(c: &mut Criterion) {
    let depths: Vec<f64> = (1..=12).map(f64::from).collect();
    bench_family(
        c,
        "tree depth 1..12",
        &TreeFamily::default(),
        &depths,
        &[12.0],
    );
    bench_task(
        c,
        "tree classify depth 1..10",
        &TreeFamily::default(),
        &depths[..10],
        &[10.0],
        Task::Classify { classes: 2 },
    );
    // The most complex k-NN fit is k = 1 (the most flexible); the whole grid needs the 50
    // nearest neighbours of every evaluation point, sorted.
    let ks = [1.0, 2.0, 3.0, 5.0, 8.0, 12.0, 20.0, 30.0, 50.0];
    bench_family(c, "knn k 1..50", &KnnFamily::default(), &ks, &[1.0]);
    let degrees = [0.0, 1.0, 2.0, 3.0];
    bench_family(
        c,
        "poly degree 0..3 (10 inputs)",
        &PolyFamily,
        &degrees,
        &[3.0],
    );
    let penalties: Vec<f64> = (0..20).map(|i| 10f64.powf(-3.0 + 0.3 * i as f64)).collect();
    bench_family(
        c,
        "ridge 20 penalties",
        &RidgeFamily,
        &penalties,
        &[penalties[0]],
    );
    // Inverse penalty C: the most complex fit is the largest C (the weakest penalty).
    let cs: Vec<f64> = (0..10).map(|i| 10f64.powf(-2.0 + 0.5 * i as f64)).collect();
    bench_task(
        c,
        "logistic 10 inverse penalties",
        &LogisticFamily,
        &cs,
        &[cs[cs.len() - 1]],
        Task::Classify { classes: 2 },
    );
}

criterion_group! {
    name = benches;
    config = Criterion::default().sample_size(20).measurement_time(std::time::Duration::from_secs(3));
    targets = path_fits
}
criterion_main!(benches);
