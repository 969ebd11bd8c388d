//! The terminal table: aligned columns, `±` standard errors, the best row marked, a legend built
//! from the terms' own descriptions, and the reading of the curve. Which terms show follows the
//! view: the main terms by default; for 0-1 loss the Kohavi–Wolpert or James terms, or all of
//! them.

use super::{PointRow, ResultDoc, TermDoc};
use crate::fmt::{fmt_num, fmt_se, fmt_value};

/// Which terms the table shows.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum View {
    /// The main terms (for 0-1 loss: Domingos 2000).
    #[default]
    Domingos,
    /// Kohavi and Wolpert (1996): noise, bias², variance.
    KohaviWolpert,
    /// James (2003): systematic effect, variance effect.
    James,
    /// Every term.
    All,
}

fn with_se(v: f64, se: Option<f64>) -> String {
    match se {
        Some(s) => format!("{} ± {}", fmt_num(v), fmt_se(s)),
        None => fmt_num(v),
    }
}

/// The terms shown in `view`, in order; the direct check goes last.
pub fn shown_terms(doc: &ResultDoc, view: View) -> Vec<TermDoc> {
    // A view with none of its terms for this loss shows the loss's own, as the picture does
    // (the table showed only the expected loss, without the bias and variance the reading
    // spoke of; [`view_missing`] says so).
    let view = if view_missing(doc, view).is_some() {
        View::Domingos
    } else {
        view
    };
    let terms = doc.term_docs();
    let keep = |t: &TermDoc| match view {
        View::All => true,
        View::Domingos => t.group == "main",
        View::KohaviWolpert => {
            t.role == "loss" || t.group == "kohavi_wolpert" || t.role == "direct"
        }
        View::James => {
            t.role == "loss"
                || t.group == "james"
                || t.role == "direct"
                || (t.role == "noise" && t.group == "main")
        }
    };
    let mut out: Vec<TermDoc> = terms
        .iter()
        .filter(|t| keep(t) && t.role != "direct")
        .cloned()
        .collect();
    out.extend(
        terms
            .iter()
            .filter(|t| keep(t) && t.role == "direct")
            .cloned(),
    );
    out
}

/// Why `view` shows none of its own terms for `doc` (Kohavi–Wolpert and James are defined for
/// the 0-1 loss against true class probabilities: another loss, or a table, has none), in
/// words; `None` when it shows them (or is the main or the full view). The table then showed
/// only the expected loss, with no word.
pub fn view_missing(doc: &ResultDoc, view: View) -> Option<String> {
    let (group, flag) = match view {
        View::KohaviWolpert => ("kohavi_wolpert", "kohavi-wolpert"),
        View::James => ("james", "james"),
        View::Domingos | View::All => return None,
    };
    if doc.term_docs().iter().any(|t| t.group == group) {
        return None;
    }
    let table = if doc.table.is_some() {
        " on a table (whose truth is unknown)"
    } else {
        ""
    };
    Some(format!(
        "--decomposition {flag} shows none of its terms here: they are defined for the 0-1 loss \
         against true class probabilities (a synthetic or twin source), and this result holds \
         the {} loss{table}; the loss's own terms are shown",
        doc.loss
    ))
}

/// How the table of a view is laid out: the terms shown, the labels left out, the spaces
/// between columns and whether `±` is written without spaces around it.
#[derive(Debug, Clone)]
pub struct Fit {
    /// The terms shown, in order.
    pub terms: Vec<TermDoc>,
    /// Labels of the view's terms left out to fit [`WIDTH`] (`--decomposition all` shows them).
    pub hidden: Vec<String>,
    /// Spaces between columns.
    pub gap: usize,
    /// `0.1 ±0.01` instead of `0.1 ± 0.01`.
    pub tight: bool,
}

/// The default view fitted to [`WIDTH`]: when its table would be wider, the direct check goes
/// first, then a noise shown without a standard error (a constant column), then the gaps narrow
/// from three spaces to two, then `±` loses the space after it. Other views are never trimmed.
pub fn fit(doc: &ResultDoc, view: View) -> Fit {
    let mut f = Fit {
        terms: shown_terms(doc, view),
        hidden: Vec::new(),
        gap: 3,
        tight: false,
    };
    if view != View::Domingos {
        return f;
    }
    let width = |f: &Fit| -> usize {
        let mut header: Vec<String> = vec![doc.knob.clone()];
        header.extend(f.terms.iter().map(|t| t.label.clone()));
        let rows: Vec<Vec<String>> = doc
            .points
            .iter()
            .map(|p| {
                let mut r = vec![format!("{} *", fmt_value(p.value))];
                r.extend(f.terms.iter().map(|t| cell(p, t, f.tight)));
                r
            })
            .collect();
        layout_gap(&header, &rows, f.gap)
            .lines()
            .map(|l| l.chars().count())
            .max()
            .unwrap_or(0)
    };
    let droppable: [fn(&TermDoc) -> bool; 2] =
        [|t| t.role == "direct", |t| t.role == "noise" && !t.stderr];
    for drop in droppable {
        if width(&f) <= WIDTH {
            return f;
        }
        if f.terms.iter().all(drop) {
            continue;
        }
        f.hidden
            .extend(f.terms.iter().filter(|t| drop(t)).map(|t| t.label.clone()));
        f.terms.retain(|t| !drop(t));
    }
    if width(&f) > WIDTH {
        f.gap = 2;
    }
    if width(&f) > WIDTH {
        f.tight = true;
    }
    f
}

fn cell(p: &PointRow, t: &TermDoc, tight: bool) -> String {
    if !p.has(&t.key) {
        return "n/a".into();
    }
    // A noise known exactly (the Kohavi–Wolpert noise of a synthetic source) has a standard
    // error of 0: shown bare, as `noise (Bayes)` is, rather than as `± 0.00`.
    let se = match (t.stderr, p.se(&t.key)) {
        (true, Some(s)) if t.role == "noise" && s == 0.0 => None,
        (true, s) => s,
        (false, _) => None,
    };
    let v = p.get(&t.key);
    let c = if t.count && v.is_finite() && v.fract() == 0.0 && v.abs() < 1e15 {
        format!("{}", v as i64)
    } else {
        with_se(v, se)
    };
    if tight {
        c.replace("± ", "±")
    } else {
        c
    }
}

/// The legend's last words, on the `*` that marks the best row (the HTML table marks it
/// "lowest" and rewrites them).
pub const BEST_MARK: &str = "; * lowest expected loss.";

fn legend(doc: &ResultDoc, terms: &[TermDoc]) -> String {
    let mut s = String::from("legend: ");
    let parts: Vec<String> = terms
        .iter()
        .map(|t| format!("{} = {}", t.label, t.meaning))
        .collect();
    s.push_str(&parts.join("; "));
    let boot: Vec<&str> = terms
        .iter()
        .filter(|t| t.stderr && t.bootstrap)
        .map(|t| t.label.as_str())
        .collect();
    // What the ± covers on a table: the resampling of this one table, nothing beyond it.
    let scope = if doc.table.is_some() {
        ", on a table the Monte Carlo error of resampling this one table, not the uncertainty of a model's error on new data from its process"
    } else {
        ""
    };
    if boot.is_empty() {
        s.push_str(&format!(
            "; ± one standard error (jackknife over replicate blocks){scope}{BEST_MARK}\n",
        ));
    } else {
        s.push_str(&format!(
            "; ± one standard error (jackknife over replicate blocks; for {}: bootstrap over replicate blocks, as they jump with the main prediction){scope}{BEST_MARK}\n",
            boot.join(", ")
        ));
    }
    if let Some(line) = interval_line(doc, terms) {
        s.push_str(&line);
    }
    if let Some(n) = &doc.noise_estimate {
        s.push_str(&format!(
            "noise estimate: {} ± {} by {}\n",
            fmt_num(n.value),
            fmt_se(n.stderr.unwrap_or(f64::NAN)),
            n.about
        ));
        if let Some(w) = &n.warning {
            s.push_str(&format!("warning: {w}\n"));
        }
    }
    if let Some(t) = &doc.table {
        s.push_str(&format!(
            "table: {} · target `{}` · {} rows ({} dropped{}, {} locked in the holdout, {} resampled; {} skipped: held out in fewer than 2 replicates)\n",
            t.path,
            t.target,
            t.rows,
            t.dropped_rows,
            if t.repeats_dropped > 0 {
                format!(", {} repeats of an earlier row left out", t.repeats_dropped)
            } else {
                String::new()
            },
            t.holdout_rows,
            t.working_rows,
            t.skipped_rows
        ));
        for e in &t.encodings {
            s.push_str(&format!("encoding: {e}\n"));
        }
        if let Some(note) = t.absent_labels_note() {
            s.push_str(&format!("note: {note}\n"));
        }
    }
    if let Some(n) = &doc.scheme_note {
        s.push_str(&format!("scheme: {n}\n"));
    }
    s
}

/// The row of the lowest expected loss: `best`'s value (and family) at the largest training
/// size.
pub fn best_row(doc: &ResultDoc) -> Option<&PointRow> {
    let largest = doc.sizes.last().map(|&n| n as u64);
    doc.points.iter().find(|p| {
        p.value == doc.best.value
            && (doc.best.family.is_none() || p.family == doc.best.family)
            && (largest.is_none() || p.train_size == largest)
    })
}

/// The 95 % bootstrap percentile intervals of the shown terms that have one, at the lowest
/// expected loss, as a legend line; `None` when there are none (every loss but 0-1, or no
/// bootstrap draws).
fn interval_line(doc: &ResultDoc, terms: &[TermDoc]) -> Option<String> {
    let p = best_row(doc)?;
    let parts: Vec<String> = terms
        .iter()
        .filter(|t| t.bootstrap)
        .filter_map(|t| {
            p.interval(&t.key)
                .map(|(lo, hi)| format!("{} [{}, {}]", t.label, fmt_num(lo), fmt_num(hi)))
        })
        .collect();
    if parts.is_empty() {
        return None;
    }
    // The best row's own model and knob (a run of several models printed the first model's
    // knob beside another model's value and interval).
    let (who, knob) = match p.family.as_deref() {
        Some(f) => (format!("{f} "), doc.knob_of(f)),
        None => (String::new(), doc.knob.as_str()),
    };
    Some(format!(
        "interval: 95 % bootstrap percentile interval, widened to contain ± 2 SE, at {who}{knob} = {}: {} (not outside the range a term cannot leave, 0 to 1 for a share; at small R read it rather than the symmetric ± 2 SE for these terms: it also covers skewed draws; docs/zero-one-finite-r.md)\n",
        fmt_value(doc.best.value),
        parts.join("; ")
    ))
}

/// The table without layout, for other renderings (the HTML report): the header cells, one row
/// of cells per grid value (knob value first, unmarked) and the legend.
pub fn cells(doc: &ResultDoc, view: View) -> (Vec<String>, Vec<Vec<String>>, String) {
    let terms = shown_terms(doc, view);
    let mut header = vec![doc.knob.clone()];
    header.extend(terms.iter().map(|t| t.label.clone()));
    let rows = doc
        .points
        .iter()
        .map(|p| {
            let mut r = vec![fmt_value(p.value)];
            r.extend(terms.iter().map(|t| cell(p, t, false)));
            r
        })
        .collect();
    (header, rows, legend(doc, &terms).trim_end().to_string())
}

/// Renders the table for a result document (main view).
pub fn render(doc: &ResultDoc) -> String {
    render_view(doc, View::Domingos)
}

/// The widest the default view's table may be, in characters: it fits a 100-column terminal.
pub const WIDTH: usize = 100;

/// Lays out header and rows in aligned columns (three spaces between columns).
fn layout(header: &[String], rows: &[Vec<String>]) -> String {
    layout_gap(header, rows, 3)
}

/// Lays out header and rows in aligned columns, `gap` spaces between columns.
fn layout_gap(header: &[String], rows: &[Vec<String>], gap: usize) -> String {
    let mut widths: Vec<usize> = header.iter().map(|h| h.chars().count()).collect();
    for r in rows {
        for (i, c) in r.iter().enumerate() {
            widths[i] = widths[i].max(c.chars().count());
        }
    }
    let line = |cells: &[String]| -> String {
        let mut s = String::new();
        for (i, c) in cells.iter().enumerate() {
            let pad = widths[i] - c.chars().count();
            s.push_str(&" ".repeat(pad + if i == 0 { 1 } else { gap }));
            s.push_str(c);
        }
        s.push('\n');
        s
    };
    let mut out = line(header);
    for r in rows {
        out.push_str(&line(r));
    }
    out
}

/// The table of one curve (rows of one family at one size), the best row marked.
fn curve_table(doc: &ResultDoc, f: &Fit, knob: &str, rows: &[PointRow]) -> String {
    let terms = &f.terms;
    let best = rows
        .iter()
        .enumerate()
        .min_by(|a, b| a.1.expected_loss().total_cmp(&b.1.expected_loss()))
        .map(|(i, _)| i);
    let _ = doc;
    let mut header: Vec<String> = vec![knob.to_string()];
    header.extend(terms.iter().map(|t| t.label.clone()));
    let cells: Vec<Vec<String>> = rows
        .iter()
        .enumerate()
        .map(|(i, p)| {
            let mark = if Some(i) == best { " *" } else { "  " };
            let mut r = vec![format!("{}{mark}", fmt_value(p.value))];
            r.extend(terms.iter().map(|t| cell(p, t, f.tight)));
            r
        })
        .collect();
    layout_gap(&header, &cells, f.gap)
}

/// Renders the table with the chosen view. A run with several models or training sizes gets
/// one table per family (at the largest size), a learning-curve table per family, and the
/// ranking in the reading.
pub fn render_view(doc: &ResultDoc, view: View) -> String {
    let mut out = String::new();
    let several = !doc.models.is_empty() || !doc.sizes.is_empty();
    let families = doc.families();
    let family_words = if doc.models.is_empty() {
        format!("family {} (knob {})", doc.family, doc.knob)
    } else {
        format!(
            "families {}",
            doc.models
                .iter()
                .map(|m| match &m.label {
                    Some(l) => format!("{l} = {} (knob {})", m.family, m.knob),
                    None => format!("{} (knob {})", m.family, m.knob),
                })
                .collect::<Vec<_>>()
                .join(", ")
        )
    };
    // Several fits per training set: the squared loss splits the variance into data and fit
    // parts; the other losses pool the fits (a 0-1 loss's R·S fits all vote), which said
    // nothing before.
    let seeds = match doc.fit_seeds_split() {
        Some((s, true)) => format!(" · {s} fits per training set"),
        Some((s, false)) => format!(
            " · {s} fits per training set, pooled (R·{s} predictions; no data/fit split of the \
             variance for this loss)"
        ),
        None => String::new(),
    };
    out.push_str(&format!(
        "{} · {family_words} · {} loss · R = {} replicates{seeds} · seed {}\n",
        doc.scenario.name, doc.loss, doc.replicates, doc.seed
    ));
    if !doc.scenario.about.is_empty() {
        out.push_str(&doc.scenario.about);
        out.push('\n');
    }
    out.push('\n');
    let f = fit(doc, view);
    let terms = &f.terms;
    if !several {
        let rows: Vec<PointRow> = doc.points.clone();
        let mut header: Vec<String> = vec![doc.knob.clone()];
        header.extend(terms.iter().map(|t| t.label.clone()));
        let cells: Vec<Vec<String>> = rows
            .iter()
            .map(|p| {
                let mark = if p.value == doc.best.value {
                    " *"
                } else {
                    "  "
                };
                let mut r = vec![format!("{}{mark}", fmt_value(p.value))];
                r.extend(terms.iter().map(|t| cell(p, t, f.tight)));
                r
            })
            .collect();
        out.push_str(&layout_gap(&header, &cells, f.gap));
        if let Some(note) = view_missing(doc, view) {
            out.push_str(&format!("\nnote: {note}\n"));
        }
    } else {
        for (i, family) in families.iter().enumerate() {
            let knob = doc
                .models
                .get(i)
                .map_or(doc.knob.clone(), |m| m.knob.clone());
            let size = doc
                .sizes
                .last()
                .map(|n| format!(" at {n} training rows"))
                .unwrap_or_default();
            out.push_str(&format!("{family}{size}:\n"));
            out.push_str(&curve_table(doc, &f, &knob, &doc.curve(family)));
            out.push('\n');
        }
        if let Some(note) = view_missing(doc, view) {
            out.push_str(&format!("note: {note}\n\n"));
        }
        let bias_label = terms
            .iter()
            .find(|t| t.role == "bias")
            .map_or("bias".to_string(), |t| t.label.clone());
        // A table's noise is an estimate (`noise (est.)`, as in the main table).
        let noise_label = terms
            .iter()
            .find(|t| t.role == "noise" && t.group == "main")
            .map_or("noise".to_string(), |t| t.label.clone());
        for c in &doc.learning {
            out.push_str(&format!(
                "learning curve of {} (its best {} at each training size):\n",
                c.family, c.knob
            ));
            let header: Vec<String> = [
                "train_size",
                c.knob.as_str(),
                "expected loss",
                bias_label.as_str(),
                "variance",
                noise_label.as_str(),
            ]
            .iter()
            .map(|s| s.to_string())
            .collect();
            let rows: Vec<Vec<String>> = c
                .sizes
                .iter()
                .map(|s| {
                    vec![
                        s.train_size.to_string(),
                        fmt_value(s.value),
                        with_se(s.expected_loss, s.stderr),
                        fmt_num(s.bias),
                        fmt_num(s.variance),
                        s.noise.map_or("unknown".to_string(), fmt_num),
                    ]
                })
                .collect();
            out.push_str(&layout(&header, &rows));
            out.push('\n');
        }
    }
    if let Some(r) = doc.ranking.last().filter(|r| r.candidates.len() > 1) {
        out.push_str(&format!(
            "ranking at {} training rows (differences paired over replicate blocks; unpaired standard error in brackets):\n",
            r.train_size
        ));
        for (i, c) in r.candidates.iter().enumerate() {
            let what = format!("{} {} = {}", c.family, c.knob, fmt_value(c.value));
            if i == 0 {
                out.push_str(&format!(
                    "  1. {what}: {}\n",
                    with_se(c.expected_loss, c.stderr)
                ));
            } else if c.difference == 0.0 {
                out.push_str(&format!("  {}. {what}: ties it exactly\n", i + 1));
            } else {
                let unpaired = c
                    .unpaired_stderr
                    .map(|u| format!(" (± {})", crate::fmt::fmt_se(u)))
                    .unwrap_or_default();
                out.push_str(&format!(
                    "  {}. {what}: +{}{unpaired} worse\n",
                    i + 1,
                    with_se(c.difference, c.difference_stderr),
                ));
            }
        }
        out.push('\n');
    }
    if !several {
        out.push('\n');
    }
    if !f.hidden.is_empty() {
        out.push_str(&format!(
            "not shown to fit {WIDTH} columns: {} (every term: --decomposition all)\n",
            f.hidden.join(", ")
        ));
    }
    out.push_str(&legend(doc, terms));
    out.push_str(&format!("reading: {}\n", doc.reading));
    if let Some(sel) = &doc.selection {
        let sentence = super::selection::sentence(sel, &doc.knob, &doc.scenario.grid);
        out.push_str(&format!("selection: {sentence}\n"));
    }
    if let Some((t, n)) = doc
        .scenario
        .twin
        .as_ref()
        .and_then(|t| t.noise.as_ref().map(|n| (t, n)))
    {
        let what = if t.varying_noise {
            format!(
                "σ²(x) varies with x, its level scaled so that the estimator reads σ̂² = {} ± {}",
                fmt_num(n.value),
                fmt_se(n.stderr)
            )
        } else {
            format!("σ² = {} ± {}", fmt_num(n.value), fmt_se(n.stderr))
        };
        out.push_str(&format!(
            "twin noise: {what}, estimated from the table by `lossprism twin` ({}) and fixed in \
             the twin: exact within it, so the ± above do not include its error, which would move \
             every expected loss up or down together\n",
            n.method
        ));
    }
    if let Some(r) = doc
        .scenario
        .twin
        .as_ref()
        .and_then(|t| super::twin::recommended_sentence(&t.recommended))
    {
        out.push_str(&format!(
            "twin: {r} (from `lossprism twin`, for its fidelity check's families and grids; scenario.twin in the JSON)\n"
        ));
    }
    out
}
