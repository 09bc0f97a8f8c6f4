//! Each rule rows and fits must meet, worded once.
//!
//! Row rules (label values, split values, a known anomaly in train, missing
//! and non-finite values, text columns that must hold a value) are applied
//! by every reader: the in-memory reader (`data`, with its plain-CSV path
//! `data::fast`), the streamed reader (`stream`), the splits (`split`),
//! `check` and `score`. A reader finds the offending rows and names their
//! places ([`At`]); the refusal and its wording are made here. Fit rules
//! (zero variance, too few rows, a singular or ill-conditioned covariance,
//! a training value whose moments would overflow) are refused here for every
//! detector, for the fit from moments and for `check`'s preview.
//!
//! Every function returns the [`Error`] (with its documented exit code); the
//! callers add context only by wrapping.

use std::path::PathBuf;

use crate::error::{Error, RowUnit};
use crate::part::Part;

/// Where a row rule is broken: the file, the column and the first places
/// (file lines for CSV, rows for Parquet), with how many rows in all.
#[derive(Debug, Clone)]
pub struct At {
    /// The data file, as shown to the user.
    pub path: PathBuf,
    /// The column at fault.
    pub column: String,
    /// The first offending places, at most a handful.
    pub lines: Vec<u64>,
    /// How many rows break the rule in all.
    pub total: usize,
    /// Whether `lines` are file lines or rows.
    pub unit: RowUnit,
}

impl At {
    /// The refusal of these rows with `message`: the one way a rule's
    /// message becomes a data error naming the file, column and places.
    pub fn refuse(self, message: String) -> Error {
        Error::Data {
            path: self.path,
            column: Some(self.column),
            message,
            lines: self.lines,
            total: self.total,
            unit: self.unit,
        }
    }
}

// Row rules.

/// The split a split column's value names: `train`, `validation` or `test`
/// exactly (case matters), else `None`.
pub fn part_of(value: &str) -> Option<Part> {
    match value {
        "train" => Some(Part::Train),
        "validation" => Some(Part::Validation),
        "test" => Some(Part::Test),
        _ => None,
    }
}

/// A split column's value that names no split (the first one, `value`).
pub fn unknown_split(at: At, value: &str) -> Error {
    at.refuse(format!(
        "split value `{value}` is not one of `train`, `validation`, `test`"
    ))
}

/// A known anomaly placed in the train split by the split column.
pub fn anomaly_in_train(at: At) -> Error {
    at.refuse(
        "a known anomaly is assigned to `train`; detectors are fitted on normal rows only, so \
         known anomalies belong in validation and test"
            .into(),
    )
}

/// Whether a label value names a known anomaly: `Some(false)` for the
/// declared normal value, `Some(true)` for the anomaly value, `None` for
/// anything else (refused by [`undeclared_label`]). Values compare exactly,
/// byte for byte.
#[inline]
pub fn label_of(value: &[u8], normal: &str, anomaly: &str) -> Option<bool> {
    if value == normal.as_bytes() {
        Some(false)
    } else if value == anomaly.as_bytes() {
        Some(true)
    } else {
        None
    }
}

/// One undeclared label value, `value`, at every place given.
pub fn undeclared_label(at: At, value: &str, normal: &str, anomaly: &str) -> Error {
    at.refuse(format!(
        "label `{value}` is neither the normal value `{normal}` nor the anomaly value `{anomaly}`"
    ))
}

/// Several undeclared label values: each of the first ones (`each`: the
/// value and its places in words) with its own places, and how many
/// distinct values there are in all.
pub fn undeclared_labels(
    path: PathBuf,
    column: &str,
    unit: RowUnit,
    (normal, anomaly): (&str, &str),
    each: &[(&str, String)],
    distinct: usize,
) -> Error {
    let mut shown: Vec<String> = each
        .iter()
        .map(|(v, places)| format!("`{v}` ({places})"))
        .collect();
    if distinct > each.len() {
        shown.push(format!("and {} more values", distinct - each.len()));
    }
    Error::Data {
        path,
        column: Some(column.to_string()),
        message: format!(
            "{distinct} different labels are neither the normal value `{normal}` nor the anomaly \
             value `{anomaly}`: {}",
            shown.join(", ")
        ),
        lines: vec![],
        total: 0,
        unit,
    }
}

/// Missing feature values (an empty cell or a null) where the run refuses
/// them (`missing-values: refuse`, the default).
pub fn missing_value(at: At) -> Error {
    at.refuse(
        "a feature value is missing (set `missing-values: drop-row` to leave such rows out)".into(),
    )
}

/// Missing feature values in data to score (a scored row needs every
/// feature; no policy drops rows there).
pub fn missing_value_to_score(at: At) -> Error {
    at.refuse("a feature value is missing; every scored row needs a number in each".into())
}

/// An empty value in a text column that needs one (id, split, group, time).
pub fn empty_text(at: At) -> Error {
    at.refuse("a value is missing".into())
}

/// A feature value that is not a number (`value`, the first one, when known).
pub fn not_a_number(at: At, value: Option<&str>) -> Error {
    at.refuse(match value {
        Some(v) => format!("value `{v}` is not a number"),
        None => "a value is not a number".into(),
    })
}

/// A feature value that is infinite.
pub fn infinite(at: At) -> Error {
    at.refuse("a feature value is infinite".into())
}

/// A training value beyond [`crate::features::TRAIN_LIMIT`] (±1e150):
/// `why` says what would overflow and what to do.
pub fn beyond_train_limit(at: At, why: &str) -> Error {
    at.refuse(format!("a training value is beyond ±1e150 {why}"))
}

/// Why a training value beyond the limit is refused where the moments of a
/// fit are taken (in memory and streamed alike).
pub const MOMENTS_OVERFLOW: &str = "(after transforms): the fitted moments would overflow; fix \
                                    the value or transform the feature (`log`)";

// Fit rules.

/// Features that take a single value on the training rows. `detector` is
/// the detector being fitted, or empty where none is yet (`check`'s preview,
/// a transform), when the caller wraps the error in its feature set.
pub fn zero_variance(detector: &str, features: Vec<String>) -> Error {
    Error::Fit {
        detector: detector.into(),
        message: "a feature has zero variance on the training rows (every value is the same), so \
                  its density is degenerate; drop it or fix the data"
            .into(),
        features,
    }
}

/// A feature whose variance is zero in a covariance being factored (a
/// recorded covariance, or one of a subset of the rows).
pub fn zero_variance_in_covariance(detector: &str, feature: &str) -> Error {
    Error::Fit {
        detector: detector.into(),
        message: "a feature has zero variance in the fitted covariance".into(),
        features: vec![feature.to_string()],
    }
}

/// Refuses `m` training rows for a covariance over `d` features.
pub fn refuse_too_few_for_covariance(detector: &str, m: u64, d: usize) -> crate::Result<()> {
    if m <= d as u64 {
        return Err(Error::Fit {
            detector: detector.into(),
            message: format!(
                "{m} training rows cannot determine a covariance over {d} features (more rows \
                 than features are needed)"
            ),
            features: vec![],
        });
    }
    Ok(())
}

/// Fewer training rows than the `k` of a k-nearest-neighbour detector.
pub fn too_few_for_k(detector: &str, m: usize, k: usize) -> Error {
    Error::Fit {
        detector: detector.into(),
        message: format!("{m} training rows are fewer than k = {k}"),
        features: vec![],
    }
}

/// A covariance that Cholesky factoring finds not positive definite.
pub fn not_positive_definite(detector: &str, features: &[String]) -> Error {
    Error::Fit {
        detector: detector.into(),
        message: "the covariance is not positive definite".into(),
        features: features.to_vec(),
    }
}

/// A covariance whose correlation matrix is singular or nearly so
/// (`condition` in words, against `limit`), naming the features of the
/// near-dependence.
pub fn ill_conditioned(
    detector: &str,
    condition: &str,
    limit: f64,
    features: Vec<String>,
) -> Error {
    Error::Fit {
        detector: detector.into(),
        message: format!(
            "the covariance is singular or nearly so (condition number of the correlation \
             matrix {condition}, limit {limit:e}): some features are nearly linear \
             combinations of others; drop one of those named or use independent-gaussian"
        ),
        features,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn at() -> At {
        At {
            path: "d.csv".into(),
            column: "split".into(),
            lines: vec![3],
            total: 1,
            unit: RowUnit::Line,
        }
    }

    #[test]
    fn split_values_are_the_three_names_exactly() {
        assert_eq!(part_of("train"), Some(Part::Train));
        assert_eq!(part_of("validation"), Some(Part::Validation));
        assert_eq!(part_of("test"), Some(Part::Test));
        assert_eq!(part_of("Train"), None);
        assert_eq!(part_of(""), None);
    }

    #[test]
    fn a_row_rule_names_file_column_and_line_with_exit_code_3() {
        let e = unknown_split(at(), "holdout");
        assert_eq!(
            e.to_string(),
            "d.csv: column `split`: split value `holdout` is not one of `train`, `validation`, \
             `test` (line 3)"
        );
        assert_eq!(e.code(), crate::error::exit::DATA);
    }

    #[test]
    fn a_fit_rule_without_a_detector_reads_as_the_features_alone() {
        let e = Error::InFeatureSet {
            set: "a".into(),
            source: Box::new(zero_variance("", vec!["x".into()])),
        };
        assert_eq!(
            e.to_string(),
            "feature set `a`: a feature has zero variance on the training rows (every value is \
             the same), so its density is degenerate; drop it or fix the data (features: `x`)"
        );
        assert_eq!(e.code(), crate::error::exit::DATA);
    }
}
