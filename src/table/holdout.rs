//! The locked holdout: rows chosen once by their own seeded stream (`purpose::HOLDOUT`,
//! stratified by class when classifying), never touched by the decomposition, and assessed with
//! `lossprism run SCENARIO --assess VALUE`. Every assessment is counted in a ledger file
//! (`<scenario>.holdout-ledger.json`, beside the scenario) keyed by a hash of the holdout rows;
//! from the second assessment of the same rows the holdout loss is no longer an unbiased
//! estimate, and the caller is told so.

use std::path::{Path, PathBuf};

use ndarray::{Array2, Axis};
use rand::Rng;

use super::{Table, TablePlan};
use crate::error::Error;
use crate::family::{FitInput, Task};
use crate::runner::{purpose, stream};
use crate::scenario::{Plan, Source};

/// Identifier of the ledger format.
pub const LEDGER_FORMAT: &str = "lossprism-holdout-ledger/1";

/// Chooses `round(fraction · n)` holdout rows (per class, `round(fraction · n_c)`) with the
/// stream `(seed, HOLDOUT, 0)`; returns them sorted. `fraction = 0` gives none.
pub fn choose(table: &Table, fraction: f64, seed: u64) -> Vec<usize> {
    if fraction <= 0.0 {
        return Vec::new();
    }
    let mut rng = stream(seed, purpose::HOLDOUT, 0);
    let groups: Vec<Vec<usize>> = match table.task {
        Task::Regress => vec![(0..table.rows()).collect()],
        Task::Classify { classes } => (0..classes)
            .map(|c| {
                (0..table.rows())
                    .filter(|&i| table.y[i] as usize == c)
                    .collect()
            })
            .collect(),
    };
    let mut out = Vec::new();
    for mut g in groups {
        let take = (fraction * g.len() as f64).round() as usize;
        for j in 0..take.min(g.len()) {
            let k = rng.gen_range(j..g.len());
            g.swap(j, k);
        }
        out.extend_from_slice(&g[..take.min(g.len())]);
    }
    out.sort_unstable();
    out
}

/// FNV-1a hash (64 bits, hex) of the holdout: its row count, then each row's inputs and response
/// as IEEE bits. Changing any holdout value, or which rows are held out, changes it.
pub fn hash(table: &Table, rows: &[usize]) -> String {
    let mut h: u64 = 0xcbf29ce484222325;
    let mut eat = |v: u64| {
        for b in v.to_le_bytes() {
            h ^= b as u64;
            h = h.wrapping_mul(0x100000001b3);
        }
    };
    eat(rows.len() as u64);
    for &i in rows {
        for v in table.x.row(i) {
            eat(v.to_bits());
        }
        eat(table.y[i].to_bits());
    }
    format!("{h:016x}")
}

/// The ledger file of a scenario: `<folder>/<stem>.holdout-ledger.json`.
pub fn ledger_path(scenario: &Path) -> PathBuf {
    let stem = scenario
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "scenario".into());
    scenario.with_file_name(format!("{stem}.holdout-ledger.json"))
}

/// The result of one holdout assessment.
#[derive(Debug, Clone, PartialEq)]
pub struct Assessment {
    /// Knob value assessed.
    pub value: f64,
    /// Holdout loss (mean squared error, or misclassification rate).
    pub loss: f64,
    /// Its standard error over holdout rows (`sd/√n_h`).
    pub stderr: f64,
    /// Holdout rows.
    pub rows: usize,
    /// Training rows (every non-holdout row).
    pub train_rows: usize,
    /// Hash of the holdout rows.
    pub hash: String,
    /// Assessments of this holdout so far, this one included.
    pub count: u64,
    /// Values assessed so far, this one included.
    pub values: Vec<f64>,
    /// Set from the second assessment on.
    pub warning: Option<String>,
}

/// Fits the family at `value` on every non-holdout row, reports the holdout loss, and records
/// the assessment in the ledger at `ledger`.
pub fn assess(plan: &Plan, value: f64, ledger: &Path) -> Result<Assessment, Error> {
    let tp: &TablePlan = match &plan.source {
        Source::Table(t) => t,
        _ => {
            return Err(Error::Usage(
                "--assess needs a table scenario (source = \"table\") with a holdout".into(),
            ))
        }
    };
    if tp.holdout.is_empty() {
        return Err(Error::Usage(format!(
            "{}: --assess needs a locked holdout; add `holdout = 0.2` (for example) to [data]",
            plan.file
        )));
    }
    if !value.is_finite() {
        return Err(Error::Usage(format!(
            "--assess {value}: not a finite number"
        )));
    }
    let table = &tp.table;
    plan.family
        .check_grid(&[value], tp.work.len(), table.x.ncols())
        .map_err(|m| Error::Usage(format!("--assess {value}: {m}")))?;
    let x = table.x.select(Axis(0), &tp.work);
    let y = table.y.select(Axis(0), &tp.work);
    let xh = table.x.select(Axis(0), &tp.holdout);
    let yh = table.y.select(Axis(0), &tp.holdout);
    let mut pred = Array2::<f64>::zeros((1, tp.holdout.len()));
    let input = FitInput {
        x: x.view(),
        y: y.view(),
        eval: xh.view(),
        task: plan.task,
    };
    plan.family
        .fit_predict(&input, &[value], pred.view_mut())
        .map_err(|e| Error::Fit {
            replicate: 0,
            family: plan.family.name().to_string(),
            message: e.0,
        })?;
    let losses: Vec<f64> = pred
        .row(0)
        .iter()
        .zip(yh.iter())
        .map(|(p, t)| match plan.task {
            Task::Regress => (p - t) * (p - t),
            Task::Classify { .. } => (p != t) as u8 as f64,
        })
        .collect();
    let nh = losses.len() as f64;
    let loss = losses.iter().sum::<f64>() / nh;
    let stderr = if losses.len() >= 2 {
        (losses.iter().map(|l| (l - loss) * (l - loss)).sum::<f64>() / (nh - 1.0) / nh).sqrt()
    } else {
        f64::NAN
    };
    let h = hash(table, &tp.holdout);
    let (count, values) = record(ledger, &h, tp.holdout.len(), value)?;
    let warning = (count >= 2).then(|| {
        format!(
            "warning: this holdout ({} rows, hash {h}) has now been assessed {count} times (values {}); \
             once results have been looked at and compared, its loss is no longer an unbiased estimate of \
             the test error of the chosen model. Ledger: {}",
            tp.holdout.len(),
            values
                .iter()
                .map(|v| crate::report::fmt_value(*v))
                .collect::<Vec<_>>()
                .join(", "),
            ledger.display()
        )
    });
    Ok(Assessment {
        value,
        loss,
        stderr,
        rows: tp.holdout.len(),
        train_rows: tp.work.len(),
        hash: h,
        count,
        values,
        warning,
    })
}

/// Adds one assessment of holdout `hash` to the ledger (creating it), and returns the count and
/// values so far.
fn record(ledger: &Path, hash: &str, rows: usize, value: f64) -> Result<(u64, Vec<f64>), Error> {
    use serde_json::{json, Value};
    let mut doc: Value = match std::fs::read_to_string(ledger) {
        Ok(text) => serde_json::from_str(&text).map_err(|e| {
            Error::Usage(format!(
                "{}: not a holdout ledger ({e}); move it away to start a new one",
                ledger.display()
            ))
        })?,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            json!({ "format": LEDGER_FORMAT, "holdouts": [] })
        }
        Err(e) => return Err(Error::io(ledger, &e)),
    };
    if doc.get("format").and_then(Value::as_str) != Some(LEDGER_FORMAT) {
        return Err(Error::Usage(format!(
            "{}: not a {LEDGER_FORMAT} document",
            ledger.display()
        )));
    }
    let list = doc
        .get_mut("holdouts")
        .and_then(Value::as_array_mut)
        .ok_or_else(|| Error::Usage(format!("{}: no `holdouts` list", ledger.display())))?;
    let pos = list
        .iter()
        .position(|e| e.get("hash").and_then(Value::as_str) == Some(hash));
    let entry = match pos {
        Some(p) => &mut list[p],
        None => {
            list.push(json!({ "hash": hash, "rows": rows, "assessments": 0, "values": [] }));
            list.last_mut().expect("just pushed")
        }
    };
    let count = entry
        .get("assessments")
        .and_then(Value::as_u64)
        .unwrap_or(0)
        + 1;
    entry["assessments"] = json!(count);
    let mut values: Vec<f64> = entry
        .get("values")
        .and_then(Value::as_array)
        .map(|a| a.iter().filter_map(Value::as_f64).collect())
        .unwrap_or_default();
    values.push(value);
    entry["values"] = json!(values);
    let mut text = serde_json::to_string_pretty(&doc).expect("json values serialize");
    text.push('\n');
    crate::report::write_atomic(ledger, text.as_bytes())?;
    Ok((count, values))
}
