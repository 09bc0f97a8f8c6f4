//! Independent Gaussian: one normal density per feature, with the mean and the
//! maximum-likelihood variance (divisor m) of the training rows.
//!
//! s(x) = Σⱼ [½ ln 2π + ½ ln σⱼ² + (xⱼ − μⱼ)² / 2σⱼ²].

use ndarray::ArrayView2;

use super::{ln, Detector, Model, Params, HALF_LN_2PI};
use crate::error::Result;

/// The independent-Gaussian detector.
#[derive(Debug, Clone, Copy, Default)]
pub struct IndependentGaussian;

struct Fitted {
    mean: Vec<f64>,
    variance: Vec<f64>,
    /// Σⱼ (½ ln 2π + ½ ln σⱼ²), the score's constant part.
    constant: f64,
}

impl Detector for IndependentGaussian {
    /// The rows taken as one bucket of [`crate::moments`], in the order
    /// given (a run fits from the content-hash buckets' moments instead,
    /// through [`super::fit_moments`], the one place of the refusals).
    fn fit(&self, train: ArrayView2<'_, f64>, features: &[String]) -> Result<Box<dyn Model>> {
        super::fit_moments(
            crate::spec::DetectorKind::IndependentGaussian,
            &crate::moments::Moments::of_bucket(train),
            features,
        )
    }
}

/// Rebuilds the model from recorded means and variances.
pub(crate) fn restore(mean: Vec<f64>, variance: Vec<f64>) -> Box<dyn Model> {
    let constant = variance.iter().map(|v| HALF_LN_2PI + 0.5 * ln(*v)).sum();
    Box::new(Fitted {
        mean,
        variance,
        constant,
    })
}

impl Model for Fitted {
    fn score(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        x.rows()
            .into_iter()
            .map(|row| {
                let mut q = 0.0;
                for ((v, mu), var) in row.iter().zip(&self.mean).zip(&self.variance) {
                    let c = v - mu;
                    q += c * c / var;
                }
                self.constant + 0.5 * q
            })
            .collect()
    }

    fn params(&self) -> Params {
        Params::IndependentGaussian {
            mean: self.mean.clone(),
            variance: self.variance.clone(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    /// scipy.stats.norm.logpdf values (scipy 1.17.1), REFERENCES.md section 8:
    /// the score is −logpdf.
    #[test]
    fn univariate_log_density_matches_scipy() {
        // Training rows with mean 0 and ML variance 1: {-1, 1}.
        let fitted = IndependentGaussian
            .fit(array![[-1.0], [1.0]].view(), &["x".into()])
            .unwrap();
        let s = fitted.score(array![[0.0], [1.0], [-2.5], [10.0]].view());
        let want = [
            0.9189385332046727,
            1.4189385332046727,
            4.043938533204672,
            50.918938533204674,
        ];
        for (got, want) in s.iter().zip(want) {
            assert!((got - want).abs() <= 1e-12, "{got} vs {want}");
        }
        // mean 3, sd 2: {1, 5}; logpdf(0; 3, 2) = −2.737085713764618.
        let fitted = IndependentGaussian
            .fit(array![[1.0], [5.0]].view(), &["x".into()])
            .unwrap();
        let s = fitted.score(array![[0.0]].view());
        assert!((s[0] - 2.737085713764618).abs() <= 1e-12);
    }

    #[test]
    fn variance_divides_by_m() {
        let fitted = IndependentGaussian
            .fit(
                array![[1.0, 0.0], [2.0, 0.0], [3.0, 3.0]].view(),
                &["a".into(), "b".into()],
            )
            .unwrap();
        match fitted.params() {
            Params::IndependentGaussian { mean, variance } => {
                assert_eq!(mean, [2.0, 1.0]);
                assert_eq!(variance, [2.0 / 3.0, 2.0]);
            }
            _ => unreachable!(),
        }
    }

    #[test]
    fn zero_variance_names_the_feature() {
        let e = IndependentGaussian
            .fit(
                array![[1.0, 4.0], [2.0, 4.0]].view(),
                &["a".into(), "wall".into()],
            )
            .err()
            .unwrap();
        let text = e.to_string();
        assert!(
            text.contains("zero variance") && text.contains("`wall`"),
            "{text}"
        );
    }
}
