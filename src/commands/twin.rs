//! `lossprism twin`: fits a simulated twin of a table and writes its scenario file, which `run`
//! then refits exactly at plan time.
//!
//! Rows that repeat an earlier row exactly are copied records for a numeric target (a continuous
//! response does not repeat): a regression twin keeps each distinct row once unless
//! `--duplicates keep` ([`dataset::distinct_rows`]); with classes they are kept and counted.
//!
//! Regression: the reference is chosen among k-NN, bagged trees, local-linear regression and
//! their blend by cross-validated R² ([`crate::dgp::reference::select`]); the inputs are a
//! smoothed bootstrap of the rows and the evaluation points are drawn once from it
//! ([`crate::dgp::twin::Jitter`]); the noise is the default estimator for the table's dimension,
//! corrected for its roughness bias, with a standard error from a parametric bootstrap, its
//! neighbour distances weighted as the reference's ([`crate::dgp::twin::correct_noise_weighted`]). Then the **fidelity check** draws tables of the same
//! size from the fitted twin, twins each of them the same way, runs the families on the twin
//! and on each twin of the twin, and reports how often the twin of the twin picks a knob inside
//! the twin's one-standard-error set and how far its expected-loss curve lies from the twin's —
//! how far a twin of a table like this one can be trusted. The same runs give the **recommended
//! pick** of each family, the headline of the output: the twin's own lowest expected loss (its
//! run at the scenario's replicates; [`FidelityModel::headline_pick`]), printed with the
//! bias-corrected pick (the lowest of 2·EL(g) − mean EL*(g) over the twins of the twin) beside
//! it as a second opinion. The reference is twiced ([`Choice::twice`]) as `--twicing auto`
//! decides: always with 3 or more inputs, with fewer when that lowers the held-out error
//! ([`Twicing`]); `--twicing off` fits it once. Its smoothing is then sharpened to
//! [`twin::SHARPEN`] of the cross-validated tuning (`--sharpen`; the noise is measured before,
//! with the cross-validated recipe). The scenario records all of it (`[data.fit_report]`, echoed in results with
//! the recommended picks) and says it in comments.
//!
//! Classification twins keep the k-NN reference (k by cross-validated Brier score) and the
//! resampled rows; the candidates, the smoothed bootstrap and the fidelity check were designed
//! and measured on regression (`docs/twin-calibration.md`).

use std::path::{Path, PathBuf};

use crate::dataset::noise::{self, Method};
use crate::dataset::{self, Duplicates, Missing, Table, TableOptions, TargetKind};
use crate::dgp::reference::select::{self, Rule, Selection};
use crate::dgp::reference::{self, Candidate, Choice, Reference, TwinFit};
use crate::dgp::twin::{
    self, FidelityModel, FidelityRecord, Jitter, NoiseCorrection, RegressionFit, Twicing,
};
use crate::error::Error;
use crate::family::Task;
use crate::fmt::{fmt_num, fmt_se, fmt_value};
use crate::rng::{purpose, stream};
use crate::scenario::plan::ShapeChoice;
use crate::scenario::twin::{TwinNoise, TwinSpec};
use crate::scenario::{Design, Plan, Source};

pub use crate::dgp::twin::{FIDELITY_REPLICATES, FIDELITY_TABLES};
/// Replicates written in a twin scenario; the fidelity check runs the twin itself at this count
/// too, so its recommended pick is the `*` row `run` shows for the same family and grid.
pub const TWIN_REPLICATES: usize = 200;

/// A family and grid checked by the fidelity check, as written in a `[[model]]` table.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FidelityFamily {
    /// The family's name.
    pub family: String,
    /// The rest of the `[[model]]` table (grid and options), TOML lines.
    pub body: String,
}

/// The families of the fidelity check by default: tree depth 1–10 and k-NN (standardized
/// inputs) with k ∈ {1, 2, 3, 5, 8, 12, 20, 30, 50} (those up to the table's rows).
pub fn default_fidelity_families(rows: usize) -> Vec<FidelityFamily> {
    let ks: Vec<String> = [1, 2, 3, 5, 8, 12, 20, 30, 50]
        .iter()
        .filter(|&&k| k <= rows)
        .map(|k| k.to_string())
        .collect();
    vec![
        FidelityFamily {
            family: "tree".into(),
            body: "grid = { from = 1, to = 10 }\n".into(),
        },
        FidelityFamily {
            family: "knn".into(),
            body: format!("grid = [{}]\nstandardize = true\n", ks.join(", ")),
        },
    ]
}

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
    /// Rows with a missing or non-numeric cell: refuse the table (default) or drop them (the
    /// scenario then says `missing = "drop"`, so `run` reads the same rows).
    pub missing: Missing,
    /// Rows repeating an earlier row exactly (inputs and target): `None` drops them for a
    /// regression twin (a continuous response does not repeat, so they are copied records) and
    /// keeps them for classes (labels repeat by nature); the scenario then says `duplicates`.
    pub duplicates: Option<Duplicates>,
    /// Where the scenario goes (its folder anchors the relative `path`).
    pub out: PathBuf,
    /// Seed of the cross-validation folds, the forest, the bootstraps and the fidelity check,
    /// also written as the scenario's seed.
    pub seed: u64,
    /// Write `varying = true` noise instead of a constant.
    pub varying: bool,
    /// The noise's law: Gaussian (default) or the table's standardized residuals resampled
    /// (`shape = "residuals"`; Student's t is for scenarios written by hand).
    pub noise_shape: ShapeChoice,
    /// The smoothed bootstrap's multiplier c on Silverman's rule (0: rows as they are).
    pub jitter: f64,
    /// Shrink each jittered column toward its mean so it keeps the table's variance
    /// ([`Jitter::fit_keeping`]; written as `jitter_variance = "table"`).
    pub keep_variance: bool,
    /// Evaluation points of the twin (drawn once).
    pub eval_size: usize,
    /// Which reference candidates may be chosen.
    pub reference: Rule,
    /// The noise estimator (default: by the number of inputs).
    pub noise_estimator: Option<Method>,
    /// Tables of the fidelity check (0 skips it).
    pub fidelity: usize,
    /// Replicates of every run of a twin of the twin (the twin itself runs at
    /// [`TWIN_REPLICATES`]).
    pub fidelity_replicates: usize,
    /// Families of the fidelity check (empty: [`default_fidelity_families`]).
    pub fidelity_families: Vec<FidelityFamily>,
    /// Worker threads of the fidelity runs (0: all cores).
    pub threads: usize,
    /// Twicing of the reference (regression with constant noise; [`Choice::twice`]): by default
    /// always with 3 or more inputs, with fewer when the cross-validation check says so;
    /// varying noise fits it once.
    pub twicing: Twicing,
    /// Sharpening of the regression reference ([`twin::SHARPEN`]; 1: the cross-validated
    /// tuning).
    pub sharpen: f64,
}

impl Default for TwinOptions {
    fn default() -> Self {
        TwinOptions {
            table: PathBuf::new(),
            target: String::new(),
            features: None,
            classes: false,
            missing: Missing::Error,
            duplicates: None,
            out: PathBuf::from("twin.toml"),
            seed: 1,
            varying: false,
            noise_shape: ShapeChoice::Gaussian,
            jitter: twin::DEFAULT_JITTER,
            keep_variance: true,
            eval_size: twin::EVAL_SIZE,
            reference: Rule::Best,
            noise_estimator: None,
            fidelity: FIDELITY_TABLES,
            fidelity_replicates: FIDELITY_REPLICATES,
            fidelity_families: Vec::new(),
            threads: 0,
            twicing: Twicing::Auto,
            sharpen: twin::SHARPEN,
        }
    }
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
    let s = out.to_string_lossy();
    if cfg!(windows) {
        s.replace('\\', "/")
    } else {
        // On Unix a backslash is an ordinary character of a file name.
        s.into_owned()
    }
}

/// `s` with the characters a TOML comment cannot hold (control characters other than tab,
/// and DEL) written as `\u{…}`, so that a column or file name with them cannot break the
/// scenario's comment lines.
fn comment_safe(s: &str) -> String {
    s.chars()
        .map(|c| {
            if c.is_control() && c != '\t' {
                format!("\\u{{{:x}}}", c as u32)
            } else {
                c.to_string()
            }
        })
        .collect()
}

fn toml_str(s: &str) -> String {
    let mut out = String::from("\"");
    for ch in s.chars() {
        match ch {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            c if (c as u32) < 0x20 || c == '\u{7f}' => {
                out.push_str(&format!("\\u{:04x}", c as u32))
            }
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

/// A float as TOML that parses back to the same bits (`4.0`, `0.25298065845932094`).
fn toml_f64(v: f64) -> String {
    format!("{v:?}")
}

fn toml_list(v: &[f64]) -> String {
    let items: Vec<String> = v.iter().map(|x| toml_f64(*x)).collect();
    format!("[{}]", items.join(", "))
}

/// Informational numbers to 6 decimals (still TOML floats).
fn toml_list6(v: &[f64]) -> String {
    let items: Vec<String> = v.iter().map(|x| format!("{x:.6}")).collect();
    format!("[{}]", items.join(", "))
}

/// The names of the inputs at `cols` among the table's `names` (`?` past the end).
fn input_names<'a>(names: &'a [String], cols: &[usize]) -> Vec<&'a str> {
    cols.iter()
        .map(|&j| names.get(j).map_or("?", String::as_str))
        .collect()
}

/// The `reference = { ... }` line of a recipe (`names`: the table's inputs, which
/// `inputs` names).
pub fn reference_line(c: &Choice, names: &[String]) -> String {
    let mut parts = vec![format!("family = {}", toml_str(c.family.name()))];
    match (c.family, c.degree, c.ridge, c.tree) {
        (Candidate::Logit, Some(d), Some(r), _) => {
            parts.push(format!("degree = {d}"));
            parts.push(format!("ridge = {}", toml_f64(r)));
            if let Some(w) = &c.metric {
                parts.push(format!("metric = {}", toml_list(w)));
            }
            return format!("reference = {{ {} }}", parts.join(", "));
        }
        (Candidate::Tree, _, _, Some(t)) => {
            parts.push(format!("depth = {}", t.depth));
            parts.push(format!("min_leaf = {}", t.min_leaf));
            parts.push(format!("seed = {}", t.seed));
            if let Some(w) = &c.metric {
                parts.push(format!("metric = {}", toml_list(w)));
            }
            return format!("reference = {{ {} }}", parts.join(", "));
        }
        _ => {}
    }
    if let Some(k) = c.k {
        parts.push(format!("k = {k}"));
    }
    parts.push(format!("standardize = {}", c.standardize));
    if let Some(f) = c.forest {
        parts.push(format!("trees = {}", f.trees));
        parts.push(format!("min_leaf = {}", f.min_leaf));
        parts.push(format!("seed = {}", f.seed));
    }
    if let Some(h) = c.bandwidth {
        parts.push(format!("bandwidth = {}", toml_f64(h)));
    }
    if let Some(d) = c.degree {
        parts.push(format!("degree = {d}"));
    }
    if c.twice {
        parts.push("twice = true".into());
    }
    if let Some(w) = &c.metric {
        parts.push(format!("metric = {}", toml_list(w)));
    }
    if let Some(cols) = &c.inputs {
        let items: Vec<String> = input_names(names, cols).into_iter().map(toml_str).collect();
        parts.push(format!("inputs = [{}]", items.join(", ")));
    }
    if c.family == Candidate::Blend {
        // The polynomial's weight only when it has one: a blend of the first three reads as
        // it did before the polynomial part.
        let poly = if c.weights[3] > 0.0 {
            format!(", poly = {}", toml_f64(c.weights[3]))
        } else {
            String::new()
        };
        parts.push(format!(
            "weights = {{ knn = {}, forest = {}, loclin = {}{poly} }}",
            toml_f64(c.weights[0]),
            toml_f64(c.weights[1]),
            toml_f64(c.weights[2])
        ));
    }
    if let Some(r2) = c.cv_r2 {
        let names = ["knn", "forest", "loclin", "poly", "blend"];
        let items: Vec<String> = names
            .iter()
            .zip(r2)
            .filter(|(_, v)| v.is_finite())
            .map(|(n, v)| format!("{n} = {v:.4}"))
            .collect();
        if !items.is_empty() {
            parts.push(format!("cv_r2 = {{ {} }}", items.join(", ")));
        }
    }
    format!("reference = {{ {} }}", parts.join(", "))
}

/// Everything the scenario text says about a regression twin.
struct RegressionText<'a> {
    fit: &'a RegressionFit,
    jitter: Option<Jitter>,
    /// The noise written in `[data.noise]`.
    noise: TwinNoise,
    fidelity: Option<&'a FidelityRecord>,
}

fn stem_of(o: &TwinOptions) -> String {
    o.table
        .file_stem()
        .map(|s| s.to_string_lossy().to_string())
        .unwrap_or_else(|| "table".into())
}

fn header_and_top(o: &TwinOptions, t: &Table, comments: &[String], replicates: usize) -> String {
    let mut s = String::new();
    s.push_str(&format!(
        "# Simulated twin of {}, written by `lossprism twin`.\n",
        comment_safe(&o.table.display().to_string())
    ));
    for c in comments {
        // One comment may hold several lines; each becomes its own comment line.
        for line in c.split('\n') {
            s.push_str(&format!("# {}\n", comment_safe(line)));
        }
    }
    s.push_str("# Edit [model] to the family and grid you want to study.\n");
    s.push_str(&format!(
        "name = {}\n",
        toml_str(&format!(
            "{}-twin",
            // A scenario's name is one line of printable text.
            stem_of(o)
                .chars()
                .map(|c| if c.is_control() { '_' } else { c })
                .collect::<String>()
        ))
    ));
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
    s.push_str(&format!(
        "seed = {}\nreplicates = {replicates}\n\n[data]\n",
        o.seed
    ));
    s.push_str("source = \"twin\"\n");
    s
}

fn data_common(o: &TwinOptions, t: &Table, table_rel: &str) -> String {
    let mut s = format!(
        "path = {}\ntarget = {}\n",
        toml_str(table_rel),
        toml_str(&t.target)
    );
    if let Some(fs) = &o.features {
        let list: Vec<String> = fs.iter().map(|f| toml_str(f)).collect();
        s.push_str(&format!("features = [{}]\n", list.join(", ")));
    }
    if o.missing == Missing::Drop {
        s.push_str(&format!(
            "missing = \"drop\"  # {} of the table's rows had a missing or non-numeric cell and are left out\n",
            t.dropped_rows
        ));
    }
    if t.repeats_dropped > 0 {
        s.push_str(&format!(
            "duplicates = \"drop\"  # {} of the table's rows repeated an earlier row exactly (inputs and target) and are left out\n",
            t.repeats_dropped
        ));
    } else if o.duplicates == Some(Duplicates::Keep) {
        let k = dataset::repeated_rows(t).len();
        if k > 0 {
            s.push_str(&format!(
                "duplicates = \"keep\"  # {k} of the table's rows repeat an earlier row exactly (inputs and target); kept as separate observations\n"
            ));
        }
    }
    s.push_str(&format!("train_size = {}\n", t.rows()));
    s.push_str(&format!(
        "table_digest = {}  # the table as read; `run` refuses this twin if the table changes\n",
        toml_str(&t.digest())
    ));
    s
}

/// A regression twin's evaluation points: `--eval-size`, at most the table's `rows` without a
/// jitter (its points are then rows of the table).
fn eval_size(o: &TwinOptions, rows: usize) -> usize {
    if o.jitter > 0.0 {
        o.eval_size
    } else {
        o.eval_size.min(rows)
    }
}

/// The `[data]` section of a regression twin (without `[data.fit_report]`).
fn regression_data(o: &TwinOptions, t: &Table, table_rel: &str, r: &RegressionText<'_>) -> String {
    let mut s = data_common(o, t, table_rel);
    if o.jitter > 0.0 {
        s.push_str(&format!("eval_size = {}\n", o.eval_size));
        s.push_str(&format!("jitter = {}\n", toml_f64(o.jitter)));
        s.push_str(&format!(
            "jitter_variance = \"{}\"\n",
            if o.keep_variance { "table" } else { "added" }
        ));
    } else if o.eval_size != t.rows() {
        s.push_str(&format!("eval_size = {}\n", o.eval_size));
    }
    s.push_str(&reference_line(&r.fit.selection.choice, &t.names));
    s.push_str("\n\n[data.noise]\n");
    match r.noise {
        TwinNoise::Constant(sd) => s.push_str(&format!("sd = {}\n", toml_f64(sd))),
        TwinNoise::Varying { smooth_k, level } => {
            s.push_str("varying = true\n");
            if let Some(k) = smooth_k {
                s.push_str(&format!("smooth_k = {k}\n"));
            }
            if let Some(l) = level {
                s.push_str(&format!("level = {}\n", toml_f64(l)));
            }
        }
    }
    match o.noise_shape {
        ShapeChoice::Gaussian => {}
        ShapeChoice::Residuals => s.push_str("shape = \"residuals\"\n"),
        ShapeChoice::Student(df) => {
            s.push_str(&format!("shape = \"student\"\ndf = {}\n", toml_f64(df)))
        }
    }
    s
}

fn fit_report_text(
    sharpen: Option<f64>,
    noise: Option<&NoiseCorrection>,
    fidelity: Option<&FidelityRecord>,
) -> String {
    let mut s = String::new();
    if sharpen.is_none() && noise.is_none() && fidelity.is_none() {
        return s;
    }
    s.push_str(
        "\n[data.fit_report]  # measured by `lossprism twin`; informational, echoed in results\n",
    );
    if let Some(f) = sharpen {
        s.push_str(&format!("sharpen = {}\n", toml_f64(f)));
    }
    if let Some(n) = noise {
        s.push_str(&format!(
            "noise = {{ method = {}, raw = {}, correction = {}, value = {}, stderr = {}, tables = {}{}{} }}\n",
            toml_str(n.method.name()),
            toml_f64(n.raw),
            toml_f64(n.correction),
            toml_f64(n.value),
            toml_f64(n.se),
            n.tables,
            if n.weighted { ", weighted = true" } else { "" },
            match n.left_out {
                0 => String::new(),
                r => format!(", left_out = {r}"),
            }
        ));
    }
    if let Some(f) = fidelity {
        s.push_str(&format!(
            "\n[data.fit_report.fidelity]\ntables = {}\nreplicates = {}\n",
            f.tables, f.replicates
        ));
        if let Some(r) = f.twin_replicates {
            s.push_str(&format!("twin_replicates = {r}\n"));
        }
        for m in &f.models {
            let curve_error = format!("{:.6}", m.curve_error);
            s.push_str(&format!(
                "\n[[data.fit_report.fidelity.models]]\nfamily = {}\nknob = {}\npick = {}\none_se = {}\npicks = {}\nin_one_se = {}\ncurve_error = {}\ncorrected_pick = {}\ngrid = {}\nloss = {}\ncorrected_loss = {}\n",
                toml_str(&m.family),
                toml_str(&m.knob),
                toml_f64(m.pick),
                toml_list(&m.one_se),
                toml_list(&m.picks),
                toml_f64(m.in_one_se),
                curve_error,
                toml_f64(m.corrected_pick),
                toml_list(&m.grid),
                toml_list6(&m.loss),
                toml_list6(&m.corrected_loss)
            ));
        }
    }
    s
}

const DEFAULT_MODEL: &str = "\n[model]\nfamily = \"tree\"\ngrid = { from = 1, to = 10 }\n";
const DEFAULT_AUDIT: &str = "\n[audit]\nfolds = 5\n";

/// Whether the reference was twiced by the inputs rule of `--twicing auto` (no check ran).
fn rule_twice(fit: &RegressionFit) -> bool {
    fit.twicing.is_none() && fit.twicing_mode == Twicing::Auto && fit.selection.choice.twice
}

/// What the search for inputs the reference can do without found, in one line (`None` when it
/// did not run).
fn input_search_line(sel: &Selection, names: &[String]) -> Option<String> {
    let search = &sel.inputs;
    if !search.searched {
        return None;
    }
    let name = |j: usize| input_names(names, &[j])[0];
    let steps: Vec<String> = search
        .steps
        .iter()
        .map(|st| {
            format!(
                "{} {} ({} ± {})",
                if st.dropped { "left out" } else { "stopped at" },
                name(st.input),
                fmt_num(st.gain),
                fmt_se(st.se)
            )
        })
        .collect();
    let rule = "backward elimination on k-NN's cross-validated R², an input left out when the \
                neighbours do better without it by more than one paired SE";
    let outcome = match (search.kept.len() == names.len(), sel.subset_gain) {
        (true, _) => "every input kept".to_string(),
        (false, Some(g)) => {
            let kept = input_names(names, &search.kept);
            format!(
                "the reference chosen again on {} changes the cross-validated R² of the one on \
                 every input by {} ± {}, {}",
                kept.join(", "),
                fmt_num(g.0),
                fmt_se(g.1),
                if sel.choice.inputs.is_some() {
                    "above one SE: it is kept, so the twin's truth ignores the other inputs and \
                     the noise is measured on these alone"
                } else {
                    "not above one SE: every input is kept"
                }
            )
        }
        (false, None) => "every input kept".to_string(),
    };
    Some(format!(
        "Inputs of the reference ({rule}): {}; {outcome}.",
        steps.join(", ")
    ))
}

/// Lines describing the reference candidates and the choice.
fn reference_lines(fit: &RegressionFit, rule: Rule, names: &[String]) -> Vec<String> {
    let sel = &fit.selection;
    let mut v: Vec<String> = input_search_line(sel, names).into_iter().collect();
    v.push(format!(
        "Reference for E[y | x], candidates by {}-fold cross-validated R² (± SE){}:",
        sel.folds,
        match &sel.choice.inputs {
            Some(c) => format!(", on {} alone", input_names(names, c).join(", ")),
            None => String::new(),
        }
    ));
    for sc in &sel.scores {
        v.push(format!(
            "  {:<7} {}  ({})",
            sc.candidate.name(),
            if sc.r2.is_finite() {
                format!("{} ± {}", fmt_num(sc.r2), fmt_se(sc.se))
            } else if sc.candidate == Candidate::Blend {
                "no blend".to_string()
            } else {
                "not tried".to_string()
            },
            sc.tuned
        ));
    }
    if sel.metric_scores.len() > 1 {
        let tried: Vec<String> = sel
            .metric_scores
            .iter()
            .map(|m| {
                if m.power == 0.0 {
                    format!("γ = 0: {}", fmt_num(m.r2))
                } else {
                    format!(
                        "γ = {}: {} (gain {} ± {}{})",
                        m.power,
                        fmt_num(m.r2),
                        fmt_num(m.gain.0),
                        fmt_se(m.gain.1),
                        if m.clears { "" } else { ", not above one SE" }
                    )
                }
            })
            .collect();
        let kept = match &sel.choice.metric {
            Some(w) => {
                let ws: Vec<String> = names
                    .iter()
                    .zip(w)
                    .map(|(n, v)| format!("{n} {}", fmt_num(*v)))
                    .collect();
                format!("kept: {}", ws.join(", "))
            }
            None => "kept: every input alike".into(),
        };
        v.push(format!(
            "Input weights of the k-NN and local-linear distances (gradient of a bagged-tree \
             pilot to the power γ; cross-validated R² of the chosen candidate, and its paired gain over \
             γ = 0, kept only above one SE): {}; {kept}.",
            tried.join(", ")
        ));
    }
    let once = Choice {
        twice: false,
        ..fit.cv_choice.clone()
    };
    v.push(format!(
        "chosen: {} ({}){}; `run` refits it on the table from `reference`.",
        once.describe(),
        match rule {
            Rule::Best => {
                let r2_of = |c: Candidate| {
                    sel.scores
                        .iter()
                        .find(|sc| sc.candidate == c)
                        .map_or(f64::NAN, |sc| sc.r2)
                };
                if once.family != Candidate::Poly
                    && r2_of(Candidate::Poly) > r2_of(once.family)
                {
                    "highest cross-validated R² but the polynomial's, which did not clear its bar \
                     (above)"
                        .to_string()
                } else {
                    "highest cross-validated R²".to_string()
                }
            }
            Rule::Only(c) if c == once.family => {
                format!("`--reference {}` asked for it", c.name())
            }
            Rule::Only(c) => format!(
                "`--reference {}` asked for it, which this table does not allow (above), so the {} stands in",
                c.name(),
                match once.family {
                    Candidate::Knn => "k-NN reference",
                    Candidate::Forest => "bagged-tree reference",
                    Candidate::LocLin => "local-linear reference",
                    Candidate::Poly => "polynomial reference",
                    Candidate::Blend => "blend",
                    Candidate::Logit | Candidate::Tree => "classification reference",
                }
            ),
        },
        if sel.choice.twice {
            ", then twiced: refitted to its own in-sample residuals and added (Tukey's twicing), \
             which gives back curvature a cross-validated fit rounds off"
        } else {
            ""
        }
    ));
    let sharpened = sel.choice.sharpening_words(&fit.cv_choice);
    if !sharpened.is_empty() {
        v.push(format!(
            "Sharpened for the twin: {sharpened} ({} × the cross-validated tuning, so that the twin's \
             truth keeps more of the curvature the families' bias comes from; `--sharpen 1` keeps \
             the cross-validated values); the scenario records these.",
            crate::fmt::fmt_exact(fit.sharpen)
        ));
    }
    match &fit.twicing {
        Some(c) => v.push(format!(
            "Twicing check (the recipe refitted on the same {} folds, once and twiced): \
             cross-validated R² {} once, {} twiced, so {} (`--twicing on|off` decides instead).",
            sel.folds,
            fmt_num(c.once_r2),
            fmt_num(c.twice_r2),
            if c.twice() { "twiced" } else { "fitted once" }
        )),
        None if sel.choice.twice && rule_twice(fit) => v.push(format!(
            "Twiced as every reference on {} or more inputs is (`--twicing off` fits it once).",
            twin::TWICE_FROM_INPUTS
        )),
        None if sel.choice.twice => v.push("Twiced because `--twicing on` asked for it.".into()),
        None if fit.twicing_mode != Twicing::Off && sel.choice.family == Candidate::Poly => v.push(
            "Not twiced: a polynomial least-squares fit is a projection, so twicing it would give \
             back the same fit."
                .into(),
        ),
        None => {}
    }
    v
}

fn inputs_line(t: &Table, jitter: Option<&Jitter>, eval_size: usize) -> String {
    match jitter {
        Some(j) if !j.is_plain() => {
            let shaken: Vec<String> = t
                .names
                .iter()
                .zip(&j.h)
                .filter(|(_, h)| **h > 0.0)
                .map(|(n, h)| format!("{n} (h = {})", fmt_num(*h)))
                .collect();
            let kept: Vec<&str> = t
                .names
                .iter()
                .zip(&j.h)
                .filter(|(_, h)| **h == 0.0)
                .map(|(n, _)| n.as_str())
                .collect();
            format!(
                "Inputs: smoothed bootstrap of the {} rows (a row drawn with replacement plus Gaussian jitter, Silverman's rule × {}, reflected into the observed range{}): jittered {}{}; {} evaluation points drawn once from the same law.",
                t.rows(),
                j.scale,
                if j.keeps_variance() {
                    ", then shrunk toward the column's mean so its variance does not exceed the table's"
                } else {
                    ""
                },
                shaken.join(", "),
                if kept.is_empty() {
                    String::new()
                } else {
                    format!("; kept on their levels {}", kept.join(", "))
                },
                eval_size
            )
        }
        _ => format!(
            "Inputs: the table's {} rows resampled with replacement; {} evaluation points drawn once the same way.",
            t.rows(),
            eval_size
        ),
    }
}

/// The residuals' shape under the reference (skewness and excess kurtosis beside their
/// Gaussian standard errors), and whether `--noise-shape residuals` would simulate it better.
/// `spread`: the noise spread line found variance that changes with x (then heavy tails are
/// expected, and `--varying` is the first remedy). With varying noise each residual is first
/// divided by σ̂(x) at its row (`sd_rows`): noise
/// whose variance varies has heavy tails of its own, which the raw residuals would report
/// (measured: docs/twin-calibration.md §2.10). `None` with too few rows, or with varying noise
/// and no σ̂(x).
fn shape_line(
    o: &TwinOptions,
    y: &[f64],
    fit: &RegressionFit,
    sd_rows: Option<&[f64]>,
    spread: bool,
) -> Option<String> {
    let s = match (o.varying, sd_rows) {
        (false, _) => twin::ResidualShape::of(y, &fit.f_rows)?,
        (true, Some(sd)) if sd.len() == y.len() && sd.iter().all(|v| *v > 0.0) => {
            let z: Vec<f64> = (0..y.len())
                .map(|i| (y[i] - fit.f_rows[i]) / sd[i])
                .collect();
            twin::ResidualShape::of(&z, &vec![0.0; z.len()])?
        }
        (true, _) => return None,
    };
    let verdict = match (s.non_gaussian(), o.noise_shape) {
        (true, ShapeChoice::Residuals) => "beyond a Gaussian's, and the twin resamples them",
        (true, _) if spread && !o.varying => "beyond a Gaussian's, as noise whose variance changes with x makes them (see the noise spread line: `--varying` first)",
        (true, _) => "beyond a Gaussian's: `--noise-shape residuals` simulates the residuals' own law instead (it matters for trees and ensembles, not for linear smoothers such as k-NN; docs/twin-calibration.md §2.8)",
        (false, _) => "within a Gaussian's",
    };
    Some(format!(
        "Residual shape under the reference{}: skewness {} (a Gaussian's: 0 ± {}), excess kurtosis {} (0 ± {}); {} ({} SE).",
        if o.varying {
            ", each residual divided by σ̂(x) at its row"
        } else {
            ""
        },
        fmt_num(s.skewness),
        fmt_se(s.skewness_se()),
        fmt_num(s.excess_kurtosis),
        fmt_se(s.kurtosis_se()),
        verdict,
        twin::SHAPE_Z
    ))
}

/// Why the noise estimator is the plane when the twin chose it (2 or 3 inputs, no
/// `--noise-estimator`, the reference's cross-validated R² at least [`twin::PLANE_FROM_R2`]);
/// `None` otherwise, so that twins measured with the usual estimator read as before.
fn estimator_line(o: &TwinOptions, fit: &RegressionFit) -> Option<String> {
    let n = fit.noise.as_ref()?;
    if o.noise_estimator.is_some() || n.method != Method::Plane {
        return None;
    }
    Some(format!(
        "Noise estimator: the plane, since the reference explains most of the response (cross-validated R² {} ≥ {}): with little noise next to a curved truth the Gamma test reads curvature as noise (+22% against the plane's +4.6% on an invented smooth process at a quarter of the unit noise, docs/twin-calibration.md §2.11; the threshold is a rule of thumb).",
        fmt_num(twin::chosen_r2(&fit.selection)),
        twin::PLANE_FROM_R2
    ))
}

fn noise_line(n: &NoiseCorrection) -> String {
    let check = if n.pilot_excess.is_finite() {
        format!(
            " Check with a sharp pilot (one unpruned regression tree, {} rows per leaf, its own noise removed on the same tables): bias {}, {} the reference's{}.",
            twin::PILOT_MIN_LEAF,
            fmt_num(n.pilot_correction),
            if n.pilot_excess > 0.0 {
                format!("{} above", fmt_num(n.pilot_excess))
            } else {
                "not above".to_string()
            },
            if n.flagged() {
                "; more than the sampling SE, so the reference may have rounded off a step and σ̂² may be high by up to that much (counted in the SE)"
            } else if n.pilot_excess > 0.0 {
                " (counted in the SE)"
            } else {
                ""
            }
        )
    } else {
        String::new()
    };
    format!(
        "Noise ({}{}{}): raw σ̂² = {} ± {} (its own SE); bias {} subtracted (the estimator on the reference's own fit at the rows, fitted once, before any twicing: the parametric bootstrap's bias, exactly); corrected σ̂² = {} ± {} (sampling SE {}: the larger of the spread over {} {} drawn from that fit, {}, and the estimator's own SE, which also sees heavy-tailed noise; and the reference's possible error){}.{check}",
        n.method.describe(),
        if n.weighted {
            "; neighbour distances weight the inputs as the reference does"
        } else {
            ""
        },
        match n.left_out {
            0 => String::new(),
            r => format!(
                "; the {r} {} where the reference changes most between neighbours left out, since a step there would read as noise",
                if r == 1 { "row" } else { "rows" }
            ),
        },
        fmt_num(n.raw),
        fmt_se(n.raw_se),
        fmt_num(n.correction),
        fmt_num(n.value),
        fmt_se(n.se),
        fmt_se(n.sampling_se),
        n.tables,
        if n.resampled {
            "residual-bootstrap tables (noise resampled from its standardized residuals)"
        } else {
            "parametric-bootstrap tables"
        },
        fmt_se(n.bootstrap_se),
        match (n.floored, n.raw > 0.0) {
            (true, true) => "; the correction exceeded the raw estimate, so σ̂² is floored at 5% of it",
            (true, false) => "; the raw estimate is not above 0, so σ̂² is 0 (a twin without noise)",
            _ => "",
        }
    )
}

fn values(v: &[f64]) -> String {
    v.iter()
        .map(|x| fmt_value(*x))
        .collect::<Vec<_>>()
        .join(", ")
}

/// The fidelity check's lines. `families` are the options' families (empty: the defaults),
/// whose options other than the grid are named, so that a `[model]` of `run` can repeat them:
/// the check's k-NN standardizes its inputs, which the family does not by default, and `run`
/// with plain k-NN put its `*` elsewhere than the recommended pick.
fn fidelity_lines(
    f: &FidelityRecord,
    rows: usize,
    families: &[FidelityFamily],
    classes: bool,
) -> Vec<String> {
    let families = if families.is_empty() {
        default_fidelity_families(rows)
    } else {
        families.to_vec()
    };
    let options = |family: &str| -> String {
        let opts: Vec<&str> = families
            .iter()
            .find(|f| f.family == family)
            .map(|f| {
                f.body
                    .lines()
                    .map(str::trim)
                    .filter(|l| !l.is_empty() && !l.starts_with("grid"))
                    .collect()
            })
            .unwrap_or_default();
        if opts.is_empty() {
            String::new()
        } else {
            format!(" (with {})", opts.join(", "))
        }
    };
    let mut v = vec![format!(
        "Fidelity check: {} {} of {rows} rows drawn from this twin, each twinned again the same way (the twin run at {TWIN_REPLICATES} replicates, each twin of the twin at {}):",
        f.tables,
        if f.tables == 1 { "table" } else { "tables" },
        f.replicates
    )];
    for m in &f.models {
        let inside = (m.in_one_se * m.picks.len() as f64).round() as usize;
        v.push(format!(
            "  {} {}{}: lowest expected loss on the twin at {} (recommended; one-SE set {}), bias-corrected pick {}. Twins of the twin picked {} ({} of {} inside the set), mean curve distance {:.1}%.",
            m.family,
            m.knob,
            options(&m.family),
            fmt_value(m.headline_pick()),
            values(&m.one_se),
            fmt_value(m.corrected_pick),
            values(&m.picks),
            inside,
            m.picks.len(),
            100.0 * m.curve_error
        ));
    }
    v.push("  The shares say how accurate twins of tables like this one typically are, not an error bar for this table. The bias-corrected pick (2·EL − mean EL of the twins of the twin) is a second opinion: on the regression processes of docs/twin-calibration.md the twin's own lowest expected loss was the more reliable pick, so it is the recommended one (for classification twins the choice rests on that measurement too).".into());
    if classes {
        // docs/twin-calibration.md §5.4: 224 (table, family) cases of four invented processes.
        v.push("  For classification twins this gauge is coarse: on four invented processes the curve distance matched the twins' average curve error (1.04-1.12 times it) but did not tell a worse table's twin from a better one, and for trees the shares inside the set ran 0.1-0.3 above how often the twin's pick was inside the truth's one-SE set (for k-NN within 0.15) (docs/twin-calibration.md §5.4).".into());
    }
    v
}

/// What the terminal shows of the fidelity check: its lines and the recommended pick, or that
/// it was skipped.
fn fidelity_output(
    fid: Option<&FidelityRecord>,
    rows: usize,
    families: &[FidelityFamily],
    classes: bool,
) -> String {
    match fid {
        Some(f) => {
            let mut s: String = fidelity_lines(f, rows, families, classes)
                .into_iter()
                .map(|l| format!("{l}\n"))
                .collect();
            s.push_str(&format!("{}\n", recommended_line(f)));
            s
        }
        None => "Fidelity check skipped (--fidelity 0): no fidelity gauge and no bias-corrected pick; `run` the scenario for the twin's lowest expected loss, the recommended pick.\n".into(),
    }
}

/// The headline: the recommended pick of every family of the fidelity check.
fn recommended_line(f: &FidelityRecord) -> String {
    crate::report::twin::recommended_sentence(&crate::report::twin::recommended(f))
        .unwrap_or_default()
}

/// The expected-loss curve, its standard errors, the pick and the one-SE set of model `i`.
fn curve(plan: &Plan, out: &crate::runner::Outcome, i: usize) -> (Vec<f64>, f64, Vec<f64>) {
    let rows = crate::report::rows(plan, out, i);
    let best = crate::report::best_of(&rows);
    (
        rows.iter().map(|r| r.expected_loss()).collect(),
        best.value,
        best.within_one_se,
    )
}

/// Draws table `t` of `n` rows from the twin of `plan` (its input law, reference and noise),
/// from stream `(seed, TWIN_BOOT, FIDELITY_STREAM + t)`.
pub fn draw_from_twin(plan: &Plan, like: &Table, n: usize, t: usize) -> Result<Table, Error> {
    let Source::Synthetic(sp) = &plan.source else {
        return Err(Error::Usage("the fidelity check needs a twin".into()));
    };
    let mut rng = stream(
        plan.seed,
        purpose::TWIN_BOOT,
        twin::FIDELITY_STREAM + t as u64,
    );
    let x = sp.process.draw_inputs(n, &mut rng);
    // A classification twin's labels are drawn from its class probabilities (the reference's,
    // sharpened by the temperature), as `run` draws them.
    let y = match like.task {
        Task::Classify { .. } => crate::dgp::draw_labels(&sp.process.probs_at(x.view())?, &mut rng),
        Task::Regress => {
            let f = sp.process.truth_at(x.view())?;
            let sd = sp.process.sd_at(x.view())?;
            sp.process.respond(&f, &sd, &mut rng)
        }
    };
    Ok(Table {
        path: like.path.clone(),
        names: like.names.clone(),
        x,
        y,
        task: like.task,
        labels: like.labels.clone(),
        target: like.target.clone(),
        encodings: Vec::new(),
        dropped_rows: 0,
        repeats_dropped: 0,
        lines: (2..n + 2).collect(),
        records: Vec::new(),
    })
}

/// What `--noise-shape residuals` writes, said in the scenario's comments and on the terminal.
const RESIDUALS_NOTE: &str = "Noise written as resampled residuals: each simulated noise value is the noise's sd (σ̂, or σ̂(x) when varying) times one of the table's standardized residuals under the reference, drawn with replacement (keeps skew and heavy tails; `run` refits the reference and recomputes them).";

/// The regression fit of a twin of table `t` with the options of `o` (varying noise fits the
/// reference once).
fn fit_table(o: &TwinOptions, t: &Table, source: &str) -> Result<RegressionFit, String> {
    twin::fit_regression_shaped(
        t.x.view(),
        &t.y.to_vec(),
        o.seed,
        o.reference,
        o.noise_estimator,
        if o.varying { Twicing::Off } else { o.twicing },
        twin::NoiseFit {
            resample: o.noise_shape == ShapeChoice::Residuals,
            all_rows: o.varying,
        },
        o.sharpen,
        source,
    )
}

/// What varying noise is, said on the terminal and in the scenario's comments (`None` for a
/// constant sd).
fn varying_line(noise: &TwinNoise) -> Option<String> {
    let TwinNoise::Varying { smooth_k, level } = noise else {
        return None;
    };
    let shape = match smooth_k {
        Some(k) => format!("the average over the {k} nearest rows (chosen by leave-one-out cross-validation of that average on the squared residuals) of the k-NN leave-one-out squared residuals"),
        None => "the k-NN average of the k-NN leave-one-out squared residuals".into(),
    };
    Some(match level {
        Some(l) => format!("Noise written as varying: σ²(x) ∝ {shape}, scaled to a mean of {} over the rows, so that the noise estimate, which weighs the rows unevenly (it leaves some out and meets others more often as neighbours), would read the corrected σ̂² (the shape from the local residuals, the level from the corrected estimate).", fmt_num(*l)),
        None => format!("Noise written as varying: σ²(x) = {shape}, unscaled (no level could be set: the noise estimate did not run, or the smoothed squared residuals carry no weight at the rows the estimator uses)."),
    })
}

/// Whether the noise's variance seems to change with x ([`Reference::spread_test`] at the
/// smoother cross-validation chooses), said on the terminal and in the scenario's comments,
/// with the advice that follows from `docs/twin-calibration.md` §2.10. `None` when the test
/// cannot run (too few rows, no k-NN part).
fn spread_line(o: &TwinOptions, t: &Table, vf: Option<&VaryingFit>) -> Option<(String, bool)> {
    let (r, k, rows) = vf?;
    let (rho, z) = r.spread_test(rows.as_ref().map_or(t.x.view(), |x| x.view()), *k)?;
    let verdict = match (z > twin::SPREAD_Z, o.varying) {
        (true, true) => "the noise's variance seems to change with x, and the twin simulates that (`varying = true`)".to_string(),
        (true, false) => "the noise's variance seems to change with x: `--varying` simulates that (it mattered where the noise is concentrated, little where it changes smoothly: docs/twin-calibration.md §2.10)".to_string(),
        (false, true) => "no sign that the noise's variance changes with x; on tables with constant noise a constant sd (without `--varying`) picked better (docs/twin-calibration.md §2.10)".to_string(),
        (false, false) => "no sign that the noise's variance changes with x".to_string(),
    };
    // A one-sided test: squared residuals that fall where their neighbours' are small (z far
    // below 0; sweep 68 saw -7.8 with a few inputs at 1e12) are not varying noise, and not what
    // constant noise gives either.
    let n = t.rows();
    let verdict = if z < -twin::SPREAD_Z && 4 * *k > n {
        // With most rows in every average the statistic runs below 0 on constant noise: a
        // second reader saw z = -3.8 to -5.6 on honest one-input tables at k = 150 of 200
        // rows (and 3 of 4 more here). Not read as a sign of anything.
        format!(
            "{verdict} (a correlation this far below 0 is what constant noise gave on one-input \
             tables when each average holds most of the rows, as here {k} of {n}: no sign of \
             anything by itself)"
        )
    } else if z < -twin::SPREAD_Z {
        format!(
            "{verdict}; but the correlation is far below 0, which constant noise does not give \
             either: rows far from the rest (outlying inputs) or a residual pattern the \
             reference missed may be behind it"
        )
    } else {
        verdict
    };
    Some((
        format!(
            "Noise spread: Spearman's rho between each row's squared residual and the average of its {k} nearest rows' is {} (z = {}; above {} the noise is called varying, 0 of 270 tables with constant noise and 192 of 240 with varying noise were in docs/twin-calibration.md §2.10): {verdict}.",
            fmt_num(rho),
            fmt_num(z),
            twin::SPREAD_Z
        ),
        z > twin::SPREAD_Z,
    ))
}

/// The noise a twin of table `t` under `fit` writes: the constant sd of the corrected noise
/// estimate, or with `--varying` σ²(x) whose smoother is chosen by leave-one-out
/// cross-validation on the squared residuals and whose level is the corrected noise estimate
/// (see [`Reference::set_varying`]); with `--varying`, also σ̂(x) at the table's rows up to
/// that level (what [`shape_line`] divides the residuals by).
fn twin_noise(
    o: &TwinOptions,
    t: &Table,
    fit: &RegressionFit,
    vf: Option<VaryingFit>,
) -> Result<(TwinNoise, Option<Vec<f64>>), String> {
    let level = fit.noise.map(|n| n.value);
    if !o.varying {
        return Ok((
            TwinNoise::Constant(level.map_or(0.0, |v| v.max(0.0).sqrt())),
            None,
        ));
    }
    let (mut r, k, _) = match vf {
        Some(v) => v,
        None => varying_fit(t, fit)?,
    };
    r.set_varying(t.x.view(), Some(k), None)?;
    let level = level.and_then(|v| twin::varying_level(&r, t.x.view(), v, &fit.noise_weights));
    let sd_rows = r.sd_at_rows(t.x.view()).to_vec();
    Ok((
        TwinNoise::Varying {
            smooth_k: Some(k),
            level,
        },
        Some(sd_rows),
    ))
}

/// The reference fitted with varying noise's squared residuals, the smoother chosen for them
/// ([`Reference::choose_smooth_k`]), and the rows it was fitted on when the recipe left inputs
/// out (`None`: the table's).
type VaryingFit = (Reference, usize, Option<ndarray::Array2<f64>>);

/// [`VaryingFit`] of table `t` under `fit`: its recipe fitted once (σ²(x) comes from the k-NN
/// part, which twicing does not touch). Errors (one line) when the recipe has no k-NN part or
/// the table is too small for a smoother. Fitted once per twin and shared by the noise spread
/// line and the noise.
fn varying_fit(t: &Table, fit: &RegressionFit) -> Result<VaryingFit, String> {
    // With inputs left out (constant noise only) the noise spread is tested on those kept.
    let once = Choice {
        twice: false,
        ..fit.selection.choice.on_kept_inputs()
    };
    let rows = fit
        .selection
        .choice
        .inputs
        .as_ref()
        .map(|c| reference::columns(t.x.view(), c));
    let x = rows.as_ref().map_or(t.x.view(), |x| x.view());
    let r = Reference::fit(x, t.y.view(), 0, &once, true, "the table")?;
    let k = r
        .choose_smooth_k(x)
        .ok_or("too few rows to smooth the squared residuals")?;
    Ok((r, k, rows))
}

/// The twin of a table in memory, with the options of `o` (the fidelity check's twins of the
/// twin): the same pipeline as the first twin.
fn twin_of(o: &TwinOptions, t: &Table, base: &Plan) -> Result<Plan, Error> {
    if let Task::Classify { .. } = t.task {
        // The same pipeline as the first classification twin ([`class_fit`]), the rows
        // resampled as they are.
        let (pick, temp) = class_fit(o, t)?;
        let spec = TwinSpec {
            choice: pick.choice,
            jitter: 0.0,
            keep_variance: false,
            noise: None,
            shape: ShapeChoice::Gaussian,
            train_size: t.rows(),
            sizes: vec![t.rows()],
            // As the written classification twin, which evaluates at its rows (no `eval_size`;
            // `eval_size(o, ..)` read the regression jitter's 1000 points).
            eval_size: t.rows(),
            design: Design::Random,
            eval_at_design: false,
            report: None,
            temperature: temp.tau,
            memory_limit: None,
        };
        let sp = crate::scenario::twin::build(t, "a table drawn from the twin", &spec)
            .map_err(|e| Error::Usage(e.message()))?;
        let mut plan = base.clone();
        plan.source = Source::Synthetic(sp);
        return Ok(plan);
    }
    let fit = fit_table(o, t, "a table drawn from the twin").map_err(Error::Usage)?;
    let (noise, _) = twin_noise(o, t, &fit, None).map_err(Error::Usage)?;
    let spec = TwinSpec {
        choice: fit.selection.choice.clone(),
        jitter: o.jitter,
        keep_variance: o.keep_variance,
        noise: Some(noise),
        shape: o.noise_shape,
        train_size: t.rows(),
        sizes: vec![t.rows()],
        // As the twin itself: the fidelity check's memory check measures the twin's sizes,
        // and these runs used every row whatever `--eval-size` said.
        eval_size: eval_size(o, t.rows()),
        design: Design::Random,
        eval_at_design: false,
        report: None,
        temperature: 1.0,
        memory_limit: None,
    };
    let sp = crate::scenario::twin::build(t, "a table drawn from the twin", &spec)
        .map_err(|e| Error::Usage(e.message()))?;
    let mut plan = base.clone();
    plan.source = Source::Synthetic(sp);
    Ok(plan)
}

/// `|a / b − 1|`, the relative distance of a twin of the twin's expected loss `a` from the
/// twin's `b`: 0 when they are equal, 1 when the twin's is 0 and the other's is not (a twin of
/// separable classes whose expected loss rounds to 0 wrote `curve_error = NaN`, a file nothing
/// could read).
fn relative_distance(a: f64, b: f64) -> f64 {
    if a == b {
        0.0
    } else if b == 0.0 {
        1.0
    } else {
        (a / b - 1.0).abs()
    }
}

/// The fidelity check of a twin (see the module docs): regression, or classification with the
/// labels drawn from the twin's class probabilities and each drawn table twinned by the same
/// choice of reference and temperature. `text_of` gives the scenario text for a `[model]` part
/// and a replicate count.
fn fidelity(
    o: &TwinOptions,
    t: &Table,
    folder: &Path,
    stage: &crate::progress::Stage,
    text_of: &dyn Fn(&str, usize) -> String,
) -> Result<FidelityRecord, Error> {
    stage.at("fidelity check: running the twin");
    let families = if o.fidelity_families.is_empty() {
        default_fidelity_families(t.rows())
    } else {
        o.fidelity_families.clone()
    };
    let models: String = families
        .iter()
        .map(|f| format!("\n[[model]]\nfamily = {}\n{}", toml_str(&f.family), f.body))
        .collect();
    let reps = o.fidelity_replicates.max(2);
    let file = format!("{} (fidelity check)", o.out.display());
    let plan_at = |r: usize| -> Result<Plan, Error> {
        let text = text_of(&models, r);
        let spec = crate::scenario::parse(&text, &file)?;
        Ok(Plan::from_spec(
            &spec,
            &text,
            &file,
            folder,
            &Default::default(),
        )?)
    };
    // The twin itself at the scenario's replicates (what `run` shows), its twins at `reps`. The
    // second plan differs only in R and its blocks (the twin's text sets no `blocks`, so they
    // follow R as `Plan::from_spec` does); cloning it spares a second fit of the reference.
    let twin_plan = plan_at(TWIN_REPLICATES)?;
    let mut plan = twin_plan.clone();
    plan.replicates = reps as u64;
    plan.blocks = plan
        .replicates
        .min(crate::scenario::plan::DEFAULT_MAX_BLOCKS);
    // Sizes against memory before anything is allocated: the check runs the twin and its
    // twins with its own models, which `validate` of the written twin does not see (a wide
    // table at a large --eval-size grew past 1.5 GB with no refusal).
    for p in [&twin_plan, &plan] {
        crate::runner::memory::check_as(
            p,
            o.threads,
            "the fidelity check",
            "a smaller --eval-size, fewer --threads, or --fidelity 0 to skip the check",
        )?;
    }
    let first = crate::runner::run(&twin_plan, o.threads)?;
    let base: Vec<(Vec<f64>, f64, Vec<f64>)> = (0..families.len())
        .map(|i| curve(&twin_plan, &first, i))
        .collect();
    let mut tot: Vec<Vec<(Vec<f64>, f64)>> = vec![Vec::new(); families.len()];
    for k in 0..o.fidelity {
        stage.at(&format!(
            "fidelity check: table {} of {}, twinned again and run",
            k + 1,
            o.fidelity
        ));
        let drawn = draw_from_twin(&plan, t, t.rows(), k)?;
        let p = twin_of(o, &drawn, &plan)?;
        let out = crate::runner::run(&p, o.threads)?;
        for (i, slot) in tot.iter_mut().enumerate() {
            let (el, pick, _) = curve(&p, &out, i);
            slot.push((el, pick));
        }
    }
    let models = families
        .iter()
        .enumerate()
        .map(|(i, f)| {
            let (el, pick, one_se) = &base[i];
            let runs = &tot[i];
            let picks: Vec<f64> = runs.iter().map(|r| r.1).collect();
            let inside = picks.iter().filter(|p| one_se.contains(p)).count();
            let mare = runs
                .iter()
                .map(|(e, _)| {
                    e.iter()
                        .zip(el)
                        .map(|(a, b)| relative_distance(*a, *b))
                        .sum::<f64>()
                        / el.len() as f64
                })
                .sum::<f64>()
                / runs.len().max(1) as f64;
            let grid = &plan.models[i].grid;
            let corrected: Vec<f64> = (0..el.len())
                .map(|g| 2.0 * el[g] - runs.iter().map(|r| r.0[g]).sum::<f64>() / runs.len() as f64)
                .collect();
            let ci = (0..corrected.len()).fold(
                0,
                |b, g| {
                    if corrected[g] < corrected[b] {
                        g
                    } else {
                        b
                    }
                },
            );
            FidelityModel {
                family: f.family.clone(),
                knob: plan.models[i].family.knob().into(),
                pick: *pick,
                one_se: one_se.clone(),
                in_one_se: inside as f64 / picks.len().max(1) as f64,
                picks,
                curve_error: mare,
                corrected_pick: grid[ci],
                grid: grid.clone(),
                loss: el.clone(),
                corrected_loss: corrected,
            }
        })
        .collect::<Vec<FidelityModel>>();
    // The record is written into the scenario, whose reader takes finite numbers only.
    if let Some(m) = models.iter().find(|m| {
        !(m.curve_error.is_finite()
            && m.loss
                .iter()
                .chain(&m.corrected_loss)
                .all(|v| v.is_finite()))
    }) {
        return Err(Error::Usage(format!(
            "{}: the fidelity check of {} gave an expected loss or a curve distance that is not a \
             number; pass --fidelity 0 to write the twin without it",
            t.path.display(),
            m.family
        )));
    }
    Ok(FidelityRecord {
        tables: o.fidelity,
        twin_replicates: Some(TWIN_REPLICATES),
        replicates: reps,
        models,
    })
}

/// The loader's advice for a missing cell, as written for a scenario's `[data]`.
const MISSING_HINT_SCENARIO: &str = "set `missing = \"drop\"` in [data]";
/// The same advice on the `twin` command line.
const MISSING_HINT_COMMAND: &str = "pass `--missing drop` to leave such rows out";

fn load(o: &TwinOptions) -> Result<Table, Error> {
    let opts = TableOptions {
        target: o.target.clone(),
        features: o.features.clone(),
        missing: o.missing,
        target_kind: if o.classes {
            TargetKind::Classes(None)
        } else {
            TargetKind::Numeric
        },
        min_rows: 5,
        // Repeats are counted and left out by the command (it names an example).
        duplicates: Duplicates::Keep,
    };
    dataset::load_csv(&o.table, &opts).map_err(|mut e| {
        // The loader's advice names the scenario key; on this command the option says it.
        e.message = e
            .message
            .replace(MISSING_HINT_SCENARIO, MISSING_HINT_COMMAND)
            .replace(
                "add `task = \"classify\"` or [data.classes]",
                "pass `--classes`",
            )
            .replace(
                "drop `task = \"classify\"` (or list the labels in [data.classes])",
                "drop `--classes`",
            )
            .replace("`features`", "`--features`");
        e.into()
    })
}

/// Largest magnitude a twin's column may reach: the twin squares and sums values (variances,
/// noise estimates, distances), which overflow to infinity a little above 1e154.
const TWIN_VALUE_MAX: f64 = 1e150;

/// Most tables of the fidelity check (`--fidelity`).
pub const MAX_FIDELITY_TABLES: usize = 1000;
/// Most replicates of a fidelity run (`--fidelity-replicates`).
pub const MAX_FIDELITY_REPLICATES: usize = 100_000;

/// Largest magnitude of a twin's target: the noise estimate's standard error sums squares of
/// squared differences (fourth powers), which overflow a little above 1e76; and `run` holds the
/// twin's responses to the same bound as any ([`crate::runner::source::RESPONSE_MAX`]).
const TWIN_TARGET_MAX: f64 = crate::runner::source::RESPONSE_MAX;

/// Refuses a table whose values a twin cannot square and sum, naming the column.
fn check_scale(t: &Table) -> Result<(), Error> {
    let columns =
        t.x.columns()
            .into_iter()
            .zip(t.names.iter())
            .chain(std::iter::once((t.y.view(), &t.target)));
    for (col, name) in columns {
        let big = col.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
        let (max, what) = if name == &t.target {
            (
                TWIN_TARGET_MAX,
                "the noise estimate's standard error sums fourth powers of the target",
            )
        } else {
            (TWIN_VALUE_MAX, "a twin squares and sums its values")
        };
        if big > max {
            return Err(Error::Usage(format!(
                "{}: column `{}` reaches {big:e}; {what}, which overflows beyond about {max:e}; \
                 rescale the column (for example divide it by a power of ten)",
                t.path.display(),
                name
            )));
        }
        // A spread hidden by an offset (an input uniform on [4e11, 4e11 + 1]): the
        // reference's k-NN and local-linear candidates standardize the inputs and read it as
        // rounding, i.e. as constant (their cross-validated R² fell from 0.91 to -0.03).
        if let (true, Some((sd, size))) =
            (name != &t.target, crate::scenario::plan::offset_hidden(col))
        {
            return Err(Error::Usage(format!(
                "{}: column `{name}` has a standard deviation of {sd:.2e} beside values of \
                 {size:.3e}, below {:e} of their size: the reference's k-NN and local-linear \
                 candidates standardize the inputs and read a spread below a tenth of that as \
                 rounding, i.e. as constant; subtract an offset from the column",
                t.path.display(),
                crate::scenario::plan::offset_share()
            )));
        }
        // The same powers underflow to 0 for tiny values: a twin of a target of size 1e-300
        // was written with noise 0 and no candidate reference tried.
        let min = 1.0 / max;
        if big > 0.0 && big < min {
            return Err(Error::Usage(format!(
                "{}: column `{}` is at most {big:.1e} in size; {what}, which underflow to 0 \
                 below about {min:.0e}; rescale the column (for example multiply it by a power of \
                 ten)",
                t.path.display(),
                name
            )));
        }
    }
    Ok(())
}

/// Checks the scenario the twin is about to write as `run` will plan it. A refusal names the
/// key of the scenario that was never written, so it is reported as the command's error.
fn check_plans(text: &str, out: &Path, folder: &Path) -> Result<Plan, Error> {
    check_written(text, out, folder).map_err(|e| match e {
        Error::Scenario(s) => {
            // The hint only where the refusal is about the evaluation points (it was given for
            // a tree's `min_leaf`, and `--eval-size` is refused with `--classes`).
            let hint = if s.key.as_deref().is_some_and(|k| k.contains("eval")) {
                " (--eval-size sets its evaluation points)"
            } else {
                ""
            };
            Error::Usage(format!(
                "{} was not written: the twin scenario it would hold is refused at {}: {}{hint}",
                out.display(),
                s.key
                    .map_or("its text".to_string(), |k| format!("key `{k}`")),
                s.message
            ))
        }
        other => other,
    })
}

fn check_written(text: &str, out: &Path, folder: &Path) -> Result<Plan, Error> {
    let spec = crate::scenario::parse(text, &out.display().to_string())?;
    Ok(Plan::from_spec(
        &spec,
        text,
        &out.display().to_string(),
        folder,
        &Default::default(),
    )?)
}

/// What the temperature calibration found, in one sentence.
fn temperature_line(t: &reference::Temperature, shares_only: bool) -> String {
    if shares_only {
        return "Temperature 1: not calibrated, since the reference is the class shares alone (a \
                temperature could only tilt them toward the commonest class, which no input \
                was shown to predict)."
            .into();
    }
    if t.at_one.is_nan() {
        return "Temperature 1: not calibrated (too few rows or classes to cross-validate the \
                yardstick, or the reference could not be refitted)."
            .into();
    }
    let what = format!(
        "the k-NN classifier of the table's cross-validation errs {} on the table and {} on \
         labels drawn from the reference's class probabilities ({} tables)",
        fmt_num(t.observed),
        fmt_num(t.at_one),
        reference::TEMPERATURE_DRAWS
    );
    if t.tau <= crate::scenario::twin::TEMPERATURE_MIN && t.at_tau > t.observed {
        // Digits enough to tell the two apart (30 classes printed "0.0667, more than 0.0667").
        let d = (3..=17)
            .find(|&d| format!("{:.*}", d, t.at_tau) != format!("{:.*}", d, t.observed))
            .unwrap_or(17);
        let (at, table) = (
            format!("{:.*}", d, t.at_tau),
            format!("{:.*}", d, t.observed),
        );
        format!(
            "Temperature {} (its lower bound): {what}, so the probabilities are too close to the \
             middle; sharpened as far as the bound allows, the twin's labels still give {at}, \
             more than the table's {table}: this twin's expected losses run high.",
            fmt_num(t.tau)
        )
    } else if t.tau < 1.0 {
        format!(
            "Temperature {}: {what}, so the probabilities are too close to the middle; \
             sharpened (p ∝ p^(1/{})) until the twin's labels give the table's error ({}).",
            fmt_num(t.tau),
            fmt_num(t.tau),
            fmt_num(t.at_tau)
        )
    } else {
        format!("Temperature 1: {what}, no more than on the table, so the probabilities are kept.")
    }
}

/// What [`reference::select_class_inputs`] chose, in one line (printed and written in the
/// scenario's comments).
pub fn class_inputs_line(t: &Table, sel: &reference::ClassInputs) -> String {
    let name = |j: usize| t.names.get(j).cloned().unwrap_or_else(|| format!("#{j}"));
    let p = t.x.ncols();
    let head = "inputs of the logistic polynomial and the probability tree";
    if !sel.searched {
        return format!(
            "{head}: all {p} ({}), not searched ({})",
            t.names.join(", "),
            if p < 2 {
                "a single input".to_string()
            } else if p > reference::CLASS_SELECT_MAX_INPUTS {
                format!("more than {} inputs", reference::CLASS_SELECT_MAX_INPUTS)
            } else {
                "too few rows or classes".to_string()
            }
        );
    }
    let rule = "backward elimination on the k-NN shares' cross-validated log-loss, an input left \
                out only when that lowers it by more than one standard error of the paired \
                difference";
    let dropped: Vec<String> = sel
        .steps
        .iter()
        .filter(|s| s.dropped)
        .map(|s| {
            format!(
                "{} (log-loss lower by {} ± {} without it)",
                name(s.input),
                fmt_num(s.gain),
                fmt_se(s.se)
            )
        })
        .collect();
    let next = sel
        .steps
        .iter()
        .find(|s| !s.dropped)
        .map(|s| {
            format!(
                "; the next candidate, {}, {} by {} ± {} and stays",
                name(s.input),
                if s.gain > 0.0 {
                    "lowered it only"
                } else {
                    "raised it"
                },
                fmt_num(s.gain.abs()),
                fmt_se(s.se)
            )
        })
        .unwrap_or_default();
    match &sel.metric {
        None => format!(
            "{head}: all {p} ({}) by {rule}{next}; the k-NN shares keep every input",
            t.names.join(", ")
        ),
        Some(w) => {
            let kept: Vec<String> = reference::positive_columns(w)
                .into_iter()
                .map(name)
                .collect();
            format!(
                "{head}: {} (their recipe's `metric`); left out {} by {rule}{next}; the k-NN \
                 shares keep every input",
                kept.join(", "),
                dropped.join(", ")
            )
        }
    }
}

/// A classification twin's reference and temperature: the inputs that help the k-NN shares
/// kept for the logistic polynomial and the probability tree (docs/twin-calibration.md §5.3), the
/// reference chosen by cross-validated log-loss ([`class_reference_on`]; its first line says
/// which inputs were kept), and the temperature calibrated for it. Every reference is
/// calibrated: on 80 tables of two processes the candidates were not designed on
/// (docs/twin-calibration.md §5.2) the temperature brought the curve error of twins with a
/// logistic-polynomial reference from 13.6% to 9.3%.
fn class_fit(o: &TwinOptions, t: &Table) -> Result<(ClassPick, reference::Temperature), Error> {
    let sel = reference::select_class_inputs(t, o.seed)?;
    let f = &sel.plain;
    let mut pick = class_reference_on(t, f, sel.metric.as_deref(), o.seed, o.reference)?;
    pick.lines.insert(0, class_inputs_line(t, &sel));
    let temp = if pick.shares_only {
        reference::Temperature {
            tau: 1.0,
            observed: 1.0 - f.quality,
            at_one: f64::NAN,
            at_tau: f64::NAN,
        }
    } else {
        reference::calibrate_temperature(
            t,
            f,
            &pick.choice,
            o.seed,
            crate::scenario::twin::TEMPERATURE_MIN,
        )
    };
    Ok((pick, temp))
}

/// The reference a classification twin keeps, with what cross-validation said of each
/// candidate.
pub struct ClassPick {
    /// The recipe written in the scenario.
    pub choice: Choice,
    /// Its cross-validated accuracy and standard error.
    pub accuracy: (f64, f64),
    /// One line per candidate tried (log-loss and accuracy), and the verdict.
    pub lines: Vec<String>,
    /// The kept candidate in words, with its knobs.
    pub words: String,
    /// The reference is the class shares alone (no candidate beat them by one standard error):
    /// the temperature is not calibrated.
    pub shares_only: bool,
}

/// Chooses a classification twin's reference among the k-NN shares (already cross-validated in
/// `f`), the logistic polynomial and the probability tree by cross-validated log-loss on the
/// same folds ([`reference::classes::cross_validate`]); `rule` may ask for one of them. Every
/// input is used; [`class_reference_on`] takes the inputs of the polynomial and the tree.
pub fn class_reference(t: &Table, f: &TwinFit, seed: u64, rule: Rule) -> Result<ClassPick, Error> {
    class_reference_on(t, f, None, seed, rule)
}

/// [`class_reference`] with the logistic polynomial and the probability tree tuned and written
/// on the inputs of positive weight in `inputs` (one weight per input, as
/// [`reference::select_class_inputs`] chooses them; recorded as the recipe's `metric`, so `run`
/// refits them on the same inputs). The k-NN shares keep every input.
pub fn class_reference_on(
    t: &Table,
    f: &TwinFit,
    inputs: Option<&[f64]>,
    seed: u64,
    rule: Rule,
) -> Result<ClassPick, Error> {
    use reference::classes::{self, Scored};
    let classes = match t.task {
        Task::Classify { classes } => classes,
        Task::Regress => 0,
    };
    let n = t.rows();
    let folds = reference::CV_FOLDS.min(n);
    let fold = reference::cv_folds(n, seed);
    // The logistic polynomial and the tree are tuned on the inputs kept.
    let xs = inputs.map(|w| {
        t.x.select(ndarray::Axis(1), &reference::positive_columns(w))
    });
    let xv = xs.as_ref().map_or(t.x.view(), |a| a.view());
    let cv = classes::cross_validate(xv, t.y.view(), classes, &fold, folds, seed);
    let with_metric = |c: Choice| Choice {
        metric: inputs.map(<[f64]>::to_vec),
        ..c
    };
    let (ll, ll_se) = f.cv_logloss.unwrap_or((f64::NAN, f64::NAN));
    let knn = Scored {
        logloss: ll,
        logloss_se: ll_se,
        accuracy: f.quality,
        accuracy_se: f.quality_stderr,
    };
    let mut cands: Vec<(Candidate, Choice, Scored, String)> = vec![(
        Candidate::Knn,
        Choice::knn(f.k, true),
        knn,
        format!("k-NN shares (k = {})", f.k),
    )];
    if let Some((d, r, sc)) = cv.logit {
        cands.push((
            Candidate::Logit,
            with_metric(Choice::logit(d, r)),
            sc,
            format!(
                "logistic polynomial (degree {d}, ridge {})",
                crate::fmt::fmt_exact(r)
            ),
        ));
    }
    if let Some((d, sc)) = cv.tree {
        cands.push((
            Candidate::Tree,
            // A table of fewer rows than the leaf size records its row count (the recipe's
            // `min_leaf` is at most the rows; 7 rows wrote 10 and the twin was refused).
            with_metric(Choice::tree(reference::TreeParams {
                depth: d,
                min_leaf: classes::TREE_MIN_LEAF.min(n),
                seed,
            })),
            sc,
            format!(
                "probability tree (depth {d}, leaves of at least {} rows)",
                classes::TREE_MIN_LEAF.min(n)
            ),
        ));
    }
    // The class shares alone (each training fold's add-one shares, scored on its held-out rows):
    // the twin's truth when no candidate beats them by more than one standard error of its own
    // cross-validated log-loss (the one-SE rule toward the simplest model: Breiman, Friedman,
    // Olshen and Stone 1984, §3.4.3; Hastie, Tibshirani and Friedman 2009, §7.10). Labels drawn
    // independently of 5 inputs (400 rows) gave a logistic polynomial a lower log-loss by
    // chance, sharpened by the temperature into a twin whose Bayes error was 0.39 where every
    // classifier errs 0.45 (docs/twin-calibration.md §5.5).
    let shares = class_shares_cv(t, classes, &fold, folds);
    let (pick, shares_only) = match rule {
        Rule::Best => {
            let best = (0..cands.len())
                .filter(|&i| cands[i].2.logloss.is_finite())
                .fold(0, |b, i| {
                    if cands[i].2.logloss < cands[b].2.logloss {
                        i
                    } else {
                        b
                    }
                });
            let unbeaten = |sc: &Scored| {
                cands.iter().all(|c| {
                    !c.2.logloss.is_finite() || sc.logloss <= c.2.logloss + c.2.logloss_se.max(0.0)
                })
            };
            match shares {
                Some(sc) if unbeaten(&sc) => {
                    cands.push((
                        Candidate::Knn,
                        Choice::knn(n, true),
                        sc,
                        format!("class shares alone (k-NN shares with k = all {n} rows)"),
                    ));
                    (cands.len() - 1, true)
                }
                _ => (best, false),
            }
        }
        Rule::Only(c) => cands
            .iter()
            .position(|x| x.0 == c)
            .ok_or_else(|| {
                Error::Usage(format!(
                    "{}: --reference {} cannot be fitted on this table ({} rows, {} inputs, {} \
                 classes: fewer than 4 rows per basis column in a training fold, more than {} \
                 coefficients, beyond the cross-validation's cost budget, or a fit that failed); \
                 use best or one that was fitted here: {}",
                    t.path.display(),
                    c.name(),
                    n,
                    t.x.ncols(),
                    classes,
                    classes::MAX_LOGIT_PARAMS,
                    cands
                        .iter()
                        .map(|x| x.0.name())
                        .collect::<Vec<_>>()
                        .join(", ")
                ))
            })
            .map(|i| (i, false))?,
    };
    let mut lines = vec![format!(
        "reference candidates, {folds}-fold cross-validated log-loss (lower is better) and accuracy:"
    )];
    if let (Some(sc), false) = (shares.filter(|_| rule == Rule::Best), shares_only) {
        lines.push(format!(
            "  class shares alone: log-loss {} ± {}, accuracy {} ± {} (a candidate beat them by more \
             than one standard error of its own log-loss)",
            fmt_num(sc.logloss),
            fmt_se(sc.logloss_se),
            fmt_num(sc.accuracy),
            fmt_se(sc.accuracy_se),
        ));
    }
    for (i, (_, _, sc, words)) in cands.iter().enumerate() {
        lines.push(format!(
            "  {words}: log-loss {} ± {}, accuracy {} ± {}{}",
            fmt_num(sc.logloss),
            fmt_se(sc.logloss_se),
            fmt_num(sc.accuracy),
            fmt_se(sc.accuracy_se),
            if i == pick { "  <- kept" } else { "" }
        ));
    }
    let (_, choice, sc, words) = cands.swap_remove(pick);
    Ok(ClassPick {
        choice,
        accuracy: (sc.accuracy, sc.accuracy_se),
        lines,
        words: format!(
            "{words}{}",
            match rule {
                Rule::Best if shares_only => {
                    ": no candidate lowered the cross-validated log-loss by more than one \
                     standard error of its own, so the twin's classes do not depend on the inputs"
                }
                Rule::Best => ", the lowest cross-validated log-loss",
                Rule::Only(_) => ", as --reference asked",
            }
        ),
        shares_only,
    })
}

/// The inputs of `t` that are a linear function of the target (|Pearson correlation| within
/// 1e-9 of 1): a copy of the response, a change of units, or, for two classes, the labels.
fn copies_of_target(t: &Table) -> Vec<usize> {
    let y = t.y.view();
    let n = y.len() as f64;
    let my = y.sum() / n;
    let syy: f64 = y.iter().map(|v| (v - my) * (v - my)).sum();
    if syy.is_nan() || syy <= 0.0 {
        return Vec::new();
    }
    (0..t.x.ncols())
        .filter(|&j| {
            let x = t.x.column(j);
            let mx = x.sum() / n;
            let (mut sxy, mut sxx) = (0.0, 0.0);
            for (a, b) in x.iter().zip(y.iter()) {
                sxy += (a - mx) * (b - my);
                sxx += (a - mx) * (a - mx);
            }
            sxx > 0.0 && (sxy.abs() / (sxx * syy).sqrt() - 1.0).abs() < 1e-9
        })
        .collect()
}

/// The cross-validated scores of the class shares alone: each training fold's add-one shares of
/// the labels (what the recorded k-NN shares over every row are on the whole table), scored on
/// its held-out rows (`None` with fewer than 2 classes or folds).
fn class_shares_cv(
    t: &Table,
    classes: usize,
    fold: &[usize],
    folds: usize,
) -> Option<reference::classes::Scored> {
    let n = t.rows();
    if classes < 2 || folds < 2 || n < 2 {
        return None;
    }
    let labels: Vec<usize> = t.y.iter().map(|&v| v as usize).collect();
    let (mut ll, mut hit) = (vec![0.0; n], vec![0.0; n]);
    let mut shares = vec![0.0; classes];
    let mut counts = vec![0u32; classes];
    for f in 0..folds {
        counts.iter_mut().for_each(|c| *c = 0);
        for i in (0..n).filter(|&i| fold[i] != f) {
            counts[labels[i]] += 1;
        }
        if counts.iter().all(|&c| c == 0) {
            return None;
        }
        reference::classes::leaf_shares(&counts, classes, &mut shares);
        for i in (0..n).filter(|&i| fold[i] == f) {
            reference::classes::score_row(&shares, labels[i], &mut ll[i], &mut hit[i]);
        }
    }
    Some(reference::classes::scored(&ll, &hit))
}

/// A classification twin's Bayes error (the mean over the table's rows of `1 − max_c p̂_c(x)`
/// under its reference, the noise term of its runs) beside the table's own cross-validated error
/// of that reference. A faithful twin's Bayes error is below the error any classifier reaches on
/// the table; a reference that averages class probabilities (k-NN shares) pulls them toward the
/// middle, and on two invented processes (docs/twin-calibration.md §5) that put the twin's Bayes
/// error 0.07-0.09 above the truth before the temperature, 0.004 and 0.035 after.
fn blur_line(plan: &Plan, accuracy: (f64, f64), shares_only: bool) -> Result<String, Error> {
    let crate::scenario::Source::Synthetic(s) = &plan.source else {
        return Ok(String::new());
    };
    let Some(rows) = s.process.empirical_rows() else {
        return Ok(String::new());
    };
    let p = s.process.probs_at(rows.view())?;
    let bayes = p
        .rows()
        .into_iter()
        .map(|r| 1.0 - r.iter().copied().fold(0.0_f64, f64::max))
        .sum::<f64>()
        / p.nrows().max(1) as f64;
    let (acc, se) = accuracy;
    let cv_error = 1.0 - acc;
    // Above by more than one standard error of the table's error (and more than rounding): a
    // separable table gave 3e-8 against 0 ± 0 and was called blurred.
    let verdict = if shares_only {
        "the error of the class shares alone, as a twin whose classes do not depend on the \
         inputs has (every model's expected loss on it is at least that; on the table no \
         candidate was shown to do better)"
    } else if bayes > cv_error + se.max(0.0) + 1e-6 {
        "above it, which no faithful twin is (the best possible classifier cannot err more \
         than the reference does on the table): the reference blurs the class probabilities, \
         so this twin's expected losses run high; read the shape of its curves, not their level"
    } else if bayes > cv_error {
        "above it, but by less than one standard error of the table's error, so the table \
         cannot tell; a faithful twin's is below it, and this one's expected losses may run high"
    } else {
        "below it, as a faithful twin's must be (a necessary check, not a measure of closeness: a \
         twin can be below it and still above the truth)"
    };
    Ok(format!(
        "Bayes error of the twin {} against the table's cross-validated error of the reference {} \
         ± {}: {verdict} (docs/twin-calibration.md §5).",
        fmt_num(bayes),
        fmt_num(cv_error),
        fmt_se(se)
    ))
}

/// The text of a classification twin's scenario (`table_rel`: the CSV relative to the
/// scenario's folder), with the fidelity check's record when there is one (its lines among the
/// comments and its `[data.fit_report]`), a `[model]` part and a replicate count.
#[allow(clippy::too_many_arguments)]
pub fn classification_text(
    o: &TwinOptions,
    t: &Table,
    pick: &ClassPick,
    table_rel: &str,
    temp: &reference::Temperature,
    blur: Option<&str>,
    fidelity: Option<&FidelityRecord>,
    model: &str,
    reps: usize,
) -> String {
    let mut comments = vec![
        format!(
            "Inputs: the table's {} rows resampled with replacement; truth: {},",
            t.rows(),
            pick.words
        ),
        format!(
            "cross-validated accuracy {:.4} ± {:.4}; refitted on the table at plan time.",
            pick.accuracy.0, pick.accuracy.1
        ),
    ];
    comments.extend(pick.lines.iter().map(|l| l.trim_start().to_string()));
    comments.push(temperature_line(temp, pick.shares_only));
    comments.extend(blur.map(str::to_string));
    if let Some(f) = fidelity {
        comments.push(recommended_line(f));
        comments.extend(fidelity_lines(f, t.rows(), &o.fidelity_families, true));
    }
    let mut s = header_and_top(o, t, &comments, reps);
    s.push_str(&data_common(o, t, table_rel));
    s.push_str(&reference_line(&pick.choice, &t.names));
    s.push('\n');
    let labels: Vec<String> = t.labels.iter().map(|l| toml_str(l)).collect();
    s.push_str(&format!(
        "\n[data.classes]\nlabels = [{}]\n",
        labels.join(", ")
    ));
    if temp.tau < 1.0 {
        s.push_str(&format!(
            "temperature = {}  # sharpens the reference's class probabilities, p ∝ p^(1/temperature) (calibrated; 1: as they are)\n",
            toml_f64(temp.tau)
        ));
    }
    if fidelity.is_some() {
        s.push_str(&fit_report_text(None, None, fidelity));
    }
    s.push_str(model);
    s
}

/// `lossprism twin`: loads the table, fits the twin, runs the fidelity check, writes the
/// scenario to `o.out` and returns the lines to print.
pub fn command(o: &TwinOptions) -> Result<String, Error> {
    if !(o.sharpen.is_finite() && (twin::MIN_SHARPEN..=1.0).contains(&o.sharpen)) {
        return Err(Error::Usage(format!(
            "--sharpen must be between {} and 1, got {}",
            twin::MIN_SHARPEN,
            crate::fmt::fmt_exact(o.sharpen)
        )));
    }
    if !(o.jitter.is_finite() && (0.0..=crate::scenario::twin::MAX_JITTER).contains(&o.jitter)) {
        return Err(Error::Usage(format!(
            "--jitter must be between 0 and {}, got {}",
            crate::scenario::twin::MAX_JITTER,
            crate::fmt::fmt_exact(o.jitter)
        )));
    }
    if o.seed > i64::MAX as u64 {
        // The seed is written in the scenario (`seed`, the reference's `seed`), and a TOML
        // integer stops at 2^63 − 1: refused before the fit rather than when the written file
        // is read back.
        return Err(Error::Usage(format!(
            "--seed must be at most {} (it is written in the scenario, whose integers are \
             64-bit signed), got {}",
            i64::MAX,
            o.seed
        )));
    }
    if o.eval_size < 1 || o.eval_size > 10_000_000 {
        return Err(Error::Usage(format!(
            "--eval-size must be between 1 and 10000000, got {}",
            o.eval_size
        )));
    }
    for (flag, got, max) in [
        ("--fidelity", o.fidelity, MAX_FIDELITY_TABLES),
        (
            "--fidelity-replicates",
            o.fidelity_replicates,
            MAX_FIDELITY_REPLICATES,
        ),
    ] {
        if got > max {
            return Err(Error::Usage(format!(
                "{flag} must be at most {max}, got {got} (each fidelity table twins the table \
                 again and runs it; the default 5 tables of 100 replicates take seconds)"
            )));
        }
    }
    // The scenario names the table by its path, and `run` reads it again: a pipe would be
    // empty by then (devices are refused when the table is read).
    if std::fs::metadata(&o.table)
        .is_ok_and(|m| std::os::unix::fs::FileTypeExt::is_fifo(&m.file_type()))
    {
        return Err(Error::Usage(format!(
            "{}: a pipe, not a file; the twin scenario names the table by its path and `run` \
             reads it again, so save the table to a file first",
            o.table.display()
        )));
    }
    // The output path is checked before the fit (a missing folder, an input named as output).
    crate::output::check_one_of(
        &[("the table", o.table.as_path())],
        "--out",
        o.out.as_path(),
        crate::output::Kind::Twin,
    )?;
    let t = load(o)?;
    check_scale(&t)?;
    let duplicates = o.duplicates.unwrap_or(if o.classes {
        Duplicates::Keep
    } else {
        Duplicates::Drop
    });
    let repeats = dataset::repeated_rows(&t);
    let example = repeats.first().map(|&(i, j)| (t.lines[i], t.lines[j]));
    let t = if duplicates == Duplicates::Drop {
        dataset::distinct_rows(&t).0
    } else {
        t
    };
    if !o.classes
        && duplicates == Duplicates::Drop
        && !repeats.is_empty()
        && t.rows() < select::FOLDS + 1
    {
        return Err(Error::Usage(format!(
            "{}: {} distinct rows after leaving out {} that {} an earlier row exactly \
             (inputs and target); a regression twin needs at least {} (`--duplicates keep` keeps \
             the repeats as separate observations)",
            o.table.display(),
            t.rows(),
            repeats.len(),
            if repeats.len() == 1 {
                "repeats"
            } else {
                "repeat"
            },
            select::FOLDS + 1
        )));
    }
    let o_dup = TwinOptions {
        duplicates: Some(duplicates),
        ..o.clone()
    };
    let o = &o_dup;
    // Written to standard output, the scenario is saved by the user where they run this.
    let to_stdout = crate::output::is_stdout(&o.out);
    let folder = match o.out.parent() {
        Some(p) if !p.as_os_str().is_empty() && !to_stdout => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let rel = relative_path(&o.table, &folder);
    // The scenario is UTF-8 text: a path with bytes that are not UTF-8 would be written mangled
    // and name another file (or none).
    let resolves = |p: &Path| std::fs::canonicalize(p).ok();
    let named = if Path::new(&rel).is_absolute() {
        PathBuf::from(&rel)
    } else {
        folder.join(&rel)
    };
    if resolves(&named).is_none() || resolves(&named) != resolves(&o.table) {
        return Err(Error::Usage(format!(
            "{}: its path cannot be written in the twin scenario (a UTF-8 text file) so that `run` finds the table again (a name that is not UTF-8?); rename or move the table",
            o.table.display()
        )));
    }
    let mut out = format!(
        "{}: {} rows, {} input{} ({})\n",
        crate::error::shown(&o.table),
        t.rows(),
        t.x.ncols(),
        if t.x.ncols() == 1 { "" } else { "s" },
        t.names.join(", ")
    );
    if o.missing == Missing::Drop {
        out.push_str(&format!(
            "  rows dropped: {} (a missing or non-numeric cell; --missing drop, written as missing = \"drop\")\n",
            t.dropped_rows
        ));
    }
    if let Some((line, earlier)) = example {
        out.push_str(&format!(
            "  rows repeating an earlier row exactly (inputs and target): {}, e.g. line {line} repeats line {earlier}; {}\n",
            repeats.len(),
            match duplicates {
                Duplicates::Drop => "left out, each distinct row kept once (copies on both sides of a cross-validation split would show the reference the answer and make the noise look smaller; --duplicates keep if they are separate observations), written as duplicates = \"drop\"",
                Duplicates::Keep => "kept as separate observations (--duplicates drop if they are copied records)",
            }
        ));
    }
    for e in &t.encodings {
        out.push_str(&format!("  {}\n", e.describe()));
    }
    for j in copies_of_target(&t) {
        // Sweep 68: a column equal to the target gave a twin without noise whose truth was that
        // column, and nothing said so.
        let consequence = match t.task {
            Task::Regress => "the twin's truth will be that column and its noise about 0",
            Task::Classify { .. } => "the twin's classes will follow that column almost surely",
        };
        out.push_str(&format!(
            "  note: input `{}` is the target up to a linear change of scale (|correlation| 1 to \
             9 digits): {consequence}; if it is the target leaking into the inputs, leave it out \
             with --features\n",
            crate::fmt::clip(t.names.get(j).map_or("?", String::as_str), 80)
        ));
    }
    let text = match t.task {
        Task::Classify { .. } => {
            // Inputs that do not help the k-NN shares are left out of the logistic polynomial
            // and the probability tree (docs/twin-calibration.md §5.3).
            let (pick, temp) = class_fit(o, &t)?;
            let text_of = |blur: Option<&str>, fid: Option<&FidelityRecord>, model: &str, reps| {
                classification_text(o, &t, &pick, &rel, &temp, blur, fid, model, reps)
            };
            let model = format!("{DEFAULT_MODEL}{DEFAULT_AUDIT}");
            let plan = check_plans(
                &text_of(None, None, &model, TWIN_REPLICATES),
                &o.out,
                &folder,
            )?;
            let blur = blur_line(&plan, pick.accuracy, pick.shares_only)?;
            // The twins of the twin are evaluated at their rows (`twin_of`), as the twin is.
            let fid = if o.fidelity > 0 {
                let stage = crate::progress::Stage::new();
                Some(fidelity(o, &t, &folder, &stage, &|models, reps| {
                    text_of(Some(&blur), None, models, reps)
                })?)
            } else {
                None
            };
            let text = text_of(Some(&blur), fid.as_ref(), &model, TWIN_REPLICATES);
            for l in &pick.lines {
                out.push_str(l);
                out.push('\n');
            }
            out.push_str(&format!("reference: {}\n", pick.words));
            out.push_str("inputs: the table's rows resampled with replacement (classification twins resample rows as they are)\n");
            out.push_str(&temperature_line(&temp, pick.shares_only));
            out.push('\n');
            out.push_str(&blur);
            out.push('\n');
            out.push_str(&fidelity_output(
                fid.as_ref(),
                t.rows(),
                &o.fidelity_families,
                true,
            ));
            text
        }
        Task::Regress => {
            if o.noise_estimator == Some(Method::Gsjs) && t.x.ncols() != 1 {
                return Err(Error::Usage(format!(
                    "--noise-estimator gsjs needs exactly one input; {} has {} ({}); use plane, gamma or nn",
                    o.table.display(),
                    t.x.ncols(),
                    t.names.join(", ")
                )));
            }
            if o.noise_estimator == Some(Method::Plane) && t.x.ncols() > noise::PLANE_MAX_INPUTS {
                return Err(Error::Usage(format!(
                    "--noise-estimator plane runs on at most {} inputs; {} has {}; use gamma or nn",
                    noise::PLANE_MAX_INPUTS,
                    o.table.display(),
                    t.input_count_words()
                )));
            }
            let stage = crate::progress::Stage::new();
            stage.at(&format!(
                "twin of {} rows: choosing the reference by cross-validation, then the noise",
                t.rows()
            ));
            let fit = fit_table(o, &t, &rel)
                .map_err(|m| Error::Usage(format!("{}: {m}", o.table.display())))?;
            // A variance is never negative; the Gamma test's intercept can be, and a twin
            // "corrected" a raw −21 ± 3.8 into a noise with an SE fourteen times its size.
            // Within two standard errors or a tenth of the responses' variance of 0 it is
            // sampling (little noise), corrected as before.
            if let Some(n) = fit.noise.as_ref() {
                if let Some(why) =
                    crate::dataset::noise::negative_refusal(n.method, n.raw, n.raw_se, &t)
                {
                    return Err(Error::Usage(format!(
                        "{}: {why}; fix the table, or pass --noise-estimator nn or plane (never \
                         negative)",
                        o.table.display()
                    )));
                }
                // A twin's noise must be told apart from 0. A table without noise gives an
                // estimate near 0 with a small standard error, and its twin has almost no noise,
                // rightly; a small estimate (below a tenth of the responses' variance) whose
                // standard error is larger than that says nothing (40 rows of pure noise on 100
                // inputs: raw -0.78 ± 0.74 against a variance of 0.73 wrote sd = 0, and the
                // twin's expected losses were 0.02-0.03 against at least 0.73; on 30 inputs
                // 0.014 ± 0.45 against 1.1). A larger estimate with a large standard error is a
                // small table's honest uncertainty, and is written as before.
                // And the twin must then also fail to hold the table's spread: its truth's
                // variance at the rows plus its noise below half the responses' variance (a
                // table without noise whose reference fits it holds nearly all of it).
                let var = crate::dataset::noise::response_variance(t.y.view());
                let share = crate::dataset::noise::NEGATIVE_SHARE * var;
                let uninformative = (n.value < share && n.value < 2.0 * n.se && n.se > share)
                    || (n.floored && (n.raw_se > share || n.raw_se.is_nan()));
                let held = crate::dataset::noise::response_variance(ndarray::ArrayView1::from(
                    &fit.f_rows[..],
                )) + n.value.max(0.0);
                if uninformative && held < 0.5 * var {
                    let p = t.x.ncols();
                    let advice = if p > 1 {
                        "leave inputs out (--features), add rows, or pass"
                    } else {
                        "add rows, or pass"
                    };
                    return Err(Error::Usage(format!(
                        "{}: the noise cannot be measured on this table: the estimate ({}) is \
                         {} ± {} (raw {} ± {}), below a tenth of the responses' variance {} and \
                         less precise than that, and with it the twin would hold {} of that \
                         variance (its truth's at the rows plus its noise); with {} rows for {} \
                         the neighbours may be too far apart: {advice} --noise-estimator nn \
                         (never negative; biased up by the reference's change between \
                         neighbours)",
                        o.table.display(),
                        n.method.name(),
                        fmt_num(n.value),
                        fmt_num(n.se),
                        fmt_num(n.raw),
                        fmt_num(n.raw_se),
                        fmt_num(var),
                        fmt_num(held),
                        t.rows(),
                        t.inputs_words()
                    )));
                }
                // The mirror image: a twin holding more than twice the table's variance (sweep
                // 68: 30 rows of pure noise on 60 inputs gave σ̂² = 1.51 ± 2.3 against a
                // variance of 0.607, and the twin's expected losses were 3.9 times what
                // predicting the mean gives on the table).
                if held > 2.0 * var {
                    let p = t.x.ncols();
                    return Err(Error::Usage(format!(
                        "{}: the twin would hold {} of variance (its truth's at the rows plus its \
                         noise, {} {} ± {}), more than twice the responses' own {}: with {} rows \
                         for {} the estimate is not to be trusted; {}",
                        o.table.display(),
                        fmt_num(held),
                        n.method.name(),
                        fmt_num(n.value),
                        fmt_num(n.se),
                        fmt_num(var),
                        t.rows(),
                        t.inputs_words(),
                        if p > 1 {
                            "leave inputs out (--features) or add rows"
                        } else {
                            "add rows"
                        }
                    )));
                }
            }
            if let (Rule::Only(Candidate::LocLin), Some(why)) =
                (o.reference, select::loclin_skipped(t.rows(), t.x.ncols()))
            {
                out.push_str(&format!(
                    "note: the local-linear candidate is not tried on a table of {why}; the blend stands in\n"
                ));
            }
            let jitter = (o.jitter > 0.0)
                .then(|| Jitter::fit_keeping(t.x.view(), o.jitter, o.keep_variance));
            let yv = t.y.to_vec();
            let vf = varying_fit(&t, &fit).ok();
            let spread = spread_line(o, &t, vf.as_ref());
            let spread_seen = spread.as_ref().is_some_and(|s| s.1);
            let (noise, sd_rows) = twin_noise(o, &t, &fit, vf)
                .map_err(|m| Error::Usage(format!("{}: {m}", o.table.display())))?;
            let eval_size = eval_size(o, t.rows());
            let o_eff = TwinOptions {
                eval_size,
                ..o.clone()
            };
            let body = |r: &RegressionText<'_>, model: &str, reps: usize, report: bool| {
                let mut comments = reference_lines(r.fit, o.reference, &t.names);
                comments.push(inputs_line(&t, r.jitter.as_ref(), eval_size));
                if let Some(n) = &r.fit.noise {
                    comments.extend(estimator_line(o, r.fit));
                    comments.push(noise_line(n));
                }
                if let Some(l) = varying_line(&r.noise) {
                    comments.push(l);
                }
                comments.extend(shape_line(o, &yv, r.fit, sd_rows.as_deref(), spread_seen));
                comments.extend(spread.as_ref().map(|s| s.0.clone()));
                if o.noise_shape == ShapeChoice::Residuals {
                    comments.push(RESIDUALS_NOTE.into());
                }
                if let Some(f) = r.fidelity {
                    comments.push(recommended_line(f));
                    comments.extend(fidelity_lines(f, t.rows(), &o.fidelity_families, false));
                }
                let mut s = header_and_top(&o_eff, &t, &comments, reps);
                s.push_str(&regression_data(&o_eff, &t, &rel, r));
                if report {
                    // Varying noise keeps the record when the estimate is σ²(x)'s level.
                    let noise = match r.noise {
                        TwinNoise::Varying { level: None, .. } => None,
                        _ => r.fit.noise.as_ref(),
                    };
                    let sharpen = (r.fit.sharpen != 1.0).then_some(r.fit.sharpen);
                    s.push_str(&fit_report_text(sharpen, noise, r.fidelity));
                }
                s.push_str(model);
                s
            };
            let mut rt = RegressionText {
                fit: &fit,
                jitter,
                noise,
                fidelity: None,
            };
            check_plans(
                &body(
                    &rt,
                    &format!("{DEFAULT_MODEL}{DEFAULT_AUDIT}"),
                    TWIN_REPLICATES,
                    true,
                ),
                &o.out,
                &folder,
            )?;
            let fid = if o.fidelity > 0 {
                Some(fidelity(&o_eff, &t, &folder, &stage, &|models, reps| {
                    body(&rt, models, reps, false)
                })?)
            } else {
                None
            };
            rt.fidelity = fid.as_ref();
            for l in reference_lines(&fit, o.reference, &t.names) {
                out.push_str(&format!("{l}\n"));
            }
            out.push_str(&format!(
                "{}\n",
                inputs_line(&t, rt.jitter.as_ref(), eval_size)
            ));
            if let Some(l) = estimator_line(o, &fit) {
                out.push_str(&format!("{l}\n"));
            }
            match &fit.noise {
                Some(n) => out.push_str(&format!("{}\n", noise_line(n))),
                None => out.push_str("Noise: the estimator cannot run on this table; σ = 0 written, edit [data.noise]\n"),
            }
            if let Some(l) = varying_line(&rt.noise) {
                out.push_str(&l);
                out.push('\n');
            }
            if let Some(l) = shape_line(o, &yv, &fit, sd_rows.as_deref(), spread_seen) {
                out.push_str(&l);
                out.push('\n');
            }
            if let Some((l, _)) = &spread {
                out.push_str(l);
                out.push('\n');
            }
            if o.noise_shape == ShapeChoice::Residuals {
                out.push_str(RESIDUALS_NOTE);
                out.push('\n');
            }
            out.push_str(&fidelity_output(
                fid.as_ref(),
                t.rows(),
                &o.fidelity_families,
                false,
            ));
            let text = body(
                &rt,
                &format!("{DEFAULT_MODEL}{DEFAULT_AUDIT}"),
                TWIN_REPLICATES,
                true,
            );
            check_plans(&text, &o.out, &folder)?;
            text
        }
    };
    crate::output::write_one_of(
        "--out",
        &o.out,
        &[("the table", o.table.as_path())],
        text.as_bytes(),
        crate::output::Kind::Twin,
    )?;
    if crate::output::is_stdout(&o.out) {
        out.push_str(
            "wrote the scenario to standard output (save it in the folder you ran this from, \
             whose path to the table it holds; edit [model]; run it with `lossprism run FILE`)\n",
        );
    } else if !std::fs::metadata(&o.out).is_ok_and(|m| m.is_file()) {
        // A device or a pipe: nothing is kept to run.
        out.push_str(&format!(
            "wrote the scenario to {}, which is not a file: nothing was kept to run\n",
            crate::error::shown(&o.out)
        ));
    } else {
        out.push_str(&format!(
            "wrote {} (edit [model]; run it with `lossprism run {}`)\n",
            crate::error::shown(&o.out),
            crate::error::shown(&o.out)
        ));
    }
    Ok(out)
}
