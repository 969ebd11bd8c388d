//! Error types of the library. Every error is one line that names the file, line, key, column or
//! replicate at fault; `main` maps them to exit codes (2 for bad input, 1 never comes from here).

use std::path::PathBuf;

/// An error in a scenario file: where it is and what is wrong.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{}{}{}", location(.file, .line), key_part(.key), one_line(.message))]
pub struct ScenarioError {
    /// The scenario file as the user named it (`<embedded default>` for the built-in one).
    pub file: String,
    /// 1-based line in the file, when known.
    pub line: Option<usize>,
    /// Dotted key path (`data.truth.formula`), when known.
    pub key: Option<String>,
    /// What is wrong, and where useful how to fix it.
    pub message: String,
}

fn location(file: &str, line: &Option<usize>) -> String {
    let file = one_line(file);
    match line {
        Some(l) => format!("{file}:{l}: "),
        None => format!("{file}: "),
    }
}

fn key_part(key: &Option<String>) -> String {
    match key {
        Some(k) => format!("key `{}`: ", one_line(k)),
        None => String::new(),
    }
}

/// Keeps a message on one line and inert on a terminal: a line break in text it quotes from
/// the user (a family name, a key, a path, a cell) is shown as `\n` (or `\r`), and any other
/// control character (an escape sequence, a bell) as `\u{1b}` and the like.
pub fn one_line(s: &str) -> String {
    if !s.chars().any(char::is_control) {
        return s.to_string();
    }
    let mut out = String::with_capacity(s.len() + 8);
    for c in s.chars() {
        match c {
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            c if c.is_control() => out.extend(c.escape_default()),
            c => out.push(c),
        }
    }
    out
}

/// A path as information lines show it: [`one_line`] of its display, so a file name holding a
/// newline or an escape sequence cannot break or forge the line it is printed on.
pub fn shown(path: impl AsRef<std::path::Path>) -> String {
    one_line(&path.as_ref().display().to_string())
}

/// Any error the library reports.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// The scenario file is malformed or inconsistent.
    #[error(transparent)]
    Scenario(#[from] ScenarioError),
    /// Reading or writing a file failed.
    #[error("{}: {}", one_line(&.path.display().to_string()), one_line(.message))]
    Io {
        /// The file concerned.
        path: PathBuf,
        /// The operating system's message.
        message: String,
    },
    /// A formula produced a value that is not a finite number (or a negative noise level) at a
    /// drawn input.
    #[error("{}", one_line(.0))]
    Data(String),
    /// A model fit failed on a replicate's training set.
    #[error("{}replicate {replicate}: {} fit failed: {}", file_prefix(.file), one_line(.family), one_line(.message))]
    Fit {
        /// The scenario file (empty: not known where the fit ran).
        file: String,
        /// Replicate index (0-based).
        replicate: u64,
        /// Family name.
        family: String,
        /// The family's message.
        message: String,
    },
    /// A request that makes no sense (bad flag value, incompatible documents).
    #[error("{}", one_line(.0))]
    Usage(String),
}

/// `file: ` in front of a message, or nothing for an empty name.
fn file_prefix(file: &str) -> String {
    if file.is_empty() {
        String::new()
    } else {
        format!("{}: ", one_line(file))
    }
}

impl Error {
    /// Builds an I/O error for `path`.
    pub fn io(path: impl Into<PathBuf>, err: &std::io::Error) -> Self {
        let path = path.into();
        // "Not a directory" alone does not say which part of the path is wrong: most often a
        // file name written with a trailing slash, or a file used as a folder on the way.
        // ENOTDIR is 20 on Linux, the BSDs and macOS (`ErrorKind::NotADirectory` is newer than
        // the crate's minimum Rust).
        let not_a_folder = cfg!(unix) && err.raw_os_error() == Some(20);
        let message = if not_a_folder {
            let text = path.to_string_lossy();
            if text.ends_with('/') && std::fs::metadata(text.trim_end_matches('/')).is_ok() {
                "a file name written with a trailing slash, as if it were a folder; drop the \
                 slash"
                    .to_string()
            } else {
                "a part of this path before its last name is a file, not a folder".to_string()
            }
        } else {
            err.to_string()
        };
        Error::Io { path, message }
    }
}

/// Library result type.
pub type Result<T> = std::result::Result<T, Error>;
