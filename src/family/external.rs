//! The external-process family (`family = "external"`): an estimator written in any language,
//! run as long-lived child processes that speak the line protocol of
//! `docs/external-protocol.md` over their standard input and output.
//!
//! # Processes
//!
//! Processes are started lazily, on the first fit that finds no idle one, so there are at most
//! as many as there are worker threads fitting at the same time ("one per worker thread"). A
//! fit checks a process out of a pool, sends one request, reads the answer and checks the
//! process back in. Each process has three helper threads: one writes requests (so a process
//! that stops reading cannot block lossprism), one reads standard output line by line into a
//! channel (so every read can time out), one keeps the last lines of standard error (quoted in
//! error messages).
//!
//! # Failures
//!
//! Every request has a deadline (`timeout_seconds`, default 60). A process that does not answer
//! in time, exits, answers with the wrong number of lines or values, or sends something that is
//! not a finite number is killed and waited for, and the fit fails with a one-line message
//! naming the command and the request. After the first failure the family refuses further fits
//! with the same message, so a run stops at once instead of starting a new process per block.
//! Idle processes are sent end-of-file, given half a second to exit, then killed and waited for
//! when the family is dropped: no process outlives the run.
//!
//! # Numbers
//!
//! lossprism writes every number with 17 significant digits in scientific notation
//! (`{:.16e}`), which any correctly rounding parser reads back to the same `f64`; the process
//! may answer in any decimal notation (`repr` of a Python float is exact).

use std::collections::VecDeque;
use std::fmt::Write as _;
use std::io::{BufRead, BufReader, Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Child, ChildStdin, Command, Stdio};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError, Sender};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use ndarray::{ArrayViewMut2, ArrayViewMut3};

use super::{BuildContext, Family, FitError, FitInput, OptionError, Options, Out, Task};

/// Builds `family = "external"` from `command`, `knob`, `timeout_seconds` and
/// `larger_is_simpler`.
pub fn build(opts: &mut Options, cx: &BuildContext<'_>) -> Result<Arc<dyn Family>, OptionError> {
    let missing = |key: &str, message: &str| OptionError {
        key: key.to_string(),
        message: message.to_string(),
    };
    let command = opts.strings("command")?.ok_or_else(|| {
        missing(
            "command",
            "family `external` needs `command`, e.g. command = [\"python3\", \"my_model.py\"]",
        )
    })?;
    let knob = opts.string("knob")?.ok_or_else(|| {
        missing(
            "knob",
            "family `external` needs `knob`, the name of the knob the grid sets",
        )
    })?;
    let timeout = opts
        .number("timeout_seconds", f64::MIN_POSITIVE, 1e6)?
        .unwrap_or(DEFAULT_TIMEOUT_SECONDS);
    let larger_is_simpler = opts.boolean("larger_is_simpler")?.unwrap_or(false);
    let mut fam =
        ExternalFamily::new(&command, &knob, timeout, cx.base).map_err(|e| OptionError {
            key: e.key.to_string(),
            message: e.message,
        })?;
    fam.larger_is_simpler = larger_is_simpler;
    Ok(Arc::new(fam))
}

/// Version of the line protocol lossprism speaks (the `hello` line carries it). A process may
/// answer `ready 2` (this version: a `seed` line in every request, class probabilities on
/// request) or `ready 1` (version 1: no seed, labels only).
pub const PROTOCOL_VERSION: u32 = 2;

/// Longest line accepted on a process's standard error (longer lines are cut; the rest is
/// discarded as it arrives).
const STDERR_LINE_MAX: usize = 2000;

/// File name endings of the scripts an external estimator's `command` can name: such a word
/// must name a file that exists (checked when the scenario is read), and the run's fingerprint
/// covers its content (`shard::fingerprint`).
pub const SCRIPT_EXTENSIONS: [&str; 10] =
    ["py", "r", "jl", "sh", "pl", "rb", "js", "m", "lua", "awk"];

/// The modules a command runs with Python's `-m`, in every spelling: `-m pkg.mod`, `-mpkg.mod`,
/// and `-m` after other one-letter switches (`-um pkg.mod`, `-Bmpkg.mod`); a switch that takes
/// the rest of its word (`-c`, `-W`, `-X`) ends the search in that word. A word of another
/// program that happens to read so names no existing file, and adds nothing.
fn python_modules(command: &[String]) -> Vec<&str> {
    let mut out = Vec::new();
    for (i, w) in command.iter().enumerate() {
        let Some(flags) = w.strip_prefix('-') else {
            continue;
        };
        if flags.starts_with('-') {
            continue;
        }
        for (pos, ch) in flags.char_indices() {
            match ch {
                'm' => {
                    let rest = &flags[pos + 1..];
                    if !rest.is_empty() {
                        out.push(rest);
                    } else if let Some(next) = command.get(i + 1) {
                        out.push(next.as_str());
                    }
                    break;
                }
                'c' | 'W' | 'X' => break,
                c if c.is_ascii_alphabetic() => {}
                _ => break,
            }
        }
    }
    out
}

/// `word` of a `command` names a script file by its ending (not an option such as `-m` or
/// `--config=x.py`).
fn names_script(word: &str) -> bool {
    !word.starts_with('-') && !word.contains('=') && script_extension(Path::new(word))
}

/// Whether a program named `name` (no `/`) is a file in one of PATH's folders, as the process
/// start would find it.
fn on_path(name: &str) -> bool {
    std::env::var_os("PATH")
        .is_some_and(|p| std::env::split_paths(&p).any(|d| d.join(name).is_file()))
}

/// `path` ends in one of [`SCRIPT_EXTENSIONS`] (any case).
pub fn script_extension(path: &Path) -> bool {
    path.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| SCRIPT_EXTENSIONS.contains(&e.to_ascii_lowercase().as_str()))
}

/// Seconds to wait for an answer when the scenario gives no `timeout_seconds`.
pub const DEFAULT_TIMEOUT_SECONDS: f64 = 60.0;

/// Lines of standard error kept per process for error messages.
const STDERR_TAIL: usize = 20;

/// A configuration problem: which `[model]` key and what is wrong.
#[derive(Debug, Clone, PartialEq)]
pub struct ConfigError {
    /// `command`, `knob` or `timeout_seconds`.
    pub key: &'static str,
    /// What is wrong.
    pub message: String,
}

/// Formats a number for the protocol: 17 significant digits, scientific notation, which reads
/// back to the same `f64` with any correctly rounding parser.
pub fn format_number(v: f64) -> String {
    format!("{v:.16e}")
}

/// Parses a number sent by a process (any decimal notation Rust accepts); `None` when it is not
/// a finite number.
pub fn parse_number(token: &str) -> Option<f64> {
    token.parse::<f64>().ok().filter(|v| v.is_finite())
}

/// Reads the handshake answer: `ready 2` or `ready 1` give the protocol version the process
/// speaks; anything else is an error (completing "external process `...` ...").
pub fn parse_ready(line: &str) -> Result<u32, String> {
    let mut t = line.split_ascii_whitespace();
    match (t.next(), t.next()) {
        (Some("ready"), Some("2")) => Ok(2),
        (Some("ready"), Some("1")) => Ok(1),
        (Some("ready"), Some(v)) => Err(format!(
            "speaks protocol version {}; lossprism speaks 2 and accepts 1",
            clip(v)
        )),
        _ => Err(format!(
            "answered the handshake with {:?} instead of `ready 2` (or `ready 1`)",
            clip(line)
        )),
    }
}

/// The first line of an answer.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Head {
    /// `ok ID`: the prediction lines follow.
    Ok,
    /// `error ID message`: the process could not fit (the message, clipped).
    Failed(String),
}

/// Reads the first line of the answer to request `id`: `ok ID` or `error ID message`; anything
/// else (another id, log output on standard output) is an error (completing "... answered
/// request N with").
pub fn parse_head(line: &str, id: u64) -> Result<Head, String> {
    let mut t = line.split_ascii_whitespace();
    let kind = t.next();
    let got = t.next();
    let right_id = got == Some(id.to_string().as_str());
    match kind {
        Some("ok") if right_id => Ok(Head::Ok),
        Some("error") if right_id => {
            let rest: Vec<&str> = t.collect();
            let why = rest.join(" ");
            Ok(Head::Failed(if why.trim().is_empty() {
                "(no reason given)".into()
            } else {
                clip(&why)
            }))
        }
        Some("ok") | Some("error") if !right_id => Err(format!(
            "{:?}: wrong request id (expected `ok {id}`)",
            clip(line)
        )),
        _ => Err(format!(
            "{:?} instead of `ok {id}` or `error {id} ...` (write logs to standard error, not \
             standard output)",
            clip(line)
        )),
    }
}

/// What is wrong with an answer line ([`parse_row`]).
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum RowError {
    /// The line does not start with the expected tag (the line, clipped).
    Tag(String),
    /// Value `index` (1-based) is not a finite number (the token, clipped).
    Value {
        /// The offending token.
        token: String,
        /// Its 1-based position among the values.
        index: usize,
    },
    /// The line holds this many values, not the number expected.
    Count(usize),
}

impl std::fmt::Display for RowError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            RowError::Tag(line) => write!(f, "{line:?} does not start with the expected tag"),
            RowError::Value { token, index } => {
                write!(f, "{token:?} is not a finite number (value {index})")
            }
            RowError::Count(n) => write!(f, "{n} values, not the number expected"),
        }
    }
}

/// Reads one answer line `TAG v1 v2 ...` holding exactly `out.len()` finite numbers into `out`.
/// The line is never collected whole: tokens are read one by one and counted.
pub fn parse_row(line: &str, tag: &str, out: &mut [f64]) -> Result<(), RowError> {
    let mut toks = line.split_ascii_whitespace();
    if toks.next() != Some(tag) {
        return Err(RowError::Tag(clip(line)));
    }
    let want = out.len();
    let mut count = 0usize;
    for tok in toks {
        if count < want {
            match parse_number(tok) {
                Some(x) => out[count] = x,
                None => {
                    return Err(RowError::Value {
                        token: clip(tok),
                        index: count + 1,
                    })
                }
            }
        }
        count += 1;
    }
    if count != want {
        return Err(RowError::Count(count));
    }
    Ok(())
}

/// What the stdout reader thread delivers.
enum Line {
    Text(String),
    Eof,
    Failed(String),
    /// A line longer than the current request can need (the reader stops).
    TooLong(usize),
}

/// One running process and its helper threads.
struct Worker {
    child: Child,
    /// Requests to the writer thread; dropping it closes the process's standard input.
    requests: Option<Sender<Vec<u8>>>,
    lines: Receiver<Line>,
    stderr_tail: Arc<Mutex<VecDeque<String>>>,
    /// Requests sent so far (the request id).
    sent: u64,
    /// Protocol version the process speaks (1 or 2).
    version: u32,
    /// Longest answer line the current request can need (the reader refuses longer ones).
    max_line: Arc<AtomicUsize>,
    /// Set when lossprism itself killed the process (so its end is not reported as a crash).
    killed_by_us: bool,
}

/// Process ids of the external processes started and not yet reaped, so that a signal that
/// ends lossprism at once can end them too ([`kill_running`]). A process is reaped only while
/// this list's lock is held, and its id leaves the list under the same lock, so
/// [`kill_running`] (which holds it too) never signals an id the system may have reused.
static RUNNING: Mutex<Vec<u32>> = Mutex::new(Vec::new());

fn running() -> std::sync::MutexGuard<'static, Vec<u32>> {
    RUNNING.lock().unwrap_or_else(|e| e.into_inner())
}

/// Kills every external process still running (SIGKILL; Unix only). A signal handler calls it
/// before ending lossprism at once: a process that only lossprism was signalled would otherwise
/// outlive it until its current fit ends (`docs/external-protocol.md`: none outlives the run).
pub fn kill_running() {
    #[cfg(unix)]
    for &pid in running().iter() {
        // SAFETY: kill(2) and waitpid(2) on a process id this process started and has not
        // reaped (so the id still names that child), with a null status pointer; no memory is
        // touched. Reaped here, so no zombie is left for an init that may not reap it.
        unsafe {
            libc::kill(pid as libc::pid_t, libc::SIGKILL);
            libc::waitpid(pid as libc::pid_t, std::ptr::null_mut(), 0);
        }
    }
}

impl Worker {
    /// Kills the process (if still running) and reaps it.
    fn kill(&mut self) {
        self.requests = None;
        self.killed_by_us = true;
        let pid = self.child.id();
        let mut list = running();
        let _ = self.child.kill();
        let _ = self.child.wait();
        list.retain(|p| *p != pid);
    }

    /// `try_wait`; a reaped process leaves [`RUNNING`] under the same lock.
    fn try_reap(&mut self) -> Option<std::process::ExitStatus> {
        let pid = self.child.id();
        let mut list = running();
        match self.child.try_wait() {
            Ok(Some(st)) => {
                list.retain(|p| *p != pid);
                Some(st)
            }
            _ => None,
        }
    }

    /// Closes standard input, gives the process half a second to exit, then kills it.
    fn close(&mut self) {
        self.requests = None;
        for _ in 0..50 {
            if self.try_reap().is_some() {
                return;
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        self.kill();
    }

    /// Reads standard output (its standard input already closed) to its end or to `deadline`,
    /// whichever comes first. Returns the first line that came after the last answer and how
    /// many there were: anything there means earlier answers may have been read shifted.
    fn drain_until(&mut self, deadline: Instant) -> (Option<String>, usize) {
        let (mut first, mut count) = (None, 0);
        loop {
            let left = deadline.saturating_duration_since(Instant::now());
            match self.lines.recv_timeout(left) {
                Ok(Line::Text(t)) => {
                    count += 1;
                    first.get_or_insert(t);
                }
                Ok(Line::TooLong(_)) => {
                    count += 1;
                    first.get_or_insert_with(|| "(a line too long to keep)".into());
                    break;
                }
                Ok(Line::Eof) | Ok(Line::Failed(_)) | Err(_) => break,
            }
        }
        (first, count)
    }

    fn last_stderr(&self) -> Option<String> {
        let tail = self.stderr_tail.lock().ok()?;
        tail.iter().rev().find(|l| !l.trim().is_empty()).cloned()
    }
}

impl Drop for Worker {
    fn drop(&mut self) {
        if self.requests.is_some() {
            self.close();
        }
    }
}

/// An estimator run as external processes; see the [module documentation](self).
pub struct ExternalFamily {
    command: Vec<String>,
    knob: &'static str,
    timeout: Duration,
    dir: Option<PathBuf>,
    idle: Mutex<Vec<Worker>>,
    /// The first failure; later fits repeat it without starting processes.
    failed: Mutex<Option<String>>,
    /// Whether a larger knob value is the simpler model (scenario option `larger_is_simpler`).
    pub larger_is_simpler: bool,
}

impl std::fmt::Debug for ExternalFamily {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ExternalFamily")
            .field("command", &self.command)
            .field("knob", &self.knob)
            .field("timeout", &self.timeout)
            .finish()
    }
}

impl ExternalFamily {
    /// Configures the family: `command` is the program and its arguments, `knob` the knob name
    /// (letters, digits, `_`, `-`, `.`), `timeout_seconds` the per-request deadline, `dir` the
    /// folder the processes start in (the scenario file's folder; empty = current folder).
    ///
    /// The knob name is leaked to give the `&'static str` the [`Family`] trait asks for (a few
    /// bytes per plan).
    pub fn new(
        command: &[String],
        knob: &str,
        timeout_seconds: f64,
        dir: &Path,
    ) -> Result<ExternalFamily, ConfigError> {
        if command.is_empty() || command[0].trim().is_empty() {
            return Err(ConfigError {
                key: "command",
                message: "must name a program, e.g. [\"python3\", \"my_model.py\"]".into(),
            });
        }
        let ok_char = |c: char| c.is_ascii_alphanumeric() || matches!(c, '_' | '-' | '.');
        if knob.is_empty() || !knob.chars().all(ok_char) {
            return Err(ConfigError {
                key: "knob",
                message: format!(
                    "`{}` is not a knob name: use ASCII letters, digits, `_`, `-` or `.` (no spaces)",
                    crate::fmt::clip(knob, 60)
                ),
            });
        }
        if !(timeout_seconds.is_finite() && timeout_seconds > 0.0 && timeout_seconds <= 1e6) {
            return Err(ConfigError {
                key: "timeout_seconds",
                message: format!(
                    "must be a number of seconds in (0, 1e6], got {}",
                    crate::fmt::fmt_exact(timeout_seconds)
                ),
            });
        }
        Ok(ExternalFamily {
            command: command.to_vec(),
            knob: Box::leak(knob.to_string().into_boxed_str()),
            timeout: Duration::from_secs_f64(timeout_seconds),
            dir: (!dir.as_os_str().is_empty()).then(|| dir.to_path_buf()),
            idle: Mutex::new(Vec::new()),
            failed: Mutex::new(None),
            larger_is_simpler: false,
        })
    }

    /// The command as one string, for messages.
    pub fn command_line(&self) -> String {
        self.command.join(" ")
    }

    /// The per-request deadline.
    pub fn timeout(&self) -> Duration {
        self.timeout
    }

    /// Stops every idle process as [`ExternalFamily::shutdown`] does, first reading what each
    /// wrote after its last answer: a process that answered with more lines than asked fails
    /// the run. (A process that serves several requests shows such lines at its next request;
    /// one that serves a single request, as with one block per thread or per shard, shows them
    /// only here.)
    fn finish_all(&self) -> Result<(), String> {
        let mut workers: Vec<Worker> = match self.idle.lock() {
            Ok(mut g) => g.drain(..).collect(),
            Err(_) => Vec::new(),
        };
        // Every standard input closed first, then one shared half second for all of them (one
        // after another, a slow exit cost half a second to a second per process).
        for w in &mut workers {
            w.requests = None;
        }
        let deadline = Instant::now() + Duration::from_millis(500);
        let mut first = None;
        for w in &mut workers {
            let (line, count) = w.drain_until(deadline);
            if count > 0 && first.is_none() {
                first = Some(format!(
                    "{} wrote {count} more {} after its last answer, before it exited (the \
                     first: {:?}): an answer is exactly the `ok` line and its `pred`/`prob` \
                     lines, and what came before may have been read shifted",
                    self.who(),
                    if count == 1 { "line" } else { "lines" },
                    clip(line.as_deref().unwrap_or(""))
                ));
            }
        }
        // The half second is over for every process: reap those that exited, kill the rest.
        for w in &mut workers {
            if w.try_reap().is_none() {
                w.kill();
            }
        }
        first.map_or(Ok(()), Err)
    }

    /// Stops every idle process (end of input, then kill after half a second) and reaps it.
    pub fn shutdown(&self) {
        let workers: Vec<Worker> = match self.idle.lock() {
            Ok(mut g) => g.drain(..).collect(),
            Err(_) => Vec::new(),
        };
        drop(workers);
    }

    fn who(&self) -> String {
        format!("external process `{}`", self.command_line())
    }

    /// Starts a process and performs the handshake.
    fn spawn(&self) -> Result<Worker, String> {
        let mut cmd = Command::new(&self.command[0]);
        cmd.args(&self.command[1..])
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped());
        if let Some(d) = &self.dir {
            cmd.current_dir(d);
        }
        let mut child = cmd.spawn().map_err(|e| {
            let dir = self
                .dir
                .as_ref()
                .map(|d| format!(" in {}", d.display()))
                .unwrap_or_default();
            // "No such file or directory" for a script that is there: its `#!` line names an
            // interpreter that is not. A program named without a `/` is looked up on PATH, not
            // in the scenario's folder, so a file of that name there is not what failed.
            let bare = !self.command[0].contains('/');
            let program = self.dir.clone().unwrap_or_default().join(&self.command[0]);
            let interpreter =
                (e.kind() == std::io::ErrorKind::NotFound && program.is_file() && !bare)
                    .then(|| first_line(&program))
                    .flatten()
                    .filter(|l| l.starts_with("#!"));
            match interpreter {
                None if bare && program.exists() => format!(
                    "cannot start {}{dir}: {e}; a program named without a `/` is looked up on \
                     PATH, not in the scenario's folder: write `./{}` (or name its interpreter \
                     first, as [\"python3\", \"{}\"])",
                    self.who(),
                    crate::fmt::clip(&self.command[0], 200),
                    crate::fmt::clip(&self.command[0], 200)
                ),
                None if program.is_dir() => format!(
                    "cannot start {}{dir}: `{}` is a folder, not a program",
                    self.who(),
                    crate::fmt::clip(&self.command[0], 200)
                ),
                Some(l) => format!(
                    "cannot start {}{dir}: its first line, `{}`, names an interpreter that \
                     cannot be started ({e})",
                    self.who(),
                    crate::fmt::clip(&l, 200)
                ),
                None => format!("cannot start {}{dir}: {e}", self.who()),
            }
        })?;
        let (stdin, stdout, stderr) =
            match (child.stdin.take(), child.stdout.take(), child.stderr.take()) {
                (Some(i), Some(o), Some(e)) => (i, o, e),
                _ => {
                    let _ = child.kill();
                    let _ = child.wait();
                    return Err(format!("cannot connect to {}", self.who()));
                }
            };
        running().push(child.id());
        let (req_tx, req_rx) = mpsc::channel::<Vec<u8>>();
        std::thread::spawn(move || write_loop(stdin, req_rx));
        let (line_tx, line_rx) = mpsc::channel::<Line>();
        let max_line = Arc::new(AtomicUsize::new(4096));
        let limit = Arc::clone(&max_line);
        std::thread::spawn(move || read_loop(stdout, line_tx, limit));
        let tail = Arc::new(Mutex::new(VecDeque::new()));
        let tail2 = Arc::clone(&tail);
        std::thread::spawn(move || stderr_loop(stderr, tail2));
        let mut w = Worker {
            child,
            requests: Some(req_tx),
            lines: line_rx,
            stderr_tail: tail,
            sent: 0,
            version: PROTOCOL_VERSION,
            max_line,
            killed_by_us: false,
        };
        let hello = format!("lossprism-external {PROTOCOL_VERSION}\n");
        let deadline = Instant::now() + self.timeout;
        let what = "the handshake (`lossprism-external 2`)";
        self.send(&mut w, hello.into_bytes(), what)?;
        let line = self.recv(&mut w, deadline, what)?;
        match parse_ready(&line) {
            Ok(v) => {
                w.version = v;
                Ok(w)
            }
            Err(m) => {
                w.kill();
                Err(format!("{} {m}", self.who()))
            }
        }
    }

    fn send(&self, w: &mut Worker, bytes: Vec<u8>, what: &str) -> Result<(), String> {
        let ok = w.requests.as_ref().is_some_and(|tx| tx.send(bytes).is_ok());
        if ok {
            Ok(())
        } else {
            let msg = self.died(w, what);
            Err(msg)
        }
    }

    /// Kills the process and describes its end (status and last standard error line).
    fn died(&self, w: &mut Worker, what: &str) -> String {
        w.requests = None;
        // Did it end by itself? Give it a moment to exit after closing its output.
        let mut exited = None;
        for _ in 0..20 {
            if let Some(st) = w.try_reap() {
                exited = Some(st);
                break;
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        let how = match exited {
            Some(st) => format!("it exited ({st})"),
            None => {
                w.kill();
                "it closed its standard output but kept running, so lossprism stopped it".into()
            }
        };
        // Give the stderr thread a moment to collect the final lines (the pipe is closed now).
        std::thread::sleep(Duration::from_millis(20));
        let last = w
            .last_stderr()
            .map(|l| {
                format!(
                    "; last line on its standard error: {}",
                    crate::fmt::clip(l.trim_end(), 300)
                )
            })
            .unwrap_or_default();
        format!("{} stopped during {what}: {how}{last}", self.who())
    }

    fn recv(&self, w: &mut Worker, deadline: Instant, what: &str) -> Result<String, String> {
        let left = deadline.saturating_duration_since(Instant::now());
        match w.lines.recv_timeout(left) {
            Ok(Line::Text(s)) => Ok(s),
            Ok(Line::Eof) | Err(RecvTimeoutError::Disconnected) => Err(self.died(w, what)),
            Ok(Line::Failed(e)) => {
                w.kill();
                Err(format!(
                    "{}: reading its output during {what} failed: {e}",
                    self.who()
                ))
            }
            Ok(Line::TooLong(limit)) => {
                w.kill();
                Err(format!(
                    "{} sent a line longer than {limit} bytes during {what}, more than the answer \
                     can need; it was stopped",
                    self.who()
                ))
            }
            Err(RecvTimeoutError::Timeout) => {
                w.kill();
                Err(format!(
                    "{} did not answer within {} s during {what}; it was stopped \
                     (raise `timeout_seconds` in [model] if fits are legitimately slow)",
                    self.who(),
                    fmt_secs(self.timeout)
                ))
            }
        }
    }

    /// One fit on a checked-out worker.
    fn fit_on(
        &self,
        w: &mut Worker,
        input: &FitInput<'_>,
        grid: &[f64],
        out: &mut ArrayViewMut2<'_, f64>,
        mut probs: Option<&mut ArrayViewMut3<'_, f64>>,
    ) -> Result<(), String> {
        let (n, p) = input.x.dim();
        let m = input.eval.nrows();
        let g = grid.len();
        if probs.is_some() && w.version < 2 {
            w.kill();
            return Err(format!(
                "{} speaks protocol version 1, which has no class probabilities; the loss needs \
                 them: answer `ready 2` and send `prob` lines (docs/external-protocol.md)",
                self.who()
            ));
        }
        w.sent += 1;
        let id = w.sent;
        let (task, classes) = match input.task {
            Task::Regress => ("regress", 0),
            Task::Classify { classes } => ("classify", classes),
        };
        let what = format!(
            "request {id} (fit: task {task}, n = {n} training rows, p = {p} inputs, \
             m = {m} evaluation points, {g} {} of {})",
            if g == 1 { "value" } else { "values" },
            self.knob
        );
        let mut req = String::with_capacity(32 * (n * (p + 1) + m * p + g) + 128);
        if w.version >= 2 {
            let want = if probs.is_some() { "probs" } else { "labels" };
            let want = if classes == 0 { "values" } else { want };
            let _ = writeln!(
                req,
                "fit {id} {task} {classes} {} {n} {p} {m} {g} {want}",
                self.knob
            );
        } else {
            let _ = writeln!(
                req,
                "fit {id} {task} {classes} {} {n} {p} {m} {g}",
                self.knob
            );
        }
        push_row(&mut req, "grid", grid.iter().copied());
        if w.version >= 2 {
            let _ = writeln!(req, "seed {}", input.seed.as_u64());
        }
        for row in input.x.rows() {
            push_row(&mut req, "x", row.iter().copied());
        }
        push_row(&mut req, "y", input.y.iter().copied());
        for row in input.eval.rows() {
            push_row(&mut req, "eval", row.iter().copied());
        }
        req.push_str("end\n");
        // An answer line holds at most `prob` and m·K numbers of at most ~40 characters.
        let widest = m.saturating_mul(classes.max(1)).saturating_mul(48);
        w.max_line
            .store(widest.saturating_add(4096), Ordering::Relaxed);
        self.send(w, req.into_bytes(), &what)?;
        let deadline = Instant::now() + self.timeout;
        let head = self.recv(w, deadline, &what)?;
        match parse_head(&head, id) {
            Ok(Head::Ok) => {}
            Ok(Head::Failed(msg)) => {
                // The process stays usable, but the run stops at this failure anyway.
                return Err(format!(
                    "{} reported a failure for {what}: {msg}",
                    self.who()
                ));
            }
            Err(m) => {
                w.kill();
                return Err(format!("{} answered {what} with {m}", self.who()));
            }
        }
        let mut row = vec![0.0; m * classes.max(1)];
        for (gi, &v) in grid.iter().enumerate() {
            // A missing line shows only as a timeout: say how far the answer got.
            let line = if gi == 0 {
                self.recv(w, deadline, &what)?
            } else {
                self.recv(
                    w,
                    deadline,
                    &format!("{what}, after {gi} of {g} `pred` lines"),
                )?
            };
            let at = format!("{} = {v}", self.knob);
            if let Err(e) = parse_row(&line, "pred", &mut row[..m]) {
                w.kill();
                let who = self.who();
                return Err(match e {
                    RowError::Tag(l) => format!(
                        "{who} sent {l:?} where line {} of {g} (`pred ...` for {at}) of the answer to {what} was expected",
                        gi + 1
                    ),
                    RowError::Value { token, index } => format!(
                        "{who} sent {token:?} where prediction {index} of {m} for {at} (a finite number) was expected, answering {what}"
                    ),
                    RowError::Count(count) => format!(
                        "{who} sent {count} predictions for {at}, expected {m} (one per evaluation point), answering {what}"
                    ),
                });
            }
            for (e, &x) in row[..m].iter().enumerate() {
                out[[gi, e]] = x;
            }
            if let Some(pr) = probs.as_mut() {
                let k = classes;
                let line = self.recv(w, deadline, &what)?;
                if let Err(e) = parse_row(&line, "prob", &mut row[..m * k]) {
                    w.kill();
                    let who = self.who();
                    return Err(match e {
                        RowError::Tag(l) => format!(
                            "{who} sent {l:?} where `prob ...` ({m}×{k} class probabilities for {at}) was expected, answering {what}"
                        ),
                        RowError::Value { token, index } => format!(
                            "{who} sent {token:?} where probability {index} of {} for {at} was expected, answering {what}",
                            m * k
                        ),
                        RowError::Count(count) => format!(
                            "{who} sent {count} probabilities for {at}, expected {} ({m} points × {k} classes), answering {what}",
                            m * k
                        ),
                    });
                }
                for (c, &x) in row[..m * k].iter().enumerate() {
                    pr[[gi, c / k, c % k]] = x;
                }
            }
        }
        Ok(())
    }

    fn fail(&self, msg: String) -> FitError {
        if let Ok(mut f) = self.failed.lock() {
            if f.is_none() {
                *f = Some(msg.clone());
            }
        }
        FitError(msg)
    }
}

impl Drop for ExternalFamily {
    fn drop(&mut self) {
        self.shutdown();
    }
}

fn fmt_secs(d: Duration) -> String {
    let s = d.as_secs_f64();
    if s.fract() == 0.0 {
        format!("{}", s as u64)
    } else {
        format!("{s}")
    }
}

/// The first line of a file (at most 1000 bytes read), without its line end.
fn first_line(path: &Path) -> Option<String> {
    let mut buf = vec![0u8; 1000];
    let n = std::fs::File::open(path).ok()?.read(&mut buf).ok()?;
    let text = String::from_utf8_lossy(&buf[..n]).into_owned();
    Some(text.lines().next().unwrap_or("").trim_end().to_string())
}

/// Shortens a line for an error message.
fn clip(s: &str) -> String {
    let s = s.trim_end();
    if s.chars().count() > 60 {
        let head: String = s.chars().take(60).collect();
        format!("{head}...")
    } else {
        s.to_string()
    }
}

fn push_row(buf: &mut String, tag: &str, values: impl Iterator<Item = f64>) {
    buf.push_str(tag);
    for v in values {
        buf.push(' ');
        buf.push_str(&format_number(v));
    }
    buf.push('\n');
}

fn write_loop(mut stdin: ChildStdin, rx: Receiver<Vec<u8>>) {
    for bytes in rx {
        if stdin.write_all(&bytes).and_then(|_| stdin.flush()).is_err() {
            return;
        }
    }
}

/// Reads standard output line by line; a line longer than `max_line` bytes (set per request to
/// what the answer can need) is refused without being held whole.
fn read_loop(stdout: impl Read, tx: Sender<Line>, max_line: Arc<AtomicUsize>) {
    let mut r = BufReader::new(stdout);
    let mut line: Vec<u8> = Vec::new();
    loop {
        let buf = match r.fill_buf() {
            Ok(b) => b,
            Err(e) => {
                let _ = tx.send(Line::Failed(e.to_string()));
                return;
            }
        };
        if buf.is_empty() {
            let _ = tx.send(Line::Eof);
            return;
        }
        let (take, done) = match buf.iter().position(|&b| b == b'\n') {
            Some(i) => (i + 1, true),
            None => (buf.len(), false),
        };
        line.extend_from_slice(&buf[..take]);
        r.consume(take);
        let limit = max_line.load(Ordering::Relaxed);
        if line.len() > limit {
            let _ = tx.send(Line::TooLong(limit));
            return;
        }
        if done {
            let t = String::from_utf8_lossy(&line)
                .trim_end_matches(['\n', '\r'])
                .to_string();
            line.clear();
            if tx.send(Line::Text(t)).is_err() {
                return;
            }
        }
    }
}

/// Keeps the last lines of standard error, each cut to [`STDERR_LINE_MAX`] bytes, so that a
/// process writing without newlines cannot make lossprism hold its output whole.
fn stderr_loop(stderr: impl Read, tail: Arc<Mutex<VecDeque<String>>>) {
    let mut r = BufReader::new(stderr);
    let mut line: Vec<u8> = Vec::new();
    let push = |line: &[u8]| {
        let text = String::from_utf8_lossy(line).trim_end().to_string();
        if let Ok(mut t) = tail.lock() {
            if t.len() == STDERR_TAIL {
                t.pop_front();
            }
            t.push_back(text);
        }
    };
    loop {
        let buf = match r.fill_buf() {
            Ok(b) if !b.is_empty() => b,
            _ => {
                if !line.is_empty() {
                    push(&line);
                }
                return;
            }
        };
        let (take, done) = match buf.iter().position(|&b| b == b'\n') {
            Some(i) => (i + 1, true),
            None => (buf.len(), false),
        };
        let room = STDERR_LINE_MAX.saturating_sub(line.len());
        line.extend_from_slice(&buf[..take.min(room)]);
        r.consume(take);
        if done {
            push(&line);
            line.clear();
        }
    }
}

impl Family for ExternalFamily {
    fn name(&self) -> &'static str {
        "external"
    }

    fn knob(&self) -> &'static str {
        self.knob
    }

    fn larger_is_simpler(&self) -> bool {
        self.larger_is_simpler
    }

    /// Every word of the command that names an existing file, from the folder the processes
    /// start in (the program when given as a path, a script, a model file it loads), and the
    /// source of a module run with `-m` (`python3 -m pkg.est`: `pkg/est.py`, or the package's
    /// `__init__.py` and `__main__.py`), which the interpreter finds from that folder too.
    fn input_files(&self) -> Vec<PathBuf> {
        self.input_files_in(&self.dir.clone().unwrap_or_default())
    }

    fn input_files_in(&self, folder: &Path) -> Vec<PathBuf> {
        let mut out: Vec<PathBuf> = self
            .command
            .iter()
            .map(|w| folder.join(w))
            .filter(|p| p.is_file())
            .collect();
        for name in python_modules(&self.command) {
            if name.is_empty() || name.starts_with('-') || name.contains('/') {
                continue;
            }
            let module = folder.join(name.replace('.', "/"));
            let mut with_py = module.clone().into_os_string();
            with_py.push(".py");
            // `python -m a.b.c` also runs the packages' `a/__init__.py` and `a/b/__init__.py`.
            let parts: Vec<&str> = name.split('.').collect();
            let packages =
                (1..parts.len()).map(|k| folder.join(parts[..k].join("/")).join("__init__.py"));
            for f in [
                PathBuf::from(with_py),
                module.join("__init__.py"),
                module.join("__main__.py"),
            ]
            .into_iter()
            .chain(packages)
            {
                if f.is_file() && !out.contains(&f) {
                    out.push(f);
                }
            }
        }
        out
    }

    /// Any non-empty grid of finite numbers: the process judges its own knob values (it answers
    /// `error` for values it cannot use).
    fn check_grid(&self, grid: &[f64], _n_train: usize, _n_inputs: usize) -> Result<(), String> {
        if grid.is_empty() {
            return Err(format!("the grid of {} is empty", self.knob));
        }
        if let Some(v) = grid.iter().find(|v| !v.is_finite()) {
            return Err(format!("{} = {v} is not a finite number", self.knob));
        }
        Ok(())
    }

    fn supports(&self, _task: Task) -> bool {
        true
    }

    /// The process may use the fit seed (protocol 2) and may send class probabilities
    /// (protocol 2, when asked); a version-1 process asked for probabilities fails with a clear
    /// message.
    fn caps(&self, task: Task) -> super::Caps {
        super::Caps {
            probabilities: matches!(task, Task::Classify { .. }),
            stochastic: true,
            ..super::Caps::default()
        }
    }

    fn fit_predict(
        &self,
        input: &FitInput<'_>,
        grid: &[f64],
        out: Out<'_>,
    ) -> Result<(), FitError> {
        let Out {
            values: mut out,
            probs: mut probs_out,
            ..
        } = out;
        if let Ok(f) = self.failed.lock() {
            if let Some(msg) = f.as_ref() {
                return Err(FitError(format!("stopped after an earlier failure: {msg}")));
            }
        }
        if out.dim() != (grid.len(), input.eval.nrows()) {
            return Err(FitError(format!(
                "external: output has shape {:?}, expected ({}, {})",
                out.dim(),
                grid.len(),
                input.eval.nrows()
            )));
        }
        let pooled = self.idle.lock().ok().and_then(|mut g| g.pop());
        let mut w = match pooled {
            Some(w) => w,
            None => self.spawn().map_err(|e| self.fail(e))?,
        };
        match self.fit_on(&mut w, input, grid, &mut out, probs_out.as_mut()) {
            Ok(()) => {
                if let Ok(mut g) = self.idle.lock() {
                    g.push(w);
                }
                Ok(())
            }
            Err(e) => {
                drop(w);
                Err(self.fail(e))
            }
        }
    }

    fn finish(&self) -> Result<(), FitError> {
        self.finish_all().map_err(|e| self.fail(e))
    }

    fn answered_by(&self) -> Option<String> {
        Some(self.who())
    }

    /// A script `command` names must exist: one that is not there was found only when the
    /// first fit started it, after `validate` had passed the file. (Not checked when the
    /// scenario is read: `merge` reads it where the scripts may be absent.)
    fn check_ready(&self) -> Result<(), String> {
        let dir = self.dir.clone().unwrap_or_default();
        // Not checked: the program itself when it has no `/` (found on PATH), a word after an
        // option that takes code (`sh -c "..."`, `perl -e`), a word with spaces (code, not a
        // file name).
        // A program named without a `/` is looked up on PATH: a script of that name in the
        // scenario's folder (`command = ["est.py"]`) is not what would run (sweep 68: `run`
        // blamed its working `#!` line).
        let first = &self.command[0];
        if !first.contains('/') && dir.join(first).is_file() && !on_path(first) {
            return Err(format!(
                "`command` starts with `{}`, which is in the scenario's folder but not on PATH, \
                 where a program named without a `/` is looked up: write `./{}` (or name its \
                 interpreter first, as [\"python3\", \"{}\"])",
                crate::fmt::clip(first, 200),
                crate::fmt::clip(first, 200),
                crate::fmt::clip(first, 200)
            ));
        }
        let takes_code = |w: &str| matches!(w, "-c" | "-e" | "-E" | "--eval" | "--command");
        let Some(w) = self.command.iter().enumerate().find_map(|(i, w)| {
            let checked = if i == 0 {
                w.contains('/')
            } else {
                !takes_code(&self.command[i - 1]) && !w.chars().any(char::is_whitespace)
            };
            (checked && names_script(w) && !dir.join(w).exists()).then_some(w)
        }) else {
            return Ok(());
        };
        let place = if Path::new(w).is_absolute() || dir.as_os_str().is_empty() {
            String::new()
        } else {
            format!(
                " (relative to the scenario's folder, {})",
                crate::fmt::clip(&dir.display().to_string(), 200)
            )
        };
        Err(format!(
            "`command` names the script `{}`, which does not exist{place}",
            crate::fmt::clip(w, 200)
        ))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    // Exact identity: 17 significant digits identify every finite f64 (IEEE 754-2008, §5.12.2:
    // 17 decimal digits suffice for binary64), and Rust's parser rounds correctly, so
    // format-then-parse returns the same bits. Random bit patterns cover subnormals and extremes.
    #[test]
    fn numbers_round_trip_exactly() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let mut specials = vec![
            0.0,
            -0.0,
            1.0,
            0.1,
            f64::MIN_POSITIVE,
            f64::MAX,
            f64::MIN,
            5e-324,
            1.0 / 3.0,
        ];
        specials.extend((0..20000).map(|_| f64::from_bits(rng.gen::<u64>())));
        for v in specials.into_iter().filter(|v| v.is_finite()) {
            let back = parse_number(&format_number(v)).unwrap();
            assert_eq!(back.to_bits(), v.to_bits(), "{v:e}");
        }
        assert_eq!(parse_number("nan"), None);
        assert_eq!(parse_number("inf"), None);
        assert_eq!(parse_number("abc"), None);
        assert_eq!(parse_number("0.30000000000000004"), Some(0.1 + 0.2));
    }

    #[test]
    fn configuration_is_checked() {
        let cmd = vec!["python3".to_string(), "m.py".to_string()];
        let dir = Path::new("");
        assert!(ExternalFamily::new(&cmd, "depth", 60.0, dir).is_ok());
        assert_eq!(
            ExternalFamily::new(&[], "depth", 60.0, dir)
                .unwrap_err()
                .key,
            "command"
        );
        assert_eq!(
            ExternalFamily::new(&cmd, "max depth", 60.0, dir)
                .unwrap_err()
                .key,
            "knob"
        );
        assert_eq!(
            ExternalFamily::new(&cmd, "k", 0.0, dir).unwrap_err().key,
            "timeout_seconds"
        );
        let f = ExternalFamily::new(&cmd, "k", 1.5, dir).unwrap();
        assert_eq!(f.knob(), "k");
        assert!(f.check_grid(&[1.0, 2.5], 10, 1).is_ok());
        assert!(f.check_grid(&[], 10, 1).is_err());
        assert!(f.check_grid(&[f64::NAN], 10, 1).is_err());
    }

    #[test]
    fn missing_program_is_a_clear_error() {
        let cmd = vec!["/nonexistent/lossprism-no-such-program".to_string()];
        let f = ExternalFamily::new(&cmd, "k", 5.0, Path::new("")).unwrap();
        let x = ndarray::Array2::<f64>::zeros((3, 1));
        let y = ndarray::Array1::<f64>::zeros(3);
        let mut out = ndarray::Array2::<f64>::zeros((1, 3));
        let input = FitInput {
            x: x.view(),
            y: y.view(),
            eval: x.view(),
            task: Task::Regress,
            seed: crate::rng::FitSeed::fixed(0),
        };
        let e = f
            .fit_predict(&input, &[1.0], crate::family::Out::values(out.view_mut()))
            .unwrap_err();
        assert!(e.0.contains("cannot start external process"), "{e}");
        // Later fits repeat the first failure without trying again.
        let e2 = f
            .fit_predict(&input, &[1.0], crate::family::Out::values(out.view_mut()))
            .unwrap_err();
        assert!(e2.0.contains("earlier failure"), "{e2}");
    }
}
