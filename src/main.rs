//! The `lossprism` binary: parse the command line, call the library, map errors to exit codes
//! (0 success, 1 a check found a regression, 2 bad input or usage).

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Parser;
use lossprism::cli::{Cli, Command, DecompositionView, MergeArgs, RunArgs};
use lossprism::scenario::{self, Plan, PlanOptions};
use lossprism::{family, report, runner, shard};

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
        Command::Merge(args) => merge(args),
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
    if args.shard.is_some() || args.checkpoint.is_some() {
        return run_in_blocks(args, &opts);
    }
    let plan = match &args.scenario {
        Some(p) => scenario::load(p, &opts)?,
        None => scenario::load_default(&opts)?,
    };
    let outcome = runner::run(&plan, args.threads)?;
    let outputs = Outputs {
        out: &args.out,
        csv: &args.csv,
        points: &args.points,
        view: args.decomposition,
        quiet: args.quiet,
    };
    emit(&plan, &outcome, &outputs)
}

/// Where a finished run's result goes (shared by `run` and `merge`).
struct Outputs<'a> {
    out: &'a Option<PathBuf>,
    csv: &'a Option<PathBuf>,
    points: &'a Option<PathBuf>,
    view: DecompositionView,
    quiet: bool,
}

fn emit(plan: &Plan, outcome: &runner::Outcome, o: &Outputs<'_>) -> anyhow::Result<u8> {
    let doc = report::build(plan, outcome);
    let to_stdout = [o.out, o.csv, o.points]
        .iter()
        .any(|p| p.as_ref().is_some_and(|p| p.as_os_str() == "-"));
    if let Some(p) = o.out {
        report::write_atomic(p, report::to_json(&doc).as_bytes())?;
    }
    if let Some(p) = o.csv {
        report::write_atomic(p, report::to_csv(&doc).as_bytes())?;
    }
    if let Some(p) = o.points {
        report::write_atomic(p, report::points_csv(plan, outcome).as_bytes())?;
    }
    if !o.quiet {
        let table = report::table::render_view(&doc, o.view.into());
        if to_stdout {
            eprint!("{table}");
        } else {
            print!("{table}");
        }
    }
    Ok(0)
}

/// `run` with `--shard` and/or `--checkpoint`: runs the job's blocks (resuming from the
/// checkpoint), then writes the shard's part document or the whole run's result.
fn run_in_blocks(args: RunArgs, opts: &PlanOptions) -> anyhow::Result<u8> {
    let source = shard::ScenarioSource::read(args.scenario.as_deref())?;
    let plan = source.plan(opts)?;
    let job = shard::Job {
        plan: &plan,
        source: &source,
        shard: args.shard,
        checkpoint: args.checkpoint.as_deref(),
        stop_after_blocks: args.stop_after_blocks,
        threads: args.threads,
    };
    let done = match shard::execute(&job)? {
        shard::Finish::Stopped {
            new_blocks,
            remaining,
        } => {
            let ck = args
                .checkpoint
                .as_ref()
                .map(|p| p.display().to_string())
                .unwrap_or_default();
            eprintln!(
                "stopped as asked after {new_blocks} newly completed blocks; {remaining} blocks \
                 remain; rerun the same command to resume from {ck}"
            );
            return Ok(3);
        }
        shard::Finish::Done(done) => done,
    };
    if let (Some(s), Some(out)) = (args.shard, &args.out) {
        let doc = shard::part_doc(
            &plan,
            &source,
            &done.fingerprint,
            Some(s),
            false,
            &done.blocks,
        );
        report::write_atomic(out, shard::part_json(&doc).as_bytes())?;
        let range = s.block_range(plan.blocks);
        if !args.quiet {
            eprintln!(
                "shard {s}: blocks {}..{} of {} written to {}; combine all {} parts with \
                 `lossprism merge`",
                range.start,
                range.end,
                plan.blocks,
                out.display(),
                s.count
            );
        }
        return Ok(0);
    }
    let outcome = shard::outcome(&plan, done)?;
    let outputs = Outputs {
        out: &args.out,
        csv: &args.csv,
        points: &args.points,
        view: args.decomposition,
        quiet: args.quiet,
    };
    emit(&plan, &outcome, &outputs)
}

fn merge(args: MergeArgs) -> anyhow::Result<u8> {
    let merged = shard::merge(&args.parts)?;
    let outputs = Outputs {
        out: &args.out,
        csv: &args.csv,
        points: &args.points,
        view: args.decomposition,
        quiet: args.quiet,
    };
    emit(&merged.plan, &merged.outcome, &outputs)
}
