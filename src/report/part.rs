//! The part document `lossprism-part/2`: the block accumulators of a shard (`run --shard I/N`) or
//! of a checkpoint (`run --checkpoint FILE`), with the scenario text and a fingerprint so that
//! `merge` and a resumed run can rebuild and verify the plan, and a checksum over the whole
//! content. These are plain data types (the logic lives in [`crate::shard`]); they are read back,
//! so they derive both `Serialize` and `Deserialize`.
//!
//! Floats never appear as decimal JSON numbers: every `f64` array is one string holding the
//! base64 of the values' little-endian IEEE bytes, so a round trip is exact to the bit. Counts
//! are plain JSON integers. An accumulator is written the way its loss lays it out (named
//! arrays), so a new loss needs no change here.
//!
//! Version 2 (this one) replaced version 1's per-loss records by named arrays, added several
//! models per block, per-point counts for tables, the held-out share and the checksum.

use serde::{Deserialize, Serialize};

/// Identifier of the part format.
pub const PART_FORMAT: &str = "lossprism-part/2";

/// Which shard of a run a part holds (`--shard index/count`, 1-based).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct ShardRef {
    /// Shard number, `1..=count`.
    pub index: u64,
    /// Number of shards of the run.
    pub count: u64,
}

/// The shape of an accumulator (see [`crate::decompose::Shape`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct ShapeRecord {
    /// Grid values.
    pub grid: usize,
    /// Evaluation points.
    pub points: usize,
    /// Classes (0 for regression).
    pub classes: usize,
    /// Fits per training set.
    pub fits: usize,
    /// Every replicate evaluates every point.
    pub all_points: bool,
    /// The family reports its diversity.
    pub ensemble: bool,
}

/// A named float array, packed (see the module docs).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FloatArray {
    /// The loss's name of the array.
    pub name: String,
    /// Base64 of the little-endian bytes.
    pub data: String,
}

/// A named count array.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CountArray {
    /// The loss's name of the array.
    pub name: String,
    /// The counts.
    pub data: Vec<u32>,
}

/// One model's accumulator of one block.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AccRecord {
    /// Shape.
    pub shape: ShapeRecord,
    /// Replicates absorbed.
    pub replicates: u64,
    /// Per point: replicates that evaluated it (absent when every replicate evaluates every
    /// point).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub count: Option<Vec<u64>>,
    /// Float arrays, in the loss's layout order.
    pub floats: Vec<FloatArray>,
    /// Count arrays, in the loss's layout order.
    pub counts: Vec<CountArray>,
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
    /// One accumulator per model, in model order.
    pub models: Vec<AccRecord>,
    /// Selection audit counts per candidate (scenarios with `[audit]` only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub audit: Option<Vec<u64>>,
    /// Table sources: Σ and Σ² of the held-out shares, packed like a float array.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub held_share: Option<String>,
}

/// The part document (`lossprism-part/2`), written by `run --shard` and `run --checkpoint`.
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
    /// Family names, one per model.
    pub families: Vec<String>,
    /// Each model's grid values as hex bit patterns (16 digits each).
    pub grids: Vec<Vec<String>>,
    /// Loss name.
    pub loss: String,
    /// Master seed (after overrides).
    pub seed: u64,
    /// Replicates R (after overrides).
    pub replicates: u64,
    /// Number of replicate blocks.
    pub blocks: u64,
    /// The seed of the evaluation points when set explicitly (by the file's `eval_seed` or by
    /// `run --eval-seed`); absent when it follows the file's `seed`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub eval_seed: Option<u64>,
    /// The scenario file as it was named on the command line.
    pub scenario_file: String,
    /// The scenario file's text, verbatim.
    pub scenario_text: String,
    /// The scenario file's absolute path where the part was written, so that `merge` run from
    /// another folder still finds it, and keeps its outputs off it, its table and the files an
    /// external estimator runs; absent when it could not be resolved (and in parts written before
    /// 0.3.5).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub scenario_path: Option<String>,
    /// Completed blocks, ascending by index.
    pub completed: Vec<BlockRecord>,
    /// FNV-1a (64 bit) of the document's compact JSON with this field empty: any change to the
    /// content is detected on load.
    pub checksum: String,
}
