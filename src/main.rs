//! The `lossprism` binary: parse the command line, call [`lossprism::commands`], map errors to
//! exit codes (0 success, 1 a check found a regression, 2 bad input or usage, 3 stopped on
//! request by the hidden testing flag `--stop-after-blocks`, 130 interrupted by Ctrl-C).

use std::process::ExitCode;

use clap::Parser;
use lossprism::cli::{Cli, Command};
use lossprism::commands;

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return ExitCode::from(code);
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
        } => commands::validate_with(&scenario, memory_limit),
        Command::Families => commands::families(),
    };
    match result {
        Ok(code) => ExitCode::from(code),
        Err(e) => {
            eprintln!("error: {e}");
            ExitCode::from(2)
        }
    }
}
