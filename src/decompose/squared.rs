//! Squared loss: per cell (grid value × evaluation point) the running mean and centred sum of
//! squares of the predictions (Welford's update; blocks merged with the pairwise update of Chan,
//! Golub and LeVeque 1979), and the decomposition
//! `E[(Y − f̂(x))²] = σ²(x) + bias²(x) + variance(x)` (Hastie, Tibshirani, Friedman, *The
//! Elements of Statistical Learning*, 2nd ed., eq. 7.9) with unbiased estimators:
//! `V̂ = M2/(R − 1)` and `B̂² = (m − f)² − V̂/R`, so that `(1/R) Σ (ŷ_r − f)² = B̂² + V̂` exactly.
//!
//! **Several fits per training set** (`fit_seeds = S ≥ 2`): the cell tracks the S-averaged
//! prediction ȳ_r and the sum of the within-replicate sample variances s²_r. By the law of total
//! variance, `Var ŷ = Var_D E_s[ŷ] + E_D Var_s[ŷ]`; the one-way random-effects (ANOVA) estimators
//! `variance_fit = mean_r s²_r` and `variance_data = Var_r(ȳ_r) − variance_fit/S` are unbiased at
//! any finite R and S (Searle, Casella, McCulloch, *Variance Components*, 1992, §3.5), and
//! `variance = variance_data + variance_fit` is the variance of one fit. The separation follows
//! Neal et al. (2018), "A Modern Take on the Bias-Variance Tradeoff in Neural Networks".
//!
//! **Ensembles**: the family reports per replicate the members' spread around the ensemble,
//! `(1/T) Σ_t (h_t − h̄)²`; its mean is the `diversity`. With exchangeable members (every tree of
//! a forest is drawn the same way) the average member bias² equals the ensemble's bias², the
//! average member variance is `variance + diversity`, and the exact identity
//! `expected_loss = noise + bias² + member_variance − diversity` holds (Krogh and Vedelsby 1995,
//! the ambiguity decomposition; Wood et al. 2023, *JMLR* 24(359), the bias-variance-diversity
//! decomposition).
//!
//! **Tables** (observed responses, noise unknown): per row, `bias²+noise = (m_i − y_i)² − V_i/R_i`
//! with `R_i` the replicates holding row i out, so that `bias²+noise + V_i` is exactly the row's
//! mean out-of-bag squared error; averages use rows held out at least twice.

use super::{
    Acc, ArraySpec, Batch, Group, Identity, Kind, Loss, Role, Row, Shape, Summary, Target, TermInfo,
};
use crate::family::Task;

/// The squared loss.
#[derive(Debug, Clone, Copy, Default)]
pub struct Squared;

const MEAN: usize = 0;
const M2: usize = 1;
/// Per grid value (every point evaluated): Σ_r of the replicate's mean squared error against
/// fresh responses. Per cell (held-out rows): Σ_r of the squared error against the observed
/// response.
const DIRECT: usize = 2;

fn within_index(shape: &Shape) -> Option<usize> {
    (shape.fits >= 2).then_some(3)
}

fn div_index(shape: &Shape) -> Option<usize> {
    shape.ensemble.then_some(3 + usize::from(shape.fits >= 2))
}

fn info(
    key: &'static str,
    label: &'static str,
    meaning: &'static str,
    role: Role,
    group: Group,
    estimated: bool,
    stderr: bool,
) -> TermInfo {
    TermInfo {
        estimated,
        ..super::term(key, label, meaning, role, group, stderr)
    }
}

/// Per-point terms.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SquaredPoint {
    /// Mean prediction over replicates (S-averaged with several fits).
    pub mean_prediction: f64,
    /// Unbiased squared bias against the truth (or bias² + noise against an observed response).
    pub bias_sq: f64,
    /// Unbiased variance of one fit.
    pub variance: f64,
    /// `Var_D E_s ŷ` (several fits; NaN otherwise).
    pub variance_data: f64,
    /// `E_D Var_s ŷ` (several fits; NaN otherwise).
    pub variance_fit: f64,
    /// Mean diversity (ensembles; NaN otherwise).
    pub diversity: f64,
}

/// Where the optional terms sit in a description of the squared loss (`None`: not described
/// for this shape), found once per `evaluate` or `per_point` call.
struct Slots {
    bpn: Option<usize>,
    vd: Option<usize>,
    vf: Option<usize>,
    div: Option<usize>,
    mv: Option<usize>,
    ml: Option<usize>,
}

impl Slots {
    fn of(descr: &[TermInfo]) -> Slots {
        let idx = |k: &str| descr.iter().position(|t| t.key == k);
        Slots {
            bpn: idx("bias_sq_plus_noise"),
            vd: idx("variance_data"),
            vf: idx("variance_fit"),
            div: idx("diversity"),
            mv: idx("member_variance"),
            ml: idx("member_loss"),
        }
    }

    /// Writes one row: the five leading terms (`expected_loss`, `bias_sq`, `variance`, `noise`,
    /// `expected_loss_direct`), then the optional ones from `b2` (the averaged bias² part) and
    /// the sums `(vd, vf, dv)` of the data, fit and diversity variances over `u` points.
    fn fill(
        &self,
        row: &mut [f64],
        lead: [f64; 5],
        b2: f64,
        (vd, vf, dv): (f64, f64, f64),
        u: f64,
    ) {
        row[..5].copy_from_slice(&lead);
        let (el, v) = (lead[0], lead[2]);
        if let Some(i) = self.bpn {
            row[i] = b2;
        }
        if let (Some(a), Some(b)) = (self.vd, self.vf) {
            row[a] = vd / u;
            row[b] = vf / u;
        }
        if let Some(i) = self.div {
            let d = dv / u;
            row[i] = d;
            if let Some(j) = self.mv {
                row[j] = v + d;
            }
            if let Some(j) = self.ml {
                row[j] = el + d;
            }
        }
    }
}

/// Terms at cell (g, e) against `truth` (f(x_e), or the observed y_e).
#[inline(always)]
pub fn point(acc: &Acc, g: usize, e: usize, truth: f64) -> SquaredPoint {
    let sh = &acc.shape;
    let i = g * sh.points + e;
    if sh.fits == 1 && !sh.ensemble {
        // The common case, without the fit-seed and ensemble arrays.
        let rf = acc.count[e] as f64;
        let mean = acc.floats[MEAN][i];
        let v = if acc.count[e] >= 2 {
            acc.floats[M2][i] / (rf - 1.0)
        } else {
            f64::NAN
        };
        let d = mean - truth;
        return SquaredPoint {
            mean_prediction: if acc.count[e] >= 1 { mean } else { f64::NAN },
            bias_sq: d * d - v / rf,
            variance: v,
            variance_data: f64::NAN,
            variance_fit: f64::NAN,
            diversity: f64::NAN,
        };
    }
    let r = acc.count[e];
    let rf = r as f64;
    let mean = acc.floats[MEAN][i];
    let v_avg = if r >= 2 {
        acc.floats[M2][i] / (rf - 1.0)
    } else {
        f64::NAN
    };
    let d = mean - truth;
    let bias_sq = d * d - v_avg / rf;
    let (variance, vd, vf) = match within_index(sh) {
        None => (v_avg, f64::NAN, f64::NAN),
        Some(w) => {
            let vf = acc.floats[w][i] / rf;
            let vd = v_avg - vf / sh.fits as f64;
            (vd + vf, vd, vf)
        }
    };
    let diversity = div_index(sh).map_or(f64::NAN, |k| acc.floats[k][i] / rf);
    SquaredPoint {
        mean_prediction: if r >= 1 { mean } else { f64::NAN },
        bias_sq,
        variance,
        variance_data: vd,
        variance_fit: vf,
        diversity,
    }
}

impl Loss for Squared {
    fn nonnegative_terms(&self) -> &'static [&'static str] {
        &super::MEAN_SQUARE_TERMS
    }

    /// In the response's own units, whose scale a document does not carry: relative only.
    fn identity_floor(&self) -> f64 {
        0.0
    }

    fn name(&self) -> &'static str {
        "squared"
    }

    fn supports(&self, task: Task) -> bool {
        task == Task::Regress
    }

    fn bias_word(&self) -> &'static str {
        "Bias²"
    }

    fn observed_note(&self) -> &'static str {
        " (On a table, bias² is bias²+noise minus an estimated noise.)"
    }

    fn layout(&self, shape: &Shape) -> Vec<ArraySpec> {
        let cells = shape.cells();
        let f = |name, len, non_negative| ArraySpec {
            name,
            kind: Kind::Float,
            len,
            non_negative,
        };
        let mut v = vec![f("mean", cells, false), f("m2", cells, true)];
        if shape.all_points {
            v.push(f("direct", shape.grid, true));
        } else {
            v.push(f("sse", cells, true));
        }
        if within_index(shape).is_some() {
            v.push(f("within", cells, true));
        }
        if div_index(shape).is_some() {
            v.push(f("diversity", cells, true));
        }
        v
    }

    fn push(&self, acc: &mut Acc, batch: &Batch<'_>) {
        let sh = acc.shape;
        let s_fits = batch.values.dim().0;
        if sh.all_points && s_fits == 1 && !sh.ensemble && batch.held.is_none() {
            push_plain(acc, batch);
            return;
        }
        let k = batch.len();
        let points = sh.points;
        let within = within_index(&sh);
        let div = div_index(&sh);
        let m = k as f64;
        for g in 0..sh.grid {
            // The direct check: the replicate's mean squared error against the responses seen,
            // averaged over its fits.
            let mut direct_g = 0.0;
            for s in 0..s_fits {
                let sse: f64 = batch
                    .values
                    .slice(ndarray::s![s, g, ..])
                    .iter()
                    .zip(batch.response.iter())
                    .map(|(p, y)| (p - y) * (p - y))
                    .sum();
                direct_g += sse / m;
            }
            if s_fits > 1 {
                direct_g /= s_fits as f64;
            }
            for j in 0..k {
                let e = batch.point(j);
                let cell = g * points + e;
                let inv = 1.0 / acc.count[e] as f64;
                let y = if s_fits == 1 {
                    batch.values[[0, g, j]]
                } else {
                    let sum: f64 = (0..s_fits).map(|s| batch.values[[s, g, j]]).sum();
                    sum / s_fits as f64
                };
                let mu = &mut acc.floats[MEAN][cell];
                let dlt = y - *mu;
                *mu += dlt * inv;
                let new_mu = *mu;
                acc.floats[M2][cell] += dlt * (y - new_mu);
                if let Some(w) = within {
                    let ss: f64 = (0..s_fits)
                        .map(|s| {
                            let t = batch.values[[s, g, j]] - y;
                            t * t
                        })
                        .sum();
                    acc.floats[w][cell] += ss / (s_fits - 1) as f64;
                }
                if let (Some(dv), Some(bd)) = (div, batch.diversity.as_ref()) {
                    let sum: f64 = (0..s_fits).map(|s| bd[[s, g, j]]).sum();
                    acc.floats[dv][cell] += sum / s_fits as f64;
                }
                if !sh.all_points {
                    let yo = batch.response[j];
                    let mut se = 0.0;
                    for s in 0..s_fits {
                        let p = batch.values[[s, g, j]];
                        se += (p - yo) * (p - yo);
                    }
                    if s_fits > 1 {
                        se /= s_fits as f64;
                    }
                    acc.floats[DIRECT][cell] += se;
                }
            }
            if sh.all_points {
                acc.floats[DIRECT][g] += direct_g;
            }
        }
    }

    fn merge(&self, acc: &mut Acc, other: &Acc) {
        let sh = acc.shape;
        if sh.all_points {
            merge_plain(acc, other);
            return;
        }
        // Per point: the weights of the pairwise update (Chan, Golub, LeVeque 1979).
        let weights: Vec<Option<(f64, f64)>> = acc
            .count
            .iter()
            .zip(&other.count)
            .map(|(&a, &b)| {
                if b == 0 {
                    None
                } else {
                    let (na, nb) = (a as f64, b as f64);
                    let n = na + nb;
                    Some((nb / n, na * nb / n))
                }
            })
            .collect();
        for g in 0..sh.grid {
            for (e, w) in weights.iter().enumerate() {
                let Some((wb, wab)) = *w else { continue };
                let c = g * sh.points + e;
                let d = other.floats[MEAN][c] - acc.floats[MEAN][c];
                acc.floats[MEAN][c] += d * wb;
                acc.floats[M2][c] += other.floats[M2][c] + d * d * wab;
            }
        }
        let from = if sh.all_points { DIRECT } else { M2 + 1 };
        for k in from..acc.floats.len() {
            for (a, b) in acc.floats[k].iter_mut().zip(&other.floats[k]) {
                *a += b;
            }
        }
    }

    fn describe(&self, shape: &Shape, observed: bool) -> Vec<TermInfo> {
        use Group::{Detail, Main};
        let mut v = vec![info(
            "expected_loss",
            if observed {
                "expected loss (OOB)"
            } else {
                "expected loss"
            },
            if observed {
                "mean out-of-bag squared error = bias²+noise + variance exactly"
            } else {
                "noise + bias² + variance (squared units of the response), averaged over evaluation points"
            },
            Role::Loss,
            Main,
            false,
            true,
        )];
        v.push(info(
            "bias_sq",
            if observed { "bias² (est.)" } else { "bias²" },
            if observed {
                "bias²+noise − noise (est.): the squared bias with an estimated noise removed; its standard error includes the noise estimate's"
            } else {
                "(mean prediction − truth)² − variance/R, unbiased"
            },
            Role::Bias,
            Main,
            observed,
            true,
        ));
        v.push(info(
            "variance",
            "variance",
            "spread of the predictions over training sets, unbiased",
            Role::Variance,
            Main,
            false,
            true,
        ));
        v.push(info(
            "noise",
            if observed { "noise (est.)" } else { "noise" },
            if observed {
                "noise variance estimated from the table"
            } else {
                "σ²(x), known exactly from the scenario"
            },
            Role::Noise,
            Main,
            observed,
            false,
        ));
        v.push(info(
            "expected_loss_direct",
            "direct check",
            if observed {
                "mean out-of-bag squared error summed directly (equals expected loss to rounding)"
            } else {
                "mean squared error against fresh noisy responses, an independent estimate of the expected loss"
            },
            Role::Direct,
            Main,
            false,
            true,
        ));
        if observed {
            v.push(info(
                "bias_sq_plus_noise",
                "bias²+noise",
                "(mean out-of-bag prediction − observed)² − variance/R_i per row, averaged",
                Role::Other,
                Main,
                false,
                true,
            ));
        }
        if shape.fits >= 2 {
            v.push(info(
                "variance_data",
                "var (data)",
                "Var over training sets of the prediction averaged over fit seeds (with a fixed design: the label-noise part)",
                Role::Other,
                Main,
                false,
                true,
            ));
            v.push(info(
                "variance_fit",
                "var (fit)",
                "mean over training sets of the variance across fit seeds: the learner's own randomness",
                Role::Other,
                Main,
                false,
                true,
            ));
        }
        if shape.ensemble {
            v.push(info(
                "diversity",
                "diversity",
                "mean spread of the ensemble's members around the ensemble, (1/T) Σ (h_t − h̄)²",
                Role::Other,
                Main,
                false,
                true,
            ));
            v.push(info(
                "member_variance",
                "member var",
                "average member variance = variance + diversity (exchangeable members)",
                Role::Other,
                Detail,
                false,
                true,
            ));
            v.push(info(
                "member_loss",
                "avg member loss",
                "expected loss of a single member, averaged over the members = expected loss + diversity (what averaging saves)",
                Role::Other,
                Main,
                false,
                true,
            ));
        }
        v
    }

    /// The second-order part of `bias_sq` (and on a table the noise estimate's error).
    fn stderr_beyond_jackknife(&self, key: &str) -> bool {
        key == "bias_sq"
    }

    fn identities(&self, shape: &Shape, observed: bool) -> Vec<Identity> {
        let mut v = vec![if observed {
            Identity {
                name: "out-of-bag squared error = bias²+noise + variance (exact per row)",
                total: "expected_loss",
                parts: &[("bias_sq_plus_noise", 1.0), ("variance", 1.0)],
            }
        } else {
            Identity {
                name: "ESL eq. 7.9: expected loss = noise + bias² + variance",
                total: "expected_loss",
                parts: &[("noise", 1.0), ("bias_sq", 1.0), ("variance", 1.0)],
            }
        }];
        if observed {
            v.push(Identity {
                name: "table bias² = (bias² + noise) − the noise estimate",
                total: "bias_sq_plus_noise",
                parts: &[("bias_sq", 1.0), ("noise", 1.0)],
            });
        }
        if shape.fits >= 2 {
            v.push(Identity {
                name: "law of total variance: variance = variance_data + variance_fit",
                total: "variance",
                parts: &[("variance_data", 1.0), ("variance_fit", 1.0)],
            });
        }
        if shape.ensemble && !observed {
            v.push(Identity {
                name: "Wood et al. 2023: loss = noise + bias² + member variance − diversity",
                total: "expected_loss",
                parts: &[
                    ("noise", 1.0),
                    ("bias_sq", 1.0),
                    ("member_variance", 1.0),
                    ("diversity", -1.0),
                ],
            });
        }
        v
    }

    fn evaluate(&self, acc: &Acc, target: &Target<'_>) -> Vec<Row> {
        let sh = acc.shape;
        let descr = self.describe(&sh, target.observed());
        let slots = Slots::of(&descr);
        let plain = sh.fits == 1 && !sh.ensemble && slots.vd.is_none() && slots.div.is_none();
        (0..sh.grid)
            .map(|g| {
                let mut row = vec![f64::NAN; descr.len()];
                let (mut b2, mut v, mut vd, mut vf, mut dv, mut direct) =
                    (0.0, 0.0, 0.0, 0.0, 0.0, 0.0);
                let mut used = 0usize;
                let truth_at = |e: usize| match target {
                    Target::Known { truth, .. } => truth[e],
                    Target::Observed { y, .. } => y[e],
                };
                if plain {
                    // One fit per replicate, no members: `point`'s bias² and variance only,
                    // the same operations in the same order.
                    let (mean, m2) = (
                        &acc.floats[MEAN][g * sh.points..(g + 1) * sh.points],
                        &acc.floats[M2][g * sh.points..(g + 1) * sh.points],
                    );
                    for e in 0..sh.points {
                        let r = acc.count[e];
                        if r < 2 {
                            continue;
                        }
                        used += 1;
                        let rf = r as f64;
                        let var = m2[e] / (rf - 1.0);
                        let d = mean[e] - truth_at(e);
                        b2 += d * d - var / rf;
                        v += var;
                        if !sh.all_points {
                            direct += acc.floats[DIRECT][g * sh.points + e] / rf;
                        }
                    }
                } else {
                    for e in 0..sh.points {
                        let r = acc.count[e];
                        if r < 2 {
                            continue;
                        }
                        used += 1;
                        let p = point(acc, g, e, truth_at(e));
                        b2 += p.bias_sq;
                        v += p.variance;
                        vd += p.variance_data;
                        vf += p.variance_fit;
                        dv += p.diversity;
                        if !sh.all_points {
                            direct += acc.floats[DIRECT][g * sh.points + e] / r as f64;
                        }
                    }
                }
                if used == 0 {
                    return row;
                }
                let u = if sh.all_points {
                    sh.points as f64
                } else {
                    used as f64
                };
                let (b2, v) = (b2 / u, v / u);
                let direct = if sh.all_points {
                    acc.floats[DIRECT][g] / acc.replicates as f64
                } else {
                    direct / u
                };
                let (el, bias_sq, noise) = match target {
                    Target::Known { noise_var, .. } => {
                        let noise = noise_var.iter().sum::<f64>() / sh.points as f64;
                        (noise + b2 + v, b2, noise)
                    }
                    Target::Observed { noise, .. } => {
                        let n = noise.map_or(f64::NAN, |(n, _)| n);
                        (b2 + v, b2 - n, n)
                    }
                };
                slots.fill(
                    &mut row,
                    [el, bias_sq, v, noise, direct],
                    b2,
                    (vd, vf, dv),
                    u,
                );
                row
            })
            .collect()
    }

    /// Direct form of the default (`evaluate` on each point alone), for all-points runs against
    /// a known truth: the same operations in the same order on the same numbers (a sum over one
    /// point is `0.0 + term`, the average divides by 1), without building an accumulator per
    /// point. Anything else takes the default.
    fn per_point(&self, acc: &Acc, target: &Target<'_>, terms: usize, out: &mut Vec<f64>) {
        let sh = acc.shape;
        let Target::Known {
            truth, noise_var, ..
        } = target
        else {
            return super::per_point_generic(self, acc, target, terms, out);
        };
        let one = Shape { points: 1, ..sh };
        let descr = self.describe(&one, false);
        if !sh.all_points || descr.len() < terms {
            return super::per_point_generic(self, acc, target, terms, out);
        }
        let slots = Slots::of(&descr);
        let u = one.points as f64;
        let mut row = vec![f64::NAN; descr.len()];
        out.clear();
        out.reserve_exact(sh.points * sh.grid * terms);
        out.reserve(sh.points * sh.grid * terms);
        if sh.fits == 1 && !sh.ensemble && descr.len() == 5 && terms == 5 {
            // The plain accumulator (one fit per replicate, no members): the five terms of
            // `point` written straight out, the same operations in the same order.
            let (mean, m2, direct) = (&acc.floats[MEAN], &acc.floats[M2], &acc.floats[DIRECT]);
            let reps = acc.replicates as f64;
            out.resize(sh.points * sh.grid * 5, f64::NAN);
            for (e, cells) in out.chunks_exact_mut(sh.grid * 5).enumerate() {
                let r = acc.count[e];
                if r < 2 {
                    continue;
                }
                let rf = r as f64;
                let noise = noise_var[e..e + 1].iter().sum::<f64>() / u;
                for (g, cell) in cells.chunks_exact_mut(5).enumerate() {
                    let i = g * sh.points + e;
                    let v = m2[i] / (rf - 1.0);
                    let d = mean[i] - truth[e];
                    let (b2, v) = ((0.0 + (d * d - v / rf)) / u, (0.0 + v) / u);
                    cell.copy_from_slice(&[noise + b2 + v, b2, v, noise, direct[g] / reps]);
                }
            }
            return;
        }
        for e in 0..sh.points {
            let r = acc.count[e];
            let noise = noise_var[e..e + 1].iter().sum::<f64>() / u;
            for g in 0..sh.grid {
                row.iter_mut().for_each(|v| *v = f64::NAN);
                if r >= 2 {
                    let p = point(acc, g, e, truth[e]);
                    let (b2, v, vd, vf, dv) = (
                        0.0 + p.bias_sq,
                        0.0 + p.variance,
                        0.0 + p.variance_data,
                        0.0 + p.variance_fit,
                        0.0 + p.diversity,
                    );
                    let (b2, v) = (b2 / u, v / u);
                    let direct = acc.floats[DIRECT][g] / acc.replicates as f64;
                    let el = noise + b2 + v;
                    slots.fill(&mut row, [el, b2, v, noise, direct], b2, (vd, vf, dv), u);
                }
                out.extend_from_slice(&row[..terms]);
            }
        }
    }

    fn observed_loss(&self, value: f64, _probs: Option<&[f64]>, y: f64) -> f64 {
        (value - y) * (value - y)
    }

    fn point_columns(&self, shape: &Shape, observed: bool) -> Vec<(&'static str, bool)> {
        let mut v = if observed {
            vec![
                ("observed", false),
                ("held_out_replicates", false),
                ("mean_prediction", false),
                ("bias_sq_plus_noise", false),
                ("variance", false),
            ]
        } else {
            vec![
                ("truth", false),
                ("noise", false),
                ("mean_prediction", false),
                ("bias_sq", false),
                ("variance", false),
            ]
        };
        if shape.fits >= 2 {
            v.push(("variance_data", false));
            v.push(("variance_fit", false));
        }
        if shape.ensemble {
            v.push(("diversity", false));
        }
        v
    }

    fn point_values(&self, acc: &Acc, target: &Target<'_>, g: usize, e: usize) -> Vec<f64> {
        let (t, first, second) = match target {
            Target::Known {
                truth, noise_var, ..
            } => (truth[e], truth[e], noise_var[e]),
            Target::Observed { y, .. } => (y[e], y[e], acc.count[e] as f64),
        };
        let p = point(acc, g, e, t);
        let mut v = vec![first, second, p.mean_prediction, p.bias_sq, p.variance];
        if acc.shape.fits >= 2 {
            v.push(p.variance_data);
            v.push(p.variance_fit);
        }
        if acc.shape.ensemble {
            v.push(p.diversity);
        }
        v
    }

    /// `bias_sq = mean_e (m_e − f_e)² − V̂_e/R` is quadratic in the errors `d_e` of the mean
    /// predictions. The jackknife sees its first-order part, `2 mean_e (m_e − f_e) d_e`, at the
    /// estimated bias; when the prediction errors move together across the points (a constant
    /// or heavily smoothed fit) and the estimated mean error happens to fall near 0, that part
    /// and the standard error collapse while the true bias² is large (an independent check
    /// found 0.8002 ± 0.0003 for an exact 0.806; coverage 80–87% on such fits). The second-order
    /// part, `mean_e d_e² − its mean`, has variance `2 tr(C²) / (E² R²)` for Gaussian errors
    /// (`C` the covariance of one replicate's predictions over the `E` points; the variance of
    /// a Gaussian quadratic form, a textbook identity, from memory); it is added in quadrature,
    /// with `tr C²` estimated from the blocks ([`super::trace_cov_squared`]). Synthetic and
    /// twin sources only (every block evaluates every point).
    fn second_order_stderr(
        &self,
        blocks: &[&Acc],
        total: &Acc,
        target: &Target<'_>,
        se: &mut [Row],
    ) {
        let e = total.shape.points;
        let means = super::BlockMeans::Floats(MEAN);
        super::add_second_order(self, &["bias_sq"], blocks, total, target, se, 1.0, e, means);
    }

    fn adjust_stderr(&self, shape: &Shape, target: &Target<'_>, se: &mut [Row]) {
        let Target::Observed { noise, .. } = target else {
            return;
        };
        // On a table bias² = bias²+noise − σ̂². The estimate σ̂² does not vary across replicate
        // blocks, so the jackknife sees only the Monte Carlo error of bias²+noise; the two errors
        // are independent (σ̂² is a function of the table, bias²+noise's Monte Carlo error one of
        // the resampling), so the standard error of the difference is
        // √(se(bias²+noise)² + se(σ̂²)²). Without a noise standard error it stays unknown (NaN).
        let d = self.describe(shape, true);
        let (Some(b), Some(bpn)) = (
            d.iter().position(|t| t.key == "bias_sq"),
            d.iter().position(|t| t.key == "bias_sq_plus_noise"),
        ) else {
            return;
        };
        let se_noise = noise.map_or(f64::NAN, |(_, s)| s);
        for row in se.iter_mut() {
            row[b] = (row[bpn] * row[bpn] + se_noise * se_noise).sqrt();
        }
    }
}

/// The common case of [`Squared::push`]: every point evaluated, one fit per training set. The
/// same arithmetic as the general path, on contiguous rows (every count equals the replicates).
fn push_plain(acc: &mut Acc, batch: &Batch<'_>) {
    let sh = acc.shape;
    let points = sh.points;
    let inv = 1.0 / acc.replicates as f64;
    let m = points as f64;
    let (head, rest) = acc.floats.split_at_mut(M2);
    let (m2v, rest) = rest.split_at_mut(1);
    let (meanv, m2v, direct) = (&mut head[MEAN], &mut m2v[0], &mut rest[0]);
    let values = batch.values.index_axis(ndarray::Axis(0), 0);
    if let (Some(flat), true) = (values.as_slice(), points > 0) {
        let resp = batch.response;
        // Contiguous rows (the engine's own arrays): the same sums in the same order on plain
        // slices, without ndarray's iterators.
        for (g, row) in flat.chunks_exact(points).enumerate() {
            let sse: f64 = row.iter().zip(resp).map(|(p, y)| (p - y) * (p - y)).sum();
            let base = g * points;
            let mean = &mut meanv[base..base + points];
            let m2 = &mut m2v[base..base + points];
            for ((mu, s), &y) in mean.iter_mut().zip(m2.iter_mut()).zip(row) {
                let d = y - *mu;
                *mu += d * inv;
                *s += d * (y - *mu);
            }
            direct[g] += sse / m;
        }
        return;
    }
    for (g, row) in values.rows().into_iter().enumerate() {
        let sse: f64 = row
            .iter()
            .zip(batch.response.iter())
            .map(|(p, y)| (p - y) * (p - y))
            .sum();
        let base = g * points;
        let mean = &mut meanv[base..base + points];
        let m2 = &mut m2v[base..base + points];
        for ((mu, s), &y) in mean.iter_mut().zip(m2.iter_mut()).zip(row.iter()) {
            let d = y - *mu;
            *mu += d * inv;
            *s += d * (y - *mu);
        }
        direct[g] += sse / m;
    }
}

/// The common case of [`Squared::merge`]: every point counts the same replicates, so one pair
/// of weights serves every cell (Chan, Golub, LeVeque 1979).
fn merge_plain(acc: &mut Acc, other: &Acc) {
    let na = acc.replicates as f64;
    let nb = other.replicates as f64;
    let n = na + nb;
    let (wb, wab) = (nb / n, na * nb / n);
    let (head, rest) = acc.floats.split_at_mut(M2);
    let (mean, m2) = (&mut head[MEAN], &mut rest[0]);
    let cells = mean
        .iter_mut()
        .zip(m2.iter_mut())
        .zip(other.floats[MEAN].iter().zip(&other.floats[M2]));
    for ((mu, s), (&om, &os)) in cells {
        let d = om - *mu;
        *mu += d * wb;
        *s += os + d * d * wab;
    }
    for k in DIRECT..acc.floats.len() {
        for (a, b) in acc.floats[k].iter_mut().zip(&other.floats[k]) {
            *a += b;
        }
    }
}

/// The main squared-loss terms of one grid value, as named fields (a typed view of a
/// [`Summary`]'s rows for library users and tests).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct SquaredTerms {
    /// `noise + bias_sq + variance`.
    pub expected_loss: f64,
    /// Unbiased squared bias.
    pub bias_sq: f64,
    /// Unbiased variance.
    pub variance: f64,
    /// Noise variance, averaged.
    pub noise: f64,
    /// Mean squared error against fresh noisy responses.
    pub expected_loss_direct: f64,
}

/// A typed view of a squared-loss [`Summary`]: terms and standard errors per grid value, and the
/// folded accumulator.
#[derive(Debug, Clone)]
pub struct SquaredSummary {
    /// Terms per grid value.
    pub terms: Vec<SquaredTerms>,
    /// Standard errors per grid value (NaN where not reported).
    pub stderr: Vec<SquaredTerms>,
    /// All blocks folded in order.
    pub total: Acc,
}

/// The typed view of a squared-loss summary; `None` for another loss.
pub fn view(s: &Summary) -> Option<SquaredSummary> {
    let at = |k: &str| s.index(k);
    let (a, b, c, d, e) = (
        at("expected_loss")?,
        at("bias_sq")?,
        at("variance")?,
        at("noise")?,
        at("expected_loss_direct")?,
    );
    let pick = |r: &Row| SquaredTerms {
        expected_loss: r[a],
        bias_sq: r[b],
        variance: r[c],
        noise: r[d],
        expected_loss_direct: r[e],
    };
    Some(SquaredSummary {
        terms: s.values.iter().map(pick).collect(),
        stderr: s.stderr.iter().map(pick).collect(),
        total: s.total.clone(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::decompose::{summarize, Acc};
    use ndarray::Array3;

    fn lcg(state: &mut u64) -> f64 {
        *state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (*state >> 11) as f64 / (1u64 << 53) as f64
    }

    fn shape(grid: usize, points: usize, fits: usize) -> Shape {
        Shape {
            grid,
            points,
            classes: 0,
            fits,
            all_points: true,
            ensemble: false,
        }
    }

    fn push_all(acc: &mut Acc, preds: &Array3<f64>, response: &[f64]) {
        let b = Batch {
            held: None,
            values: preds.view(),
            probs: None,
            diversity: None,
            response,
        };
        acc.push(&Squared, &b);
    }

    #[test]
    fn exact_identity_mean_squared_error_equals_bias_sq_plus_variance() {
        // Exact algebraic identity: (1/R) Σ (ŷ_r - f)² = (m - f)² + V̂ (R-1)/R = B̂² + V̂.
        let (g, m, r) = (3, 7, 25);
        let mut s = 7u64;
        let truth: Vec<f64> = (0..m).map(|e| e as f64 * 0.3).collect();
        let mut acc = Acc::new(&Squared, shape(g, m, 1));
        let mut preds = vec![Array3::<f64>::zeros((1, g, m)); r];
        for p in preds.iter_mut() {
            for v in p.iter_mut() {
                *v = 5.0 * lcg(&mut s) - 1.0;
            }
            push_all(&mut acc, p, &vec![0.0; m]);
        }
        for gi in 0..g {
            for e in 0..m {
                let direct: f64 = preds
                    .iter()
                    .map(|p| (p[[0, gi, e]] - truth[e]).powi(2))
                    .sum::<f64>()
                    / r as f64;
                let pt = point(&acc, gi, e, truth[e]);
                approx::assert_relative_eq!(direct, pt.bias_sq + pt.variance, max_relative = 1e-12);
            }
        }
    }

    #[test]
    fn merge_equals_sequential_within_rounding() {
        let (g, m) = (2, 4);
        let mut s = 3u64;
        let mut all = Acc::new(&Squared, shape(g, m, 1));
        let mut a = all.clone();
        let mut b = all.clone();
        let resp = vec![1.0; m];
        for i in 0..30 {
            let mut p = Array3::<f64>::zeros((1, g, m));
            p.iter_mut().for_each(|v| *v = lcg(&mut s) * 100.0);
            push_all(&mut all, &p, &resp);
            if i < 11 {
                push_all(&mut a, &p, &resp)
            } else {
                push_all(&mut b, &p, &resp)
            }
        }
        a.merge(&Squared, &b);
        assert_eq!(a.replicates, all.replicates);
        assert_eq!(a.count, all.count);
        for k in 0..2 {
            for i in 0..a.floats[k].len() {
                approx::assert_relative_eq!(a.floats[k][i], all.floats[k][i], max_relative = 1e-11);
            }
        }
    }

    #[test]
    fn variance_split_is_unbiased_in_a_known_random_effects_model() {
        // One-way random effects: ŷ_rs = a_r + e_rs with Var a = 4, Var e = 1 (uniforms scaled
        // to those variances). Over many replicates the estimators approach 4 and 1, and
        // variance_data + variance_fit = variance exactly (law of total variance, by construction).
        let (r, fits) = (4000, 3);
        let mut st = 17u64;
        let mut acc = Acc::new(&Squared, shape(1, 1, fits));
        let unif = |s: &mut u64, var: f64| (lcg(s) - 0.5) * (12.0 * var).sqrt();
        for _ in 0..r {
            let a = unif(&mut st, 4.0);
            let mut p = Array3::<f64>::zeros((fits, 1, 1));
            for f in 0..fits {
                p[[f, 0, 0]] = a + unif(&mut st, 1.0);
            }
            push_all(&mut acc, &p, &[0.0]);
        }
        let pt = point(&acc, 0, 0, 0.0);
        assert!((pt.variance_data + pt.variance_fit - pt.variance).abs() < 1e-12);
        // Standard errors: Var of a sample variance of n uniforms ≈ 0.8 σ⁴ / n (kurtosis 1.8).
        let se_fit = (0.8f64 / (r * fits) as f64).sqrt() * 1.0 * 1.3;
        let se_data = (0.8 * 16.0 / r as f64).sqrt() * 1.3;
        assert!((pt.variance_fit - 1.0).abs() < 4.0 * se_fit, "{pt:?}");
        assert!((pt.variance_data - 4.0).abs() < 4.0 * se_data, "{pt:?}");
    }

    #[test]
    fn held_out_rows_average_over_rows_seen_twice() {
        // Row 0 held out in three replicates, row 1 once (skipped), row 2 never.
        let sh = Shape {
            grid: 1,
            points: 3,
            classes: 0,
            fits: 1,
            all_points: false,
            ensemble: false,
        };
        let mut acc = Acc::new(&Squared, sh);
        let y = [1.0, 5.0, 9.0];
        for (held, vals) in [
            (vec![0usize, 1], vec![2.0, 4.0]),
            (vec![0], vec![4.0]),
            (vec![0], vec![3.0]),
        ] {
            let p = Array3::from_shape_vec((1, 1, vals.len()), vals).unwrap();
            let resp: Vec<f64> = held.iter().map(|&i| y[i]).collect();
            let b = Batch {
                held: Some(&held),
                values: p.view(),
                probs: None,
                diversity: None,
                response: &resp,
            };
            acc.push(&Squared, &b);
        }
        assert_eq!(acc.count, vec![3, 1, 0]);
        let target = Target::Observed {
            y: &y,
            noise: Some((0.5, 0.1)),
        };
        let sum = summarize(&Squared, std::slice::from_ref(&acc), &target).unwrap();
        // Row 0: predictions 2, 4, 3: mean 3, V = 1, bias²+noise = (3 − 1)² − 1/3.
        let bpn = 4.0 - 1.0 / 3.0;
        assert!((sum.value(0, "bias_sq_plus_noise") - bpn).abs() < 1e-12);
        assert!((sum.value(0, "variance") - 1.0).abs() < 1e-12);
        assert!((sum.value(0, "expected_loss") - (bpn + 1.0)).abs() < 1e-12);
        // Direct: mean of (1, 9, 4) = 14/3 = bias²+noise + V exactly.
        assert!((sum.value(0, "expected_loss_direct") - 14.0 / 3.0).abs() < 1e-12);
        assert!((sum.value(0, "bias_sq") - (bpn - 0.5)).abs() < 1e-12);
        // Exact: the standard error of bias² = bias²+noise − σ̂² adds the two in quadrature.
        let (a, b) = (sum.se(0, "bias_sq_plus_noise"), sum.se(0, "bias_sq"));
        let want = (a * a + 0.1f64 * 0.1).sqrt();
        assert!(
            b.to_bits() == want.to_bits() || (a.is_nan() && b.is_nan()),
            "{a} {b}"
        );
    }

    #[test]
    fn per_point_equals_the_default_bit_for_bit() {
        // The direct per-point terms must be exactly `evaluate` on each point alone, for every
        // shape of the accumulator, including points with too few replicates (NaN rows).
        for (fits, ensemble) in [(1, false), (2, false), (1, true), (2, true)] {
            let (g, m) = (3, 5);
            let mut s = 11u64;
            let sh = Shape {
                ensemble,
                ..shape(g, m, fits)
            };
            let truth: Vec<f64> = (0..m).map(|e| e as f64 * 0.7 - 1.0).collect();
            let noise_var: Vec<f64> = (0..m).map(|e| 0.25 + e as f64 * 0.1).collect();
            let target = Target::Known {
                truth: &truth,
                noise_var: &noise_var,
                probs: None,
            };
            let terms = Squared.describe(&sh, false).len();
            let resp: Vec<f64> = (0..m).map(|e| e as f64 * 0.5).collect();
            let mut acc = Acc::new(&Squared, sh);
            for r in 0..7 {
                let mut p = Array3::<f64>::zeros((fits, g, m));
                p.iter_mut().for_each(|v| *v = lcg(&mut s) * 10.0 - 5.0);
                let mut d = Array3::<f64>::zeros((fits, g, m));
                d.iter_mut().for_each(|v| *v = lcg(&mut s));
                let b = Batch {
                    held: None,
                    values: p.view(),
                    probs: None,
                    diversity: ensemble.then(|| d.view()),
                    response: &resp,
                };
                acc.push(&Squared, &b);
                if r == 0 || r == 6 {
                    let (mut fast, mut slow) = (Vec::new(), Vec::new());
                    Squared.per_point(&acc, &target, terms, &mut fast);
                    crate::decompose::per_point_generic(&Squared, &acc, &target, terms, &mut slow);
                    assert_eq!(fast.len(), m * g * terms);
                    assert_eq!(fast.len(), slow.len());
                    for (i, (a, b)) in fast.iter().zip(&slow).enumerate() {
                        assert_eq!(a.to_bits(), b.to_bits(), "fits {fits}, ensemble {ensemble}, replicates {}, index {i}: {a} vs {b}", r + 1);
                    }
                }
            }
        }
    }
}
