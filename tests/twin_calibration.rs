//! Calibration of simulated twins against processes whose truth is known.
//!
//! Invented processes (made up for these tests, not data): three inputs x ~ U[0, 1]³ (one or two
//! with `LOSSPRISM_CALIB_PROCS=low`; six or ten, with Friedman's published first test function,
//! with `LOSSPRISM_CALIB_PROCS=wide`), Gaussian noise with sd 1, tables of n = 400 rows. For each
//! table, `lossprism twin` writes a twin (reference chosen by cross-validation and twiced as
//! `--twicing auto` decides, or as `LOSSPRISM_CALIB_TWICING=on|off` forces; smoothed-bootstrap
//! inputs, bias-corrected noise, fidelity check), the twin is run for regression trees (depth 1–10) and k-NN (k in
//! {1, 2, 3, 5, 8, 12, 20, 30, 50}), and its curve and pick are compared with the same families
//! run on the true process with many replicates and evaluation points. The same tables also go
//! through the twin as it was before (k-NN reference alone, rows resampled for training and
//! evaluation, raw nearest-neighbour noise), so the gain is measured on identical data.
//!
//! - `calibration_study` (ignored: several minutes) is the study whose results are written in
//!   `docs/twin-calibration.md`; run it with
//!   `cargo test --release --test twin_calibration -- --ignored --nocapture calibration_study`.
//! - `noise_study` (ignored) measures the corrected noise estimate over many tables in 1, 2 and
//!   3 dimensions at n = 300 (`LOSSPRISM_NOISE_SIGNAL=k` multiplies each truth by k: the same
//!   as noise of sd 1/k, for tables with little noise next to the signal).
//! - `twin_picks_near_the_truth_on_a_known_process` and `corrected_noise_is_close_on_known_processes`
//!   are fast versions in the normal suite.

use std::fs;
use std::path::Path;

use lossprism::commands::twin::{self as twin_cmd, TwinOptions};
use lossprism::dataset::noise::{self, Method};
use lossprism::dgp::reference::{self, select::Rule};
use lossprism::dgp::twin as dgp_twin;
use lossprism::expr::Formula;
use lossprism::report;
use lossprism::runner;
use lossprism::scenario::{self, Plan, PlanOptions};
use ndarray::{Array1, Array2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

/// An invented process: name, formula over x1..xp, inputs U[0,1]^p, noise sd 1.
#[derive(Clone, Copy)]
struct Process {
    name: &'static str,
    formula: &'static str,
    p: usize,
    /// The noise's sd, a formula over the same inputs (`"1"`: constant, σ = 1).
    sd: &'static str,
}

/// Smooth: a tilted ripple plus a bowl (invented).
const SWELL3: Process = Process {
    name: "swell3",
    formula: "1.8*sin(2*pi*x1)*cos(pi*x2) + 2*x3^2 + x2",
    p: 3,
    sd: "1",
};
/// A step along a slanted edge (invented).
const LEDGE3: Process = Process {
    name: "ledge3",
    formula: "2.2*(x1 + 0.6*x2 > 0.75) + 1.5*sin(pi*x3) + x2*x3",
    p: 3,
    sd: "1",
};
/// Two kinks (invented).
const HINGE3: Process = Process {
    name: "hinge3",
    formula: "3*abs(x1 - 0.4) + 2*max(x2 + x3 - 1, 0)",
    p: 3,
    sd: "1",
};

/// The research prototype's processes (`/work/scratch/twin-lab`, REPORT.md §4), used only to
/// check that this implementation reproduces the prototype's measurements
/// (`LOSSPRISM_CALIB_PROCS=lab`).
const LAB: [Process; 3] = [
    Process {
        name: "lab-smooth3",
        formula: "2*sin(2*pi*x1) + 2*x2^2 + x2*x3",
        p: 3,
        sd: "1",
    },
    Process {
        name: "lab-step3",
        formula: "2.5*(x1 > 0.45) + 2*x2*x3 + sin(pi*x3)",
        p: 3,
        sd: "1",
    },
    Process {
        name: "lab-kink3",
        formula: "3*abs(x1 + x2 - 1) + x3",
        p: 3,
        sd: "1",
    },
];

/// One- and two-input processes (invented), to check that twicing does not hurt where the
/// reference already follows the truth closely (`LOSSPRISM_CALIB_PROCS=low`).
const LOW: [Process; 3] = [
    Process {
        name: "wave1",
        formula: "1.5*sin(2*pi*x1) + x1",
        p: 1,
        sd: "1",
    },
    Process {
        name: "step1",
        formula: "1.5*(x1 > 0.6) + x1",
        p: 1,
        sd: "1",
    },
    Process {
        name: "dome2",
        formula: "2*exp(-4*((x1 - 0.5)^2 + (x2 - 0.4)^2)) + sin(3*x2)",
        p: 2,
        sd: "1",
    },
];

/// Wider tables (`LOSSPRISM_CALIB_PROCS=wide`): Friedman's first test function (Friedman 1991,
/// "Multivariate adaptive regression splines", *Annals of Statistics* 19:1–67; 10 inputs of
/// which 5 are irrelevant; the usual noise sd 1 — details from memory), and two invented
/// six-input processes, one smooth and one with a step.
const WIDE: [Process; 3] = [
    Process {
        name: "friedman1",
        formula: "10*sin(pi*x1*x2) + 20*(x3 - 0.5)^2 + 10*x4 + 5*x5",
        p: 10,
        sd: "1",
    },
    Process {
        name: "ripple6",
        formula: "2*sin(2*pi*x1) + 1.5*x2*x3 + (x4 - 0.5)^2*4 + 0.5*x5 - x6",
        p: 6,
        sd: "1",
    },
    Process {
        name: "terrace6",
        formula: "2*(x1 + x2 > 1) + sin(pi*x3) + x4*x5 + 0.3*x6",
        p: 6,
        sd: "1",
    },
];

const KS: [usize; 9] = [1, 2, 3, 5, 8, 12, 20, 30, 50];

fn names(p: usize) -> Vec<String> {
    (1..=p).map(|j| format!("x{j}")).collect()
}

/// Draws a table of `n` rows from `proc` with noise sd `sd` (stream seeded by `seed`).
/// Table `t` of a noise study (n rows, σ = 1, drawn from `seed + 101 t`) with its responses
/// as a vector and the default regression twin's fit (seed `seed + t`).
fn noise_study_table(
    proc: Process,
    n: usize,
    seed: u64,
    t: usize,
) -> (Array2<f64>, Array1<f64>, Vec<f64>, dgp_twin::RegressionFit) {
    let (x, mut y) = draw_table(proc, n, 1.0, seed + 101 * t as u64);
    // `LOSSPRISM_NOISE_SIGNAL=k`: the truth times k with the same noise draws, the same table
    // as noise sd 1/k with the truth as written, in units of that sd (every estimator, its
    // correction and the reference are equivariant under rescaling the response).
    let k = signal();
    if k != 1.0 {
        for (v, f) in y.iter_mut().zip(truth_at(proc, &x)) {
            *v += (k - 1.0) * f;
        }
    }
    let yv = y.to_vec();
    // `LOSSPRISM_NOISE_SHAPE=residuals`: the bootstrap resamples the standardized residuals
    // (`twin --noise-shape residuals`); `LOSSPRISM_NOISE_METHOD=gamma` (or another name): the
    // twin's `--noise-estimator` (`gamma` on 2 and 3 inputs is the default before §2.11).
    let method = std::env::var("LOSSPRISM_NOISE_METHOD")
        .ok()
        .map(|m| Method::from_name(&m).expect("LOSSPRISM_NOISE_METHOD names an estimator"))
        .filter(|_| proc.p > 1);
    let fit = dgp_twin::fit_regression_shaped(
        x.view(),
        &yv,
        seed + t as u64,
        Rule::Best,
        method,
        dgp_twin::Twicing::Auto,
        dgp_twin::NoiseFit {
            resample: resampled_shape("LOSSPRISM_NOISE_SHAPE"),
            all_rows: false,
        },
        dgp_twin::SHARPEN,
        "t",
    )
    .expect("fits");
    (x, y, yv, fit)
}

/// The noise study's signal multiplier (`LOSSPRISM_NOISE_SIGNAL`, default 1; see
/// `noise_study_table`).
fn signal() -> f64 {
    std::env::var("LOSSPRISM_NOISE_SIGNAL")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(1.0)
}

/// Whether the environment variable `var` asks for resampled residuals (`residuals`).
fn resampled_shape(var: &str) -> bool {
    std::env::var(var).as_deref() == Ok("residuals")
}

/// Draws a table; the noise is Gaussian, or with `LOSSPRISM_NOISE_TAILS=t5` Student's t with 5
/// degrees of freedom scaled to the same variance (kurtosis 9: heavy tails).
fn draw_table(proc: Process, n: usize, sd: f64, seed: u64) -> (Array2<f64>, Array1<f64>) {
    let heavy = std::env::var("LOSSPRISM_NOISE_TAILS").as_deref() == Ok("t5");
    let sd = if proc.sd == "1" {
        format!("{sd:?}")
    } else {
        assert_eq!(sd, 1.0, "{}: its sd is its own formula", proc.name);
        proc.sd.to_string()
    };
    draw_rows(proc.formula, &sd, proc.p, n, heavy, seed)
}

/// `n` rows of `p` inputs uniform on the unit cube and responses `formula + sd · e`, with `sd`
/// a formula over the same inputs and `e` standard Gaussian (`heavy`: Student's t with 5
/// degrees of freedom scaled to variance 1).
fn draw_rows(
    formula: &str,
    sd: &str,
    p: usize,
    n: usize,
    heavy: bool,
    seed: u64,
) -> (Array2<f64>, Array1<f64>) {
    let nm = names(p);
    let refs: Vec<&str> = nm.iter().map(String::as_str).collect();
    let f = Formula::parse(formula, &refs).expect("formula parses");
    let s = Formula::parse(sd, &refs).expect("sd parses");
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let x = Array2::from_shape_fn((n, p), |_| rng.gen::<f64>());
    let y = x
        .rows()
        .into_iter()
        .map(|r| {
            let mut e: f64 = StandardNormal.sample(&mut rng);
            if heavy {
                let c: f64 = rand_distr::ChiSquared::new(5.0).unwrap().sample(&mut rng);
                e /= (c / 5.0).sqrt() * (5.0f64 / 3.0).sqrt();
            }
            let v = r.to_vec();
            f.eval(&v) + s.eval(&v) * e
        })
        .collect();
    (x, y)
}

/// The noise-free truth at the rows of `x`.
fn truth_at(proc: Process, x: &Array2<f64>) -> Vec<f64> {
    let nm = names(proc.p);
    let refs: Vec<&str> = nm.iter().map(String::as_str).collect();
    let f = Formula::parse(proc.formula, &refs).expect("formula parses");
    x.rows().into_iter().map(|r| f.eval(&r.to_vec())).collect()
}

fn write_csv(path: &Path, x: &Array2<f64>, y: &Array1<f64>) {
    let mut s = names(x.ncols()).join(",") + ",y\n";
    for (r, v) in x.rows().into_iter().zip(y) {
        let cells: Vec<String> = r.iter().map(|a| format!("{a:?}")).collect();
        s.push_str(&format!("{},{v:?}\n", cells.join(",")));
    }
    fs::write(path, s).unwrap();
}

/// The two model sections every run uses.
fn models(n_train: usize) -> String {
    let ks: Vec<String> = KS
        .iter()
        .filter(|&&k| k <= n_train)
        .map(|k| k.to_string())
        .collect();
    format!(
        "\n[[model]]\nfamily = \"tree\"\ngrid = {{ from = 1, to = 10 }}\n\n[[model]]\nfamily = \"knn\"\ngrid = [{}]\nstandardize = true\n",
        ks.join(", ")
    )
}

/// A curve: expected loss per grid value, the pick, the one-SE set, the grid.
#[derive(Debug, Clone)]
struct Curve {
    el: Vec<f64>,
    /// Standard errors of `el` (jackknife).
    se: Vec<f64>,
    /// bias² per grid value.
    b2: Vec<f64>,
    /// The noise term (the mean of σ²(x) over the evaluation points).
    noise: f64,
    pick: f64,
    one_se: Vec<f64>,
    /// The one-SE set at a user's precision (truth curves only; see [`user_set`]).
    one_se_user: Vec<f64>,
    /// The same with the evaluation points' sampling error added (truth curves only; see
    /// [`user_set`]).
    one_se_points: Vec<f64>,
    /// Per grid value: the spread over evaluation points of the true per-point expected loss
    /// (`point_sd² − point_noise`, at least 0), and the number of evaluation points.
    point_var: Vec<f64>,
    points: usize,
    grid: Vec<f64>,
}

/// Replicates of a user's run, the precision of the second yardstick.
const USER_R: usize = 200;

/// The one-standard-error set of a truth run of `r` replicates at the precision of a run of
/// [`USER_R`] replicates on the same process: grid values whose expected loss is within `se` of
/// the lowest, where `se = SE(best) · √(r / USER_R)` (a jackknife standard error scales as
/// 1/√R), i.e. the values an R = 200 run on the true process at the same evaluation points could
/// not tell apart from the best by the one-SE rule; with `points`, `se² +
/// point_var(best) / points` adds the sampling error of the truth's own evaluation points (the
/// spread of the true per-point expected loss over the m points, over m), which the jackknife
/// over replicates leaves out.
fn user_set(c: &Curve, r: usize, points: bool) -> Vec<f64> {
    let bi = (0..c.el.len()).fold(0, |b, g| if c.el[g] < c.el[b] { g } else { b });
    let se = if c.se[bi].is_finite() { c.se[bi] } else { 0.0 };
    let mut var = se * se * r as f64 / USER_R as f64;
    if points {
        var += c.point_var[bi] / c.points as f64;
    }
    let lim = c.el[bi] + var.sqrt();
    c.grid
        .iter()
        .zip(&c.el)
        .filter(|(_, e)| **e <= lim)
        .map(|(g, _)| *g)
        .collect()
}

fn curves(plan: &Plan) -> Vec<Curve> {
    let out = runner::run(plan, 0).expect("runs");
    let doc = report::build(plan, &out);
    let unc = doc.uncertainty.as_ref().expect("uncertainty");
    let mut first = 0;
    (0..plan.models.len())
        .map(|i| {
            let rows = report::rows(plan, &out, i);
            let best = report::best_of(&rows);
            let point_var = (0..rows.len())
                .map(|g| {
                    let u = &unc.rows[first + g];
                    let sd = u.point_sd.get("expected_loss").copied().unwrap_or(0.0);
                    let noise = u.point_noise.get("expected_loss").copied().unwrap_or(0.0);
                    (sd * sd - noise).max(0.0)
                })
                .collect();
            first += rows.len();
            Curve {
                el: rows.iter().map(|r| r.expected_loss()).collect(),
                se: rows
                    .iter()
                    .map(|r| r.se("expected_loss").unwrap_or(f64::NAN))
                    .collect(),
                b2: rows.iter().map(|r| r.get("bias_sq")).collect(),
                noise: rows[0].get("noise"),
                pick: best.value,
                one_se: best.within_one_se,
                one_se_user: Vec::new(),
                one_se_points: Vec::new(),
                point_var,
                points: out.prepared.points(),
                grid: plan.models[i].grid.clone(),
            }
        })
        .collect()
}

fn plan_text(dir: &Path, name: &str, text: &str) -> Plan {
    let path = dir.join(name);
    fs::write(&path, text).unwrap();
    scenario::load(&path, &PlanOptions::default()).expect("plans")
}

/// The true curves of `proc` for both families (R replicates, m evaluation points).
fn truth(dir: &Path, proc: Process, n: usize, r: usize, m: usize, seed: u64) -> Vec<Curve> {
    let mut s = format!(
        "name = \"truth-{}\"\nseed = {seed}\nreplicates = {r}\n[data]\nsource = \"synthetic\"\ntrain_size = {n}\neval_size = {m}\n",
        proc.name
    );
    for nm in names(proc.p) {
        s.push_str(&format!(
            "[[data.inputs]]\nname = \"{nm}\"\nuniform = [0.0, 1.0]\n"
        ));
    }
    let noise = if proc.sd == "1" {
        "sd = 1.0".to_string()
    } else {
        format!("sd_formula = \"{}\"", proc.sd)
    };
    s.push_str(&format!(
        "[data.truth]\nformula = \"{}\"\n[data.noise]\n{noise}\n",
        proc.formula
    ));
    if std::env::var("LOSSPRISM_NOISE_TAILS").as_deref() == Ok("t5") {
        // The tables' noise law (`draw_table`), so the truth is the same process.
        s.push_str("shape = \"student\"\ndf = 5\n");
    }
    s.push_str(&models(n));
    let mut cs = curves(&plan_text(dir, "truth.toml", &s));
    for c in &mut cs {
        c.one_se_user = user_set(c, r, false);
        c.one_se_points = user_set(c, r, true);
    }
    cs
}

/// The written twin scenario with its `[model]` replaced by both families and R replicates.
fn with_models(text: &str, r: usize, n: usize) -> String {
    let head = text.split("\n[model]\n").next().expect("a [model] section");
    let head = head.replace("replicates = 200", &format!("replicates = {r}"));
    format!("{head}{}", models(n))
}

/// The twin of before issue #11 on the same table: k-NN reference (k by 10-fold CV), rows
/// resampled for training and as the n evaluation points, raw noise estimate (GSJS with one
/// input, nearest-neighbour differences otherwise).
fn before_text(csv: &str, t: &lossprism::dataset::Table, seed: u64, r: usize) -> String {
    let f = reference::fit(t, seed, true).expect("fits");
    let s2 = f.noise.map_or(0.0, |e| e.value.max(0.0));
    format!(
        "name = \"before\"\nseed = {seed}\nreplicates = {r}\n[data]\nsource = \"twin\"\npath = \"{csv}\"\ntarget = \"y\"\ntrain_size = {}\nreference = {{ family = \"knn\", k = {}, standardize = true }}\n[data.noise]\nsd = {}\n{}",
        t.rows(),
        f.k,
        s2.sqrt(),
        models(t.rows())
    )
}

/// One (table, family) case measured against the truth.
#[derive(Debug, Clone, Default)]
struct Case {
    /// Inside the truth's one-SE set at R = 2000 (the strict yardstick).
    in_set: bool,
    /// Inside the truth's one-SE set at the precision of an R = 200 run ([`user_set`]).
    in_user: bool,
    /// The same with the truth's evaluation-point sampling error added.
    in_points: bool,
    near: bool,
    mare: f64,
    regret: f64,
    /// The curve error with the twin's noise term replaced by the true σ² = 1.
    mare_known: f64,
    /// The curve error with the twin's noise term replaced by the table's own mean squared
    /// noise, `mean (y − f)²`: what an estimator that knew f would report, so the floor for any
    /// noise estimator on this table.
    mare_drawn: f64,
}

fn judge_noise(truth: &Curve, el: &[f64], pick: f64, s2: f64, drawn: f64) -> Case {
    let mut c = judge(truth, el, pick);
    let with = |noise: f64| {
        el.iter()
            .zip(&truth.el)
            .map(|(a, b)| ((a - s2 + noise) / b - 1.0).abs())
            .sum::<f64>()
            / el.len() as f64
    };
    c.mare_known = with(truth.noise);
    c.mare_drawn = with(drawn);
    c
}

fn judge(truth: &Curve, el: &[f64], pick: f64) -> Case {
    let min = truth.el.iter().cloned().fold(f64::INFINITY, f64::min);
    let gi = truth
        .grid
        .iter()
        .position(|g| *g == pick)
        .expect("pick on the grid");
    let regret = truth.el[gi] / min - 1.0;
    let mare = el
        .iter()
        .zip(&truth.el)
        .map(|(a, b)| (a / b - 1.0).abs())
        .sum::<f64>()
        / el.len() as f64;
    Case {
        in_set: truth.one_se.contains(&pick),
        in_user: truth.one_se_user.contains(&pick),
        in_points: truth.one_se_points.contains(&pick),
        near: regret <= 0.01,
        mare,
        regret,
        mare_known: f64::NAN,
        mare_drawn: f64::NAN,
    }
}

/// Everything measured on one table.
#[derive(Debug, Clone, Default)]
struct TableResult {
    /// Per family: the new twin's pick, its bias-corrected pick, the old twin's pick.
    new: Vec<Case>,
    corrected: Vec<Case>,
    /// The headline pick of `lossprism twin` ([`dgp_twin::FidelityModel::headline_pick`]).
    headline: Vec<Case>,
    /// Candidate: the bias-corrected pick restricted to the twin's one-SE set.
    guarded: Vec<Case>,
    before: Vec<Case>,
    /// Per family: the fidelity check's in-set share and curve distance.
    fidelity: Vec<(f64, f64)>,
    sigma2_new: f64,
    sigma2_before: f64,
    /// Mean squared noise actually drawn in the table.
    sigma2_drawn: f64,
    picks: Vec<(f64, f64, f64, f64)>,
    reference: String,
    /// The new twin's curves and its noise's standard error.
    twin: Vec<Curve>,
    sigma2_se: f64,
}

#[allow(clippy::too_many_arguments)]
fn study_table(
    dir: &Path,
    proc: Process,
    n: usize,
    seed: u64,
    truth: &[Curve],
    r_twin: usize,
    fidelity: usize,
    fidelity_r: usize,
) -> TableResult {
    let (x, y) = draw_table(proc, n, 1.0, seed);
    let f = truth_at(proc, &x);
    let sigma2_drawn = y
        .iter()
        .zip(&f)
        .map(|(a, b)| (a - b) * (a - b))
        .sum::<f64>()
        / n as f64;
    let csv = format!("{}-{seed}.csv", proc.name);
    write_csv(&dir.join(&csv), &x, &y);
    let out = dir.join(format!("{}-{seed}-twin.toml", proc.name));
    let o = TwinOptions {
        table: dir.join(&csv),
        target: "y".into(),
        out: out.clone(),
        seed,
        fidelity,
        fidelity_replicates: fidelity_r,
        // `LOSSPRISM_CALIB_TWICING=on|off` overrides the twicing check (`twin --twicing`).
        twicing: match std::env::var("LOSSPRISM_CALIB_TWICING").as_deref() {
            Ok("on") => dgp_twin::Twicing::On,
            Ok("off") => dgp_twin::Twicing::Off,
            _ => dgp_twin::Twicing::Auto,
        },
        // `LOSSPRISM_CALIB_VARYING=on` writes varying noise (`twin --varying`).
        varying: std::env::var("LOSSPRISM_CALIB_VARYING").as_deref() == Ok("on"),
        // `LOSSPRISM_CALIB_SHAPE=residuals` resamples the residuals (`twin --noise-shape`).
        noise_shape: if resampled_shape("LOSSPRISM_CALIB_SHAPE") {
            lossprism::scenario::plan::ShapeChoice::Residuals
        } else {
            lossprism::scenario::plan::ShapeChoice::Gaussian
        },
        // `LOSSPRISM_CALIB_SHARPEN=F` sets the reference's sharpening (`twin --sharpen`; 1: the
        // cross-validated tuning, the twin before §0.5).
        sharpen: std::env::var("LOSSPRISM_CALIB_SHARPEN")
            .ok()
            .map(|v| v.parse().expect("LOSSPRISM_CALIB_SHARPEN is a number"))
            .unwrap_or(dgp_twin::SHARPEN),
        // `LOSSPRISM_CALIB_JITTER_VARIANCE=added` jitters as the plain smoothed bootstrap
        // (`twin --jitter-variance added`, the twin before §0.8).
        keep_variance: std::env::var("LOSSPRISM_CALIB_JITTER_VARIANCE").as_deref() != Ok("added"),
        ..Default::default()
    };
    twin_cmd::command(&o).expect("twin");
    let written = fs::read_to_string(&out).unwrap();
    let plan = plan_text(dir, "twin-run.toml", &with_models(&written, r_twin, n));
    let mut twin_curves = curves(&plan);
    if std::env::var("LOSSPRISM_CALIB_NULL").is_ok() {
        // `LOSSPRISM_CALIB_NULL=m` (docs/twin-calibration.md §0.6, measured and not kept): the
        // twin's recipe refitted, in m more runs, on pure Gaussian noise of the twin's σ̂² at
        // the same rows. The twin's truth is the reference `S y = S f + S ε`; for a linear
        // smoother S and a model whose mean fit is linear in the truth, the twin's bias² is
        // that of `S f` plus the bias² of the fitted noise `S ε`, whose expectation the null
        // run's bias² estimates. The twin's curve is reported with it subtracted.
        let s2 = {
            let lossprism::scenario::Source::Synthetic(sp) = &plan.source else {
                panic!("a twin plans as a synthetic source")
            };
            sp.process
                .reference()
                .unwrap()
                .report
                .clone()
                .unwrap_or_default()
                .noise
                .as_ref()
                .map_or(1.0, |n| n.value)
        };
        let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x9e37);
        let reps = env_usize("LOSSPRISM_CALIB_NULL", 1);
        let mut acc: Vec<Vec<f64>> = twin_curves.iter().map(|c| vec![0.0; c.b2.len()]).collect();
        for rep in 0..reps {
            let ys: Array1<f64> = (0..n)
                .map(|_| s2.sqrt() * rng.sample::<f64, _>(StandardNormal))
                .collect();
            let ncsv = format!("{}-{seed}-null{rep}.csv", proc.name);
            write_csv(&dir.join(&ncsv), &x, &ys);
            let text = with_models(&written, r_twin, n)
                .replace(&format!("path = \"{csv}\""), &format!("path = \"{ncsv}\""));
            assert!(text.contains(&ncsv));
            let nc = curves(&plan_text(dir, "null-run.toml", &text));
            for (a, c) in acc.iter_mut().zip(&nc) {
                for (v, b) in a.iter_mut().zip(&c.b2) {
                    *v += b / reps as f64;
                }
            }
        }
        for (c, a) in twin_curves.iter_mut().zip(&acc) {
            println!(
                "    null b2 [{}]",
                a.iter()
                    .map(|v| format!("{v:.3}"))
                    .collect::<Vec<_>>()
                    .join(" ")
            );
            for (e, v) in c.el.iter_mut().zip(a) {
                *e -= v;
            }
        }
    }
    let lossprism::scenario::Source::Synthetic(sp) = &plan.source else {
        panic!("a twin plans as a synthetic source")
    };
    let refr = sp.process.reference().expect("a reference");
    let report = refr.report.clone().unwrap_or_default();
    let sigma2_new = report.noise.as_ref().map_or(f64::NAN, |n| n.value);
    let sigma2_se = report.noise.as_ref().map_or(f64::NAN, |n| n.stderr);
    let t = lossprism::dataset::load_csv(
        &dir.join(&csv),
        &lossprism::dataset::TableOptions {
            target: "y".into(),
            ..Default::default()
        },
    )
    .unwrap();
    let before_plan = plan_text(dir, "before.toml", &before_text(&csv, &t, seed, r_twin));
    let before_curves = curves(&before_plan);
    let sigma2_before = match &before_plan.source {
        lossprism::scenario::Source::Synthetic(s) => {
            let sd = s.process.sd_at(t.x.view()).unwrap();
            sd[0] * sd[0]
        }
        _ => unreachable!(),
    };
    let mut res = TableResult {
        sigma2_new,
        sigma2_before,
        sigma2_drawn,
        reference: format!(
            "{}{}",
            refr.choice.family.name(),
            if refr.choice.twice { " twiced" } else { "" }
        ),
        twin: twin_curves.clone(),
        sigma2_se,
        ..Default::default()
    };
    // `LOSSPRISM_CALIB_COMBO=1` (docs/twin-calibration.md §0.11): the third bracket column
    // becomes the curve error with the twin's noise term replaced by the mean of the corrected
    // Gamma test and plane, and each table prints both estimates and every (family) curve of the
    // twin and the truth, from which any other noise value's curve error is computed.
    let sigma2_alt = if std::env::var("LOSSPRISM_CALIB_COMBO").is_ok() {
        let yv = y.to_vec();
        let fit = |m| corrected_noise(&x, &yv, seed, m).value;
        let (g, p) = (fit(Method::Gamma), fit(Method::Plane));
        println!(
            "    combo: twin {sigma2_new:.4} gamma {g:.4} plane {p:.4} drawn {sigma2_drawn:.4}"
        );
        0.5 * (g + p)
    } else {
        sigma2_drawn
    };
    for (i, tc) in truth.iter().enumerate() {
        if std::env::var("LOSSPRISM_CALIB_COMBO").is_ok() {
            println!(
                "    curves {i} s2 {} el {:?} truth {:?}",
                twin_curves[i].noise, twin_curves[i].el, tc.el
            );
        }
        res.new.push(judge_noise(
            tc,
            &twin_curves[i].el,
            twin_curves[i].pick,
            twin_curves[i].noise,
            sigma2_alt,
        ));
        res.before.push(judge_noise(
            tc,
            &before_curves[i].el,
            before_curves[i].pick,
            sigma2_before,
            sigma2_drawn,
        ));
        let (cp, fid, cl, hp, gp) = match report.fidelity.as_ref().map(|f| &f.models[i]) {
            Some(m) => (
                m.corrected_pick,
                (m.in_one_se, m.curve_error),
                m.corrected_loss.clone(),
                m.headline_pick(),
                guarded_pick(m),
            ),
            None => (
                twin_curves[i].pick,
                (f64::NAN, f64::NAN),
                twin_curves[i].el.clone(),
                twin_curves[i].pick,
                twin_curves[i].pick,
            ),
        };
        res.corrected.push(judge(tc, &cl, cp));
        res.headline.push(judge_noise(
            tc,
            &twin_curves[i].el,
            hp,
            twin_curves[i].noise,
            sigma2_drawn,
        ));
        res.guarded.push(judge(tc, &cl, gp));
        res.fidelity.push(fid);
        res.picks
            .push((twin_curves[i].pick, cp, gp, before_curves[i].pick));
    }
    res
}

/// The lowest bias-corrected loss among the twin's own one-SE set (a candidate measured by the
/// study, not used by `lossprism twin`).
fn guarded_pick(m: &dgp_twin::FidelityModel) -> f64 {
    let mut best: Option<usize> = None;
    for (g, v) in m.grid.iter().enumerate() {
        if !m.one_se.contains(v) {
            continue;
        }
        if best.map_or(true, |b| m.corrected_loss[g] < m.corrected_loss[b]) {
            best = Some(g);
        }
    }
    best.map_or(m.pick, |b| m.grid[b])
}

fn share(v: &[bool]) -> (usize, usize) {
    (v.iter().filter(|b| **b).count(), v.len())
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

fn sd(v: &[f64]) -> f64 {
    let m = mean(v);
    (v.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / (v.len() as f64 - 1.0)).sqrt()
}

/// Summary over cases: (in-set strict, in-set at R = 200, in-set at R = 200 with the evaluation
/// points' error, within 1%, mean MARE (σ² known; noise term the table's own mean squared
/// noise), mean regret).
fn summary(cases: &[&Case]) -> String {
    let (a, n) = share(&cases.iter().map(|c| c.in_set).collect::<Vec<_>>());
    let (u, _) = share(&cases.iter().map(|c| c.in_user).collect::<Vec<_>>());
    let (q, _) = share(&cases.iter().map(|c| c.in_points).collect::<Vec<_>>());
    let (b, _) = share(&cases.iter().map(|c| c.near).collect::<Vec<_>>());
    format!(
        "{a}/{n} · {u}/{n} · {q}/{n} · {b}/{n} · {:.1}% ({:.1}%; {:.1}%) · {:.2}%",
        100.0 * mean(&cases.iter().map(|c| c.mare).collect::<Vec<_>>()),
        100.0 * mean(&cases.iter().map(|c| c.mare_known).collect::<Vec<_>>()),
        100.0 * mean(&cases.iter().map(|c| c.mare_drawn).collect::<Vec<_>>()),
        100.0 * mean(&cases.iter().map(|c| c.regret).collect::<Vec<_>>())
    )
}

fn env_usize(key: &str, default: usize) -> usize {
    std::env::var(key)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

#[test]
#[ignore = "calibration study, several minutes; results in docs/twin-calibration.md"]
fn calibration_study() {
    let tables = env_usize("LOSSPRISM_CALIB_TABLES", 5);
    let r_true = env_usize("LOSSPRISM_CALIB_R_TRUE", 2000);
    let m_true = env_usize("LOSSPRISM_CALIB_M_TRUE", 4000);
    let base_seed = env_usize("LOSSPRISM_CALIB_SEED", 2026) as u64;
    // The fidelity check's tables and replicates (`lossprism twin`'s defaults unless set).
    let fid_tables = env_usize("LOSSPRISM_CALIB_FIDELITY", twin_cmd::FIDELITY_TABLES);
    let fid_r = env_usize("LOSSPRISM_CALIB_FIDELITY_R", twin_cmd::FIDELITY_REPLICATES);
    // The twin run's replicates (a user's default precision unless set).
    let r_twin = env_usize("LOSSPRISM_CALIB_TWIN_R", 200);
    let n = 400;
    let dir = tempfile::tempdir().unwrap();
    let mut all: Vec<(Process, Vec<TableResult>)> = Vec::new();
    let procs = match std::env::var("LOSSPRISM_CALIB_PROCS").as_deref() {
        Ok("lab") => LAB.to_vec(),
        Ok("low") => LOW.to_vec(),
        Ok("wide") => WIDE.to_vec(),
        Ok("het") => HET.to_vec(),
        _ => vec![SWELL3, LEDGE3, HINGE3],
    };
    for (pi, proc) in procs.into_iter().enumerate() {
        let t0 = std::time::Instant::now();
        let tc = truth(dir.path(), proc, n, r_true, m_true, base_seed);
        println!(
            "{}: truth in {:.1} s; tree {:?} set {:?} (at R = {USER_R}: {:?}; with points: {:?}); knn {:?} set {:?} (at R = {USER_R}: {:?}; with points: {:?})",
            proc.name,
            t0.elapsed().as_secs_f64(),
            tc[0]
                .el
                .iter()
                .map(|v| format!("{v:.4}"))
                .collect::<Vec<_>>(),
            tc[0].one_se,
            tc[0].one_se_user,
            tc[0].one_se_points,
            tc[1]
                .el
                .iter()
                .map(|v| format!("{v:.4}"))
                .collect::<Vec<_>>(),
            tc[1].one_se,
            tc[1].one_se_user,
            tc[1].one_se_points
        );
        for (c, fam) in tc.iter().zip(["tree", "knn"]) {
            let se: Vec<String> = c.se.iter().map(|v| format!("{v:.4}")).collect();
            let pts: Vec<String> = c
                .point_var
                .iter()
                .map(|v| format!("{:.4}", (v / c.points as f64).sqrt()))
                .collect();
            println!("  {fam}: replicate SE {se:?}; evaluation-point SE {pts:?}");
        }
        let mut res = Vec::new();
        for t in 0..tables {
            let t1 = std::time::Instant::now();
            let seed = base_seed * 1000 + 100 * pi as u64 + 17 * t as u64 + 1;
            let r = study_table(dir.path(), proc, n, seed, &tc, r_twin, fid_tables, fid_r);
            println!(
                "  table {t}: ref {}, σ̂² new {:.3} before {:.3} drawn {:.3}; picks (new, corrected, guarded, before) {:?}; fidelity {:?}; new MARE {:.1}%/{:.1}%; before MARE {:.1}%/{:.1}% ({:.0} s)",
                r.reference,
                r.sigma2_new,
                r.sigma2_before,
                r.sigma2_drawn,
                r.picks,
                r.fidelity,
                100.0 * r.new[0].mare,
                100.0 * r.new[1].mare,
                100.0 * r.before[0].mare,
                100.0 * r.before[1].mare,
                t1.elapsed().as_secs_f64()
            );
            if std::env::var("LOSSPRISM_CALIB_DIAG").is_ok() {
                for (i, fam) in ["tree", "knn"].iter().enumerate() {
                    let f = |v: &[f64]| {
                        v.iter()
                            .map(|x| format!("{x:.3}"))
                            .collect::<Vec<_>>()
                            .join(" ")
                    };
                    let tv: Vec<f64> = (0..tc[i].el.len())
                        .map(|g| tc[i].el[g] - tc[i].noise - tc[i].b2[g])
                        .collect();
                    let wv: Vec<f64> = (0..r.twin[i].el.len())
                        .map(|g| r.twin[i].el[g] - r.twin[i].noise - r.twin[i].b2[g])
                        .collect();
                    println!(
                        "    {fam} b2 true [{}] twin [{}]",
                        f(&tc[i].b2),
                        f(&r.twin[i].b2)
                    );
                    println!("    {fam} var true [{}] twin [{}]", f(&tv), f(&wv));
                }
            }
            res.push(r);
        }
        all.push((proc, res));
    }
    println!("\n| process | family | before: in-set (R = 2000 set) · in-set (R = {USER_R} set) · in-set (R = {USER_R} + points set) · ≤1% · MARE (with σ² known) · regret | new twin | new, bias-corrected pick | new, headline pick | candidate: corrected within the twin's one-SE set | fidelity (self-reported in-set, curve distance) |");
    println!("|---|---|---|---|---|---|---|---|");
    let fams = ["tree", "knn"];
    for (proc, res) in &all {
        for (i, fam) in fams.iter().enumerate() {
            let b: Vec<&Case> = res.iter().map(|r| &r.before[i]).collect();
            let w: Vec<&Case> = res.iter().map(|r| &r.new[i]).collect();
            let c: Vec<&Case> = res.iter().map(|r| &r.corrected[i]).collect();
            let h: Vec<&Case> = res.iter().map(|r| &r.headline[i]).collect();
            let g: Vec<&Case> = res.iter().map(|r| &r.guarded[i]).collect();
            let fi: Vec<f64> = res.iter().map(|r| r.fidelity[i].0).collect();
            let fm: Vec<f64> = res.iter().map(|r| r.fidelity[i].1).collect();
            println!(
                "| {} | {fam} | {} | {} | {} | {} | {} | {:.0}% · {:.1}% |",
                proc.name,
                summary(&b),
                summary(&w),
                summary(&c),
                summary(&h),
                summary(&g),
                100.0 * mean(&fi),
                100.0 * mean(&fm)
            );
        }
    }
    let pool = |f: &dyn Fn(&TableResult) -> Vec<Case>| -> Vec<Case> {
        all.iter()
            .flat_map(|(_, res)| res.iter().flat_map(f))
            .collect()
    };
    for (label, cases) in [
        ("before", pool(&|r| r.before.clone())),
        ("new twin", pool(&|r| r.new.clone())),
        ("new, bias-corrected pick", pool(&|r| r.corrected.clone())),
        ("new, headline pick", pool(&|r| r.headline.clone())),
        (
            "candidate: corrected within the twin's one-SE set",
            pool(&|r| r.guarded.clone()),
        ),
    ] {
        let refs: Vec<&Case> = cases.iter().collect();
        println!("| pooled | {label} | {} |", summary(&refs));
        // Cases alternate tree, knn within a table.
        for (i, fam) in fams.iter().enumerate() {
            let per: Vec<&Case> = cases.iter().skip(i).step_by(fams.len()).collect();
            println!("| pooled {fam} | {label} | {} |", summary(&per));
        }
    }
    for (proc, res) in &all {
        let nw: Vec<f64> = res.iter().map(|r| r.sigma2_new).collect();
        let bf: Vec<f64> = res.iter().map(|r| r.sigma2_before).collect();
        println!(
            "{}: σ̂² (true 1) new {:.3} ± {:.3} (sd over tables {:.3}); before {:.3} ± {:.3}",
            proc.name,
            mean(&nw),
            sd(&nw) / (nw.len() as f64).sqrt(),
            sd(&nw),
            mean(&bf),
            sd(&bf) / (bf.len() as f64).sqrt()
        );
    }
    // The brief's targets, asserted on what this study can support (see the docs for the
    // measured values): mean curve error of the new twin at most 8%, and its headline pick (the
    // pick `lossprism twin` recommends) within 1% of the true minimum in at least 80% of the
    // cases. Measured with the twiced reference (docs/twin-calibration.md §0): seeds 2026 and
    // 2028 fail the curve error (8.4%, 9.4%), seed 2027 passes (7.3%); not loosened.
    let new = pool(&|r| r.new.clone());
    let headline = pool(&|r| r.headline.clone());
    let mare = mean(&new.iter().map(|c| c.mare).collect::<Vec<_>>());
    let near = headline.iter().filter(|c| c.near).count() as f64 / headline.len() as f64;
    assert!(mare <= 0.08, "mean curve error {mare}");
    assert!(near >= 0.8, "within 1% of the true minimum: {near}");
}

/// The standard errors the nearest-neighbour and Gamma estimators reported before they counted
/// shared responses: the sd of the terms over √n (nn) and the least-squares standard error of
/// the Gamma line's intercept.
fn old_se(m: Method, x: &Array2<f64>, y: &Array1<f64>) -> f64 {
    let n = y.len();
    let z = noise::standardize(x.view());
    match m {
        Method::NearestNeighbour => {
            let nn = noise::nearest(z.view(), 1);
            let t: Vec<f64> = (0..n)
                .map(|i| 0.5 * (y[i] - y[nn[i][0].0]).powi(2))
                .collect();
            sd(&t) / (n as f64).sqrt()
        }
        Method::Gamma => {
            let k = noise::GAMMA_K.min(n - 1);
            let nn = noise::nearest(z.view(), k);
            let (mut d, mut g) = (vec![0.0; k], vec![0.0; k]);
            for (i, l) in nn.iter().enumerate() {
                for (o, &(j, d2)) in l.iter().enumerate() {
                    d[o] += d2 / n as f64;
                    g[o] += 0.5 * (y[j] - y[i]).powi(2) / n as f64;
                }
            }
            let m = k as f64;
            let (dm, gm) = (mean(&d), mean(&g));
            let sdd: f64 = d.iter().map(|v| (v - dm) * (v - dm)).sum();
            let slope = d
                .iter()
                .zip(&g)
                .map(|(a, b)| (a - dm) * (b - gm))
                .sum::<f64>()
                / sdd;
            let a = gm - slope * dm;
            let rss: f64 = d
                .iter()
                .zip(&g)
                .map(|(u, v)| (v - a - slope * u).powi(2))
                .sum();
            (rss / (m - 2.0) * (1.0 / m + dm * dm / sdd)).sqrt()
        }
        Method::Gsjs | Method::Plane => noise::estimate(m, x.view(), y.view()).unwrap().stderr,
    }
}

/// The noise study: corrected estimates over `tables` tables of n rows, for processes in 1, 2
/// and 3 dimensions (true σ² = 1). Returns per process (bias, sd, mean SE / sd, coverage).
fn noise_runs(procs: &[Process], tables: usize, n: usize, seed: u64) -> Vec<(String, Vec<String>)> {
    let mut out = Vec::new();
    for (pi, proc) in procs.iter().enumerate() {
        let seed = seed + 10_000 * pi as u64;
        let mut corrected = Vec::new();
        let mut ses = Vec::new();
        // Per estimator: (estimate, its standard error, the standard error reported before).
        type Raw = Vec<(f64, f64, f64)>;
        let mut raw: Vec<(Method, Raw)> = Vec::new();
        // Raw lines: GSJS (one input) or the plane (2 and 3 inputs), then the Gamma test and
        // nearest-neighbour differences; the corrected line counts the estimators the twins used.
        let first = match proc.p {
            1 => Some(Method::Gsjs),
            2 | 3 => Some(Method::Plane),
            _ => None,
        };
        let methods: Vec<Method> = first
            .into_iter()
            .chain([Method::Gamma, Method::NearestNeighbour])
            .collect();
        let mut used: Vec<(Method, usize)> = Vec::new();
        for m in &methods {
            raw.push((*m, Vec::new()));
        }
        let mut oracle = Vec::new();
        // Per table: the value with the pilot's correction, the pilot's excess, the sampling SE.
        let mut alt: Vec<(f64, f64, f64)> = Vec::new();
        // Tables whose residuals `twin` calls skewed or heavy-tailed (its shape line).
        let mut non_gaussian = 0;
        for t in 0..tables {
            let (x, y, yv, fit) = noise_study_table(*proc, n, seed, t);
            non_gaussian += dgp_twin::ResidualShape::of(&yv, &fit.f_rows)
                .is_some_and(|s| s.non_gaussian()) as usize;
            let c = fit.noise.expect("noise");
            match used.iter_mut().find(|u| u.0 == c.method) {
                Some(u) => u.1 += 1,
                None => used.push((c.method, 1)),
            }
            corrected.push(c.value);
            ses.push(c.se);
            alt.push((c.raw - c.pilot_correction, c.pilot_excess, c.sampling_se));
            for (m, v) in raw.iter_mut() {
                let e = noise::estimate(*m, x.view(), y.view()).unwrap();
                v.push((e.value, e.stderr, old_se(*m, &x, &y)));
            }
            // The same correction with the true f (the best a reference can do).
            let f: Vec<f64> = truth_at(*proc, &x).iter().map(|v| v * signal()).collect();
            let d = noise::Design::new(c.method, x.view()).unwrap();
            oracle.push(c.raw - d.value(Array1::from(f).view()));
        }
        let s = sd(&corrected);
        let cover = corrected
            .iter()
            .zip(&ses)
            .filter(|(v, se)| (*v - 1.0).abs() <= 2.0 * *se)
            .count();
        let cov = |vals: &[f64], se: &[f64]| {
            vals.iter()
                .zip(se)
                .filter(|(v, s)| (*v - 1.0).abs() <= 2.0 * *s)
                .count()
        };
        let sampling: Vec<f64> = alt.iter().map(|a| a.2).collect();
        let pilot_value: Vec<f64> = alt.iter().map(|a| a.0).collect();
        let flags = alt.iter().filter(|a| a.1 > a.2).count();
        let reference_error = format!(
            "sampling SE alone: SE/sd {:.2}, ±2 SE coverage {}/{tables}; pilot excess mean {:.4}, flagged {flags}/{tables}; value with the pilot's correction instead: bias {:+.1}% ± {:.1}%, sd {:.3}",
            mean(&sampling) / sd(&corrected),
            cov(&corrected, &sampling),
            mean(&alt.iter().map(|a| a.1).collect::<Vec<_>>()),
            100.0 * (mean(&pilot_value) - 1.0),
            100.0 * sd(&pilot_value) / (tables as f64).sqrt(),
            sd(&pilot_value)
        );
        let mut lines = vec![format!(
            "corrected ({}): bias {:+.1}% ± {:.1}%, sd {:.3}, SE/sd {:.2}, ±2 SE coverage {cover}/{tables}; oracle-f correction bias {:+.1}%",
            used.iter()
                .map(|(m, k)| format!("{} {k}", m.name()))
                .collect::<Vec<_>>()
                .join(", "),
            100.0 * (mean(&corrected) - 1.0),
            100.0 * s / (tables as f64).sqrt(),
            s,
            mean(&ses) / s,
            100.0 * (mean(&oracle) - 1.0)
        )];
        lines.push(reference_error);
        lines.push(format!(
            "residual shape beyond a Gaussian's ({} SE): {non_gaussian}/{tables} tables",
            dgp_twin::SHAPE_Z
        ));
        for (m, v) in &raw {
            let vals: Vec<f64> = v.iter().map(|a| a.0).collect();
            let s = sd(&vals);
            let cover = v
                .iter()
                .filter(|(e, se, _)| (*e - 1.0).abs() <= 2.0 * *se)
                .count();
            lines.push(format!(
                "raw {}: bias {:+.1}% ± {:.1}%, sd {:.3}, own SE/sd {:.2} (before: {:.2}), ±2 SE coverage {cover}/{tables}",
                m.name(),
                100.0 * (mean(&vals) - 1.0),
                100.0 * s / (tables as f64).sqrt(),
                s,
                mean(&v.iter().map(|a| a.1).collect::<Vec<_>>()) / s,
                mean(&v.iter().map(|a| a.2).collect::<Vec<_>>()) / s
            ));
        }
        out.push((proc.name.to_string(), lines));
    }
    out
}

const SMOOTH1: Process = Process {
    name: "smooth1",
    formula: "2*sin(2*pi*x1) + x1",
    p: 1,
    sd: "1",
};
const KINK1: Process = Process {
    name: "kink1",
    formula: "4*abs(x1 - 0.35)",
    p: 1,
    sd: "1",
};
const SMOOTH2: Process = Process {
    name: "smooth2",
    formula: "2*sin(2*pi*x1) + 2*x2^2",
    p: 2,
    sd: "1",
};
const STEP2: Process = Process {
    name: "step2",
    formula: "2*(x1 + x2 > 1) + x1*x2",
    p: 2,
    sd: "1",
};

/// The processes of the noise studies: 1–3 inputs, or with `LOSSPRISM_NOISE_PROCS=wide` the 6-
/// and 10-input ones; process i of the list draws its tables from seed 7000 + 10 000 i.
fn noise_procs() -> Vec<Process> {
    match std::env::var("LOSSPRISM_NOISE_PROCS").as_deref() {
        Ok("wide") => WIDE.to_vec(),
        _ => vec![SMOOTH1, KINK1, SMOOTH2, STEP2, SWELL3, LEDGE3, HINGE3],
    }
}

#[test]
#[ignore = "noise study, a few minutes; results in docs/twin-calibration.md"]
fn noise_study() {
    let tables = env_usize("LOSSPRISM_NOISE_TABLES", 40);
    let procs = noise_procs();
    for (name, lines) in noise_runs(&procs, tables, 300, 7000) {
        println!("{name}:");
        for l in lines {
            println!("  {l}");
        }
    }
}

#[test]
fn corrected_noise_is_close_on_known_processes() {
    // Fast version of the noise study: 8 tables of n = 300 in 1 and 3 dimensions. The mean of
    // the corrected estimate must lie within 4 standard errors (spread over tables / √8) of the
    // true σ² = 1, and the reported SE must be within a factor 2 of that spread (its
    // calibration is measured in the ignored `noise_study`).
    for proc in [SMOOTH1, LEDGE3] {
        let mut v = Vec::new();
        let mut ses = Vec::new();
        for t in 0..8 {
            let (x, y) = draw_table(proc, 300, 1.0, 900 + t);
            let fit = dgp_twin::fit_regression(
                x.view(),
                &y.to_vec(),
                t,
                Rule::Best,
                None,
                dgp_twin::Twicing::Auto,
                "t",
            )
            .unwrap();
            let c = fit.noise.unwrap();
            v.push(c.value);
            ses.push(c.se);
        }
        let (m, s) = (mean(&v), sd(&v));
        let se = s / (v.len() as f64).sqrt();
        println!(
            "{}: corrected σ̂² {m:.3} ± {se:.3} (sd {s:.3}), mean reported SE {:.3}",
            proc.name,
            mean(&ses)
        );
        assert!((m - 1.0).abs() < 4.0 * se, "{}: {m} ± {se}", proc.name);
        assert!(
            mean(&ses) > 0.5 * s && mean(&ses) < 2.0 * s,
            "{}: SE {} vs spread {s}",
            proc.name,
            mean(&ses)
        );
    }
}

#[test]
fn little_noise_next_to_a_smooth_truth_is_read_with_the_plane() {
    // docs/twin-calibration.md §2.11: the smooth 3-input process with its truth times 4 (noise
    // sd a quarter of the signal's usual scale), 12 tables of n = 300. The twin's reference
    // explains most of the response, so it measures the noise with the plane; the mean of the
    // corrected estimates must lie within 4 standard errors (spread over tables / √12) of the
    // true σ² = 1, and closer than the Gamma test's on the same tables (measured +22% there).
    let (mut plane, mut gamma) = (Vec::new(), Vec::new());
    for t in 0..12 {
        let (x, mut y) = draw_table(SWELL3, 300, 1.0, 1900 + t);
        for (v, f) in y.iter_mut().zip(truth_at(SWELL3, &x)) {
            *v += 3.0 * f;
        }
        let yv = y.to_vec();
        let fit = |method| {
            dgp_twin::fit_regression(
                x.view(),
                &yv,
                t,
                Rule::Best,
                method,
                dgp_twin::Twicing::Auto,
                "t",
            )
            .unwrap()
            .noise
            .unwrap()
        };
        let c = fit(None);
        assert_eq!(c.method, Method::Plane, "table {t}");
        plane.push(c.value);
        gamma.push(fit(Some(Method::Gamma)).value);
    }
    let (m, se) = (mean(&plane), sd(&plane) / (plane.len() as f64).sqrt());
    let g = mean(&gamma);
    println!("plane {m:.3} ± {se:.3}, Gamma test {g:.3}");
    assert!((m - 1.0).abs() < 4.0 * se, "plane {m} ± {se}");
    assert!((m - 1.0).abs() < (g - 1.0).abs(), "plane {m}, Gamma {g}");
}

#[test]
fn twin_picks_near_the_truth_on_a_known_process() {
    // Fast version of the calibration study: two tables of the step process, twins without the
    // fidelity check (it runs in tests/twin.rs), twin runs R = 60, truth R = 300 with 1500
    // evaluation points. Asserted with tolerances from standard errors:
    // - the twin's corrected σ̂² lies within 4 of its standard errors of the true σ² = 1;
    // - at the twin's pick, its expected loss matches the truth's within 4 standard errors of the
    //   difference: the two Monte Carlo errors and the noise estimate's, which moves the noise and
    //   the variance together (EL − bias² = σ² + variance, and the variance of these families is
    //   proportional to σ²): se = SE(σ̂²) · (EL − bias²) / σ̂².
    // The study's pick rates and curve errors are printed (they need many tables to mean much).
    let dir = tempfile::tempdir().unwrap();
    let n = 400;
    let tc = truth(dir.path(), LEDGE3, n, 300, 1500, 5);
    for seed in [31, 32] {
        let r = study_table(dir.path(), LEDGE3, n, seed, &tc, 60, 0, 60);
        assert!(
            (r.sigma2_new - 1.0).abs() <= 4.0 * r.sigma2_se,
            "σ̂² {} ± {}",
            r.sigma2_new,
            r.sigma2_se
        );
        for (i, c) in r.new.iter().enumerate() {
            let tw = &r.twin[i];
            let g = tw.grid.iter().position(|v| *v == tw.pick).unwrap();
            let noise_se = r.sigma2_se * (tw.el[g] - tw.b2[g]) / r.sigma2_new;
            let se = (tw.se[g].powi(2) + tc[i].se[g].powi(2) + noise_se.powi(2)).sqrt();
            let d = tw.el[g] - tc[i].el[g];
            println!(
                "table {seed} family {i}: picks {:?}; regret {:.2}%, MARE {:.1}% (before: regret {:.2}%, MARE {:.1}%); at the pick twin {:.4} truth {:.4} (z = {:.2})",
                r.picks[i],
                100.0 * c.regret,
                100.0 * c.mare,
                100.0 * r.before[i].regret,
                100.0 * r.before[i].mare,
                tw.el[g],
                tc[i].el[g],
                d / se
            );
            assert!(d.abs() <= 4.0 * se, "at the pick: {d} vs 4 × {se}");
        }
    }
}

/// Alternatives to the noise correction measured for `docs/twin-calibration.md` §2 (ideas that
/// were not adopted), on the noise study's tables: A the shipped correction, B the additive
/// iterated-bootstrap correction `raw − 2 est(f̂) + mean est(f̂**)` (reference refitted with
/// the same recipe on tables drawn from the twin), C its multiplicative form
/// `raw − est(f̂)² / mean est(f̂**)`, D a less-smooth pilot (k halved, leaf 2, the next smaller
/// bandwidth) with its noise roughness removed in the twin's world, E the reference itself
/// with its noise roughness removed; then the roughness terms behind them.
#[test]
#[ignore = "alternatives study, about a minute; results in docs/twin-calibration.md"]
fn noise_variants() {
    use lossprism::dgp::reference::loclin::H_CANDIDATES;
    use lossprism::dgp::reference::Reference;
    let tables = env_usize("LOSSPRISM_NOISE_TABLES", 30);
    let nb = env_usize("LOSSPRISM_NOISE_REFITS", 6);
    let procs = [SMOOTH1, KINK1, SMOOTH2, STEP2, SWELL3, LEDGE3, HINGE3];
    let only = std::env::var("LOSSPRISM_NOISE_PROCS").unwrap_or_default();
    let n = 300;
    for (pi, proc) in procs.iter().enumerate() {
        if !only.is_empty() && !only.split(',').any(|p| p == proc.name) {
            continue;
        }
        let seed = 7000 + 10_000 * pi as u64;
        let mut rows: Vec<Vec<f64>> = Vec::new();
        for t in 0..tables {
            let (x, _, yv, fit) = noise_study_table(*proc, n, seed, t);
            let c = fit.noise.expect("noise");
            let d = noise::Design::new(c.method, x.view()).unwrap();
            let est = |v: &[f64]| d.value(Array1::from(v.to_vec()).view());
            let choice = fit.selection.choice.clone();
            let mut sharp = choice.clone();
            sharp.k = sharp.k.map(|k| (k / 2).max(1));
            if let Some(f) = sharp.forest.as_mut() {
                f.min_leaf = 2;
            }
            if let Some(h) = sharp.bandwidth {
                let i = H_CANDIDATES.iter().position(|c| *c == h).unwrap_or(0);
                sharp.bandwidth = Some(H_CANDIDATES[i.saturating_sub(1)]);
            }
            let refit = |ch: &lossprism::dgp::reference::Choice, v: &[f64]| -> Vec<f64> {
                let r =
                    Reference::fit(x.view(), Array1::from(v.to_vec()).view(), 0, ch, false, "t")
                        .unwrap();
                x.rows()
                    .into_iter()
                    .map(|row| r.mean_at(&row.to_vec()))
                    .collect()
            };
            let f = truth_at(*proc, &x);
            let fh = &fit.f_rows;
            let r0 = est(&f);
            let r1 = est(fh);
            let rf = est(&refit(&choice, &f));
            let r2_0 = est(&refit(&choice, fh));
            let sigma = c.value.max(0.0).sqrt();
            let mut r2 = 0.0;
            let mut s2 = 0.0;
            for b in 0..nb {
                let ys = dgp_twin::bootstrap_responses(fh, sigma, 99, b as u64);
                r2 += est(&refit(&choice, ys.as_slice().unwrap()));
                s2 += est(&refit(&sharp, ys.as_slice().unwrap()));
            }
            r2 /= nb as f64;
            s2 /= nb as f64;
            let s1 = est(&refit(&sharp, &yv));
            let s2_0 = est(&refit(&sharp, fh));
            rows.push(vec![
                c.raw,
                c.value,
                c.raw - r0,
                c.raw - 2.0 * r1 + r2,
                if r2 > 0.0 && r1 > 0.0 {
                    c.raw - r1 * r1 / r2
                } else {
                    c.value
                },
                c.raw - s1 + (s2 - s2_0),
                c.raw - r1 + (r2 - r2_0),
                r0,
                r1,
                rf,
                r2_0,
                r2,
                s1,
                s2_0,
                s2,
                c.sampling_se,
            ]);
        }
        let names = [
            "raw",
            "A cur",
            "oracle",
            "B add",
            "C mult",
            "D sharp",
            "E noise",
            "R0 est f",
            "R1 est fh",
            "Rf P(f)",
            "R2_0 P(fh)",
            "R2 P(y*)",
            "S1 P'(y)",
            "S2_0 P'(fh)",
            "S2 P'(y*)",
            "se",
        ];
        println!("{} ({}):", proc.name, tables);
        for (j, nm) in names.iter().enumerate() {
            let v: Vec<f64> = rows.iter().map(|r| r[j]).collect();
            let cover = if (1..7).contains(&j) {
                let c = rows
                    .iter()
                    .filter(|r| (r[j] - 1.0).abs() <= 2.0 * r[15])
                    .count();
                format!(" cover {c}/{tables}")
            } else {
                String::new()
            };
            println!(
                "  {nm:>12}: mean {:.4} ± {:.4} sd {:.4}{cover}",
                mean(&v),
                sd(&v) / (v.len() as f64).sqrt(),
                sd(&v)
            );
        }
    }
}

/// Alternative measured for `docs/twin-calibration.md` §2 (not adopted): the residual-based
/// estimator `‖(I − S) y‖² / tr((I − S)ᵀ(I − S))` for the linear smoothers among the candidates
/// (k-NN at the cross-validated k, local-linear at the cross-validated bandwidth), with S built
/// explicitly (Buja, Hastie and Tibshirani 1989; Hastie and Tibshirani 1990, *Generalized
/// Additive Models*, §3.4 — from memory).
#[test]
#[ignore = "alternatives study, a few minutes; results in docs/twin-calibration.md"]
fn noise_df() {
    use lossprism::dgp::reference::LocLin;
    use lossprism::family::neighbours::{NeighbourIndex, Scratch};
    let tables = env_usize("LOSSPRISM_NOISE_TABLES", 30);
    let procs = [SMOOTH1, KINK1, SMOOTH2, STEP2, SWELL3, LEDGE3, HINGE3];
    let only = std::env::var("LOSSPRISM_NOISE_PROCS").unwrap_or_default();
    let n = 300;
    // σ̂² = ‖(I − S) y‖² / tr((I − S)ᵀ(I − S)) for an explicit S (row i = weights of f̂(x_i)).
    let df_est = |s: &Array2<f64>, y: &[f64]| -> (f64, f64, f64) {
        let n = y.len();
        let mut rss = 0.0;
        let mut den = 0.0;
        for i in 0..n {
            let fi: f64 = (0..n).map(|j| s[[i, j]] * y[j]).sum();
            rss += (y[i] - fi).powi(2);
        }
        // tr((I−S)ᵀ(I−S)) = Σ_ij (δ_ij − S_ij)².
        for i in 0..n {
            for j in 0..n {
                let d = if i == j { 1.0 } else { 0.0 } - s[[i, j]];
                den += d * d;
            }
        }
        let tr: f64 = (0..n).map(|i| s[[i, i]]).sum();
        (rss / den, tr, den)
    };
    for (pi, proc) in procs.iter().enumerate() {
        if !only.is_empty() && !only.split(',').any(|p| p == proc.name) {
            continue;
        }
        let seed = 7000 + 10_000 * pi as u64;
        let mut rows: Vec<Vec<f64>> = Vec::new();
        for t in 0..tables {
            let (x, _, yv, fit) = noise_study_table(*proc, n, seed, t);
            let c = fit.noise.expect("noise");
            let k = fit.selection.choice.k.unwrap();
            let idx = NeighbourIndex::new(x.view(), true);
            let mut sk = Array2::zeros((n, n));
            let mut sc = Scratch::default();
            let mut buf = Vec::new();
            for i in 0..n {
                idx.nearest(&x.row(i).to_vec(), k, &mut sc, &mut buf);
                for &j in &buf {
                    sk[[i, j]] += 1.0 / buf.len() as f64;
                }
            }
            let tuned = &fit.selection.scores[2].tuned;
            let h: f64 = tuned
                .trim_start_matches("bandwidth = ")
                .trim_end_matches(" sd")
                .parse()
                .unwrap();
            let mut sl = Array2::zeros((n, n));
            for j in 0..n {
                let mut e = vec![0.0; n];
                e[j] = 1.0;
                let l = LocLin::fit(x.view(), &e, h);
                for i in 0..n {
                    sl[[i, j]] = l.predict(&x.row(i).to_vec());
                }
            }
            let (vk, trk, _) = df_est(&sk, &yv);
            let (vl, trl, _) = df_est(&sl, &yv);
            let f = truth_at(*proc, &x);
            let (bk, _, _) = df_est(&sk, &f);
            let (bl, _, _) = df_est(&sl, &f);
            rows.push(vec![
                c.value,
                vk,
                vl,
                trk,
                trl,
                bk,
                bl,
                k as f64,
                h,
                c.sampling_se,
            ]);
        }
        let names = [
            "A cur",
            "knn df",
            "loclin df",
            "tr S knn",
            "tr S ll",
            "knn bias",
            "ll bias",
            "k",
            "h",
            "se",
        ];
        println!("{} ({}):", proc.name, tables);
        for (j, nm) in names.iter().enumerate() {
            let v: Vec<f64> = rows.iter().map(|r| r[j]).collect();
            let cover = if j < 3 {
                let c = rows
                    .iter()
                    .filter(|r| (r[j] - 1.0).abs() <= 2.0 * r[9])
                    .count();
                format!(" cover(cur se) {c}/{tables}")
            } else {
                String::new()
            };
            println!(
                "  {nm:>12}: mean {:.4} ± {:.4} sd {:.4}{cover}",
                mean(&v),
                sd(&v) / (v.len() as f64).sqrt(),
                sd(&v)
            );
        }
    }
}

/// Alternative measured for `docs/twin-calibration.md` §2 (not adopted as the value): the sharp
/// pilot's correction as the subtracted bias, for pilot trees of several leaf sizes, with the
/// pilot's noise roughness removed in the twin's world ("noise-term") or its whole bias in the
/// twin's world removed ("twin-bias"), and the pilot's roughness on the true f.
#[test]
#[ignore = "alternatives study, about a minute; results in docs/twin-calibration.md"]
fn noise_tree_pilot() {
    use lossprism::family::tree::TreeFamily;
    use lossprism::family::Task;
    let tables = env_usize("LOSSPRISM_NOISE_TABLES", 30);
    let nb = env_usize("LOSSPRISM_NOISE_REFITS", 10);
    let procs = [SMOOTH1, KINK1, SMOOTH2, STEP2, SWELL3, LEDGE3, HINGE3];
    let only = std::env::var("LOSSPRISM_NOISE_PROCS").unwrap_or_default();
    let leaves = [2usize, 5, 10, 20, 40];
    let n = 300;
    for (pi, proc) in procs.iter().enumerate() {
        if !only.is_empty() && !only.split(',').any(|p| p == proc.name) {
            continue;
        }
        let seed = 7000 + 10_000 * pi as u64;
        let mut rows: Vec<Vec<f64>> = Vec::new();
        for t in 0..tables {
            let (x, _, yv, fit) = noise_study_table(*proc, n, seed, t);
            let c = fit.noise.expect("noise");
            let d = noise::Design::new(c.method, x.view()).unwrap();
            let est = |v: &[f64]| d.value(Array1::from(v.to_vec()).view());
            // est of the tree fitted on v, for each leaf size (grown without a depth limit).
            let tree_est = |v: &[f64]| -> Vec<f64> {
                leaves
                    .iter()
                    .map(|&leaf| {
                        let dp = 64;
                        let tr = TreeFamily {
                            min_samples_leaf: leaf,
                            ..Default::default()
                        }
                        .grow(
                            x.view(),
                            Array1::from(v.to_vec()).view(),
                            Task::Regress,
                            64,
                            &mut ChaCha8Rng::seed_from_u64(3),
                        )
                        .unwrap();
                        let p: Vec<f64> = x
                            .rows()
                            .into_iter()
                            .map(|r| tr.predict_at_depth(r, dp))
                            .collect();
                        est(&p)
                    })
                    .collect()
            };
            let fh = &fit.f_rows;
            let r1 = est(fh);
            let t1 = tree_est(&yv);
            let t0 = tree_est(fh);
            let sigma = c.value.max(0.0).sqrt();
            let mut t2 = vec![0.0; leaves.len()];
            for b in 0..nb {
                let ys = dgp_twin::bootstrap_responses(fh, sigma, 99, b as u64);
                for (a, v) in t2.iter_mut().zip(tree_est(ys.as_slice().unwrap())) {
                    *a += v / nb as f64;
                }
            }
            let f = truth_at(*proc, &x);
            let tf = tree_est(&f);
            let mut row = vec![c.value, c.raw - est(&f), c.sampling_se];
            for i in 0..leaves.len() {
                // noise term removed: raw − (T1 − (T2 − T0)); twin-world bias: raw − (T1 − (T2 − R1)).
                row.push(c.raw - (t1[i] - (t2[i] - t0[i])));
                row.push(c.raw - (t1[i] - (t2[i] - r1)));
                row.push(tf[i]);
            }
            rows.push(row);
        }
        println!("{} ({}):", proc.name, tables);
        let mut names = vec!["A cur".to_string(), "oracle".into(), "se".into()];
        for leaf in leaves {
            names.push(format!("noise-term leaf {leaf}"));
            names.push(format!("twin-bias leaf {leaf}"));
            names.push(format!("est tree(f) leaf {leaf}"));
        }
        for (j, nm) in names.iter().enumerate() {
            let v: Vec<f64> = rows.iter().map(|r| r[j]).collect();
            let cover = if j != 2 && (j < 3 || (j - 3) % 3 != 2) {
                let c = rows
                    .iter()
                    .filter(|r| (r[j] - 1.0).abs() <= 2.0 * r[2])
                    .count();
                format!(" cover {c}/{tables}")
            } else {
                String::new()
            };
            println!(
                "  {nm:>18}: mean {:.4} ± {:.4} sd {:.4}{cover}",
                mean(&v),
                sd(&v) / (v.len() as f64).sqrt(),
                sd(&v)
            );
        }
    }
}

/// Noise estimator with gradient-weighted distances (`dgp::reference::select::gradient_weights`, their
/// square root, or none), measured alone (docs/twin-calibration.md §2.5; the twin now uses the
/// weights its reference kept, §0.2): the same
/// tables as `noise_study` (`LOSSPRISM_NOISE_PROCS=wide` for the 6- and 10-input processes);
/// the weights come from the reference fitted once, as the twin's correction does.
#[test]
#[ignore = "calibration study: about 2 minutes; results in docs/twin-calibration.md §2.5"]
fn noise_weights_study() {
    use lossprism::dgp::reference::Reference;
    let tables = env_usize("LOSSPRISM_NOISE_TABLES", 30);
    // The list and seeds of `noise_study`; the one-input processes are skipped (GSJS has no
    // distances to weight).
    let procs = noise_procs();
    for (pi, proc) in procs.into_iter().enumerate().filter(|(_, p)| p.p > 1) {
        let seed = 7000 + 10_000 * pi as u64;
        let mut rows: Vec<[(f64, f64); 3]> = Vec::new();
        for t in 0..tables {
            let (x, _, yv, fit) = noise_study_table(proc, 300, seed, t);
            let once_choice = reference::Choice {
                twice: false,
                ..fit.selection.choice.clone()
            };
            let once = Reference::fit(
                x.view(),
                Array1::from(yv.clone()).view(),
                0,
                &once_choice,
                false,
                "t",
            )
            .unwrap();
            let f_rows = once.mean_at_rows(x.view());
            let g = lossprism::dgp::reference::select::gradient_weights(x.view(), &once);
            let root: Vec<f64> = g.iter().map(|v| v.sqrt()).collect();
            let mut row = [(0.0, 0.0); 3];
            for (slot, w) in [None, Some(&g[..]), Some(&root[..])]
                .into_iter()
                .enumerate()
            {
                let c = dgp_twin::correct_noise_weighted(
                    Method::Gamma,
                    x.view(),
                    w,
                    &yv,
                    &f_rows,
                    dgp_twin::NOISE_TABLES,
                    seed + t as u64,
                    None,
                )
                .unwrap();
                row[slot] = (c.value, c.se);
            }
            rows.push(row);
        }
        for (slot, name) in ["plain", "gradient", "root of gradient"].iter().enumerate() {
            let v: Vec<f64> = rows.iter().map(|r| r[slot].0).collect();
            let cover = rows
                .iter()
                .filter(|r| (r[slot].0 - 1.0).abs() <= 2.0 * r[slot].1)
                .count();
            println!(
                "{} {name}: bias {:+.1}% ± {:.1}%, sd {:.3}, ±2 SE coverage {cover}/{tables}",
                proc.name,
                100.0 * (mean(&v) - 1.0),
                100.0 * sd(&v) / (tables as f64).sqrt(),
                sd(&v)
            );
        }
    }
}

/// Alternative measured for `docs/twin-calibration.md` §2.2 (not adopted): the mean of the
/// first m neighbour-difference orders γ(1..m) (no line, so no extrapolation to distance 0),
/// with the same mean of the reference's fit made once subtracted (`F m`), and with the true f's
/// subtracted instead (`O m`, an oracle: the spread of an estimator that knew f's roughness).
/// `cur` is the twin's corrected σ̂². Neighbours under the reference's kept input weights.
#[test]
#[ignore = "alternatives study, about 30 s; results in docs/twin-calibration.md"]
fn noise_flat() {
    use lossprism::dgp::reference::Reference;
    let tables = env_usize("LOSSPRISM_NOISE_TABLES", 30);
    let procs = [SMOOTH2, STEP2, SWELL3, LEDGE3, HINGE3];
    let n = 300;
    // Pure noise (f = 0) on 3 uniform inputs, 400 tables: the spread of the line's intercept,
    // of the mean of γ(1..10) and of the mean of ε² itself.
    let (mut line, mut flat10, mut sq, mut pair) = (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    for t in 0..400u64 {
        let mut rng = ChaCha8Rng::seed_from_u64(100 + t);
        let x = Array2::from_shape_fn((n, 3), |_| rng.gen::<f64>());
        let e: Vec<f64> = (0..n).map(|_| StandardNormal.sample(&mut rng)).collect();
        let d = noise::Design::new(Method::Gamma, x.view()).unwrap();
        line.push(d.value(Array1::from(e.clone()).view()));
        let nn = noise::nearest(noise::standardize(x.view()).view(), 10);
        let g: f64 = nn
            .iter()
            .enumerate()
            .flat_map(|(i, l)| l.iter().map(move |&(j, _)| (i, j)))
            .map(|(i, j)| 0.5 * (e[j] - e[i]).powi(2))
            .sum();
        flat10.push(g / (10 * n) as f64);
        pair.push(pair_intercept(&nn, &e));
        sq.push(e.iter().map(|v| v * v).sum::<f64>() / n as f64);
    }
    println!(
        "pure noise, 3 inputs: sd line {:.4}, pairwise line {:.4}, mean of γ(1..10) {:.4}, mean ε² {:.4}",
        sd(&line),
        sd(&pair),
        sd(&flat10),
        sd(&sq)
    );
    for (pi, proc) in procs.iter().enumerate() {
        let seed = 7000 + 10_000 * (pi as u64 + 2);
        let mut rows: Vec<Vec<f64>> = Vec::new();
        for t in 0..tables {
            let (x, _, yv, fit) = noise_study_table(*proc, n, seed, t);
            let c = fit.noise.expect("noise");
            let mut choice = fit.selection.choice.clone();
            choice.twice = false;
            let once = Reference::fit(
                x.view(),
                Array1::from(yv.clone()).view(),
                0,
                &choice,
                false,
                "t",
            )
            .unwrap();
            let fh: Vec<f64> = x
                .rows()
                .into_iter()
                .map(|r| once.mean_at(&r.to_vec()))
                .collect();
            let f = truth_at(*proc, &x);
            let mut z = noise::standardize(x.view());
            if let Some(w) = choice.metric.as_deref() {
                for (mut col, &wj) in z.columns_mut().into_iter().zip(w) {
                    col.mapv_inplace(|v| v * wj);
                }
            }
            let nn = noise::nearest(z.view(), 10);
            let gam = |v: &[f64]| -> Vec<f64> {
                let mut g = vec![0.0; 10];
                for (i, l) in nn.iter().enumerate() {
                    for (k, &(j, _)) in l.iter().enumerate() {
                        g[k] += 0.5 * (v[j] - v[i]).powi(2) / n as f64;
                    }
                }
                g
            };
            let (gy, gh, gf) = (gam(&yv), gam(&fh), gam(&f));
            let flat = |g: &[f64], m: usize| g[..m].iter().sum::<f64>() / m as f64;
            let mut row = vec![c.value];
            for m in [10, 5, 3, 1] {
                row.push(flat(&gy, m) - flat(&gh, m));
            }
            for m in [10, 5, 3, 1] {
                row.push(flat(&gy, m) - flat(&gf, m));
            }
            row.push(pair_intercept(&nn, &yv) - pair_intercept(&nn, &fh));
            row.push(pair_intercept(&nn, &yv) - pair_intercept(&nn, &f));
            rows.push(row);
        }
        let names = [
            "cur", "F10", "F5", "F3", "F1", "O10", "O5", "O3", "O1", "P", "PO",
        ];
        println!("{} ({}):", proc.name, tables);
        for (j, nm) in names.iter().enumerate() {
            let v: Vec<f64> = rows.iter().map(|r| r[j]).collect();
            let rmse = (v.iter().map(|x| (x - 1.0).powi(2)).sum::<f64>() / v.len() as f64).sqrt();
            println!(
                "  {nm:>5}: mean {:.4} ± {:.4} sd {:.4} rmse {:.4}",
                mean(&v),
                sd(&v) / (v.len() as f64).sqrt(),
                sd(&v),
                rmse
            );
        }
    }
}

/// Least-squares intercept of `½ (v_j − v_i)²` on the squared distance `d²_ij` over every
/// (row, neighbour) pair of `nn`, one point per pair (instead of one per neighbour order).
fn pair_intercept(nn: &[Vec<(usize, f64)>], v: &[f64]) -> f64 {
    let (mut n, mut sx, mut sy, mut sxx, mut sxy) = (0.0, 0.0, 0.0, 0.0, 0.0);
    for (i, l) in nn.iter().enumerate() {
        for &(j, d2) in l {
            let g = 0.5 * (v[j] - v[i]).powi(2);
            n += 1.0;
            sx += d2;
            sy += g;
            sxx += d2 * d2;
            sxy += d2 * g;
        }
    }
    let (mx, my) = (sx / n, sy / n);
    let slope = (sxy / n - mx * my) / (sxx / n - mx * mx);
    my - slope * mx
}

/// The invented processes of the varying-noise study: four heteroscedastic ones in 1, 2 and 3
/// inputs (spike3's noise is 40 times larger on a tenth of the cube, where the truth also
/// bends), and a constant-noise control (σ = 1).
const HET: [Process; 5] = [
    Process {
        name: "fan1",
        formula: "1.5*sin(2*pi*x1) + x1",
        sd: "0.3 + 1.2*x1",
        p: 1,
    },
    Process {
        name: "bump2",
        formula: "2*exp(-4*((x1 - 0.5)^2 + (x2 - 0.4)^2)) + sin(3*x2)",
        sd: "0.4 + 1.2*exp(-8*((x1 - 0.5)^2 + (x2 - 0.5)^2))",
        p: 2,
    },
    Process {
        name: "fan3",
        formula: "1.8*sin(2*pi*x1)*cos(pi*x2) + 2*x3^2 + x2",
        sd: "0.4 + 1.2*x2*x3",
        p: 3,
    },
    Process {
        name: "spike3",
        formula: "3*abs(x1 - 0.4) + 2*max(x2 + x3 - 1, 0)",
        sd: "0.05 + 2*(x1 > 0.9)",
        p: 3,
    },
    Process {
        name: "flat3",
        formula: "3*abs(x1 - 0.4) + 2*max(x2 + x3 - 1, 0)",
        sd: "1",
        p: 3,
    },
];

/// Varying noise (`twin --varying`) against the truth, per table: the level (σ²(x) averaged
/// over fresh inputs) and the shape (mean |σ̂(x) − σ(x)| / σ(x)), for σ²(x) as it was before
/// 2026-12-04 (the k-NN average of the squared residuals with the reference's k, unscaled) and
/// as `twin` now writes it (`smooth_k` chosen by leave-one-out cross-validation, `level` the
/// corrected noise estimate); and whether the corrected estimate's ±2 SE covers the true mean
/// σ²(x).
#[derive(Debug, Clone, Copy)]
struct VaryingCase {
    /// The spread test's z (`Reference::spread_test` at the chosen smoother).
    spread_z: f64,
    /// No level could be set (the weighted smoothed residuals are not positive).
    no_level: bool,
    /// `twin`'s non-Gaussian verdict on the raw residuals, and on the residuals divided by
    /// σ̂(x).
    alarm_raw: bool,
    alarm_std: bool,
    truth_level: f64,
    old_level: f64,
    new_level: f64,
    corrected: f64,
    level_se: f64,
    corrected_se: f64,
    old_shape: f64,
    new_shape: f64,
    smooth_k: usize,
    k: usize,
}

fn varying_case(proc: Process, n: usize, seed: u64, fresh: &Array2<f64>) -> VaryingCase {
    let (x, y) = draw_table(proc, n, 1.0, seed);
    // As `twin --varying` fits it: no row left out of the noise estimate
    // (`LOSSPRISM_VARYING_TRIM=on`: the rows where the reference changes most left out, as for
    // constant noise; not kept, §2.10).
    let fit = dgp_twin::fit_regression_shaped(
        x.view(),
        &y.to_vec(),
        seed,
        Rule::Best,
        None,
        dgp_twin::Twicing::Off,
        dgp_twin::NoiseFit {
            resample: false,
            all_rows: std::env::var("LOSSPRISM_VARYING_TRIM").as_deref() != Ok("on"),
        },
        dgp_twin::SHARPEN,
        "t",
    )
    .expect("fits");
    let noise = fit.noise.expect("an estimate");
    let mut r = reference::Reference::fit(x.view(), y.view(), 0, &fit.selection.choice, true, "t")
        .expect("varying reference");
    let nm = names(proc.p);
    let refs: Vec<&str> = nm.iter().map(String::as_str).collect();
    let s = Formula::parse(proc.sd, &refs).unwrap();
    let true_sd: Vec<f64> = fresh
        .rows()
        .into_iter()
        .map(|r| s.eval(&r.to_vec()))
        .collect();
    let at = |r: &reference::Reference| -> Vec<f64> {
        fresh
            .rows()
            .into_iter()
            .map(|row| r.var_at(&row.to_vec()).unwrap().max(0.0))
            .collect()
    };
    let shape_err = |v: &[f64]| {
        mean(
            &v.iter()
                .zip(&true_sd)
                .map(|(a, t)| (a.sqrt() - t).abs() / t)
                .collect::<Vec<_>>(),
        )
    };
    let old = at(&r);
    let smooth_k = r.choose_smooth_k(x.view()).expect("a smoother");
    let spread_z = r.spread_test(x.view(), smooth_k).map_or(f64::NAN, |g| g.1);
    r.set_varying(x.view(), Some(smooth_k), None)
        .expect("smooths");
    let level = match std::env::var("LOSSPRISM_VARYING_LEVEL").as_deref() {
        // The level the plain mean over the rows would give (not kept; §2.10).
        Ok("rows") => noise.value,
        _ => dgp_twin::varying_level(&r, x.view(), noise.value, &fit.noise_weights)
            .unwrap_or(f64::NAN),
    };
    // No usable level (`twin` then writes none, or `run` refuses it): the study counts it and
    // reads the corrected value.
    let no_level = !(level.is_finite() && level > 1e-12 * noise.value);
    let level = if no_level {
        noise.value.max(1e-9)
    } else {
        level
    };
    r.set_varying(x.view(), Some(smooth_k), Some(level))
        .expect("scales");
    let new = at(&r);
    // The residuals' shape verdict (`twin`'s line), raw and divided by σ̂(x) at their row.
    let z: Vec<f64> = (0..n)
        .map(|i| {
            let row = x.row(i).to_vec();
            (y[i] - fit.f_rows[i]) / r.var_at(&row).unwrap().max(1e-300).sqrt()
        })
        .collect();
    let zeros = vec![0.0; n];
    let alarm_raw =
        dgp_twin::ResidualShape::of(&y.to_vec(), &fit.f_rows).is_some_and(|s| s.non_gaussian());
    let alarm_std = dgp_twin::ResidualShape::of(&z, &zeros).is_some_and(|s| s.non_gaussian());
    VaryingCase {
        spread_z,
        no_level,
        alarm_raw,
        alarm_std,
        truth_level: mean(&true_sd.iter().map(|t| t * t).collect::<Vec<_>>()),
        old_level: mean(&old),
        new_level: mean(&new),
        corrected: noise.value,
        // The level's SE: the corrected estimate's, carried by the same scaling.
        level_se: noise.se * level / noise.value,
        corrected_se: noise.se,
        old_shape: shape_err(&old),
        new_shape: shape_err(&new),
        smooth_k,
        k: r.k(),
    }
}

#[test]
#[ignore = "calibration study, a few minutes; results in docs/twin-calibration.md §2.10"]
fn varying_noise_study() {
    let tables = env_usize("LOSSPRISM_NOISE_TABLES", 30);
    let n = env_usize("LOSSPRISM_VARYING_N", 300);
    let only = std::env::var("LOSSPRISM_NOISE_PROCS").unwrap_or_default();
    for (pi, proc) in HET.iter().enumerate() {
        if !only.is_empty() && !only.split(',').any(|p| p == proc.name) {
            continue;
        }
        let mut rng = ChaCha8Rng::seed_from_u64(4242 + pi as u64);
        let fresh = Array2::from_shape_fn((4000, proc.p), |_| rng.gen::<f64>());
        let cases: Vec<VaryingCase> = (0..tables)
            .map(|t| varying_case(*proc, n, 8100 + 1000 * pi as u64 + t as u64, &fresh))
            .collect();
        let rel = |f: &dyn Fn(&VaryingCase) -> f64| -> (f64, f64) {
            let v: Vec<f64> = cases.iter().map(|c| f(c) / c.truth_level - 1.0).collect();
            (mean(&v), sd(&v) / (v.len() as f64).sqrt())
        };
        let (ob, obse) = rel(&|c| c.old_level);
        let (nb, nbse) = rel(&|c| c.new_level);
        let (cb, cbse) = rel(&|c| c.corrected);
        let covered = cases
            .iter()
            .filter(|c| (c.corrected - c.truth_level).abs() <= 2.0 * c.corrected_se)
            .count();
        let level_covered = cases
            .iter()
            .filter(|c| (c.new_level - c.truth_level).abs() <= 2.0 * c.level_se)
            .count();
        let spread = sd(&cases.iter().map(|c| c.corrected).collect::<Vec<_>>());
        println!(
            "  spread test z > {}: {}/{}",
            SPREAD_Z,
            cases.iter().filter(|c| c.spread_z > SPREAD_Z).count(),
            cases.len()
        );
        println!(
            "  no level set: {}/{}",
            cases.iter().filter(|c| c.no_level).count(),
            cases.len()
        );
        println!(
            "  non-Gaussian verdict (the noise is Gaussian: false alarms): raw residuals {}/{}, divided by σ̂(x) {}/{}",
            cases.iter().filter(|c| c.alarm_raw).count(),
            cases.len(),
            cases.iter().filter(|c| c.alarm_std).count(),
            cases.len()
        );
        let mut ks: Vec<usize> = cases.iter().map(|c| c.smooth_k).collect();
        ks.sort_unstable();
        println!(
            "{} (true mean σ² {:.3}; reference k {:?}): level, before {:+.1}% ± {:.1}% · now {:+.1}% ± {:.1}% (±2 SE coverage {level_covered}/{}) (corrected σ̂² over the rows {:+.1}% ± {:.1}%, ±2 SE coverage {covered}/{}, SE/spread {:.2}); shape error mean |σ̂(x) − σ(x)|/σ(x), before {:.1}% · now {:.1}%; smooth_k chosen {:?}",
            proc.name,
            cases[0].truth_level,
            cases.iter().map(|c| c.k).collect::<Vec<_>>(),
            100.0 * ob,
            100.0 * obse,
            100.0 * nb,
            100.0 * nbse,
            cases.len(),
            100.0 * cb,
            100.0 * cbse,
            cases.len(),
            mean(&cases.iter().map(|c| c.corrected_se).collect::<Vec<_>>()) / spread,
            100.0 * mean(&cases.iter().map(|c| c.old_shape).collect::<Vec<_>>()),
            100.0 * mean(&cases.iter().map(|c| c.new_shape).collect::<Vec<_>>()),
            ks
        );
    }
}

#[test]
fn varying_noise_level_is_close_on_a_known_process() {
    // Fast version of `varying_noise_study` on fan3 (3 inputs, σ(x) = 0.4 + 1.2·x2·x3, whose
    // largest noise sits where the truth is steepest): 40 tables of n = 300. The level of
    // σ²(x) must lie within 4 standard errors (spread over tables / √40) of the true mean
    // σ²(x); before it came from the corrected estimate, σ²(x) read +12.5% ± 1.7% high, and
    // with the corrected estimate taken as the rows' mean −11.3% (docs/twin-calibration.md
    // §2.10). Its
    // ±2 SE interval must cover the truth about as often as a 95% interval: at least the
    // nominal count minus 3 binomial standard deviations.
    let proc = HET[2];
    let mut rng = ChaCha8Rng::seed_from_u64(4242 + 2);
    let fresh = Array2::from_shape_fn((4000, proc.p), |_| rng.gen::<f64>());
    let tables = 40;
    let cases: Vec<VaryingCase> = (0..tables)
        .map(|t| varying_case(proc, 300, 8100 + 2000 + t as u64, &fresh))
        .collect();
    let rel: Vec<f64> = cases
        .iter()
        .map(|c| c.new_level / c.truth_level - 1.0)
        .collect();
    let (m, se) = (mean(&rel), sd(&rel) / (tables as f64).sqrt());
    let covered = cases
        .iter()
        .filter(|c| (c.new_level - c.truth_level).abs() <= 2.0 * c.level_se)
        .count() as f64;
    let nominal = 0.954 * tables as f64;
    let floor = nominal - 3.0 * (tables as f64 * 0.954 * 0.046).sqrt();
    println!(
        "fan3 level {:+.1}% ± {:.1}%, coverage {covered}/{tables}",
        100.0 * m,
        100.0 * se
    );
    assert!(m.abs() < 4.0 * se, "level off by {m} ± {se}");
    assert!(
        covered >= floor,
        "coverage {covered} of {tables}, floor {floor}"
    );
}

/// `twin`'s threshold for suggesting `--varying` (the spread test's z).
const SPREAD_Z: f64 = dgp_twin::SPREAD_Z;

#[test]
#[ignore = "calibration study, about a minute; results in docs/twin-calibration.md §2.10"]
fn spread_test_study() {
    // False alarms of the spread test on the constant-noise processes of the noise study
    // (n = 300, σ = 1): how often `twin` would suggest `--varying` on a table whose noise does
    // not vary.
    let tables = env_usize("LOSSPRISM_NOISE_TABLES", 30);
    for proc in noise_procs() {
        let mut alarms = 0;
        let mut zs = Vec::new();
        for t in 0..tables {
            let (x, y) = draw_table(proc, 300, 1.0, 7000 + 101 * t as u64);
            let fit = dgp_twin::fit_regression(
                x.view(),
                &y.to_vec(),
                7000 + t as u64,
                Rule::Best,
                None,
                dgp_twin::Twicing::Off,
                "t",
            )
            .expect("fits");
            let r =
                reference::Reference::fit(x.view(), y.view(), 0, &fit.selection.choice, true, "t")
                    .expect("varying reference");
            let k = r.choose_smooth_k(x.view()).expect("a smoother");
            let z = r.spread_test(x.view(), k).map_or(f64::NAN, |g| g.1);
            alarms += usize::from(z > SPREAD_Z);
            zs.push(z);
        }
        zs.sort_by(f64::total_cmp);
        println!(
            "{}: spread test z > {SPREAD_Z} on {alarms}/{tables} tables (median z {:.2}, largest {:.2})",
            proc.name,
            zs[zs.len() / 2],
            zs[zs.len() - 1]
        );
    }
}

/// The twin's corrected noise estimate of `method` on (x, y) (Gaussian bootstrap, every
/// default otherwise).
fn corrected_noise(
    x: &Array2<f64>,
    y: &[f64],
    seed: u64,
    method: Method,
) -> dgp_twin::NoiseCorrection {
    dgp_twin::fit_regression_shaped(
        x.view(),
        y,
        seed,
        Rule::Best,
        Some(method),
        dgp_twin::Twicing::Auto,
        dgp_twin::NoiseFit {
            resample: false,
            all_rows: false,
        },
        dgp_twin::SHARPEN,
        "t",
    )
    .expect("fits")
    .noise
    .expect("a noise estimate")
}

/// The corrected Gamma test and plane on the noise study's tables (2 and 3 inputs), each alone,
/// their mean and their inverse-variance mean: bias, spread, root-mean-square error and the
/// correlation of their errors (docs/twin-calibration.md §0.11, measured and not built).
#[test]
#[ignore = "noise estimator pair study, about a minute; results in docs/twin-calibration.md"]
fn noise_pair_study() {
    let tables = env_usize("LOSSPRISM_NOISE_TABLES", 40);
    let procs = noise_procs();
    for (pi, proc) in procs.iter().enumerate() {
        if proc.p < 2 {
            continue;
        }
        let seed = 7000 + 10_000 * pi as u64;
        let (mut g, mut p, mut gs, mut ps) = (vec![], vec![], vec![], vec![]);
        for t in 0..tables {
            let (x, _y, yv, _fit) = noise_study_table(*proc, 300, seed, t);
            let fit = |m| corrected_noise(&x, &yv, seed + t as u64, m);
            let a = fit(Method::Gamma);
            let b = fit(Method::Plane);
            g.push(a.value);
            p.push(b.value);
            gs.push(a.sampling_se);
            ps.push(b.sampling_se);
        }
        let avg: Vec<f64> = g.iter().zip(&p).map(|(a, b)| 0.5 * (a + b)).collect();
        let ivw: Vec<f64> = (0..g.len())
            .map(|i| {
                let (wa, wb) = (1.0 / gs[i].powi(2), 1.0 / ps[i].powi(2));
                (wa * g[i] + wb * p[i]) / (wa + wb)
            })
            .collect();
        let rmse =
            |v: &[f64]| (v.iter().map(|a| (a - 1.0).powi(2)).sum::<f64>() / v.len() as f64).sqrt();
        let dg: Vec<f64> = g.iter().map(|v| v - 1.0).collect();
        let dp: Vec<f64> = p.iter().map(|v| v - 1.0).collect();
        let (mg, mp) = (mean(&dg), mean(&dp));
        let corr = dg
            .iter()
            .zip(&dp)
            .map(|(a, b)| (a - mg) * (b - mp))
            .sum::<f64>()
            / (dg.len() as f64 - 1.0)
            / (sd(&dg) * sd(&dp));
        println!(
            "{}: gamma {:+.1}% sd {:.3} rmse {:.3} | plane {:+.1}% sd {:.3} rmse {:.3} | avg {:+.1}% sd {:.3} rmse {:.3} | ivw {:+.1}% sd {:.3} rmse {:.3} | corr {:.2} | mean se g {:.3} p {:.3}",
            proc.name,
            100.0 * (mean(&g) - 1.0), sd(&g), rmse(&g),
            100.0 * (mean(&p) - 1.0), sd(&p), rmse(&p),
            100.0 * (mean(&avg) - 1.0), sd(&avg), rmse(&avg),
            100.0 * (mean(&ivw) - 1.0), sd(&ivw), rmse(&ivw),
            corr, mean(&gs), mean(&ps)
        );
    }
}
