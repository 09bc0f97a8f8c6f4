//! The model card: a typed [`CardContext`] rendered by minijinja from the
//! templates in the top-level `templates/` folder, which are embedded in the
//! binary and can be replaced file by file from a user's templates directory.
//!
//! This module computes nothing: every number arrives formatted. HTML output
//! is auto-escaped; Markdown output escapes through the `md` filter.

pub mod plots;

use std::path::Path;

use minijinja::{Environment, UndefinedBehavior};

use crate::error::{Error, Result};

/// The built-in templates: (name, text).
pub const BUILTIN: &[(&str, &str)] = &[
    ("card.md", include_str!("../../templates/card.md")),
    ("card.html", include_str!("../../templates/card.html")),
    ("base.css", BASE_CSS),
];

/// The style rules the card and the drift report share (included by both
/// HTML templates).
const BASE_CSS: &str = include_str!("../../templates/base.css");

/// A value and its one 95 % interval, formatted for a compact table cell.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Cell {
    /// The value (four decimals), or `n/a`.
    pub value: String,
    /// The interval as `low–high` (three decimals), or empty when there is none.
    pub ci: String,
}

/// One metric of one candidate with both proportion intervals, for the
/// card's details section (the compact tables show the Wilson interval only).
#[derive(Debug, Clone, serde::Serialize)]
pub struct IntervalDetail {
    /// `validation` or `test`.
    pub split: String,
    /// Candidate name.
    pub candidate: String,
    /// The metric.
    pub metric: String,
    /// The value.
    pub value: String,
    /// The 95 % Wilson score interval.
    pub wilson: String,
    /// The 95 % Clopper-Pearson interval.
    pub clopper_pearson: String,
}

/// One headline metric of the chosen detector.
#[derive(Debug, Clone, serde::Serialize)]
pub struct AnswerMetric {
    /// `precision`, `recall` or `F1`.
    pub name: String,
    /// The value and its interval.
    pub cell: Cell,
    /// How the interval was made (`Wilson score`, `stratified bootstrap`).
    pub method: String,
}

/// The card's first section: the answer before the evidence.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Answer {
    /// The chosen candidate.
    pub detector: String,
    /// The split the numbers come from: `test`, or `validation` while the test split is sealed.
    pub split: String,
    /// Whether the test split is still sealed.
    pub sealed: bool,
    /// Precision, recall and F1 with their 95 % intervals.
    pub metrics: Vec<AnswerMetric>,
    /// The operating threshold τ.
    pub tau: String,
    /// ln ε = −τ.
    pub ln_epsilon: String,
    /// One sentence in the spec's own terms: of N known anomalies, K were
    /// flagged; M of the R flagged rows were normal.
    pub sentence: String,
    /// The interval figure (point and 95 % bar per metric and candidate),
    /// shown inline in card.html.
    pub figure: Option<plots::Plot>,
    /// Whether the chosen candidate is an external command, whose scores
    /// are its own, not −ln p(x).
    pub external: bool,
}

/// One row of a metrics table, all values formatted.
#[derive(Debug, Clone, serde::Serialize)]
pub struct MetricRow {
    /// Candidate name.
    pub candidate: String,
    /// Whether this is the chosen candidate.
    pub chosen: bool,
    /// True positives.
    pub tp: u64,
    /// False positives.
    pub fp: u64,
    /// False negatives.
    pub fn_: u64,
    /// True negatives.
    pub tn: u64,
    /// Precision with its 95 % Wilson (W) and Clopper-Pearson (CP) intervals.
    pub precision: String,
    /// Recall with its 95 % intervals.
    pub recall: String,
    /// False-positive rate with its 95 % intervals.
    pub false_positive_rate: String,
    /// F1 with its 95 % bootstrap interval.
    pub f1: String,
    /// Fβ, when the policy declares β.
    pub f_beta: Option<String>,
    /// Average precision with its 95 % bootstrap interval.
    pub average_precision: String,
    /// ROC AUC with its 95 % bootstrap interval.
    pub roc_auc: String,
    /// Matthews correlation.
    pub mcc: String,
    /// Balanced accuracy.
    pub balanced_accuracy: String,
    /// Specificity.
    pub specificity: String,
    /// Accuracy (shown only beside its warning).
    pub accuracy: String,
    /// Precision with its Wilson interval only, for the compact tables.
    pub precision_cell: Cell,
    /// Recall with its Wilson interval only.
    pub recall_cell: Cell,
    /// False-positive rate with its Wilson interval only.
    pub false_positive_rate_cell: Cell,
    /// F1 with its bootstrap interval.
    pub f1_cell: Cell,
    /// Average precision with its bootstrap interval.
    pub average_precision_cell: Cell,
    /// ROC AUC with its bootstrap interval.
    pub roc_auc_cell: Cell,
}

/// A candidate's operating point.
#[derive(Debug, Clone, serde::Serialize)]
pub struct ThresholdRow {
    /// Candidate name.
    pub candidate: String,
    /// Whether this is the chosen candidate.
    pub chosen: bool,
    /// Free parameters (`unknown` for an external command).
    pub parameters: String,
    /// τ.
    pub tau: String,
    /// ln ε.
    pub ln_epsilon: String,
    /// Why the policy is unmet for this candidate (it was then not selectable).
    pub unmet: Option<String>,
}

/// Counts of one split.
#[derive(Debug, Clone, serde::Serialize)]
pub struct SplitRow {
    /// Split name.
    pub split: String,
    /// Normal rows.
    pub normal: usize,
    /// Anomalous rows.
    pub anomaly: usize,
    /// Manifest hash.
    pub manifest: String,
}

/// One input file.
#[derive(Debug, Clone, serde::Serialize)]
pub struct InputRow {
    /// Path relative to the spec.
    pub path: String,
    /// Data rows.
    pub rows: usize,
    /// blake3.
    pub blake3: String,
}

/// One feature of a feature set.
#[derive(Debug, Clone, serde::Serialize)]
pub struct FeatureRow {
    /// Name.
    pub name: String,
    /// What it is computed from.
    pub from: String,
    /// Its fitted transforms in words (empty when none).
    pub transforms: String,
}

/// A feature set.
#[derive(Debug, Clone, serde::Serialize)]
pub struct FeatureSetRow {
    /// Name.
    pub name: String,
    /// Features.
    pub features: Vec<FeatureRow>,
}

/// Everything a card template can use.
#[derive(Debug, Clone, serde::Serialize)]
pub struct CardContext {
    /// Card title.
    pub title: String,
    /// The answer first: chosen detector, its numbers, threshold and one sentence.
    pub answer: Answer,
    /// Every proportion interval of every candidate, both kinds (details section).
    pub interval_details: Vec<IntervalDetail>,
    /// Owner.
    pub owner: String,
    /// Intended use.
    pub intended_use: String,
    /// Out-of-scope uses.
    pub out_of_scope_uses: Vec<String>,
    /// The safety caution, when the spec declares a safety-relevant use.
    pub safety_caution: Option<String>,
    /// Tool and version.
    pub tool: String,
    /// Spec file name.
    pub spec_file: String,
    /// blake3 of the spec.
    pub spec_blake3: String,
    /// Signing key fingerprint.
    pub key_fingerprint: String,
    /// Input files.
    pub inputs: Vec<InputRow>,
    /// Label column and values, as one sentence.
    pub label: String,
    /// The missing-value policy and what it dropped, as one sentence.
    pub missing: String,
    /// Feature sets with their features and fitted transforms.
    pub feature_sets: Vec<FeatureSetRow>,
    /// How the split was made, as one sentence.
    pub split_method: String,
    /// Split counts.
    pub splits: Vec<SplitRow>,
    /// Rows that share their content with another row.
    pub duplicate_rows: usize,
    /// Rows off the requested counts because groups or identical rows met a cut.
    pub moved_rows: usize,
    /// The threshold policy, in words.
    pub threshold_policy: String,
    /// The selection rule, in words.
    pub selection_rule: String,
    /// The chosen candidate.
    pub chosen: String,
    /// Thresholds of all candidates.
    pub thresholds: Vec<ThresholdRow>,
    /// Validation metrics of all candidates.
    pub validation: Vec<MetricRow>,
    /// Test metrics of the chosen candidate (None while the test split is sealed).
    pub test_chosen: Option<MetricRow>,
    /// How often the test split has been opened, as one sentence (final runs).
    pub test_openings: Option<String>,
    /// Test metrics of the other candidates (not used for selection).
    pub test_others: Vec<MetricRow>,
    /// Anomalies in the test split.
    pub test_anomalies: usize,
    /// Validation figures: precision-recall, ROC, objective against ln ε, score histogram.
    pub plots_validation: Vec<plots::Plot>,
    /// Test figures (final runs only): precision-recall, ROC, score histogram.
    pub plots_test: Vec<plots::Plot>,
    /// One figure per feature of the chosen candidate's feature set.
    pub plots_features: Vec<plots::Plot>,
    /// One paragraph per external-command candidate: what it was given, its
    /// files' hashes, and that anomark cannot see inside it.
    pub external_commands: Vec<String>,
    /// Wall-clock line for the unsigned footer, if recorded.
    pub wall_clock: Option<String>,
    /// The conformal policy's guarantee (with `threshold: conformal`).
    pub conformal: Option<ConformalCard>,
}

/// The conformal policy's guarantee, its assumption and the test check.
#[derive(Debug, Clone, serde::Serialize)]
pub struct ConformalCard {
    /// A, formatted.
    pub level: String,
    /// n, the validation normals that calibrate the p-values.
    pub validation_normals: usize,
    /// k, τ's rank among the calibration scores.
    pub rank: usize,
    /// How many candidates were compared on the same validation rows.
    pub candidates: usize,
    /// The test split's false-positive rate against A, with its intervals
    /// (None while the test split is sealed).
    pub test_false_positive_rate: Option<String>,
    /// Whether the test false-positive rate's Clopper-Pearson interval lies
    /// wholly above A.
    pub test_above_level: bool,
}

/// Everything the drift report template can use.
#[derive(Debug, Clone, serde::Serialize)]
pub struct DriftContext {
    /// The candidate that scored the batch.
    pub candidate: String,
    /// blake3 of the run's manifest.json.
    pub run_manifest_blake3: String,
    /// Rows and flagged rows.
    pub rows: u64,
    /// Rows flagged (s > τ).
    pub flagged: u64,
    /// One row per expected rate: where from, expected, observed, limits,
    /// binomial p, outside or not.
    pub rates: Vec<DriftRateRow>,
    /// Which rows the feature reference is.
    pub reference_rows: String,
    /// Per feature.
    pub features: Vec<DriftFeatureRow>,
    /// Benjamini-Hochberg: level, flagged, cut (with `--fdr`).
    pub fdr: Option<String>,
}

/// One flag-rate check, formatted.
#[derive(Debug, Clone, serde::Serialize)]
pub struct DriftRateRow {
    /// Where p̄ comes from.
    pub from: String,
    /// p̄.
    pub expected: String,
    /// The batch's rate.
    pub observed: String,
    /// The p-chart limits.
    pub limits: String,
    /// Exact two-sided binomial p-value.
    pub binomial_p: String,
    /// Outside the limits.
    pub outside: bool,
}

/// One feature's drift, formatted.
#[derive(Debug, Clone, serde::Serialize)]
pub struct DriftFeatureRow {
    /// Feature name.
    pub name: String,
    /// Batch mean.
    pub batch_mean: String,
    /// Reference mean.
    pub reference_mean: String,
    /// Shift in reference SDs.
    pub shift_in_sd: String,
    /// Two-sample KS statistic.
    pub ks: String,
}

impl DriftContext {
    /// From a drift report.
    pub fn of(
        d: &crate::drift::DriftReport,
        candidate: &str,
        manifest_blake3: &str,
        fdr: Option<&crate::conformal::FdrSummary>,
    ) -> Self {
        let f4 = |v: f64| format!("{v:.4}");
        DriftContext {
            candidate: candidate.into(),
            run_manifest_blake3: manifest_blake3.into(),
            rows: d.rows,
            flagged: d.flagged,
            rates: d
                .flag_rate
                .iter()
                .map(|r| DriftRateRow {
                    from: r.expected_from.clone(),
                    expected: f4(r.expected),
                    observed: f4(r.observed),
                    limits: format!("{}–{}", f4(r.lower_limit), f4(r.upper_limit)),
                    binomial_p: format!("{:.4e}", r.binomial_p_value),
                    outside: r.outside_limits,
                })
                .collect(),
            reference_rows: format!("{} ({} rows)", d.reference_rows, d.reference_sample_rows),
            features: d
                .features
                .iter()
                .map(|f| DriftFeatureRow {
                    name: f.name.clone(),
                    batch_mean: f4(f.batch_mean),
                    reference_mean: f4(f.reference_mean),
                    shift_in_sd: f.shift_in_sd.map_or("n/a".into(), |v| format!("{v:+.3}")),
                    ks: f4(f.ks_statistic),
                })
                .collect(),
            fdr: fdr.map(|f| {
                format!(
                    "Benjamini-Hochberg at Q = {}: {} rows flagged (p-value cut {}; p-values against {} validation normals).",
                    crate::record::fmt_f64(f.q),
                    f.flagged,
                    f.p_cut.map_or("none".into(), crate::record::fmt_f64),
                    f.calibration_normals
                )
            }),
        }
    }
}

/// Renders the drift report (`templates/drift.html`), self-contained.
pub fn render_drift(ctx: &DriftContext) -> Result<String> {
    let mut env = Environment::new();
    env.set_undefined_behavior(UndefinedBehavior::Strict);
    let name = "drift.html";
    env.add_template(name, include_str!("../../templates/drift.html"))
        .map_err(|e| template_error(name, e))?;
    env.add_template("base.css", BASE_CSS)
        .map_err(|e| template_error("base.css", e))?;
    let mut s = env
        .get_template(name)
        .and_then(|t| t.render(minijinja::value::Serde(ctx)))
        .map_err(|e| template_error(name, e))?;
    if !s.ends_with('\n') {
        s.push('\n');
    }
    Ok(s)
}

/// Escapes text for Markdown: backslash-escapes the characters that start
/// inline markup, and turns `<`, `>` and `&` into entities so no HTML gets through.
pub fn escape_md(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            // The characters that open inline markup, links or table cells; the
            // texts land inside paragraphs and table cells, never at a line start.
            '\\' | '`' | '*' | '_' | '[' | ']' | '|' | '~' => {
                out.push('\\');
                out.push(c);
            }
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '&' => out.push_str("&amp;"),
            '\n' | '\r' => out.push(' '),
            _ => out.push(c),
        }
    }
    out
}

fn template_error(name: &str, e: minijinja::Error) -> Error {
    Error::Template {
        name: e.name().unwrap_or(name).to_string(),
        line: e.line(),
        message: e.to_string().lines().next().unwrap_or("").to_string(),
    }
}

/// Refuses a templates folder that cannot be listed: a missing path, a
/// regular file or an unreadable folder (a file problem, not the built-in card).
pub fn check_overrides(dir: &Path) -> Result<()> {
    std::fs::read_dir(dir)
        .map(drop)
        .map_err(|e| Error::io(dir, "reading the templates folder", e))
}

/// Renders `card.md` and `card.html`, using `overrides` (a directory) for any
/// template file it holds.
pub fn render(ctx: &CardContext, overrides: Option<&Path>) -> Result<(String, String)> {
    if let Some(d) = overrides {
        check_overrides(d)?;
    }
    let mut env = Environment::new();
    env.set_undefined_behavior(UndefinedBehavior::Strict);
    env.add_filter("md", |s: String| escape_md(&s));
    for (name, text) in BUILTIN {
        let text = match overrides.map(|d| d.join(name)) {
            Some(p) if p.is_file() => {
                std::fs::read_to_string(&p).map_err(|e| Error::io(&p, "reading template", e))?
            }
            _ => text.to_string(),
        };
        env.add_template_owned(name.to_string(), text)
            .map_err(|e| template_error(name, e))?;
    }
    let render = |name: &str| -> Result<String> {
        let t = env
            .get_template(name)
            .map_err(|e| template_error(name, e))?;
        let mut s = t
            .render(minijinja::value::Serde(ctx))
            .map_err(|e| template_error(name, e))?;
        if !s.ends_with('\n') {
            s.push('\n');
        }
        Ok(s)
    };
    Ok((render("card.md")?, render("card.html")?))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The drift report escapes every text it is given, like the card.
    #[test]
    fn the_drift_report_escapes_names() {
        let d = crate::drift::DriftReport {
            rows: 10,
            flagged: 1,
            flag_rate: vec![crate::drift::rate_check("<i>validation</i>", 0.05, 1, 10)],
            reference_rows: "training rows".into(),
            reference_sample_rows: 5,
            features: vec![crate::drift::FeatureDrift {
                name: "<script>alert(1)</script>".into(),
                batch_mean: 1.0,
                reference_mean: 0.0,
                shift_in_sd: Some(1.0),
                ks_statistic: 0.5,
            }],
        };
        let html = render_drift(&DriftContext::of(&d, "a&b", "00", None)).unwrap();
        assert!(!html.contains("<script>") && html.contains("&lt;script&gt;"));
        assert!(html.contains("&lt;i&gt;validation") && html.contains("a&amp;b"));
        assert!(html.ends_with("</html>\n"));
    }

    #[test]
    fn the_interval_figure_is_deterministic_escapes_names_and_draws_each_row() {
        let points = |name: &str| {
            vec![
                plots::IntervalPoint {
                    metric: "precision".into(),
                    candidate: name.into(),
                    chosen: true,
                    value: 0.6,
                    interval: Some((0.357, 0.802)),
                },
                plots::IntervalPoint {
                    metric: "F1".into(),
                    candidate: "other".into(),
                    chosen: false,
                    value: 0.4,
                    interval: None,
                },
            ]
        };
        let a = plots::intervals("test", &points("<script>x</script>")).unwrap();
        let b = plots::intervals("test", &points("<script>x</script>")).unwrap();
        assert_eq!(a.svg, b.svg);
        assert_eq!(a.file, "plot-test-intervals.svg");
        assert!(!a.svg.contains("<script>"));
        assert!(a.svg.contains("&lt;script&gt;"));
        // One dot per point, one bar for the point with an interval.
        assert_eq!(a.svg.matches("<circle").count(), 2, "{}", a.svg);
    }

    #[test]
    fn markdown_escape_neutralises_markup() {
        assert_eq!(
            escape_md("<script>alert(1)</script> | *x*"),
            "&lt;script&gt;alert(1)&lt;/script&gt; \\| \\*x\\*"
        );
    }
}
