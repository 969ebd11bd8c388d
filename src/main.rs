//! The `lossprism` binary: parse the command line, call [`lossprism::commands`], map errors to
//! exit codes (0 success, 1 a check found a regression, 2 bad input or usage, 3 stopped on
//! request by the hidden testing flag `--stop-after-blocks`, 130 interrupted by Ctrl-C).

use std::process::ExitCode;

use clap::Parser;
use lossprism::cli::{Cli, Command};
use lossprism::commands;

/// Whether standard output was closed when the process started, read before the Rust runtime
/// reopens a closed descriptor on `/dev/null` (after which every write succeeds and vanishes).
/// Linux only (an `.init_array` constructor); elsewhere it is never reported.
#[cfg(any(target_os = "linux", target_os = "android"))]
mod stdout_probe {
    use std::sync::atomic::{AtomicBool, Ordering};

    static CLOSED: AtomicBool = AtomicBool::new(false);

    extern "C" fn probe() {
        // SAFETY: fcntl(F_GETFD) on descriptor 1 only reads its flags; nothing else runs yet.
        if unsafe { libc::fcntl(1, libc::F_GETFD) } == -1 {
            CLOSED.store(true, Ordering::Relaxed);
        }
    }

    // Runs before `main` and before the runtime's own start-up (which reopens closed standard
    // descriptors), as every `.init_array` entry does.
    #[used]
    #[link_section = ".init_array"]
    static PROBE: extern "C" fn() = probe;

    pub fn closed() -> bool {
        CLOSED.load(Ordering::Relaxed)
    }
}

#[cfg(not(any(target_os = "linux", target_os = "android")))]
mod stdout_probe {
    pub fn closed() -> bool {
        false
    }
}

fn main() -> ExitCode {
    lossprism::output::set_stdout_closed_at_start(stdout_probe::closed());
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            if !e.use_stderr() {
                // --help and --version: printed in full on standard output (a failed write is
                // exit 2, as for every other printed text)
                return match lossprism::output::say(&e.render().to_string()) {
                    Ok(()) => ExitCode::from(0),
                    Err(err) => {
                        lossprism::output::tell(&format!("error: {err}\n"));
                        ExitCode::from(2)
                    }
                };
            }
            lossprism::output::tell(&format!(
                "{}\n",
                terminal_safe(&one_line(&e.render().to_string()))
            ));
            return ExitCode::from(2);
        }
    };
    let result = match cli.command {
        Command::Run(args) => commands::run(args),
        Command::Merge(args) => commands::merge(args),
        Command::Check(args) => commands::check(args),
        Command::Plot(args) => commands::plot(args),
        Command::Twin(args) => commands::twin(args),
        Command::Validate {
            scenario,
            memory_limit,
            threads,
        } => commands::validate_with(&scenario, memory_limit, threads),
        Command::Families => commands::families(),
    };
    match result {
        Ok(code) => ExitCode::from(code),
        Err(e) => {
            lossprism::output::tell(&format!("error: {}\n", terminal_safe(&e.to_string())));
            ExitCode::from(2)
        }
    }
}

/// The longest error line printed, in characters: a message quoting a huge value from an input
/// (a 20 MB string where a format name belongs) is cut to this.
const MAX_ERROR_CHARS: usize = 4000;

/// An error message as printed: control characters escaped (no escape sequence from an input
/// reaches the terminal; [`lossprism::error::one_line`]) and cut to [`MAX_ERROR_CHARS`].
fn terminal_safe(message: &str) -> String {
    lossprism::error::one_line(&lossprism::fmt::clip(message, MAX_ERROR_CHARS))
}

/// A command-line parsing error on one line: the message, the items listed under it (a missing
/// argument's name, say) and clap's tip, then a pointer to `--help`.
fn one_line(rendered: &str) -> String {
    let mut lines = rendered.lines();
    let mut out = lines
        .next()
        .unwrap_or("error: bad command line")
        .trim_end()
        .to_string();
    let mut listed = Vec::new();
    let mut tip = None;
    for l in lines {
        let t = l.trim();
        if t.starts_with("Usage:") || t.starts_with("For more information") {
            break;
        }
        if let Some(rest) = t.strip_prefix("tip:") {
            tip = Some(rest.trim().to_string());
        } else if !t.is_empty() && l.starts_with(' ') {
            listed.push(t.to_string());
        }
    }
    if !listed.is_empty() {
        out.push(' ');
        out.push_str(&listed.join(", "));
    }
    if let Some(t) = tip {
        out.push_str(&format!(" ({t})"));
    }
    // The bare command's first line is the program's description, which ends a sentence (but
    // a listed argument that takes several values ends in "...", which stays whole).
    if out.ends_with('.') && !out.ends_with("...") {
        out.pop();
    }
    out.push_str("; see --help");
    out
}
