//! The one engine: every source runs through the same scheduler, so table sources shard, merge,
//! checkpoint and resume byte for byte like synthetic ones; every prediction is checked in one
//! place (an out-of-range class stops synthetic and table runs alike); a stochastic family is a
//! pure function of (data, fit seed), bit-identical for any thread count and shard split; and
//! the external protocol accepts version-1 processes and carries seeds and probabilities in
//! version 2.

use std::fs;
use std::path::Path;
use std::sync::Arc;

use lossprism::family::tree::TreeFamily;
use lossprism::family::{Family, FitError, FitInput, Out, Task};
use lossprism::scenario::PlanOptions;
use lossprism::{harness, report, runner, shard};
use rand::seq::SliceRandom;

mod common;
use common::*;

/// An invented table: a smooth response of two inputs with noise (rows written with a fixed
/// generator, so the file is the same in every run).
fn write_table(dir: &Path, classes: bool) {
    let mut s = String::from("a,b,y\n");
    let mut state = 12345u64;
    let mut u = || {
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    for _ in 0..80 {
        let (a, b) = (u(), u());
        let noise = u() - 0.5;
        let y = if classes {
            f64::from(u8::from((a + b + 0.3 * noise) > 1.0))
        } else {
            (3.0 * a).sin() + b + 0.3 * noise
        };
        s.push_str(&format!("{a},{b},{y}\n"));
    }
    fs::write(dir.join("t.csv"), s).unwrap();
}

const TABLE: &str = r#"name = "engine-table"
about = "Invented table: a smooth response of two inputs, for engine tests."
seed = 5
replicates = 24
blocks = 8

[data]
source = "table"
path = "t.csv"
target = "y"

[model]
family = "tree"
grid = [1, 2, 4]
"#;

fn read(dir: &Path, name: &str) -> String {
    fs::read_to_string(dir.join(name)).unwrap()
}

fn ok(dir: &Path, args: &[&str]) {
    let o = lossprism(dir, args);
    no_panic(&o);
    assert_eq!(o.status.code(), Some(0), "{args:?}: {}", text(&o.stderr));
}

#[test]
fn table_sources_shard_merge_checkpoint_and_resume_byte_for_byte() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    write_table(d, false);
    fs::write(d.join("s.toml"), TABLE).unwrap();
    ok(d, &["run", "s.toml", "--out", "full.json", "-q"]);
    for i in 1..=3 {
        let part = format!("p{i}.json");
        ok(
            d,
            &[
                "run",
                "s.toml",
                "--shard",
                &format!("{i}/3"),
                "--out",
                &part,
                "-q",
            ],
        );
    }
    ok(
        d,
        &[
            "merge",
            "p1.json",
            "p2.json",
            "p3.json",
            "--out",
            "merged.json",
            "-q",
        ],
    );
    assert_eq!(read(d, "full.json"), read(d, "merged.json"));
    // Stop after 3 blocks (as a kill would), then resume to the same bytes.
    let o = lossprism(
        d,
        &[
            "run",
            "s.toml",
            "--checkpoint",
            "ck.json",
            "--stop-after-blocks",
            "3",
            "-q",
        ],
    );
    assert_eq!(o.status.code(), Some(3), "{}", text(&o.stderr));
    ok(
        d,
        &[
            "run",
            "s.toml",
            "--checkpoint",
            "ck.json",
            "--out",
            "resumed.json",
            "-q",
        ],
    );
    assert_eq!(read(d, "full.json"), read(d, "resumed.json"));
    // The same through the other loss (classification on a table).
    let cdir = tempfile::tempdir().unwrap();
    let c = cdir.path();
    write_table(c, true);
    fs::write(
        c.join("s.toml"),
        TABLE.replace("target = \"y\"", "target = \"y\"\ntask = \"classify\""),
    )
    .unwrap();
    ok(c, &["run", "s.toml", "--out", "full.json", "-q"]);
    for i in 1..=2 {
        let part = format!("p{i}.json");
        ok(
            c,
            &[
                "run",
                "s.toml",
                "--shard",
                &format!("{i}/2"),
                "--out",
                &part,
                "-q",
            ],
        );
    }
    ok(
        c,
        &["merge", "p1.json", "p2.json", "--out", "merged.json", "-q"],
    );
    assert_eq!(read(c, "full.json"), read(c, "merged.json"));
}

/// An estimator answering class 7 (of 2 classes) for every point: the drifted-loop bug of the
/// earlier table runner silently clamped it.
const SEVEN: &str = r#"
import sys
inp, out = sys.stdin, sys.stdout
inp.readline()
out.write("ready 1\n"); out.flush()
while True:
    head = inp.readline().split()
    if not head:
        sys.exit(0)
    rid, m, g = head[1], int(head[7]), int(head[8])
    while inp.readline().strip() != "end":
        pass
    out.write("ok %s\n" % rid)
    for _ in range(g):
        out.write("pred " + " ".join(["7"] * m) + "\n")
    out.flush()
"#;

fn python_ok() -> bool {
    std::process::Command::new("python3")
        .arg("-c")
        .arg("pass")
        .output()
        .is_ok_and(|o| o.status.success())
}

#[test]
fn an_out_of_range_class_stops_synthetic_and_table_runs_alike() {
    if !python_ok() {
        println!("skipped: python3 is not available");
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    write_table(d, true);
    fs::write(d.join("seven.py"), SEVEN).unwrap();
    let model = "[model]\nfamily = \"external\"\ncommand = [\"python3\", \"seven.py\"]\nknob = \"k\"\ngrid = [1]\n";
    let table = TABLE
        .replace("target = \"y\"", "target = \"y\"\ntask = \"classify\"")
        .replace("[model]\nfamily = \"tree\"\ngrid = [1, 2, 4]\n", model);
    fs::write(d.join("table.toml"), table).unwrap();
    let synthetic = format!(
        "name = \"seven\"\nseed = 1\nreplicates = 4\n[data]\nsource = \"synthetic\"\ntrain_size = 20\neval_size = 5\n\
         [[data.inputs]]\nname = \"a\"\nuniform = [0, 1]\n[data.classes]\nlabels = [\"no\", \"yes\"]\nprobability = \"a\"\n{model}"
    );
    fs::write(d.join("synthetic.toml"), synthetic).unwrap();
    for f in ["synthetic.toml", "table.toml"] {
        let line = assert_bad(
            &lossprism(d, &["run", f]),
            &["predicted 7", "0 to 1", "2 classes"],
        );
        // The process is named by its command line (sweep 68: only "external fit failed").
        assert!(
            line.contains("external process `python3 seven.py` answered: predicted 7"),
            "{f}: {line}"
        );
    }
}

/// A toy stochastic family: a tree fitted on a random half of its rows, drawn from the fit's
/// own stream.
struct HalfTree;

impl Family for HalfTree {
    fn name(&self) -> &'static str {
        "half_tree"
    }
    fn knob(&self) -> &'static str {
        "max_depth"
    }
    fn check_grid(&self, grid: &[f64], n: usize, p: usize) -> Result<(), String> {
        TreeFamily::default().check_grid(grid, n, p)
    }
    fn supports(&self, task: Task) -> bool {
        task == Task::Regress
    }
    fn caps(&self, _task: Task) -> lossprism::family::Caps {
        lossprism::family::Caps {
            stochastic: true,
            ..Default::default()
        }
    }
    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        out: Out<'_>,
    ) -> Result<(), FitError> {
        let n = input.x.nrows();
        let mut rows: Vec<usize> = (0..n).collect();
        rows.shuffle(&mut input.seed.rng());
        rows.truncate(n / 2);
        let x = input.x.select(ndarray::Axis(0), &rows);
        let y = input.y.select(ndarray::Axis(0), &rows);
        let half = FitInput {
            x: x.view(),
            y: y.view(),
            eval: input.eval.view(),
            task: input.task,
            seed: input.seed,
        };
        TreeFamily::default().fit_predict(&half, grid, out)
    }
}

const TOY: &str = r#"name = "half-tree"
about = "Invented: a smooth curve with noise, fitted by a tree on a random half of each training set."
seed = 9
replicates = 30
blocks = 6

[data]
source = "synthetic"
train_size = 60
eval_size = 20

[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]

[data.truth]
formula = "sin(4*x)"

[data.noise]
sd = 0.3

[model]
family = "custom"
grid = [1, 2, 3]
fit_seeds = 3
"#;

#[test]
fn a_stochastic_family_is_bit_identical_across_threads_and_shards() {
    let fam: Arc<dyn Family> = Arc::new(HalfTree);
    let opts = PlanOptions::default();
    let one = harness::run_with_family_opts(TOY, fam.clone(), &opts, 1).unwrap();
    let two = harness::run_with_family_opts(TOY, fam.clone(), &opts, 2).unwrap();
    assert_eq!(report::to_json(&one), report::to_json(&two));
    // The fit seed matters: fit_seeds = 3 sees the learner's own randomness.
    assert!(one.points.iter().all(|p| p.get("variance_fit") > 0.0));
    // Three shards through the same scheduler, folded in block order.
    let plan = harness::plan_with_family(TOY, fam, &opts).unwrap();
    let source = shard::ScenarioSource {
        file: harness::SCENARIO_NAME.into(),
        text: TOY.into(),
        base: Path::new(".").into(),
    };
    let mut blocks = std::collections::BTreeMap::new();
    let mut prepared = None;
    for i in 1..=3 {
        let job = shard::Job {
            plan: &plan,
            source: &source,
            shard: Some(shard::ShardSpec { index: i, count: 3 }),
            checkpoint: None,
            stop_after_blocks: None,
            threads: 2,
            watch: &runner::NoWatch,
        };
        match shard::execute(&job).unwrap() {
            shard::Finish::Done(done) => {
                blocks.extend(done.blocks);
                prepared = Some(done.prepared);
            }
            shard::Finish::Stopped { .. } => panic!("a shard stopped"),
        }
    }
    // The summary's folds run on the workers too: 1, 2 and 3 of them give the same bits.
    let prepared = prepared.unwrap();
    for threads in [1, 2, 3] {
        let outcome = runner::summarize(&plan, prepared.clone(), &blocks, threads).unwrap();
        let merged = report::build(&plan, &outcome);
        assert_eq!(
            report::to_json(&one),
            report::to_json(&merged),
            "{threads} summary threads"
        );
    }
}

/// The version-1 minimal process of docs/external-protocol.md (no seed line, labels only).
const V1_MEAN: &str = r#"
import sys
sys.stdin.readline()
print("ready 1", flush=True)
for line in sys.stdin:
    _, rid, task, classes, knob, n, p, m, g = line.split()
    n, m, g = int(n), int(m), int(g)
    grid = [float(t) for t in sys.stdin.readline().split()[1:]]
    x = [[float(t) for t in sys.stdin.readline().split()[1:]] for _ in range(n)]
    y = [float(t) for t in sys.stdin.readline().split()[1:]]
    ev = [[float(t) for t in sys.stdin.readline().split()[1:]] for _ in range(m)]
    sys.stdin.readline()
    mean = sum(y) / n
    print("ok", rid)
    for _ in grid:
        print("pred", " ".join([repr(mean)] * m))
    sys.stdout.flush()
"#;

#[test]
fn version_one_processes_still_run_and_version_two_carries_probabilities() {
    if !python_ok() {
        println!("skipped: python3 is not available");
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    fs::write(d.join("mean.py"), V1_MEAN).unwrap();
    let body = |model: &str, classes: bool, loss: &str| {
        let response = if classes {
            "[data.classes]\nlabels = [\"no\", \"yes\"]\nprobability = \"0.2 + 0.6*a\""
        } else {
            "[data.truth]\nformula = \"2*a\"\n[data.noise]\nsd = 0.5"
        };
        format!(
            "name = \"proto\"\nabout = \"Invented.\"\nseed = 2\nreplicates = 8\nblocks = 4\n[data]\nsource = \"synthetic\"\ntrain_size = 30\neval_size = 12\n\
             [[data.inputs]]\nname = \"a\"\nuniform = [0, 1]\n{response}\n[model]\n{model}\n[loss]\nkind = \"{loss}\"\n"
        )
    };
    fs::write(
        d.join("v1.toml"),
        body(
            "family = \"external\"\ncommand = [\"python3\", \"mean.py\"]\nknob = \"k\"\ngrid = [1, 2]",
            false,
            "squared",
        ),
    )
    .unwrap();
    ok(d, &["run", "v1.toml", "--out", "v1.json", "-q"]);
    // Version 2: the standard-library k-NN example sends neighbour shares as probabilities and
    // equals the built-in k-NN (alpha = 0) under the Brier loss, bit for bit.
    let script = repo().join("docs/examples/knn_stdlib.py");
    let ext = format!(
        "family = \"external\"\ncommand = [\"python3\", {:?}]\nknob = \"k\"\ngrid = [1, 3, 7]",
        script.display().to_string()
    );
    fs::write(d.join("ext.toml"), body(&ext, true, "brier")).unwrap();
    fs::write(
        d.join("knn.toml"),
        body("family = \"knn\"\ngrid = [1, 3, 7]", true, "brier"),
    )
    .unwrap();
    ok(d, &["run", "ext.toml", "--out", "ext.json", "-q"]);
    ok(d, &["run", "knn.toml", "--out", "knn.json", "-q"]);
    let points = |f: &str| -> serde_json::Value {
        serde_json::from_str::<serde_json::Value>(&read(d, f)).unwrap()["points"].clone()
    };
    assert_eq!(points("ext.json"), points("knn.json"));
    // A version-1 process asked for probabilities fails with a clear message.
    fs::write(
        d.join("v1probs.toml"),
        body(
            "family = \"external\"\ncommand = [\"python3\", \"mean.py\"]\nknob = \"k\"\ngrid = [1]",
            true,
            "brier",
        ),
    )
    .unwrap();
    assert_bad(
        &lossprism(d, &["run", "v1probs.toml"]),
        &["protocol version 1", "probabilities"],
    );
}

/// A range grid with a decimal step gives the decimal values (0.3, not 0.30000000000000004, in
/// the fits, the JSON and the CSV), and a step finer than the printed digits is refused.
#[test]
fn range_grids_with_decimal_steps_give_decimal_values() {
    let grid = |g: &str| -> Vec<f64> {
        let src = format!(
            "name = \"g\"\nseed = 1\nreplicates = 4\n[data]\nsource = \"synthetic\"\n\
             train_size = 20\neval_size = 10\n[[data.inputs]]\nname = \"x\"\n\
             uniform = [0.0, 1.0]\n[data.truth]\nformula = \"x\"\n[data.noise]\nsd = 1.0\n\
             [model]\nfamily = \"ridge\"\ngrid = {g}\n"
        );
        let spec = lossprism::scenario::parse(&src, "g.toml").expect("parses");
        lossprism::scenario::Plan::from_spec(
            &spec,
            &src,
            "g.toml",
            Path::new("."),
            &PlanOptions::default(),
        )
        .expect("plans")
        .model()
        .grid
        .clone()
    };
    assert_eq!(
        grid("{ from = 0.1, to = 1.0, step = 0.1 }"),
        vec![0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0]
    );
    // A step finer than the four significant digits every table, picture and reading shows
    // gives values that all print as `1`: refused, naming two of them (it planned four rows
    // labelled alike).
    let src = "name = \"g\"\nseed = 1\nreplicates = 4\n[data]\nsource = \"synthetic\"\n\
               train_size = 20\neval_size = 10\n[[data.inputs]]\nname = \"x\"\n\
               uniform = [0.0, 1.0]\n[data.truth]\nformula = \"x\"\n[data.noise]\nsd = 1.0\n\
               [model]\nfamily = \"ridge\"\n\
               grid = { from = 1.0, to = 1.00000000000031, step = 1e-13 }\n";
    let spec = lossprism::scenario::parse(src, "g.toml").expect("parses");
    let e = lossprism::scenario::Plan::from_spec(
        &spec,
        src,
        "g.toml",
        Path::new("."),
        &PlanOptions::default(),
    )
    .expect_err("values that print alike");
    assert!(e.message.contains("both print as 1"), "{e:?}");
    assert_eq!(
        grid("{ from = 0, to = 5 }"),
        vec![0.0, 1.0, 2.0, 3.0, 4.0, 5.0]
    );
    // The user's own `from` is kept as written (a value near 0 is not snapped to 0).
    assert_eq!(grid("{ from = 1e-10, to = 3, step = 1 }")[0], 1e-10);
}

/// [`HalfTree`] under another name, to test names that collide with built-in families.
struct Named(&'static str, &'static str);

impl Family for Named {
    fn name(&self) -> &'static str {
        self.0
    }
    fn knob(&self) -> &'static str {
        self.1
    }
    fn check_grid(&self, grid: &[f64], n: usize, p: usize) -> Result<(), String> {
        HalfTree.check_grid(grid, n, p)
    }
    fn supports(&self, task: Task) -> bool {
        HalfTree.supports(task)
    }
    fn caps(&self, task: Task) -> lossprism::family::Caps {
        HalfTree.caps(task)
    }
    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        out: Out<'_>,
    ) -> Result<(), FitError> {
        HalfTree.fit_predict(input, grid, out)
    }
}

#[test]
fn an_estimator_named_like_a_built_in_family_keeps_its_knob_or_is_refused_when_planned() {
    let opts = PlanOptions::default();
    // `check` and `plot` hold a built-in family's name to its knob, so such a document would be
    // refused after the run; the plan refuses it first, naming the key.
    let e = match harness::plan_with_family(TOY, Arc::new(Named("knn", "max_depth")), &opts) {
        Ok(_) => panic!("a `knn` estimator with the knob `max_depth` was planned"),
        Err(e) => e.to_string(),
    };
    assert!(
        e.contains("model.family") && e.contains("`knn`") && e.contains("`k`"),
        "{e}"
    );
    // Nor may it read the knob the other way (`check` holds the name to its direction too):
    // `knn` with the knob `k` but the default `larger_is_simpler` (false).
    let e = match harness::plan_with_family(TOY, Arc::new(Named("knn", "k")), &opts) {
        Ok(_) => panic!("a `knn` estimator for which larger k is more complex was planned"),
        Err(e) => e.to_string(),
    };
    assert!(
        e.contains("model.family") && e.contains("larger `k` is simpler"),
        "{e}"
    );
    // The same name with the built-in's knob runs, and its document passes `check`'s rules.
    let doc =
        harness::run_with_family_opts(TOY, Arc::new(Named("tree", "max_depth")), &opts, 1).unwrap();
    lossprism::check::validate(&doc).unwrap();
    // So does a name of its own.
    let doc = harness::run_with_family_opts(TOY, Arc::new(Named("half_tree", "depth")), &opts, 1)
        .unwrap();
    lossprism::check::validate(&doc).unwrap();
}
