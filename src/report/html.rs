//! The HTML report: one self-contained file (inline SVG and CSS, no scripts, no external
//! references) with the scenario in words, the reading of the curve, the pictures, the table and
//! the facts of the run.

use std::fmt::Write as _;

use super::terminal::{self, View};
use super::ResultDoc;
use crate::fmt::{fmt_num, fmt_se, fmt_value};

/// The pictures of a report, as SVG text (from [`super::plot`]).
#[derive(Debug, Clone, Default)]
pub struct Pictures {
    /// The curve picture.
    pub curve: Option<String>,
    /// The per-point picture.
    pub points: Option<String>,
    /// The selection histogram.
    pub selection: Option<String>,
    /// Further pictures (several models or training sizes): heading, caption and SVG.
    pub extra: Vec<(String, String, String)>,
}

/// Escapes text for HTML element content and attribute values.
pub fn escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c if super::plot::unsafe_char(c) => out.push('\u{fffd}'),
            c => out.push(c),
        }
    }
    out
}

/// Formats a wall time in seconds (`0.84 s`, `12.3 s`, `2 min 05 s`, `1 h 02 min`).
pub fn fmt_duration(secs: f64) -> String {
    if !secs.is_finite() || secs < 0.0 {
        return "n/a".into();
    }
    if secs < 10.0 {
        format!("{secs:.2} s")
    } else if secs < 60.0 {
        format!("{secs:.1} s")
    } else if secs < 3600.0 {
        let s = secs.round() as u64;
        format!("{} min {:02} s", s / 60, s % 60)
    } else {
        let m = (secs / 60.0).round() as u64;
        format!("{} h {:02} min", m / 60, m % 60)
    }
}

/// Makes plotters' SVG fit for inlining: drops the namespace declaration (implied in HTML) and
/// lets the picture shrink with the page.
fn inline_svg(svg: &str, label: &str) -> String {
    let body = svg.trim_start_matches(|c: char| c != '<').replacen(
        " xmlns=\"http://www.w3.org/2000/svg\"",
        "",
        1,
    );
    body.replacen(
        "<svg ",
        &format!(
            "<svg role=\"img\" aria-label=\"{}\" style=\"max-width:100%;height:auto\" ",
            escape(label)
        ),
        1,
    )
}

/// The scenario in plain words: where the data come from (invented by the scenario, a twin
/// fitted to a table, or the table itself resampled), the model family and its grid, the loss,
/// and which quantities are estimates.
pub fn scenario_words(doc: &ResultDoc) -> Vec<String> {
    let s = &doc.scenario;
    let inputs: Vec<String> = s
        .inputs
        .iter()
        .map(|i| format!("{} ({})", i.name, i.distribution))
        .collect();
    let log_words = |kind: &str| {
        if kind == "log" {
            ", spaced on a logarithmic scale"
        } else {
            ""
        }
    };
    // A study names every model with its own knob and grid (the first model's alone was
    // described, as if the others were not there).
    let model = if doc.models.len() > 1 {
        let each: Vec<String> = doc
            .models
            .iter()
            .map(|m| {
                let name = m.id();
                let family = if name == m.family {
                    String::new()
                } else {
                    format!(" (the {} family)", m.family)
                };
                format!(
                    "{name}{family} at {} = {} ({} values{})",
                    m.knob,
                    grid_words(&m.grid, &m.grid_kind),
                    m.grid.len(),
                    log_words(&m.grid_kind)
                )
            })
            .collect();
        format!(
            "Models ({}, fitted on the same training sets): {}.",
            doc.models.len(),
            each.join("; ")
        )
    } else {
        // Several fits per training set: split into data and fit variance for the squared
        // loss, pooled otherwise (the terminal's header says the same).
        let seeds = match doc.fit_seeds_split() {
            Some((n, true)) => format!(
                " Each training set is fitted {n} times with different fit seeds; the variance is \
                 split into its data and fit parts."
            ),
            Some((n, false)) => format!(
                " Each training set is fitted {n} times with different fit seeds, and the {n} \
                 fits are pooled (R·{n} predictions; the {} loss has no data/fit split of the \
                 variance).",
                doc.loss
            ),
            None => String::new(),
        };
        format!(
            "Model: the {} family, fitted at {} = {} ({} values{}).{seeds}",
            doc.family,
            doc.knob,
            grid_words(&s.grid, &s.grid_kind),
            s.grid.len(),
            log_words(&s.grid_kind)
        )
    };
    let mut out = match (&doc.table, s.source.as_str()) {
        (Some(t), _) => table_words(doc, t, &inputs, model),
        (None, "twin") => twin_words(doc, &inputs, model),
        _ => synthetic_words(doc, &inputs, model),
    };
    if !s.about.is_empty() {
        out.insert(0, s.about.clone());
    }
    out
}

/// The training size, or every size of a study ("400 and 800"; the largest alone was said).
fn size_words(doc: &ResultDoc) -> String {
    match doc.sizes.as_slice() {
        [] | [_] => doc.scenario.train_size.to_string(),
        [rest @ .., last] => format!(
            "{} and {last}",
            rest.iter()
                .map(|n| n.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    }
}

/// A table run's training size, or every size of a study ("100, 200 and 400").
fn table_sizes(doc: &ResultDoc, t: &super::TableEcho) -> String {
    if doc.sizes.len() > 1 {
        size_words(doc)
    } else {
        t.train_size.to_string()
    }
}

/// What the report's title and lead say is varied: the knob of a single model, or the models
/// (and sizes) of a study.
fn varied_words(doc: &ResultDoc) -> (String, String) {
    let names: Vec<&str> = doc.models.iter().map(|m| m.id()).collect();
    let sizes = if doc.sizes.len() > 1 {
        format!(" and {} training sizes", doc.sizes.len())
    } else {
        String::new()
    };
    if names.len() > 1 {
        (
            format!("{} models{sizes}", names.len()),
            format!(
                "each of {} models ({}) splits into noise, bias and variance along its own knob{}",
                names.len(),
                names.join(", "),
                if sizes.is_empty() {
                    String::new()
                } else {
                    format!(" at {} training sizes", doc.sizes.len())
                }
            ),
        )
    } else {
        (
            format!("{}{sizes}", doc.knob),
            format!(
                "the {} family splits into noise, bias and variance as {} changes{}",
                doc.family,
                doc.knob,
                if sizes.is_empty() {
                    String::new()
                } else {
                    format!(" and the training size grows ({})", size_words(doc))
                }
            ),
        )
    }
}

fn design_words(doc: &ResultDoc) -> (&'static str, String) {
    let s = &doc.scenario;
    let design = if s.design == "fixed" {
        "the same training inputs in every replicate (fixed design), with fresh noise"
    } else {
        "fresh training inputs and noise in every replicate (random design)"
    };
    let eval = if s.eval == "design" {
        "at the training inputs themselves".to_string()
    } else {
        format!("at {} evaluation points drawn once", s.eval_size)
    };
    (design, eval)
}

fn synthetic_words(doc: &ResultDoc, inputs: &[String], model: String) -> Vec<String> {
    let s = &doc.scenario;
    let (design, eval) = design_words(doc);
    vec![
        format!(
            "Data ({}, invented by the scenario): {} training points per replicate, {design}. \
             Inputs: {}.",
            s.source,
            size_words(doc),
            inputs.join("; ")
        ),
        match &s.labels {
            None => format!("Truth: {}. Noise: {}.", s.truth, s.noise),
            Some(l) => format!(
                "Classes: {}. Class probabilities: {}. {}.",
                l.join(", "),
                s.truth,
                s.noise
            ),
        },
        model,
        format!(
            "Loss: {} loss, measured {eval}; each term is averaged over those points and over \
             {} replicate training sets.",
            doc.loss, doc.replicates
        ),
    ]
}

fn twin_words(doc: &ResultDoc, inputs: &[String], model: String) -> Vec<String> {
    let s = &doc.scenario;
    let (design, eval) = design_words(doc);
    let mut out = vec![
        format!(
            "Data (a simulated twin of a table): a process fitted to the table stands in for the \
             unknown one, and {} training points per replicate are drawn from it, {design}. \
             Inputs: {}.",
            size_words(doc),
            inputs.join("; ")
        ),
        match &s.labels {
            None => format!(
                "Truth (within the twin; an estimate of the table's E[y | x]): {}. Noise \
                 (estimated from the table, then known within the twin): {}.",
                s.truth, s.noise
            ),
            Some(l) => format!(
                "Classes: {}. Class probabilities (within the twin; an estimate from the table): \
                 {}. {}.",
                l.join(", "),
                s.truth,
                s.noise
            ),
        },
    ];
    if let Some(t) = &s.twin {
        out.extend(super::twin::words(t));
    }
    out.push(model);
    out.push(format!(
        "Loss: {} loss, measured {eval}; each term is averaged over those points and over {} \
         replicate training sets. Noise, bias and variance are exact for the twin; how well they \
         carry over to the table's own process depends on the twin{}.",
        doc.loss,
        doc.replicates,
        if s.twin.as_ref().is_some_and(|t| t.fidelity.is_some()) {
            " (see the fidelity check)"
        } else {
            " (`lossprism twin` without `--fidelity 0` measures it)"
        }
    ));
    out
}

fn table_words(
    doc: &ResultDoc,
    t: &super::TableEcho,
    inputs: &[String],
    model: String,
) -> Vec<String> {
    let s = &doc.scenario;
    let scheme = if t.resample == "bootstrap" {
        // For this table, as the scheme's note says it (the limit, 63.2%, stood beside the
        // note's 63.3% for 240 rows); at the largest size of a study.
        let distinct = crate::dataset::distinct_share(t.train_size, t.working_rows);
        format!(
            "a bootstrap resample: {} rows drawn with replacement from the {} working rows \
             (about {:.1}% of them distinct)",
            table_sizes(doc, t),
            t.working_rows,
            100.0 * distinct
        )
    } else {
        format!(
            "a subsample of {} of the {} working rows, drawn without replacement",
            table_sizes(doc, t),
            t.working_rows
        )
    };
    let holdout = if t.holdout_rows > 0 {
        format!(
            "; {} of them are locked away as a holdout and never used here, leaving {} working \
             rows",
            t.holdout_rows, t.working_rows
        )
    } else {
        String::new()
    };
    let repeats = if t.repeats_dropped > 0 {
        format!(
            ", after leaving out {} rows that repeat an earlier row (`duplicates = \"drop\"`)",
            t.repeats_dropped
        )
    } else {
        String::new()
    };
    let skipped = if t.skipped_rows > 0 {
        match t.skipped_rows {
            1 => "; 1 row held out fewer than twice is skipped".to_string(),
            n => format!("; {n} rows held out fewer than twice are skipped"),
        }
    } else {
        String::new()
    };
    let estimates: Vec<String> = doc
        .term_docs()
        .iter()
        .filter(|d| d.estimated)
        .map(|d| d.label.clone())
        .collect();
    let mut out = vec![
        format!(
            "Data (the table {} itself, {} rows read{repeats}{holdout}): nothing is simulated. Each \
             replicate trains on {scheme}, and is evaluated on the rows it left out \
             (out-of-bag), against their observed responses. Inputs: {}.",
            t.path,
            t.rows,
            inputs.join("; ")
        ),
        format!("Truth: {}. Noise: {}.", s.truth, s.noise),
        model,
        format!(
            "Loss: {} loss on the out-of-bag rows; each row's terms average the replicates that \
             held it out (on average {:.1}% of the rows per replicate{}), then the rows are \
             averaged{skipped}; {} replicate resamples. The ± of every term is the Monte Carlo \
             error of resampling this one table (jackknife over replicate blocks): it is not the \
             uncertainty of a model's error on new data from the table's process.",
            doc.loss,
            100.0 * t.held_out_share,
            if doc.sizes.len() > 1 {
                " at the largest training size; smaller sizes leave out more"
            } else {
                ""
            },
            doc.replicates
        ),
    ];
    if !estimates.is_empty() {
        let se_known = doc
            .noise_estimate
            .as_ref()
            .is_some_and(|n| n.stderr.is_some_and(f64::is_finite));
        out.push(format!(
            "Estimates: {} rest on an estimated noise and the observed responses, not on a \
             known truth{}",
            estimates.join(", "),
            if se_known {
                "; the noise estimate's own standard error is given below, and the standard \
                 error of bias² (est.) includes it."
            } else {
                "; the noise estimate's own standard error could not be computed, so neither \
                 can the standard error of bias² (est.)."
            }
        ));
    }
    if let Some(n) = &doc.noise_estimate {
        out.push(format!(
            "Noise estimate: {}{} ({}).",
            fmt_num(n.value),
            n.stderr
                .map(|se| format!(" ± {}", fmt_se(se)))
                .unwrap_or_default(),
            n.about
        ));
    }
    if let Some(note) = t.absent_labels_note() {
        out.push(format!("Note: {note}."));
    }
    if let Some(note) = &doc.scheme_note {
        out.push(note.clone());
    }
    out
}

/// A grid in words: every value when there are few, or when they are listed by hand (`1, 2,
/// 3, …, 50` read as every whole number to 50 for k ∈ {1, 2, 3, 5, …, 50}); an evenly spaced
/// `range` as its first values and its last.
fn grid_words(grid: &[f64], kind: &str) -> String {
    let all = |g: &[f64]| {
        g.iter()
            .map(|v| fmt_value(*v))
            .collect::<Vec<_>>()
            .join(", ")
    };
    let n = grid.len();
    match (kind == "range", n) {
        (_, 0..=8) => all(grid),
        (true, _) => format!("{}, …, {}", all(&grid[..3]), all(&grid[n - 1..])),
        (false, 9..=16) => all(grid),
        (false, _) => format!("{}, …, {}", all(&grid[..4]), all(&grid[n - 2..])),
    }
}

/// The reading of the curve in plain sentences: which region is bias-dominated and which
/// variance-dominated (the document's `reading`), where the lowest expected loss lies and how
/// sure that is given the standard errors.
pub fn reading_words(doc: &ResultDoc) -> Vec<String> {
    if doc.models.is_empty() && doc.sizes.is_empty() {
        return curve_reading(doc);
    }
    // Several models or sizes: the best model's curve at the largest size (its rows, knob and
    // paired uncertainty), as a single run of it would be read; the rows of every model and
    // size side by side were read as one curve (the neighbours of the best came from another
    // model or size, and differences of −20 standard errors were printed).
    let fam = doc.best.family.clone().unwrap_or_else(|| doc.first_model());
    let mut sub = doc.single(&fam);
    if let Some(u) = doc
        .uncertainty
        .as_ref()
        .filter(|u| u.rows.len() == doc.points.len())
    {
        let largest = doc.sizes.last().map(|&n| n as u64);
        let rows: Vec<_> = doc
            .points
            .iter()
            .zip(&u.rows)
            .filter(|(p, _)| p.family.as_deref().map_or(true, |f| f == fam))
            .filter(|(p, _)| largest.is_none() || p.train_size == largest)
            .map(|(_, r)| r.clone())
            .collect();
        if rows.len() == sub.points.len() {
            let mut u = u.clone();
            u.rows = rows;
            sub.uncertainty = Some(u);
        }
    }
    let mut out = curve_reading(&sub);
    if let Some(first) = out.get_mut(1) {
        let at = doc
            .sizes
            .last()
            .map(|n| format!(" at {n} training rows"))
            .unwrap_or_default();
        *first = format!("For {fam}{at}: {first}");
    }
    out
}

/// [`reading_words`] for one curve (a single model at a single size).
fn curve_reading(doc: &ResultDoc) -> Vec<String> {
    let knob = &doc.knob;
    let pts = &doc.points;
    let mut out = vec![doc.reading.clone()];
    let Some(bi) = pts.iter().position(|p| p.value == doc.best.value) else {
        return out;
    };
    let best = &pts[bi];
    let se_b = doc.best.stderr;
    // The standard error of a difference from the best: paired over the replicate blocks when
    // the document carries the leave-one-block-out values (both values were fitted on the same
    // training sets), otherwise as if the two were independent.
    let paired = |i: usize| -> Option<f64> {
        let u = doc.uncertainty.as_ref()?;
        if u.rows.len() != pts.len() {
            return None;
        }
        let blocks = usize::try_from(u.blocks).ok()?;
        let a = u.rows[i].leave_out_of("expected_loss", blocks)?;
        let b = u.rows[bi].leave_out_of("expected_loss", blocks)?;
        let d: Vec<f64> = a.iter().zip(&b).map(|(x, y)| x - y).collect();
        let se = crate::decompose::jackknife_se(&d);
        se.is_finite().then_some(se)
    };
    let mut any_unpaired = false;
    // (sentence, how many standard errors of the difference, if known)
    let mut gap = |i: usize| -> (String, Option<f64>) {
        let p = &pts[i];
        let d = p.expected_loss() - best.expected_loss();
        if d == 0.0 {
            // An exact tie (sweep 69: "is higher by 0.000").
            return (
                format!("{knob} = {} ties it exactly", fmt_value(p.value)),
                None,
            );
        }
        let se = paired(i).or_else(|| match (se_b, p.se("expected_loss")) {
            (Some(a), Some(b)) if a > 0.0 || b > 0.0 => {
                any_unpaired = true;
                Some((a * a + b * b).sqrt())
            }
            _ => None,
        });
        match se {
            Some(se) if se > 0.0 => {
                let z = d / se;
                (
                    format!(
                        "{knob} = {} is higher by {} ({z:.1} standard errors of the difference)",
                        fmt_value(p.value),
                        fmt_num(d)
                    ),
                    Some(z),
                )
            }
            _ => (
                format!(
                    "{knob} = {} is higher by {}",
                    fmt_value(p.value),
                    fmt_num(d)
                ),
                None,
            ),
        }
    };
    let mut near: Vec<(String, Option<f64>, f64)> = Vec::new();
    for i in [bi.checked_sub(1), Some(bi + 1).filter(|&j| j < pts.len())]
        .into_iter()
        .flatten()
    {
        let (words, z) = gap(i);
        near.push((words, z, pts[i].value));
    }
    if !near.is_empty() {
        let words: Vec<&str> = near.iter().map(|n| n.0.as_str()).collect();
        out.push(format!(
            "Next to the best value, {}. A difference counts as clear beyond about two standard \
             errors of the difference{}.",
            words.join(" and "),
            if any_unpaired {
                " (these treat the two values as independent; they share training sets, so the \
                 ratios understate how clear the differences are)"
            } else {
                " (paired over the replicate blocks: both values were fitted on the same \
                 training sets)"
            }
        ));
        let unclear: Vec<String> = near
            .iter()
            .filter(|n| !matches!(n.1, Some(z) if z > 2.0))
            .map(|n| fmt_value(n.2))
            .collect();
        out.push(if unclear.is_empty() {
            format!(
                "{} more than two standard errors of the difference worse: the choice \
                 {knob} = {} is clear at this number of replicates.",
                if near.len() == 1 {
                    "The neighbour is"
                } else {
                    "Both neighbours are"
                },
                fmt_value(doc.best.value)
            )
        } else {
            format!(
                "{knob} = {} {} not clearly worse (two standard errors or less): the choice of \
                 {knob} = {} is not clear at this number of replicates; more replicates may \
                 separate them, or show that they are equally good.",
                unclear.join(" and "),
                if unclear.len() == 1 { "is" } else { "are" },
                fmt_value(doc.best.value)
            )
        });
    }
    let others: Vec<String> = doc
        .best
        .within_one_se
        .iter()
        .filter(|v| **v != doc.best.value)
        .map(|v| fmt_value(*v))
        .collect();
    if !others.is_empty() {
        // The simplest of the set, by the knob's direction (for k-NN the largest k).
        let set = doc.best.within_one_se.iter().chain([&doc.best.value]);
        let simplest = if doc.larger_is_simpler {
            set.fold(f64::NEG_INFINITY, |a, &v| a.max(v))
        } else {
            set.fold(f64::INFINITY, |a, &v| a.min(v))
        };
        out.push(format!(
            "{} of the lowest expected loss: with these replicates the data cannot tell {} apart \
             from the best ({knob} = {}); the simplest of them, {knob} = {}, is a safe pick (the \
             one-standard-error rule).",
            super::within_words(knob, &others),
            if others.len() == 1 { "it" } else { "them" },
            fmt_value(doc.best.value),
            fmt_value(simplest)
        ));
    }
    if pts.len() > 1 && (bi == 0 || bi == pts.len() - 1) {
        out.push(format!(
            "The lowest expected loss lies at the {} end of the grid: the true best {knob} may \
             lie beyond it; extend the grid to be sure.",
            if bi == 0 { "lower" } else { "upper" }
        ));
    }
    if pts.iter().any(|p| p.get("net_variance") < 0.0) {
        out.push(
            "Net variance is negative at some values: there the spread of predictions moves \
             biased points towards the right class more often than it moves unbiased points \
             away from it."
                .into(),
        );
    }
    out
}

const STYLE: &str = "
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;color:#1f1d3d;background:#fbfaf6;
margin:0;line-height:1.5}
main{max-width:1000px;margin:0 auto;padding:24px 20px 48px}
h1{font-size:1.6em;margin:0.2em 0 0.1em}
h2{font-size:1.15em;margin:1.8em 0 0.5em;border-bottom:2px solid #e4eed8;padding-bottom:2px}
p.lead{color:#555;margin-top:0}
figure{margin:12px 0;background:#fff;border:1px solid #e2e0d8;border-radius:6px;padding:8px}
figcaption{font-size:0.9em;color:#555;padding:4px 6px}
table{border-collapse:collapse;font-variant-numeric:tabular-nums;font-size:0.92em;background:#fff}
th,td{padding:4px 10px;text-align:right;border-bottom:1px solid #e8e6de;white-space:nowrap}
th{background:#f1efe6}
tr.best td{background:#e4eed8;font-weight:600}
.wide{overflow-x:auto}
dl.facts{display:grid;grid-template-columns:max-content auto;gap:2px 16px}
dl.facts dt{color:#555}
dl.facts dd{margin:0}
.legend{font-size:0.88em;color:#555}
";

/// Renders the report. `wall_seconds` is the run's wall time (not part of the result document,
/// which stays identical across runs); `view` chooses the 0-1 decomposition of the table.
pub fn render(
    doc: &ResultDoc,
    view: View,
    pictures: &Pictures,
    wall_seconds: Option<f64>,
    wall_label: &str,
) -> String {
    let mut h = String::new();
    let e = escape;
    let (across, lead) = varied_words(doc);
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <title>{} · bias and variance across {}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n<main>\n",
        e(&doc.scenario.name),
        e(&across)
    );
    let resampled = doc.table.is_some();
    let _ = writeln!(
        h,
        "<h1>{}: bias and variance across {}</h1>\n<p class=\"lead\">How the expected test loss of \
         {}, estimated from {} {} training sets.</p>",
        e(&doc.scenario.name),
        e(&across),
        e(&lead),
        doc.replicates,
        if resampled { "resampled" } else { "simulated" }
    );

    h.push_str(if resampled {
        "<h2>What was resampled</h2>\n"
    } else {
        "<h2>What was simulated</h2>\n"
    });
    for line in scenario_words(doc) {
        let _ = writeln!(h, "<p>{}</p>", e(&line));
    }

    h.push_str("<h2>Reading the curve</h2>\n");
    for line in reading_words(doc) {
        let _ = writeln!(h, "<p>{}</p>", e(&line));
    }

    if let Some(svg) = &pictures.curve {
        // Several models share one picture of their expected losses (`families_svg`), each
        // along its own grid: the caption of a single curve named the first model's knob.
        let caption = if doc.models.is_empty() {
            format!(
                "Expected loss and its parts against {}, with bands of ±2 standard errors; the \
                 ring marks the lowest expected loss, the pale column the values within one \
                 standard error of it.",
                doc.knob
            )
        } else {
            "Expected loss of every model at the largest training size, each along its own grid \
             from its simplest value (left) to its most complex (right); rings mark each model's \
             lowest expected loss."
                .to_string()
        };
        let _ = writeln!(
            h,
            "<figure>{}<figcaption>{}</figcaption></figure>",
            inline_svg(svg, "curve of expected loss, bias, variance and noise"),
            e(&caption)
        );
    }
    if let Some(svg) = &pictures.points {
        let _ = writeln!(
            h,
            "<h2>Underfitting and overfitting as shapes</h2>\n<figure>{}<figcaption>The truth \
             and the mean prediction at the smallest, the best and the largest {} with ±1 \
             prediction standard deviation (a band, or a bar at each value of an input with few \
             values); dots are one replicate's training set. A mean that misses the truth is \
             bias; a wide band or long bar is variance.</figcaption></figure>",
            inline_svg(svg, "per-point view of truth and mean predictions"),
            e(&doc.knob)
        );
    }
    if pictures.selection.is_some() || doc.selection.is_some() {
        h.push_str("<h2>What cross-validation would pick</h2>\n");
    }
    if let Some(svg) = &pictures.selection {
        let _ = writeln!(
            h,
            "<figure>{}<figcaption>How often cross-validation chose each {}; the dark bar is \
             the {} with the lowest expected loss.</figcaption></figure>",
            inline_svg(svg, "histogram of the value chosen by cross-validation"),
            // A study's choices span every model's grid.
            e(if doc.models.is_empty() {
                &doc.knob
            } else {
                "candidate (model and knob value)"
            }),
            if doc.models.is_empty() {
                "value"
            } else {
                "candidate"
            }
        );
    }
    if let Some(sel) = &doc.selection {
        // The same numbers as the terminal's `selection:` line.
        let _ = writeln!(
            h,
            "<p>{}</p>",
            e(&super::selection::sentence(
                sel,
                &doc.knob,
                &doc.scenario.grid
            ))
        );
        h.push_str("<dl class=\"facts\" id=\"selection-audit\">\n");
        let pct = |v: f64| {
            if v.is_finite() {
                crate::fmt::fmt_percent(v)
            } else {
                "n/a".into()
            }
        };
        for (id, k, v) in [
            (
                "mean-excess-loss",
                "mean excess loss over the oracle",
                fmt_num(sel.mean_excess_loss),
            ),
            (
                "q90-excess-loss",
                "90% quantile of the excess loss",
                fmt_num(sel.q90_excess_loss),
            ),
            (
                "share-within-one-se",
                "choices within one standard error of the oracle",
                pct(sel.share_within_one_se),
            ),
            (
                "share-oracle",
                "choices of the oracle value itself",
                pct(sel.share_oracle),
            ),
        ] {
            let _ = writeln!(h, "<dt>{}</dt><dd id=\"{id}\">{}</dd>", e(k), e(&v));
        }
        h.push_str("</dl>\n");
    }

    for (heading, caption, svg) in &pictures.extra {
        let _ = writeln!(
            h,
            "<h2>{}</h2>\n<figure>{}<figcaption>{}</figcaption></figure>",
            e(heading),
            inline_svg(svg, heading),
            e(caption)
        );
    }

    h.push_str("<h2>The numbers</h2>\n<div class=\"wide\"><table>\n<thead><tr>");
    let (header, rows, legend) = terminal::cells(doc, view);
    // Several models or sizes: every row says its model and size, and only the best row (the
    // best model at the largest size) is marked (rows of every model and size whose knob value
    // equalled the best's were all marked "lowest").
    let study = !(doc.models.is_empty() && doc.sizes.is_empty());
    if study {
        h.push_str("<th>model</th><th>training rows</th>");
    }
    for (i, c) in header.iter().enumerate() {
        // Several models: the knob column holds each row's own knob (k-NN rows stood under
        // the first model's `max_depth`).
        let c = if study && i == 0 && doc.models.len() > 1 {
            "knob"
        } else {
            c.as_str()
        };
        let _ = write!(h, "<th>{}</th>", e(c));
    }
    h.push_str("<th></th></tr></thead>\n<tbody>\n");
    let best_row = terminal::best_row(doc);
    for (p, r) in doc.points.iter().zip(&rows) {
        let best = best_row.is_some_and(|b| std::ptr::eq(b, p));
        let _ = write!(
            h,
            "<tr{} data-value=\"{}\">",
            if best { " class=\"best\"" } else { "" },
            p.value
        );
        // Several models: each row's own knob before its value.
        let mut knob = None;
        if study {
            let _ = write!(
                h,
                "<td>{}</td><td>{}</td>",
                e(p.family.as_deref().unwrap_or(&doc.first_model())),
                p.train_size
                    .map_or(doc.scenario.train_size.to_string(), |n| n.to_string())
            );
            knob = doc
                .models
                .iter()
                .find(|m| p.family.as_deref() == Some(m.id()))
                .filter(|_| doc.models.len() > 1)
                .map(|m| m.knob.as_str());
        }
        for (i, c) in r.iter().enumerate() {
            let c = match knob {
                Some(k) if i == 0 => format!("{k} = {c}"),
                _ => c.clone(),
            };
            let _ = write!(h, "<td>{}</td>", e(&c));
        }
        let _ = writeln!(h, "<td>{}</td></tr>", if best { "lowest" } else { "" });
    }
    let _ = writeln!(
        h,
        "</tbody>\n</table></div>\n<p class=\"legend\">{}</p>",
        // The HTML table marks the best row "lowest" in its last column, not with `*`.
        e(&legend.trim_start_matches("legend: ").replace(
            terminal::BEST_MARK,
            "; \"lowest\" marks the lowest expected loss."
        ))
    );
    if let Some(note) = terminal::view_missing(doc, view) {
        let _ = writeln!(h, "<p class=\"legend\">Note: {}.</p>", e(&note));
    }

    h.push_str("<h2>The run</h2>\n<dl class=\"facts\">\n");
    let mut fact = |k: &str, v: String| {
        let _ = writeln!(h, "<dt>{}</dt><dd>{}</dd>", e(k), e(&v));
    };
    fact("scenario", doc.scenario.name.clone());
    fact("seed", doc.seed.to_string());
    fact("replicates", doc.replicates.to_string());
    fact(
        "replicate blocks (for standard errors)",
        doc.scenario.blocks.to_string(),
    );
    fact("lossprism version", doc.version.clone());
    fact(
        wall_label,
        wall_seconds
            .map(fmt_duration)
            .unwrap_or_else(|| "not measured".into()),
    );
    fact(
        "best value",
        format!(
            "{} = {} (expected loss {}{})",
            // A study's best names its model and that model's knob (the first model's knob
            // was written beside another model's value).
            match &doc.best.family {
                Some(f) if !doc.models.is_empty() => format!("{f} {}", doc.knob_of(f)),
                _ => doc.knob.clone(),
            },
            fmt_value(doc.best.value),
            fmt_num(doc.best.expected_loss),
            doc.best
                .stderr
                .map(|s| format!(" ± {}", fmt_se(s)))
                .unwrap_or_default()
        ),
    );
    h.push_str("</dl>\n</main>\n</body>\n</html>\n");
    h
}
