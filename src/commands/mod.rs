//! The commands of the `lossprism` binary, as library functions returning exit codes (0
//! success, 1 a check found a regression, 2 bad input (as an `Err`), 3 stopped on request by the
//! hidden testing flag `--stop-after-blocks`, 130 interrupted by Ctrl-C). Every output path is
//! checked before any work ([`crate::output`]): it never replaces an input or another output,
//! devices and FIFOs are written in place, and all outputs of a command are committed together.

pub mod assess;
pub mod twin;

use std::path::{Path, PathBuf};

use crate::cli::{CheckArgs, DecompositionView, MergeArgs, PlotArgs, RunArgs, TwinArgs};
use crate::error::Error;
use crate::output::{Kind, OutputId, Outputs};
use crate::report::terminal::View;
use crate::scenario::{self, Plan, PlanOptions, Source};
use crate::{family, progress, report, runner, shard};

use crate::output::{note, noteln, out, outln};

/// The files a plan reads besides the scenario (a table, a twin's table, the files an external
/// estimator runs).
fn data_inputs(plan: &Plan) -> Vec<(&'static str, PathBuf)> {
    let data = "the scenario's data file";
    let mut files: Vec<(&'static str, PathBuf)> = match &plan.source {
        Source::Table(t) => vec![(data, t.table.path.clone())],
        Source::Synthetic(s) => s
            .process
            .source_file()
            .map(|f| (data, f))
            .into_iter()
            .collect(),
    };
    for m in &plan.models {
        files.extend(
            m.family
                .input_files()
                .into_iter()
                .map(|f| ("a file the external estimator runs", f)),
        );
    }
    files
}

/// Refuses a standard output or error opened on one of the plan's data inputs
/// ([`data_inputs`]) or on one of `more` (`output::guard_inputs`).
fn guard_plan_inputs(plan: &Plan, more: &[(&str, &Path)]) -> Result<(), Error> {
    let data = data_inputs(plan);
    let mut inputs: Vec<(&str, &Path)> = data.iter().map(|(r, p)| (*r, p.as_path())).collect();
    inputs.extend_from_slice(more);
    crate::output::guard_inputs(&inputs)
}

/// Where a finished run's outputs go (shared by `run` and `merge`).
struct Outputs2<'a> {
    out: Option<&'a Path>,
    csv: Option<&'a Path>,
    points: Option<&'a Path>,
    plot: Option<&'a Path>,
    plot_points: Option<&'a Path>,
    report: Option<&'a Path>,
    plot_selection: Option<&'a Path>,
    input: Option<&'a str>,
    view: View,
    y_scale: report::plot::YScale,
    quiet: bool,
    started: std::time::Instant,
    wall_label: &'static str,
}

impl Outputs2<'_> {
    /// Registers every output with `set` (checked at once) and returns their ids in the order
    /// out, csv, points, plot, plot_points, report, plot_selection.
    fn register(&self, set: &mut Outputs) -> Result<[Option<OutputId>; 7], Error> {
        let mut ids = [None; 7];
        for (i, (flag, p, kind)) in [
            ("--out", self.out, Kind::Json),
            ("--csv", self.csv, Kind::Csv),
            ("--points", self.points, Kind::Csv),
            ("--plot", self.plot, Kind::Svg),
            ("--plot-points", self.plot_points, Kind::Svg),
            ("--report", self.report, Kind::Html),
            ("--plot-selection", self.plot_selection, Kind::Svg),
        ]
        .into_iter()
        .enumerate()
        {
            if let Some(p) = p {
                ids[i] = Some(set.output_of(flag, p, kind)?);
            }
        }
        Ok(ids)
    }

    fn any(&self) -> bool {
        [
            self.out,
            self.csv,
            self.points,
            self.plot,
            self.plot_points,
            self.report,
            self.plot_selection,
        ]
        .iter()
        .any(Option::is_some)
    }

    fn to_stdout(&self) -> bool {
        [
            self.out,
            self.csv,
            self.points,
            self.plot,
            self.plot_points,
            self.report,
            self.plot_selection,
        ]
        .iter()
        .any(|p| p.is_some_and(crate::output::is_stdout))
    }
}

/// Renders and commits every output of a finished run, then prints the table.
fn emit(
    plan: &Plan,
    outcome: &runner::Outcome,
    o: &Outputs2<'_>,
    set: Outputs,
    ids: [Option<OutputId>; 7],
) -> Result<u8, Error> {
    let doc = report::build(plan, outcome);
    refuse_missing(plan, &doc)?;
    let several_models = !doc.models.is_empty();
    // A picture shows one decomposition: with `all` (tables only) the report draws Domingos's.
    let pic_view = if o.view == View::All {
        View::Domingos
    } else {
        o.view
    };
    // Render every picture before writing anything, so a refusal leaves no partial outputs.
    let curve = if o.plot.is_some() || o.report.is_some() {
        Some(if several_models {
            report::plot::families_svg(&doc)?
        } else {
            report::plot::curve_svg_scaled(&doc.single(&doc.first_model()), pic_view, o.y_scale)?
        })
    } else {
        None
    };
    let mut extra: Vec<(String, String, String)> = Vec::new();
    if o.report.is_some() {
        if several_models {
            for f in doc.families() {
                extra.push((
                    format!("The curve of {f}"),
                    format!(
                        "Expected loss and its parts for {f} at the largest training size, with bands of ±2 standard errors."
                    ),
                    report::plot::curve_svg_scaled(&doc.single(&f), pic_view, o.y_scale)?,
                ));
            }
        }
        if !doc.sizes.is_empty() {
            extra.push((
                "Would more data help?".into(),
                "At each family's best knob value for each training size: expected loss (solid, ±2 standard errors), the bias-type term (dashed; bias² for the squared loss) and variance (dotted).".into(),
                report::plot::learning_svg(&doc)?,
            ));
            for f in doc.families() {
                extra.push((
                    format!("Expected loss of {f} by size and knob"),
                    "Darker cells have a higher expected loss relative to the best of their row, on a log scale (twice the best or more is darkest); the dot marks the best value at each size.".into(),
                    report::plot::heatmap_svg(&doc, &f)?,
                ));
            }
        }
    }
    let points_svg = match o.plot_points {
        Some(_) => {
            let (tx, ty) = runner::training_set(plan, &outcome.prepared, 0)?;
            let v = report::plot::point_view(plan, outcome, &doc, o.input, (&tx, &ty))?;
            Some(report::plot::points_svg(&v)?)
        }
        None => None,
    };
    let selection = match (o.report.or(o.plot_selection), serde_json::to_value(&doc)) {
        (Some(_), Ok(v)) => match report::plot::SelectionView::from_json(&v) {
            Ok(sel) => Some(report::plot::selection_svg(&sel, &doc.knob)?),
            Err(_) => None,
        },
        _ => None,
    };
    let mut contents: Vec<(OutputId, Vec<u8>)> = Vec::new();
    let [out, csv, points, plot, plot_points, html, plot_selection] = ids;
    if let Some(id) = out {
        contents.push((id, report::to_json(&doc).into_bytes()));
    }
    if let Some(id) = csv {
        contents.push((id, report::csv::to_csv(&doc).into_bytes()));
    }
    if let Some(id) = points {
        contents.push((id, report::csv::points_csv(plan, outcome).into_bytes()));
    }
    if let (Some(id), Some(svg)) = (plot, &curve) {
        contents.push((id, svg.clone().into_bytes()));
    }
    if let (Some(id), Some(svg)) = (plot_points, &points_svg) {
        contents.push((id, svg.clone().into_bytes()));
    }
    if let Some(id) = plot_selection {
        let svg = selection.as_ref().ok_or_else(|| {
            Error::Usage(
                "--plot-selection needs a scenario with an [audit] section (the selection audit)"
                    .into(),
            )
        })?;
        contents.push((id, svg.clone().into_bytes()));
    }
    if let Some(id) = html {
        let wall = o.started.elapsed().as_secs_f64();
        let all = report::html::Pictures {
            curve,
            points: points_svg,
            selection,
            extra,
        };
        let page = report::html::render(&doc, o.view, &all, Some(wall), o.wall_label);
        contents.push((id, page.into_bytes()));
    }
    set.commit(contents)?;
    if !o.quiet {
        let table = report::terminal::render_view(&doc, o.view);
        if o.to_stdout() {
            note!("{table}");
        } else {
            out!("{table}");
        }
    }
    Ok(0)
}

/// `lossprism run`.
pub fn run(args: RunArgs) -> Result<u8, Error> {
    // Wall time goes to the HTML report only, never into the result document.
    let started = std::time::Instant::now();
    // The handler first, before any output path is probed. Without a checkpoint or a part
    // nothing keeps the blocks in flight, so a signal ends the run at once (it waited for them,
    // 49 s on a large run, then threw them away; a batch system's SIGKILL can come first).
    let checkpointed = args.shard.is_some() || args.checkpoint.is_some();
    progress::install_interrupt(if checkpointed {
        progress::OnInterrupt::FinishBlocks {
            checkpoint: args.checkpoint.clone(),
        }
    } else {
        progress::OnInterrupt::ExitNow { checkpoint: None }
    });
    let opts = PlanOptions {
        replicates: args.replicates,
        seed: args.seed,
        eval_seed: args.eval_seed,
        memory_limit: args.memory_limit,
    };
    let source = shard::ScenarioSource::read(args.scenario.as_deref())?;
    let plan = source.plan(&opts)?;
    {
        let mut more: Vec<(&str, &Path)> = Vec::new();
        if let Some(p) = &args.scenario {
            more.push(("the scenario file", p));
        }
        if let Some(ck) = &args.checkpoint {
            more.push(("the checkpoint", ck));
        }
        guard_plan_inputs(&plan, &more)?;
    }
    if args.eval_seed.is_some() && matches!(plan.source, Source::Table(_)) {
        return Err(Error::Usage(format!(
            "{}: --eval-seed applies to synthetic and twin sources; a table's evaluation points \
             are its rows (drop --eval-seed)",
            plan.file
        )));
    }
    refuse_custom(&plan)?;
    runner::pool_check(args.threads)?;
    // Before anything is allocated: the evaluation points, the training sets, the accumulators.
    let document_blocks = if args.checkpoint.is_some() || args.shard.is_some() {
        job_block_count(&plan, args.shard)
    } else {
        0
    };
    runner::memory::check_writing(&plan, args.threads, args.memory_limit, document_blocks)?;
    if let Some(value) = args.assess {
        return assess(&args, &plan, value);
    }
    let o = Outputs2 {
        out: args.out.as_deref(),
        csv: args.csv.as_deref(),
        points: args.points.as_deref(),
        plot: args.plot.as_deref(),
        plot_points: args.plot_points.as_deref(),
        report: args.report.as_deref(),
        input: args.input.as_deref(),
        view: args.decomposition.into(),
        y_scale: args.y_scale.into(),
        plot_selection: args.plot_selection.as_deref(),
        quiet: args.quiet,
        started,
        wall_label: "wall time",
    };
    if crate::output::stdout_closed_at_start()
        && !args.quiet
        && !o.any()
        && args.shard.is_none()
        && args.checkpoint.is_none()
    {
        // The table is the only result, and a closed standard output would swallow it.
        return Err(Error::Usage(
            "standard output is closed and no output file is named, so the result would be \
             lost: add --out FILE.json (or --csv, --report), or redirect standard output"
                .into(),
        ));
    }
    if args.quiet && !o.any() && args.shard.is_none() && args.checkpoint.is_none() {
        // Report a bad scenario first (its data errors show when the evaluation points are
        // drawn), then the pointless request.
        runner::prepare_to_fit(&plan)?;
        return Err(Error::Usage(
            "--quiet with no output file would compute a result and show nothing: add --out \
             FILE.json (or --csv, --plot, --report), or drop --quiet"
                .into(),
        ));
    }
    // A part records its scenario's path as text, and `merge` protects the file by that path:
    // a name that is not UTF-8 was recorded altered, and `merge --out` replaced the scenario.
    if let (Some(p), true) = (&args.scenario, args.shard.is_some()) {
        if p.to_str().is_none() {
            return Err(Error::Usage(format!(
                "{}: a part records its scenario file's name as text, and this name is not \
                 UTF-8; rename the scenario file to run it in shards",
                crate::error::shown(p)
            )));
        }
    }
    // Every path is checked before any work.
    let mut set = Outputs::new();
    // The holdout ledger counts the looks at the holdout: replacing it would reset the count
    // and lose the warning. Protected for every table scenario (a checkpoint written there
    // before any holdout existed made a later `--assess` fail) and wherever a ledger is.
    let ledger = args.scenario.as_ref().and_then(|p| {
        let ledger = assess::ledger_path(p);
        (matches!(&plan.source, Source::Table(_)) || ledger.exists()).then_some(ledger)
    });
    if let Some(p) = &args.scenario {
        set.input("the scenario file", p);
    }
    if let Some(l) = &ledger {
        set.input("the scenario's holdout ledger", l);
    }
    for (role, p) in data_inputs(&plan) {
        set.input(role, &p);
    }
    if let Some(ck) = &args.checkpoint {
        // A checkpoint is rewritten as the run goes and read back to resume: standard
        // output, a device or a pipe cannot hold it.
        let not_a_file = std::fs::metadata(ck).is_ok_and(|m| !m.is_file());
        let descriptor = std::fs::canonicalize(ck.parent().unwrap_or(Path::new(".")))
            .is_ok_and(|d| d.starts_with("/proc") || d.starts_with("/dev"));
        if crate::output::is_stdout(ck) || not_a_file || descriptor {
            return Err(Error::Usage(format!(
                "--checkpoint {}: a checkpoint must be a file (it is rewritten as the run goes \
                 and read back to resume), not standard output, a device, a pipe or a folder",
                ck.display()
            )));
        }
        set.input("the checkpoint file", ck);
    }
    let ids = o.register(&mut set)?;
    if let Some(ck) = &args.checkpoint {
        // The checkpoint is rewritten during the run: it must clash with nothing either.
        let mut inputs: Vec<(&str, &Path)> = Vec::new();
        if let Some(p) = &args.scenario {
            inputs.push(("the scenario file", p));
        }
        if let Some(l) = &ledger {
            inputs.push(("the scenario's holdout ledger", l));
        }
        let data = data_inputs(&plan);
        for (role, p) in &data {
            inputs.push((role, p));
        }
        let mut outs: Vec<(&str, &Path)> = vec![("--checkpoint", ck)];
        for (flag, p) in [
            ("--out", o.out),
            ("--csv", o.csv),
            ("--points", o.points),
            ("--plot", o.plot),
            ("--plot-points", o.plot_points),
            ("--report", o.report),
        ] {
            if let Some(p) = p {
                outs.push((flag, p));
            }
        }
        crate::output::check(&inputs, &outs)?;
    }
    if args.plot_points.is_some() {
        report::plot::check_point_request(&plan, args.input.as_deref())?;
    }
    if checkpointed {
        let flag = if args.checkpoint.is_some() {
            "--checkpoint"
        } else {
            "--shard"
        };
        shard::check_document_size(&plan, args.shard, flag)?;
    }
    if !checkpointed {
        let watch = progress::Progress::new(plan.replicates, args.quiet);
        let outcome = match runner::run_watched(&plan, args.threads, &watch)? {
            Ok(o) => o,
            Err(stopped) => {
                watch.clear();
                noteln!(
                    "interrupted after {} of {} replicates (the blocks in flight finished); nothing \
                     was written: rerun to start again",
                    stopped.replicates_done, stopped.replicates
                );
                return Ok(130);
            }
        };
        watch.clear();
        progress::writing_outputs();
        return emit(&plan, &outcome, &o, set, ids);
    }
    run_in_blocks(&args, &plan, &source, o, set, ids)
}

/// `run` with `--shard` and/or `--checkpoint`: runs the job's blocks (resuming from the
/// checkpoint), then writes the shard's part document or the whole run's result.
fn run_in_blocks(
    args: &RunArgs,
    plan: &Plan,
    source: &shard::ScenarioSource,
    o: Outputs2<'_>,
    set: Outputs,
    ids: [Option<OutputId>; 7],
) -> Result<u8, Error> {
    let job_replicates = match shard::job_blocks(plan, args.shard) {
        Ok(blocks) => blocks
            .map(|b| {
                let (s, e) = plan.block_range(b);
                e - s
            })
            .sum(),
        Err(_) => plan.replicates,
    };
    let watch = progress::Progress::new(job_replicates, args.quiet);
    let job = shard::Job {
        plan,
        source,
        shard: args.shard,
        checkpoint: args.checkpoint.as_deref(),
        stop_after_blocks: args.stop_after_blocks,
        threads: args.threads,
        watch: &watch,
    };
    let finish = shard::execute(&job);
    watch.clear();
    let total = job_block_count(plan, args.shard);
    let done = match finish? {
        shard::Finish::Stopped {
            new_blocks,
            remaining,
            interrupted: true,
        } => {
            let kept = match &args.checkpoint {
                Some(p) => format!(
                    "the checkpoint {} holds them: rerun the same command to resume",
                    crate::error::shown(p)
                ),
                None => "nothing was written: rerun to start again".into(),
            };
            noteln!(
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
                .map(crate::error::shown)
                .unwrap_or_default();
            let blocks = |n: u64| {
                if n == 1 {
                    "1 block".to_string()
                } else {
                    format!("{n} blocks")
                }
            };
            noteln!(
                "stopped as asked after {} newly completed; {} left; rerun the same command to \
                 resume from {ck}",
                blocks(new_blocks),
                blocks(remaining)
            );
            return Ok(3);
        }
        shard::Finish::Done(done) => done,
    };
    // A signal after the last block (the summary of a large run takes a while): stop as the
    // signal asks, with every block kept in the checkpoint, instead of writing and exiting 0.
    let stop_after_blocks = |what: &str| -> u8 {
        let kept = match &args.checkpoint {
            Some(p) => format!(
                "the checkpoint {} holds every block: rerun the same command to write the outputs \
                 without computing again",
                crate::error::shown(p)
            ),
            None => "nothing was written: rerun to start again".into(),
        };
        noteln!("interrupted {what}; {kept}");
        130
    };
    if progress::interrupted() {
        if args.shard.is_some() && args.checkpoint.is_none() {
            // Nothing else keeps a finished shard's blocks, and its part takes moments to
            // write: written, rather than thrown away (a batch system's time limit).
            noteln!(
                "interrupted after the last block: writing the part, which nothing else would \
                 keep"
            );
        } else {
            return Ok(stop_after_blocks("after the last block"));
        }
    }
    if done.resumed > 0 && !args.quiet {
        if let Some(ck) = &args.checkpoint {
            noteln!(
                "resumed: {} of {total} blocks from {}",
                done.resumed,
                crate::error::shown(ck)
            );
        }
    }
    if let Some(s) = args.shard {
        progress::writing_outputs();
        let doc = shard::part_doc(
            plan,
            source,
            &done.fingerprint,
            Some(s),
            false,
            &done.blocks,
        );
        let Some(id) = ids[0] else {
            return Err(Error::Usage("--shard needs --out PART.json".into()));
        };
        set.commit(vec![(id, shard::part_json(&doc).into_bytes())])?;
        let range = s.block_range(plan.blocks);
        if !args.quiet {
            noteln!(
                "shard {s}: blocks {}..{} of {} written to {}; combine all {} parts with \
                 `lossprism merge`",
                range.start,
                range.end,
                plan.blocks,
                crate::error::shown(args.out.as_deref().unwrap_or(Path::new("-"))),
                s.count
            );
        }
        return Ok(0);
    }
    let outcome = shard::outcome(plan, *done, args.threads)?;
    if progress::interrupted() {
        return Ok(stop_after_blocks("while the summary was computed"));
    }
    progress::writing_outputs();
    emit(plan, &outcome, &o, set, ids)
}

/// The number of blocks a job covers (the whole run's when the shard is refused).
fn job_block_count(plan: &Plan, shard: Option<shard::ShardSpec>) -> u64 {
    shard::job_blocks(plan, shard)
        .map(|r| r.end - r.start)
        .unwrap_or(plan.blocks)
}

/// `lossprism merge`.
pub fn merge(args: MergeArgs) -> Result<u8, Error> {
    // A signal ends the command at once, but never in the middle of writing its outputs
    // (they are written whole or not at all, and no staged copy is left behind).
    progress::install_interrupt(progress::OnInterrupt::ExitNow { checkpoint: None });
    // The HTML report's wall time is the merge's own, labelled so.
    let started = std::time::Instant::now();
    let parts: Vec<(&str, &Path)> = args
        .parts
        .iter()
        .map(|p| ("the part", p.as_path()))
        .collect();
    crate::output::guard_inputs(&parts)?;
    let o = Outputs2 {
        out: args.out.as_deref(),
        csv: args.csv.as_deref(),
        points: args.points.as_deref(),
        plot: args.plot.as_deref(),
        plot_points: args.plot_points.as_deref(),
        report: args.report.as_deref(),
        input: args.input.as_deref(),
        view: args.decomposition.into(),
        y_scale: args.y_scale.into(),
        plot_selection: args.plot_selection.as_deref(),
        quiet: args.quiet,
        started,
        wall_label: "merge wall time",
    };
    if args.quiet && !o.any() {
        return Err(Error::Usage(
            "--quiet with no output file would merge and show nothing: add --out FILE.json, or drop --quiet".into(),
        ));
    }
    let mut set = Outputs::new();
    for p in &args.parts {
        set.input("a part file", p);
    }
    let ids = o.register(&mut set)?;
    let merged = shard::merge(&args.parts, args.memory_limit)?;
    // The scenario the parts name, and its holdout ledger (`merge --out` replaced both).
    for f in &merged.scenario_files {
        set.input("the parts' scenario file", f);
        let ledger = assess::ledger_path(f);
        if ledger.exists() {
            set.input("the scenario's holdout ledger", &ledger);
        }
    }
    for (role, p) in data_inputs(&merged.plan) {
        set.input(role, &p);
    }
    // The plan reads relative paths from where `merge` runs; the parts may have been run from
    // another folder, where those paths lead elsewhere (an external estimator's script was
    // replaced by `merge --csv` run from the parent folder). Wherever the scenario was found
    // (by its text, beside the parts), its data files and scripts are inputs too.
    let recorded = Path::new(&merged.plan.file)
        .parent()
        .unwrap_or(Path::new(""));
    for f in merged.scenario_files.iter().filter(|f| f.is_file()) {
        let folder = f.parent().unwrap_or(Path::new(""));
        for (role, p) in data_inputs(&merged.plan) {
            if let Ok(rel) = p.strip_prefix(recorded) {
                set.input(role, &folder.join(rel));
            }
        }
        for m in &merged.plan.models {
            for script in m.family.input_files_in(folder) {
                set.input("a file the external estimator runs", &script);
            }
        }
    }
    if args.plot_points.is_some() {
        report::plot::check_point_request(&merged.plan, args.input.as_deref())?;
    }
    emit(&merged.plan, &merged.outcome, &o, set, ids)
}

/// `family = "custom"` needs an estimator supplied from Rust; the command line has none.
fn refuse_custom(plan: &Plan) -> Result<(), Error> {
    if plan.models.iter().any(|m| m.family.name() == "custom") {
        return Err(Error::Usage(format!(
            "{}: key `model.family`: {}",
            plan.file,
            family::custom::CLI_REFUSAL
        )));
    }
    Ok(())
}

/// `lossprism check`: compare a result with a baseline; exit 0 nothing worse, 1 something worse.
pub fn check(args: CheckArgs) -> Result<u8, Error> {
    // A signal ends the command at once, but never in the middle of writing its outputs
    // (they are written whole or not at all, and no staged copy is left behind).
    progress::install_interrupt(progress::OnInterrupt::ExitNow { checkpoint: None });
    use crate::check;
    let opts = check::CheckOptions {
        sigma: args.sigma,
        margin: args.margin,
        term_margins: args.margin_term.clone(),
    };
    opts.validate().map_err(|e| Error::Usage(e.to_string()))?;
    let read = |p: &Path| -> Result<(String, report::ResultDoc), Error> {
        let text = read_result_text(p)?;
        let doc = check::parse_result(&text, &p.display().to_string())
            .map_err(|e| Error::Usage(e.to_string()))?;
        Ok((text, doc))
    };
    let (text, new) = read(&args.result)?;
    // Also when `--update` creates the baseline without comparing (accepted once, then
    // refused at the next check).
    check::margins_apply(&opts, &new).map_err(|e| Error::Usage(e.to_string()))?;
    // A baseline is read back by the next check: standard output keeps nothing (it printed the
    // document, then "baseline - created", with exit 0).
    if args.update && crate::output::is_stdout(&args.baseline) {
        let why = if args.baseline.as_os_str() == "-" {
            "a baseline is read back by the next check, so it must be a file".to_string()
        } else {
            // `> B.json`: the shell emptied the baseline before lossprism started.
            "standard output is redirected to it, and the shell empties such a file before the \
             command starts; name the baseline without redirecting standard output to it"
                .to_string()
        };
        return Err(Error::Usage(format!(
            "--baseline {} with --update: {why}",
            args.baseline.display()
        )));
    }
    crate::output::guard_inputs(&[
        ("the result document", args.result.as_path()),
        ("the baseline", args.baseline.as_path()),
    ])?;
    // `--update` creates the baseline's missing folders, checks the path before comparing (so a
    // refused path prints no comparison), and removes the folders it made if it refuses.
    let inputs = [("the result document", args.result.as_path())];
    let made = if args.update {
        make_folders(&args.baseline)?
    } else {
        Vec::new()
    };
    let undo = |e: Error| -> Error {
        for d in made.iter().rev() {
            let _ = std::fs::remove_dir(d);
        }
        e
    };
    if args.update {
        crate::output::check(&inputs, &[("--baseline", args.baseline.as_path())]).map_err(undo)?;
    }
    let write_baseline = |text: &str| -> Result<(), Error> {
        crate::output::write_one("--baseline", &args.baseline, &inputs, text.as_bytes())
            .map_err(undo)
    };
    // An empty baseline (a file made by `touch`) holds nothing to compare with or to lose.
    let absent = !args.baseline.exists() || crate::output::is_empty_file(&args.baseline);
    if args.update && absent {
        write_baseline(&text)?;
        outln!(
            "baseline {} created from {}",
            crate::error::shown(&args.baseline),
            crate::error::shown(&args.result)
        );
        return Ok(0);
    }
    if args.baseline.as_os_str() == "-" {
        // `-` is no file to read a baseline from, nor one `--update` could create (the hint
        // below suggested `--baseline - --update`, which is refused).
        return Err(Error::Usage(
            "--baseline -: a baseline is a file (standard input is not read); name the baseline \
             file, and create it once with --update"
                .into(),
        ));
    }
    if absent {
        return Err(Error::Usage(format!(
            "{}: baseline {}; create it with `lossprism check {} --baseline {} --update`",
            args.baseline.display(),
            if args.baseline.exists() {
                "is empty"
            } else {
                "not found"
            },
            args.result.display(),
            args.baseline.display()
        )));
    }
    if args.update && older_result(&args.baseline) {
        // A baseline written by an earlier lossprism cannot be compared; `--update` is how the
        // refusal tells the user to replace it.
        write_baseline(&text)?;
        outln!(
            "baseline {} (format `{}`, written by an earlier lossprism; not compared) replaced by {}",
            crate::error::shown(&args.baseline),
            report::FORMAT_V1,
            crate::error::shown(&args.result)
        );
        return Ok(0);
    }
    let (_, base) = read(&args.baseline)?;
    let rep = check::compare(&new, &base, &opts).map_err(|e| Error::Usage(e.to_string()))?;
    if args.update {
        // Written before anything is printed: a failed print cannot leave it stale.
        write_baseline(&text)?;
        out!("{rep}");
        outln!("baseline {} updated", crate::error::shown(&args.baseline));
        return Ok(0);
    }
    out!("{rep}");
    Ok(rep.exit_code())
}

/// Creates the missing folders above `path`, returning those it made (outermost first).
fn make_folders(path: &Path) -> Result<Vec<PathBuf>, Error> {
    let mut missing = Vec::new();
    let mut dir = path.parent();
    while let Some(d) = dir {
        if d.as_os_str().is_empty() || d.exists() {
            break;
        }
        missing.push(d.to_path_buf());
        dir = d.parent();
    }
    missing.reverse();
    let mut made = Vec::new();
    for d in missing {
        // A folder that appeared meanwhile (another process, or `a/../a` naming one twice) is
        // not ours to remove.
        if d.is_dir() {
            continue;
        }
        if let Err(e) = std::fs::create_dir(&d) {
            if e.kind() == std::io::ErrorKind::AlreadyExists && d.is_dir() {
                continue;
            }
            for m in made.iter().rev() {
                let _ = std::fs::remove_dir(m);
            }
            return Err(Error::io(&d, &e));
        }
        made.push(d);
    }
    Ok(made)
}

/// Reads a text file, refusing it before reading when it is larger than `limit` bytes (and
/// while reading a device or a pipe).
pub fn read_limited(p: &Path, limit: u64) -> Result<String, Error> {
    crate::codec::read_document(p, limit, "document", &crate::codec::any_text)
}

/// Largest result document read by `check` and `plot` (bytes).
pub const MAX_RESULT_BYTES: u64 = 1 << 30;

/// Bytes of memory reading a result document takes per byte of its text (measured: a 992 MB
/// document peaked at 5.85 GB; rounded up).
pub const READ_BYTES_PER_BYTE: u64 = 7;

/// Why a result document of `len` bytes cannot be read with `available` bytes of memory
/// (`None` when it can, or when the available memory is unknown).
pub fn memory_refusal(len: u64, available: Option<u64>) -> Option<String> {
    let need = len.saturating_mul(READ_BYTES_PER_BYTE);
    let avail = available?;
    (need > avail).then(|| {
        format!(
            "a document of {} takes about {} of memory to read, and {} are available",
            crate::runner::memory::fmt_bytes(len as f64),
            crate::runner::memory::fmt_bytes(need as f64),
            crate::runner::memory::fmt_bytes(avail as f64)
        )
    })
}

/// Whether `p` is a result document of the earlier format (`lossprism-result/1`), which only
/// `check --update` replaces; anything else (unreadable, another document) is not.
fn older_result(p: &Path) -> bool {
    let what = "lossprism result document";
    crate::codec::read_document(p, MAX_RESULT_BYTES, what, &crate::codec::json_object)
        .ok()
        .and_then(|text| {
            crate::codec::JsonHead::of(&text)
                .ok()
                .and_then(|h| h.format().map(|f| f == report::FORMAT_V1))
        })
        .unwrap_or(false)
}

/// Reads a result document's text with the streamed checks: size, a JSON object at the start,
/// then its `format` read without building the document, so junk of any size is refused
/// quickly and in little memory.
fn read_result_text(p: &Path) -> Result<String, Error> {
    let what = "lossprism result document";
    // Checked against memory before reading: a 992 MB document (under the size cap) peaked at
    // 5.85 GB and was refused after 18 s, where a smaller machine would have been killed.
    if let Some(meta) = std::fs::metadata(p).ok().filter(|m| m.is_file()) {
        if let Some(why) = memory_refusal(meta.len(), crate::codec::available_memory()) {
            return Err(Error::Usage(format!("{}: {why}", p.display())));
        }
    }
    let text = crate::codec::read_document(p, MAX_RESULT_BYTES, what, &crate::codec::json_object)?;
    let name = p.display();
    let head = crate::codec::JsonHead::of(&text)
        .map_err(|e| Error::Usage(format!("{name}: not a {what} ({e})")))?;
    match head.format() {
        Some(report::FORMAT) => Ok(text),
        Some(other) => Err(Error::Usage(format!(
            "{name}: {}",
            report::format_refusal(other, head.is_checkpoint())
        ))),
        None => Err(Error::Usage(format!(
            "{name}: no `format` field; expected a result document written by `lossprism run --out`"
        ))),
    }
}

/// `lossprism plot`: the curve picture (and the selection histogram) of a saved result document.
pub fn plot(args: PlotArgs) -> Result<u8, Error> {
    // A signal ends the command at once, but never in the middle of writing its outputs
    // (they are written whole or not at all, and no staged copy is left behind).
    progress::install_interrupt(progress::OnInterrupt::ExitNow { checkpoint: None });
    crate::output::guard_inputs(&[("the result document", &args.result)])?;
    let name = crate::error::shown(&args.result);
    let mut set = Outputs::new();
    set.input("the result document", &args.result);
    let out_id = set.output_of("--out", &args.out, Kind::Svg)?;
    let sel_id = match &args.selection {
        Some(p) => Some(set.output_of("--selection", p, Kind::Svg)?),
        None => None,
    };
    let text = read_result_text(&args.result)?;
    // The reader `check` uses: the same refusals for the same damaged document.
    let doc = crate::check::parse_result(&text, &name).map_err(|e| Error::Usage(e.to_string()))?;
    let view: View = args.decomposition.into();
    // A picture of a view with none of its terms draws the loss's own terms, as `run --plot`
    // does; said on standard error (it was drawn with no word).
    if let Some(why) = report::terminal::view_missing(&doc, view) {
        noteln!("note: {name}: {why}");
    }
    let families = doc.families();
    if let Some(f) = &args.family {
        if !families.contains(f) {
            return Err(Error::Usage(format!(
                "{name}: --family {f}: the result holds {}",
                families.join(", ")
            )));
        }
    }
    let curve = match &args.family {
        Some(f) => report::plot::curve_svg_scaled(&doc.single(f), view, args.y_scale.into())?,
        None if families.len() > 1 => report::plot::families_svg(&doc)?,
        None => report::plot::curve_svg_scaled(
            &doc.single(&doc.first_model()),
            view,
            args.y_scale.into(),
        )?,
    };
    let mut extra = Vec::new();
    if let Some(p) = &args.learning {
        let id = set.output_of("--learning", p, Kind::Svg)?;
        // Named as `--heatmap` is: the file and the flag.
        if doc.learning.is_empty() {
            return Err(Error::Usage(format!(
                "{name}: --learning needs a result with several training sizes (`train_size = [..]`)"
            )));
        }
        extra.push((id, report::plot::learning_svg(&doc)?));
    }
    if let Some(p) = &args.heatmap {
        let id = set.output_of("--heatmap", p, Kind::Svg)?;
        if doc.sizes.is_empty() {
            return Err(Error::Usage(format!(
                "{name}: --heatmap needs a result with several training sizes (`train_size = [..]`)"
            )));
        }
        let f = args.family.clone().unwrap_or_else(|| doc.first_model());
        extra.push((id, report::plot::heatmap_svg(&doc, &f)?));
    }
    let selection = match &args.selection {
        Some(_) => {
            let value: serde_json::Value = serde_json::from_str(&text)
                .map_err(|e| Error::Usage(format!("{name}: not a result document (JSON): {e}")))?;
            let sel = report::plot::SelectionView::from_json(&value)
                .map_err(|why| Error::Usage(format!("{name}: {why}")))?;
            // Every replicate chooses one candidate: counts that add up to anything else were
            // edited (a histogram of 100 choices out of 20 replicates was drawn, exit 0).
            let total: u64 = sel.counts.iter().sum();
            if let Some(r) = value.get("replicates").and_then(|r| r.as_u64()) {
                if total != r {
                    return Err(Error::Usage(format!(
                        "{name}: `selection.chosen_counts` add up to {total} choices for {r} \
                         replicates (each replicate chooses once): the document was edited; \
                         rerun it"
                    )));
                }
            }
            Some(report::plot::selection_svg(&sel, &doc.knob)?)
        }
        None => None,
    };
    let mut contents = vec![(out_id, curve.into_bytes())];
    contents.extend(extra.into_iter().map(|(id, svg)| (id, svg.into_bytes())));
    if let (Some(id), Some(svg)) = (sel_id, selection) {
        contents.push((id, svg.into_bytes()));
    }
    set.commit(contents)?;
    Ok(0)
}

/// `run --assess VALUE` on a table scenario with a holdout: the one-off holdout assessment,
/// counted in the ledger beside the scenario file.
fn assess(args: &RunArgs, plan: &Plan, value: f64) -> Result<u8, Error> {
    let Some(path) = &args.scenario else {
        return Err(Error::Usage(
            "--assess needs a table scenario file with a holdout".into(),
        ));
    };
    let outputs = [
        ("--out", &args.out),
        ("--csv", &args.csv),
        ("--points", &args.points),
        ("--plot", &args.plot),
        ("--plot-points", &args.plot_points),
        ("--plot-selection", &args.plot_selection),
        ("--report", &args.report),
    ];
    // Refused before the ledger counts anything: an assessment is never counted for a request
    // that would be silently ignored.
    if let Some((flag, _)) = outputs.iter().find(|(_, p)| p.is_some()) {
        return Err(Error::Usage(format!(
            "--assess prints one holdout loss and writes no result; drop {flag}"
        )));
    }
    if args.quiet {
        return Err(Error::Usage(
            "--assess prints the holdout loss it counts in the ledger; drop --quiet".into(),
        ));
    }
    if args.replicates.is_some() {
        return Err(Error::Usage(
            "--assess fits the family once, on every row outside the holdout, so --replicates does not apply; drop it"
                .into(),
        ));
    }
    // One model per assessment: a knob value means something else in each family, and every
    // model assessed is one more look at the holdout.
    let labels: Vec<&str> = plan.models.iter().map(|m| m.label.as_str()).collect();
    let chosen = match &args.family {
        Some(f) => labels.iter().position(|l| l == f).ok_or_else(|| {
            Error::Usage(format!(
                "--family {}: {} has no such model; its models are {}",
                crate::fmt::clip(f, 40),
                path.display(),
                labels.join(", ")
            ))
        })?,
        None if labels.len() > 1 => {
            return Err(Error::Usage(format!(
                "--assess: {} has {} models ({}); choose the one to assess with --family NAME \
                 (each assessment is one look at the holdout)",
                path.display(),
                labels.len(),
                labels.join(", ")
            )))
        }
        None => 0,
    };
    let mut one = plan.clone();
    one.models = vec![plan.models[chosen].clone()];
    // The run's estimate was held for the scenario's grid; the assessed value may lie outside
    // it (a larger depth, more features), so the fit at that value is checked too.
    let mut at_value = one.clone();
    at_value.models[0].grid = vec![value];
    runner::memory::check(&at_value, 1, args.memory_limit)?;
    let ledger = assess::ledger_path(path);
    // The plan was cut to the chosen model: a remedy naming its key names the scenario's
    // section (`model[1].alpha`), as a run of the whole scenario does.
    let a = assess::assess(&one, value, &ledger).map_err(|e| match e {
        Error::Fit {
            file,
            replicate,
            family,
            message,
        } if labels.len() > 1 => Error::Fit {
            file,
            replicate,
            family,
            message: runner::in_section(&message, chosen),
        },
        other => other,
    })?;
    let name = if labels.len() > 1 {
        format!("{} ({})", plan.name, labels[chosen])
    } else {
        plan.name.clone()
    };
    outln!(
        "holdout assessment of {}: {} = {} fitted on {} rows; holdout {} loss = {} ± {} over {} rows \
         (assessment {} of this holdout, hash {}, ledger {})",
        name,
        one.model().family.knob(),
        crate::fmt::fmt_value(a.value),
        a.train_rows,
        plan.loss.name(),
        crate::fmt::fmt_num(a.loss),
        crate::fmt::fmt_se(a.stderr),
        a.rows,
        a.count,
        a.hash,
        crate::error::shown(ledger)
    );
    if let Some(w) = &a.warning {
        noteln!("{w}");
    }
    Ok(0)
}

/// Refuses a finished run whose result would hold a number that could not be computed (a
/// standard error, an interval; written as `null`), before anything is written or printed:
/// non-finite numbers are errors, never `null` with exit 0. Plans with too few replicates or
/// blocks are refused before they run (`MIN_REPLICATES`); what is left is a table with so few
/// rows (or so large a `train_fraction`) that, with one block left out, no row was held out in 2
/// or more of the remaining replicates.
fn refuse_missing(plan: &Plan, doc: &report::ResultDoc) -> Result<(), Error> {
    let Some(what) = report::first_missing(doc) else {
        return Ok(());
    };
    let why = match &plan.source {
        Source::Table(tp) => format!(
            "with one of the {} blocks left out, no row was held out in 2 or more of the \
             remaining replicates; raise `replicates` (the table has {} rows to resample)",
            plan.blocks,
            tp.work.len()
        ),
        _ => format!(
            "it could not be computed from R = {} in {} blocks; raise `replicates`",
            plan.replicates, plan.blocks
        ),
    };
    Err(Error::Data(format!(
        "{}: nothing was written: {what} cannot be computed: {why}",
        plan.file
    )))
}

/// `lossprism validate`.
pub fn validate(scenario: &Path) -> Result<u8, Error> {
    validate_with(scenario, None, 0)
}

/// `lossprism validate --memory-limit SIZE`: checks the file, prints its memory estimate and
/// refuses it when the estimate exceeds `memory_limit` (else the memory available).
pub fn validate_with(
    scenario: &Path,
    memory_limit: Option<u64>,
    threads: usize,
) -> Result<u8, Error> {
    runner::pool_check(threads)?;
    crate::output::guard_inputs(&[("the scenario file", scenario)])?;
    let opts = PlanOptions {
        memory_limit,
        ..PlanOptions::default()
    };
    let plan = scenario::load(scenario, &opts)?;
    guard_plan_inputs(&plan, &[])?;
    refuse_custom(&plan)?;
    let (estimate, cap) = runner::memory::check(&plan, threads, memory_limit)?;
    runner::prepare_to_fit(&plan)?;
    let models: Vec<String> = plan
        .models
        .iter()
        .map(|m| format!("{} family, {} grid values", m.family.name(), m.grid.len()))
        .collect();
    outln!(
        "{}: valid ({}, R = {}, n = {})",
        crate::error::shown(scenario),
        models.join("; "),
        plan.replicates,
        plan.train_size()
    );
    outln!(
        "memory: {} on {} worker thread{}; {}",
        estimate.describe(),
        estimate.workers,
        if estimate.workers == 1 { "" } else { "s" },
        match cap {
            Some(c) => format!("limit {}", runner::memory::fmt_bytes(c as f64)),
            None => "the machine's memory is unknown (not checked)".into(),
        }
    );
    Ok(0)
}

/// `lossprism families`: name, knob and meaning in aligned columns, then tasks and options.
pub fn families() -> Result<u8, Error> {
    let cat = family::catalogue();
    let w_name = cat
        .iter()
        .map(|f| f.name.chars().count())
        .max()
        .unwrap_or(0);
    let w_knob = cat
        .iter()
        .map(|f| f.knob.chars().count())
        .max()
        .unwrap_or(0);
    for f in cat {
        outln!(
            "{:<w_name$}  knob {:<w_knob$}  {}",
            f.name,
            f.knob,
            f.meaning
        );
        outln!("{:<w_name$}  tasks: {}", "", f.tasks);
        outln!("{:<w_name$}  options: {}", "", f.options);
    }
    Ok(0)
}

/// `lossprism twin`.
pub fn twin(a: TwinArgs) -> Result<u8, Error> {
    use crate::dgp::reference::{select::Rule, Candidate};
    crate::output::guard_inputs(&[("the table", &a.table)])?;
    // SIGTERM (a batch system, `timeout`) or Ctrl-C: a clear word and exit 130, nothing written
    // (it was killed by the signal, exit 143 and no word).
    progress::install_interrupt(progress::OnInterrupt::ExitNow { checkpoint: None });
    let reference = match a.reference.as_str() {
        "best" => Rule::Best,
        other => Rule::Only(Candidate::from_name(other).ok_or_else(|| {
            Error::Usage(format!(
                "--reference: unknown `{other}`; expected best, knn, forest, loclin, poly or blend \
                 (with --classes: best, knn, logit or tree)"
            ))
        })?),
    };
    if !a.classes && matches!(a.reference.as_str(), "logit" | "tree") {
        return Err(Error::Usage(format!(
            "--reference {} is a classification reference (with --classes); a regression twin's \
             is best, knn, forest, loclin, poly or blend",
            a.reference
        )));
    }
    let noise_estimator = match &a.noise_estimator {
        None => None,
        Some(s) => Some(crate::dataset::noise::Method::from_name(s).ok_or_else(|| {
            Error::Usage(format!(
                "--noise-estimator: unknown `{s}`; expected gsjs, plane, gamma or nn"
            ))
        })?),
    };
    let missing = match a.missing.as_str() {
        "error" => crate::dataset::Missing::Error,
        "drop" => crate::dataset::Missing::Drop,
        other => {
            return Err(Error::Usage(format!(
                "--missing: unknown `{other}`; expected error or drop"
            )))
        }
    };
    let duplicates = match &a.duplicates {
        None => None,
        Some(d) => Some(crate::dataset::Duplicates::from_name(d).ok_or_else(|| {
            Error::Usage(format!(
                "--duplicates: unknown `{d}`; expected drop or keep"
            ))
        })?),
    };
    let twicing = crate::dgp::twin::Twicing::from_name(&a.twicing).ok_or_else(|| {
        Error::Usage(format!(
            "--twicing: unknown `{}`; expected auto, on or off",
            a.twicing
        ))
    })?;
    let noise_shape = match a.noise_shape.as_str() {
        "gaussian" => crate::scenario::plan::ShapeChoice::Gaussian,
        "residuals" if a.classes => {
            return Err(Error::Usage(
                "--noise-shape residuals: a classification twin has no additive noise (its labels come from the reference's class probabilities); drop one of the two".into(),
            ))
        }
        "residuals" => crate::scenario::plan::ShapeChoice::Residuals,
        other => {
            return Err(Error::Usage(format!(
                "--noise-shape: unknown `{}`; expected gaussian or residuals",
                crate::fmt::clip(other, 40)
            )))
        }
    };
    if twicing == crate::dgp::twin::Twicing::On && (a.classes || a.varying) {
        return Err(Error::Usage(format!(
            "--twicing on: twicing applies to a regression reference with constant noise, not with {}; drop one of the two",
            if a.classes { "--classes" } else { "--varying" }
        )));
    }
    let keep_variance = match a.jitter_variance.as_str() {
        "table" => true,
        "added" => false,
        other => {
            return Err(Error::Usage(format!(
                "--jitter-variance: unknown `{}`; expected table or added",
                crate::fmt::clip(other, 40)
            )))
        }
    };
    if a.classes {
        // A classification twin is k-NN shares over the rows resampled as they are: these
        // options have nothing to act on, and were silently ignored.
        let unused = if a.varying {
            Some("--varying")
        } else if a.noise_estimator.is_some() {
            Some("--noise-estimator")
        } else if !matches!(a.reference.as_str(), "best" | "knn" | "logit" | "tree") {
            return Err(Error::Usage(format!(
                "--reference {} is a regression reference; with --classes it is best, knn, logit \
                 or tree",
                crate::fmt::clip(&a.reference, 40)
            )));
        } else if a.jitter != crate::dgp::twin::DEFAULT_JITTER && a.jitter != 0.0 {
            // 0 is what a classification twin does anyway: its rows as they are.
            Some("--jitter")
        } else if a.jitter_variance != "table" {
            Some("--jitter-variance")
        } else if a.sharpen != crate::dgp::twin::SHARPEN {
            Some("--sharpen")
        } else if a.eval_size != crate::dgp::twin::EVAL_SIZE {
            // Its evaluation points are the table's rows.
            Some("--eval-size")
        } else {
            None
        };
        if let Some(flag) = unused {
            return Err(Error::Usage(format!(
                "{flag} applies to a regression twin; with --classes the reference gives class \
                 probabilities and the rows are resampled as they are; drop one of the two"
            )));
        }
    }
    if a.fidelity_replicates < 2 {
        return Err(Error::Usage(format!(
            "--fidelity-replicates must be at least 2, got {}",
            a.fidelity_replicates
        )));
    }
    let out_is_stdout = crate::output::is_stdout(&a.out);
    let text = twin::command(&twin::TwinOptions {
        table: a.table,
        target: a.target,
        features: a.features,
        classes: a.classes,
        missing,
        duplicates,
        out: a.out,
        seed: a.seed,
        varying: a.varying,
        noise_shape,
        jitter: a.jitter,
        keep_variance,
        eval_size: a.eval_size,
        reference,
        noise_estimator,
        fidelity: a.fidelity,
        fidelity_replicates: a.fidelity_replicates,
        fidelity_families: Vec::new(),
        threads: a.threads,
        twicing,
        sharpen: a.sharpen,
    })?;
    if out_is_stdout {
        // The scenario went to standard output: the words go to standard error, so the
        // output is the scenario alone (`lossprism twin T --target y --out - > twin.toml`).
        note!("{text}");
    } else {
        out!("{text}");
    }
    Ok(0)
}

impl From<DecompositionView> for View {
    fn from(v: DecompositionView) -> Self {
        match v {
            DecompositionView::Domingos => View::Domingos,
            DecompositionView::KohaviWolpert => View::KohaviWolpert,
            DecompositionView::James => View::James,
            DecompositionView::All => View::All,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_document_is_checked_against_memory_before_it_is_read() {
        // 1 GiB of text needs about 7 GiB to read: refused with 4 GiB available, read with 8.
        let gib = 1u64 << 30;
        let e = memory_refusal(gib, Some(4 * gib)).unwrap();
        assert!(e.contains("takes about"), "{e}");
        assert!(memory_refusal(gib, Some(8 * gib)).is_none());
        // Unknown memory: the size cap alone decides.
        assert!(memory_refusal(gib, None).is_none());
    }
}
