//! k-nearest-neighbour distance, read as a density: with r_k(x) the distance
//! from x to its k-th nearest training row, p̂(x) = k / (m · V_d · r_k(x)^d)
//! (Loftsgaarden and Quesenberry 1965), so the score is
//! s(x) = d ln r_k + ln V_d + ln m − ln k, V_d the volume of the unit d-ball.
//!
//! Distances are Euclidean on features standardised by the training mean and
//! standard deviation (divisor m), and the score adds Σ ln sd_j so that p̂ is
//! a density in the features' own units. The search is exact and brute force:
//! every query meets every training row. Space-partitioning trees prune little
//! at a dozen or more correlated features (a k-d tree visited most leaves at 16),
//! so the work is arranged for the CPU instead, in two steps.
//!
//! 1. A screen: ‖q − t‖² − ‖q‖² = ‖t‖² − 2 q·t in single precision for a
//!    block of queries against a panel of [`LANES`] training rows (stored
//!    feature-major, so each loaded value serves several queries), by fused
//!    multiply-adds in vector registers (AVX-512 or AVX2 where the CPU has
//!    them). This form loses digits to rounding and cancellation, so it only
//!    decides which rows to look at: per query it keeps the k smallest
//!    screened values and every row within a margin M of the k-th of them
//!    (see [`Fitted::kth_sq_distances_generic`] for why no row among the k
//!    nearest is lost). M = 4e-6 (d + 4)(‖q‖² + max ‖t‖²); the screen's error
//!    is below (d + 3) 2⁻²⁴ (‖q‖² + 2 max ‖t‖²), so M is more than ten
//!    times twice that.
//! 2. The exact distance of each row the screen keeps: Σ_j (q_j − t_j)² in
//!    double precision, summed in feature order from zero with no fused
//!    operations, as the plain loop does.
//!
//! The k smallest exact distances are kept, so the result has the bits of the
//! plain loop over all rows, whatever the CPU, vector width or thread count
//! (a test compares). Queries run on all cores (rayon). A distance below 1e-12
//! (a query equal to a training row) counts as 1e-12, so no score is −∞.

use ndarray::ArrayView2;
use rayon::prelude::*;

use super::{ln, refuse_constant, Detector, Model, Params};
use crate::error::Result;

const NAME: &str = "knn-distance";
/// Smallest distance used (see the module docs).
const MIN_DISTANCE: f64 = 1e-12;
/// Training rows per panel.
const LANES: usize = 16;
/// Panels per tile: a block of queries meets all panels of one tile (128 rows,
/// 17 KiB at 16 features) before the next tile, so the tile stays in cache.
const TILE_PANELS: usize = 8;
/// Queries per parallel task.
const TASK_QUERIES: usize = 64;
/// Relative width of the screen's margin, per feature (see the module docs).
const SCREEN_MARGIN: f64 = 4e-6;

/// The k-nearest-neighbour detector.
#[derive(Debug, Clone, Copy)]
pub struct KnnDistance {
    /// Which neighbour's distance is used.
    pub k: usize,
}

struct Fitted {
    k: usize,
    d: usize,
    mean: Vec<f64>,
    sd: Vec<f64>,
    /// Standardised training rows, row-major (for the exact distances).
    rows: Vec<f64>,
    /// The same rows in panels for the screen: panel p (rows p·LANES ..
    /// p·LANES + LANES) is `d + 1` groups of LANES values, first ‖t‖² of each
    /// lane, then feature j's values, all rounded to single precision; the
    /// last panel's padding lanes (‖t‖² = +∞, features 0) are never read.
    panels: Vec<f32>,
    /// max ‖t‖² over the training rows.
    max_norm: f64,
    m: usize,
    constant: f64,
}

/// The plain squared distance: Σ_j (q_j − t_j)² in feature order from zero.
#[inline(always)]
fn sq_distance(q: &[f64], t: &[f64]) -> f64 {
    let mut s = 0.0;
    for (a, b) in q.iter().zip(t) {
        let diff = a - b;
        s += diff * diff;
    }
    s
}

/// Lays out row-major standardised rows (`m` × `d`) in panels (see
/// [`Fitted::panels`]); returns them with max ‖t‖².
fn to_panels(rows: &[f64], m: usize, d: usize) -> (Vec<f32>, f64) {
    let n_panels = m.div_ceil(LANES);
    let width = (d + 1) * LANES;
    let mut panels = vec![0.0f32; n_panels * width];
    for p in 0..n_panels {
        panels[p * width..p * width + LANES].fill(f32::INFINITY);
    }
    let mut max_norm = 0.0f64;
    for (i, row) in rows.chunks_exact(d).enumerate() {
        let (p, lane) = (i / LANES, i % LANES);
        let norm: f64 = row.iter().map(|v| v * v).sum();
        max_norm = max_norm.max(norm);
        panels[p * width + lane] = norm as f32;
        for (j, &v) in row.iter().enumerate() {
            panels[p * width + (j + 1) * LANES + lane] = v as f32;
        }
    }
    (panels, max_norm)
}

impl Detector for KnnDistance {
    fn fit(&self, train: ArrayView2<'_, f64>, features: &[String]) -> Result<Box<dyn Model>> {
        Ok(Box::new(self.fit_knn(train, features)?))
    }
}

impl KnnDistance {
    fn fit_knn(&self, train: ArrayView2<'_, f64>, features: &[String]) -> Result<Fitted> {
        refuse_constant(NAME, train, features)?;
        let (m, d) = train.dim();
        if m < self.k {
            return Err(crate::rules::too_few_for_k(NAME, m, self.k));
        }
        let mean = super::means(train);
        let sd: Vec<f64> = (0..d)
            .map(|j| {
                let v = train
                    .column(j)
                    .iter()
                    .map(|x| (x - mean[j]).powi(2))
                    .sum::<f64>()
                    / m as f64;
                v.sqrt()
            })
            .collect();
        let mut flat = Vec::with_capacity(m * d);
        for row in train.rows() {
            for j in 0..d {
                flat.push((row[j] - mean[j]) / sd[j]);
            }
        }
        let (panels, max_norm) = to_panels(&flat, m, d);
        let half_d = d as f64 / 2.0;
        let ln_unit_ball =
            half_d * ln(std::f64::consts::PI) - statrs::function::gamma::ln_gamma(half_d + 1.0);
        let constant = ln_unit_ball + ln(m as f64) - ln(self.k as f64)
            + sd.iter().map(|s| ln(*s)).sum::<f64>();
        Ok(Fitted {
            k: self.k,
            d,
            mean,
            sd,
            rows: flat,
            panels,
            max_norm,
            m,
            constant,
        })
    }
}

/// The k smallest values seen so far, ascending (k is small).
struct Best {
    k: usize,
    values: Vec<f64>,
}

impl Best {
    fn new(k: usize) -> Self {
        Best {
            k,
            values: Vec::with_capacity(k + 1),
        }
    }

    /// A value must be below this to enter (∞ until k values are held).
    #[inline(always)]
    fn bound(&self) -> f64 {
        if self.values.len() < self.k {
            f64::INFINITY
        } else {
            self.values[self.k - 1]
        }
    }

    #[inline(always)]
    fn offer(&mut self, s: f64) {
        if self.values.len() < self.k || s < self.values[self.values.len() - 1] {
            let at = self.values.partition_point(|&b| b <= s);
            self.values.insert(at, s);
            self.values.truncate(self.k);
        }
    }
}

/// A block's screened values and, per query, its kept lanes (bit l for lane l).
struct Screened<const Q: usize> {
    values: [[f32; LANES]; Q],
    hits: [u32; Q],
}

/// Screened values ‖t‖² − 2 q·t (‖q − t‖² less ‖q‖²) of a block of `Q`
/// queries against one panel's LANES rows; `neg2q` holds −2q feature-major
/// (feature j of the Q queries at `[j·Q ..][..Q]`). `FUSED` uses fused
/// multiply-adds (only where the CPU has them). Per query, the lanes whose
/// value is at or below the query's `limits` entry are kept (bit l for lane
/// l; a NaN is never at or below). Returns the union of those lane sets;
/// only when it is not empty are the values and per-query lanes written to
/// `kept` (most panels keep nothing, and then nothing leaves the registers).
#[inline(always)]
fn screen_block<const Q: usize, const FUSED: bool, const AVX512: bool>(
    neg2q: &[f32],
    panel: &[f32],
    limits: &[f32; Q],
    kept: &mut Screened<Q>,
) -> u32 {
    #[cfg(target_arch = "x86_64")]
    if AVX512 {
        // SAFETY: AVX512 is set only by `Fitted::kth_sq_distances_avx512`,
        // which runs only where the CPU has AVX-512F.
        return unsafe { screen_block_avx512::<Q>(neg2q, panel, limits, kept) };
    }
    let (norms, features) = panel.split_at(LANES);
    let norms: &[f32; LANES] = norms.try_into().unwrap();
    let mut acc = [*norms; Q];
    for (t, qs) in features.chunks_exact(LANES).zip(neg2q.chunks_exact(Q)) {
        let t: &[f32; LANES] = t.try_into().unwrap();
        let qs: &[f32; Q] = qs.try_into().unwrap();
        for (a, &qv) in acc.iter_mut().zip(qs) {
            for l in 0..LANES {
                a[l] = if FUSED {
                    qv.mul_add(t[l], a[l])
                } else {
                    a[l] + qv * t[l]
                };
            }
        }
    }
    let mut found = [0u32; Q];
    for ((h, a), &limit) in found.iter_mut().zip(&acc).zip(limits) {
        for (l, &v) in a.iter().enumerate() {
            *h |= u32::from(v <= limit) << l;
        }
    }
    let any = found.iter().fold(0, |u, &h| u | h);
    if any != 0 {
        kept.values = acc;
        kept.hits = found;
    }
    any
}

/// [`screen_block`] in AVX-512F registers: one panel (16 lanes) per register,
/// one register per query.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
#[inline]
unsafe fn screen_block_avx512<const Q: usize>(
    neg2q: &[f32],
    panel: &[f32],
    limits: &[f32; Q],
    kept: &mut Screened<Q>,
) -> u32 {
    use std::arch::x86_64::{
        _mm512_cmp_ps_mask, _mm512_fmadd_ps, _mm512_loadu_ps, _mm512_set1_ps, _mm512_storeu_ps,
        _CMP_LE_OQ,
    };
    const { assert!(LANES == 16) };
    let d = neg2q.len() / Q;
    assert!(panel.len() >= (d + 1) * LANES && neg2q.len() == d * Q);
    let p = panel.as_ptr();
    // SAFETY (every pointer below): inside `panel` and `neg2q` by the assert.
    let mut acc = [unsafe { _mm512_loadu_ps(p) }; Q];
    for j in 0..d {
        let t = unsafe { _mm512_loadu_ps(p.add((j + 1) * LANES)) };
        let qs = &neg2q[j * Q..(j + 1) * Q];
        for (a, &qv) in acc.iter_mut().zip(qs) {
            *a = _mm512_fmadd_ps(_mm512_set1_ps(qv), t, *a);
        }
    }
    let mut found = [0u16; Q];
    for ((h, a), &limit) in found.iter_mut().zip(&acc).zip(limits) {
        // At or below, ordered: false for a NaN, as `<=` is.
        *h = _mm512_cmp_ps_mask::<_CMP_LE_OQ>(*a, _mm512_set1_ps(limit));
    }
    let any = u32::from(found.iter().fold(0, |u, &h| u | h));
    if any != 0 {
        for ((o, h), (a, f)) in kept
            .values
            .iter_mut()
            .zip(kept.hits.iter_mut())
            .zip(acc.iter().zip(found))
        {
            // SAFETY: `o` holds LANES = 16 values.
            unsafe { _mm512_storeu_ps(o.as_mut_ptr(), *a) };
            *h = u32::from(f);
        }
    }
    any
}

impl Fitted {
    /// The k-th smallest squared distance from each standardised query in
    /// `queries` (row-major) to the training rows, into `out`.
    ///
    /// The screen runs over blocks of `Q` queries and keeps, per query, the
    /// k smallest screened values a and every row whose a was within the
    /// margin M of the k-th smallest seen so far. Let e bound the screen's
    /// error (M ≥ 2e). The k rows of the k smallest a all have distances
    /// below a_k + e, so the k-th smallest distance is too, and every row
    /// among the k nearest has a ≤ a_k + 2e ≤ a_k + M. Only the rows kept
    /// that meet that final test get the exact distance, and the k-th
    /// smallest of those is the k-th smallest of all.
    #[inline(always)]
    fn kth_sq_distances_generic<const Q: usize, const FUSED: bool, const AVX512: bool>(
        &self,
        queries: &[f64],
        norms: &[f64],
        out: &mut [f64],
    ) {
        let (d, k) = (self.d, self.k);
        let n = out.len();
        let width = (d + 1) * LANES;
        let query = |i: usize| &queries[i * d..(i + 1) * d];
        let row = |r: usize| &self.rows[r * d..(r + 1) * d];
        // Per query: the k smallest screened values, and the rows kept.
        let mut top: Vec<Best> = (0..n).map(|_| Best::new(k)).collect();
        let mut kept: Vec<Vec<(f32, usize)>> = vec![Vec::new(); n];
        let margins: Vec<f64> = norms
            .iter()
            .map(|qn| SCREEN_MARGIN * (d + 4) as f64 * (qn + self.max_norm))
            .collect();
        // −2q of every block of Q queries, feature-major within the block,
        // made once and read for every tile. A short last block is padded
        // by repeating its last query (results unused).
        let mut blocks = vec![0.0f32; n.div_ceil(Q) * Q * d];
        for (b, block) in blocks.chunks_exact_mut(Q * d).enumerate() {
            let b0 = b * Q;
            let real = Q.min(n - b0);
            for qi in 0..Q {
                let q = query(b0 + qi.min(real - 1));
                for (j, v) in q.iter().enumerate() {
                    block[j * Q + qi] = (-2.0 * v) as f32;
                }
            }
        }
        let mut kept_now = Screened {
            values: [[0.0f32; LANES]; Q],
            hits: [0u32; Q],
        };
        for (tile_no, tile) in self.panels.chunks(TILE_PANELS * width).enumerate() {
            for (b0, block) in (0..n).step_by(Q).zip(blocks.chunks_exact(Q * d)) {
                let real = Q.min(n - b0);
                // A value must be at or below its query's limit to be kept;
                // rounded up to the next f32, so no value at or below the
                // f64 limit is lost in the conversion. Updated after each hit.
                let limit_of = |b: &Best, i: usize| ((b.bound() + margins[i]) as f32).next_up();
                let mut limits = [f32::NEG_INFINITY; Q];
                for (qi, l) in limits.iter_mut().enumerate().take(real) {
                    *l = limit_of(&top[b0 + qi], b0 + qi);
                }
                for (p_in_tile, panel) in tile.chunks_exact(width).enumerate() {
                    let first_row = (tile_no * TILE_PANELS + p_in_tile) * LANES;
                    let any =
                        screen_block::<Q, FUSED, AVX512>(block, panel, &limits, &mut kept_now);
                    if any == 0 {
                        continue;
                    }
                    let Screened { values, hits } = &kept_now;
                    for (qi, (a, &hit)) in values.iter().zip(hits).enumerate() {
                        if hit == 0 {
                            continue;
                        }
                        let i = b0 + qi;
                        let lanes = LANES.min(self.m - first_row);
                        // The lanes at or below the limit, in lane order.
                        let mut h = hit & (u32::MAX >> (32 - lanes));
                        while h != 0 {
                            let l = h.trailing_zeros() as usize;
                            h &= h - 1;
                            top[i].offer(f64::from(a[l]));
                            kept[i].push((a[l], first_row + l));
                        }
                        limits[qi] = limit_of(&top[i], i);
                    }
                }
            }
        }
        for (i, o) in out.iter_mut().enumerate() {
            let last = top[i].bound() + margins[i];
            let mut best = Best::new(k);
            for &(v, r) in &kept[i] {
                if f64::from(v) <= last {
                    best.offer(sq_distance(query(i), row(r)));
                }
            }
            *o = best.values[k - 1];
        }
    }

    /// The search compiled for AVX-512 with fused multiply-adds.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f,avx2,fma")]
    fn kth_sq_distances_avx512(&self, queries: &[f64], norms: &[f64], out: &mut [f64]) {
        self.kth_sq_distances_generic::<8, true, true>(queries, norms, out)
    }

    /// The search compiled for AVX2 with fused multiply-adds.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2,fma")]
    fn kth_sq_distances_avx2(&self, queries: &[f64], norms: &[f64], out: &mut [f64]) {
        self.kth_sq_distances_generic::<2, true, false>(queries, norms, out)
    }

    fn kth_sq_distances(&self, queries: &[f64], out: &mut [f64]) {
        // The screen needs finite norms; far outside the float range's
        // square root, every row gets its exact distance.
        let norms = self.query_norms(queries);
        let tame = self.max_norm < 1e30 && norms.iter().all(|&qn| qn < 1e30);
        if !tame {
            for (o, q) in out.iter_mut().zip(queries.chunks_exact(self.d)) {
                let mut b = Best::new(self.k);
                for t in self.rows.chunks_exact(self.d) {
                    b.offer(sq_distance(q, t));
                }
                *o = b.values[self.k - 1];
            }
            return;
        }
        #[cfg(target_arch = "x86_64")]
        {
            if std::is_x86_feature_detected!("avx512f") && std::is_x86_feature_detected!("fma") {
                // SAFETY: the CPU has just been seen to support AVX-512F, AVX2 and FMA.
                return unsafe { self.kth_sq_distances_avx512(queries, &norms, out) };
            }
            if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
                // SAFETY: the CPU has just been seen to support AVX2 and FMA.
                return unsafe { self.kth_sq_distances_avx2(queries, &norms, out) };
            }
        }
        // Elsewhere fused multiply-adds only where the target has them.
        self.kth_sq_distances_generic::<2, { cfg!(any(target_feature = "fma", target_arch = "aarch64")) }, false>(
            queries, &norms, out,
        )
    }

    /// Each query's squared norm ‖q‖², in feature order: the range check
    /// and the screen's margins both read it.
    fn query_norms(&self, queries: &[f64]) -> Vec<f64> {
        queries
            .chunks_exact(self.d)
            .map(|q| q.iter().map(|v| v * v).sum())
            .collect()
    }
}

impl Model for Fitted {
    fn score(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let d = self.d;
        let mut queries = Vec::with_capacity(x.nrows() * d);
        for r in x.rows() {
            for j in 0..d {
                queries.push((r[j] - self.mean[j]) / self.sd[j]);
            }
        }
        let mut out = vec![0.0; x.nrows()];
        out.par_chunks_mut(TASK_QUERIES)
            .zip(queries.par_chunks(TASK_QUERIES * d.max(1)))
            .for_each(|(o, q)| {
                self.kth_sq_distances(q, o);
                for s in o.iter_mut() {
                    let r = s.sqrt().max(MIN_DISTANCE);
                    *s = self.d as f64 * ln(r) + self.constant;
                }
            });
        out
    }

    fn params(&self) -> Params {
        Params::KnnDistance {
            k: self.k,
            training_rows: self.m,
            mean: self.mean.clone(),
            sd: self.sd.clone(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    /// Closed form (no source needed): training points 0, 1, …, 9 on a line
    /// (mean 4.5, sd √8.25); the query 20 has its 2nd neighbour at 8, so
    /// r₂ = 12/√8.25 standardised, and with d = 1, V₁ = 2:
    /// s = ln r₂ + ln 2 + ln 10 − ln 2 + ln √8.25 = ln 12 + ln 10 − ln 2 + ln 2 = ln 120 − ln 2.
    #[test]
    fn one_dimensional_score_by_hand() {
        let x = Array2::from_shape_fn((10, 1), |(i, _)| i as f64);
        let fitted = KnnDistance { k: 2 }.fit(x.view(), &["x".into()]).unwrap();
        let s = fitted.score(Array2::from_shape_vec((1, 1), vec![20.0]).unwrap().view());
        // p̂ = k / (m · 2 r) = 2 / (10 · 2 · 12) → −ln p̂ = ln 120.
        assert!((s[0] - 120f64.ln()).abs() < 1e-12, "{}", s[0]);
    }

    /// The exact search agrees with a direct sort of all distances, and gives
    /// the same bits on one thread as on all of them.
    #[test]
    fn exact_and_thread_independent() {
        let mut rng = crate::rng::seeded(8, 0);
        let x = Array2::from_shape_fn((500, 3), |_| crate::rng::unit(&mut rng));
        let q = Array2::from_shape_fn((50, 3), |_| crate::rng::unit(&mut rng) * 1.5);
        let names: Vec<String> = ["a", "b", "c"].iter().map(|s| s.to_string()).collect();
        let fitted = KnnDistance { k: 5 }.fit(x.view(), &names).unwrap();
        let all = fitted.score(q.view());
        let one = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap()
            .install(|| fitted.score(q.view()));
        assert_eq!(all, one);
        let Params::KnnDistance { sd, .. } = fitted.params() else {
            unreachable!()
        };
        // V₃ = 4π/3; s = 3 ln r₅ + ln V₃ + ln 500 − ln 5 + Σ ln sd.
        let constant = (4.0 * std::f64::consts::PI / 3.0).ln() + 500f64.ln() - 5f64.ln()
            + sd.iter().map(|s| s.ln()).sum::<f64>();
        for (i, row) in q.rows().into_iter().enumerate() {
            let mut d: Vec<f64> = x
                .rows()
                .into_iter()
                .map(|t| {
                    (0..3)
                        .map(|j| ((row[j] - t[j]) / sd[j]).powi(2))
                        .sum::<f64>()
                })
                .collect();
            d.sort_by(f64::total_cmp);
            let want = 3.0 * d[4].sqrt().ln() + constant;
            assert!((all[i] - want).abs() < 1e-9, "{} vs {want}", all[i]);
        }
    }

    /// The panel search gives the bits of the plain loop (Σ (q_j − t_j)² in
    /// feature order, sorted, k-th value), on sizes that leave short panels and
    /// short query blocks, with repeated training rows (ties) and queries equal
    /// to training rows, for several k. Reference: the definition (no source needed).
    #[test]
    fn panels_give_the_plain_loop_bits() {
        let mut rng = crate::rng::seeded(9, 0);
        for &(m, n, d, k) in &[
            (7, 3, 2, 1),
            (37, 13, 5, 3),
            (263, 70, 16, 5),
            (300, 9, 3, 10),
        ] {
            let mut x = Array2::from_shape_fn((m, d), |_| crate::rng::unit(&mut rng) * 3.0 - 1.0);
            // Ties: row 1 repeats row 0.
            let row0 = x.row(0).to_owned();
            x.row_mut(1).assign(&row0);
            let mut q = Array2::from_shape_fn((n, d), |_| crate::rng::unit(&mut rng) * 4.0 - 2.0);
            q.row_mut(0).assign(&row0);
            // A query far outside the training rows (large norms, cancellation).
            q.row_mut(n - 1).fill(250.0);
            let names: Vec<String> = (0..d).map(|j| format!("f{j}")).collect();
            let fitted = KnnDistance { k }.fit(x.view(), &names).unwrap();
            let Params::KnnDistance { mean, sd, .. } = fitted.params() else {
                unreachable!()
            };
            let std_row = |r: ndarray::ArrayView1<'_, f64>| -> Vec<f64> {
                (0..d).map(|j| (r[j] - mean[j]) / sd[j]).collect()
            };
            let train: Vec<Vec<f64>> = x.rows().into_iter().map(std_row).collect();
            let got = fitted.score(q.view());
            for (i, r) in q.rows().into_iter().enumerate() {
                let qs = std_row(r);
                let mut all: Vec<f64> = train
                    .iter()
                    .map(|t| {
                        let mut s = 0.0;
                        for j in 0..d {
                            let diff = qs[j] - t[j];
                            s += diff * diff;
                        }
                        s
                    })
                    .collect();
                all.sort_by(f64::total_cmp);
                let half_d = d as f64 / 2.0;
                let c = half_d * ln(std::f64::consts::PI)
                    - statrs::function::gamma::ln_gamma(half_d + 1.0)
                    + ln(m as f64)
                    - ln(k as f64)
                    + sd.iter().map(|s| ln(*s)).sum::<f64>();
                let want = d as f64 * ln(all[k - 1].sqrt().max(MIN_DISTANCE)) + c;
                assert_eq!(
                    got[i].to_bits(),
                    want.to_bits(),
                    "m {m} d {d} k {k} query {i}"
                );
            }
            // Every compiled form of the screen gives the same k-th distances:
            // plain and fused arithmetic, several block sizes.
            let inner = KnnDistance { k }.fit_knn(x.view(), &names).unwrap();
            let qs: Vec<f64> = q.rows().into_iter().flat_map(std_row).collect();
            let mut dispatched = vec![0.0; n];
            inner.kth_sq_distances(&qs, &mut dispatched);
            let mut other = vec![0.0; n];
            inner.kth_sq_distances_generic::<2, false, false>(
                &qs,
                &inner.query_norms(&qs),
                &mut other,
            );
            assert_eq!(other, dispatched);
            inner.kth_sq_distances_generic::<3, true, false>(
                &qs,
                &inner.query_norms(&qs),
                &mut other,
            );
            assert_eq!(other, dispatched);
            inner.kth_sq_distances_generic::<1, false, false>(
                &qs,
                &inner.query_norms(&qs),
                &mut other,
            );
            assert_eq!(other, dispatched);
        }
    }

    /// A query whose squared norm passes 1e30 leaves the screen for the
    /// plain loop, alone or beside a near query: both get the k-th smallest
    /// of the exact distances, bit for bit. Reference: the definition.
    #[test]
    fn far_queries_take_the_plain_loop() {
        let mut rng = crate::rng::seeded(4, 0);
        let (m, d, k) = (40, 3, 4);
        let x = Array2::from_shape_fn((m, d), |_| crate::rng::unit(&mut rng));
        let names: Vec<String> = (0..d).map(|j| format!("f{j}")).collect();
        let inner = KnnDistance { k }.fit_knn(x.view(), &names).unwrap();
        let qs = [0.1, -0.2, 0.3, 1e16, 0.0, -1e16];
        let mut got = vec![0.0; 2];
        inner.kth_sq_distances(&qs, &mut got);
        for (i, q) in qs.chunks_exact(d).enumerate() {
            let mut all: Vec<f64> = inner
                .rows
                .chunks_exact(d)
                .map(|t| sq_distance(q, t))
                .collect();
            all.sort_by(f64::total_cmp);
            assert_eq!(got[i].to_bits(), all[k - 1].to_bits(), "query {i}");
        }
        assert!(got[1] > 1e32, "{}", got[1]);
    }
}
