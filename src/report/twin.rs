//! The `scenario.twin` section of a result: what a twin run can say about its own twin — the
//! reference and the cross-validated R² of each candidate, the smoothed bootstrap of the inputs,
//! and, when `lossprism twin` wrote the scenario, its noise correction and fidelity check
//! (`[data.fit_report]`, echoed as written), and the pick it recommends per family
//! ([`RecommendedPick`]: the twin's own lowest expected loss, with the fidelity check's
//! bias-corrected pick beside it). Absent for every other source, so synthetic results are
//! unchanged.

use serde::{Deserialize, Serialize};

use crate::dgp::twin::{FidelityModel, FidelityRecord};
use crate::dgp::Synthetic;
use crate::fmt::{fmt_num, fmt_se, fmt_value};

/// `scenario.twin`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct TwinEcho {
    /// The reference's candidate (`knn`, `forest`, `loclin`, `poly`, `blend`).
    pub reference: String,
    /// The reference is twiced (refitted to its own residuals and added); absent when it is
    /// not.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub twice: bool,
    /// Input weights of the reference's k-NN and local-linear distances, one per input in the
    /// table's order (`metric` of the recipe); absent when every input counts alike.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub input_weights: Vec<f64>,
    /// The inputs the reference is fitted on when `lossprism twin` left the others out (the
    /// recipe's `inputs`); absent when it uses every input.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub inputs: Vec<String>,
    /// Cross-validated R² of each candidate when the choice was made (absent for older twins).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub cv_r2: Vec<CandidateR2>,
    /// The factor the reference's smoothing (k, leaf size, bandwidth of the parts it uses) was
    /// multiplied by after cross-validation chose it; absent when it was not sharpened.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sharpen: Option<f64>,
    /// The smoothed bootstrap's multiplier c on Silverman's rule (0: rows resampled as they
    /// are).
    pub jitter: f64,
    /// How the jitter treats the table's variance: `table` (kept: jittered columns shrunk
    /// toward their means) or `added` (the plain smoothed bootstrap); absent without a jitter
    /// and in results written before it was recorded.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub jitter_variance: Option<String>,
    /// The noise estimate and its correction (`lossprism twin`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub noise: Option<NoiseEcho>,
    /// The twin's noise varies with x (σ(x) from the reference's residuals, scaled to the
    /// corrected estimate's level); absent when it is constant.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub varying_noise: bool,
    /// The fidelity check (`lossprism twin`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub fidelity: Option<FidelityEcho>,
    /// The recommended knob value per family of the fidelity check (empty without one; absent
    /// in results written before it was added).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub recommended: Vec<RecommendedPick>,
}

/// The knob value `lossprism twin` recommends for one family: the headline pick.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct RecommendedPick {
    /// Family.
    pub family: String,
    /// Knob.
    pub knob: String,
    /// The recommended value ([`crate::dgp::twin::FidelityModel::headline_pick`]).
    pub value: f64,
    /// How it was chosen: `twin-lowest` (the lowest expected loss on the twin; twins written
    /// since the reference is twiced) or `bias-corrected` (the lowest of 2·EL(g) − mean EL*(g)
    /// over the twins of the twin; results of earlier twins).
    pub basis: String,
    /// The value with the lowest expected loss on the twin itself (the plain pick).
    pub twin_lowest: f64,
    /// The fidelity check's bias-corrected pick, the second opinion (absent in results of
    /// earlier twins, whose `value` was this pick).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bias_corrected: Option<f64>,
}

/// The recommended picks of a fidelity check, one per family. A record without
/// `twin_replicates` was written when the recommendation was the bias-corrected pick, and keeps
/// it.
pub fn recommended(f: &FidelityRecord) -> Vec<RecommendedPick> {
    f.models
        .iter()
        .map(|m| match f.twin_replicates {
            Some(_) => RecommendedPick {
                family: m.family.clone(),
                knob: m.knob.clone(),
                value: m.headline_pick(),
                basis: "twin-lowest".into(),
                twin_lowest: m.pick,
                bias_corrected: Some(m.corrected_pick),
            },
            None => RecommendedPick {
                family: m.family.clone(),
                knob: m.knob.clone(),
                value: m.corrected_pick,
                basis: "bias-corrected".into(),
                twin_lowest: m.pick,
                bias_corrected: None,
            },
        })
        .collect()
}

/// The recommended picks in one sentence (`None` when there are none), e.g. `Recommended pick
/// (lowest expected loss on the twin): tree max_depth = 4 (the fidelity check's bias-corrected
/// pick: 5); knn k = 12 (the bias-corrected pick agrees).` Results of earlier twins, whose
/// recommendation was the bias-corrected pick, read as they were written.
pub fn recommended_sentence(picks: &[RecommendedPick]) -> Option<String> {
    let first = picks.first()?;
    if first.basis == "bias-corrected" {
        let parts: Vec<String> = picks
            .iter()
            .map(|p| {
                let plain = if p.twin_lowest == p.value {
                    "also the lowest on the twin itself".to_string()
                } else {
                    format!(
                        "lowest expected loss on the twin itself: {}",
                        fmt_value(p.twin_lowest)
                    )
                };
                format!("{} {} = {} ({plain})", p.family, p.knob, fmt_value(p.value))
            })
            .collect();
        return Some(format!(
            "Recommended pick (bias-corrected by the fidelity check): {}.",
            parts.join("; ")
        ));
    }
    let parts: Vec<String> = picks
        .iter()
        .map(|p| {
            let second = match p.bias_corrected {
                Some(c) if c == p.value => " (the bias-corrected pick agrees)".to_string(),
                Some(c) => format!(
                    " (the fidelity check's bias-corrected pick: {})",
                    fmt_value(c)
                ),
                None => String::new(),
            };
            format!("{} {} = {}{second}", p.family, p.knob, fmt_value(p.value))
        })
        .collect();
    Some(format!(
        "Recommended pick (lowest expected loss on the twin): {}.",
        parts.join("; ")
    ))
}

/// One candidate's cross-validated R².
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct CandidateR2 {
    /// Candidate name.
    pub candidate: String,
    /// Its cross-validated R².
    pub r2: f64,
}

/// The noise as `lossprism twin` estimated it.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct NoiseEcho {
    /// Estimator (`gsjs`, `gamma`, `nn`).
    pub method: String,
    /// Raw estimate.
    pub raw: f64,
    /// Bias subtracted.
    pub correction: f64,
    /// Corrected σ² (the twin's noise).
    pub value: f64,
    /// Its standard error.
    pub stderr: f64,
    /// Bootstrap tables behind the standard error.
    pub tables: usize,
    /// Whether the estimator's neighbour distances weighted the inputs as the reference does.
    #[serde(default)]
    pub weighted: bool,
    /// Table rows the estimator left out as query rows, where the reference changes most over
    /// their neighbours (0: none).
    #[serde(default)]
    pub left_out: usize,
}

/// The fidelity check.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct FidelityEcho {
    /// Tables drawn from the twin.
    pub tables: usize,
    /// Replicates of every run of a twin of the twin.
    pub replicates: usize,
    /// Replicates of the twin's own run (absent for twins written when every run had
    /// `replicates` and the recommendation was the bias-corrected pick).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub twin_replicates: Option<usize>,
    /// One entry per family checked.
    pub models: Vec<FidelityModelEcho>,
}

/// One family's fidelity (see [`crate::dgp::twin::FidelityModel`]).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct FidelityModelEcho {
    /// Family.
    pub family: String,
    /// Knob.
    pub knob: String,
    /// Lowest expected loss on the twin.
    pub pick: f64,
    /// The twin's one-standard-error set.
    pub one_se: Vec<f64>,
    /// Picks of the twins of the twin.
    pub picks: Vec<f64>,
    /// Share of those picks inside `one_se`.
    pub in_one_se: f64,
    /// Mean relative curve distance of the twins of the twin.
    pub curve_error: f64,
    /// Pick of the bias-corrected curve.
    pub corrected_pick: f64,
    /// Grid.
    pub grid: Vec<f64>,
    /// Expected loss on the twin (the check's run).
    pub loss: Vec<f64>,
    /// Bias-corrected expected loss.
    pub corrected_loss: Vec<f64>,
}

/// The record a result echoes, read back (for `check`, which holds it to
/// [`FidelityRecord::problem`] and [`recommended`]).
impl From<&FidelityEcho> for FidelityRecord {
    fn from(f: &FidelityEcho) -> FidelityRecord {
        FidelityRecord {
            tables: f.tables,
            replicates: f.replicates,
            twin_replicates: f.twin_replicates,
            models: f
                .models
                .iter()
                .map(|m| FidelityModel {
                    family: m.family.clone(),
                    knob: m.knob.clone(),
                    pick: m.pick,
                    one_se: m.one_se.clone(),
                    picks: m.picks.clone(),
                    in_one_se: m.in_one_se,
                    curve_error: m.curve_error,
                    corrected_pick: m.corrected_pick,
                    grid: m.grid.clone(),
                    loss: m.loss.clone(),
                    corrected_loss: m.corrected_loss.clone(),
                })
                .collect(),
        }
    }
}

/// The twin section of a process; `None` unless it is a twin.
pub fn echo(p: &Synthetic) -> Option<TwinEcho> {
    if !p.is_twin() {
        return None;
    }
    let r = p.reference()?;
    let names = ["knn", "forest", "loclin", "poly", "blend"];
    let cv_r2 = r
        .choice
        .cv_r2
        .map(|v| {
            names
                .iter()
                .zip(v)
                .filter(|(_, x)| x.is_finite())
                .map(|(n, x)| CandidateR2 {
                    candidate: n.to_string(),
                    r2: x,
                })
                .collect()
        })
        .unwrap_or_default();
    let rep = r.report.clone().unwrap_or_default();
    let recommended = rep.fidelity.as_ref().map(recommended).unwrap_or_default();
    Some(TwinEcho {
        reference: r.choice.family.name().into(),
        twice: r.choice.twice,
        input_weights: r.choice.metric.clone().unwrap_or_default(),
        inputs: r
            .choice
            .inputs
            .as_ref()
            .map(|c| {
                c.iter()
                    .map(|&j| p.inputs.get(j).map_or("?".into(), |i| i.name.clone()))
                    .collect()
            })
            .unwrap_or_default(),
        cv_r2,
        sharpen: rep.sharpen,
        jitter: p.jitter().map_or(0.0, |j| j.scale),
        jitter_variance: p
            .jitter()
            .filter(|j| j.scale > 0.0)
            .map(|j| if j.table_variance { "table" } else { "added" }.to_string()),
        noise: rep.noise.map(|n| NoiseEcho {
            method: n.method,
            raw: n.raw,
            correction: n.correction,
            value: n.value,
            stderr: n.stderr,
            tables: n.tables,
            weighted: n.weighted,
            left_out: n.left_out,
        }),
        varying_noise: matches!(
            &p.response,
            crate::dgp::Response::Regression {
                noise: crate::dgp::Noise::Reference(_),
                ..
            }
        ),
        fidelity: rep.fidelity.map(|f| FidelityEcho {
            tables: f.tables,
            replicates: f.replicates,
            twin_replicates: f.twin_replicates,
            models: f
                .models
                .into_iter()
                .map(|m| FidelityModelEcho {
                    family: m.family,
                    knob: m.knob,
                    pick: m.pick,
                    one_se: m.one_se,
                    picks: m.picks,
                    in_one_se: m.in_one_se,
                    curve_error: m.curve_error,
                    corrected_pick: m.corrected_pick,
                    grid: m.grid,
                    loss: m.loss,
                    corrected_loss: m.corrected_loss,
                })
                .collect(),
        }),
        recommended,
    })
}

fn values(v: &[f64]) -> String {
    v.iter()
        .map(|x| fmt_value(*x))
        .collect::<Vec<_>>()
        .join(", ")
}

/// The twin section in plain sentences (HTML report).
pub fn words(t: &TwinEcho) -> Vec<String> {
    let mut out = Vec::new();
    if !t.cv_r2.is_empty() {
        let r2: Vec<String> = t
            .cv_r2
            .iter()
            .map(|c| format!("{} {}", c.candidate, fmt_num(c.r2)))
            .collect();
        // The polynomial is chosen by its own bar, not by the highest R² alone.
        let poly_passed = t.reference != "poly"
            && t.cv_r2.iter().any(|c| c.candidate == "poly")
            && t.cv_r2
                .iter()
                .filter(|c| c.candidate != "poly")
                .all(|c| t.cv_r2.iter().any(|p| p.candidate == "poly" && p.r2 > c.r2));
        out.push(format!(
            "The twin's truth is the `{}` reference, chosen by cross-validated R² among the candidates ({}{}){}; it is an estimate of E[y | x], not the table's real truth.",
            t.reference,
            r2.join(", "),
            if poly_passed {
                "; the polynomial scored highest but is chosen only when it removes at least a tenth of the best other candidate's held-out error, which it did not"
            } else {
                ""
            },
            if t.twice {
                ", then twiced (refitted to its own residuals and added, which gives back curvature a cross-validated fit rounds off)"
            } else {
                ""
            }
        ));
    }
    if let Some(f) = t.sharpen {
        out.push(format!(
            "After cross-validation chose it, the reference's smoothing (k, leaf size, bandwidth of the parts it uses) was multiplied by {}, so that the twin's truth keeps more of the curvature a family's bias comes from; the scenario's recipe is the sharpened one, the R² above are those of the cross-validated candidates.",
            fmt_value(f)
        ));
    }
    if !t.inputs.is_empty() {
        out.push(format!(
            "Its truth is fitted on {} only: `lossprism twin`'s search found that the response does not move with the table's other inputs (they are still drawn, and the families see them), and its noise was measured on these alone.",
            t.inputs.join(", ")
        ));
    }
    // Weights of 1 on every input kept only say which inputs are left out (no weighting).
    let kept_weights: Vec<f64> = t
        .input_weights
        .iter()
        .copied()
        .filter(|&w| t.inputs.is_empty() || w > 0.0)
        .collect();
    let weighs = !kept_weights.is_empty()
        && (t.inputs.is_empty() || kept_weights.iter().any(|&w| w != 1.0))
        && t.reference != "forest"
        && t.reference != "poly";
    if weighs {
        out.push(format!(
            "Its neighbour distances weight the standardized inputs by {} (in {}: the gradient of a bagged-tree pilot, chosen by cross-validation when `lossprism twin` wrote the twin), so inputs the response barely depends on count less.",
            values(&kept_weights),
            if t.inputs.is_empty() {
                "the table's input order"
            } else {
                "the order of the inputs above"
            }
        ));
    }
    if let Some(n) = &t.noise {
        out.push(format!(
            "Its noise σ² = {} ± {}{} was estimated from the table ({} estimator{}{}: raw {}, minus its bias {} measured by a parametric bootstrap from the twin; the standard error is the larger of the spread over {} bootstrap tables and the estimator's own standard error, combined with the reference's possible error as a sharp pilot measures it: `lossprism twin` prints the parts); the decomposition treats it as known, so the ± of the terms do not include its error, which moves the whole curve up or down together.",
            fmt_num(n.value),
            fmt_se(n.stderr),
            if t.varying_noise {
                " (it varies with x: σ²(x) is scaled so that the estimator would read this value)"
            } else {
                ""
            },
            n.method,
            if n.weighted {
                ", its neighbour distances weighted as the reference's"
            } else {
                ""
            },
            match n.left_out {
                0 => String::new(),
                r => format!(
                    ", the {r} {} where the reference changes most between neighbours left out",
                    if r == 1 { "row" } else { "rows" }
                ),
            },
            fmt_num(n.raw),
            fmt_num(n.correction),
            n.tables
        ));
    }
    if let Some(r) = recommended_sentence(&t.recommended) {
        out.push(r);
    }
    if let Some(f) = &t.fidelity {
        for m in &f.models {
            let inside = (m.in_one_se * m.picks.len() as f64).round() as usize;
            out.push(format!(
                "Fidelity check ({} {} drawn from the twin and twinned again, {} replicates per run{}), {} {}: the twin's lowest expected loss is at {} (one-SE set {}), the bias-corrected pick is {}; the twins of the twin picked {} ({} of {} inside the set) with a mean curve distance of {:.1}% — how accurate twins of tables like this one typically are, not an error bar for this table.",
                f.tables,
                if f.tables == 1 { "table" } else { "tables" },
                f.replicates,
                match f.twin_replicates {
                    Some(r) => format!(" of a twin of the twin, {r} for the twin itself"),
                    None => String::new(),
                },
                m.family,
                m.knob,
                fmt_value(m.pick),
                values(&m.one_se),
                fmt_value(m.corrected_pick),
                values(&m.picks),
                inside,
                m.picks.len(),
                100.0 * m.curve_error
            ));
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dgp::twin::FidelityModel;

    fn model(family: &str, knob: &str, pick: f64, corrected: f64) -> FidelityModel {
        FidelityModel {
            family: family.into(),
            knob: knob.into(),
            pick,
            one_se: vec![pick],
            picks: vec![pick, pick],
            in_one_se: 1.0,
            curve_error: 0.05,
            corrected_pick: corrected,
            grid: vec![4.0, 5.0, 12.0, 20.0],
            loss: vec![1.0; 4],
            corrected_loss: vec![1.0; 4],
        }
    }

    #[test]
    fn the_recommended_pick_is_the_twins_lowest_with_the_bias_corrected_pick_beside_it() {
        let f = FidelityRecord {
            tables: 2,
            replicates: 10,
            twin_replicates: Some(200),
            models: vec![
                model("tree", "max_depth", 5.0, 4.0),
                model("knn", "k", 12.0, 12.0),
            ],
        };
        let r = recommended(&f);
        assert_eq!(r.len(), 2);
        assert_eq!(
            (r[0].value, r[0].twin_lowest, r[0].bias_corrected),
            (5.0, 5.0, Some(4.0))
        );
        assert_eq!(
            (r[1].value, r[1].twin_lowest, r[1].bias_corrected),
            (12.0, 12.0, Some(12.0))
        );
        assert!(r.iter().all(|p| p.basis == "twin-lowest"));
        let s = recommended_sentence(&r).expect("a sentence");
        assert_eq!(
            s,
            "Recommended pick (lowest expected loss on the twin): tree max_depth = 5 (the \
             fidelity check's bias-corrected pick: 4); knn k = 12 (the bias-corrected pick \
             agrees)."
        );
        assert_eq!(recommended_sentence(&[]), None);
        // A scenario of an earlier twin (no `twin_replicates`) keeps the recommendation it was
        // written with, the bias-corrected pick.
        let old_record = FidelityRecord {
            twin_replicates: None,
            ..f.clone()
        };
        let r = recommended(&old_record);
        assert_eq!(
            (r[0].value, r[0].twin_lowest, r[0].bias_corrected),
            (4.0, 5.0, None)
        );
        assert!(r.iter().all(|p| p.basis == "bias-corrected"));
        // A result of an earlier twin, whose recommendation was the bias-corrected pick, reads
        // as it was written.
        let old = r#"[{"family":"tree","knob":"max_depth","value":4.0,"basis":"bias-corrected","twin_lowest":5.0}]"#;
        let old: Vec<RecommendedPick> = serde_json::from_str(old).expect("reads");
        assert_eq!(old[0].bias_corrected, None);
        assert_eq!(
            recommended_sentence(&old).unwrap(),
            "Recommended pick (bias-corrected by the fidelity check): tree max_depth = 4 \
             (lowest expected loss on the twin itself: 5)."
        );
    }

    #[test]
    fn a_twin_section_without_recommended_picks_still_reads_and_is_not_written_empty() {
        // Results written before `recommended` existed read as having none; an empty list is
        // left out, so twins without a fidelity check write the same JSON as before.
        let old = r#"{"reference": "knn", "jitter": 0.0}"#;
        let t: TwinEcho = serde_json::from_str(old).expect("reads");
        assert!(t.recommended.is_empty() && t.fidelity.is_none());
        let back = serde_json::to_string(&t).unwrap();
        assert!(!back.contains("recommended"), "{back}");
        let with = TwinEcho {
            recommended: recommended(&FidelityRecord {
                tables: 1,
                replicates: 2,
                twin_replicates: Some(200),
                models: vec![model("knn", "k", 20.0, 12.0)],
            }),
            ..t
        };
        let json = serde_json::to_string(&with).unwrap();
        assert!(
            json.contains(r#""recommended":[{"family":"knn","knob":"k","value":20.0,"basis":"twin-lowest","twin_lowest":20.0,"bias_corrected":12.0}]"#),
            "{json}"
        );
        let w = words(&with).join(" ");
        assert!(
            w.contains("knn k = 20 (the fidelity check's bias-corrected pick: 12)"),
            "{w}"
        );
    }
}
