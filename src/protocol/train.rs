//! The second stage, one feature set at a time: the features fitted on the
//! training rows, the training data a detector is fitted from (the rows'
//! feature matrix, and their moments on content-hash buckets for the
//! detectors that fit from moments, the only data a streamed run keeps) and
//! the validation features, every refused value reported before any
//! detector is fitted.
//! Also the features of any split and its checked scores.

use std::borrow::Cow;

use ndarray::Array2;

use super::ingest::{Rows, Training};
use crate::data::{Dataset, RowId};
use crate::detect::{self, Model};
use crate::error::{Error, Result};
use crate::features::{self, FittedFeatures};
use crate::moments::Moments;
use crate::spec::{DetectorKind, Plan};

/// Rows per block when scoring.
pub(crate) const SCORE_BLOCK: usize = 8192;

/// One feature set, ready for its detectors.
pub(crate) struct SetTraining<'a> {
    /// The features, fitted on the training rows.
    pub fitted: FittedFeatures,
    /// Their names.
    pub names: Vec<String>,
    /// The training rows' feature matrix (empty when the rows were streamed).
    train: Array2<f64>,
    /// The training rows' moments on content-hash buckets, when a detector
    /// fits from them: the reader's, or computed here from the rows.
    moments: Option<Cow<'a, Moments>>,
    /// The validation rows' features.
    pub validation: SplitFeatures,
}

/// The feature set `si` of `plan` on `rows`: fitted, the training data
/// made and the validation features checked (a refused value is reported
/// here, before any detector is fitted).
pub(crate) fn of_set<'a>(plan: &Plan, rows: &'a Rows, si: usize) -> Result<SetTraining<'a>> {
    let (fitted, streamed) = match &rows.training {
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
    // When every detector fits from the moments and the features are the
    // source columns themselves, the training rows' matrix would only feed
    // the moments: they are read from the source rows instead
    // ([`moments_of_source_rows`]), and no training
    // matrix is made.
    let from_moments = plan.detectors.iter().all(|&k| detect::fits_from_moments(k));
    let direct = streamed.is_none() && from_moments && fitted.is_identity(&rows.data);
    let train = if direct {
        Array2::zeros((0, names.len()))
    } else {
        fitted.apply(&rows.data, &rows.train)?
    };
    let validation = SplitFeatures::of(&fitted, &rows.data, &rows.validation)?;
    drop(t);
    let t = crate::progress::part("training moments");
    // The Gaussians fit from the training moments on content-hash buckets,
    // the same bits however the rows arrived (`moments`).
    let moments = match streamed {
        Some(m) => Some(Cow::Borrowed(m)),
        None if plan.detectors.iter().any(|&k| detect::fits_from_moments(k)) => {
            use rayon::prelude::*;
            let buckets: Vec<u16> = rows
                .train
                .par_iter()
                .map(|r| rows.hashes[r.0 as usize].bucket())
                .collect();
            Some(Cow::Owned(if direct {
                moments_of_source_rows(&rows.data, &rows.train, &buckets)?
            } else {
                crate::moments::of_sorted_buckets(&buckets, train.view())?
            }))
        }
        None => None,
    };
    drop(t);
    Ok(SetTraining {
        fitted,
        names,
        train,
        moments,
        validation,
    })
}

/// The moments of the training rows `train` (in content-hash order, `buckets`
/// their buckets) of a set of untransformed content columns, read from the
/// source rows themselves ([`crate::moments::Fold::add_sorted_gathered`]): the
/// same bits as [`crate::moments::of_sorted_buckets`] over their feature
/// matrix, which is never made.
fn moments_of_source_rows(data: &Dataset, train: &[RowId], buckets: &[u16]) -> Result<Moments> {
    let d = data.x.ncols();
    let x = data.x.as_standard_layout();
    let xs = x.as_slice().expect("a standard-layout array is contiguous");
    let mut fold = crate::moments::Fold::new(d);
    fold.add_sorted_gathered(buckets, d, |i| {
        let r = train[i].0 as usize;
        &xs[r * d..(r + 1) * d]
    })?;
    Ok(fold.finish())
}

impl SetTraining<'_> {
    /// A detector of kind `kind` (fitted in process) fitted on the training
    /// data: from the moments when it fits from them, else from the rows.
    pub fn fit(&self, kind: DetectorKind) -> Result<Box<dyn Model>> {
        match &self.moments {
            Some(m) if detect::fits_from_moments(kind) => detect::fit_moments(kind, m, &self.names),
            _ => detect::build(kind).fit(self.train.view(), &self.names),
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
            // Untransformed content columns refuse nothing: every value of
            // a loaded dataset is finite (`data::load` and the streamed
            // reader refuse or leave out the rows with others), so no pass
            // over the rows is needed here; scoring still checks every value
            // it copies.
            debug_assert!(rows.iter().all(|r| data
                .x
                .row(r.0 as usize)
                .iter()
                .all(|v| v.is_finite())));
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::features::FittedFeature;
    use crate::spec::FeatureInput;

    /// The moments read from the source rows give the bits of the moments
    /// of the training rows' feature matrix (rows in a scrambled source
    /// order, one to five rows per bucket).
    #[test]
    fn moments_of_source_rows_equal_those_of_the_matrix() {
        let (n, d) = (300usize, 3usize);
        let x: Vec<f64> = (0..n * d)
            .map(|i| ((i * 7919 % 1009) as f64 - 500.0) / 37.0)
            .collect();
        let data = Dataset::sample_of(vec!["a".into(), "b".into(), "c".into()], x).unwrap();
        let fitted = FittedFeatures {
            set: "s".into(),
            features: (0..d)
                .map(|j| FittedFeature {
                    name: data.columns[j].clone(),
                    input: FeatureInput::Column(j),
                    from: String::new(),
                    transforms: vec![],
                })
                .collect(),
        };
        assert!(fitted.is_identity(&data));
        // Training rows in a scrambled order of the source, with buckets
        // ascending and each bucket holding one to five rows.
        let train: Vec<RowId> = (0..n as u64).map(|i| RowId(i * 131 % n as u64)).collect();
        let mut buckets: Vec<u16> = (0..n).map(|i| (i / (1 + i % 5)) as u16).collect();
        buckets.sort_unstable();
        let whole = fitted.apply(&data, &train).unwrap();
        let want = crate::moments::of_sorted_buckets(&buckets, whole.view()).unwrap();
        let bits = |m: &Moments| {
            (
                m.n,
                m.mean
                    .iter()
                    .chain(&m.m2)
                    .map(|v| v.to_bits())
                    .collect::<Vec<_>>(),
            )
        };
        let got = moments_of_source_rows(&data, &train, &buckets).unwrap();
        assert_eq!(bits(&got), bits(&want));
    }
}
