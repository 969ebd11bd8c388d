//! The README works when followed top to bottom: every ```toml block is saved under the name its
//! first line gives (`# save as PATH`) and validated, and every ```sh block's commands run in
//! order, in a temporary copy of the repository's `scenarios/` folder, with `lossprism` on the
//! `PATH` (a `cargo run --release --` prefix is the same command; other `cargo` lines, which
//! build or test the crate itself, are skipped). The CI recipe's block is left to
//! `tests/readme_ci.rs`, which runs it twice with a stand-in scenario (its first `check` is meant
//! to fail). The worked example's table is the default scenario's output, digit for digit.

mod common;
use common::{bin, repo, text};

use std::path::Path;
use std::process::Command;

/// A fenced block of the README: its language, first line number and body.
struct Block {
    lang: String,
    line: usize,
    body: String,
    /// Whether the block follows the CI recipe's heading (the next `sh` block after it).
    ci: bool,
}

fn blocks() -> Vec<Block> {
    let readme = std::fs::read_to_string(repo().join("README.md")).unwrap();
    let mut out = Vec::new();
    let mut open: Option<(String, usize, String)> = None;
    let mut after_ci = false;
    for (i, l) in readme.lines().enumerate() {
        match (&mut open, l.strip_prefix("```")) {
            (None, Some(lang)) => open = Some((lang.trim().to_string(), i + 1, String::new())),
            (Some(_), Some(_)) => {
                let (lang, line, body) = open.take().unwrap();
                let ci = after_ci && lang == "sh";
                if ci {
                    after_ci = false;
                }
                out.push(Block {
                    lang,
                    line,
                    body,
                    ci,
                });
            }
            (Some((_, _, body)), None) => {
                body.push_str(l);
                body.push('\n');
            }
            (None, None) => {
                if l.contains("**In a project's CI**") {
                    after_ci = true;
                }
            }
        }
    }
    assert!(open.is_none(), "an unclosed code block in README.md");
    out
}

/// Copies `from` into `to` recursively.
fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap() {
        let e = e.unwrap();
        let t = to.join(e.file_name());
        if e.file_type().unwrap().is_dir() {
            copy_dir(&e.path(), &t);
        } else {
            std::fs::copy(e.path(), t).unwrap();
        }
    }
}

/// The command of a README line, or `None` for a comment, a blank line or a `cargo` line that
/// builds or tests the crate.
fn command(line: &str) -> Option<String> {
    let l = line.split(" #").next().unwrap_or("").trim();
    if l.is_empty() || l.starts_with('#') {
        return None;
    }
    if let Some(rest) = l.strip_prefix("cargo run --release --") {
        return Some(format!("lossprism{rest}"));
    }
    if l.starts_with("cargo ") {
        return None;
    }
    assert!(
        l.starts_with("lossprism "),
        "a README command that is neither lossprism nor cargo: {l}"
    );
    Some(l.to_string())
}

#[test]
fn readme_toml_blocks_validate_and_commands_run_top_to_bottom() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    copy_dir(&repo().join("scenarios"), &d.join("scenarios"));
    let bin_dir = d.join("bin");
    std::fs::create_dir(&bin_dir).unwrap();
    std::os::unix::fs::symlink(bin(), bin_dir.join("lossprism")).unwrap();
    let path = format!(
        "{}:{}",
        bin_dir.display(),
        std::env::var("PATH").unwrap_or_default()
    );
    let sh = |cmd: &str| {
        Command::new("bash")
            .args(["-c", cmd])
            .current_dir(d)
            .env("PATH", &path)
            .env("NO_COLOR", "1")
            .output()
            .unwrap()
    };
    let (mut tomls, mut commands) = (0, 0);
    for b in blocks() {
        match b.lang.as_str() {
            "toml" => {
                let first = b.body.lines().next().unwrap_or("");
                let name = first.strip_prefix("# save as ").unwrap_or_else(|| {
                    panic!(
                        "README line {}: a TOML block must start with `# save as PATH`",
                        b.line
                    )
                });
                std::fs::write(d.join(name.trim()), &b.body).unwrap();
                let out = sh(&format!("lossprism validate {}", name.trim()));
                assert!(
                    out.status.success(),
                    "README line {}: {name} does not validate: {}",
                    b.line,
                    text(&out.stderr)
                );
                tomls += 1;
            }
            "sh" if !b.ci => {
                for (k, l) in b.body.lines().enumerate() {
                    let Some(cmd) = command(l) else { continue };
                    let out = sh(&cmd);
                    assert!(
                        out.status.success(),
                        "README line {}: `{cmd}` exited {:?}: {}",
                        b.line + 1 + k,
                        out.status.code(),
                        text(&out.stderr)
                    );
                    commands += 1;
                }
            }
            _ => {}
        }
    }
    assert!(tomls >= 3, "only {tomls} TOML blocks");
    assert!(commands >= 20, "only {commands} commands");
    // What the commands say they write is there.
    for f in [
        "r.json",
        "curve.svg",
        "points.svg",
        "report.html",
        "curve-linear.svg",
        "mine.json",
        "study.json",
        "learning.svg",
        "heatmap.svg",
        "my-table.json",
        "my-twin.toml",
        "merged.json",
        "resumable.json",
    ] {
        assert!(d.join(f).exists(), "{f} was not written");
    }
    // The shards merge to the unsharded result of the checkpointed run, byte for byte.
    assert_eq!(
        std::fs::read(d.join("merged.json")).unwrap(),
        std::fs::read(d.join("resumable.json")).unwrap()
    );
}

/// The worked example's output block is what `lossprism run` prints, line for line.
#[test]
fn readme_worked_example_is_the_default_output() {
    let b = blocks()
        .into_iter()
        .find(|b| b.lang == "text")
        .expect("the worked example");
    let out = Command::new(bin())
        .arg("run")
        .env("NO_COLOR", "1")
        .output()
        .unwrap();
    assert!(out.status.success());
    let shown: Vec<&str> = b.body.lines().collect();
    let printed = text(&out.stdout);
    let printed: Vec<&str> = printed.lines().collect();
    assert_eq!(
        shown, printed,
        "README worked example differs from `lossprism run`"
    );
}
