//! Property-based tests of every reader of outside input: the formula parser, the scenario
//! loader (parse and plan), the CSV loader, the part/checkpoint codec and the external
//! process's answer lines. Each gets 10 000 generated inputs; none may panic or hang, and each
//! gives either a value or an error of one line.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::Command;

use lossprism::dataset::{self, Missing, TableOptions, TargetKind};
use lossprism::expr::Formula;
use lossprism::family::external::{parse_head, parse_ready, parse_row};
use lossprism::report::part::PartDoc;
use lossprism::scenario::{self, Plan, PlanOptions};
use lossprism::shard;
use proptest::prelude::*;
use proptest::test_runner::{Config, TestRunner};

/// 10 000 cases each, no shrinking time wasted on persistence files.
fn config() -> Config {
    Config {
        cases: 10_000,
        failure_persistence: None,
        ..Config::with_cases(10_000)
    }
}

/// A scratch folder in memory where the machine has one (`/dev/shm`): the file-based readers
/// are fed 10 000 files each, which a disk makes slow.
fn scratch() -> tempfile::TempDir {
    let shm = Path::new("/dev/shm");
    if shm.is_dir() {
        if let Ok(d) = tempfile::Builder::new()
            .prefix("lossprism-fuzz")
            .tempdir_in(shm)
        {
            return d;
        }
    }
    tempfile::tempdir().unwrap()
}

/// An error message is one non-empty line.
fn one_line(msg: &str) -> Result<(), TestCaseError> {
    prop_assert!(!msg.trim().is_empty(), "empty error message");
    prop_assert!(!msg.contains('\n'), "message of several lines: {msg}");
    prop_assert!(msg.len() < 4000, "message of {} bytes", msg.len());
    Ok(())
}

const FORMULA_TOKENS: &[&str] = &[
    "x",
    "y",
    "z",
    "pi",
    "e",
    "1",
    "0",
    "2.5",
    "1e308",
    "1e-320",
    ".5",
    "5.",
    "1e",
    "+",
    "-",
    "*",
    "/",
    "^",
    "(",
    ")",
    ",",
    "<",
    "<=",
    "==",
    "!=",
    ">",
    "=",
    "sin",
    "exp",
    "ln",
    "min",
    "max",
    "atan2",
    "if",
    "logistic",
    "sqrt",
    " ",
    "é",
    "\u{0}",
    "@",
    "[",
    "99999999999999999999",
];

fn formula_text() -> impl Strategy<Value = String> {
    prop_oneof![
        prop::collection::vec(prop::sample::select(FORMULA_TOKENS), 0..40).prop_map(|t| t.concat()),
        "\\PC{0,60}",
        // Deep nesting: refused, never a stack overflow.
        (1usize..400).prop_map(|d| format!("{}x{}", "(".repeat(d), ")".repeat(d))),
        (1usize..400).prop_map(|d| format!("{}x", "-".repeat(d))),
        (1usize..300).prop_map(|d| vec!["x"; d].join("^")),
    ]
}

#[test]
fn formula_parser_never_panics() {
    let mut runner = TestRunner::new(config());
    runner
        .run(&formula_text(), |src| {
            match Formula::parse(&src, &["x", "y", "z"]) {
                Ok(f) => {
                    // Evaluation is total: a number (possibly NaN or infinite), never a panic.
                    let _ = f.eval(&[0.5, -1.0, 2.0]);
                }
                Err(e) => one_line(&e.to_string())?,
            }
            Ok(())
        })
        .unwrap();
}

const BASE_SCENARIO: &str = r#"name = "fuzz"
seed = 3
replicates = 4
blocks = 2

[data]
source = "synthetic"
train_size = 20
eval_size = 10
design = "random"

[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]

[[data.inputs]]
name = "z"
normal = [0.0, 1.0]

[data.truth]
formula = "x + z^2"

[data.noise]
sd = 0.5

[model]
family = "tree"
grid = [1, 2, 3]

[loss]
kind = "squared"
"#;

const VALUES: &[&str] = &[
    "0",
    "-1",
    "1",
    "2",
    "1e308",
    "-1e308",
    "nan",
    "inf",
    "\"\"",
    "\"x\"",
    "\"é\"",
    "[]",
    "[1]",
    "[1, 2]",
    "[-1e308, 1e308]",
    "[2, 1]",
    "{ from = 1, to = 3 }",
    "{ log = [0.001, 10], count = 3 }",
    "{ from = 1, to = 1e9 }",
    "true",
    "\"knn\"",
    "\"poly\"",
    "\"ridge\"",
    "\"table\"",
    "\"twin\"",
    "\"zero_one\"",
    "\"log_loss\"",
    "\"poisson\"",
    "\"fixed\"",
    "9223372036854775807",
    "18446744073709551616",
    "\"1/0\"",
    "\"x/0\"",
    "\"exp(1000*x)\"",
];

const KEYS: &[&str] = &[
    "name",
    "seed",
    "replicates",
    "blocks",
    "source",
    "train_size",
    "eval_size",
    "design",
    "uniform",
    "normal",
    "even",
    "formula",
    "sd",
    "sd_formula",
    "family",
    "grid",
    "kind",
    "fit_seeds",
    "k",
    "standardize",
    "eval",
    "builtin",
];

/// One edit of the base scenario: replace a line's value, delete a line, insert `key = value`,
/// or insert a raw fragment.
#[derive(Debug, Clone)]
enum Edit {
    Value(usize, &'static str),
    Delete(usize),
    Insert(usize, &'static str, &'static str),
    Raw(usize, String),
}

fn edits() -> impl Strategy<Value = Vec<Edit>> {
    let edit = prop_oneof![
        (0usize..40, prop::sample::select(VALUES)).prop_map(|(l, v)| Edit::Value(l, v)),
        (0usize..40).prop_map(Edit::Delete),
        (
            0usize..40,
            prop::sample::select(KEYS),
            prop::sample::select(VALUES)
        )
            .prop_map(|(l, k, v)| Edit::Insert(l, k, v)),
        (0usize..40, "\\PC{0,20}").prop_map(|(l, s)| Edit::Raw(l, s)),
    ];
    prop::collection::vec(edit, 0..5)
}

fn apply(edits: &[Edit]) -> String {
    let mut lines: Vec<String> = BASE_SCENARIO.lines().map(str::to_string).collect();
    for e in edits {
        let n = lines.len().max(1);
        match e {
            Edit::Value(l, v) => {
                let l = l % n;
                if let Some((k, _)) = lines[l].split_once('=') {
                    lines[l] = format!("{k}= {v}");
                }
            }
            Edit::Delete(l) => {
                if !lines.is_empty() {
                    lines.remove(l % n);
                }
            }
            Edit::Insert(l, k, v) => lines.insert(l % (n + 1), format!("{k} = {v}")),
            Edit::Raw(l, s) => lines.insert(l % (n + 1), s.clone()),
        }
    }
    lines.join("\n")
}

#[test]
fn scenario_loader_never_panics() {
    let dir = scratch();
    let base = dir.path().to_path_buf();
    let mut runner = TestRunner::new(config());
    runner
        .run(&edits(), |e| {
            let src = apply(&e);
            match scenario::parse(&src, "fuzz.toml") {
                Ok(spec) => {
                    match Plan::from_spec(&spec, &src, "fuzz.toml", &base, &PlanOptions::default())
                    {
                        Ok(plan) => {
                            prop_assert!(plan.replicates >= 2);
                            prop_assert!(!plan.models.is_empty());
                        }
                        Err(err) => one_line(&err.to_string())?,
                    }
                }
                Err(err) => one_line(&err.to_string())?,
            }
            Ok(())
        })
        .unwrap();
}

const CELLS: &[&str] = &[
    "1",
    "0",
    "-2.5",
    "1e300",
    "1e400",
    "inf",
    "-inf",
    "NaN",
    "NA",
    "",
    "?",
    "abc",
    "b",
    "x y",
    "\"q,uoted\"",
    "\"",
    "1,5",
    "é",
    " 3 ",
    "0x10",
    "1e-320",
];

fn table_text() -> impl Strategy<Value = (String, bool, bool)> {
    (
        1usize..5,
        0usize..12,
        prop::collection::vec(prop::sample::select(CELLS), 60),
        any::<bool>(),
        any::<bool>(),
        any::<bool>(),
    )
        .prop_map(|(cols, rows, cells, header_y, classify, drop)| {
            let mut names: Vec<String> = (0..cols).map(|c| format!("c{c}")).collect();
            if header_y {
                names.push("y".into());
            }
            let width = names.len();
            let mut text = names.join(",");
            text.push('\n');
            let mut it = cells.iter().cycle();
            for _ in 0..rows {
                let row: Vec<&str> = (0..width).map(|_| *it.next().unwrap()).collect();
                text.push_str(&row.join(","));
                text.push('\n');
            }
            (text, classify, drop)
        })
}

#[test]
fn csv_loader_never_panics() {
    let dir = scratch();
    let path = dir.path().join("t.csv");
    let mut runner = TestRunner::new(config());
    runner
        .run(&table_text(), |(text, classify, drop)| {
            fs::write(&path, &text).unwrap();
            let opts = TableOptions {
                target: "y".into(),
                features: None,
                missing: if drop { Missing::Drop } else { Missing::Error },
                target_kind: if classify {
                    TargetKind::Classes(None)
                } else {
                    TargetKind::Numeric
                },
                min_rows: 3,
                duplicates: if drop {
                    dataset::Duplicates::Drop
                } else {
                    dataset::Duplicates::Keep
                },
            };
            match dataset::load_csv(&path, &opts) {
                Ok(t) => {
                    prop_assert!(t.rows() >= 3);
                    prop_assert!(t.x.iter().all(|v| v.is_finite()));
                    prop_assert!(t.y.iter().all(|v| v.is_finite()));
                }
                Err(e) => one_line(&e.to_string())?,
            }
            Ok(())
        })
        .unwrap();
}

/// A finished one-shard part of a tiny run, written by the binary.
fn part_fixture(dir: &Path) -> PathBuf {
    fs::write(dir.join("s.toml"), BASE_SCENARIO).unwrap();
    let out = Command::new(env!("CARGO_BIN_EXE_lossprism"))
        .args(["run", "s.toml", "--shard", "1/1", "--out", "p.json", "-q"])
        .current_dir(dir)
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    dir.join("p.json")
}

/// A byte-level mutation of a document: overwrite, delete or insert bytes, or truncate.
#[derive(Debug, Clone)]
enum Mutation {
    Set(usize, u8),
    Delete(usize, usize),
    Insert(usize, Vec<u8>),
    Truncate(usize),
}

fn mutations() -> impl Strategy<Value = Vec<Mutation>> {
    let interesting = prop::sample::select(vec![
        b'0', b'9', b'a', b'f', b'"', b',', b':', b'{', b'}', b'[', b']', b'-', b'.', b'e', b' ',
        0u8, 0xff,
    ]);
    let m = prop_oneof![
        (any::<usize>(), interesting).prop_map(|(i, b)| Mutation::Set(i, b)),
        (any::<usize>(), 1usize..30).prop_map(|(i, n)| Mutation::Delete(i, n)),
        (any::<usize>(), prop::collection::vec(any::<u8>(), 1..8))
            .prop_map(|(i, b)| Mutation::Insert(i, b)),
        any::<usize>().prop_map(Mutation::Truncate),
    ];
    prop::collection::vec(m, 1..4)
}

fn mutate(bytes: &[u8], ms: &[Mutation]) -> Vec<u8> {
    let mut b = bytes.to_vec();
    for m in ms {
        let n = b.len().max(1);
        match m {
            Mutation::Set(i, v) => {
                if !b.is_empty() {
                    b[i % n] = *v;
                }
            }
            Mutation::Delete(i, k) => {
                let s = i % n;
                let e = (s + k).min(b.len());
                if s < e {
                    b.drain(s..e);
                }
            }
            Mutation::Insert(i, v) => {
                let s = i % (b.len() + 1);
                b.splice(s..s, v.iter().copied());
            }
            Mutation::Truncate(i) => b.truncate(i % n),
        }
    }
    b
}

#[test]
fn part_reader_never_accepts_a_damaged_part() {
    let dir = scratch();
    let good = part_fixture(dir.path());
    let bytes = fs::read(&good).unwrap();
    let path = dir.path().join("m.json");
    let mut runner = TestRunner::new(config());
    runner
        .run(&mutations(), |ms| {
            let damaged = mutate(&bytes, &ms);
            fs::write(&path, &damaged).unwrap();
            match shard::read_part(&path) {
                // Only a change that leaves the content equal (blank space) may be accepted.
                Ok(doc) => {
                    let original: PartDoc = serde_json::from_slice(&bytes).unwrap();
                    prop_assert_eq!(
                        serde_json::to_string(&doc).unwrap(),
                        serde_json::to_string(&original).unwrap()
                    );
                }
                Err(e) => one_line(&e.to_string())?,
            }
            Ok(())
        })
        .unwrap();
}

/// Damaged accumulators behind a valid checksum: the decoder and the accumulator validation
/// must refuse them (or, when the damage happens to be harmless, merge to finite numbers).
#[test]
fn part_decoder_refuses_damaged_accumulators() {
    let dir = scratch();
    let good = part_fixture(dir.path());
    let doc: serde_json::Value = serde_json::from_slice(&fs::read(&good).unwrap()).unwrap();
    let path = dir.path().join("d.json");
    let strings: Vec<String> = {
        // Every string in the completed blocks (base64 arrays, names).
        let mut v = Vec::new();
        fn walk(x: &serde_json::Value, out: &mut Vec<String>, at: String) {
            match x {
                serde_json::Value::String(_) | serde_json::Value::Number(_) => out.push(at),
                serde_json::Value::Array(a) => {
                    for (i, y) in a.iter().enumerate() {
                        walk(y, out, format!("{at}/{i}"));
                    }
                }
                serde_json::Value::Object(o) => {
                    for (k, y) in o {
                        walk(y, out, format!("{at}/{k}"));
                    }
                }
                _ => {}
            }
        }
        walk(&doc["completed"], &mut v, "/completed".into());
        v
    };
    assert!(!strings.is_empty());
    let replacement = prop_oneof![
        "[A-Za-z0-9+/=]{0,40}".prop_map(serde_json::Value::String),
        any::<i64>().prop_map(serde_json::Value::from),
        any::<f64>().prop_map(serde_json::Value::from),
        Just(serde_json::Value::Null),
    ];
    let mut runner = TestRunner::new(Config {
        // A merge plans the embedded scenario: a few milliseconds each.
        cases: 10_000,
        ..config()
    });
    runner
        .run(
            &(0..strings.len(), replacement, any::<usize>(), any::<u8>()),
            |(which, value, pos, byte)| {
                let mut d = doc.clone();
                let at = &strings[which];
                let target = d.pointer_mut(at).unwrap();
                // Either replace the value, or flip one character of a string in place.
                match (target.as_str().map(str::to_string), pos % 2) {
                    (Some(s), 0) if !s.is_empty() => {
                        let mut b = s.into_bytes();
                        let i = pos % b.len();
                        b[i] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/="
                            [byte as usize % 65];
                        *target = serde_json::Value::String(String::from_utf8(b).unwrap());
                    }
                    _ => *target = value,
                }
                let mut typed: PartDoc = match serde_json::from_value(d) {
                    Ok(t) => t,
                    Err(_) => return Ok(()), // the typed reader refuses it; covered above
                };
                typed.checksum = shard::checksum(&typed);
                fs::write(&path, shard::part_json(&typed)).unwrap();
                match shard::merge(std::slice::from_ref(&path), None) {
                    Ok(m) => {
                        for s in &m.outcome.summaries {
                            for row in &s.values {
                                prop_assert!(row.iter().all(|v| v.is_finite()));
                            }
                        }
                    }
                    Err(e) => one_line(&e.to_string())?,
                }
                Ok(())
            },
        )
        .unwrap();
}

fn answer_line() -> impl Strategy<Value = String> {
    let tok = prop::sample::select(vec![
        "ok",
        "error",
        "pred",
        "prob",
        "ready",
        "1",
        "2",
        "3",
        "0.5",
        "-0",
        "nan",
        "inf",
        "1e999",
        "1e-999",
        "x",
        "",
        " ",
        "\t",
        "é",
        "\u{0}",
        "17",
        "99999999999999999999",
    ]);
    prop_oneof![
        prop::collection::vec(tok, 0..30).prop_map(|t| t.join(" ")),
        "\\PC{0,80}",
    ]
}

#[test]
fn external_answer_reader_never_panics() {
    let mut runner = TestRunner::new(config());
    runner
        .run(
            &(answer_line(), 0usize..40, any::<u64>()),
            |(line, want, id)| {
                match parse_ready(&line) {
                    Ok(v) => prop_assert!(v == 1 || v == 2),
                    Err(e) => one_line(&e)?,
                }
                match parse_head(&line, id % 4) {
                    Ok(_) => prop_assert!(line.split_ascii_whitespace().nth(1).is_some()),
                    Err(e) => one_line(&e)?,
                }
                let mut out = vec![f64::NAN; want];
                for tag in ["pred", "prob"] {
                    match parse_row(&line, tag, &mut out) {
                        Ok(()) => prop_assert!(out.iter().all(|v| v.is_finite())),
                        Err(e) => one_line(&e.to_string())?,
                    }
                }
                Ok(())
            },
        )
        .unwrap();
}
