//! Pure functions of (scores, labels, threshold): the confusion matrix and the
//! rates derived from it, with Wilson score intervals.
//!
//! No I/O and no formatting. A rate whose denominator is zero is `None`, never
//! a made-up 0 or 1.

/// z for a two-sided 95 % interval: Φ⁻¹(0.975), as used in Newcombe (1998).
pub const Z_95: f64 = 1.959_963_984_540_054;

/// Counts of a binary decision against the labels (anomaly = positive).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize)]
pub struct Confusion {
    /// Anomalies flagged.
    pub tp: u64,
    /// Normal rows flagged.
    pub fp: u64,
    /// Anomalies not flagged.
    #[serde(rename = "fn")]
    pub fn_: u64,
    /// Normal rows not flagged.
    pub tn: u64,
}

fn ratio(num: u64, den: u64) -> Option<f64> {
    (den > 0).then(|| num as f64 / den as f64)
}

impl Confusion {
    /// Counts the decision "flag iff score > τ".
    pub fn at(scores: &[f64], is_anomaly: &[bool], tau: f64) -> Self {
        let mut c = Confusion::default();
        for (&s, &a) in scores.iter().zip(is_anomaly) {
            match (s > tau, a) {
                (true, true) => c.tp += 1,
                (true, false) => c.fp += 1,
                (false, true) => c.fn_ += 1,
                (false, false) => c.tn += 1,
            }
        }
        c
    }

    /// TP / (TP + FP).
    pub fn precision(&self) -> Option<f64> {
        ratio(self.tp, self.tp + self.fp)
    }

    /// TP / (TP + FN).
    pub fn recall(&self) -> Option<f64> {
        ratio(self.tp, self.tp + self.fn_)
    }

    /// F1 = 2TP / (2TP + FP + FN), the harmonic mean of precision and recall.
    pub fn f1(&self) -> Option<f64> {
        let (num, den) = self.f1_fraction();
        ratio(num, den)
    }

    /// F1 as an exact fraction (numerator, denominator), for exact comparisons.
    pub fn f1_fraction(&self) -> (u64, u64) {
        (2 * self.tp, 2 * self.tp + self.fp + self.fn_)
    }

    /// (TP + TN) / N. Misleading on skewed labels: a detector that flags
    /// nothing scores N₀/N.
    pub fn accuracy(&self) -> Option<f64> {
        ratio(self.tp + self.tn, self.tp + self.fp + self.fn_ + self.tn)
    }
}

/// Compares two fractions a/b and c/d exactly (zero denominators count as 0).
pub fn cmp_fraction(a: (u64, u64), c: (u64, u64)) -> std::cmp::Ordering {
    let l = if a.1 == 0 {
        0
    } else {
        a.0 as u128 * c.1.max(1) as u128
    };
    let r = if c.1 == 0 {
        0
    } else {
        c.0 as u128 * a.1.max(1) as u128
    };
    l.cmp(&r)
}

/// A two-sided interval.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Interval {
    /// Lower bound.
    pub low: f64,
    /// Upper bound.
    pub high: f64,
}

/// Wilson score interval for k successes in n trials (Wilson 1927; method 3
/// of Newcombe 1998), no continuity correction. `None` when n = 0.
pub fn wilson(k: u64, n: u64, z: f64) -> Option<Interval> {
    if n == 0 {
        return None;
    }
    let n_f = n as f64;
    let p = k as f64 / n_f;
    let z2 = z * z;
    let centre = p + z2 / (2.0 * n_f);
    let half = z * (p * (1.0 - p) / n_f + z2 / (4.0 * n_f * n_f)).sqrt();
    let den = 1.0 + z2 / n_f;
    let low = if k == 0 { 0.0 } else { (centre - half) / den };
    let high = if k == n { 1.0 } else { (centre + half) / den };
    Some(Interval { low, high })
}

/// The metrics reported for one candidate on one split.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct Metrics {
    /// The confusion matrix.
    pub confusion: Confusion,
    /// Precision.
    pub precision: Option<f64>,
    /// 95 % Wilson interval for precision.
    pub precision_95: Option<Interval>,
    /// Recall.
    pub recall: Option<f64>,
    /// 95 % Wilson interval for recall.
    pub recall_95: Option<Interval>,
    /// F1.
    pub f1: Option<f64>,
    /// Accuracy: misleading on skewed labels, reported only beside that warning.
    pub accuracy: Option<f64>,
}

impl Metrics {
    /// All metrics of a confusion matrix.
    pub fn of(c: Confusion) -> Self {
        Metrics {
            confusion: c,
            precision: c.precision(),
            precision_95: wilson(c.tp, c.tp + c.fp, Z_95),
            recall: c.recall(),
            recall_95: wilson(c.tp, c.tp + c.fn_, Z_95),
            f1: c.f1(),
            accuracy: c.accuracy(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// REFERENCES.md section 5: TP 8, FP 3, FN 2, TN 1987 (exact fractions;
    /// scikit-learn 1.9.1 agrees within a few ulp).
    #[test]
    fn rates_from_a_confusion_matrix() {
        let c = Confusion {
            tp: 8,
            fp: 3,
            fn_: 2,
            tn: 1987,
        };
        let close = |a: Option<f64>, b: f64| assert!((a.unwrap() - b).abs() <= 1e-12, "{a:?} {b}");
        close(c.precision(), 0.7272727272727273);
        close(c.recall(), 0.8);
        close(c.f1(), 0.7619047619047619);
        close(c.accuracy(), 1995.0 / 2000.0);
        assert_eq!(c.f1_fraction(), (16, 21));
    }

    #[test]
    fn undefined_rates_are_none() {
        let c = Confusion {
            tp: 0,
            fp: 0,
            fn_: 3,
            tn: 10,
        };
        assert_eq!(c.precision(), None);
        assert_eq!(c.recall(), Some(0.0));
        assert_eq!(c.f1(), Some(0.0));
    }

    /// Newcombe (1998) Table I, method 3 (Wilson score), 4-dp published values,
    /// via REFERENCES.md section 1 (statsmodels 0.15.0 doubles for the tight check).
    #[test]
    fn wilson_matches_newcombe_table_one() {
        let cases = [
            (81, 263, 0.2552885198782742, 0.36620957698280004),
            (15, 148, 0.06238639953073628, 0.16048724172330803),
            (0, 20, 0.0, 0.1611251580528194),
            (1, 29, 0.006113214292762667, 0.17175521879320294),
        ];
        for (k, n, lo, hi) in cases {
            let w = wilson(k, n, Z_95).unwrap();
            assert!((w.low - lo).abs() <= 1e-12, "{k}/{n} low {}", w.low);
            assert!((w.high - hi).abs() <= 1e-12, "{k}/{n} high {}", w.high);
        }
    }

    #[test]
    fn exact_fraction_order() {
        use std::cmp::Ordering::*;
        assert_eq!(cmp_fraction((10, 16), (12, 19)), Less);
        assert_eq!(cmp_fraction((1, 2), (2, 4)), Equal);
        assert_eq!(cmp_fraction((0, 0), (0, 5)), Equal);
    }
}
