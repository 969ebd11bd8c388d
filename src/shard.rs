//! Shards, merging and checkpoints: running only some replicate blocks of a plan, carrying their
//! accumulators exactly in a part document ([`crate::report::part`]), checking that parts and
//! checkpoints belong to the same run (a fingerprint of everything that determines the result),
//! and folding all blocks in index order into a result identical to the unsharded run.
//!
//! The invariant this rests on (see [`crate::runner`]): block b covers the replicates
//! `plan.block_range(b)`, is accumulated sequentially from empty, and the final fold runs over all
//! blocks in index order. So as long as block accumulators are carried bit for bit, it does not
//! matter which process, thread or session computed which block.

use std::collections::BTreeMap;
use std::ops::Range;
use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Mutex;

use rayon::prelude::*;

use crate::audit::AuditAcc;
use crate::decompose::zero_one::ZeroOneAcc;
use crate::decompose::SquaredAcc;
use crate::error::Error;
use crate::family::Task;
use crate::report::part::{AccRecord, BlockRecord, PartDoc, ShardRef, PART_FORMAT};
use crate::report::{self, fmt_value};
use crate::runner::{self, BlockAcc, Outcome, Prepared};
use crate::scenario::{self, Plan, PlanOptions, Source};

/// Version of the writing program (part of the fingerprint).
const VERSION: &str = env!("CARGO_PKG_VERSION");

/// A shard of a run: `index` of `count`, 1-based (`--shard 2/8`, as in `sbatch --array=1-8`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ShardSpec {
    /// Shard number, `1..=count`.
    pub index: u64,
    /// Number of shards.
    pub count: u64,
}

impl ShardSpec {
    /// Parses `I/N` with `1 ≤ I ≤ N`. The message suits a command-line flag error.
    pub fn parse(s: &str) -> Result<ShardSpec, String> {
        let bad = || format!("expected I/N with 1 <= I <= N (e.g. 2/8), got `{s}`");
        let (i, n) = s.trim().split_once('/').ok_or_else(bad)?;
        let index: u64 = i.trim().parse().map_err(|_| bad())?;
        let count: u64 = n.trim().parse().map_err(|_| bad())?;
        if index == 0 || count == 0 || index > count {
            return Err(bad());
        }
        Ok(ShardSpec { index, count })
    }

    /// The blocks of this shard among `total` blocks: `[(I-1)·B/N, I·B/N)`. Shards partition
    /// `0..total` and, when `count <= total`, none is empty.
    pub fn block_range(&self, total: u64) -> Range<u64> {
        let lo = (self.index - 1) as u128 * total as u128 / self.count as u128;
        let hi = self.index as u128 * total as u128 / self.count as u128;
        lo as u64..hi as u64
    }

    fn as_ref(&self) -> ShardRef {
        ShardRef {
            index: self.index,
            count: self.count,
        }
    }
}

impl FromStr for ShardSpec {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        ShardSpec::parse(s)
    }
}

impl std::fmt::Display for ShardSpec {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}/{}", self.index, self.count)
    }
}

/// The text a plan is built from, kept so a part document can embed it and `merge` can re-plan.
#[derive(Debug, Clone)]
pub struct ScenarioSource {
    /// The file as named (or the embedded default's name).
    pub file: String,
    /// The file's text.
    pub text: String,
    /// Folder that relative paths in the file resolve against.
    pub base: PathBuf,
}

impl ScenarioSource {
    /// Reads a scenario file, or the embedded default scenario when `path` is `None`.
    pub fn read(path: Option<&Path>) -> Result<ScenarioSource, Error> {
        match path {
            Some(p) => Ok(ScenarioSource {
                file: p.display().to_string(),
                text: std::fs::read_to_string(p).map_err(|e| Error::io(p, &e))?,
                base: p.parent().map(Path::to_path_buf).unwrap_or_default(),
            }),
            None => Ok(ScenarioSource {
                file: scenario::DEFAULT_NAME.to_string(),
                text: scenario::DEFAULT_SCENARIO.to_string(),
                base: PathBuf::from("."),
            }),
        }
    }

    /// Parses and plans the text with the given overrides.
    pub fn plan(&self, opts: &PlanOptions) -> Result<Plan, Error> {
        let spec = scenario::parse(&self.text, &self.file)?;
        Ok(Plan::from_spec(
            &spec, &self.text, &self.file, &self.base, opts,
        )?)
    }
}

/// 64-bit FNV-1a hash (Fowler, Noll, Vo), offset basis 0xcbf29ce484222325, prime 0x100000001b3.
pub fn fnv1a64(bytes: &[u8]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for &b in bytes {
        h ^= b as u64;
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// Packs floats as hex strings of their bit patterns, 16 lowercase digits per value.
pub fn pack_f64(values: &[f64]) -> String {
    let mut s = String::with_capacity(values.len() * 16);
    for v in values {
        s.push_str(&format!("{:016x}", v.to_bits()));
    }
    s
}

/// Unpacks [`pack_f64`]'s output; `expect` is the number of values required.
pub fn unpack_f64(s: &str, expect: usize) -> Result<Vec<f64>, String> {
    if !s.is_ascii() || s.len() != expect * 16 {
        return Err(format!(
            "expected {expect} packed values ({} hex digits), found {} characters",
            expect * 16,
            s.len()
        ));
    }
    (0..expect)
        .map(|i| {
            u64::from_str_radix(&s[i * 16..(i + 1) * 16], 16)
                .map(f64::from_bits)
                .map_err(|_| format!("value {i} is not 16 hex digits"))
        })
        .collect()
}

/// The fingerprint of a run: FNV-1a (64 bit) of the canonical JSON of the part format, program
/// version, resolved scenario echo, the scenario file's settings (parsed, so comments and layout
/// do not count; `seed` and `replicates` are taken after overrides), family, knob, loss, the grid's
/// bit patterns, seed, replicates and blocks.
pub fn fingerprint(plan: &Plan, text: &str) -> Result<String, Error> {
    let mut spec: toml::Table = text
        .parse()
        .map_err(|e: toml::de::Error| Error::Usage(format!("scenario text: {}", e.message())))?;
    spec.remove("seed");
    spec.remove("replicates");
    let fail = |e: serde_json::Error| Error::Usage(format!("fingerprint: {e}"));
    let echo = serde_json::to_value(report::scenario_echo(plan)).map_err(fail)?;
    let settings = serde_json::to_value(&spec).map_err(fail)?;
    let material = serde_json::json!({
        "format": PART_FORMAT,
        "version": VERSION,
        "scenario": echo,
        "settings": settings,
        "family": plan.family.name(),
        "knob": plan.family.knob(),
        "loss": plan.loss.name(),
        "grid": plan.grid.iter().map(|v| format!("{:016x}", v.to_bits())).collect::<Vec<_>>(),
        "seed": plan.seed,
        "replicates": plan.replicates,
        "blocks": plan.blocks,
        "data": data_digest(plan),
    });
    let canonical = serde_json::to_string(&material).map_err(fail)?;
    Ok(format!("fnv1a64:{:016x}", fnv1a64(canonical.as_bytes())))
}

/// FNV-1a digest of the data a plan read from files (a table's shape, names, labels, inputs and
/// responses, bit for bit); `None` for synthetic sources, which the scenario text describes fully.
fn data_digest(plan: &Plan) -> Option<String> {
    match &plan.source {
        Source::Table(t) => {
            let tb = &t.table;
            let mut bytes: Vec<u8> = Vec::new();
            bytes.extend_from_slice(&(tb.x.nrows() as u64).to_le_bytes());
            bytes.extend_from_slice(&(tb.x.ncols() as u64).to_le_bytes());
            for name in tb.names.iter().chain(&tb.labels).chain([&tb.target]) {
                bytes.extend_from_slice(name.as_bytes());
                bytes.push(0);
            }
            for v in tb.x.iter().chain(tb.y.iter()) {
                bytes.extend_from_slice(&v.to_bits().to_le_bytes());
            }
            Some(format!("fnv1a64:{:016x}", fnv1a64(&bytes)))
        }
        _ => None,
    }
}

/// Encodes a block accumulator exactly.
pub fn encode_acc(acc: &BlockAcc) -> AccRecord {
    match acc {
        BlockAcc::Squared(a) => AccRecord::Squared {
            n: a.n,
            grid: a.grid,
            points: a.points,
            mean: pack_f64(&a.mean),
            m2: pack_f64(&a.m2),
            direct: pack_f64(&a.direct),
        },
        BlockAcc::ZeroOne(a) => AccRecord::ZeroOne {
            n: a.n,
            grid: a.grid,
            points: a.points,
            classes: a.classes,
            counts: a.counts.clone(),
            direct: pack_f64(&a.direct),
        },
    }
}

/// Decodes [`encode_acc`]'s record, checking every array length against the stated shape.
pub fn decode_acc(rec: &AccRecord) -> Result<BlockAcc, String> {
    match rec {
        AccRecord::Squared {
            n,
            grid,
            points,
            mean,
            m2,
            direct,
        } => {
            let cells = grid
                .checked_mul(*points)
                .ok_or_else(|| "accumulator shape overflows".to_string())?;
            Ok(BlockAcc::Squared(SquaredAcc {
                n: *n,
                grid: *grid,
                points: *points,
                mean: unpack_f64(mean, cells).map_err(|e| format!("mean: {e}"))?,
                m2: unpack_f64(m2, cells).map_err(|e| format!("m2: {e}"))?,
                direct: unpack_f64(direct, *grid).map_err(|e| format!("direct: {e}"))?,
            }))
        }
        AccRecord::ZeroOne {
            n,
            grid,
            points,
            classes,
            counts,
            direct,
        } => {
            let cells = grid
                .checked_mul(*points)
                .and_then(|c| c.checked_mul(*classes))
                .ok_or_else(|| "accumulator shape overflows".to_string())?;
            if counts.len() != cells {
                return Err(format!(
                    "counts: expected {cells} values, found {}",
                    counts.len()
                ));
            }
            Ok(BlockAcc::ZeroOne(ZeroOneAcc {
                n: *n,
                grid: *grid,
                points: *points,
                classes: *classes,
                counts: counts.clone(),
                direct: unpack_f64(direct, *grid).map_err(|e| format!("direct: {e}"))?,
            }))
        }
    }
}

/// Checks that a decoded accumulator fits block `b` of `plan` with `points` evaluation points.
fn check_acc(acc: &BlockAcc, plan: &Plan, points: usize, b: u64) -> Result<(), String> {
    let (start, end) = plan.block_range(b);
    let g = plan.grid.len();
    let (n, grid, pts) = match (acc, plan.task) {
        (BlockAcc::Squared(a), Task::Regress) => (a.n, a.grid, a.points),
        (BlockAcc::ZeroOne(a), Task::Classify { classes }) => {
            if a.classes != classes {
                return Err(format!("{} classes, the scenario has {classes}", a.classes));
            }
            for (cell, c) in a.counts.chunks(classes.max(1)).enumerate() {
                if c.iter().map(|&v| v as u64).sum::<u64>() != a.n {
                    return Err(format!(
                        "vote counts of cell {cell} do not add up to {}",
                        a.n
                    ));
                }
            }
            (a.n, a.grid, a.points)
        }
        _ => return Err(format!("accumulator is not for {} loss", plan.loss.name())),
    };
    if n != end - start {
        return Err(format!("{n} replicates, the block has {}", end - start));
    }
    if grid != g || pts != points {
        return Err(format!(
            "shape {grid} × {pts}, the scenario has {g} grid values × {points} points"
        ));
    }
    Ok(())
}

/// A finished block: its accumulator and, with `[audit]`, the selection counts of its replicates.
#[derive(Debug, Clone, PartialEq)]
pub struct Block {
    /// The block's accumulator.
    pub acc: BlockAcc,
    /// Selection audit counts per grid value (plans with `[audit]` only).
    pub audit: Option<AuditAcc>,
}

/// Encodes block `b` exactly.
pub fn encode_block(plan: &Plan, b: u64, block: &Block) -> BlockRecord {
    let (first_replicate, end_replicate) = plan.block_range(b);
    BlockRecord {
        block: b,
        first_replicate,
        end_replicate,
        acc: encode_acc(&block.acc),
        audit: block.audit.as_ref().map(|a| a.counts.clone()),
    }
}

/// Decodes a block record and checks it against block `rec.block` of `plan` (with `points`
/// evaluation points).
pub fn decode_block(plan: &Plan, points: usize, rec: &BlockRecord) -> Result<Block, String> {
    let b = rec.block;
    if b >= plan.blocks {
        return Err(format!("no such block (the run has {})", plan.blocks));
    }
    let (r0, r1) = plan.block_range(b);
    if (rec.first_replicate, rec.end_replicate) != (r0, r1) {
        return Err(format!(
            "replicates {}..{}, the block covers {r0}..{r1}",
            rec.first_replicate, rec.end_replicate
        ));
    }
    let acc = decode_acc(&rec.acc)?;
    check_acc(&acc, plan, points, b)?;
    let audit = match (&plan.audit, &rec.audit) {
        (None, None) => None,
        (Some(_), Some(counts)) => {
            if counts.len() != plan.grid.len() || counts.iter().sum::<u64>() != r1 - r0 {
                return Err(format!(
                    "audit counts must be {} values adding up to {}",
                    plan.grid.len(),
                    r1 - r0
                ));
            }
            Some(AuditAcc {
                counts: counts.clone(),
            })
        }
        (Some(_), None) => {
            return Err("the scenario has [audit] but the block has no audit counts".into())
        }
        (None, Some(_)) => return Err("audit counts, but the scenario has no [audit]".into()),
    };
    Ok(Block { acc, audit })
}

/// The part document of `blocks` (a shard's or a checkpoint's).
pub fn part_doc(
    plan: &Plan,
    source: &ScenarioSource,
    fingerprint: &str,
    shard: Option<ShardSpec>,
    checkpoint: bool,
    blocks: &BTreeMap<u64, Block>,
) -> PartDoc {
    PartDoc {
        format: PART_FORMAT.into(),
        version: VERSION.into(),
        fingerprint: fingerprint.into(),
        checkpoint,
        shard: shard.map(|s| s.as_ref()),
        name: plan.name.clone(),
        family: plan.family.name().into(),
        knob: plan.family.knob().into(),
        loss: plan.loss.name().into(),
        seed: plan.seed,
        replicates: plan.replicates,
        blocks: plan.blocks,
        grid: plan
            .grid
            .iter()
            .map(|v| format!("{:016x}", v.to_bits()))
            .collect(),
        scenario: serde_json::to_value(report::scenario_echo(plan))
            .unwrap_or(serde_json::Value::Null),
        scenario_file: source.file.clone(),
        scenario_text: source.text.clone(),
        completed: blocks
            .iter()
            .map(|(&b, block)| encode_block(plan, b, block))
            .collect(),
    }
}

/// The JSON text of a part document (newline-terminated).
pub fn part_json(doc: &PartDoc) -> String {
    let mut s = serde_json::to_string_pretty(doc).expect("part types serialize");
    s.push('\n');
    s
}

/// Reads a part document (shard part or checkpoint).
pub fn read_part(path: &Path) -> Result<PartDoc, Error> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, &e))?;
    let value: serde_json::Value = serde_json::from_str(&text).map_err(|e| {
        Error::Usage(format!(
            "{}: not a lossprism part document (invalid JSON: {e})",
            path.display()
        ))
    })?;
    match value.get("format").and_then(|f| f.as_str()) {
        Some(PART_FORMAT) => {}
        Some(other) => {
            return Err(Error::Usage(format!(
                "{}: format `{other}`, expected `{PART_FORMAT}`",
                path.display()
            )))
        }
        None => {
            return Err(Error::Usage(format!(
                "{}: not a lossprism part document (no `format` field)",
                path.display()
            )))
        }
    }
    serde_json::from_value(value).map_err(|e| {
        Error::Usage(format!(
            "{}: malformed {PART_FORMAT} document: {e}",
            path.display()
        ))
    })
}

fn grid_words(hex: &[String]) -> String {
    let vals: Vec<String> = hex
        .iter()
        .map(|h| {
            u64::from_str_radix(h, 16)
                .map(|b| fmt_value(f64::from_bits(b)))
                .unwrap_or_else(|_| h.clone())
        })
        .collect();
    format!("[{}]", vals.join(", "))
}

/// Says in a few words how two part documents' runs differ (empty when they do not).
pub fn difference(a: &PartDoc, b: &PartDoc) -> String {
    if a.name != b.name {
        format!("scenario `{}` vs `{}`", a.name, b.name)
    } else if a.family != b.family {
        format!("family {} vs {}", a.family, b.family)
    } else if a.loss != b.loss {
        format!("loss {} vs {}", a.loss, b.loss)
    } else if a.grid != b.grid {
        format!("grid {} vs {}", grid_words(&a.grid), grid_words(&b.grid))
    } else if a.seed != b.seed {
        format!("seed {} vs {}", a.seed, b.seed)
    } else if a.replicates != b.replicates {
        format!("replicates {} vs {}", a.replicates, b.replicates)
    } else if a.blocks != b.blocks {
        format!("blocks {} vs {}", a.blocks, b.blocks)
    } else if a.version != b.version {
        format!("lossprism version {} vs {}", a.version, b.version)
    } else if a.scenario_text != b.scenario_text {
        "scenario settings differ".into()
    } else if a.fingerprint != b.fingerprint {
        format!("fingerprint {} vs {}", a.fingerprint, b.fingerprint)
    } else {
        String::new()
    }
}

fn shard_words(s: Option<ShardRef>) -> String {
    match s {
        Some(s) => format!("shard {}/{}", s.index, s.count),
        None => "an unsharded run".into(),
    }
}

/// What to run: the whole plan or one shard, optionally with a checkpoint file.
#[derive(Clone)]
pub struct Job<'a> {
    /// The plan (built from `source`).
    pub plan: &'a Plan,
    /// The scenario text the plan was built from.
    pub source: &'a ScenarioSource,
    /// Only this shard's blocks (`None`: all blocks).
    pub shard: Option<ShardSpec>,
    /// Resume from and rewrite this checkpoint after every block.
    pub checkpoint: Option<&'a Path>,
    /// Stop (without finishing) after this many newly completed blocks (for tests).
    pub stop_after_blocks: Option<u64>,
    /// Worker threads (0 = one per core).
    pub threads: usize,
    /// Told of every finished block (resumed blocks are reported when the job starts) and asked
    /// before each block whether to stop (a progress display, Ctrl-C); [`runner::NoWatch`] for
    /// none.
    pub watch: &'a dyn runner::Watch,
}

impl std::fmt::Debug for Job<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Job")
            .field("plan", &self.plan.name)
            .field("source", &self.source)
            .field("shard", &self.shard)
            .field("checkpoint", &self.checkpoint)
            .field("stop_after_blocks", &self.stop_after_blocks)
            .field("threads", &self.threads)
            .finish_non_exhaustive()
    }
}

/// All blocks a job asked for, computed or resumed.
#[derive(Debug, Clone)]
pub struct Completed {
    /// Evaluation points and truth.
    pub prepared: Prepared,
    /// Finished blocks by block index.
    pub blocks: BTreeMap<u64, Block>,
    /// The run's fingerprint.
    pub fingerprint: String,
    /// Blocks taken from the checkpoint rather than computed.
    pub resumed: u64,
}

/// How a job ended.
#[derive(Debug, Clone)]
pub enum Finish {
    /// Every requested block is available.
    Done(Box<Completed>),
    /// Stopped on request after `new_blocks` newly completed blocks; `remaining` are left. The
    /// checkpoint, if any, holds every completed block, so rerunning the job resumes.
    Stopped {
        /// Blocks completed in this session.
        new_blocks: u64,
        /// Blocks still to run.
        remaining: u64,
        /// Whether the job's [`Job::watch`] asked to stop (an interruption) rather than
        /// [`Job::stop_after_blocks`].
        interrupted: bool,
    },
}

/// The blocks a job covers; errors when a shard would be empty.
pub fn job_blocks(plan: &Plan, shard: Option<ShardSpec>) -> Result<Range<u64>, Error> {
    match shard {
        None => Ok(0..plan.blocks),
        Some(s) if s.count > plan.blocks => Err(Error::Usage(format!(
            "--shard {s}: the scenario has only {} replicate blocks, fewer than {} shards; raise \
             `blocks` in the scenario file (at most R = {}) or use fewer shards",
            plan.blocks, s.count, plan.replicates
        ))),
        Some(s) => Ok(s.block_range(plan.blocks)),
    }
}

/// Loads a checkpoint for resuming `job`; `None` when the file does not exist.
fn load_checkpoint(
    path: &Path,
    job: &Job<'_>,
    fingerprint: &str,
    wanted: &Range<u64>,
    points: usize,
) -> Result<Option<BTreeMap<u64, Block>>, Error> {
    if !path.exists() {
        return Ok(None);
    }
    let shown = path.display();
    let fix = "delete it or choose another file";
    let doc = read_part(path).map_err(|e| Error::Usage(format!("checkpoint {e}; {fix}")))?;
    if !doc.checkpoint {
        return Err(Error::Usage(format!(
            "checkpoint {shown} is a finished shard part, not a checkpoint; {fix}"
        )));
    }
    let here = part_doc(
        job.plan,
        job.source,
        fingerprint,
        job.shard,
        true,
        &BTreeMap::new(),
    );
    if doc.fingerprint != fingerprint {
        let what = difference(&doc, &here);
        let what = if what.is_empty() {
            String::new()
        } else {
            format!(" ({what})")
        };
        return Err(Error::Usage(format!(
            "checkpoint {shown} belongs to another scenario/seed{what}; {fix}"
        )));
    }
    if doc.shard != here.shard {
        return Err(Error::Usage(format!(
            "checkpoint {shown} belongs to {}, this run is {}; {fix}",
            shard_words(doc.shard),
            shard_words(here.shard)
        )));
    }
    let mut out = BTreeMap::new();
    for rec in &doc.completed {
        let b = rec.block;
        let bad = |m: String| Error::Usage(format!("checkpoint {shown}: block {b}: {m}; {fix}"));
        if !wanted.contains(&b) {
            return Err(bad(format!(
                "outside this run's blocks {}..{}",
                wanted.start, wanted.end
            )));
        }
        let block = decode_block(job.plan, points, rec).map_err(bad)?;
        if out.insert(b, block).is_some() {
            return Err(bad("present twice".into()));
        }
    }
    Ok(Some(out))
}

struct Progress {
    blocks: BTreeMap<u64, Block>,
    new_blocks: u64,
}

/// Runs a job: resumes from the checkpoint if it exists and matches, computes the missing blocks
/// of the job on `threads` workers, and rewrites the checkpoint atomically after every block.
pub fn execute(job: &Job<'_>) -> Result<Finish, Error> {
    let plan = job.plan;
    if !matches!(plan.source, Source::Synthetic(_)) {
        return Err(Error::Usage(format!(
            "{}: table scenarios run whole (`lossprism run FILE`); --shard and --checkpoint do \
             not support them yet",
            plan.file
        )));
    }
    let fp = fingerprint(plan, &job.source.text)?;
    let wanted = job_blocks(plan, job.shard)?;
    let prepared = runner::prepare(plan)?;
    let points = prepared.eval_x.nrows();
    let start = match job.checkpoint {
        Some(path) => load_checkpoint(path, job, &fp, &wanted, points)?.unwrap_or_default(),
        None => BTreeMap::new(),
    };
    let resumed = start.len() as u64;
    let replicates_of = |b: u64| {
        let (s, e) = plan.block_range(b);
        e - s
    };
    for &b in start.keys() {
        job.watch.block_done(replicates_of(b));
    }
    let todo: Vec<u64> = wanted.clone().filter(|b| !start.contains_key(b)).collect();
    let state = Mutex::new(Progress {
        blocks: start,
        new_blocks: 0,
    });
    let stop = AtomicBool::new(false);
    let watch_stopped = AtomicBool::new(false);
    if job.stop_after_blocks == Some(0) {
        stop.store(true, Ordering::SeqCst);
    }
    let record = |b: u64, block: Block| -> Result<(), Error> {
        let mut st = state.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(k) = job.stop_after_blocks {
            if st.new_blocks >= k {
                return Ok(());
            }
        }
        st.blocks.insert(b, block);
        st.new_blocks += 1;
        if let Some(path) = job.checkpoint {
            let doc = part_doc(plan, job.source, &fp, job.shard, true, &st.blocks);
            report::write_atomic(path, part_json(&doc).as_bytes())?;
        }
        if job.stop_after_blocks == Some(st.new_blocks) {
            stop.store(true, Ordering::SeqCst);
        }
        job.watch.block_done(replicates_of(b));
        Ok(())
    };
    if !todo.is_empty() {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(job.threads)
            .build()
            .map_err(|e| {
                Error::Usage(format!("cannot start {} worker threads: {e}", job.threads))
            })?;
        let results: Vec<Result<(), Error>> = pool.install(|| {
            todo.par_iter()
                .map(|&b| {
                    if stop.load(Ordering::SeqCst) {
                        return Ok(());
                    }
                    if job.watch.stop() {
                        watch_stopped.store(true, Ordering::SeqCst);
                        return Ok(());
                    }
                    let (acc, audit) = runner::run_block_audited(plan, &prepared, b)?;
                    record(b, Block { acc, audit })
                })
                .collect()
        });
        results.into_iter().collect::<Result<(), Error>>()?;
    }
    let st = state.into_inner().unwrap_or_else(|e| e.into_inner());
    let remaining = (wanted.end - wanted.start) - st.blocks.len() as u64;
    if remaining > 0 {
        return Ok(Finish::Stopped {
            new_blocks: st.new_blocks,
            remaining,
            interrupted: watch_stopped.load(Ordering::SeqCst),
        });
    }
    Ok(Finish::Done(Box::new(Completed {
        prepared,
        blocks: st.blocks,
        fingerprint: fp,
        resumed,
    })))
}

/// Folds completed blocks (all of the plan's, in index order) into the run's outcome.
pub fn outcome(plan: &Plan, done: Completed) -> Result<Outcome, Error> {
    if done.blocks.len() as u64 != plan.blocks {
        return Err(Error::Usage(format!(
            "{} of {} blocks available; cannot summarize a partial run",
            done.blocks.len(),
            plan.blocks
        )));
    }
    let mut audit = plan.audit.as_ref().map(|_| AuditAcc::new(plan.grid.len()));
    let mut blocks: Vec<BlockAcc> = Vec::with_capacity(done.blocks.len());
    for block in done.blocks.into_values() {
        if let (Some(total), Some(counts)) = (audit.as_mut(), block.audit.as_ref()) {
            total.merge(counts);
        }
        blocks.push(block.acc);
    }
    let summary = runner::summarize(plan, &done.prepared, &blocks)?;
    Ok(Outcome {
        prepared: done.prepared,
        summary,
        audit,
    })
}

/// A merged run: the plan rebuilt from the parts' embedded scenario and its outcome.
#[derive(Debug, Clone)]
pub struct Merged {
    /// The plan.
    pub plan: Plan,
    /// The outcome, identical to the unsharded run's.
    pub outcome: Outcome,
}

/// Merges shard parts into the run's outcome. Refuses (with a one-line [`Error::Usage`] naming the
/// files) parts of different runs, of different shard counts, duplicated parts, and missing or
/// duplicated blocks; checkpoints are refused too.
pub fn merge(paths: &[PathBuf]) -> Result<Merged, Error> {
    let refuse = |m: String| Error::Usage(format!("merge: {m}"));
    if paths.is_empty() {
        return Err(refuse("no part files given".into()));
    }
    let docs: Vec<PartDoc> = paths
        .iter()
        .map(|p| read_part(p))
        .collect::<Result<_, _>>()?;
    let name = |i: usize| paths[i].display().to_string();
    let mut shards: Vec<ShardSpec> = Vec::with_capacity(docs.len());
    for (i, d) in docs.iter().enumerate() {
        match (d.checkpoint, d.shard) {
            (false, Some(s)) => shards.push(ShardSpec {
                index: s.index,
                count: s.count,
            }),
            _ => {
                return Err(refuse(format!(
                    "{} is a checkpoint, not a shard part; finish that run by rerunning it, or \
                     write parts with `run --shard I/N --out FILE`",
                    name(i)
                )))
            }
        }
    }
    let first = &docs[0];
    for (i, d) in docs.iter().enumerate().skip(1) {
        if d.fingerprint != first.fingerprint {
            let what = difference(first, d);
            return Err(refuse(format!(
                "{} and {} come from different runs ({what}); parts must share scenario, seed, \
                 replicates and blocks",
                name(0),
                name(i)
            )));
        }
    }
    for (i, s) in shards.iter().enumerate().skip(1) {
        if s.count != shards[0].count {
            return Err(refuse(format!(
                "{} is shard {} but {} is shard {}; all parts must come from the same split",
                name(0),
                shards[0],
                name(i),
                s
            )));
        }
    }
    let count = shards[0].count;
    let mut by_index: BTreeMap<u64, usize> = BTreeMap::new();
    for (i, s) in shards.iter().enumerate() {
        if let Some(&j) = by_index.get(&s.index) {
            return Err(refuse(format!(
                "{} and {} are both shard {s} (duplicated part)",
                name(j),
                name(i)
            )));
        }
        by_index.insert(s.index, i);
    }

    // Rebuild the plan from the embedded scenario and check it is the run the parts claim.
    let source = ScenarioSource {
        file: first.scenario_file.clone(),
        text: first.scenario_text.clone(),
        base: Path::new(&first.scenario_file)
            .parent()
            .map(Path::to_path_buf)
            .unwrap_or_default(),
    };
    let opts = PlanOptions {
        replicates: Some(first.replicates),
        seed: Some(first.seed),
    };
    let plan = source.plan(&opts).map_err(|e| {
        refuse(format!(
            "{}: its embedded scenario does not plan: {e}",
            name(0)
        ))
    })?;
    let fp = fingerprint(&plan, &source.text)?;
    if fp != first.fingerprint || plan.blocks != first.blocks {
        let why = if first.version != VERSION {
            format!(
                "it was written by lossprism {}, this is {VERSION}",
                first.version
            )
        } else {
            "the scenario's data file or the part file changed since the shards ran".into()
        };
        return Err(refuse(format!(
            "{}: fingerprint does not match its embedded scenario ({why})",
            name(0)
        )));
    }
    if count > plan.blocks {
        return Err(refuse(format!(
            "{} claims {count} shards but the run has only {} blocks",
            name(0),
            plan.blocks
        )));
    }

    let prepared = runner::prepare(&plan)?;
    let points = prepared.eval_x.nrows();
    let mut blocks: BTreeMap<u64, Block> = BTreeMap::new();
    for (i, d) in docs.iter().enumerate() {
        let s = shards[i];
        let range = s.block_range(plan.blocks);
        for rec in &d.completed {
            let b = rec.block;
            if !range.contains(&b) {
                return Err(refuse(format!(
                    "{} (shard {s}) holds block {b}, outside its blocks {}..{}",
                    name(i),
                    range.start,
                    range.end
                )));
            }
            let block = decode_block(&plan, points, rec)
                .map_err(|m| refuse(format!("{}: block {b}: {m}", name(i))))?;
            if blocks.insert(b, block).is_some() {
                return Err(refuse(format!(
                    "{} holds block {b} twice (duplicated block)",
                    name(i)
                )));
            }
        }
    }
    for b in 0..plan.blocks {
        if blocks.contains_key(&b) {
            continue;
        }
        let (r0, r1) = plan.block_range(b);
        let owner = (1..=count)
            .map(|index| ShardSpec { index, count })
            .find(|s| s.block_range(plan.blocks).contains(&b));
        let given: Vec<String> = by_index
            .iter()
            .map(|(&ix, &i)| format!("{} = {ix}/{count}", name(i)))
            .collect();
        let why = match owner {
            Some(o) => match by_index.get(&o.index) {
                Some(&i) => format!("{} (shard {o}) lacks it", name(i)),
                None => format!("no part of shard {o} given (given: {})", given.join(", ")),
            },
            None => "no shard holds it".into(),
        };
        return Err(refuse(format!(
            "block {b} (replicates {r0}..{r1}) is missing: {why}"
        )));
    }
    let outcome = outcome(
        &plan,
        Completed {
            prepared,
            blocks,
            fingerprint: fp,
            resumed: 0,
        },
    )?;
    Ok(Merged { plan, outcome })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fnv1a64_matches_the_published_test_vectors() {
        // Source: FNV test vectors of Fowler, Noll and Vo (64-bit FNV-1a of "" and "a", as listed
        // in the FNV reference code's test suite and draft-eastlake-fnv).
        assert_eq!(fnv1a64(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a64(b"a"), 0xaf63_dc4c_8601_ec8c);
        assert_eq!(fnv1a64(b"foobar"), 0x8594_4171_f739_67e8);
    }

    #[test]
    fn packed_floats_round_trip_to_the_bit() {
        let vals = [
            0.0,
            -0.0,
            1.0 / 3.0,
            f64::MIN_POSITIVE / 7.0, // subnormal
            f64::MAX,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::NAN,
            -1.234_567_890_123_456_7e-300,
            0.1 + 0.2,
        ];
        let s = pack_f64(&vals);
        assert_eq!(s.len(), vals.len() * 16);
        let back = unpack_f64(&s, vals.len()).unwrap();
        for (a, b) in vals.iter().zip(&back) {
            assert_eq!(a.to_bits(), b.to_bits());
        }
        assert!(unpack_f64(&s, vals.len() - 1).is_err());
        assert!(unpack_f64(&s.replace('0', "g"), vals.len()).is_err());
        assert!(unpack_f64("é", 0).is_err());
    }

    #[test]
    fn shard_syntax_is_checked() {
        assert_eq!(
            ShardSpec::parse("2/8"),
            Ok(ShardSpec { index: 2, count: 8 })
        );
        for bad in ["3", "0/3", "4/3", "a/b", "1/0", "", "/", "1/2/3", "-1/3"] {
            assert!(ShardSpec::parse(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn shards_partition_the_blocks_without_empty_ones() {
        for total in 1..40u64 {
            for count in 1..=total {
                let mut next = 0;
                for index in 1..=count {
                    let r = ShardSpec { index, count }.block_range(total);
                    assert_eq!(r.start, next);
                    assert!(r.end > r.start);
                    next = r.end;
                }
                assert_eq!(next, total);
            }
        }
    }

    #[test]
    fn accumulators_round_trip_exactly_and_shapes_are_checked() {
        let mut sq = SquaredAcc::new(2, 3);
        let preds =
            ndarray::Array2::from_shape_fn((2, 3), |(g, e)| (g as f64 + 0.1) / (e as f64 + 3.0));
        sq.push(preds.view(), &[0.3, 0.7]);
        sq.push((&preds * 1.7).view(), &[0.1, 1.0 / 3.0]);
        let acc = BlockAcc::Squared(sq);
        assert_eq!(decode_acc(&encode_acc(&acc)).unwrap(), acc);

        let mut zo = ZeroOneAcc::new(2, 3, 3);
        zo.push(ndarray::Array2::from_elem((2, 3), 2.0).view(), &[0.5, 0.25]);
        let acc = BlockAcc::ZeroOne(zo);
        let rec = encode_acc(&acc);
        assert_eq!(decode_acc(&rec).unwrap(), acc);
        // JSON round trip of the record itself
        let text = serde_json::to_string(&rec).unwrap();
        let back: AccRecord = serde_json::from_str(&text).unwrap();
        assert_eq!(decode_acc(&back).unwrap(), acc);

        if let AccRecord::ZeroOne { mut counts, .. } = rec.clone() {
            counts.pop();
            let bad = AccRecord::ZeroOne {
                n: 1,
                grid: 2,
                points: 3,
                classes: 3,
                counts,
                direct: pack_f64(&[0.5, 0.25]),
            };
            assert!(decode_acc(&bad).is_err());
        }
    }
}
