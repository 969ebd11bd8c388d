//! Scenario files: `spec` is exactly what the user wrote (serde), `plan` is the validated,
//! expanded form the engine executes (grids expanded, families built, defaults filled); `table`,
//! `twin` and `audit` plan those sections.

pub mod audit;
pub mod plan;
pub mod spec;
pub mod table;
pub mod twin;

pub use plan::{Design, GridKind, ModelPlan, Plan, PlanOptions, Source, SyntheticPlan};

use crate::error::{Error, ScenarioError};
use std::path::Path;

/// The embedded default scenario (an invented orchard), run by `lossprism run` with no file.
pub const DEFAULT_SCENARIO: &str = include_str!("../../scenarios/orchard-yield.toml");

/// Name shown in messages for the embedded default scenario.
pub const DEFAULT_NAME: &str = "<embedded default: orchard-yield>";

/// Parses scenario text. `file` is only used in error messages.
pub fn parse(src: &str, file: &str) -> Result<spec::ScenarioSpec, ScenarioError> {
    toml::from_str::<spec::ScenarioSpec>(src).map_err(|e| {
        let line = e.span().map(|s| line_of(src, s.start));
        let mut message =
            crate::fmt::shorten_quoted_numbers(&e.message().trim().replace('\n', " "));
        // The parser says nothing, or "expected newline", where a line holds a bare carriage
        // return or a control character (its message was empty: "error: s.toml:1: ").
        if let Some(why) = e.span().and_then(|sp| odd_character(src, sp.start)) {
            message = why;
        } else if message.is_empty() {
            message = "the TOML parser refused the file here".into();
        } else if message.starts_with("number too large to fit in target type") {
            // The span holds only the first digit; say what the limit is instead.
            message = "number too large: whole numbers in a scenario go up to \
                       9223372036854775807 (2^63 − 1)"
                .into();
        } else if message.contains("duplicate key `model`") {
            // Sweep 70: the parser's words alone did not say what to do.
            message = format!(
                "{message}: a scenario has either one `[model]` table or several `[[model]]` \
                 tables (double brackets), each family in its own"
            );
        } else if let Some(span) = e.span() {
            if let Some(text) = src.get(span.clone()) {
                let text = text.lines().next().unwrap_or("").trim();
                if !text.is_empty() && text.len() < 80 && !message.contains(text) {
                    message = format!("{message} (at `{text}`)");
                }
            }
        }
        ScenarioError {
            file: file.to_string(),
            line,
            key: e.span().and_then(|s| key_path_at(src, s.start)),
            message,
        }
    })
}

/// What is wrong with the line holding byte `offset` when it holds a carriage return that
/// does not end a CRLF line ending, or a control character other than a tab: TOML allows
/// neither, and the parser's own message does not say so.
fn odd_character(src: &str, offset: usize) -> Option<String> {
    let offset = offset.min(src.len());
    let start = src[..offset].rfind('\n').map_or(0, |i| i + 1);
    let end = src[offset..].find('\n').map_or(src.len(), |i| offset + i);
    let line = &src[start..end];
    // A CRLF line ends in one CR before its LF; the last line has no LF to pair with.
    let body = if end < src.len() {
        line.strip_suffix('\r').unwrap_or(line)
    } else {
        line
    };
    if body.contains('\r') {
        return Some(
            "a carriage return without a line feed (CR-only line endings, or a stray CR); save \
             the file with LF (or CRLF) line endings"
                .into(),
        );
    }
    // The C0 controls but the tab, and DEL: TOML allows the C1 controls (U+0080–U+009F) in
    // comments and strings.
    body.chars()
        .find(|c| matches!(c, '\0'..='\x08' | '\x0a'..='\x1f' | '\x7f'))
        .map(|c| {
            format!(
                "control character U+{:04X} is not allowed in TOML, even in a comment or a \
                 string; remove it",
                c as u32
            )
        })
}

/// The dotted key path of the `key = value` line holding byte `offset` (`model.depth`), with the
/// nearest table header above it; `None` when the line is not a key line.
pub fn key_path_at(src: &str, offset: usize) -> Option<String> {
    let offset = offset.min(src.len());
    let start = src[..offset].rfind('\n').map_or(0, |i| i + 1);
    let line = src[start..].lines().next().unwrap_or("");
    // A table header (`[data.noise.extra]`, `[[model]]`): its own dotted path (sweep 70: an
    // unknown table was reported without it).
    let head = line.split('#').next().unwrap_or("").trim();
    if head.starts_with('[') && !head.contains('=') {
        let path = head
            .trim_start_matches('[')
            .split(']')
            .next()
            .unwrap_or("")
            .trim();
        let plain = |c: char| c.is_ascii_alphanumeric() || c == '_' || c == '-' || c == '.';
        return (!path.is_empty() && path.chars().all(plain)).then(|| path.to_string());
    }
    let (key, _) = line.split_once('=')?;
    let key = key.trim().trim_matches('"');
    if key.is_empty()
        || !key
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-' || c == '.')
    {
        return None;
    }
    let header = src[..start].lines().rev().find_map(|l| {
        let t = l.trim();
        if t.starts_with('[') {
            Some(
                t.trim_start_matches('[')
                    .split(']')
                    .next()
                    .unwrap_or("")
                    .trim()
                    .to_string(),
            )
        } else {
            None
        }
    });
    Some(match header {
        Some(h) if !h.is_empty() => format!("{h}.{key}"),
        _ => key.to_string(),
    })
}

/// Largest scenario file read (bytes): far above any hand-written file or a 100 000-input one.
pub const MAX_SCENARIO_BYTES: u64 = 64 << 20;

/// Reads a scenario file's text: refused on its size (also while reading a device or a pipe),
/// on binary data and on text that is not UTF-8, before it is parsed.
pub fn read_text(path: &Path) -> Result<String, Error> {
    crate::codec::read_document(
        path,
        MAX_SCENARIO_BYTES,
        "scenario file (TOML)",
        &crate::codec::any_text,
    )
}

/// Loads, parses and plans a scenario file.
pub fn load(path: &Path, opts: &PlanOptions) -> Result<Plan, Error> {
    let src = read_text(path)?;
    let file = path.display().to_string();
    let spec = parse(&src, &file)?;
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    Ok(Plan::from_spec(&spec, &src, &file, &base, opts)?)
}

/// Plans the embedded default scenario.
pub fn load_default(opts: &PlanOptions) -> Result<Plan, Error> {
    let spec = parse(DEFAULT_SCENARIO, DEFAULT_NAME)?;
    Ok(Plan::from_spec(
        &spec,
        DEFAULT_SCENARIO,
        DEFAULT_NAME,
        Path::new("."),
        opts,
    )?)
}

/// 1-based line where key `key` of `[data]` is given: its own table header (`[data.key]`,
/// `[[data.key]]`, `[data.key.sub]`), a `key = ...` line inside `[data]`, or a dotted
/// `data.key = ...` / `key.sub = ...`; `key` may itself be dotted (`truth.formula`: the
/// `formula = ...` line of `[data.truth]`). `None` when not found (an inline table, say). For
/// messages about a key, which should point at the key and not at `source`.
pub fn data_key_line(src: &str, key: &str) -> Option<usize> {
    let mut section = String::new();
    for (i, raw) in src.lines().enumerate() {
        let l = raw.trim();
        if l.starts_with('[') {
            let name: String = l
                .trim_start_matches('[')
                .split(']')
                .next()
                .unwrap_or("")
                .chars()
                .filter(|c| !c.is_whitespace() && *c != '"')
                .collect();
            let full = format!("data.{key}");
            if name == full || name.starts_with(&format!("{full}.")) {
                return Some(i + 1);
            }
            section = name;
            continue;
        }
        let Some((k, _)) = l.split_once('=') else {
            continue;
        };
        let k: String = k
            .chars()
            .filter(|c| !c.is_whitespace() && *c != '"')
            .collect();
        // The key's full dotted name in this section.
        let name = if section.is_empty() {
            k
        } else {
            format!("{section}.{k}")
        };
        let full = format!("data.{key}");
        if name == full || name.starts_with(&format!("{full}.")) {
            return Some(i + 1);
        }
    }
    None
}

/// `e` pointed at the line where key `key` of `[data]` is given ([`data_key_line`]), when found.
pub fn at_data_key(mut e: ScenarioError, src: &str, key: &str) -> ScenarioError {
    if let Some(l) = data_key_line(src, key) {
        e.line = Some(l);
    }
    e
}

/// 1-based line number of a byte offset.
pub fn line_of(src: &str, offset: usize) -> usize {
    let end = offset.min(src.len());
    src.as_bytes()[..end]
        .iter()
        .filter(|&&b| b == b'\n')
        .count()
        + 1
}

#[cfg(test)]
mod tests {
    use super::data_key_line;

    #[test]
    fn a_data_key_is_found_at_its_own_line() {
        let src = "name = \"x\"\n[data]\nsource = \"table\"\nreference = { k = 3 }\nnoise.sd = 1\n\n[data.truth]\nformula = \"x\"\n[[data.inputs]]\nname = \"a\"\n[model]\nnoise = 2\n";
        assert_eq!(data_key_line(src, "reference"), Some(4));
        assert_eq!(data_key_line(src, "noise"), Some(5));
        assert_eq!(data_key_line(src, "truth"), Some(7));
        assert_eq!(data_key_line(src, "inputs"), Some(9));
        // A key inside a `[data]` sub-table, by its dotted name.
        assert_eq!(data_key_line(src, "truth.formula"), Some(8));
        assert_eq!(data_key_line(src, "truth.sd"), None);
        // A key of another table, or a longer key that starts the same, is not it.
        assert_eq!(data_key_line(src, "formula"), None);
        assert_eq!(data_key_line(src, "nois"), None);
        assert_eq!(data_key_line("data.jitter = 1\n", "jitter"), Some(1));
    }
}
