//! Gaussian mixture: EM with full covariances (Dempster, Laird and Rubin
//! 1977), the number of components k chosen by BIC (Schwarz 1978) within a
//! declared range, seeded k-means++ initialisation (Arthur and Vassilvitskii
//! 2007) followed by ten Lloyd iterations, and a covariance floor so that no
//! component collapses onto a few rows.
//!
//! Everything is in log space: component log-densities come from the shared
//! Cholesky code, responsibilities and the mixture density from log-sum-exp.
//! The floor adds `covariance-floor` × (the feature's training variance) to
//! each component's diagonal at every M-step (default 1e-6; scikit-learn adds
//! an absolute 1e-6, which is not scale-free). For each k, three seeded starts
//! run until the mean log-likelihood changes by less than 1e-9 (at most 500
//! iterations) and the best is kept. BIC = −2 ln L + q ln m with
//! q = k·d + k·d(d+1)/2 + k − 1; the smallest BIC wins, ties to the smaller k.
//!
//! The (k, start) fits run side by side when their working memory together
//! is small, each E-step works through blocks of rows on all cores, and every
//! sum is taken in row order: the bits do not depend on the thread count.

use ndarray::ArrayView2;

use super::multivariate::{moments, refuse_too_few, Gaussian};
use super::{refuse_constant, Detector, Model, Params};
use crate::error::{Error, Result};

const NAME: &str = "gaussian-mixture";
const STARTS: u64 = 3;
/// Largest working memory of all (k, start) fits together for which they run
/// side by side (see `fit`).
const SIDE_BY_SIDE_BYTES: usize = 256 << 20;

/// The Gaussian-mixture detector.
#[derive(Debug, Clone, Copy)]
pub struct GaussianMixture {
    /// Smallest k tried.
    pub k_min: usize,
    /// Largest k tried.
    pub k_max: usize,
    /// Seed of the initialisations.
    pub seed: u64,
    /// Floor added to each component's variances, relative to the training variance.
    pub covariance_floor: f64,
    /// Convergence tolerance on the mean log-likelihood.
    pub tolerance: f64,
    /// Iteration cap per start.
    pub max_iterations: usize,
}

impl GaussianMixture {
    /// The defaults documented above, for k in `k_min..=k_max`.
    pub fn new(k_min: usize, k_max: usize, seed: u64, covariance_floor: f64) -> Self {
        GaussianMixture {
            k_min,
            k_max,
            seed,
            covariance_floor,
            tolerance: 1e-9,
            max_iterations: 500,
        }
    }
}

fn logsumexp(v: &[f64]) -> f64 {
    let m = v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() {
        return m;
    }
    m + libm::log(v.iter().map(|x| libm::exp(x - m)).sum::<f64>())
}

/// A fitted mixture.
#[derive(Debug, Clone)]
struct Mixture {
    weights: Vec<f64>,
    components: Vec<Gaussian>,
    log_likelihood: f64,
}

fn sq_dist(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// k-means++ seeding and ten Lloyd iterations on standardised rows; returns
/// a hard assignment.
fn kmeans(x: &[Vec<f64>], k: usize, rng: &mut rand_chacha::ChaCha8Rng) -> Vec<usize> {
    let m = x.len();
    let mut centres = vec![x[crate::rng::below(rng, m as u64) as usize].clone()];
    let mut d2: Vec<f64> = x.iter().map(|r| sq_dist(r, &centres[0])).collect();
    while centres.len() < k {
        let total: f64 = d2.iter().sum();
        let pick = if total > 0.0 {
            let t = crate::rng::unit(rng) * total;
            let mut acc = 0.0;
            let mut chosen = m - 1;
            for (i, v) in d2.iter().enumerate() {
                acc += v;
                if acc > t {
                    chosen = i;
                    break;
                }
            }
            chosen
        } else {
            crate::rng::below(rng, m as u64) as usize
        };
        centres.push(x[pick].clone());
        for (i, r) in x.iter().enumerate() {
            d2[i] = d2[i].min(sq_dist(r, &centres[centres.len() - 1]));
        }
    }
    let mut assign = vec![0usize; m];
    for _ in 0..10 {
        for (i, r) in x.iter().enumerate() {
            let mut best = (f64::INFINITY, 0);
            for (c, centre) in centres.iter().enumerate() {
                let d = sq_dist(r, centre);
                if d < best.0 {
                    best = (d, c);
                }
            }
            assign[i] = best.1;
        }
        let d = x[0].len();
        let mut sums = vec![vec![0.0; d]; k];
        let mut counts = vec![0usize; k];
        for (i, r) in x.iter().enumerate() {
            counts[assign[i]] += 1;
            for (s, v) in sums[assign[i]].iter_mut().zip(r) {
                *s += v;
            }
        }
        for c in 0..k {
            if counts[c] > 0 {
                centres[c] = sums[c].iter().map(|s| s / counts[c] as f64).collect();
            }
        }
    }
    assign
}

/// Rows per parallel task of the E-step and of scoring.
const ROWS_PER_TASK: usize = 1024;

/// `lp[c][i]` = ln wᶜ + ln Nᶜ(xᵢ) for the row-major `xs` (d values a row),
/// and `ll[i]` = ln Σ_c exp lp[c][i], by blocks of rows on all cores. Every
/// row's values are computed alone, by the same operations in the same order
/// on any number of threads, so the bits do not depend on the thread count.
fn log_terms(
    xs: &[f64],
    d: usize,
    weights: &[f64],
    comps: &[Gaussian],
    lp: &mut [Vec<f64>],
    ll: &mut [f64],
) {
    use rayon::prelude::*;
    let k = weights.len();
    for ((lpc, g), w) in lp.iter_mut().zip(comps).zip(weights) {
        let lw = libm::log(*w);
        lpc.par_chunks_mut(ROWS_PER_TASK)
            .zip(xs.par_chunks(ROWS_PER_TASK * d))
            .for_each(|(out, rows)| {
                g.neg_log_density_rows(rows, out);
                for v in out.iter_mut() {
                    *v = lw - *v;
                }
            });
    }
    let lp = &*lp;
    ll.par_chunks_mut(ROWS_PER_TASK)
        .enumerate()
        .for_each(|(t, out)| {
            let mut buf = vec![0.0; k];
            for (o, i) in out.iter_mut().zip(t * ROWS_PER_TASK..) {
                for (b, lpc) in buf.iter_mut().zip(lp) {
                    *b = lpc[i];
                }
                *o = logsumexp(&buf);
            }
        });
}

/// The E-step's responsibilities from [`log_terms`]: `resp[c][i]` =
/// exp(lp[c][i] − ll[i]), by blocks of rows on all cores.
fn responsibilities(lp: &[Vec<f64>], ll: &[f64], resp: &mut [Vec<f64>]) {
    use rayon::prelude::*;
    for (rc, lpc) in resp.iter_mut().zip(lp) {
        rc.par_chunks_mut(ROWS_PER_TASK)
            .zip(lpc.par_chunks(ROWS_PER_TASK))
            .zip(ll.par_chunks(ROWS_PER_TASK))
            .for_each(|((out, lpc), ll)| {
                for ((o, p), l) in out.iter_mut().zip(lpc).zip(ll) {
                    *o = libm::exp(p - l);
                }
            });
    }
}

impl GaussianMixture {
    fn m_step(
        &self,
        x: ArrayView2<'_, f64>,
        resp: &[Vec<f64>],
        floor: &[f64],
        features: &[String],
    ) -> Option<(Vec<f64>, Vec<Gaussian>)> {
        let m = x.nrows() as f64;
        let d = x.ncols();
        let mut weights = Vec::new();
        let mut comps = Vec::new();
        for r in resp {
            let nk: f64 = r.iter().sum();
            if nk <= d as f64 {
                return None;
            }
            let (mean, mut cov) = moments(x, Some(r));
            for j in 0..d {
                cov[j * d + j] += floor[j];
            }
            comps.push(Gaussian::new(mean, cov, NAME, features).ok()?);
            weights.push(nk / m);
        }
        Some((weights, comps))
    }

    fn em(
        &self,
        x: ArrayView2<'_, f64>,
        k: usize,
        start: u64,
        floor: &[f64],
        standardised: &[Vec<f64>],
        features: &[String],
    ) -> Option<Mixture> {
        let (m, d) = x.dim();
        let mut rng = crate::rng::seeded(self.seed, (k as u64) * 1000 + start);
        let assign = kmeans(standardised, k, &mut rng);
        let mut resp: Vec<Vec<f64>> = (0..k)
            .map(|c| {
                assign
                    .iter()
                    .map(|&a| if a == c { 1.0 } else { 0.0 })
                    .collect()
            })
            .collect();
        let xc = x.as_standard_layout();
        let xs = xc
            .as_slice()
            .expect("a standard-layout array is contiguous");
        let mut lp = vec![vec![0.0; m]; k];
        let mut ll = vec![0.0; m];
        let mut previous = f64::NEG_INFINITY;
        let mut mixture = None;
        for _ in 0..self.max_iterations {
            let (weights, comps) = self.m_step(x, &resp, floor, features)?;
            log_terms(xs, d, &weights, &comps, &mut lp, &mut ll);
            responsibilities(&lp, &ll, &mut resp);
            // Summed in row order, whatever the threads did.
            let total = ll.iter().fold(0.0, |a, l| a + l);
            let mean_ll = total / m as f64;
            mixture = Some(Mixture {
                weights,
                components: comps,
                log_likelihood: total,
            });
            if (mean_ll - previous).abs() < self.tolerance {
                break;
            }
            previous = mean_ll;
        }
        // The returned parameters are those that produced the final E-step.
        mixture
    }
}

impl Detector for GaussianMixture {
    fn fit(&self, train: ArrayView2<'_, f64>, features: &[String]) -> Result<Box<dyn Model>> {
        refuse_constant(NAME, train, features)?;
        let (m, d) = train.dim();
        refuse_too_few(NAME, m, d)?;
        let (_, cov) = moments(train, None);
        let sd: Vec<f64> = (0..d).map(|j| cov[j * d + j].sqrt()).collect();
        let floor: Vec<f64> = (0..d)
            .map(|j| self.covariance_floor * cov[j * d + j])
            .collect();
        let (mean, _) = moments(train, None);
        let standardised: Vec<Vec<f64>> = train
            .rows()
            .into_iter()
            .map(|r| {
                r.iter()
                    .enumerate()
                    .map(|(j, v)| (v - mean[j]) / sd[j])
                    .collect()
            })
            .collect();
        let mut best: Option<(f64, usize, Mixture)> = None;
        let mut bic_by_k = Vec::new();
        // Every (k, start) fit is independent of the others. A start holds
        // about (2k + 1)·m values while it runs; when all of them together fit
        // in SIDE_BY_SIDE_BYTES they run side by side, otherwise one after
        // another (each E-step and M-step still on all cores). The best start
        // of each k is then taken in order: the bits are the same either way.
        use rayon::prelude::*;
        let runs: Vec<(usize, u64)> = (self.k_min..=self.k_max)
            .flat_map(|k| (0..STARTS).map(move |s| (k, s)))
            .collect();
        let held: usize = runs.iter().map(|&(k, _)| (2 * k + 1) * m * 8).sum();
        let run = |&(k, s): &(usize, u64)| self.em(train, k, s, &floor, &standardised, features);
        let mut fits: Vec<Option<Mixture>> = if held <= SIDE_BY_SIDE_BYTES {
            runs.par_iter().map(run).collect()
        } else {
            runs.iter().map(run).collect()
        };
        for k in self.k_min..=self.k_max {
            let mut fit: Option<Mixture> = None;
            for (_, mx) in runs.iter().zip(fits.iter_mut()).filter(|(r, _)| r.0 == k) {
                if let Some(mx) = mx.take() {
                    if fit
                        .as_ref()
                        .is_none_or(|f| mx.log_likelihood > f.log_likelihood)
                    {
                        fit = Some(mx);
                    }
                }
            }
            let Some(fit) = fit else {
                bic_by_k.push((k, None));
                continue;
            };
            let q = (k * d + k * d * (d + 1) / 2 + k - 1) as f64;
            let bic = -2.0 * fit.log_likelihood + q * libm::log(m as f64);
            bic_by_k.push((k, Some(bic)));
            if best.as_ref().is_none_or(|b| bic < b.0) {
                best = Some((bic, k, fit));
            }
        }
        let (bic, k, mixture) = best.ok_or_else(|| Error::Fit {
            detector: NAME.into(),
            message: format!(
                "no mixture with {} to {} components could be fitted: a component kept fewer \
                 rows than features or a singular covariance",
                self.k_min, self.k_max
            ),
            features: vec![],
        })?;
        Ok(Box::new(Fitted {
            mixture,
            k,
            bic,
            bic_by_k,
        }))
    }
}

/// Rebuilds a scoring model from recorded weights, means and covariances
/// (row-major); only its scores are used.
pub(crate) fn restore(
    weights: Vec<f64>,
    means: Vec<Vec<f64>>,
    covariances: Vec<Vec<f64>>,
    features: &[String],
) -> Result<Box<dyn Model>> {
    let components = means
        .into_iter()
        .zip(covariances)
        .map(|(m, c)| Gaussian::new(m, c, NAME, features))
        .collect::<Result<Vec<_>>>()?;
    let k = weights.len();
    Ok(Box::new(Fitted {
        mixture: Mixture {
            weights,
            components,
            log_likelihood: 0.0,
        },
        k,
        bic: 0.0,
        bic_by_k: vec![],
    }))
}

struct Fitted {
    mixture: Mixture,
    k: usize,
    bic: f64,
    bic_by_k: Vec<(usize, Option<f64>)>,
}

impl Model for Fitted {
    fn score(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let (m, d) = x.dim();
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("a standard-layout array is contiguous");
        let mut lp = vec![vec![0.0; m]; self.k];
        let mut ll = vec![0.0; m];
        let mx = &self.mixture;
        log_terms(xs, d, &mx.weights, &mx.components, &mut lp, &mut ll);
        for v in ll.iter_mut() {
            *v = -*v;
        }
        ll
    }

    fn params(&self) -> Params {
        Params::GaussianMixture {
            k: self.k,
            weights: self.mixture.weights.clone(),
            means: self
                .mixture
                .components
                .iter()
                .map(|g| g.mean.clone())
                .collect(),
            covariances: self
                .mixture
                .components
                .iter()
                .map(|g| g.covariance_rows())
                .collect(),
            log_likelihood: self.mixture.log_likelihood,
            bic: self.bic,
            bic_by_k: self.bic_by_k.clone(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    /// R `datasets::faithful$waiting` (n = 272), REFERENCES.md section 10.
    const WAITING: &str = "79 54 74 62 85 55 88 85 51 85 54 84 78 47 83 52 62 84 52 79 51 47 78 69 74 83 55 76 78 79 73 77 66 80 74 52 48 80 59 90 80 58 84 58 73 83 64 53 82 59 75 90 54 80 54 83 71 64 77 81 \
59 84 48 82 60 92 78 78 65 73 82 56 79 71 62 76 60 78 76 83 75 82 70 65 73 88 76 80 48 86 60 90 50 78 63 72 84 75 51 82 62 88 49 83 81 47 84 52 86 81 75 59 89 79 59 81 50 85 59 87 \
53 69 77 56 88 81 45 82 55 90 45 83 56 89 46 82 51 86 53 79 81 60 82 77 76 59 80 49 96 53 77 77 65 81 71 70 81 93 53 89 45 86 58 78 66 76 63 88 52 93 49 57 77 68 81 81 73 50 85 74 \
55 77 83 83 51 78 84 46 83 55 81 57 76 84 77 81 87 77 51 78 60 82 91 53 78 46 77 84 49 83 71 80 49 75 64 76 53 94 55 76 50 82 54 75 78 79 78 78 70 79 70 54 86 50 90 54 54 77 79 64 \
75 47 86 63 85 82 57 82 67 74 54 83 73 73 88 80 71 83 56 79 78 84 58 83 43 60 75 81 46 90 46 74";

    /// Two components on the waiting times, no covariance floor, tight
    /// convergence: the maximum-likelihood fit of REFERENCES.md section 10
    /// (EM for 20,000 iterations, confirmed by BFGS): λ₁ = 0.3608860737901718,
    /// μ = (54.61485614062294, 80.09106940273371), σ = (5.871219412224502,
    /// 5.867734423707697), ln L = −1034.0017498316083; checked to 1e-6
    /// relative (EM approaches the optimum slowly).
    #[test]
    fn faithful_waiting_two_components_match_the_mle() {
        let v: Vec<f64> = WAITING
            .split_whitespace()
            .map(|s| s.parse().unwrap())
            .collect();
        assert_eq!((v.len(), v.iter().sum::<f64>()), (272, 19284.0));
        let x = Array2::from_shape_vec((272, 1), v).unwrap();
        let gm = GaussianMixture {
            tolerance: 1e-14,
            max_iterations: 20_000,
            ..GaussianMixture::new(2, 2, 1, 0.0)
        };
        let fitted = gm.fit(x.view(), &["waiting".into()]).unwrap();
        let Params::GaussianMixture {
            weights,
            means,
            covariances,
            log_likelihood,
            ..
        } = fitted.params()
        else {
            unreachable!()
        };
        let lo = if means[0][0] < means[1][0] { 0 } else { 1 };
        let hi = 1 - lo;
        let rel = |a: f64, b: f64| ((a - b) / b).abs();
        assert!(rel(weights[lo], 0.3608860737901718) < 1e-6, "{weights:?}");
        assert!(rel(means[lo][0], 54.61485614062294) < 1e-6, "{means:?}");
        assert!(rel(means[hi][0], 80.09106940273371) < 1e-6, "{means:?}");
        assert!(rel(covariances[lo][0][0].sqrt(), 5.871219412224502) < 1e-6);
        assert!(rel(covariances[hi][0][0].sqrt(), 5.867734423707697) < 1e-6);
        assert!(
            rel(log_likelihood, -1034.0017498316083) < 1e-9,
            "{log_likelihood}"
        );
    }

    /// The fit (starts side by side, E-steps in parallel row blocks) has the
    /// same bits on 1, 2 and 5 threads; 2,500 rows leave a partial block.
    #[test]
    fn fit_does_not_depend_on_threads() {
        let x = Array2::from_shape_fn((2_500, 3), |(i, j)| {
            let t = (i * 7919 + j * 104_729) % 1_000;
            t as f64 / 100.0 + if i % 3 == 0 { 6.0 } else { 0.0 } + j as f64
        });
        let names = ["a", "b", "c"].map(String::from);
        let fit = |threads: usize| {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            pool.install(|| {
                let f = GaussianMixture {
                    max_iterations: 40,
                    ..GaussianMixture::new(1, 3, 7, 1e-6)
                }
                .fit(x.view(), &names)
                .unwrap();
                let scores: Vec<u64> = f.score(x.view()).iter().map(|v| v.to_bits()).collect();
                (format!("{:?}", f.params()), scores)
            })
        };
        let one = fit(1);
        assert_eq!(fit(2), one);
        assert_eq!(fit(5), one);
    }

    /// Two well-separated clusters: BIC picks k = 2 out of 1..=4.
    #[test]
    fn bic_picks_the_true_number_of_clusters() {
        let mut rng = crate::rng::seeded(2, 0);
        let mut g = || {
            let (u, v) = (
                crate::rng::unit(&mut rng).max(1e-300),
                crate::rng::unit(&mut rng),
            );
            (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
        };
        let x = Array2::from_shape_fn((600, 2), |(i, _)| g() + if i % 2 == 0 { 0.0 } else { 8.0 });
        let fitted = GaussianMixture::new(1, 4, 1, 1e-6)
            .fit(x.view(), &["a".into(), "b".into()])
            .unwrap();
        let Params::GaussianMixture { k, bic_by_k, .. } = fitted.params() else {
            unreachable!()
        };
        assert_eq!(k, 2, "{bic_by_k:?}");
        // A point between the clusters is less likely than one in a cluster.
        let s = fitted.score(
            Array2::from_shape_vec((2, 2), vec![4.0, 4.0, 0.0, 0.0])
                .unwrap()
                .view(),
        );
        assert!(s[0] > s[1] + 5.0, "{s:?}");
    }
}
