//! Runs the stages in order: spec → data → content hashes → splits (with the
//! leakage proof) → fit on train → thresholds on validation → selection →
//! the test split, opened once → record, scores, card → signed directory.
//!
//! This is the only code that opens the test split, and it does so once, after
//! every choice has been fixed on validation.

use std::path::{Path, PathBuf};
use std::time::{Instant, SystemTime};

use ndarray::Array2;

use crate::audit::hash::{self, ContentHash};
use crate::card::{self, CardContext, MetricRow, SplitRow, ThresholdRow};
use crate::data::{self, Dataset, RowId};
use crate::detect::{self, Model};
use crate::error::{Error, Result};
use crate::metrics::{cmp_fraction, Confusion, Metrics};
use crate::output::{self, RunFiles};
use crate::record::{
    self, fmt_f64, CandidateRecord, InputRecord, LabelRecord, RunRecord, SelectionRecord,
    SpecRecord, SplitRecord, WallClock,
};
use crate::spec::{self, DetectorKind, Plan, SplitPlan, ThresholdPolicy};
use crate::split::{self, Part};
use crate::threshold::{self, Choice};

/// The selection rule, in words (also in run.json and the card).
pub const SELECTION_RULE: &str = "the candidate with the highest validation F1 (compared as exact \
fractions); ties go to the candidate with fewer free parameters, then to the one listed first in \
the spec";

/// What `anomark run` needs.
#[derive(Debug, Clone)]
pub struct RunOptions {
    /// The spec file.
    pub spec: PathBuf,
    /// The private key.
    pub key: PathBuf,
    /// The output directory (else the spec's `output`).
    pub out: Option<PathBuf>,
    /// A directory of templates that replace built-in ones.
    pub templates: Option<PathBuf>,
    /// Leave the wall-clock field null, making the directory byte-identical across runs.
    pub no_wall_clock: bool,
}

/// What a run produced.
#[derive(Debug, Clone)]
pub struct RunSummary {
    /// Where the run directory is.
    pub out: PathBuf,
    /// The chosen candidate.
    pub chosen: String,
    /// Validation F1 of the chosen candidate.
    pub validation_f1: Option<f64>,
    /// Test F1 of the chosen candidate.
    pub test_f1: Option<f64>,
}

struct Candidate {
    kind: DetectorKind,
    model: Box<dyn Model>,
    choice: Choice,
    validation_scores: Vec<f64>,
}

fn matrix(data: &Dataset, rows: &[RowId]) -> Array2<f64> {
    let d = data.x.ncols();
    let mut m = Array2::zeros((rows.len(), d));
    for (k, r) in rows.iter().enumerate() {
        m.row_mut(k).assign(&data.x.row(r.0 as usize));
    }
    m
}

fn checked_scores(
    kind: DetectorKind,
    model: &dyn Model,
    x: &Array2<f64>,
    rows: &[RowId],
) -> Result<Vec<f64>> {
    let s = model.score(x.view());
    if let Some(k) = s.iter().position(|v| v.is_nan()) {
        return Err(Error::Fit {
            detector: detect::name(kind).into(),
            message: format!("the score of line {} is not a number", rows[k].line()),
            features: vec![],
        });
    }
    Ok(s)
}

fn policy_name(p: ThresholdPolicy) -> &'static str {
    match p {
        ThresholdPolicy::MaxF1 => {
            "max-f1 (the threshold with the highest validation F1; among equal F1 the highest τ)"
        }
    }
}

fn fmt_rate(v: Option<f64>) -> String {
    v.map_or("n/a".into(), |v| format!("{v:.4}"))
}

fn metric_row(name: &str, chosen: bool, m: &Metrics) -> MetricRow {
    let with_ci = |v: Option<f64>, ci: Option<crate::metrics::Interval>| match (v, ci) {
        (Some(v), Some(ci)) => format!("{v:.4} ({:.4}–{:.4})", ci.low, ci.high),
        _ => "n/a".into(),
    };
    MetricRow {
        candidate: name.into(),
        chosen,
        tp: m.confusion.tp,
        fp: m.confusion.fp,
        fn_: m.confusion.fn_,
        tn: m.confusion.tn,
        precision: with_ci(m.precision, m.precision_95),
        recall: with_ci(m.recall, m.recall_95),
        f1: fmt_rate(m.f1),
        accuracy: fmt_rate(m.accuracy),
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

/// Runs the whole protocol and writes the signed run directory.
pub fn run(opts: &RunOptions) -> Result<RunSummary> {
    let started = SystemTime::now();
    let clock = Instant::now();
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
    let key = crate::sign::load_private(&opts.key)?;

    let data = data::load(&plan)?;
    let data_digest = hash::file(&plan.data_path)?;
    let hashes = hash::rows(&data.x, &data.is_anomaly);
    let splits = split::assign(&plan.split, &data, &hashes)?;

    // Fit and choose on train and validation only.
    let features = plan.feature_names();
    let train = matrix(&data, &splits.train);
    let val_x = matrix(&data, &splits.validation);
    let val_y: Vec<bool> = splits
        .validation
        .iter()
        .map(|r| data.is_anomaly[r.0 as usize])
        .collect();
    let mut candidates = Vec::new();
    for &kind in &plan.detectors {
        let model = detect::build(kind).fit(train.view(), &features)?;
        let validation_scores = checked_scores(kind, model.as_ref(), &val_x, &splits.validation)?;
        let choice = threshold::choose(plan.threshold, &validation_scores, &val_y);
        candidates.push(Candidate {
            kind,
            model,
            choice,
            validation_scores,
        });
    }
    let d = features.len();
    let chosen = select(&candidates, d);

    // Every choice is fixed: open the test split, once.
    let test_rows = splits.test.open();
    let test_x = matrix(&data, &test_rows);
    let test_y: Vec<bool> = test_rows
        .iter()
        .map(|r| data.is_anomaly[r.0 as usize])
        .collect();
    let mut test_scores = Vec::new();
    for c in &candidates {
        test_scores.push(checked_scores(
            c.kind,
            c.model.as_ref(),
            &test_x,
            &test_rows,
        )?);
    }

    let manifests = [
        (Part::Train, &splits.train),
        (Part::Validation, &splits.validation),
        (Part::Test, &test_rows),
    ]
    .map(|(p, rows)| {
        let hs: Vec<ContentHash> = rows.iter().map(|r| hashes[r.0 as usize]).collect();
        (p.name().to_string(), hash::manifest(&hs))
    });

    let candidate_records: Vec<CandidateRecord> = candidates
        .iter()
        .zip(&test_scores)
        .enumerate()
        .map(|(i, (c, ts))| CandidateRecord {
            name: detect::name(c.kind).into(),
            parameter_count: detect::parameter_count(c.kind, d),
            params: c.model.params(),
            tau: c.choice.tau,
            ln_epsilon: c.choice.ln_epsilon(),
            validation: Metrics::of(c.choice.confusion),
            test: Metrics::of(Confusion::at(ts, &test_y, c.choice.tau)),
            chosen: i == chosen,
        })
        .collect();

    let spec_file = opts
        .spec
        .file_name()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let wall_clock = (!opts.no_wall_clock).then(|| WallClock {
        started_utc: record::rfc3339(
            started
                .duration_since(SystemTime::UNIX_EPOCH)
                .map(|d| d.as_secs())
                .unwrap_or(0),
        ),
        seconds: (clock.elapsed().as_millis() as f64) / 1000.0,
    });
    let rec = RunRecord {
        format: record::FORMAT,
        tool: record::tool(),
        spec: SpecRecord {
            file: spec_file.clone(),
            blake3: hash::bytes(&plan.spec_bytes),
        },
        inputs: vec![InputRecord {
            path: plan.data_path_as_written.clone(),
            rows: data.len(),
            digest: data_digest.clone(),
        }],
        label: LabelRecord {
            column: plan.label.name.clone(),
            normal: plan.normal_value.clone(),
            anomaly: plan.anomaly_value.clone(),
        },
        features: features.clone(),
        split: SplitRecord {
            report: splits.report.clone(),
            requested: splits.report.requested.map(by_name),
            counts: by_name(splits.report.counts),
            manifest_blake3: manifests.iter().cloned().collect(),
        },
        threshold_policy: "max-f1".into(),
        selection: SelectionRecord {
            rule: SELECTION_RULE.into(),
            chosen: detect::name(candidates[chosen].kind).into(),
        },
        candidates: candidate_records,
        wall_clock,
    };

    let mut files = RunFiles::default();
    let mut run_json = serde_json::to_vec_pretty(&rec)
        .map_err(|e| Error::internal(format!("serialising run.json: {e}")))?;
    run_json.push(b'\n');
    files.add("run.json", run_json);
    files.add(
        "scores.csv",
        scores_csv(
            &data,
            &candidates,
            &splits.validation,
            &test_rows,
            &test_scores,
        ),
    );
    let ctx = card_context(
        &plan,
        &rec,
        &spec_file,
        &key,
        &data_digest.blake3,
        data.len(),
    );
    let (md, html) = card::render(&ctx, opts.templates.as_deref())?;
    files.add("card.md", md.into_bytes());
    files.add("card.html", html.into_bytes());
    let out = files.commit(&out, &key)?;

    let c = &rec.candidates[chosen];
    Ok(RunSummary {
        out,
        chosen: c.name.clone(),
        validation_f1: c.validation.f1,
        test_f1: c.test.f1,
    })
}

fn by_name(counts: [split::Counts; 3]) -> std::collections::BTreeMap<String, split::Counts> {
    Part::ALL
        .iter()
        .map(|p| (p.name().to_string(), counts[*p as usize]))
        .collect()
}

/// The selection rule (see [`SELECTION_RULE`]).
fn select(candidates: &[Candidate], d: usize) -> usize {
    let mut best = 0;
    for (i, c) in candidates.iter().enumerate().skip(1) {
        let b = &candidates[best];
        let order = cmp_fraction(
            c.choice.confusion.f1_fraction(),
            b.choice.confusion.f1_fraction(),
        )
        .then_with(|| detect::parameter_count(b.kind, d).cmp(&detect::parameter_count(c.kind, d)));
        if order.is_gt() {
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
) -> Vec<u8> {
    let mut out = String::from(if data.ids.is_some() { "id" } else { "row" });
    out.push_str(",split,label");
    for c in candidates {
        out.push(',');
        out.push_str(detect::name(c.kind));
    }
    out.push('\n');
    let mut lines: Vec<(Part, RowId, Vec<f64>)> = Vec::new();
    for (k, r) in validation.iter().enumerate() {
        lines.push((
            Part::Validation,
            *r,
            candidates.iter().map(|c| c.validation_scores[k]).collect(),
        ));
    }
    for (k, r) in test.iter().enumerate() {
        lines.push((Part::Test, *r, test_scores.iter().map(|s| s[k]).collect()));
    }
    lines.sort_by_key(|(p, r, _)| (*p, *r));
    for (p, r, scores) in lines {
        let i = r.0 as usize;
        match &data.ids {
            Some(ids) => out.push_str(&csv_field(&ids[i])),
            None => out.push_str(&r.0.to_string()),
        }
        out.push(',');
        out.push_str(p.name());
        out.push(',');
        out.push(if data.is_anomaly[i] { '1' } else { '0' });
        for s in scores {
            out.push(',');
            out.push_str(&fmt_f64(s));
        }
        out.push('\n');
    }
    out.into_bytes()
}

fn card_context(
    plan: &Plan,
    rec: &RunRecord,
    spec_file: &str,
    key: &ed25519_dalek::SigningKey,
    data_blake3: &str,
    rows: usize,
) -> CardContext {
    let chosen = rec
        .candidates
        .iter()
        .find(|c| c.chosen)
        .expect("one candidate is chosen");
    let split_method = match &plan.split {
        SplitPlan::Protocol {
            seed,
            normal,
            anomaly,
        } => format!(
            "Rows were split by the seeded protocol split (seed {}): normal rows {}/{}/{} to \
             train/validation/test, known anomalies {}/{} to validation/test and none to train; \
             identical rows always share a split.",
            seed.0,
            fmt_f64(normal[0]),
            fmt_f64(normal[1]),
            fmt_f64(normal[2]),
            fmt_f64(anomaly[0]),
            fmt_f64(anomaly[1])
        ),
        SplitPlan::FromColumn(c) => format!(
            "Rows were split by the column “{}”; no row content appears in two splits.",
            c.name
        ),
    };
    CardContext {
        title: plan.card.title.clone(),
        owner: plan.card.owner.clone(),
        intended_use: plan.card.intended_use.clone(),
        out_of_scope_uses: plan.card.out_of_scope_uses.clone(),
        safety_caution: plan.card.safety_caution.clone(),
        tool: rec.tool.clone(),
        spec_file: spec_file.into(),
        spec_blake3: rec.spec.blake3.clone(),
        key_fingerprint: crate::sign::fingerprint(&key.verifying_key()),
        data_path: plan.data_path_as_written.clone(),
        data_blake3: data_blake3.into(),
        data_rows: rows,
        label: format!(
            "Labels come from the column “{}”: “{}” is normal, “{}” is a known anomaly.",
            plan.label.name, plan.normal_value, plan.anomaly_value
        ),
        features: rec.features.clone(),
        split_method,
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
        moved_rows: rec.split.report.rows_moved_with_identical_rows,
        threshold_policy: policy_name(plan.threshold).into(),
        selection_rule: format!("{SELECTION_RULE}."),
        chosen: chosen.name.clone(),
        thresholds: rec
            .candidates
            .iter()
            .map(|c| ThresholdRow {
                candidate: c.name.clone(),
                chosen: c.chosen,
                parameters: c.parameter_count,
                tau: format!("{:.6}", c.tau),
                ln_epsilon: format!("{:.6}", c.ln_epsilon),
            })
            .collect(),
        validation: rec
            .candidates
            .iter()
            .map(|c| metric_row(&c.name, c.chosen, &c.validation))
            .collect(),
        test_chosen: metric_row(&chosen.name, true, &chosen.test),
        test_others: rec
            .candidates
            .iter()
            .filter(|c| !c.chosen)
            .map(|c| metric_row(&c.name, false, &c.test))
            .collect(),
        test_anomalies: rec.split.report.counts[Part::Test as usize].anomaly,
        wall_clock: rec.wall_clock.as_ref().map(|w| {
            format!(
                "Run started {} and took {} s. This line is the only part of the card that \
                 differs between two runs of the same spec on the same data.",
                w.started_utc,
                fmt_f64(w.seconds)
            )
        }),
    }
}

/// Checks the signature and every file hash of a run directory.
pub fn verify(dir: &Path, pubkey: &Path) -> Result<crate::sign::Manifest> {
    let key = crate::sign::load_public(pubkey)?;
    crate::sign::verify_dir(dir, &key)
}
