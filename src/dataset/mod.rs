//! The CSV source: loading and typing a table ([`load_csv`] → [`Table`]), the resolved
//! `source = "table"` data ([`TablePlan`]: rows, resampling scheme, locked holdout), the
//! resampling draws ([`resample`]), the noise estimators ([`noise`]) and the choice of the locked
//! holdout rows ([`holdout`]).
//!
//! Typing rules of [`load_csv`] (stated here because users see their consequences):
//! - the first line is a header of column names (a first line made only of numbers is refused);
//! - a cell is *missing* when it is empty or one of `NA`, `N/A`, `NaN`, `nan`, `null`, `?`;
//! - a column is *numeric* when at least half of its non-missing cells parse as finite numbers;
//!   its other cells are then errors (naming column and line) unless `missing = "drop"`;
//! - any other column is *text*: with at most [`MAX_LEVELS`] distinct levels it is one-hot
//!   encoded with the first-appearing level as the baseline (drop-first), otherwise an error;
//! - line numbers are 1-based and count the header as line 1.

pub mod holdout;
pub mod noise;
pub mod resample;

use std::fmt;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use ndarray::{Array1, Array2};

use crate::error::ScenarioError;
use crate::family::Task;

/// Most levels a text feature may have before it is refused (one-hot encoding would explode).
pub const MAX_LEVELS: usize = 20;

/// Most classes a label column may hold when the labels are read from the data (not listed in
/// `[data.classes]`); it must also hold at least 2 rows per class on average ([`load_csv`]).
pub const MAX_CLASSES: usize = 256;

/// Largest table file read (bytes); checked before reading.
pub const MAX_TABLE_BYTES: u64 = 4 << 30;

/// Bytes of memory a loaded table takes per byte of its CSV file, rounded up from a
/// measurement (about 4.5 on a 300 MB table of numbers, 2026-12-03): a table larger than the
/// memory available divided by this is refused before it is read.
pub const TABLE_MEMORY_PER_BYTE: u64 = 5;

/// A reader that fails once more than `cap` bytes have come through (inputs without a size,
/// such as a FIFO, or a file that grows while it is read).
struct Capped<R> {
    inner: R,
    read: u64,
    cap: u64,
}

impl<R: std::io::Read> std::io::Read for Capped<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.read += n as u64;
        if self.read > self.cap {
            return Err(std::io::Error::other(format!(
                "more than {} bytes, more than a table may have here (the byte cap, or the memory available)",
                self.cap
            )));
        }
        Ok(n)
    }
}

/// Most columns a table may have (checked on the header line).
pub const MAX_COLUMNS: usize = 100_000;

/// Cell spellings read as missing.
pub const MISSING_SPELLINGS: [&str; 6] = ["NA", "N/A", "NaN", "nan", "null", "?"];

/// Words that, beside mostly numeric values in a column, read as a missing-value marker (lower
/// case; common spellings, no source): such a column is refused rather than read as text.
const MISSING_LIKE: [&str; 14] = [
    "-", "--", "---", ".", "n/a", "na", "n.a.", "none", "missing", "unknown", "nil", "#n/a", "nd",
    "n.d.",
];

/// What to do with a row whose numeric cell is missing or not a number.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Missing {
    /// Refuse the table, naming column and line (default).
    #[default]
    Error,
    /// Drop the row and report how many were dropped.
    Drop,
}

/// What to do with rows that repeat an earlier row exactly (every used input and the target).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Duplicates {
    /// Keep every row (repeats are separate observations).
    #[default]
    Keep,
    /// Keep each distinct row once, at its first line ([`distinct_rows`]).
    Drop,
}

impl Duplicates {
    /// Parses `keep` or `drop`.
    pub fn from_name(s: &str) -> Option<Duplicates> {
        match s {
            "keep" => Some(Duplicates::Keep),
            "drop" => Some(Duplicates::Drop),
            _ => None,
        }
    }

    /// The name as written in scenario files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            Duplicates::Keep => "keep",
            Duplicates::Drop => "drop",
        }
    }
}

/// The rows of `t` that repeat an earlier row exactly, as `(row, first earlier row with the same
/// inputs and target)` in row order. Values compare as numbers after typing (`1` and `1.0` are
/// equal, and so are `-0` and `0`); a loaded table holds no NaN.
pub fn repeated_rows(t: &Table) -> Vec<(usize, usize)> {
    let key = |i: usize| -> Vec<u64> {
        t.x.row(i)
            .iter()
            .chain(std::iter::once(&t.y[i]))
            .map(|&v| (v + 0.0).to_bits())
            .collect()
    };
    let mut first: std::collections::HashMap<Vec<u64>, usize> =
        std::collections::HashMap::with_capacity(t.rows());
    let mut out = Vec::new();
    for i in 0..t.rows() {
        match first.entry(key(i)) {
            std::collections::hash_map::Entry::Occupied(e) => out.push((i, *e.get())),
            std::collections::hash_map::Entry::Vacant(e) => {
                e.insert(i);
            }
        }
    }
    out
}

/// `t` with each distinct row kept once, at its first line, and how many rows were left out.
/// Copies of a row on both sides of a split let cross-validation and out-of-bag evaluation see
/// the answer, and neighbours at distance 0 with equal responses make a noise estimate too small.
pub fn distinct_rows(t: &Table) -> (Table, usize) {
    let repeats = repeated_rows(t);
    if repeats.is_empty() {
        return (t.clone(), 0);
    }
    let mut keep = vec![true; t.rows()];
    for &(i, _) in &repeats {
        keep[i] = false;
    }
    let idx: Vec<usize> = (0..t.rows()).filter(|&i| keep[i]).collect();
    let mut d = t.select(&idx);
    d.repeats_dropped = t.repeats_dropped + repeats.len();
    (d, repeats.len())
}

/// How the target column is read.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub enum TargetKind {
    /// A numeric response (regression).
    #[default]
    Numeric,
    /// Class labels. `Some(labels)` fixes the labels and their order; `None` takes the target's
    /// distinct values in order of first appearance.
    Classes(Option<Vec<String>>),
}

/// Options of [`load_csv`].
#[derive(Debug, Clone, Default)]
pub struct TableOptions {
    /// Name of the target column.
    pub target: String,
    /// Feature columns in order; `None` takes every column but the target.
    pub features: Option<Vec<String>>,
    /// Missing or non-numeric cells in numeric columns.
    pub missing: Missing,
    /// Regression or classification.
    pub target_kind: TargetKind,
    /// Fewest usable rows accepted (at least 3 is always required).
    pub min_rows: usize,
    /// Rows repeating an earlier row exactly: kept (default) or left out ([`distinct_rows`]).
    pub duplicates: Duplicates,
}

/// How one text feature column was one-hot encoded.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Encoding {
    /// The text column.
    pub column: String,
    /// Its levels in order of first appearance; `levels[0]` is the baseline (no indicator column),
    /// `levels[1..]` each get an indicator column named `column=level`.
    pub levels: Vec<String>,
}

impl Encoding {
    /// One line for the output: `door: one-hot, baseline "closed"; indicators "open"`.
    pub fn describe(&self) -> String {
        let rest: Vec<String> = self.levels[1..]
            .iter()
            .map(|l| format!("\"{l}\""))
            .collect();
        format!(
            "{}: one-hot (drop-first, levels in order of first appearance), baseline \"{}\"; indicators {}",
            self.column,
            self.levels[0],
            if rest.is_empty() {
                "none (a single level)".to_string()
            } else {
                rest.join(", ")
            }
        )
    }
}

/// A typed table: inputs, response, and how it was read.
#[derive(Debug, Clone, PartialEq)]
pub struct Table {
    /// The file read (for messages).
    pub path: PathBuf,
    /// Name of each column of `x` (numeric features by name; indicators as `column=level`).
    pub names: Vec<String>,
    /// Inputs, `rows × names.len()`.
    pub x: Array2<f64>,
    /// Response: a number (regression) or the class index as `f64` (classification).
    pub y: Array1<f64>,
    /// Regression or classification.
    pub task: Task,
    /// Class labels, in class-index order (empty for regression).
    pub labels: Vec<String>,
    /// The target column's name.
    pub target: String,
    /// One-hot encodings of the text features, in feature order.
    pub encodings: Vec<Encoding>,
    /// Rows dropped under `missing = "drop"`.
    pub dropped_rows: usize,
    /// Rows left out because they repeated an earlier row exactly ([`distinct_rows`]).
    pub repeats_dropped: usize,
    /// The file line (1-based, header = 1) of each kept row.
    pub lines: Vec<usize>,
    /// FNV-1a (64 bit) of each kept row's whole record as read (every column, trimmed): the
    /// observation, whichever columns a run uses (the holdout's identity in the ledger, so that
    /// editing `features` or `target` does not restart its count). Empty for tables built in
    /// memory.
    pub records: Vec<u64>,
}

impl Table {
    /// Number of rows.
    pub fn rows(&self) -> usize {
        self.y.len()
    }

    /// FNV-1a (64 bit) of the table as read: its shape, column names, class labels and target
    /// name, and every input and response bit for bit (`fnv1a64:` and 16 hex digits). A run's
    /// fingerprint and a twin's `table_digest` use it.
    pub fn digest(&self) -> String {
        let mut bytes: Vec<u8> = Vec::new();
        bytes.extend_from_slice(&(self.x.nrows() as u64).to_le_bytes());
        bytes.extend_from_slice(&(self.x.ncols() as u64).to_le_bytes());
        for name in self.names.iter().chain(&self.labels).chain([&self.target]) {
            bytes.extend_from_slice(name.as_bytes());
            bytes.push(0);
        }
        for v in self.x.iter().chain(self.y.iter()) {
            bytes.extend_from_slice(&v.to_bits().to_le_bytes());
        }
        format!("fnv1a64:{:016x}", crate::codec::fnv1a64(&bytes))
    }

    /// The rows `idx` as a new table (same columns and encodings).
    pub fn select(&self, idx: &[usize]) -> Table {
        Table {
            path: self.path.clone(),
            names: self.names.clone(),
            x: self.x.select(ndarray::Axis(0), idx),
            y: self.y.select(ndarray::Axis(0), idx),
            task: self.task,
            labels: self.labels.clone(),
            target: self.target.clone(),
            encodings: self.encodings.clone(),
            dropped_rows: self.dropped_rows,
            repeats_dropped: self.repeats_dropped,
            lines: idx.iter().map(|&i| self.lines[i]).collect(),
            records: if self.records.len() == self.rows() {
                idx.iter().map(|&i| self.records[i]).collect()
            } else {
                Vec::new()
            },
        }
    }

    /// [`Table::input_count_words`] with its noun: `1 input`, `31 inputs`, `31 (28 of them
    /// indicators of …) inputs`.
    pub fn inputs_words(&self) -> String {
        if self.x.ncols() == 1 {
            "1 input".to_string()
        } else {
            format!("{} inputs", self.input_count_words())
        }
    }

    /// The number of input columns in words, saying how many are indicators of text columns:
    /// `31 (28 of them indicators of the text columns `site`, `zone`)`, or `31` when none are.
    pub fn input_count_words(&self) -> String {
        let p = self.x.ncols();
        let indicators: usize = self
            .encodings
            .iter()
            .map(|e| e.levels.len().saturating_sub(1))
            .sum();
        if indicators == 0 {
            return p.to_string();
        }
        let cols: Vec<String> = self
            .encodings
            .iter()
            .filter(|e| e.levels.len() > 1)
            .map(|e| format!("`{}`", crate::fmt::clip(&e.column, 60)))
            .collect();
        format!(
            "{p} ({indicators} of them indicators of the text column{} {})",
            if cols.len() == 1 { "" } else { "s" },
            cols.join(", ")
        )
    }
}

/// A table that cannot be used: the file, the line and column when known, and what is wrong.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TableError {
    /// The file as given.
    pub file: String,
    /// 1-based line (header = 1), when the fault is in one line.
    pub line: Option<usize>,
    /// The column at fault, when one is.
    pub column: Option<String>,
    /// What is wrong, and how to fix it where useful.
    pub message: String,
}

impl fmt::Display for TableError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.file)?;
        if let Some(l) = self.line {
            write!(f, ":{l}")?;
        }
        write!(f, ": ")?;
        if let Some(c) = &self.column {
            write!(f, "column `{}`: ", crate::fmt::clip(c, 100))?;
        }
        write!(f, "{}", self.message)
    }
}

impl std::error::Error for TableError {}

impl From<TableError> for ScenarioError {
    fn from(e: TableError) -> Self {
        ScenarioError {
            file: e.file,
            line: e.line,
            key: None,
            message: match e.column {
                Some(c) => format!("column `{c}`: {}", e.message),
                None => e.message,
            },
        }
    }
}

impl From<TableError> for crate::error::Error {
    fn from(e: TableError) -> Self {
        crate::error::Error::Scenario(e.into())
    }
}

fn is_missing(cell: &str) -> bool {
    cell.is_empty() || MISSING_SPELLINGS.contains(&cell)
}

fn number(cell: &str) -> Option<f64> {
    cell.parse::<f64>().ok().filter(|v| v.is_finite())
}

/// Offsets where physical lines start, seen so far and not yet passed, and how many were passed:
/// a line ends at LF, at CRLF (one break) or at a CR alone. Each start carries whether its line
/// is blank (nothing but spaces and tabs), since the CSV reader places a record that follows
/// blank lines at the first of them.
#[derive(Debug, Default)]
struct LineStarts {
    /// Bytes seen.
    offset: u64,
    /// Whether the last byte seen was a CR.
    prev_cr: bool,
    /// Line starts not yet passed by [`LineStarts::line_at`], ascending, with whether the line
    /// is blank as far as seen.
    pending: std::collections::VecDeque<(u64, bool)>,
    /// Line starts passed.
    passed: usize,
    /// Whether the line [`LineStarts::line_at`] last returned is blank (the first line: as far
    /// as seen while it is still the last one).
    current_blank: bool,
    /// Whether anything but spaces and tabs came on the first line (before any break).
    first_has_content: bool,
}

impl LineStarts {
    fn see(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.offset += 1;
            match b {
                // CRLF is one break; the next line is taken to start at its LF, where the CSV
                // reader places a record that follows a CRLF.
                b'\r' => self.pending.push_back((self.offset, true)),
                b'\n' if !self.prev_cr => self.pending.push_back((self.offset, true)),
                b'\n' | b' ' | b'\t' => {}
                _ => match self.pending.back_mut() {
                    Some(last) => last.1 = false,
                    None => self.first_has_content = true,
                },
            }
            self.prev_cr = b == b'\r';
        }
    }

    /// The 1-based physical line holding byte `x`; `x` never decreases between calls.
    fn line_at(&mut self, x: u64) -> usize {
        if self.passed == 0 {
            self.current_blank = !self.first_has_content;
        }
        while let Some(&(_, blank)) = self.pending.front().filter(|p| p.0 <= x) {
            self.pending.pop_front();
            self.passed += 1;
            self.current_blank = blank;
        }
        self.passed + 1
    }

    /// The 1-based physical line of a record the CSV reader places at byte `x`: the first line
    /// at or after `x`'s that is not blank (the reader skips blank lines and places the record
    /// after them at the first: a record after one blank line was named the blank line).
    fn record_line_at(&mut self, x: u64) -> usize {
        self.line_at(x);
        while self.current_blank {
            match self.pending.pop_front() {
                Some((_, blank)) => {
                    self.passed += 1;
                    self.current_blank = blank;
                }
                None => break,
            }
        }
        self.passed + 1
    }
}

/// A reader that feeds every byte it passes to a [`LineStarts`].
struct LineCounter<R> {
    inner: R,
    starts: std::rc::Rc<std::cell::RefCell<LineStarts>>,
}

impl<R: std::io::Read> std::io::Read for LineCounter<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.starts.borrow_mut().see(&buf[..n]);
        Ok(n)
    }
}

/// The likely cause of a cell that spans lines.
const OPEN_QUOTE: &str = "a quote `\"` left open runs on over the lines after it";

/// A CSV reader's error in one line, with its own line number replaced by the physical one.
fn csv_error_text(e: &csv::Error, line: Option<usize>) -> String {
    let text = format!("{e}").replace('\n', " ");
    match (e.position(), line) {
        (Some(p), Some(l)) => text.replace(&format!("line: {}", p.line()), &format!("line: {l}")),
        _ => text,
    }
}

/// Reads and types a CSV file with a header. See the module docs for the typing rules.
pub fn load_csv(path: &Path, opts: &TableOptions) -> Result<Table, TableError> {
    let file = path.display().to_string();
    let err = |line: Option<usize>, column: Option<&str>, message: String| TableError {
        file: file.clone(),
        line,
        column: column.map(str::to_string),
        message,
    };
    // Streamed, never read whole: a malformed record stops the read where it is.
    let meta = std::fs::metadata(path).map_err(|e| err(None, None, format!("cannot read: {e}")))?;
    // Nothing printed may land in the table (standard error opened on it).
    crate::output::register_input(path);
    if meta.is_dir() {
        return Err(err(None, None, "is a folder, not a CSV file".into()));
    }
    {
        use std::os::unix::fs::FileTypeExt;
        let ft = meta.file_type();
        if ft.is_char_device() || ft.is_block_device() || ft.is_socket() {
            return Err(err(
                None,
                None,
                "is a device or a socket, not a CSV file".into(),
            ));
        }
    }
    // What the table may take: the byte cap, lowered so that the loaded table (about
    // TABLE_MEMORY_PER_BYTE bytes of memory per byte of CSV, measured) fits in the memory
    // available.
    let memory_cap = crate::codec::available_memory().map(|a| a / TABLE_MEMORY_PER_BYTE);
    let cap = memory_cap.map_or(MAX_TABLE_BYTES, |m| m.min(MAX_TABLE_BYTES));
    if meta.is_file() && meta.len() > cap {
        return Err(err(
            None,
            None,
            if meta.len() > MAX_TABLE_BYTES {
                format!(
                    "{} bytes, larger than the {MAX_TABLE_BYTES} bytes a table may have",
                    meta.len()
                )
            } else {
                format!(
                    "{} bytes; loaded it would need about {} MiB, more than the {} MiB of memory available",
                    meta.len(),
                    meta.len().saturating_mul(TABLE_MEMORY_PER_BYTE) >> 20,
                    memory_cap.unwrap_or(0).saturating_mul(TABLE_MEMORY_PER_BYTE) >> 20
                )
            },
        ));
    }
    let f =
        crate::codec::open_input(path).map_err(|e| err(None, None, format!("cannot read: {e}")))?;
    // A FIFO has no size: its bytes are counted as they come and the read stops past the cap.
    let f = Capped {
        inner: f,
        read: 0,
        cap,
    };
    // Physical lines counted as the bytes pass (LF, CRLF and CR alike), so that messages and
    // the `line` column name the line an editor shows.
    let line_starts = std::rc::Rc::new(std::cell::RefCell::new(LineStarts::default()));
    let f = LineCounter {
        inner: f,
        starts: line_starts.clone(),
    };
    let mut reader = std::io::BufReader::with_capacity(1 << 16, f);
    let mut skipped: u64 = 0;
    // Skip leading blank space to tell an empty file from a table.
    let mut first = true;
    loop {
        use std::io::BufRead;
        let buf = reader
            .fill_buf()
            .map_err(|e| err(None, None, format!("cannot read: {e}")))?;
        // A byte-order mark first: skipped with the blank lines after it (the header after
        // them was named line 1).
        if std::mem::take(&mut first) && buf.starts_with(&[0xEF, 0xBB, 0xBF]) {
            skipped += 3;
            reader.consume(3);
            continue;
        }
        if buf.is_empty() {
            return Err(err(
                None,
                None,
                "the file is empty; a table needs a header line and data rows".into(),
            ));
        }
        if buf.contains(&0) {
            return Err(err(
                None,
                None,
                "holds binary data (a NUL byte), not a CSV table".into(),
            ));
        }
        match buf.iter().position(|b| !b.is_ascii_whitespace()) {
            Some(pos) => {
                // Whole blank lines before it (of spaces, too) are skipped here: the CSV reader
                // took a line of spaces for the header.
                if let Some(cut) = buf[..pos].iter().rposition(|&b| b == b'\n' || b == b'\r') {
                    skipped += cut as u64 + 1;
                    reader.consume(cut + 1);
                }
                break;
            }
            None => {
                let n = buf.len();
                skipped += n as u64;
                reader.consume(n);
            }
        }
    }
    // The physical line of a byte offset of the CSV reader (which starts after the skipped
    // blank space).
    let line_of = |p: &csv::Position| line_starts.borrow_mut().record_line_at(skipped + p.byte());
    // Flexible: a record whose field count differs from the header's is refused below in our
    // own words (the reader's said "found record with 1 fields" for a line of spaces).
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .trim(csv::Trim::All)
        .from_reader(reader);
    let header_record = rdr.headers().map_err(|e| match e.kind() {
        csv::ErrorKind::Utf8 { .. } => err(
            e.position().map(line_of),
            None,
            "the header is not UTF-8 text (save the file as UTF-8)".into(),
        ),
        _ => err(
            e.position().map(line_of),
            None,
            format!(
                "cannot read the header: {}",
                csv_error_text(&e, e.position().map(line_of))
            ),
        ),
    })?;
    // The header's own physical line (blank lines may come first).
    let header_line = header_record.position().map(line_of).unwrap_or(1);
    let header: Vec<String> = header_record
        .iter()
        .map(|h| crate::fmt::clip(h, 200))
        .collect();
    if header.len() > MAX_COLUMNS {
        return Err(err(
            Some(header_line),
            None,
            format!(
                "the header has {} columns; a table may have at most {MAX_COLUMNS}",
                header.len()
            ),
        ));
    }
    if header.iter().all(|h| number(h).is_some() || h.is_empty()) {
        return Err(err(
            Some(header_line),
            None,
            "no header: the first line must name the columns (it holds numbers or nothing)".into(),
        ));
    }
    for (i, h) in header.iter().enumerate() {
        if h.is_empty() {
            return Err(err(
                Some(header_line),
                None,
                format!("column {} has an empty name", i + 1),
            ));
        }
        if header[..i].contains(h) {
            return Err(err(
                Some(header_line),
                Some(h),
                "appears twice in the header".into(),
            ));
        }
    }
    let col_of = |name: &str, what: &str| -> Result<usize, TableError> {
        header.iter().position(|h| h == name).ok_or_else(|| {
            err(
                Some(header_line),
                None,
                format!(
                    "no {what} column `{name}`; the columns are: {}{}",
                    crate::fmt::clip(&header.join(", "), 300),
                    // One column whose name holds `;` or a tab: another delimiter.
                    match header.as_slice() {
                        [only] if only.contains(';') =>
                            " (the file seems to separate its columns with `;`; lossprism reads commas)",
                        [only] if only.contains('\t') =>
                            " (the file seems to separate its columns with tabs; lossprism reads commas)",
                        _ => "",
                    }
                ),
            )
        })
    };
    if opts.target.is_empty() {
        return Err(err(None, None, "the target column's name is empty".into()));
    }
    let target_col = col_of(&opts.target, "target")?;
    let feature_cols: Vec<usize> = match &opts.features {
        Some(fs) => {
            let mut out = Vec::with_capacity(fs.len());
            for f in fs {
                let c = col_of(f, "feature")?;
                if c == target_col {
                    return Err(err(
                        None,
                        Some(f),
                        "is the target; it cannot also be a feature".into(),
                    ));
                }
                if out.contains(&c) {
                    return Err(err(None, Some(f), "is listed twice in `features`".into()));
                }
                out.push(c);
            }
            out
        }
        None => (0..header.len()).filter(|&c| c != target_col).collect(),
    };
    if feature_cols.is_empty() {
        return Err(err(
            None,
            None,
            "no feature columns: the table needs at least one column besides the target".into(),
        ));
    }

    // Read every record once, with its line, as bytes: only the columns the run uses must be
    // UTF-8 text (a notes column in another encoding that the run never reads was refused; the
    // header line, which names every column, still must be). A UTF-8 cell is trimmed of Unicode
    // white space (U+00A0 too), as the text reader trimmed it; a cell in another encoding keeps
    // its bytes (trimmed of ASCII white space). The record's fingerprint (the holdout ledger's
    // identity of a row) is taken over those cells, so a UTF-8 table keeps the fingerprints it
    // had when every column was read as text.
    let mut cells: Vec<csv::StringRecord> = Vec::new();
    let mut lines: Vec<usize> = Vec::new();
    let mut fingerprints: Vec<u64> = Vec::new();
    for rec in rdr.byte_records() {
        let rec = rec.map_err(|e| {
            let line = e.position().map(line_of);
            err(line, None, csv_error_text(&e, line))
        })?;
        let line = rec.position().map(line_of).unwrap_or(0);
        // Each cell once: its trimmed text, or its bytes when they are not UTF-8.
        let texts: Vec<Result<&str, &[u8]>> = rec
            .iter()
            .map(|b| std::str::from_utf8(b).map(str::trim).map_err(|_| b))
            .collect();
        for &c in feature_cols.iter().chain([&target_col]) {
            if texts.get(c).is_some_and(Result::is_err) {
                return Err(err(
                    Some(line),
                    Some(&header[c]),
                    "is not UTF-8 text (save the file as UTF-8)".into(),
                ));
            }
        }
        let fingerprint = {
            let mut bytes = Vec::new();
            for t in &texts {
                bytes.extend_from_slice(match t {
                    Ok(t) => t.as_bytes(),
                    Err(b) => b,
                });
                bytes.push(0);
            }
            crate::codec::fnv1a64(&bytes)
        };
        let rec: csv::StringRecord = texts
            .iter()
            .map(|t| match t {
                Ok(t) => std::borrow::Cow::Borrowed(*t),
                Err(b) => String::from_utf8_lossy(b),
            })
            .collect();
        if rec.len() <= 1 && rec.iter().all(|c| c.is_empty()) {
            // A blank line, or one of spaces only. A row of empty cells (`,,`) is a row whose
            // every value is missing, and a short one (`"",""`) a row with too few fields: both
            // were skipped without a word.
            continue;
        }
        if rec.len() != header.len() {
            let quote = if rec.iter().any(|c| c.contains(['\n', '\r'])) {
                &format!(" ({OPEN_QUOTE})")
            } else if rec.len() == header.len() + 1 && rec.iter().next_back() == Some("") {
                " (a comma at the end of the line?)"
            } else {
                ""
            };
            return Err(err(
                Some(line),
                None,
                format!(
                    "has {} fields, but the header has {}{quote}",
                    rec.len(),
                    header.len()
                ),
            ));
        }
        // A quote left open in a column the run does not use swallows the records after it
        // into one cell with the right field count (exit 0 with rows lost): a cell holding
        // a line that reads as a record is refused in every column. A line reads as a record
        // when it has the header's field count, every column the run uses is filled, and one
        // of them at least is a number (a quoted address over two lines is not refused).
        let looks_like_record = |cell: &str| {
            cell.split(['\n', '\r']).skip(1).any(|l| {
                let fields: Vec<&str> = l.split(',').map(str::trim).collect();
                let used = || feature_cols.iter().chain([&target_col]).map(|&c| fields[c]);
                fields.len() == header.len()
                    && used().all(|f| !f.is_empty())
                    && used().any(|f| number(f).is_some())
            })
        };
        if let Some(c) = rec.iter().position(looks_like_record) {
            return Err(err(
                Some(line),
                header.get(c).map(String::as_str),
                format!(
                    "holds lines that read as records ({OPEN_QUOTE}, swallowing the rows \
                     below it); close the quote"
                ),
            ));
        }
        cells.push(rec);
        lines.push(line);
        fingerprints.push(fingerprint);
    }
    if cells.is_empty() {
        return Err(err(
            None,
            None,
            "the file has a header but no data rows".into(),
        ));
    }

    // Type the used columns.
    let numeric = |c: usize| -> bool {
        let present: Vec<&str> = cells
            .iter()
            .map(|r| &r[c])
            .filter(|s| !is_missing(s))
            .collect();
        let nums = present.iter().filter(|s| number(s).is_some()).count();
        !present.is_empty() && 2 * nums >= present.len()
    };
    let classify = matches!(opts.target_kind, TargetKind::Classes(_));
    let mut used: Vec<(usize, bool)> = feature_cols.iter().map(|&c| (c, numeric(c))).collect();
    used.push((target_col, classify || numeric(target_col)));
    if cells.iter().all(|r| is_missing(&r[target_col])) {
        return Err(err(
            None,
            Some(&opts.target),
            format!(
                "the target column is empty: every one of its {} cells is missing",
                cells.len()
            ),
        ));
    }
    if !classify && !used.last().map(|u| u.1).unwrap_or(false) {
        return Err(err(
            None,
            Some(&opts.target),
            "the target is not numeric; for class labels add `task = \"classify\"` or [data.classes]"
                .into(),
        ));
    }

    // Row filter: missing or non-numeric cells in numeric columns (and missing text cells).
    let mut keep = vec![true; cells.len()];
    let mut dropped = 0usize;
    for (ri, row) in cells.iter().enumerate() {
        for &(c, is_num) in &used {
            let cell = &row[c];
            // A quote left open in the last column swallows the lines after it into one cell
            // with the right field count: 9 of 30 rows were read, with exit 0.
            if cell.contains(['\n', '\r']) {
                return Err(err(
                    Some(lines[ri]),
                    Some(&header[c]),
                    format!(
                        "holds a line break ({OPEN_QUOTE}, or a text cell spans lines); \
                         lossprism reads one line per cell: close the quote, or leave the \
                         column out with `features`"
                    ),
                ));
            }
            let is_target_label = c == target_col && classify;
            let bad = if is_missing(cell) {
                Some("is missing a value".to_string())
            } else if is_num && !is_target_label && number(cell).is_none() {
                // A number too large for a float parses to infinity: say so.
                let overflows = cell.parse::<f64>().is_ok_and(f64::is_infinite)
                    && cell.chars().any(|ch| ch.is_ascii_digit());
                Some(if overflows {
                    format!(
                        "`{}` is beyond the range of floating-point numbers (about ±1.8e308)",
                        crate::fmt::clip(cell, 60)
                    )
                } else if c == target_col || opts.missing == Missing::Drop {
                    format!(
                        "`{}` is not a number (the column is numeric)",
                        crate::fmt::clip(cell, 60)
                    )
                } else {
                    // A word in an input read as numbers: it may be a real level (floors
                    // `ground`, `1`, `2`), which dropping the rows would lose. Counted only on
                    // the way to the error (counting for every dropped row was quadratic).
                    let filled: Vec<&str> = cells
                        .iter()
                        .map(|r| &r[c][..])
                        .filter(|v| !is_missing(v))
                        .collect();
                    let nums = filled.iter().filter(|v| number(v).is_some()).count();
                    format!(
                        "`{}` is not a number (the column is numeric: {nums} of its {} filled \
                         cells are numbers; a column is text when fewer than half are); if the \
                         column is a category, spell its levels as words (`f1`, `f2`, …) and it \
                         is one-hot encoded",
                        crate::fmt::clip(cell, 60),
                        filled.len()
                    )
                })
            } else {
                None
            };
            if let Some(why) = bad {
                match opts.missing {
                    Missing::Error => {
                        return Err(err(
                            Some(lines[ri]),
                            Some(&header[c]),
                            format!("{why}; fix the cell or set `missing = \"drop\"` in [data]"),
                        ))
                    }
                    Missing::Drop => {
                        keep[ri] = false;
                        dropped += 1;
                        break;
                    }
                }
            }
        }
    }
    let rows: Vec<usize> = (0..cells.len()).filter(|&i| keep[i]).collect();
    let min_rows = opts.min_rows.max(3);
    if rows.len() < min_rows {
        return Err(err(
            None,
            None,
            format!(
                "only {} usable row{}{}; at least {min_rows} are needed",
                rows.len(),
                if rows.len() == 1 { "" } else { "s" },
                if dropped > 0 {
                    format!(" after dropping {dropped}")
                } else {
                    String::new()
                }
            ),
        ));
    }

    // Build the feature matrix.
    let mut names = Vec::new();
    let mut encodings = Vec::new();
    let mut columns: Vec<Vec<f64>> = Vec::new();
    for &(c, is_num) in &used[..used.len() - 1] {
        if is_num {
            names.push(header[c].clone());
            columns.push(
                rows.iter()
                    .map(|&r| number(&cells[r][c]).unwrap_or(f64::NAN))
                    .collect(),
            );
        } else {
            let mut levels: Vec<String> = Vec::new();
            for &r in &rows {
                let v = &cells[r][c];
                if !levels.iter().any(|l| l == v) {
                    if levels.len() == MAX_LEVELS {
                        return Err(err(
                            Some(lines[r]),
                            Some(&header[c]),
                            format!(
                                "is a text column with more than {MAX_LEVELS} distinct values; \
                                 one-hot encoding takes at most {MAX_LEVELS}: leave it out of `features` \
                                 or recode it as numbers"
                            ),
                        ));
                    }
                    levels.push(v.to_string());
                }
            }
            // Mostly numbers beside a word: the word is likely a missing-value marker (`-`,
            // `n/a`, `missing`), and read as text every number became a category of its own,
            // with exit 0.
            // Only a word that reads as a missing value counts: a real category beside a few
            // numeric levels (`ground`, `1`, `2` floors) is read as text, as before.
            let numeric_levels = levels.iter().filter(|l| number(l).is_some()).count();
            let missing_word = levels
                .iter()
                .find(|l| MISSING_LIKE.contains(&l.to_ascii_lowercase().as_str()));
            if let (true, Some(word)) = (
                levels.len() >= 3 && 2 * numeric_levels > levels.len(),
                missing_word,
            ) {
                let word = word.clone();
                let first = rows
                    .iter()
                    .find(|&&r| cells[r][c] == word)
                    .map(|&r| lines[r]);
                return Err(err(
                    first,
                    Some(&header[c]),
                    format!(
                        "{numeric_levels} of its {} distinct values are numbers, beside the text \
                         `{}`: read as a text column, each number would be a category of its \
                         own. If `{}` marks a missing value, write it as an empty cell or NA \
                         (and set `missing = \"drop\"`); if the numbers are category codes, spell \
                         them as words (`c1`, `c2`, …); or leave the column out of `features`",
                        levels.len(),
                        crate::fmt::clip(&word, 40),
                        crate::fmt::clip(&word, 40)
                    ),
                ));
            }
            for l in &levels[1..] {
                names.push(format!("{}={l}", header[c]));
                columns.push(
                    rows.iter()
                        .map(|&r| if &cells[r][c] == l.as_str() { 1.0 } else { 0.0 })
                        .collect(),
                );
            }
            encodings.push(Encoding {
                column: header[c].clone(),
                levels,
            });
        }
    }
    // An indicator's name `column=level` can be another column's name (a header `c=B` beside
    // a text column `c` with a level `B`): two inputs of one name could not be told apart in
    // outputs or in `--input NAME=VALUE`.
    let mut seen = std::collections::HashSet::new();
    for a in &names {
        let why = if *a == opts.target {
            "is the target's name and also an input's, the one-hot indicator of a text column's \
             level; rename the target column"
        } else if seen.insert(a.as_str()) {
            continue;
        } else if header.contains(a) {
            "appears twice among the inputs: it is a column and also the one-hot indicator of a \
             text column's level; rename the column"
        } else {
            "appears twice among the inputs: the one-hot indicators (`column=level`) of two text \
             columns get this name; rename one of the columns"
        };
        return Err(err(Some(header_line), Some(a), why.into()));
    }
    let n = rows.len();
    let p = columns.len();
    if p == 0 {
        return Err(err(
            None,
            None,
            "the features give no input columns (text features with a single level only)".into(),
        ));
    }
    let mut x = Array2::<f64>::zeros((n, p));
    for (j, col) in columns.iter().enumerate() {
        for (i, v) in col.iter().enumerate() {
            x[[i, j]] = *v;
        }
    }

    // The target.
    let (y, task, labels) = match &opts.target_kind {
        TargetKind::Numeric => {
            let y: Vec<f64> = rows
                .iter()
                .map(|&r| number(&cells[r][target_col]).unwrap_or(f64::NAN))
                .collect();
            if y.iter().all(|v| *v == y[0]) {
                return Err(err(
                    None,
                    Some(&opts.target),
                    format!(
                        "the target is constant ({}); there is nothing to decompose",
                        y[0]
                    ),
                ));
            }
            (Array1::from(y), Task::Regress, Vec::new())
        }
        TargetKind::Classes(given) => {
            let mut labels: Vec<String> = given.clone().unwrap_or_default();
            // Labels read from the data that are numbers, with the first line of each: `1` and
            // `1.0` would otherwise be two classes.
            let mut numeric: Vec<(f64, usize)> = Vec::new();
            let mut y = Vec::with_capacity(n);
            for &r in &rows {
                let v = &cells[r][target_col];
                let k = match labels.iter().position(|l| l == v) {
                    Some(k) => k,
                    None if given.is_none() => {
                        if labels.len() == MAX_CLASSES {
                            return Err(err(
                                Some(lines[r]),
                                Some(&opts.target),
                                format!(
                                    "more than {MAX_CLASSES} distinct labels: a classification \
                                     target has at most {MAX_CLASSES} classes; is the target \
                                     continuous? drop `task = \"classify\"` (or list the labels \
                                     in [data.classes])"
                                ),
                            ));
                        }
                        if let Some(x) = number(v) {
                            if let Some(&(_, k)) = numeric.iter().find(|(u, _)| *u == x) {
                                return Err(err(
                                    Some(lines[r]),
                                    Some(&opts.target),
                                    format!(
                                        "label `{}` is the number of label `{}` written another \
                                         way, so they would be two classes; write each class \
                                         one way",
                                        crate::fmt::clip(v, 60),
                                        crate::fmt::clip(&labels[k], 60)
                                    ),
                                ));
                            }
                            numeric.push((x, labels.len()));
                        }
                        labels.push(v.to_string());
                        labels.len() - 1
                    }
                    None => {
                        return Err(err(
                            Some(lines[r]),
                            Some(&opts.target),
                            format!(
                                "label `{}` is not one of [data.classes] labels: {}",
                                crate::fmt::clip(v, 60),
                                crate::fmt::clip(&labels.join(", "), 200)
                            ),
                        ))
                    }
                };
                y.push(k as f64);
            }
            let distinct = {
                let mut seen = vec![false; labels.len()];
                y.iter().for_each(|&k| seen[k as usize] = true);
                seen.iter().filter(|&&s| s).count()
            };
            if distinct < 2 {
                return Err(err(
                    None,
                    Some(&opts.target),
                    "the target is constant (a single class); there is nothing to classify".into(),
                ));
            }
            if labels.len() < 2 {
                return Err(err(
                    None,
                    Some(&opts.target),
                    "needs at least 2 class labels".into(),
                ));
            }
            let k = labels.len();
            if given.is_none() && 2 * k > n {
                return Err(err(
                    None,
                    Some(&opts.target),
                    format!(
                        "{k} distinct labels in {n} rows: a classification target needs at least \
                         2 rows per class on average (at most {} classes here); is the target \
                         continuous? drop `task = \"classify\"` (or list the labels in \
                         [data.classes])",
                        n / 2
                    ),
                ));
            }
            (Array1::from(y), Task::Classify { classes: k }, labels)
        }
    };

    let table = Table {
        path: path.to_path_buf(),
        names,
        x,
        y,
        task,
        labels,
        target: opts.target.clone(),
        encodings,
        dropped_rows: dropped,
        repeats_dropped: 0,
        lines: rows.iter().map(|&r| lines[r]).collect(),
        records: rows.iter().map(|&r| fingerprints[r]).collect(),
    };
    if opts.duplicates == Duplicates::Keep {
        return Ok(table);
    }
    let (distinct, left_out) = distinct_rows(&table);
    if distinct.rows() < min_rows {
        return Err(err(
            None,
            None,
            format!(
                "only {} distinct rows after leaving out {left_out} that repeat an earlier row \
                 exactly (`duplicates = \"drop\"`); at least {min_rows} are needed",
                distinct.rows()
            ),
        ));
    }
    Ok(distinct)
}

/// The resampling scheme of a table decomposition.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Scheme {
    /// n rows drawn with replacement; evaluation out-of-bag.
    Bootstrap,
    /// `fraction` of the rows drawn without replacement; evaluation on the rest.
    Subsample {
        /// Training fraction, in (0, 1).
        fraction: f64,
    },
}

/// The expected share of distinct rows among `draws` rows drawn with replacement from `rows`:
/// `rows (1 − (1 − 1/rows)^draws) / draws` (each row is missed by all draws with probability
/// `(1 − 1/rows)^draws`), `1 − (1 − 1/n)^n` for a bootstrap of n rows.
pub fn distinct_share(draws: usize, rows: usize) -> f64 {
    let (d, r) = (draws.max(1) as f64, rows.max(1) as f64);
    r * (1.0 - (1.0 - 1.0 / r).powf(d)) / d
}

impl Scheme {
    /// Training rows per replicate out of `n` working rows.
    pub fn train_size(&self, n: usize) -> usize {
        match self {
            Scheme::Bootstrap => n,
            Scheme::Subsample { fraction } => {
                ((fraction * n as f64).round() as usize).clamp(1, n.saturating_sub(1).max(1))
            }
        }
    }

    /// Name as written in scenario files.
    pub fn name(&self) -> &'static str {
        match self {
            Scheme::Bootstrap => "bootstrap",
            Scheme::Subsample { fraction } if *fraction == 0.5 => "half",
            Scheme::Subsample { .. } => "subsample",
        }
    }

    /// The known distortion the scheme carries, in one or two sentences.
    pub fn note(&self, n: usize) -> String {
        match self {
            Scheme::Bootstrap => {
                let distinct = distinct_share(n, n);
                format!(
                    "bootstrap: each training set draws {n} rows with replacement and holds about {:.1}% distinct rows \
                     (1 - (1 - 1/n)^n), so each row is out-of-bag in about {:.1}% of replicates; a model sees fewer \
                     distinct points than n, which tends to inflate variance and bias relative to fresh samples of size n",
                    100.0 * distinct,
                    100.0 * (1.0 - distinct)
                )
            }
            Scheme::Subsample { .. } => {
                let m = self.train_size(n);
                format!(
                    "subsampling {m} of {n} rows without replacement: training sets overlap, which scales the variance \
                     of a mean by about (1 - m/N) = {:.3} (finite population correction, Cochran, Sampling Techniques), \
                     so variance is understated relative to independent samples of size {m}",
                    1.0 - m as f64 / n as f64
                )
            }
        }
    }
}

/// The resolved `[data]` section of a table scenario.
#[derive(Debug, Clone)]
pub struct TablePlan {
    /// The whole table (holdout rows included).
    pub table: Arc<Table>,
    /// Resampling scheme.
    pub scheme: Scheme,
    /// Holdout fraction as written (0 = none).
    pub holdout_fraction: f64,
    /// Row indices of the locked holdout (sorted).
    pub holdout: Vec<usize>,
    /// Row indices the decomposition uses (sorted; everything not in the holdout).
    pub work: Vec<usize>,
    /// Noise estimator.
    pub noise_method: noise::Method,
    /// Several training sizes (a learning curve): each replicate draws a random order of the
    /// working rows; size n trains on the first n rows and is evaluated on the rest.
    pub sizes: Option<Vec<usize>>,
    /// The file as the scenario writes it (relative to the scenario's folder): what results
    /// and fingerprints record, so that a run does not depend on the folder it was started
    /// from. `None` for a plan made without a scenario.
    pub written: Option<String>,
}

impl TablePlan {
    /// The file as results record it: [`TablePlan::written`], else the path it was read from.
    pub fn recorded_path(&self) -> String {
        self.written
            .clone()
            .unwrap_or_else(|| self.table.path.display().to_string())
    }

    /// Training rows per replicate (the largest size of a learning curve).
    pub fn train_size(&self) -> usize {
        match &self.sizes {
            Some(s) => *s.last().expect("at least one size"),
            None => self.scheme.train_size(self.work.len()),
        }
    }

    /// The known distortion of the resampling, in one or two sentences.
    pub fn note(&self) -> String {
        match &self.sizes {
            None => self.scheme.note(self.work.len()),
            Some(sizes) => {
                let n = self.work.len();
                let factors: Vec<String> = sizes
                    .iter()
                    .map(|&m| format!("{m}: {:.3}", 1.0 - m as f64 / n as f64))
                    .collect();
                format!(
                    "learning curve on a table: each replicate orders the {n} working rows at random; size m trains on \
                     the first m rows (without replacement) and is evaluated on the other {n} − m. Training sets \
                     overlap, which scales the variance of a mean by about (1 − m/N) (finite population correction, \
                     Cochran, Sampling Techniques): {}; so variance is understated, most at the largest sizes",
                    factors.join(", ")
                )
            }
        }
    }

    /// The working rows (not the holdout) as a table.
    pub fn work_table(&self) -> Table {
        self.table.select(&self.work)
    }
}

/// Options read from a `[data]` section with `source = "table"`, already checked for syntax.
/// [`crate::scenario::Plan::from_spec`] builds this from the spec and calls [`plan_table`].
#[derive(Debug, Clone)]
pub struct TableRequest {
    /// The CSV file, resolved against the scenario's folder.
    pub path: PathBuf,
    /// Loader options.
    pub options: TableOptions,
    /// Resampling scheme.
    pub scheme: Scheme,
    /// Holdout fraction in [0, 0.9].
    pub holdout: f64,
    /// Noise estimator (`None` chooses [`noise::default_method`]: GSJS with one input, the Gamma
    /// test otherwise).
    pub noise_method: Option<noise::Method>,
    /// Seed of the holdout stream (the file's seed, so `--seed` does not move the holdout).
    pub holdout_seed: u64,
}

/// Loads the table and locks the holdout.
pub fn plan_table(req: &TableRequest) -> Result<TablePlan, TableError> {
    let table = load_csv(&req.path, &req.options)?;
    let holdout = holdout::choose(&table, req.holdout, req.holdout_seed);
    let mut is_h = vec![false; table.rows()];
    holdout.iter().for_each(|&i| is_h[i] = true);
    let work: Vec<usize> = (0..table.rows()).filter(|&i| !is_h[i]).collect();
    let file = req.path.display().to_string();
    if work.len() >= 4 && req.scheme.train_size(work.len()) < 2 {
        return Err(TableError {
            file,
            line: None,
            column: None,
            message: format!(
                "a training set of the {} rows outside the holdout would hold {} row ({}); at \
                 least 2 are needed: raise `train_fraction`",
                work.len(),
                req.scheme.train_size(work.len()),
                match req.scheme {
                    Scheme::Subsample { fraction } => format!("train_fraction = {fraction}"),
                    Scheme::Bootstrap => "bootstrap".into(),
                }
            ),
        });
    }
    if work.len() < 4 {
        return Err(TableError {
            file,
            line: None,
            column: None,
            message: format!(
                "only {} outside the holdout; at least 4 are needed for a resampling decomposition",
                match work.len() {
                    1 => "1 row".to_string(),
                    n => format!("{n} rows"),
                }
            ),
        });
    }
    let noise_method = req
        .noise_method
        .unwrap_or(noise::default_method(table.x.ncols()));
    // The scenario names the estimator only in `data.noise_estimator`; the default is never
    // refused.
    let chosen_by = if req.noise_method.is_some() {
        "`data.noise_estimator`: "
    } else {
        ""
    };
    if noise_method == noise::Method::Gsjs && table.x.ncols() != 1 {
        return Err(TableError {
            file,
            line: None,
            column: None,
            message: format!(
                "{}the GSJS noise estimator needs exactly one input column; this table has {} ({}); use `nn`, `gamma` or `plane`",
                chosen_by,
                table.x.ncols(),
                table.names.join(", ")
            ),
        });
    }
    if noise_method == noise::Method::Plane && table.x.ncols() > noise::PLANE_MAX_INPUTS {
        return Err(TableError {
            file,
            line: None,
            column: None,
            message: format!(
                "{}the plane noise estimator runs on at most {} input columns; this table has {}; use `nn` or `gamma`",
                chosen_by,
                noise::PLANE_MAX_INPUTS,
                table.input_count_words()
            ),
        });
    }
    Ok(TablePlan {
        table: Arc::new(table),
        scheme: req.scheme,
        holdout_fraction: req.holdout,
        holdout,
        work,
        noise_method,
        sizes: None,
        written: None,
    })
}

#[cfg(test)]
mod tests {
    use std::io::Read;

    #[test]
    fn a_capped_reader_fails_past_its_cap_and_not_before() {
        let data = [b'a'; 100];
        let mut ok = super::Capped {
            inner: &data[..],
            read: 0,
            cap: 100,
        };
        let mut out = Vec::new();
        assert_eq!(ok.read_to_end(&mut out).unwrap(), 100);
        let mut over = super::Capped {
            inner: &data[..],
            read: 0,
            cap: 99,
        };
        let e = over.read_to_end(&mut Vec::new()).unwrap_err();
        assert!(e.to_string().contains("more than 99 bytes"), "{e}");
    }
}
