//! The terminal table: aligned columns, `±` standard errors, the best row marked, a one-line
//! legend and the reading of the curve.

use super::{fmt_num, fmt_se, fmt_value, ResultDoc};

fn with_se(v: f64, se: Option<f64>) -> String {
    match se {
        Some(s) => format!("{} ± {}", fmt_num(v), fmt_se(s)),
        None => fmt_num(v),
    }
}

/// Renders the table for a result document.
pub fn render(doc: &ResultDoc) -> String {
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
    let header = [
        doc.knob.clone(),
        "expected loss".into(),
        "bias²".into(),
        "variance".into(),
        "noise".into(),
        "direct check".into(),
    ];
    let mut rows: Vec<[String; 6]> = Vec::new();
    for p in &doc.points {
        let mark = if p.value == doc.best.value {
            " *"
        } else {
            "  "
        };
        rows.push([
            format!("{}{mark}", fmt_value(p.value)),
            with_se(p.expected_loss, p.stderr.expected_loss),
            with_se(p.bias_sq, p.stderr.bias_sq),
            with_se(p.variance, p.stderr.variance),
            fmt_num(p.noise),
            with_se(p.expected_loss_direct, p.stderr.expected_loss_direct),
        ]);
    }
    let mut widths = [0usize; 6];
    for (i, h) in header.iter().enumerate() {
        widths[i] = h.chars().count();
    }
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
    out.push_str(
        "legend: expected loss = noise + bias² + variance (squared units of the response), averaged over \
         evaluation points; ± one standard error (jackknife over replicate blocks); direct check = mean \
         squared error against fresh noisy responses; * lowest expected loss.\n",
    );
    out.push_str(&format!("reading: {}\n", doc.reading));
    out
}
