//! Multivariate Gaussian: one normal density over all features, with the mean
//! and the maximum-likelihood covariance (divisor m) of the training rows.
//!
//! s(x) = ½ (d ln 2π + ln |Σ| + (x − μ)ᵀ Σ⁻¹ (x − μ)), with Σ = L Lᵀ by
//! Cholesky (nalgebra), ln |Σ| = 2 Σ ln Lᵢᵢ, and the quadratic form as ‖z‖²
//! where L z = x − μ. No density is ever formed outside log space.

use nalgebra::DMatrix;
use ndarray::ArrayView2;

use super::{ln, Detector, Model, Params, HALF_LN_2PI};
use crate::error::Result;
use crate::rules;

/// Largest condition number of the correlation matrix that is accepted. At
/// 1e10 the quadratic form keeps about six significant digits in binary64
/// (relative error ≈ κ·2⁻⁵²); picked for that reason, not tuned on data.
pub const MAX_CONDITION: f64 = 1e10;

const NAME: &str = "multivariate-gaussian";

/// The multivariate-Gaussian detector.
#[derive(Debug, Clone, Copy, Default)]
pub struct MultivariateGaussian;

/// A fitted normal density: mean, covariance and its Cholesky factor. Shared
/// by every Gaussian-based detector.
#[derive(Debug, Clone)]
pub(crate) struct Gaussian {
    d: usize,
    pub(crate) mean: Vec<f64>,
    /// Covariance, row-major.
    pub(crate) cov: Vec<f64>,
    /// Lower Cholesky factor, row-major.
    chol: Vec<f64>,
    pub(crate) ln_det: f64,
}

/// Mean and maximum-likelihood covariance (divisor Σw) of the rows, each with
/// weight `w[i]` (all 1 when `w` is `None`), summed in row order.
///
/// Every sum (Σw, each mean, each covariance entry) is its own accumulator
/// taken over the rows in order, so the work is shared between threads by
/// accumulator, never by row: the bits do not depend on the thread count.
pub(crate) fn moments(x: ArrayView2<'_, f64>, w: Option<&[f64]>) -> (Vec<f64>, Vec<f64>) {
    use rayon::prelude::*;
    let (m, d) = x.dim();
    let x = x.as_standard_layout();
    let xs = x.as_slice().expect("a standard-layout array is contiguous");
    let row = |i: usize| &xs[i * d..(i + 1) * d];
    let weight = |i: usize| w.map_or(1.0, |w| w[i]);
    let total: f64 = (0..m).map(weight).sum();
    // One task per thread, each streaming the rows once for a contiguous
    // range of accumulators (balanced by their count).
    let groups = |weights: &dyn Fn(usize) -> usize| -> Vec<std::ops::Range<usize>> {
        let tasks = rayon::current_num_threads().clamp(1, d.max(1));
        let all: usize = (0..d).map(weights).sum();
        let mut out = Vec::new();
        let (mut start, mut done) = (0, 0);
        for a in 0..d {
            done += weights(a);
            if done * tasks >= all * (out.len() + 1) || a + 1 == d {
                out.push(start..a + 1);
                start = a + 1;
            }
        }
        out
    };
    // Means, by column.
    let mean_parts: Vec<Vec<f64>> = groups(&|_| 1)
        .into_par_iter()
        .map(|cols| {
            let mut acc = vec![0.0; cols.len()];
            for i in 0..m {
                let wi = weight(i);
                for (s, v) in acc.iter_mut().zip(&row(i)[cols.clone()]) {
                    *s += wi * v;
                }
            }
            acc
        })
        .collect();
    let mut mean: Vec<f64> = mean_parts.concat();
    for s in mean.iter_mut() {
        *s /= total;
    }
    // The lower triangle, by row a of the covariance: entries (a, 0..=a).
    let lower: Vec<Vec<f64>> = groups(&|_| 1)
        .into_par_iter()
        .flat_map_iter(|rows_a| lower_rows(xs, d, w, &mean, rows_a))
        .collect();
    let mut cov = vec![0.0; d * d];
    for (a, acc) in lower.iter().enumerate() {
        for (b, s) in acc.iter().enumerate() {
            let v = s / total;
            cov[a * d + b] = v;
            cov[b * d + a] = v;
        }
    }
    (mean, cov)
}

/// The lower-triangle rows `rows_a` of Σ w (x − mean)(x − mean)ᵀ (unscaled) over
/// the row-major `xs`; compiled for AVX2 where the CPU has it (the same
/// operations lane by lane, so the same bits).
fn lower_rows(
    xs: &[f64],
    d: usize,
    w: Option<&[f64]>,
    mean: &[f64],
    rows_a: std::ops::Range<usize>,
) -> Vec<Vec<f64>> {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx512f") {
            // SAFETY: the CPU has just been seen to support AVX-512F.
            return unsafe { lower_rows_avx512(xs, d, w, mean, rows_a) };
        }
        if std::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been seen to support AVX2.
            return unsafe { lower_rows_avx2(xs, d, w, mean, rows_a) };
        }
    }
    lower_rows_generic(xs, d, w, mean, rows_a)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
fn lower_rows_avx512(
    xs: &[f64],
    d: usize,
    w: Option<&[f64]>,
    mean: &[f64],
    rows_a: std::ops::Range<usize>,
) -> Vec<Vec<f64>> {
    lower_rows_generic(xs, d, w, mean, rows_a)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn lower_rows_avx2(
    xs: &[f64],
    d: usize,
    w: Option<&[f64]>,
    mean: &[f64],
    rows_a: std::ops::Range<usize>,
) -> Vec<Vec<f64>> {
    lower_rows_generic(xs, d, w, mean, rows_a)
}

#[inline(always)]
fn lower_rows_generic(
    xs: &[f64],
    d: usize,
    w: Option<&[f64]>,
    mean: &[f64],
    rows_a: std::ops::Range<usize>,
) -> Vec<Vec<f64>> {
    let m = xs.len() / d.max(1);
    let row = |i: usize| &xs[i * d..(i + 1) * d];
    let weight = |i: usize| w.map_or(1.0, |w| w[i]);
    // Each accumulator row is kept whole (all d entries, so the inner loops
    // have one fixed length and run in full vectors); only its lower part,
    // entries (a, 0..=a), is returned. Every entry is the same sum either way.
    let n_rows = rows_a.len();
    let mut acc = vec![0.0; n_rows * d];
    // Rows are taken four at a time: each accumulator is loaded once,
    // gets the four rows' terms in row order, and is stored once.
    let mut c = [vec![0.0; d], vec![0.0; d], vec![0.0; d], vec![0.0; d]];
    let centre = |c: &mut [f64], i: usize| {
        for ((cj, v), mu) in c.iter_mut().zip(row(i)).zip(mean) {
            *cj = v - mu;
        }
    };
    let quads = m / 4;
    for q in 0..quads {
        let i = 4 * q;
        let w = [weight(i), weight(i + 1), weight(i + 2), weight(i + 3)];
        for (r, cr) in c.iter_mut().enumerate() {
            centre(cr, i + r);
        }
        let [c0, c1, c2, c3] = &c;
        for (a, entries) in rows_a.clone().zip(acc.chunks_exact_mut(d)) {
            let wc = [w[0] * c0[a], w[1] * c1[a], w[2] * c2[a], w[3] * c3[a]];
            for ((((s, x0), x1), x2), x3) in entries.iter_mut().zip(c0).zip(c1).zip(c2).zip(c3) {
                let mut v = *s;
                v += wc[0] * x0;
                v += wc[1] * x1;
                v += wc[2] * x2;
                v += wc[3] * x3;
                *s = v;
            }
        }
    }
    let c0 = &mut c[0];
    for i in 4 * quads..m {
        let wi = weight(i);
        centre(c0, i);
        for (a, entries) in rows_a.clone().zip(acc.chunks_exact_mut(d)) {
            let wc = wi * c0[a];
            for (s, cb) in entries.iter_mut().zip(c0.iter()) {
                *s += wc * cb;
            }
        }
    }
    rows_a
        .zip(acc.chunks_exact(d))
        .map(|(a, entries)| entries[..=a].to_vec())
        .collect()
}

impl Gaussian {
    /// Factors the covariance, refusing a singular or ill-conditioned one.
    pub(crate) fn new(
        mean: Vec<f64>,
        cov: Vec<f64>,
        detector: &str,
        features: &[String],
    ) -> Result<Self> {
        let d = mean.len();
        refuse_ill_conditioned(&cov, d, features, detector)?;
        let sigma = DMatrix::from_row_slice(d, d, &cov);
        let chol = sigma
            .cholesky()
            .ok_or_else(|| rules::not_positive_definite(detector, features))?;
        let l = chol.l();
        let mut flat = vec![0.0; d * d];
        let mut ln_det = 0.0;
        for i in 0..d {
            for j in 0..=i {
                flat[i * d + j] = l[(i, j)];
            }
            ln_det += 2.0 * ln(l[(i, i)]);
        }
        Ok(Gaussian {
            d,
            mean,
            cov,
            chol: flat,
            ln_det,
        })
    }

    /// (x − μ)ᵀ Σ⁻¹ (x − μ), by forward substitution L z = x − μ.
    pub(crate) fn mahalanobis2(&self, row: &[f64], z: &mut [f64]) -> f64 {
        let d = self.d;
        let mut q = 0.0;
        for i in 0..d {
            let mut r = row[i] - self.mean[i];
            let li = &self.chol[i * d..i * d + i];
            for (l, zj) in li.iter().zip(&z[..i]) {
                r -= l * zj;
            }
            z[i] = r / self.chol[i * d + i];
            q += z[i] * z[i];
        }
        q
    }

    /// −ln N(x; μ, Σ).
    #[cfg(test)]
    pub(crate) fn neg_log_density(&self, row: &[f64], z: &mut [f64]) -> f64 {
        self.d as f64 * HALF_LN_2PI + 0.5 * self.ln_det + 0.5 * self.mahalanobis2(row, z)
    }

    /// The covariance as rows.
    pub(crate) fn covariance_rows(&self) -> Vec<Vec<f64>> {
        self.cov.chunks(self.d).map(<[f64]>::to_vec).collect()
    }

    /// −ln N for every row of `x`.
    pub(crate) fn score_rows(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("a standard-layout array is contiguous");
        let mut out = vec![0.0; x.nrows()];
        self.neg_log_density_rows(xs, &mut out);
        out
    }

    /// −ln N for each row of the row-major `xs` (`out.len()` rows of d
    /// values), into `out`: the same bits as [`Gaussian::neg_log_density`]
    /// row by row (see [`Gaussian::mahalanobis2_rows`]).
    pub(crate) fn neg_log_density_rows(&self, xs: &[f64], out: &mut [f64]) {
        let constant = self.d as f64 * HALF_LN_2PI + 0.5 * self.ln_det;
        self.mahalanobis2_rows(xs, out);
        for o in out.iter_mut() {
            *o = constant + 0.5 * *o;
        }
    }

    /// (x − μ)ᵀ Σ⁻¹ (x − μ) for each row of the row-major `xs` (`out.len()`
    /// rows of d values), into `out`.
    ///
    /// Rows go through the forward substitution [`BLOCK`] at a time, lane by
    /// lane, so that the CPU has independent chains to work on (one row's
    /// substitution is a chain of dependent steps), compiled for AVX-512F or
    /// AVX2 where the CPU has them. Each row sees exactly the operations of
    /// [`Gaussian::mahalanobis2`] in the same order (no fused operations), so
    /// the bits are the same as row by row, on any CPU.
    pub(crate) fn mahalanobis2_rows(&self, xs: &[f64], out: &mut [f64]) {
        #[cfg(target_arch = "x86_64")]
        {
            if std::is_x86_feature_detected!("avx512f") {
                // SAFETY: the CPU has just been seen to support AVX-512F.
                return unsafe { self.mahalanobis2_rows_avx512(xs, out) };
            }
            if std::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU has just been seen to support AVX2.
                return unsafe { self.mahalanobis2_rows_avx2(xs, out) };
            }
        }
        self.mahalanobis2_rows_generic(xs, out)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f")]
    fn mahalanobis2_rows_avx512(&self, xs: &[f64], out: &mut [f64]) {
        self.mahalanobis2_rows_generic(xs, out)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    fn mahalanobis2_rows_avx2(&self, xs: &[f64], out: &mut [f64]) {
        self.mahalanobis2_rows_generic(xs, out)
    }

    #[inline(always)]
    fn mahalanobis2_rows_generic(&self, xs: &[f64], out: &mut [f64]) {
        let d = self.d;
        assert_eq!(xs.len(), out.len() * d, "{} rows of {d} values", out.len());
        let mut z = vec![[0.0f64; BLOCK]; d];
        let blocks = out.len() / BLOCK;
        for (rows, o) in xs.chunks_exact(d * BLOCK).zip(out.chunks_exact_mut(BLOCK)) {
            let mut q = [0.0f64; BLOCK];
            for i in 0..d {
                let mut r = [0.0f64; BLOCK];
                for (b, rb) in r.iter_mut().enumerate() {
                    *rb = rows[b * d + i] - self.mean[i];
                }
                for (l, zj) in self.chol[i * d..i * d + i].iter().zip(&z[..i]) {
                    for (rb, zb) in r.iter_mut().zip(zj) {
                        *rb -= l * zb;
                    }
                }
                let lii = self.chol[i * d + i];
                for ((zb, rb), qb) in z[i].iter_mut().zip(&r).zip(q.iter_mut()) {
                    *zb = rb / lii;
                    *qb += *zb * *zb;
                }
            }
            o.copy_from_slice(&q);
        }
        let mut zr = vec![0.0; d];
        for (row, o) in xs[blocks * BLOCK * d..]
            .chunks_exact(d)
            .zip(&mut out[blocks * BLOCK..])
        {
            *o = self.mahalanobis2(row, &mut zr);
        }
    }
}

/// Rows per block of [`Gaussian::mahalanobis2_rows`].
const BLOCK: usize = 8;

/// Refuses fewer rows than needed for a covariance over `d` features.
pub(crate) fn refuse_too_few(detector: &str, m: usize, d: usize) -> Result<()> {
    rules::refuse_too_few_for_covariance(detector, m as u64, d)
}

impl Detector for MultivariateGaussian {
    /// The rows taken as one bucket of [`crate::moments`], in the order
    /// given (a run fits from the content-hash buckets' moments instead,
    /// through [`super::fit_moments`], the one place of the refusals).
    fn fit(&self, train: ArrayView2<'_, f64>, features: &[String]) -> Result<Box<dyn Model>> {
        super::fit_moments(
            crate::spec::DetectorKind::MultivariateGaussian,
            &crate::moments::Moments::of_bucket(train),
            features,
        )
    }
}

struct Fitted(Gaussian);

/// Rebuilds the model from a recorded mean and covariance (row-major).
pub(crate) fn restore(
    mean: Vec<f64>,
    cov: Vec<f64>,
    features: &[String],
) -> Result<Box<dyn Model>> {
    Ok(Box::new(Fitted(Gaussian::new(mean, cov, NAME, features)?)))
}

/// Refuses a covariance whose correlation matrix is singular or nearly so,
/// naming the features that take part in the near-dependence (the large
/// entries of the eigenvector of the smallest eigenvalue).
fn refuse_ill_conditioned(
    cov: &[f64],
    d: usize,
    features: &[String],
    detector: &str,
) -> Result<()> {
    let sd: Vec<f64> = (0..d).map(|i| cov[i * d + i].sqrt()).collect();
    if let Some(j) = sd.iter().position(|s| !s.is_finite() || *s <= 0.0) {
        return Err(rules::zero_variance_in_covariance(detector, &features[j]));
    }
    let corr = DMatrix::from_fn(d, d, |i, j| cov[i * d + j] / (sd[i] * sd[j]));
    let eigen = corr.symmetric_eigen();
    let (mut lo, mut hi) = (0, 0);
    for k in 0..d {
        if eigen.eigenvalues[k] < eigen.eigenvalues[lo] {
            lo = k;
        }
        if eigen.eigenvalues[k] > eigen.eigenvalues[hi] {
            hi = k;
        }
    }
    let (min, max) = (eigen.eigenvalues[lo], eigen.eigenvalues[hi]);
    if min > 0.0 && max / min <= MAX_CONDITION {
        return Ok(());
    }
    let v = eigen.eigenvectors.column(lo);
    let largest = v.iter().fold(0.0f64, |a, x| a.max(x.abs()));
    let mut involved: Vec<(f64, String)> = (0..d)
        .filter(|&j| v[j].abs() >= 0.1 * largest)
        .map(|j| (v[j].abs(), features[j].clone()))
        .collect();
    involved.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)));
    let condition = if min > 0.0 {
        format!("{:.3e}", max / min)
    } else {
        "infinite".into()
    };
    Err(rules::ill_conditioned(
        detector,
        &condition,
        MAX_CONDITION,
        involved.into_iter().map(|(_, f)| f).collect(),
    ))
}

impl Model for Fitted {
    fn score(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        self.0.score_rows(x)
    }

    fn params(&self) -> Params {
        Params::MultivariateGaussian {
            mean: self.0.mean.clone(),
            covariance: self.0.covariance_rows(),
            ln_det_covariance: self.0.ln_det,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The blocked scores equal the row-by-row scores bit for bit, for row
    /// counts that fill whole blocks, leave a tail, or are smaller than one
    /// block (the identity is the design of `mahalanobis2_rows`), and so do
    /// the blocked squared Mahalanobis distances.
    #[test]
    fn blocked_scores_equal_row_by_row_scores() {
        let d = 5;
        let x = ndarray::Array2::from_shape_fn((403, d), |(i, j)| {
            ((i * 13 + j * 7) % 29) as f64 / 3.0 - 4.0 + ((i + j) as f64).sqrt() * 0.01
        });
        let (mean, cov) = moments(x.view(), None);
        let g = Gaussian::new(
            mean,
            cov,
            NAME,
            &["a", "b", "c", "d", "e"].map(String::from),
        )
        .unwrap();
        let mut z = vec![0.0; d];
        let expected: Vec<u64> = x
            .rows()
            .into_iter()
            .map(|r| g.neg_log_density(&r.to_vec(), &mut z).to_bits())
            .collect();
        for n in [0, 3, 8, 16, 403] {
            let xs = x
                .slice(ndarray::s![..n, ..])
                .to_owned()
                .into_raw_vec_and_offset()
                .0;
            let mut out = vec![0.0; n];
            g.neg_log_density_rows(&xs, &mut out);
            let got: Vec<u64> = out.iter().map(|v| v.to_bits()).collect();
            assert_eq!(got, expected[..n], "{n} rows");
            g.mahalanobis2_rows(&xs, &mut out);
            let mut plain = vec![0.0; n];
            g.mahalanobis2_rows_generic(&xs, &mut plain);
            for (i, ((o, p), r)) in out.iter().zip(&plain).zip(x.rows()).enumerate() {
                let want = g.mahalanobis2(&r.to_vec(), &mut z);
                assert_eq!(o.to_bits(), want.to_bits(), "{n} rows, row {i}");
                assert_eq!(
                    p.to_bits(),
                    want.to_bits(),
                    "{n} rows, row {i}, plain build"
                );
            }
        }
    }

    /// The shared-out sums equal one sequential pass in row order, bit for
    /// bit, on any number of threads.
    #[test]
    fn moments_do_not_depend_on_threads() {
        let (m, d) = (3001, 7);
        let x = ndarray::Array2::from_shape_fn((m, d), |(i, j)| {
            ((i * 31 + j * 17) % 101) as f64 / 7.0 - 3.0 + (i as f64).sqrt() * 1e-3
        });
        let w: Vec<f64> = (0..m).map(|i| 0.25 + (i % 5) as f64 * 0.3).collect();
        for weights in [None, Some(w.as_slice())] {
            let wt = |i: usize| weights.map_or(1.0, |w| w[i]);
            let total: f64 = (0..m).map(wt).sum();
            let mut mean = vec![0.0; d];
            for i in 0..m {
                for j in 0..d {
                    mean[j] += wt(i) * x[(i, j)];
                }
            }
            for v in mean.iter_mut() {
                *v /= total;
            }
            let mut cov = vec![0.0; d * d];
            for i in 0..m {
                for a in 0..d {
                    for b in 0..=a {
                        cov[a * d + b] += wt(i) * (x[(i, a)] - mean[a]) * (x[(i, b)] - mean[b]);
                    }
                }
            }
            for a in 0..d {
                for b in 0..=a {
                    cov[a * d + b] /= total;
                    cov[b * d + a] = cov[a * d + b];
                }
            }
            for threads in [1, 2, 3, 8] {
                let pool = rayon::ThreadPoolBuilder::new()
                    .num_threads(threads)
                    .build()
                    .unwrap();
                let (mu, c) = pool.install(|| moments(x.view(), weights));
                let bits = |v: &[f64]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
                assert_eq!(bits(&mu), bits(&mean), "{threads} threads");
                assert_eq!(bits(&c), bits(&cov), "{threads} threads");
            }
            // The plain build of the covariance sums gives the same bits as
            // the one the CPU's vector width chose.
            let xs = x.as_slice().unwrap();
            assert_eq!(
                lower_rows_generic(xs, d, weights, &mean, 0..d),
                lower_rows(xs, d, weights, &mean, 0..d)
            );
        }
    }
    use ndarray::{array, Array2};

    /// Training rows whose mean and ML covariance are exactly μ and Σ: the
    /// points μ ± √(d)·(columns of a square root of Σ), here built from the
    /// Cholesky factor: 2d points with mean μ and covariance L Lᵀ.
    fn rows_with(mu: &[f64], sigma: &[f64]) -> Array2<f64> {
        let d = mu.len();
        let l = DMatrix::from_row_slice(d, d, sigma).cholesky().unwrap().l();
        let s = (d as f64).sqrt();
        let mut x = Array2::zeros((2 * d, d));
        for k in 0..d {
            for i in 0..d {
                x[(2 * k, i)] = mu[i] + s * l[(i, k)];
                x[(2 * k + 1, i)] = mu[i] - s * l[(i, k)];
            }
        }
        x
    }

    /// scipy.stats.multivariate_normal(mean=μ, cov=Σ).logpdf (scipy 1.17.1),
    /// REFERENCES.md section 8. The score is −logpdf.
    #[test]
    fn log_density_matches_scipy() {
        let mu = [1.0, -2.0, 0.5];
        let sigma = [2.0, 0.3, -0.4, 0.3, 1.5, 0.2, -0.4, 0.2, 1.0];
        let x = rows_with(&mu, &sigma);
        let names: Vec<String> = ["a", "b", "c"].iter().map(|s| s.to_string()).collect();
        let fitted = MultivariateGaussian.fit(x.view(), &names).unwrap();
        match fitted.params() {
            Params::MultivariateGaussian {
                ln_det_covariance, ..
            } => assert!((ln_det_covariance - 0.9329511727672624).abs() <= 1e-12),
            _ => unreachable!(),
        }
        let s = fitted.score(array![[0.0, 0.0, 0.0], [1.5, -1.0, 2.0], [1.0, -2.0, 0.5]].view());
        let want = [5.7346011781298305, 4.758007944455556, 3.22329118599765];
        for (got, want) in s.iter().zip(want) {
            assert!((got - want).abs() <= 1e-12, "{got} vs {want}");
        }
    }

    #[test]
    fn collinear_features_are_named() {
        // c = a + b exactly: singular covariance.
        let x = array![
            [1.0, 2.0, 3.0, 0.5],
            [2.0, 1.0, 3.0, 0.1],
            [0.0, 4.0, 4.0, 0.9],
            [3.0, 3.0, 6.0, 0.3],
            [1.5, 0.5, 2.0, 0.7]
        ];
        let names: Vec<String> = ["a", "b", "c", "d"].iter().map(|s| s.to_string()).collect();
        let e = MultivariateGaussian.fit(x.view(), &names).err().unwrap();
        let text = e.to_string();
        assert!(text.contains("singular"), "{text}");
        for f in ["`a`", "`b`", "`c`"] {
            assert!(text.contains(f), "{f} missing: {text}");
        }
        assert!(!text.contains("`d`"), "{text}");
    }

    #[test]
    fn too_few_rows_is_an_error() {
        let x = array![[1.0, 2.0], [2.0, 1.0]];
        let e = MultivariateGaussian
            .fit(x.view(), &["a".into(), "b".into()])
            .err()
            .unwrap();
        assert!(e.to_string().contains("more rows than features"));
    }
}
