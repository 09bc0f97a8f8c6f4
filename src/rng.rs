//! Seeded randomness helpers over ChaCha8: unbiased bounded draws, sampling
//! without replacement and exact binomial draws. Every caller passes its own
//! seeded generator; there is no global or time-seeded randomness anywhere.
//!
//! The binomial sampler uses only IEEE arithmetic (`+ − × ÷`, `sqrt`,
//! `floor`) and `libm`'s `log`, `log1p` and `exp`, never the platform's, so a
//! stream gives the same draws on every platform.

use rand_chacha::rand_core::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// A generator for `seed`, on stream `stream` (independent streams for
/// independent uses of one seed).
pub fn seeded(seed: u64, stream: u64) -> ChaCha8Rng {
    let mut r = ChaCha8Rng::seed_from_u64(seed);
    r.set_stream(stream);
    r
}

/// An unbiased draw from `0..n` (Lemire's multiply-and-reject), n > 0.
pub fn below(rng: &mut ChaCha8Rng, n: u64) -> u64 {
    // The threshold t = 2⁶⁴ mod n is below n, so a low word ≥ n is always
    // accepted and the division is only needed in the rare case below n.
    let mut m = u128::from(rng.next_u64()) * u128::from(n);
    if (m as u64) < n {
        let t = n.wrapping_neg() % n;
        while (m as u64) < t {
            m = u128::from(rng.next_u64()) * u128::from(n);
        }
    }
    (m >> 64) as u64
}

/// A uniform double in [0, 1).
pub fn unit(rng: &mut ChaCha8Rng) -> f64 {
    (rng.next_u64() >> 11) as f64 / (1u64 << 53) as f64
}

/// `k` distinct indices from `0..n`, by a partial Fisher-Yates shuffle.
pub fn sample(rng: &mut ChaCha8Rng, n: usize, k: usize) -> Vec<usize> {
    let mut idx: Vec<usize> = (0..n).collect();
    let k = k.min(n);
    for i in 0..k {
        let j = i + below(rng, (n - i) as u64) as usize;
        idx.swap(i, j);
    }
    idx.truncate(k);
    idx
}

/// A Binomial(n, p) draw: the number of successes in `n` independent trials
/// of probability `p` (clamped to [0, 1]).
///
/// Both methods are exact for the given `p` (they differ from the
/// distribution only by the rounding of double arithmetic): the sequential
/// search of the inverse distribution function when n·min(p, 1 − p) < 10
/// (expected cost O(1 + np)), and otherwise the transformed rejection with
/// squeeze "BTRS" of Hörmann, W. (1993), *The generation of binomial random
/// variates*, Journal of Statistical Computation and Simulation 46, 101-110
/// (expected cost O(1), about 1.2 pairs of uniforms per draw). For p > ½ the
/// draw is n minus a draw with 1 − p, so both methods see p ≤ ½.
pub fn binomial(rng: &mut ChaCha8Rng, n: u64, p: f64) -> u64 {
    if n == 0 || p <= 0.0 || p.is_nan() {
        return 0;
    }
    if p >= 1.0 {
        return n;
    }
    // 1 − p is exact for p in [½, 1) (Sterbenz).
    let flip = p > 0.5;
    let q = if flip { 1.0 - p } else { p };
    let k = if (n as f64) * q < 10.0 {
        binomial_inversion(rng, n, q)
    } else {
        binomial_btrs(rng, n, q)
    };
    if flip {
        n - k
    } else {
        k
    }
}

/// Sequential search: k = 0, 1, ... until the uniform falls under the mass
/// so far, with f(k + 1) = f(k)·((n + 1)s/(k + 1) − s), s = p/(1 − p).
/// A uniform beyond the (rounded) total mass starts over with a new one.
fn binomial_inversion(rng: &mut ChaCha8Rng, n: u64, p: f64) -> u64 {
    let s = p / (1.0 - p);
    let a = (n as f64 + 1.0) * s;
    let f0 = libm::exp(n as f64 * libm::log1p(-p));
    loop {
        let mut u = unit(rng);
        let mut f = f0;
        let mut k = 0u64;
        loop {
            if u < f {
                return k;
            }
            u -= f;
            k += 1;
            if k > n || f == 0.0 {
                break;
            }
            f *= a / k as f64 - s;
        }
    }
}

/// fc(k) = ln k! − ((k + ½) ln(k + 1) − (k + 1) + ½ ln 2π), the error of
/// Stirling's formula for ln k!: a table for k ≤ 9 (from the exact ln Γ; a
/// test checks it against statrs) and above it the series
/// 1/12 − (1/360 − 1/(1260 (k+1)²))/(k+1)², over k + 1, whose first omitted
/// term is at most 1/(1680·11⁷) < 3.1·10⁻¹¹ (Hörmann 1993 uses the same).
fn stirling_tail(k: f64) -> f64 {
    const TABLE: [f64; 10] = [
        0.08106146679532726,
        0.0413406959554093,
        0.02767792568499834,
        0.020790672103765093,
        0.016644691189821193,
        0.013876128823070748,
        0.01189670994589177,
        0.010411265261972096,
        0.009255462182712733,
        0.00833056343336287,
    ];
    if k <= 9.0 {
        return TABLE[k as usize];
    }
    let k1 = k + 1.0;
    let k1sq = k1 * k1;
    (1.0 / 12.0 - (1.0 / 360.0 - 1.0 / 1260.0 / k1sq) / k1sq) / k1
}

/// Hörmann's (1993) BTRS for n·p ≥ 10, p ≤ ½: a candidate k from the
/// transformed uniform pair (u, v), accepted at once inside the squeeze
/// region, else when v·α/(a/u_s² + b) ≤ f(k)/f(m), the exact ratio of
/// binomial probabilities ([`BtrsRatio::accepts`]).
fn binomial_btrs(rng: &mut ChaCha8Rng, n: u64, p: f64) -> u64 {
    btrs_with(rng, n, p, BtrsRatio::accepts)
}

/// BTRS with the given form of its acceptance test (the tests compare the
/// product form with the logarithm form on whole draws).
fn btrs_with(
    rng: &mut ChaCha8Rng,
    n: u64,
    p: f64,
    accepts: impl Fn(&BtrsRatio, f64, f64) -> bool,
) -> u64 {
    let nf = n as f64;
    let spq = (nf * p * (1.0 - p)).sqrt();
    let b = 1.15 + 2.53 * spq;
    let a = -0.0873 + 0.0248 * b + 0.01 * p;
    let c = nf * p + 0.5;
    let v_r = 0.92 - 4.2 / b;
    let alpha = (2.83 + 5.1 / b) * spq;
    let ratio = BtrsRatio {
        n: nf,
        r: p / (1.0 - p),
        m: ((nf + 1.0) * p).floor(),
    };
    loop {
        let u = unit(rng) - 0.5;
        let v = unit(rng);
        let us = 0.5 - u.abs();
        if us <= 0.0 {
            continue;
        }
        let k = ((2.0 * a / us + b) * u + c).floor();
        if k < 0.0 || k > nf {
            continue;
        }
        if us >= 0.07 && v <= v_r {
            return k as u64;
        }
        if accepts(&ratio, v * alpha / (a / (us * us) + b), k) {
            return k as u64;
        }
    }
}

/// Candidates at most this far from the mode are tested by the product of
/// successive probability ratios (at most this many factors, cheaper than
/// the five logarithms of the other test); farther ones by logarithms.
const PRODUCT_SPAN: f64 = 24.0;

/// Modes up to which the product is used: each factor of
/// [`BtrsRatio::product_accepts`] is below 2m + 2, so the products of at
/// most [`PRODUCT_SPAN`] factors stay far inside the doubles' range.
const PRODUCT_MODE_LIMIT: f64 = 1e9;

/// BTRS's acceptance test: whether a transformed uniform v lies under
/// f(k)/f(m), f the Binomial(n, p) probability and m its mode, r = p/(1 − p).
struct BtrsRatio {
    n: f64,
    r: f64,
    m: f64,
}

impl BtrsRatio {
    /// The test, by the product of successive ratios near the mode and by
    /// logarithms elsewhere. Both evaluate the same inequality; they can
    /// differ only where v is within a few roundings of f(k)/f(m) (relative
    /// 10⁻¹⁴), so the draws are those of the exact test
    /// (`rng::binomial_tests::product_and_log_tests_draw_alike`).
    fn accepts(&self, v: f64, k: f64) -> bool {
        if (k - self.m).abs() <= PRODUCT_SPAN && self.m <= PRODUCT_MODE_LIMIT {
            self.product_accepts(v, k)
        } else {
            self.log_accepts(v, k)
        }
    }

    /// f(i)/f(i − 1) = (n − i + 1)·r/i, so f(k)/f(m) is the product of
    /// those for i in m + 1..=k (k > m), or the inverse of the product for i
    /// in k + 1..=m (k < m); compared as v·denominator ≤ numerator.
    fn product_accepts(&self, v: f64, k: f64) -> bool {
        let (mut num, mut den) = (1.0, 1.0);
        if k > self.m {
            let mut i = self.m + 1.0;
            while i <= k {
                num *= (self.n - i + 1.0) * self.r;
                den *= i;
                i += 1.0;
            }
        } else {
            let mut i = k + 1.0;
            while i <= self.m {
                num *= i;
                den *= (self.n - i + 1.0) * self.r;
                i += 1.0;
            }
        }
        v * den <= num
    }

    /// ln f(k)/f(m) = ln m! + ln (n − m)! − ln k! − ln (n − k)! + (k − m) ln r,
    /// each ln j! as (j + ½) ln(j + 1) − (j + 1) + ½ ln 2π + fc(j), grouped so
    /// that no large terms cancel (exact to 10⁻¹⁰ in the log).
    fn log_accepts(&self, v: f64, k: f64) -> bool {
        let (n, r, m) = (self.n, self.r, self.m);
        let bound = (m + 0.5) * libm::log((m + 1.0) / (r * (n - m + 1.0)))
            + (n + 1.0) * libm::log((n - m + 1.0) / (n - k + 1.0))
            + (k + 0.5) * libm::log(r * (n - k + 1.0) / (k + 1.0))
            + stirling_tail(m)
            + stirling_tail(n - m)
            - stirling_tail(k)
            - stirling_tail(n - k);
        libm::log(v) <= bound
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn draws_stay_in_range_and_repeat_by_seed() {
        let mut a = seeded(5, 0);
        let mut b = seeded(5, 0);
        for _ in 0..1000 {
            let x = below(&mut a, 7);
            assert!(x < 7);
            assert_eq!(x, below(&mut b, 7));
        }
        let s = sample(&mut seeded(1, 2), 10, 4);
        let mut t = s.clone();
        t.sort();
        t.dedup();
        assert_eq!(t.len(), 4);
    }
}

#[cfg(test)]
mod binomial_tests {
    use super::*;
    use statrs::distribution::{Binomial, ChiSquared, ContinuousCDF, Discrete, DiscreteCDF};

    /// The Stirling error table equals ln k! minus ((k + ½) ln(k + 1) −
    /// (k + 1) + ½ ln 2π) from statrs' ln Γ, and the series continues it from
    /// k = 10 within its first omitted term.
    #[test]
    fn stirling_tail_matches_ln_gamma() {
        for k in 0..=30u32 {
            let k = f64::from(k);
            let exact = statrs::function::gamma::ln_gamma(k + 1.0)
                - ((k + 0.5) * (k + 1.0).ln() - (k + 1.0)
                    + 0.5 * (2.0 * std::f64::consts::PI).ln());
            // The series' first omitted term is 1/(1680 (k + 1)⁷); 1e-12 covers
            // the rounding of the reference's own difference of large terms.
            let tolerance = if k <= 9.0 {
                1e-12
            } else {
                1e-12 + 1.0 / (1680.0 * (k + 1.0).powi(7))
            };
            assert!(
                (stirling_tail(k) - exact).abs() < tolerance,
                "k {k}: {} {exact}",
                stirling_tail(k)
            );
        }
    }

    /// Draws against the exact pmf (statrs `Binomial`): the sample mean within
    /// 5 standard errors of np (σ/√N), the sample variance within 5 standard
    /// errors of npq (σ²·√((κ − 1)/N), κ the binomial kurtosis
    /// 3 + (1 − 6pq)/(npq)), and Pearson's χ² over cells pooled to an expected
    /// count of at least 5 below the 0.999 quantile of χ²(cells − 1). The
    /// cases cover both methods and the p > ½ reflection; the streams are
    /// fixed, so the test is deterministic (common practice, no source).
    #[test]
    fn binomial_draws_follow_the_exact_distribution() {
        let cases: [(u64, f64); 9] = [
            (1, 0.3),
            (7, 0.25),
            (40, 0.2),
            (1_000, 0.004),
            (25, 0.5),
            (60, 0.85),
            (1_000, 0.3),
            (200_000, 0.01),
            (3_000_000, 0.6),
        ];
        let draws = 200_000usize;
        for (case, &(n, p)) in cases.iter().enumerate() {
            let mut rng = seeded(77, case as u64);
            let xs: Vec<u64> = (0..draws).map(|_| binomial(&mut rng, n, p)).collect();
            let nf = n as f64;
            let (mean, var) = (nf * p, nf * p * (1.0 - p));
            let m = xs.iter().map(|&x| x as f64).sum::<f64>() / draws as f64;
            let v = xs.iter().map(|&x| (x as f64 - m).powi(2)).sum::<f64>() / (draws - 1) as f64;
            let dn = draws as f64;
            assert!(
                (m - mean).abs() <= 5.0 * (var / dn).sqrt(),
                "n {n} p {p}: mean {m} against {mean}"
            );
            let kurtosis = 3.0 + (1.0 - 6.0 * p * (1.0 - p)) / var;
            assert!(
                (v - var).abs() <= 5.0 * var * ((kurtosis - 1.0) / dn).sqrt(),
                "n {n} p {p}: variance {v} against {var}"
            );
            // χ² over the values in mean ± 12 sd, tails pooled into their ends.
            let dist = Binomial::new(p, n).unwrap();
            let lo = (mean - 12.0 * var.sqrt()).floor().max(0.0) as u64;
            let hi = ((mean + 12.0 * var.sqrt()).ceil() as u64).min(n);
            let mut observed = vec![0u64; (hi - lo + 1) as usize];
            for &x in &xs {
                observed[(x.clamp(lo, hi) - lo) as usize] += 1;
            }
            let mut expected: Vec<f64> = (lo..=hi).map(|k| dist.pmf(k) * dn).collect();
            expected[0] += dist.cdf(lo).min(1.0) * dn - dist.pmf(lo) * dn;
            let last = expected.len() - 1;
            expected[last] += (1.0 - dist.cdf(hi)).max(0.0) * dn;
            // Pool neighbouring cells until each expects at least 5.
            let (mut cells, mut acc_o, mut acc_e) = (Vec::new(), 0u64, 0.0);
            for (&o, &e) in observed.iter().zip(&expected) {
                acc_o += o;
                acc_e += e;
                if acc_e >= 5.0 {
                    cells.push((acc_o, acc_e));
                    (acc_o, acc_e) = (0, 0.0);
                }
            }
            if let Some(l) = cells.last_mut() {
                l.0 += acc_o;
                l.1 += acc_e;
            }
            let chi2: f64 = cells.iter().map(|&(o, e)| (o as f64 - e).powi(2) / e).sum();
            let df = (cells.len() - 1).max(1) as f64;
            let critical = ChiSquared::new(df).unwrap().inverse_cdf(0.999);
            assert!(
                chi2 <= critical,
                "n {n} p {p}: χ² {chi2} over {df} df, 0.999 quantile {critical}"
            );
        }
    }

    /// The product test near the mode decides as the logarithm test does:
    /// on candidates and uniforms spread over each case's support (every
    /// decision compared), and on the draws themselves (a sampler using the
    /// logarithms alone gives the same sequence). Equal decisions are the
    /// same inequality evaluated two ways (common practice, no source).
    #[test]
    fn product_and_log_tests_draw_alike() {
        let mut rng = seeded(3, 9);
        for &(n, p) in &[
            (40u64, 0.3),
            (1_000, 0.02),
            (200_000, 0.0004),
            (5_000_000, 0.5),
        ] {
            let nf = n as f64;
            let t = BtrsRatio {
                n: nf,
                r: p / (1.0 - p),
                m: ((nf + 1.0) * p).floor(),
            };
            let (mut near, mut same) = (0u32, 0u32);
            for _ in 0..20_000 {
                let k = (t.m + (below(&mut rng, 49) as f64) - PRODUCT_SPAN).clamp(0.0, nf);
                let v = unit(&mut rng);
                if (k - t.m).abs() <= PRODUCT_SPAN {
                    near += 1;
                    same += u32::from(t.product_accepts(v, k) == t.log_accepts(v, k));
                }
            }
            assert_eq!(same, near, "n {n} p {p}");
        }
        // Whole draws: the sampler against one that always takes logarithms.
        for &(n, p) in &[(100u64, 0.2), (20_000, 0.004), (3_000_000, 0.4)] {
            let (mut x, mut y) = (seeded(11, n), seeded(11, n));
            for _ in 0..100_000 {
                assert_eq!(
                    binomial_btrs(&mut x, n, p),
                    btrs_with(&mut y, n, p, BtrsRatio::log_accepts),
                    "n {n} p {p}"
                );
            }
        }
    }

    #[test]
    fn binomial_edges() {
        let mut rng = seeded(1, 1);
        assert_eq!(binomial(&mut rng, 0, 0.5), 0);
        assert_eq!(binomial(&mut rng, 10, 0.0), 0);
        assert_eq!(binomial(&mut rng, 10, 1.0), 10);
        for _ in 0..1000 {
            assert!(binomial(&mut rng, 30, 0.999) <= 30);
            assert!(binomial(&mut rng, 300, 0.5) <= 300);
        }
    }
}
