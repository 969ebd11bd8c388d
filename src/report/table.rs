//! The terminal table: aligned columns, `±` standard errors, the best row marked, a one-line
//! legend and the reading of the curve. For 0-1 loss the columns follow the chosen
//! decomposition (Domingos by default).

use super::{fmt_num, fmt_se, fmt_value, PointRow, ResultDoc};

/// Which 0-1 decomposition the table shows (squared loss has one).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum View {
    /// Domingos (2000): bias, variance, net variance.
    #[default]
    Domingos,
    /// Kohavi and Wolpert (1996): noise, bias², variance.
    KohaviWolpert,
    /// James (2003): systematic effect, variance effect.
    James,
    /// All three side by side.
    All,
}

fn with_se(v: f64, se: Option<f64>) -> String {
    match se {
        Some(s) => format!("{} ± {}", fmt_num(v), fmt_se(s)),
        None => fmt_num(v),
    }
}

fn opt_se(v: Option<f64>, se: Option<Option<f64>>) -> String {
    match v {
        Some(v) => with_se(v, se.flatten()),
        None => "n/a".into(),
    }
}

type Column = (&'static str, Box<dyn Fn(&PointRow) -> String>);

/// Columns of a table-source result: out-of-bag loss, bias²+noise (or bias against the observed
/// labels), variance, and for squared loss the noise estimate and the estimated bias².
fn table_source_columns(doc: &ResultDoc) -> Vec<Column> {
    let mut cols: Vec<Column> = vec![(
        "expected loss (OOB)",
        Box::new(|p: &PointRow| with_se(p.expected_loss, p.stderr.expected_loss)),
    )];
    if doc.loss == "squared" {
        cols.push((
            "bias²+noise",
            Box::new(|p: &PointRow| opt_se(p.bias_sq_plus_noise, p.stderr.bias_sq_plus_noise)),
        ));
        cols.push((
            "variance",
            Box::new(|p: &PointRow| with_se(p.variance, p.stderr.variance)),
        ));
        cols.push(("noise (est.)", Box::new(|p: &PointRow| fmt_num(p.noise))));
        cols.push((
            "bias² (est.)",
            Box::new(|p: &PointRow| opt_se(p.bias_sq, p.stderr.bias_sq)),
        ));
    } else {
        cols.push((
            "bias+noise",
            Box::new(|p: &PointRow| opt_se(p.bias, p.stderr.bias)),
        ));
        cols.push((
            "variance",
            Box::new(|p: &PointRow| with_se(p.variance, p.stderr.variance)),
        ));
        cols.push((
            "net variance",
            Box::new(|p: &PointRow| opt_se(p.net_variance, p.stderr.net_variance)),
        ));
    }
    cols
}

/// Legend of a table-source result: what the columns mean, the noise estimate and the
/// resampling scheme's known distortion.
fn table_source_legend(doc: &ResultDoc) -> String {
    let mut s = String::from("legend: ");
    if doc.loss == "squared" {
        s.push_str(
            "expected loss = mean out-of-bag squared error = bias²+noise + variance exactly; \
             bias²+noise = (mean OOB prediction − observed)² − variance/R_i per row, averaged",
        );
        if let Some(n) = &doc.noise_estimate {
            s.push_str(&format!(
                "; noise (est.) = {} ± {} by {}; bias² (est.) = bias²+noise − noise (est.)",
                fmt_num(n.value),
                fmt_se(n.stderr.unwrap_or(f64::NAN)),
                n.about
            ));
        }
    } else {
        s.push_str(
            "expected loss = out-of-bag misclassification rate; bias+noise = share of rows whose \
             majority OOB prediction is not the observed label (Domingos 2000, noise folded in); \
             variance = share of OOB predictions differing from the majority",
        );
    }
    s.push_str(
        "; ± one standard error (jackknife over replicate blocks); * lowest expected loss.\n",
    );
    if let Some(t) = &doc.table {
        s.push_str(&format!(
            "table: {} · target `{}` · {} rows ({} dropped, {} locked in the holdout, {} resampled; {} skipped: held out in fewer than 2 replicates)\n",
            t.path, t.target, t.rows, t.dropped_rows, t.holdout_rows, t.working_rows, t.skipped_rows
        ));
        for e in &t.encodings {
            s.push_str(&format!("encoding: {e}\n"));
        }
    }
    if let Some(n) = &doc.scheme_note {
        s.push_str(&format!("scheme: {n}\n"));
    }
    s
}

fn columns(doc: &ResultDoc, view: View) -> Vec<Column> {
    if doc.table.is_some() {
        return table_source_columns(doc);
    }
    let mut cols: Vec<Column> = vec![(
        "expected loss",
        Box::new(|p: &PointRow| with_se(p.expected_loss, p.stderr.expected_loss)),
    )];
    if doc.loss == "squared" {
        cols.push((
            "bias²",
            Box::new(|p: &PointRow| opt_se(p.bias_sq, p.stderr.bias_sq)),
        ));
        cols.push((
            "variance",
            Box::new(|p: &PointRow| with_se(p.variance, p.stderr.variance)),
        ));
        cols.push(("noise", Box::new(|p: &PointRow| fmt_num(p.noise))));
    } else {
        cols.push(("noise (Bayes)", Box::new(|p: &PointRow| fmt_num(p.noise))));
        if matches!(view, View::Domingos | View::All) {
            cols.push((
                "bias",
                Box::new(|p: &PointRow| opt_se(p.bias, p.stderr.bias)),
            ));
            cols.push((
                "variance",
                Box::new(|p: &PointRow| with_se(p.variance, p.stderr.variance)),
            ));
            cols.push((
                "net variance",
                Box::new(|p: &PointRow| opt_se(p.net_variance, p.stderr.net_variance)),
            ));
            cols.push((
                "unbiased var",
                Box::new(|p: &PointRow| opt_se(p.unbiased_variance, p.stderr.unbiased_variance)),
            ));
            cols.push((
                "biased var",
                Box::new(|p: &PointRow| opt_se(p.biased_variance, p.stderr.biased_variance)),
            ));
        }
        if matches!(view, View::KohaviWolpert | View::All) {
            cols.push((
                "KW noise",
                Box::new(|p: &PointRow| {
                    fmt_num(
                        p.kohavi_wolpert
                            .as_ref()
                            .and_then(|k| k.noise)
                            .unwrap_or(f64::NAN),
                    )
                }),
            ));
            cols.push((
                "KW bias²",
                Box::new(|p: &PointRow| {
                    opt_se(
                        p.kohavi_wolpert.as_ref().and_then(|k| k.bias_sq),
                        p.stderr.kohavi_wolpert.as_ref().map(|k| k.bias_sq),
                    )
                }),
            ));
            cols.push((
                "KW variance",
                Box::new(|p: &PointRow| {
                    opt_se(
                        p.kohavi_wolpert.as_ref().and_then(|k| k.variance),
                        p.stderr.kohavi_wolpert.as_ref().map(|k| k.variance),
                    )
                }),
            ));
        }
        if matches!(view, View::James | View::All) {
            cols.push((
                "systematic effect",
                Box::new(|p: &PointRow| {
                    opt_se(
                        p.james.as_ref().and_then(|j| j.systematic_effect),
                        p.stderr.james.as_ref().map(|j| j.systematic_effect),
                    )
                }),
            ));
            cols.push((
                "variance effect",
                Box::new(|p: &PointRow| {
                    opt_se(
                        p.james.as_ref().and_then(|j| j.variance_effect),
                        p.stderr.james.as_ref().map(|j| j.variance_effect),
                    )
                }),
            ));
        }
    }
    cols.push((
        "direct check",
        Box::new(|p: &PointRow| with_se(p.expected_loss_direct, p.stderr.expected_loss_direct)),
    ));
    cols
}

fn legend(doc: &ResultDoc, view: View) -> String {
    if doc.table.is_some() {
        return table_source_legend(doc);
    }
    let mut s = String::from("legend: ");
    if doc.loss == "squared" {
        s.push_str(
            "expected loss = noise + bias² + variance (squared units of the response), averaged over \
             evaluation points",
        );
    } else {
        s.push_str("expected loss = misclassification rate 1 − Σ p_true·p_predicted, averaged over evaluation points; noise = Bayes error");
        if matches!(view, View::Domingos | View::All) {
            s.push_str(
                "; Domingos (2000): bias = share of points whose majority prediction is not the Bayes class, \
                 loss = c1·noise + bias + net variance, net variance = unbiased − biased variance",
            );
        }
        if matches!(view, View::KohaviWolpert | View::All) {
            s.push_str(
                "; Kohavi-Wolpert (1996): KW noise + KW bias² + KW variance = expected loss",
            );
        }
        if matches!(view, View::James | View::All) {
            s.push_str(
                "; James (2003): noise + systematic effect + variance effect = expected loss",
            );
        }
    }
    s.push_str(
        "; ± one standard error (jackknife over replicate blocks); direct check = loss against fresh \
         responses; * lowest expected loss.\n",
    );
    s
}

/// The table without layout, for other renderings (the HTML report): the header cells, one row
/// of cells per grid value (knob value first, unmarked) and the one-line legend.
pub fn cells(doc: &ResultDoc, view: View) -> (Vec<String>, Vec<Vec<String>>, String) {
    let cols = columns(doc, view);
    let mut header = vec![doc.knob.clone()];
    header.extend(cols.iter().map(|c| c.0.to_string()));
    let rows = doc
        .points
        .iter()
        .map(|p| {
            let mut r = vec![fmt_value(p.value)];
            r.extend(cols.iter().map(|c| (c.1)(p)));
            r
        })
        .collect();
    (header, rows, legend(doc, view).trim_end().to_string())
}

/// Renders the table for a result document (Domingos view for 0-1 loss).
pub fn render(doc: &ResultDoc) -> String {
    render_view(doc, View::Domingos)
}

/// Renders the table with the chosen 0-1 decomposition view.
pub fn render_view(doc: &ResultDoc, view: View) -> String {
    let mut out = String::new();
    out.push_str(&format!(
        "{} · family {} (knob {}) · {} loss · R = {} replicates · seed {}\n",
        doc.scenario.name, doc.family, doc.knob, doc.loss, doc.replicates, doc.seed
    ));
    if !doc.scenario.about.is_empty() {
        out.push_str(&doc.scenario.about);
        out.push('\n');
    }
    out.push('\n');
    let cols = columns(doc, view);
    let mut header: Vec<String> = vec![doc.knob.clone()];
    header.extend(cols.iter().map(|c| c.0.to_string()));
    let mut rows: Vec<Vec<String>> = Vec::new();
    for p in &doc.points {
        let mark = if p.value == doc.best.value {
            " *"
        } else {
            "  "
        };
        let mut r = vec![format!("{}{mark}", fmt_value(p.value))];
        r.extend(cols.iter().map(|c| (c.1)(p)));
        rows.push(r);
    }
    let mut widths: Vec<usize> = header.iter().map(|h| h.chars().count()).collect();
    for r in &rows {
        for (i, c) in r.iter().enumerate() {
            widths[i] = widths[i].max(c.chars().count());
        }
    }
    let line = |cells: &[String]| -> String {
        let mut s = String::new();
        for (i, c) in cells.iter().enumerate() {
            let pad = widths[i] - c.chars().count();
            s.push_str(&" ".repeat(pad + if i == 0 { 1 } else { 3 }));
            s.push_str(c);
        }
        s.push('\n');
        s
    };
    out.push_str(&line(&header));
    for r in &rows {
        out.push_str(&line(r));
    }
    out.push('\n');
    out.push_str(&legend(doc, view));
    out.push_str(&format!("reading: {}\n", doc.reading));
    if let Some(sel) = &doc.selection {
        let sentence = crate::audit::sentence(sel, &doc.knob, &doc.scenario.grid);
        out.push_str(&format!("selection: {sentence}\n"));
    }
    out
}
