//! A run's peak memory, estimated from its sizes before anything is allocated, and the check
//! against the memory the machine has available.
//!
//! The estimate adds up, in bytes:
//! - **accumulators**: every block's accumulators of every model (kept to the end for the
//!   jackknife), plus the block-sized accumulators the summary folds: the running prefix and
//!   total, and per worker thread one leave-one-block-out fold and its per-point terms (counted
//!   as two more accumulators);
//! - **evaluation inputs**: the evaluation points (`m × p`) with the truth, noise level and class
//!   probabilities there, a fixed design, and for a table its rows three times (the table, the
//!   working rows, the evaluation points);
//! - **training sets**: per worker thread, one replicate's training set (`n × p` and its
//!   responses) and, for a table, the evaluated rows;
//! - **predictions**: per worker thread, one replicate's prediction buffers (fits × grid × m,
//!   times the classes when the loss needs probabilities);
//! - **fit work**: per worker thread, what the family's path fit holds
//!   ([`crate::family::Family::work_bytes`]), the largest over the models.
//!
//! The check refuses a run whose estimate exceeds the available memory (`MemAvailable` of
//! `/proc/meminfo`, lowered by a cgroup limit when one is set), naming the estimate, its largest
//! term and the override flag; a machine whose memory cannot be read is not checked.

use crate::error::Error;
pub use crate::fmt::fmt_bytes;
use crate::scenario::{Design, Plan, Source};

/// Bytes the program itself needs besides the run (code, thread stacks, buffers).
const BASE_BYTES: f64 = 32.0 * 1024.0 * 1024.0;

/// One term of the estimate.
#[derive(Debug, Clone, PartialEq)]
pub struct Term {
    /// Short name (`accumulators`, `training sets`, ...).
    pub name: &'static str,
    /// How it is counted, in words (`2 threads × 10000 rows × 100000 inputs`).
    pub detail: String,
    /// Bytes.
    pub bytes: f64,
}

/// A run's estimated peak memory.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    /// The terms, in a fixed order.
    pub terms: Vec<Term>,
    /// Worker threads counted.
    pub workers: usize,
}

impl Estimate {
    /// Total bytes (the terms and the program itself).
    pub fn total(&self) -> f64 {
        BASE_BYTES + self.terms.iter().map(|t| t.bytes).sum::<f64>()
    }

    /// The largest term.
    pub fn main(&self) -> &Term {
        self.terms
            .iter()
            .fold(&self.terms[0], |a, t| if t.bytes > a.bytes { t } else { a })
    }

    /// The largest part in words: the run's largest term, or the program itself when that is
    /// larger (a small run; the term was named as the largest while 32 MiB went unnamed).
    pub fn largest(&self) -> String {
        let m = self.main();
        let term = format!("{} {} ({})", m.name, fmt_bytes(m.bytes), m.detail);
        if BASE_BYTES > m.bytes {
            format!(
                "the program itself, {} (code, thread stacks, buffers); the run's largest term is {term}",
                fmt_bytes(BASE_BYTES)
            )
        } else {
            term
        }
    }

    /// One line: the total and its largest part.
    pub fn describe(&self) -> String {
        format!(
            "about {} (largest part: {})",
            fmt_bytes(self.total()),
            self.largest()
        )
    }
}

/// Parses a memory size: bytes (`1000000`) or with a unit `K`, `M`, `G`, `T` (powers of 1024,
/// an optional `iB`/`B` after it): `512M`, `16G`, `1.5GiB`.
pub fn parse_size(s: &str) -> Result<u64, String> {
    let t = s.trim();
    let upper = t.to_ascii_uppercase();
    let stripped = upper
        .strip_suffix("IB")
        .or_else(|| upper.strip_suffix('B'))
        .or_else(|| upper.strip_suffix('I'))
        .unwrap_or(&upper);
    let (num, scale) = match stripped.chars().last() {
        Some('K') => (&stripped[..stripped.len() - 1], 1024f64),
        Some('M') => (&stripped[..stripped.len() - 1], 1024f64.powi(2)),
        Some('G') => (&stripped[..stripped.len() - 1], 1024f64.powi(3)),
        Some('T') => (&stripped[..stripped.len() - 1], 1024f64.powi(4)),
        _ => (stripped, 1.0),
    };
    match num.trim().parse::<f64>() {
        // At least one byte: `0.5` or `1e-300K` would hold a run to 0 bytes.
        Ok(v) if v.is_finite() && v * scale >= 1.0 && v * scale < 1.8e19 => Ok((v * scale) as u64),
        // A number, but no size a run could be held to (it was called "not a memory size").
        Ok(v) if v.is_finite() && v * scale >= 1.8e19 => Err(format!(
            "`{s}` is beyond any memory (at most 16 EiB); write a size such as `16G`"
        )),
        Ok(v) if v.is_finite() => Err(format!(
            "`{s}` is less than one byte; write bytes or a number with K, M, G or T (`512M`, `16G`)"
        )),
        _ => Err(format!(
            "`{s}` is not a memory size; write bytes or a number with K, M, G or T (`512M`, `16G`)"
        )),
    }
}

/// Worker threads a run uses: `threads` (0 = one per core), never more than the blocks.
pub fn workers(plan: &Plan, threads: usize) -> usize {
    let t = if threads == 0 {
        std::thread::available_parallelism().map_or(1, |n| n.get())
    } else {
        threads
    };
    (t as u64).min(plan.blocks.max(1)) as usize
}

/// Estimates the peak memory of running `plan` on `threads` worker threads (0 = one per core).
pub fn estimate(plan: &Plan, threads: usize) -> Estimate {
    let w = workers(plan, threads);
    let wf = w as f64;
    let n = plan.train_size() as f64;
    let p = plan.n_inputs() as f64;
    let k = plan.task.classes() as f64;
    let mut terms = Vec::new();

    let acc = plan.accumulator_bytes();
    let per_block = acc / plan.blocks.max(1) as f64;
    terms.push(Term {
        name: "accumulators",
        // A study keeps every training size's accumulators (the sizes were missing from the
        // product, which then did not give the bytes shown).
        detail: format!(
            "{} blocks × {} grid values{} × {} evaluation points, kept for the jackknife",
            plan.blocks,
            plan.models.iter().map(|m| m.grid.len()).sum::<usize>(),
            if plan.sizes.len() > 1 {
                format!(" × {} training sizes", plan.sizes.len())
            } else {
                String::new()
            },
            plan.eval_size()
        ),
        bytes: acc + (3.0 + 2.0 * wf) * per_block,
    });

    // A twin's fitted reference lives for the whole run (its forest's trees can be the largest
    // part: 10 000 trees on 3 000 rows took 937 MB against an estimate of 33 MiB).
    if let Source::Synthetic(s) = &plan.source {
        if let (Some(r), Some(rows)) = (s.process.reference(), s.process.empirical_rows()) {
            terms.push(Term {
                name: "twin reference",
                detail: format!("its recipe fitted on the table's {} rows", rows.nrows()),
                bytes: crate::dgp::reference::fitted_bytes(
                    &r.choice,
                    rows.nrows(),
                    rows.ncols(),
                    r.classes,
                ),
            });
        }
    }

    let (m, eval, train_extra) = match &plan.source {
        Source::Synthetic(s) => {
            let m = s.eval_size as f64;
            let mut b = 8.0 * m * (p + 3.0 + k);
            if s.design == Design::Fixed {
                b += 8.0 * n * (p + 2.0 + k);
            }
            (m, b, 0.0)
        }
        Source::Table(t) => {
            let rows = t.table.x.nrows() as f64;
            let cols = t.table.x.ncols() as f64;
            // The table, its working rows and the evaluation points; a replicate's evaluated
            // rows are at most all of them.
            (
                rows,
                3.0 * 8.0 * rows * (cols + 2.0),
                8.0 * rows * (cols + 2.0),
            )
        }
    };
    terms.push(Term {
        name: "evaluation inputs",
        detail: format!("{m} points × {p} inputs"),
        bytes: eval,
    });
    terms.push(Term {
        name: "training sets",
        detail: format!("{} × {n} rows × {p} inputs", threads_word(w)),
        bytes: wf * (8.0 * n * (p + 4.0) + train_extra),
    });
    let probs = if plan.loss.needs_probs() { k } else { 0.0 };
    let predictions: f64 = plan
        .models
        .iter()
        .map(|mp| {
            let ens = if mp.family.caps(plan.task).ensemble {
                1.0
            } else {
                0.0
            };
            8.0 * mp.fit_seeds as f64 * mp.grid.len() as f64 * m * (1.0 + probs + ens)
        })
        .fold(0.0, f64::max);
    terms.push(Term {
        name: "predictions",
        detail: format!("{} × fits × grid values × {m} points", threads_word(w)),
        bytes: wf * predictions,
    });
    // Every point's terms at once (points × grid values × terms): once for the report's spread
    // over evaluation points (`decompose::point_spread`); with a known truth and several blocks,
    // also the per-point noise of the standard errors (`decompose::PointNoise`, a mean and a
    // sum of squares) and one leave-one-block-out fold's terms per worker while the folds are
    // summarized (`decompose::summarize_par`). Measured with heaptrack on 3-class 0-1 loss:
    // these, not the accumulators, were the peak (a sweep found 930 MB against 262 MiB
    // estimated).
    let observed = matches!(plan.source, Source::Table(_));
    let point_noise = !observed && plan.blocks >= 2;
    let copies = if point_noise { 2.0 + wf } else { 1.0 };
    let per_point: f64 = (0..plan.models.len())
        .map(|i| {
            let sh = plan.shape(i, m as usize);
            8.0 * m * sh.grid as f64 * plan.loss.describe(&sh, observed).len() as f64
        })
        .fold(0.0, f64::max);
    terms.push(Term {
        name: "per-point terms",
        detail: format!(
            "{copies} × {m} points × grid values × the loss's terms, for their spread and noise"
        ),
        bytes: copies * per_point,
    });
    let work = plan
        .models
        .iter()
        .map(|mp| {
            mp.family.work_bytes(
                plan.train_size(),
                plan.n_inputs(),
                m as usize,
                &mp.grid,
                plan.task,
            )
        })
        .fold(0.0, f64::max);
    terms.push(Term {
        name: "fit work",
        detail: format!(
            "{} × the {} family's path fit on {n} rows × {p} inputs",
            threads_word(w),
            plan.model().family.name()
        ),
        bytes: wf * work,
    });
    Estimate { terms, workers: w }
}

/// Refuses `plan` on `threads` workers when its estimate exceeds `limit` bytes (the
/// `--memory-limit` override), else the available memory; returns the estimate and the
/// limit it was held to (`None`: the machine's memory is unknown, nothing was checked).
pub fn check(
    plan: &Plan,
    threads: usize,
    limit: Option<u64>,
) -> Result<(Estimate, Option<u64>), Error> {
    check_writing(plan, threads, limit, 0)
}

/// Bytes held, per byte of the accumulators it covers, while a checkpoint or shard part is
/// written: the finished blocks kept for it, their encoding in the document and the document's
/// text. Measured with `/usr/bin/time` (peak resident size) on k-NN, 32 blocks × 200 grid
/// values × 3000 points (294 MiB of accumulators): 1.44 GB with a checkpoint against 0.44 GB
/// without, 3.4 times the accumulators; 4 leaves a margin.
const DOCUMENT_FACTOR: f64 = 4.0;

/// [`check`] for a run that writes a checkpoint or a shard part holding `document_blocks` of
/// the plan's blocks (0: neither): their document is counted too (it was not, and such a run
/// passed the check and then aborted on an allocation).
pub fn check_writing(
    plan: &Plan,
    threads: usize,
    limit: Option<u64>,
    document_blocks: u64,
) -> Result<(Estimate, Option<u64>), Error> {
    let mut e = estimate(plan, threads);
    if document_blocks > 0 {
        let share = document_blocks as f64 / plan.blocks.max(1) as f64;
        e.terms.push(Term {
            name: "checkpoint or part document",
            detail: format!(
                "{document_blocks} blocks' accumulators encoded in the file written as the run goes"
            ),
            bytes: DOCUMENT_FACTOR * share * plan.accumulator_bytes(),
        });
    }
    held_to(
        plan,
        e,
        limit,
        "the run",
        "fewer rows, inputs, evaluation points, grid values, blocks or --threads",
    )
}

/// [`check`] against the available memory for a run another command makes (`twin`'s fidelity
/// check), named `what` in the refusal, which suggests `lower`.
pub fn check_as(
    plan: &Plan,
    threads: usize,
    what: &str,
    lower: &str,
) -> Result<(Estimate, Option<u64>), Error> {
    refuse_above(plan, estimate(plan, threads), None, what, lower, false)
}

/// The estimate of merging the parts of `plan`'s run: what a merge holds is every block's
/// accumulators, the evaluation points and, as it summarizes, every point's terms; it fits
/// nothing, so it has no training sets, predictions or fit work.
pub fn merge_estimate(plan: &Plan) -> Estimate {
    let mut e = estimate(plan, 1);
    e.terms.retain(|t| {
        t.name == "accumulators" || t.name == "evaluation inputs" || t.name == "per-point terms"
    });
    e
}

/// Refuses merging the parts of `plan`'s run when [`merge_estimate`] exceeds `limit` bytes
/// (`merge --memory-limit`), else the available memory.
pub fn check_merge(plan: &Plan, limit: Option<u64>) -> Result<(Estimate, Option<u64>), Error> {
    held_to(
        plan,
        merge_estimate(plan),
        limit,
        "merging its parts",
        "fewer evaluation points, grid values or blocks in the scenario",
    )
}

/// Refuses estimate `e` of `what` (for `plan`) above `limit`, else the available memory;
/// `lower` says what to lower.
fn held_to(
    plan: &Plan,
    e: Estimate,
    limit: Option<u64>,
    what: &str,
    lower: &str,
) -> Result<(Estimate, Option<u64>), Error> {
    refuse_above(plan, e, limit, what, lower, true)
}

/// [`held_to`], with the advice to pass `--memory-limit` only when the command has the option
/// (`go_ahead`).
fn refuse_above(
    plan: &Plan,
    e: Estimate,
    limit: Option<u64>,
    what: &str,
    lower: &str,
    go_ahead: bool,
) -> Result<(Estimate, Option<u64>), Error> {
    let (cap, whose) = match limit {
        Some(l) => (Some(l), "the --memory-limit"),
        None => (
            crate::codec::available_memory(),
            "the memory available on this machine",
        ),
    };
    if let Some(cap) = cap {
        if e.total() > cap as f64 {
            let advice = match (BASE_BYTES > e.main().bytes, go_ahead) {
                (true, true) => format!(
                    ": pass --memory-limit SIZE (e.g. --memory-limit {}) to go ahead anyway",
                    suggest(e.total())
                ),
                (false, true) => format!(
                    ": lower it ({lower}), or pass --memory-limit SIZE (e.g. --memory-limit {}) \
                     to go ahead anyway",
                    suggest(e.total())
                ),
                (_, false) => format!(": lower it ({lower})"),
            };
            return Err(Error::Usage(format!(
                "{}: {what} needs about {} of memory, more than {whose} ({}); the largest part \
                 is {}{advice}",
                plan.file,
                fmt_bytes(e.total()),
                fmt_bytes(cap as f64),
                e.largest(),
            )));
        }
    }
    Ok((e, cap))
}

/// `1 thread`, `2 threads`.
fn threads_word(w: usize) -> String {
    if w == 1 {
        "1 thread".into()
    } else {
        format!("{w} threads")
    }
}

/// A `--memory-limit` value a little above `bytes`, in whole GiB (or MiB below 1 GiB).
fn suggest(bytes: f64) -> String {
    let gib = bytes / 1024f64.powi(3);
    if gib >= 1.0 {
        format!("{}G", gib.ceil() as u64 + 1)
    } else {
        format!("{}M", (bytes / 1024f64.powi(2)).ceil() as u64 + 64)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sizes_parse() {
        assert_eq!(parse_size("1000").unwrap(), 1000);
        assert_eq!(parse_size("2K").unwrap(), 2048);
        assert_eq!(parse_size("512M").unwrap(), 512 << 20);
        assert_eq!(parse_size("16G").unwrap(), 16 << 30);
        assert_eq!(parse_size("1.5GiB").unwrap(), 3 << 29);
        assert_eq!(parse_size("1T").unwrap(), 1 << 40);
        assert_eq!(parse_size("16Gi").unwrap(), 16 << 30);
        for bad in ["", "-1G", "G", "lots", "1e30", "0", "nan"] {
            assert!(parse_size(bad).is_err(), "{bad}");
        }
        assert!(parse_size("1e30")
            .unwrap_err()
            .contains("beyond any memory"));
        assert!(parse_size("0.5")
            .unwrap_err()
            .contains("less than one byte"));
        assert!(parse_size("lots")
            .unwrap_err()
            .contains("not a memory size"));
    }

    #[test]
    fn bytes_format() {
        assert_eq!(fmt_bytes(10.0), "10 bytes");
        assert_eq!(fmt_bytes(2048.0), "2.0 KiB");
        assert_eq!(fmt_bytes(8e9), "7.5 GiB");
    }

    #[test]
    fn this_machine_reports_memory() {
        // Linux always has /proc/meminfo; elsewhere the check is skipped.
        if std::path::Path::new("/proc/meminfo").exists() {
            assert!(crate::codec::available_memory().is_some_and(|b| b > 0));
        }
    }
}
