//! Helpers shared by the integration tests: running the binary, writing fixtures, and the
//! assertions every command-line test makes (exit code 2, one line on standard error, no panic).
#![allow(dead_code)]

pub mod stats;

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

/// The `lossprism` binary built for these tests.
pub fn bin() -> &'static str {
    env!("CARGO_BIN_EXE_lossprism")
}

/// The repository root.
pub fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Runs the binary with `args` in folder `cwd` (colour off).
pub fn lossprism(cwd: &Path, args: &[&str]) -> Output {
    Command::new(bin())
        .args(args)
        .current_dir(cwd)
        .env("NO_COLOR", "1")
        .output()
        .expect("the lossprism binary starts")
}

/// Runs the binary and returns (exit code, stdout, stderr).
pub fn run3(cwd: &Path, args: &[&str]) -> (i32, String, String) {
    let out = lossprism(cwd, args);
    (
        out.status.code().unwrap_or(-1),
        text(&out.stdout),
        text(&out.stderr),
    )
}

/// Bytes as text (lossy).
pub fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

/// Writes `body` to `dir/name` and returns the name (relative to `dir`).
pub fn put(dir: &Path, name: &str, body: &str) -> String {
    fs::write(dir.join(name), body).expect("write fixture");
    name.to_string()
}

/// The binary did not panic.
pub fn no_panic(out: &Output) {
    let all = format!("{}{}", text(&out.stdout), text(&out.stderr));
    assert!(
        !all.contains("panicked") && !all.contains("RUST_BACKTRACE"),
        "the binary panicked:\n{all}"
    );
}

/// Exit code 2, nothing on stdout, and stderr exactly one non-empty line starting with
/// `error:` that contains every `needle`. Returns that line.
pub fn assert_bad(out: &Output, needles: &[&str]) -> String {
    no_panic(out);
    let err = text(&out.stderr);
    assert_eq!(
        out.status.code(),
        Some(2),
        "expected exit code 2; stderr:\n{err}"
    );
    assert!(
        out.stdout.is_empty(),
        "nothing should go to stdout on error, got:\n{}",
        text(&out.stdout)
    );
    let lines: Vec<&str> = err.lines().collect();
    assert_eq!(
        lines.len(),
        1,
        "stderr must be exactly one line, got:\n{err}"
    );
    let line = lines[0];
    assert!(
        line.starts_with("error:") && line.len() > "error:".len() + 1,
        "stderr must start with `error:` and say something, got: {line}"
    );
    for n in needles {
        assert!(
            line.contains(n),
            "error line must contain `{n}`, got: {line}"
        );
    }
    line.to_string()
}
