//! Command-line definition (clap derive). Parsing only: `main` turns these into library calls.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand, ValueEnum};

/// Splits expected test error into noise, bias² and variance across a model family's complexity
/// grid, by Monte Carlo over many training sets.
#[derive(Debug, Parser)]
#[command(name = "lossprism", version, about, long_about = None, after_help = EXAMPLES)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

const EXAMPLES: &str = "\
Examples:
  lossprism run                                   run the embedded default scenario (an invented orchard)
  lossprism run scenarios/friedman1-tree.toml --out r.json --csv r.csv
  lossprism run scenarios/friedman1-knn.toml --replicates 50 --threads 2
  lossprism validate my-scenario.toml             check a file without running it
  lossprism families                              list model families and their knobs
  lossprism run s.toml --shard 2/8 --out part-2.json   one of 8 shards (e.g. a Slurm array task)
  lossprism merge part-*.json --out r.json        combine the shards into one result
  lossprism run s.toml --checkpoint ck.json --out r.json   resumable run (rerun after a kill)";

/// Subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run a scenario and print the decomposition table.
    Run(RunArgs),
    /// Check a scenario file without running it (exit 0 when valid, 2 with the error).
    Validate {
        /// The scenario file.
        scenario: PathBuf,
    },
    /// List the model families, their knobs and what the knob means.
    Families,
    /// Merge shard parts (`run --shard I/N --out part.json`) into one result, identical byte for
    /// byte to the unsharded run. Refuses parts of different runs or shard counts, duplicated
    /// parts and missing blocks (exit 2).
    Merge(MergeArgs),
}

/// Options of `run`.
#[derive(Debug, Args)]
pub struct RunArgs {
    /// Scenario file (TOML). Without it, the embedded default scenario runs.
    pub scenario: Option<PathBuf>,
    /// Write the result document (JSON) here; `-` for standard output.
    #[arg(long, value_name = "FILE.json")]
    pub out: Option<PathBuf>,
    /// Write one CSV row per grid value here.
    #[arg(long, value_name = "FILE.csv")]
    pub csv: Option<PathBuf>,
    /// Write one CSV row per evaluation point and grid value here.
    #[arg(long, value_name = "FILE.csv")]
    pub points: Option<PathBuf>,
    /// Override the number of replicates R (at least 2).
    #[arg(long, value_name = "R")]
    pub replicates: Option<u64>,
    /// Override the master seed.
    #[arg(long)]
    pub seed: Option<u64>,
    /// Worker threads (0 = one per core). Results do not depend on it.
    #[arg(long, default_value_t = 0)]
    pub threads: usize,
    /// Which 0-1 loss decomposition the table shows (the JSON always holds all three).
    #[arg(long, value_enum, default_value_t = DecompositionView::Domingos)]
    pub decomposition: DecompositionView,
    /// Do not print the table.
    #[arg(long, short)]
    pub quiet: bool,
    /// Compute only shard I of N (1-based, as `sbatch --array=1-N`) and write its part document
    /// to `--out`; combine the parts with `lossprism merge`.
    #[arg(long, value_name = "I/N", requires = "out", conflicts_with_all = ["csv", "points"],
          value_parser = crate::shard::ShardSpec::parse)]
    pub shard: Option<crate::shard::ShardSpec>,
    /// Save the finished blocks here (atomically, after every block) and resume from it when it
    /// exists: rerunning the same command after an interruption continues where it stopped.
    #[arg(long, value_name = "FILE.json")]
    pub checkpoint: Option<PathBuf>,
    /// Testing aid: stop with exit code 3 after K newly completed blocks (needs --checkpoint).
    #[arg(long, value_name = "K", hide = true, requires = "checkpoint")]
    pub stop_after_blocks: Option<u64>,
}

/// Options of `merge`.
#[derive(Debug, Args)]
pub struct MergeArgs {
    /// Part documents written by `run --shard I/N --out FILE` (all shards of one run).
    #[arg(required = true, value_name = "PART.json")]
    pub parts: Vec<PathBuf>,
    /// Write the result document (JSON) here; `-` for standard output.
    #[arg(long, value_name = "FILE.json")]
    pub out: Option<PathBuf>,
    /// Write one CSV row per grid value here.
    #[arg(long, value_name = "FILE.csv")]
    pub csv: Option<PathBuf>,
    /// Write one CSV row per evaluation point and grid value here.
    #[arg(long, value_name = "FILE.csv")]
    pub points: Option<PathBuf>,
    /// Which 0-1 loss decomposition the table shows (the JSON always holds all three).
    #[arg(long, value_enum, default_value_t = DecompositionView::Domingos)]
    pub decomposition: DecompositionView,
    /// Do not print the table.
    #[arg(long, short)]
    pub quiet: bool,
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
    /// All three.
    All,
}

impl From<DecompositionView> for crate::report::table::View {
    fn from(v: DecompositionView) -> Self {
        use crate::report::table::View;
        match v {
            DecompositionView::Domingos => View::Domingos,
            DecompositionView::KohaviWolpert => View::KohaviWolpert,
            DecompositionView::James => View::James,
            DecompositionView::All => View::All,
        }
    }
}
