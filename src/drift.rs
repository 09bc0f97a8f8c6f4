//! Drift of one scored batch against the signed run: the flag rate against
//! the rate expected of normal rows (Shewhart p-chart limits and an exact
//! binomial test), and per feature the batch mean's shift in reference
//! standard deviations and the two-sample Kolmogorov-Smirnov statistic
//! against the reference sample run.json keeps.
//!
//! Pure accumulation and arithmetic: the batch is seen row by row in file
//! order, so the numbers do not depend on how the reader cut it into chunks.
//! No I/O, no formatting.

use crate::record::{DriftReference, FeatureReference};

/// Flag rate of a batch against one expected rate.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct RateCheck {
    /// Where the expected rate comes from.
    pub expected_from: String,
    /// p̄, the expected flag rate of normal rows.
    pub expected: f64,
    /// The batch's flag rate.
    pub observed: f64,
    /// Lower p-chart limit, max(0, p̄ − 3√(p̄(1 − p̄)/n)).
    pub lower_limit: f64,
    /// Upper p-chart limit, min(1, p̄ + 3√(p̄(1 − p̄)/n)).
    pub upper_limit: f64,
    /// Whether the observed rate lies outside the limits (never when p̄ is 0
    /// or 1: the chart then has no width, and a validation rate of 0 only
    /// says that the rate is small).
    pub outside_limits: bool,
    /// Exact two-sided binomial p-value of the flagged count under p̄.
    pub binomial_p_value: f64,
}

/// One feature's drift.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct FeatureDrift {
    /// Feature name.
    pub name: String,
    /// The batch mean.
    pub batch_mean: f64,
    /// The reference mean.
    pub reference_mean: f64,
    /// (batch mean − reference mean) / reference SD (null when the SD is 0).
    pub shift_in_sd: Option<f64>,
    /// The two-sample Kolmogorov-Smirnov statistic, sup |F_batch − F_reference|.
    pub ks_statistic: f64,
}

/// The drift report of one batch.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct DriftReport {
    /// Rows in the batch.
    pub rows: u64,
    /// Rows flagged (s > τ).
    pub flagged: u64,
    /// The flag rate against each expected rate.
    pub flag_rate: Vec<RateCheck>,
    /// Which rows the feature reference is, in words.
    pub reference_rows: String,
    /// Rows in the reference sample.
    pub reference_sample_rows: usize,
    /// Per feature, in the feature set's order.
    pub features: Vec<FeatureDrift>,
}

impl DriftReport {
    /// Whether any flag rate lies outside its p-chart limits.
    pub fn is_outside_limits(&self) -> bool {
        self.flag_rate.iter().any(|r| r.outside_limits)
    }
}

/// Shewhart p-chart limits for n rows at expected rate p̄ (Montgomery,
/// "Introduction to Statistical Quality Control", the control chart for
/// fraction nonconforming: p̄ ± 3√(p̄(1 − p̄)/n)), clipped to [0, 1].
pub fn p_chart_limits(p: f64, n: u64) -> (f64, f64) {
    if n == 0 {
        return (0.0, 1.0);
    }
    let half = 3.0 * (p * (1.0 - p) / n as f64).sqrt();
    ((p - half).max(0.0), (p + half).min(1.0))
}

/// Exact two-sided binomial test of k successes in n trials at rate p: the
/// sum of the probabilities of every outcome no more likely than k (the
/// "minimum likelihood" two-sided p-value; the rule of R's `binom.test` and
/// scipy's `binomtest`, with the same relative tolerance 1 + 1e-7 for
/// outcomes of equal probability). Probabilities from statrs' binomial pmf.
pub fn binomial_two_sided(k: u64, n: u64, p: f64) -> f64 {
    use statrs::distribution::{Binomial, Discrete};
    if n == 0 {
        return 1.0;
    }
    if p <= 0.0 {
        return if k == 0 { 1.0 } else { 0.0 };
    }
    if p >= 1.0 {
        return if k == n { 1.0 } else { 0.0 };
    }
    let Ok(b) = Binomial::new(p, n) else {
        return f64::NAN;
    };
    let d = b.pmf(k) * (1.0 + 1e-7);
    // Only outcomes within t of the mean are summed. By Bernstein's
    // inequality for a sum of Bernoulli variables (variance np(1 − p) ≤ μ,
    // each term within 1 of its mean), P(|X − μ| ≥ t) ≤ 2 exp(−t² / (2(μ +
    // t/3))); t solves t² / (2(μ + t/3)) = 745, so the outcomes left out
    // together have probability below 2 exp(−745), under the smallest
    // positive double. The cost is O(√n + 745) terms instead of n + 1.
    let mu = n as f64 * p;
    let c = 745.0;
    let t = (2.0 * c / 3.0 + (4.0 * c * c / 9.0 + 8.0 * c * mu).sqrt()) / 2.0;
    let lo = (mu - t).floor().max(0.0) as u64;
    let hi = ((mu + t).ceil() as u64).min(n);
    // Summed in a fixed order (ascending outcomes).
    let total: f64 = (lo..=hi).map(|i| b.pmf(i)).filter(|&q| q <= d).sum();
    total.min(1.0)
}

/// The flag-rate check against one expected rate.
pub fn rate_check(from: &str, expected: f64, flagged: u64, rows: u64) -> RateCheck {
    let observed = if rows == 0 {
        0.0
    } else {
        flagged as f64 / rows as f64
    };
    let (lower_limit, upper_limit) = p_chart_limits(expected, rows);
    RateCheck {
        expected_from: from.into(),
        expected,
        observed,
        lower_limit,
        upper_limit,
        outside_limits: rows > 0
            && expected > 0.0
            && expected < 1.0
            && (observed < lower_limit || observed > upper_limit),
        binomial_p_value: binomial_two_sided(flagged, rows, expected),
    }
}

/// One feature's running state: a sum in row order and, for the KS
/// statistic, how many batch values fall on each distinct reference value and
/// in each gap between them (exact, O(reference) memory).
#[derive(Debug, Clone)]
struct FeatureState {
    sum: f64,
    /// Distinct reference values, ascending, with how many reference rows hold each.
    distinct: Vec<(f64, u64)>,
    /// bins[2g]: batch values strictly inside gap g (below distinct[g]);
    /// bins[2e + 1]: batch values equal to distinct[e].
    bins: Vec<u64>,
}

/// Accumulates a batch's drift, chunk by chunk in row order.
#[derive(Debug, Clone)]
pub struct DriftAccumulator {
    features: Vec<FeatureState>,
    rows: u64,
    flagged: u64,
}

impl DriftAccumulator {
    /// A fresh accumulator for the reference's features.
    pub fn new(reference: &DriftReference) -> Self {
        let features = reference
            .features
            .iter()
            .map(|f| {
                let mut distinct: Vec<(f64, u64)> = Vec::new();
                for &v in &f.sorted_sample {
                    match distinct.last_mut() {
                        Some((u, c)) if *u == v => *c += 1,
                        _ => distinct.push((v, 1)),
                    }
                }
                let bins = vec![0; 2 * distinct.len() + 1];
                FeatureState {
                    sum: 0.0,
                    distinct,
                    bins,
                }
            })
            .collect();
        DriftAccumulator {
            features,
            rows: 0,
            flagged: 0,
        }
    }

    /// Adds rows: `columns[j]` holds feature j's values of the chunk, in row
    /// order; `flagged` counts the chunk's flagged rows.
    pub fn add(&mut self, columns: &[Vec<f64>], rows: u64, flagged: u64) {
        self.rows += rows;
        self.flagged += flagged;
        for (f, col) in self.features.iter_mut().zip(columns) {
            for &v in col {
                f.sum += v;
                let pos = f.distinct.partition_point(|d| d.0 < v);
                let bin = if pos < f.distinct.len() && f.distinct[pos].0 == v {
                    2 * pos + 1
                } else {
                    2 * pos
                };
                f.bins[bin] += 1;
            }
        }
    }

    /// The report, with the expected flag rates `(where from, rate)`.
    pub fn finish(&self, reference: &DriftReference, expected: &[(String, f64)]) -> DriftReport {
        let features = self
            .features
            .iter()
            .zip(&reference.features)
            .map(|(s, r)| feature_drift(s, r, self.rows))
            .collect();
        DriftReport {
            rows: self.rows,
            flagged: self.flagged,
            flag_rate: expected
                .iter()
                .map(|(from, p)| rate_check(from, *p, self.flagged, self.rows))
                .collect(),
            reference_rows: reference.rows.clone(),
            reference_sample_rows: reference.sample_rows,
            features,
        }
    }
}

fn feature_drift(s: &FeatureState, r: &FeatureReference, rows: u64) -> FeatureDrift {
    let batch_mean = if rows == 0 {
        f64::NAN
    } else {
        s.sum / rows as f64
    };
    let shift_in_sd = (r.sd > 0.0 && rows > 0).then(|| (batch_mean - r.mean) / r.sd);
    FeatureDrift {
        name: r.name.clone(),
        batch_mean,
        reference_mean: r.mean,
        shift_in_sd,
        ks_statistic: ks_from_bins(&s.distinct, &s.bins),
    }
}

/// sup |F_batch − F_reference| from the binned counts. F_reference is flat
/// on each gap, so the supremum over a gap is at its ends: at the distinct
/// value that opens it and just below the one that closes it.
fn ks_from_bins(distinct: &[(f64, u64)], bins: &[u64]) -> f64 {
    let nb: u64 = bins.iter().sum();
    let nr: u64 = distinct.iter().map(|d| d.1).sum();
    if nb == 0 || nr == 0 {
        return 0.0;
    }
    let (nb, nr_f) = (nb as f64, nr as f64);
    let (mut b, mut r, mut d) = (0u64, 0u64, 0f64);
    let mut look = |b: u64, r: u64| {
        d = d.max((b as f64 / nb - r as f64 / nr_f).abs());
    };
    for (g, &gap) in bins.iter().enumerate() {
        if g % 2 == 0 {
            b += gap;
        } else {
            b += gap;
            r += distinct[g / 2].1;
        }
        look(b, r);
    }
    d
}

/// The two-sample Kolmogorov-Smirnov statistic of two samples, directly
/// (for tests and for small samples).
pub fn ks_two_sample(a: &[f64], b: &[f64]) -> f64 {
    let reference = FeatureReference::of("x", b);
    let r = DriftReference {
        feature_set: String::new(),
        rows: String::new(),
        sample_rows: b.len(),
        validation_false_positive_rate: None,
        features: vec![reference],
    };
    let mut acc = DriftAccumulator::new(&r);
    acc.add(&[a.to_vec()], a.len() as u64, 0);
    ks_from_bins(&acc.features[0].distinct, &acc.features[0].bins)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Against the definition sup over every sample point of |F_a − F_b|.
    #[test]
    fn ks_equals_the_definition_on_tied_samples() {
        use rand_chacha::rand_core::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(32);
        for _ in 0..200 {
            let na = 1 + (rng.next_u32() % 30) as usize;
            let nb = 1 + (rng.next_u32() % 30) as usize;
            let a: Vec<f64> = (0..na).map(|_| (rng.next_u32() % 7) as f64).collect();
            let b: Vec<f64> = (0..nb).map(|_| (rng.next_u32() % 9) as f64 - 1.0).collect();
            let cdf =
                |s: &[f64], x: f64| s.iter().filter(|&&v| v <= x).count() as f64 / s.len() as f64;
            let want = a
                .iter()
                .chain(&b)
                .map(|&x| (cdf(&a, x) - cdf(&b, x)).abs())
                .fold(0.0, f64::max);
            assert!((ks_two_sample(&a, &b) - want).abs() < 1e-15);
        }
    }

    /// p-chart limits at p̄ = 0.05, n = 400: 0.05 ± 3 · 0.0108972 (hand
    /// computed from the formula: √(0.05 · 0.95 / 400) = 0.010897247).
    #[test]
    fn p_chart_limits_follow_the_formula() {
        let (lo, hi) = p_chart_limits(0.05, 400);
        assert!((lo - 0.017308).abs() < 1e-6 && (hi - 0.082692).abs() < 1e-6);
        assert_eq!(p_chart_limits(0.01, 10).0, 0.0);
    }

    /// Exact binomial test on hand-computed cases (the python reference test
    /// checks it against scipy's `binomtest` too): 7 of 10 at 0.5 excludes
    /// only X = 4, 5, 6, so p = 352/1024 = 0.34375; 0 of 20 at 0.05 has
    /// P(X = 0) = 0.95^20 = 0.358486 and only X = 1 (0.377354) is more
    /// likely, so p = 1 − 0.377354 = 0.622646.
    #[test]
    fn binomial_two_sided_matches_hand_computed_values() {
        assert!((binomial_two_sided(7, 10, 0.5) - 0.34375).abs() < 1e-12);
        assert!((binomial_two_sided(0, 20, 0.05) - 0.6226464).abs() < 1e-6);
        assert_eq!(binomial_two_sided(5, 10, 0.0), 0.0);
        assert_eq!(binomial_two_sided(0, 0, 0.3), 1.0);
    }

    /// The windowed sum equals the full sum of n + 1 terms (to rounding) on
    /// skewed and symmetric cases.
    #[test]
    fn the_binomial_window_leaves_out_nothing_that_counts() {
        use statrs::distribution::{Binomial, Discrete};
        for &(k, n, p) in &[
            (3u64, 20_000u64, 1e-4),
            (9, 20_000, 1e-4),
            (0, 5_000, 0.001),
            (2_600, 50_000, 0.05),
            (2_500, 50_000, 0.05),
            (40, 50_000, 0.0005),
        ] {
            let b = Binomial::new(p, n).unwrap();
            let d = b.pmf(k) * (1.0 + 1e-7);
            let full: f64 = (0..=n).map(|i| b.pmf(i)).filter(|&q| q <= d).sum();
            let ours = binomial_two_sided(k, n, p);
            assert!(
                (ours - full.min(1.0)).abs() <= 1e-12 * full.max(1e-300),
                "{k} {n} {p}: {ours} vs {full}"
            );
        }
    }
}
