//! The README's CI recipe ("In a project's CI") works verbatim: its command block is read from
//! README.md and run in a temporary folder, with `lossprism` replaced by the built binary and a
//! small scenario in place of `scenarios/my-model.toml`.

mod common;
use common::{bin, repo, text};

use std::process::Command;

/// The commands of the first `sh` block after the CI heading, comments dropped.
fn recipe() -> Vec<Vec<String>> {
    let readme = std::fs::read_to_string(repo().join("README.md")).unwrap();
    let at = readme
        .find("**In a project's CI**")
        .expect("the README has the CI recipe");
    let block = &readme[at..];
    let start = block.find("```sh\n").expect("an sh block") + "```sh\n".len();
    let end = start + block[start..].find("```").expect("the block ends");
    block[start..end]
        .lines()
        .map(|l| l.split(" #").next().unwrap_or("").trim())
        .filter(|l| !l.is_empty() && !l.starts_with('#'))
        .map(|l| l.split_whitespace().map(str::to_string).collect())
        .collect()
}

/// A small invented scenario standing in for the project's own.
const SCENARIO: &str = r#"
name = "my-model"
seed = 3
replicates = 16

[data]
source = "synthetic"
train_size = 40
eval_size = 30

[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]

[data.truth]
formula = "sin(6 * x)"

[data.noise]
sd = 0.5

[model]
family = "knn"
grid = [1, 3, 9]
"#;

#[test]
fn readme_ci_recipe_runs_verbatim() {
    let cmds = recipe();
    assert_eq!(cmds.len(), 3, "{cmds:?}");
    assert!(cmds.iter().all(|c| c[0] == "lossprism"), "{cmds:?}");
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::create_dir(d.join("scenarios")).unwrap();
    std::fs::write(d.join("scenarios/my-model.toml"), SCENARIO).unwrap();
    let run = |c: &[String]| {
        let out = Command::new(bin())
            .args(&c[1..])
            .current_dir(d)
            .env("NO_COLOR", "1")
            .output()
            .unwrap();
        (
            out.status.code().unwrap_or(-1),
            text(&out.stdout),
            text(&out.stderr),
        )
    };
    // First time: the run succeeds, the check finds no baseline (exit 2, saying to use
    // --update), and --update creates it together with its folder.
    let codes: Vec<(i32, String, String)> = cmds.iter().map(|c| run(c)).collect();
    assert_eq!(codes[0].0, 0, "{:?}", codes[0]);
    assert_eq!(codes[1].0, 2, "{:?}", codes[1]);
    assert!(codes[1].2.contains("--update"), "{:?}", codes[1]);
    assert_eq!(codes[2].0, 0, "{:?}", codes[2]);
    assert!(d.join("baselines/my-model.json").exists());
    // Every later CI run: the same numbers, so `identical` and exit 0 throughout.
    let codes: Vec<(i32, String, String)> = cmds.iter().map(|c| run(c)).collect();
    assert!(codes.iter().all(|c| c.0 == 0), "{codes:?}");
    assert!(codes[1].1.starts_with("identical"), "{:?}", codes[1]);
}
