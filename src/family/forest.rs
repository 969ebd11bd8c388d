//! The random-forest family (`forest`): bagged CART trees ([`super::tree`]) with a random subset
//! of inputs tried at each node, averaged.
//!
//! # Knob
//!
//! One family, two possible knobs, chosen by the option `knob`:
//!
//! - `knob = "trees"` (the default): the grid is the number of trees `T` averaged; each tree is
//!   grown to the option `max_depth` (default 64, which in practice means fully grown).
//! - `knob = "max_depth"`: the grid is the depth limit of every tree; the number of trees is the
//!   option `trees` (default 100).
//!
//! The option that is the knob cannot also be given (it would be ignored); the builder says so.
//! A larger knob value is the more complex model either way.
//!
//! # Trees
//!
//! Tree `t` (`t = 0, 1, …`) is grown with the tree family's splitting and tie rules on
//!
//! - a **bootstrap sample** (`bootstrap = true`, the default): `n` rows drawn with replacement;
//!   a row drawn `c` times counts as `c` samples (node means, class counts, `min_samples_leaf`);
//!   with `bootstrap = false` every tree sees the whole training set;
//! - a random subset of **`max_features`** inputs tried at each node, drawn without replacement
//!   (inputs constant in the node are skipped and not counted, see [`super::tree`]). Default:
//!   `⌊p/3⌋` for regression and `⌊√p⌋` for classification (at least 1) — the recommendations
//!   reported in Hastie, Tibshirani and Friedman, *The Elements of Statistical Learning*, 2nd ed.,
//!   chapter 15 (which also suggests a minimum node size of 5 for regression; here
//!   `min_samples_leaf` keeps the tree family's default of 1). `max_features = "all"` tries every input (plain bagging),
//!   `"sqrt"` and `"third"` force one of the two rules, and a whole number gives the count
//!   directly (capped at the number of inputs).
//!
//! # Random streams
//!
//! Tree `t` draws only from the fit's member stream `t` ([`crate::rng::FitSeed::member_rng`]):
//! first its bootstrap counts (`n` draws of a row index, when `bootstrap = true`), then, node by
//! node in breadth-first order, the inputs tried (only when `max_features < p`) and its exact
//! ties. Member stream 0 is the fit stream itself, which is what a single tree uses, so **a forest
//! of one tree without bootstrap and with all inputs is the `tree` family's tree, bit for bit**
//! (same seed). A tree's stream does not depend on how many trees are grown nor on the depth
//! limit, which is what makes both path fits exact.
//!
//! The family is declared stochastic: with the defaults the trees differ through their bootstrap
//! samples and input subsets, and even without either they differ through their tie-breaks (only
//! the library's [`TieBreak::LowestIndex`] with `bootstrap = false` and every input makes the
//! forest deterministic). With `fit_seeds ≥ 2` the engine's `variance_fit` is the variance due
//! to all of these draws for a fixed training set.
//!
//! # Predictions
//!
//! - **Regression**: the mean of the `T` trees' predictions (summed in tree order, divided by `T`).
//! - **Classification**: probabilities are the mean over trees of each tree's leaf class shares
//!   (add-`alpha` smoothed as in the tree family); the label is the majority vote of the trees'
//!   labels, ties to the smallest class index. (Voting and averaged probabilities can disagree.)
//! - **Diversity** (when the engine asks): the trees' spread around the forest,
//!   `(1/T) Σ_t (h_t − h̄)²` for regression and `(1/T) Σ_t ‖q_t − q̄‖²` over the trees' probability
//!   vectors for classification, accumulated with Welford's update. The trees of a forest are
//!   exchangeable (every tree is drawn the same way), which the engine's member terms need.
//!
//! # Path fits
//!
//! - knob `trees`: one forest of `max(grid)` trees is grown; grid value `T` reads the average of the
//!   first `T` trees (prefix averages), which is exactly the forest of `T` trees.
//! - knob `max_depth`: every tree is grown once to the largest grid depth and read at every grid
//!   depth (as in the tree family), which is exactly the forest grown to that depth.

use std::sync::Arc;

use rand::Rng;

use super::tree::{Criterion, GrowOptions, Presorted, TieBreak, Tree, TreeFamily};
use super::{
    check_out, check_whole_grid, smoothed_shares, BuildContext, Caps, Family, FitError, FitInput,
    OptionError, Options, Out, Task,
};

/// Largest number of trees a grid or the `trees` option may ask for.
pub const MAX_TREES: usize = 100_000;

/// Largest depth limit (as in the tree family).
const MAX_DEPTH: usize = 64;

/// Which quantity the forest's grid varies.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum ForestKnob {
    /// The number of trees averaged (default).
    #[default]
    Trees,
    /// The depth limit of every tree.
    MaxDepth,
}

/// How many inputs each node tries.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum MaxFeatures {
    /// `⌊p/3⌋` for regression, `⌊√p⌋` for classification (at least 1).
    #[default]
    ByTask,
    /// Every input (plain bagging).
    All,
    /// `⌊√p⌋` (at least 1).
    Sqrt,
    /// `⌊p/3⌋` (at least 1).
    Third,
    /// This many inputs (capped at `p`).
    Count(usize),
}

impl MaxFeatures {
    /// The number of inputs tried at each node with `p` inputs.
    pub fn resolve(self, p: usize, task: Task) -> usize {
        let sqrt = ((p as f64).sqrt().floor() as usize).max(1);
        let third = (p / 3).max(1);
        let m = match self {
            MaxFeatures::ByTask => match task {
                Task::Regress => third,
                Task::Classify { .. } => sqrt,
            },
            MaxFeatures::All => p,
            MaxFeatures::Sqrt => sqrt,
            MaxFeatures::Third => third,
            MaxFeatures::Count(c) => c,
        };
        m.clamp(1, p.max(1))
    }
}

/// Bagged CART with random input subsets; see the [module documentation](self).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ForestFamily {
    /// Which quantity the grid varies.
    pub knob: ForestKnob,
    /// Number of trees when the knob is `max_depth` (default 100).
    pub trees: usize,
    /// Depth limit of every tree when the knob is `trees` (default 64).
    pub max_depth: usize,
    /// Inputs tried at each node.
    pub max_features: MaxFeatures,
    /// Grow each tree on a bootstrap sample (default true).
    pub bootstrap: bool,
    /// Minimum number of samples in each child of a split (default 1).
    pub min_samples_leaf: usize,
    /// Impurity measure for classification (default Gini).
    pub criterion: Criterion,
    /// Add-α smoothing of the leaf class shares (default 0).
    pub alpha: f64,
    /// How the trees break exact ties (default: at random).
    pub tie_break: TieBreak,
}

impl Default for ForestFamily {
    fn default() -> Self {
        ForestFamily {
            knob: ForestKnob::Trees,
            trees: 100,
            max_depth: MAX_DEPTH,
            max_features: MaxFeatures::ByTask,
            bootstrap: true,
            min_samples_leaf: 1,
            criterion: Criterion::Gini,
            alpha: 0.0,
            tie_break: TieBreak::Random,
        }
    }
}

/// Builds `family = "forest"` from its options (`knob`, `trees` or `max_depth`, `max_features`,
/// `bootstrap`, `min_samples_leaf`, `criterion`, `alpha`).
pub fn build(opts: &mut Options, cx: &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError> {
    let mut f = ForestFamily::default();
    if let Some(k) = opts.choice("knob", &["trees", "max_depth"])? {
        f.knob = if k == "trees" {
            ForestKnob::Trees
        } else {
            ForestKnob::MaxDepth
        };
    }
    let knob_clash = |key: &str| {
        OptionError {
        key: key.to_string(),
        message: format!(
            "`{key}` is this forest's knob: give its values in `grid` (or choose the other knob with `knob`)"
        ),
    }
    };
    if let Some(t) = opts.int("trees", 1, MAX_TREES as i64)? {
        if f.knob == ForestKnob::Trees {
            return Err(knob_clash("trees"));
        }
        f.trees = t as usize;
    }
    if let Some(d) = opts.int("max_depth", 1, MAX_DEPTH as i64)? {
        if f.knob == ForestKnob::MaxDepth {
            return Err(knob_clash("max_depth"));
        }
        f.max_depth = d as usize;
    }
    f.max_features = max_features_option(opts)?.unwrap_or_default();
    if let Some(b) = opts.boolean("bootstrap")? {
        f.bootstrap = b;
    }
    if let Some(l) = opts.int("min_samples_leaf", 1, 1_000_000_000)? {
        f.min_samples_leaf = l as usize;
    }
    if let Some(c) = opts.choice("criterion", &["gini", "entropy"])? {
        cx.classification_only("criterion", "it is the split criterion of class labels")?;
        f.criterion = if c == "gini" {
            Criterion::Gini
        } else {
            Criterion::Entropy
        };
    }
    if let Some(a) = opts.number("alpha", 0.0, 1e6)? {
        cx.probabilities_only("alpha", "it smooths the leaf class shares")?;
        f.alpha = a;
    }
    Ok(Arc::new(f))
}

/// Takes `max_features`: `"all"`, `"sqrt"`, `"third"`, or a whole number of inputs.
fn max_features_option(opts: &mut Options) -> Result<Option<MaxFeatures>, OptionError> {
    let words = ["all", "sqrt", "third"];
    let mut probe = opts.clone();
    match probe.choice("max_features", &words) {
        Ok(None) => return Ok(None),
        Ok(Some(w)) => {
            *opts = probe;
            return Ok(Some(match w {
                "all" => MaxFeatures::All,
                "sqrt" => MaxFeatures::Sqrt,
                _ => MaxFeatures::Third,
            }));
        }
        Err(_) => {}
    }
    opts.int("max_features", 1, 1_000_000_000)
        .map(|c| c.map(|c| MaxFeatures::Count(c as usize)))
        .map_err(|_| OptionError {
            key: "max_features".into(),
            message:
                "must be a whole number of inputs (at least 1) or one of `all`, `sqrt`, `third`"
                    .into(),
        })
}

/// Running sums of one ensemble's members at a set of evaluation points (and slots: grid depths
/// for the `max_depth` knob, a single slot for the `trees` knob).
struct Accumulator {
    classes: usize,
    m: usize,
    /// Members added so far.
    count: usize,
    /// Regression: Σ h_t per (slot, point). Classification: Σ q_t per (slot, point, class).
    sum: Vec<f64>,
    /// Welford's running mean of the members (same layout as `sum`), for the diversity.
    mean: Vec<f64>,
    /// Welford's Σ (h_t − h̄)² (summed over classes) per (slot, point).
    m2: Vec<f64>,
    /// Classification: votes per (slot, point, class).
    votes: Vec<u32>,
    diversity: bool,
}

impl Accumulator {
    fn new(slots: usize, m: usize, classes: usize, diversity: bool) -> Self {
        let width = classes.max(1);
        Accumulator {
            classes,
            m,
            count: 0,
            sum: vec![0.0; slots * m * width],
            mean: if diversity {
                vec![0.0; slots * m * width]
            } else {
                Vec::new()
            },
            m2: vec![0.0; if diversity { slots * m } else { 0 }],
            votes: vec![0; slots * m * classes],
            diversity,
        }
    }

    /// Adds member `count`'s prediction at `(slot, e)`: `value` (a real value, or a class label)
    /// and, for classification, its probability vector `q`. Call [`Accumulator::next`] after the
    /// member has been added at every cell.
    fn add(&mut self, slot: usize, e: usize, value: f64, q: &[f64]) {
        let cell = slot * self.m + e;
        let t = (self.count + 1) as f64;
        if self.classes == 0 {
            self.sum[cell] += value;
            if self.diversity {
                let d = value - self.mean[cell];
                self.mean[cell] += d / t;
                self.m2[cell] += d * (value - self.mean[cell]);
            }
        } else {
            let k = self.classes;
            self.votes[cell * k + value as usize] += 1;
            let at = cell * k;
            for (c, &qc) in q.iter().enumerate() {
                self.sum[at + c] += qc;
            }
            if self.diversity {
                let mut m2 = 0.0;
                for (c, &qc) in q.iter().enumerate() {
                    let d = qc - self.mean[at + c];
                    self.mean[at + c] += d / t;
                    m2 += d * (qc - self.mean[at + c]);
                }
                self.m2[cell] += m2;
            }
        }
    }

    /// Marks the end of one member.
    fn next(&mut self) {
        self.count += 1;
    }

    /// Writes the ensemble of the members added so far at `slot` into grid row `g` of `out`.
    fn write(&self, slot: usize, g: usize, out: &mut Out<'_>) {
        let t = self.count as f64;
        for e in 0..self.m {
            let cell = slot * self.m + e;
            if self.classes == 0 {
                out.values[[g, e]] = self.sum[cell] / t;
            } else {
                let k = self.classes;
                let votes = &self.votes[cell * k..(cell + 1) * k];
                let mut best = 0;
                for (c, &v) in votes.iter().enumerate() {
                    if v > votes[best] {
                        best = c;
                    }
                }
                out.values[[g, e]] = best as f64;
                if let Some(pr) = out.probs.as_mut() {
                    for c in 0..k {
                        pr[[g, e, c]] = self.sum[cell * k + c] / t;
                    }
                }
            }
            if let Some(dv) = out.diversity.as_mut() {
                dv[[g, e]] = if self.diversity {
                    self.m2[cell] / t
                } else {
                    0.0
                };
            }
        }
    }
}

impl ForestFamily {
    /// The tree family every tree of the forest uses.
    fn tree_family(&self) -> TreeFamily {
        TreeFamily {
            min_samples_leaf: self.min_samples_leaf,
            criterion: self.criterion,
            alpha: self.alpha,
            tie_break: self.tie_break,
        }
    }

    /// Grows tree `t` of the forest (see the module docs for its stream).
    fn grow_tree(
        &self,
        pre: &Presorted,
        input: &FitInput<'_>,
        t: usize,
        max_depth: usize,
        max_features: usize,
        counts: &mut Vec<u32>,
    ) -> Result<Tree, FitError> {
        let n = pre.rows();
        let mut rng = input.seed.member_rng(t as u64);
        if self.bootstrap {
            counts.clear();
            counts.resize(n, 0);
            for _ in 0..n {
                counts[rng.gen_range(0..n)] += 1;
            }
        }
        let opts = GrowOptions {
            max_depth,
            max_features: Some(max_features),
            counts: self.bootstrap.then_some(&counts[..]),
        };
        self.tree_family()
            .grow_presorted(pre, input.y, input.task, &opts, &mut rng)
    }
}

impl Family for ForestFamily {
    /// One tree's sorted lists (expanded by bootstrap counts) and nodes at a time, plus the
    /// running sums of every grid value's predictions and member spreads.
    fn work_bytes(&self, n: usize, p: usize, m: usize, grid: &[f64], task: Task) -> f64 {
        let (n, p, m, g) = (n as f64, p as f64, m as f64, grid.len() as f64);
        let k = task.classes().max(1) as f64;
        2.0 * 12.0 * n * p + 96.0 * n + 8.0 * 4.0 * g * m * k
    }

    fn name(&self) -> &'static str {
        "forest"
    }

    fn squares_inputs(&self) -> bool {
        false
    }

    fn zero_probability_remedy(&self) -> &'static str {
        "smooth the class shares with add-α: set `alpha` in [model] (key `model.alpha`), or raise it, to 0.5 for example"
    }

    fn knob(&self) -> &'static str {
        match self.knob {
            ForestKnob::Trees => "trees",
            ForestKnob::MaxDepth => "max_depth",
        }
    }

    fn check_grid(&self, grid: &[f64], _n_train: usize, _n_inputs: usize) -> Result<(), String> {
        if grid.is_empty() {
            return Err(format!("{} grid is empty", self.knob()));
        }
        match self.knob {
            ForestKnob::Trees => check_whole_grid(grid, "trees", 1.0, MAX_TREES as f64),
            ForestKnob::MaxDepth => check_whole_grid(grid, "max_depth", 1.0, MAX_DEPTH as f64),
        }
    }

    fn check_options(&self, n_train: usize, n_inputs: usize) -> Result<(), (&'static str, String)> {
        super::check_leaf_size(self.min_samples_leaf, n_train, "training rows")?;
        match self.max_features {
            MaxFeatures::Count(c) if c > n_inputs => Err((
                "max_features",
                format!(
                    "max_features = {c}, but the model sees {n_inputs} input{}: at most {n_inputs} \
                     (or \"all\")",
                    if n_inputs == 1 { "" } else { "s" }
                ),
            )),
            _ => Ok(()),
        }
    }

    fn supports(&self, _task: Task) -> bool {
        true
    }

    fn caps(&self, task: Task) -> Caps {
        let deterministic = self.tie_break == TieBreak::LowestIndex
            && !self.bootstrap
            && self.max_features == MaxFeatures::All;
        Caps {
            probabilities: matches!(task, Task::Classify { .. }),
            stochastic: !deterministic,
            ensemble: true,
            positive: false,
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
        check_out("forest", &out, grid.len(), m, input.task)?;
        if input.eval.ncols() != p {
            return Err(FitError(format!(
                "forest: evaluation inputs have {} columns, training inputs {p}",
                input.eval.ncols()
            )));
        }
        self.check_grid(grid, input.x.nrows(), p)
            .map_err(|e| FitError(format!("forest: {e}")))?;
        if let Some(((e, j), &v)) = input.eval.indexed_iter().find(|(_, v)| v.is_nan()) {
            return Err(FitError(format!(
                "forest: evaluation input {v} at row {e}, column {j} is not a number"
            )));
        }
        let values: Vec<usize> = grid.iter().map(|&g| g as usize).collect();
        let largest = values.iter().copied().max().unwrap_or(0);
        let (n_trees, depth) = match self.knob {
            ForestKnob::Trees => (largest, self.max_depth),
            ForestKnob::MaxDepth => (self.trees, largest),
        };
        let pre = Presorted::new(input.x)?;
        let max_features = self.max_features.resolve(p, input.task);
        let eval = input.eval.as_standard_layout();
        let rows = eval
            .as_slice()
            .ok_or_else(|| FitError("forest: evaluation inputs are not contiguous".into()))?;
        let k = input.task.classes();
        // The depth read at each accumulator slot: one slot for the `trees` knob, one per grid
        // depth for the `max_depth` knob.
        let slot_depths = match self.knob {
            ForestKnob::Trees => vec![depth],
            ForestKnob::MaxDepth => values.clone(),
        };
        let slots = slot_depths.len();
        let want_div = out.diversity.is_some();
        let mut acc = Accumulator::new(slots, m, k, want_div);
        let want_shares = k > 0 && (out.probs.is_some() || want_div);
        let mut counts_buf = Vec::new();
        let mut path = vec![0u32; MAX_DEPTH + 1];
        let mut counts = vec![0.0; k];
        let mut shares = vec![0.0; k];
        // Grid rows to write after each number of trees (knob `trees`).
        let mut at_count: Vec<Vec<usize>> = vec![Vec::new(); n_trees + 1];
        if self.knob == ForestKnob::Trees {
            for (g, &v) in values.iter().enumerate() {
                at_count[v].push(g);
            }
        }
        for t in 0..n_trees {
            let tree = self.grow_tree(&pre, input, t, depth, max_features, &mut counts_buf)?;
            for e in 0..m {
                let row = &rows[e * p..(e + 1) * p];
                let reached = tree.path_nodes(row, depth, &mut path);
                for (slot, &d) in slot_depths.iter().enumerate() {
                    let node = path[d.min(reached)];
                    if want_shares {
                        for (c, &v) in counts.iter_mut().zip(tree.node_counts(node)) {
                            *c = f64::from(v);
                        }
                        smoothed_shares(&counts, self.alpha, &mut shares);
                    }
                    acc.add(slot, e, tree.node_value(node), &shares);
                }
            }
            acc.next();
            for &g in &at_count[t + 1] {
                acc.write(0, g, &mut out);
            }
        }
        if self.knob == ForestKnob::MaxDepth {
            for g in 0..grid.len() {
                acc.write(g, g, &mut out);
            }
        }
        Ok(())
    }
}

/// Predictions of `family` at `eval` for `grid` with fit seed `seed`, as `(values, probs,
/// diversity)`; for tests.
#[cfg(test)]
pub(crate) fn fit_all<'a>(
    family: &dyn Family,
    x: ndarray::ArrayView2<'a, f64>,
    y: ndarray::ArrayView1<'a, f64>,
    eval: ndarray::ArrayView2<'a, f64>,
    task: Task,
    seed: crate::rng::FitSeed,
    grid: &[f64],
) -> (
    ndarray::Array2<f64>,
    ndarray::Array3<f64>,
    ndarray::Array2<f64>,
) {
    use ndarray::{Array2, Array3};
    let m = eval.nrows();
    let k = task.classes();
    let mut values = Array2::zeros((grid.len(), m));
    let mut probs = Array3::zeros((grid.len(), m, k));
    let mut div = Array2::zeros((grid.len(), m));
    let caps = family.caps(task);
    let input = FitInput {
        x,
        y,
        eval,
        task,
        seed,
    };
    let out = Out {
        values: values.view_mut(),
        probs: caps.probabilities.then(|| probs.view_mut()),
        diversity: caps.ensemble.then(|| div.view_mut()),
    };
    family.fit_predict(&input, grid, out).expect("fit");
    (values, probs, div)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::FitSeed;
    use ndarray::{Array1, Array2, Array3};
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    /// Discrete inputs and responses: exact ties at many nodes, so the tie stream matters.
    fn tie_heavy(seed: u64, n: usize, p: usize) -> (Array2<f64>, Array1<f64>, Array1<f64>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let x = Array2::from_shape_fn((n, p), |_| f64::from(rng.gen_range(0..4u8)));
        let yr = Array1::from_shape_fn(n, |i| {
            x[[i, 0]] * x[[i, 1]] + f64::from(rng.gen_range(0..3u8))
        });
        let yc = Array1::from_shape_fn(n, |i| {
            let s = x[[i, 0]] + x[[i, 2]] + f64::from(rng.gen_range(0..4u8));
            if s < 3.0 {
                0.0
            } else if s < 6.0 {
                1.0
            } else {
                2.0
            }
        });
        (x, yr, yc)
    }

    fn eval_points(seed: u64, m: usize, p: usize) -> Array2<f64> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        Array2::from_shape_fn((m, p), |_| rng.gen_range(-0.5..3.5))
    }

    fn bits2(a: &Array2<f64>) -> Vec<u64> {
        a.iter().map(|v| v.to_bits()).collect()
    }

    fn bits3(a: &Array3<f64>) -> Vec<u64> {
        a.iter().map(|v| v.to_bits()).collect()
    }

    const SEED: FitSeed = FitSeed {
        seed: 77,
        replicate: 4,
        fold: 0,
        copy: 0,
    };

    #[test]
    fn one_tree_without_bootstrap_on_all_inputs_is_the_tree_bit_for_bit() {
        // Exact identity (design): tree 0 of a forest draws from member stream 0 = the fit stream,
        // and with bootstrap = false and every input tried it draws only its ties, as a tree does.
        let (x, yr, yc) = tie_heavy(1, 150, 4);
        let eval = eval_points(2, 80, 4);
        let grid: Vec<f64> = (1..=10).map(f64::from).collect();
        for (task, y, criterion, alpha) in [
            (Task::Regress, &yr, Criterion::Gini, 0.0),
            (Task::Classify { classes: 3 }, &yc, Criterion::Gini, 0.0),
            (Task::Classify { classes: 3 }, &yc, Criterion::Entropy, 0.5),
        ] {
            let tree = TreeFamily {
                criterion,
                alpha,
                min_samples_leaf: 2,
                ..TreeFamily::default()
            };
            let (tv, tp, _) = fit_all(&tree, x.view(), y.view(), eval.view(), task, SEED, &grid);
            // The check involves the tie stream: another seed changes the tree.
            let (ov, _, _) = fit_all(
                &tree,
                x.view(),
                y.view(),
                eval.view(),
                task,
                FitSeed { copy: 1, ..SEED },
                &grid,
            );
            assert_ne!(bits2(&tv), bits2(&ov), "{task:?}: ties do not matter here");
            let base = ForestFamily {
                bootstrap: false,
                max_features: MaxFeatures::All,
                criterion,
                alpha,
                min_samples_leaf: 2,
                ..ForestFamily::default()
            };
            // Knob max_depth with one tree: the same grid.
            let by_depth = ForestFamily {
                knob: ForestKnob::MaxDepth,
                trees: 1,
                ..base
            };
            let (fv, fp, fd) = fit_all(
                &by_depth,
                x.view(),
                y.view(),
                eval.view(),
                task,
                SEED,
                &grid,
            );
            assert_eq!(bits2(&fv), bits2(&tv), "{task:?}");
            assert_eq!(bits3(&fp), bits3(&tp), "{task:?}");
            assert!(fd.iter().all(|&d| d == 0.0));
            // Knob trees with one tree, each depth as the option.
            for (g, &d) in grid.iter().enumerate() {
                let by_trees = ForestFamily {
                    max_depth: d as usize,
                    ..base
                };
                let (fv, fp, _) = fit_all(
                    &by_trees,
                    x.view(),
                    y.view(),
                    eval.view(),
                    task,
                    SEED,
                    &[1.0],
                );
                assert_eq!(
                    bits2(&fv),
                    bits2(&tv.slice(ndarray::s![g..=g, ..]).to_owned())
                );
                assert_eq!(
                    bits3(&fp),
                    bits3(&tp.slice(ndarray::s![g..=g, .., ..]).to_owned())
                );
            }
        }
    }

    #[test]
    fn path_fits_equal_single_value_fits() {
        // Exact identity (design): a tree's stream depends neither on the number of trees nor on
        // the depth limit, so prefix averages and depth cuts are the forests fitted alone.
        let (x, yr, yc) = tie_heavy(3, 120, 5);
        let eval = eval_points(4, 50, 5);
        for (task, y) in [(Task::Regress, &yr), (Task::Classify { classes: 3 }, &yc)] {
            for (fam, grid) in [
                (
                    ForestFamily {
                        max_features: MaxFeatures::Count(2),
                        ..ForestFamily::default()
                    },
                    vec![7.0, 1.0, 3.0, 20.0],
                ),
                (
                    ForestFamily {
                        knob: ForestKnob::MaxDepth,
                        trees: 9,
                        min_samples_leaf: 2,
                        ..ForestFamily::default()
                    },
                    vec![1.0, 2.0, 4.0, 8.0, 3.0],
                ),
            ] {
                let (v, p, d) = fit_all(&fam, x.view(), y.view(), eval.view(), task, SEED, &grid);
                for (g, &value) in grid.iter().enumerate() {
                    let (v1, p1, d1) =
                        fit_all(&fam, x.view(), y.view(), eval.view(), task, SEED, &[value]);
                    let row = ndarray::s![g..=g, ..];
                    assert_eq!(
                        bits2(&v1),
                        bits2(&v.slice(row).to_owned()),
                        "{task:?} {value}"
                    );
                    assert_eq!(
                        bits2(&d1),
                        bits2(&d.slice(row).to_owned()),
                        "{task:?} {value}"
                    );
                    assert_eq!(
                        bits3(&p1),
                        bits3(&p.slice(ndarray::s![g..=g, .., ..]).to_owned())
                    );
                }
            }
        }
    }

    #[test]
    fn same_seed_repeats_and_another_copy_differs() {
        let (x, yr, yc) = tie_heavy(5, 100, 4);
        let eval = eval_points(6, 40, 4);
        let fam = ForestFamily::default();
        for (task, y) in [(Task::Regress, &yr), (Task::Classify { classes: 3 }, &yc)] {
            assert!(fam.caps(task).stochastic && fam.caps(task).ensemble);
            let grid = [5.0, 25.0];
            let a = fit_all(&fam, x.view(), y.view(), eval.view(), task, SEED, &grid);
            let b = fit_all(&fam, x.view(), y.view(), eval.view(), task, SEED, &grid);
            let c = fit_all(
                &fam,
                x.view(),
                y.view(),
                eval.view(),
                task,
                FitSeed { copy: 1, ..SEED },
                &grid,
            );
            assert_eq!(bits2(&a.0), bits2(&b.0));
            assert_eq!(bits3(&a.1), bits3(&b.1));
            assert_eq!(bits2(&a.2), bits2(&b.2));
            assert_ne!(bits2(&a.2), bits2(&c.2));
        }
    }

    #[test]
    fn diversity_and_averages_match_the_members() {
        // Definition check: the forest's value, probabilities and diversity computed from its
        // members grown one by one (regression mean and spread; classification vote, mean
        // probability vector and spread of the vectors).
        let (x, yr, yc) = tie_heavy(7, 90, 4);
        let eval = eval_points(8, 30, 4);
        let fam = ForestFamily {
            alpha: 0.3,
            ..ForestFamily::default()
        };
        let t_count = 6usize;
        for (task, y) in [(Task::Regress, &yr), (Task::Classify { classes: 3 }, &yc)] {
            let (v, p, d) = fit_all(
                &fam,
                x.view(),
                y.view(),
                eval.view(),
                task,
                SEED,
                &[t_count as f64],
            );
            let input = FitInput {
                x: x.view(),
                y: y.view(),
                eval: eval.view(),
                task,
                seed: SEED,
            };
            let pre = Presorted::new(x.view()).unwrap();
            let mtry = fam.max_features.resolve(4, task);
            let mut buf = Vec::new();
            let trees: Vec<Tree> = (0..t_count)
                .map(|t| fam.grow_tree(&pre, &input, t, 64, mtry, &mut buf).unwrap())
                .collect();
            let k = task.classes();
            for (e, row) in eval.rows().into_iter().enumerate() {
                let row = row.to_vec();
                let mut path = [0u32; 65];
                let nodes: Vec<(f64, Vec<f64>)> = trees
                    .iter()
                    .map(|t| {
                        let r = t.path_nodes(&row, 64, &mut path);
                        let node = path[r];
                        let counts: Vec<f64> =
                            t.node_counts(node).iter().map(|&c| f64::from(c)).collect();
                        let mut q = vec![0.0; k];
                        smoothed_shares(&counts, fam.alpha, &mut q);
                        (t.node_value(node), q)
                    })
                    .collect();
                let tf = t_count as f64;
                if k == 0 {
                    let mean = nodes.iter().map(|n| n.0).sum::<f64>() / tf;
                    let div = nodes.iter().map(|n| (n.0 - mean).powi(2)).sum::<f64>() / tf;
                    assert!((v[[0, e]] - mean).abs() <= 1e-12 * mean.abs().max(1.0));
                    assert!((d[[0, e]] - div).abs() <= 1e-12 * div.max(1.0));
                } else {
                    let mut votes = vec![0; k];
                    let mut qbar = vec![0.0; k];
                    for (label, q) in &nodes {
                        votes[*label as usize] += 1;
                        for c in 0..k {
                            qbar[c] += q[c] / tf;
                        }
                    }
                    let top = *votes.iter().max().unwrap();
                    let label = votes.iter().position(|&c| c == top).unwrap();
                    assert_eq!(v[[0, e]], label as f64);
                    let div = nodes
                        .iter()
                        .map(|(_, q)| {
                            q.iter()
                                .zip(&qbar)
                                .map(|(a, b)| (a - b).powi(2))
                                .sum::<f64>()
                        })
                        .sum::<f64>()
                        / tf;
                    assert!((d[[0, e]] - div).abs() <= 1e-12);
                    for c in 0..k {
                        assert!((p[[0, e, c]] - qbar[c]).abs() <= 1e-12);
                    }
                }
            }
        }
    }

    #[test]
    fn options_and_grids_are_checked() {
        use toml::Value;
        let cx = BuildContext {
            base: std::path::Path::new("."),
            task: Task::Regress,
            labels_only: false,
        };
        let make = |pairs: &[(&str, Value)]| {
            let mut o = Options::new(
                "forest",
                pairs
                    .iter()
                    .map(|(k, v)| (k.to_string(), v.clone()))
                    .collect(),
            );
            build(&mut o, &cx).map(|f| (f, o))
        };
        let (f, o) = make(&[
            ("knob", Value::String("max_depth".into())),
            ("trees", Value::Integer(30)),
            ("max_features", Value::String("sqrt".into())),
        ])
        .unwrap();
        assert!(o.finish().is_ok());
        assert_eq!(f.knob(), "max_depth");
        assert!(f.check_grid(&[1.0, 64.0], 10, 3).is_ok());
        assert!(f.check_grid(&[65.0], 10, 3).is_err());
        let (f, o) = make(&[("max_features", Value::Integer(2))]).unwrap();
        assert!(o.finish().is_ok());
        assert_eq!(f.knob(), "trees");
        assert!(f.check_grid(&[0.0], 10, 3).is_err());
        let e = make(&[("trees", Value::Integer(3))])
            .err()
            .expect("refused");
        assert_eq!(e.key, "trees");
        let e = make(&[("max_features", Value::Float(0.5))])
            .err()
            .expect("refused");
        assert_eq!(e.key, "max_features");
        let e = make(&[("max_features", Value::String("half".into()))])
            .err()
            .expect("refused");
        assert!(e.message.contains("sqrt"), "{e}");
        // Class-share options on a regression forest are refused, not ignored.
        for (key, v) in [
            ("criterion", Value::String("entropy".into())),
            ("alpha", Value::Float(0.5)),
        ] {
            let e = make(&[(key, v)]).err().expect("refused");
            assert_eq!(e.key, key);
            assert!(e.message.contains("only classification uses"), "{e}");
        }
        assert_eq!(MaxFeatures::ByTask.resolve(10, Task::Regress), 3);
        assert_eq!(
            MaxFeatures::ByTask.resolve(10, Task::Classify { classes: 2 }),
            3
        );
        assert_eq!(MaxFeatures::ByTask.resolve(2, Task::Regress), 1);
        assert_eq!(MaxFeatures::Count(50).resolve(4, Task::Regress), 4);
    }
}
