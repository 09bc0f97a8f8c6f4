//! How the held splits (validation and test) are scored and summarised,
//! whichever way their rows arrived: in memory ([`Held::Rows`]: every row
//! scored, and the summaries, the threshold, the figures and the
//! calibration made from the scores), or on an engine ([`Held::Engine`]:
//! the rows stay where they are and the stages ask for exactly the
//! summaries they read, each computed there by the library's own
//! functions, so that every number is the same to the bit).
//!
//! What a stage reads of a held split's scores, and so what an engine
//! returns: the evaluation summary ([`crate::summary::Summary`], with the
//! cut points the stage fixes first), the figures' facts
//! ([`crate::card::plots::ScoreFacts`]: order statistics at the ranks the
//! axes need, then histogram counts on the bins those fix) and, for the
//! chosen candidate only, the validation normals' sorted scores that
//! run.json records as the conformal calibration. The conformal threshold
//! policy reads those sorted scores of every candidate; an engine run
//! refuses it at the scope.

use crate::card::plots::ScoreFacts;
use crate::detect::Model;
use crate::error::Result;
use crate::part::Part;
use crate::summary::Summary;

/// Where the held splits' rows are.
#[derive(Default)]
pub enum Held {
    /// In [`super::ingest::Rows::data`], scored row by row.
    #[default]
    Rows,
    /// On an engine, asked for summaries.
    Engine(Box<dyn HeldSplits>),
}

impl Held {
    /// Whether the held splits are on an engine. The protocol then asks the
    /// engine from the calling thread only, one question at a time, never
    /// from rayon's pool (see `engine::held`: the engine's own functions
    /// need that pool), so the stages that fit or draw candidates side by
    /// side in memory take them one after another on an engine.
    pub fn on_engine(&self) -> bool {
        matches!(self, Held::Engine(_))
    }
}

/// One candidate whose summary is asked of [`HeldSplits::summaries`].
#[derive(Clone, Copy)]
pub struct Asked<'a> {
    /// Its name, for a refusal.
    pub name: &'a str,
    /// Its feature set's index.
    pub set: usize,
    /// Its fitted model.
    pub model: &'a dyn Model,
    /// Cut points beside its distinct anomaly scores (a τ to count).
    pub extra: &'a [f64],
}

/// The held splits on an engine: each method scores the rows of a split
/// (validation or test) with a fitted candidate of feature set `set` (its
/// parameters carried to the engine) and returns a summary of the scores.
pub trait HeldSplits: Send + Sync {
    /// The validation split's manifest hash (computed where its rows are).
    fn validation_manifest(&self) -> &str;

    /// The evaluation summary of `part`'s scores under each candidate of
    /// `asked`, with its distinct anomaly scores and its `extra` as cut
    /// points (`Summary::new`'s definition), in order: the candidates
    /// together, so that each question is one pass over the rows. A score
    /// that is not a number is refused, naming its candidate (the first in
    /// `asked` that has one) and its row, as for rows in memory.
    fn summaries(&self, part: Part, asked: &[Asked<'_>]) -> Result<Vec<Summary>>;

    /// The score figures' facts of each split of `splits` under `model` at
    /// τ, each with its evaluation summary (τ countable in it), in order:
    /// the splits together, so that each question is one pass over the rows.
    fn facts(
        &self,
        splits: &[(Part, &Summary)],
        set: usize,
        model: &dyn Model,
        tau: f64,
    ) -> Result<Vec<ScoreFacts>>;

    /// The scores digest (`audit::hash::scores_digest`) of the validation
    /// rows, and the test rows when `test` (the test split was opened),
    /// under every candidate's model (feature set, model), in spec order.
    fn scores_digest(&self, candidates: &[(usize, &dyn Model)], test: bool) -> Result<String>;

    /// Writes every scored row (validation, and test when `test`) with
    /// each candidate's score (columns `names`, candidates in spec order) as
    /// Parquet parts into `dir`, where the rows are (a cluster's executors
    /// write them; `dir` is on a filesystem they share with the client).
    /// Returns the parts' file names, sorted.
    fn write_scores(
        &self,
        dir: &std::path::Path,
        candidates: &[(usize, &dyn Model)],
        names: &[String],
        test: bool,
    ) -> Result<Vec<String>>;

    /// The conformal calibration of `part`'s `normals` normal rows under
    /// `model`, thinned as in memory (`Calibration::new`): at most
    /// `Thinning::DEFAULT`'s scores, with no row identity (no place, id or
    /// label).
    fn calibration(
        &self,
        part: Part,
        set: usize,
        model: &dyn Model,
        normals: usize,
    ) -> Result<crate::conformal::Calibration>;
}
