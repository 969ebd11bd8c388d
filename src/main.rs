//! The `lossprism` binary: parse the command line, call the library, map errors to exit codes
//! (0 success, 1 a check found a regression, 2 bad input or usage).

use std::process::ExitCode;

use clap::Parser;
use lossprism::cli::{Cli, Command, RunArgs};
use lossprism::scenario::{self, PlanOptions};
use lossprism::{family, report, runner};

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    match dispatch(cli) {
        Ok(code) => ExitCode::from(code),
        Err(e) => {
            eprintln!("error: {e}");
            ExitCode::from(2)
        }
    }
}

fn dispatch(cli: Cli) -> anyhow::Result<u8> {
    match cli.command {
        Command::Run(args) => run(args),
        Command::Validate { scenario } => {
            let plan = scenario::load(&scenario, &PlanOptions::default())?;
            runner::prepare(&plan)?;
            println!(
                "{}: valid ({} family, {} grid values, R = {}, n = {})",
                scenario.display(),
                plan.family.name(),
                plan.grid.len(),
                plan.replicates,
                plan.train_size()
            );
            Ok(0)
        }
        Command::Families => {
            for f in family::catalogue() {
                println!("{:<8} knob {:<10} {}", f.name, f.knob, f.meaning);
                println!(
                    "{:<8} {:<15} tasks: {}; options: {}",
                    "", "", f.tasks, f.options
                );
            }
            Ok(0)
        }
    }
}

fn run(args: RunArgs) -> anyhow::Result<u8> {
    let opts = PlanOptions {
        replicates: args.replicates,
        seed: args.seed,
    };
    let plan = match &args.scenario {
        Some(p) => scenario::load(p, &opts)?,
        None => scenario::load_default(&opts)?,
    };
    let outcome = runner::run(&plan, args.threads)?;
    let doc = report::build(&plan, &outcome);
    let to_stdout = [&args.out, &args.csv, &args.points]
        .iter()
        .any(|p| p.as_ref().is_some_and(|p| p.as_os_str() == "-"));
    if let Some(p) = &args.out {
        report::write_atomic(p, report::to_json(&doc).as_bytes())?;
    }
    if let Some(p) = &args.csv {
        report::write_atomic(p, report::to_csv(&doc).as_bytes())?;
    }
    if let Some(p) = &args.points {
        report::write_atomic(p, report::points_csv(&plan, &outcome).as_bytes())?;
    }
    if !args.quiet {
        let table = report::table::render_view(&doc, args.decomposition.into());
        if to_stdout {
            eprint!("{table}");
        } else {
            print!("{table}");
        }
    }
    Ok(0)
}
