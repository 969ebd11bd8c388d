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
use std::sync::Mutex;

use crate::codec::{fnv1a64, pack_floats, unpack_floats};
use crate::decompose::{Acc, Kind, Shape};
use crate::error::Error;
use crate::report;
use crate::report::part::{
    AccRecord, BlockRecord, CountArray, FloatArray, PartDoc, ShapeRecord, ShardRef, PART_FORMAT,
};
use crate::runner::{self, audit::AuditAcc, BlockResult, Outcome, Prepared};
use crate::scenario::{self, Plan, PlanOptions, Source};

/// Version of the writing program (part of the fingerprint).
const VERSION: &str = env!("CARGO_PKG_VERSION");

/// Largest part or checkpoint file read (larger files are refused before reading).
pub const MAX_PART_BYTES: u64 = 4 << 30;

/// Bytes of a part or checkpoint file per byte of the accumulators it holds: the arrays are
/// written as base64 (4 characters per 3 bytes); measured: 85 336 100 bytes for 64 MB of
/// accumulators (2 blocks × 40 grid values × 50 000 points), 4/3 of them to 0.01%.
const DOCUMENT_BYTES_PER_ACCUMULATOR_BYTE: f64 = 4.0 / 3.0;

/// Refuses, before any work, a run whose part or checkpoint file would be larger than
/// [`MAX_PART_BYTES`], the most that is read back (the file would be written at the end of a
/// long run and then refused by `merge` or on resume). Says how many shards keep each part
/// under the limit.
pub fn check_document_size(plan: &Plan, shard: Option<ShardSpec>, flag: &str) -> Result<(), Error> {
    let blocks = job_blocks(plan, shard)?;
    let share = (blocks.end - blocks.start) as f64 / plan.blocks.max(1) as f64;
    let bytes = DOCUMENT_BYTES_PER_ACCUMULATOR_BYTE * share * plan.accumulator_bytes()
        + (1u64 << 20) as f64;
    if bytes <= MAX_PART_BYTES as f64 {
        return Ok(());
    }
    // Shards split the blocks as evenly as they can (`ShardSpec::block_range`), so the largest
    // holds ceil(blocks / shards) of them: the advice counts blocks, not bytes.
    let per_block =
        DOCUMENT_BYTES_PER_ACCUMULATOR_BYTE * plan.accumulator_bytes() / plan.blocks.max(1) as f64;
    let room = ((MAX_PART_BYTES - (1u64 << 20)) as f64 / per_block).floor() as u64;
    let gib = |b: f64| b / (1u64 << 30) as f64;
    let split = if room >= 1 {
        let shards = plan.blocks.div_ceil(room).max(2);
        format!("run it as {shards} or more shards (`--shard I/{shards}`, each with its own checkpoint)")
    } else {
        "one replicate block alone is too large, so sharding cannot help".to_string()
    };
    Err(Error::Usage(format!(
        "{flag}: the file would hold about {:.1} GiB of encoded accumulators, more than the {} \
         GiB lossprism reads back (it would be refused by `merge` or on resume); {split}, or \
         lower `eval_size` or the grid",
        gib(bytes),
        MAX_PART_BYTES >> 30
    )))
}

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
                text: scenario::read_text(p)?,
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

/// The fingerprint of a run: FNV-1a (64 bit) of the canonical JSON of the part format, program
/// version, resolved scenario echo, the scenario file's settings (parsed, so comments and layout
/// do not count; `replicates` is taken after overrides; the file's own `seed` stays, since it
/// places the evaluation points and a table's holdout even under `--seed`), the models (family,
/// knob, grid bit patterns, fits), the loss, seed and evaluation seed after overrides,
/// replicates, blocks, and a digest of any data the plan read from files; then, after
/// `+scripts:`, a digest of the scripts an external estimator runs, when it names any.
pub fn fingerprint(plan: &Plan, text: &str) -> Result<String, Error> {
    let mut spec: toml::Table = text
        .parse()
        .map_err(|e: toml::de::Error| Error::Usage(format!("scenario text: {}", e.message())))?;
    spec.remove("replicates");
    let fail = |e: serde_json::Error| Error::Usage(format!("fingerprint: {e}"));
    let echo = serde_json::to_value(report::scenario_echo(plan)).map_err(fail)?;
    let settings = serde_json::to_value(&spec).map_err(fail)?;
    let mut models: Vec<serde_json::Value> = Vec::with_capacity(plan.models.len());
    for m in &plan.models {
        models.push(serde_json::json!({
            "family": m.family.name(),
            "knob": m.family.knob(),
            "grid": m.grid.iter().map(|v| format!("{:016x}", v.to_bits())).collect::<Vec<_>>(),
            "fit_seeds": m.fit_seeds,
        }));
    }
    // The scripts an external estimator runs, by content, after the rest (`+scripts:`): a
    // script edited between a stop and its resume, or between shards, was folded into one
    // result with exit 0. Only words naming script files count ([`SCRIPT_EXTENSIONS`]): a log
    // the estimator writes would change between shards, and an interpreter's path between
    // machines. `merge` compares the parts' whole fingerprints with each other, and only the
    // part before `+` with its own reading of the embedded scenario, so that parts merge
    // where the scripts are not.
    let mut scripts: Vec<u8> = Vec::new();
    for m in &plan.models {
        for f in m.family.input_files().into_iter().filter(|f| is_script(f)) {
            let bytes = std::fs::read(&f).map_err(|e| Error::io(&f, &e))?;
            scripts.extend_from_slice(&fnv1a64(&bytes).to_le_bytes());
        }
    }
    let material = serde_json::json!({
        "format": PART_FORMAT,
        "version": VERSION,
        "scenario": echo,
        "settings": settings,
        "models": models,
        "loss": plan.loss.name(),
        "seed": plan.seed,
        "eval_seed": plan.eval_seed,
        "replicates": plan.replicates,
        "blocks": plan.blocks,
        "data": data_digest(plan),
    });
    let canonical = serde_json::to_string(&material).map_err(fail)?;
    let base = format!("fnv1a64:{:016x}", fnv1a64(canonical.as_bytes()));
    Ok(if scripts.is_empty() {
        base
    } else {
        format!("{base}+scripts:{:016x}", fnv1a64(&scripts))
    })
}

/// The part of a fingerprint before an external estimator's scripts ([`fingerprint`]).
fn without_scripts(fp: &str) -> &str {
    fp.split_once("+scripts:").map_or(fp, |(base, _)| base)
}

/// File name endings of the scripts whose content a run's fingerprint covers when an external
/// estimator's `command` names them (with files that start with `#!`).
pub use crate::family::external::SCRIPT_EXTENSIONS;

/// `true` when `f` ends in one of [`SCRIPT_EXTENSIONS`] (any case) or starts with `#!` (an
/// executable script without an extension); a compiled program or an interpreter is not a
/// script here (its path and build differ between machines).
fn is_script(f: &Path) -> bool {
    crate::family::external::script_extension(f) || {
        use std::io::Read;
        let mut head = [0u8; 2];
        std::fs::File::open(f)
            .and_then(|mut h| h.read_exact(&mut head))
            .is_ok_and(|_| &head == b"#!")
    }
}

/// FNV-1a digest of the data a plan read from files (a table's or a twin's shape, names, labels,
/// inputs and responses, bit for bit); `None` for synthetic sources, which the scenario text
/// describes fully.
fn data_digest(plan: &Plan) -> Option<String> {
    let mut bytes: Vec<u8> = Vec::new();
    match &plan.source {
        Source::Table(t) => return Some(t.table.digest()),
        Source::Synthetic(s) => {
            let rows = s.process.empirical_rows()?;
            for v in rows.iter() {
                bytes.extend_from_slice(&v.to_bits().to_le_bytes());
            }
            bytes.extend_from_slice(&s.process.reference_digest().to_le_bytes());
        }
    }
    Some(format!("fnv1a64:{:016x}", fnv1a64(&bytes)))
}

fn shape_record(s: &Shape) -> ShapeRecord {
    ShapeRecord {
        grid: s.grid,
        points: s.points,
        classes: s.classes,
        fits: s.fits,
        all_points: s.all_points,
        ensemble: s.ensemble,
    }
}

/// Encodes one accumulator exactly, naming its arrays as the loss lays them out.
pub fn encode_acc(plan: &Plan, acc: &Acc) -> AccRecord {
    let layout = plan.loss.layout(&acc.shape);
    let (mut fi, mut ci) = (0, 0);
    let mut floats = Vec::new();
    let mut counts = Vec::new();
    for a in layout {
        match a.kind {
            Kind::Float => {
                floats.push(FloatArray {
                    name: a.name.into(),
                    data: pack_floats(&acc.floats[fi]),
                });
                fi += 1;
            }
            Kind::Count => {
                counts.push(CountArray {
                    name: a.name.into(),
                    data: acc.counts[ci].clone(),
                });
                ci += 1;
            }
        }
    }
    AccRecord {
        shape: shape_record(&acc.shape),
        replicates: acc.replicates,
        count: (!acc.shape.all_points).then(|| acc.count.clone()),
        floats,
        counts,
    }
}

/// Decodes [`encode_acc`]'s record for model `i` of `plan` with `points` evaluation points,
/// checking the shape, every array's name and length, and the values (finite, non-negative
/// where the loss says so, counts consistent).
pub fn decode_acc(plan: &Plan, i: usize, points: usize, rec: &AccRecord) -> Result<Acc, String> {
    let shape = plan.shape(i, points);
    let want = shape_record(&shape);
    if rec.shape != want {
        let (a, b) = (&rec.shape, &want);
        let differs: Vec<String> = [
            ("grid", a.grid.to_string(), b.grid.to_string()),
            ("points", a.points.to_string(), b.points.to_string()),
            ("classes", a.classes.to_string(), b.classes.to_string()),
            ("fits", a.fits.to_string(), b.fits.to_string()),
            (
                "all_points",
                a.all_points.to_string(),
                b.all_points.to_string(),
            ),
            ("ensemble", a.ensemble.to_string(), b.ensemble.to_string()),
        ]
        .into_iter()
        .filter(|(_, x, y)| x != y)
        .map(|(k, x, y)| format!("{k} {x} where the scenario has {y}"))
        .collect();
        return Err(format!(
            "accumulator shape does not match the scenario's: {}",
            differs.join(", ")
        ));
    }
    let layout = plan.loss.layout(&shape);
    let (mut fi, mut ci) = (0, 0);
    let mut floats = Vec::new();
    let mut counts = Vec::new();
    for a in &layout {
        match a.kind {
            Kind::Float => {
                let f = rec
                    .floats
                    .get(fi)
                    .ok_or_else(|| format!("array `{}` is missing", a.name))?;
                if f.name != a.name {
                    return Err(format!(
                        "array `{}` where `{}` was expected",
                        f.name, a.name
                    ));
                }
                floats.push(unpack_floats(&f.data, a.len).map_err(|e| format!("{}: {e}", a.name))?);
                fi += 1;
            }
            Kind::Count => {
                let c = rec
                    .counts
                    .get(ci)
                    .ok_or_else(|| format!("array `{}` is missing", a.name))?;
                if c.name != a.name {
                    return Err(format!(
                        "array `{}` where `{}` was expected",
                        c.name, a.name
                    ));
                }
                counts.push(c.data.clone());
                ci += 1;
            }
        }
    }
    if fi != rec.floats.len() || ci != rec.counts.len() {
        return Err("more arrays than the loss defines".into());
    }
    let count = match (&rec.count, shape.all_points) {
        (None, true) => vec![rec.replicates; points],
        (Some(c), false) => c.clone(),
        (None, false) => return Err("per-point counts are missing".into()),
        (Some(_), true) => return Err("per-point counts where none belong".into()),
    };
    let acc = Acc {
        shape,
        replicates: rec.replicates,
        count,
        floats,
        counts,
    };
    acc.validate(plan.loss)?;
    plan.loss.validate(&acc)?;
    Ok(acc)
}

/// Encodes block `b` exactly.
pub fn encode_block(plan: &Plan, b: u64, block: &BlockResult) -> BlockRecord {
    let (first_replicate, end_replicate) = plan.block_range(b);
    BlockRecord {
        block: b,
        first_replicate,
        end_replicate,
        models: block.accs.iter().map(|a| encode_acc(plan, a)).collect(),
        audit: block.audit.as_ref().map(|a| a.counts.clone()),
        held_share: block.held_share.map(|(s, s2)| pack_floats(&[s, s2])),
    }
}

/// Decodes a block record and checks it against block `rec.block` of `plan` (with `points`
/// evaluation points).
pub fn decode_block(plan: &Plan, points: usize, rec: &BlockRecord) -> Result<BlockResult, String> {
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
    if rec.models.len() != plan.cells() {
        return Err(format!(
            "{} accumulators, the scenario has {} (training sizes × models)",
            rec.models.len(),
            plan.cells()
        ));
    }
    let mut accs = Vec::with_capacity(rec.models.len());
    for (c, m) in rec.models.iter().enumerate() {
        // Cells are ordered sizes outer, models inner (`Plan::cell`).
        let acc = decode_acc(plan, c % plan.models.len(), points, m)?;
        if acc.replicates != r1 - r0 {
            return Err(format!(
                "{} replicates, the block has {}",
                acc.replicates,
                r1 - r0
            ));
        }
        accs.push(acc);
    }
    let candidates: usize = plan.models.iter().map(|m| m.grid.len()).sum();
    let audit = match (&plan.audit, &rec.audit) {
        (None, None) => None,
        (Some(_), Some(counts)) => {
            if counts.len() != candidates || counts.iter().sum::<u64>() != r1 - r0 {
                return Err(format!(
                    "audit counts must be {candidates} values adding up to {}",
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
    let is_table = matches!(plan.source, Source::Table(_));
    let held_share = match (&rec.held_share, is_table) {
        (Some(h), true) => {
            let v = unpack_floats(h, 2).map_err(|e| format!("held_share: {e}"))?;
            if !v.iter().all(|x| x.is_finite() && *x >= 0.0) {
                return Err("held_share: not two finite non-negative numbers".into());
            }
            Some((v[0], v[1]))
        }
        (None, false) => None,
        (None, true) => return Err("the held-out share of a table block is missing".into()),
        (Some(_), false) => return Err("a held-out share, but the scenario is not a table".into()),
    };
    Ok(BlockResult {
        accs,
        audit,
        held_share,
    })
}

/// The part document of `blocks` (a shard's or a checkpoint's), with its checksum.
pub fn part_doc(
    plan: &Plan,
    source: &ScenarioSource,
    fingerprint: &str,
    shard: Option<ShardSpec>,
    checkpoint: bool,
    blocks: &BTreeMap<u64, BlockResult>,
) -> PartDoc {
    let mut doc = PartDoc {
        format: PART_FORMAT.into(),
        version: VERSION.into(),
        fingerprint: fingerprint.into(),
        checkpoint,
        shard: shard.map(|s| s.as_ref()),
        name: plan.name.clone(),
        families: plan.models.iter().map(|m| m.family.name().into()).collect(),
        grids: plan
            .models
            .iter()
            .map(|m| {
                m.grid
                    .iter()
                    .map(|v| format!("{:016x}", v.to_bits()))
                    .collect()
            })
            .collect(),
        loss: plan.loss.name().into(),
        seed: plan.seed,
        replicates: plan.replicates,
        blocks: plan.blocks,
        eval_seed: plan.eval_seed_explicit.then_some(plan.eval_seed),
        scenario_file: source.file.clone(),
        scenario_text: source.text.clone(),
        scenario_path: std::fs::canonicalize(&source.file)
            .ok()
            .and_then(|p| p.to_str().map(str::to_string)),
        completed: blocks
            .iter()
            .map(|(&b, block)| encode_block(plan, b, block))
            .collect(),
        checksum: String::new(),
    };
    doc.checksum = checksum(&doc);
    doc
}

/// The checksum of a part document: FNV-1a of its compact JSON with `checksum` empty.
pub fn checksum(doc: &PartDoc) -> String {
    // Streamed into the hash with the checksum field empty: no copy of the document and no
    // text of it are held (a checkpoint of 400 MB was cloned and written out twice per block).
    struct Fnv(u64);
    impl std::io::Write for Fnv {
        fn write(&mut self, bytes: &[u8]) -> std::io::Result<usize> {
            for &b in bytes {
                self.0 ^= b as u64;
                self.0 = self.0.wrapping_mul(0x0000_0100_0000_01b3);
            }
            Ok(bytes.len())
        }
        fn flush(&mut self) -> std::io::Result<()> {
            Ok(())
        }
    }
    let mut h = Fnv(fnv1a64(&[]));
    if doc.checksum.is_empty() {
        serde_json::to_writer(&mut h, doc).expect("part types serialize");
    } else {
        let mut d = doc.clone();
        d.checksum.clear();
        serde_json::to_writer(&mut h, &d).expect("part types serialize");
    }
    format!("fnv1a64:{:016x}", h.0)
}

/// The JSON text of a part document (compact, newline-terminated).
pub fn part_json(doc: &PartDoc) -> String {
    let mut s = serde_json::to_string(doc).expect("part types serialize");
    s.push('\n');
    s
}

/// Reads a part document (shard part or checkpoint): refuses files larger than
/// [`MAX_PART_BYTES`] before reading, anything but format `lossprism-part/2` written by this
/// version, and a document whose checksum does not match its content.
pub fn read_part(path: &Path) -> Result<PartDoc, Error> {
    // Streamed checks first: the size, a JSON object at the start, then `format` and
    // `version` read without building the document; only a document that passes them is
    // decoded (into its typed form, never a generic tree).
    let text = crate::codec::read_document(
        path,
        MAX_PART_BYTES,
        "lossprism part document",
        &crate::codec::json_object,
    )?;
    let head = match crate::codec::JsonHead::of(&text) {
        Ok(h) => h,
        Err(e) => {
            return Err(Error::Usage(format!(
                "{}: not a lossprism part document ({e})",
                path.display()
            )))
        }
    };
    match head.format() {
        Some(PART_FORMAT) => {}
        Some("lossprism-part/1") => {
            return Err(Error::Usage(format!(
                "{}: format `lossprism-part/1` was written by an earlier lossprism; rerun the shard or checkpoint with this version",
                path.display()
            )))
        }
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
    match head.version() {
        Some(VERSION) => {}
        Some(other) => {
            return Err(Error::Usage(format!(
                "{}: written by lossprism {other}, this is {VERSION}; parts and checkpoints are exact only within one version: rerun them",
                path.display()
            )))
        }
        None => {
            return Err(Error::Usage(format!(
                "{}: malformed {PART_FORMAT} document: no `version`",
                path.display()
            )))
        }
    }
    let mut doc: PartDoc = serde_json::from_str(&text).map_err(|e| {
        Error::Usage(format!(
            "{}: malformed {PART_FORMAT} document: {e}",
            path.display()
        ))
    })?;
    let claimed = std::mem::take(&mut doc.checksum);
    let matches = checksum(&doc) == claimed;
    doc.checksum = claimed;
    if !matches {
        return Err(Error::Usage(format!(
            "{}: the checksum does not match the content: the file was edited or damaged; rerun this shard, or delete the checkpoint",
            path.display()
        )));
    }
    // The checksum covers the fields lossprism reads; the text must be exactly what it wrote,
    // so an added field or a reformatted file is refused too.
    if part_json(&doc).trim_end() != text.trim_end() {
        return Err(Error::Usage(format!(
            "{}: the file was edited (its text is not the document lossprism wrote: an added \
             field or another layout); rerun this shard, or delete the checkpoint",
            path.display()
        )));
    }
    Ok(doc)
}

/// Says in a few words how two part documents' runs differ (empty when they do not).
pub fn difference(a: &PartDoc, b: &PartDoc) -> String {
    if a.name != b.name {
        format!("scenario `{}` vs `{}`", a.name, b.name)
    } else if a.families != b.families {
        format!(
            "families {} vs {}",
            a.families.join(", "),
            b.families.join(", ")
        )
    } else if a.loss != b.loss {
        format!("loss {} vs {}", a.loss, b.loss)
    } else if a.grids != b.grids {
        grids_difference(&a.grids, &b.grids)
    } else if a.seed != b.seed {
        format!("seed {} vs {}", a.seed, b.seed)
    } else if a.eval_seed != b.eval_seed {
        let w = |e: Option<u64>| e.map_or_else(|| "from the seed".to_string(), |v| v.to_string());
        format!("eval_seed {} vs {}", w(a.eval_seed), w(b.eval_seed))
    } else if a.replicates != b.replicates {
        format!("replicates {} vs {}", a.replicates, b.replicates)
    } else if a.blocks != b.blocks {
        format!("blocks {} vs {}", a.blocks, b.blocks)
    } else if a.version != b.version {
        format!("lossprism version {} vs {}", a.version, b.version)
    } else if a.scenario_text != b.scenario_text {
        "scenario settings (the grid or other keys) differ".into()
    } else if without_scripts(&a.fingerprint) == without_scripts(&b.fingerprint) {
        "an external estimator's script differs between them (its content)".into()
    } else if a.fingerprint != b.fingerprint {
        format!(
            "the data the scenario reads differ: a table, a twin's table or an external \
             estimator's files changed (fingerprint {} vs {})",
            a.fingerprint, b.fingerprint
        )
    } else {
        String::new()
    }
}

/// How two runs' grids differ, briefly: the whole grids when both are short, else the first
/// model whose grid differs, its sizes or its first differing value (a 10 000-value grid
/// printed whole made a 157 535-character message).
fn grids_difference(a: &[Vec<String>], b: &[Vec<String>]) -> String {
    const SHORT: usize = 12;
    let total = |g: &[Vec<String>]| g.iter().map(Vec::len).sum::<usize>();
    if total(a) <= SHORT && total(b) <= SHORT {
        let words = |g: &[Vec<String>]| {
            g.iter()
                .map(|grid| grid_words(grid))
                .collect::<Vec<_>>()
                .join(" and ")
        };
        return format!("grid {} vs {}", words(a), words(b));
    }
    if a.len() != b.len() {
        return format!("{} model grids vs {}", a.len(), b.len());
    }
    for (i, (ga, gb)) in a.iter().zip(b).enumerate() {
        if ga.len() != gb.len() {
            return format!("model {} grid: {} values vs {}", i + 1, ga.len(), gb.len());
        }
        if let Some(k) = (0..ga.len()).find(|&k| ga[k] != gb[k]) {
            let v = |h: &String| grid_words(std::slice::from_ref(h));
            return format!(
                "model {} grid: value {} is {} vs {}",
                i + 1,
                k + 1,
                v(&ga[k]),
                v(&gb[k])
            );
        }
    }
    String::new()
}

fn grid_words(hex: &[String]) -> String {
    let vals: Vec<String> = hex
        .iter()
        .map(|h| {
            u64::from_str_radix(h, 16)
                .map(|b| crate::fmt::fmt_value(f64::from_bits(b)))
                .unwrap_or_else(|_| h.clone())
        })
        .collect();
    format!("[{}]", vals.join(", "))
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
    pub blocks: BTreeMap<u64, BlockResult>,
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
) -> Result<Option<BTreeMap<u64, BlockResult>>, Error> {
    // An empty file holds nothing to resume or to lose (as for `--out`): the run starts afresh
    // and the checkpoint replaces it.
    if !path.exists() || crate::output::is_empty_file(path) {
        return Ok(None);
    }
    let shown = path.display();
    let fix = "delete it or choose another file";
    // A file that is not a checkpoint (a result, a part, a user's file) is never to be deleted
    // on lossprism's word.
    let other = "it is not a checkpoint, so lossprism leaves it alone: choose another file";
    let doc = read_part(path).map_err(|e| {
        // The damaged-checksum message already says what to do.
        let e = e.to_string();
        if e.contains("delete the checkpoint") {
            Error::Usage(format!("checkpoint {e}"))
        } else {
            Error::Usage(format!("checkpoint {e}; {other}"))
        }
    })?;
    if !doc.checkpoint {
        return Err(Error::Usage(format!(
            "checkpoint {shown} is a finished shard part; {other}"
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
            "checkpoint {shown} belongs to another run: the scenario, seed, data table or an external estimator's files differ{what}; {fix}"
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
    blocks: BTreeMap<u64, BlockResult>,
    new_blocks: u64,
    /// When the last checkpoint write ended and how long it took.
    last_write: Option<(std::time::Instant, std::time::Duration)>,
    /// Blocks finished since the last checkpoint write.
    unsaved: bool,
}

/// A checkpoint is rewritten after a block only when at least this many times its last write's
/// duration has passed since that write ended, so rewriting costs at most about a fifth of the
/// run however large the checkpoint grows (every block was rewritten whole after every block:
/// 7× the run's time and 6× its memory on a 400 MB checkpoint, a hostile-input sweep). Small
/// checkpoints are still written after every block; every stop (the end, an interrupt,
/// `--stop-after-blocks`, a refused block) writes what is unsaved.
const CHECKPOINT_SPACING: u32 = 4;

/// Writes the checkpoint of `blocks` to `path`, recording when and how long.
fn save_checkpoint(job: &Job<'_>, fp: &str, path: &Path, st: &mut Progress) -> Result<(), Error> {
    let start = std::time::Instant::now();
    let text = {
        let doc = part_doc(job.plan, job.source, fp, job.shard, true, &st.blocks);
        part_json(&doc)
    };
    crate::output::write_one(
        crate::output::CHECKPOINT_OUTPUT,
        path,
        &[],
        text.into_bytes(),
    )?;
    st.last_write = Some((std::time::Instant::now(), start.elapsed()));
    st.unsaved = false;
    Ok(())
}

/// Runs a job: resumes from the checkpoint if it exists and matches, computes the missing blocks
/// of the job through the engine's scheduler ([`runner::schedule`]), and rewrites the checkpoint
/// atomically as blocks finish ([`CHECKPOINT_SPACING`]) and when the run stops. Every source
/// (synthetic, twin, table) runs this way.
pub fn execute(job: &Job<'_>) -> Result<Finish, Error> {
    let plan = job.plan;
    let fp = fingerprint(plan, &job.source.text)?;
    let wanted = job_blocks(plan, job.shard)?;
    let prepared = runner::prepare_to_fit(plan)?;
    let points = prepared.points();
    if let Some(path) = job.checkpoint {
        crate::output::remove_stale_staging(path);
    }
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
        last_write: None,
        unsaved: false,
    });
    let sink = |b: u64, block: &BlockResult| -> Result<bool, Error> {
        if job.checkpoint.is_some() || job.shard.is_some() {
            runner::check_block(plan, &prepared, b, block)?;
        }
        let mut st = state.lock().unwrap_or_else(|e| e.into_inner());
        st.blocks.insert(b, block.clone());
        st.new_blocks += 1;
        if let Some(path) = job.checkpoint {
            st.unsaved = true;
            let due = st.last_write.map_or(true, |(end, cost)| {
                end.elapsed() >= cost * CHECKPOINT_SPACING
            });
            if due {
                save_checkpoint(job, &fp, path, &mut st)?;
            }
        }
        Ok(job.stop_after_blocks != Some(st.new_blocks))
    };
    let scheduled = runner::schedule(plan, &prepared, &todo, job.threads, job.watch, &sink);
    let mut st = state.into_inner().unwrap_or_else(|e| e.into_inner());
    if let (Some(path), true) = (job.checkpoint, st.unsaved) {
        // Whatever stopped the run, the finished blocks are kept; the run's own error, if any,
        // is the one reported.
        let saved = save_checkpoint(job, &fp, path, &mut st);
        if scheduled.is_ok() {
            saved?;
        }
    }
    let interrupted = scheduled?.interrupted;
    let remaining = (wanted.end - wanted.start) - st.blocks.len() as u64;
    if remaining > 0 {
        return Ok(Finish::Stopped {
            new_blocks: st.new_blocks,
            remaining,
            interrupted,
        });
    }
    Ok(Finish::Done(Box::new(Completed {
        prepared,
        blocks: st.blocks,
        fingerprint: fp,
        resumed,
    })))
}

/// Folds completed blocks (all of the plan's, in index order) into the run's outcome, on
/// `threads` workers (0 = one per core; the result does not depend on it).
pub fn outcome(plan: &Plan, done: Completed, threads: usize) -> Result<Outcome, Error> {
    runner::summarize(plan, done.prepared, &done.blocks, threads)
}

/// A merged run: the plan rebuilt from the parts' embedded scenario and its outcome.
#[derive(Debug, Clone)]
pub struct Merged {
    /// The plan.
    pub plan: Plan,
    /// The outcome, identical to the unsharded run's.
    pub outcome: Outcome,
    /// Every place a part's scenario file may be, none of which `merge` may replace: each
    /// part's recorded path as given (relative to the folder `merge` runs in) and relative to
    /// the part's own folder (the shards ran there, most likely), and any shorter tail of it,
    /// beside the part or relative to the merge's folder, whose file holds the scenario's very
    /// text. Parts of one run may name the scenario differently (a copy, another spelling), and
    /// only the first part's, relative to the merge's folder, was protected.
    pub scenario_files: Vec<PathBuf>,
}

/// Merges shard parts into the run's outcome. Refuses (with a one-line [`Error::Usage`] naming the
/// files) parts of different runs, of different shard counts, duplicated parts, and missing or
/// duplicated blocks; checkpoints are refused too.
pub fn merge(paths: &[PathBuf], memory_limit: Option<u64>) -> Result<Merged, Error> {
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
            (false, Some(s)) if s.index == 0 || s.index > s.count => {
                return Err(refuse(format!(
                    "{} claims to be shard {}/{}, which no run writes (I/N needs 1 <= I <= N)",
                    name(i),
                    s.index,
                    s.count
                )))
            }
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
        eval_seed: first.eval_seed,
        memory_limit,
    };
    let plan = source.plan(&opts).map_err(|e| {
        // The scenario's files are read again, relative to where the shards ran.
        let text = e.to_string();
        let hint = if text.contains("cannot read") {
            format!(
                " (its files are read relative to {}, the scenario's folder as the shards \
                 recorded it: run `merge` from the folder the shards ran in)",
                if source.base.as_os_str().is_empty() {
                    "the current folder".to_string()
                } else {
                    source.base.display().to_string()
                }
            )
        } else {
            String::new()
        };
        refuse(format!(
            "{}: its embedded scenario does not plan: {text}{hint}",
            name(0)
        ))
    })?;
    // The scripts need not be here: the parts agree on them (compared above).
    let fp = fingerprint(&plan, &source.text)?;
    if without_scripts(&fp) != without_scripts(&first.fingerprint) || plan.blocks != first.blocks {
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
    // Every other part's embedded scenario must plan to the fingerprint it carries too (sweep
    // 69: a part whose `scenario_text` was edited merged when it was not the first). A text
    // equal to the first's was checked above; one that differs (a comment edited between
    // shards, say) is planned on its own.
    for (i, d) in docs.iter().enumerate().skip(1) {
        if d.scenario_text == first.scenario_text {
            continue;
        }
        let other = ScenarioSource {
            file: d.scenario_file.clone(),
            text: d.scenario_text.clone(),
            base: source.base.clone(),
        };
        let same = other
            .plan(&opts)
            .ok()
            .and_then(|p| fingerprint(&p, &other.text).ok())
            .is_some_and(|f| without_scripts(&f) == without_scripts(&d.fingerprint));
        if !same {
            return Err(refuse(format!(
                "{}: fingerprint does not match its embedded scenario (the part was edited, or its \
                 scenario's data file changed since the shards ran)",
                name(i)
            )));
        }
    }
    if count > plan.blocks {
        return Err(refuse(format!(
            "{} claims {count} shards but the run has only {} blocks",
            name(0),
            plan.blocks
        )));
    }

    // A part's embedded scenario may ask for more than this machine holds: checked before the
    // evaluation points and the blocks are built (merging holds those and fits nothing).
    runner::memory::check_merge(&plan, memory_limit)?;
    let prepared = runner::prepare(&plan)?;
    let points = prepared.points();
    let mut blocks: BTreeMap<u64, BlockResult> = BTreeMap::new();
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
            "block {b} of blocks 0..{} (replicates {r0}..{r1}; blocks and replicates count \
             from 0, shards from 1) is missing: {why}",
            plan.blocks
        )));
    }
    let outcome = outcome(
        &plan,
        Completed {
            prepared,
            blocks,
            fingerprint: first.fingerprint.clone(),
            resumed: 0,
        },
        1,
    )?;
    let mut scenario_files: Vec<PathBuf> = Vec::new();
    for (d, p) in docs.iter().zip(paths) {
        let recorded = PathBuf::from(&d.scenario_file);
        let dir = p.parent().map(Path::to_path_buf).unwrap_or_default();
        let beside = dir.join(&recorded);
        // Parts run from a parent folder (`run ex/s.toml`) and merged inside `ex`: the recorded
        // path leads nowhere from there, but a shorter tail of it, beside the part or here,
        // holds the scenario's very text.
        let comps: Vec<_> = recorded.components().collect();
        // A regular file of the text's very length is read, nothing else (a FIFO would block,
        // a huge file would be read whole).
        let holds_text = |f: &PathBuf| {
            std::fs::metadata(f)
                .is_ok_and(|m| m.is_file() && m.len() == d.scenario_text.len() as u64)
                && std::fs::read_to_string(f).is_ok_and(|t| t == d.scenario_text)
        };
        let tails = (1..comps.len())
            .map(|i| comps[i..].iter().collect::<PathBuf>())
            .flat_map(|t| [dir.join(&t), t]);
        // The absolute path the part recorded, when it still holds the scenario's text.
        let absolute = d.scenario_path.as_ref().map(PathBuf::from);
        let found: Vec<PathBuf> = tails.chain(absolute).filter(holds_text).collect();
        for f in [recorded, beside].into_iter().chain(found) {
            if !scenario_files.contains(&f) {
                scenario_files.push(f);
            }
        }
    }
    Ok(Merged {
        plan,
        outcome,
        scenario_files,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

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
}
