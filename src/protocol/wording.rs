//! The card's wording: the typed `CardContext` filled from the run record
//! and the plan (the answer sentence, the split and label sentences, the
//! metric tables, the conformal statement, the external-command paragraph).
//! Numbers are only formatted here; every one comes from the record.

use super::choose::{policy_name, selection_rule};
use crate::audit::leak::Part;
use crate::card::{
    self, plots, CardContext, FeatureRow, FeatureSetRow, InputRow, MetricRow, SplitRow,
    ThresholdRow,
};
use crate::detect;
use crate::error::{Error, Result};
use crate::features;
use crate::metrics::Metrics;
use crate::record::{fmt_f64, CandidateRecord, RunRecord};
use crate::spec::{MissingPolicy, Plan, SplitPlan, ThresholdPolicy};

fn fmt_rate(v: Option<f64>) -> String {
    v.map_or("n/a".into(), |v| format!("{v:.4}"))
}

fn fmt_ci(ci: Option<crate::metrics::Interval>) -> String {
    ci.map_or("n/a".into(), |ci| format!("{:.4}–{:.4}", ci.low, ci.high))
}

/// A value and one interval for a compact table cell (three decimals in the
/// interval: the compact tables show each value once and one interval).
fn cell(v: Option<f64>, ci: Option<crate::metrics::Interval>) -> crate::card::Cell {
    crate::card::Cell {
        value: fmt_rate(v),
        ci: match (v, ci) {
            (Some(_), Some(ci)) => format!("{:.3}–{:.3}", ci.low, ci.high),
            _ => String::new(),
        },
    }
}

/// The chosen candidate's answer: its numbers on test (or on validation
/// while the test split is sealed), τ, one sentence in the spec's terms and
/// the interval figure of every candidate on that split.
fn answer(plan: &Plan, rec: &RunRecord) -> Result<crate::card::Answer> {
    use crate::card::{Answer, AnswerMetric};
    let chosen = rec
        .candidates
        .iter()
        .find(|c| c.chosen)
        .ok_or_else(|| Error::internal("no candidate is chosen"))?;
    let (split, m) = match &chosen.test {
        Some(t) if rec.test_opened => ("test", t),
        _ => ("validation", &chosen.validation),
    };
    let sealed = split == "validation";
    let metrics = vec![
        AnswerMetric {
            name: "precision".into(),
            cell: cell(m.precision, m.precision_95.wilson),
            method: "Wilson score".into(),
        },
        AnswerMetric {
            name: "recall".into(),
            cell: cell(m.recall, m.recall_95.wilson),
            method: "Wilson score".into(),
        },
        AnswerMetric {
            name: "F1".into(),
            cell: cell(m.f1, m.bootstrap_95.f1),
            method: if plan.bootstrap.replicates == 0 {
                "none (`bootstrap.replicates: 0`)".into()
            } else {
                "stratified bootstrap".into()
            },
        },
    ];
    let (anomaly, normal) = match &plan.label {
        Some(l) => (format!(" (“{}”)", l.anomaly), format!(" (“{}”)", l.normal)),
        None => (String::new(), String::new()),
    };
    let c = &m.confusion;
    let known = c.tp + c.fn_;
    let flagged = c.tp + c.fp;
    let second = if flagged == 0 {
        "no row was flagged".to_string()
    } else {
        format!(
            "{} of the {flagged} flagged row{} {} normal{normal}",
            c.fp,
            if flagged == 1 { "" } else { "s" },
            if c.fp == 1 { "was" } else { "were" }
        )
    };
    let sentence = format!(
        "Of {known} known anomal{}{anomaly} in the {split} split, {} {} flagged; {second}.",
        if known == 1 { "y" } else { "ies" },
        c.tp,
        if c.tp == 1 { "was" } else { "were" },
    );
    let mut points = vec![];
    for (metric, get) in [("precision", 0usize), ("recall", 1), ("F1", 2)] {
        for cand in &rec.candidates {
            let cm = if sealed {
                Some(&cand.validation)
            } else {
                cand.test.as_ref()
            };
            let Some(cm) = cm else { continue };
            let (v, ci) = match get {
                0 => (cm.precision, cm.precision_95.wilson),
                1 => (cm.recall, cm.recall_95.wilson),
                _ => (cm.f1, cm.bootstrap_95.f1),
            };
            if let Some(v) = v {
                points.push(plots::IntervalPoint {
                    metric: metric.into(),
                    candidate: cand.name.clone(),
                    chosen: cand.chosen,
                    value: v,
                    interval: ci.map(|i| (i.low, i.high)),
                });
            }
        }
    }
    let figure = if points.is_empty() {
        None
    } else {
        Some(plots::intervals(split, &points)?)
    };
    Ok(Answer {
        detector: chosen.name.clone(),
        split: split.into(),
        sealed,
        metrics,
        tau: format!("{:.6}", chosen.tau),
        ln_epsilon: format!("{:.6}", chosen.ln_epsilon),
        sentence,
        figure,
        external: matches!(chosen.params, detect::Params::Command { .. }),
    })
}

/// Both proportion intervals of every candidate's precision, recall and
/// false-positive rate, on validation and (when opened) test.
fn interval_details(rec: &RunRecord) -> Vec<crate::card::IntervalDetail> {
    let mut out = vec![];
    for (split, test) in [("validation", false), ("test", true)] {
        for c in &rec.candidates {
            let m = if test {
                c.test.as_ref()
            } else {
                Some(&c.validation)
            };
            let Some(m) = m else { continue };
            for (metric, v, ci) in [
                ("precision", m.precision, &m.precision_95),
                ("recall", m.recall, &m.recall_95),
                (
                    "false-positive rate",
                    m.false_positive_rate,
                    &m.false_positive_rate_95,
                ),
            ] {
                out.push(crate::card::IntervalDetail {
                    split: split.into(),
                    candidate: c.name.clone(),
                    metric: metric.into(),
                    value: fmt_rate(v),
                    wilson: fmt_ci(ci.wilson),
                    clopper_pearson: fmt_ci(ci.clopper_pearson),
                });
            }
        }
    }
    out
}

fn metric_row(name: &str, chosen: bool, m: &Metrics) -> MetricRow {
    let prop = |v: Option<f64>, ci: &crate::metrics::ProportionIntervals| match v {
        Some(v) => format!(
            "{v:.4} (W {}; CP {})",
            fmt_ci(ci.wilson),
            fmt_ci(ci.clopper_pearson)
        ),
        None => "n/a".into(),
    };
    let boot = |v: Option<f64>, ci: Option<crate::metrics::Interval>| match (v, ci) {
        (Some(v), Some(_)) => format!("{v:.4} ({})", fmt_ci(ci)),
        (Some(v), None) => format!("{v:.4}"),
        _ => "n/a".into(),
    };
    MetricRow {
        candidate: name.into(),
        chosen,
        tp: m.confusion.tp,
        fp: m.confusion.fp,
        fn_: m.confusion.fn_,
        tn: m.confusion.tn,
        precision: prop(m.precision, &m.precision_95),
        recall: prop(m.recall, &m.recall_95),
        false_positive_rate: prop(m.false_positive_rate, &m.false_positive_rate_95),
        f1: boot(m.f1, m.bootstrap_95.f1),
        f_beta: m.f_beta.map(|v| format!("{v:.4}")),
        average_precision: boot(m.average_precision, m.bootstrap_95.average_precision),
        roc_auc: boot(m.roc_auc, m.bootstrap_95.roc_auc),
        mcc: fmt_rate(m.mcc),
        balanced_accuracy: fmt_rate(m.balanced_accuracy),
        specificity: fmt_rate(m.specificity),
        accuracy: fmt_rate(m.accuracy),
        precision_cell: cell(m.precision, m.precision_95.wilson),
        recall_cell: cell(m.recall, m.recall_95.wilson),
        false_positive_rate_cell: cell(m.false_positive_rate, m.false_positive_rate_95.wilson),
        f1_cell: cell(m.f1, m.bootstrap_95.f1),
        average_precision_cell: cell(m.average_precision, m.bootstrap_95.average_precision),
        roc_auc_cell: cell(m.roc_auc, m.bootstrap_95.roc_auc),
    }
}

/// The card's statement of the conformal guarantee and its check on test.
fn conformal_card(plan: &Plan, rec: &RunRecord) -> Option<card::ConformalCard> {
    let ThresholdPolicy::Conformal {
        max_false_positive_rate: a,
    } = plan.threshold
    else {
        return None;
    };
    let chosen = rec.candidates.iter().find(|c| c.chosen)?;
    let cal = rec.calibration.as_ref()?.calibration()?;
    let rank = cal.cut(a).ok()?.k;
    let test = chosen.test.as_ref();
    Some(card::ConformalCard {
        level: fmt_f64(a),
        validation_normals: cal.len(),
        rank,
        candidates: rec.candidates.len(),
        test_false_positive_rate: test.map(|t| {
            format!(
                "{} of {} test normals flagged: {} (W {}; CP {})",
                t.confusion.fp,
                t.confusion.fp + t.confusion.tn,
                fmt_rate(t.false_positive_rate),
                fmt_ci(t.false_positive_rate_95.wilson),
                fmt_ci(t.false_positive_rate_95.clopper_pearson)
            )
        }),
        test_above_level: test
            .and_then(|t| t.false_positive_rate_95.clopper_pearson)
            .is_some_and(|ci| ci.low > a),
    })
}

fn fmt_fraction(f: &[f64]) -> String {
    f.iter().map(|v| fmt_f64(*v)).collect::<Vec<_>>().join("/")
}

fn split_sentence(plan: &Plan, rec: &RunRecord) -> String {
    let r = &rec.split.report;
    match &plan.split {
        SplitPlan::Protocol { seed, fractions } => format!(
            "Rows were split by the seeded protocol split (seed {}): normal rows {} to \
             train/validation/test, known anomalies {} to validation/test and none to train; \
             identical rows always share a split.",
            seed.0,
            fmt_fraction(&fractions.normal),
            fmt_fraction(&fractions.anomaly)
        ),
        SplitPlan::Groups {
            column,
            seed,
            fractions,
        } => format!(
            "Rows were split by whole groups of the column “{}” ({} groups, seed {}): normal rows \
             {} to train/validation/test, known anomalies {} to validation/test; every row of a \
             group, and every copy of a row, shares one split, and groups holding a known \
             anomaly never reach train.",
            column.name,
            r.groups.unwrap_or(0),
            seed.0,
            fmt_fraction(&fractions.normal),
            fmt_fraction(&fractions.anomaly)
        ),
        SplitPlan::Time { column, fractions } => {
            let cuts = r.time_cuts.clone().unwrap_or_default();
            let t = |v: Option<String>| v.unwrap_or_else(|| "n/a".into());
            format!(
                "Rows were split in time order of the column “{}”: normal rows {} to \
                 train/validation/test, earliest first (validation from {}, test from {}); known \
                 anomalies {} to validation/test (test from {}).",
                column.name,
                fmt_fraction(&fractions.normal),
                t(cuts.normal_validation_from),
                t(cuts.normal_test_from),
                fmt_fraction(&fractions.anomaly),
                t(cuts.anomaly_test_from)
            )
        }
        SplitPlan::FromColumn { column, group } => format!(
            "Rows were split by the column “{}”; no row content appears in two splits{}.",
            column.name,
            group
                .as_ref()
                .map(|g| format!(", and no group of “{}” does", g.name))
                .unwrap_or_default()
        ),
    }
}

pub(crate) fn card_context(
    plan: &Plan,
    rec: &RunRecord,
    spec_file: &str,
    key_fingerprint: &str,
) -> Result<CardContext> {
    let chosen = rec
        .candidates
        .iter()
        .find(|c| c.chosen)
        .expect("one candidate is chosen");
    let label = match &plan.label {
        Some(l) => format!(
            "Labels come from the column “{}”: “{}” is normal, “{}” is a known anomaly.",
            l.column.name, l.normal, l.anomaly
        ),
        None => format!(
            "Labels are implied by the source: rows of “{}” are normal, rows of “{}” are known anomalies.",
            plan.sources[0].written, plan.sources[1].written
        ),
    };
    let d = &rec.dropped_rows;
    let missing = match plan.missing {
        MissingPolicy::Refuse => "Rows with a missing value are refused; none were found.".to_string(),
        MissingPolicy::DropRow => format!(
            "Rows with a missing value are left out: {} normal and {} anomalous rows were dropped{}.",
            d.normal,
            d.anomaly,
            if d.by_split.is_empty() {
                String::new()
            } else {
                format!(
                    " ({})",
                    d.by_split
                        .iter()
                        .map(|(k, v)| format!("{k}: {} normal, {} anomalous", v[0], v[1]))
                        .collect::<Vec<_>>()
                        .join("; ")
                )
            }
        ),
    };
    Ok(CardContext {
        answer: answer(plan, rec)?,
        interval_details: interval_details(rec),
        title: plan.card.title.clone(),
        owner: plan.card.owner.clone(),
        intended_use: plan.card.intended_use.clone(),
        out_of_scope_uses: plan.card.out_of_scope_uses.clone(),
        safety_caution: plan.card.safety_caution.clone(),
        tool: rec.tool.clone(),
        spec_file: spec_file.into(),
        spec_blake3: rec.spec.blake3.clone(),
        key_fingerprint: key_fingerprint.to_string(),
        inputs: rec
            .inputs
            .iter()
            .map(|i| InputRow {
                path: i.path.clone(),
                rows: i.rows,
                blake3: i.digest.blake3.clone(),
            })
            .collect(),
        label,
        missing,
        feature_sets: rec
            .feature_sets
            .iter()
            .map(|s| FeatureSetRow {
                name: s.set.clone(),
                features: s
                    .features
                    .iter()
                    .map(|f| FeatureRow {
                        name: f.name.clone(),
                        from: f.from.clone(),
                        transforms: f
                            .transforms
                            .iter()
                            .map(describe_transform)
                            .collect::<Vec<_>>()
                            .join(", then "),
                    })
                    .collect(),
            })
            .collect(),
        split_method: split_sentence(plan, rec),
        splits: Part::ALL
            .iter()
            .map(|p| {
                let c = rec.split.report.counts[*p as usize];
                SplitRow {
                    split: p.name().into(),
                    normal: c.normal,
                    anomaly: c.anomaly,
                    manifest: rec.split.manifest_blake3[p.name()].clone(),
                }
            })
            .collect(),
        duplicate_rows: rec.split.report.rows_with_duplicates,
        moved_rows: rec.split.report.rows_off_requested_counts,
        threshold_policy: policy_name(plan.threshold),
        selection_rule: format!("{}.", selection_rule(plan.selection)),
        chosen: chosen.name.clone(),
        thresholds: rec
            .candidates
            .iter()
            .map(|c| ThresholdRow {
                candidate: c.name.clone(),
                chosen: c.chosen,
                parameters: c
                    .parameter_count
                    .map_or_else(|| "unknown".into(), |n| n.to_string()),
                tau: format!("{:.6}", c.tau),
                ln_epsilon: format!("{:.6}", c.ln_epsilon),
                unmet: c.threshold_note.clone(),
            })
            .collect(),
        validation: rec
            .candidates
            .iter()
            .map(|c| metric_row(&c.name, c.chosen, &c.validation))
            .collect(),
        test_chosen: chosen
            .test
            .as_ref()
            .map(|t| metric_row(&chosen.name, true, t)),
        test_others: rec
            .candidates
            .iter()
            .filter(|c| !c.chosen)
            .filter_map(|c| c.test.as_ref().map(|t| metric_row(&c.name, false, t)))
            .collect(),
        test_openings: rec.test_openings.as_ref().map(|o| {
            format!(
                "The ledger “{}” records {} opening(s) of this test split, under spec hash(es) {}.",
                o.ledger,
                o.count,
                o.spec_blake3.join(", ")
            )
        }),
        test_anomalies: rec.split.report.counts[Part::Test as usize].anomaly,
        plots_validation: vec![],
        plots_test: vec![],
        plots_features: vec![],
        external_commands: rec
            .candidates
            .iter()
            .filter_map(external_paragraph)
            .collect(),
        wall_clock: rec.wall_clock.as_ref().map(|w| {
            format!(
                "Run started {} and took {} s. This line is the only part of the card that \
                 differs between two runs of the same spec on the same data.",
                w.started_utc,
                fmt_f64(w.seconds)
            )
        }),
        conformal: conformal_card(plan, rec),
    })
}

/// The card's paragraph on an external-command candidate.
fn external_paragraph(c: &CandidateRecord) -> Option<String> {
    let detect::Params::Command {
        run,
        inputs,
        invocations,
        ..
    } = &c.params
    else {
        return None;
    };
    let files = if inputs.is_empty() {
        "no files were declared in `inputs`, so nothing ties the result to a version of the \
         program"
            .to_string()
    } else {
        format!(
            "its declared files: {}",
            inputs
                .iter()
                .map(|i| format!("{} (blake3 {})", i.path, i.blake3))
                .collect::<Vec<_>>()
                .join(", ")
        )
    };
    let runs = invocations
        .iter()
        .map(|i| {
            format!(
                "{} rows{} (exit status {}, scores blake3 {})",
                i.rows,
                if i.test_rows_included {
                    ", validation and test shuffled together"
                } else {
                    ", validation"
                },
                i.exit_status,
                i.scores_blake3
            )
        })
        .collect::<Vec<_>>()
        .join("; ");
    Some(format!(
        "“{}” is an external command, `{}`: anomark cannot see inside it. It was run without a \
         shell on a folder holding the training rows' features and the rows to score, shuffled, \
         with no labels, split names or ids, and each time it returned one score per row \
         (higher is more anomalous; its scores are the program's own, not −ln p(x)): {runs}. \
         That it learnt from the training rows only is enforced by what it was given, nothing \
         more; {files}.",
        c.name,
        run.join(" ")
    ))
}

fn describe_transform(t: &features::Fitted) -> String {
    match *t {
        features::Fitted::Log => "log".into(),
        features::Fitted::Log1p => "log1p".into(),
        features::Fitted::Sqrt => "sqrt".into(),
        features::Fitted::BoxCox { lambda } => format!("Box-Cox (λ = {lambda:.4})"),
        features::Fitted::YeoJohnson { lambda } => format!("Yeo-Johnson (λ = {lambda:.4})"),
        features::Fitted::Standardise { mean, sd } => {
            format!("standardise (mean {}, sd {})", fmt_sig(mean), fmt_sig(sd))
        }
    }
}

/// Six significant digits, for display only.
fn fmt_sig(v: f64) -> String {
    format!("{v:.6e}")
        .parse::<f64>()
        .map(fmt_f64)
        .unwrap_or_else(|_| fmt_f64(v))
}
