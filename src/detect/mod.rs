//! Density detectors: the [`Detector`] trait, one file per model, and the
//! registry that maps a spec's [`DetectorKind`] to an implementation.
//!
//! A detector fits on training rows only and never sees labels. A fitted
//! [`Model`] scores rows as s(x) = −ln p(x): higher is more anomalous, and a row
//! is flagged iff s(x) > τ, which is p(x) < ε with τ = −ln ε. All arithmetic is
//! in log space, and logarithms come from `libm` so that scores are the same
//! bits on every platform.

mod independent;
mod multivariate;

pub use independent::IndependentGaussian;
pub use multivariate::MultivariateGaussian;

use ndarray::ArrayView2;

use crate::error::{Error, Result};
use crate::spec::DetectorKind;

/// ½ ln(2π), to the last bit of binary64 (scipy.stats.norm.logpdf(0) = −0.9189385332046727).
pub const HALF_LN_2PI: f64 = 0.918_938_533_204_672_7;

/// A detector that can be fitted.
pub trait Detector {
    /// Fits on the training rows (`m × d`, normal examples only).
    fn fit(&self, train: ArrayView2<'_, f64>, features: &[String]) -> Result<Box<dyn Model>>;
}

/// A fitted detector.
pub trait Model: Send + Sync {
    /// The anomaly score s(x) = −ln p(x) of each row.
    fn score(&self, x: ArrayView2<'_, f64>) -> Vec<f64>;
    /// The fitted parameters, for the record.
    fn params(&self) -> Params;
}

/// Fitted parameters, as recorded in run.json.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case", tag = "detector")]
pub enum Params {
    /// Per-feature mean and maximum-likelihood variance (divisor m).
    IndependentGaussian {
        /// Means, in feature order.
        mean: Vec<f64>,
        /// Variances, in feature order.
        variance: Vec<f64>,
    },
    /// Mean, maximum-likelihood covariance (divisor m) and its log-determinant.
    MultivariateGaussian {
        /// Mean vector.
        mean: Vec<f64>,
        /// Covariance matrix, row by row.
        covariance: Vec<Vec<f64>>,
        /// ln |Σ|.
        ln_det_covariance: f64,
    },
}

/// The detector's name in specs, files and cards.
pub fn name(kind: DetectorKind) -> &'static str {
    match kind {
        DetectorKind::IndependentGaussian => "independent-gaussian",
        DetectorKind::MultivariateGaussian => "multivariate-gaussian",
    }
}

/// The number of free parameters for `d` features: the "simpler model" in the
/// selection tie rule is the one with fewer.
pub fn parameter_count(kind: DetectorKind, d: usize) -> usize {
    match kind {
        DetectorKind::IndependentGaussian => 2 * d,
        DetectorKind::MultivariateGaussian => d + d * (d + 1) / 2,
    }
}

/// The implementation of a kind.
pub fn build(kind: DetectorKind) -> Box<dyn Detector> {
    match kind {
        DetectorKind::IndependentGaussian => Box::new(IndependentGaussian),
        DetectorKind::MultivariateGaussian => Box::new(MultivariateGaussian),
    }
}

/// Natural logarithm, the same bits on every platform.
pub(crate) fn ln(x: f64) -> f64 {
    libm::log(x)
}

/// Column means in row order (the caller fixes the row order, so the sums are
/// reproducible).
pub(crate) fn means(x: ArrayView2<'_, f64>) -> Vec<f64> {
    let m = x.nrows() as f64;
    let mut sum = vec![0.0; x.ncols()];
    for row in x.rows() {
        for (s, v) in sum.iter_mut().zip(row.iter()) {
            *s += v;
        }
    }
    sum.into_iter().map(|s| s / m).collect()
}

/// Refuses features that take a single value on the training rows.
pub(crate) fn refuse_constant(
    detector: &str,
    x: ArrayView2<'_, f64>,
    features: &[String],
) -> Result<()> {
    let constant: Vec<String> = (0..x.ncols())
        .filter(|&j| {
            let c = x.column(j);
            c.iter().all(|&v| v == c[0])
        })
        .map(|j| features[j].clone())
        .collect();
    if constant.is_empty() {
        Ok(())
    } else {
        Err(Error::Fit {
            detector: detector.into(),
            message: "a feature has zero variance on the training rows (every value is the same), \
                      so its density is degenerate; drop it or fix the data"
                .into(),
            features: constant,
        })
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    #[test]
    fn half_ln_2pi_matches_libm() {
        assert_eq!(HALF_LN_2PI, 0.5 * ln(2.0 * std::f64::consts::PI));
    }
}
