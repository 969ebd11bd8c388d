//! The layer table of DEVELOPERS.md, enforced: every `crate::` path in `src/**/*.rs` must point
//! to a module of the same layer or a lower one, and the top-level modules must not import each
//! other in a cycle.

use std::collections::{BTreeMap, BTreeSet};
use std::fs;
use std::path::Path;

/// The layers, lowest first, and the top-level modules each holds (as in DEVELOPERS.md).
const LAYERS: &[(&str, &[&str])] = &[
    (
        "leaves",
        &[
            "error",
            "expr",
            "rng",
            "fmt",
            "codec",
            "output",
            "family",
            "decompose",
        ],
    ),
    ("data", &["dgp", "dataset"]),
    ("plan", &["scenario"]),
    ("engine", &["runner"]),
    ("output", &["report", "check", "shard"]),
    ("front", &["harness", "commands", "progress", "cli", "main"]),
];

fn layer_of(module: &str) -> Option<usize> {
    LAYERS.iter().position(|(_, m)| m.contains(&module))
}

/// The top-level module a source file belongs to (`src/family/tree.rs` → `family`).
fn module_of(path: &Path, src: &Path) -> String {
    let rel = path.strip_prefix(src).expect("under src");
    let first = rel.components().next().expect("a component");
    let name = first.as_os_str().to_string_lossy();
    name.trim_end_matches(".rs").to_string()
}

fn rust_files(dir: &Path, out: &mut Vec<std::path::PathBuf>) {
    for e in fs::read_dir(dir).expect("reads src") {
        let p = e.expect("entry").path();
        if p.is_dir() {
            rust_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(p);
        }
    }
}

/// Every `crate::NAME` used in the file's code (comments and doc comments skipped), plus
/// `super::`-free imports are within the module by construction.
fn crate_refs(text: &str) -> BTreeSet<String> {
    let mut out = BTreeSet::new();
    // Comments stripped, lines joined: a `use crate::{…}` group may span lines.
    let code: String = text
        .lines()
        .map(|line| match line.find("//") {
            Some(i) => &line[..i],
            None => line,
        })
        .collect::<Vec<_>>()
        .join(" ");
    let mut rest = code.as_str();
    while let Some(i) = rest.find("crate::") {
        let after = &rest[i + "crate::".len()..];
        if let Some(group) = after.strip_prefix('{') {
            // `crate::{a, b::{c, d}, e}`: the first name of each top-level item.
            let mut depth = 0usize;
            let mut item_start = true;
            for (j, c) in group.char_indices() {
                match c {
                    '{' => depth += 1,
                    '}' if depth == 0 => break,
                    '}' => depth -= 1,
                    ',' if depth == 0 => item_start = true,
                    c if item_start && (c.is_ascii_alphanumeric() || c == '_') => {
                        let name: String = group[j..]
                            .chars()
                            .take_while(|c| c.is_ascii_alphanumeric() || *c == '_')
                            .collect();
                        if name != "self" {
                            out.insert(name);
                        }
                        item_start = false;
                    }
                    _ => {}
                }
            }
        } else {
            let name: String = after
                .chars()
                .take_while(|c| c.is_ascii_alphanumeric() || *c == '_')
                .collect();
            if !name.is_empty() {
                out.insert(name);
            }
        }
        rest = after;
    }
    out
}

/// The scanner reads groups over several lines and nested groups by their first names.
#[test]
fn crate_references_are_read_from_multi_line_and_nested_groups() {
    let text = "use crate::{\n    fmt,\n    report::{self, ResultDoc}, // note crate::x\n    runner,\n};\nlet e = crate::error::Error::Usage;";
    let got: Vec<String> = crate_refs(text).into_iter().collect();
    assert_eq!(got, ["error", "fmt", "report", "runner"]);
}

#[test]
fn dependencies_point_down_the_layer_table_and_form_no_cycle() {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut files = Vec::new();
    rust_files(&src, &mut files);
    files.sort();
    assert!(files.len() > 20, "found only {} source files", files.len());
    let mut edges: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    let mut wrong: Vec<String> = Vec::new();
    for f in &files {
        let from = module_of(f, &src);
        if from == "lib" {
            continue;
        }
        let Some(lf) = layer_of(&from) else {
            wrong.push(format!(
                "{}: module `{from}` is in no layer; add it to DEVELOPERS.md and this test",
                f.display()
            ));
            continue;
        };
        let text = fs::read_to_string(f).expect("reads source");
        for to in crate_refs(&text) {
            if to == from {
                continue;
            }
            let Some(lt) = layer_of(&to) else {
                // `crate::Error` and similar re-exports at the crate root.
                if to.chars().next().is_some_and(char::is_uppercase) {
                    continue;
                }
                wrong.push(format!("{}: `crate::{to}` is in no layer", f.display()));
                continue;
            };
            if lt > lf {
                wrong.push(format!(
                    "{}: `{from}` ({}) uses `{to}` ({}), a higher layer",
                    f.display(),
                    LAYERS[lf].0,
                    LAYERS[lt].0
                ));
            }
            edges.entry(from.clone()).or_default().insert(to);
        }
    }
    assert!(
        wrong.is_empty(),
        "layering violations:\n{}",
        wrong.join("\n")
    );

    // No cycle among top-level modules (depth-first search).
    fn visit(
        n: &str,
        edges: &BTreeMap<String, BTreeSet<String>>,
        state: &mut BTreeMap<String, u8>,
        path: &mut Vec<String>,
    ) -> Option<Vec<String>> {
        match state.get(n) {
            Some(1) => {
                let i = path.iter().position(|p| p == n).unwrap_or(0);
                let mut c = path[i..].to_vec();
                c.push(n.to_string());
                return Some(c);
            }
            Some(2) => return None,
            _ => {}
        }
        state.insert(n.to_string(), 1);
        path.push(n.to_string());
        for m in edges.get(n).into_iter().flatten() {
            if let Some(c) = visit(m, edges, state, path) {
                return Some(c);
            }
        }
        path.pop();
        state.insert(n.to_string(), 2);
        None
    }
    let mut state = BTreeMap::new();
    for n in edges.keys() {
        if let Some(c) = visit(n, &edges, &mut state, &mut Vec::new()) {
            panic!("import cycle: {}", c.join(" -> "));
        }
    }
}

#[test]
fn the_scanner_sees_use_groups_and_skips_comments() {
    let refs = crate_refs(
        "use crate::{runner, report::terminal};\n// crate::commands in a comment\nlet x = crate::fmt::fmt_num(1.0);",
    );
    let want: BTreeSet<String> = ["runner", "report", "fmt"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    assert_eq!(refs, want);
}
