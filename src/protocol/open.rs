//! The fifth stage: the test opening. Every choice is fixed before it runs.
//! Only a final run (`--open-test`) opens the test split, once: the opening
//! goes on the ledger before any test score is computed, then every
//! candidate is scored on test (an external command is run a second time,
//! with validation and test rows shuffled together) and summarised with its
//! τ as a cut point. This is the only code that opens the test split.

use std::time::SystemTime;

use super::choose::Chosen;
use super::held::{Asked, Held};
use super::ingest::Rows;
use super::train::{self, SplitFeatures};
use crate::audit::ledger;
use crate::data::RowId;
use crate::detect;
use crate::error::Result;
use crate::metrics::{Metrics, PendingIntervals};
use crate::part::Part;
use crate::record::{self, TestOpenings};
use crate::spec::{DetectorKind, Plan};
use crate::split::SealedTest;
use crate::summary::Summary;

/// How the ledger is treated at the opening.
pub(crate) enum Ledger<'a> {
    /// A run: the opening is appended to the plan's ledger.
    Append,
    /// A recomputation: the ledger is neither opened nor added to; the
    /// recorded summary of openings stands.
    Replay(Option<&'a TestOpenings>),
}

/// The test split's scores, when it was opened.
pub(crate) struct Test {
    /// The test rows, in canonical order.
    pub rows: Vec<RowId>,
    /// Their labels.
    pub labels: Vec<bool>,
    /// Per candidate, its test scores in the rows' order (none when the
    /// rows are on an engine).
    pub scores: Vec<Vec<f64>>,
    /// Per candidate, its test summary with its τ as a cut point.
    pub summaries: Vec<Summary>,
    /// Per candidate, its test metrics at τ, the bootstrap intervals apart.
    pub metrics: Vec<Metrics>,
    /// Per candidate, its test metrics' bootstrap intervals, running.
    pub intervals: Vec<PendingIntervals>,
    /// The ledger's summary of openings of this test split.
    pub openings: TestOpenings,
}

/// What the opening stage returns.
pub(crate) struct Opened {
    /// The chosen candidate and the others (an external command's model
    /// carries both invocations once the test split was opened).
    pub chosen: Chosen,
    /// The test results, `None` while the test split stays sealed.
    pub test: Option<Test>,
    /// Warnings for stderr (a test split opened under several specs).
    pub warnings: Vec<String>,
}

/// Opens the test split when `open` asks for it, else keeps it sealed.
pub(crate) fn test(
    plan: &Plan,
    rows: &Rows,
    sealed: SealedTest,
    mut chosen: Chosen,
    open: Option<Ledger<'_>>,
) -> Result<Opened> {
    let Some(mode) = open else {
        return Ok(Opened {
            chosen,
            test: None,
            warnings: vec![],
        });
    };
    let test_manifest = sealed.manifest().to_string();
    let spec_blake3 = crate::audit::hash::bytes(&plan.spec_bytes);
    let mut warnings = Vec::new();
    let entries = match mode {
        // A recomputation neither opens the ledger nor adds to it.
        Ledger::Replay(_) => vec![],
        Ledger::Append => ledger::append(
            &plan.ledger,
            &ledger::Entry {
                test_manifest: test_manifest.clone(),
                spec_blake3: spec_blake3.clone(),
                chosen: chosen.candidate().name.clone(),
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
    let same: Vec<&ledger::Entry> = entries
        .iter()
        .filter(|e| sealed.is_recorded_by(&e.test_manifest))
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
    let recorded = match mode {
        Ledger::Replay(r) => r.cloned(),
        Ledger::Append => None,
    };
    let openings = recorded.unwrap_or(TestOpenings {
        ledger: plan
            .ledger
            .file_name()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default(),
        count: same.len(),
        spec_blake3: specs,
    });
    let opened = sealed.open();
    let test_rows = opened.rows();
    let labels = rows.labels(test_rows);
    let fitted = &mut chosen.fitted;
    if let Held::Engine(e) = &rows.held {
        // Each candidate's test summary made where the rows are, with its
        // τ as a cut point, as below from the scores.
        let _t = crate::progress::part("test summaries on the engine");
        let taus: Vec<[f64; 1]> = fitted.candidates.iter().map(|c| [c.choice.tau]).collect();
        let asked: Vec<Asked<'_>> = fitted
            .candidates
            .iter()
            .zip(&taus)
            .map(|(c, tau)| Asked {
                name: &c.name,
                set: c.set,
                model: c.model.as_ref(),
                extra: tau,
            })
            .collect();
        let summaries: Vec<Summary> = e.summaries(Part::Test, &asked)?;
        let scores = vec![Vec::new(); summaries.len()];
        return finish(
            plan, chosen, opened, labels, scores, summaries, openings, warnings,
        );
    }
    let test_x: Vec<SplitFeatures> = fitted
        .sets
        .iter()
        .map(|f| SplitFeatures::of(f, &rows.data, test_rows))
        .collect::<Result<_>>()?;
    let t = crate::progress::part("test scores");
    let mut scores = Vec::new();
    for c in &mut fitted.candidates {
        if let DetectorKind::Command(i) = c.kind {
            // The program's second invocation, with the test rows.
            let set = &fitted.sets[c.set];
            let (model, s) = detect::command::final_scores(
                &plan.commands[i],
                &set.names(),
                &|r| set.apply(&rows.data, r),
                &rows.train,
                &rows.validation,
                &c.validation_scores,
                &opened,
                c.model.as_ref(),
                &|r| rows.data.place(r),
            )?;
            c.model = model;
            scores.push(s);
            continue;
        }
        scores.push(train::checked_scores(
            &c.name,
            c.model.as_ref(),
            (&fitted.sets[c.set], &test_x[c.set]),
            test_rows,
            &rows.data,
        )?);
    }
    drop(t);
    // Each candidate's test scores summarised once, with its τ as a cut
    // point, for its metrics and figures.
    let summaries: Vec<Summary> = {
        use rayon::prelude::*;
        scores
            .par_iter()
            .zip(&fitted.candidates)
            .map(|(ts, c)| Summary::new(ts, &labels, &[c.choice.tau]))
            .collect()
    };
    finish(
        plan, chosen, opened, labels, scores, summaries, openings, warnings,
    )
}

/// The opened test split's results from its summaries: the point metrics
/// now, the intervals beside the report's files.
#[allow(clippy::too_many_arguments)]
fn finish(
    plan: &Plan,
    chosen: Chosen,
    opened: crate::split::OpenedTest,
    labels: Vec<bool>,
    scores: Vec<Vec<f64>>,
    summaries: Vec<Summary>,
    openings: TestOpenings,
    warnings: Vec<String>,
) -> Result<Opened> {
    let fitted = &chosen.fitted;
    // Their point metrics now; their intervals beside the report's files.
    let (metrics, intervals) = summaries
        .iter()
        .zip(&fitted.candidates)
        .map(|(s, c)| super::fit::metrics_of(s, c.choice.tau, fitted.beta, plan))
        .collect::<Result<Vec<_>>>()?
        .into_iter()
        .unzip();
    Ok(Opened {
        chosen,
        test: Some(Test {
            rows: opened.into_rows(),
            labels,
            scores,
            summaries,
            metrics,
            intervals,
            openings,
        }),
        warnings,
    })
}
