//! CSV renderings: one row per grid value ([`to_csv`]: the knob value first, then the terms in
//! the loss's order, then their standard errors — the same values as the JSON), and one row per
//! (grid value, evaluation point) ([`points_csv`]: the inputs, then the loss's per-point terms).

use super::ResultDoc;
use crate::runner::Outcome;
use crate::scenario::{Plan, Source};

fn num(v: f64) -> String {
    if v.is_finite() {
        v.to_string()
    } else {
        String::new()
    }
}

fn column(key: &str) -> String {
    key.replace('.', "_")
}

/// One header and one row per grid value: the knob value (`value`), the family and training
/// size when a run has several, every term in the loss's order, `estimated` on tables, then
/// `stderr_<term>` for every term with a standard error, then — only when the rows carry them
/// (terms with a bootstrap standard error) — `lower95_<term>` and `upper95_<term>`, the 95 %
/// interval of each such term (bootstrap percentile, widened to ± 2 SE, not outside the
/// range a term cannot leave, 0 to 1 for a share), and last the knob's name (`knob`: the row's own model's knob
/// when a run has several models).
pub fn to_csv(doc: &ResultDoc) -> String {
    let mut w = csv::Writer::from_writer(Vec::new());
    let Some(first) = doc.points.first() else {
        return String::new();
    };
    let mut header = vec!["value".to_string()];
    let with_family = doc.points.iter().any(|p| p.family.is_some());
    let with_size = doc.points.iter().any(|p| p.train_size.is_some());
    if with_family {
        header.push("family".into());
    }
    if with_size {
        header.push("train_size".into());
    }
    header.extend(first.terms.iter().map(|(k, _)| column(k)));
    if first.estimated.is_some() {
        header.push("estimated".into());
    }
    header.extend(
        first
            .stderr
            .iter()
            .map(|(k, _)| format!("stderr_{}", column(k))),
    );
    for (k, _) in &first.interval {
        header.push(format!("lower95_{}", column(k)));
        header.push(format!("upper95_{}", column(k)));
    }
    header.push("knob".into());
    w.write_record(&header).expect("in-memory csv");
    for p in &doc.points {
        let mut rec = vec![num(p.value)];
        if with_family {
            rec.push(p.family.clone().unwrap_or_default());
        }
        if with_size {
            rec.push(p.train_size.map(|n| n.to_string()).unwrap_or_default());
        }
        rec.extend(first.terms.iter().map(|(k, _)| num(p.get(k))));
        if let Some(e) = p.estimated {
            rec.push(e.to_string());
        }
        rec.extend(first.stderr.iter().map(|(k, _)| match p.se(k) {
            Some(v) => num(v),
            None => String::new(),
        }));
        for (k, _) in &first.interval {
            let (lo, hi) = p.interval(k).unwrap_or((f64::NAN, f64::NAN));
            rec.push(num(lo));
            rec.push(num(hi));
        }
        // Several models: each row's own model's knob (rows name the model by its id).
        let knob = p
            .family
            .as_deref()
            .and_then(|id| doc.models.iter().find(|m| m.id() == id))
            .map_or(doc.knob.as_str(), |m| m.knob.as_str());
        rec.push(knob.to_string());
        w.write_record(&rec).expect("in-memory csv");
    }
    String::from_utf8(w.into_inner().expect("in-memory csv")).expect("utf-8")
}

/// One row per (grid value, evaluation point): the knob value, the model (`family`, its label,
/// and `knob`) when a run has several, the training size (`train_size`) when it has several, the
/// point's index (a table's working rows: its physical line in the file), its
/// inputs (an input named like another column, `variance` say, as `input_variance`), then the
/// loss's per-point columns (class indices written as their labels). Every
/// (training size, model) of a study is written, sizes ascending and models in scenario order; a
/// per-point column that only some models have (an ensemble's `diversity`) is empty for the
/// others.
pub fn points_csv(plan: &Plan, outcome: &Outcome) -> String {
    let mut w = csv::Writer::from_writer(Vec::new());
    let prep = &outcome.prepared;
    let observed = prep.table.is_some();
    let (names, labels, lines): (Vec<String>, Vec<String>, Option<Vec<usize>>) = match &plan.source
    {
        Source::Synthetic(sp) => (
            sp.process.inputs.iter().map(|i| i.name.clone()).collect(),
            match &sp.process.response {
                crate::dgp::Response::Classes(m) => m.labels.clone(),
                crate::dgp::Response::Regression { .. } => Vec::new(),
            },
            None,
        ),
        Source::Table(_) => {
            let work = &prep.table.as_ref().expect("a prepared table").work;
            (
                work.names.clone(),
                work.labels.clone(),
                Some(work.lines.clone()),
            )
        }
    };
    let with_model = plan.models.len() > 1;
    let with_size = plan.sizes.len() > 1;
    // The cells in order, and the union of their per-point columns in order of appearance.
    let cells: Vec<(usize, usize)> = (0..plan.sizes.len())
        .flat_map(|s| (0..plan.models.len()).map(move |i| (s, i)))
        .collect();
    let mut cols: Vec<(&'static str, bool)> = Vec::new();
    for &(s, i) in &cells {
        let shape = &outcome.summaries[plan.cell(s, i)].total.shape;
        for c in plan.loss.point_columns(shape, observed) {
            if !cols.iter().any(|d| d.0 == c.0) {
                cols.push(c);
            }
        }
    }
    let mut header = vec!["value".to_string()];
    if with_model {
        header.push("family".into());
        header.push("knob".into());
    }
    if with_size {
        header.push("train_size".into());
    }
    header.push(if observed { "line" } else { "point" }.to_string());
    // An input named like another column (`variance`, `value`, `knob`) is written as
    // `input_<name>`: a reader selecting the column by name got the input (a hostile sweep).
    let taken: Vec<String> = header
        .iter()
        .cloned()
        .chain(cols.iter().map(|c| c.0.to_string()))
        .collect();
    let mut inputs: Vec<String> = Vec::with_capacity(names.len());
    for n in &names {
        let mut name = n.clone();
        while taken.contains(&name) || inputs.contains(&name) {
            name = format!("input_{name}");
        }
        inputs.push(name);
    }
    header.extend(inputs);
    header.extend(cols.iter().map(|c| c.0.to_string()));
    w.write_record(&header).expect("in-memory csv");
    let noise_var = prep.noise_var();
    let probs = prep.flat_probs();
    let target = prep.target(&noise_var, &probs);
    for &(s, i) in &cells {
        let model = &plan.models[i];
        let acc = &outcome.summaries[plan.cell(s, i)].total;
        let own: Vec<&'static str> = plan
            .loss
            .point_columns(&acc.shape, observed)
            .iter()
            .map(|c| c.0)
            .collect();
        for (g, &value) in model.grid.iter().enumerate() {
            for e in 0..acc.shape.points {
                let mut rec = vec![value.to_string()];
                if with_model {
                    rec.push(model.label.clone());
                    rec.push(model.family.knob().to_string());
                }
                if with_size {
                    rec.push(plan.sizes[s].to_string());
                }
                rec.push(lines.as_ref().map_or(e, |l| l[e]).to_string());
                rec.extend(prep.eval_x.row(e).iter().map(|v| v.to_string()));
                let vals = plan.loss.point_values(acc, &target, g, e);
                for (name, is_label) in &cols {
                    let Some(k) = own.iter().position(|o| o == name) else {
                        rec.push(String::new());
                        continue;
                    };
                    let v = vals[k];
                    if *is_label && v.is_finite() {
                        let c = v as usize;
                        rec.push(labels.get(c).cloned().unwrap_or_else(|| c.to_string()));
                    } else {
                        rec.push(num(v));
                    }
                }
                w.write_record(&rec).expect("in-memory csv");
            }
        }
    }
    String::from_utf8(w.into_inner().expect("in-memory csv")).expect("utf-8")
}
