//! The last stage: the report. The run record (run.json) with every
//! candidate's validation and test metrics, scores.csv, the figures and the
//! card, gathered as the run directory's files, and the summary printed by
//! `anomark run`.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use super::held::Held;
use super::ingest::{self, Rows};
use super::open::Opened;
use super::{choose, fit, wording};
use crate::audit::leak::Part;
use crate::card::{self, plots};
use crate::data::{self, Dataset, RowId};
use crate::detect::{self, command::csv_field};
use crate::error::{Error, Result};
use crate::features;
use crate::metrics::Metrics;
use crate::output::RunFiles;
use crate::record::{
    self, CandidateRecord, InputRecord, LabelRecord, RunRecord, SelectionRecord, SpecRecord,
    SplitRecord, WallClock,
};
use crate::spec::Plan;
use crate::split;

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

/// The run directory's copy of the spec's exact bytes.
pub const SPEC_COPY: &str = "spec.yaml";

/// What the record takes from outside the computation.
pub(crate) struct Header {
    /// The spec file's name.
    pub spec_file: String,
    /// The spec's path from the run directory.
    pub path_from_run: Option<String>,
    /// The spec's repository state.
    pub provenance: Option<crate::audit::provenance::Provenance>,
    /// The wall-clock field.
    pub wall_clock: Option<WallClock>,
    /// The engine field (`None` for a run in this process).
    pub engine: Option<String>,
    /// Each split's manifest hash by name.
    pub manifests: BTreeMap<String, String>,
    /// The test split's counts.
    pub test_counts: split::Counts,
    /// The scores digest, made with the artifacts ([`Artifacts::scores_digest`]).
    pub scores_digest: String,
}

/// The run record: every candidate's results (test metrics computed here,
/// candidates side by side) and what the run read and decided.
pub(crate) fn record(
    plan: &Plan,
    rows: &Rows,
    opened: &Opened,
    header: Header,
) -> Result<RunRecord> {
    let chosen = &opened.chosen;
    let fitted = &chosen.fitted;
    let candidates = &fitted.candidates;
    let data = &rows.data;
    // The intervals started beside the run, waited for here (outside
    // rayon's pool).
    let waiting = crate::progress::part("waiting for the intervals");
    let validation: Vec<Metrics> = candidates
        .iter()
        .map(|c| fit::with_intervals(&c.validation, &c.validation_intervals, c.choice.tau))
        .collect::<Result<_>>()?;
    let test: Vec<Option<Metrics>> = candidates
        .iter()
        .enumerate()
        .map(|(i, c)| {
            opened
                .test
                .as_ref()
                .map(|t| fit::with_intervals(&t.metrics[i], &t.intervals[i], c.choice.tau))
                .transpose()
        })
        .collect::<Result<_>>()?;
    drop(waiting);
    let candidate_records: Vec<CandidateRecord> = {
        use rayon::prelude::*;
        candidates
            .par_iter()
            .zip(validation.into_par_iter().zip(test))
            .enumerate()
            .map(|(i, (c, (validation, test)))| -> Result<CandidateRecord> {
                Ok(CandidateRecord {
                    name: c.name.clone(),
                    feature_set: fitted.sets[c.set].set.clone(),
                    detector: detect::name(c.kind).into(),
                    parameter_count: Some(c.model.parameter_count())
                        .filter(|&n| n != detect::UNKNOWN_PARAMETERS),
                    params: c.model.params(),
                    tau: c.choice.tau,
                    ln_epsilon: c.choice.ln_epsilon(),
                    threshold_met: c.choice.met,
                    threshold_note: c.choice.note.clone(),
                    validation,
                    test,
                    chosen: i == chosen.index,
                })
            })
            .collect::<Result<_>>()?
    };
    let val_y = &fitted.validation_labels;
    let best = chosen.candidate();
    let splits = &rows.report;
    let calibration = {
        let _t = crate::progress::part("calibration");
        record::CalibrationRecord::of(
            &best.name,
            &match &rows.held {
                Held::Rows => {
                    crate::conformal::Calibration::of_normals(&best.validation_scores, val_y)
                }
                Held::Engine(e) => e.calibration(
                    Part::Validation,
                    best.set,
                    best.model.as_ref(),
                    splits.counts[Part::Validation as usize].normal,
                )?,
            },
        )
    };
    Ok(RunRecord {
        format: record::FORMAT,
        tool: record::tool(),
        spec: SpecRecord {
            file: header.spec_file,
            blake3: crate::audit::hash::bytes(&plan.spec_bytes),
            path_from_run: header.path_from_run,
        },
        provenance: header.provenance,
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
        feature_sets: fitted.sets.clone(),
        split: SplitRecord {
            report: splits.clone(),
            requested: splits.requested.map(by_name),
            counts: by_name(splits.counts),
            manifest_blake3: header.manifests,
        },
        test_opened: opened.test.is_some(),
        test_counts: header.test_counts,
        test_openings: opened.test.as_ref().map(|t| t.openings.clone()),
        threshold_policy: plan.threshold,
        bootstrap: plan.bootstrap,
        selection: SelectionRecord {
            metric: plan.selection,
            rule: choose::selection_rule(plan.selection),
            chosen: best.name.clone(),
        },
        candidates: candidate_records,
        calibration: Some(calibration),
        drift_reference: Some({
            let _t = crate::progress::part("drift reference");
            let (shown, sampled, stride) = rows.train_sample(ingest::DRIFT);
            drift_reference(
                &fitted.sets[best.set],
                shown,
                &sampled,
                (rows.train_rows(), stride),
                best.validation.false_positive_rate,
            )?
        }),
        scores_digest: Some(header.scores_digest),
        engine: header.engine,
        wall_clock: header.wall_clock,
    })
}

/// The scores digest of the scored rows (validation, and test once opened):
/// from the scores in memory (scores.csv's rows), or computed on the engine
/// that holds the rows.
fn scores_digest(rows: &Rows, opened: &Opened) -> Result<String> {
    let _t = crate::progress::part("scores digest");
    let candidates = &opened.chosen.fitted.candidates;
    let test = opened.test.as_ref();
    if let Held::Engine(e) = &rows.held {
        let models: Vec<(usize, &dyn detect::Model)> = candidates
            .iter()
            .map(|c| (c.set, c.model.as_ref()))
            .collect();
        return e.scores_digest(&models, test.is_some());
    }
    let data = &rows.data;
    let k = candidates.len();
    let hashed = |part: Part, list: &[RowId], score: &(dyn Fn(usize, usize) -> f64 + Sync)| {
        crate::audit::hash::score_rows(
            list.len(),
            k,
            |i| {
                let r = list[i].0 as usize;
                let o = data.origin[r];
                crate::audit::hash::Scored {
                    split: part as u8,
                    file: o.file,
                    row: o.row,
                    anomaly: data.is_anomaly[r],
                }
            },
            score,
        )
    };
    let mut all = hashed(Part::Validation, &rows.validation, &|k, ci| {
        candidates[ci].validation_scores[k]
    });
    if let Some(t) = test {
        all.extend(hashed(Part::Test, &t.rows, &|k, ci| t.scores[ci][k]));
    }
    Ok(crate::audit::hash::scores_digest(&all))
}

/// The run directory's files that need no record: scores.csv and the
/// figures, made while the bootstrap intervals are still being computed;
/// and the record's scores digest, made beside them.
pub(crate) struct Artifacts {
    /// The scores digest of the scored rows (for the record).
    pub scores_digest: String,
    /// The scored rows: scores.csv, or the Parquet parts an engine wrote.
    scores: ScoresOut,
    /// The validation figures.
    validation: Vec<plots::Plot>,
    /// The test figures (none while the test split stays sealed).
    test: Vec<plots::Plot>,
    /// The feature figures.
    features: Vec<plots::Plot>,
}

/// The scored rows as the run directory holds them.
enum ScoresOut {
    /// scores.csv, in parts (the rows in this process).
    Csv(Vec<Vec<u8>>),
    /// Parquet parts an engine wrote into the staging folder (their names).
    Parts(crate::output::Staging, Vec<String>),
}

/// The run directory's folder of the scores' Parquet parts on an engine.
pub const SCORES_PARTS: &str = "scores";

/// scores.csv (or, on an engine, the scores' Parquet parts written into
/// `staging`) and the figures.
pub(crate) fn artifacts(
    plan: &Plan,
    rows: &Rows,
    opened: &Opened,
    staging: Option<crate::output::Staging>,
) -> Result<Artifacts> {
    let data = &rows.data;
    let fitted = &opened.chosen.fitted;
    let candidates = &fitted.candidates;
    let chosen = opened.chosen.index;
    let val_y = &fitted.validation_labels;
    let c = &candidates[chosen];
    let set = &fitted.sets[c.set];
    let params = c.model.params();
    let test = opened.test.as_ref();
    // scores.csv, the score figures and the feature figures are independent:
    // made side by side on all cores, each with the same bytes as alone.
    let score_figures = || -> Result<(Vec<plots::Plot>, Vec<plots::Plot>)> {
        let _t = crate::progress::part("score figures");
        let tau = c.choice.tau;
        // What the figures read of each split's scores: from the scores, or
        // asked of the engine that holds the rows (both splits at once).
        let mut splits: Vec<(Part, &[f64], &[bool], &crate::summary::Summary)> = vec![(
            Part::Validation,
            &c.validation_scores,
            val_y,
            &c.validation_summary,
        )];
        if let Some(test) = test {
            splits.push((
                Part::Test,
                &test.scores[chosen],
                &test.labels,
                &test.summaries[chosen],
            ));
        }
        let mut facts = match &rows.held {
            Held::Rows => splits
                .iter()
                .map(|&(_, scores, labels, _)| plots::ScoreFacts::of(scores, labels, tau))
                .collect(),
            Held::Engine(e) => {
                let asked: Vec<(Part, &crate::summary::Summary)> =
                    splits.iter().map(|&(p, _, _, s)| (p, s)).collect();
                e.facts(&asked, c.set, c.model.as_ref(), tau)?
            }
        }
        .into_iter();
        let val_cuts = crate::summary::curve(&c.validation_summary);
        let val_facts = facts
            .next()
            .ok_or_else(|| Error::internal("no validation figures' facts"))?;
        let val = plots::SplitFigures {
            split: Part::Validation.name(),
            facts: &val_facts,
            tau,
            cuts: &val_cuts,
        };
        let validation = vec![
            plots::precision_recall(val)?,
            plots::roc(val)?,
            plots::objective(plan.threshold, val)?,
            plots::score_histogram(val)?,
        ];
        let mut figures = vec![];
        if let Some(test) = test {
            let test_cuts = crate::summary::curve(&test.summaries[chosen]);
            let test_facts = facts
                .next()
                .ok_or_else(|| Error::internal("no test figures' facts"))?;
            let t = plots::SplitFigures {
                split: Part::Test.name(),
                facts: &test_facts,
                tau,
                cuts: &test_cuts,
            };
            figures = vec![
                plots::precision_recall(t)?,
                plots::roc(t)?,
                plots::score_histogram(t)?,
            ];
        }
        Ok((validation, figures))
    };
    let feature_figures = || -> Result<Vec<plots::Plot>> {
        let _t = crate::progress::part("feature figures");
        // A histogram needs no more than a systematic sample: every k-th row in
        // canonical (content-hash) order, so the figure does not depend on the
        // file's row order (nor on how the rows were read) and a large run
        // does not copy all its rows again.
        let (shown, sampled, stride) = rows.train_sample(ingest::FIGURES);
        let shown_as = if stride > 1 {
            format!(
                "training rows, one in every {stride} of {} in content-hash order ({} rows)",
                rows.train_rows(),
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
    let no_test: Vec<Vec<f64>> = vec![vec![]; candidates.len()];
    let scores = move || -> Result<ScoresOut> {
        let _t = crate::progress::part("scores.csv");
        match &rows.held {
            Held::Rows => Ok(ScoresOut::Csv(scores_csv(
                data,
                candidates,
                &rows.validation,
                test.map_or(&[][..], |t| &t.rows),
                test.map_or(&no_test, |t| &t.scores),
            ))),
            Held::Engine(e) => {
                let staging = staging
                    .ok_or_else(|| Error::internal("an engine run without a staging folder"))?;
                let models: Vec<(usize, &dyn detect::Model)> = candidates
                    .iter()
                    .map(|c| (c.set, c.model.as_ref()))
                    .collect();
                let names: Vec<String> = candidates.iter().map(|c| c.name.clone()).collect();
                let parts = e.write_scores(staging.path(), &models, &names, test.is_some())?;
                Ok(ScoresOut::Parts(staging, parts))
            }
        }
    };
    let digest = || scores_digest(rows, opened);
    let (scores, (by_score, (by_feature, digest))) = if rows.held.on_engine() {
        // Asked of the engine from this thread (`Held::on_engine`).
        (scores(), (score_figures(), (feature_figures(), digest())))
    } else {
        rayon::join(scores, || {
            rayon::join(score_figures, || rayon::join(feature_figures, digest))
        })
    };
    let (validation, test) = by_score?;
    Ok(Artifacts {
        scores_digest: digest?,
        scores: scores?,
        validation,
        test,
        features: by_feature?,
    })
}

/// The run directory's files: run.json, the spec's copy, scores.csv, the
/// figures and the card.
pub(crate) fn files(
    plan: &Plan,
    rec: &RunRecord,
    artifacts: Artifacts,
    templates: Option<&Path>,
    fingerprint: &str,
) -> Result<RunFiles> {
    let mut files = RunFiles::default();
    let mut run_json = serde_json::to_vec_pretty(rec)
        .map_err(|e| Error::internal(format!("serialising run.json: {e}")))?;
    run_json.push(b'\n');
    files.add("run.json", run_json);
    files.add(SPEC_COPY, plan.spec_bytes.clone());
    let mut ctx = wording::card_context(plan, rec, &rec.spec.file, fingerprint)?;
    match artifacts.scores {
        ScoresOut::Csv(scores) => files.add_parts("scores.csv", scores),
        ScoresOut::Parts(staging, parts) => {
            for p in parts {
                files.add_moved(&format!("{SCORES_PARTS}/{p}"), staging.path().join(&p));
            }
            files.keep_staging(staging);
        }
    }
    ctx.plots_validation = artifacts.validation;
    ctx.plots_test = artifacts.test;
    ctx.plots_features = artifacts.features;
    for p in ctx
        .plots_validation
        .iter()
        .chain(&ctx.plots_test)
        .chain(&ctx.plots_features)
    {
        files.add(&p.file, p.svg.clone().into_bytes());
    }
    let _t = crate::progress::part("rendering the card");
    let (md, html) = card::render(&ctx, templates)?;
    files.add("card.md", md.into_bytes());
    files.add("card.html", html.into_bytes());
    Ok(files)
}

/// What `anomark run` prints.
pub(crate) fn summary(rec: &RunRecord, warnings: Vec<String>) -> Result<RunSummary> {
    let c = rec
        .candidates
        .iter()
        .find(|c| c.chosen)
        .ok_or_else(|| Error::internal("no candidate is chosen"))?;
    Ok(RunSummary {
        out: PathBuf::new(),
        chosen: c.name.clone(),
        validation_f1: c.validation.f1,
        test_f1: c.test.as_ref().and_then(|t| t.f1),
        tau: c.tau,
        test_opened: rec.test_opened,
        peak_rss_mib: None,
        warnings,
    })
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

fn by_name(counts: [split::Counts; 3]) -> std::collections::BTreeMap<String, split::Counts> {
    Part::ALL
        .iter()
        .map(|p| (p.name().to_string(), counts[*p as usize]))
        .collect()
}

fn scores_csv(
    data: &Dataset,
    candidates: &[fit::Candidate],
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
