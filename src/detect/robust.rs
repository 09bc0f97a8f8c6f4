//! Robust Gaussian: the Minimum Covariance Determinant estimate by FastMCD
//! (Rousseeuw and Van Driessen 1999, "A fast algorithm for the minimum
//! covariance determinant estimator", Technometrics 41:212–223), with the
//! consistency correction and the reweighting step.
//!
//! The MCD looks for the h training rows whose covariance has the smallest
//! determinant, so a few anomalies that slipped into the training data pull
//! neither the mean nor the covariance. FastMCD: random (p+1)-subsets, each
//! grown to h rows and improved by C-steps (fit on the h rows, keep the h
//! rows nearest in Mahalanobis distance; the determinant never rises), two
//! steps for every start, then to convergence for the ten best; above 600 rows
//! the starts run on up to five subsets of 300 rows, are pooled, and only the
//! ten best reach the full data. The raw covariance is multiplied by the
//! consistency factor c(α) = α / F_{χ²(p+2)}(χ²_{p,α}) with α = h/m (Croux and
//! Haesbroeck 1999), rows within the 0.975 quantile of χ²_p under that
//! estimate are kept, and the final mean and covariance are theirs (divisor
//! their count), again multiplied by c(0.975). Scores are −ln N(x; μ, Σ) of
//! that final estimate.

use ndarray::{Array2, ArrayView2};
use statrs::distribution::{ChiSquared, ContinuousCDF};

use super::multivariate::{moments, refuse_too_few, Gaussian};
use super::{refuse_constant, Detector, Model, Params};
use crate::error::{Error, Result};

const NAME: &str = "robust-gaussian";
/// Random starts (the paper's choice).
const STARTS: usize = 500;
/// Candidates kept after the short C-step runs.
const KEEP: usize = 10;
/// Subset size and count for large data (the paper's choices).
const SUBSET: usize = 300;
const MAX_SUBSETS: usize = 5;

/// The robust-Gaussian detector.
#[derive(Debug, Clone, Copy)]
pub struct RobustGaussian {
    /// Share of rows the MCD covers; default ⌊(m + p + 1)/2⌋ / m.
    pub support_fraction: Option<f64>,
    /// Seed of the random starts.
    pub seed: u64,
}

/// The consistency factor c(α) = α / F_{χ²(p+2)}(χ²_{p,α}) (Croux and
/// Haesbroeck 1999).
pub fn consistency_factor(p: usize, alpha: f64) -> f64 {
    let q = ChiSquared::new(p as f64).expect("p ≥ 1").inverse_cdf(alpha);
    alpha / ChiSquared::new((p + 2) as f64).expect("p ≥ 1").cdf(q)
}

/// A candidate: its Gaussian (divisor h) and log-determinant.
struct Candidate {
    g: Gaussian,
}

fn rows_of(x: ArrayView2<'_, f64>, idx: &[usize]) -> Array2<f64> {
    let mut out = Array2::zeros((idx.len(), x.ncols()));
    for (k, &i) in idx.iter().enumerate() {
        out.row_mut(k).assign(&x.row(i));
    }
    out
}

fn fit_rows(x: ArrayView2<'_, f64>, idx: &[usize], features: &[String]) -> Option<Gaussian> {
    let (mean, cov) = moments(rows_of(x, idx).view(), None);
    Gaussian::new(mean, cov, NAME, features).ok()
}

/// The h rows of `x` nearest to `g` in Mahalanobis distance (ties by index),
/// in index order. The distances are those of [`Gaussian::mahalanobis2`] (computed
/// by blocks of rows); the h smallest (distance, index) pairs are a set that
/// a selection finds as surely as a full sort, since no two pairs are equal.
fn nearest(x: ArrayView2<'_, f64>, g: &Gaussian, h: usize) -> Vec<usize> {
    let x = x.as_standard_layout();
    let xs = x.as_slice().expect("a standard-layout array is contiguous");
    let mut q = vec![0.0; x.nrows()];
    g.mahalanobis2_rows(xs, &mut q);
    let mut dist: Vec<(f64, usize)> = q.into_iter().zip(0..).collect();
    let by = |a: &(f64, usize), b: &(f64, usize)| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1));
    if h < dist.len() {
        dist.select_nth_unstable_by(h, by);
    }
    let mut idx: Vec<usize> = dist[..h].iter().map(|p| p.1).collect();
    idx.sort_unstable();
    idx
}

/// `steps` C-steps from `g` on `x` (None: to convergence). None when a step
/// meets a singular covariance (an exact fit of h rows).
fn c_steps(
    x: ArrayView2<'_, f64>,
    g: Gaussian,
    h: usize,
    steps: Option<usize>,
    features: &[String],
) -> Option<Candidate> {
    let mut g = g;
    let mut last: Option<Vec<usize>> = None;
    let mut k = 0;
    loop {
        let idx = nearest(x, &g, h);
        if last.as_ref() == Some(&idx) {
            break;
        }
        let next = fit_rows(x, &idx, features)?;
        // The determinant never rises along C-steps; stop when it stalls.
        let stalled = next.ln_det >= g.ln_det && last.is_some();
        g = next;
        last = Some(idx);
        k += 1;
        if stalled || steps.is_some_and(|s| k >= s) || k >= 100 {
            break;
        }
    }
    Some(Candidate { g })
}

/// Starts from random (p+1)-subsets of `x`, each grown by random rows until
/// its covariance is nonsingular, then `steps` C-steps; the `KEEP` best.
fn starts(
    x: ArrayView2<'_, f64>,
    h: usize,
    count: usize,
    rng: &mut rand_chacha::ChaCha8Rng,
    features: &[String],
) -> Vec<Candidate> {
    let (m, d) = x.dim();
    let mut out = Vec::new();
    for _ in 0..count {
        let order = crate::rng::sample(rng, m, m.min(d + 1 + 2 * d));
        let mut size = (d + 1).min(m);
        let g = loop {
            if let Some(g) = fit_rows(x, &order[..size], features) {
                break Some(g);
            }
            if size >= order.len() {
                break None;
            }
            size += 1;
        };
        if let Some(c) = g.and_then(|g| c_steps(x, g, h, Some(2), features)) {
            out.push(c);
        }
    }
    best(out, KEEP)
}

fn best(mut c: Vec<Candidate>, k: usize) -> Vec<Candidate> {
    c.sort_by(|a, b| a.g.ln_det.total_cmp(&b.g.ln_det));
    c.truncate(k);
    c
}

impl Detector for RobustGaussian {
    fn fit(&self, train: ArrayView2<'_, f64>, features: &[String]) -> Result<Box<dyn Model>> {
        refuse_constant(NAME, train, features)?;
        let (m, d) = train.dim();
        refuse_too_few(NAME, m, d)?;
        let h = match self.support_fraction {
            Some(f) => ((f * m as f64).ceil() as usize).clamp(d + 1, m),
            // ⌊(m + p + 1)/2⌋ = ⌈(m + p)/2⌉.
            None => (m + d).div_ceil(2).clamp(d + 1, m),
        };
        let mut rng = crate::rng::seeded(self.seed, 0);
        let raw = if h == m {
            let all: Vec<usize> = (0..m).collect();
            fit_rows(train, &all, features)
        } else if m <= 2 * SUBSET {
            let cands = starts(train, h, STARTS, &mut rng, features);
            let finals: Vec<Candidate> = cands
                .into_iter()
                .filter_map(|c| c_steps(train, c.g, h, None, features))
                .collect();
            best(finals, 1).pop().map(|c| c.g)
        } else {
            // Nested subsets: pool up to 5 × 300 rows.
            let k = (m / SUBSET).min(MAX_SUBSETS);
            let pool = crate::rng::sample(&mut rng, m, k * SUBSET);
            let mut pooled = Vec::new();
            for part in pool.chunks(SUBSET) {
                let sub = rows_of(train, part);
                let hs = ((h as f64 / m as f64) * part.len() as f64).ceil() as usize;
                pooled.extend(starts(
                    sub.view(),
                    hs.clamp(d + 1, part.len()),
                    STARTS / k,
                    &mut rng,
                    features,
                ));
            }
            let merged = rows_of(train, &pool);
            let hm = ((h as f64 / m as f64) * pool.len() as f64).ceil() as usize;
            let merged_best: Vec<Candidate> = pooled
                .into_iter()
                .filter_map(|c| {
                    c_steps(
                        merged.view(),
                        c.g,
                        hm.clamp(d + 1, pool.len()),
                        Some(2),
                        features,
                    )
                })
                .collect();
            let finals: Vec<Candidate> = best(merged_best, KEEP)
                .into_iter()
                .filter_map(|c| c_steps(train, c.g, h, None, features))
                .collect();
            best(finals, 1).pop().map(|c| c.g)
        };
        let raw = raw.ok_or_else(|| Error::Fit {
            detector: NAME.into(),
            message: format!(
                "every subset of {h} training rows has a singular covariance (the rows lie on a \
                 hyperplane); raise `support-fraction` or check the features"
            ),
            features: features.to_vec(),
        })?;

        // Consistency correction, then reweighting at the 0.975 quantile.
        let c_raw = consistency_factor(d, h as f64 / m as f64);
        let corrected = Gaussian::new(
            raw.mean.clone(),
            raw.cov.iter().map(|v| v * c_raw).collect(),
            NAME,
            features,
        )?;
        let cut = ChiSquared::new(d as f64).expect("d ≥ 1").inverse_cdf(0.975);
        let mut z = vec![0.0; d];
        let mut buf = vec![0.0; d];
        let keep: Vec<usize> = (0..m)
            .filter(|&i| {
                for (b, v) in buf.iter_mut().zip(train.row(i).iter()) {
                    *b = *v;
                }
                corrected.mahalanobis2(&buf, &mut z) <= cut
            })
            .collect();
        refuse_too_few(NAME, keep.len(), d)?;
        let (mean, cov) = moments(rows_of(train, &keep).view(), None);
        let c_rw = consistency_factor(d, 0.975);
        let fitted = Gaussian::new(mean, cov.iter().map(|v| v * c_rw).collect(), NAME, features)?;
        Ok(Box::new(Fitted {
            g: fitted,
            raw,
            h,
            kept: keep.len(),
            raw_factor: c_raw,
            reweight_factor: c_rw,
        }))
    }
}

struct Fitted {
    g: Gaussian,
    raw: Gaussian,
    h: usize,
    kept: usize,
    raw_factor: f64,
    reweight_factor: f64,
}

impl Model for Fitted {
    fn score(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        self.g.score_rows(x)
    }

    fn params(&self) -> Params {
        Params::RobustGaussian {
            mean: self.g.mean.clone(),
            covariance: self.g.covariance_rows(),
            ln_det_covariance: self.g.ln_det,
            raw_mean: self.raw.mean.clone(),
            raw_ln_det_covariance: self.raw.ln_det,
            support: self.h,
            reweighted_rows: self.kept,
            consistency_factors: [self.raw_factor, self.reweight_factor],
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Stack-loss data (Brownlee 1965), columns AIRFLOW, WATERTEMP, ACIDCONC,
    /// as in REFERENCES.md section 9.
    const STACKLOSS: [[f64; 3]; 21] = [
        [80., 27., 89.],
        [80., 27., 88.],
        [75., 25., 90.],
        [62., 24., 87.],
        [62., 22., 87.],
        [62., 23., 87.],
        [62., 24., 93.],
        [62., 24., 93.],
        [58., 23., 87.],
        [58., 18., 80.],
        [58., 18., 89.],
        [58., 17., 88.],
        [58., 18., 82.],
        [58., 19., 93.],
        [50., 18., 89.],
        [50., 18., 86.],
        [50., 19., 72.],
        [50., 19., 79.],
        [50., 20., 80.],
        [56., 20., 82.],
        [70., 20., 91.],
    ];

    fn stackloss() -> Array2<f64> {
        Array2::from_shape_fn((21, 3), |(i, j)| STACKLOSS[i][j])
    }

    fn names() -> Vec<String> {
        ["airflow", "watertemp", "acidconc"]
            .iter()
            .map(|s| s.to_string())
            .collect()
    }

    fn raw_of(m: &dyn Model) -> (Vec<f64>, f64, usize) {
        match m.params() {
            Params::RobustGaussian {
                raw_mean,
                raw_ln_det_covariance,
                support,
                ..
            } => (raw_mean, raw_ln_det_covariance, support),
            _ => unreachable!(),
        }
    }

    /// h = 12 (robustbase's default ⌊(n+p+1)/2⌋): the exhaustive optimum over
    /// all C(21,12) subsets is rows 4–14 and 20, mean [59.5, 20.8333, 87.3333],
    /// det (divisor h) 183.3775077160493 (REFERENCES.md section 9; robustbase
    /// 0.92-1 `covMcd(stack.x)` finds the same subset).
    #[test]
    fn stackloss_h12_finds_the_exhaustive_optimum() {
        let m = RobustGaussian {
            support_fraction: None,
            seed: 1,
        }
        .fit(stackloss().view(), &names())
        .unwrap();
        let (mean, ln_det, h) = raw_of(m.as_ref());
        assert_eq!(h, 12);
        for (g, w) in mean
            .iter()
            .zip([59.5, 20.833333333333332, 87.33333333333333])
        {
            assert!((g - w).abs() < 1e-9, "{g} vs {w}");
        }
        assert!(
            (ln_det - 183.3775077160493f64.ln()).abs() < 1e-9,
            "{ln_det}"
        );
    }

    /// h = 13 (scikit-learn's default): the exhaustive optimum has det
    /// 524.6270088582331 and raw mean [58.769, 20.615, 87.231]; the reweighted
    /// mean is [57.125, 20.3125, 86.375] over 16 rows (REFERENCES.md section 9,
    /// scikit-learn 1.9.1 and exhaustive search).
    #[test]
    fn stackloss_h13_matches_exhaustive_search_and_reweighting() {
        let m = RobustGaussian {
            support_fraction: Some(13.0 / 21.0),
            seed: 1,
        }
        .fit(stackloss().view(), &names())
        .unwrap();
        let (mean, ln_det, h) = raw_of(m.as_ref());
        assert_eq!(h, 13);
        assert!(
            ln_det <= 524.6270088582331f64.ln() + 1e-9,
            "{}",
            ln_det.exp()
        );
        for (g, w) in mean
            .iter()
            .zip([58.76923076923077, 20.615384615384617, 87.23076923076923])
        {
            assert!((g - w).abs() < 1e-9, "{g} vs {w}");
        }
        match m.params() {
            Params::RobustGaussian {
                mean,
                reweighted_rows,
                ..
            } => {
                assert_eq!(reweighted_rows, 16);
                for (g, w) in mean.iter().zip([57.125, 20.3125, 86.375]) {
                    assert!((g - w).abs() < 1e-9, "{g} vs {w}");
                }
            }
            _ => unreachable!(),
        }
    }

    /// scikit-learn 1.9.1 `_consistency_factor`, REFERENCES.md section 9.
    #[test]
    fn consistency_factors_match_the_reference() {
        assert!((consistency_factor(3, 13.0 / 21.0) - 1.9917168689808618).abs() < 1e-9);
        assert!((consistency_factor(3, 0.975) - 1.078478718355326).abs() < 1e-9);
    }

    /// 5 % of the training rows are anomalies far from the rest: the classical
    /// mean moves towards them, the robust one does not, and the robust scores
    /// keep the slipped-in anomalies far above the normal rows.
    #[test]
    fn resists_anomalies_slipped_into_training() {
        let mut rng = crate::rng::seeded(4, 0);
        let mut gauss = || {
            let (u, v) = (
                crate::rng::unit(&mut rng).max(1e-300),
                crate::rng::unit(&mut rng),
            );
            (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
        };
        let n = 700;
        let x = Array2::from_shape_fn((n, 3), |(i, _)| gauss() + if i < 35 { 6.0 } else { 0.0 });
        let robust = RobustGaussian {
            support_fraction: None,
            seed: 1,
        }
        .fit(x.view(), &names())
        .unwrap();
        let classical = super::super::MultivariateGaussian
            .fit(x.view(), &names())
            .unwrap();
        let mean = |p: Params| match p {
            Params::RobustGaussian { mean, .. } | Params::MultivariateGaussian { mean, .. } => mean,
            _ => unreachable!(),
        };
        let (r, c) = (mean(robust.params()), mean(classical.params()));
        assert!(r.iter().all(|v| v.abs() < 0.15), "robust mean {r:?}");
        assert!(c.iter().all(|v| *v > 0.2), "classical mean {c:?}");
        let s = robust.score(x.view());
        let worst_normal = s[35..].iter().cloned().fold(f64::MIN, f64::max);
        let outliers_above = s[..35].iter().filter(|v| **v > worst_normal).count();
        assert!(
            outliers_above >= 30,
            "{outliers_above} of 35 outliers above every normal row"
        );
    }
}
