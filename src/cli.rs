//! Command-line definition (clap derive). Parsing only: [`crate::commands`] carries them out.

use std::path::PathBuf;

use clap::{ArgGroup, Args, Parser, Subcommand, ValueEnum};

/// Splits expected test error into noise, bias² and variance across a model family's complexity
/// grid, by Monte Carlo over many training sets.
#[derive(Debug, Parser)]
#[command(name = "lossprism", version, about, long_about = None, after_help = EXAMPLES)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// The top-level help's examples. Every line is a command that runs as written from the
/// repository's root (the shipped scenarios; `r.json` and `base.json` from the lines before).
pub const EXAMPLES: &str = "\
Examples:
  lossprism run                                   run the embedded default scenario (an invented orchard)
  lossprism run scenarios/friedman1-tree.toml --out r.json --csv r.csv
  lossprism run scenarios/friedman1-knn.toml --replicates 50 --threads 2
  lossprism run scenarios/orchard-yield.toml --plot curve.svg --report report.html   picture and HTML report
  lossprism validate scenarios/seed-sorter-flip.toml   check a file without running it
  lossprism families                              list model families and their knobs
  lossprism twin scenarios/data/cold-store.csv --target temp_c --out cold-twin.toml   simulated twin of a table
  lossprism run scenarios/cold-store-table.toml --assess 4   one counted holdout assessment of max_depth = 4
  lossprism run scenarios/friedman1-tree.toml --shard 2/8 --out part-2.json   one of 8 shards (e.g. a Slurm array task)
  lossprism merge part-*.json --out merged.json   combine the 8 shards into one result
  lossprism run scenarios/friedman1-tree.toml --checkpoint ck.json --out r.json   resumable run (rerun after a kill)
  lossprism check r.json --baseline base.json --update   accept the result as the baseline
  lossprism check r.json --baseline base.json     fail (exit 1) when a term regressed";

/// Subcommands.
// Parsed once per process: the size of the largest variant does not matter.
#[allow(clippy::large_enum_variant)]
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run a scenario and print the decomposition table.
    Run(RunArgs),
    /// Check a scenario file without running it (exit 0 when valid, 2 with the error).
    Validate {
        /// The scenario file.
        scenario: PathBuf,
        /// Hold the memory estimate to this size instead of the memory available (`16G`).
        #[arg(long, value_name = "SIZE", value_parser = crate::runner::memory::parse_size)]
        memory_limit: Option<u64>,
        /// Worker threads the memory estimate assumes, as `run --threads` (0 = one per core;
        /// each worker holds its own training set and fit work).
        #[arg(long, default_value_t = 0)]
        threads: usize,
    },
    /// List the model families, their knobs and what the knob means.
    Families,
    /// Merge shard parts (`run --shard I/N --out part.json`) into one result, identical byte for
    /// byte to the unsharded run. Refuses parts of different runs or shard counts, duplicated
    /// parts and missing blocks (exit 2).
    Merge(MergeArgs),
    /// Compare a result with a baseline result of the same scenario. The mode is chosen and
    /// printed: "identical" when every number agrees; "paired" (same seed, replicates, blocks and
    /// evaluation points: jackknife of the differences over the blocks); "unpaired" otherwise
    /// (independent standard errors, plus the evaluation points' sampling variance when their
    /// eval_seed differs). A term is worse when it grew by more than --sigma standard errors of
    /// the difference and more than the margin. Exit 0 nothing worse, 1 something worse, 2 the
    /// documents cannot be compared (different scenario, family, knob, grid or loss; missing
    /// standard errors; an old baseline; fixed evaluation points that differ).
    Check(CheckArgs),
    /// Draw the curve picture (SVG) of a saved result document, and the selection histogram
    /// when the result holds a cross-validation audit.
    Plot(PlotArgs),
    /// Fit a simulated twin of a table and write a `source = "twin"` scenario: a reference for
    /// E[y|x] chosen among k-NN, bagged trees, local-linear regression, their blend and a
    /// polynomial by cross-validated R² (twiced with 3 or more inputs), inputs from a smoothed bootstrap
    /// of the rows, and a noise estimate corrected by a parametric bootstrap; then a fidelity
    /// check (tables drawn from the twin, twinned again) says how often a twin of such a table picks the knob it should,
    /// and gives the recommended pick per family (the twin's lowest expected loss, with a
    /// bias-corrected second opinion).
    Twin(TwinArgs),
}

/// Options of `twin`.
#[derive(Debug, Args)]
pub struct TwinArgs {
    /// The CSV table (with a header line).
    #[arg(value_name = "TABLE.csv")]
    pub table: PathBuf,
    /// The response column.
    #[arg(long)]
    pub target: String,
    /// Feature columns, comma-separated (default: every other column).
    #[arg(long, value_delimiter = ',')]
    pub features: Option<Vec<String>>,
    /// The target holds class labels (classification twin: k-NN class shares, a logistic
    /// polynomial or a probability tree, the lowest cross-validated log-loss kept, sharpened by a
    /// temperature calibrated so that a k-NN classifier errs on the twin as on the table; the
    /// class shares alone, the same at every input, when no candidate beats them by one standard
    /// error of its own log-loss).
    #[arg(long)]
    pub classes: bool,
    /// A row with an empty, missing or non-numeric cell in a used column: `error` (refuse the
    /// table, naming line and column) or `drop` (leave the row out, print how many were left
    /// out and write `missing = "drop"` in the scenario).
    #[arg(long, default_value = "error", value_name = "error|drop")]
    pub missing: String,
    /// Rows that repeat an earlier row exactly (every used input and the target): `drop` keeps
    /// each distinct row once, `keep` keeps them as separate observations. Default: `drop` for a
    /// numeric target (a continuous response does not repeat, so they are copied records),
    /// `keep` with --classes (labels repeat by nature). Written as `duplicates` in the scenario.
    #[arg(long, value_name = "drop|keep")]
    pub duplicates: Option<String>,
    /// Noise varying with x (smoothed squared residuals) instead of a constant.
    #[arg(long)]
    pub varying: bool,
    /// The noise's law in the twin: `gaussian`, or `residuals` (the table's standardized
    /// residuals under the reference, drawn with replacement: keeps heavy tails or skew; the
    /// noise's bootstrap draws them too). Written as `shape` in [data.noise].
    #[arg(long, default_value = "gaussian", value_name = "gaussian|residuals")]
    pub noise_shape: String,
    /// Twicing of the regression reference (refitted to its own residuals and added, which
    /// restores curvature a cross-validated fit rounds off): `auto` twices on tables of 3 or
    /// more inputs and, with fewer, when that lowers the cross-validated error on the table;
    /// `on` always, `off` never (varying noise: off; a polynomial reference, a least-squares
    /// projection that twicing would give back unchanged, is never twiced).
    #[arg(long, default_value = "auto", value_name = "auto|on|off")]
    pub twicing: String,
    /// Sharpening of the regression reference after cross-validation tuned it: its k, leaf
    /// size and bandwidth times F (in [0.25, 1]; 1 keeps the cross-validated tuning), so that
    /// the twin's truth keeps more of the curvature the families' bias comes from.
    #[arg(long, default_value_t = crate::dgp::twin::SHARPEN, value_name = "F")]
    pub sharpen: f64,
    /// Where to write the scenario.
    #[arg(long, default_value = "twin.toml", value_name = "FILE.toml")]
    pub out: PathBuf,
    /// Seed of the cross-validation folds, the bootstraps and the fidelity check (also the
    /// scenario's seed).
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Kernel jitter of the smoothed bootstrap of the rows, as a multiple of Silverman's
    /// bandwidth (0: the rows resampled as they are).
    #[arg(long, default_value_t = crate::dgp::twin::DEFAULT_JITTER, value_name = "C")]
    pub jitter: f64,
    /// What the jitter does to each column's variance: `table` (each jittered column is
    /// shrunk toward its mean so its variance does not exceed the table's) or `added` (the plain smoothed
    /// bootstrap: the table's variance plus the kernel's).
    #[arg(long, default_value = "table", value_name = "HOW")]
    pub jitter_variance: String,
    /// Evaluation points of the twin (drawn once).
    #[arg(long, default_value_t = crate::dgp::twin::EVAL_SIZE, value_name = "M")]
    pub eval_size: usize,
    /// Reference candidate: `best` (highest cross-validated R²; the polynomial only when it
    /// removes at least a tenth of the best other candidate's held-out error), `knn`, `forest`, `loclin`,
    /// `poly` or `blend`. With --classes: `best` (lowest cross-validated log-loss; the class
    /// shares alone when no candidate beats them by one standard error), `knn` (k-NN shares),
    /// `logit` (logistic polynomial) or `tree` (probability tree).
    #[arg(long, default_value = "best", value_name = "NAME")]
    pub reference: String,
    /// Noise estimator: `gsjs` (one input), `plane`, `gamma` or `nn` (default: gsjs with one
    /// input; with 2 or 3, plane when the reference's cross-validated R² is at least 0.7, else
    /// gamma; gamma with more).
    #[arg(long, value_name = "NAME")]
    pub noise_estimator: Option<String>,
    /// Tables drawn from the twin for the fidelity check (0 skips it, and with it the
    /// recommended pick line and the bias-corrected second opinion; more is slower and
    /// steadier).
    #[arg(long, default_value_t = crate::dgp::twin::FIDELITY_TABLES, value_name = "T")]
    pub fidelity: usize,
    /// Replicates of every run of a twin of the twin in the fidelity check (the twin itself
    /// runs at the scenario's 200).
    #[arg(long, default_value_t = crate::dgp::twin::FIDELITY_REPLICATES, value_name = "R")]
    pub fidelity_replicates: usize,
    /// Worker threads of the fidelity check (0: all cores).
    #[arg(long, default_value_t = 0)]
    pub threads: usize,
}

/// Options of `plot`.
#[derive(Debug, Args)]
pub struct PlotArgs {
    /// A result document (`lossprism run --out RESULT.json`).
    #[arg(value_name = "RESULT.json")]
    pub result: PathBuf,
    /// Write the curve picture here (a result with several families: every family's expected
    /// loss on one picture, unless `--family` picks one).
    #[arg(long, value_name = "FILE.svg")]
    pub out: PathBuf,
    /// Draw this family's own curve (results with several `[[model]]` sections).
    #[arg(long, value_name = "NAME")]
    pub family: Option<String>,
    /// Write the learning curves here (results with several training sizes).
    #[arg(long, value_name = "FILE.svg")]
    pub learning: Option<PathBuf>,
    /// Write the training size × knob heatmap of expected loss here (results with several
    /// training sizes; the family of `--family`, else the first).
    #[arg(long, value_name = "FILE.svg")]
    pub heatmap: Option<PathBuf>,
    /// Write the selection histogram here (needs the result's `selection` section).
    #[arg(long, value_name = "FILE.svg")]
    pub selection: Option<PathBuf>,
    /// Which 0-1 loss decomposition the curve shows (one per picture; `all` is for the terminal
    /// table and refused here).
    #[arg(long, value_enum, default_value_t = DecompositionView::Domingos)]
    pub decomposition: DecompositionView,
    /// The y axis of the curve picture.
    #[arg(long, value_enum, default_value_t = YScaleArg::Auto)]
    pub y_scale: YScaleArg,
}

/// Options of `run`.
#[derive(Debug, Args)]
#[command(group(ArgGroup::new("curve_picture").args(["plot", "report"]).multiple(true)))]
pub struct RunArgs {
    /// Scenario file (TOML). Without it, the embedded default scenario runs.
    pub scenario: Option<PathBuf>,
    /// Write the result document (JSON) here; `-` for standard output.
    #[arg(long, value_name = "FILE.json")]
    pub out: Option<PathBuf>,
    /// Write one CSV row per grid value here.
    #[arg(long, value_name = "FILE.csv")]
    pub csv: Option<PathBuf>,
    /// Write one CSV row per evaluation point and grid value here, for every model and training
    /// size of a study (then with `family`, `knob` and `train_size` columns after the value).
    /// The point's column is `point` (the evaluation point's index, from 0) for simulated data,
    /// or `line` for a table: the row's physical line in the CSV file (the header's is 1 unless blank lines precede it), as in
    /// error messages.
    #[arg(long, value_name = "FILE.csv")]
    pub points: Option<PathBuf>,
    /// Override the number of replicates R (at least 3: standard errors leave one block out).
    #[arg(long, allow_negative_numbers = true, value_name = "R")]
    pub replicates: Option<u64>,
    /// Override the master seed: fresh training sets and fit seeds. The evaluation points and a
    /// fixed design stay where they are (see --eval-seed), so results of different seeds
    /// estimate the same quantities and `check` can compare them.
    #[arg(long, allow_negative_numbers = true)]
    pub seed: Option<u64>,
    /// Override the seed of the evaluation points and of a fixed design (default: the file's
    /// `eval_seed`, else its `seed`, else 1; --seed does not move them). Synthetic and twin
    /// sources only: a table's evaluation points are its rows.
    #[arg(long, value_name = "N")]
    pub eval_seed: Option<u64>,
    /// Worker threads (0 = one per core). Results do not depend on it.
    #[arg(long, allow_negative_numbers = true, default_value_t = 0)]
    pub threads: usize,
    /// Which terms the table shows: for the 0-1 loss, which decomposition (the JSON always
    /// holds all three); `all` shows every term of any loss. The default table is kept within
    /// 100 columns (a note names any term left out). Refused with --shard and --assess, which
    /// show no table.
    #[arg(long, value_enum, default_value_t = DecompositionView::Domingos,
          conflicts_with_all = ["shard", "assess"])]
    pub decomposition: DecompositionView,
    /// Do not print the table (nor the progress bar).
    #[arg(long, short)]
    pub quiet: bool,
    /// Run even when the memory estimate exceeds the memory available, up to this size (`16G`,
    /// `512M`); a run above the estimate's limit is refused before it allocates anything.
    #[arg(long, value_name = "SIZE", value_parser = crate::runner::memory::parse_size)]
    pub memory_limit: Option<u64>,
    /// Draw the curve of expected loss, bias², variance and noise against the knob (SVG).
    #[arg(long, value_name = "FILE.svg")]
    pub plot: Option<PathBuf>,
    /// The y axis of the curve picture (--plot and the report; refused without either, where
    /// it would change nothing).
    #[arg(long, value_enum, default_value_t = YScaleArg::Auto, requires = "curve_picture")]
    pub y_scale: YScaleArg,
    /// Draw the selection audit's histogram (SVG; scenarios with `[audit]`).
    #[arg(long, value_name = "FILE.svg")]
    pub plot_selection: Option<PathBuf>,
    /// Draw the truth and mean predictions along one input (SVG; squared loss). An input with at
    /// most 10 distinct values (a 0/1 column) is drawn as markers at its values.
    #[arg(long, value_name = "FILE.svg")]
    pub plot_points: Option<PathBuf>,
    /// The input on the x axis of --plot-points when the scenario has several (the others are
    /// averaged over).
    #[arg(long, value_name = "NAME", requires = "plot_points")]
    pub input: Option<String>,
    /// Write a self-contained HTML report (scenario, reading, pictures, table).
    #[arg(long, value_name = "FILE.html")]
    pub report: Option<PathBuf>,
    /// Compute only shard I of N (1-based, as `sbatch --array=1-N`) and write its part document
    /// to `--out`; combine the parts with `lossprism merge`.
    #[arg(long, value_name = "I/N", requires = "out",
          conflicts_with_all = ["csv", "points", "plot", "plot_points", "plot_selection", "report"],
          value_parser = crate::shard::ShardSpec::parse)]
    pub shard: Option<crate::shard::ShardSpec>,
    /// Save the finished blocks here (atomically, after every block) and resume from it when it
    /// exists: rerunning the same command after an interruption continues where it stopped.
    #[arg(long, value_name = "FILE.json")]
    pub checkpoint: Option<PathBuf>,
    /// Testing aid: stop with exit code 3 after K newly completed blocks (needs --checkpoint).
    #[arg(long, value_name = "K", hide = true, requires = "checkpoint",
          value_parser = clap::value_parser!(u64).range(1..))]
    pub stop_after_blocks: Option<u64>,
    /// Table scenarios with a locked holdout (`holdout = 0.2` in [data]): fit the family at this
    /// knob value on every non-holdout row and report the holdout loss once. Each assessment is
    /// counted in `<scenario>.holdout-ledger.json` beside the scenario; from the second one a
    /// warning says the holdout is no longer an unbiased estimate.
    #[arg(long, value_name = "VALUE", conflicts_with_all = ["shard", "checkpoint"])]
    pub assess: Option<f64>,
    /// The model --assess fits, by its `label` (else its family name); needed when the scenario
    /// has several `[[model]]` sections (one model per look at the holdout).
    #[arg(long, value_name = "NAME", requires = "assess")]
    pub family: Option<String>,
}

/// Options of `check`.
#[derive(Debug, Args)]
pub struct CheckArgs {
    /// The new result document (`lossprism run --out RESULT.json`).
    #[arg(value_name = "RESULT.json")]
    pub result: PathBuf,
    /// The stored baseline result document.
    #[arg(long, value_name = "BASE.json")]
    pub baseline: PathBuf,
    /// Standard errors of the difference a change must exceed to count: |z| beyond the Student t
    /// quantile, at the blocks' degrees of freedom, of a normal's tail beyond SIGMA (SIGMA itself
    /// with many blocks; 4.62 at 32 blocks paired).
    #[arg(long, default_value = "4", allow_hyphen_values = true, value_name = "SIGMA",
          value_parser = crate::check::parse_sigma)]
    pub sigma: f64,
    /// Relative change a term must exceed to count, of the baseline's value: `2%` or `0.02`.
    #[arg(long, default_value = "2%", allow_hyphen_values = true,
          value_parser = crate::check::parse_margin)]
    pub margin: f64,
    /// Margin for one term, overriding --margin (repeatable): `variance=5%`.
    #[arg(long, value_name = "TERM=MARGIN", allow_hyphen_values = true,
          value_parser = crate::check::parse_term_margin)]
    pub margin_term: Vec<(String, f64)>,
    /// After printing, replace the baseline with the result (atomically); creates the baseline
    /// when it does not exist yet. Exit 0 unless the documents cannot be compared.
    #[arg(long)]
    pub update: bool,
}

/// Options of `merge`.
#[derive(Debug, Args)]
#[command(group(ArgGroup::new("curve_picture").args(["plot", "report"]).multiple(true)))]
pub struct MergeArgs {
    /// Part documents written by `run --shard I/N --out FILE` (all shards of one run).
    #[arg(required = true, value_name = "PART.json")]
    pub parts: Vec<PathBuf>,
    /// Merge even when the memory estimate of merging (every block's accumulators and the
    /// evaluation points) exceeds the memory available, up to this size (`16G`); above it the
    /// merge is refused before the evaluation points and the blocks are built.
    #[arg(long, value_name = "SIZE", value_parser = crate::runner::memory::parse_size)]
    pub memory_limit: Option<u64>,
    /// Write the result document (JSON) here; `-` for standard output.
    #[arg(long, value_name = "FILE.json")]
    pub out: Option<PathBuf>,
    /// Write one CSV row per grid value here.
    #[arg(long, value_name = "FILE.csv")]
    pub csv: Option<PathBuf>,
    /// Write one CSV row per evaluation point and grid value here.
    #[arg(long, value_name = "FILE.csv")]
    pub points: Option<PathBuf>,
    /// Which terms the table shows: for the 0-1 loss, which decomposition (the JSON always
    /// holds all three); `all` shows every term of any loss.
    #[arg(long, value_enum, default_value_t = DecompositionView::Domingos)]
    pub decomposition: DecompositionView,
    /// Do not print the table.
    #[arg(long, short)]
    pub quiet: bool,
    /// Draw the curve of expected loss, bias², variance and noise against the knob (SVG).
    #[arg(long, value_name = "FILE.svg")]
    pub plot: Option<PathBuf>,
    /// The y axis of the curve picture (--plot and the report; refused without either, where
    /// it would change nothing).
    #[arg(long, value_enum, default_value_t = YScaleArg::Auto, requires = "curve_picture")]
    pub y_scale: YScaleArg,
    /// Draw the selection audit's histogram (SVG; scenarios with `[audit]`).
    #[arg(long, value_name = "FILE.svg")]
    pub plot_selection: Option<PathBuf>,
    /// Draw the truth and mean predictions along one input (SVG; squared loss).
    #[arg(long, value_name = "FILE.svg")]
    pub plot_points: Option<PathBuf>,
    /// The input on the x axis of --plot-points when the scenario has several (the others are
    /// averaged over).
    #[arg(long, value_name = "NAME", requires = "plot_points")]
    pub input: Option<String>,
    /// Write a self-contained HTML report (scenario, reading, pictures, table); its wall time is
    /// the merge's own.
    #[arg(long, value_name = "FILE.html")]
    pub report: Option<PathBuf>,
}

/// The y axis of the curve picture.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum, Default)]
pub enum YScaleArg {
    /// Clip only when one value would squash the rest (above 6× the median expected loss).
    #[default]
    Auto,
    /// Every value on a linear axis.
    Linear,
    /// Stop the axis at 3× the median expected loss; larger values sit on the top edge, marked
    /// with their value.
    Clip,
}

impl From<YScaleArg> for crate::report::plot::YScale {
    fn from(v: YScaleArg) -> Self {
        match v {
            YScaleArg::Auto => Self::Auto,
            YScaleArg::Linear => Self::Linear,
            YScaleArg::Clip => Self::Clip,
        }
    }
}

/// Table view for 0-1 loss.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum DecompositionView {
    /// Domingos (2000): bias, variance, net variance.
    Domingos,
    /// Kohavi and Wolpert (1996): noise, bias², variance.
    KohaviWolpert,
    /// James (2003): systematic and variance effects.
    James,
    /// Every term: all three decompositions of the 0-1 loss, and for any loss the columns a
    /// 100-column table leaves out (tables only, not pictures).
    All,
}
