//! Progress on standard error while a run works (an `indicatif` bar with replicates done, rate
//! and time left, shown only on a terminal and never with `--quiet`), and clean interruption by
//! Ctrl-C: the blocks in flight finish, the rest are skipped and nothing is written.

use std::io::IsTerminal;
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

use crate::runner::Watch;

use crate::output::noteln;

/// Set by the Ctrl-C handler; read by [`Progress::stop`].
static INTERRUPTED: AtomicBool = AtomicBool::new(false);

/// Set while the outputs are written: an [`OnInterrupt::ExitNow`] signal then lets the writes
/// finish (they are all-or-nothing only as a whole: an exit between two renames kept one).
static WRITING: AtomicBool = AtomicBool::new(false);

/// Marks the start of the outputs' writing: from here a signal no longer ends the process at
/// once (the computation is done; the writes take moments).
pub fn writing_outputs() {
    WRITING.store(true, Ordering::SeqCst);
}

/// Whether the bar is shown: only when standard error is a terminal and the run is not quiet.
pub fn should_show(stderr_is_terminal: bool, quiet: bool) -> bool {
    stderr_is_terminal && !quiet
}

/// A spinner with the elapsed time and the current stage on standard error, for a command that
/// works a while with no replicates to count (`twin`: the reference's choice, the noise, the
/// fidelity check); drawn only on a terminal, and cleared when dropped, so nothing of it
/// reaches a file or a pipe.
pub struct Stage(Option<ProgressBar>);

impl Stage {
    /// A spinner on standard error when it is a terminal (hidden otherwise).
    pub fn new() -> Stage {
        Stage::with_terminal(std::io::stderr().is_terminal())
    }

    /// As [`Stage::new`], with the terminal test given (for tests).
    pub fn with_terminal(stderr_is_terminal: bool) -> Stage {
        if !stderr_is_terminal {
            return Stage(None);
        }
        let style = ProgressStyle::with_template("{spinner} {elapsed} {msg}")
            .unwrap_or_else(|_| ProgressStyle::default_spinner());
        let bar =
            ProgressBar::with_draw_target(None, ProgressDrawTarget::stderr()).with_style(style);
        bar.enable_steady_tick(std::time::Duration::from_millis(250));
        Stage(Some(bar))
    }

    /// Shows `what` as the current stage.
    pub fn at(&self, what: &str) {
        if let Some(bar) = &self.0 {
            bar.set_message(what.to_string());
        }
    }

    /// Whether the spinner is drawn.
    pub fn shown(&self) -> bool {
        self.0.is_some()
    }
}

impl Default for Stage {
    fn default() -> Self {
        Stage::new()
    }
}

impl Drop for Stage {
    fn drop(&mut self) {
        if let Some(bar) = &self.0 {
            bar.finish_and_clear();
        }
    }
}

/// Whether coloured output is allowed: not when `NO_COLOR` is set to a non-empty value
/// (<https://no-color.org> convention).
pub fn colour_allowed() -> bool {
    match std::env::var_os("NO_COLOR") {
        Some(v) => v.is_empty(),
        None => true,
    }
}

/// Whether Ctrl-C was pressed during this process.
pub fn interrupted() -> bool {
    INTERRUPTED.load(Ordering::SeqCst)
}

/// What Ctrl-C does.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum OnInterrupt {
    /// Ask the run to stop after the blocks in flight (the run's [`Progress`] watch reads it); a
    /// second Ctrl-C ends the process at once.
    FinishBlocks {
        /// The checkpoint in use, if any: it keeps every finished block even after a second
        /// Ctrl-C (each write is an atomic rename).
        checkpoint: Option<PathBuf>,
    },
    /// End the process at once (exit 130), saying what is kept: with a checkpoint, every write
    /// is an atomic rename, so the file holds whole blocks and rerunning resumes from it.
    ExitNow {
        /// The checkpoint in use, if any.
        checkpoint: Option<PathBuf>,
    },
}

/// Installs the Ctrl-C handler. Installing twice is harmless (the second call is ignored).
pub fn install_interrupt(mode: OnInterrupt) {
    // The handler also takes SIGTERM (a batch system's time limit, `timeout`) and SIGHUP; a
    // SIGHUP that was ignored at start (`nohup`) stays ignored, or a closed terminal would stop
    // a run started to outlive it.
    let hup_ignored = hangup::ignored();
    let installed = ctrlc::set_handler(move || {
        // Every way out waits for a commit in progress (staging, renames, tidying: moments),
        // so a signal never leaves staged copies behind or half of a multi-file output.
        // External estimators started by the run end with it (they would otherwise run on
        // until their current fit ends when only lossprism was signalled).
        let exit = || -> ! {
            let _gate = crate::output::wait_for_commit_within(std::time::Duration::from_secs(30));
            crate::family::external::kill_running();
            std::process::exit(130)
        };
        match &mode {
            OnInterrupt::ExitNow {
                checkpoint: Some(ck),
            } => {
                noteln!(
                    "\ninterrupted: the finished blocks are saved in {}; rerun the same command \
                     to resume",
                    crate::error::shown(ck)
                );
                exit();
            }
            OnInterrupt::ExitNow { checkpoint: None } => {
                if WRITING.load(Ordering::SeqCst) || crate::output::commit_in_progress() {
                    // Once: a second signal while writing ends the process like any other.
                    if !INTERRUPTED.swap(true, Ordering::SeqCst) {
                        noteln!(
                            "\ninterrupt: finishing the outputs being written (again to stop now)"
                        );
                        return;
                    }
                    noteln!(
                        "\ninterrupted again: stopping once the outputs being written are whole \
                         (all of them or none)"
                    );
                    exit();
                }
                // A commit that was about to start finishes first (the gate); say what happened.
                let gate =
                    crate::output::wait_for_commit_within(std::time::Duration::from_secs(30));
                if crate::output::committed() {
                    noteln!("\ninterrupted after the outputs were written");
                } else {
                    noteln!("\ninterrupted: nothing written");
                }
                drop(gate);
                exit();
            }
            OnInterrupt::FinishBlocks { checkpoint } => {
                if INTERRUPTED.swap(true, Ordering::SeqCst) {
                    let gate =
                        crate::output::wait_for_commit_within(std::time::Duration::from_secs(30));
                    match checkpoint {
                        _ if crate::output::committed() => {
                            noteln!("\ninterrupted twice, after the outputs were written")
                        }
                        Some(ck) => noteln!(
                            "\ninterrupted twice: stopping now; the finished blocks are saved in \
                             {}; rerun the same command to resume",
                            crate::error::shown(ck)
                        ),
                        None => noteln!("\ninterrupted twice: stopping now, nothing written"),
                    }
                    drop(gate);
                    exit();
                }
                if WRITING.load(Ordering::SeqCst) || crate::output::commit_in_progress() {
                    noteln!("\ninterrupt: finishing the outputs being written (again to stop now)");
                } else {
                    noteln!(
                        "\ninterrupt: finishing the blocks in flight, then stopping (a second \
                         Ctrl-C or SIGTERM stops now)"
                    );
                }
            }
        }
    });
    if installed.is_ok() && hup_ignored {
        hangup::ignore();
    }
}

/// Whether SIGHUP is ignored, and ignoring it again (Unix; elsewhere there is none).
mod hangup {
    #[cfg(unix)]
    pub fn ignored() -> bool {
        // SAFETY: sigaction with a null new action only reads the current one into `old`, a
        // zeroed plain C struct owned here.
        unsafe {
            let mut old: libc::sigaction = std::mem::zeroed();
            libc::sigaction(libc::SIGHUP, std::ptr::null(), &mut old) == 0
                && old.sa_sigaction == libc::SIG_IGN
        }
    }

    #[cfg(unix)]
    pub fn ignore() {
        // SAFETY: setting SIG_IGN installs no Rust code as a handler.
        unsafe {
            libc::signal(libc::SIGHUP, libc::SIG_IGN);
        }
    }

    #[cfg(not(unix))]
    pub fn ignored() -> bool {
        false
    }

    #[cfg(not(unix))]
    pub fn ignore() {}
}

/// The progress display of one run; a [`Watch`] for [`crate::runner::run_watched`].
pub struct Progress {
    bar: ProgressBar,
}

impl Progress {
    /// A bar over `replicates`, drawn on standard error when [`should_show`] says so (hidden
    /// otherwise). Uses colour unless `NO_COLOR` is set.
    pub fn new(replicates: u64, quiet: bool) -> Self {
        Self::with_terminal(replicates, quiet, std::io::stderr().is_terminal())
    }

    /// As [`Progress::new`], with the terminal test given (for tests).
    pub fn with_terminal(replicates: u64, quiet: bool, stderr_is_terminal: bool) -> Self {
        if !should_show(stderr_is_terminal, quiet) {
            return Progress {
                bar: ProgressBar::hidden(),
            };
        }
        let bar = if colour_allowed() {
            "{bar:30.blue/white}"
        } else {
            "{bar:30}"
        };
        let template = format!("{bar} {{pos}}/{{len}} replicates · {{rate}} · {{eta}} left");
        let style = ProgressStyle::with_template(&template)
            .unwrap_or_else(|_| ProgressStyle::default_bar())
            .with_key(
                "rate",
                |s: &indicatif::ProgressState, w: &mut dyn std::fmt::Write| {
                    let _ = write!(w, "{:.0}/s", s.per_sec());
                },
            )
            .progress_chars("█▌ ");
        let bar = ProgressBar::with_draw_target(Some(replicates), ProgressDrawTarget::stderr())
            .with_style(style);
        Progress { bar }
    }

    /// Whether the bar is drawn.
    pub fn shown(&self) -> bool {
        !self.bar.is_hidden()
    }

    /// Replicates counted so far.
    pub fn done(&self) -> u64 {
        self.bar.position()
    }

    /// Removes the bar (the run finished or stopped).
    pub fn clear(&self) {
        self.bar.finish_and_clear();
    }
}

impl Watch for Progress {
    fn block_done(&self, replicates: u64) {
        self.bar.inc(replicates);
    }

    fn stop(&self) -> bool {
        interrupted()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bar_only_on_a_terminal_and_not_quiet() {
        assert!(should_show(true, false));
        assert!(!should_show(false, false));
        assert!(!should_show(true, true));
        assert!(!Progress::with_terminal(10, false, false).shown());
        assert!(!Progress::with_terminal(10, true, true).shown());
        let p = Progress::with_terminal(10, false, false);
        p.block_done(4);
        assert_eq!(p.done(), 4);
        assert!(!p.stop());
    }

    #[test]
    fn stage_spinner_only_on_a_terminal() {
        // Off a terminal nothing is drawn and the stage calls are no-ops; on one it is drawn
        // (the draw target is standard error, which the test harness captures or ignores).
        let off = Stage::with_terminal(false);
        off.at("stage");
        assert!(!off.shown());
        assert!(Stage::with_terminal(true).shown());
    }
}
