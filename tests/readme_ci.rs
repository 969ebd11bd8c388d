//! The README's CI recipe ("In a project's CI") works verbatim: its command block is read from
//! README.md and run top to bottom in a temporary folder holding a copy of the shipped
//! scenarios, with `lossprism` replaced by the built binary.

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

#[test]
fn readme_ci_recipe_runs_verbatim() {
    let cmds = recipe();
    assert_eq!(cmds.len(), 4, "{cmds:?}");
    assert!(cmds.iter().all(|c| c[0] == "lossprism"), "{cmds:?}");
    // The block runs a shipped scenario, followed top to bottom in a copy of the repository's
    // scenarios.
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::create_dir(d.join("scenarios")).unwrap();
    let shipped = repo().join("scenarios");
    for e in std::fs::read_dir(&shipped).unwrap() {
        let p = e.unwrap().path();
        if p.extension().is_some_and(|x| x == "toml") {
            std::fs::copy(&p, d.join("scenarios").join(p.file_name().unwrap())).unwrap();
        }
    }
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
    // In order: the run, --update creating the baseline and its folder, a later CI run whose
    // check finds the same numbers (`identical`, exit 0).
    let codes: Vec<(i32, String, String)> = cmds.iter().map(|c| run(c)).collect();
    assert!(codes.iter().all(|c| c.0 == 0), "{codes:?}");
    let baseline = cmds[1].iter().position(|w| w == "--baseline").unwrap() + 1;
    assert!(d.join(&cmds[1][baseline]).exists());
    assert!(codes[3].1.starts_with("identical"), "{:?}", codes[3]);
    // Without the baseline, the check alone is refused and says to use --update.
    std::fs::remove_file(d.join(&cmds[1][baseline])).unwrap();
    let missing = run(&cmds[3]);
    assert_eq!(missing.0, 2, "{missing:?}");
    assert!(missing.2.contains("--update"), "{missing:?}");
}
