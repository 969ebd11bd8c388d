//! `run SCENARIO --assess VALUE`: the one-off assessment of a table's locked holdout. The
//! family is fitted at one knob value on every non-holdout row and its loss on the holdout is
//! reported once. Every assessment is counted in a ledger file
//! (`<scenario>.holdout-ledger.json`, beside the scenario) keyed by a hash of the holdout rows;
//! from the second assessment of the same rows the holdout loss is no longer an unbiased
//! estimate, and the caller is told so.

use std::path::{Path, PathBuf};

use ndarray::{Array2, Axis};

use crate::dataset::holdout::hash;
use crate::dataset::TablePlan;
use crate::error::Error;
use crate::family::{FitInput, FitSeed, Out};
use crate::fmt::fmt_value;
use crate::scenario::{Plan, Source};

/// Identifier of the ledger format (it starts with [`crate::output::LEDGER_TAG`], which keeps
/// every other output off a ledger).
pub const LEDGER_FORMAT: &str = "lossprism-holdout-ledger/1";

/// The ledger file of a scenario: `<folder>/<stem>.holdout-ledger.json`. A ledger beside the
/// scenario as named is used when there is one; otherwise the ledger is beside the file the
/// name resolves to (symbolic links followed), so a scenario reached through a link shares the
/// count of the file it points to (it counted from 1 again). A ledger is kept from every other
/// output by its content ([`crate::output::LEDGER_TAG`]).
pub fn ledger_path(scenario: &Path) -> PathBuf {
    let named = beside(scenario);
    // Not a link: beside the name as given (a folder reached through a link is the same folder),
    // so the first assessment names the ledger as every later one does (it printed the
    // absolute path the first time only).
    let linked = std::fs::symlink_metadata(scenario).is_ok_and(|m| m.file_type().is_symlink());
    if named.exists() || !linked {
        return named;
    }
    std::fs::canonicalize(scenario)
        .map(|p| beside(&p))
        .unwrap_or(named)
}

/// `<folder>/<stem>.holdout-ledger.json` of a path as it is.
fn beside(scenario: &Path) -> PathBuf {
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
    /// What each assessment so far fitted (`tree max_depth = 5`), this one included.
    pub looks: Vec<String>,
    /// Set from the second assessment on.
    pub warning: Option<String>,
}

/// Fits the plan's model at `value` on every non-holdout row, reports the holdout loss, and
/// records the assessment in the ledger at `ledger`. The plan must hold exactly one model (`run
/// --assess` keeps the one `--family` names): a plan with several is refused, never assessed
/// by its first.
pub fn assess(plan: &Plan, value: f64, ledger: &Path) -> Result<Assessment, Error> {
    if plan.models.len() != 1 {
        return Err(Error::Usage(format!(
            "--assess fits one model and {} has {}; choose one with --family NAME",
            plan.file,
            plan.models.len()
        )));
    }
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
    let model = plan.model();
    model
        .family
        .check_grid(&[value], tp.work.len(), table.x.ncols())
        .map_err(|m| Error::Usage(format!("--assess {}: {m}", crate::fmt::fmt_exact(value))))?;
    let x = table.x.select(Axis(0), &tp.work);
    let y = table.y.select(Axis(0), &tp.work);
    let xh = table.x.select(Axis(0), &tp.holdout);
    let yh = table.y.select(Axis(0), &tp.holdout);
    let nh = tp.holdout.len();
    let k = plan.task.classes();
    let mut pred = Array2::<f64>::zeros((1, nh));
    let mut probs = ndarray::Array3::<f64>::zeros((1, nh, k));
    let input = FitInput {
        x: x.view(),
        y: y.view(),
        eval: xh.view(),
        task: plan.task,
        seed: FitSeed::fixed(plan.seed),
    };
    let out = Out {
        values: pred.view_mut(),
        probs: plan.loss.needs_probs().then(|| probs.view_mut()),
        diversity: None,
    };
    model
        .family
        .fit_predict(&input, &[value], out)
        .map_err(|e| Error::Fit {
            file: plan.file.to_string(),
            replicate: 0,
            family: model.family.name().to_string(),
            message: e.0,
        })?;
    let losses: Vec<f64> = (0..nh)
        .map(|j| {
            let q = plan
                .loss
                .needs_probs()
                .then(|| probs.slice(ndarray::s![0, j, ..]).to_vec());
            plan.loss
                .check_prediction(pred[[0, j]], q.as_deref())
                .map_err(|m| Error::Fit {
                    file: plan.file.to_string(),
                    replicate: 0,
                    family: model.family.name().to_string(),
                    message: format!(
                        "holdout row {j}: {}",
                        crate::runner::with_remedy(plan, model, m)
                    ),
                })?;
            Ok(plan.loss.observed_loss(pred[[0, j]], q.as_deref(), yh[j]))
        })
        .collect::<Result<_, Error>>()?;
    let nh = losses.len() as f64;
    let loss = losses.iter().sum::<f64>() / nh;
    let stderr = if losses.len() >= 2 {
        (losses.iter().map(|l| (l - loss) * (l - loss)).sum::<f64>() / (nh - 1.0) / nh).sqrt()
    } else {
        f64::NAN
    };
    let h = hash(table, &tp.holdout);
    let legacy = crate::dataset::holdout::hash_values(table, &tp.holdout);
    let model = &plan.models[0];
    let look = format!(
        "{} {} = {}",
        model.label,
        model.family.knob(),
        fmt_value(value)
    );
    let (count, looks, earlier) = record(ledger, (&h, &legacy), tp.holdout.len(), value, &look)?;
    // A holdout drawn anew (another seed or holdout share, or an edited table) after an earlier
    // one's loss was seen: the choice may already carry what that look said, and rows of the
    // earlier holdout may be in this one.
    let redrawn =
        (count == 1 && earlier > 0).then(|| {
            format!(
            "warning: this holdout ({} rows, hash {h}) is new, but the ledger counts {earlier} \
             earlier {} of other holdouts of this scenario (another seed, holdout share or table): \
             a holdout drawn again after looking at one is no fresh test set, as the choice may \
             carry what the earlier looks said. Ledger: {}",
            tp.holdout.len(),
            if earlier == 1 { "assessment" } else { "assessments" },
            crate::error::shown(ledger)
        )
        });
    let warning = redrawn.or_else(|| (count >= 2).then(|| {
        format!(
            "warning: this holdout ({} rows, hash {h}) has now been assessed {count} times ({}); \
             once results have been looked at and compared, its loss is no longer an unbiased estimate of \
             the test error of the chosen model. Ledger: {}",
            tp.holdout.len(),
            looks.join(", "),
            crate::error::shown(ledger)
        )
    }));
    Ok(Assessment {
        value,
        loss,
        stderr,
        rows: tp.holdout.len(),
        train_rows: tp.work.len(),
        hash: h,
        count,
        looks,
        warning,
    })
}

/// Largest holdout ledger read (bytes); a ledger grows by a few dozen bytes per assessment.
const MAX_LEDGER_BYTES: u64 = 64 << 20;

/// Adds one assessment of holdout `hash` (or of the entry a ledger of 0.3.9 or before kept under
/// `legacy`, the values' hash) to the ledger (creating it), and returns the count and
/// values so far, and the number of assessments of the ledger's other holdouts.
fn record(
    ledger: &Path,
    (hash, legacy): (&str, &str),
    rows: usize,
    value: f64,
    look: &str,
) -> Result<(u64, Vec<String>, u64), Error> {
    use serde_json::{json, Value};
    // Read, count and write under a lock on the ledger's folder: six assessments started
    // together each read the same count and the ledger ended at 1 (exit 0 every time).
    // The folder the ledger resolves to (a ledger linked into another folder is written there).
    let resolved = std::fs::canonicalize(ledger).unwrap_or_else(|_| ledger.to_path_buf());
    let dir = resolved.parent().unwrap_or(Path::new(""));
    let _lock = crate::output::FolderLock::take(dir)?;
    let read = match ledger.try_exists() {
        Ok(true) => crate::codec::read_document(
            ledger,
            MAX_LEDGER_BYTES,
            "holdout ledger",
            &crate::codec::json_object,
        )
        .map_err(|e| Error::Usage(format!("{e}; move it away to start a new one"))),
        Ok(false) => Err(Error::io(
            ledger,
            &std::io::Error::from(std::io::ErrorKind::NotFound),
        )),
        Err(e) => Err(Error::io(ledger, &e)),
    };
    let mut doc: Value = match read {
        Ok(text) => serde_json::from_str(&text).map_err(|e| {
            Error::Usage(format!(
                "{}: not a holdout ledger ({e}); move it away to start a new one",
                ledger.display()
            ))
        })?,
        Err(_) if !ledger.exists() => json!({ "format": LEDGER_FORMAT, "holdouts": [] }),
        Err(e) => return Err(e),
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
    // An entry written before 0.3.10 under the values' hash is this holdout's: it is carried on
    // under the records' hash (once; a ledger holding both is refused below as a double entry).
    if !list
        .iter()
        .any(|e| e.get("hash").and_then(Value::as_str) == Some(hash))
    {
        if let Some(e) = list
            .iter_mut()
            .find(|e| e.get("hash").and_then(Value::as_str) == Some(legacy))
        {
            e["hash"] = json!(hash);
        }
    }
    let same = |e: &Value| e.get("hash").and_then(Value::as_str) == Some(hash);
    // Two entries of one holdout split its count (each could be edited down on its own).
    if list.iter().filter(|e| same(e)).count() > 1 {
        return Err(Error::Usage(format!(
            "{}: holdout {hash} is listed twice; the ledger was edited or damaged: move it away \
             to start a new one",
            ledger.display()
        )));
    }
    let earlier: u64 = list
        .iter()
        .filter(|e| !same(e))
        .map(|e| e.get("assessments").and_then(Value::as_u64).unwrap_or(0))
        .fold(0, u64::saturating_add);
    let pos = list.iter().position(same);
    let entry = match pos {
        Some(p) => &mut list[p],
        None => {
            list.push(json!({ "hash": hash, "rows": rows, "assessments": 0, "values": [] }));
            list.last_mut().expect("just pushed")
        }
    };
    let bad = |what: &str| {
        Error::Usage(format!(
            "{}: holdout {hash}: {what}; the ledger was edited or damaged: move it away to start a new one",
            ledger.display()
        ))
    };
    let count = match entry.get("assessments") {
        Some(v) => match v.as_u64() {
            Some(c) if c < 1_000_000 => c + 1,
            _ => return Err(bad(&format!("`assessments` is {v}, not a count"))),
        },
        None => return Err(bad("no `assessments` count")),
    };
    if let Some(v) = entry.get("values") {
        let ok = v
            .as_array()
            .is_some_and(|a| a.iter().all(|x| x.as_f64().is_some_and(f64::is_finite)));
        if !ok {
            return Err(bad("`values` is not a list of numbers"));
        }
    }
    // Every assessment adds one value: a count below the values was edited down, and the
    // reuse warning was lost with it.
    let listed = entry
        .get("values")
        .and_then(Value::as_array)
        .map_or(0, Vec::len) as u64;
    if listed != count - 1 {
        return Err(bad(&format!(
            "`assessments` is {} but `values` lists {listed} assessed values",
            count - 1
        )));
    }
    entry["assessments"] = json!(count);
    let mut values: Vec<f64> = entry
        .get("values")
        .and_then(Value::as_array)
        .map(|a| a.iter().filter_map(Value::as_f64).collect())
        .unwrap_or_default();
    values.push(value);
    entry["values"] = json!(values);
    // What each look fitted (`tree max_depth = 5`): values alone read "5, 5" for two models.
    // Ledgers written before 0.3.5 have no `looks`; their earlier looks are shown as values.
    let mut looks: Vec<String> = match entry.get("looks").and_then(Value::as_array) {
        Some(a) if a.len() + 1 == values.len() => a
            .iter()
            .map(|x| x.as_str().unwrap_or("?").to_string())
            .collect(),
        _ => values[..values.len() - 1]
            .iter()
            .map(|v| fmt_value(*v))
            .collect(),
    };
    looks.push(look.to_string());
    entry["looks"] = json!(looks);
    let mut text = serde_json::to_string_pretty(&doc).expect("json values serialize");
    text.push('\n');
    crate::output::write_one(crate::output::LEDGER_OUTPUT, ledger, &[], text.as_bytes())?;
    Ok((count, looks, earlier))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A scenario named through a symbolic link shares the ledger of the file it points to,
    /// unless a ledger already sits beside the link (kept, so its count goes on); the ledger's
    /// format tag is the one `output` keeps every other output off.
    #[test]
    fn a_linked_scenario_shares_its_ledger_and_an_existing_one_is_kept() {
        let d = tempfile::tempdir().unwrap();
        let s = d.path().join("s.toml");
        std::fs::write(&s, "name = \"x\"\n").unwrap();
        let link = d.path().join("link.toml");
        std::os::unix::fs::symlink(&s, &link).unwrap();
        let canonical = std::fs::canonicalize(&s).unwrap();
        assert_eq!(ledger_path(&link), beside(&canonical));
        std::fs::write(d.path().join("link.holdout-ledger.json"), "{}").unwrap();
        assert_eq!(
            ledger_path(&link),
            d.path().join("link.holdout-ledger.json")
        );
        assert!(LEDGER_FORMAT.starts_with(crate::output::LEDGER_TAG));
    }
}
