//! Training moments (count, mean, co-moment matrix) defined on content-hash
//! buckets, so that every way rows arrive (a file read whole, a file read in
//! chunks, partitions on other machines) gives the same bits.
//!
//! # The definition
//!
//! A training row's bucket is the big-endian `u16` of the first two bytes of
//! its 32-byte content hash ([`bucket`]; 65,536 buckets).
//!
//! 1. **One bucket** ([`Moments::of_bucket`]): its rows in ascending
//!    content-hash order, x₀ the first of them, n rows; sums start at +0.0 and
//!    add one row at a time in that order:
//!    - sⱼ = Σᵢ (xᵢⱼ − x₀ⱼ), then x̄ⱼ = x₀ⱼ + sⱼ / n (shifted by the first row,
//!      so a feature constant in the bucket has its mean exactly and a
//!      co-moment of exactly zero);
//!    - cᵢ = xᵢ − x̄, and for a ≥ b, M_ab = Σᵢ cᵢₐ·cᵢ_b, with M_ba = M_ab.
//! 2. **The fold** ([`fold_buckets`]): a left fold over the non-empty buckets
//!    in ascending bucket order, starting from the first of them, by the
//!    pairwise update of Chan, Golub and LeVeque (1979) as [`Moments::merge`]
//!    writes it, operation for operation:
//!    - n = nₐ + n_b (as f64 in the products), δⱼ = x̄_bⱼ − x̄ₐⱼ,
//!      x̄ₐⱼ ← x̄ₐⱼ + δⱼ·(n_b / n);
//!    - w = (nₐ·n_b) / n, and for every (a, b): M_ab ← M_ab + (M_b,ab + (δₐ·δ_b)·w).
//!
//! Rows with equal content hashes have equal content (the hash covers every
//! source column the features derive from: `Plan::columns` is the union of
//! all feature sets' columns, and the label), up to the sign of a zero, which
//! the hash writes as +0. Their order within a bucket therefore does not
//! matter: every sum above starts at +0.0, so a signed zero never reaches a
//! result (x + (−0) = x, and +0 + (−0) = +0), and the features
//! (`features::FittedFeatures`: ratios, differences, products and the
//! parameter-free transforms) map ±0 to ±0 or to a refused non-finite value.
//!
//! Another engine reproduces the bits by grouping its training rows by
//! bucket, sorting each bucket by content hash, calling
//! [`Moments::of_bucket`] (or repeating its arithmetic exactly: no fused
//! multiply-add, the order above) per bucket, and handing the buckets to
//! [`fold_buckets`] in any order.

use ndarray::ArrayView2;

use crate::audit::hash::ContentHash;
use crate::error::{Error, Result};

/// Leading bits of the content hash that name a row's bucket.
pub const BUCKET_BITS: u32 = 16;

/// The number of buckets, 2^[`BUCKET_BITS`].
pub const BUCKETS: usize = 1 << BUCKET_BITS;

/// A row's bucket: the big-endian `u16` of its content hash's first two bytes.
/// ([`ContentHash::bucket`], the split manifests' buckets too).
pub fn bucket(h: &ContentHash) -> u16 {
    h.bucket()
}

/// Count, mean and co-moment matrix M = Σ (x − x̄)(x − x̄)ᵀ (row-major, d × d).
#[derive(Debug, Clone, PartialEq)]
pub struct Moments {
    /// Rows.
    pub n: u64,
    /// Mean.
    pub mean: Vec<f64>,
    /// Co-moment matrix, row-major.
    pub m2: Vec<f64>,
}

impl Moments {
    /// No rows yet (the identity of [`Moments::merge`]).
    pub fn empty(d: usize) -> Self {
        Moments {
            n: 0,
            mean: vec![0.0; d],
            m2: vec![0.0; d * d],
        }
    }

    /// The moments of one bucket's rows, given in ascending content-hash
    /// order (step 1 of the module's definition). No rows: [`Moments::empty`].
    pub fn of_bucket(x: ArrayView2<'_, f64>) -> Self {
        let (n, d) = x.dim();
        let mut m = Moments::empty(d);
        if n == 0 || d == 0 {
            m.n = n as u64;
            return m;
        }
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("a standard-layout array is contiguous");
        let mut c = vec![0.0; d];
        bucket_generic(
            &|i| &xs[i * d..(i + 1) * d],
            0..n,
            &mut m.mean,
            &mut m.m2,
            &mut c,
        );
        m.n = n as u64;
        m
    }

    /// Folds `other` in: the pairwise update of Chan, Golub and LeVeque
    /// (1979), written exactly as step 2 of the module's definition (an
    /// empty side changes nothing; an empty `self` becomes `other`).
    pub fn merge(&mut self, other: &Moments) {
        let mut delta = vec![0.0; self.mean.len()];
        self.merge_raw(other.n, &other.mean, &other.m2, &mut delta);
    }

    /// [`Moments::merge`] of moments given as parts, with a scratch vector
    /// of d values for δ.
    #[inline(always)]
    fn merge_raw(&mut self, nb_rows: u64, mean_b: &[f64], m2_b: &[f64], delta: &mut [f64]) {
        if nb_rows == 0 {
            return;
        }
        if self.n == 0 {
            self.n = nb_rows;
            self.mean.copy_from_slice(mean_b);
            self.m2.copy_from_slice(m2_b);
            return;
        }
        let d = self.mean.len();
        let (na, nb) = (self.n as f64, nb_rows as f64);
        let n = na + nb;
        for ((dl, b), a) in delta.iter_mut().zip(mean_b).zip(&self.mean) {
            *dl = b - a;
        }
        for (m, dl) in self.mean.iter_mut().zip(delta.iter()) {
            *m += dl * (nb / n);
        }
        let w = na * nb / n;
        for a in 0..d {
            let da = delta[a];
            let row = &mut self.m2[a * d..(a + 1) * d];
            for ((s, o), db) in row
                .iter_mut()
                .zip(&m2_b[a * d..(a + 1) * d])
                .zip(delta.iter())
            {
                *s += o + da * db * w;
            }
        }
        self.n += nb_rows;
    }

    /// The maximum-likelihood covariance M / n (row-major).
    pub fn covariance(&self) -> Vec<f64> {
        self.m2.iter().map(|v| v / self.n as f64).collect()
    }
}

/// One bucket's mean and co-moment matrix (step 1 of the module's
/// definition) from its rows `row(i)` for i in `run` (d values each, at
/// least one row), added to `mean` and `m2` (zero on entry); `c` is scratch
/// (d).
///
/// The whole matrix is summed, M_ab and M_ba alike: cₐ·c_b and c_b·cₐ are
/// the same product, so each pair's two sums have the same bits, and every
/// row of the matrix is one fixed-length loop the compiler can widen. Each
/// sum keeps its row order and no operation is fused, so the copies
/// compiled for AVX2 and AVX-512F ([`buckets_into`]) give the same bits.
#[inline(always)]
fn bucket_generic<'r, F: Fn(usize) -> &'r [f64]>(
    row: &F,
    run: std::ops::Range<usize>,
    mean: &mut [f64],
    m2: &mut [f64],
    c: &mut [f64],
) {
    let d = mean.len();
    let n = run.len();
    let x0 = row(run.start);
    for i in run.clone() {
        for ((s, v), v0) in mean.iter_mut().zip(row(i)).zip(x0) {
            *s += v - v0;
        }
    }
    for (s, v0) in mean.iter_mut().zip(x0) {
        *s = v0 + *s / n as f64;
    }
    for i in run {
        for ((cj, v), mu) in c.iter_mut().zip(row(i)).zip(mean.iter()) {
            *cj = v - mu;
        }
        for (a, entries) in m2.chunks_exact_mut(d).enumerate() {
            let ca = c[a];
            for (s, cb) in entries.iter_mut().zip(c.iter()) {
                *s += ca * cb;
            }
        }
    }
}

/// Each run's bucket moments (the runs index the rows `row(i)`, d values
/// each), into `out`: per run d mean values then d × d co-moments (each
/// run's share zeroed here, by the task, while it is about to be used).
#[inline(always)]
fn buckets_generic<'r, F: Fn(usize) -> &'r [f64]>(
    row: &F,
    d: usize,
    runs: &[std::ops::Range<usize>],
    out: &mut [f64],
) {
    let mut c = vec![0.0; d];
    for (r, o) in runs.iter().zip(out.chunks_exact_mut(d + d * d)) {
        o.fill(0.0);
        let (mean, m2) = o.split_at_mut(d);
        bucket_generic(row, r.clone(), mean, m2, &mut c);
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
fn buckets_avx512<'r, F: Fn(usize) -> &'r [f64]>(
    row: &F,
    d: usize,
    runs: &[std::ops::Range<usize>],
    out: &mut [f64],
) {
    buckets_generic(row, d, runs, out)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn buckets_avx2<'r, F: Fn(usize) -> &'r [f64]>(
    row: &F,
    d: usize,
    runs: &[std::ops::Range<usize>],
    out: &mut [f64],
) {
    buckets_generic(row, d, runs, out)
}

/// [`buckets_generic`], compiled for the widest vectors the CPU has (the
/// same operations lane by lane, so the same bits).
fn buckets_into<'r, F: Fn(usize) -> &'r [f64]>(
    row: &F,
    d: usize,
    runs: &[std::ops::Range<usize>],
    out: &mut [f64],
) {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx512f") {
            // SAFETY: the CPU has just been seen to support AVX-512F.
            return unsafe { buckets_avx512(row, d, runs, out) };
        }
        if std::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been seen to support AVX2.
            return unsafe { buckets_avx2(row, d, runs, out) };
        }
    }
    buckets_generic(row, d, runs, out)
}

/// Folds buckets' moments (per run d mean values then d × d co-moments, as
/// [`buckets_into`] writes them) into `acc` in run order by
/// [`Moments::merge_raw`].
#[inline(always)]
fn fold_generic(
    acc: &mut Moments,
    runs: &[std::ops::Range<usize>],
    out: &[f64],
    delta: &mut [f64],
) {
    let d = acc.mean.len();
    for (r, o) in runs.iter().zip(out.chunks_exact(d + d * d)) {
        let (mean, m2) = o.split_at(d);
        acc.merge_raw(r.len() as u64, mean, m2, delta);
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
fn fold_avx512(acc: &mut Moments, runs: &[std::ops::Range<usize>], out: &[f64], delta: &mut [f64]) {
    fold_generic(acc, runs, out, delta)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn fold_avx2(acc: &mut Moments, runs: &[std::ops::Range<usize>], out: &[f64], delta: &mut [f64]) {
    fold_generic(acc, runs, out, delta)
}

/// [`fold_generic`], compiled for the widest vectors the CPU has (the same
/// operations lane by lane, none fused, so the same bits): the fold is the
/// one sequential part of the training moments.
fn fold_into(acc: &mut Moments, runs: &[std::ops::Range<usize>], out: &[f64], delta: &mut [f64]) {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx512f") {
            // SAFETY: the CPU has just been seen to support AVX-512F.
            return unsafe { fold_avx512(acc, runs, out, delta) };
        }
        if std::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been seen to support AVX2.
            return unsafe { fold_avx2(acc, runs, out, delta) };
        }
    }
    fold_generic(acc, runs, out, delta)
}

/// The left fold of step 2 over buckets handed over in ascending order,
/// for callers that meet the buckets a stretch at a time (the streamed
/// reader, partition by partition).
#[derive(Debug, Clone)]
pub struct Fold {
    acc: Moments,
    last: Option<u16>,
    delta: Vec<f64>,
    /// The bucket moments of a stretch, before they are folded, and of the
    /// stretch after it, computed meanwhile.
    out: Vec<f64>,
    next: Vec<f64>,
}

impl Fold {
    /// No bucket yet, `d` features.
    pub fn new(d: usize) -> Self {
        Fold {
            acc: Moments::empty(d),
            last: None,
            delta: vec![0.0; d],
            out: Vec::new(),
            next: Vec::new(),
        }
    }

    /// Folds in bucket `b`'s moments; `b` must follow every bucket before.
    pub fn push(&mut self, b: u16, m: &Moments) -> Result<()> {
        if m.mean.len() != self.acc.mean.len() || m.m2.len() != self.acc.m2.len() {
            return Err(Error::internal(format!(
                "bucket {b} of the training moments does not have {} features",
                self.acc.mean.len()
            )));
        }
        if self.last.is_some_and(|l| l >= b) {
            return Err(Error::internal(format!(
                "bucket {b} of the training moments is out of order or given twice"
            )));
        }
        self.last = Some(b);
        self.acc.merge_raw(m.n, &m.mean, &m.m2, &mut self.delta);
        Ok(())
    }

    /// Folds in rows in ascending content-hash order (`hashes[i]` is row
    /// i's), whose buckets all follow every bucket before: each bucket's run
    /// of rows by [`Moments::of_bucket`], computed on all cores, then folded
    /// in order. The bits do not depend on the thread count.
    pub fn add_sorted_rows(
        &mut self,
        hashes: &[ContentHash],
        x: ArrayView2<'_, f64>,
    ) -> Result<()> {
        debug_assert!(
            hashes.windows(2).all(|w| w[0] <= w[1]),
            "rows in content-hash order"
        );
        let buckets: Vec<u16> = hashes.iter().map(bucket).collect();
        self.add_sorted_buckets(&buckets, x)
    }

    /// [`Fold::add_sorted_rows`] given only each row's bucket (`buckets[i]`
    /// is row i's), the rows still in ascending content-hash order.
    pub fn add_sorted_buckets(&mut self, buckets: &[u16], x: ArrayView2<'_, f64>) -> Result<()> {
        if buckets.len() != x.nrows() {
            return Err(Error::internal(format!(
                "{} buckets for {} training rows",
                buckets.len(),
                x.nrows()
            )));
        }
        let d = x.ncols();
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("a standard-layout array is contiguous");
        self.add_sorted_gathered(buckets, d, |i| &xs[i * d..(i + 1) * d])
    }

    /// [`Fold::add_sorted_buckets`] with row i's `d` values given by `row(i)`
    /// instead of a matrix, so that rows held elsewhere (the source rows of a
    /// set of untransformed columns) are read where they are: no matrix of
    /// all the rows is made.
    ///
    /// The buckets are computed a stretch at a time on all cores, and each
    /// stretch is folded while the next is computed: the fold is the one
    /// sequential part, and the cores need not wait for it. The fold's order
    /// and every operation are those of the definition, so the bits do not
    /// depend on the thread count.
    pub fn add_sorted_gathered<'r>(
        &mut self,
        buckets: &[u16],
        d: usize,
        row: impl Fn(usize) -> &'r [f64] + Sync,
    ) -> Result<()> {
        use rayon::prelude::*;
        if d != self.acc.mean.len() {
            return Err(Error::internal(format!(
                "training rows of {d} features for moments of {}",
                self.acc.mean.len()
            )));
        }
        // The runs of rows sharing a bucket, in bucket order.
        let mut runs: Vec<std::ops::Range<usize>> = Vec::new();
        let mut start = 0;
        for i in 1..=buckets.len() {
            if i == buckets.len() || buckets[i] != buckets[start] {
                if buckets.get(i).is_some_and(|&b| b < buckets[start]) {
                    return Err(Error::internal(
                        "the training rows are not in content-hash order",
                    ));
                }
                runs.push(start..i);
                start = i;
            }
        }
        if let (Some(first), Some(last)) = (runs.first(), self.last) {
            if buckets[first.start] <= last {
                return Err(Error::internal(format!(
                    "bucket {} of the training moments is out of order or given twice",
                    buckets[first.start]
                )));
            }
        }
        if d == 0 {
            self.acc.n += buckets.len() as u64;
            return Ok(());
        }
        let width = d + d * d;
        // Each stretch's bucket moments, a task's buckets computed whole by
        // it (each run's share of `out` is zeroed by the task).
        let compute = |stretch: &[std::ops::Range<usize>], out: &mut Vec<f64>| {
            if out.len() < stretch.len() * width {
                out.resize(stretch.len() * width, 0.0);
            }
            out[..stretch.len() * width]
                .par_chunks_mut(TASK * width)
                .zip(stretch.par_chunks(TASK))
                .for_each(|(o, rs)| buckets_into(&row, d, rs, o));
        };
        // Two buffers, reused for every stretch of every call: the one
        // being folded and the one being computed.
        let (mut ready, mut next) = (
            std::mem::take(&mut self.out),
            std::mem::take(&mut self.next),
        );
        let stretches: Vec<&[std::ops::Range<usize>]> = runs.chunks(STRETCH).collect();
        if let Some(first) = stretches.first() {
            compute(first, &mut ready);
        }
        for (k, stretch) in stretches.iter().enumerate() {
            let (acc, delta) = (&mut self.acc, &mut self.delta);
            rayon::join(
                || fold_into(acc, stretch, &ready[..stretch.len() * width], delta),
                || {
                    if let Some(s) = stretches.get(k + 1) {
                        compute(s, &mut next);
                    }
                },
            );
            std::mem::swap(&mut ready, &mut next);
            if let Some(r) = stretch.last() {
                self.last = Some(buckets[r.start]);
            }
        }
        (self.out, self.next) = (ready, next);
        Ok(())
    }

    /// The training moments.
    pub fn finish(self) -> Moments {
        self.acc
    }
}

/// The training moments from per-bucket moments computed elsewhere (each by
/// [`Moments::of_bucket`] over the bucket's rows in content-hash order), in
/// any order: sorted by bucket, then folded left in ascending bucket order
/// (step 2 of the module's definition). Every entry must have `d` features;
/// a bucket named twice is refused, since its rows would count twice.
pub fn fold_buckets(d: usize, mut buckets: Vec<(u16, Moments)>) -> Result<Moments> {
    buckets.sort_by_key(|b| b.0);
    let mut fold = Fold::new(d);
    for (b, m) in &buckets {
        fold.push(*b, m)?;
    }
    Ok(fold.finish())
}

/// Buckets per stretch: computed on all cores while the stretch before is
/// folded.
const STRETCH: usize = 4096;

/// Buckets per task within a stretch.
const TASK: usize = 64;

/// The training moments of rows already in ascending content-hash order
/// (`hashes[i]` is row i's): [`Fold::add_sorted_rows`] from no rows.
pub fn of_sorted_rows(hashes: &[ContentHash], x: ArrayView2<'_, f64>) -> Result<Moments> {
    let mut fold = Fold::new(x.ncols());
    fold.add_sorted_rows(hashes, x)?;
    Ok(fold.finish())
}

/// [`of_sorted_rows`] given only each row's bucket (`buckets[i]` is row
/// i's), the rows in ascending content-hash order.
pub fn of_sorted_buckets(buckets: &[u16], x: ArrayView2<'_, f64>) -> Result<Moments> {
    let mut fold = Fold::new(x.ncols());
    fold.add_sorted_buckets(buckets, x)?;
    Ok(fold.finish())
}

/// The training moments of (content hash, feature row) pairs in any order:
/// the rows are put in content-hash order (ties keep their given order, which
/// the definition does not see) and handed to [`of_sorted_rows`].
pub fn of_rows(hashes: &[ContentHash], x: ArrayView2<'_, f64>) -> Result<Moments> {
    if hashes.len() != x.nrows() {
        return Err(Error::internal(format!(
            "{} content hashes for {} training rows",
            hashes.len(),
            x.nrows()
        )));
    }
    let mut order: Vec<usize> = (0..hashes.len()).collect();
    order.sort_by_key(|&i| hashes[i]);
    let sorted_hashes: Vec<ContentHash> = order.iter().map(|&i| hashes[i]).collect();
    let sorted = x.select(ndarray::Axis(0), &order);
    of_sorted_rows(&sorted_hashes, sorted.view())
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{array, Array2};

    fn h(first: [u8; 2], rest: u8) -> ContentHash {
        let mut b = [rest; 32];
        b[0] = first[0];
        b[1] = first[1];
        ContentHash(b)
    }

    fn bits(v: &[f64]) -> Vec<u64> {
        v.iter().map(|x| x.to_bits()).collect()
    }

    #[test]
    fn merged_buckets_equal_the_moments_of_all_rows() {
        // Welford / Chan: merging the moments of two halves gives the moments
        // of the whole (common practice, no source); here to 1e-12 relative.
        let x = array![
            [1.0, 10.0],
            [2.0, 12.5],
            [4.0, 9.0],
            [8.0, 15.0],
            [3.0, 11.0],
            [5.5, 13.0],
            [7.0, 8.5]
        ];
        let whole = Moments::of_bucket(x.view());
        let mut merged = Moments::of_bucket(x.slice(ndarray::s![..3, ..]));
        merged.merge(&Moments::of_bucket(x.slice(ndarray::s![3.., ..])));
        assert_eq!(merged.n, 7);
        for (a, b) in merged.mean.iter().zip(&whole.mean) {
            assert!((a - b).abs() <= 1e-12 * b.abs());
        }
        for (a, b) in merged.m2.iter().zip(&whole.m2) {
            assert!((a - b).abs() <= 1e-12 * b.abs().max(1.0), "{a} {b}");
        }
        // Python 3's statistics.pvariance (exact rational arithmetic, then
        // rounded): x = [1, 2, 4, 8, 3, 5.5, 7] gives 5.76530612244898,
        // y = [10, 12.5, 9, 15, 11, 13, 8.5] gives 4.704081632653061; the
        // population covariance Σ(x − x̄)(y − ȳ)/7 in fractions.Fraction is
        // 1.5408163265306123.
        assert!((merged.covariance()[0] - 5.765_306_122_448_98).abs() < 1e-12);
        assert!((merged.covariance()[3] - 4.704_081_632_653_061).abs() < 1e-12);
        assert!((merged.covariance()[1] - 1.540_816_326_530_612_3).abs() < 1e-12);
        assert_eq!(merged.covariance()[1], merged.covariance()[2]);
    }

    #[test]
    fn a_constant_feature_has_its_exact_mean_and_no_spread() {
        // 0.1 three times: a plain sum divided by 3 gives 0.10000000000000002
        // (IEEE 754 binary64, common practice, no source); the shifted mean is
        // exact, so the variance is exactly zero and the fit refuses it.
        let x = array![[0.1, 1.0], [0.1, 2.0], [0.1, 4.0]];
        let m = Moments::of_bucket(x.view());
        assert_eq!(m.mean[0], 0.1);
        assert_eq!(m.m2[0], 0.0);
        let mut two = m.clone();
        two.merge(&Moments::of_bucket(array![[0.1, 3.0]].view()));
        assert_eq!(two.mean[0], 0.1);
        assert_eq!(two.m2[0], 0.0);
        assert_eq!(two.m2[1], 0.0);
    }

    /// Rows in several buckets, some sharing a hash (equal content), given
    /// in shuffled orders and cut into arbitrary chunks per bucket: every
    /// way gives the same bits, and so do per-bucket moments folded by
    /// `fold_buckets` in any order.
    #[test]
    fn any_order_gives_the_same_bits() {
        let n = 500;
        let mut hashes = Vec::new();
        let mut x = Array2::zeros((n, 3));
        for i in 0..n {
            // 7 buckets, and every tenth row a copy of the row before.
            let k = if i % 10 == 9 { i - 1 } else { i };
            hashes.push(h([(k % 7) as u8, 3], (k % 251) as u8));
            x[(i, 0)] = (k as f64).sqrt() * 1e3 + 0.1;
            x[(i, 1)] = if k % 3 == 0 {
                -0.0
            } else {
                (k % 17) as f64 / 3.0
            };
            x[(i, 2)] = 1.0 / (k as f64 + 0.7);
        }
        // Equal hashes have equal rows, up to the sign of a zero.
        for i in 0..n {
            if i % 10 == 9 && x[(i, 1)] == 0.0 {
                x[(i, 1)] = 0.0;
            }
        }
        let reference = of_rows(&hashes, x.view()).unwrap();
        let mut order: Vec<usize> = (0..n).collect();
        for seed in 1..6u64 {
            // A deterministic shuffle (a multiplicative permutation).
            order.sort_by_key(|&i| (i as u64 * (2 * seed + 1) * 2_654_435_761) % 1_000_003);
            let hs: Vec<ContentHash> = order.iter().map(|&i| hashes[i]).collect();
            let xs = x.select(ndarray::Axis(0), &order);
            let m = of_rows(&hs, xs.view()).unwrap();
            assert_eq!(m.n, reference.n);
            assert_eq!(bits(&m.mean), bits(&reference.mean), "seed {seed}");
            assert_eq!(bits(&m.m2), bits(&reference.m2), "seed {seed}");
            // Per-bucket moments, handed over in reverse bucket order.
            let mut per: Vec<(u16, Moments)> = Vec::new();
            for b in 0..7u16 {
                let mut rows: Vec<usize> = (0..n)
                    .filter(|&i| bucket(&hs[i]) == bucket(&h([b as u8, 3], 0)))
                    .collect();
                rows.sort_by_key(|&i| hs[i]);
                per.push((
                    bucket(&hs[rows[0]]),
                    Moments::of_bucket(xs.select(ndarray::Axis(0), &rows).view()),
                ));
            }
            per.reverse();
            let folded = fold_buckets(3, per).unwrap();
            assert_eq!(bits(&folded.mean), bits(&reference.mean));
            assert_eq!(bits(&folded.m2), bits(&reference.m2));
        }
        // One thread or many: the same bits.
        for threads in [1, 3] {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            let m = pool.install(|| of_rows(&hashes, x.view())).unwrap();
            assert_eq!(bits(&m.m2), bits(&reference.m2), "{threads} threads");
        }
    }

    /// The copy compiled for the CPU's widest vectors gives the plain
    /// build's bits (the rule of every such kernel), and the whole matrix
    /// is symmetric to the bit.
    #[test]
    fn the_vector_build_equals_the_plain_build() {
        let d = 7;
        let xs: Vec<f64> = (0..300 * d)
            .map(|i| ((i * 37 % 101) as f64).sqrt() * 3.1 - 11.0 + (i % 13) as f64 * 1e-9)
            .collect();
        let runs = vec![0..1, 1..9, 9..40, 40..41, 41..300];
        let width = d + d * d;
        let mut plain = vec![0.0; runs.len() * width];
        let mut chosen = vec![0.0; runs.len() * width];
        let row = |i: usize| &xs[i * d..(i + 1) * d];
        buckets_generic(&row, d, &runs, &mut plain);
        buckets_into(&row, d, &runs, &mut chosen);
        assert_eq!(bits(&plain), bits(&chosen));
        for o in plain.chunks_exact(width) {
            let m2 = &o[d..];
            for a in 0..d {
                for b in 0..d {
                    assert_eq!(m2[a * d + b].to_bits(), m2[b * d + a].to_bits());
                }
            }
        }
        // The fold, compiled both ways, from a non-empty start.
        let start = || {
            let mut m = Moments::empty(d);
            m.merge(&Moments::of_bucket(
                ndarray::ArrayView2::from_shape((2, d), &xs[..2 * d]).unwrap(),
            ));
            m
        };
        let (mut by_plain, mut by_chosen) = (start(), start());
        let mut delta = vec![0.0; d];
        fold_generic(&mut by_plain, &runs, &plain, &mut delta);
        fold_into(&mut by_chosen, &runs, &plain, &mut delta);
        assert_eq!(by_plain.n, by_chosen.n);
        assert_eq!(bits(&by_plain.mean), bits(&by_chosen.mean));
        assert_eq!(bits(&by_plain.m2), bits(&by_chosen.m2));
    }

    /// Many stretches (each folded while the next is computed), rows given
    /// in several calls and read through `row(i)`, on 1, 2 and 3 threads:
    /// the bits of the definition written plainly, each bucket's moments by
    /// [`Moments::of_bucket`] folded one by one in bucket order.
    #[test]
    fn pipelined_stretches_give_the_definition_s_bits() {
        let d = 3;
        let n = 3 * STRETCH * 2 + 123;
        // Buckets ascending, one or two rows each.
        let buckets: Vec<u16> = (0..n).map(|i| (i * 5 / 7) as u16).collect();
        let xs: Vec<f64> = (0..n * d)
            .map(|i| ((i * 7919 % 10_007) as f64 - 5000.0) / 37.0 + (i % 11) as f64 * 1e-7)
            .collect();
        let mut want = Moments::empty(d);
        let mut lo = 0;
        while lo < n {
            let mut hi = lo + 1;
            while hi < n && buckets[hi] == buckets[lo] {
                hi += 1;
            }
            let x = ndarray::ArrayView2::from_shape((hi - lo, d), &xs[lo * d..hi * d]).unwrap();
            want.merge(&Moments::of_bucket(x));
            lo = hi;
        }
        // Calls end at bucket ends (a bucket is handed over whole).
        let cut = (0..n)
            .find(|&i| i > n / 3 && buckets[i] != buckets[i - 1])
            .unwrap();
        for threads in [1, 2, 3] {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            let got = pool.install(|| {
                let mut f = Fold::new(d);
                f.add_sorted_gathered(&buckets[..cut], d, |i| &xs[i * d..(i + 1) * d])
                    .unwrap();
                f.add_sorted_gathered(&buckets[cut..], d, |i| {
                    &xs[(cut + i) * d..(cut + i + 1) * d]
                })
                .unwrap();
                f.finish()
            });
            assert_eq!(got.n, want.n);
            assert_eq!(bits(&got.mean), bits(&want.mean), "{threads} threads");
            assert_eq!(bits(&got.m2), bits(&want.m2), "{threads} threads");
        }
    }

    #[test]
    fn a_bucket_given_twice_is_refused() {
        let m = Moments::of_bucket(array![[1.0], [2.0]].view());
        let e = fold_buckets(1, vec![(4, m.clone()), (4, m)]).unwrap_err();
        assert!(e.to_string().contains("bucket 4"), "{e}");
        let mut f = Fold::new(1);
        f.push(9, &Moments::empty(1)).unwrap();
        assert!(f.push(3, &Moments::empty(1)).is_err());
    }

    #[test]
    fn the_bucket_is_the_big_endian_leading_u16() {
        assert_eq!(bucket(&h([0x12, 0x34], 0xff)), 0x1234);
        assert_eq!(bucket(&h([0xff, 0x00], 0)), 0xff00);
    }
}
