//! The third stage: every candidate (feature set × detector) fitted on the
//! training data, scored on validation, summarised once and given its
//! threshold by the policy, with its validation metrics. Nothing here sees
//! the test split.

use super::held::{Asked, Held};
use super::ingest::Rows;
use super::train::{self, SetTraining};
use crate::detect::{self, Model};
use crate::error::{Error, Result};
use crate::features::FittedFeatures;
use crate::metrics::{self, Metrics};
use crate::spec::{self, DetectorKind, Plan, ThresholdPolicy};
use crate::summary::Summary;
use crate::threshold::{self, Choice};

/// One fitted candidate with its validation results.
pub(crate) struct Candidate {
    /// Its name (the detector, prefixed by a named feature set).
    pub name: String,
    /// Its feature set's index.
    pub set: usize,
    /// Its detector.
    pub kind: DetectorKind,
    /// The fitted model.
    pub model: Box<dyn Model>,
    /// Its threshold.
    pub choice: Choice,
    /// Its validation metrics at that threshold, the bootstrap intervals
    /// apart: they are computed beside the run ([`Candidate::validation_intervals`]).
    pub validation: Metrics,
    /// Its validation metrics' bootstrap intervals, running.
    pub validation_intervals: metrics::PendingIntervals,
    /// Its validation scores, in the validation rows' order (none when
    /// the rows are on an engine).
    pub validation_scores: Vec<f64>,
    /// The validation scores' evaluation summary, for the threshold, the
    /// metrics, the bootstrap and the figures.
    pub validation_summary: Summary,
}

/// What the fit stage returns: the fitted feature sets and every candidate,
/// in spec order.
pub(crate) struct Fitted {
    /// Per feature set, its fitted features.
    pub sets: Vec<FittedFeatures>,
    /// The candidates, feature sets then detectors in spec order.
    pub candidates: Vec<Candidate>,
    /// The validation rows' labels.
    pub validation_labels: Vec<bool>,
    /// The β of an Fβ policy.
    pub beta: Option<f64>,
}

/// Fits, scores and thresholds every candidate on `rows`.
pub(crate) fn candidates(
    plan: &Plan,
    rows: &Rows,
    progress: &crate::progress::Progress,
) -> Result<Fitted> {
    let val_y = rows.validation_labels();
    if let ThresholdPolicy::Conformal {
        max_false_positive_rate: a,
    } = plan.threshold
    {
        crate::conformal::check_level(a, val_y.iter().filter(|&&y| !y).count())?;
    }
    let beta = match plan.threshold {
        ThresholdPolicy::MaxFBeta { beta } => Some(beta),
        _ => None,
    };
    let mut sets = Vec::new();
    let mut candidates = Vec::new();
    for (si, set) in plan.feature_sets.iter().enumerate() {
        let training = train::of_set(plan, rows, si)?;
        // The candidates of one feature set are independent: fitted side by
        // side, each with the same bits as alone, and kept in spec order (the
        // first failure in that order is the one reported).
        let names_shown: Vec<String> = plan
            .detectors
            .iter()
            .map(|&kind| candidate_name(set, kind, plan))
            .collect();
        let stage = progress.stage(format!(
            "fitting and thresholding {}",
            names_shown.join(", ")
        ));
        let built: Vec<Result<Candidate>> = match &rows.held {
            Held::Engine(e) => on_engine(plan, e.as_ref(), &training, si, names_shown, beta)
                .map_or_else(|e| vec![Err(e)], |all| all.into_iter().map(Ok).collect()),
            Held::Rows => {
                use rayon::prelude::*;
                plan.detectors
                    .par_iter()
                    .zip(names_shown)
                    .map(|(&kind, name)| {
                        candidate(plan, rows, &training, (si, kind, name), &val_y, beta)
                    })
                    .collect()
            }
        };
        drop(stage);
        for c in built {
            candidates.push(c?);
        }
        sets.push(training.fitted);
    }
    Ok(Fitted {
        sets,
        candidates,
        validation_labels: val_y,
        beta,
    })
}

/// One candidate of rows in memory: fitted (or, for an external command,
/// run once on the training and validation rows), scored on validation,
/// thresholded.
fn candidate(
    plan: &Plan,
    rows: &Rows,
    training: &SetTraining<'_>,
    (si, kind, name): (usize, DetectorKind, String),
    val_y: &[bool],
    beta: Option<f64>,
) -> Result<Candidate> {
    let set = &plan.feature_sets[si];
    let fitted = &training.fitted;
    let (model, validation_scores) = if let DetectorKind::Command(i) = kind {
        // An external program: one invocation with the
        // training and the validation rows' features.
        let _t = crate::progress::part("external command");
        detect::command::validation_scores(
            &plan.commands[i],
            &training.names,
            &|r| fitted.apply(&rows.data, r),
            &rows.train,
            &rows.validation,
        )
        .map_err(|e| in_set(e, set))?
    } else {
        let model = fit(plan, training, si, kind)?;
        let t = crate::progress::part("validation scores");
        let validation_scores = train::checked_scores(
            &name,
            model.as_ref(),
            (fitted, &training.validation),
            &rows.validation,
            &rows.data,
        )?;
        drop(t);
        (model, validation_scores)
    };
    let t = crate::progress::part("summary");
    let mut validation_summary = Summary::new(&validation_scores, val_y, &[]);
    drop(t);
    let t = crate::progress::part("threshold");
    let choice = threshold::choose_summary(
        plan.threshold,
        &validation_scores,
        val_y,
        &validation_summary,
    );
    // A τ set in advance (a fixed policy) becomes a cut point.
    if validation_summary.confusion_at(choice.tau).is_none() {
        validation_summary = Summary::new(&validation_scores, val_y, &[choice.tau]);
    }
    drop(t);
    let scored = (model, validation_scores, validation_summary);
    finish((si, kind, name), scored, choice, beta, plan)
}

/// The candidate of detector `kind` on feature set `si`, fitted on the
/// training data.
fn fit(
    plan: &Plan,
    training: &SetTraining<'_>,
    si: usize,
    kind: DetectorKind,
) -> Result<Box<dyn Model>> {
    let _t = crate::progress::part("fitting");
    training
        .fit(kind)
        .map_err(|e| in_set(e, &plan.feature_sets[si]))
}

/// The candidates of feature set `si` on an engine, in spec order: each
/// fitted, then their validation summaries made where the rows are, all in
/// the same passes (a fixed τ that no summary counts asked again, of those
/// candidates together), and each thresholded from its summary alone (the
/// conformal policy is refused at the scope). The first failure in spec
/// order is the one reported, as in memory.
fn on_engine(
    plan: &Plan,
    e: &dyn super::held::HeldSplits,
    training: &SetTraining<'_>,
    si: usize,
    names: Vec<String>,
    beta: Option<f64>,
) -> Result<Vec<Candidate>> {
    // Fitted up to the first that fails; those before it are summarised
    // first, since a refusal of theirs comes first in spec order.
    let mut models = Vec::new();
    let mut failed = None;
    for &kind in &plan.detectors {
        match fit(plan, training, si, kind) {
            Ok(m) => models.push(m),
            Err(err) => {
                failed = Some(err);
                break;
            }
        }
    }
    let t = crate::progress::part("summary on the engine");
    let part = crate::part::Part::Validation;
    let ask = |which: &[usize], extra: &[f64]| -> Result<Vec<Summary>> {
        let asked: Vec<Asked<'_>> = which
            .iter()
            .map(|&k| Asked {
                name: &names[k],
                set: si,
                model: models[k].as_ref(),
                extra,
            })
            .collect();
        e.summaries(part, &asked)
    };
    let all: Vec<usize> = (0..models.len()).collect();
    let mut summaries = ask(&all, &[])?;
    if let Some(tau) = threshold::fixed_tau(plan.threshold) {
        let again: Vec<usize> = all
            .iter()
            .copied()
            .filter(|&k| summaries[k].confusion_at(tau).is_none())
            .collect();
        for (k, s) in again.iter().zip(ask(&again, &[tau])?) {
            summaries[*k] = s;
        }
    }
    if let Some(err) = failed {
        return Err(err);
    }
    drop(t);
    models
        .into_iter()
        .zip(summaries)
        .zip(plan.detectors.iter().zip(names))
        .map(|((model, s), (&kind, name))| {
            let choice = threshold::choose_on_summary(plan.threshold, &s).ok_or_else(|| {
                Error::internal("a threshold policy an engine cannot choose from a summary")
            })?;
            finish((si, kind, name), (model, Vec::new(), s), choice, beta, plan)
        })
        .collect()
}

/// A candidate from its model, validation scores (none on an engine),
/// summary and threshold: its validation metrics, the bootstrap started.
fn finish(
    (si, kind, name): (usize, DetectorKind, String),
    (model, validation_scores, validation_summary): (Box<dyn Model>, Vec<f64>, Summary),
    choice: Choice,
    beta: Option<f64>,
    plan: &Plan,
) -> Result<Candidate> {
    let t = crate::progress::part("validation metrics");
    let (validation, validation_intervals) =
        metrics_of(&validation_summary, choice.tau, beta, plan)?;
    drop(t);
    Ok(Candidate {
        name,
        set: si,
        kind,
        model,
        choice,
        validation,
        validation_intervals,
        validation_scores,
        validation_summary,
    })
}

/// A candidate's name: the detector, prefixed by a named feature set.
fn candidate_name(set: &spec::FeatureSetPlan, kind: DetectorKind, plan: &Plan) -> String {
    let detector = match kind {
        DetectorKind::Command(i) => plan.commands[i].name.as_str(),
        _ => detect::name(kind),
    };
    if set.named {
        format!("{}/{detector}", set.name)
    } else {
        detector.to_string()
    }
}

/// Every metric of a split at τ from its summary; τ is always one the
/// summary can count (a cut point, or the midpoint of a searched cut). The
/// bootstrap intervals are left empty and started beside the run (their
/// own time is the part `bootstrap` under `ANOMARK_STAGE_TIMES=1`).
pub(crate) fn metrics_of(
    s: &Summary,
    tau: f64,
    beta: Option<f64>,
    plan: &spec::Plan,
) -> Result<(Metrics, metrics::PendingIntervals)> {
    let without = spec::BootstrapPlan {
        replicates: 0,
        ..plan.bootstrap
    };
    let m = Metrics::of_summary(s, tau, beta, without).ok_or_else(|| tau_in_gap(tau))?;
    Ok((
        m,
        metrics::PendingIntervals::start(s, tau, plan.bootstrap, 0.95),
    ))
}

/// The metrics with their intervals, once these are computed.
pub(crate) fn with_intervals(
    m: &Metrics,
    pending: &metrics::PendingIntervals,
    tau: f64,
) -> Result<Metrics> {
    Ok(Metrics {
        bootstrap_95: pending.wait().ok_or_else(|| tau_in_gap(tau))?,
        ..m.clone()
    })
}

fn tau_in_gap(tau: f64) -> Error {
    Error::internal(format!(
        "τ `{tau}` falls inside a gap of the evaluation summary"
    ))
}

/// Wraps an error met on a named feature set with the set's name (a spec
/// with one unnamed set needs no such context).
fn in_set(e: Error, set: &spec::FeatureSetPlan) -> Error {
    if set.named {
        Error::InFeatureSet {
            set: set.name.clone(),
            source: Box::new(e),
        }
    } else {
        e
    }
}
