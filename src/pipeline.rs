//! Runs the stages in order: spec → data → content hashes → splits (with the
//! leakage proof) → fit on train → thresholds on validation → selection →
//! the test split, opened once → record, scores, card → signed directory.
//!
//! This is the only code that opens the test split, and it does so once, after
//! every choice has been fixed on validation.

use std::path::{Path, PathBuf};
use std::time::{Instant, SystemTime};

use crate::audit::hash;
use crate::audit::leak::Part;
use crate::card::plots;
use crate::card::{
    self, CardContext, FeatureRow, FeatureSetRow, InputRow, MetricRow, SplitRow, ThresholdRow,
};
use crate::data::{self, Dataset, RowId};
use crate::detect::{self, Model};
use crate::error::{Error, Result};
use crate::features;
use crate::metrics::{self, cmp_fraction, Metrics};
use crate::output::{self, RunFiles};
use crate::record::{
    self, fmt_f64, CandidateRecord, InputRecord, LabelRecord, RunRecord, SelectionRecord,
    SpecRecord, SplitRecord, TestOpenings, WallClock,
};
use crate::spec::{
    self, DetectorKind, MissingPolicy, Plan, SelectionMetric, SplitPlan, ThresholdPolicy,
};
use crate::split;
use crate::summary::Summary;
use crate::threshold::{self, Choice};

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

/// What `anomark run` needs.
#[derive(Debug, Clone)]
pub struct RunOptions {
    /// The spec file.
    pub spec: PathBuf,
    /// The private key (empty when none was given: `anomark::run` then
    /// refuses before reading anything and says how to make one).
    pub key: PathBuf,
    /// The output directory (else the spec's `output`).
    pub out: Option<PathBuf>,
    /// A directory of templates that replace built-in ones.
    pub templates: Option<PathBuf>,
    /// Leave the wall-clock field null, making the directory byte-identical across runs.
    pub no_wall_clock: bool,
    /// The final run: open the test split once and record it on the ledger.
    pub open_test: bool,
    /// Progress display for the long stages.
    pub progress: crate::progress::Progress,
}

/// What a run produced (printed as JSON with `run --json`).
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct RunSummary {
    /// Where the run directory is.
    pub out: PathBuf,
    /// The chosen candidate.
    pub chosen: String,
    /// Validation F1 of the chosen candidate.
    pub validation_f1: Option<f64>,
    /// Test F1 of the chosen candidate (None when the test split stayed sealed).
    pub test_f1: Option<f64>,
    /// τ of the chosen candidate.
    pub tau: f64,
    /// Whether the test split was opened.
    pub test_opened: bool,
    /// Peak resident memory of the process, MiB (not recorded in run.json).
    pub peak_rss_mib: Option<f64>,
    /// Warnings for stderr (a test split opened under several specs).
    pub warnings: Vec<String>,
}

struct Candidate {
    name: String,
    set: usize,
    kind: DetectorKind,
    model: Box<dyn Model>,
    choice: Choice,
    validation: Metrics,
    validation_scores: Vec<f64>,
    /// The validation scores' evaluation summary, for the threshold, the
    /// metrics, the bootstrap and the figures.
    validation_summary: Summary,
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

/// The features a split is scored from. Computed features are made once and
/// held; a set of the content columns themselves is copied block by block
/// while it is scored instead (a copy costs less than holding one).
enum SplitFeatures {
    Held(ndarray::Array2<f64>),
    Copied,
}

impl SplitFeatures {
    /// The features of `rows`, with any refused value's error now, before
    /// they are scored.
    fn of(fitted: &features::FittedFeatures, data: &Dataset, rows: &[RowId]) -> Result<Self> {
        if fitted.is_identity(data) {
            fitted.map_blocks(data, rows, SCORE_BLOCK, |_| Vec::<()>::new())?;
            Ok(SplitFeatures::Copied)
        } else {
            Ok(SplitFeatures::Held(fitted.apply(data, rows)?))
        }
    }
}

/// The scores of `rows` under `model`, in blocks of [`SCORE_BLOCK`] rows
/// either way (the blocks of [`detect::score_in_blocks`], so the same bits).
fn checked_scores(
    name: &str,
    model: &dyn Model,
    (fitted, x): (&features::FittedFeatures, &SplitFeatures),
    rows: &[RowId],
    data: &Dataset,
) -> Result<Vec<f64>> {
    let s = match x {
        SplitFeatures::Held(x) => detect::score_in_blocks(model, x.view(), SCORE_BLOCK),
        SplitFeatures::Copied => fitted.map_blocks(data, rows, SCORE_BLOCK, |x| model.score(x))?,
    };
    if let Some(k) = s.iter().position(|v| v.is_nan()) {
        return Err(Error::Fit {
            detector: name.into(),
            message: format!("the score of {} is not a number", data.place(rows[k])),
            features: vec![],
        });
    }
    Ok(s)
}

/// Every metric of a split at τ from its summary; τ is always one the
/// summary can count (a cut point, or the midpoint of a searched cut). The
/// bootstrap is timed apart (`ANOMARK_STAGE_TIMES=1`, part `bootstrap`).
fn metrics_of(s: &Summary, tau: f64, beta: Option<f64>, plan: &spec::Plan) -> Result<Metrics> {
    let bug = || {
        Error::internal(format!(
            "τ `{tau}` falls inside a gap of the evaluation summary"
        ))
    };
    let without = spec::BootstrapPlan {
        replicates: 0,
        ..plan.bootstrap
    };
    let mut m = Metrics::of_summary(s, tau, beta, without).ok_or_else(bug)?;
    let _t = crate::progress::part("bootstrap");
    m.bootstrap_95 = metrics::bootstrap_summary(s, tau, plan.bootstrap, 0.95).ok_or_else(bug)?;
    Ok(m)
}

/// Rows per block when scoring.
const SCORE_BLOCK: usize = 8192;

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

/// Quotes a CSV field when it needs it (RFC 4180).
fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// What a recomputation takes from the recorded run instead of the clock,
/// the ledger and the private key.
#[derive(Debug, Clone)]
pub struct Replay {
    /// The recorded wall-clock field.
    pub wall_clock: Option<WallClock>,
    /// The recorded ledger summary.
    pub openings: Option<TestOpenings>,
    /// The recorded signing key's fingerprint.
    pub key_fingerprint: String,
    /// The recorded path of the spec from the run directory.
    pub path_from_run: Option<String>,
    /// The recorded repository state of the spec (it may have moved on since).
    pub provenance: Option<crate::audit::provenance::Provenance>,
}

/// Runs the whole protocol and writes the signed run directory.
pub fn run(opts: &RunOptions) -> Result<RunSummary> {
    let plan = spec::load(&opts.spec)?;
    let out = match (&opts.out, &plan.output) {
        (Some(o), _) => o.clone(),
        (None, Some(o)) => o.clone(),
        (None, None) => {
            return Err(Error::Output {
                path: opts.spec.clone(),
                message: "no output directory: pass `--out DIR` or set `output` in the spec".into(),
            })
        }
    };
    output::check_target(&out)?;
    if let Some(d) = &opts.templates {
        card::check_overrides(d)?;
    }
    if opts.open_test {
        crate::audit::ledger::check_path(&plan.ledger)?;
    }
    let key = crate::sign::load_private(&opts.key)?;
    let fingerprint = crate::sign::fingerprint(&key.verifying_key());
    let from_run = record::relative_path(&out, &opts.spec);
    let stale = crate::cleanup::stale_beside(&out);
    let (files, mut summary) = execute(opts, plan, &fingerprint, None, from_run)?;
    summary.warnings.extend(stale);
    let stage = opts.progress.stage("signing and writing the run directory");
    summary.out = files.commit(&out, &key)?;
    drop(stage);
    summary.peak_rss_mib = crate::progress::peak_rss_mib();
    Ok(summary)
}

/// Recomputes a run in memory from its spec, data and the recorded values
/// that no computation can reproduce (clock, ledger, key).
pub fn recompute(opts: &RunOptions, replay: &Replay) -> Result<RunFiles> {
    let plan = spec::load(&opts.spec)?;
    execute(
        opts,
        plan,
        &replay.key_fingerprint,
        Some(replay),
        replay.path_from_run.clone(),
    )
    .map(|r| r.0)
}

/// What a streamed reading keeps of the training rows.
struct StreamedTrain {
    /// Per feature set: the fitted (parameter-free) features.
    fitted: Vec<features::FittedFeatures>,
    /// Per feature set: the training moments.
    moments: Vec<crate::moments::Moments>,
    /// The train split's manifest hash.
    manifest: String,
    /// Training rows.
    rows: usize,
    /// The sampled training rows, and the two samples of them (figures, drift).
    sample: Dataset,
    samples: Vec<Vec<RowId>>,
}

fn execute(
    opts: &RunOptions,
    plan: Plan,
    fingerprint: &str,
    replay: Option<&Replay>,
    path_from_run: Option<String>,
) -> Result<(RunFiles, RunSummary)> {
    let started = SystemTime::now();
    let clock = Instant::now();

    let progress = opts.progress;
    // The repository state as the run begins, read by git in the background
    // while the data is read (a recomputation keeps the recorded state).
    let provenance = match replay {
        Some(r) => {
            let p = r.provenance.clone();
            std::thread::spawn(move || p)
        }
        None => {
            let spec = opts.spec.clone();
            std::thread::spawn(move || crate::audit::provenance::of(&spec))
        }
    };
    // Streamed: the training rows are summarised by moments per feature set
    // and their content hashes; only validation and test rows are kept.
    let (data, hashes, splits, streamed) = if plan.stream {
        let s = crate::stream::load(&plan, &progress, &[FIGURE_ROWS, record::DRIFT_SAMPLE_ROWS])?;
        let stage = progress.stage("splitting and checking for leakage");
        let splits = split::streamed(
            &s.data,
            &s.hashes,
            &s.parts,
            &s.train_hashes,
            s.train_counts,
        )?;
        drop(stage);
        let train_manifest = hash::manifest_of_sorted(s.train_hashes.iter());
        let train_rows = s.train_hashes.len();
        (
            s.data,
            s.hashes,
            splits,
            Some(StreamedTrain {
                fitted: s.fitted,
                moments: s.moments,
                manifest: train_manifest,
                rows: train_rows,
                sample: s.train_sample,
                samples: s.samples,
            }),
        )
    } else {
        let stage = progress.stage("reading the data");
        let data = data::load(&plan)?;
        drop(stage);
        let stage = progress.stage(format!("hashing {} rows", data.len()));
        let hashes = hash::rows(&data.x, &data.is_anomaly);
        drop(stage);
        let stage = progress.stage("splitting and checking for leakage");
        let splits = split::assign(&plan.split, &data, &hashes)?;
        drop(stage);
        (data, hashes, splits, None)
    };

    // Fit and choose on train and validation only.
    let val_y: Vec<bool> = splits
        .validation
        .iter()
        .map(|r| data.is_anomaly[r.0 as usize])
        .collect();
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
    let mut fitted_sets = Vec::new();
    let mut candidates = Vec::new();
    for (si, set) in plan.feature_sets.iter().enumerate() {
        let fitted = match &streamed {
            Some(t) => t.fitted[si].clone(),
            None => features::fit(set, &data, &splits.train)?,
        };
        let names = fitted.names();
        let t = crate::progress::part("feature matrices, train and validation");
        let train = fitted.apply(&data, &splits.train)?;
        // Checked here, before any detector is fitted.
        let val_x = SplitFeatures::of(&fitted, &data, &splits.validation)?;
        drop(t);
        let t = crate::progress::part("training moments");
        // The Gaussians fit from the training moments on content-hash
        // buckets, the same bits however the rows arrived (`moments`).
        let train_moments = match &streamed {
            Some(t) => Some(t.moments[si].clone()),
            None if plan.detectors.iter().any(|&k| detect::fits_from_moments(k)) => {
                let buckets: Vec<u16> = splits
                    .train
                    .iter()
                    .map(|r| hashes[r.0 as usize].bucket())
                    .collect();
                Some(crate::moments::of_sorted_buckets(&buckets, train.view())?)
            }
            None => None,
        };
        drop(t);
        // The candidates of one feature set are independent: fitted side by
        // side, each with the same bits as alone, and kept in spec order (the
        // first failure in that order is the one reported).
        let names_shown: Vec<String> = plan
            .detectors
            .iter()
            .map(|&kind| candidate_name(set, kind, &plan))
            .collect();
        let stage = progress.stage(format!(
            "fitting and thresholding {}",
            names_shown.join(", ")
        ));
        let built: Vec<Result<Candidate>> = {
            use rayon::prelude::*;
            plan.detectors
                .par_iter()
                .zip(names_shown)
                .map(|(&kind, name)| -> Result<Candidate> {
                    let (model, validation_scores) = if let DetectorKind::Command(i) = kind {
                        // An external program: one invocation with the
                        // training and the validation rows' features.
                        let _t = crate::progress::part("external command");
                        detect::command::validation_scores(
                            &plan.commands[i],
                            &names,
                            &|rows| fitted.apply(&data, rows),
                            &splits.train,
                            &splits.validation,
                        )
                        .map_err(|e| in_set(e, set))?
                    } else {
                        let t = crate::progress::part("fitting");
                        let model = match &train_moments {
                            Some(m) if detect::fits_from_moments(kind) => {
                                detect::fit_moments(kind, m, &names)
                            }
                            _ => detect::build(kind).fit(train.view(), &names),
                        }
                        .map_err(|e| in_set(e, set))?;
                        drop(t);
                        let t = crate::progress::part("validation scores");
                        let validation_scores = checked_scores(
                            &name,
                            model.as_ref(),
                            (&fitted, &val_x),
                            &splits.validation,
                            &data,
                        )?;
                        drop(t);
                        (model, validation_scores)
                    };
                    let t = crate::progress::part("summary");
                    let mut validation_summary = Summary::new(&validation_scores, &val_y, &[]);
                    drop(t);
                    let t = crate::progress::part("threshold");
                    let choice = threshold::choose_summary(
                        plan.threshold,
                        &validation_scores,
                        &val_y,
                        &validation_summary,
                    );
                    // A τ set in advance (a fixed policy) becomes a cut point.
                    if validation_summary.confusion_at(choice.tau).is_none() {
                        validation_summary =
                            Summary::new(&validation_scores, &val_y, &[choice.tau]);
                    }
                    drop(t);
                    let t = crate::progress::part("validation metrics");
                    let validation = metrics_of(&validation_summary, choice.tau, beta, &plan)?;
                    drop(t);
                    Ok(Candidate {
                        name,
                        set: si,
                        kind,
                        model,
                        choice,
                        validation,
                        validation_scores,
                        validation_summary,
                    })
                })
                .collect()
        };
        drop(stage);
        for c in built {
            candidates.push(c?);
        }
        fitted_sets.push(fitted);
    }
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
    let chosen = select(&candidates, plan.selection);

    let test_manifest = splits.test.manifest().to_string();
    let test_counts = splits.test.counts();
    let mut manifests: std::collections::BTreeMap<String, String> = [
        (Part::Train, &splits.train),
        (Part::Validation, &splits.validation),
    ]
    .iter()
    .map(|(p, rows)| {
        // Each list is in canonical (content hash, row) order.
        let hs = rows.iter().map(|r| &hashes[r.0 as usize]);
        (p.name().to_string(), hash::manifest_of_sorted(hs))
    })
    .collect();
    manifests.insert(Part::Test.name().into(), test_manifest.clone());
    if let Some(t) = &streamed {
        manifests.insert(Part::Train.name().into(), t.manifest.clone());
    }

    // Every choice is fixed. Only a final run opens the test split, once, and
    // the opening is on the ledger before any test score is computed.
    let spec_blake3 = hash::bytes(&plan.spec_bytes);
    let mut warnings = Vec::new();
    let (test_rows, test_scores, test_y, openings) = if opts.open_test {
        let entries = match replay {
            // A recomputation neither opens the ledger nor adds to it.
            Some(_) => vec![],
            None => crate::audit::ledger::append(
                &plan.ledger,
                &crate::audit::ledger::Entry {
                    test_manifest: test_manifest.clone(),
                    spec_blake3: spec_blake3.clone(),
                    chosen: candidates[chosen].name.clone(),
                    opened_utc: record::rfc3339(
                        SystemTime::now()
                            .duration_since(SystemTime::UNIX_EPOCH)
                            .map(|d| d.as_secs())
                            .unwrap_or(0),
                    ),
                    tool: record::tool(),
                },
            )?,
        };
        let same: Vec<&crate::audit::ledger::Entry> = entries
            .iter()
            .filter(|e| splits.test.is_recorded_by(&e.test_manifest))
            .collect();
        let mut specs: Vec<String> = same.iter().map(|e| e.spec_blake3.clone()).collect();
        specs.sort();
        specs.dedup();
        if specs.len() > 1 {
            warnings.push(format!(
                "this test split has now been opened {} times under {} different specs ({}); \
                 numbers from a test set that informed earlier choices are no longer a clean \
                 held-out estimate",
                same.len(),
                specs.len(),
                specs.join(", ")
            ));
        }
        let openings = replay
            .and_then(|r| r.openings.clone())
            .unwrap_or(TestOpenings {
                ledger: plan
                    .ledger
                    .file_name()
                    .map(|s| s.to_string_lossy().into_owned())
                    .unwrap_or_default(),
                count: same.len(),
                spec_blake3: specs,
            });
        let opened = splits.test.open();
        let test_rows = opened.rows();
        let test_y: Vec<bool> = test_rows
            .iter()
            .map(|r| data.is_anomaly[r.0 as usize])
            .collect();
        let test_x: Vec<SplitFeatures> = fitted_sets
            .iter()
            .map(|f| SplitFeatures::of(f, &data, test_rows))
            .collect::<Result<_>>()?;
        let t = crate::progress::part("test scores");
        let mut test_scores = Vec::new();
        for c in &mut candidates {
            if let DetectorKind::Command(i) = c.kind {
                // The program's second invocation, with the test rows.
                let fitted = &fitted_sets[c.set];
                let (model, scores) = detect::command::final_scores(
                    &plan.commands[i],
                    &fitted.names(),
                    &|rows| fitted.apply(&data, rows),
                    &splits.train,
                    &splits.validation,
                    &c.validation_scores,
                    &opened,
                    c.model.as_ref(),
                    &|r| data.place(r),
                )?;
                c.model = model;
                test_scores.push(scores);
                continue;
            }
            test_scores.push(checked_scores(
                &c.name,
                c.model.as_ref(),
                (&fitted_sets[c.set], &test_x[c.set]),
                test_rows,
                &data,
            )?);
        }
        drop(t);
        (opened.into_rows(), test_scores, test_y, Some(openings))
    } else {
        (vec![], vec![vec![]; candidates.len()], vec![], None)
    };
    // Each candidate's test scores summarised once, with its τ as a cut
    // point, for its metrics and figures.
    let test_summaries: Vec<Summary> = {
        use rayon::prelude::*;
        test_scores
            .par_iter()
            .zip(&candidates)
            .map(|(ts, c)| Summary::new(ts, &test_y, &[c.choice.tau]))
            .collect()
    };

    let stage = progress.stage("test metrics and intervals");
    let candidate_records: Vec<CandidateRecord> = {
        use rayon::prelude::*;
        candidates
            .par_iter()
            .zip(&test_summaries)
            .enumerate()
            .map(|(i, (c, ts))| -> Result<CandidateRecord> {
                let test = if openings.is_some() {
                    Some(metrics_of(ts, c.choice.tau, beta, &plan)?)
                } else {
                    None
                };
                Ok(CandidateRecord {
                    name: c.name.clone(),
                    feature_set: fitted_sets[c.set].set.clone(),
                    detector: detect::name(c.kind).into(),
                    parameter_count: Some(c.model.parameter_count())
                        .filter(|&n| n != detect::UNKNOWN_PARAMETERS),
                    params: c.model.params(),
                    tau: c.choice.tau,
                    ln_epsilon: c.choice.ln_epsilon(),
                    threshold_met: c.choice.met,
                    threshold_note: c.choice.note.clone(),
                    validation: c.validation.clone(),
                    test,
                    chosen: i == chosen,
                })
            })
            .collect::<Result<_>>()?
    };

    let spec_file = opts
        .spec
        .file_name()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let measured = (!opts.no_wall_clock).then(|| WallClock {
        started_utc: record::rfc3339(
            started
                .duration_since(SystemTime::UNIX_EPOCH)
                .map(|d| d.as_secs())
                .unwrap_or(0),
        ),
        seconds: (clock.elapsed().as_millis() as f64) / 1000.0,
    });
    let wall_clock = match replay {
        Some(r) => r.wall_clock.clone(),
        None => measured,
    };
    // The training rows the card's feature figures and the drift reference
    // show: every k-th in content-hash order, k = ⌈rows / limit⌉, taken
    // here from the rows in memory, or kept by the streamed reader (`0` is
    // its sample for the figures, `1` for the drift reference).
    let train_rows = match &streamed {
        Some(t) => t.rows,
        None => splits.train.len(),
    };
    let train_sample = |which: usize, limit: usize| -> (&Dataset, Vec<RowId>, usize) {
        let stride = train_rows.div_ceil(limit).max(1);
        match &streamed {
            Some(t) => (&t.sample, t.samples[which].clone(), stride),
            None => (
                &data,
                splits.train.iter().copied().step_by(stride).collect(),
                stride,
            ),
        }
    };
    let rec = RunRecord {
        format: record::FORMAT,
        tool: record::tool(),
        spec: SpecRecord {
            file: spec_file.clone(),
            blake3: spec_blake3.clone(),
            path_from_run,
        },
        provenance: provenance.join().unwrap_or(None),
        inputs: data
            .files
            .iter()
            .map(|f| InputRecord {
                path: f.shown.clone(),
                format: f.format,
                rows: f.rows,
                digest: f.digest.clone(),
            })
            .collect(),
        label: plan.label.as_ref().map(|l| LabelRecord {
            column: l.column.name.clone(),
            normal: l.normal.clone(),
            anomaly: l.anomaly.clone(),
        }),
        content_columns: data.columns.clone(),
        missing_values: plan.missing,
        dropped_rows: data.dropped.clone(),
        feature_sets: fitted_sets.clone(),
        split: SplitRecord {
            report: splits.report.clone(),
            requested: splits.report.requested.map(by_name),
            counts: by_name(splits.report.counts),
            manifest_blake3: manifests,
        },
        test_opened: openings.is_some(),
        test_counts,
        test_openings: openings,
        threshold_policy: plan.threshold,
        bootstrap: plan.bootstrap,
        selection: SelectionRecord {
            metric: plan.selection,
            rule: selection_rule(plan.selection),
            chosen: candidates[chosen].name.clone(),
        },
        candidates: candidate_records,
        calibration: Some(record::CalibrationRecord {
            candidate: candidates[chosen].name.clone(),
            validation_normals: val_y.iter().filter(|&&y| !y).count(),
            sorted_scores: crate::conformal::Calibration::of_normals(
                &candidates[chosen].validation_scores,
                &val_y,
            )
            .sorted()
            .to_vec(),
        }),
        drift_reference: Some({
            let (shown, sampled, stride) = train_sample(1, record::DRIFT_SAMPLE_ROWS);
            drift_reference(
                &fitted_sets[candidates[chosen].set],
                shown,
                &sampled,
                (train_rows, stride),
                candidates[chosen].validation.false_positive_rate,
            )?
        }),
        wall_clock,
    };

    drop(stage);
    let stage = progress.stage("writing the card and figures");
    let mut files = RunFiles::default();
    let mut run_json = serde_json::to_vec_pretty(&rec)
        .map_err(|e| Error::internal(format!("serialising run.json: {e}")))?;
    run_json.push(b'\n');
    files.add("run.json", run_json);
    files.add(SPEC_COPY, plan.spec_bytes.clone());
    let mut ctx = card_context(&plan, &rec, &spec_file, fingerprint)?;
    let c = &candidates[chosen];
    let set = &fitted_sets[c.set];
    let params = c.model.params();
    // scores.csv, the score figures and the feature figures are independent:
    // made side by side on all cores, each with the same bytes as alone.
    let score_figures = || -> Result<(Vec<plots::Plot>, Vec<plots::Plot>)> {
        let _t = crate::progress::part("score figures");
        let val_cuts = crate::summary::curve(&c.validation_summary);
        let val = plots::SplitScores {
            split: Part::Validation.name(),
            scores: &c.validation_scores,
            is_anomaly: &val_y,
            tau: c.choice.tau,
            cuts: &val_cuts,
        };
        let validation = vec![
            plots::precision_recall(val)?,
            plots::roc(val)?,
            plots::objective(plan.threshold, val)?,
            plots::score_histogram(val)?,
        ];
        let mut test = vec![];
        if rec.test_opened {
            let test_cuts = crate::summary::curve(&test_summaries[chosen]);
            let t = plots::SplitScores {
                split: Part::Test.name(),
                scores: &test_scores[chosen],
                is_anomaly: &test_y,
                tau: c.choice.tau,
                cuts: &test_cuts,
            };
            test = vec![
                plots::precision_recall(t)?,
                plots::roc(t)?,
                plots::score_histogram(t)?,
            ];
        }
        Ok((validation, test))
    };
    let feature_figures = || -> Result<Vec<plots::Plot>> {
        let _t = crate::progress::part("feature figures");
        // A histogram needs no more than a systematic sample: every k-th row in
        // canonical (content-hash) order, so the figure does not depend on the
        // file's row order (nor on how the rows were read) and a large run
        // does not copy all its rows again.
        let (shown, sampled, stride) = train_sample(0, FIGURE_ROWS);
        let shown_as = if stride > 1 {
            format!(
                "training rows, one in every {stride} of {train_rows} in content-hash order ({} rows)",
                sampled.len()
            )
        } else {
            "training rows".to_string()
        };
        let columns = set.columns(shown, &sampled)?;
        use rayon::prelude::*;
        set.names()
            .par_iter()
            .zip(&columns)
            .enumerate()
            .map(|(j, (name, column))| {
                plots::feature_histogram(j, name, &shown_as, column, params.marginal(j))
            })
            .collect::<Result<_>>()
    };
    let scores = || {
        let _t = crate::progress::part("scores.csv");
        scores_csv(
            &data,
            &candidates,
            &splits.validation,
            &test_rows,
            &test_scores,
        )
    };
    let (scores, (by_score, by_feature)) =
        rayon::join(scores, || rayon::join(score_figures, feature_figures));
    files.add_parts("scores.csv", scores);
    (ctx.plots_validation, ctx.plots_test) = by_score?;
    ctx.plots_features = by_feature?;
    for p in ctx
        .plots_validation
        .iter()
        .chain(&ctx.plots_test)
        .chain(&ctx.plots_features)
    {
        files.add(&p.file, p.svg.clone().into_bytes());
    }
    let _t = crate::progress::part("rendering the card");
    let (md, html) = card::render(&ctx, opts.templates.as_deref())?;
    files.add("card.md", md.into_bytes());
    files.add("card.html", html.into_bytes());

    drop(stage);
    let c = &rec.candidates[chosen];
    let summary = RunSummary {
        out: PathBuf::new(),
        chosen: c.name.clone(),
        validation_f1: c.validation.f1,
        test_f1: c.test.as_ref().and_then(|t| t.f1),
        tau: c.tau,
        test_opened: rec.test_opened,
        peak_rss_mib: None,
        warnings,
    };
    Ok((files, summary))
}

/// The drift reference: the chosen feature set's values on a systematic
/// sample of the training rows (`sampled` of `shown`: every `stride`-th of
/// the `rows` training rows in canonical order, at most
/// [`record::DRIFT_SAMPLE_ROWS`]).
fn drift_reference(
    set: &features::FittedFeatures,
    shown: &data::Dataset,
    sampled: &[RowId],
    (rows, stride): (usize, usize),
    fpr: Option<f64>,
) -> Result<record::DriftReference> {
    let columns = set.columns(shown, sampled)?;
    Ok(record::DriftReference {
        feature_set: set.set.clone(),
        rows: if stride > 1 {
            format!("training rows, one in every {stride} of {rows} in content-hash order")
        } else {
            format!("all {rows} training rows")
        },
        sample_rows: sampled.len(),
        validation_false_positive_rate: fpr,
        features: set
            .names()
            .iter()
            .zip(&columns)
            .map(|(n, c)| record::FeatureReference::of(n, c))
            .collect(),
    })
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
    let cal = crate::conformal::Calibration::from_sorted(
        rec.calibration.as_ref()?.sorted_scores.clone(),
    )?;
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

/// At most this many rows feed each feature figure (a systematic sample above).
const FIGURE_ROWS: usize = 200_000;

/// The run directory's copy of the spec's exact bytes.
pub const SPEC_COPY: &str = "spec.yaml";

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

fn by_name(counts: [split::Counts; 3]) -> std::collections::BTreeMap<String, split::Counts> {
    Part::ALL
        .iter()
        .map(|p| (p.name().to_string(), counts[*p as usize]))
        .collect()
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

fn scores_csv(
    data: &Dataset,
    candidates: &[Candidate],
    validation: &[RowId],
    test: &[RowId],
    test_scores: &[Vec<f64>],
) -> Vec<Vec<u8>> {
    use rayon::prelude::*;
    use std::fmt::Write;
    let mut out = String::from(if data.ids.is_some() { "id" } else { "row" });
    out.push_str(",split,label");
    for c in candidates {
        out.push(',');
        out.push_str(&csv_field(&c.name));
    }
    out.push('\n');
    // (split, row, index within the split's score vectors), in (split, row)
    // order: each split's rows are placed by row number in one counting
    // pass (a row is in one split once), with no comparison sort.
    let mut lines: Vec<(Part, RowId, u32)> = Vec::with_capacity(validation.len() + test.len());
    let mut at = vec![u32::MAX; data.len()];
    for (part, rows) in [(Part::Validation, validation), (Part::Test, test)] {
        for (k, r) in rows.iter().enumerate() {
            at[r.0 as usize] = k as u32;
        }
        let before = lines.len();
        lines.extend(at.iter_mut().enumerate().filter_map(|(i, k)| {
            let taken = std::mem::replace(k, u32::MAX);
            (taken != u32::MAX).then_some((part, RowId(i as u64), taken))
        }));
        debug_assert_eq!(lines.len() - before, rows.len(), "a row twice in one split");
    }
    // Lines are formatted in blocks on all cores, kept in order as the
    // file's parts (the bytes do not depend on the thread count). An id
    // column with no delimiter, quote or line end anywhere is written as it
    // is, without a check per value.
    let plain_ids = data.ids.as_ref().is_some_and(|ids| {
        let b = ids.joined().as_bytes();
        memchr::memchr3(b',', b'"', b'\n', b).is_none() && memchr::memchr(b'\r', b).is_none()
    });
    let line =
        |s: &mut String, (p, r, _): (Part, RowId, u32), scores: &mut dyn Iterator<Item = f64>| {
            let i = r.0 as usize;
            match &data.ids {
                Some(ids) if plain_ids => s.push_str(&ids[i]),
                Some(ids) => s.push_str(&csv_field(&ids[i])),
                None => {
                    let _ = write!(s, "{}", r.0);
                }
            }
            s.push(',');
            s.push_str(p.name());
            s.push(',');
            s.push(if data.is_anomaly[i] { '1' } else { '0' });
            for v in scores {
                s.push(',');
                crate::record::push_f64(s, v);
            }
            s.push('\n');
        };
    const BLOCK: usize = 8192;
    let id_len = data
        .ids
        .as_ref()
        .map_or(20, |ids| ids.iter().map(|s| s.len() + 2).max().unwrap_or(0));
    let nc = candidates.len();
    let mut parts = vec![out.into_bytes()];
    parts.par_extend(lines.par_chunks(BLOCK).map(|block| {
        // The block's scores first, a tight pass of loads: a line's place in
        // its split's score vectors is scattered (content-hash order), and
        // loads issued together overlap their cache misses.
        let mut scores = Vec::with_capacity(block.len() * nc);
        for &(p, _, k) in block {
            let k = k as usize;
            scores.extend(candidates.iter().enumerate().map(|(ci, c)| match p {
                Part::Test => test_scores[ci][k],
                _ => c.validation_scores[k],
            }));
        }
        // Room for the longest id and 25 bytes a score (ryu's longest).
        let mut s = String::with_capacity(block.len() * (id_len + 14 + 25 * nc));
        for (j, &l) in block.iter().enumerate() {
            line(&mut s, l, &mut scores[j * nc..(j + 1) * nc].iter().copied());
        }
        s.into_bytes()
    }));
    parts
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

fn card_context(
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

/// Checks the signature and every file hash of a run directory.
pub fn verify(dir: &Path, pubkey: &Path) -> Result<crate::sign::Manifest> {
    let key = crate::sign::load_public(pubkey)?;
    crate::sign::verify_dir(dir, &key)
}

/// Where a run's record says its spec is, relative to the run directory.
pub fn recorded_spec_path(dir: &Path) -> Result<PathBuf> {
    spec_path_of(dir, &record::read_run(dir)?)
}

/// Where `run` (the record of the run directory `dir`) says its spec is.
fn spec_path_of(dir: &Path, run: &RunRecord) -> Result<PathBuf> {
    match &run.spec.path_from_run {
        Some(rel) => Ok(dir.join(rel)),
        None => Err(Error::Output {
            path: dir.to_path_buf(),
            message: "the run does not record where its spec is; pass `--spec SPEC`".into(),
        }),
    }
}

/// Refuses inputs whose hashes differ from the ones `run` recorded (paths
/// relative to the spec's folder).
fn check_recorded_inputs(dir: &Path, spec: &Path, run: &RunRecord) -> Result<()> {
    let base = spec.parent().unwrap_or(Path::new(""));
    let mut problems = Vec::new();
    for input in &run.inputs {
        let rel = input.path.as_str();
        let p = base.join(rel);
        match hash::file(&p) {
            Ok(d) if d.blake3 == input.digest.blake3 => {}
            Ok(d) => problems.push(format!(
                "input `{rel}` has blake3 {} but the run recorded {}",
                d.blake3, input.digest.blake3
            )),
            Err(e) => problems.push(format!("input `{rel}`: {e}")),
        }
    }
    if !problems.is_empty() {
        problems.push("recomputation refused: the inputs are not the recorded ones".into());
        return Err(Error::Verify {
            dir: dir.to_path_buf(),
            problems,
        });
    }
    Ok(())
}

/// Refits a run's chosen detector from the run's own spec and inputs (for a
/// detector whose fitted state run.json does not hold, k-NN), refusing
/// changed inputs and a refit whose parameters differ from `recorded`.
pub fn refit_chosen(dir: &Path, recorded: &detect::Params) -> Result<Box<dyn Model>> {
    let (plan, data, splits, kind, set) = rebuild_chosen(dir)?;
    let detector = detect::name(kind);
    let fitted = features::fit(&plan.feature_sets[set], &data, &splits.train)?;
    let train = fitted.apply(&data, &splits.train)?;
    let model = detect::build(kind).fit(train.view(), &fitted.names())?;
    if &model.params() != recorded {
        return Err(Error::Verify {
            dir: dir.to_path_buf(),
            problems: vec![format!(
                "refitting `{detector}` from the run's spec and inputs gave other parameters than run.json records"
            )],
        });
    }
    Ok(model)
}

/// What `score` needs to run a run's chosen external command again: the
/// command and the training rows' features, rebuilt from the run's spec and
/// inputs (refused if they, or a file of the command's `inputs`, changed).
pub fn chosen_command(
    dir: &Path,
    recorded: &detect::Params,
) -> Result<(spec::CommandPlan, ndarray::Array2<f64>)> {
    let (plan, data, splits, kind, set) = rebuild_chosen(dir)?;
    let (DetectorKind::Command(i), detect::Params::Command { inputs, .. }) = (kind, recorded)
    else {
        return Err(Error::internal("the chosen candidate is not a command"));
    };
    let command = plan.commands[i].clone();
    if &detect::command::hash_inputs(&command)? != inputs {
        return Err(Error::Verify {
            dir: dir.to_path_buf(),
            problems: vec![format!(
                "a file of the command `{}`'s `inputs` differs from the one the run recorded",
                command.name
            )],
        });
    }
    let fitted = features::fit(&plan.feature_sets[set], &data, &splits.train)?;
    let train = fitted.apply(&data, &splits.train)?;
    Ok((command, train))
}

/// The run's spec, data and splits rebuilt from its recorded spec and
/// inputs (refused if they changed), with the chosen candidate's detector
/// and feature set.
fn rebuild_chosen(dir: &Path) -> Result<(Plan, Dataset, split::Splits, DetectorKind, usize)> {
    let spec = recorded_spec_path(dir)?;
    let read = |p: &Path| std::fs::read(p).map_err(|e| Error::io(p, "reading", e));
    if read(&spec)? != read(&dir.join(SPEC_COPY))? {
        return Err(Error::Verify {
            dir: dir.to_path_buf(),
            problems: vec![format!(
                "the chosen detector keeps its training rows, which are refitted from the run's spec; `{}` differs from the recorded `{SPEC_COPY}`",
                spec.display()
            )],
        });
    }
    let run = record::read_run(dir)?;
    check_recorded_inputs(dir, &spec, &run)?;
    let plan = spec::load(&spec)?;
    let data = data::load(&plan)?;
    let hashes = hash::rows(&data.x, &data.is_anomaly);
    let splits = split::assign(&plan.split, &data, &hashes)?;
    let chosen = run.chosen(&dir.join(record::RUN_JSON))?;
    let set_name = chosen.feature_set.as_str();
    let detector = chosen.detector.as_str();
    let set = plan
        .feature_sets
        .iter()
        .position(|s| s.name == set_name)
        .ok_or_else(|| Error::internal(format!("feature set `{set_name}` is not in the spec")))?;
    let command = match &chosen.params {
        detect::Params::Command { name, .. } => name.as_str(),
        _ => "",
    };
    let kind = *plan
        .detectors
        .iter()
        .find(|k| match k {
            DetectorKind::Command(i) => detector == "command" && plan.commands[*i].name == command,
            _ => detect::name(**k) == detector,
        })
        .ok_or_else(|| Error::internal(format!("detector `{detector}` is not in the spec")))?;
    Ok((plan, data, splits, kind, set))
}

/// The first place where two texts differ: a JSON path for JSON, else a line.
fn first_difference(name: &str, recorded: &[u8], recomputed: &[u8]) -> String {
    if name.ends_with(".json") {
        if let (Ok(a), Ok(b)) = (
            serde_json::from_slice::<serde_json::Value>(recorded),
            serde_json::from_slice::<serde_json::Value>(recomputed),
        ) {
            fn walk(a: &serde_json::Value, b: &serde_json::Value, at: String) -> Option<String> {
                use serde_json::Value::*;
                match (a, b) {
                    (Object(x), Object(y)) => {
                        for (k, v) in x {
                            match y.get(k) {
                                Some(w) => {
                                    if let Some(p) = walk(v, w, format!("{at}.{k}")) {
                                        return Some(p);
                                    }
                                }
                                None => return Some(format!("{at}.{k} (missing when recomputed)")),
                            }
                        }
                        y.keys()
                            .find(|k| !x.contains_key(*k))
                            .map(|k| format!("{at}.{k} (only when recomputed)"))
                    }
                    (Array(x), Array(y)) if x.len() == y.len() => x
                        .iter()
                        .zip(y)
                        .enumerate()
                        .find_map(|(i, (v, w))| walk(v, w, format!("{at}[{i}]"))),
                    _ if a == b => None,
                    _ => Some(format!("{at}: recorded {a}, recomputed {b}")),
                }
            }
            if let Some(p) = walk(&a, &b, String::new()) {
                return format!("`{name}` field {}", p.trim_start_matches('.'));
            }
        }
    }
    let (a, b) = (
        String::from_utf8_lossy(recorded),
        String::from_utf8_lossy(recomputed),
    );
    let line = a
        .lines()
        .zip(b.lines())
        .position(|(x, y)| x != y)
        .map(|i| i + 1)
        .unwrap_or(a.lines().count().min(b.lines().count()) + 1);
    let mut out = format!("`{name}` first differs at line {line}");
    if name == "scores.csv" {
        out.push_str(&scores_line_difference(&a, &b, line));
    }
    out
}

/// For a differing line of scores.csv: the row, its split and the first
/// candidate whose score differs, with both values.
fn scores_line_difference(recorded: &str, recomputed: &str, line: usize) -> String {
    let (Some(header), Some(x), Some(y)) = (
        recorded.lines().next(),
        recorded.lines().nth(line - 1),
        recomputed.lines().nth(line - 1),
    ) else {
        return String::new();
    };
    // Candidate names and ids are plain here when the line splits into as
    // many fields as the header; otherwise the line alone is reported.
    let names: Vec<&str> = header.split(',').collect();
    let (fx, fy): (Vec<&str>, Vec<&str>) = (x.split(',').collect(), y.split(',').collect());
    if fx.len() != names.len() || fy.len() != names.len() || fx[..2] != fy[..2] {
        return String::new();
    }
    match (3..names.len()).find(|&j| fx[j] != fy[j]) {
        Some(j) => format!(
            " (row `{}` of {}: candidate `{}` recorded {}, recomputed {})",
            fx[0], fx[1], names[j], fx[j], fy[j]
        ),
        None => String::new(),
    }
}

/// Verifies a run directory, then recomputes it from `spec` and the data it
/// names (refusing if the spec or an input's hash differs from the record)
/// and confirms that every file matches, reporting the first difference.
pub fn verify_by_recomputation(
    dir: &Path,
    pubkey: &Path,
    spec: Option<&Path>,
) -> Result<crate::sign::Manifest> {
    let manifest = verify(dir, pubkey)?;
    let fail = |problems: Vec<String>| Error::Verify {
        dir: dir.to_path_buf(),
        problems,
    };
    let read = |p: PathBuf| std::fs::read(&p).map_err(|e| Error::io(p, "reading", e));
    // A signed run whose record does not read fails verification (exit 1).
    let run_path = dir.join(record::RUN_JSON);
    let run = record::parse_run(&run_path, &read(run_path.clone())?).map_err(|e| match e {
        Error::Output { message, .. } => fail(vec![format!("`run.json` is unreadable: {message}")]),
        e => e,
    })?;
    let spec_buf = match spec {
        Some(s) => s.to_path_buf(),
        None => spec_path_of(dir, &run)?,
    };
    let spec = spec_buf.as_path();
    let recorded_spec = read(dir.join(SPEC_COPY))?;
    if read(spec.to_path_buf())? != recorded_spec {
        return Err(fail(vec![format!(
            "the spec `{}` differs from the recorded `{SPEC_COPY}`; recomputation needs the spec the run used",
            spec.display()
        )]));
    }
    check_recorded_inputs(dir, spec, &run)?;
    let replay = Replay {
        wall_clock: run.wall_clock.clone(),
        openings: run.test_openings.clone(),
        key_fingerprint: manifest.key_fingerprint.clone(),
        path_from_run: run.spec.path_from_run.clone(),
        provenance: run.provenance.clone(),
    };
    let opts = RunOptions {
        spec: spec.to_path_buf(),
        key: PathBuf::new(),
        out: None,
        templates: None,
        no_wall_clock: run.wall_clock.is_none(),
        open_test: run.test_opened,
        progress: crate::progress::Progress::hidden(),
    };
    let files = recompute(&opts, &replay)?;
    // The scores first: a differing score (a program that is not
    // deterministic) is named by its row rather than by what it changed.
    let scores_first = manifest
        .files
        .keys()
        .filter(|n| *n == "scores.csv")
        .chain(manifest.files.keys().filter(|n| *n != "scores.csv"));
    for name in scores_first {
        let recorded = read(dir.join(name))?;
        match files.get(name) {
            Some(b) if *b == *recorded.as_slice() => {}
            Some(b) => {
                let mut p = first_difference(name, &recorded, &b);
                if name.starts_with("card.") {
                    p.push_str(
                        " (a card made with `--templates` cannot be recomputed without them)",
                    );
                }
                return Err(fail(vec![p]));
            }
            None => {
                return Err(fail(vec![format!(
                    "`{name}` is not produced when recomputed"
                )]))
            }
        }
    }
    if let Some(extra) = files
        .names()
        .into_iter()
        .find(|n| !manifest.files.contains_key(n))
    {
        return Err(fail(vec![format!(
            "recomputation produces `{extra}`, which the run lacks"
        )]));
    }
    Ok(manifest)
}
