//! Density detectors: the [`Detector`] trait, one file per model, and the
//! registry that maps a spec's [`DetectorKind`] to an implementation.
//!
//! A detector fits on training rows only and never sees labels. A fitted
//! [`Model`] scores rows as s(x) = −ln p(x): higher is more anomalous, and a row
//! is flagged iff s(x) > τ, which is p(x) < ε with τ = −ln ε. All arithmetic is
//! in log space, and logarithms come from `libm` so that scores are the same
//! bits on every platform.

pub mod command;
mod independent;
mod knn;
mod mixture;
mod multivariate;
mod robust;

pub use independent::IndependentGaussian;
pub use knn::KnnDistance;
pub use mixture::GaussianMixture;
pub use multivariate::MultivariateGaussian;
pub use robust::{consistency_factor, RobustGaussian};

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

/// The parameter count of a model whose parameters anomark cannot see (an
/// external command): counted as the most, so that a selection tie goes to
/// a built-in detector, and recorded in run.json as null.
pub const UNKNOWN_PARAMETERS: usize = usize::MAX;

/// A fitted detector.
pub trait Model: Send + Sync {
    /// The anomaly score s(x) = −ln p(x) of each row.
    fn score(&self, x: ArrayView2<'_, f64>) -> Vec<f64>;
    /// The fitted parameters, for the record.
    fn params(&self) -> Params;
    /// The number of free parameters: the "simpler model" in the selection
    /// tie rule is the one with fewer.
    fn parameter_count(&self) -> usize {
        self.params().count()
    }
}

/// Scores the rows of `x` on all cores, in blocks of `block` rows joined in
/// order. Each row's score depends on that row alone, so the bits are those
/// of `model.score(x)` in one pass, whatever the number of threads.
pub fn score_in_blocks(model: &dyn Model, x: ArrayView2<'_, f64>, block: usize) -> Vec<f64> {
    use rayon::prelude::*;
    let n = x.nrows();
    let blocks: Vec<(usize, usize)> = (0..n)
        .step_by(block.max(1))
        .map(|a| (a, (a + block.max(1)).min(n)))
        .collect();
    blocks
        .par_iter()
        .map(|&(a, b)| model.score(x.slice(ndarray::s![a..b, ..])))
        .collect::<Vec<_>>()
        .concat()
}

/// Fitted parameters, as recorded in run.json.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case", tag = "detector")]
pub enum Params {
    /// Per-feature mean and maximum-likelihood variance (divisor m).
    #[serde(rename_all = "kebab-case")]
    IndependentGaussian {
        /// Means, in feature order.
        mean: Vec<f64>,
        /// Variances, in feature order.
        variance: Vec<f64>,
    },
    /// Mean, maximum-likelihood covariance (divisor m) and its log-determinant.
    #[serde(rename_all = "kebab-case")]
    MultivariateGaussian {
        /// Mean vector.
        mean: Vec<f64>,
        /// Covariance matrix, row by row.
        covariance: Vec<Vec<f64>>,
        /// ln |Σ|.
        ln_det_covariance: f64,
    },
    /// The reweighted MCD estimate and its raw stage.
    #[serde(rename_all = "kebab-case")]
    RobustGaussian {
        /// Reweighted mean.
        mean: Vec<f64>,
        /// Reweighted covariance, consistency-corrected.
        covariance: Vec<Vec<f64>>,
        /// ln |Σ| of the reweighted covariance.
        ln_det_covariance: f64,
        /// Raw MCD mean (the h rows).
        raw_mean: Vec<f64>,
        /// ln |Σ| of the raw MCD covariance (divisor h, before correction).
        raw_ln_det_covariance: f64,
        /// h, the rows the MCD covers.
        support: usize,
        /// Rows kept by the reweighting step.
        reweighted_rows: usize,
        /// Consistency factors of the raw and the reweighted covariance.
        consistency_factors: [f64; 2],
    },
    /// The chosen mixture.
    #[serde(rename_all = "kebab-case")]
    GaussianMixture {
        /// Components.
        k: usize,
        /// Mixing weights.
        weights: Vec<f64>,
        /// Component means.
        means: Vec<Vec<f64>>,
        /// Component covariances.
        covariances: Vec<Vec<Vec<f64>>>,
        /// Training log-likelihood.
        log_likelihood: f64,
        /// BIC of the chosen k.
        bic: f64,
        /// BIC of every k tried (null when no fit).
        bic_by_k: Vec<(usize, Option<f64>)>,
    },
    /// The stored training rows' standardisation (the rows themselves are not recorded).
    #[serde(rename_all = "kebab-case")]
    KnnDistance {
        /// k.
        k: usize,
        /// Training rows kept for the search.
        training_rows: usize,
        /// Standardisation means.
        mean: Vec<f64>,
        /// Standardisation standard deviations.
        sd: Vec<f64>,
    },
    /// An external program: anomark cannot see inside it, so it records the
    /// program's provenance instead of parameters.
    #[serde(rename_all = "kebab-case")]
    Command {
        /// The candidate's name.
        name: String,
        /// The program and its arguments, as the spec writes them.
        run: Vec<String>,
        /// The exchange files' format.
        io: crate::spec::CommandIo,
        /// Seed of the permutation of the rows to score.
        seed: u64,
        /// The timeout.
        timeout_seconds: u64,
        /// blake3 of every file in `inputs`.
        inputs: Vec<command::InputHash>,
        /// Each invocation: the validation one, and in a final run the one with the test rows.
        invocations: Vec<command::Invocation>,
    },
}

impl Params {
    /// The fitted marginal density of feature `j` as normal components
    /// (weight, mean, variance), for the card's feature plots; None for a
    /// detector without per-feature density parameters (k-NN).
    pub fn marginal(&self, j: usize) -> Option<Vec<(f64, f64, f64)>> {
        match self {
            Params::IndependentGaussian { mean, variance } => {
                Some(vec![(1.0, mean[j], variance[j])])
            }
            Params::MultivariateGaussian {
                mean, covariance, ..
            }
            | Params::RobustGaussian {
                mean, covariance, ..
            } => Some(vec![(1.0, mean[j], covariance[j][j])]),
            Params::GaussianMixture {
                weights,
                means,
                covariances,
                ..
            } => Some(
                weights
                    .iter()
                    .zip(means)
                    .zip(covariances)
                    .map(|((w, m), c)| (*w, m[j], c[j][j]))
                    .collect(),
            ),
            Params::KnnDistance { .. } | Params::Command { .. } => None,
        }
    }

    /// Free parameters. A k-nearest-neighbour model keeps every training row,
    /// so it counts m·d.
    pub fn count(&self) -> usize {
        let full = |d: usize| d + d * (d + 1) / 2;
        match self {
            Params::IndependentGaussian { mean, .. } => 2 * mean.len(),
            Params::MultivariateGaussian { mean, .. } | Params::RobustGaussian { mean, .. } => {
                full(mean.len())
            }
            Params::GaussianMixture { k, means, .. } => {
                let d = means.first().map_or(0, Vec::len);
                k * full(d) + k - 1
            }
            Params::KnnDistance {
                training_rows,
                mean,
                ..
            } => training_rows * mean.len(),
            Params::Command { .. } => UNKNOWN_PARAMETERS,
        }
    }
}

/// A model rebuilt from recorded parameters: it scores with the rebuilt
/// inner model and reports the parameters exactly as recorded.
struct Restored {
    params: Params,
    inner: Box<dyn Model>,
}

impl Model for Restored {
    fn score(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        self.inner.score(x)
    }
    fn params(&self) -> Params {
        self.params.clone()
    }
}

/// Rebuilds a fitted model from the parameters a run recorded, for scoring
/// new data; the scores are the same bits as the run's. None for k-NN, whose
/// training rows are not recorded (the caller refits it from the run's inputs).
pub fn restore(params: &Params, features: &[String]) -> Result<Option<Box<dyn Model>>> {
    let flat = |rows: &[Vec<f64>]| rows.concat();
    let inner: Box<dyn Model> = match params {
        Params::IndependentGaussian { mean, variance } => {
            independent::restore(mean.clone(), variance.clone())
        }
        Params::MultivariateGaussian {
            mean, covariance, ..
        }
        | Params::RobustGaussian {
            mean, covariance, ..
        } => multivariate::restore(mean.clone(), flat(covariance), features)?,
        Params::GaussianMixture {
            weights,
            means,
            covariances,
            ..
        } => mixture::restore(
            weights.clone(),
            means.clone(),
            covariances.iter().map(|c| flat(c)).collect(),
            features,
        )?,
        Params::KnnDistance { .. } | Params::Command { .. } => return Ok(None),
    };
    Ok(Some(Box::new(Restored {
        params: params.clone(),
        inner,
    })))
}

/// Whether a detector is fitted from the training moments alone
/// ([`fit_moments`]): the independent and the multivariate Gaussian.
pub fn fits_from_moments(kind: DetectorKind) -> bool {
    matches!(
        kind,
        DetectorKind::IndependentGaussian | DetectorKind::MultivariateGaussian
    )
}

/// Fits a Gaussian detector from the training moments
/// ([`crate::moments`]): mean x̄ and maximum-likelihood (co)variance M / n.
/// The one place of these two detectors' refusals: a feature of zero
/// variance (a constant feature has exactly zero, see
/// [`crate::moments::Moments::of_bucket`]), too few rows for a covariance,
/// an ill-conditioned covariance.
pub fn fit_moments(
    kind: DetectorKind,
    m: &crate::moments::Moments,
    names: &[String],
) -> Result<Box<dyn Model>> {
    let detector = name(kind);
    let d = m.mean.len();
    let cov = m.covariance();
    let constant: Vec<String> = (0..d)
        .filter(|&j| cov[j * d + j] <= 0.0 || !cov[j * d + j].is_finite())
        .map(|j| names[j].clone())
        .collect();
    if !constant.is_empty() {
        return Err(crate::rules::zero_variance(detector, constant));
    }
    match kind {
        DetectorKind::IndependentGaussian => {
            let variance = (0..d).map(|j| cov[j * d + j]).collect();
            Ok(independent::restore(m.mean.clone(), variance))
        }
        DetectorKind::MultivariateGaussian => {
            multivariate::refuse_too_few(detector, m.n as usize, d)?;
            multivariate::restore(m.mean.clone(), cov, names)
        }
        other => Err(Error::internal(format!(
            "`{}` cannot be fitted from moments",
            name(other)
        ))),
    }
}

/// The detector's name in specs, files and cards ([`DetectorKind::name`],
/// which the spec owns so that `spec` need not import `detect`).
pub fn name(kind: DetectorKind) -> &'static str {
    kind.name()
}

/// The implementation of a kind.
pub fn build(kind: DetectorKind) -> Box<dyn Detector> {
    match kind {
        DetectorKind::IndependentGaussian => Box::new(IndependentGaussian),
        DetectorKind::MultivariateGaussian => Box::new(MultivariateGaussian),
        DetectorKind::RobustGaussian {
            support_fraction,
            seed,
        } => Box::new(RobustGaussian {
            support_fraction,
            seed,
        }),
        DetectorKind::GaussianMixture {
            k_min,
            k_max,
            seed,
            covariance_floor,
        } => Box::new(GaussianMixture::new(k_min, k_max, seed, covariance_floor)),
        DetectorKind::KnnDistance { k } => Box::new(KnnDistance { k }),
        DetectorKind::Command(_) => Box::new(NotFittable),
    }
}

/// The stand-in for an external command, which is not fitted in process
/// (the protocol runs it through [`command`]).
struct NotFittable;

impl Detector for NotFittable {
    fn fit(&self, _: ArrayView2<'_, f64>, _: &[String]) -> Result<Box<dyn Model>> {
        Err(Error::internal(
            "an external command is run through `detect::command`, not fitted",
        ))
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
        Err(crate::rules::zero_variance(detector, constant))
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
