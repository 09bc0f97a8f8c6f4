//! The second stage, one feature set at a time: the features fitted on the
//! training rows, the training data a detector is fitted from (the rows'
//! feature matrix, or their moments when streamed) and the validation
//! features, every refused value reported before any detector is fitted.
//! Also the features of any split and its checked scores.

use ndarray::Array2;

use super::ingest::{Rows, Training};
use crate::data::{Dataset, RowId};
use crate::detect::{self, Model};
use crate::error::{Error, Result};
use crate::features::{self, FittedFeatures};
use crate::spec::{DetectorKind, Plan};
use crate::stream::Moments;

/// Rows per block when scoring.
pub(crate) const SCORE_BLOCK: usize = 8192;

/// What a detector of one feature set is fitted from.
enum TrainingData<'a> {
    /// The training rows' feature matrix.
    Rows(Array2<f64>),
    /// The training rows' moments (a streamed run).
    Moments(&'a Moments),
}

/// One feature set, ready for its detectors.
pub(crate) struct SetTraining<'a> {
    /// The features, fitted on the training rows.
    pub fitted: FittedFeatures,
    /// Their names.
    pub names: Vec<String>,
    train: TrainingData<'a>,
    /// The validation rows' features.
    pub validation: SplitFeatures,
}

/// The feature set `si` of `plan` on `rows`: fitted, the training data
/// made and the validation features checked (a refused value is reported
/// here, before any detector is fitted).
pub(crate) fn of_set<'a>(plan: &Plan, rows: &'a Rows, si: usize) -> Result<SetTraining<'a>> {
    let (fitted, moments) = match &rows.training {
        Training::Moments {
            fitted, moments, ..
        } => (fitted[si].clone(), Some(&moments[si])),
        Training::Rows => (
            features::fit(&plan.feature_sets[si], &rows.data, &rows.train)?,
            None,
        ),
    };
    let names = fitted.names();
    let t = crate::progress::part("feature matrices, train and validation");
    let train = fitted.apply(&rows.data, &rows.train)?;
    let validation = SplitFeatures::of(&fitted, &rows.data, &rows.validation)?;
    drop(t);
    let train = match moments {
        Some(m) => TrainingData::Moments(m),
        None => TrainingData::Rows(train),
    };
    Ok(SetTraining {
        fitted,
        names,
        train,
        validation,
    })
}

impl SetTraining<'_> {
    /// A detector of kind `kind` (fitted in process) fitted on the training
    /// data: from the rows, or from their moments.
    pub fn fit(&self, kind: DetectorKind) -> Result<Box<dyn Model>> {
        match &self.train {
            TrainingData::Moments(m) => crate::stream::fit(kind, m, &self.names),
            TrainingData::Rows(x) => detect::build(kind).fit(x.view(), &self.names),
        }
    }
}

/// The features a split is scored from. Computed features are made once and
/// held; a set of the content columns themselves is copied block by block
/// while it is scored instead (a copy costs less than holding one).
pub(crate) enum SplitFeatures {
    Held(ndarray::Array2<f64>),
    Copied,
}

impl SplitFeatures {
    /// The features of `rows`, with any refused value's error now, before
    /// they are scored.
    pub fn of(fitted: &FittedFeatures, data: &Dataset, rows: &[RowId]) -> Result<Self> {
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
pub(crate) fn checked_scores(
    name: &str,
    model: &dyn Model,
    (fitted, x): (&FittedFeatures, &SplitFeatures),
    rows: &[RowId],
    data: &Dataset,
) -> Result<Vec<f64>> {
    let s = match x {
        SplitFeatures::Held(x) => detect::score_in_blocks(model, x.view(), SCORE_BLOCK),
        SplitFeatures::Copied => fitted.map_blocks(data, rows, SCORE_BLOCK, |x| model.score(x))?,
    };
    if let Some(k) = s.iter().position(|v| v.is_nan()) {
        return Err(Error::Fit {
            detector: String::new(),
            message: format!("the score of {} is not a number", data.place(rows[k])),
            features: vec![],
        }
        .in_candidate(name));
    }
    Ok(s)
}
