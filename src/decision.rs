//! A decision at a threshold: [`Threshold`], which owns the flag rule
//! `s > τ`, and [`Confusion`], the counts of that decision against the
//! labels with the rates read off them. The lowest layer of evaluation: the
//! summary, the metrics, the threshold search, scoring and diff build on it;
//! it depends on nothing else here.

/// Counts of a binary decision against the labels (anomaly = positive).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
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

/// A threshold τ on the score s(x) = −ln p(x) (or a command's own score). It
/// owns the flag rule: every path that flags a row (run, score, diff, the
/// metrics and the figures) asks [`Threshold::flags`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Threshold(pub f64);

impl Threshold {
    /// The flag rule: a row is flagged when its score exceeds τ, `s > τ`
    /// (a score equal to τ is not flagged; a NaN τ flags nothing).
    pub fn flags(&self, s: f64) -> bool {
        s > self.0
    }
}

impl Confusion {
    /// Counts the decision [`Threshold::flags`] ("flag iff score > τ").
    pub fn at(scores: &[f64], is_anomaly: &[bool], t: Threshold) -> Self {
        let mut c = Confusion::default();
        for (&s, &a) in scores.iter().zip(is_anomaly) {
            match (t.flags(s), a) {
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

    /// TN / (TN + FP).
    pub fn specificity(&self) -> Option<f64> {
        ratio(self.tn, self.tn + self.fp)
    }

    /// FP / (FP + TN).
    pub fn false_positive_rate(&self) -> Option<f64> {
        ratio(self.fp, self.fp + self.tn)
    }

    /// (recall + specificity) / 2.
    pub fn balanced_accuracy(&self) -> Option<f64> {
        Some((self.recall()? + self.specificity()?) / 2.0)
    }

    /// Fβ = (1 + β²) TP / ((1 + β²) TP + β² FN + FP).
    pub fn f_beta(&self, beta: f64) -> Option<f64> {
        let b2 = beta * beta;
        let num = (1.0 + b2) * self.tp as f64;
        let den = num + b2 * self.fn_ as f64 + self.fp as f64;
        (den > 0.0).then(|| num / den)
    }

    /// Matthews correlation (TP·TN − FP·FN) / √((TP+FP)(TP+FN)(TN+FP)(TN+FN));
    /// `None` when a margin is empty.
    pub fn mcc(&self) -> Option<f64> {
        let (tp, fp, fn_, tn) = (
            self.tp as f64,
            self.fp as f64,
            self.fn_ as f64,
            self.tn as f64,
        );
        let den = (tp + fp) * (tp + fn_) * (tn + fp) * (tn + fn_);
        (den > 0.0).then(|| (tp * tn - fp * fn_) / den.sqrt())
    }
}
