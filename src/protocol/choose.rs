//! The fourth stage: the choice on validation. Each candidate already has
//! its threshold (fit stage); here the candidate is selected by the
//! selection rule, on validation numbers only. Also the rule and the
//! threshold policy in words, as run.json and the card state them.

use super::fit::{Candidate, Fitted};
use crate::error::{Error, Result};
use crate::metrics::cmp_fraction;
use crate::record::fmt_f64;
use crate::spec::{Plan, SelectionMetric, ThresholdPolicy};

/// What the choice stage returns: the fitted candidates and the chosen one.
pub(crate) struct Chosen {
    /// The fit stage's results.
    pub fitted: Fitted,
    /// The chosen candidate's index in `fitted.candidates`.
    pub index: usize,
}

impl Chosen {
    /// The chosen candidate.
    pub fn candidate(&self) -> &Candidate {
        &self.fitted.candidates[self.index]
    }
}

/// Selects the candidate by the plan's rule, refusing when no candidate
/// meets the threshold policy on validation.
pub(crate) fn choose(plan: &Plan, fitted: Fitted) -> Result<Chosen> {
    let candidates = &fitted.candidates;
    if candidates.iter().all(|c| !c.choice.met) {
        return Err(Error::Protocol {
            message: format!(
                "no candidate meets the threshold policy on validation: {}",
                candidates
                    .iter()
                    .map(|c| format!("{}: {}", c.name, c.choice.note.clone().unwrap_or_default()))
                    .collect::<Vec<_>>()
                    .join("; ")
            ),
        });
    }
    let index = select(candidates, plan.selection);
    Ok(Chosen { fitted, index })
}

/// The selection rule, in words (also in run.json and the card).
pub fn selection_rule(m: SelectionMetric) -> String {
    let metric = match m {
        SelectionMetric::F1 => "F1 (compared as exact fractions)",
        SelectionMetric::FBeta => "Fβ",
        SelectionMetric::Precision => "precision",
        SelectionMetric::Recall => "recall",
        SelectionMetric::Mcc => "Matthews correlation",
        SelectionMetric::BalancedAccuracy => "balanced accuracy",
        SelectionMetric::AveragePrecision => "average precision",
        SelectionMetric::RocAuc => "ROC AUC",
    };
    format!(
        "the candidate with the highest validation {metric} among those whose threshold policy \
         is met; ties go to the candidate with fewer free parameters, then to the one listed \
         first in the spec (feature sets, then detectors); test numbers play no part"
    )
}

/// The policy in words; among equally good cut points the highest τ wins.
pub fn policy_name(p: ThresholdPolicy) -> String {
    let s = match p {
        ThresholdPolicy::MaxF1 => "max-f1: the highest validation F1".to_string(),
        ThresholdPolicy::MaxFBeta { beta } => {
            format!("max-f-beta: the highest validation F{}", fmt_f64(beta))
        }
        ThresholdPolicy::AlarmBudget {
            max_false_positive_rate,
        } => format!(
            "alarm-budget: the highest validation recall with a false-positive rate of at most {}",
            fmt_f64(max_false_positive_rate)
        ),
        ThresholdPolicy::Conformal {
            max_false_positive_rate,
        } => format!(
            "conformal: flag a row when its conformal p-value against the validation normals is at \
             most {}",
            fmt_f64(max_false_positive_rate)
        ),
        ThresholdPolicy::RecallTarget { min_recall } => format!(
            "recall-target: the lowest validation false-positive rate with recall at least {}",
            fmt_f64(min_recall)
        ),
        ThresholdPolicy::PrecisionTarget { min_precision } => format!(
            "precision-target: the highest validation recall with precision at least {}",
            fmt_f64(min_precision)
        ),
        ThresholdPolicy::MinCost {
            missed_anomaly,
            false_alarm,
        } => format!(
            "min-cost: the lowest validation cost at {} per missed anomaly and {} per false alarm",
            fmt_f64(missed_anomaly),
            fmt_f64(false_alarm)
        ),
        ThresholdPolicy::Fixed { tau, ln_epsilon } => match (tau, ln_epsilon) {
            (Some(t), _) => format!("fixed: τ = {} declared in the spec", fmt_f64(t)),
            (_, Some(l)) => format!("fixed: ln ε = {} declared in the spec", fmt_f64(l)),
            _ => "fixed".into(),
        },
    };
    format!("{s} (among equally good thresholds, the highest τ)")
}

/// The value a candidate is ranked by (`None` ranks lowest).
fn selection_value(c: &Candidate, m: SelectionMetric) -> Option<f64> {
    let v = &c.validation;
    match m {
        SelectionMetric::F1 => v.f1,
        SelectionMetric::FBeta => v.f_beta,
        SelectionMetric::Precision => v.precision,
        SelectionMetric::Recall => v.recall,
        SelectionMetric::Mcc => v.mcc,
        SelectionMetric::BalancedAccuracy => v.balanced_accuracy,
        SelectionMetric::AveragePrecision => v.average_precision,
        SelectionMetric::RocAuc => v.roc_auc,
    }
}

/// The selection rule (see [`selection_rule`]): validation numbers only.
fn select(candidates: &[Candidate], m: SelectionMetric) -> usize {
    let params = |c: &Candidate| c.model.parameter_count();
    let better = |a: &Candidate, b: &Candidate| -> std::cmp::Ordering {
        let by_metric = if m == SelectionMetric::F1 {
            cmp_fraction(
                a.choice.confusion.f1_fraction(),
                b.choice.confusion.f1_fraction(),
            )
        } else {
            let (x, y) = (selection_value(a, m), selection_value(b, m));
            match (x, y) {
                (Some(x), Some(y)) => x.total_cmp(&y),
                (Some(_), None) => std::cmp::Ordering::Greater,
                (None, Some(_)) => std::cmp::Ordering::Less,
                (None, None) => std::cmp::Ordering::Equal,
            }
        };
        by_metric.then_with(|| params(b).cmp(&params(a)))
    };
    // Candidates whose policy is unmet on validation are never selected.
    let mut best = candidates.iter().position(|c| c.choice.met).unwrap_or(0);
    for (i, c) in candidates.iter().enumerate().skip(best + 1) {
        if c.choice.met && better(c, &candidates[best]).is_gt() {
            best = i;
        }
    }
    best
}
