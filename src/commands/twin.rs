//! `lossprism twin`: fits a simulated twin of a table (see [`crate::dgp::reference`]) and writes
//! its scenario file, which `run` then refits exactly at plan time.

use std::path::{Path, PathBuf};

use crate::dataset::{self, Missing, Table, TableOptions, TargetKind};
use crate::dgp::reference::{self, TwinFit};
use crate::error::Error;
use crate::family::Task;

/// Options of `lossprism twin`.
#[derive(Debug, Clone)]
pub struct TwinOptions {
    /// The CSV table.
    pub table: PathBuf,
    /// The response column.
    pub target: String,
    /// Feature columns (default: all others).
    pub features: Option<Vec<String>>,
    /// Classification (labels from the target's values).
    pub classes: bool,
    /// Where the scenario goes (its folder anchors the relative `path`).
    pub out: PathBuf,
    /// Seed of the cross-validation folds, also written as the scenario's seed.
    pub seed: u64,
    /// Write `varying = true` noise instead of a constant.
    pub varying: bool,
}

/// `path` relative to folder `from` when both resolve (through `..` if needed), else absolute.
pub fn relative_path(path: &Path, from: &Path) -> String {
    let abs = |p: &Path| std::fs::canonicalize(p).ok();
    let (Some(p), Some(f)) = (abs(path), abs(from)) else {
        return path.display().to_string();
    };
    let pc: Vec<_> = p.components().collect();
    let fc: Vec<_> = f.components().collect();
    let common = pc.iter().zip(&fc).take_while(|(a, b)| a == b).count();
    let mut out = PathBuf::new();
    for _ in common..fc.len() {
        out.push("..");
    }
    for c in &pc[common..] {
        out.push(c.as_os_str());
    }
    out.to_string_lossy().replace('\\', "/")
}

fn toml_str(s: &str) -> String {
    let mut out = String::from("\"");
    for ch in s.chars() {
        match ch {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            c if (c as u32) < 0x20 => out.push_str(&format!("\\u{:04x}", c as u32)),
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

/// The text of a twin scenario for a fitted table (`table_rel`: the CSV relative to the
/// scenario's folder).
pub fn scenario_text(o: &TwinOptions, t: &Table, f: &TwinFit, table_rel: &str) -> String {
    let stem = o
        .table
        .file_stem()
        .map(|s| s.to_string_lossy().to_string())
        .unwrap_or_else(|| "table".into());
    let mut s = String::new();
    s.push_str(&format!(
        "# Simulated twin of {}, written by `lossprism twin`.\n",
        o.table.display()
    ));
    s.push_str(&format!(
        "# Inputs: the table's {} rows resampled with replacement; truth: k-NN reference (k = {} by {}-fold\n",
        t.rows(),
        f.k,
        reference::CV_FOLDS.min(t.rows())
    ));
    s.push_str(&format!(
        "# cross-validation, cross-validated {} = {:.4} ± {:.4}), refitted on the table at plan time.\n",
        f.quality_name, f.quality, f.quality_stderr
    ));
    if let Some(e) = &f.noise {
        s.push_str(&format!(
            "# Noise: σ² = {:.6} ± {:.6} ({}).\n",
            e.value,
            e.stderr,
            e.method.describe()
        ));
    }
    s.push_str("# Edit [model] to the family and grid you want to study.\n");
    s.push_str(&format!("name = {}\n", toml_str(&format!("{stem}-twin"))));
    s.push_str(&format!(
        "about = {}\n",
        toml_str(&format!(
            "Simulated twin of {}: target {}, known truth and noise by construction.",
            o.table
                .file_name()
                .map(|s| s.to_string_lossy().to_string())
                .unwrap_or_default(),
            t.target
        ))
    ));
    s.push_str(&format!("seed = {}\nreplicates = 200\n\n[data]\n", o.seed));
    s.push_str("source = \"twin\"\n");
    s.push_str(&format!("path = {}\n", toml_str(table_rel)));
    s.push_str(&format!("target = {}\n", toml_str(&t.target)));
    if let Some(fs) = &o.features {
        let list: Vec<String> = fs.iter().map(|f| toml_str(f)).collect();
        s.push_str(&format!("features = [{}]\n", list.join(", ")));
    }
    s.push_str(&format!("train_size = {}\n", t.rows()));
    s.push_str(&format!(
        "reference = {{ family = \"knn\", k = {}, standardize = true }}\n",
        f.k
    ));
    match t.task {
        Task::Classify { .. } => {
            let labels: Vec<String> = t.labels.iter().map(|l| toml_str(l)).collect();
            s.push_str(&format!(
                "\n[data.classes]\nlabels = [{}]\n",
                labels.join(", ")
            ));
        }
        Task::Regress => {
            s.push_str("\n[data.noise]\n");
            if o.varying {
                s.push_str("varying = true\n");
            } else {
                let v = f.noise.map(|e| e.value).unwrap_or(0.0).max(0.0);
                s.push_str(&format!("sd = {}\n", v.sqrt()));
            }
        }
    }
    s.push_str("\n[model]\nfamily = \"tree\"\ngrid = { from = 1, to = 8 }\n");
    s.push_str("\n[audit]\nfolds = 5\n");
    s
}

/// `lossprism twin`: loads the table, fits the twin, writes the scenario to `o.out` and returns
/// the lines to print (fit quality, noise estimate with its standard error, where it went).
pub fn command(o: &TwinOptions) -> Result<String, Error> {
    let opts = TableOptions {
        target: o.target.clone(),
        features: o.features.clone(),
        missing: Missing::Error,
        target_kind: if o.classes {
            TargetKind::Classes(None)
        } else {
            TargetKind::Numeric
        },
        min_rows: 5,
    };
    let t = dataset::load_csv(&o.table, &opts)?;
    let f = reference::fit(&t, o.seed, true)?;
    let folder = match o.out.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let rel = relative_path(&o.table, &folder);
    let text = scenario_text(o, &t, &f, &rel);
    // Check the scenario plans before writing it.
    let spec = crate::scenario::parse(&text, &o.out.display().to_string())?;
    crate::scenario::Plan::from_spec(
        &spec,
        &text,
        &o.out.display().to_string(),
        &folder,
        &Default::default(),
    )?;
    crate::output::write_one(
        "--out",
        &o.out,
        &[("table", o.table.as_path())],
        text.as_bytes(),
    )?;
    let mut out = format!(
        "{}: {} rows, {} inputs ({})\n",
        o.table.display(),
        t.rows(),
        t.x.ncols(),
        t.names.join(", ")
    );
    for e in &t.encodings {
        out.push_str(&format!("  {}\n", e.describe()));
    }
    out.push_str(&format!(
        "reference: k-NN on standardized inputs, k = {} chosen by {}-fold cross-validation; cross-validated {} = {} ± {}\n",
        f.k,
        reference::CV_FOLDS.min(t.rows()),
        f.quality_name,
        crate::fmt::fmt_num(f.quality),
        crate::fmt::fmt_se(f.quality_stderr)
    ));
    if let Some(e) = &f.noise {
        out.push_str(&format!(
            "noise: σ² = {} ± {} ({}); the reference's cross-validated residuals give {}\n",
            crate::fmt::fmt_num(e.value),
            crate::fmt::fmt_se(e.stderr),
            e.method.describe(),
            crate::fmt::fmt_num(f.cv_noise.unwrap_or(f64::NAN))
        ));
        if o.varying {
            out.push_str(
                "noise written as varying: σ²(x) smoothed from the reference's squared residuals\n",
            );
        }
    }
    out.push_str(&format!(
        "wrote {} (edit [model]; run it with `lossprism run {}`)\n",
        o.out.display(),
        o.out.display()
    ));
    Ok(out)
}
