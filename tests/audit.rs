//! Selection audit (`[audit]`): cross-validation inside every replicate on a cubic truth picks
//! degree 3 in most replicates at n = 400, spreads its choices at n = 20, is deterministic across
//! thread counts, and its summary numbers follow from the counts exactly.

use lossprism::scenario::{self, Plan, PlanOptions};
use lossprism::{report, runner};

fn cubic(n: usize, replicates: usize, rule: &str) -> String {
    format!(
        r#"
name = "audit-cubic"
seed = 5
replicates = {replicates}
[data]
source = "synthetic"
train_size = {n}
eval_size = 300
[[data.inputs]]
name = "x"
uniform = [-1.0, 1.0]
[data.truth]
formula = "2*x^3 - x^2 - x"
[data.noise]
sd = 0.3
[model]
family = "poly"
grid = {{ from = 1, to = 6 }}
[audit]
folds = 5
rule = "{rule}"
"#
    )
}

fn plan_of(text: &str) -> Plan {
    let spec = scenario::parse(text, "audit.toml").expect("parses");
    Plan::from_spec(
        &spec,
        text,
        "audit.toml",
        std::path::Path::new("."),
        &PlanOptions::default(),
    )
    .expect("plans")
}

fn selection(text: &str, threads: usize) -> (report::ResultDoc, report::Selection) {
    let plan = plan_of(text);
    let out = runner::run(&plan, threads).expect("runs");
    let doc = report::build(&plan, &out);
    let sel = doc.selection.clone().expect("selection section");
    (doc, sel)
}

fn entropy(counts: &[u64]) -> f64 {
    let t: u64 = counts.iter().sum();
    counts
        .iter()
        .filter(|&&c| c > 0)
        .map(|&c| {
            let p = c as f64 / t as f64;
            -p * p.ln()
        })
        .sum()
}

#[test]
fn cross_validation_finds_the_cubic_at_large_n_and_spreads_at_tiny_n() {
    let r = 200;
    let (doc, big) = selection(&cubic(400, r, "min"), 0);
    let total: u64 = big.chosen_counts.iter().sum();
    assert_eq!(total, r as u64);
    // The oracle at n = 400 is the true degree (bias vanishes at 3, variance grows after it).
    assert_eq!(big.oracle_best, 3.0, "{:?}", doc.points);
    let share3 = big.chosen_counts[2] as f64 / total as f64;
    // Rule of thumb, not a theorem: with a clear cubic signal (degrees 1-2 have large bias)
    // cross-validation behaves like AIC among the nested degrees 3..6 and picks the true one most
    // of the time. With R = 200 the binomial standard error of the share is at most 0.035, so
    // the observed share must clear 0.5 by several standard errors to pass.
    let se = (share3 * (1.0 - share3) / total as f64).sqrt();
    assert!(
        share3 - 3.0 * se > 0.5,
        "share at degree 3 = {share3} ± {se}; counts {:?}",
        big.chosen_counts
    );
    assert_eq!(big.chosen_counts[0] + big.chosen_counts[1], 0);

    let (_, tiny) = selection(&cubic(20, r, "min"), 0);
    let t3 = tiny.chosen_counts[2] as f64 / r as f64;
    assert!(
        entropy(&tiny.chosen_counts) > entropy(&big.chosen_counts),
        "tiny {:?} vs large {:?}",
        tiny.chosen_counts,
        big.chosen_counts
    );
    assert!(1.0 - t3 > 1.0 - share3, "{t3} vs {share3}");
    eprintln!(
        "n=400 counts {:?} share3 {share3}; n=20 counts {:?}; excess {} / {}",
        big.chosen_counts, tiny.chosen_counts, big.mean_excess_loss, tiny.mean_excess_loss
    );
    // Excess loss is larger when n is tiny (same grid): its mean over replicates.
    assert!(tiny.mean_excess_loss > big.mean_excess_loss);
}

#[test]
fn one_se_rule_prefers_the_simpler_degree() {
    // The one-standard-error rule (Hastie, Tibshirani, Friedman, ESL 2nd ed. §7.10) never
    // chooses a more complex value than `min` on the same folds, so its counts sit at lower
    // degrees: the mean chosen degree cannot exceed min's.
    let (_, min) = selection(&cubic(60, 60, "min"), 0);
    let (_, one) = selection(&cubic(60, 60, "one_se"), 0);
    let mean = |c: &[u64]| {
        c.iter()
            .enumerate()
            .map(|(i, &n)| (i + 1) as f64 * n as f64)
            .sum::<f64>()
            / c.iter().sum::<u64>() as f64
    };
    assert!(mean(&one.chosen_counts) <= mean(&min.chosen_counts));
    assert_eq!(one.rule, "one_se");
}

#[test]
fn audit_is_identical_on_one_and_two_threads_and_its_numbers_follow_from_counts() {
    let text = cubic(40, 24, "min");
    let (d1, s1) = selection(&text, 1);
    let (d2, s2) = selection(&text, 2);
    assert_eq!(s1, s2);
    assert_eq!(report::to_json(&d1), report::to_json(&d2));
    // Exact identity: mean excess = Σ count_g (EL_g − min EL) / R.
    let min = d1
        .points
        .iter()
        .map(|p| p.expected_loss())
        .fold(f64::INFINITY, f64::min);
    let r: u64 = s1.chosen_counts.iter().sum();
    let mean: f64 = d1
        .points
        .iter()
        .zip(&s1.chosen_counts)
        .map(|(p, &c)| c as f64 * (p.expected_loss() - min))
        .sum::<f64>()
        / r as f64;
    assert_eq!(mean, s1.mean_excess_loss);
    assert!(s1.q90_excess_loss >= 0.0);
    let within: u64 = d1
        .points
        .iter()
        .zip(&s1.chosen_counts)
        .filter(|(p, _)| d1.best.within_one_se.contains(&p.value))
        .map(|(_, &c)| c)
        .sum();
    assert_eq!(s1.share_within_one_se, within as f64 / r as f64);
    // The table output carries the plain sentence.
    assert!(report::terminal::render(&d1).contains("5-fold cross-validation (min rule)"));
}

#[test]
fn bad_audit_sections_name_the_key() {
    for (bad, key) in [
        ("folds = 1", "audit.folds"),
        ("folds = 5\nrule = \"best\"", "audit.rule"),
        ("folds = 5\nextra = 1", "extra"),
    ] {
        let text = cubic(40, 4, "min").replace("folds = 5\nrule = \"min\"", bad);
        let err = scenario::parse(&text, "a.toml")
            .map_err(|e| e.to_string())
            .and_then(|spec| {
                Plan::from_spec(
                    &spec,
                    &text,
                    "a.toml",
                    std::path::Path::new("."),
                    &PlanOptions::default(),
                )
                .map(|_| ())
                .map_err(|e| e.to_string())
            })
            .expect_err("refused");
        assert!(err.contains(key), "{err}");
    }
    // n = 8 holds degree 6 (7 coefficients), but a 3-fold fit trains on 5 rows: refused.
    let text = cubic(8, 4, "min").replace("folds = 5", "folds = 3");
    let spec = scenario::parse(&text, "a.toml").unwrap();
    let err = Plan::from_spec(
        &spec,
        &text,
        "a.toml",
        std::path::Path::new("."),
        &PlanOptions::default(),
    )
    .expect_err("refused")
    .to_string();
    assert!(err.contains("audit.folds"), "{err}");
}

#[test]
fn a_study_counts_choices_of_any_model_within_one_se_of_the_oracle() {
    // Two models on one curve of candidates: a choice of the other model whose expected loss
    // is within one standard error of the oracle's is within one SE too (only the oracle's own
    // model was counted: 50% where every choice was inside).
    let text = r#"
name = "two-models"
seed = 3
replicates = 6
blocks = 3

[data]
source = "synthetic"
train_size = [20, 40]
eval_size = 15

[[data.inputs]]
name = "x"
uniform = [0.0, 1.0]

[data.truth]
formula = "x^2"

[data.noise]
sd = 0.3

[[model]]
family = "tree"
grid = [1, 2, 3]

[[model]]
family = "knn"
grid = [1, 4]

[audit]
folds = 3
"#;
    let (doc, sel) = selection(text, 1);
    let best = &doc.best;
    let bar = best.expected_loss + best.stderr.expect("a standard error");
    let largest = *doc.sizes.last().unwrap() as u64;
    let candidates: Vec<_> = doc
        .points
        .iter()
        .filter(|p| p.train_size == Some(largest))
        .collect();
    assert_eq!(candidates.len(), sel.chosen_counts.len());
    let r: u64 = sel.chosen_counts.iter().sum();
    let within: u64 = candidates
        .iter()
        .zip(&sel.chosen_counts)
        .filter(|(p, _)| p.expected_loss() <= bar)
        .map(|(_, &c)| c)
        .sum();
    // The case of the finding: some choice fell on the other model, inside the bar.
    let other_inside: u64 = candidates
        .iter()
        .zip(&sel.chosen_counts)
        .filter(|(p, _)| p.family != best.family && p.expected_loss() <= bar)
        .map(|(_, &c)| c)
        .sum();
    assert!(other_inside > 0, "the scenario no longer shows the case");
    assert_eq!(sel.share_within_one_se, within as f64 / r as f64);
}
