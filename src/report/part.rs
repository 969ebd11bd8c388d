//! The part document `lossprism-part/1`: the block accumulators of a shard (`run --shard I/N`) or
//! of a checkpoint (`run --checkpoint FILE`), with the scenario text and a fingerprint so that
//! `merge` and a resumed run can rebuild and verify the plan. These are plain data types (the
//! logic lives in [`crate::shard`]); they are report input documents, so they derive both
//! `Serialize` and `Deserialize`.
//!
//! Floats never appear as decimal JSON numbers: every `f64` array is one packed hexadecimal string
//! of `f64::to_bits` (16 lowercase digits per value), so a round trip is exact to the bit. Counts
//! are plain JSON integers.

use serde::{Deserialize, Serialize};

/// Identifier of the part format.
pub const PART_FORMAT: &str = "lossprism-part/1";

/// Which shard of a run a part holds (`--shard index/count`, 1-based).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct ShardRef {
    /// Shard number, `1..=count`.
    pub index: u64,
    /// Number of shards of the run.
    pub count: u64,
}

/// One block accumulator, by loss. `f64` arrays are packed hex strings (see the module docs).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "loss")]
pub enum AccRecord {
    /// A squared-loss accumulator.
    #[serde(rename = "squared")]
    Squared {
        /// Replicates absorbed.
        n: u64,
        /// Number of grid values.
        grid: usize,
        /// Number of evaluation points.
        points: usize,
        /// Mean prediction per cell, packed hex.
        mean: String,
        /// Centred sum of squares per cell, packed hex.
        m2: String,
        /// Direct loss sums per grid value, packed hex.
        direct: String,
    },
    /// A 0-1 loss (vote count) accumulator.
    #[serde(rename = "zero_one")]
    ZeroOne {
        /// Replicates absorbed.
        n: u64,
        /// Number of grid values.
        grid: usize,
        /// Number of evaluation points.
        points: usize,
        /// Number of classes.
        classes: usize,
        /// Vote counts per grid value × point × class.
        counts: Vec<u32>,
        /// Direct loss sums per grid value, packed hex.
        direct: String,
    },
}

/// A completed block.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BlockRecord {
    /// Block index, `0..blocks`.
    pub block: u64,
    /// First replicate of the block.
    pub first_replicate: u64,
    /// One past the last replicate of the block.
    pub end_replicate: u64,
    /// The block's accumulator.
    pub acc: AccRecord,
    /// Selection audit counts per grid value (scenarios with `[audit]` only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub audit: Option<Vec<u64>>,
}

/// The part document (`lossprism-part/1`), written by `run --shard` and `run --checkpoint`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PartDoc {
    /// Always [`PART_FORMAT`].
    pub format: String,
    /// lossprism version that wrote it.
    pub version: String,
    /// Stable hash of everything that determines the result (see `shard::fingerprint`).
    pub fingerprint: String,
    /// `true` for a checkpoint (possibly incomplete), `false` for a finished shard.
    pub checkpoint: bool,
    /// The shard held, `None` for an unsharded run's checkpoint.
    pub shard: Option<ShardRef>,
    /// Scenario name.
    pub name: String,
    /// Family name.
    pub family: String,
    /// Knob name.
    pub knob: String,
    /// Loss name.
    pub loss: String,
    /// Master seed (after overrides).
    pub seed: u64,
    /// Replicates R (after overrides).
    pub replicates: u64,
    /// Number of replicate blocks.
    pub blocks: u64,
    /// Grid values as hex bit patterns (one 16-digit string each).
    pub grid: Vec<String>,
    /// The resolved scenario echo, for reading only (the plan is rebuilt from `scenario_text`).
    pub scenario: serde_json::Value,
    /// The scenario file as it was named on the command line.
    pub scenario_file: String,
    /// The scenario file's text, verbatim.
    pub scenario_text: String,
    /// Completed blocks, ascending by index.
    pub completed: Vec<BlockRecord>,
}
