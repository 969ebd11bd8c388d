//! The `lossprism` binary: parse the command line, call the library, map errors to exit codes
//! (0 success, 1 a check found a regression, 2 bad input or usage, 3 stopped on request by the
//! hidden testing flag `--stop-after-blocks`, 130 interrupted by Ctrl-C).

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Parser;
use lossprism::cli::{CheckArgs, Cli, Command, DecompositionView, MergeArgs, PlotArgs, RunArgs};
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
        Command::Check(args) => check(args),
        Command::Plot(args) => plot(args),
        Command::Twin(a) => {
            let text = lossprism::twin::command(&lossprism::twin::TwinOptions {
                table: a.table,
                target: a.target,
                features: a.features,
                classes: a.classes,
                out: a.out,
                seed: a.seed,
                varying: a.varying,
            })?;
            print!("{text}");
            Ok(0)
        }
        Command::Validate { scenario } => {
            let plan = scenario::load(&scenario, &PlanOptions::default())?;
            refuse_custom(&plan)?;
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
    // Wall time goes to the HTML report only, never into the result document.
    let started = std::time::Instant::now();
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
    refuse_custom(&plan)?;
    if let Some(value) = args.assess {
        return assess(&args, &plan, value);
    }
    if args.plot_points.is_some() {
        report::plot::check_point_request(&plan, args.input.as_deref())?;
    }
    lossprism::progress::install_interrupt(lossprism::progress::OnInterrupt::FinishBlocks {
        checkpoint: None,
    });
    let watch = lossprism::progress::Progress::new(plan.replicates, args.quiet);
    let outcome = match runner::run_watched(&plan, args.threads, &watch)? {
        Ok(o) => o,
        Err(stopped) => {
            watch.clear();
            eprintln!(
                "interrupted after {} of {} replicates (the blocks in flight finished); nothing \
                 was written: rerun to start again",
                stopped.replicates_done, stopped.replicates
            );
            return Ok(130);
        }
    };
    watch.clear();
    let outputs = Outputs {
        out: &args.out,
        csv: &args.csv,
        points: &args.points,
        view: args.decomposition,
        quiet: args.quiet,
        pictures: Pictures::of_run(&args, started),
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
    pictures: Pictures<'a>,
}

/// The pictures and the HTML report a run asked for, and when it started (for the wall time).
struct Pictures<'a> {
    plot: Option<&'a PathBuf>,
    plot_points: Option<&'a PathBuf>,
    input: Option<&'a str>,
    report: Option<&'a PathBuf>,
    started: Option<std::time::Instant>,
    /// What the wall time measured, as the HTML report names it.
    wall_label: &'static str,
}

impl<'a> Pictures<'a> {
    fn of_run(args: &'a RunArgs, started: std::time::Instant) -> Self {
        Pictures {
            plot: args.plot.as_ref(),
            plot_points: args.plot_points.as_ref(),
            input: args.input.as_deref(),
            report: args.report.as_ref(),
            started: Some(started),
            wall_label: "wall time",
        }
    }

    /// `merge`'s pictures; the wall time is the merge's own (the shards' times are unknown).
    fn of_merge(args: &'a MergeArgs, started: std::time::Instant) -> Self {
        Pictures {
            plot: args.plot.as_ref(),
            plot_points: args.plot_points.as_ref(),
            input: args.input.as_deref(),
            report: args.report.as_ref(),
            started: Some(started),
            wall_label: "merge wall time",
        }
    }
}

fn emit(plan: &Plan, outcome: &runner::Outcome, o: &Outputs<'_>) -> anyhow::Result<u8> {
    let doc = report::build(plan, outcome);
    let to_stdout = [o.out, o.csv, o.points]
        .iter()
        .any(|p| p.as_ref().is_some_and(|p| p.as_os_str() == "-"));
    // Render every picture before writing anything, so a refusal leaves no partial outputs.
    let pics = &o.pictures;
    let curve = if pics.plot.is_some() || pics.report.is_some() {
        Some(report::plot::curve_svg(&doc, o.view.into())?)
    } else {
        None
    };
    let points_svg = match pics.plot_points {
        Some(_) => {
            let v = report::plot::point_view(plan, outcome, &doc, pics.input)?;
            Some(report::plot::points_svg(&v)?)
        }
        None => None,
    };
    let selection = match (pics.report, serde_json::to_value(&doc)) {
        (Some(_), Ok(v)) => match report::plot::SelectionView::from_json(&v) {
            Some(sel) => Some(report::plot::selection_svg(&sel, &doc.knob)?),
            None => None,
        },
        _ => None,
    };
    // All outputs are staged as temporary files first and renamed together, so one bad path
    // leaves none of the outputs behind.
    let mut files: Vec<(&std::path::Path, Vec<u8>)> = Vec::new();
    if let Some(p) = o.out {
        files.push((p, report::to_json(&doc).into_bytes()));
    }
    if let Some(p) = o.csv {
        files.push((p, report::to_csv(&doc).into_bytes()));
    }
    if let Some(p) = o.points {
        files.push((p, report::points_csv(plan, outcome).into_bytes()));
    }
    if let (Some(p), Some(svg)) = (pics.plot, &curve) {
        files.push((p, svg.clone().into_bytes()));
    }
    if let (Some(p), Some(svg)) = (pics.plot_points, &points_svg) {
        files.push((p, svg.clone().into_bytes()));
    }
    if let Some(p) = pics.report {
        let wall = pics.started.map(|t| t.elapsed().as_secs_f64());
        let all = report::html::Pictures {
            curve,
            points: points_svg,
            selection,
        };
        let mut html = report::html::render(&doc, o.view.into(), &all, wall);
        if pics.wall_label != "wall time" {
            html = html.replacen(
                "<dt>wall time</dt>",
                &format!("<dt>{}</dt>", pics.wall_label),
                1,
            );
        }
        files.push((p, html.into_bytes()));
    }
    report::write_all_atomic(&files)?;
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
    let started = std::time::Instant::now();
    let source = shard::ScenarioSource::read(args.scenario.as_deref())?;
    let plan = source.plan(opts)?;
    refuse_custom(&plan)?;
    if args.plot_points.is_some() {
        report::plot::check_point_request(&plan, args.input.as_deref())?;
    }
    // As for plain runs: Ctrl-C lets the blocks in flight finish (each rewrites the checkpoint
    // atomically), then the job stops; the bar shows only on a terminal and without --quiet.
    lossprism::progress::install_interrupt(lossprism::progress::OnInterrupt::FinishBlocks {
        checkpoint: args.checkpoint.clone(),
    });
    let job_replicates = match shard::job_blocks(&plan, args.shard) {
        Ok(blocks) => blocks
            .map(|b| {
                let (s, e) = plan.block_range(b);
                e - s
            })
            .sum(),
        Err(_) => plan.replicates,
    };
    let watch = lossprism::progress::Progress::new(job_replicates, args.quiet);
    let job = shard::Job {
        plan: &plan,
        source: &source,
        shard: args.shard,
        checkpoint: args.checkpoint.as_deref(),
        stop_after_blocks: args.stop_after_blocks,
        threads: args.threads,
        watch: &watch,
    };
    let finish = shard::execute(&job);
    watch.clear();
    let done = match finish? {
        shard::Finish::Stopped {
            new_blocks,
            remaining,
            interrupted: true,
        } => {
            let total = job_block_count(&plan, args.shard);
            let kept = match &args.checkpoint {
                Some(p) => format!(
                    "the checkpoint {} holds them: rerun the same command to resume",
                    p.display()
                ),
                None => "nothing was written: rerun to start again".into(),
            };
            eprintln!(
                "interrupted after {} of {total} blocks ({new_blocks} completed in this session; \
                 the blocks in flight finished); {kept}",
                total - remaining
            );
            return Ok(130);
        }
        shard::Finish::Stopped {
            new_blocks,
            remaining,
            interrupted: false,
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
    let outcome = shard::outcome(&plan, *done)?;
    let outputs = Outputs {
        out: &args.out,
        csv: &args.csv,
        points: &args.points,
        view: args.decomposition,
        quiet: args.quiet,
        pictures: Pictures::of_run(&args, started),
    };
    emit(&plan, &outcome, &outputs)
}

/// The number of blocks a job covers (the whole run's when the shard is refused).
fn job_block_count(plan: &Plan, shard: Option<shard::ShardSpec>) -> u64 {
    shard::job_blocks(plan, shard)
        .map(|r| r.end - r.start)
        .unwrap_or(plan.blocks)
}

fn merge(args: MergeArgs) -> anyhow::Result<u8> {
    // The HTML report's wall time is the merge's own, labelled so.
    let started = std::time::Instant::now();
    let merged = shard::merge(&args.parts)?;
    if args.plot_points.is_some() {
        report::plot::check_point_request(&merged.plan, args.input.as_deref())?;
    }
    let outputs = Outputs {
        out: &args.out,
        csv: &args.csv,
        points: &args.points,
        view: args.decomposition,
        quiet: args.quiet,
        pictures: Pictures::of_merge(&args, started),
    };
    emit(&merged.plan, &merged.outcome, &outputs)
}

/// `family = "custom"` needs an estimator supplied from Rust; the command line has none.
fn refuse_custom(plan: &Plan) -> anyhow::Result<()> {
    if plan.family.name() == "custom" {
        anyhow::bail!(
            "{}: key `model.family`: {}",
            plan.file,
            lossprism::harness::CLI_REFUSAL
        );
    }
    Ok(())
}

/// `check`: compare a result with a baseline; exit 0 nothing worse, 1 something worse.
fn check(args: CheckArgs) -> anyhow::Result<u8> {
    use lossprism::check;
    let read = |p: &std::path::Path| -> anyhow::Result<(String, report::ResultDoc)> {
        let text =
            std::fs::read_to_string(p).map_err(|e| anyhow::anyhow!("{}: {e}", p.display()))?;
        let doc = check::parse_result(&text, &p.display().to_string())?;
        Ok((text, doc))
    };
    let (text, new) = read(&args.result)?;
    if args.update && !args.baseline.exists() {
        report::write_atomic(&args.baseline, text.as_bytes())?;
        println!(
            "baseline {} created from {}",
            args.baseline.display(),
            args.result.display()
        );
        return Ok(0);
    }
    if !args.baseline.exists() {
        anyhow::bail!(
            "{}: baseline not found; create it with `lossprism check {} --baseline {} --update`",
            args.baseline.display(),
            args.result.display(),
            args.baseline.display()
        );
    }
    let (_, base) = read(&args.baseline)?;
    let opts = check::CheckOptions {
        sigma: args.sigma,
        margin: args.margin,
        term_margins: args.margin_term,
    };
    let rep = check::compare(&new, &base, &opts)?;
    print!("{rep}");
    if args.update {
        report::write_atomic(&args.baseline, text.as_bytes())?;
        println!("baseline {} updated", args.baseline.display());
        return Ok(0);
    }
    Ok(rep.exit_code())
}

/// `plot`: the curve picture (and the selection histogram) of a saved result document.
fn plot(args: PlotArgs) -> anyhow::Result<u8> {
    let name = args.result.display().to_string();
    let text = std::fs::read_to_string(&args.result).map_err(|e| anyhow::anyhow!("{name}: {e}"))?;
    let value: serde_json::Value = serde_json::from_str(&text)
        .map_err(|e| anyhow::anyhow!("{name}: not a result document (JSON): {e}"))?;
    let doc: report::ResultDoc = serde_json::from_value(value.clone())
        .map_err(|e| anyhow::anyhow!("{name}: not a lossprism result document: {e}"))?;
    let curve = report::plot::curve_svg(&doc, args.decomposition.into())?;
    let selection = match &args.selection {
        Some(_) => {
            let sel = report::plot::SelectionView::from_json(&value).ok_or_else(|| {
                anyhow::anyhow!(
                    "{name}: no `selection` section (run the cross-validation audit first); \
                     drop --selection"
                )
            })?;
            Some(report::plot::selection_svg(&sel, &doc.knob)?)
        }
        None => None,
    };
    report::write_atomic(&args.out, curve.as_bytes())?;
    if let (Some(p), Some(svg)) = (&args.selection, selection) {
        report::write_atomic(p, svg.as_bytes())?;
    }
    Ok(0)
}

/// `run --assess VALUE` on a table scenario with a holdout: the one-off holdout assessment,
/// counted in the ledger beside the scenario file.
fn assess(args: &RunArgs, plan: &Plan, value: f64) -> anyhow::Result<u8> {
    use lossprism::table::holdout;
    let Some(path) = &args.scenario else {
        anyhow::bail!("--assess needs a table scenario file with a holdout");
    };
    let ledger = holdout::ledger_path(path);
    let a = holdout::assess(plan, value, &ledger)?;
    println!(
        "holdout assessment of {}: {} = {} fitted on {} rows; holdout {} loss = {} ± {} over {} rows \
         (assessment {} of this holdout, hash {}, ledger {})",
        plan.name,
        plan.family.knob(),
        report::fmt_value(a.value),
        a.train_rows,
        plan.loss.name(),
        report::fmt_num(a.loss),
        report::fmt_se(a.stderr),
        a.rows,
        a.count,
        a.hash,
        ledger.display()
    );
    if let Some(w) = &a.warning {
        eprintln!("{w}");
    }
    Ok(0)
}
