//! Writing a command's output files without ever destroying data.
//!
//! This module owns every decision about *where* and *how* lossprism writes an output:
//!
//! - **Checks before any work.** Each output path is resolved (symlinks followed, existing paths
//!   canonicalized, a new file's folder canonicalized and its name appended) and compared with
//!   every input the command reads and with every other output, by path and, for existing files,
//!   by device and inode, so other spellings, symlinks and hard links are caught. Its folder
//!   must exist and accept new files, and it must not be a folder. A clash is a one-line
//!   [`Error::Usage`] naming both flags.
//! - **Regular files are all-or-nothing.** Every regular-file output is staged in a temporary
//!   file beside its target, then all are renamed over their targets. The old content of each
//!   target is kept aside (a hard link, or a copy where links are unsupported) until the whole
//!   commit has succeeded; if anything fails, targets already renamed get their old content back
//!   and new ones are removed. Temporary and backup names carry the process id and a counter, and
//!   are removed on every path out of [`Outputs::commit`]. This holds within one process: two
//!   processes writing the same files at once each rename their own set, and the last rename
//!   of each file wins (no lock is taken on the user's folders: a `flock DIR lossprism ...`
//!   wrapper, common on clusters, would then wait on itself).
//! - **Everything else is written in place.** An existing target that is not a regular file (a
//!   character or block device, a FIFO, a descriptor under `/proc` such as `/dev/stdout`) is
//!   opened for writing without creation or truncation and never replaced. A FIFO nobody reads
//!   is an immediate error (it is opened non-blocking), and a reader that stops reading is given
//!   up on after a bounded wait. Sockets are refused. `-` is standard output (one output at most)
//!   and is written last.
//!
//! Commands register their inputs and outputs in an [`Outputs`] as soon as the flags are parsed
//! (so bad paths fail before a long run), then hand the bytes to [`Outputs::commit`], which
//! checks again because the file system may have changed meanwhile. [`write_one`] does both for a
//! single output.

use std::ffi::{OsStr, OsString};
use std::fs::{self, File, Metadata, OpenOptions};
use std::io::{self, Write};
use std::path::{Component, Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

use crate::error::Error;

/// How long a stream output (FIFO, device, pipe) may accept nothing before the write gives up.
#[cfg(not(test))]
const STALL_LIMIT: Duration = Duration::from_secs(60);
#[cfg(test)]
const STALL_LIMIT: Duration = Duration::from_millis(300);

/// The start of a holdout ledger's format tag. A ledger counts the looks at a holdout, so no
/// output but the ledger's own update ([`LEDGER_OUTPUT`]) may replace a file holding it,
/// whatever the scenario that names it (a scenario reached through a link or another name
/// had its ledger replaced by a result document).
pub const LEDGER_TAG: &str = "lossprism-holdout-ledger/";

/// The flag under which the holdout assessment writes its ledger.
pub const LEDGER_OUTPUT: &str = "ledger";

/// The flag a checkpoint is written under: its rewrites after each block are not the run's
/// outputs ([`committed`]).
pub const CHECKPOINT_OUTPUT: &str = "--checkpoint";

/// Symlink hops followed before a path is declared a loop (Linux's own limit).
const MAX_LINKS: usize = 40;

/// Source of the per-process counter in temporary, backup and probe names.
static NEXT_SIDE_NAME: AtomicU64 = AtomicU64::new(0);
/// Source of [`Outputs`] identities, so an [`OutputId`] cannot be used with another set.
static NEXT_SET: AtomicU64 = AtomicU64::new(0);

/// Handle to one output registered with [`Outputs::output`]; pass it back to
/// [`Outputs::commit`] together with that output's bytes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct OutputId {
    set: u64,
    index: usize,
}

/// The files one command reads and writes, checked together before any work and written
/// together at the end.
///
/// Register inputs first: [`Outputs::output`] compares a new output with the inputs and outputs
/// registered so far, while [`Outputs::check`] and [`Outputs::commit`] compare everything. A file
/// that a command reads and then rewrites on purpose (an updated ledger, say) is registered as an
/// output only.
#[derive(Debug)]
pub struct Outputs {
    set: u64,
    inputs: Vec<(String, PathBuf)>,
    outputs: Vec<Target>,
}

/// What a path refers to, for clash detection.
#[derive(Debug, Clone, Default)]
struct Ident {
    /// The resolved path (symlinks followed), when the path has one.
    path: Option<PathBuf>,
    /// Device and inode, when the file exists.
    file: Option<(u64, u64)>,
}

impl Ident {
    fn same(&self, other: &Ident) -> bool {
        (self.path.is_some() && self.path == other.path)
            || (self.file.is_some() && self.file == other.file)
    }
}

/// What an output holds, so that an existing file is replaced only by its own kind: a picture
/// pointed at the scenario or the table a result was made from (which `plot` cannot know) was
/// written over it, exit 0.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// Anything (a checkpoint, a part): no check of what it replaces.
    Any,
    /// A CSV table (`--csv`, `--points`): replaces anything but a lossprism JSON document (a
    /// result, part, checkpoint or holdout ledger), which a table written over it would lose.
    Csv,
    /// An SVG picture: replaces only a file starting `<svg`, or `<?xml` with an `<svg` soon after.
    Svg,
    /// A result or part document: replaces only a file of either format, and not a checkpoint
    /// (other JSON files, a configuration say, are often some program's input).
    Json,
    /// An HTML report: replaces only a file starting `<!doctype html` or `<html`.
    Html,
    /// A twin scenario (`lossprism twin --out`): replaces only a scenario whose data section says
    /// `source = "twin"` (a script, a result or the table scenario beside it were replaced).
    Twin,
}

impl Kind {
    /// A non-empty file starting `head` may be replaced by this kind.
    fn accepts(self, head: &[u8]) -> bool {
        let text = String::from_utf8_lossy(head);
        let t = text
            .trim_start_matches('\u{feff}')
            .trim_start()
            .to_ascii_lowercase();
        match self {
            Kind::Any => true,
            _ if t.is_empty() => true,
            // A JSON object that names a lossprism format anywhere in its first 4 MiB: the
            // format need not come first (`jq -S` sorts it after `best`), and a table never
            // starts with `{`.
            Kind::Csv => !(t.starts_with('{') && t.contains("\"lossprism-")),
            Kind::Svg => {
                // An XML declaration, comments and a doctype may come before the element.
                let mut rest = t.as_str();
                loop {
                    rest = rest.trim_start();
                    let end = if rest.starts_with("<?xml") {
                        rest.find("?>").map(|i| i + 2)
                    } else if rest.starts_with("<!--") {
                        rest.find("-->").map(|i| i + 3)
                    } else if rest.starts_with("<!doctype") {
                        rest.find('>').map(|i| i + 1)
                    } else {
                        break;
                    };
                    match end {
                        Some(i) => rest = &rest[i..],
                        None => return false,
                    }
                }
                rest.starts_with("<svg")
            }
            // A result or part as lossprism writes it, `format` first (a file that merely
            // mentions the tag, or a configuration, is not one), and not a checkpoint: the
            // saved state of a run that may be resumed.
            Kind::Json => {
                let compact = compact_json(&t);
                (compact.starts_with("{\"format\":\"lossprism-result/")
                    || compact.starts_with("{\"format\":\"lossprism-part/"))
                    && !compact.contains(CHECKPOINT_FLAG)
            }
            Kind::Html => t.starts_with("<!doctype html") || t.starts_with("<html"),
            Kind::Twin => t.lines().any(|l| {
                let l: String = l.chars().filter(|c| !c.is_whitespace()).collect();
                l == "source=\"twin\"" || l.starts_with("source=\"twin\"#")
            }),
        }
    }

    /// Bytes of an existing file read to tell its kind: a twin scenario names its source after
    /// its comments, the other kinds say what they are at once.
    fn head_bytes(self) -> usize {
        match self {
            Kind::Twin | Kind::Csv => 4 << 20,
            _ => HEAD_BYTES,
        }
    }

    fn noun(self) -> &'static str {
        match self {
            Kind::Any => "a file",
            Kind::Csv => "a file other than a lossprism result, part, checkpoint or ledger",
            Kind::Svg => "an SVG picture",
            Kind::Json => "a lossprism result or part document",
            Kind::Html => "an HTML report",
            Kind::Twin => "a twin scenario (`source = \"twin\"`)",
        }
    }
}

/// How a checkpoint (a part document of a run that may be resumed) says what it is, in
/// [`compact_json`] form.
const CHECKPOINT_FLAG: &str = "\"checkpoint\":true";

/// The head of a JSON document without whitespace, to read its first keys whatever the layout.
fn compact_json(text: &str) -> String {
    text.chars().filter(|c| !c.is_whitespace()).collect()
}

/// How much of an existing file [`same_kind`] reads to tell its kind.
const HEAD_BYTES: usize = 512;

/// One checked output.
#[derive(Debug, Clone)]
struct Target {
    flag: String,
    kind: Kind,
    given: PathBuf,
    ident: Ident,
    place: Place,
}

/// How an output is written.
#[derive(Debug, Clone)]
enum Place {
    /// `-`.
    Stdout,
    /// A regular file, or a name not yet taken: staged beside the resolved path, then renamed.
    Staged(PathBuf),
    /// An existing file that is not a regular file: opened and written in place.
    Direct(PathBuf, Stream),
}

/// The kinds of in-place outputs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Stream {
    Fifo,
    Device,
    /// A descriptor under `/proc` (e.g. `/dev/stdout`) that refers to a regular file: appended.
    ProcFile,
}

impl Default for Outputs {
    fn default() -> Self {
        Self::new()
    }
}

impl Outputs {
    /// An empty set of inputs and outputs.
    pub fn new() -> Self {
        Outputs {
            set: NEXT_SET.fetch_add(1, Ordering::Relaxed),
            inputs: Vec::new(),
            outputs: Vec::new(),
        }
    }

    /// Registers an input file. `role` names it in messages as a noun phrase ("the scenario file",
    /// "a part file", "the baseline");
    /// `-` (standard input) clashes with nothing. Never fails: an input that cannot be resolved
    /// is compared by its absolute path.
    pub fn input(&mut self, role: &str, path: &Path) {
        self.inputs.push((role.to_string(), path.to_path_buf()));
    }

    /// Registers an output under its flag (`--out`, `--csv`) and checks it at once: it must not
    /// name an input or an earlier output, its folder must exist and accept new files, and it
    /// must not be a folder or a socket. `-` means standard output.
    pub fn output(&mut self, flag: &str, path: &Path) -> Result<OutputId, Error> {
        self.output_of(flag, path, Kind::Any)
    }

    /// [`Outputs::output`] for an output of a known [`Kind`]: an existing non-empty regular file
    /// is replaced only if it holds that kind too (refused otherwise, naming the flag).
    pub fn output_of(&mut self, flag: &str, path: &Path, kind: Kind) -> Result<OutputId, Error> {
        let inputs = self.input_idents();
        let target = examine(flag, path, true, kind)?;
        clash(&target, &inputs, &self.outputs)?;
        same_kind(&target)?;
        self.outputs.push(target);
        Ok(OutputId {
            set: self.set,
            index: self.outputs.len() - 1,
        })
    }

    /// Checks every registered output again against the file system as it is now, all inputs
    /// and each other, without writing anything (beyond creating and removing a probe file in
    /// each output folder).
    pub fn check(&self) -> Result<(), Error> {
        self.recheck(true).map(|_| ())
    }

    /// Writes every registered output with its bytes (exactly one entry per output).
    ///
    /// Checks everything again first. Regular files are staged and then renamed together;
    /// devices, FIFOs and `/proc` descriptors are written in place after the renames, and `-`
    /// last. When this returns an error, no regular-file output has changed: renamed ones are
    /// restored from the copies kept aside and new ones removed (if even that fails, the message
    /// says where the old content is). Bytes already sent to a stream cannot be taken back.
    pub fn commit(self, contents: Vec<(OutputId, Vec<u8>)>) -> Result<(), Error> {
        let mut slots: Vec<Option<Vec<u8>>> = (0..self.outputs.len()).map(|_| None).collect();
        for (id, bytes) in contents {
            if id.set != self.set || id.index >= slots.len() {
                return Err(Error::Usage(
                    "internal error: an output handle from another command was used".to_string(),
                ));
            }
            if slots[id.index].is_some() {
                return Err(Error::Usage(format!(
                    "internal error: {} was given two contents",
                    self.outputs[id.index].flag
                )));
            }
            slots[id.index] = Some(bytes);
        }
        let mut bytes = Vec::with_capacity(slots.len());
        for (slot, target) in slots.into_iter().zip(&self.outputs) {
            match slot {
                Some(b) => bytes.push(b),
                None => {
                    return Err(Error::Usage(format!(
                        "internal error: nothing to write for {}",
                        target.flag
                    )))
                }
            }
        }
        let targets = self.recheck(false)?;
        // A signal that ends the process waits for the staging and the renames
        // (`wait_for_commit`); the gate is let go before any stream is written, which may block.
        let gate = wait_for_commit();
        COMMITTING.store(true, std::sync::atomic::Ordering::SeqCst);
        let mut tx = Transaction::default();
        let result = tx.run(&targets, &bytes, gate);
        COMMITTING.store(false, std::sync::atomic::Ordering::SeqCst);
        match result {
            Ok(()) => {
                tx.finish();
                // A checkpoint's rewrite is not the run's outputs (sweep 69: a second signal
                // after one said "after the outputs were written" with no `--out` file).
                if targets.iter().any(|t| t.flag != CHECKPOINT_OUTPUT) {
                    COMMITTED.store(true, std::sync::atomic::Ordering::SeqCst);
                }
                Ok(())
            }
            Err(e) => Err(tx.abort(e)),
        }
    }

    fn input_idents(&self) -> Vec<(&str, &Path, Ident)> {
        self.inputs
            .iter()
            .map(|(role, path)| (role.as_str(), path.as_path(), input_ident(path)))
            .collect()
    }

    /// Resolves and checks every output again; the result is what [`Outputs::commit`] writes.
    fn recheck(&self, probe: bool) -> Result<Vec<Target>, Error> {
        let inputs = self.input_idents();
        let mut fresh: Vec<Target> = Vec::with_capacity(self.outputs.len());
        for old in &self.outputs {
            let target = examine(&old.flag, &old.given, probe, old.kind)?;
            clash(&target, &inputs, &fresh)?;
            same_kind(&target)?;
            fresh.push(target);
        }
        Ok(fresh)
    }
}

/// Checks outputs against inputs and each other, as [`Outputs::output`] does, without writing
/// anything (beyond creating and removing a probe file in each output folder): for commands that want to refuse bad paths before a long run and build their
/// [`Outputs`] later. `inputs` are `(role, path)`, `outputs` are `(flag, path)`.
pub fn check(inputs: &[(&str, &Path)], outputs: &[(&str, &Path)]) -> Result<(), Error> {
    let mut set = Outputs::new();
    for (role, path) in inputs {
        set.input(role, path);
    }
    for (flag, path) in outputs {
        set.output(flag, path)?;
    }
    Ok(())
}

/// `p` names standard output: `-`, or a path to what file descriptor 1 holds (`/dev/stdout`,
/// `/dev/fd/1`, or the very file standard output is redirected to). A command writing an
/// output there sends its words to standard error instead, as with `-`, so they cannot land in
/// (or over) the output.
pub fn is_stdout(p: &Path) -> bool {
    p.as_os_str() == "-" || same_file(p, "/dev/stdout")
}

/// `p` and the descriptor named `fd` (`/dev/stdout`, `/dev/stderr`) are the same file.
fn same_file(p: &Path, fd: &str) -> bool {
    let id = |q: &Path| fs::metadata(q).ok().as_ref().and_then(sys::dev_ino);
    matches!((id(p), id(Path::new(fd))), (Some(a), Some(b)) if a == b)
}

/// `p` is an existing regular file of zero bytes (followed through links): it holds nothing an
/// output could lose, so `--out`, `--checkpoint` and `check --update` treat it as absent.
pub fn is_empty_file(p: &Path) -> bool {
    fs::metadata(p).is_ok_and(|m| m.is_file() && m.len() == 0)
}

/// Refuses a standard output that is one of the command's `inputs` (`(role, path)`), opened
/// with `1<>` or `>>` (with `>` the shell has already emptied it): the words printed would be
/// written over or after the input (a scenario, a baseline, a part), with exit 0.
pub fn guard_inputs(inputs: &[(&str, &Path)]) -> Result<(), Error> {
    for (role, path) in inputs {
        if path.as_os_str() == "-" || !fs::metadata(path).is_ok_and(|m| m.is_file()) {
            continue;
        }
        // A descriptor's name (`/dev/stdout`, `/proc/self/fd/1`) is standard output by name; the
        // command's own checks say what it may be used for.
        let parent = path.parent().filter(|p| !p.as_os_str().is_empty());
        let descriptor = fs::canonicalize(parent.unwrap_or(Path::new(".")))
            .is_ok_and(|d| d.starts_with("/proc") || d.starts_with("/dev"));
        if descriptor {
            continue;
        }
        register_input(path);
        let (out_here, err_here) = (is_stdout(path), is_stderr(path));
        if out_here || err_here {
            let which = match (out_here, err_here) {
                (true, true) => "standard output and standard error are",
                (true, false) => "standard output is",
                _ => "standard error is",
            };
            return Err(Error::Usage(format!(
                "{which} redirected to {role} {}, so what lossprism prints would be written into \
                 it; redirect {} elsewhere",
                path.display(),
                if err_here && !out_here {
                    "standard error"
                } else if err_here {
                    "them"
                } else {
                    "standard output"
                }
            )));
        }
    }
    Ok(())
}

/// `p` is the very file standard error is (`2>> F`, `2<> F`), as [`is_stdout`] for standard
/// output.
fn is_stderr(p: &Path) -> bool {
    same_file(p, "/dev/stderr")
}

/// The regular files the command has read as inputs (device and inode; [`register_input`]).
/// [`tell`] never writes into one: standard error opened on an input (`2>> table.csv`) had
/// the table printed, or the error message, appended to it.
static INPUT_FILES: std::sync::Mutex<Vec<(u64, u64)>> = std::sync::Mutex::new(Vec::new());

/// Records `path` (when it is a regular file) as an input of this command, so that nothing
/// [`tell`] prints lands in it. Called where inputs are read (scenario files, tables, result
/// and part documents) and by [`guard_inputs`].
pub fn register_input(path: &Path) {
    let Some(id) = fs::metadata(path)
        .ok()
        .filter(Metadata::is_file)
        .as_ref()
        .and_then(sys::dev_ino)
    else {
        return;
    };
    let mut inputs = INPUT_FILES.lock().unwrap_or_else(|e| e.into_inner());
    if !inputs.contains(&id) {
        inputs.push(id);
    }
}

/// Where [`tell`] writes now: standard error; standard output when standard error is an input
/// ([`register_input`]); nowhere when both are.
fn stderr_route() -> Route {
    let inputs = INPUT_FILES.lock().unwrap_or_else(|e| e.into_inner());
    if inputs.is_empty() {
        return Route::Stderr;
    }
    let is_input = |fd: &str| regular_file_id(fd).is_some_and(|id| inputs.contains(&id));
    match (is_input("/dev/stderr"), is_input("/dev/stdout")) {
        (false, _) => Route::Stderr,
        (true, false) => Route::Stdout,
        (true, true) => Route::Nowhere,
    }
}

/// See [`stderr_route`].
enum Route {
    Stderr,
    Stdout,
    Nowhere,
}

/// Writes one output safely (checked against `inputs`, given as `(role, path)`): staged and
/// renamed for a regular file, in place for a device or FIFO, standard output for `-`.
pub fn write_one(
    flag: &str,
    path: &Path,
    inputs: &[(&str, &Path)],
    bytes: impl Into<Vec<u8>>,
) -> Result<(), Error> {
    write_one_of(flag, path, inputs, bytes, Kind::Any)
}

/// [`write_one`] for an output of a known [`Kind`].
pub fn write_one_of(
    flag: &str,
    path: &Path,
    inputs: &[(&str, &Path)],
    bytes: impl Into<Vec<u8>>,
    kind: Kind,
) -> Result<(), Error> {
    let mut set = Outputs::new();
    for (role, p) in inputs {
        set.input(role, p);
    }
    let id = set.output_of(flag, path, kind)?;
    set.commit(vec![(id, bytes.into())])
}

/// [`check`] of one output of a known [`Kind`].
pub fn check_one_of(
    inputs: &[(&str, &Path)],
    flag: &str,
    path: &Path,
    kind: Kind,
) -> Result<(), Error> {
    let mut set = Outputs::new();
    for (role, p) in inputs {
        set.input(role, p);
    }
    set.output_of(flag, path, kind).map(|_| ())
}

// ---------------------------------------------------------------------------------------------
// Resolving and checking paths

/// Why a path could not be resolved.
enum Unresolved {
    NoFileName(PathBuf),
    MissingFolder(PathBuf),
    NotAFolder(PathBuf),
    Loop,
    Os(PathBuf, io::Error),
}

/// A resolved path: the final name in its canonical folder, and what is there.
struct Located {
    full: PathBuf,
    meta: Option<Metadata>,
    /// The path runs through `/proc` (`/dev/stdout`, `/dev/fd/3`): a descriptor link, which is
    /// followed by the kernel but never resolved or renamed over.
    proc_fd: bool,
}

/// Follows `path` to the file it names: symlinks are followed one hop at a time, so a dangling
/// symlink resolves to the file it would create.
fn locate(path: &Path) -> Result<Located, Unresolved> {
    let mut cur = std::path::absolute(path).map_err(|e| Unresolved::Os(path.to_path_buf(), e))?;
    for _ in 0..MAX_LINKS {
        let name = match cur.file_name() {
            Some(n) => n.to_os_string(),
            None => return Err(Unresolved::NoFileName(cur)),
        };
        let parent = match cur.parent() {
            Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
            _ => PathBuf::from("/"),
        };
        let dir = match fs::canonicalize(&parent) {
            Ok(d) => d,
            Err(e) if e.kind() == io::ErrorKind::NotFound => {
                return Err(Unresolved::MissingFolder(parent))
            }
            Err(e) => return Err(Unresolved::Os(parent, e)),
        };
        match fs::metadata(&dir) {
            Ok(m) if m.is_dir() => {}
            Ok(_) => return Err(Unresolved::NotAFolder(parent)),
            Err(e) => return Err(Unresolved::Os(parent, e)),
        }
        let proc_fd = dir.starts_with("/proc");
        let full = dir.join(&name);
        match fs::symlink_metadata(&full) {
            Ok(m) if m.file_type().is_symlink() && !proc_fd => {
                let link = fs::read_link(&full).map_err(|e| Unresolved::Os(full.clone(), e))?;
                cur = dir.join(link);
            }
            Ok(m) => {
                let meta = if proc_fd {
                    fs::metadata(&full).ok()
                } else {
                    Some(m)
                };
                return Ok(Located {
                    full,
                    meta,
                    proc_fd,
                });
            }
            Err(e) if e.kind() == io::ErrorKind::NotFound => {
                return Ok(Located {
                    full,
                    meta: None,
                    proc_fd,
                })
            }
            Err(e) => return Err(Unresolved::Os(full, e)),
        }
    }
    Err(Unresolved::Loop)
}

/// The identity of an input: its resolved path (or, failing that, its absolute path with `.`
/// and `..` removed) and, when it exists, its device and inode.
fn input_ident(path: &Path) -> Ident {
    if path.as_os_str() == "-" {
        return Ident::default();
    }
    let file = fs::metadata(path).ok().and_then(|m| sys::dev_ino(&m));
    let resolved = match locate(path) {
        Ok(l) => Some(l.full),
        Err(_) => lexical_absolute(path),
    };
    Ident {
        path: resolved,
        file,
    }
}

/// `path` made absolute with `.` dropped and `..` applied to the text (no file system access).
fn lexical_absolute(path: &Path) -> Option<PathBuf> {
    let abs = std::path::absolute(path).ok()?;
    let mut out = PathBuf::new();
    for c in abs.components() {
        match c {
            Component::CurDir => {}
            Component::ParentDir => {
                out.pop();
            }
            other => out.push(other.as_os_str()),
        }
    }
    Some(out)
}

/// Resolves one output path and checks what it names. `probe` also checks that the folder of a
/// staged output accepts new files, by creating and removing one.
fn examine(flag: &str, given: &Path, probe: bool, kind: Kind) -> Result<Target, Error> {
    let shown = given.display();
    if given.as_os_str().is_empty() {
        return Err(Error::Usage(format!("{flag}: empty file name")));
    }
    if given.as_os_str() == "-" {
        if stdout_closed_at_start() {
            return Err(Error::Usage(format!(
                "{flag} -: standard output is closed, so the output would be lost; name a file \
                 (or redirect standard output to one)"
            )));
        }
        // (With `2>&1` into a file, `-` is the user's explicit choice, and `--quiet` keeps the
        // words out: not refused, unlike a file named by its path below.)
        // Standard output redirected to a regular file (`> r.json`) must not be another output
        // or an input; a terminal or pipe shared with an input is harmless.
        let file = regular_file_id("/dev/stdout");
        return Ok(Target {
            flag: flag.to_string(),
            kind,
            given: given.to_path_buf(),
            ident: Ident { path: None, file },
            place: Place::Stdout,
        });
    }
    let names_folder = || Error::Usage(format!("{flag} names a folder, {shown}; give a file name"));
    if given.to_string_lossy().ends_with('/') {
        return Err(names_folder());
    }
    let loc = match locate(given) {
        Ok(l) => l,
        Err(Unresolved::NoFileName(p)) => {
            return Err(if p.is_dir() {
                names_folder()
            } else {
                Error::Usage(format!("{flag}: {shown} does not end in a file name"))
            })
        }
        Err(Unresolved::MissingFolder(dir)) => {
            return Err(Error::Usage(format!(
                "{flag}: the folder {} of {shown} does not exist",
                dir.display()
            )))
        }
        Err(Unresolved::NotAFolder(dir)) => {
            return Err(Error::Usage(format!(
                "{flag}: {} in {shown} is not a folder",
                dir.display()
            )))
        }
        Err(Unresolved::Loop) => {
            return Err(Error::Usage(format!(
                "{flag}: {shown}: too many levels of symbolic links"
            )))
        }
        Err(Unresolved::Os(p, e)) => return Err(Error::io(p, &e)),
    };
    let file = loc.meta.as_ref().and_then(sys::dev_ino);
    let place = match &loc.meta {
        None if loc.proc_fd => {
            return Err(Error::Usage(format!(
                "{flag}: {shown} is not an open file descriptor"
            )))
        }
        None => Place::Staged(loc.full.clone()),
        Some(m) if m.is_dir() => return Err(names_folder()),
        Some(m) if sys::is_socket(m) => {
            return Err(Error::Usage(format!(
                "{flag} names a socket, {shown}; lossprism writes only to files, devices and FIFOs"
            )))
        }
        Some(m) if m.is_file() && loc.proc_fd => Place::Direct(loc.full.clone(), Stream::ProcFile),
        // The very file standard output is redirected to (`--out r.json > r.json`): written
        // through standard output, as `-` is. Replacing it by a rename sent the run's words into
        // the old, unlinked file, and `>> log` lost the log's earlier lines.
        Some(m) if m.is_file() && is_stdout(given) => {
            if stderr_is_stdout() {
                return Err(Error::Usage(format!(
                    "{flag}: {shown} is where standard output and standard error both go \
                     (`2>&1`), so the words printed would be mixed into the output; send \
                     standard error elsewhere"
                )));
            }
            if !stdout_starts_empty() {
                return Err(Error::Usage(format!(
                    "{flag}: {shown} is the file standard output is redirected to, opened to \
                     append (`>>`) or to read and write (`1<>`), so the output would be mixed \
                     with what the file holds; name another file, or use `{flag} -` with `>`"
                )));
            }
            Place::Stdout
        }
        Some(m) if m.is_file() => {
            replaceable(flag, &shown, &loc.full)?;
            Place::Staged(loc.full.clone())
        }
        Some(m) if sys::is_fifo(m) => Place::Direct(loc.full.clone(), Stream::Fifo),
        Some(_) => Place::Direct(loc.full.clone(), Stream::Device),
    };
    if probe {
        if let Place::Staged(full) = &place {
            probe_folder(flag, full)?;
        }
    }
    Ok(Target {
        flag: flag.to_string(),
        kind,
        given: given.to_path_buf(),
        ident: Ident {
            path: Some(loc.full),
            file,
        },
        place,
    })
}

/// Standard error is the very regular file standard output is (`> F 2>&1`).
fn stderr_is_stdout() -> bool {
    matches!(
        (regular_file_id("/dev/stdout"), regular_file_id("/dev/stderr")),
        (Some(a), Some(b)) if a == b
    )
}

/// Device and inode of `path` when it is (or leads to) a regular file.
fn regular_file_id(path: &str) -> Option<(u64, u64)> {
    fs::metadata(path)
        .ok()
        .filter(Metadata::is_file)
        .as_ref()
        .and_then(sys::dev_ino)
}

/// Standard output is a file opened write-only, not to append, at its start (a shell's `>`): an
/// output written through it is the whole file. Read from `/proc/self/fdinfo/1` on Linux;
/// elsewhere assumed.
fn stdout_starts_empty() -> bool {
    let Ok(info) = fs::read_to_string("/proc/self/fdinfo/1") else {
        return true;
    };
    let field = |name: &str| {
        info.lines()
            .find_map(|l| l.strip_prefix(name))
            .map(|v| v.trim().to_string())
    };
    let flags = field("flags:").and_then(|f| u32::from_str_radix(&f, 8).ok());
    let pos = field("pos:").and_then(|p| p.parse::<u64>().ok());
    // O_ACCMODE 3, O_WRONLY 1 and O_APPEND 0o2000 on every Linux architecture but a few old
    // ones (Alpha, SPARC, PA-RISC, MIPS use other O_APPEND bits: there the append test is
    // the position's).
    match (flags, pos) {
        (Some(f), Some(p)) => f & 3 == 1 && f & 0o2000 == 0 && p == 0,
        _ => true,
    }
}

/// An existing regular file an output may replace: one the user may write (a rename needs only
/// the folder's permission, and a read-only file, or another user's, was silently replaced),
/// and not a holdout ledger unless the output is the ledger's own update.
fn replaceable(flag: &str, shown: &dyn std::fmt::Display, full: &Path) -> Result<(), Error> {
    if let Err(e) = OpenOptions::new().write(true).open(full) {
        if e.kind() == io::ErrorKind::PermissionDenied {
            return Err(Error::Usage(format!(
                "{flag}: {shown} is not writable; lossprism replaces only files you may write"
            )));
        }
    }
    if sys::sticky_forbids(full) {
        // The rename over it would fail after the other outputs were staged (and a link kept
        // aside to it could not be removed).
        return Err(Error::Usage(format!(
            "{flag}: {shown} belongs to another user in a shared folder where only a file's owner \
             may replace it (the folder's sticky bit, as on /tmp); choose another file"
        )));
    }
    if flag != LEDGER_OUTPUT {
        let mut head = Vec::with_capacity(512);
        if let Ok(f) = File::open(full) {
            use std::io::Read;
            let _ = f.take(512).read_to_end(&mut head);
        }
        let text = String::from_utf8_lossy(&head);
        let tag = format!("\"format\": \"{LEDGER_TAG}");
        let compact = format!("\"format\":\"{LEDGER_TAG}");
        if text.contains(&tag) || text.contains(&compact) {
            return Err(Error::Usage(format!(
                "{flag}: {shown} is a holdout ledger, which counts the looks at a holdout; no \
                 output replaces it (choose another file)"
            )));
        }
    }
    Ok(())
}

/// Refuses to replace an existing non-empty regular file that does not hold the output's own
/// [`Kind`] (checked after the clashes with inputs and other outputs, whose messages say more).
fn same_kind(target: &Target) -> Result<(), Error> {
    let Place::Staged(full) = &target.place else {
        return Ok(());
    };
    if target.kind == Kind::Any || !fs::metadata(full).is_ok_and(|m| m.is_file()) {
        return Ok(());
    }
    let mut head = Vec::new();
    let read = File::open(full).and_then(|f| {
        use std::io::Read;
        f.take(target.kind.head_bytes() as u64)
            .read_to_end(&mut head)
    });
    // A file that cannot be read cannot be told apart: refused, as anything else unknown.
    if read.is_ok() && target.kind.accepts(&head) {
        return Ok(());
    }
    if target.kind == Kind::Csv {
        return Err(Error::Usage(format!(
            "{}: {} is a lossprism result, part, checkpoint or ledger; a CSV table never \
             replaces one (choose another file)",
            target.flag,
            crate::error::shown(&target.given)
        )));
    }
    // A checkpoint is a lossprism document too, but the saved state of a run that may be
    // resumed: "is not a result or part document" left the user wondering (sweep 70).
    let compact = compact_json(&String::from_utf8_lossy(&head));
    if target.kind == Kind::Json
        && compact.starts_with("{\"format\":\"lossprism-part/")
        && compact.contains(CHECKPOINT_FLAG)
    {
        return Err(Error::Usage(format!(
            "{}: {} is a checkpoint (the saved state of a run, which rerunning it with the same \
             `--checkpoint` continues); a result or part never replaces one (choose another \
             file, or remove it once the run it belongs to is done)",
            target.flag,
            crate::error::shown(&target.given)
        )));
    }
    Err(Error::Usage(format!(
        "{}: {} exists and is not {}; lossprism replaces a file only with its own kind of output \
         (choose another file, or remove it first)",
        target.flag,
        crate::error::shown(&target.given),
        target.kind.noun()
    )))
}

/// Checks that the folder of `target` accepts new files by creating and removing one.
fn probe_folder(flag: &str, target: &Path) -> Result<(), Error> {
    let (dir, name) = split(target);
    // A signal's exit waits for the probe to be removed, as for a commit.
    let _gate = wait_for_commit();
    for _ in 0..100 {
        let probe = dir.join(side_name(name, "probe"));
        match OpenOptions::new().write(true).create_new(true).open(&probe) {
            Ok(f) => {
                drop(f);
                let _ = fs::remove_file(&probe);
                return Ok(());
            }
            Err(e) if e.kind() == io::ErrorKind::AlreadyExists => continue,
            Err(e) => {
                return Err(Error::Io {
                    path: dir.to_path_buf(),
                    message: format!("cannot create files here for {flag}: {e}"),
                })
            }
        }
    }
    Err(Error::Io {
        path: dir.to_path_buf(),
        message: format!("cannot find a free temporary name for {flag}"),
    })
}

/// Refuses `target` if it names an input or an earlier output.
fn clash(
    target: &Target,
    inputs: &[(&str, &Path, Ident)],
    earlier: &[Target],
) -> Result<(), Error> {
    for (role, path, ident) in inputs {
        if target.ident.same(ident) {
            return Err(Error::Usage(format!(
                "{} names {role} {}, an input; choose another output file",
                target.flag,
                path.display()
            )));
        }
    }
    for other in earlier {
        if matches!(target.place, Place::Stdout) && matches!(other.place, Place::Stdout) {
            return Err(Error::Usage(format!(
                "{} and {} both name standard output (-); at most one output may be -",
                target.flag, other.flag
            )));
        }
        if shares_stdout(target, other) {
            return Err(Error::Usage(format!(
                "{} and {} both name standard output ({} is the pipe or file that - writes to); \
                 at most one output may go there",
                target.flag,
                other.flag,
                if matches!(target.place, Place::Stdout) {
                    other.given.display()
                } else {
                    target.given.display()
                }
            )));
        }
        if target.ident.same(&other.ident) {
            return Err(Error::Usage(format!(
                "{} names the same file as {} ({})",
                target.flag,
                other.flag,
                other.given.display()
            )));
        }
    }
    Ok(())
}

/// Whether one of two outputs is `-` and the other names the pipe or file standard output
/// writes to (`/dev/stdout`, `/dev/fd/1`, `/proc/self/fd/1` when standard output is a pipe): the
/// two documents would run together in one stream. A terminal or other character device (the
/// null device) may be shared.
fn shares_stdout(a: &Target, b: &Target) -> bool {
    let other = match (&a.place, &b.place) {
        (Place::Stdout, Place::Stdout) => return false,
        (Place::Stdout, _) => b,
        (_, Place::Stdout) => a,
        _ => return false,
    };
    let Ok(m) = fs::metadata("/dev/stdout") else {
        return false;
    };
    if !(m.is_file() || sys::is_fifo(&m)) {
        return false;
    }
    other.ident.file.is_some() && sys::dev_ino(&m) == other.ident.file
}

/// The folder and file name of a resolved path.
fn split(path: &Path) -> (&Path, &OsStr) {
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    (dir, path.file_name().unwrap_or(OsStr::new("output")))
}

/// A hidden name beside `name` that no other process or call uses: `.NAME.PID.N.WHAT`.
fn side_name(name: &OsStr, what: &str) -> OsString {
    let n = NEXT_SIDE_NAME.fetch_add(1, Ordering::Relaxed);
    OsString::from(format!(
        "{}{}.{n}.{what}",
        side_prefix(name),
        std::process::id()
    ))
}

/// The start of every side name of `name`, `.NAME.` (the name cut to 120 bytes, so that the
/// whole side name stays within the usual 255-byte limit).
fn side_prefix(name: &OsStr) -> String {
    let full = name.to_string_lossy();
    let mut cut = full.len().min(120);
    while !full.is_char_boundary(cut) {
        cut -= 1;
    }
    format!(".{}.", &full[..cut])
}

/// Held by every commit from its first staged file to its last rename (not while streams and
/// standard output are written: a stalled reader must not hold a signal's exit).
static COMMIT_GATE: std::sync::Mutex<()> = std::sync::Mutex::new(());

/// Output paths whose folder was tidied of stale staged copies in this process.
static TIDIED: std::sync::Mutex<std::collections::BTreeSet<PathBuf>> =
    std::sync::Mutex::new(std::collections::BTreeSet::new());

/// Set while a commit writes (staging, renames, streams).
static COMMITTING: std::sync::atomic::AtomicBool = std::sync::atomic::AtomicBool::new(false);

/// Set once a commit has written everything (what a signal handler reports).
static COMMITTED: std::sync::atomic::AtomicBool = std::sync::atomic::AtomicBool::new(false);

/// Waits until no commit is staging or renaming and keeps the next from starting while the
/// guard lives: a signal handler takes it before ending the process, so an exit never leaves
/// staged copies behind or lands between two renames of a multi-file output.
pub fn wait_for_commit() -> std::sync::MutexGuard<'static, ()> {
    COMMIT_GATE.lock().unwrap_or_else(|e| e.into_inner())
}

/// [`wait_for_commit`], giving up after `limit` (`None`: the gate is still held; a signal
/// handler then ends the process anyway rather than hang on a stuck disk).
pub fn wait_for_commit_within(
    limit: std::time::Duration,
) -> Option<std::sync::MutexGuard<'static, ()>> {
    let end = std::time::Instant::now() + limit;
    loop {
        match COMMIT_GATE.try_lock() {
            Ok(g) => return Some(g),
            Err(std::sync::TryLockError::Poisoned(e)) => return Some(e.into_inner()),
            Err(std::sync::TryLockError::WouldBlock) => {
                if std::time::Instant::now() >= end {
                    return None;
                }
                std::thread::sleep(std::time::Duration::from_millis(5));
            }
        }
    }
}

/// Whether a commit of this process has written its outputs (a checkpoint's rewrite alone does
/// not count).
pub fn committed() -> bool {
    COMMITTED.load(std::sync::atomic::Ordering::SeqCst)
}

/// Whether a commit is writing right now (staging, renaming or writing a stream).
pub fn commit_in_progress() -> bool {
    COMMITTING.load(std::sync::atomic::Ordering::SeqCst)
}

/// Removes the staged copies (`.NAME.PID.N.tmp`) that a process killed while writing `path`
/// left beside it (a SIGKILL during a checkpoint's rewrite left a 51 MB `.ck.json.31421.12.tmp`
/// that no later run removed). Only files of processes that no longer run are removed (Linux:
/// `/proc/PID` is gone); backups (`.bak`), which may hold the only copy of a replaced file, are
/// kept. Elsewhere nothing is removed. Errors are ignored: this is tidying.
pub fn remove_stale_staging(path: &Path) {
    if !Path::new("/proc/self").exists() {
        return;
    }
    let (dir, name) = split(path);
    let prefix = side_prefix(name);
    let Ok(entries) = fs::read_dir(dir) else {
        return;
    };
    for entry in entries.flatten() {
        let file = entry.file_name();
        let file = file.to_string_lossy();
        let Some(rest) = file
            .strip_prefix(&prefix)
            .and_then(|r| r.strip_suffix(".tmp"))
        else {
            continue;
        };
        let mut parts = rest.split('.');
        let (Some(pid), Some(n), None) = (parts.next(), parts.next(), parts.next()) else {
            continue;
        };
        if pid.parse::<u32>().is_err() || n.parse::<u64>().is_err() {
            continue;
        }
        let alive = Path::new("/proc").join(pid).exists();
        if !alive && entry.file_type().is_ok_and(|t| t.is_file()) {
            let _ = fs::remove_file(entry.path());
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Writing

/// An exclusive advisory lock (`flock`) on a folder, held until dropped: assessments of
/// scenarios in one folder count a holdout ledger's looks one at a time (the one lock a
/// process takes). The lock is tried without blocking for up to [`FOLDER_LOCK_WAIT`]: a lock
/// nobody lets go (a `flock DIR lossprism ...` wrapper holds the same folder, and lossprism
/// inherits it) is then an error naming the folder, never a hang. A folder that cannot be
/// opened for reading or cannot be locked at all (some network file systems) is left
/// unlocked. Unix only.
pub struct FolderLock {
    /// The folder's descriptor holding the lock (closing it lets the lock go).
    _held: Option<File>,
}

/// How long [`FolderLock::take`] tries before it gives up.
#[cfg(not(test))]
pub const FOLDER_LOCK_WAIT: Duration = Duration::from_secs(30);
/// How long [`FolderLock::take`] tries before it gives up (short in unit tests).
#[cfg(test)]
pub const FOLDER_LOCK_WAIT: Duration = Duration::from_millis(500);

impl FolderLock {
    /// Locks `dir` (an empty path is the working folder), waiting up to [`FOLDER_LOCK_WAIT`]
    /// for another process that holds it.
    pub fn take(dir: &Path) -> Result<FolderLock, Error> {
        let unlocked = FolderLock { _held: None };
        if cfg!(not(unix)) {
            return Ok(unlocked);
        }
        let dir = if dir.as_os_str().is_empty() {
            Path::new(".")
        } else {
            dir
        };
        let Ok(f) = File::open(dir) else {
            return Ok(unlocked);
        };
        let end = Instant::now() + FOLDER_LOCK_WAIT;
        loop {
            match sys::try_lock_exclusive(&f) {
                Ok(true) => return Ok(FolderLock { _held: Some(f) }),
                Ok(false) if Instant::now() < end => {
                    std::thread::sleep(Duration::from_millis(20));
                }
                Ok(false) => {
                    return Err(Error::Io {
                        path: dir.to_path_buf(),
                        message: format!(
                            "another process has held a lock on this folder for {} s (a `flock` \
                             wrapper around lossprism takes the same lock: lock another file or \
                             folder, such as `flock job.lock lossprism ...`)",
                            FOLDER_LOCK_WAIT.as_secs()
                        ),
                    })
                }
                // Not lockable here: left unlocked, as before locks were taken.
                Err(_) => return Ok(unlocked),
            }
        }
    }
}

/// One staged output during a commit.
struct Install {
    target: PathBuf,
    /// Where the target's old content is kept until the commit is over.
    backup: Option<PathBuf>,
    /// The rename over the target has happened.
    renamed: bool,
}

/// The state of a commit, so that every way out of it can clean up and roll back.
#[derive(Default)]
struct Transaction {
    /// Staged files not yet renamed.
    temps: Vec<PathBuf>,
    installs: Vec<Install>,
    closed: bool,
}

impl Transaction {
    fn run(
        &mut self,
        targets: &[Target],
        bytes: &[Vec<u8>],
        gate: std::sync::MutexGuard<'static, ()>,
    ) -> Result<(), Error> {
        // 1. Stage every regular-file output; nothing visible changes. Staged copies that a
        // killed earlier process left beside an output go first (tidying, once per path in a
        // process: a checkpoint is rewritten after every block).
        let mut staged = Vec::new();
        for (t, b) in targets.iter().zip(bytes) {
            if let Place::Staged(path) = &t.place {
                let first = TIDIED
                    .lock()
                    .unwrap_or_else(|e| e.into_inner())
                    .insert(path.clone());
                if first {
                    remove_stale_staging(path);
                }
                staged.push((t, path, self.stage(t, path, b)?));
            }
        }
        // 2. Open every in-place output, so a FIFO without a reader fails before any rename.
        let mut streams = Vec::new();
        for (t, b) in targets.iter().zip(bytes) {
            if let Place::Direct(path, kind) = &t.place {
                streams.push((t, open_in_place(t, path, *kind)?, b));
            }
        }
        // 3. Rename the staged files over their targets, keeping the old content aside.
        for (t, path, tmp) in staged {
            self.install(t, path, &tmp)?;
        }
        // 4. Streams, then standard output: a reader that stalls would hold a signal's exit
        // for as long, and what is written there cannot be taken back anyway.
        drop(gate);
        for (t, mut file, b) in streams {
            write_patiently(&mut file, b).map_err(|e| Error::io(&t.given, &e))?;
        }
        for (t, b) in targets.iter().zip(bytes) {
            if matches!(t.place, Place::Stdout) {
                let mut out = io::stdout().lock();
                write_patiently(&mut out, b).map_err(|e| Error::io("standard output", &e))?;
            }
        }
        Ok(())
    }

    /// Writes `bytes` to a new temporary file beside `path`, with the old file's permissions
    /// and owner when there is one.
    fn stage(&mut self, t: &Target, path: &Path, bytes: &[u8]) -> Result<PathBuf, Error> {
        let (dir, name) = split(path);
        let mut opened = None;
        for _ in 0..100 {
            let tmp = dir.join(side_name(name, "tmp"));
            match OpenOptions::new().write(true).create_new(true).open(&tmp) {
                Ok(f) => {
                    opened = Some((tmp, f));
                    break;
                }
                Err(e) if e.kind() == io::ErrorKind::AlreadyExists => continue,
                Err(e) => return Err(Error::io(&t.given, &e)),
            }
        }
        let Some((tmp, mut file)) = opened else {
            return Err(Error::Io {
                path: t.given.clone(),
                message: "cannot find a free temporary name".to_string(),
            });
        };
        self.temps.push(tmp.clone());
        file.write_all(bytes).map_err(|e| Error::io(&t.given, &e))?;
        if let Ok(old) = fs::metadata(path) {
            if old.is_file() {
                sys::copy_owner(&file, &old);
                // Permissions last: a change of owner clears set-id bits.
                let _ = file.set_permissions(old.permissions());
            }
        }
        file.sync_all().map_err(|e| Error::io(&t.given, &e))?;
        Ok(tmp)
    }

    /// Renames `tmp` over `path`, first keeping any old content aside.
    fn install(&mut self, t: &Target, path: &Path, tmp: &Path) -> Result<(), Error> {
        let backup = match fs::symlink_metadata(path) {
            Ok(m) if m.is_file() => Some(keep_aside(t, path)?),
            Ok(_) => {
                return Err(Error::Usage(format!(
                    "{}: {} changed while lossprism was writing (it is no longer a regular \
                     file); nothing was replaced",
                    t.flag,
                    t.given.display()
                )))
            }
            Err(e) if e.kind() == io::ErrorKind::NotFound => None,
            Err(e) => return Err(Error::io(&t.given, &e)),
        };
        self.installs.push(Install {
            target: path.to_path_buf(),
            backup,
            renamed: false,
        });
        rename_into_place(tmp, path).map_err(|e| Error::io(&t.given, &e))?;
        self.temps.retain(|x| x != tmp);
        if let Some(last) = self.installs.last_mut() {
            last.renamed = true;
        }
        Ok(())
    }

    /// Success: drops the copies of old contents.
    fn finish(&mut self) {
        for i in &self.installs {
            if let Some(b) = &i.backup {
                let _ = fs::remove_file(b);
            }
        }
        self.closed = true;
    }

    /// Failure: restores old contents, removes new files and temporaries, and returns `err`
    /// with a note on anything that could not be undone.
    fn abort(&mut self, err: Error) -> Error {
        let problems = self.roll_back();
        if problems.is_empty() {
            return err;
        }
        let note = format!("; also {}", problems.join("; "));
        match err {
            Error::Usage(m) => Error::Usage(m + &note),
            Error::Io { path, message } => Error::Io {
                path,
                message: message + &note,
            },
            other => Error::Usage(format!("{other}{note}")),
        }
    }

    fn roll_back(&mut self) -> Vec<String> {
        let mut problems = Vec::new();
        if self.closed {
            return problems;
        }
        self.closed = true;
        for i in self.installs.iter().rev() {
            match (&i.backup, i.renamed) {
                (Some(b), true) => {
                    if let Err(e) = fs::rename(b, &i.target) {
                        problems.push(format!(
                            "could not restore {} ({e}); its old content is in {}",
                            i.target.display(),
                            b.display()
                        ));
                    }
                }
                (Some(b), false) => {
                    if let Err(e) = fs::remove_file(b) {
                        problems.push(format!(
                            "could not remove the copy kept aside {} ({e})",
                            b.display()
                        ));
                    }
                }
                (None, true) => {
                    if let Err(e) = fs::remove_file(&i.target) {
                        problems.push(format!(
                            "could not remove the new file {} ({e})",
                            i.target.display()
                        ));
                    }
                }
                (None, false) => {}
            }
        }
        for tmp in &self.temps {
            let _ = fs::remove_file(tmp);
        }
        problems
    }
}

impl Drop for Transaction {
    fn drop(&mut self) {
        // Only reached unfinished if something panicked mid-commit.
        let _ = self.roll_back();
    }
}

/// Keeps the content of the regular file `path` under a backup name in the same folder: a hard
/// link (no copying, same inode), or a copy where the file system has no hard links.
fn keep_aside(t: &Target, path: &Path) -> Result<PathBuf, Error> {
    let (dir, name) = split(path);
    for _ in 0..100 {
        let backup = dir.join(side_name(name, "bak"));
        match fs::hard_link(path, &backup) {
            Ok(()) => return Ok(backup),
            Err(e) if e.kind() == io::ErrorKind::AlreadyExists => continue,
            Err(_) => return copy_aside(t, path, &backup),
        }
    }
    Err(Error::Io {
        path: t.given.clone(),
        message: "cannot find a free backup name".to_string(),
    })
}

fn copy_aside(t: &Target, path: &Path, backup: &Path) -> Result<PathBuf, Error> {
    let copy = || -> io::Result<()> {
        let mut from = File::open(path)?;
        let mut to = OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(backup)?;
        io::copy(&mut from, &mut to)?;
        to.sync_all()
    };
    match copy() {
        Ok(()) => Ok(backup.to_path_buf()),
        Err(e) => {
            if e.kind() != io::ErrorKind::AlreadyExists {
                let _ = fs::remove_file(backup);
            }
            Err(Error::Io {
                path: t.given.clone(),
                message: format!("cannot keep the old content aside: {e}"),
            })
        }
    }
}

#[cfg(test)]
thread_local! {
    /// Test hook: `Some(n)` makes the rename of the n-th staged output (0-based) of this thread's
    /// next commits fail.
    static FAIL_RENAME: std::cell::Cell<Option<usize>> = const { std::cell::Cell::new(None) };
}

fn rename_into_place(tmp: &Path, target: &Path) -> io::Result<()> {
    #[cfg(test)]
    {
        let fail = FAIL_RENAME.with(|c| match c.get() {
            Some(0) => {
                c.set(None);
                true
            }
            Some(n) => {
                c.set(Some(n - 1));
                false
            }
            None => false,
        });
        if fail {
            return Err(io::Error::other("injected rename failure"));
        }
    }
    fs::rename(tmp, target)
}

/// Opens an existing non-regular file for writing: no creation, no truncation, and
/// non-blocking, so a FIFO without a reader is an error instead of a hang.
fn open_in_place(t: &Target, path: &Path, kind: Stream) -> Result<File, Error> {
    let mut options = OpenOptions::new();
    options.write(true);
    if kind == Stream::ProcFile {
        options.append(true);
    }
    sys::no_wait(&mut options);
    options.open(path).map_err(|e| {
        if kind == Stream::Fifo && e.raw_os_error() == Some(sys::ENXIO) {
            Error::Io {
                path: t.given.clone(),
                message: "no process is reading this FIFO (start the reader first); nothing \
                          was written"
                    .to_string(),
            }
        } else {
            Error::io(&t.given, &e)
        }
    })
}

/// Sleeps a little after a `WouldBlock`, or fails once nothing has been accepted for
/// [`STALL_LIMIT`] since `progress`.
fn wait(progress: Instant, nap: &mut Duration) -> io::Result<()> {
    if progress.elapsed() > STALL_LIMIT {
        return Err(io::Error::new(
            io::ErrorKind::TimedOut,
            format!(
                "the reader accepted nothing for {} s; gave up",
                STALL_LIMIT.as_secs_f64()
            ),
        ));
    }
    std::thread::sleep(*nap);
    *nap = (*nap * 2).min(Duration::from_millis(50));
    Ok(())
}

static STDOUT_CLOSED: std::sync::atomic::AtomicBool = std::sync::atomic::AtomicBool::new(false);

/// Records that standard output was closed when the process started (the binary reads it before
/// the Rust runtime reopens the descriptor on `/dev/null`, where writes succeed and vanish).
pub fn set_stdout_closed_at_start(closed: bool) {
    STDOUT_CLOSED.store(closed, std::sync::atomic::Ordering::Relaxed);
}

/// Whether standard output was closed at start ([`set_stdout_closed_at_start`]; never in a
/// library caller that did not say so).
pub fn stdout_closed_at_start() -> bool {
    STDOUT_CLOSED.load(std::sync::atomic::Ordering::Relaxed)
}

/// Writes `text` to standard output. A failed write (a closed pipe, a full disk, a closed
/// descriptor) is an error naming standard output — never the panic of `print!`.
pub fn say(text: &str) -> Result<(), Error> {
    // A standard output closed at start was chosen by whoever started the process: words
    // printed there are discarded (a run that would print only there is refused before it
    // starts, `commands::run`).
    if stdout_closed_at_start() {
        return Ok(());
    }
    let text = terminal_text(text);
    let mut out = io::stdout().lock();
    write_patiently(&mut out, text.as_bytes()).map_err(|e| Error::io("standard output", &e))
}

/// `text` with the control characters other than newline and tab, and the bidirectional marks
/// and overrides, written as `\u{1b}`: the words printed for a person carry names from the
/// user's files (columns, levels, paths), and an escape sequence in one must not reach the
/// terminal as one.
fn terminal_text(text: &str) -> std::borrow::Cow<'_, str> {
    // The bidirectional marks and overrides too: a column name holding U+202E printed the rest
    // of its line backwards (sweep 71; a scenario's `name` refuses them).
    let escaped = |c: char| (c.is_control() && c != '\n' && c != '\t') || crate::fmt::reorders(c);
    if !text.chars().any(escaped) {
        return std::borrow::Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 8);
    for c in text.chars() {
        if escaped(c) {
            out.extend(c.escape_default());
        } else {
            out.push(c);
        }
    }
    std::borrow::Cow::Owned(out)
}

/// Writes `text` to standard error, ignoring a failed write: there is nowhere left to report it,
/// and `eprint!` would panic.
pub fn tell(text: &str) {
    let text = terminal_text(text);
    match stderr_route() {
        Route::Stderr => {}
        Route::Stdout => {
            let mut out = io::stdout().lock();
            let _ = out.write_all(text.as_bytes()).and_then(|_| out.flush());
            return;
        }
        Route::Nowhere => return,
    }
    let mut err = io::stderr().lock();
    let _ = err.write_all(text.as_bytes()).and_then(|_| err.flush());
}

/// `print!` without its panic, for functions returning `Result<_, Error>`: [`say`] of the
/// formatted text, a failed write returned as the error (exit 2).
macro_rules! out {
    ($($t:tt)*) => {
        $crate::output::say(&format!($($t)*))?
    };
}
pub(crate) use out;

/// `println!` without its panic ([`out!`] with a newline).
macro_rules! outln {
    ($($t:tt)*) => {
        $crate::output::say(&format!("{}\n", format_args!($($t)*)))?
    };
}
pub(crate) use outln;

/// `eprint!` without its panic: [`tell`] of the formatted text.
macro_rules! note {
    ($($t:tt)*) => {
        $crate::output::tell(&format!($($t)*))
    };
}
pub(crate) use note;

/// `eprintln!` without its panic ([`note!`] with a newline).
macro_rules! noteln {
    ($($t:tt)*) => {
        $crate::output::tell(&format!("{}\n", format_args!($($t)*)))
    };
}
pub(crate) use noteln;

/// Writes all of `bytes`, waiting out a full pipe (the file may be non-blocking) for at most
/// [`STALL_LIMIT`] without progress.
fn write_patiently(w: &mut impl Write, bytes: &[u8]) -> io::Result<()> {
    let mut rest = bytes;
    let mut progress = Instant::now();
    let mut nap = Duration::from_millis(1);
    while !rest.is_empty() {
        match w.write(rest) {
            Ok(0) => return Err(io::Error::from(io::ErrorKind::WriteZero)),
            Ok(n) => {
                rest = &rest[n..];
                progress = Instant::now();
                nap = Duration::from_millis(1);
            }
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(e) if e.kind() == io::ErrorKind::WouldBlock => wait(progress, &mut nap)?,
            Err(e) => return Err(e),
        }
    }
    loop {
        match w.flush() {
            Ok(()) => return Ok(()),
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(e) if e.kind() == io::ErrorKind::WouldBlock => wait(progress, &mut nap)?,
            Err(e) => return Err(e),
        }
    }
}

/// Platform details: file identity, file kinds, open flags.
#[cfg(unix)]
mod sys {
    use std::fs::{File, Metadata, OpenOptions};
    use std::os::unix::fs::{FileTypeExt, MetadataExt, OpenOptionsExt};

    /// "No such device or address": what opening a FIFO without a reader non-blocking gives.
    pub const ENXIO: i32 = 6;

    // (O_NONBLOCK, O_NOCTTY). The std library has no constants for them and the libc crate is
    // not a dependency; these are the kernel ABI values.
    #[cfg(all(
        any(target_os = "linux", target_os = "android"),
        any(target_arch = "mips", target_arch = "mips64")
    ))]
    const FLAGS: (i32, i32) = (0x80, 0x800);
    #[cfg(all(
        any(target_os = "linux", target_os = "android"),
        any(target_arch = "sparc", target_arch = "sparc64")
    ))]
    const FLAGS: (i32, i32) = (0x4000, 0x8000);
    #[cfg(all(
        any(target_os = "linux", target_os = "android"),
        not(any(
            target_arch = "mips",
            target_arch = "mips64",
            target_arch = "sparc",
            target_arch = "sparc64"
        ))
    ))]
    const FLAGS: (i32, i32) = (0o4000, 0o400);
    // The BSDs and macOS never give a process a controlling terminal on open.
    #[cfg(any(
        target_os = "macos",
        target_os = "ios",
        target_os = "freebsd",
        target_os = "netbsd",
        target_os = "openbsd",
        target_os = "dragonfly"
    ))]
    const FLAGS: (i32, i32) = (0x4, 0);
    // Elsewhere, open normally (a FIFO without a reader then blocks).
    #[cfg(not(any(
        target_os = "linux",
        target_os = "android",
        target_os = "macos",
        target_os = "ios",
        target_os = "freebsd",
        target_os = "netbsd",
        target_os = "openbsd",
        target_os = "dragonfly"
    )))]
    const FLAGS: (i32, i32) = (0, 0);

    /// Device and inode.
    pub fn dev_ino(m: &Metadata) -> Option<(u64, u64)> {
        Some((m.dev(), m.ino()))
    }

    /// Tries an exclusive `flock` on `file` without waiting: `Ok(false)` when another open
    /// file description holds it.
    pub fn try_lock_exclusive(file: &File) -> std::io::Result<bool> {
        use std::os::unix::io::AsRawFd;
        loop {
            // SAFETY: flock on a descriptor `file` owns for the call; it only takes a lock.
            if unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) } == 0 {
                return Ok(true);
            }
            let e = std::io::Error::last_os_error();
            match e.kind() {
                std::io::ErrorKind::Interrupted => continue,
                std::io::ErrorKind::WouldBlock => return Ok(false),
                _ => return Err(e),
            }
        }
    }

    pub fn is_fifo(m: &Metadata) -> bool {
        m.file_type().is_fifo()
    }

    pub fn is_socket(m: &Metadata) -> bool {
        m.file_type().is_socket()
    }

    /// Non-blocking open (and no controlling terminal from a tty).
    pub fn no_wait(options: &mut OpenOptions) {
        options.custom_flags(FLAGS.0 | FLAGS.1);
    }

    /// The folder of `path` has the sticky bit (a shared folder such as `/tmp`) and neither
    /// it nor the file `path` belongs to this process's user (who is not root): the kernel
    /// refuses to rename over the file, or to remove a link to it, there.
    pub fn sticky_forbids(path: &std::path::Path) -> bool {
        // SAFETY: geteuid has no preconditions and cannot fail.
        let me = unsafe { libc::geteuid() };
        if me == 0 {
            return false;
        }
        let dir = match path.parent() {
            Some(p) if !p.as_os_str().is_empty() => p,
            _ => std::path::Path::new("."),
        };
        match (std::fs::metadata(dir), std::fs::symlink_metadata(path)) {
            (Ok(d), Ok(f)) => d.mode() & 0o1000 != 0 && d.uid() != me && f.uid() != me,
            _ => false,
        }
    }

    /// Gives `file` the owner of `old` where permitted (as root); otherwise leaves it.
    pub fn copy_owner(file: &File, old: &Metadata) {
        if let Ok(new) = file.metadata() {
            if new.uid() != old.uid() || new.gid() != old.gid() {
                let _ = std::os::unix::fs::fchown(file, Some(old.uid()), Some(old.gid()));
            }
        }
    }
}

/// Platform details where there are no device numbers, FIFOs or open flags to speak of.
#[cfg(not(unix))]
mod sys {
    use std::fs::{File, Metadata, OpenOptions};

    pub const ENXIO: i32 = -1;

    pub fn dev_ino(_: &Metadata) -> Option<(u64, u64)> {
        None
    }

    pub fn sticky_forbids(_: &std::path::Path) -> bool {
        false
    }

    pub fn try_lock_exclusive(_: &File) -> std::io::Result<bool> {
        Ok(true)
    }

    pub fn is_fifo(_: &Metadata) -> bool {
        false
    }

    pub fn is_socket(_: &Metadata) -> bool {
        false
    }

    pub fn no_wait(_: &mut OpenOptions) {}

    pub fn copy_owner(_: &File, _: &Metadata) {}
}

#[cfg(all(test, target_os = "linux"))]
mod tests {
    use super::*;

    #[test]
    fn each_kind_replaces_only_its_own_files() {
        let ok = |k: Kind, head: &str| k.accepts(head.as_bytes());
        for k in [Kind::Any, Kind::Csv, Kind::Svg, Kind::Json, Kind::Html] {
            assert!(ok(k, ""), "{k:?}: an empty file");
            assert!(ok(k, " \n\t"), "{k:?}: whitespace");
        }
        assert!(ok(Kind::Any, "name = \"s\"\n[data]"));
        // A CSV output replaces an older table or any other file, never a lossprism document
        // (a checkpoint, a result or a ledger would be lost under a table).
        assert!(ok(
            Kind::Csv,
            "family,max_depth,expected_loss\ntree,1,0.5\n"
        ));
        assert!(ok(Kind::Csv, "{\"hello\": 1}"));
        for doc in [
            "{\"format\":\"lossprism-part/2\",\"checkpoint\":true}",
            "{\n  \"format\": \"lossprism-result/3\"",
            "{\"format\":\"lossprism-holdout-ledger/1\"}",
            // Keys sorted (`jq -S`): the format after others.
            "{\"best\": {\"value\": 3}, \"format\": \"lossprism-result/3\"}",
        ] {
            assert!(!ok(Kind::Csv, doc), "{doc}");
        }
        assert!(ok(Kind::Svg, "<svg width=\"9\">"));
        assert!(ok(Kind::Svg, "\u{feff}<?xml version=\"1.0\"?>\n<svg>"));
        assert!(!ok(Kind::Svg, "<?xml version=\"1.0\"?>\n<project>"));
        assert!(ok(
            Kind::Svg,
            "<!-- drawn by hand -->\n<!DOCTYPE svg>\n<svg>"
        ));
        assert!(!ok(Kind::Svg, "<!-- <svg> in a comment -->\n<html>"));
        assert!(!ok(Kind::Svg, "x,y\n1,2\n"));
        assert!(ok(Kind::Json, "{\n  \"format\": \"lossprism-result/2\","));
        assert!(ok(
            Kind::Json,
            "{\"format\":\"lossprism-part/2\",\"checkpoint\":false"
        ));
        assert!(!ok(
            Kind::Json,
            "{\"format\":\"lossprism-part/2\",\"checkpoint\": true"
        ));
        assert!(!ok(Kind::Json, "{\"settings\": 1}"));
        assert!(!ok(Kind::Json, "name = \"lossprism-result/2\""));
        assert!(!ok(Kind::Json, "{\"note\": \"see lossprism-result/2\"}"));
        assert!(ok(Kind::Html, "<!DOCTYPE html>\n<html lang=\"en\">"));
        assert!(ok(Kind::Html, "<html>"));
        assert!(!ok(Kind::Html, "<svg>"));
        assert!(ok(
            Kind::Twin,
            "# Simulated twin\n[data]\nsource = \"twin\"\n"
        ));
        assert!(ok(Kind::Twin, "[data]\n  source=\"twin\"  # a comment\n"));
        assert!(!ok(Kind::Twin, "[data]\nsource = \"table\"\n"));
        assert!(!ok(Kind::Twin, "import sys\n"));
    }
    use std::os::unix::fs::{FileTypeExt, MetadataExt, OpenOptionsExt, PermissionsExt};
    use std::process::Command;
    use std::sync::mpsc;

    #[test]
    fn terminal_text_escapes_control_characters_but_keeps_lines_and_tabs() {
        assert_eq!(terminal_text("a\tb\nc"), "a\tb\nc");
        assert_eq!(
            terminal_text("col \u{1b}[31mred\u{7}\r"),
            "col \\u{1b}[31mred\\u{7}\\r"
        );
        assert_eq!(terminal_text("plain ± σ̂²"), "plain ± σ̂²");
        assert_eq!(terminal_text("b\u{202e}x"), "b\\u{202e}x");
    }

    /// Sorted file names in `dir` (temporaries and backups are hidden files, so they show).
    fn listing(dir: &Path) -> Vec<String> {
        let mut v: Vec<String> = fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    }

    fn read(p: &Path) -> String {
        fs::read_to_string(p).unwrap()
    }

    fn message(r: Result<(), Error>) -> String {
        match r {
            Ok(()) => panic!("expected an error"),
            Err(e) => e.to_string(),
        }
    }

    /// Makes a node with `mknod`; false (with a note) where that is not permitted.
    fn mknod(path: &Path, major: &str, minor: &str) -> bool {
        let ok = Command::new("mknod")
            .arg(path)
            .args(["c", major, minor])
            .status()
            .map(|s| s.success())
            .unwrap_or(false);
        if !ok {
            eprintln!("note: mknod failed (not root?); skipping the device test");
        }
        ok
    }

    fn mkfifo(path: &Path) {
        let ok = Command::new("mkfifo").arg(path).status().unwrap().success();
        assert!(ok, "mkfifo failed");
    }

    /// Opens the read end of a FIFO without waiting for a writer.
    fn fifo_reader(path: &Path) -> File {
        OpenOptions::new()
            .read(true)
            .custom_flags(0o4000)
            .open(path)
            .unwrap()
    }

    #[test]
    fn char_device_is_written_in_place_and_stays_a_device() {
        let d = tempfile::tempdir().unwrap();
        let dev = d.path().join("null");
        if !mknod(&dev, "1", "3") {
            return;
        }
        let ino = fs::metadata(&dev).unwrap().ino();
        write_one("--out", &dev, &[], b"{\"x\": 1}\n").unwrap();
        let m = fs::symlink_metadata(&dev).unwrap();
        assert!(m.file_type().is_char_device(), "device was replaced");
        assert_eq!(m.ino(), ino);
        assert_eq!(listing(d.path()), ["null"]);
    }

    #[test]
    fn failing_device_write_rolls_back_the_regular_outputs() {
        let d = tempfile::tempdir().unwrap();
        let full = d.path().join("full");
        if !mknod(&full, "1", "7") {
            return;
        }
        let r = d.path().join("r.json");
        fs::write(&r, "OLD").unwrap();
        let mut set = Outputs::new();
        let a = set.output("--out", &r).unwrap();
        let b = set.output("--csv", &full).unwrap();
        let msg = message(set.commit(vec![(a, b"NEW".to_vec()), (b, b"csv".to_vec())]));
        assert!(msg.contains("full"), "{msg}");
        assert_eq!(read(&r), "OLD");
        assert!(fs::metadata(&full).unwrap().file_type().is_char_device());
        assert_eq!(listing(d.path()), ["full", "r.json"]);
    }

    #[test]
    fn fifo_with_a_reader_receives_the_bytes_and_stays_a_fifo() {
        let d = tempfile::tempdir().unwrap();
        let fifo = d.path().join("pipe");
        mkfifo(&fifo);
        // More than a pipe buffer, so the writer must wait for the reader.
        let bytes: Vec<u8> = (0..300_000u32).map(|i| (i % 251) as u8).collect();
        let mut reader = fifo_reader(&fifo);
        let want = bytes.len();
        let handle = std::thread::spawn(move || {
            let mut got = Vec::new();
            let mut buf = [0u8; 8192];
            let deadline = Instant::now() + Duration::from_secs(20);
            while got.len() < want && Instant::now() < deadline {
                match io::Read::read(&mut reader, &mut buf) {
                    Ok(0) => std::thread::sleep(Duration::from_millis(1)),
                    Ok(n) => got.extend_from_slice(&buf[..n]),
                    Err(e) if e.kind() == io::ErrorKind::WouldBlock => {
                        std::thread::sleep(Duration::from_millis(1))
                    }
                    Err(e) => panic!("{e}"),
                }
            }
            got
        });
        write_one("--out", &fifo, &[], bytes.clone()).unwrap();
        let got = handle.join().unwrap();
        assert!(got == bytes, "the reader got {} bytes", got.len());
        assert!(fs::symlink_metadata(&fifo).unwrap().file_type().is_fifo());
        assert_eq!(listing(d.path()), ["pipe"]);
    }

    #[test]
    fn fifo_without_a_reader_fails_at_once_and_changes_nothing() {
        let d = tempfile::tempdir().unwrap();
        let fifo = d.path().join("pipe");
        mkfifo(&fifo);
        let r = d.path().join("r.json");
        fs::write(&r, "OLD").unwrap();
        let (tx, rx) = mpsc::channel();
        let (fifo2, r2) = (fifo.clone(), r.clone());
        std::thread::spawn(move || {
            let start = Instant::now();
            let mut set = Outputs::new();
            let a = set.output("--out", &r2).unwrap();
            let b = set.output("--csv", &fifo2).unwrap();
            let res = set.commit(vec![(a, b"NEW".to_vec()), (b, b"csv".to_vec())]);
            let _ = tx.send((res, start.elapsed()));
        });
        let (res, took) = rx
            .recv_timeout(Duration::from_secs(3))
            .expect("writing to a FIFO without a reader hung");
        let msg = message(res);
        assert!(took < Duration::from_millis(500), "took {took:?}");
        assert!(msg.contains("no process is reading"), "{msg}");
        assert_eq!(read(&r), "OLD");
        assert!(fs::symlink_metadata(&fifo).unwrap().file_type().is_fifo());
        assert_eq!(listing(d.path()), ["pipe", "r.json"]);
    }

    #[test]
    fn fifo_reader_that_stops_reading_is_given_up_on() {
        let d = tempfile::tempdir().unwrap();
        let fifo = d.path().join("pipe");
        mkfifo(&fifo);
        let _reader = fifo_reader(&fifo); // present, never reads
        let (tx, rx) = mpsc::channel();
        let fifo2 = fifo.clone();
        std::thread::spawn(move || {
            let _ = tx.send(write_one("--out", &fifo2, &[], vec![b'x'; 1 << 20]));
        });
        let res = rx
            .recv_timeout(STALL_LIMIT + Duration::from_secs(3))
            .expect("writing to a stalled FIFO hung");
        let msg = message(res);
        assert!(msg.contains("accepted nothing"), "{msg}");
    }

    #[test]
    fn symlink_to_a_regular_file_updates_the_target_and_keeps_the_link() {
        let d = tempfile::tempdir().unwrap();
        let real = d.path().join("real.json");
        let link = d.path().join("link.json");
        fs::write(&real, "OLD").unwrap();
        std::os::unix::fs::symlink("real.json", &link).unwrap();
        write_one("--out", &link, &[], b"NEW").unwrap();
        assert_eq!(read(&real), "NEW");
        assert!(fs::symlink_metadata(&link)
            .unwrap()
            .file_type()
            .is_symlink());
        assert_eq!(fs::read_link(&link).unwrap(), Path::new("real.json"));
        assert_eq!(listing(d.path()), ["link.json", "real.json"]);
    }

    #[test]
    fn dangling_symlink_creates_its_target_and_keeps_the_link() {
        let d = tempfile::tempdir().unwrap();
        let link = d.path().join("link.json");
        std::os::unix::fs::symlink("made.json", &link).unwrap();
        write_one("--out", &link, &[], b"NEW").unwrap();
        assert_eq!(read(&d.path().join("made.json")), "NEW");
        assert!(fs::symlink_metadata(&link)
            .unwrap()
            .file_type()
            .is_symlink());
        assert_eq!(listing(d.path()), ["link.json", "made.json"]);
    }

    #[test]
    fn descriptor_link_like_dev_stdout_is_written_in_place() {
        // `/dev/stdout` with standard output redirected to a file: a link to /proc/self/fd/N.
        let d = tempfile::tempdir().unwrap();
        let sink = d.path().join("sink.txt");
        fs::write(&sink, "A\n").unwrap();
        let open = OpenOptions::new().append(true).open(&sink).unwrap();
        let ino = open.metadata().unwrap().ino();
        let link = d.path().join("stdout");
        let fd = std::os::fd::AsRawFd::as_raw_fd(&open);
        std::os::unix::fs::symlink(format!("/proc/self/fd/{fd}"), &link).unwrap();
        write_one("--out", &link, &[], b"B\n").unwrap();
        assert_eq!(read(&sink), "A\nB\n");
        assert_eq!(fs::metadata(&sink).unwrap().ino(), ino, "sink was replaced");
        assert!(fs::symlink_metadata(&link)
            .unwrap()
            .file_type()
            .is_symlink());
        assert_eq!(listing(d.path()), ["sink.txt", "stdout"]);
        // The real /dev/stdout is never staged and renamed over, whatever it is here.
        if let Ok(t) = examine("--out", Path::new("/dev/stdout"), false, Kind::Any) {
            assert!(!matches!(t.place, Place::Staged(_)), "{:?}", t.place);
        }
        drop(open);
    }

    #[test]
    fn socket_is_refused() {
        let d = tempfile::tempdir().unwrap();
        let sock = d.path().join("s.sock");
        let _listener = std::os::unix::net::UnixListener::bind(&sock).unwrap();
        let msg = message(write_one("--out", &sock, &[], b"x"));
        assert!(msg.contains("--out names a socket"), "{msg}");
        assert!(fs::symlink_metadata(&sock).unwrap().file_type().is_socket());
    }

    #[test]
    fn output_naming_an_input_is_refused_in_every_spelling() {
        let d = tempfile::tempdir().unwrap();
        let s = d.path().join("s.toml");
        fs::write(&s, "SCENARIO").unwrap();
        fs::create_dir(d.path().join("sub")).unwrap();
        std::os::unix::fs::symlink("s.toml", d.path().join("alias.toml")).unwrap();
        fs::hard_link(&s, d.path().join("hard.toml")).unwrap();
        let before = listing(d.path());
        let spellings = [
            s.clone(),
            d.path().join(".").join("s.toml"),
            d.path().join("sub").join("..").join("s.toml"),
            d.path().join("alias.toml"),
            d.path().join("hard.toml"),
        ];
        for out in &spellings {
            let msg = message(write_one("--out", out, &[("the scenario file", &s)], b"X"));
            assert!(
                msg.contains("--out names the scenario file") && msg.contains("an input"),
                "{}: {msg}",
                out.display()
            );
            assert_eq!(read(&s), "SCENARIO");
            assert_eq!(listing(d.path()), before);
        }
        // The input spelled differently from the output, the other way round.
        let msg = message(write_one(
            "--out",
            &s,
            &[("the checkpoint file", &d.path().join("alias.toml"))],
            b"X",
        ));
        assert!(msg.contains("the checkpoint file"), "{msg}");
        assert_eq!(read(&s), "SCENARIO");
    }

    #[test]
    fn input_registered_after_the_output_is_caught_at_commit() {
        let d = tempfile::tempdir().unwrap();
        let p1 = d.path().join("p1.json");
        fs::write(&p1, "PART").unwrap();
        let mut set = Outputs::new();
        let id = set.output("--out", &p1).unwrap();
        set.input("a part file", &p1);
        assert!(set.check().is_err());
        let msg = message(set.commit(vec![(id, b"MERGED".to_vec())]));
        assert!(msg.contains("--out names a part file"), "{msg}");
        assert_eq!(read(&p1), "PART");
        assert_eq!(listing(d.path()), ["p1.json"]);
    }

    #[test]
    fn output_naming_an_input_that_does_not_exist_yet_is_refused() {
        let d = tempfile::tempdir().unwrap();
        let ck = d.path().join("ck.json");
        let msg = message(write_one(
            "--out",
            &d.path().join(".").join("ck.json"),
            &[("the checkpoint file", &ck)],
            b"X",
        ));
        assert!(msg.contains("the checkpoint file"), "{msg}");
        assert!(listing(d.path()).is_empty());
    }

    #[test]
    fn two_outputs_naming_one_file_are_refused_naming_both_flags() {
        let d = tempfile::tempdir().unwrap();
        // Not yet existing, two spellings.
        let r = d.path().join("r.json");
        let msg = message(check(
            &[],
            &[("--out", &r), ("--csv", &d.path().join(".").join("r.json"))],
        ));
        assert!(msg.contains("--csv names the same file as --out"), "{msg}");
        assert!(listing(d.path()).is_empty());
        // Existing, through a hard link and a symlink.
        fs::write(&r, "OLD").unwrap();
        fs::hard_link(&r, d.path().join("hard.json")).unwrap();
        std::os::unix::fs::symlink("r.json", d.path().join("soft.json")).unwrap();
        for other in ["hard.json", "soft.json"] {
            let mut set = Outputs::new();
            set.output("--out", &r).unwrap();
            let msg = message(set.output("--csv", &d.path().join(other)).map(|_| ()));
            assert!(msg.contains("--csv names the same file as --out"), "{msg}");
        }
        assert_eq!(read(&r), "OLD");
        assert_eq!(listing(d.path()), ["hard.json", "r.json", "soft.json"]);
    }

    #[test]
    fn standard_output_twice_is_refused() {
        let mut set = Outputs::new();
        set.output("--out", Path::new("-")).unwrap();
        let msg = message(set.output("--csv", Path::new("-")).map(|_| ()));
        assert!(
            msg.contains("--csv") && msg.contains("--out") && msg.contains("standard output"),
            "{msg}"
        );
    }

    #[test]
    fn folder_or_missing_folder_is_refused_before_anything_is_written() {
        let d = tempfile::tempdir().unwrap();
        let r = d.path().join("r.json");
        fs::write(&r, "OLD").unwrap();
        let sub = d.path().join("d");
        fs::create_dir(&sub).unwrap();
        let missing = d.path().join("nope").join("x.svg");
        let trailing = PathBuf::from(format!("{}/", d.path().join("t.csv").display()));

        let msg = message(check(&[], &[("--out", &r), ("--csv", &sub)]));
        assert!(msg.contains("--csv names a folder"), "{msg}");
        let msg = message(check(&[], &[("--out", &r), ("--plot", &missing)]));
        assert!(
            msg.contains("--plot") && msg.contains("does not exist"),
            "{msg}"
        );
        let msg = message(check(&[], &[("--out", &trailing)]));
        assert!(msg.contains("names a folder"), "{msg}");

        // The file system changes between the check and the commit: caught before writing.
        let mut set = Outputs::new();
        let a = set.output("--out", &r).unwrap();
        let late = d.path().join("late.csv");
        let b = set.output("--csv", &late).unwrap();
        fs::create_dir(&late).unwrap();
        let msg = message(set.commit(vec![(a, b"NEW".to_vec()), (b, b"csv".to_vec())]));
        assert!(msg.contains("--csv names a folder"), "{msg}");
        assert_eq!(read(&r), "OLD");
        assert_eq!(listing(d.path()), ["d", "late.csv", "r.json"]);
    }

    #[test]
    fn failed_third_rename_rolls_back_the_first_two() {
        for first_exists in [true, false] {
            let d = tempfile::tempdir().unwrap();
            let a = d.path().join("a.json");
            let b = d.path().join("b.csv");
            let c = d.path().join("c.svg");
            if first_exists {
                fs::write(&a, "OLD-A").unwrap();
            }
            fs::write(&b, "OLD-B").unwrap();
            fs::write(&c, "OLD-C").unwrap();
            let before = listing(d.path());
            let mut set = Outputs::new();
            let ia = set.output("--out", &a).unwrap();
            let ib = set.output("--csv", &b).unwrap();
            let ic = set.output("--plot", &c).unwrap();
            FAIL_RENAME.with(|f| f.set(Some(2)));
            let res = set.commit(vec![
                (ia, b"NEW-A".to_vec()),
                (ib, b"NEW-B".to_vec()),
                (ic, b"NEW-C".to_vec()),
            ]);
            FAIL_RENAME.with(|f| f.set(None));
            let msg = message(res);
            assert!(msg.contains("injected rename failure"), "{msg}");
            if first_exists {
                assert_eq!(read(&a), "OLD-A");
            } else {
                assert!(!a.exists(), "the new file was left behind");
            }
            assert_eq!(read(&b), "OLD-B");
            assert_eq!(read(&c), "OLD-C");
            assert_eq!(
                listing(d.path()),
                before,
                "temporaries or backups left behind"
            );
        }
    }

    #[test]
    fn successful_commit_replaces_all_keeps_modes_and_leaves_nothing_behind() {
        let d = tempfile::tempdir().unwrap();
        let a = d.path().join("a.json");
        let b = d.path().join("b.csv");
        fs::write(&a, "OLD-A").unwrap();
        fs::set_permissions(&a, fs::Permissions::from_mode(0o640)).unwrap();
        let mut set = Outputs::new();
        let ia = set.output("--out", &a).unwrap();
        let ib = set.output("--csv", &b).unwrap();
        set.check().unwrap();
        set.commit(vec![(ib, b"NEW-B".to_vec()), (ia, b"NEW-A".to_vec())])
            .unwrap();
        assert_eq!(read(&a), "NEW-A");
        assert_eq!(read(&b), "NEW-B");
        assert_eq!(
            fs::metadata(&a).unwrap().permissions().mode() & 0o7777,
            0o640
        );
        assert_eq!(listing(d.path()), ["a.json", "b.csv"]);
    }

    #[test]
    fn wrong_or_missing_contents_are_errors_and_write_nothing() {
        let d = tempfile::tempdir().unwrap();
        let a = d.path().join("a.json");
        let mut other = Outputs::new();
        let foreign = other.output("--out", &d.path().join("z.json")).unwrap();
        let mut set = Outputs::new();
        let ia = set.output("--out", &a).unwrap();
        let msg = message(set.commit(vec![(foreign, b"X".to_vec())]));
        assert!(msg.contains("internal error"), "{msg}");
        let mut set = Outputs::new();
        set.output("--out", &a).unwrap();
        let ib = set.output("--csv", &d.path().join("b.csv")).unwrap();
        let msg = message(set.commit(vec![(ib, b"X".to_vec())]));
        assert!(msg.contains("nothing to write for --out"), "{msg}");
        let _ = ia;
        assert!(listing(d.path()).is_empty());
    }

    #[test]
    fn side_names_differ_and_carry_the_process_id() {
        let x = side_name(OsStr::new("r.json"), "tmp");
        let y = side_name(OsStr::new("r.json"), "tmp");
        assert_ne!(x, y);
        let pid = std::process::id().to_string();
        assert!(x.to_string_lossy().contains(&pid));
        let long = "é".repeat(200);
        assert!(side_name(OsStr::new(&long), "bak").len() < 255);
    }

    /// Whether the `flock` program (util-linux) is here to hold a lock from another process.
    #[cfg(unix)]
    fn flock_program() -> bool {
        Command::new("flock")
            .arg("--version")
            .output()
            .is_ok_and(|o| o.status.success())
    }

    /// A folder lock is a real `flock` another process sees, let go when dropped; a folder another
    /// process holds is waited for and then refused by name (a `flock DIR lossprism ...`
    /// wrapper: never a hang).
    #[cfg(unix)]
    #[test]
    fn a_folder_lock_excludes_other_processes_and_never_hangs() {
        if !flock_program() {
            eprintln!("note: no flock program; skipping");
            return;
        }
        let d = tempfile::tempdir().unwrap();
        let try_other = || {
            Command::new("flock")
                .args(["-n", "-E", "7"])
                .arg(d.path())
                .arg("true")
                .status()
                .unwrap()
                .code()
        };
        assert_eq!(try_other(), Some(0));
        let lock = FolderLock::take(d.path()).unwrap();
        assert_eq!(try_other(), Some(7), "another process took a held folder");
        drop(lock);
        assert_eq!(try_other(), Some(0));
        // Held by another process for longer than the wait: an error naming the folder.
        let mut holder = Command::new("flock")
            .arg(d.path())
            .args(["sh", "-c", "touch held; sleep 3"])
            .current_dir(d.path())
            .spawn()
            .unwrap();
        let start = Instant::now();
        while !d.path().join("held").exists() {
            assert!(
                start.elapsed() < Duration::from_secs(20),
                "the holder never started"
            );
            std::thread::sleep(Duration::from_millis(10));
        }
        let e = match FolderLock::take(d.path()) {
            Ok(_) => panic!("a held folder was taken"),
            Err(e) => e,
        };
        assert!(
            e.to_string().contains("another process has held a lock"),
            "{e}"
        );
        holder.wait().unwrap();
        assert!(FolderLock::take(d.path()).is_ok());
    }
}
